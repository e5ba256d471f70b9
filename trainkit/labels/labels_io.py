"""Import and export of a workspace's labels as CSV and as a folder-per-class copy of the crops.

CSV export columns: ``patch_id, photo, x0, y0, x1, y1, label, reviewer, origin,
labelled_at`` (the current label; ``unsure`` for an unsure answer), then what an imported
crack drawing says of the patch, empty where no drawing was imported for it:
``crack_angle_deg, crack_length_px, crack_width_px, crack_width_max_px`` (photo pixels),
``crack_length_mm, crack_width_mm, crack_width_max_mm`` (where the photo's scale is known)
and ``drawing_sha256`` (:mod:`trainkit.labels.drawings`). CSV import — the
kit's one label importer, used by ``tile --import-labels``, ``review --import-csv``, the
demo and the job samples — takes either ``patch_id, label`` or ``photo, x0, y0, x1, y1,
label`` (so an export reads back, and so does ``trainkit synth``'s labels.csv), in UTF-8
with or without a byte-order mark. Photo names are relative names inside the photo
folder: absolute paths, ``..`` and backslashes are refused. A label is a class name or
``unsure``. A row with an empty label is not an answer: it is skipped and counted (in a
job's ``sample.csv``, a cell not answered yet; in ``trainkit synth``'s labels.csv, a
patch the truth calls ambiguous). A patch listed twice with the same label counts once;
with different labels the file is refused. Importing the same label for a patch again
under the same reviewer and origin adds nothing, so re-running an import is a no-op.

Folder layout: ``ROOT/<class name>/<photo>@<x0>_<y0>_<x1>_<y1>.<ext>``, with ``/`` in a
photo's relative name written as ``~``. Import matches a file by that name and, for
files named otherwise (a layout made by another tool), by identical pixels.

Every import is checked completely before anything is written and then added in one
transaction: a bad row or file leaves the workspace untouched.
"""

from __future__ import annotations

import csv
import hashlib
import re
from pathlib import Path

import numpy as np

from trainkit.core.csvfile import read_csv
from trainkit.core.errors import TrainkitError
from trainkit.core.fsutil import atomic_path
from trainkit.core.textsafe import csv_cell, csv_uncell
from trainkit.store.workspace import Workspace

__all__ = [
    "DRAWING_COLUMNS",
    "LabelsIOError",
    "ImportResult",
    "UNSURE_WORD",
    "export_csv",
    "export_folders",
    "import_csv",
    "import_folders",
    "folder_file_name",
]

#: Export columns from a patch's latest drawing measure: column -> measure key.
_DRAWING_EXPORT = {
    "crack_angle_deg": "angle_deg",
    "crack_length_px": "length_px",
    "crack_width_px": "width_px",
    "crack_width_max_px": "width_max_px",
    "crack_length_mm": "length_mm",
    "crack_width_mm": "width_mm",
    "crack_width_max_mm": "width_max_mm",
    "drawing_sha256": "drawing_sha256",
}
DRAWING_COLUMNS = tuple(_DRAWING_EXPORT)
EXPORT_COLUMNS = (
    "patch_id",
    "photo",
    "x0",
    "y0",
    "x1",
    "y1",
    "label",
    "reviewer",
    "origin",
    "labelled_at",
    *DRAWING_COLUMNS,
)
_IMAGE_SUFFIXES = {".png", ".tif", ".tiff", ".jpg", ".jpeg", ".bmp", ".webp"}
_NAME_RE = re.compile(r"^(?P<photo>.+)@(?P<x0>\d+)_(?P<y0>\d+)_(?P<x1>\d+)_(?P<y1>\d+)$")


#: Label text meaning "looked at, unsure" (an empty label is no answer at all).
UNSURE_WORD = "unsure"


class LabelsIOError(TrainkitError):
    """An import or export that cannot be done; nothing was written."""


