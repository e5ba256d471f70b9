"""Build the model card (``model-card.md``) that ``trainkit export`` writes next to the ONNX file.

The card is plain Markdown made only from what the run recorded: the checkpoint
(config, best epoch, the experiment's split information), ``experiment.json``,
``evaluation/metrics.json`` (when the experiment was evaluated) and the export
summary. It never invents a figure: without ``metrics.json`` it says plainly that
the model was not evaluated and shows no metric numbers. Every number it prints
is rounded to 3 decimals (rates, recalls, thresholds) or given as a count. Text that
came from people (names of jobs, classes, folders, paths) goes through
:func:`~trainkit.core.textsafe.md_text` or :func:`~trainkit.core.textsafe.md_code`, so it
shows as written and can never add a line, a heading, a verdict or HTML to the card.
"""

from __future__ import annotations

import datetime as _dt
import json
from pathlib import Path
from typing import Any, cast

from trainkit.core.caution import CASCADE_WARNING_CAVEAT, CAUTION, SHORT_CAUTION
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_write_text
from trainkit.core.textsafe import md_code, md_text
from trainkit.judging.records import (
    AdaptationRecord,
    CheckpointRecord,
    ExportRecord,
    JobRecord,
    MetricsRecord,
    ProvenanceRecord,
    read_card_inputs,
)

__all__ = [
    "CARD_NAME",
    "NOT_EVALUATED",
    "build_model_card",
    "model_card_text",
    "write_model_card",
    "synthetic_training_data",
]

#: File name of the card inside the experiment folder.
CARD_NAME = Experiment.CARD
#: The sentence a card carries when the experiment has no evaluation/metrics.json.
NOT_EVALUATED = (
    "**Not evaluated.** This model has no evaluation on held-out photos "
    "(no `evaluation/metrics.json` when it was exported), so this card gives no recall, "
    "false-alarm or accuracy figures. Run `trainkit evaluate EXP` and export again "
    "before trusting it to pre-filter anything."
)


def _caution() -> str:
    return CAUTION


def _f(v: Any, digits: int = 3) -> str:
    """A number with fixed decimals, or "n/a" for undefined (null) values."""
    if v is None:
        return "n/a"
    return f"{float(v):.{digits}f}"


def _pct(conf: Any) -> str:
    return "n/a" if conf is None else f"{100 * float(conf):g}%"


def weights_line(ckpt: CheckpointRecord, *, markdown: bool = False) -> str:
    """Which weights training started from, in words (name, source, SHA-256 prefix).

    Checkpoints from before the weights record existed say what their recipe asked for.
    With ``markdown`` the recorded text is escaped for the card (the HTML report escapes
    the plain line itself).
    """
    text = md_text if markdown else str

    def code(v) -> str:
        return md_code(v) if markdown else f"`{v}`"

    rec = ckpt.get("weights")
    if isinstance(rec, dict):
        if rec.get("name") == "random initialisation":
            return "random initialisation (no pretrained weights)"
        parts = [text(rec.get("name", "?"))]
        if rec.get("source"):
            parts.append(f"from {text(rec['source'])}")
        if rec.get("sha256"):
            parts.append(f"SHA-256 {text(str(rec['sha256'])[:8])}...")
        return ", ".join(parts) + "; new classification head"
    asked = (ckpt.get("config") or {}).get("weights")
    if asked is None:
        return "random initialisation (no pretrained weights)"
    return f"not recorded (the recipe asked for weights {code(asked)}); new classification head"


def synthetic_training_data(workspace: str | Path | None) -> bool | None:
    """Whether the workspace's photos came from ``trainkit.synth``.

    A photo counts as synthetic when a ``manifest.json`` whose ``generator`` starts with
    ``trainkit.synth`` sits in its folder or the folder above (the layout
    :func:`trainkit.synth.write_dataset` writes).

    Args:
        workspace: the workspace folder the model was trained on.

    Returns:
        True if every photo is synthetic, False if at least one is not, None when the
        workspace cannot be read.
    """
    if workspace is None:
        return None
    try:
        from trainkit.store.workspace import Workspace

        photos = Workspace.open(workspace).photos()
    except (ValueError, OSError):
        return None
    if not photos:
        return None
    seen: dict[Path, bool] = {}

    def is_synth_dir(folder: Path) -> bool:
        if folder not in seen:
            manifest = folder / "manifest.json"
            ok = False
            if manifest.is_file():
                try:
                    gen = json.loads(manifest.read_text(encoding="utf-8")).get("generator", "")
                    ok = isinstance(gen, str) and gen.startswith("trainkit.synth")
                except (OSError, ValueError, AttributeError):
                    ok = False
            seen[folder] = ok
        return seen[folder]

    for ph in photos:
        src = Path(ph["source_path"])
        if not (is_synth_dir(src.parent) or is_synth_dir(src.parent.parent)):
            return False
    return True


