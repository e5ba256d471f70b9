"""The evaluation's plots: confusion matrix, screening curves, reliability diagram and contact sheets."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from trainkit.core.fsutil import atomic_path

__all__ = [
    "plot_confusion",
    "plot_screening_curves",
    "plot_reliability",
    "contact_sheet",
    "SHEET_MAX",
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
