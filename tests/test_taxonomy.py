"""Class sets, the angle convention and remapping under the symmetries of the square."""

from __future__ import annotations

import re

import numpy as np
import pytest

from trainkit.core.errors import TrainkitError
from trainkit.core.taxonomy import (
    D4_ELEMENTS,
    ClassSet,
    angle_difference,
    apply_d4,
    d4_angle,
    load_class_set,
)


def line_image(angle_deg: float, size: int = 65) -> np.ndarray:
    """A Gaussian line through the centre at an on-screen angle (y grows downward)."""
    yy, xx = np.mgrid[0:size, 0:size].astype(float)
    c = (size - 1) / 2
    dx, dy = np.cos(np.radians(angle_deg)), -np.sin(np.radians(angle_deg))  # screen -> image rows
    dist = np.abs((xx - c) * dy - (yy - c) * dx)
    return np.exp(-(dist**2) / (2 * 1.5**2))


def structure_tensor_angle(img: np.ndarray) -> float:
    """Line direction from the structure tensor (Bigün & Granlund 1987, from memory).

    skimage's structure_tensor(order='rc') returns A_rr, A_rc, A_cc = J_yy, J_xy, J_xx;
    theta = 0.5 * atan2(2 J_xy, J_yy - J_xx) mod 180, counter-clockwise from +x on screen
    (the formula as given in the project's shared REFERENCES).
    """
    from skimage.feature import structure_tensor

    a_rr, a_rc, a_cc = structure_tensor(img, sigma=3, order="rc")
    jyy, jxy, jxx = a_rr.sum(), a_rc.sum(), a_cc.sum()
    return float(np.degrees(0.5 * np.arctan2(2 * jxy, jyy - jxx)) % 180.0)


@pytest.mark.parametrize("angle", [0, 30, 45, 60, 90, 120, 150])
def test_structure_tensor_reference_recovers_drawn_angle(angle):
    # Shared REFERENCES: lines at 0/30/45/60/90/120/150 deg recover within about 0.4 deg
    # with sigma = 3 (computed with skimage 0.26). Guards the test helper itself.
    assert angle_difference(structure_tensor_angle(line_image(angle)), angle) < 0.6


@pytest.mark.parametrize("k,flip", D4_ELEMENTS)
@pytest.mark.parametrize("angle", [0, 20, 45, 70, 90, 135, 160])
def test_d4_angle_matches_the_transformed_image(k, flip, angle):
    """d4_angle must agree with what numpy actually does to a drawn line (measured with skimage)."""
    measured = structure_tensor_angle(apply_d4(line_image(angle), k, flip))
    assert angle_difference(measured, d4_angle(angle, k, flip)) < 0.6


def test_contract_examples_from_design():
    # DESIGN.md: a horizontal flip maps a to 180 - a; a quarter turn counter-clockwise maps a to a + 90.
    assert d4_angle(30, 0, True) == pytest.approx(150)
    assert d4_angle(30, 1, False) == pytest.approx(120)
    assert d4_angle(170, 1, False) == pytest.approx(80)


def test_default_class_set_contract():
    cs = load_class_set("orientation")
    assert cs.names == (
        "none",
        "horizontal",
        "diagonal_rising",
        "vertical",
        "diagonal_falling",
        "map",
    )
    assert cs.angle_centres == (None, 0.0, 45.0, 90.0, 135.0, None)
    assert cs.catchall_index == 5
    assert [
        cs.class_for_angle(a) for a in (0, 22, 23, 45, 67, 68, 90, 112, 113, 135, 157, 158, 179.9)
    ] == [1, 1, 2, 2, 2, 3, 3, 3, 4, 4, 4, 1, 1]
    assert cs.boundary_distance(22.5) == pytest.approx(0.0)
    assert cs.boundary_distance(40.0) == pytest.approx(17.5)


