"""Generate procedural concrete photos with exact crack ground truth and patch labels.

The package is split by job; this module re-exports the names other code uses:

- :mod:`~trainkit.synth.options`: generator version, scene kinds, :class:`SynthOptions`,
  :class:`SurfaceFamily` (a surface family from outside the kit).
- :mod:`~trainkit.synth.truth`: :class:`Crack` polylines and :class:`SynthPhoto`.
- :mod:`~trainkit.synth.geometry`: screen angles and exact clipping to boxes.
- :mod:`~trainkit.synth.paths`: random crack geometry (walks, branches, widths, map networks).
- :mod:`~trainkit.synth.raster`: crack polylines to coverage, mask and angle maps.
- :mod:`~trainkit.synth.noise`, :mod:`~trainkit.synth.surface`,
  :mod:`~trainkit.synth.lighting`, :mod:`~trainkit.synth.distractors`: the concrete surface,
  its light and stains, and non-crack features (pores, formwork joints, tie holes).
- :mod:`~trainkit.synth.photo`: :func:`generate_photo` composes one photo.
- :mod:`~trainkit.synth.labels`: :func:`derive_patch_label` and its rules.
- :mod:`~trainkit.synth.dataset`: :func:`write_dataset` (the only module that writes files).
"""

from __future__ import annotations

from trainkit.synth.dataset import ASSET_OWNER, STRUCTURES, photo_specs, scene_plan, write_dataset
from trainkit.synth.geometry import clipped_lengths
from trainkit.synth.labels import LabelRules, PatchTruth, derive_patch_label
from trainkit.synth.options import GENERATOR_VERSION, SCENE_MIX, SCENES, SurfaceFamily, SynthOptions
from trainkit.synth.photo import generate_photo
from trainkit.synth.raster import render_cracks
from trainkit.synth.truth import Crack, SynthPhoto

#: Former private name of :func:`trainkit.synth.dataset.scene_plan`, kept for importers.
_scene_plan = scene_plan

__all__ = [
    "GENERATOR_VERSION",
    "SCENES",
    "SCENE_MIX",
    "ASSET_OWNER",
    "STRUCTURES",
    "Crack",
    "SurfaceFamily",
    "SynthOptions",
    "SynthPhoto",
    "LabelRules",
    "PatchTruth",
    "generate_photo",
    "render_cracks",
    "clipped_lengths",
    "derive_patch_label",
    "photo_specs",
    "scene_plan",
    "write_dataset",
]
