"""Plots and the self-contained HTML evaluation report."""

from __future__ import annotations

import base64
import html
from pathlib import Path

import numpy as np

from .taxonomy import ClassSet

__all__ = ["write_report", "plot_confusion", "plot_screening_curves", "contact_sheet"]


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
    fig.savefig(path)
    plt.close(fig)


def plot_screening_curves(
    is_crack: np.ndarray, p_crack: np.ndarray, threshold: float, path: Path
) -> None:
    """Precision-recall and ROC curves of crack vs none with the operating point marked."""
    from sklearn.metrics import precision_recall_curve, roc_curve

    plt = _plt()
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(10, 4.2), dpi=110)
    if is_crack.any() and (~is_crack).any():
        prec, rec, _ = precision_recall_curve(is_crack, p_crack)
        fpr, tpr, _ = roc_curve(is_crack, p_crack)
        a1.plot(rec, prec, color="#1f5f8b")
        a2.plot(fpr, tpr, color="#1f5f8b")
        flagged = p_crack >= threshold
        r = flagged[is_crack].mean()
        pr = is_crack[flagged].mean() if flagged.any() else 1.0
        fa = flagged[~is_crack].mean()
        a1.plot([r], [pr], "o", color="#d9480f", label=f"threshold {threshold:.3f}")
        a2.plot([fa], [r], "o", color="#d9480f", label=f"threshold {threshold:.3f}")
        a1.legend(loc="lower left")
        a2.legend(loc="lower right")
    else:
        for a in (a1, a2):
            a.text(0.5, 0.5, "needs both crack and no-crack patches", ha="center")
    a1.set(
        xlabel="recall (cracks found)",
        ylabel="precision",
        xlim=(0, 1.02),
        ylim=(0, 1.02),
        title="Precision-recall, crack vs none",
    )
    a2.plot([0, 1], [0, 1], ":", color="grey")
    a2.set(
        xlabel="false-alarm rate",
        ylabel="recall",
        xlim=(0, 1.02),
        ylim=(0, 1.02),
        title="ROC, crack vs none",
    )
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def contact_sheet(
    images: np.ndarray, captions: list[str], path: Path, *, cols: int = 8, scale: int = 1
) -> None:
    """A grid of patches with a caption under each, saved as PNG."""
    from PIL import Image, ImageDraw

    n = len(images)
    if n == 0:
        return
    s = images.shape[1] * scale
    cap_h = 14
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
    sheet.save(path)


def _img_tag(path: Path, alt: str) -> str:
    if not path.exists():
        return ""
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{html.escape(alt)}">'


def write_report(
    out: Path, result: dict, *, data, probs: np.ndarray, class_set: ClassSet, experiment: dict
) -> Path:
    """Write plots and ``report.html`` (images embedded, one self-contained file)."""
    names = list(class_set.names)
    cm = np.array(result["confusion_matrix"])
    plot_confusion(cm, names, out / "confusion_matrix.png")
    is_crack = data.labels != 0
    p_crack = np.clip(1.0 - probs[:, 0], 0, 1)
    thr = result["screening"]["threshold"]
    plot_screening_curves(is_crack, p_crack, thr, out / "screening_curves.png")
    missed = np.flatnonzero(is_crack & (p_crack < thr))
    missed = missed[np.argsort(p_crack[missed])][:48]
    contact_sheet(
        data.images[missed],
        [f"{names[data.labels[i]][:9]} {p_crack[i]:.2f}" for i in missed],
        out / "missed_cracks.png",
    )
    false_alarms = np.flatnonzero(~is_crack & (p_crack >= thr))
    false_alarms = false_alarms[np.argsort(-p_crack[false_alarms])][:48]
    contact_sheet(
        data.images[false_alarms],
        [f"none {p_crack[i]:.2f}" for i in false_alarms],
        out / "false_alarms.png",
    )

    s = result["screening"]
    ci = s["recall_interval"]
    method = "Wilson score" if ci["method"] == "wilson" else "Clopper-Pearson exact"
    rows = "".join(
        f"<tr><td>{html.escape(c['name'])}</td><td>{c['support']}</td><td>{c['precision']:.3f}</td>"
        f"<td>{c['recall']:.3f}</td><td>{_fmt_ci(c['recall_interval'])}</td><td>{c['f1']:.3f}</td></tr>"
        for c in result["per_class"]
    )
    gate = result.get("gate")
    gate_html = ""
    if gate:
        cls = "pass" if gate["passed"] else "fail"
        gate_html = f'<p class="verdict {cls}">{html.escape(gate["verdict"])}</p>'
    scale = experiment.get("gsd_mm_range")
    scale_txt = (
        f"{scale[0]:.3f}-{scale[1]:.3f} mm per pixel" if scale else "unknown (photos had no scale)"
    )
    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>trainkit evaluation</title>
