"""Plots and the self-contained HTML evaluation report.

The report is one HTML file with every plot embedded as a PNG data URI and no
script. Every figure that comes from ``metrics.json`` is written as
``<span data-metric="dotted.path" data-value="exact value">shown value</span>``, so
a reader (or a test) can check each shown number against the file.
"""

from __future__ import annotations

import base64
import html
from pathlib import Path
from typing import Any

import numpy as np

from trainkit.core.contract import screening_probability
from trainkit.core.fsutil import atomic_path, atomic_write_text
from trainkit.core.taxonomy import ClassSet

__all__ = [
    "write_report",
    "plot_confusion",
    "plot_screening_curves",
    "plot_reliability",
    "contact_sheet",
]

SHEET_MAX = 48  # patches per contact sheet


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plot_confusion(cm: np.ndarray, class_names: list[str], path: Path) -> None:
    """Row-normalised confusion matrix with counts in each cell, saved as PNG."""
    plt = _plt()
    cm = np.asarray(cm)
    sums = cm.sum(1, keepdims=True)
    norm = np.divide(cm, sums, out=np.zeros_like(cm, dtype=float), where=sums > 0)
    n = len(class_names)
    fig, ax = plt.subplots(figsize=(1.1 * n + 2.5, 1.0 * n + 1.8), dpi=110)
    im = ax.imshow(norm, cmap="cividis", vmin=0, vmax=1)
    for i in range(n):
        for j in range(n):
            ax.text(
                j,
                i,
                f"{cm[i, j]}\n{norm[i, j]:.0%}",
                ha="center",
                va="center",
                fontsize=8,
                color="black" if norm[i, j] > 0.55 else "white",
            )
    ax.set_xticks(range(n), class_names, rotation=35, ha="right")
    ax.set_yticks(range(n), class_names)
    ax.set_xlabel("predicted class")
    ax.set_ylabel("true class")
    ax.set_title("Confusion matrix (count and share of the true class)")
    fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp)
    plt.close(fig)


def plot_screening_curves(
    is_crack: np.ndarray, p_crack: np.ndarray, threshold: float, path: Path
) -> None:
    """Precision-recall and ROC curves of crack vs none with the operating point marked.

    The operating point (the chosen threshold) is an orange dot; the default 0.5
    threshold is a grey square, for comparison.
    """
    from sklearn.metrics import precision_recall_curve, roc_curve

    plt = _plt()
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(10, 4.2), dpi=110)
    if is_crack.any() and (~is_crack).any():
        prec, rec, _ = precision_recall_curve(is_crack, p_crack)
        fpr, tpr, _ = roc_curve(is_crack, p_crack)
        a1.plot(rec, prec, color="#1f5f8b")
        a2.plot(fpr, tpr, color="#1f5f8b")
        for thr, style, colour, label, size in (
            (0.5, "s", "#777777", "default threshold", 11),
            (threshold, "o", "#d9480f", "operating threshold", 7),
        ):
            flagged = p_crack >= thr
            r = flagged[is_crack].mean()
            pr = is_crack[flagged].mean() if flagged.any() else 1.0
            fa = flagged[~is_crack].mean()
            text = f"{label} {thr:.3f}: recall {r:.3f}, false alarms {fa:.3f}"
            a1.plot([r], [pr], style, color=colour, label=text, ms=size)
            a2.plot([fa], [r], style, color=colour, label=text, ms=size)
        a1.legend(loc="lower left", fontsize=8)
        a2.legend(loc="lower right", fontsize=8)
    else:
        for a in (a1, a2):
            a.text(0.5, 0.5, "needs both crack and no-crack patches", ha="center")
    a1.set(
        xlabel="recall (share of crack patches flagged)",
        ylabel="precision (share of flagged that are cracks)",
        xlim=(0, 1.02),
        ylim=(0, 1.02),
        title="Precision-recall, crack vs none",
    )
    a2.plot([0, 1], [0, 1], ":", color="grey")
    a2.set(
        xlabel="false-alarm rate (share of clean patches flagged)",
        ylabel="recall",
        xlim=(0, 1.02),
        ylim=(0, 1.02),
        title="ROC, crack vs none",
    )
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp)
    plt.close(fig)