def _range(pair: Any, unit: str, digits: int = 3) -> str:
    if not pair:
        return "unknown (photos without scale)"
    lo, hi = (float(v) for v in pair)
    return f"{lo:.{digits}f} to {hi:.{digits}f} {unit}"


def _training_data(experiment: ProvenanceRecord, synthetic: bool | None) -> list[str]:
    split = experiment.get("split") or {}
    counts = split.get("class_counts") or {}
    groups = split.get("groups") or {}
    patches = split.get("patches") or {}
    names = [c["name"] for c in (experiment.get("class_set") or {}).get("classes", [])]
    if not names and counts:
        names = list(next(iter(counts.values())).keys())
    subsets = ("train", "val", "test")
    lines = ["## Training data", ""]
    if counts:
        lines += [
            "Labelled patches per class and subset (from the split recorded with the checkpoint; "
            "patches marked unsure are left out):",
            "",
            "| class | train | val | test |",
            "|---|---:|---:|---:|",
        ]
        for n in names:
            lines.append(
                f"| {md_text(n)} | "
                + " | ".join(str(counts.get(s, {}).get(n, 0)) for s in subsets)
                + " |"
            )
        lines.append(
            "| **all** | "
            + " | ".join(str(patches.get(s, sum(counts.get(s, {}).values()))) for s in subsets)
            + " |"
        )
        lines.append("")
    else:
        lines += ["No split information was recorded with the checkpoint.", ""]
    if groups:
        total = sum(int(v) for v in groups.values())
        lines.append(
            f"- Groups (photos or structures kept whole on one side of the split): {total} "
            f"({', '.join(f'{s} {groups.get(s, 0)}' for s in subsets)})"
        )
    if split:
        lines.append(
            f"- Split: test fraction {split.get('test_fraction')}, validation fraction "
            f"{split.get('val_fraction')}, seed {split.get('seed')}"
        )
    px = experiment.get("input_px")
    lines.append(
        f"- Scale of the training photos: {_range(experiment.get('gsd_mm_range'), 'mm/px', 4)}"
    )
    lines.append(
        f"- Patch size: {px} px square, covering "
        f"{_range(experiment.get('patch_mm_range'), 'mm of surface', 1)}"
    )
    lines.append(
        "- Data digest (SHA-256 of the training and validation data): "
        f"{md_code(experiment.get('data_digest'))}"
    )
    if synthetic:
        lines.append(
            "- The training photos are **synthetic** (procedural concrete made by `trainkit.synth`); "
            "they show the workflow, not what the screener does on real photos."
        )
    lines += _adaptation(experiment.get("adaptation"))
    lines.append("")
    return lines


def _adaptation(adapted: AdaptationRecord | None) -> list[str]:
    """What an adapted model learned from a job (``trainkit train --from``)."""
    if not adapted:
        return []
    frames = adapted.get("frames", [])
    cells = adapted.get("cells", {})
    return [
        f"- **Adapted** from {md_code(adapted['source'])} with the answered cells of job(s) "
        f"{md_text(', '.join(adapted.get('jobs', [])))}: {len(cells.get('train', []))} cells trained, "
        f"{len(cells.get('val', []))} validated (other frames), from {len(frames)} frames in "
        f"all, plus {adapted.get('replay')} replayed training patches per job training cell. "
        "Those frames are kept out of this model's job checks (`trainkit sample` leaves them "
        "out, `trainkit verify` refuses them): figures on frames a model learned from would "
        "flatter it."
    ]


