"""Patch pixels on demand: cut from the photo (checked by its SHA-256) or read from the crop store.

Tiling stores no pixels; a patch is a row (photo, box, scale, quality, provenance). The
pixels a person reviews or a network learns from are cut here, by one rule
(:func:`cut_patch`), from the photo where the firm keeps it.
"""

from __future__ import annotations

import hashlib
from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from trainkit.core.grid import Box, crop, resize_patch
from trainkit.store.cropstore import CropStore, crop_key
from trainkit.store.workspace import PatchRecord, Workspace, WorkspaceError

__all__ = ["cut_patch", "PatchPixels", "PhotoMissingError", "read_checked_photo"]


def cut_patch(image: np.ndarray, box: Box, tile_px: int, src_px: int | None = None) -> np.ndarray:
    """The patch of ``image`` (H, W, 3 uint8, upright) in ``box``, as a ``tile_px`` square.

    The one cutting rule of the kit (tiling's quality measures and every crop shown or
    learned from): the box is cropped to ``src_px`` square (the grid's box side in photo
    pixels; edge-padded where the photo is smaller than the box), and a side other than
    ``tile_px`` (tiling by physical size) is resampled to ``tile_px`` with OpenCV's area
    filter when shrinking, bilinear when enlarging. Without ``src_px`` the side is the
    box's longer side, at least ``tile_px``.
    """
    x0, y0, x1, y1 = box
    side = src_px if src_px is not None else max(x1 - x0, y1 - y0, tile_px)
    patch = crop(image, box, side)
    if side != tile_px:
        import cv2

        interp = cv2.INTER_AREA if side > tile_px else cv2.INTER_LINEAR
        patch = cv2.resize(patch, (tile_px, tile_px), interpolation=interp)
    return patch


#: Pixel limit when re-reading a tiled photo (its size was accepted at tiling).
_TILED_MAX_PIXELS = 10**10


class PhotoMissingError(WorkspaceError):
    """A photo a patch must be cut from is missing, unreadable or changed; says how to fix it."""


@dataclass(frozen=True)
class _PhotoSource:
    name: str
    path: str
    sha256: str
    grid_px: int | None


