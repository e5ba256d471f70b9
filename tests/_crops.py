"""A workspace made directly from crops, for tests that need real patch files but no photo."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

from trainkit.core.taxonomy import load_class_set
from trainkit.labels.workspace import Workspace


def workspace_of_crops(root: Path, images: list[np.ndarray], *, skip=()) -> Workspace:
    """One photo 'p.jpg' whose patches, left to right, are ``images`` (equal squares) saved
    as PNG crops; patches at indices in ``skip`` are left out of the review queue."""
    size = images[0].shape[0]
    ws = Workspace.create(root, class_set=load_class_set("orientation"), tile_px=size)
    patches = []
    for c, img in enumerate(images):
        rel = f"patches/r000_c{c:03d}.png"
        (ws.root / rel).parent.mkdir(parents=True, exist_ok=True)
        Image.fromarray(img).save(ws.root / rel)
        patches.append(
            dict(row=0, col=c, x0=size * c, y0=0, x1=size * c + size, y1=size, crop=rel)
            | dict(patch_mm=None, focus=1.0, clipped=0.0, review_skip=int(c in skip))
        )
    ws.add_photo_with_patches(
        name="p.jpg",
        source_path="/x/p.jpg",
        width=size * len(images),
        height=size,
        gsd_mm=None,
        group_id="g",
        sha256="0" * 64,
        patches=patches,
    )
    return ws