def _model(ckpt: CheckpointRecord, experiment: ProvenanceRecord, export: ExportRecord) -> list[str]:
    cfg = ckpt.get("config") or {}
    best_val = ckpt.get("best_val") or {}
    lines = ["## The model", ""]
    lines.append(
        f"- Backbone: {md_code(cfg.get('backbone'))}, class set {md_code(cfg.get('class_set'))}"
    )
    lines.append(
        f"- Input: uint8 RGB patches of {ckpt.get('input_px', experiment.get('input_px'))} x "
        f"{ckpt.get('input_px', experiment.get('input_px'))} px (resizing is the caller's job; "
        "normalisation is inside the graph)"
    )
    lines.append(
        f"- Training: {cfg.get('epochs')} epochs planned, best epoch on validation "
        f"{ckpt.get('best_epoch')} (this checkpoint), batch size {cfg.get('batch_size')}, "
        f"peak learning rate {cfg.get('lr')}, seed {cfg.get('seed')}"
    )
    if ckpt.get("selected_on"):
        lines.append(f"- Epoch selected on: {md_code(ckpt['selected_on'])}")
    if "val_recall_at_fa" in best_val:
        lines.append(
            f"- Selection score at the best epoch (optimistic: the epoch was chosen on it): "
            f"validation crack recall within a {float(cfg.get('false_alarm_budget', 0.05)):.0%} "
            f"false-alarm budget {_f(best_val.get('val_recall_at_fa'))}"
        )
    if "val_balanced_accuracy" in best_val:
        lines.append(
            f"- Validation balanced accuracy at the best epoch: "
            f"{_f(best_val.get('val_balanced_accuracy'))}"
        )
    if cfg.get("head_epochs"):
        frozen = " on cached features" if cfg.get("cached_features") else ""
        lines.append(f"- Head-only stage{frozen}: the first {cfg['head_epochs']} epochs")
    lines.append(f"- Weights it started from: {weights_line(ckpt, markdown=True)}")
    if export:
        model = export.get("model")
        lines.append(
            f"- Exported: {md_code(Path(model).name if model else 'model.onnx')} "
            f"({export.get('exporter', 'ONNX')}); parity with PyTorch on "
            f"{export.get('parity_patches')} patches, max |dp| "
            f"{float(export.get('parity_max_abs_diff', float('nan'))):.1e}"
        )
    lines.append("")
    return lines


def _metrics(metrics: MetricsRecord | None) -> list[str]:
    lines = ["## Test metrics", ""]
    if metrics is None:
        return [*lines, NOT_EVALUATED, ""]
    s = metrics["screening"]
    iv = s.get("recall_interval") or {}
    lines.append(
        f"Evaluated on the {md_code(metrics.get('split'))} subset: {metrics.get('patches')} patches from "
        f"{metrics.get('photos')} photos the model never saw in training."
    )
    lines.append("")
    lines.append(
        f"- Screening recall (crack vs no crack, at the threshold below): **{_f(s.get('recall'))}**, "
        f"{_pct(iv.get('confidence'))} interval [{_f(iv.get('low'))}, {_f(iv.get('high'))}] "
        f"({iv.get('method')}; {iv.get('k')} of {iv.get('n')} cracked patches found)"
    )
    clean = (s.get("fp") or 0) + (s.get("tn") or 0)
    lines.append(
        f"- False-alarm rate: {_f(s.get('false_alarm_rate'))} "
        f"({s.get('fp')} of {clean} clean patches flagged)"
    )
    lines.append(f"- Accuracy over all classes: {_f(metrics.get('accuracy'))}")
    lines.append("")
    lines += [
        "Per-class recall (intervals: "
        f"{metrics.get('interval_method')}, {_pct(metrics.get('confidence'))}):",
        "",
        "| class | recall | interval low | interval high | found / patches |",
        "|---|---:|---:|---:|---:|",
    ]
    for c in metrics.get("per_class", []):
        ci = c.get("recall_interval") or {}
        n = ci.get("n", c.get("support"))
        recall = None if n == 0 else c.get("recall")  # no test patches: recall is undefined
        lines.append(
            f"| {md_text(c['name'])} | {_f(recall)} | {_f(c.get('recall_ci_low'))} | "
            f"{_f(c.get('recall_ci_high'))} | {ci.get('k', 'n/a')} / {n} |"
        )
    lines.append("")
    gate = metrics.get("gate")
    if gate:
        lines.append(
            f"Acceptance gate (required lower bound of screening recall "
            f"{_f(gate.get('required_recall'))}): "
            f"**{'passed' if gate.get('passed') else 'failed'}**. {gate.get('verdict', '')}".rstrip()
        )
    else:
        lines.append(
            "Acceptance gate: none was recorded (`trainkit evaluate --require-recall` sets one)."
        )
    lines.append("")
    return lines