class ImportResult(int):
    """The number of label events an import added, with what it left out and why.

    It is an ``int`` (the events added), so code that counts imports keeps working; the
    attributes say what else the file held.

    Attributes:
        added: label events added.
        unchanged: rows whose label the same reviewer and origin had already given that
            patch, last (nothing added: an import run twice adds nothing the second time).
        empty: rows with an empty label, skipped (not answered; ``unsure`` is an answer).
        repeated: rows naming a patch an earlier row of the file named with the same label.
    """

    added: int
    unchanged: int
    empty: int
    repeated: int

    def __new__(cls, added: int, *, unchanged: int = 0, empty: int = 0, repeated: int = 0):
        self = super().__new__(cls, added)
        self.added, self.unchanged, self.empty, self.repeated = added, unchanged, empty, repeated
        return self

    def describe(self, source: str | Path, reviewer: str | None = None) -> str:
        """One sentence for the user: what was imported from ``source``, and what was not."""
        text = f"imported {self.added} labels from {source}" + (
            f" as reviewer {reviewer}" if reviewer else ""
        )
        notes = []
        if self.unchanged:
            notes.append(f"{self.unchanged} already recorded with the same label (not added again)")
        if self.repeated:
            notes.append(f"{self.repeated} repeated rows counted once")
        if self.empty:
            notes.append(
                f"{self.empty} rows with an empty label skipped (left unlabelled; write "
                f"'{UNSURE_WORD}' to record an unsure answer)"
            )
        return text + ("; " + "; ".join(notes) if notes else "")


def _current(ws: Workspace) -> list[tuple]:
    """(record, latest event) for every labelled patch, in photo order."""
    latest: dict[int, dict] = {}
    for e in ws.label_events():
        latest[e["patch_id"]] = e
    return [(r, latest[r.id]) for r in ws.patches(labelled=True) if r.id in latest]


