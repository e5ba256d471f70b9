"""A job's verification: its recall and false-alarm rate from the answered sample, a verdict, a report.

``trainkit verify SCAN --workspace WS [--job NAME] [--require-recall R]`` reads the job's
sampled cells and their answers from the workspace, estimates the job's crack recall,
false-alarm rate and flagged share at the model's threshold with 95 % intervals made
for stratified sampling (:mod:`trainkit.jobs.estimate`), the threshold that would
reach the target recall on this job with its false-alarm cost, and writes
``SCAN/jobs/<job>/verification.json`` and ``verification.html``
(:class:`~trainkit.jobs.files.JobFiles`). With ``require_recall`` the verdict uses the
same gate language as ``trainkit evaluate``: refused when the interval's lower bound
falls short.

Every check is kept: the workspace appends it to the job's checks (with its bound, time,
verdict and the model's path and SHA-256), the model's experiment folder appends it to
``jobs.json`` and its model card lists every check, and ``verification.json`` holds the
latest one with all earlier ones of the job listed; a refusal stays on record beside a
later acceptance. Everything a check depends on (the answers, the scan's model record,
the model's checkpoint when the card is to be rewritten) is loaded before anything is
written.
"""

from __future__ import annotations

import datetime as _dt
from pathlib import Path

import numpy as np

from trainkit.core.caution import CAUTION
from trainkit.core.errors import TrainkitError
from trainkit.core.fsutil import atomic_write_json, atomic_write_text, file_sha256
from trainkit.core.jsonsafe import json_ready
from trainkit.jobs.design import STRATA
from trainkit.jobs.estimate import (
    EstimateError,
    design_weights,
    estimate_job,
    job_threshold_summary,
)
from trainkit.jobs.files import VERIFICATION_FILE, VERIFICATION_REPORT, JobFiles
from trainkit.jobs.sample import check_job_name, learned_frames, read_scan_cells, scan_model
from trainkit.store.workspace import Workspace

__all__ = ["VerifyError", "verify_scan", "VERIFICATION_FILE", "VERIFICATION_REPORT"]

#: The verdict recorded for a check run without ``--require-recall``.
NO_BOUND = "no bound asked"


class VerifyError(TrainkitError):
    """A job that cannot be verified yet; the message says what to do."""


def _job_of(ws: Workspace, scan_dir: Path, job: str | None) -> dict:
    jobs = ws.jobs()
    if job is not None:
        check_job_name(job, error=VerifyError)
        found = [j for j in jobs if j["name"] == job]
        if not found:
            names = ", ".join(j["name"] for j in jobs) or "none"
            raise VerifyError(f"workspace {ws.root} holds no job {job!r}; its jobs: {names}")
        return found[0]
    scan = str(scan_dir.resolve())
    found = [j for j in jobs if j["scan"] == scan]
    if not found:
        raise VerifyError(
            f"workspace {ws.root} holds no sample of {scan_dir}; run "
            f"`trainkit sample {scan_dir} --workspace {ws.root} --cells N --seed S` first"
        )
    return found[-1]