def test_permutations_of_default_set():
    cs = load_class_set("orientation")
    # mirror left-right swaps the two diagonals and keeps horizontal and vertical
    assert cs.d4_permutation(0, True).tolist() == [0, 1, 4, 3, 2, 5]
    # a quarter turn swaps horizontal<->vertical and the diagonals
    assert cs.d4_permutation(1, False).tolist() == [0, 3, 4, 1, 2, 5]
    assert len(cs.allowed_d4_elements()) == 8


def test_a_user_set_not_closed_under_quarter_turns():
    cs = ClassSet("mine", ("none", "flat", "steep"), (None, 10.0, 80.0))
    assert cs.d4_permutation(0, True) is None  # 10 -> 170: no class there
    cs2 = ClassSet("mine", ("none", "flat", "tilted"), (None, 0.0, 30.0))
    assert cs2.d4_permutation(1, False) is None
    assert (0, False) in cs2.allowed_d4_elements()


def test_presence_set():
    cs = load_class_set("presence")
    assert cs.names == ("none", "crack") and cs.class_for_angle(33) == 1
    assert len(cs.allowed_d4_elements()) == 8


@pytest.mark.parametrize(
    "names,centres,match",
    [
        (("none",), (None,), "at least 2"),
        (("none", "a", "a"), (None, 0.0, 90.0), "repeated"),
        (("none", "a"), (0.0, None), "no-crack class"),
        (("none", "a"), (None, 190.0), r"\[0, 180\)"),
        (("none", "a", "b"), (None, None, None), "at most one"),
    ],
)
def test_invalid_class_sets(names, centres, match):
    with pytest.raises(ValueError, match=match):
        ClassSet("bad", names, centres)


def test_load_errors(tmp_path):
    with pytest.raises(ValueError, match="neither a built-in"):
        load_class_set(tmp_path / "missing.yaml")
    p = tmp_path / "c.yaml"
    p.write_text("classes:\n  - name: none\n  - name: crack\n    colour: red\n")
    with pytest.raises(ValueError, match="unknown keys"):
        load_class_set(p)
    with pytest.raises(ValueError, match="unknown class 'cracks'; choose one of: none, crack"):
        load_class_set("presence").index("cracks")


@pytest.mark.parametrize(
    ("load", "kind", "builtins"),
    [
        ("trainkit.core.taxonomy:load_class_set", "class set", "orientation, presence"),
        (
            "trainkit.learning.config:load_train_config",
            "recipe",
            "default, demo, scratch, presence, frozen",
        ),
    ],
)
def test_class_sets_and_recipes_load_through_one_helper(tmp_path, load, kind, builtins):
    # One reader for "a built-in name or a YAML file": the same wording for both kinds.
    import importlib

    module, name = load.split(":")
    loader = getattr(importlib.import_module(module), name)
    with pytest.raises(TrainkitError) as info:
        loader("nope")
    assert str(info.value) == f"{kind} 'nope' is neither a built-in {kind} ({builtins}) nor a file"
    missing = tmp_path / "missing.yaml"
    with pytest.raises(TrainkitError, match=f"{kind} '{re.escape(str(missing))}' is neither"):
        loader(missing)
    # A Python tag is never run by yaml.safe_load (PyYAML docs: safe_load builds plain
    # Python objects only); the file is refused as invalid YAML.
    tagged = tmp_path / "tagged.yaml"
    tagged.write_text("patch_px: !!python/object/apply:os.getcwd []\n", encoding="utf-8")
    with pytest.raises(TrainkitError, match=r"tagged.yaml: not valid YAML \(could not determine"):
        loader(tagged)
    latin = tmp_path / "latin.yaml"
    latin.write_bytes(b"name: caf\xe9\n")
    with pytest.raises(TrainkitError, match=r"latin.yaml: not UTF-8 text \(byte 9\)"):
        loader(latin)


def test_the_core_taxonomy_imports_yaml_only_when_a_file_is_read():
    import subprocess
    import sys

    code = (
        "import sys, trainkit.core.taxonomy as t; a = 'yaml' in sys.modules; "
        "t.load_class_set('presence'); print(a, 'yaml' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["False", "True"]
