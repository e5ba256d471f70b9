"""Import a firm's crack drawings: masks or traced centrelines become patch labels with width and length.

A drawing is matched to its photo by name: a mask or SVG file by the photo's relative
name with any suffix (``site-a/img1.jpg`` <- ``MASKS/site-a/img1.png``), a centreline
CSV row by the photo's name (with or without its suffix). Each patch of the photo is then
labelled by the kit's one patch label rule (:func:`trainkit.core.patch_rule.label_segments`,
the rule the generator labels its own photos with) and measured (centreline length, mean
and largest width; :mod:`trainkit.intake.drawn_cracks`).

Labels are label events of origin ``drawing`` under the reviewer ``drawing``; an ambiguous
patch (a crack piece too short, an angle near a class boundary, middling coherence, a
crack edge just outside) gets no label, so it stays out of training and in the review
queue, as the generator's ambiguous patches do. A label a person gave (origin reviewer,
file or suggestion) is never replaced. Each patch's measures (label or ambiguity and the
reason, angle, coherence, distance to a class boundary, length and widths in pixels) are
stored with the drawing file's path and SHA-256, whatever its label. ``trainkit review
--queue boundary`` shows the drawn patches whose angle is near a class boundary.

Like the label CSV import, an import is all or nothing: every drawing is read and every
patch measured before anything is written, then everything is stored in one
transaction. What is not imported and why (photos without a drawing, drawings without a
photo, empty masks, shapes that are not centrelines) is said in one line each.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

from trainkit.core.patch_rule import LabelRules
from trainkit.core.taxonomy import ClassSet
from trainkit.intake.drawing_files import (
    MASK_SUFFIXES,
    DrawingError,
    Polyline,
    check_inside,
    mask_size,
    read_centreline_csv,
    read_mask,
    read_svg,
)
from trainkit.intake.drawn_cracks import (
    DrawnCracks,
    cracks_from_mask,
    cracks_from_polylines,
    measure_patch,
)
from trainkit.store.workspace import Workspace

__all__ = [
    "DRAWING_REVIEWER",
    "BOUNDARY_QUEUE_DEG",
    "DrawingError",
    "DrawingImport",
    "import_masks",
    "import_centrelines",
    "measure_photo",
]

#: The reviewer name drawing labels are recorded under.
DRAWING_REVIEWER = "drawing"
#: ``review --queue boundary`` shows drawn patches whose angle is nearer than this to a
#: class boundary (degrees; the rule's own margin, 4 degrees, makes nearer ones ambiguous).
BOUNDARY_QUEUE_DEG = 10.0
_DEFAULT_RULES = LabelRules()
#: Files in a drawing folder that are not drawings and not worth a note.
_QUIET_SUFFIXES = (".txt", ".md", ".json", ".db", ".ini")


@dataclass
class DrawingImport:
    """What an import of drawings did.

    Attributes:
        kind: ``mask``, ``svg`` or ``csv``.
        photos: photos whose drawing was imported.
        patches: patches measured (every patch of those photos).
        added: label events added.
        unchanged: patches whose current label was already the drawing's.
        kept: patches a person had labelled otherwise, kept as they were.
        withdrawn: patches an earlier drawing labelled that this one finds ambiguous
            (recorded as unsure: out of training).
        ambiguous: patches the rule finds ambiguous (no label).
        notes: what was left out and why, one line each.
    """

    kind: str
    photos: int = 0
    patches: int = 0
    added: int = 0
    unchanged: int = 0
    kept: int = 0
    withdrawn: int = 0
    ambiguous: int = 0
    notes: list[str] = field(default_factory=list)

    def describe(self, source: str | Path) -> str:
        """One sentence for the user: what was imported from ``source``."""
        what = {"mask": "masks", "svg": "SVG drawings", "csv": "centrelines"}[self.kind]
        text = (
            f"imported {what} of {_n(self.photos, 'photo', 'photos')} from {source}: "
            f"{self.patches} patches "
            f"measured, {self.added} labels added (origin drawing), {self.ambiguous} "
            "ambiguous left unlabelled"
        )
        extra = []
        if self.unchanged:
            extra.append(f"{self.unchanged} already labelled so")
        if self.kept:
            extra.append(f"{self.kept} labelled by a person kept")
        if self.withdrawn:
            extra.append(f"{self.withdrawn} earlier drawing labels withdrawn (unsure)")
        return text + ("; " + ", ".join(extra) if extra else "")


@dataclass(frozen=True)
class PhotoDrawing:
    """One photo's drawing to measure (plain data: it goes to worker processes).

    Attributes:
        photo: the photo's name in the workspace.
        size: the photo's (width, height), upright.
        boxes: (patch id, box) of each of its patches.
        kind: ``mask``, ``svg`` or ``csv``.
        source: the drawing file.
        sha256: its SHA-256 (for a mask, filled in when read).
        polylines: traced cracks (svg, csv); empty for a mask.
    """

    photo: str
    size: tuple[int, int]
    boxes: list[tuple[int, tuple[int, int, int, int]]]
    kind: str
    source: str
    sha256: str = ""
    polylines: tuple[Polyline, ...] = ()


def measure_photo(
    drawing: PhotoDrawing, class_set: ClassSet, rules: LabelRules = _DEFAULT_RULES
) -> tuple[list[tuple], bool]:
    """Every patch of one photo measured from its drawing: rows for
    :meth:`~trainkit.store.workspace.Workspace.add_drawing_measures`, and whether the
    drawing holds no crack at all.

    Raises:
        DrawingError: the mask cannot be read or is not the photo's size.
    """
    sha = drawing.sha256
    if drawing.kind == "mask":
        path = Path(drawing.source)
        data = path.read_bytes()
        sha = hashlib.sha256(data).hexdigest()
        cracks: DrawnCracks = cracks_from_mask(read_mask(path, data, drawing.size))
    else:
        cracks = cracks_from_polylines([(p.points, p.widths) for p in drawing.polylines])
    rows = []
    for pid, box in drawing.boxes:
        m = measure_patch(cracks, box, class_set, rules)
        t = m.truth
        rows.append(
            (
                pid,
                sha,
                drawing.source,
                drawing.kind,
                None if t.label is None else class_set.names[t.label],
                t.reason,
                _r(t.angle_deg),
                _r(t.coherence, 4),
                _r(m.boundary_deg),
                round(t.length_px, 3),
                _r(m.width_px),
                _r(m.width_max_px),
            )
        )
    return rows, len(cracks) == 0


def _r(v: float | None, digits: int = 3) -> float | None:
    return None if v is None else round(float(v), digits)


# ----- matching drawings to photos -------------------------------------------------------


def _key(name: str) -> str:
    """A photo's or drawing's name without its suffix: what pairs them."""
    p = PurePosixPath(name)
    return p.with_suffix("").as_posix() if p.suffix else p.as_posix()


class _Photos:
    """The workspace's photos a drawing may name, by name and by name without suffix."""

    def __init__(self, ws: Workspace) -> None:
        self.rows = ws.drawing_photos()
        self.by_name = {r["name"]: r for r in self.rows}
        self.by_key: dict[str, list[dict]] = {}
        for r in self.rows:
            self.by_key.setdefault(_key(r["name"]), []).append(r)

    def find(self, name: str, where: str) -> dict | None:
        """The photo ``name`` names (exactly, or without suffix), or None."""
        if name in self.by_name:
            return self.by_name[name]
        hits = self.by_key.get(_key(name), [])
        if len(hits) > 1:
            raise DrawingError(
                f"{where}: {name!r} could be any of the photos "
                f"{', '.join(sorted(h['name'] for h in hits))}; name the photo with its suffix"
            )
        return hits[0] if hits else None