def verify_scan(
    scan_dir: str | Path,
    workspace: Workspace,
    *,
    job: str | None = None,
    require_recall: float | None = None,
    target_recall: float = 0.95,
    confidence: float = 0.95,
) -> dict:
    """Estimate a job's figures from its answered sample and record the check everywhere.

    Args:
        scan_dir: the scan folder the job's sample came from.
        workspace: the workspace holding the sample and its answers.
        job: the job's name (default: the latest sample of this scan).
        require_recall: acceptance gate on the recall interval's lower bound, or None.
        target_recall: recall the suggested job threshold should reach.
        confidence: two-sided level of the intervals.

    Returns:
        The verification dict (as written to the job's verification.json).

    Raises:
        VerifyError: no sample, no answers, a stratum with no answered cell, or a model
            checkpoint that cannot be loaded to rewrite its card (nothing is written then).
    """
    scan_dir = Path(scan_dir)
    if require_recall is not None and not 0.0 <= require_recall <= 1.0:
        raise VerifyError(f"--require-recall must be in [0, 1], got {require_recall}")
    j = _job_of(workspace, scan_dir, job)
    cells = workspace.job_cells(j["name"])
    model = scan_model(scan_dir)
    _refuse_learned_frames(learned_frames(model), j["name"], cells)
    answered = [c for c in cells if c["answered"] and c["label"] is not None]
    unresolved = [c for c in cells if not (c["answered"] and c["label"] is not None)]
    population = {s["stratum"]: s["cells"] for s in j["design"]["strata"]}
    try:
        est = estimate_job(
            [c["stratum"] for c in answered],
            np.array([c["label"] != "none" for c in answered], dtype=bool),
            population,
            unresolved_strata=[c["stratum"] for c in unresolved],
            confidence=confidence,
        )
    except EstimateError as exc:
        raise VerifyError(f"job {j['name']!r}: {exc}") from None
    suggestion = _suggested_threshold(scan_dir, answered, population, target_recall)
    # Everything the records depend on is loaded before the first one is written.
    model = _model_record(model, scan_dir)
    experiment = _experiment_of(model)
    gate = _gate(est, require_recall, confidence)
    result = {
        "job": j["name"],
        "scan": j["scan"],
        "threshold": j["threshold"],
        "cells_sampled": len(cells),
        "frames_learned_from_left_out": j["design"].get("frames_learned_from_left_out", 0),
        "cells_answered": len(answered),
        "cells_unsure_or_unanswered": {
            "unsure": sum(c["answered"] for c in unresolved),
            "unanswered": sum(not c["answered"] for c in unresolved),
        },
        "unresolved_cells": [
            {
                "patch_id": c["patch_id"],
                "frame": c["frame"],
                "box": list(c["box"]),
                "stratum": c["stratum"],
                "state": "unsure" if c["answered"] else "unanswered",
            }
            for c in unresolved
        ],  # fmt: skip
        "estimate": est.to_dict(),
        "suggested_threshold": suggestion,
        "required_recall": require_recall,
        "gate": gate,
        "verdict": gate["verdict"] if gate else NO_BOUND,
        "created": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "caution": CAUTION,
        "model": model,
    }
    result = json_ready(result)
    files = JobFiles(scan_dir, j["name"])
    workspace.record_verification(j["name"], _history_entry(result))
    result["history"] = [
        {k: v for k, v in h.items() if k != "id"} for h in workspace.verifications(j["name"])
    ]
    result["recorded_in"] = _record_in_experiment(result, experiment)
    files.folder.mkdir(parents=True, exist_ok=True)
    atomic_write_json(files.verification_json, result)
    atomic_write_text(files.verification_html, job_report(result))
    result["report"] = str(files.verification_html)
    return result


def _model_record(model: dict | None, scan_dir: Path) -> dict | None:
    """The scan's model record with the SHA-256 of the model file as it is now (None when
    the file is gone; compare ``data_digest``, which the scan recorded from the model) and
    as it was at scan time (``sha256_at_scan``; None for scans made before it was kept).

    Raises:
        VerifyError: the model file's bytes differ from the ones that made the scan.
    """
    if not model:
        return None
    path = Path(model.get("model", ""))
    digest = file_sha256(path) if path.is_file() else None
    at_scan = model.get("model_sha256")
    if digest is not None and at_scan is not None and digest != at_scan:
        raise VerifyError(
            f"model {path} changed since scan {scan_dir} was made (SHA-256 {at_scan} at the "
            f"scan, {digest} now; re-exported?); the sample's probabilities are the old "
            "model's, so this check would name the wrong model. Scan the frames again with "
            "this model (and sample again), or restore the model file that made the scan"
        )
    rec = {k: v for k, v in model.items() if k != "model_sha256"}
    return {**rec, "sha256": digest, "sha256_at_scan": at_scan}


def _history_entry(result: dict) -> dict:
    """What the workspace keeps of one check (append-only)."""
    est = result["estimate"]
    model = result.get("model") or {}
    return {
        "job": result["job"],
        "checked": result["created"],
        "required_recall": result["required_recall"],
        "passed": (result["gate"] or {}).get("passed"),
        "verdict": result["verdict"],
        "gate": result["gate"],
        "cells_answered": result["cells_answered"],
        "recall": est["recall"],
        "false_alarm_rate": est["false_alarm_rate"],
        "model": {"model": model.get("model"), "sha256": model.get("sha256"),
                  "sha256_at_scan": model.get("sha256_at_scan"),
                  "data_digest": model.get("data_digest")},
    }  # fmt: skip


