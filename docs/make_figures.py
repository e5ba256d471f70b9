"""Make the README's figure of the class set and angle convention (docs/angle-convention.png).

Run from the repository root: `.venv/bin/python docs/make_figures.py`. The example
patches are cut from the synthetic tiny_dataset, using its labels.csv.
"""

from __future__ import annotations

import csv
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from PIL import Image  # noqa: E402

from trainkit.core.taxonomy import load_class_set

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    cs = load_class_set("orientation")
    rows = list(csv.DictReader((ROOT / "tiny_dataset" / "labels.csv").open()))
    examples = {}
    for r in rows:
        if r["label"] and r["label"] not in examples:
            box = tuple(int(r[k]) for k in ("x0", "y0", "x1", "y1"))
            with Image.open(ROOT / "tiny_dataset" / "photos" / r["photo"]) as im:
                examples[r["label"]] = np.asarray(im.convert("RGB").crop(box))
    fig = plt.figure(figsize=(11, 3.6), dpi=100)
    ax = fig.add_axes([0.01, 0.05, 0.3, 0.9])
    ax.set_aspect("equal")
    ax.axis("off")
    colours = ["#e6550d", "#3182bd", "#756bb1", "#31a354"]
    for i, c in enumerate(cs.oriented_indices):
        centre = cs.angle_centres[c]
        for a0 in (centre - 22.5, centre + 180 - 22.5):
            wedge = matplotlib.patches.Wedge((0, 0), 1.0, a0, a0 + 45, color=colours[i], alpha=0.35)
            ax.add_patch(wedge)
        t = np.radians(centre)
        ax.plot([-np.cos(t), np.cos(t)], [-np.sin(t), np.sin(t)], color=colours[i], lw=2.5)
        ax.text(
            1.18 * np.cos(t),
            1.18 * np.sin(t),
            f"{cs.names[c]}\n{centre:.0f}°",
            ha="center",
            va="center",
            fontsize=8,
        )
    ax.annotate("", xy=(1.05, 0), xytext=(0, 0), arrowprops={"arrowstyle": "->"})
    ax.text(
        0.0,
        -1.45,
        "angle: counter-clockwise from +x as seen on screen,\nundirected, 0-180°; "
        "class = nearest centre (±22.5°)",
        ha="center",
        fontsize=8,
    )
    ax.set_xlim(-1.6, 1.6)
    ax.set_ylim(-1.7, 1.5)
    for j, name in enumerate(cs.names):
        sub = fig.add_axes([0.33 + j * 0.111, 0.2, 0.105, 0.62])
        sub.axis("off")
        if name in examples:
            sub.imshow(examples[name])
        sub.set_title(f"{j} {name}", fontsize=8)
    fig.text(
        0.66,
        0.06,
        "examples from the synthetic tiny_dataset (invented photos)",
        ha="center",
        fontsize=8,
    )
    fig.savefig(ROOT / "docs" / "angle-convention.png")


if __name__ == "__main__":
    main()
