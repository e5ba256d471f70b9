"""Photos to a labelled, split workspace in one call: tile, import labels, split."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from trainkit.core.taxonomy import ClassSet
from trainkit.intake.tiling import tile_into_workspace
from trainkit.labels.labels_io import ImportResult, import_csv
from trainkit.labels.splits import split_workspace
from trainkit.store.workspace import Workspace

__all__ = ["BuildProgress", "BuiltWorkspace", "build_workspace"]


class BuildProgress:
    """Where :func:`build_workspace` reports; every method does nothing by default.

    The stages are ``"tile"``, ``"labels"`` and ``"split"``, in that order (a stage that is
    not asked for is not reported).
    """

    def stage(self, name: str, total: int | None) -> None:
        """A stage starts; ``total`` is the photo count for ``"tile"``, else None."""

    def tiling(self, done: int, total: int, photo: str) -> None:
        """``done`` of ``total`` photos are tiled, the last one ``photo``."""

    def stage_done(self, name: str, result: Any) -> None:
        """A stage ended: the tiling counts (dict), the :class:`ImportResult` list (empty
        when the workspace already held labels and none were imported) or the split report.
        """


@dataclass
class BuiltWorkspace:
    """What :func:`build_workspace` did.

    Attributes:
        workspace: the workspace, open.
        tiled: the counts of :func:`~trainkit.intake.tiling.tile_into_workspace`.
        imported: one :class:`ImportResult` per labels file imported; empty when the
            workspace already held labels (a resumed build) or none were given.
        split: the report of :func:`~trainkit.labels.splits.split_workspace`, or None.
    """

    workspace: Workspace
    tiled: dict
    imported: list[ImportResult]
    split: dict | None


def build_workspace(
    photos: Sequence[Path],
    ws_dir: str | Path,
    *,
    class_set: ClassSet,
    tile_px: int,
    sidecar: dict[str, dict] | None = None,
    group_by: str = "photo",
    labels_csv: Path | Sequence[Path] | None = None,
    reviewer: str = "import",
    split: Mapping[str, Any] | None = None,
    tile_options: Mapping[str, Any] | None = None,
    progress: BuildProgress | None = None,
) -> BuiltWorkspace:
    """Tile ``photos`` into the workspace at ``ws_dir``, import labels, then split it.

    Re-running on the same folder resumes: tiling skips photos already present, labels
    are imported only while the workspace holds none, and the split is made again (it
    is deterministic for a seed).

    Args:
        photos: the photo files, in the order they are tiled.
        ws_dir: the workspace folder (created, or opened when it exists and matches).
        class_set: the workspace's classes.
        tile_px: patch size in pixels.
        sidecar: the sidecar rows by photo (:func:`~trainkit.intake.sidecar.read_sidecar`).
        group_by: the split group: ``"photo"`` or ``"sidecar"`` (see tiling).
        labels_csv: one or more label CSV files to import, in order, or None.
        reviewer: the reviewer name recorded on the imported labels.
        split: keyword arguments of :func:`~trainkit.labels.splits.split_workspace`
            (``test_fraction``, ``val_fraction``, ``seed``), or None for no split.
        tile_options: further keyword arguments of ``tile_into_workspace``.
        progress: where to report stages and tiling progress.

    Returns:
        The :class:`BuiltWorkspace`.

    Raises:
        WorkspaceError: ``ws_dir`` holds a workspace with other classes or patch size.
        SplitError: the labelled patches cannot be split as asked.
        LabelsError: a labels file the importer refuses.
    """
    report = progress or BuildProgress()
    files = list(photos)
    ws = Workspace.create(ws_dir, class_set=class_set, tile_px=tile_px)
    report.stage("tile", len(files))
    tiled = tile_into_workspace(
        files,
        ws,
        sidecar=sidecar,
        group_by=group_by,
        progress=report.tiling,
        **dict(tile_options or {}),
    )
    report.stage_done("tile", tiled)
    imported: list[ImportResult] = []
    if labels_csv is not None:
        report.stage("labels", None)
        paths = [labels_csv] if isinstance(labels_csv, (str, Path)) else list(labels_csv)
        if not ws.patches(labelled=True):
            imported = [import_csv(ws, p, reviewer=reviewer) for p in paths]
        report.stage_done("labels", imported)
    report_split = None
    if split is not None:
        report.stage("split", None)
        report_split = split_workspace(ws, **dict(split))
        report.stage_done("split", report_split)
    return BuiltWorkspace(ws, tiled, imported, report_split)