def _refuse_learned_frames(learned: dict[str, str], job: str, cells: list[dict]) -> None:
    """Refuse a job whose cells come from frames the scan's model learned from."""
    seen = [c for c in cells if c["frame_sha256"] in learned]
    if seen:
        frames = sorted({c["frame"] for c in seen})
        raise VerifyError(
            f"job {job!r}: {len(seen)} of its cells come from {len(frames)} frames the scan's "
            f"model learned from (trainkit train --from; e.g. {frames[0]}), so an estimate "
            "from them would flatter it. Draw a new sample of this scan (`trainkit sample` "
            "leaves those frames out) and answer it"
        )


def _experiment_of(model: dict | None) -> tuple | None:
    """(experiment folder, loaded checkpoint) when the scanned model is that folder's own
    model.onnx beside a checkpoint (its jobs.json and card then record the check); else None.

    Raises:
        VerifyError: the checkpoint cannot be loaded (nothing has been written yet).
    """
    from trainkit.core.experiment import Experiment

    if not model:
        return None
    folder = Experiment(Path(model["model"]).parent)
    if Path(model["model"]).name != Experiment.MODEL or not folder.checkpoint_path.is_file():
        return None
    import torch

    path = folder.checkpoint_path
    # The checkpoint holds tensors and plain containers only: weights_only loading runs no code.
    try:
        ckpt = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # refused pickle, truncated zip, not a torch file
        raise VerifyError(
            f"{path} cannot be loaded as a trainkit checkpoint ({type(exc).__name__}), so the "
            "check cannot be recorded on its model card; nothing was written. Restore the "
            "checkpoint, or scan with a model exported by trainkit"
        ) from None
    if not isinstance(ckpt, dict):
        raise VerifyError(f"{path} is not a trainkit checkpoint; nothing was written")
    from trainkit.judging.model_card import model_card_text

    try:  # the card is rewritten after jobs.json: whatever it reads must load now
        export = folder.read_export()
        model_card_text(folder.path, ckpt, export)
    except (OSError, ValueError, KeyError, TypeError, AttributeError) as exc:
        raise VerifyError(
            f"the model card of {folder.path} cannot be written from its files "
            f"({type(exc).__name__}: {exc}), so the check cannot be recorded there; "
            "nothing was written"
        ) from None
    return folder, ckpt


def _record_in_experiment(result: dict, experiment: tuple | None) -> str | None:
    """Append the check to the model's experiment folder (jobs.json, then the model card,
    under the folder's jobs lock); returns the folder, or None."""
    if experiment is None:
        return None
    folder, ckpt = experiment
    est = result["estimate"]

    def f(v):
        return "n/a" if v is None else f"{v:.3f}"

    r, fa = est["recall"], est["false_alarm_rate"]
    model = result.get("model") or {}

    def rewrite_card() -> None:
        from trainkit.judging.model_card import write_model_card

        write_model_card(folder.path, ckpt, folder.read_export())

    folder.record_job(
        {
            "job": result["job"],
            "scan": result["scan"],
            "checked": result["created"],
            "cells_answered": result["cells_answered"],
            "recall": r,
            "false_alarm_rate": fa,
            "flagged_share": est["flagged_share"],
            "required_recall": result["required_recall"],
            "gate": result["gate"],
            "verdict": result["verdict"],
            "model_sha256": model.get("sha256"),
            "summary": f"recall {f(r['estimate'])} [{f(r['low'])}, {f(r['high'])}], false alarms "
            f"{f(fa['estimate'])} from {result['cells_answered']} cells; "
            + result["verdict"].split(":")[0],
        },
        then=rewrite_card,
    )
    return str(folder.path)