def _files(folder: Path, suffixes: tuple[str, ...], what: str) -> tuple[dict[str, Path], list]:
    """Drawing files under ``folder`` by relative name without suffix, and other files."""
    if not folder.is_dir():
        raise DrawingError(f"{folder} is not a folder of {what}")
    found: dict[str, Path] = {}
    others = []
    for f in sorted(folder.rglob("*")):
        rel = f.relative_to(folder)
        if any(part.startswith(".") for part in rel.parts) or not f.is_file():
            continue
        if f.suffix.lower() not in suffixes:
            if f.suffix.lower() not in _QUIET_SUFFIXES:
                others.append(rel.as_posix())
            continue
        key = _key(rel.as_posix())
        if key in found:
            raise DrawingError(
                f"{found[key]} and {f} are drawings of the same photo; keep one of the two"
            )
        found[key] = f
    return found, others


def _eg(items: list[str]) -> str:
    return f"e.g. {items[0]}" if len(items) > 0 else ""


def _n(count: int, one: str, many: str) -> str:
    """``1 mask holds`` / ``2 masks hold``: a count with its words in agreement."""
    return f"{count} {one if count == 1 else many}"


def _unmatched_notes(
    photos: _Photos, matched: set[str], unmatched: list[str], what: tuple[str, str]
) -> list[str]:
    notes = []
    if unmatched:
        notes.append(
            f"{_n(len(unmatched), what[0] + ' matches', what[1] + ' match')} no photo of the "
            f"workspace ({_eg(unmatched)}): not imported (a drawing is named as its photo, "
            "relative to the folder, any suffix)"
        )
    missing = [r["name"] for r in photos.rows if r["name"] not in matched]
    if missing and matched:
        notes.append(
            f"{_n(len(missing), 'photo has', 'photos have')} no drawing ({_eg(missing)}): "
            "their patches are left as they are"
        )
    return notes


