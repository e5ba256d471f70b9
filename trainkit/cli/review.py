"""`trainkit review`: label patches in the terminal, or import, export and compare labels."""

from __future__ import annotations

import json
from pathlib import Path

import click
from rich.console import Console
from rich.table import Table

from trainkit.cli.options import json_option, parse_size, seed_option, workspace_argument
from trainkit.cli.output import EXIT_INTERRUPTED, Ctx, progress_bar, user_errors

__all__ = ["review"]


def _default_reviewer() -> str:
    import getpass

    try:
        return getpass.getuser()
    except Exception:  # no user name in this environment
        return "reviewer"


@click.command(
    epilog="Examples: trainkit review ws --reviewer ana | trainkit review ws --queue picked | "
    "trainkit review ws --queue boundary | "
    "trainkit review ws --model experiments/first | trainkit review ws --sheet --viewer "
    "xdg-open | trainkit review ws --agreement"
)
@workspace_argument(must_exist=False)
@click.option(
    "--reviewer",
    default=None,
    help="Your name, stored with every label (default: your login name).",
)
@click.option(
    "--queue",
    "queue_kind",
    type=click.Choice(["unlabelled", "audit", "conflicts", "picked", "boundary"]),
    default="unlabelled",
    show_default=True,
    help="unlabelled patches (those chosen by `trainkit pick` first); a random audit sample of "
    "labelled ones; reviewer disagreements to settle; only the picked patches, in pick order; "
    "or patches an imported crack drawing puts within 10 degrees of a class boundary (tile "
    "--import-masks / --import-centrelines), nearest first, to confirm.",
)
@click.option(
    "--model",
    type=click.Path(exists=True, path_type=Path),
    default=None,
    help="Exported model (EXP folder or .onnx): least certain patches first, its suggestion on "
    "Enter.",
)
@click.option(
    "--audit-size",
    type=click.IntRange(1, 1_000_000),
    default=50,
    show_default=True,
    help="Patches in the audit sample.",
)
@seed_option("Seed of the audit sample.")
@click.option("--sheet", is_flag=True, help="Contact-sheet mode: a numbered grid PNG per round.")
@click.option(
    "--grid", default="6x4", show_default=True, help="Contact sheet COLUMNSxROWS of patches."
)
@click.option(
    "--viewer",
    default=None,
    metavar="COMMAND",
    help="Program that opens images (e.g. xdg-open, feh, open); gets the PNG path.",
)
@click.option(
    "--agreement", is_flag=True, help="Report Cohen's kappa and confusion per reviewer pair."
)
@json_option("With --agreement: JSON output.")
@click.option(
    "--import-csv",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="Import labels from CSV (patch_id,label or photo,x0,y0,x1,y1,label; a label is a "
    "class name or 'unsure'; rows with an empty label are skipped and counted).",
)
@click.option(
    "--import-folder",
    type=click.Path(exists=True, file_okay=False, path_type=Path),
    help="Import labels from a folder per class of patch images.",
)
@click.option(
    "--export-csv",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Write the current labels to this CSV.",
)
@click.option(
    "--export-folder",
    type=click.Path(file_okay=False, path_type=Path),
    help="Copy labelled patches into a folder per class here.",
)
@click.pass_obj
def review(
    ctx: Ctx,
    ws_dir: Path,
    reviewer: str | None,
    queue_kind: str,
    model: Path | None,
    audit_size: int,
    seed: int,
    sheet: bool,
    grid: str,
    viewer: str | None,
    agreement: bool,
    as_json: bool,
    **transfers: Path | None,
) -> None:
    """Label patches in the terminal: one key per answer, undo, skip, resume any time.

    \b
    Key mode (default): the patch is drawn in colour with its estimated crack angle;
      number keys = classes in the workspace's order, Enter = accept the model's
      suggestion, x unsure, s skip, u undo, z zoom, c contact sheet, ? help, q quit.
    Sheet mode (--sheet, or when the terminal is too small): a numbered PNG grid,
      answered by a line such as 'all none except 3 7' or '5=vertical'.
    Every answer is saved at once with your name; run the same command to resume.
    With --import-*/--export-*/--agreement it does that and exits.
    """
    from trainkit.labels.review_run import ReviewRequest, prepare_session, run_review, summary_line
    from trainkit.store.workspace import Workspace

    reviewer = reviewer or _default_reviewer()
    with user_errors(ctx):
        ws = Workspace.open(ws_dir)
        if any(transfers.values()) or agreement:
            _transfer_labels(ctx.console, ws, reviewer, **transfers)
            if agreement:
                _print_agreement(ctx.console, ws, as_json)
            return
        request = ReviewRequest(
            reviewer=reviewer,
            queue=queue_kind,
            model=model,
            audit_size=audit_size,
            seed=seed,
            sheet=sheet,
            grid=parse_size(grid, "--grid", "6x4", bounds=(1, 20)),
            viewer=viewer,
        )
        if model is None:
            session = prepare_session(ws, request)
        else:
            with progress_bar(ctx, "model predictions") as bar:
                session = prepare_session(ws, request, progress=lambda d, n: bar.update(d, n))
        if session is None:
            hint = {
                "picked": f" (no unanswered picks; choose some with: trainkit pick {ws_dir} "
                "--patches N)",
                "boundary": " (no drawn patch near a class boundary waits for a person; crack "
                "drawings come in with: trainkit tile PHOTOS -w WS --import-masks DIR)",
            }.get(queue_kind, "")
            ctx.console.print(
                f"nothing to review in the {queue_kind} queue of {ws.root}{hint}", soft_wrap=True
            )
            return
        console = Console(highlight=False, soft_wrap=True)
        result = run_review(ws, request, session, console)
        console.print(summary_line(result))
    if result["outcome"] == "interrupted":  # every answer is saved; say it was not a finish
        raise SystemExit(EXIT_INTERRUPTED)


