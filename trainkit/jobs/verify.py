"""A job's verification: its recall and false-alarm rate from the answered sample, a verdict, a report.

``trainkit verify SCAN --workspace WS [--require-recall R]`` reads the job's sampled
cells and their answers from the workspace, estimates the job's crack recall,
false-alarm rate and flagged share at the model's threshold with 95 % intervals made
for stratified sampling (:mod:`trainkit.jobs.estimate`), the threshold that would
reach the target recall on this job with its false-alarm cost, and writes
``SCAN/verification.json`` and ``SCAN/verification.html``. With ``require_recall`` the
verdict uses the same gate language as ``trainkit evaluate``: refused when the
interval's lower bound falls short.
"""

from __future__ import annotations

import datetime as _dt
from pathlib import Path

import numpy as np

from trainkit.core.errors import TrainkitError
from trainkit.core.fsutil import atomic_write_json, atomic_write_text
from trainkit.jobs.design import STRATA
from trainkit.jobs.estimate import EstimateError, design_weights, estimate_job, threshold_for_recall
from trainkit.jobs.sample import learned_frames, read_scan_cells, scan_model
from trainkit.judging.scoring import CAUTION, json_ready
from trainkit.labels.workspace import Workspace

__all__ = ["VerifyError", "verify_scan", "VERIFICATION_FILE", "VERIFICATION_REPORT"]

VERIFICATION_FILE = "verification.json"
VERIFICATION_REPORT = "verification.html"


class VerifyError(TrainkitError):
    """A job that cannot be verified yet; the message says what to do."""


def _job_of(ws: Workspace, scan_dir: Path, job: str | None) -> dict:
    jobs = ws.jobs()
    if job is not None:
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
    """Estimate a job's figures from its answered sample and write the verification files.

    Args:
        scan_dir: the scan folder the job's sample came from.
        workspace: the workspace holding the sample and its answers.
        job: the job's name (default: the latest sample of this scan).
        require_recall: acceptance gate on the recall interval's lower bound, or None.
        target_recall: recall the suggested job threshold should reach.
        confidence: two-sided level of the intervals.

    Returns:
        The verification dict (as written to verification.json).

    Raises:
        VerifyError: no sample, no answers, or a stratum with no answered cell.
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
        "estimate": est.to_dict(),
        "suggested_threshold": suggestion,
        "gate": _gate(est, require_recall, confidence),
        "created": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "caution": CAUTION,
    }
    result["model"] = model
    result = json_ready(result)
    atomic_write_json(scan_dir / VERIFICATION_FILE, result, allow_nan=False)
    atomic_write_text(scan_dir / VERIFICATION_REPORT, job_report(result))
    result["recorded_in"] = _record_in_experiment(result, model)
    return result


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


def _record_in_experiment(result: dict, model: dict | None) -> str | None:
    """Add the job to the model's experiment folder (jobs.json, model card) when the scanned
    model is that folder's own model.onnx; returns the folder, or None."""
    from trainkit.core.experiment import Experiment

    if not model:
        return None
    folder = Experiment(Path(model["model"]).parent)
    if Path(model["model"]).name != Experiment.MODEL or not folder.checkpoint_path.is_file():
        return None
    est = result["estimate"]

    def f(v):
        return "n/a" if v is None else f"{v:.3f}"

    r, fa = est["recall"], est["false_alarm_rate"]
    folder.record_job(
        {
            "job": result["job"],
            "scan": result["scan"],
            "checked": result["created"],
            "cells_answered": result["cells_answered"],
            "recall": r,
            "false_alarm_rate": fa,
            "flagged_share": est["flagged_share"],
            "gate": result["gate"],
            "summary": f"recall {f(r['estimate'])} [{f(r['low'])}, {f(r['high'])}], false alarms "
            f"{f(fa['estimate'])} from {result['cells_answered']} cells",
        }
    )
    _rewrite_card(folder)
    return str(folder.path)


def _rewrite_card(folder) -> None:
    """Write the model card again so it lists the job just checked."""
    import torch

    from trainkit.judging.model_card import write_model_card

    ckpt = torch.load(folder.checkpoint_path, map_location="cpu", weights_only=True)
    write_model_card(folder.path, ckpt, folder.read_export())


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
    return threshold_for_recall(
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
    return text


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
<h2>The sample</h2>
<p>Cells were drawn at random within strata of the screening probability, so misses in the
unflagged pile are found with a known chance. {metric(R, "cells_answered")} of
{metric(R, "cells_sampled")} sampled cells are answered; unsure and unanswered cells are
not counted and are listed here.{learned_html}</p>
<table><tr><th>stratum</th><th>cells in the scan</th><th>answered</th><th>cracks</th>
<th>unsure or unanswered</th></tr>{rows}</table>
<h2>A threshold for this job</h2>{sug_html}
<p class="caution">{esc(R["caution"])}</p>"""
    return page(f"Job check: {R['job']}", body)