def _suggested_threshold(
    scan_dir: Path, answered: list[dict], population: dict, target: float
) -> dict | None:
    """The threshold reaching ``target`` recall on this job (None without answered cracks)."""
    cracks = [c for c in answered if c["label"] != "none"]
    if not cracks:
        return None
    sizes = np.array([population.get(s, 0) for s in STRATA])
    weights = design_weights([c["stratum"] for c in answered], sizes)
    census = read_scan_cells(scan_dir).probabilities
    return job_threshold_summary(
        np.array([c["screening_probability"] for c in answered]),
        np.array([c["label"] != "none" for c in answered], dtype=bool),
        weights,
        target_recall=target,
        census_probabilities=census,
    )


def _gate(est, require_recall: float | None, confidence: float) -> dict | None:
    if require_recall is None:
        return None
    low = est.recall.low
    passed = bool(np.isfinite(low) and low >= require_recall)
    level = f"{confidence:.0%}"
    word, relation = ("ACCEPTED", "is at least") if passed else ("REFUSED", "is below")
    verdict = (
        f"{word}: on this job the {level} lower bound of screening recall ({low:.3f}, "
        f"estimate {est.recall.estimate:.3f} from {est.answered} answered cells) {relation} "
        f"the required {require_recall:.3f}."
    )
    return {
        "required_recall": float(require_recall),
        "recall_lower_bound": low,
        "passed": passed,
        "verdict": verdict,
    }


def verdict_line(result: dict) -> str:
    """The verification in one or two sentences of words (for the terminal)."""
    e = result["estimate"]
    r, fa = e["recall"], e["false_alarm_rate"]

    def f(v):
        return "n/a" if v is None else f"{v:.3f}"

    text = (
        f"job {result['job']}: recall {f(r['estimate'])} [{f(r['low'])}, {f(r['high'])}], "
        f"false alarms {f(fa['estimate'])} [{f(fa['low'])}, {f(fa['high'])}] at threshold "
        f"{result['threshold']:.3f}, from {result['cells_answered']} answered cells"
    )
    un = result["cells_unsure_or_unanswered"]
    if un["unsure"] or un["unanswered"]:
        text += f" ({un['unsure']} unsure and {un['unanswered']} unanswered not counted)"
    if result["gate"]:
        text += ". " + result["gate"]["verdict"]
    earlier = (result.get("history") or [])[:-1]
    if earlier:
        refused = sum(h.get("passed") is False for h in earlier)
        text += (
            f" (check {len(earlier) + 1} of this job; the {len(earlier)} earlier ones stay on "
            f"record{f', {refused} of them refused' if refused else ''})"
        )
    return text


def _fmt(v) -> str:
    return "n/a" if v is None else f"{float(v):.3f}"


