"""The workspace store: one SQLite database of photos, patches, label history and splits.

A workspace is a folder holding ``workspace.sqlite`` and the patch crops under
``patches/``. Labels are an append-only history of events; a patch's current label
is the newest event for it, never an in-place edit. The database runs in WAL mode
so another process can read while a session writes.
"""

from __future__ import annotations

import json
import sqlite3
import time
import warnings
from collections.abc import Callable, Collection, Iterable, Iterator
from contextlib import AbstractContextManager
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

from trainkit.core.errors import TrainkitError, TrainkitNote
from trainkit.core.taxonomy import ClassSet, class_set_from_dict
from trainkit.store.cropstore import CropStore
from trainkit.store.schema import SCHEMA as _SCHEMA
from trainkit.store.sqlitefile import transaction

__all__ = [
    "Workspace",
    "WorkspaceError",
    "PatchRecord",
    "QueueRow",
    "DB_NAME",
    "LABEL_ORIGINS",
    "DRAWING_KINDS",
    "JOB_GROUP_PREFIX",
    "job_group",
]

DB_NAME = "workspace.sqlite"
SCHEMA_VERSION = 3
#: Where a label event came from: a reviewer's own answer, a label file, a reviewer
#: confirming the model's suggestion with one key, or a firm's crack drawing (a mask or
#: traced centrelines, labelled by the patch label rule; :mod:`trainkit.labels.drawings`).
#: Older kits read the newer words as they are (the column is free text).
LABEL_ORIGINS = ("reviewer", "file", "suggestion", "drawing")
#: Kinds of crack drawing whose measures a workspace keeps (``drawing_measures.kind``).
DRAWING_KINDS = ("mask", "svg", "csv")
#: Version-1 workspaces named the origins otherwise (column ``source``); opened, they are migrated.
_V1_ORIGINS = {"human": "reviewer", "imported": "file", "model-accepted": "suggestion"}
#: Label value meaning "looked at, unsure": kept out of training and evaluation.
UNSURE = None
#: Group of the photos a job's sample cut cells from (``job:<name>``): never in a split.
JOB_GROUP_PREFIX = "job:"


def job_group(job: str) -> str:
    """The photo group of a job's sampled frames."""
    return f"{JOB_GROUP_PREFIX}{job}"


class WorkspaceError(TrainkitError):
    """A workspace that is missing, of another version, or used inconsistently."""


@dataclass(frozen=True)
class PatchRecord:
    """One patch as stored, with its photo's name and group and its current label."""

    id: int
    photo: str
    group: str
    row: int
    col: int
    box: tuple[int, int, int, int]
    crop: str
    patch_mm: float | None
    gsd_mm: float | None
    focus: float
    clipped: float
    flags: str
    label: str | None
    labelled: bool
    subset: str | None
    review_skip: bool = False
    job: str | None = None  # the job whose acceptance sample drew this cell, if any

    @property
    def of_a_job(self) -> bool:
        """True for a cell of a job's sample, and for a patch of a job's frame left without
        its job record (an interrupted sample of an older kit): neither joins a split."""
        return self.job is not None or self.group.startswith(JOB_GROUP_PREFIX)

    @property
    def box_mm(self) -> tuple[float, float, float, float] | None:
        """The box in mm on the surface, from the photo's scale; None without scale."""
        if self.gsd_mm is None:
            return None
        return tuple(round(v * self.gsd_mm, 3) for v in self.box)  # type: ignore[return-value]


def _stored_patch_mm(patch: dict, gsd_mm: float | None) -> float | None:
    """The ``patch_mm`` column's value: NULL when it is the box width times the photo's
    scale (what :meth:`Workspace.patches` computes then), so an archive's rows stay small."""
    mm = patch.get("patch_mm")
    if mm is None or (gsd_mm is not None and mm == (patch["x1"] - patch["x0"]) * gsd_mm):
        return None
    return mm


class QueueRow(NamedTuple):
    """A patch as a review queue needs it (:meth:`Workspace.queue_rows`): far lighter than a
    :class:`PatchRecord` when there are millions."""

    id: int
    labelled: bool
    review_skip: bool
    job: str | None