def _cascade(metrics: MetricsRecord | None, export: ExportRecord) -> list[str]:
    """The two-stage cascade: its figures beside the main network's, and whether the file has it."""
    c = metrics.get("cascade") if metrics else None
    if not c:
        return []
    lines = ["## Cascade", ""]
    if export.get("cascade"):
        lines.append(
            "`model.onnx` runs a cheap first stage on every cell and the main network only on "
            f"the cells scoring at least {_f(c['pass_threshold'], 4)} there (one ONNX graph, "
            "contract 3); the figures that describe the file are the cascade's. Caution: "
            + CASCADE_WARNING_CAVEAT
            + "; on a new job, sample its cells (`trainkit sample`, `trainkit verify`)."
        )
    else:
        lines.append(
            "`model.onnx` has no cascade: "
            + (export.get("cascade_skipped") or c["gate"]["verdict"])
        )
    lines.append("")
    if c.get("pass_threshold") is not None:
        net = c.get("network") or {}
        lines += [
            f"First stage: {net.get('backbone')} at {net.get('input_px')} px, "
            f"{c.get('loss')}; pass threshold: {c['threshold_source']}.",
            "",
            "| on the evaluated subset | recall | false-alarm rate | cells reaching the main network |",
            "|---|---:|---:|---:|",
            f"| cascade | {_f(c['cascade']['recall'])} | {_f(c['cascade']['false_alarm_rate'])} | "
            f"{_f(c['passed_share'])} |",
            f"| main network alone | {_f(c['main']['recall'])} | "
            f"{_f(c['main']['false_alarm_rate'])} | 1.000 |",
            "",
        ]
    lines += [f"Cascade gate: {c['gate']['verdict']}", ""]
    return lines


def _threshold(metrics: MetricsRecord | None, export: ExportRecord) -> list[str]:
    lines: list[str] = []  # one paragraph each
    if metrics is None:
        thr: float | None = export.get("threshold", 0.5)
        lines.append(
            f"The model file carries the default threshold {_f(thr)}, not one chosen on "
            "validation; how many clean patches it flags is unknown until the model is evaluated."
        )
        return ["## Threshold", *[x for para in lines for x in ("", para)], ""]
    s = metrics["screening"]
    thr = s.get("threshold")
    clean = (s.get("fp") or 0) + (s.get("tn") or 0)
    cracked = (s.get("tp") or 0) + (s.get("fn") or 0)
    lines.append(
        f"A patch is flagged when its screening probability (1 - P(none)) is at least "
        f"**{_f(thr)}** ({s.get('threshold_source')})."
    )
    text = (
        f"At {_f(thr)}, {s.get('fp')} of {clean} clean test patches were flagged "
        f"(false-alarm rate {_f(s.get('false_alarm_rate'))}) and {s.get('tp')} of {cracked} "
        "cracked test patches were found"
    )
    v = s.get("validation")
    if v:
        text += (
            f"; the validation set flagged {v.get('fp')} of "
            f"{(v.get('fp') or 0) + (v.get('tn') or 0)} clean patches and found {v.get('tp')} of "
            f"{(v.get('tp') or 0) + (v.get('fn') or 0)} cracked ones"
        )
    lines.append(text + ".")
    d = s.get("at_default_threshold")
    if d:
        lines.append(
            f"For comparison, at 0.500 the test set would have had {d.get('fp')} false alarms "
            f"and screening recall {_f(d.get('recall'))}."
        )
    pr = s.get("promise")
    if pr and pr.get("kept"):
        lines.append(
            f"Promise: on photos like the validation photos, recall >= {_f(pr.get('target'))} "
            f"with confidence {_f(pr.get('confidence'))} (set on {pr.get('cracks')} validation "
            f"cracks, counted as {_f(pr.get('effective_cracks'), 0)} independent ones for the "
            "photos they cluster in, by an order-statistic bound; the count for photos is an "
            "approximation)."
        )
    elif pr:
        lines.append(
            f"**No recall promise**: validation held {pr.get('cracks')} cracks, fewer than the "
            f"{pr.get('cracks_needed')} a promise of recall >= {_f(pr.get('target'))} with "
            f"confidence {_f(pr.get('confidence'))} needs; this threshold keeps that recall with "
            f"confidence {_f(pr.get('achieved_confidence'))} only."
        )
    if s.get("threshold_independent") is False:
        lines.append(
            "The threshold was chosen on the evaluated patches themselves, so the test "
            "figures above are optimistic."
        )
    return ["## Threshold", *[x for para in lines for x in ("", para)], ""]


