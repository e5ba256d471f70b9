"""The self-contained HTML evaluation report, built one section at a time.

The report is one HTML file with every plot embedded as a PNG data URI and no
script. Every figure that comes from ``metrics.json`` is tagged with its path and
exact value (see :mod:`trainkit.judging.html`), so a reader (or a test) can check
each shown number against the file.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from trainkit.core.contract import screening_probability
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_write_text
from trainkit.core.taxonomy import ClassSet
from trainkit.judging.html import METHOD_NAMES, page
from trainkit.judging.html import esc as _e
from trainkit.judging.html import get_path as _get
from trainkit.judging.html import img_tag as _img_tag
from trainkit.judging.html import interval as _ci
from trainkit.judging.html import metric as _m
from trainkit.judging.model_card import weights_line
from trainkit.judging.plots import (
    SHEET_MAX,
    contact_sheet,
    plot_confusion,
    plot_reliability,
    plot_screening_curves,
)
from trainkit.judging.scoring import lowest_rank

__all__ = ["write_report", "CONFUSION_PNG"]

#: The confusion-matrix picture beside the report (was confusion_matrix.png).
CONFUSION_PNG = "confusion.png"


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
    counts = _write_plots(out, result, data, probs, class_set, comparison_images, comparison_rows)
    R = result
    sections = [
        f"<h1>Crack screener evaluation &mdash; {_e(R['split'])} subset</h1>",
        f'<p class="caution"><strong>Read this first.</strong> {_e(R["caution"])}</p>',
        _verdict(R),
        _headline(R),
        "<h2>What this report describes</h2>" + _provenance(R, experiment),
        _screening(R, out),
        _cascade(R),
        _per_class(R),
        _confusion(R, list(class_set.names), out),
        _calibration(R, out),
        _failures(R, out, *counts),
        _comparison(R, out),
        _reproducing(R),
    ]
    path = out / Experiment.REPORT
    title = f"Crack screener evaluation: {R['split']} subset"
    atomic_write_text(path, page(title, "\n".join(s for s in sections if s)))
    return path


# --------------------------------------------------------------------------- pictures


def _write_plots(out, result, data, probs, class_set, comparison_images, comparison_rows):
    """The plots and contact sheets of the report; returns (missed cracks, false alarms)."""
    names = list(class_set.names)
    plot_confusion(np.array(result["confusion_matrix"]), names, out / CONFUSION_PNG)
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
    for f in ("missed_cracks.png", "false_alarms.png", "disagreements.png"):
        (out / f).unlink(missing_ok=True)
    missed_all = np.flatnonzero(is_crack & (p_crack < thr))
    missed = missed_all[np.argsort(p_crack[missed_all], kind="stable")][:SHEET_MAX]
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
    return len(missed_all), len(fa_all)


# --------------------------------------------------------------------------- small pieces


def _level(R: dict) -> str:
    return f"{R['confidence']:.0%}"


def _method(R: dict) -> str:
    return METHOD_NAMES.get(R["interval_method"], R["interval_method"])


def _screen_row(result: dict, label: str, base: str, ci: bool) -> str:
    s = _get(result, base)
    shown = (
        f"{_ci(result, base + '.recall_ci_low', base + '.recall_ci_high')}"
        if ci
        else '<span class="dim">not computed</span>'
    )
    return (
        f"<tr><td>{label}</td><td>{_m(result, base + '.threshold')}</td>"
        f"<td>{_m(result, base + '.recall')}</td><td>{shown}</td>"
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


# --------------------------------------------------------------------------- sections


def _verdict(R: dict) -> str:
    gate = R.get("gate")
    if gate:
        cls = "pass" if gate["passed"] else "fail"
        return f'<p class="verdict {cls}">{_e(gate["verdict"])}</p>'
    return (
        '<p class="verdict none">No acceptance gate was requested '
        "(<code>trainkit evaluate EXP --require-recall R</code> refuses the model unless "
        f"the {_level(R)} lower bound of screening recall is at least R).</p>"
    )


def _headline(R: dict) -> str:
    s, ci = R["screening"], R["screening"]["recall_interval"]
    return f"""<p class="headline">Screening recall (crack patches flagged) at threshold {_m(R, "screening.threshold")}:
