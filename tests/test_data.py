"""Augmentation: every symmetry remaps the label to what the transformed crack really shows."""

from __future__ import annotations

import numpy as np
import pytest

from trainkit.core.taxonomy import D4_ELEMENTS, apply_d4, load_class_set
from trainkit.learning.config import AugmentConfig
from trainkit.learning.data import Augmenter, build_photometric
from trainkit.synth import Crack, render_cracks


def crack_patch(angle_deg: float, size: int = 96) -> np.ndarray:
    """A dark straight synthetic crack through the patch centre at an on-screen angle."""
    c = size / 2
    d = np.array([np.cos(np.radians(angle_deg)), -np.sin(np.radians(angle_deg))])
    pts = np.array([[c, c] - d * size, [c, c] + d * size])
    cov, _, _ = render_cracks(
        [Crack(points=pts, widths=np.array([3.0, 3.0]), kind="main", crack_id=0)], size, size
    )
    grey = (170 * (1 - 0.8 * cov)).astype(np.uint8)
    return np.repeat(grey[..., None], 3, axis=2)


def measured_angle(rgb: np.ndarray) -> float:
    """Dominant orientation by the structure tensor (skimage; formula from the shared REFERENCES)."""
    from skimage.feature import structure_tensor

    img = 1.0 - rgb[..., 0].astype(float) / 255.0
    a_rr, a_rc, a_cc = structure_tensor(img, sigma=2, order="rc")
    return float(np.degrees(0.5 * np.arctan2(2 * a_rc.sum(), a_rr.sum() - a_cc.sum())) % 180.0)


@pytest.mark.parametrize("angle", [5.0, 40.0, 50.0, 88.0, 100.0, 140.0, 170.0])
@pytest.mark.parametrize("element", D4_ELEMENTS)
def test_every_symmetry_remaps_the_label(angle, element):
    cs = load_class_set("orientation")
    label = cs.class_for_angle(angle)
    aug = Augmenter(cs, AugmentConfig(photometric=0.0))
    aug.elements = [element]  # force this group element
    img, new_label = aug(crack_patch(angle), label, np.random.default_rng(0))
    # The class of the angle measured on the transformed image is the remapped label.
    assert cs.class_for_angle(measured_angle(img)) == new_label
    np.testing.assert_array_equal(img, apply_d4(crack_patch(angle), *element))


def test_none_and_map_keep_their_label_under_all_symmetries():
    cs = load_class_set("orientation")
    for e in D4_ELEMENTS:
        perm = cs.d4_permutation(*e)
        assert perm[0] == 0 and perm[5] == 5


def test_sampling_covers_all_elements_and_is_seeded():
    cs = load_class_set("orientation")
    aug = Augmenter(cs, AugmentConfig(photometric=0.0))
    img = crack_patch(30.0)
    rng = np.random.default_rng(1)
    labels = {aug(img, 2, rng)[1] for _ in range(200)}
    assert labels == {2, 4}  # rising stays rising or becomes falling; never horizontal/vertical
    a = [aug(img, 2, np.random.default_rng(5))[0] for _ in range(2)]
    np.testing.assert_array_equal(a[0], a[1])


def test_symmetries_off_is_identity_geometry():
    cs = load_class_set("orientation")
    aug = Augmenter(cs, AugmentConfig(symmetries=False, photometric=0.0))
    img = crack_patch(30.0)
    out, lab = aug(img, 2, np.random.default_rng(0))
    np.testing.assert_array_equal(out, img)
    assert lab == 2


def test_photometric_keeps_shape_and_dtype():
    pipe = build_photometric(AugmentConfig(photometric=1.0))
    rng_img = np.random.default_rng(0).integers(0, 255, (64, 64, 3), dtype=np.uint8)
    out = pipe(image=rng_img)["image"]
    assert out.shape == rng_img.shape and out.dtype == np.uint8


def test_resize_patch_matches_pillow_bilinear():
    # Reference: Pillow's own bilinear resize (the filter the Screener uses on frames).
    from PIL import Image

    from trainkit.core.grid import resize_patch

    img = np.random.default_rng(3).integers(0, 256, (96, 80, 3), dtype=np.uint8)
    want = np.asarray(Image.fromarray(img).resize((64, 64), Image.BILINEAR))
    assert np.array_equal(resize_patch(img, 64), want)
    same = np.zeros((64, 64, 3), np.uint8)
    assert resize_patch(same, 64) is same