def job_report(result: dict) -> str:
    """A self-contained HTML page with the job's figures (the job section of the report)."""
    from trainkit.judging.html import esc, metric, page

    R = result
    rows = "".join(
        f"<tr><td>{esc(s['stratum'])}</td>"
        f"<td>{metric(R, f'estimate.strata.{i}.cells')}</td>"
        f"<td>{metric(R, f'estimate.strata.{i}.answered')}</td>"
        f"<td>{metric(R, f'estimate.strata.{i}.cracks')}</td>"
        f"<td>{metric(R, f'estimate.strata.{i}.unresolved')}</td></tr>"
        for i, s in enumerate(R["estimate"]["strata"])
    )
    gate = R.get("gate")
    verdict = (
        f'<p class="verdict {"pass" if gate["passed"] else "fail"}">{esc(gate["verdict"])}</p>'
        if gate
        else '<p class="verdict none">No acceptance gate was requested '
        "(<code>trainkit verify SCAN --workspace WS --require-recall R</code>).</p>"
    )
    sug = R.get("suggested_threshold")
    sug_html = (
        "<p>No crack was found among the answered cells, so no job threshold can be suggested.</p>"
        if not sug
        else f"<p>On this job a threshold of {metric(R, 'suggested_threshold.threshold')} would "
        f"reach an estimated recall of {metric(R, 'suggested_threshold.recall')}, flagging "
        f"{metric(R, 'suggested_threshold.flagged_share')} of all cells (false-alarm rate "
        f"{metric(R, 'suggested_threshold.false_alarm_rate')}). It was chosen on these same "
        "cells: check it again on cells it was not chosen on.</p>"
    )
    left_out = R.get("frames_learned_from_left_out") or 0
    learned_html = (
        f" {metric(R, 'frames_learned_from_left_out')} frames of the scan were left out of the "
        "sample because the model learned from them (it was adapted to this job): these "
        "figures describe the other frames."
        if left_out
        else ""
    )
    model = R.get("model") or {}
    model_html = (
        "<p>The scan recorded no model (an older scan), so this check names none.</p>"
        if not model
        else '<table class="kv">'
        f"<tr><th>model file</th><td><code>{esc(model.get('model'))}</code></td></tr>"
        f"<tr><th>SHA-256 of the file when checked</th><td><code>"
        f"{esc(model.get('sha256') or 'the file is gone')}</code></td></tr>"
        f"<tr><th>training-data digest it carries</th><td><code>"
        f"{esc(model.get('data_digest'))}</code></td></tr></table>"
    )
    unresolved = R.get("unresolved_cells") or []
    unresolved_html = (
        "<p>Every sampled cell is answered.</p>"
        if not unresolved
        else "<table><tr><th>patch id</th><th>frame</th><th>box (x0, y0, x1, y1)</th>"
        "<th>stratum</th><th>state</th></tr>"
        + "".join(
            f"<tr><td>{int(c['patch_id'])}</td><td>{esc(c['frame'])}</td>"
            f"<td>{esc(', '.join(str(int(v)) for v in c['box']))}</td><td>{esc(c['stratum'])}</td>"
            f"<td>{esc(c['state'])}</td></tr>"
            for c in unresolved
        )
        + "</table>"
    )
    history = R.get("history") or []
    history_html = "".join(
        f"<tr><td>{esc(h.get('checked'))}</td>"
        f"<td>{esc('none' if h.get('required_recall') is None else format(h['required_recall'], '.3f'))}</td>"
        f"<td>{esc(h.get('cells_answered'))}</td>"
        f"<td>{esc(_fmt((h.get('recall') or {}).get('estimate')))} "
        f"[{esc(_fmt((h.get('recall') or {}).get('low')))}, "
        f"{esc(_fmt((h.get('recall') or {}).get('high')))}]</td>"
        f"<td>{esc(h.get('verdict'))}</td>"
        f"<td><code>{esc(str((h.get('model') or {}).get('sha256') or 'n/a')[:12])}</code></td></tr>"
        for h in history
    )
    body = f"""<h1>Job check &mdash; {esc(R["job"])}</h1>
<p class="caution"><strong>Read this first.</strong> {esc(R["caution"])} These figures hold
for this job's frames only, estimated from a random sample of its cells.</p>
{verdict}
<p class="headline">Crack recall at the model's threshold {metric(R, "threshold")}:
<strong>{metric(R, "estimate.recall.estimate")}</strong>, 95% interval
{metric(R, "estimate.recall.low")}&ndash;{metric(R, "estimate.recall.high")}
({esc(R["estimate"]["recall"]["method"])}). False-alarm rate
{metric(R, "estimate.false_alarm_rate.estimate")}
({metric(R, "estimate.false_alarm_rate.low")}&ndash;{metric(R, "estimate.false_alarm_rate.high")});
share of cells flagged {metric(R, "estimate.flagged_share")} (exact, from the scan).</p>
<h2>The model checked</h2>{model_html}
<h2>The sample</h2>
<p>Cells were drawn at random within strata of the screening probability, so misses in the
unflagged pile are found with a known chance. {metric(R, "cells_answered")} of
{metric(R, "cells_sampled")} sampled cells are answered; unsure and unanswered cells are
not counted (they are listed below).{learned_html}</p>
<table><tr><th>stratum</th><th>cells in the scan</th><th>answered</th><th>cracks</th>
<th>unsure or unanswered</th></tr>{rows}</table>
<h2>Unsure and unanswered cells</h2>{unresolved_html}
<h2>A threshold for this job</h2>{sug_html}
<h2>Every check of this job</h2>
<p>Checks are kept, never replaced: a refusal stays on record beside a later acceptance.</p>
<table><tr><th>checked</th><th>required recall</th><th>answered cells</th>
<th>recall [95% interval]</th><th>verdict</th><th>model SHA-256</th></tr>{history_html}</table>
<p class="caution">{esc(R["caution"])}</p>"""
    return page(f"Job check: {R['job']}", body)