def export_csv(ws: Workspace, path: str | Path) -> int:
    """Write the current label of every labelled patch to CSV (atomically); returns rows.

    Text cells that a spreadsheet would read as a formula get a leading apostrophe
    (:func:`trainkit.core.textsafe.csv_cell`); :func:`import_csv` reads them back.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path) as tmp:
        rows = _current(ws)
        drawn = ws.drawing_measures([r.id for r, _ in rows])
        with tmp.open("w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(EXPORT_COLUMNS)
            for r, e in rows:
                text = (r.photo, e["label"] or UNSURE_WORD, e["reviewer"], e["origin"])
                photo, label, reviewer, origin = (csv_cell(t) for t in text)  # OWASP rule
                m = drawn.get(r.id, {})
                measures = ["" if m.get(k) is None else m[k] for k in _DRAWING_EXPORT.values()]
                w.writerow(
                    [r.id, photo, *r.box, label, reviewer, origin, f"{e['created_at']:.3f}"]
                    + measures
                )
    return len(rows)


def folder_file_name(photo: str, box: tuple[int, int, int, int], suffix: str) -> str:
    """File name of a patch in the folder layout (see the module docstring)."""
    return f"{photo.replace('/', '~')}@{box[0]}_{box[1]}_{box[2]}_{box[3]}{suffix}"


def export_folders(ws: Workspace, root: str | Path) -> dict[str, int]:
    """Copy every labelled patch's crop into ``ROOT/<class>/``; returns counts per class.

    Unsure patches go to ``ROOT/_unsure/``. Existing files of the same name are replaced.
    """
    from PIL import Image

    from trainkit.store.pixels import PatchPixels

    root = Path(root)
    counts: dict[str, int] = {}
    current = _current(ws)
    with PatchPixels(ws) as pixels:
        for start in range(0, len(current), 256):  # bounded memory; records in photo order
            chunk = current[start : start + 256]
            crops = pixels.get([r for r, _ in chunk])
            for (r, e), rgb in zip(chunk, crops, strict=True):
                cls = e["label"] or "_unsure"
                dest = root / cls / folder_file_name(r.photo, r.box, ".png")
                dest.parent.mkdir(parents=True, exist_ok=True)
                Image.fromarray(rgb).save(dest, compress_level=1)
                counts[cls] = counts.get(cls, 0) + 1
    return counts


def _check_label(label: str, names: tuple[str, ...], where: str) -> str | None:
    """A non-empty label as stored: a class name, or None for ``unsure``."""
    if label not in names and csv_uncell(label) in names:
        label = csv_uncell(label)  # a class name export_csv wrote with the apostrophe rule
    if label == UNSURE_WORD and UNSURE_WORD not in names:
        return None
    if label not in names:
        raise LabelsIOError(
            f"{where}: unknown class {label!r}; choose one of: {', '.join(names)} "
            f"(or {UNSURE_WORD})"
        )
    return label


class _Rows:
    """The answers of one import, each patch once: repeats counted, contradictions refused."""

    def __init__(self) -> None:
        self.items: dict[int, tuple[str | None, str]] = {}  # patch id -> (label, where)
        self.empty = self.repeated = 0

    def add(self, pid: int, label: str | None, where: str) -> None:
        seen = self.items.get(pid)
        if seen is None:
            self.items[pid] = (label, where)
        elif seen[0] == label:
            self.repeated += 1
        else:
            raise LabelsIOError(
                f"{where}: patch {pid} is labelled {label or UNSURE_WORD!r} here and "
                f"{seen[0] or UNSURE_WORD!r} at {seen[1]}; keep one of the two rows"
            )

    def store(self, ws: Workspace, reviewer: str, origin: str) -> ImportResult:
        """Add the answers this reviewer and origin have not already given, in one transaction."""
        last: dict[int, str | None] = {}
        for e in ws.label_events():  # oldest first: the last one per patch wins
            if e["reviewer"] == reviewer and e["origin"] == origin:
                last[e["patch_id"]] = e["label"]
        new = [
            (pid, label)
            for pid, (label, _) in self.items.items()
            if pid not in last or last[pid] != label
        ]
        added = ws.add_labels(new, reviewer=reviewer, origin=origin)
        return ImportResult(
            added, unchanged=len(self.items) - len(new), empty=self.empty, repeated=self.repeated
        )


def import_csv(
    ws: Workspace, path: str | Path, *, reviewer: str = "import", origin: str = "file"
) -> ImportResult:
    """Import labels from CSV keyed by ``patch_id`` or by ``photo, x0, y0, x1, y1``.

    A label is a class name or ``unsure``; rows with an empty label are skipped and
    counted. When both keys are present the patch id is used.

    Returns:
        The label events added (one transaction; nothing on error), with the rows left
        out: see :class:`ImportResult` and :meth:`ImportResult.describe`.

    Raises:
        LabelsIOError: missing columns, a photo name outside the photo folder, unknown
            patch ids or places, unknown classes, one patch given two labels; the message
            names the line.
        CsvFileError: not UTF-8 text, a field too long, a NUL byte; naming file and line.
    """
    path = Path(path)
    names = ws.class_set.names
    rows = _Rows()
    with read_csv(path, "label file") as reader:
        cols = set(reader.fieldnames or [])
        by_id = {"patch_id", "label"} <= cols
        if not (by_id or {"photo", "x0", "y0", "x1", "y1", "label"} <= cols):
            raise LabelsIOError(
                f"{path.name}: expected columns patch_id,label or photo,x0,y0,x1,y1,label; "
                f"got {reader.fieldnames}"
            )
        find = _by_id(ws) if by_id else _by_place(ws)
        for line, row in reader:
            where = f"{path.name} line {line}"
            if not any((v or "").strip() for v in row.values() if isinstance(v, str)):
                rows.empty += 1  # a blank row (a spreadsheet's trailing rows)
                continue
            pid = find(row, where)
            label = (row["label"] or "").strip()  # None when the row is too short
            if not label:
                rows.empty += 1
                continue
            rows.add(pid, _check_label(label, names, where), where)
    return rows.store(ws, reviewer, origin)


def _by_id(ws: Workspace):
    ids = ws.patch_ids()

    def find(row: dict, where: str) -> int:
        try:
            pid = int(row["patch_id"])
        except (TypeError, ValueError):
            raise LabelsIOError(
                f"{where}: patch id {row['patch_id']!r} must be an integer"
            ) from None
        if pid not in ids:
            raise LabelsIOError(f"{where}: no patch with id {pid} in the workspace")
        return pid

    return find


def _by_place(ws: Workspace):
    lookup = ws.patch_lookup()

    def find(row: dict, where: str) -> int:
        photo = row["photo"] or ""  # None when the row is too short
        # Photos are named by their path relative to the folder they were tiled from
        # ("site-a/img1.jpg"); anything that could point outside it is refused.
        if Path(photo).is_absolute() or ".." in Path(photo).parts or "\\" in photo:
            raise LabelsIOError(
                f"{where}: photo {photo!r} must be a relative name inside the photo folder "
                "(no absolute path, no '..', no backslash)"
            )
        try:
            box = tuple(int(row[k]) for k in ("x0", "y0", "x1", "y1"))
        except (TypeError, ValueError):
            raise LabelsIOError(f"{where}: box values must be integers") from None
        pid = lookup.get((photo, box), lookup.get((csv_uncell(photo), box)))  # see export_csv
        if pid is None:
            raise LabelsIOError(
                f"{where}: no patch {box} of photo {photo!r} in the workspace "
                "(tile the photos first, with the same tile size)"
            )
        return pid

    return find


def _pixel_digest(path: Path) -> str:
    from PIL import Image

    with Image.open(path) as im:
        return _array_digest(np.asarray(im.convert("RGB")))


def _array_digest(rgb: np.ndarray) -> str:
    a = np.ascontiguousarray(rgb)
    return hashlib.sha1(a.tobytes() + str(a.shape).encode()).hexdigest()


def _digests_by_pixels(ws: Workspace) -> dict[str, int]:
    """Pixel digest of every patch's crop -> patch id (cut from the photos, not stored):
    the fallback for folder files whose names were changed; slow on a whole archive."""
    from trainkit.store.pixels import PatchPixels

    out: dict[str, int] = {}
    recs = ws.patches()
    with PatchPixels(ws) as pixels:
        for start in range(0, len(recs), 1024):
            chunk = recs[start : start + 1024]
            for r, rgb in zip(chunk, pixels.get(chunk, store=False, keep=True), strict=True):
                out[_array_digest(rgb)] = r.id
    return out


def import_folders(
    ws: Workspace, root: str | Path, *, reviewer: str = "import", origin: str = "file"
) -> ImportResult:
    """Import labels from ``ROOT/<class>/`` folders of patch images (``_unsure`` = unsure).

    Files are matched by the export file name or, failing that, by identical pixels to a
    workspace crop. Hidden files are ignored.

    Returns:
        The label events added (one transaction; nothing on error), with the files left
        out (repeats of a patch, labels already recorded): see :class:`ImportResult`.

    Raises:
        LabelsIOError: unknown class folders, files matching no patch, loose files, one
            patch in two class folders.
    """
    root = Path(root)
    if not root.is_dir():
        raise LabelsIOError(f"{root} is not a folder")
    names = ws.class_set.names
    lookup = {
        (photo.replace("/", "~"), box): pid for (photo, box), pid in ws.patch_lookup().items()
    }
    by_pixels: dict[str, int] | None = None
    rows = _Rows()
    for entry in sorted(root.iterdir()):
        if entry.name.startswith("."):
            continue
        if not entry.is_dir():
            raise LabelsIOError(
                f"{entry}: expected only class folders in {root} ({', '.join(names)}, _unsure)"
            )
        if entry.name != "_unsure" and entry.name not in names:
            raise LabelsIOError(
                f"folder {entry.name!r} is not a class of this workspace; choose one of: "
                f"{', '.join(names)} (or _unsure)"
            )
        label = None if entry.name == "_unsure" else entry.name
        for f in sorted(entry.iterdir()):
            if f.name.startswith(".") or f.suffix.lower() not in _IMAGE_SUFFIXES:
                continue
            m = _NAME_RE.match(f.stem)
            pid = None
            if m:
                box = tuple(int(m[k]) for k in ("x0", "y0", "x1", "y1"))
                pid = lookup.get((m["photo"], box))
            if pid is None:
                if by_pixels is None:
                    by_pixels = _digests_by_pixels(ws)
                pid = by_pixels.get(_pixel_digest(f))
            if pid is None:
                raise LabelsIOError(f"{f}: matches no patch of the workspace by name or pixels")
            rows.add(pid, label, str(f))
    return rows.store(ws, reviewer, origin)