<strong>{_m(R, "screening.recall")}</strong>, {_level(R)} interval
{_ci(R, "screening.recall_ci_low", "screening.recall_ci_high")} ({_method(R)}, {ci["k"]}/{ci["n"]} cracks found).
False-alarm rate {_m(R, "screening.false_alarm_rate")} ({_m(R, "screening.fp")} of
{s["fp"] + s["tn"]} clean patches flagged); specificity {_m(R, "screening.specificity")}.</p>"""


def _provenance(R: dict, experiment: dict) -> str:
    s = R["screening"]
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
    return f"""
<table class="kv">
<tr><th>evaluated data</th><td><code>{_e(R["split"])}</code> subset of workspace
<code>{_e(R["workspace"])}</code>: {_m(R, "patches")} patches from {_m(R, "photos")} photos
({len(R.get("by_group") or [])} groups), digest <code>{_e(R["evaluated_digest"][:16])}</code></td></tr>
<tr><th>model</th><td><code>{_e(model.get("checkpoint"))}</code>
(backbone {_e(model.get("backbone"))}, best epoch {_e(model.get("epoch"))}); experiment
<code>{_e(R["experiment"])}</code>; started from {_e(weights_line({"weights": model.get("weights")}))}</td></tr>
<tr><th>training data</th><td>digest <code>{_e(str(R.get("data_digest"))[:16])}</code>;
photo scale {scale_txt}</td></tr>
<tr><th>threshold</th><td>{_e(s["threshold_source"])}; {independent}</td></tr>
<tr><th>intervals</th><td>{_method(R)}, two-sided {_level(R)}, shown with k/n</td></tr>
<tr><th>made</th><td>{_e(R["created"])} by trainkit {_e(R["kit_version"])}</td></tr>
</table>"""


def _screening(R: dict, out: Path) -> str:
    s, split = R["screening"], _e(R["split"])
    cost = s["fp"] - s["at_default_threshold"]["fp"]
    aim = (
        f"Allowing at most {s['max_false_alarms']:.0%} false alarms on validation"
        if s.get("max_false_alarms") is not None
        else f"Reaching the target recall {s['target_recall']:g} (set on validation)"
    )
    cost_txt = (
        f"{aim} flags "
        f"{_m(R, 'screening.fp')} of {s['fp'] + s['tn']} clean {split} patches as "
        f"cracks, {abs(cost)} {'more' if cost >= 0 else 'fewer'} than the default threshold "
        f"0.5, and sends {_m(R, 'screening.flagged_share')} of all patches to a person."
    )
    rows = _screen_row(R, f"{split}, operating threshold", "screening", True)
    rows += _screen_row(R, f"{split}, default 0.5", "screening.at_default_threshold", False)
    if s.get("validation"):
        rows += _screen_row(R, "validation, operating threshold", "screening.validation", False)
    level = _level(R)
    return f"""<h2>Screening: crack vs none</h2>