def _limits(
    experiment: ProvenanceRecord, metrics: MetricsRecord | None, synthetic: bool | None
) -> list[str]:
    lines = ["## Known limits", ""]
    gsd = experiment.get("gsd_mm_range")
    if gsd:
        lines.append(
            f"- Scale: trained on photos of {_range(gsd, 'mm/px', 4)}; closer or farther shots, "
            "other lenses and resolutions are outside what it has seen."
        )
    else:
        lines.append(
            "- Scale: the training photos had no recorded scale; the working range is unknown."
        )
    lines.append(
        "- Lighting, weather, wet or dirty surfaces, paint, graffiti, shadows and camera types "
        "unlike the training photos are untested."
    )
    lines.append("- Surfaces other than concrete (masonry, steel, asphalt, timber) are untested.")
    if synthetic:
        lines.append(
            "- The training and test photos are synthetic; no figure here says anything about "
            "real photos."
        )
    if metrics is not None:
        n = (metrics["screening"].get("recall_interval") or {}).get("n")
        lines.append(
            f"- Small test sets give wide intervals: screening recall rests on {n} cracked test "
            "patches; classes with few test patches have intervals too wide to rely on."
        )
    else:
        lines.append("- Not evaluated: nothing is known about its recall or false alarms.")
    lines.append("")
    return lines


def _jobs(jobs: list[JobRecord] | None) -> list[str]:
    """Every check of this model on a job (`trainkit verify`), oldest first, with its bound
    and verdict: a refused check stays listed beside a later acceptance."""
    lines = ["## Jobs checked", ""]
    if not jobs:
        return lines + [
            "- None yet. Its test figures hold only for photos like its test set; on each new "
            "job, check it on that job's own frames (`trainkit sample`, `trainkit verify`).",
            "",
        ]
    lines += [
        "| job | checked | required recall | answered cells | recall (95% interval) "
        "| false-alarm rate (95% interval) | verdict | model SHA-256 |",
        "|---|---|---:|---:|---|---|---|---|",
    ]
    for j in jobs:
        r, fa = j["recall"], j["false_alarm_rate"]
        gate = j.get("gate") or {}
        bound = j.get("required_recall", gate.get("required_recall"))
        verdict = str(j.get("verdict") or gate.get("verdict") or "no bound asked").split(":")[0]
        sha = j.get("model_sha256")
        lines.append(
            f"| {md_text(j['job'])} | {md_text(j['checked'])} | {_f(bound)} | "
            f"{md_text(j['cells_answered'])} | "
            f"{_f(r['estimate'])} ({_f(r['low'])}-{_f(r['high'])}) | "
            f"{_f(fa['estimate'])} ({_f(fa['low'])}-{_f(fa['high'])}) | {md_text(verdict)} | "
            f"{md_text(str(sha)[:12]) if sha else 'n/a'} |"
        )
    return lines + [
        "",
        "Each row holds for that job's frames only. Every check is kept: a later check of a "
        "job adds a row and never replaces an earlier one.",
        "",
    ]


def build_model_card(
    ckpt: dict,
    *,
    experiment: dict | None = None,
    metrics: dict | None = None,
    export: dict | None = None,
    synthetic: bool | None = None,
    name: str | None = None,
    kit_version: str | None = None,
    created: str | None = None,
    jobs: list[dict] | None = None,
) -> str:
    """The model card's Markdown text.

    Args:
        ckpt: the checkpoint dict (``config``, ``best_epoch``, ``input_px``, ``experiment``).
        experiment: the contents of ``experiment.json`` (default: the checkpoint's copy).
        metrics: the contents of ``evaluation/metrics.json``, or None when not evaluated.
        export: the summary returned by :func:`trainkit.export.onnx_file.export_experiment`.
        synthetic: whether the training photos came from ``trainkit.synth`` (None: unknown).
        name: the experiment's name shown in the title.
        kit_version: trainkit version (default: the installed one).
        created: timestamp shown on the card (default: now, UTC).
        jobs: the job checks recorded for this model (``jobs.json``), oldest first.

    Returns:
        The card as Markdown text ending in a newline.
    """
    return _card(
        cast(CheckpointRecord, ckpt),
        cast(
            ProvenanceRecord, experiment if experiment is not None else ckpt.get("experiment") or {}
        ),
        cast("MetricsRecord | None", metrics),
        cast(ExportRecord, export or {}),
        synthetic,
        name,
        kit_version,
        created,
        cast("list[JobRecord] | None", jobs),
    )