# ----- imports ------------------------------------------------------------------------------


def import_masks(
    ws: Workspace,
    folder: str | Path,
    *,
    rules: LabelRules = _DEFAULT_RULES,
    workers: int | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> DrawingImport:
    """Import crack masks: one single-channel lossless image per photo, non-zero = crack.

    Every mask's header is checked (format, one channel, the photo's size) before any is
    decoded; then each is measured (in worker processes when there are several) and all
    is stored in one transaction.

    Args:
        ws: the workspace (its photos tiled).
        folder: the masks, named as their photos (relative to the folder, any suffix).
        rules: the patch label rule's thresholds (the generator's by default).
        workers: processes measuring masks (default: the usable cores; 1 measures here).
        progress: called as ``progress(done, total)`` after each mask.

    Raises:
        DrawingError: a mask that is lossy, not single-channel, unreadable or of another
            size than its photo; two masks for one photo; nothing was written.
    """
    folder = Path(folder)
    files, others = _files(folder, MASK_SUFFIXES + (".jpg", ".jpeg"), "masks")
    photos = _Photos(ws)
    todo: list[PhotoDrawing] = []
    unmatched: list[str] = []
    for key, path in files.items():
        photo = photos.find(key, f"mask {path}")
        if photo is None:
            unmatched.append(path.relative_to(folder).as_posix())
            continue
        size = (int(photo["width"]), int(photo["height"]))
        got = mask_size(path)  # the header only: sizes are checked before any decoding
        if got != size:
            raise DrawingError(
                f"mask {path} is {got[0]} x {got[1]} pixels, its photo {photo['name']} "
                f"{size[0]} x {size[1]}; a mask must be drawn at the photo's size"
            )
        todo.append(PhotoDrawing(photo["name"], size, [], "mask", str(path)))
    notes = _unmatched_notes(photos, {d.photo for d in todo}, unmatched, ("mask", "masks"))
    if others:
        notes.append(
            f"{_n(len(others), 'other file', 'other files')} in {folder} left out ({_eg(others)})"
        )
    return _run(ws, todo, "mask", notes, rules, workers, progress)


def import_centrelines(
    ws: Workspace,
    source: str | Path,
    *,
    rules: LabelRules = _DEFAULT_RULES,
    workers: int | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> DrawingImport:
    """Import traced crack centrelines: a CSV ``photo,crack_id,x,y[,width_px]``, one SVG
    file named as its photo, or a folder of them.

    Coordinates are the photo's pixels (x to the right, y down, continuous: the centre of
    the top-left pixel is 0.5, 0.5); widths in pixels per vertex (CSV) or the stroke width
    (SVG). The centrelines are taken as drawn: the rule works on exact geometry, as it
    does on the generator's truth, so nothing is lost to rasterising.

    Raises:
        DrawingError: a file that cannot be read, a point outside its photo (wrong units
            or photo), two drawings for one photo; nothing was written.
    """
    source = Path(source)
    photos = _Photos(ws)
    notes: list[str] = []
    unmatched: list[str] = []
    todo: list[PhotoDrawing] = []
    if source.is_file() and source.suffix.lower() == ".csv":
        kind = "csv"
        sha = hashlib.sha256(source.read_bytes()).hexdigest()
        per_photo: dict[str, list[Polyline]] = {}
        for name, line, row_line in read_centreline_csv(source):
            photo = photos.find(name, f"{source.name} line {row_line}")
            if photo is None:
                if name not in unmatched:
                    unmatched.append(name)
                continue
            per_photo.setdefault(photo["name"], []).append(line)
        for name, lines in per_photo.items():
            photo = photos.by_name[name]
            size = (int(photo["width"]), int(photo["height"]))
            check_inside(lines, size, f"{source.name}, photo {name}")
            todo.append(PhotoDrawing(name, size, [], kind, str(source), sha, tuple(lines)))
        what = ("photo named in the file", "photos named in the file")
    else:
        kind = "svg"
        if source.is_file():
            if source.suffix.lower() != ".svg":
                raise DrawingError(
                    f"{source} is neither a centreline CSV (.csv) nor an SVG drawing (.svg)"
                )
            files, others = {_key(source.name): source}, []
        else:
            files, others = _files(source, (".svg",), "SVG drawings")
        for key, path in files.items():
            photo = photos.find(key, f"drawing {path}")
            if photo is None:
                unmatched.append(path.name if source.is_file() else key + path.suffix)
                continue
            size = (int(photo["width"]), int(photo["height"]))
            data = path.read_bytes()
            svg = read_svg(path, data, size)
            check_inside(svg.cracks, size, f"drawing {path}")
            if svg.ignored:
                shapes = ", ".join(f"{n} {tag}" for tag, n in sorted(svg.ignored.items()))
                notes.append(f"drawing {path}: {shapes} elements are not centrelines; left out")
            todo.append(
                PhotoDrawing(
                    photo["name"],
                    size,
                    [],
                    kind,
                    str(path),
                    hashlib.sha256(data).hexdigest(),
                    tuple(svg.cracks),
                )  # fmt: skip
            )
        if others:
            notes.append(
                f"{_n(len(others), 'other file', 'other files')} in {source} left out "
                f"({_eg(others)})"
            )
        what = ("SVG drawing", "SVG drawings")
    notes[:0] = _unmatched_notes(photos, {d.photo for d in todo}, unmatched, what)
    return _run(ws, todo, kind, notes, rules, 1, progress)


def _run(
    ws: Workspace,
    todo: list[PhotoDrawing],
    kind: str,
    notes: list[str],
    rules: LabelRules,
    workers: int | None,
    progress: Callable[[int, int], None] | None,
) -> DrawingImport:
    """Measure every photo's drawing, then store it all in one transaction."""
    from dataclasses import replace

    class_set = ws.class_set
    photos = {r["name"]: r["id"] for r in ws.drawing_photos()}
    todo = [replace(d, boxes=ws.photo_patch_boxes(photos[d.photo])) for d in todo]
    rows: list[tuple] = []
    empty: list[str] = []
    empty_patches = 0
    for i, (d, (photo_rows, nothing)) in enumerate(
        zip(todo, _measured(todo, class_set, rules, workers), strict=True), start=1
    ):
        rows.extend(photo_rows)
        if nothing:
            empty.append(Path(d.source).name if kind == "mask" else d.photo)
            empty_patches += len(photo_rows)
        if progress:
            progress(i, len(todo))
    if empty:
        what = (
            ("mask holds no crack pixel", "masks hold no crack pixel")
            if kind == "mask"
            else ("photo has no crack drawn", "photos have no crack drawn")
        )
        notes.append(
            f"{_n(len(empty), *what)} ({_eg(empty)}): their {empty_patches} patches are "
            "labelled none"
        )
    counts = ws.add_drawing_measures(rows, reviewer=DRAWING_REVIEWER) if rows else {}
    res = DrawingImport(kind, photos=len(todo), patches=len(rows), notes=notes)
    for k in ("added", "unchanged", "kept", "withdrawn", "ambiguous"):
        setattr(res, k, int(counts.get(k, 0)))
    return res


def _measured(
    todo: list[PhotoDrawing], class_set: ClassSet, rules: LabelRules, workers: int | None
) -> Iterable[tuple[list[tuple], bool]]:
    """:func:`measure_photo` of each drawing, in order: here, or in a process pool."""
    from trainkit.core.cores import usable_cores

    n = max(1, min(workers or usable_cores(), len(todo)))
    if n == 1:
        for d in todo:
            yield measure_photo(d, class_set, rules)
        return
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor
    from functools import partial

    # forkserver, not fork: forking a process that runs OpenMP/BLAS threads can deadlock
    ctx = multiprocessing.get_context("forkserver")
    with ProcessPoolExecutor(n, mp_context=ctx) as pool:
        yield from pool.map(partial(measure_photo, class_set=class_set, rules=rules), todo)