<p>A patch is flagged when its screening probability 1 &minus; P(none) is at least the
threshold. {cost_txt}</p>
{_promise(R)}
<table><tr><th>where, threshold</th><th>threshold</th><th>recall</th>
<th>recall {level} interval</th><th>cracks found</th><th>specificity</th>
<th>false-alarm rate</th><th>false alarms</th><th>precision</th><th>share flagged</th></tr>
{rows}</table>
{_img_tag(out / "screening_curves.png", "precision-recall and ROC curves")}"""


def _promise(R: dict) -> str:
    """What the threshold promises, and whether the evaluated subset kept it."""
    pr = R["screening"].get("promise")
    if not pr:
        return ""
    s, split = R["screening"], _e(R["split"])
    measured = s.get("recall")
    kept_here = measured is not None and measured >= pr["target"]
    here = (
        f"On the {split} patches it found {_m(R, 'screening.recall')} of cracks: the target "
        f"{'was' if kept_here else 'was NOT'} reached here (one draw; the promise is about how "
        "often such a threshold reaches it)."
    )
    if pr["kept"]:
        cls, head = (
            "pass",
            (
                f"The threshold promises recall &ge; {pr['target']:g} with confidence "
                f"{pr['confidence']:g}: it is the score of the {lowest_rank(pr['below'])} of "
                f"{pr['cracks']} validation cracks (counted as {_eff(pr)} independent ones for "
                "the photos they cluster in), the highest an order-statistic bound allows (at "
                f"confidence {pr['confidence']:g} recall is at least {pr['recall_bound']:.3f})."
            ),
        )
    else:
        cls, head = (
            "fail",
            (
                f"NO RECALL PROMISE: validation holds {pr['cracks']} cracks (worth {_eff(pr)} "
                "independent ones for the photos they cluster in), fewer than the "
                f"{pr['cracks_needed']} a promise of recall &ge; {pr['target']:g} with confidence "
                f"{pr['confidence']:g} needs. The threshold is the lowest validation crack's score, "
                f"which keeps the target with confidence {pr['achieved_confidence']:.2f} only; "
                "label more validation cracks before trusting it."
            ),
        )
    return (
        f'<p class="verdict {cls}">{head}</p><p>{here} The promise holds for photos like '
        "the validation photos. Cracks of one photo resemble each other, so they are counted "
        "for their photos by the survey design effect (an approximation): a few photos "
        "promise less than their crack count says.</p>"
    )


def _eff(pr: dict) -> str:
    """The effective crack count of a promise, in words (older metrics: the count)."""
    n = pr.get("effective_cracks")
    return str(pr["cracks"]) if n is None else f"{n:.0f}"


def _cascade(R: dict) -> str:
    """The two-stage cascade beside the main network alone (none without a first stage)."""
    c = R.get("cascade")
    if not c:
        return ""
    cls = "pass" if c["gate"]["passed"] else "fail"
    verdict = f'<p class="verdict {cls}">{_e(c["gate"]["verdict"])}</p>'
    if c.get("pass_threshold") is None:
        return f"<h2>Cascade</h2>{verdict}"
    split = _e(R["split"])
    rows = "".join(
        f"<tr><td>{label}</td><td>{_m(R, f'cascade.{k}.recall')}</td>"
        f"<td>{_m(R, f'cascade.{k}.tp')} of {c[k]['tp'] + c[k]['fn']}</td>"
        f"<td>{_m(R, f'cascade.{k}.false_alarm_rate')}</td>"
        f"<td>{_m(R, f'cascade.{k}.fp')} of {c[k]['fp'] + c[k]['tn']}</td></tr>"
        for k, label in (
            ("cascade", "cascade (what the exported file does)"),
            ("main", "main network alone"),
        )
    )
    net = c.get("network") or {}
    return f"""<h2>Cascade: a cheap first stage, then the main network</h2>
{verdict}
<p>A {_e(net.get("backbone"))} first stage at {_e(net.get("input_px"))} px passes a cell to the
main network when its own screening probability is at least {_m(R, "cascade.pass_threshold", ".4f")}
({_e(c["threshold_source"])}); other cells are reported clean. It passed
{_m(R, "cascade.passed_share", ".1%")} of the {split} patches. Both rows use the main network's
threshold {_m(R, "screening.threshold")}.</p>
<table><tr><th>{split}</th><th>recall</th><th>cracks found</th><th>false-alarm rate</th>
<th>false alarms</th></tr>{rows}</table>"""


def _per_class(R: dict) -> str:
    rows = "".join(
        f"<tr><td>{_e(c['name'])}</td><td>{_m(R, f'per_class.{i}.support')}</td>"
        f"<td>{_m(R, f'per_class.{i}.precision')}</td><td>{_m(R, f'per_class.{i}.recall')}</td>"
        f"<td>{_ci(R, f'per_class.{i}.recall_ci_low', f'per_class.{i}.recall_ci_high')}</td>"
        f"<td>{c['recall_interval']['k']}/{c['recall_interval']['n']}</td>"
        f"<td>{_m(R, f'per_class.{i}.f1')}</td></tr>"
        for i, c in enumerate(R["per_class"])
    )
    level = _level(R)
    return f"""<h2>Per class</h2>