def _card(
    ckpt: CheckpointRecord,
    experiment: ProvenanceRecord,
    metrics: MetricsRecord | None,
    export: ExportRecord,
    synthetic: bool | None,
    name: str | None,
    kit_version: str | None,
    created: str | None,
    jobs: list[JobRecord] | None,
) -> str:
    """:func:`build_model_card` on the typed records."""
    if kit_version is None:
        from trainkit import __version__ as kit_version
    created = created or _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    caution = (metrics.get("caution") if metrics else None) or _caution()
    title = f"# Model card: concrete-crack patch screener{f' {md_code(name)}' if name else ''}"
    lines = [
        title,
        "",
        f"> **Caution.** {caution}",
        "",
        f"Written by trainkit {kit_version} at export ({created}) from the checkpoint, "
        "`experiment.json`"
        + (", `evaluation/metrics.json`" if metrics is not None else "")
        + " and the export's checks; every figure below is what this run recorded or measured.",
        "",
        "## Intended use",
        "",
        "- Triage: decide which photos and which regions of them a qualified person looks at "
        "first, on concrete surfaces photographed like the training and test photos.",
        "- Each patch gets a screening probability (1 - P(none)) and an orientation class; a "
        "patch at or above the threshold is flagged for a person to look at.",
        "",
        "## Out of scope",
        "",
        "- Deciding whether a structure is safe, or any structural judgement: that is the work "
        "of a licensed engineer under local codes.",
        "- Measuring crack width, length or depth: the model classifies patches, it measures "
        "nothing.",
        "- Surfaces other than concrete.",
        "- Photos unlike the training and test photos (other cameras, distances, lighting, "
        "surfaces); its figures do not hold there.",
        "- Clearing a photo as crack-free: an unflagged patch has not been inspected.",
        "",
    ]
    digest = metrics.get("data_digest") if metrics else None
    if digest and experiment.get("data_digest") and digest != experiment["data_digest"]:
        lines += [
            "**Warning:** `evaluation/metrics.json` describes different training data (data "
            "digest differs from the checkpoint's); evaluate again before relying on it.",
            "",
        ]
    lines += _training_data(experiment, synthetic)
    lines += _model(ckpt, experiment, export)
    lines += _metrics(metrics)
    lines += _cascade(metrics, export)
    lines += _threshold(metrics, export)
    lines += _jobs(jobs)
    lines += _limits(experiment, metrics, synthetic)
    lines += [
        "## Cautions",
        "",
        f"{caution}",
        "",
        SHORT_CAUTION,
        "",
    ]
    return "\n".join(lines)


def model_card_text(exp_dir: str | Path, ckpt: dict, export: dict | None = None) -> str:
    """The card of an experiment folder as :func:`write_model_card` would write it now.

    Args:
        exp_dir: the experiment folder.
        ckpt: the loaded checkpoint dict.
        export: the export summary (model path, parity, threshold).
    """
    record = cast(CheckpointRecord, ckpt)
    read = read_card_inputs(exp_dir, record)
    return _card(
        record,
        read.experiment,
        read.metrics,
        cast(ExportRecord, export or {}),
        synthetic_training_data(read.experiment.get("workspace")),
        Experiment(exp_dir).path.resolve().name,
        None,
        None,
        read.jobs,
    )


def write_model_card(exp_dir: str | Path, ckpt: dict, export: dict | None = None) -> Path:
    """Write ``EXP/model-card.md`` atomically (temporary file, then rename).

    Args:
        exp_dir: the experiment folder.
        ckpt: the loaded checkpoint dict.
        export: the export summary (model path, parity, threshold).

    Returns:
        The path of the card.
    """
    target = Experiment(exp_dir).card_path
    atomic_write_text(target, model_card_text(exp_dir, ckpt, export))
    return target