<style>
body {{ font-family: system-ui, sans-serif; max-width: 1100px; margin: 2em auto; color: #222; line-height: 1.45; }}
h1 {{ font-size: 1.6em; }} table {{ border-collapse: collapse; margin: 1em 0; }}
td, th {{ border: 1px solid #bbb; padding: 4px 10px; text-align: right; }} th {{ background: #eef2f5; }}
td:first-child {{ text-align: left; }} .caution {{ border-left: 6px solid #c2410c; background: #fff4ec; padding: .8em 1em; }}
.verdict {{ font-size: 1.2em; font-weight: 600; padding: .6em 1em; }} .pass {{ background: #e6f4ea; }} .fail {{ background: #fde8e8; }}
.headline {{ font-size: 1.15em; }} img {{ max-width: 100%; border: 1px solid #ddd; margin: .5em 0; }}
</style></head><body>
<h1>Crack screener evaluation — {html.escape(result["split"])} subset</h1>
<p class="caution"><strong>Read this first.</strong> {html.escape(result["caution"])}</p>
{gate_html}
<p class="headline">Screening recall (crack patches flagged) at threshold {s["threshold"]:.3f}:
<strong>{s["recall"]:.3f}</strong>, {ci["confidence"]:.0%} interval {_fmt_ci(ci)} ({method}, {ci["k"]}/{ci["n"]}).
False-alarm rate {s["false_alarm_rate"]:.3f} ({s["fp"]} of {s["fp"] + s["tn"]} clean patches flagged).</p>
<p>Threshold chosen on the {html.escape(s["threshold_source"])}. Evaluated on {result["patches"]} patches from
{result["photos"]} photos that the model never saw in training. Training scale: {scale_txt}.
Expected calibration error (10 bins): {result["expected_calibration_error"]:.3f}. Accuracy over all classes: {result["accuracy"]:.3f}.</p>
<h2>Per class</h2>
<table><tr><th>class</th><th>support</th><th>precision</th><th>recall</th><th>recall {ci["confidence"]:.0%} interval ({method})</th><th>F1</th></tr>
{rows}</table>
<h2>Confusion matrix</h2>{_img_tag(out / "confusion_matrix.png", "confusion matrix")}
<h2>Screening curves</h2>{_img_tag(out / "screening_curves.png", "precision-recall and ROC curves")}
<h2>Missed cracks (lowest screening probability first)</h2>
{_img_tag(out / "missed_cracks.png", "missed cracks") or "<p>None at this threshold.</p>"}
<h2>False alarms (highest screening probability first)</h2>
{_img_tag(out / "false_alarms.png", "false alarms") or "<p>None at this threshold.</p>"}
<p><small>Training-data digest {html.escape(str(result.get("data_digest")))}; checkpoint epoch {result.get("checkpoint_epoch")}.
Every figure can be recomputed from predictions.csv.</small></p>
</body></html>
"""
    path = out / "report.html"
    path.write_text(page, encoding="utf-8")
    return path


def _fmt_ci(ci: dict) -> str:
    if ci["n"] == 0:
        return "n/a (no patches)"
    return f"{ci['low']:.3f}-{ci['high']:.3f}"