class Workspace:
    """Handle on a workspace folder; open it with :meth:`create` or :meth:`open`."""

    def __init__(self, root: str | Path) -> None:
        self.root = Path(root)
        self.db_path = self.root / DB_NAME

    # ----- lifecycle -------------------------------------------------------------
    @classmethod
    def create(cls, root: str | Path, *, class_set: ClassSet, tile_px: int) -> Workspace:
        """Create a new workspace, or open an existing one after checking it matches."""
        ws = cls(root)
        if ws.db_path.exists():
            ws = cls.open(root)
            if ws.class_set.names != class_set.names:
                raise WorkspaceError(
                    f"workspace {ws.root} uses classes {list(ws.class_set.names)}, not {list(class_set.names)}"
                )
            if ws.tile_px != tile_px:
                raise WorkspaceError(
                    f"workspace {ws.root} holds {ws.tile_px}-px patches, not {tile_px}-px; use another workspace"
                )
            return ws
        ws.root.mkdir(parents=True, exist_ok=True)
        with ws.connect() as con:
            con.executescript(_SCHEMA)
            con.executemany(
                "INSERT INTO meta(key, value) VALUES (?, ?)",
                [
                    ("schema_version", str(SCHEMA_VERSION)),
                    ("class_set", json.dumps(class_set.to_dict())),
                    ("tile_px", str(tile_px)),
                    ("created_at", str(time.time())),
                ],
            )
        return ws

    @classmethod
    def open(cls, root: str | Path) -> Workspace:
        ws = cls(root)
        if not ws.db_path.is_file():
            raise WorkspaceError(
                f"{ws.root} is not a trainkit workspace (no {DB_NAME}); create it with `trainkit tile`"
            )
        version = ws.meta("schema_version")
        if version == "1":
            ws._migrate_from_v1()
            version = ws.meta("schema_version")
        if version == "2":
            ws._migrate_from_v2()
            version = ws.meta("schema_version")
        if version != str(SCHEMA_VERSION):
            raise WorkspaceError(
                f"workspace {ws.root} has schema version {version}, this kit reads {SCHEMA_VERSION}"
            )
        with ws.connect() as con:  # tables added since version 1 (review state), idempotent
            con.executescript(_SCHEMA)
        return ws

    def _migrate_from_v1(self) -> None:
        """Version 1 -> 2: label-event column ``source`` becomes ``origin`` with new words."""
        case = " ".join(f"WHEN '{old}' THEN '{new}'" for old, new in _V1_ORIGINS.items())
        with self.connect() as con:
            for table in ("label_events", "undone_label_events"):
                cols = [r[1] for r in con.execute(f"PRAGMA table_info({table})")]
                if "source" in cols:
                    con.execute(f"ALTER TABLE {table} RENAME COLUMN source TO origin")
                    con.execute(f"UPDATE {table} SET origin = CASE origin {case} ELSE origin END")
            con.execute("UPDATE meta SET value = '2' WHERE key = 'schema_version'")

    def _migrate_from_v2(self) -> None:
        """Version 2 -> 3: patches by reference. Photos gain ``grid_px``; the crop files an
        older kit wrote stay where they are and keep being read (:mod:`trainkit.store.pixels`);
        photos tiled from now on store no crop files."""
        with self.connect() as con:
            cols = [r[1] for r in con.execute("PRAGMA table_info(photos)")]
            for col in ("grid_px", "first_patch", "last_patch"):
                if col not in cols:
                    con.execute(f"ALTER TABLE photos ADD COLUMN {col} INTEGER")
            con.execute(
                "UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION),)
            )
            con.execute(
                "INSERT OR REPLACE INTO meta(key, value) VALUES ('migrated_from_2', ?)",
                (str(time.time()),),
            )
            n_files = con.execute("SELECT COUNT(*) FROM patches WHERE crop != ''").fetchone()[0]
        warnings.warn(
            f"workspace {self.root} upgraded to format {SCHEMA_VERSION}: patches are now kept by "
            f"reference to their photos and cut on demand; its {n_files} crop files from the "
            "older kit are still used as they are (nothing was moved or deleted), and the "
            "training cache folder cache/ is no longer used (it may be deleted)",
            TrainkitNote,
            stacklevel=3,
        )

    def connect(self) -> AbstractContextManager[sqlite3.Connection]:
        """A connection in WAL mode with foreign keys on; commits on success, rolls back
        on error (:func:`trainkit.store.sqlitefile.transaction`)."""
        return transaction(self.db_path, foreign_keys=True)

    # ----- meta ------------------------------------------------------------------
    def meta(self, key: str) -> str | None:
        with self.connect() as con:
            row = con.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return None if row is None else row[0]

    def set_meta(self, key: str, value: str) -> None:
        with self.connect() as con:
            con.execute("INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)", (key, value))

    @property
    def class_set(self) -> ClassSet:
        return class_set_from_dict(json.loads(self.meta("class_set") or "{}"))

    @property
    def tile_px(self) -> int:
        return int(self.meta("tile_px") or 0)

    # ----- photos and patches ------------------------------------------------------
    def photo_id(self, name: str) -> int | None:
        with self.connect() as con:
            row = con.execute("SELECT id FROM photos WHERE name = ?", (name,)).fetchone()
        return None if row is None else int(row[0])

    def add_photo_with_patches(
        self,
        *,
        name: str,
        source_path: str,
        width: int,
        height: int,
        gsd_mm: float | None,
        group_id: str,
        sha256: str,
        patches: Iterable[dict],
        size_bytes: int = 0,
        gsd_source: str | None = None,
        capture_date: str | None = None,
        roi: str | None = None,
        grid_px: int | None = None,
    ) -> int:
        """Add one photo and all its patches in a single transaction; returns the photo id.

        ``grid_px`` is the side of the grid's boxes in photo pixels (the cutting rule's
        ``src_px``, :func:`trainkit.store.pixels.cut_patch`).

        Each patch dict has row, col, x0, y0, x1, y1, crop, patch_mm, focus, clipped,
        flags and optionally review_skip.
        """
        if gsd_source is None:
            gsd_source = "none" if gsd_mm is None else "option"
        cols = "row, col, x0, y0, x1, y1, crop, patch_mm, focus, clipped, flags, review_skip"
        with self.connect() as con:
            cur = con.execute(
                "INSERT INTO photos(name, source_path, size_bytes, width, height, gsd_mm, gsd_source,"
                " group_id, capture_date, roi, sha256, added_at, grid_px)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    name,
                    source_path,
                    size_bytes,
                    width,
                    height,
                    gsd_mm,
                    gsd_source,
                    group_id,
                    capture_date,
                    roi,
                    sha256,
                    time.time(),
                    grid_px,
                ),
            )
            pid = int(cur.lastrowid)
            # ids first..first+n-1, so a photo's patches are found by id range (no index over
            # every patch is needed); the write lock of this transaction keeps them free
            first = int(con.execute("SELECT COALESCE(MAX(id), 0) + 1 FROM patches").fetchone()[0])
            rows = [
                (
                    first + k,
                    pid,
                    p["row"],
                    p["col"],
                    p["x0"],
                    p["y0"],
                    p["x1"],
                    p["y1"],
                    p["crop"],
                    _stored_patch_mm(p, gsd_mm),
                    p["focus"],
                    p["clipped"],
                    p.get("flags", ""),
                    int(p.get("review_skip", 0)),
                )
                for k, p in enumerate(patches)
            ]
            con.executemany(
                f"INSERT INTO patches(id, photo_id, {cols})"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                rows,
            )
            if rows:
                con.execute(
                    "UPDATE photos SET first_patch = ?, last_patch = ? WHERE id = ?",
                    (first, first + len(rows) - 1, pid),
                )
        return pid

    def photo_hashes(self) -> dict[str, str]:
        """Photo name -> SHA-256 of every photo in the workspace."""
        with self.connect() as con:
            return dict(con.execute("SELECT name, sha256 FROM photos").fetchall())

    def set_source_path(self, name: str, source_path: str) -> None:
        """Record a photo's new location (a moved file recognised by its hash)."""
        with self.connect() as con:
            con.execute("UPDATE photos SET source_path = ? WHERE name = ?", (source_path, name))

    def photos(self) -> list[dict]:
        """Provenance of every photo, in intake order."""
        with self.connect() as con:
            con.row_factory = sqlite3.Row
            rows = con.execute("SELECT * FROM photos ORDER BY id").fetchall()
        return [dict(r) for r in rows]

    def patches(
        self, *, ids: Collection[int] | None = None, labelled: bool = False
    ) -> list[PatchRecord]:
        """Patches in photo then grid order, with current label and split subset.

        Args:
            ids: only these patch ids (unknown ids are left out).
            labelled: only patches with at least one label event (unsure included).

        Without either, every patch: on an archive of millions of patches, ask for what
        is needed instead.
        """
        where = []
        if labelled:  # driven by the label events, not by a scan of every patch
            where.append("p.id IN (SELECT DISTINCT patch_id FROM label_events)")
        q = f"""
        SELECT p.id, ph.name, ph.group_id, p.row, p.col, p.x0, p.y0, p.x1, p.y1, p.crop,
               COALESCE(p.patch_mm, (p.x1 - p.x0) * ph.gsd_mm), ph.gsd_mm, p.focus, p.clipped,
               p.flags,
               (SELECT e.label FROM label_events e WHERE e.patch_id = p.id ORDER BY e.id DESC LIMIT 1),
               EXISTS (SELECT 1 FROM label_events e WHERE e.patch_id = p.id),
               s.subset, p.review_skip, j.job
        FROM {"temp.wanted_patches w CROSS JOIN" if ids is not None else ""} patches p
        {"ON p.id = w.id" if ids is not None else ""}
        JOIN photos ph ON ph.id = p.photo_id
        LEFT JOIN split_assignments s ON s.patch_id = p.id
        LEFT JOIN job_cells j ON j.patch_id = p.id
        {("WHERE " + " AND ".join(where)) if where else ""}
        ORDER BY ph.id, p.row, p.col, p.id
        """
        with self.connect() as con:
            if ids is not None:
                self._want_ids(con, ids)
            rows = con.execute(q).fetchall()
        return [
            PatchRecord(
                id=r[0],
                photo=r[1],
                group=r[2],
                row=r[3],
                col=r[4],
                box=(r[5], r[6], r[7], r[8]),
                crop=r[9],
                patch_mm=r[10],
                gsd_mm=r[11],
                focus=r[12],
                clipped=r[13],
                flags=r[14],
                label=r[15],
                labelled=bool(r[16]),
                # a job's patches are in no subset, whatever an older kit's split table says
                subset=None if r[19] is not None or r[2].startswith(JOB_GROUP_PREFIX) else r[17],
                review_skip=bool(r[18]),
                job=r[19],
            )
            for r in rows
        ]

    def queue_rows(self, *, labelled: bool, ids: Collection[int] | None = None) -> list[QueueRow]:
        """What a review queue is built from (:func:`trainkit.labels.review.build_queue`), for
        the labelled or the never-labelled patches, in photo then grid order; with ``ids``,
        only those patches (a queue of picked patches reads a few thousand rows, not the
        archive's millions)."""
        q = f"""
        SELECT p.id, p.review_skip, j.job
        FROM {"temp.wanted_patches w CROSS JOIN" if ids is not None else ""} patches p
        {"ON p.id = w.id" if ids is not None else ""}
        JOIN photos ph ON ph.id = p.photo_id
        LEFT JOIN job_cells j ON j.patch_id = p.id
        WHERE p.id {"" if labelled else "NOT "}IN (SELECT patch_id FROM label_events)
        ORDER BY ph.id, p.row, p.col, p.id
        """
        with self.connect() as con:
            if ids is not None:
                self._want_ids(con, ids)
            return [QueueRow(int(i), labelled, bool(s), j) for i, s, j in con.execute(q)]

    @staticmethod
    def _want_ids(con: sqlite3.Connection, ids: Collection[int]) -> None:
        """Fill the connection's temporary table of wanted patch ids."""
        con.execute("CREATE TEMP TABLE IF NOT EXISTS wanted_patches (id INTEGER PRIMARY KEY)")
        con.execute("DELETE FROM temp.wanted_patches")
        con.executemany(
            "INSERT OR IGNORE INTO temp.wanted_patches(id) VALUES (?)", ((int(i),) for i in ids)
        )

    def patch_ids(self) -> set[int]:
        """Every patch id."""
        with self.connect() as con:
            return {int(r[0]) for r in con.execute("SELECT id FROM patches")}

    def photo_sources(self, names: Iterable[str]) -> list[dict]:
        """Where each named photo is and what it holds: ``name``, ``source_path``, ``sha256``,
        ``grid_px`` (the side of its grid's boxes in photo pixels, None from older kits)."""
        wanted = list(dict.fromkeys(names))
        out: list[dict] = []
        keys = ("name", "source_path", "sha256", "grid_px")
        with self.connect() as con:
            for i in range(0, len(wanted), 500):
                chunk = wanted[i : i + 500]
                marks = ",".join("?" * len(chunk))
                rows = con.execute(
                    f"SELECT {', '.join(keys)} FROM photos WHERE name IN ({marks})", chunk
                )
                out.extend(dict(zip(keys, r, strict=True)) for r in rows)
        return out

    def patch_lookup(self) -> dict[tuple[str, tuple[int, int, int, int]], int]:
        """Map (photo name, box) -> patch id, for importing labels keyed by place."""
        q = "SELECT ph.name, p.x0, p.y0, p.x1, p.y1, p.id FROM patches p JOIN photos ph ON ph.id = p.photo_id"
        with self.connect() as con:
            return {(r[0], (r[1], r[2], r[3], r[4])): r[5] for r in con.execute(q)}

    # ----- labels ------------------------------------------------------------------
    def add_labels(
        self, items: Iterable[tuple[int, str | None]], *, reviewer: str, origin: str = "reviewer"
    ) -> int:
        """Append label events (patch id, class name or None for unsure); returns the count."""
        if origin not in LABEL_ORIGINS:
            raise ValueError(
                f"invalid label origin {origin!r}; choose one of: {', '.join(LABEL_ORIGINS)}"
            )
        names = set(self.class_set.names)
        rows = []
        now = time.time()
        for patch_id, label in items:
            if label is not None and label not in names:
                raise ValueError(
                    f"unknown class {label!r}; choose one of: {', '.join(self.class_set.names)}"
                )
            rows.append((int(patch_id), label, reviewer, origin, now))
        with self.connect() as con:
            con.executemany(
                "INSERT INTO label_events(patch_id, label, reviewer, origin, created_at) VALUES (?, ?, ?, ?, ?)",
                rows,
            )
        return len(rows)

    def label_history(self, patch_id: int) -> list[dict]:
        with self.connect() as con:
            rows = con.execute(
                "SELECT id, label, reviewer, origin, created_at FROM label_events WHERE patch_id = ? ORDER BY id",
                (patch_id,),
            ).fetchall()
        return [
            dict(zip(("id", "label", "reviewer", "origin", "created_at"), r, strict=True))
            for r in rows
        ]

    # ----- splits ------------------------------------------------------------------
    def set_split(self, assignments: dict[int, str], info: dict) -> None:
        """Replace the split: patch id -> 'train' | 'val' | 'test', plus how it was made.

        Raises:
            WorkspaceError: an assigned patch belongs to a job's sample (see
                :attr:`PatchRecord.of_a_job`); those never join a split.
        """
        jobbed = sorted(r.id for r in self.patches(ids=assignments) if r.of_a_job)
        if jobbed:
            raise WorkspaceError(
                f"{len(jobbed)} patches of job samples (e.g. patch {jobbed[0]}) cannot join a "
                "split: a job's cells check that job, they do not train or test the model"
            )
        with self.connect() as con:
            con.execute("DELETE FROM split_assignments")
            con.executemany(
                "INSERT INTO split_assignments(patch_id, subset) VALUES (?, ?)",
                sorted(assignments.items()),
            )
            con.execute(
                "INSERT OR REPLACE INTO meta(key, value) VALUES ('split_info', ?)",
                (json.dumps(info),),
            )

    def split_info(self) -> dict | None:
        raw = self.meta("split_info")
        return None if raw is None else json.loads(raw)

    # ----- summary -----------------------------------------------------------------
    def summary(self) -> dict:
        """Counts for `trainkit status`; the top-level keys are stable for scripts.

        Keys: ``photos``, ``patches``, ``flagged`` (patches with a quality flag),
        ``labeled`` (class name -> patches whose current label is that class),
        ``unsure`` (labelled but marked unsure), ``unlabeled`` (never labelled) and
        ``splits`` (subset name -> labelled patches in it), ``jobs`` (job name -> its
        sampled ``cells``: ``answered`` with a class, as ``trainkit verify`` counts them,
        ``unsure`` and ``unanswered``), ``picked`` (``patches`` picked for labelling by
        ``trainkit pick``, ``unanswered`` of them) and ``crop_store`` (crops kept, their
        PNG bytes and the file's bytes), plus descriptive fields.
        """
        names = self.class_set.names
        labeled = dict.fromkeys(names, 0)
        splits = {"train": 0, "val": 0, "test": 0}
        latest = (  # each labelled patch's newest event
            "SELECT e.patch_id, e.label FROM label_events e"
            " JOIN (SELECT patch_id, MAX(id) AS last FROM label_events GROUP BY patch_id) m"
            " ON e.id = m.last"
        )
        job_photo = f"(SELECT id FROM photos WHERE group_id LIKE '{JOB_GROUP_PREFIX}%')"
        with self.connect() as con:
            n_photos = con.execute("SELECT COUNT(*) FROM photos").fetchone()[0]
            n_patches, flagged, skipped = con.execute(
                "SELECT COUNT(*), COALESCE(SUM(flags != ''), 0), COALESCE(SUM(review_skip), 0)"
                " FROM patches"
            ).fetchone()
            unsure = labelled = 0
            for label, n in con.execute(f"SELECT label, COUNT(*) FROM ({latest}) GROUP BY label"):
                labelled += n
                if label is None:
                    unsure += n
                else:
                    labeled[label] = labeled.get(label, 0) + n
            for subset, n in con.execute(
                f"SELECT s.subset, COUNT(*) FROM split_assignments s JOIN ({latest}) l"
                " ON l.patch_id = s.patch_id JOIN patches p ON p.id = s.patch_id"
                " WHERE l.label IS NOT NULL AND s.patch_id NOT IN (SELECT patch_id FROM job_cells)"
                f" AND p.photo_id NOT IN {job_photo} GROUP BY s.subset"
            ):
                splits[subset] += n
            picked, unanswered_picks = con.execute(
                "SELECT COUNT(*), COALESCE(SUM(patch_id NOT IN (SELECT patch_id FROM label_events)), 0)"
                " FROM label_pick_patches"
            ).fetchone()
            jobs = {
                job: {"cells": cells, "answered": answered, "unsure": uns, "unanswered": unans}
                for job, cells, answered, uns, unans in con.execute(
                    f"SELECT j.job, COUNT(*), COALESCE(SUM(l.patch_id IS NOT NULL AND l.label IS NOT NULL), 0),"
                    " COALESCE(SUM(l.patch_id IS NOT NULL AND l.label IS NULL), 0),"
                    " COALESCE(SUM(l.patch_id IS NULL), 0)"
                    f" FROM job_cells j LEFT JOIN ({latest}) l ON l.patch_id = j.patch_id"
                    " GROUP BY j.job ORDER BY j.job"
                )
            }
        return {
            "workspace": str(self.root),
            "class_set": self.class_set.name,
            "tile_px": self.tile_px,
            "photos": int(n_photos),
            "patches": int(n_patches),
            "flagged": int(flagged),
            "labeled": labeled,
            "unsure": unsure,
            "unlabeled": int(n_patches) - labelled,
            "splits": splits,
            "left_out_of_review": int(skipped),
            "jobs": jobs,
            "picked": {"patches": int(picked), "unanswered": int(unanswered_picks)},
            "crop_store": CropStore(self.root).stats(),
        }

    # ----- review sessions (events one at a time, undo, skips, settlements) ------------
    def add_label_event(
        self,
        patch_id: int,
        label: str | None,
        *,
        reviewer: str,
        origin: str = "reviewer",
        settles: Iterable[str] | None = None,
    ) -> int:
        """Append one label event and return its id (for undo).

        Args:
            patch_id: the patch.
            label: class name, or None for unsure.
            reviewer: who answered.
            origin: one of :data:`LABEL_ORIGINS`.
            settles: reviewers whose disagreeing labels this event settles; the event is
                then recorded in ``label_settlements`` in the same transaction.
        """
        if origin not in LABEL_ORIGINS:
            raise ValueError(
                f"invalid label origin {origin!r}; choose one of: {', '.join(LABEL_ORIGINS)}"
            )
        if label is not None and label not in self.class_set.names:
            raise ValueError(
                f"unknown class {label!r}; choose one of: {', '.join(self.class_set.names)}"
            )
        with self.connect() as con:
            cur = con.execute(
                "INSERT INTO label_events(patch_id, label, reviewer, origin, created_at)"
                " VALUES (?, ?, ?, ?, ?)",
                (int(patch_id), label, reviewer, origin, time.time()),
            )
            event_id = int(cur.lastrowid)
            if settles is not None:
                con.execute(
                    "INSERT INTO label_settlements(event_id, settled_reviewers) VALUES (?, ?)",
                    (event_id, ",".join(sorted(settles))),
                )
        return event_id

    def undo_label_event(self, event_id: int) -> dict | None:
        """Take back a label event: it leaves the history and is kept in ``undone_label_events``.

        Returns the undone event as a dict, or None when no such event exists (already undone).
        """
        with self.connect() as con:
            row = con.execute(
                "SELECT id, patch_id, label, reviewer, origin, created_at FROM label_events"
                " WHERE id = ?",
                (int(event_id),),
            ).fetchone()
            if row is None:
                return None
            con.execute(
                "INSERT INTO undone_label_events(id, patch_id, label, reviewer, origin, created_at,"
                " undone_at) VALUES (?, ?, ?, ?, ?, ?, ?)",
                (*row, time.time()),
            )
            con.execute("DELETE FROM label_settlements WHERE event_id = ?", (int(event_id),))
            con.execute("DELETE FROM label_events WHERE id = ?", (int(event_id),))
        keys = ("id", "patch_id", "label", "reviewer", "origin", "created_at")
        return dict(zip(keys, row, strict=True))

    def undone_events(self) -> list[dict]:
        """Every undone label event, oldest first (the audit trail of corrected slips)."""
        keys = ("id", "patch_id", "label", "reviewer", "origin", "created_at", "undone_at")
        with self.connect() as con:
            rows = con.execute(f"SELECT {', '.join(keys)} FROM undone_label_events ORDER BY id")
            return [dict(zip(keys, r, strict=True)) for r in rows.fetchall()]

    def label_events(self) -> list[dict]:
        """Every label event, oldest first, with ``settles`` (reviewers settled, or None)."""
        q = (
            "SELECT e.id, e.patch_id, e.label, e.reviewer, e.origin, e.created_at,"
            " s.settled_reviewers FROM label_events e"
            " LEFT JOIN label_settlements s ON s.event_id = e.id ORDER BY e.id"
        )
        keys = ("id", "patch_id", "label", "reviewer", "origin", "created_at", "settles")
        with self.connect() as con:
            return [dict(zip(keys, r, strict=True)) for r in con.execute(q).fetchall()]

    def set_review_skip(self, patch_id: int, reviewer: str, skipped: bool = True) -> None:
        """Mark (or unmark) a patch as skipped by a reviewer: it moves to the end of their queue."""
        with self.connect() as con:
            if skipped:
                con.execute(
                    "INSERT OR REPLACE INTO review_skips(patch_id, reviewer, created_at)"
                    " VALUES (?, ?, ?)",
                    (int(patch_id), reviewer, time.time()),
                )
            else:
                con.execute(
                    "DELETE FROM review_skips WHERE patch_id = ? AND reviewer = ?",
                    (int(patch_id), reviewer),
                )

    def review_skips(self, reviewer: str) -> dict[int, float]:
        """Patch id -> time skipped, for one reviewer."""
        with self.connect() as con:
            rows = con.execute(
                "SELECT patch_id, created_at FROM review_skips WHERE reviewer = ?", (reviewer,)
            ).fetchall()
        return {int(p): float(t) for p, t in rows}

    # ----- job samples ---------------------------------------------------------------

    def add_job_sample(
        self,
        name: str,
        *,
        scan: str,
        threshold: float,
        design: dict,
        frames: list[dict],
        cells: list[dict],
        more: bool = False,
        before_commit: Callable[[list[int]], object] | None = None,
    ) -> list[int]:
        """Record a job's sample, or a further draw of it, in one transaction (all or nothing).

        The job's row (or its updated design), its frames and their patches, and its cells
        are written together: a sample stopped half-way (even by ``kill -9``) leaves nothing.
        Patches of the job's frames left without a job record by an interrupted sample of an
        older kit are reused when drawn again (same frame content, same box); those left
        over that no one labelled, skipped or split are removed.

        Args:
            name: the job's name (unique in the workspace).
            scan: the scan folder the cells were drawn from.
            threshold: the model's screening threshold at the scan.
            design: JSON-ready description of the sampling design (stored, replacing the
                previous one on a further draw).
            frames: one dict per frame with cells in this draw: ``name`` (the photo name),
                ``source_path``, ``width``, ``height``, ``sha256``, ``size_bytes`` and
                ``patches`` (as for :meth:`add_photo_with_patches`).
            cells: one dict per cell drawn now: ``photo``, ``box`` (x0, y0, x1, y1),
                ``frame``, ``stratum``, ``inclusion_probability``, ``screening_probability``.
            more: add to the existing job ``name``: ``inclusion`` in ``design`` (stratum
                -> probability) is then written to the job's earlier cells too.
            before_commit: called with the cells' patch ids once everything is written and
                before the commit (the job's sample.csv is written there); if it raises,
                nothing is committed.

        Returns:
            The patch id of each cell, in the order of ``cells``.

        Raises:
            WorkspaceError: the job exists (or, with ``more``, does not), a frame's photo
                holds other content, or a cell is already in a job.
        """
        group = job_group(name)
        patch_cols = "row, col, x0, y0, x1, y1, crop, patch_mm, focus, clipped, flags, review_skip"
        with self.connect() as con:
            con.execute("BEGIN IMMEDIATE")  # the checks below and the writes are one transaction
            exists = con.execute("SELECT 1 FROM jobs WHERE name = ?", (name,)).fetchone()
            if more and not exists:
                known = [r[0] for r in con.execute("SELECT name FROM jobs ORDER BY created_at")]
                raise WorkspaceError(
                    f"workspace {self.root} holds no job {name!r} to add to; its jobs: "
                    f"{', '.join(known) or 'none'}"
                )
            if not more and exists:
                raise WorkspaceError(
                    f"workspace {self.root} already holds job {name!r}; choose another name"
                )
            if more:
                con.execute("UPDATE jobs SET design = ? WHERE name = ?", (json.dumps(design), name))
                for stratum, p in (design.get("inclusion") or {}).items():
                    con.execute(
                        "UPDATE job_cells SET inclusion_probability = ? WHERE job = ? AND stratum = ?",
                        (float(p), name, stratum),
                    )
            else:
                con.execute(
                    "INSERT INTO jobs(name, scan, threshold, design, created_at)"
                    " VALUES (?, ?, ?, ?, ?)",
                    (name, scan, float(threshold), json.dumps(design), time.time()),
                )
            ids: dict[tuple[str, tuple[int, ...]], int] = {}
            for f in frames:
                row = con.execute(
                    "SELECT id, sha256, group_id FROM photos WHERE name = ?", (f["name"],)
                ).fetchone()
                if row is not None and (row[1] != f["sha256"] or row[2] != group):
                    raise WorkspaceError(
                        f"workspace {self.root} holds a photo {f['name']!r} with other content "
                        "or of another group; pass another --job name"
                    )
                if row is None:
                    photo_id = int(
                        con.execute(
                            "INSERT INTO photos(name, source_path, size_bytes, width, height,"
                            " gsd_mm, gsd_source, group_id, capture_date, roi, sha256, added_at)"
                            " VALUES (?, ?, ?, ?, ?, NULL, 'none', ?, NULL, NULL, ?, ?)",
                            (
                                f["name"],
                                f["source_path"],
                                int(f.get("size_bytes", 0)),
                                int(f["width"]),
                                int(f["height"]),
                                group,
                                f["sha256"],
                                time.time(),
                            ),
                        ).lastrowid  # fmt: skip
                    )
                else:
                    photo_id = int(row[0])
                for p in f["patches"]:
                    box = (int(p["x0"]), int(p["y0"]), int(p["x1"]), int(p["y1"]))
                    old = con.execute(
                        "SELECT id FROM patches WHERE photo_id = ? AND x0 = ? AND y0 = ?"
                        " AND x1 = ? AND y1 = ? AND crop != ''",  # job cells have crop files
                        (photo_id, *box),
                    ).fetchone()
                    if old is not None:  # left by an interrupted sample: its crop is this one
                        con.execute("UPDATE patches SET crop = ? WHERE id = ?", (p["crop"], old[0]))
                    else:
                        old = (
                            con.execute(
                                f"INSERT INTO patches(photo_id, {patch_cols})"
                                " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                                (photo_id, p["row"], p["col"], *box, p["crop"],
                                 p.get("patch_mm"), p["focus"], p["clipped"],
                                 p.get("flags", ""), int(p.get("review_skip", 0))),
                            ).lastrowid,
                        )  # fmt: skip
                    ids[(f["name"], box)] = int(old[0])
            out = []
            for c in cells:
                pid = ids[(c["photo"], tuple(int(v) for v in c["box"]))]
                taken = con.execute(
                    "SELECT job FROM job_cells WHERE patch_id = ?", (pid,)
                ).fetchone()
                if taken is not None:
                    raise WorkspaceError(
                        f"cell {tuple(c['box'])} of {c['photo']!r} is already in job {taken[0]!r}"
                    )
                con.execute(
                    "INSERT INTO job_cells(patch_id, job, frame, stratum, inclusion_probability,"
                    " screening_probability) VALUES (?, ?, ?, ?, ?, ?)",
                    (pid, name, c["frame"], c["stratum"], float(c["inclusion_probability"]),
                     float(c["screening_probability"])),
                )  # fmt: skip
                out.append(pid)
            self._drop_orphans(con, group)
            if before_commit is not None:
                before_commit(out)
        return out

    @staticmethod
    def _drop_orphans(con: sqlite3.Connection, group: str) -> None:
        """Remove patches of a job group's frames that are in no job and referenced by
        nothing (no label, undone label, skip or split), then photos left without patches."""
        con.execute(
            """DELETE FROM patches WHERE photo_id IN (SELECT id FROM photos WHERE group_id = ?)
               AND crop != ''
               AND id NOT IN (SELECT patch_id FROM job_cells)
               AND id NOT IN (SELECT patch_id FROM label_events)
               AND id NOT IN (SELECT patch_id FROM undone_label_events)
               AND id NOT IN (SELECT patch_id FROM review_skips)
               AND id NOT IN (SELECT patch_id FROM split_assignments)""",
            (group,),
        )
        con.execute(
            "DELETE FROM photos WHERE group_id = ? AND id NOT IN (SELECT photo_id FROM patches)",
            (group,),
        )

    def record_verification(self, job: str, record: dict) -> int:
        """Append one check of a job (never replacing an earlier one); returns its id.

        Args:
            job: the job's name.
            record: JSON-ready; its ``created`` (time), ``gate`` (``required_recall``,
                ``passed``, ``verdict``, or None), ``verdict`` and ``model`` (``model``,
                ``sha256``) fill the table's columns, and the whole record is kept.
        """
        gate = record.get("gate") or {}
        model = record.get("model") or {}
        with self.connect() as con:
            cur = con.execute(
                "INSERT INTO job_verifications(job, created_at, required_recall, passed, verdict,"
                " model, model_sha256, record) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    job,
                    time.time(),
                    gate.get("required_recall"),
                    None if gate.get("passed") is None else int(bool(gate["passed"])),
                    record.get("verdict") or gate.get("verdict") or "no bound asked",
                    model.get("model"),
                    model.get("sha256"),
                    json.dumps(record, allow_nan=False),
                ),
            )
            return int(cur.lastrowid)

    def verifications(self, job: str | None = None) -> list[dict]:
        """Every recorded check (of one job, or of all), oldest first, as recorded."""
        q = "SELECT id, record FROM job_verifications"
        args: tuple = ()
        if job is not None:
            q += " WHERE job = ?"
            args = (job,)
        with self.connect() as con:
            rows = con.execute(q + " ORDER BY id", args).fetchall()
        return [{**json.loads(r[1]), "id": int(r[0])} for r in rows]

    def jobs(self) -> list[dict]:
        """Every job: name, scan, threshold, design (dict), created_at; oldest first."""
        with self.connect() as con:
            rows = con.execute(
                "SELECT name, scan, threshold, design, created_at FROM jobs ORDER BY created_at"
            ).fetchall()
        keys = ("name", "scan", "threshold", "design", "created_at")
        return [dict(zip(keys, (*r[:3], json.loads(r[3]), r[4]), strict=True)) for r in rows]

    def job_cells(self, job: str) -> list[dict]:
        """The cells of one job's sample, with their current label (None = unsure), whether
        they were answered at all, the SHA-256 of the frame they were cut from, and the
        photo name and box they are stored under."""
        q = """
        SELECT j.patch_id, j.frame, j.stratum, j.inclusion_probability, j.screening_probability,
               (SELECT e.label FROM label_events e WHERE e.patch_id = j.patch_id ORDER BY e.id DESC LIMIT 1),
               EXISTS (SELECT 1 FROM label_events e WHERE e.patch_id = j.patch_id),
               ph.sha256, ph.name, p.x0, p.y0, p.x1, p.y1
        FROM job_cells j JOIN patches p ON p.id = j.patch_id JOIN photos ph ON ph.id = p.photo_id
        WHERE j.job = ? ORDER BY j.patch_id
        """
        keys = ("patch_id", "frame", "stratum", "inclusion_probability",
                "screening_probability", "label", "answered", "frame_sha256", "photo", "box")  # fmt: skip
        with self.connect() as con:
            rows = con.execute(q, (job,)).fetchall()
        return [
            dict(zip(keys, (*r[:6], bool(r[6]), r[7], r[8], tuple(r[9:13])), strict=True))
            for r in rows
        ]

    # ----- label picks -------------------------------------------------------------------
    #: The patches a pick may draw: not left out of review, of no job, never labelled (an
    #: unsure answer counts as labelled), not picked before. ``?`` is the job group prefix.
    #: (``NOT IN`` lets SQLite build each excluded set once; measured twice as fast as
    #: ``NOT EXISTS`` per row on 1.5 million patches.)
    _PICKABLE = """
        p.review_skip = 0 AND substr(ph.group_id, 1, length(?)) != ?
        AND p.id NOT IN (SELECT patch_id FROM label_events)
        AND p.id NOT IN (SELECT patch_id FROM job_cells)
        AND p.id NOT IN (SELECT patch_id FROM label_pick_patches)
    """
    #: A patch's surface width in mm: as stored, else its box width times its photo's scale.
    _PATCH_MM = "COALESCE(p.patch_mm, (p.x1 - p.x0) * ph.gsd_mm)"

    def pick_strata(self) -> list[tuple[int, str, float | None, bool, int]]:
        """Patches a pick may draw, counted by SQL: one row (photo id, group, patch mm,
        flagged, count) per photo, scale and quality, in photo order."""
        q = f"""
        SELECT p.photo_id, ph.group_id, {self._PATCH_MM} AS mm, p.flags != '' AS flagged,
               COUNT(*)
        FROM patches p JOIN photos ph ON ph.id = p.photo_id
        WHERE {self._PICKABLE}
        GROUP BY p.photo_id, mm, flagged ORDER BY p.photo_id, mm, flagged
        """
        with self.connect() as con:
            rows = con.execute(q, (JOB_GROUP_PREFIX, JOB_GROUP_PREFIX)).fetchall()
        return [(int(a), str(g), mm, bool(f), int(n)) for a, g, mm, f, n in rows]

    def pick_candidates(
        self, photo_ids: Iterable[int]
    ) -> Iterator[tuple[int, list[tuple[int, float | None, bool]]]]:
        """For each photo id in turn: (photo id, [(patch id, patch mm, flagged), ...]) of the
        patches of that photo a pick may draw, by patch id; one connection for them all,
        one photo's rows in memory at a time."""
        q = f"""
        SELECT p.id, {self._PATCH_MM}, p.flags != ''
        FROM patches p JOIN photos ph ON ph.id = p.photo_id
        WHERE p.id BETWEEN ? AND ? AND p.photo_id = ?
        AND p.review_skip = 0 AND substr(ph.group_id, 1, length(?)) != ?
        AND p.id NOT IN temp._unpickable ORDER BY p.id
        """
        with self.connect() as con:
            con.execute(
                "CREATE TEMP TABLE _unpickable (id INTEGER PRIMARY KEY)"
            )  # the excluded ids, gathered once (they are few next to the patches)
            con.execute(
                "INSERT OR IGNORE INTO _unpickable SELECT patch_id FROM label_events"
                " UNION SELECT patch_id FROM job_cells UNION SELECT patch_id FROM label_pick_patches"
            )
            for photo in photo_ids:
                # a tiled photo's patches are an id range (a search by rowid); job frames and
                # older kits' photos have none: all ids, found through their own index
                first, last = con.execute(
                    "SELECT COALESCE(first_patch, 0), COALESCE(last_patch, ?) FROM photos"
                    " WHERE id = ?",
                    (1 << 62, int(photo)),
                ).fetchone()
                rows = con.execute(q, (first, last, int(photo), JOB_GROUP_PREFIX, JOB_GROUP_PREFIX))
                yield int(photo), [(int(i), mm, bool(f)) for i, mm, f in rows.fetchall()]

    def group_subsets(self) -> dict[str, set[str]]:
        """Photo group -> the split subsets its patches are in (groups in no split absent)."""
        q = """
        SELECT DISTINCT ph.group_id, s.subset FROM split_assignments s
        JOIN patches p ON p.id = s.patch_id JOIN photos ph ON ph.id = p.photo_id
        """
        out: dict[str, set[str]] = {}
        with self.connect() as con:
            for group, subset in con.execute(q):
                out.setdefault(str(group), set()).add(str(subset))
        return out

    def record_pick(
        self, patches: list[dict], *, seed: int, model: str | None, design: dict
    ) -> int:
        """Append one pick (never changing an earlier one) in one transaction; returns its number.

        Args:
            patches: one dict per picked patch, in rank order: ``patch_id``, ``reason``
                (one of ``spread``, ``uncertain``, ``diverse``) and ``score`` (or None).
            seed: the pick's random seed.
            model: the model that guided it, or None.
            design: JSON-ready description of what was asked and how it was drawn.

        Raises:
            WorkspaceError: a patch can no longer be picked (labelled, picked, left out of
                review or put in a job by another run meanwhile); nothing is recorded.
        """
        ids = [int(p["patch_id"]) for p in patches]
        with self.connect() as con:
            con.execute("BEGIN IMMEDIATE")
            con.execute("CREATE TEMP TABLE IF NOT EXISTS _pick_ids (id INTEGER PRIMARY KEY)")
            con.execute("DELETE FROM _pick_ids")
            con.executemany("INSERT OR IGNORE INTO _pick_ids(id) VALUES (?)", [(i,) for i in ids])
            ok = con.execute(
                f"SELECT COUNT(*) FROM _pick_ids t CROSS JOIN patches p ON p.id = t.id"
                f" JOIN photos ph ON ph.id = p.photo_id WHERE {self._PICKABLE}",
                (JOB_GROUP_PREFIX, JOB_GROUP_PREFIX),
            ).fetchone()[0]
            if ok != len(ids):
                raise WorkspaceError(
                    f"{len(ids) - ok} of the {len(ids)} patches drawn can no longer be picked "
                    f"in {self.root} (picked twice, or labelled, left out of review or put in a "
                    "job by another run meanwhile); run the pick again"
                )
            number = con.execute("SELECT COALESCE(MAX(pick), 0) + 1 FROM label_picks").fetchone()[0]
            con.execute(
                "INSERT INTO label_picks(pick, seed, model, design, created_at)"
                " VALUES (?, ?, ?, ?, ?)",
                (int(number), int(seed), model, json.dumps(design), time.time()),
            )
            con.executemany(
                "INSERT INTO label_pick_patches(patch_id, pick, rank, reason, score)"
                " VALUES (?, ?, ?, ?, ?)",
                [
                    (pid, int(number), rank, str(p["reason"]),
                     None if p.get("score") is None else float(p["score"]))
                    for rank, (pid, p) in enumerate(zip(ids, patches, strict=True), start=1)
                ],
            )  # fmt: skip
            con.execute("DROP TABLE _pick_ids")
        return int(number)

    def picks(self) -> list[dict]:
        """Every pick, oldest first: ``pick``, ``seed``, ``model``, ``design`` (dict),
        ``created_at`` and ``patches`` (how many it drew)."""
        q = """
        SELECT k.pick, k.seed, k.model, k.design, k.created_at,
               (SELECT COUNT(*) FROM label_pick_patches x WHERE x.pick = k.pick)
        FROM label_picks k ORDER BY k.pick
        """
        keys = ("pick", "seed", "model", "design", "created_at", "patches")
        with self.connect() as con:
            rows = con.execute(q).fetchall()
        return [dict(zip(keys, (*r[:3], json.loads(r[3]), *r[4:]), strict=True)) for r in rows]

    def picked_patches(self, *, unanswered: bool = False) -> list[dict]:
        """The picked patches in pick then rank order: ``patch_id``, ``pick``, ``rank``,
        ``reason``, ``score``; with ``unanswered``, only those nobody has labelled yet."""
        q = "SELECT k.patch_id, k.pick, k.rank, k.reason, k.score FROM label_pick_patches k"
        if unanswered:
            q += " WHERE NOT EXISTS (SELECT 1 FROM label_events e WHERE e.patch_id = k.patch_id)"
        keys = ("patch_id", "pick", "rank", "reason", "score")
        with self.connect() as con:
            rows = con.execute(q + " ORDER BY k.pick, k.rank").fetchall()
        return [dict(zip(keys, r, strict=True)) for r in rows]

    # ----- crack drawings: what a firm's masks and traced centrelines say of patches ------
    #: Columns of a drawing measure as :meth:`add_drawing_measures` takes them.
    DRAWING_MEASURE_KEYS = ("patch_id", "drawing_sha256", "drawing", "kind", "label", "reason",
                            "angle_deg", "coherence", "boundary_deg", "length_px", "width_px",
                            "width_max_px")  # fmt: skip
    #: Each measured patch's latest measure (the row stored last).
    _LATEST_MEASURES = "SELECT MAX(rowid) FROM drawing_measures GROUP BY patch_id"

    def drawing_photos(self) -> list[dict]:
        """The photos a drawing may be imported for (tiled photos, not a job's frames):
        ``id``, ``name``, ``width``, ``height``, ``gsd_mm``, in intake order."""
        keys = ("id", "name", "width", "height", "gsd_mm")
        with self.connect() as con:
            rows = con.execute(
                f"SELECT {', '.join(keys)} FROM photos WHERE substr(group_id, 1, length(?)) != ?"
                " ORDER BY id",
                (JOB_GROUP_PREFIX, JOB_GROUP_PREFIX),
            ).fetchall()
        return [dict(zip(keys, r, strict=True)) for r in rows]

    def photo_patch_boxes(self, photo_id: int) -> list[tuple[int, tuple[int, int, int, int]]]:
        """(patch id, box) of every patch of one photo, by id (a tiled photo's patches are
        an id range: a search by rowid, no index over every patch needed)."""
        with self.connect() as con:
            first, last = con.execute(
                "SELECT COALESCE(first_patch, 0), COALESCE(last_patch, ?) FROM photos WHERE id = ?",
                (1 << 62, int(photo_id)),
            ).fetchone()
            rows = con.execute(
                "SELECT id, x0, y0, x1, y1 FROM patches WHERE id BETWEEN ? AND ? AND photo_id = ?"
                " ORDER BY id",
                (first, last, int(photo_id)),
            ).fetchall()
        return [(int(r[0]), (int(r[1]), int(r[2]), int(r[3]), int(r[4]))) for r in rows]

    def add_drawing_measures(
        self, rows: Iterable[tuple], *, reviewer: str = "drawing"
    ) -> dict[str, int]:
        """Store what crack drawings say of patches, and their labels, in one transaction.

        Each row holds the values of :attr:`DRAWING_MEASURE_KEYS` in that order; ``label``
        is a class name, or None when the patch label rule finds the patch ambiguous.
        A measure replaces the one the same drawing file (same SHA-256) gave the patch
        before. Labels are label events of origin ``drawing`` under ``reviewer``, added when:

        - the patch has no label yet, or its current label came from a drawing and differs
          (an ambiguous patch whose current label came from a drawing gets an unsure answer:
          the newer drawing withdraws the older one's label);
        - never over a label a person gave (origin reviewer, file or suggestion): that
          label is kept, and the measure is stored all the same.

        Returns:
            Counts: ``measured`` (rows stored), ``added`` (label events), ``unchanged``
            (the drawing's label was already current), ``kept`` (a person's label kept),
            ``withdrawn`` (unsure answers added), ``ambiguous`` (rows with no label).

        Raises:
            WorkspaceError: a class name this workspace does not have, an unknown drawing
                kind or patch; nothing is stored.
        """
        names = set(self.class_set.names)
        rows = [tuple(r) for r in rows]
        counts = dict.fromkeys(
            ("measured", "added", "unchanged", "kept", "withdrawn", "ambiguous"), 0
        )
        now = time.time()
        with self.connect() as con:
            con.execute("BEGIN IMMEDIATE")
            con.execute("CREATE TEMP TABLE IF NOT EXISTS _drawn (id INTEGER PRIMARY KEY)")
            con.execute("DELETE FROM _drawn")
            con.executemany(
                "INSERT OR IGNORE INTO _drawn(id) VALUES (?)", ((int(r[0]),) for r in rows)
            )
            known = con.execute(
                "SELECT COUNT(*) FROM _drawn d JOIN patches p ON p.id = d.id"
            ).fetchone()[0]
            wanted = con.execute("SELECT COUNT(*) FROM _drawn").fetchone()[0]
            if known != wanted:
                raise WorkspaceError(
                    f"{wanted - known} of the patches measured are not in workspace {self.root}"
                )
            current = {  # patch id -> (label, origin) of its newest label event
                int(p): (lab, org)
                for p, lab, org in con.execute(
                    "SELECT e.patch_id, e.label, e.origin FROM label_events e JOIN"
                    " (SELECT patch_id, MAX(id) AS last FROM label_events"
                    "  WHERE patch_id IN (SELECT id FROM _drawn) GROUP BY patch_id) m"
                    " ON e.id = m.last"
                )
            }
            for r in rows:
                rec = dict(zip(self.DRAWING_MEASURE_KEYS, r, strict=True))
                pid, label = int(rec["patch_id"]), rec["label"]
                if label is not None and label not in names:
                    raise WorkspaceError(
                        f"unknown class {label!r}; choose one of: {', '.join(sorted(names))}"
                    )
                if rec["kind"] not in DRAWING_KINDS:
                    raise WorkspaceError(
                        f"invalid drawing kind {rec['kind']!r}; choose one of: "
                        f"{', '.join(DRAWING_KINDS)}"
                    )
                now_label, now_origin = current.get(pid, (None, None))
                event = None
                if label is None:
                    counts["ambiguous"] += 1
                if now_origin is not None and now_origin != "drawing":
                    counts["kept"] += label is not None
                elif now_origin == "drawing" and now_label == label:
                    counts["unchanged"] += label is not None
                elif label is not None or now_origin == "drawing":
                    event = con.execute(
                        "INSERT INTO label_events(patch_id, label, reviewer, origin, created_at)"
                        " VALUES (?, ?, ?, 'drawing', ?)",
                        (pid, label, reviewer, now),
                    ).lastrowid
                    current[pid] = (label, "drawing")
                    counts["added" if label is not None else "withdrawn"] += 1
                con.execute(
                    "DELETE FROM drawing_measures WHERE patch_id = ? AND drawing_sha256 = ?",
                    (pid, rec["drawing_sha256"]),
                )
                con.execute(
                    f"INSERT INTO drawing_measures({', '.join(self.DRAWING_MEASURE_KEYS)},"
                    " event_id, imported_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (*r, event, now),
                )
                counts["measured"] += 1
            con.execute("DROP TABLE _drawn")
        return counts

    def drawing_measures(self, ids: Collection[int] | None = None) -> dict[int, dict]:
        """Each patch's latest drawing measure (of ``ids``, or of every measured patch).

        Values: the :attr:`DRAWING_MEASURE_KEYS` (but ``patch_id``), ``event_id``,
        ``imported_at``, and ``length_mm``, ``width_mm``, ``width_max_mm`` from the photo's
        scale (None without scale or width).
        """
        keys = [k for k in self.DRAWING_MEASURE_KEYS if k != "patch_id"]
        keys += ["event_id", "imported_at"]
        cols = ", ".join(f"m.{k}" for k in keys)
        latest = self._LATEST_MEASURES
        if ids is not None:  # only the wanted patches' rows are grouped (by the primary key)
            latest = latest.replace(
                "GROUP BY", "WHERE patch_id IN (SELECT id FROM temp._measured) GROUP BY"
            )
        q = f"""
        SELECT m.patch_id, {cols}, ph.gsd_mm FROM drawing_measures m
        JOIN patches p ON p.id = m.patch_id JOIN photos ph ON ph.id = p.photo_id
        WHERE m.rowid IN ({latest})
        """
        out: dict[int, dict] = {}
        with self.connect() as con:
            if ids is not None:
                con.execute("CREATE TEMP TABLE _measured (id INTEGER PRIMARY KEY)")
                con.executemany(
                    "INSERT OR IGNORE INTO _measured(id) VALUES (?)", ((int(i),) for i in ids)
                )
            for r in con.execute(q):
                rec = dict(zip(keys, r[1:-1], strict=True))
                g = r[-1]
                for k in ("length", "width", "width_max"):
                    v = rec[f"{k}_px"]
                    rec[f"{k}_mm"] = None if g is None or v is None else round(v * g, 4)
                out[int(r[0])] = rec
        return out

    def drawing_boundary_patches(self, within_deg: float) -> list[tuple[int, float]]:
        """Patches a drawing found oriented within ``within_deg`` of a class boundary and no
        person has labelled since (no label, or the current label came from a drawing):
        (patch id, distance in degrees), nearest the boundary first."""
        q = f"""
        SELECT m.patch_id, m.boundary_deg FROM drawing_measures m
        WHERE m.rowid IN ({self._LATEST_MEASURES})
        AND m.boundary_deg IS NOT NULL AND m.boundary_deg < ?
        AND COALESCE((SELECT e.origin FROM label_events e WHERE e.patch_id = m.patch_id
                      ORDER BY e.id DESC LIMIT 1), 'drawing') = 'drawing'
        ORDER BY m.boundary_deg, m.patch_id
        """
        with self.connect() as con:
            return [(int(p), float(d)) for p, d in con.execute(q, (float(within_deg),))]