def plot_reliability(
    bins: list[dict], path: Path, *, bins_after: list[dict] | None = None, temperature=None
) -> None:
    """Reliability diagram: accuracy against mean confidence per bin, with bin counts."""
    plt = _plt()
    fig, (ax, axc) = plt.subplots(
        2, 1, figsize=(5.6, 5.6), dpi=110, sharex=True, gridspec_kw={"height_ratios": [3, 1]}
    )
    ax.plot([0, 1], [0, 1], ":", color="grey", label="perfect calibration")
    series = [(bins, "#1f5f8b", "o-", "as trained")]
    if bins_after is not None:
        series.append((bins_after, "#d9480f", "s--", f"temperature T = {temperature:.2f}"))
    for bs, colour, style, label in series:
        xs = [b["confidence"] for b in bs if b["count"]]
        ys = [b["accuracy"] for b in bs if b["count"]]
        ax.plot(xs, ys, style, color=colour, label=label)
    lo = np.array([b["lo"] for b in bins])
    width = np.array([b["hi"] - b["lo"] for b in bins])
    axc.bar(lo, [b["count"] for b in bins], width=width, align="edge", color="#9db4c8",
            edgecolor="white")  # fmt: skip
    ax.set(ylabel="accuracy in bin", xlim=(0, 1), ylim=(0, 1.02),
           title="Reliability of the predicted class (10 bins)")  # fmt: skip
    ax.legend(loc="upper left", fontsize=8)
    axc.set(xlabel="confidence (largest class probability)", ylabel="patches")
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp)
    plt.close(fig)


