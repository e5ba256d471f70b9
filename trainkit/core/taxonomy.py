"""Class sets, the crack-angle convention and label remapping under flips and rotations.

Angle convention (DESIGN.md, fixed contract): a crack's orientation is an undirected
angle in [0, 180) degrees, counter-clockwise from the image's +x axis as seen on
screen, with image rows growing downward. A class set is plain data: an ordered
list of class names with an optional angle centre each. Class 0 is always the
no-crack class.

The eight symmetries of the square (the dihedral group D4) are written as
``(k, flip)``: rotate the image ``k`` quarter turns counter-clockwise as seen on
screen (``numpy.rot90(img, k)``), then mirror left-right if ``flip``
(``numpy.fliplr``). Under them an angle ``a`` maps to ``a + 90 k`` and then to
``180 - a`` when flipped, modulo 180.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import cast, overload

import numpy as np

from trainkit.core.errors import TrainkitError
from trainkit.core.yamlfile import read_named_yaml

__all__ = [
    "ClassSet",
    "ClassSetError",
    "D4_ELEMENTS",
    "apply_d4",
    "d4_angle",
    "load_class_set",
    "angle_difference",
    "BUILTIN_CLASS_SETS",
]


class ClassSetError(TrainkitError):
    """A class set that is not valid or not found; the message names the class and the rule."""


#: All eight elements of D4 as (quarter turns counter-clockwise, mirror left-right).
D4_ELEMENTS: tuple[tuple[int, bool], ...] = tuple((k, f) for f in (False, True) for k in range(4))

BUILTIN_CLASS_SETS = ("orientation", "presence")


@overload
def angle_difference(a: float, b: float) -> float: ...
@overload
def angle_difference(a: float | np.ndarray, b: float | np.ndarray) -> float | np.ndarray: ...
def angle_difference(a: float | np.ndarray, b: float | np.ndarray) -> float | np.ndarray:
    """Smallest absolute difference between undirected angles in degrees (0..90)."""
    d = np.abs((np.asarray(a, dtype=float) - np.asarray(b, dtype=float)) % 180.0)
    out = np.minimum(d, 180.0 - d)
    return float(out) if np.ndim(out) == 0 else out


def d4_angle(angle_deg: float | np.ndarray, k: int, flip: bool) -> float | np.ndarray:
    """Image of an undirected angle under ``rot90(k)`` then optional left-right mirror.

    Args:
        angle_deg: angle(s) in degrees, on-screen convention.
        k: quarter turns counter-clockwise (any integer).
        flip: mirror left-right after rotating.

    Returns:
        The transformed angle(s) in [0, 180).
    """
    a = np.asarray(angle_deg, dtype=float) + 90.0 * k
    if flip:
        a = 180.0 - a
    out = np.mod(a, 180.0)
    return float(out) if np.ndim(out) == 0 else out


def apply_d4(image: np.ndarray, k: int, flip: bool) -> np.ndarray:
    """Apply a D4 element to an (H, W, ...) array; returns a contiguous copy."""
    out = np.rot90(image, k % 4, axes=(0, 1))
    if flip:
        out = out[:, ::-1]
    return np.ascontiguousarray(out)


@dataclass(frozen=True)
class ClassSet:
    """An ordered set of patch classes.

    Attributes:
        name: short name of the set (e.g. ``orientation``).
        names: class names in model output order; ``names[0]`` is the no-crack class.
        angle_centres: angle centre in degrees per class, or None for classes that
            carry no orientation (the no-crack class, map cracking, plain "crack").
        descriptions: one line per class for help screens and reports.
    """

    name: str
    names: tuple[str, ...]
    angle_centres: tuple[float | None, ...]
    descriptions: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if len(self.names) < 2:
            raise ClassSetError(
                f"class set {self.name!r} needs at least 2 classes, got {len(self.names)}"
            )
        if len(set(self.names)) != len(self.names):
            raise ClassSetError(
                f"class set {self.name!r} has repeated class names: {list(self.names)}"
            )
        if len(self.angle_centres) != len(self.names):
            raise ClassSetError(
                f"class set {self.name!r}: expected {len(self.names)} angle centres, got {len(self.angle_centres)}"
            )
        if self.angle_centres[0] is not None:
            raise ClassSetError(
                f"class set {self.name!r}: class 0 ({self.names[0]!r}) is the no-crack class and cannot have an angle"
            )
        for n, c in zip(self.names, self.angle_centres, strict=True):
            if c is not None and not (0.0 <= c < 180.0):
                raise ClassSetError(f"class {n!r}: angle_deg must be in [0, 180), got {c}")
        if len(self.crack_catchall_indices) > 1:
            raise ClassSetError(
                f"class set {self.name!r}: at most one crack class without an angle is allowed, got "
                f"{[self.names[i] for i in self.crack_catchall_indices]}"
            )
        if not self.oriented_indices and not self.crack_catchall_indices:
            raise ClassSetError(f"class set {self.name!r} has no crack class")

    # ----- derived views -------------------------------------------------------
    @property
    def num_classes(self) -> int:
        return len(self.names)

    @property
    def oriented_indices(self) -> tuple[int, ...]:
        """Indices of classes with an angle centre."""
        return tuple(i for i, c in enumerate(self.angle_centres) if c is not None)

    @property
    def crack_catchall_indices(self) -> tuple[int, ...]:
        """Crack classes without an angle (``map`` in the default set, ``crack`` in presence)."""
        return tuple(i for i, c in enumerate(self.angle_centres) if c is None and i != 0)

    @property
    def catchall_index(self) -> int | None:
        idx = self.crack_catchall_indices
        return idx[0] if idx else None

    def index(self, name: str) -> int:
        """Index of a class name; :class:`ClassSetError` naming the valid choices otherwise."""
        try:
            return self.names.index(name)
        except ValueError:
            raise ClassSetError(
                f"unknown class {name!r}; choose one of: {', '.join(self.names)}"
            ) from None

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "classes": [
                {"name": n, **({"angle_deg": c} if c is not None else {})}
                for n, c in zip(self.names, self.angle_centres, strict=True)
            ],
        }

    # ----- angle -> class ------------------------------------------------------
    def class_for_angle(self, angle_deg: float) -> int:
        """The oriented class whose centre is nearest to ``angle_deg``.

        In a set without oriented classes, the single crack class is returned.
        """
        oriented = self.oriented_indices
        if not oriented:
            return int(self.catchall_index)  # type: ignore[arg-type]
        dists = [angle_difference(angle_deg, cast(float, self.angle_centres[i])) for i in oriented]
        return int(oriented[int(np.argmin(dists))])

    def boundary_distance(self, angle_deg: float) -> float:
        """Half the gap between the distances to the two nearest centres (0 on a boundary).

        With the default set's 45-degree spacing this is the distance in degrees to
        the nearest class boundary (22.5, 67.5, 112.5, 157.5). Infinite when fewer
        than two oriented classes exist.
        """
        oriented = self.oriented_indices
        if len(oriented) < 2:
            return float("inf")
        dists = sorted(
            angle_difference(angle_deg, cast(float, self.angle_centres[i])) for i in oriented
        )
        return float((dists[1] - dists[0]) / 2.0)

    # ----- remapping under D4 ------------------------------------------------------
    def d4_permutation(self, k: int, flip: bool) -> np.ndarray | None:
        """Class index permutation for a D4 element, or None if the set is not closed under it.

        ``perm[c]`` is the class of an image of class ``c`` after the transform.
        """
        perm = np.arange(self.num_classes)
        for i, c in enumerate(self.angle_centres):
            if c is None:
                continue
            target = d4_angle(c, k, flip)
            matches = [
                j
                for j, cj in enumerate(self.angle_centres)
                if cj is not None and angle_difference(cj, target) < 1e-6
            ]
            if not matches:
                return None
            perm[i] = matches[0]
        return perm

    def allowed_d4_elements(self) -> list[tuple[int, bool]]:
        """The D4 elements under which this class set maps onto itself."""
        return [e for e in D4_ELEMENTS if self.d4_permutation(*e) is not None]


def _class_set_from_mapping(data: dict, source: str) -> ClassSet:
    if not isinstance(data, dict) or "classes" not in data:
        raise ClassSetError(f"{source}: expected a mapping with a 'classes' list")
    classes = data["classes"]
    if not isinstance(classes, list):
        raise ClassSetError(f"{source}: 'classes' must be a list, got {type(classes).__name__}")
    names, centres, descs = [], [], []
    for i, item in enumerate(classes):
        if isinstance(item, str):
            item = {"name": item}
        if not isinstance(item, dict) or "name" not in item:
            raise ClassSetError(f"{source}: class {i} must have a 'name'")
        unknown = set(item) - {"name", "angle_deg", "description"}
        if unknown:
            raise ClassSetError(
                f"{source}: class {item['name']!r} has unknown keys {sorted(unknown)}"
            )
        names.append(str(item["name"]))
        a = item.get("angle_deg")
        if a is not None and not isinstance(a, int | float):
            raise ClassSetError(
                f"{source}: class {item['name']!r}: angle_deg must be a number, got {a!r}"
            )
        centres.append(None if a is None else float(a))
        descs.append(str(item.get("description", "")))
    return ClassSet(
        name=str(data.get("name", Path(source).stem)),
        names=tuple(names),
        angle_centres=tuple(centres),
        descriptions=tuple(descs),
    )


def load_class_set(name_or_path: str | Path = "orientation") -> ClassSet:
    """Load a built-in class set by name or a user's YAML file by path."""
    data = read_named_yaml(
        name_or_path,
        builtins=BUILTIN_CLASS_SETS,
        folder="classes",
        kind="class set",
        error=ClassSetError,
    )
    return _class_set_from_mapping(data, str(name_or_path))


def class_set_from_dict(data: dict) -> ClassSet:
    """Rebuild a class set from :meth:`ClassSet.to_dict` output (checkpoints, metadata)."""
    return _class_set_from_mapping(data, "<dict>")