<p>Recall intervals: {_method(R)}, {level}. A class with no {_e(R["split"])} patches has no
recall (n/a); a narrow class with few patches has a wide interval.</p>
<table><tr><th>class</th><th>support</th><th>precision</th><th>recall</th>
<th>recall {level} interval</th><th>k/n</th><th>F1</th></tr>
{rows}</table>
<p>Accuracy over all classes: {_m(R, "accuracy")}.</p>"""


def _confusion(R: dict, names: list[str], out: Path) -> str:
    head = "".join(f"<th>{_e(n)}</th>" for n in names)

    def rows(key: str, fmt: str) -> str:
        return "".join(
            f"<tr><th class='rowh'>{_e(n)}</th>"
            + "".join(f"<td>{_m(R, f'{key}.{i}.{j}', fmt)}</td>" for j in range(len(names)))
            + "</tr>"
            for i, n in enumerate(names)
        )

    return f"""<h2>Confusion matrix</h2>
<p>Rows: true class; columns: predicted class, the model's likeliest class. Counts, then the
share of each true class. This is not how the screener decides: it flags a patch when its crack
probability (1 &minus; P(none)) reaches the threshold {_m(R, "screening.threshold")}, so a clean
patch counted under a crack class here may not be a false alarm in the screening figures.</p>
<table><tr><th class="rowh">true \\ predicted</th>{head}</tr>{rows("confusion_matrix", ".3f")}</table>
<table><tr><th class="rowh">true \\ predicted</th>{head}</tr>{rows("confusion_matrix_row_normalised", ".2f")}</table>
{_img_tag(out / CONFUSION_PNG, "confusion matrix")}"""


def _calibration(R: dict, out: Path) -> str:
    temp = R["calibration"].get("temperature")
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
    return f"""<h2>Calibration</h2>
<p>Expected calibration error of the predicted class (Guo et al. 2017, 10 equal-width bins):
{_m(R, "calibration.ece")}; mean negative log-likelihood {_m(R, "calibration.nll")} nats.
ECE is the average gap between confidence and accuracy; 0 is perfect.</p>
{temp_html}
{_img_tag(out / "reliability.png", "reliability diagram")}"""


def _failures(R: dict, out: Path, n_missed: int, n_fa: int) -> str:
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
    missed_img = _img_tag(out / "missed_cracks.png", "missed cracks")
    fa_img = _img_tag(out / "false_alarms.png", "false alarms")
    return f"""<h2>Where it fails</h2>
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
{fa_img or "<p>None at this threshold.</p>"}"""


def _comparison(R: dict, out: Path) -> str:
    comp = R.get("comparison")
    if not comp:
        return ""
    mr, ma = comp["mcnemar_recall"], comp["mcnemar_accuracy"]
    sheet = _img_tag(out / "disagreements.png", "patches where the experiments disagree")
    return f"""
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
{sheet or "<p>The two experiments agree on every patch.</p>"}"""


def _reproducing(R: dict) -> str:
    return f"""<h2>Reproducing these figures</h2>
<p class="dim">Every figure recomputes from <code>predictions.csv</code> (one row per patch: true
and predicted class, every class probability, the screening probability). The numbers on
this page are those of <code>metrics.json</code>, whose keys are documented in
<code>trainkit.judging.evaluation</code>.</p>
<p class="caution">{_e(R["caution"])}</p>"""