def contact_sheet(
    images: np.ndarray, captions: list[str], path: Path, *, cols: int = 8, scale: int = 1
) -> None:
    """A grid of patches with a caption under each, saved as PNG (nothing for no images)."""
    from PIL import Image, ImageDraw

    n = len(images)
    if n == 0:
        return
    s = images.shape[1] * scale
    cap_h = 14
    cols = min(cols, n)
    rows = (n + cols - 1) // cols
    sheet = Image.new("RGB", (cols * (s + 4) + 4, rows * (s + cap_h + 4) + 4), (245, 245, 245))
    draw = ImageDraw.Draw(sheet)
    for i in range(n):
        r, c = divmod(i, cols)
        x, y = 4 + c * (s + 4), 4 + r * (s + cap_h + 4)
        im = Image.fromarray(images[i])
        if scale != 1:
            im = im.resize((s, s), Image.NEAREST)
        sheet.paste(im, (x, y))
        draw.text((x + 2, y + s + 1), captions[i][: max(8, s // 6)], fill=(20, 20, 20))
    with atomic_path(path) as tmp:
        sheet.save(tmp)


# --------------------------------------------------------------------------- HTML helpers


def _img_tag(path: Path, alt: str) -> str:
    if not path.exists():
        return ""
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{html.escape(alt)}">'


def _get(result: dict, dotted: str) -> Any:
    node: Any = result
    for part in dotted.split("."):
        node = node[int(part)] if isinstance(node, list) else node[part]
    return node


def _m(result: dict, dotted: str, fmt: str = ".3f") -> str:
    """A number from metrics.json, shown with ``fmt`` and tagged with its path and value."""
    val = _get(result, dotted)
    if val is None:
        return f'<span class="na" data-metric="{dotted}" data-value="null">n/a</span>'
    shown = format(val, fmt) if isinstance(val, float) else str(val)
    return f'<span data-metric="{dotted}" data-value="{val!r}">{shown}</span>'


def _ci(result: dict, low: str, high: str) -> str:
    if _get(result, low) is None:
        return "n/a (no patches)"
    return f"{_m(result, low)}&ndash;{_m(result, high)}"


def _e(x: Any) -> str:
    return html.escape(str(x))


METHOD_NAMES = {"wilson": "Wilson score", "clopper-pearson": "Clopper-Pearson exact"}


def _screen_row(result: dict, label: str, base: str, ci: bool) -> str:
    s = _get(result, base)
    interval = (
        f"{_ci(result, base + '.recall_ci_low', base + '.recall_ci_high')}"
        if ci
        else '<span class="dim">not computed</span>'
    )
    return (
        f"<tr><td>{label}</td><td>{_m(result, base + '.threshold')}</td>"
        f"<td>{_m(result, base + '.recall')}</td><td>{interval}</td>"
        f"<td>{_m(result, base + '.tp')} of {s['tp'] + s['fn']}</td>"
        f"<td>{_m(result, base + '.specificity')}</td>"
        f"<td>{_m(result, base + '.false_alarm_rate')}</td>"
        f"<td>{_m(result, base + '.fp')} of {s['fp'] + s['tn']}</td>"
        f"<td>{_m(result, base + '.precision')}</td>"
        f"<td>{_m(result, base + '.flagged_share')}</td></tr>"
    )


def _breakdown_table(result: dict, key: str, title: str, limit: int = 25) -> str:
    rows = result.get(key) or []
    if not rows:
        return ""
    overall_low = result["screening"]["recall_ci_low"]
    # Worst first: lowest recall (groups without cracks last), then most false alarms.
    order = sorted(
        range(len(rows)),
        key=lambda i: (
            rows[i]["recall"] is None,
            rows[i]["recall"] if rows[i]["recall"] is not None else 0.0,
            -(rows[i]["false_alarm_rate"] or 0.0),
        ),
    )
    body = []
    for i in order[:limit]:
        r, p = rows[i], f"{key}.{i}"
        weak = r["recall"] is not None and overall_low is not None and r["recall"] < overall_low
        cls = ' class="weak"' if weak else ""
        body.append(
            f"<tr{cls}><td>{_e(r['key'])}</td><td>{_m(result, p + '.patches')}</td>"
            f"<td>{_m(result, p + '.cracks_found')} of {_m(result, p + '.cracks')}</td>"
            f"<td>{_m(result, p + '.recall')}</td>"
            f"<td>{_ci(result, p + '.recall_ci_low', p + '.recall_ci_high')}</td>"
            f"<td>{_m(result, p + '.false_alarms')} of {_m(result, p + '.clean')}</td>"
            f"<td>{_m(result, p + '.false_alarm_rate')}</td>"
            f"<td>{_m(result, p + '.accuracy')}</td></tr>"
        )
    more = (
        f"<p class='dim'>Showing the {limit} weakest of {len(rows)}; all are in metrics.json "
        f"(<code>{key}</code>).</p>"
        if len(rows) > limit
        else ""
    )
    return (
        f"<h3>{title}</h3><table><tr><th>{title.split(' ')[1]}</th><th>patches</th>"
        "<th>cracks found</th><th>recall</th><th>recall interval</th><th>false alarms</th>"
        f"<th>false-alarm rate</th><th>accuracy</th></tr>{''.join(body)}</table>{more}"
    )


# --------------------------------------------------------------------------- the report


def write_report(
    out: Path,
    result: dict,
    *,
    data,
    probs: np.ndarray,
    class_set: ClassSet,
    experiment: dict,
    comparison_images: np.ndarray | None = None,
    comparison_rows: list[dict] | None = None,
) -> Path:
    """Write the plots and ``report.html`` (images embedded, one self-contained file).

    Args:
        out: the evaluation folder.
        result: the metrics dictionary as written to metrics.json.
        data: the evaluated PatchSet (images for the contact sheets).
        probs: class probabilities per patch, shape (n, C).
        class_set: the class set.
        experiment: the experiment record from the checkpoint (training scale range).
        comparison_images: patches where two experiments disagree, worst first.
        comparison_rows: one dict per such patch (patch_id, crack, pa, pb, fa, fb).

    Returns:
        The path of report.html.
    """
    names = list(class_set.names)
    cm = np.array(result["confusion_matrix"])
    plot_confusion(cm, names, out / "confusion_matrix.png")
    is_crack = data.labels != 0
    p_crack = screening_probability(probs.astype(np.float64))
    thr = result["screening"]["threshold"]
    plot_screening_curves(is_crack, p_crack, thr, out / "screening_curves.png")
    cal = result["calibration"]
    temp = cal.get("temperature")
    plot_reliability(
        cal["bins"],
        out / "reliability.png",
        bins_after=temp["bins_after"] if temp else None,
        temperature=temp["value"] if temp else None,
    )
    missed_all = np.flatnonzero(is_crack & (p_crack < thr))
    missed = missed_all[np.argsort(p_crack[missed_all], kind="stable")][:SHEET_MAX]
    for f in ("missed_cracks.png", "false_alarms.png", "disagreements.png"):
        (out / f).unlink(missing_ok=True)
    contact_sheet(
        data.images[missed],
        [f"#{data.patch_ids[i]} {names[data.labels[i]][:8]} {p_crack[i]:.2f}" for i in missed],
        out / "missed_cracks.png",
    )
    fa_all = np.flatnonzero(~is_crack & (p_crack >= thr))
    false_alarms = fa_all[np.argsort(-p_crack[fa_all], kind="stable")][:SHEET_MAX]
    contact_sheet(
        data.images[false_alarms],
        [f"#{data.patch_ids[i]} {p_crack[i]:.2f}" for i in false_alarms],
        out / "false_alarms.png",
    )
    if comparison_images is not None and comparison_rows:
        contact_sheet(
            comparison_images[:SHEET_MAX],
            [
                f"#{r['patch_id']} {'C' if r['crack'] else 'N'} "
                f"A{'+' if r['fa'] else '-'}{r['pa']:.0%} B{'+' if r['fb'] else '-'}{r['pb']:.0%}"
                for r in comparison_rows[:SHEET_MAX]
            ],
            out / "disagreements.png",
        )

    R = result
    s = R["screening"]
    ci = s["recall_interval"]
    level = f"{R['confidence']:.0%}"
    method = METHOD_NAMES.get(R["interval_method"], R["interval_method"])

    # ---- verdict
    gate = R.get("gate")
    if gate:
        cls = "pass" if gate["passed"] else "fail"
        gate_html = f'<p class="verdict {cls}">{_e(gate["verdict"])}</p>'
    else:
        gate_html = (
            '<p class="verdict none">No acceptance gate was requested '
            "(<code>trainkit evaluate EXP --require-recall R</code> refuses the model unless "
            f"the {level} lower bound of screening recall is at least R).</p>"
        )

    # ---- provenance
    scale = experiment.get("gsd_mm_range")
    scale_txt = (
        f"{scale[0]:.3f}&ndash;{scale[1]:.3f} mm per pixel"
        if scale
        else "unknown (photos had no scale)"
    )
    model = R.get("model") or {}
    independent = (
        "threshold chosen on validation, reported on patches the model and the threshold never saw"
        if s["threshold_independent"]
        else "<strong>threshold chosen on these same validation patches: the screening "
        "figures are optimistic</strong>"
    )
    provenance = f"""
<table class="kv">
<tr><th>evaluated data</th><td><code>{_e(R["split"])}</code> subset of workspace
<code>{_e(R["workspace"])}</code>: {_m(R, "patches")} patches from {_m(R, "photos")} photos
({len(R.get("by_group") or [])} groups), digest <code>{_e(R["evaluated_digest"][:16])}</code></td></tr>
<tr><th>model</th><td><code>{_e(model.get("checkpoint"))}</code>
(backbone {_e(model.get("backbone"))}, best epoch {_e(model.get("epoch"))}); experiment
<code>{_e(R["experiment"])}</code></td></tr>
<tr><th>training data</th><td>digest <code>{_e(str(R.get("data_digest"))[:16])}</code>;
photo scale {scale_txt}</td></tr>
<tr><th>threshold</th><td>{_e(s["threshold_source"])}; {independent}</td></tr>
<tr><th>intervals</th><td>{method}, two-sided {level}, shown with k/n</td></tr>
<tr><th>made</th><td>{_e(R["created"])} by trainkit {_e(R["kit_version"])}</td></tr>
</table>"""

    # ---- screening table
    cost = s["fp"] - s["at_default_threshold"]["fp"]
    aim = (
        f"Allowing at most {s['max_false_alarms']:.0%} false alarms on validation"
        if s.get("max_false_alarms") is not None
        else f"Reaching the target recall {s['target_recall']:g} (set on validation)"
    )
    cost_txt = (
        f"{aim} flags "
        f"{_m(R, 'screening.fp')} of {s['fp'] + s['tn']} clean {_e(R['split'])} patches as "
        f"cracks, {abs(cost)} {'more' if cost >= 0 else 'fewer'} than the default threshold "
        f"0.5, and sends {_m(R, 'screening.flagged_share')} of all patches to a person."
    )
    screen_rows = _screen_row(R, f"{_e(R['split'])}, operating threshold", "screening", True)
    screen_rows += _screen_row(
        R, f"{_e(R['split'])}, default 0.5", "screening.at_default_threshold", False
    )
    if s.get("validation"):
        screen_rows += _screen_row(
            R, "validation, operating threshold", "screening.validation", False
        )

    # ---- per class
    pc_rows = "".join(
        f"<tr><td>{_e(c['name'])}</td><td>{_m(R, f'per_class.{i}.support')}</td>"
        f"<td>{_m(R, f'per_class.{i}.precision')}</td><td>{_m(R, f'per_class.{i}.recall')}</td>"
        f"<td>{_ci(R, f'per_class.{i}.recall_ci_low', f'per_class.{i}.recall_ci_high')}</td>"
        f"<td>{c['recall_interval']['k']}/{c['recall_interval']['n']}</td>"
        f"<td>{_m(R, f'per_class.{i}.f1')}</td></tr>"
        for i, c in enumerate(R["per_class"])
    )

    # ---- confusion tables
    head = "".join(f"<th>{_e(n)}</th>" for n in names)
    cm_rows = "".join(
        f"<tr><th class='rowh'>{_e(n)}</th>"
        + "".join(f"<td>{_m(R, f'confusion_matrix.{i}.{j}')}</td>" for j in range(len(names)))
        + "</tr>"
        for i, n in enumerate(names)
    )
    cmn_rows = "".join(
        f"<tr><th class='rowh'>{_e(n)}</th>"
        + "".join(
            f"<td>{_m(R, f'confusion_matrix_row_normalised.{i}.{j}', '.2f')}</td>"
            for j in range(len(names))
        )
        + "</tr>"
        for i, n in enumerate(names)
    )

    # ---- calibration
    if temp:
        temp_html = (
            f"<p>Temperature scaling, fitted on the {_e(temp['fitted_on'])}: "
            f"T = {_m(R, 'calibration.temperature.value')}. On the {_e(R['split'])} patches "
            f"ECE {_m(R, 'calibration.ece')} &rarr; {_m(R, 'calibration.temperature.ece_after')}, "
            f"NLL {_m(R, 'calibration.nll')} &rarr; {_m(R, 'calibration.temperature.nll_after')} "
            f"(validation NLL {_m(R, 'calibration.temperature.val_nll_before')} &rarr; "
            f"{_m(R, 'calibration.temperature.val_nll_after')}). The predicted classes do not "
            f"change. {_e(temp['applied_to']).capitalize()}.</p>"
        )
    else:
        temp_html = (
            "<p class='dim'>Temperature scaling was not asked for "
            "(<code>--temperature-scaling</code> fits one temperature on validation and reports "
            "the calibration before and after).</p>"
        )

    # ---- where it fails
    n_missed, n_fa = len(missed_all), len(fa_all)
    missed_img = _img_tag(out / "missed_cracks.png", "missed cracks")
    fa_img = _img_tag(out / "false_alarms.png", "false alarms")
    bd = "".join(
        _breakdown_table(R, key, title)
        for key, title in (
            ("by_group", "By group (structure or site)"),
            ("by_scale", "By patch-width band (physical scale)"),
            ("by_photo", "By photo"),
        )
    )
    if not R.get("by_scale"):
        bd += "<p class='dim'>No scale breakdown: the evaluated photos have no scale.</p>"

    # ---- comparison
    comp = R.get("comparison")
    comp_html = ""
    if comp:
        mr, ma = comp["mcnemar_recall"], comp["mcnemar_accuracy"]
        comp_html = f"""
<h2 id="comparison">Comparison with a second experiment</h2>
<p>A = this experiment, B = <code>{_e(comp["experiment_b"])}</code>, on the same
{_m(R, "comparison.patches")} patches ({_m(R, "comparison.cracks")} with cracks); each
at its own threshold chosen on validation for the same target recall.</p>
<table><tr><th></th><th>threshold</th><th>screening recall</th><th>cracks found</th>
<th>false-alarm rate</th><th>accuracy</th></tr>
<tr><td>A</td><td>{_m(R, "comparison.a.threshold")}</td><td>{_m(R, "comparison.a.recall")}</td>
<td>{_m(R, "comparison.a.cracks_found")}</td><td>{_m(R, "comparison.a.false_alarm_rate")}</td>
<td>{_m(R, "comparison.a.accuracy")}</td></tr>
<tr><td>B</td><td>{_m(R, "comparison.b.threshold")}</td><td>{_m(R, "comparison.b.recall")}</td>
<td>{_m(R, "comparison.b.cracks_found")}</td><td>{_m(R, "comparison.b.false_alarm_rate")}</td>
<td>{_m(R, "comparison.b.accuracy")}</td></tr></table>
<p>Recall difference A &minus; B: <strong>{_m(R, "comparison.recall_difference")}</strong>.
McNemar's test on the crack patches ({_e(mr["method"])}): cracks found only by A
{_m(R, "comparison.mcnemar_recall.b")}, only by B {_m(R, "comparison.mcnemar_recall.c")},
p = {_m(R, "comparison.mcnemar_recall.p_value", ".4f")}. On the predicted class over all
patches ({_e(ma["method"])}): right only in A {_m(R, "comparison.mcnemar_accuracy.b")},
right only in B {_m(R, "comparison.mcnemar_accuracy.c")},
p = {_m(R, "comparison.mcnemar_accuracy.p_value", ".4f")}. A large p-value means the test set
cannot tell the two apart, not that they are equal.</p>
<p>{_m(R, "comparison.disagreements")} patches where the two disagree (screening decision or
class) are listed in <code>{_e(comp["disagreements_csv"])}</code>; screening disagreements on
crack patches first. Caption: patch id, C = crack or N = none, then for A and B the
screening probability, with + when flagged and &minus; when not.</p>
{
            _img_tag(out / "disagreements.png", "patches where the experiments disagree")
            or "<p>The two experiments agree on every patch.</p>"
        }"""

    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<title>Crack screener evaluation: {_e(R["split"])} subset</title>
<style>
body {{ font-family: system-ui, sans-serif; max-width: 1100px; margin: 2em auto; padding: 0 1em;
  color: #222; line-height: 1.45; }}
h1 {{ font-size: 1.6em; margin-bottom: .2em; }} h2 {{ margin-top: 1.8em; border-bottom: 1px solid #ccc; }}
table {{ border-collapse: collapse; margin: .8em 0; }}
td, th {{ border: 1px solid #bbb; padding: 3px 9px; text-align: right; vertical-align: top; }}
th {{ background: #eef2f5; }} td:first-child, th:first-child, th.rowh {{ text-align: left; }}
table.kv th {{ text-align: left; white-space: nowrap; }} table.kv td {{ text-align: left; }}
.caution {{ border-left: 6px solid #c2410c; background: #fff4ec; padding: .8em 1em; }}
.verdict {{ font-size: 1.15em; font-weight: 600; padding: .6em 1em; }}
.pass {{ background: #e6f4ea; }} .fail {{ background: #fde8e8; }}
.none {{ background: #f3f3f3; font-weight: normal; font-size: 1em; }}
.headline {{ font-size: 1.15em; }} .dim, .na {{ color: #777; }}
tr.weak td {{ background: #fff1f0; }}
img {{ max-width: 100%; border: 1px solid #ddd; margin: .5em 0; }}
code {{ font-size: .92em; }}
</style></head><body>
<h1>Crack screener evaluation &mdash; {_e(R["split"])} subset</h1>
<p class="caution"><strong>Read this first.</strong> {_e(R["caution"])}</p>
{gate_html}
<p class="headline">Screening recall (crack patches flagged) at threshold {_m(R, "screening.threshold")}:
<strong>{_m(R, "screening.recall")}</strong>, {level} interval
{_ci(R, "screening.recall_ci_low", "screening.recall_ci_high")} ({method}, {ci["k"]}/{ci["n"]} cracks found).
False-alarm rate {_m(R, "screening.false_alarm_rate")} ({_m(R, "screening.fp")} of
{s["fp"] + s["tn"]} clean patches flagged); specificity {_m(R, "screening.specificity")}.</p>
<h2>What this report describes</h2>{provenance}

<h2>Screening: crack vs none</h2>
<p>A patch is flagged when its screening probability 1 &minus; P(none) is at least the
threshold. {cost_txt}</p>
<table><tr><th>where, threshold</th><th>threshold</th><th>recall</th>
<th>recall {level} interval</th><th>cracks found</th><th>specificity</th>
<th>false-alarm rate</th><th>false alarms</th><th>precision</th><th>share flagged</th></tr>
{screen_rows}</table>
{_img_tag(out / "screening_curves.png", "precision-recall and ROC curves")}

<h2>Per class</h2>
<p>Recall intervals: {method}, {level}. A class with no {_e(R["split"])} patches has no
recall (n/a); a narrow class with few patches has a wide interval.</p>
<table><tr><th>class</th><th>support</th><th>precision</th><th>recall</th>
<th>recall {level} interval</th><th>k/n</th><th>F1</th></tr>
{pc_rows}</table>
<p>Accuracy over all classes: {_m(R, "accuracy")}.</p>

<h2>Confusion matrix</h2>
<p>Rows: true class; columns: predicted class. Counts, then the share of each true class.</p>
<table><tr><th class="rowh">true \\ predicted</th>{head}</tr>{cm_rows}</table>
<table><tr><th class="rowh">true \\ predicted</th>{head}</tr>{cmn_rows}</table>
{_img_tag(out / "confusion_matrix.png", "confusion matrix")}

<h2>Calibration</h2>
<p>Expected calibration error of the predicted class (Guo et al. 2017, 10 equal-width bins):
{_m(R, "calibration.ece")}; mean negative log-likelihood {_m(R, "calibration.nll")} nats.
ECE is the average gap between confidence and accuracy; 0 is perfect.</p>
{temp_html}
{_img_tag(out / "reliability.png", "reliability diagram")}

<h2>Where it fails</h2>
<p>Rows are sorted worst first; a shaded row has a recall below the lower bound of the
overall screening recall ({_m(R, "screening.recall_ci_low")}): look there for a weak site,
structure or distance.</p>
{bd}
<h3>Missed cracks ({n_missed}; lowest screening probability first)</h3>
<p class="dim">Caption: patch id, true class, screening probability.
{"Showing the first " + str(SHEET_MAX) + ". " if n_missed > SHEET_MAX else ""}Every patch
is in predictions.csv.</p>
{missed_img or "<p>None at this threshold.</p>"}
<h3>False alarms ({n_fa}; highest screening probability first)</h3>
<p class="dim">Caption: patch id, screening probability.
{"Showing the first " + str(SHEET_MAX) + "." if n_fa > SHEET_MAX else ""}</p>
{fa_img or "<p>None at this threshold.</p>"}
{comp_html}
<h2>Reproducing these figures</h2>
<p class="dim">Every figure recomputes from <code>predictions.csv</code> (one row per patch: true
and predicted class, every class probability, the screening probability). The numbers on
this page are those of <code>metrics.json</code>, whose keys are documented in
<code>trainkit.judging.evaluation</code>.</p>
<p class="caution">{_e(R["caution"])}</p>
</body></html>
"""
    path = out / "report.html"
    atomic_write_text(path, page)
    return path
