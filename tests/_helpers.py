"""Test helpers: ``make_ws``, a small workspace of photos whose patches have real PNG crops."""

from __future__ import annotations

from collections.abc import Callable, Iterable
from pathlib import Path

import numpy as np
from PIL import Image

from trainkit.core.taxonomy import load_class_set
from trainkit.store.workspace import Workspace


def _photo_name(i: int) -> str:
    return f"p{i}.jpg"


def make_ws(
    root: Path,
    n_photos: int = 1,
    per_photo: int = 4,
    *,
    size: int = 32,
    crop: Callable[[int, int], np.ndarray] | None = None,
    skip: Iterable[int] = (),
    gsd_mm: float | None = None,
    photo_name: Callable[[int], str] = _photo_name,
    class_set: str = "orientation",
) -> Workspace:
    """A workspace of ``n_photos`` photos, each one row of ``per_photo`` square patches.

    No pixels of a photo exist; each patch's crop is a PNG file in the workspace, as
    after tiling. Nothing is labelled.

    Args:
        root: the workspace folder (created).
        n_photos: photos ``photo_name(i)``, each its own group ``g{i}``.
        per_photo: patches per photo, left to right.
        size: patch side in pixels (the workspace's tile size).
        crop: ``crop(i, c)``, the pixels of photo i's patch c, (size, size, 3) uint8;
            default random pixels (one generator seeded 0, in patch order).
        skip: patch columns left out of the review queue (``review_skip``), in every photo.
        gsd_mm: every photo's scale in mm per pixel (a patch then covers ``gsd_mm * size``
            mm), or None.
        photo_name: the name of photo i (a relative path; may name a subfolder).
        class_set: a built-in class set name.
    """
    ws = Workspace.create(root, class_set=load_class_set(class_set), tile_px=size)
    if crop is None:
        rng = np.random.default_rng(0)

        def crop(i: int, c: int) -> np.ndarray:
            return rng.integers(0, 255, (size, size, 3), dtype=np.uint8)

    skip = set(skip)
    for i in range(n_photos):
        patches = []
        for c in range(per_photo):
            rel = f"patches/{i}/r000_c{c:03d}.png"
            (ws.root / rel).parent.mkdir(parents=True, exist_ok=True)
            Image.fromarray(crop(i, c)).save(ws.root / rel)
            patches.append(
                dict(row=0, col=c, x0=size * c, y0=0, x1=size * c + size, y1=size, crop=rel)
                | dict(patch_mm=None if gsd_mm is None else gsd_mm * size, focus=50.0)
                | dict(clipped=0.0, review_skip=int(c in skip))
            )
        name = photo_name(i)
        ws.add_photo_with_patches(
            name=name,
            source_path=f"/x/{name}",
            width=size * per_photo,
            height=size,
            gsd_mm=gsd_mm,
            group_id=f"g{i}",
            sha256=f"{i:064d}",
            patches=patches,
        )
    return ws