def _transfer_labels(
    console: Console,
    ws,
    reviewer: str,
    import_csv: Path | None,
    import_folder: Path | None,
    export_csv: Path | None,
    export_folder: Path | None,
) -> None:
    from trainkit.labels import labels_io

    if import_csv:
        res = labels_io.import_csv(ws, import_csv, reviewer=reviewer)
        console.print(res.describe(import_csv, reviewer))
    if import_folder:
        res = labels_io.import_folders(ws, import_folder, reviewer=reviewer)
        console.print(res.describe(import_folder, reviewer))
    if export_csv:
        n = labels_io.export_csv(ws, export_csv)
        console.print(f"wrote {n} current labels to {export_csv}")
    if export_folder:
        counts = labels_io.export_folders(ws, export_folder)
        console.print(f"copied {sum(counts.values())} patches to {export_folder}: {counts}")


def _f3(v: float | None) -> str:
    return "n/a" if v is None or v != v else f"{v:.3f}"  # kappa is NaN when undefined


def _print_agreement(console: Console, ws, as_json: bool) -> None:
    from trainkit.labels.review import agreement, find_conflicts

    events = ws.label_events()
    pairs = agreement(events, ws.class_set)
    conflicts = find_conflicts(events)
    if as_json:
        click.echo(json.dumps({"pairs": pairs, "open_conflicts": len(conflicts)}, indent=2))
        return
    if not pairs:
        console.print("fewer than two reviewers have labelled this workspace: no agreement yet")
    for p in pairs:
        a, b = p["reviewers"]
        if not p["n"]:
            console.print(f"{a} and {b}: no patch labelled by both")
            continue
        console.print(
            f"{a} vs {b}: {p['n']} patches both labelled; Cohen's kappa {_f3(p['kappa'])} "
            f"(crack vs none {_f3(p['kappa_crack_vs_none'])}); raw agreement "
            f"{p['observed_agreement']:.1%}"
        )
        t = Table(title=f"rows: {a}, columns: {b}")
        t.add_column(f"{a} \\ {b}")
        for n in p["labels"]:
            t.add_column(n[:10], justify="right")
        for n, row in zip(p["labels"], p["confusion"], strict=True):
            t.add_row(n, *map(str, row))
        console.print(t)
    console.print(
        f"{len(conflicts)} unsettled disagreements"
        + (" (settle them with: trainkit review WS --queue conflicts)" if conflicts else "")
    )
