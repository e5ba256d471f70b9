"""Patch arrays for training and evaluation: labelled crops, augmentation with label remapping.

Samples are uint8 RGB arrays (S, S, 3) with an integer class index. Geometric
augmentation draws one of the symmetries of the square that the class set is
closed under, applies it, and remaps the label from the class angle centres
(taxonomy.ClassSet.d4_permutation); albumentations is used only for photometric
changes (and an optional small rotation), behind :func:`build_photometric`,
because it passes class labels through unchanged.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Collection, Sequence
from dataclasses import dataclass

import numpy as np

from trainkit.core.taxonomy import ClassSet, apply_d4
from trainkit.learning.config import AugmentConfig

__all__ = ["PatchSet", "load_patch_set", "build_photometric", "Augmenter"]


@dataclass
class PatchSet:
    """Crops and labels of one subset held in memory.

    Attributes:
        images: (N, S, S, 3) uint8 RGB.
        labels: (N,) int64 class indices.
        patch_ids: (N,) int64 workspace patch ids.
        photos: photo name per patch.
        groups: group id per patch.
        patch_mm: surface width per patch in mm (NaN where unknown).
    """

    images: np.ndarray
    labels: np.ndarray
    patch_ids: np.ndarray
    photos: list[str]
    groups: list[str]
    patch_mm: np.ndarray

    def __len__(self) -> int:
        return len(self.labels)

    def take(self, idx: np.ndarray) -> PatchSet:
        """The patches at positions ``idx``, in that order (images copied out of any memory map)."""
        return PatchSet(
            images=np.asarray(self.images)[idx],
            labels=self.labels[idx],
            patch_ids=self.patch_ids[idx],
            photos=[self.photos[i] for i in idx],
            groups=[self.groups[i] for i in idx],
            patch_mm=self.patch_mm[idx],
        )

    def concat(self, other: PatchSet) -> PatchSet:
        """These patches followed by ``other``'s (``self`` itself when ``other`` is empty)."""
        if len(other) == 0:
            return self
        return PatchSet(
            images=np.concatenate([np.asarray(self.images), np.asarray(other.images)]),
            labels=np.concatenate([self.labels, other.labels]),
            patch_ids=np.concatenate([self.patch_ids, other.patch_ids]),
            photos=[*self.photos, *other.photos],
            groups=[*self.groups, *other.groups],
            patch_mm=np.concatenate([self.patch_mm, other.patch_mm]),
        )


def load_patch_set(
    workspace,
    subset: str,
    class_set: ClassSet,
    *,
    input_px: int | None = None,
    cache: bool = True,
    ids: Collection[int] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> PatchSet:
    """Read the labelled crops of one split subset ('train', 'val', 'test').

    With ``ids`` the patches are those ids instead (e.g. a job's cells, which belong to no
    split); ``subset`` is then only a name.

    Patches whose current label is "unsure" are left out. Crops come from
    :class:`~trainkit.store.pixels.PatchPixels`: the workspace's crop store, else cut from
    the photo (checked by its SHA-256) and, with ``cache``, kept in the crop store so the
    next run decodes no photo.
    """
    from trainkit.store.pixels import PatchPixels

    if ids is None:
        recs = [r for r in workspace.patches(labelled=True) if r.subset == subset]
    else:
        recs = list(workspace.patches(ids=ids))
    recs = [r for r in recs if r.label is not None]
    size = input_px or workspace.tile_px
    with PatchPixels(workspace) as pixels:
        imgs = pixels.get(recs, size=size, store=cache, progress=progress)
    return PatchSet(
        images=imgs,
        labels=np.array([class_set.index(r.label) for r in recs], dtype=np.int64),
        patch_ids=np.array([r.id for r in recs], dtype=np.int64),
        photos=[r.photo for r in recs],
        groups=[r.group for r in recs],
        patch_mm=np.array(
            [np.nan if r.patch_mm is None else r.patch_mm for r in recs], dtype=float
        ),
    )


def build_photometric(cfg: AugmentConfig, seed: int | None = None):
    """The albumentations pipeline for photometric changes (and the optional small rotation)."""
    os.environ.setdefault("NO_ALBUMENTATIONS_UPDATE", "1")  # no network check at import
    import albumentations as A
    import cv2

    ops = [
        A.RandomBrightnessContrast(
            brightness_limit=cfg.brightness_contrast, contrast_limit=cfg.brightness_contrast, p=0.8
        ),
        A.RandomGamma(gamma_limit=(cfg.gamma[0] * 100, cfg.gamma[1] * 100), p=0.5),
    ]
    if cfg.hue_saturation:
        ops.append(
            A.HueSaturationValue(hue_shift_limit=6, sat_shift_limit=12, val_shift_limit=0, p=0.4)
        )
    if cfg.shadow > 0:
        ops.append(
            A.RandomShadow(shadow_roi=(0, 0, 1, 1), shadow_intensity_range=(0.2, 0.5), p=cfg.shadow)
        )
    if cfg.blur > 0:
        ops.append(A.GaussianBlur(blur_limit=(3, 5), p=cfg.blur))
    if cfg.noise > 0:
        ops.append(A.GaussNoise(std_range=(0.01, 0.04), p=cfg.noise))
    if cfg.jpeg > 0:
        ops.append(A.ImageCompression(quality_range=(50, 95), p=cfg.jpeg))
    block = A.Compose(ops, p=cfg.photometric, seed=seed)
    if cfg.small_rotation_deg > 0:
        rot = A.Rotate(limit=cfg.small_rotation_deg, border_mode=cv2.BORDER_REFLECT_101, p=0.5)
        return A.Compose([rot, block], seed=seed)
    return block


class Augmenter:
    """Callable (image, label, rng) -> (image, label) used by the training dataset.

    Args:
        class_set: the class set, for label remapping under symmetries.
        cfg: augmentation settings.
        seed: seed of the photometric pipeline (albumentations keeps its own generator).
    """

    def __init__(self, class_set: ClassSet, cfg: AugmentConfig, seed: int | None = None) -> None:
        self.class_set = class_set
        self.cfg = cfg
        self.elements = class_set.allowed_d4_elements() if cfg.symmetries else [(0, False)]
        self.perms = {e: class_set.d4_permutation(*e) for e in self.elements}
        self.photometric = build_photometric(cfg, seed) if cfg.photometric > 0 else None

    def reseed(self, seed: int) -> None:
        """Restart the photometric pipeline's own generator (done at every epoch)."""
        if self.photometric is not None:
            self.photometric.set_random_seed(int(seed))

    def __call__(
        self, image: np.ndarray, label: int, rng: np.random.Generator
    ) -> tuple[np.ndarray, int]:
        k, flip = self.elements[int(rng.integers(len(self.elements)))]
        out = apply_d4(image, k, flip)
        new_label = int(self.perms[(k, flip)][label])
        if self.photometric is not None:
            out = self.photometric(image=out)["image"]
        return np.ascontiguousarray(out), new_label


def batches(indices: Sequence[int], batch_size: int):
    """Consecutive slices of ``indices`` of at most ``batch_size``."""
    for i in range(0, len(indices), batch_size):
        yield indices[i : i + batch_size]