class PatchPixels:
    """Pixels of a workspace's patches: stored crop, else cut from the photo and stored.

    Where a patch's pixels come from, first found wins:

    1. a crop file an older kit (or a job's sample) wrote (``PatchRecord.crop``), read as it is;
    2. the crop store (:class:`~trainkit.store.cropstore.CropStore`), by content address;
    3. the photo, read from where the workspace found it, its SHA-256 checked, decoded once
       for all its patches asked for together (Pillow, EXIF orientation applied: the pixels
       the crops of older kits hold), cut by :func:`cut_patch`; the crop is then stored
       unless ``store=False``.

    Args:
        ws: the workspace.
        keep_photos: decoded photos kept for :meth:`one` (a review moves through a photo's
            patches one at a time; 12 megapixels are about 36 MB each).
    """

    def __init__(self, ws: Workspace, *, keep_photos: int = 2) -> None:
        self.ws = ws
        self.crops = CropStore(ws.root)
        self.tile_px = ws.tile_px
        self._sources: dict[str, _PhotoSource] = {}
        self._decoded: OrderedDict[str, np.ndarray] = OrderedDict()
        self._keep = max(0, int(keep_photos))

    def __enter__(self) -> PatchPixels:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Forget the decoded photos."""
        self._decoded.clear()

    # ----- public ----------------------------------------------------------------------
    def one(self, record: PatchRecord, *, store: bool = True) -> np.ndarray:
        """One patch's crop at the workspace's patch size, (S, S, 3) uint8 RGB."""
        return self.get([record], store=store, keep=True)[0]

    def get(
        self,
        records: Sequence[PatchRecord],
        *,
        size: int | None = None,
        store: bool = True,
        progress: Callable[[int, int], None] | None = None,
        keep: bool = False,
    ) -> np.ndarray:
        """The crops of ``records`` in their order, (N, S, S, 3) uint8 RGB.

        Args:
            records: the patches.
            size: side of the returned crops (resampled by
                :func:`~trainkit.core.grid.resize_patch`); default the workspace's patch size.
            store: keep crops cut from photos in the crop store.
            progress: called as ``progress(done, total)`` as crops are ready.
            keep: keep the last decoded photos for later calls (see ``keep_photos``).

        Raises:
            PhotoMissingError: a photo that must be cut from is missing, unreadable or changed.
        """
        side = int(size or self.tile_px)
        out = np.empty((len(records), side, side, 3), dtype=np.uint8)
        total = len(records)
        done = 0
        todo: list[int] = []
        for i, r in enumerate(records):
            if r.crop and (self.ws.root / r.crop).is_file():
                out[i] = resize_patch(_read_file(self.ws.root / r.crop), side)
                done += 1
                if progress:
                    progress(done, total)
            else:
                todo.append(i)
        if not todo:
            return out
        sources = self._photo_sources({records[i].photo for i in todo})
        keys = {i: self._key(records[i], sources[records[i].photo]) for i in todo}
        stored = self.crops.get_many(keys.values())
        by_photo: dict[str, list[int]] = {}
        for i in todo:
            rgb = stored.get(keys[i])
            if rgb is not None and rgb.shape[0] == self.tile_px:
                out[i] = resize_patch(rgb, side)
                done += 1
                if progress:
                    progress(done, total)
            else:
                by_photo.setdefault(records[i].photo, []).append(i)
        for name, idx in by_photo.items():
            src = sources[name]
            image = self._photo(src, keep=keep)
            cut = [(i, cut_patch(image, records[i].box, self.tile_px, src.grid_px)) for i in idx]
            del image
            if store:
                self.crops.put_many((keys[i], rgb) for i, rgb in cut)
            for i, rgb in cut:
                out[i] = resize_patch(rgb, side)
                done += 1
                if progress:
                    progress(done, total)
        return out

    def store(
        self, records: Sequence[PatchRecord], *, progress: Callable[[int, int], None] | None = None
    ) -> int:
        """Cut and store the crops of ``records`` that have neither a crop file nor a stored
        crop, a photo at a time (memory stays one photo); returns how many were cut."""
        need = [r for r in records if not (r.crop and (self.ws.root / r.crop).is_file())]
        sources = self._photo_sources({r.photo for r in need})
        keys = [self._key(r, sources[r.photo]) for r in need]
        have = self.crops.has(keys)
        missing = [r for r, k in zip(need, keys, strict=True) if k not in have]
        skipped = len(records) - len(missing)
        by_photo: dict[str, list[PatchRecord]] = {}
        for r in missing:
            by_photo.setdefault(r.photo, []).append(r)
        done = skipped
        if progress:
            progress(done, len(records))
        for recs in by_photo.values():
            self.get(recs, store=True)
            done += len(recs)
            if progress:
                progress(done, len(records))
        return len(missing)

    # ----- inside ----------------------------------------------------------------------
    def _key(self, record: PatchRecord, src: _PhotoSource) -> str:
        return crop_key(src.sha256, record.box, src.grid_px, self.tile_px)

    def _photo_sources(self, names: set[str]) -> dict[str, _PhotoSource]:
        missing = [n for n in names if n not in self._sources]
        if missing:
            for row in self.ws.photo_sources(missing):
                self._sources[row["name"]] = _PhotoSource(
                    row["name"], row["source_path"], row["sha256"], row["grid_px"]
                )
        return {n: self._sources[n] for n in names}

    def _photo(self, src: _PhotoSource, *, keep: bool) -> np.ndarray:
        image = self._decoded.get(src.name)
        if image is not None:
            self._decoded.move_to_end(src.name)
            return image
        try:
            image = read_checked_photo(src.path, src.sha256, src.name, self.ws.root)
        except PhotoMissingError:  # re-pointed by `trainkit tile` since it was looked up?
            del self._sources[src.name]
            fresh = self._photo_sources({src.name})[src.name]
            if fresh.path == src.path:
                raise
            image = read_checked_photo(fresh.path, fresh.sha256, fresh.name, self.ws.root)
        if keep and self._keep:
            self._decoded[src.name] = image
            while len(self._decoded) > self._keep:
                self._decoded.popitem(last=False)
        return image


def read_checked_photo(path: str, sha256: str, name: str, ws_root: Path) -> np.ndarray:
    """A workspace photo decoded upright (Pillow, EXIF orientation applied), after checking
    that the file at ``path`` still has the SHA-256 it had when it was tiled.

    Raises:
        PhotoMissingError: the file is missing, unreadable or changed (one line: which
            photo, where it was looked for, and how to re-point the workspace).
    """
    from trainkit.core.decode import PhotoError, read_rgb

    repoint = (
        f"run `trainkit tile FOLDER --workspace {ws_root}` on the folder that holds it now "
        "(photos are recognised by their SHA-256, so the workspace is re-pointed, nothing is added twice)"
    )
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise PhotoMissingError(
            f"photo {name} is no longer at {path}, so its patches cannot be cut; {repoint}"
        ) from None
    except OSError as exc:
        raise PhotoMissingError(f"photo {name} at {path} cannot be read ({exc})") from None
    if hashlib.sha256(data).hexdigest() != sha256:
        raise PhotoMissingError(
            f"photo {name} at {path} changed since it was tiled (SHA-256 differs), so its "
            f"patches cannot be cut; put the original file back there, or if it moved, {repoint}"
        )
    try:
        # the size guard was passed (or raised by the user) when the photo was tiled, and
        # the checksum says this is that file
        return read_rgb(path, data=data, max_pixels=_TILED_MAX_PIXELS)
    except PhotoError as exc:
        raise PhotoMissingError(f"photo {name}: {exc}") from None


def _read_file(path: Path) -> np.ndarray:
    from PIL import Image

    with Image.open(path) as im:
        return np.asarray(im.convert("RGB"))
