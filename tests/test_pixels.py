"""Patches by reference: crops cut on demand from the photo, the crop store, the v2 migration.

The reference for "the crops an older kit stored" is that kit's own rule, written out here
as it was (decode with Pillow, EXIF orientation applied; crop the grid box, edge-padded to
the box side; resample a box of another side with OpenCV's area filter when shrinking,
bilinear when enlarging), with the crop saved as an uncompressed TIFF and read back.
EXIF orientation 6 is checked against Pillow's own ``ImageOps.exif_transpose``.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import cv2
import numpy as np
import pytest
from PIL import Image, ImageOps

from trainkit.core.errors import TrainkitNote
from trainkit.core.grid import crop as grid_crop
from trainkit.core.grid import iter_patch_boxes
from trainkit.core.taxonomy import load_class_set
from trainkit.store import pixels as pixels_mod
from trainkit.store.cropstore import CropStore, crop_key
from trainkit.store.pixels import PatchPixels, PhotoMissingError, cut_patch
from trainkit.store.workspace import Workspace


def _photo(path: Path, h: int, w: int, seed: int, orientation: int = 1) -> Path:
    rng = np.random.default_rng(seed)
    img = cv2.GaussianBlur(rng.integers(0, 255, (h, w, 3), dtype=np.uint8), (5, 5), 0)
    exif = Image.Exif()
    if orientation != 1:
        exif[0x0112] = orientation
    Image.fromarray(img).save(path, quality=90, exif=exif.tobytes())
    return path


def _old_kit_crops(path: Path, tile_px: int, src_px: int, folder: Path) -> list[np.ndarray]:
    """The crops the version-2 kit wrote for a photo (its tiling rule, TIFF round trip)."""
    with Image.open(path) as im:
        image = np.asarray(ImageOps.exif_transpose(im).convert("RGB"))
    out = []
    h, w = image.shape[:2]
    for pb in iter_patch_boxes(h, w, src_px, src_px):
        patch = grid_crop(image, pb.box, src_px)
        if src_px != tile_px:
            interp = cv2.INTER_AREA if src_px > tile_px else cv2.INTER_LINEAR
            patch = cv2.resize(patch, (tile_px, tile_px), interpolation=interp)
        f = folder / f"old-{path.stem}-{pb.row}-{pb.col}.tiff"
        Image.fromarray(patch).save(f, format="TIFF")
        with Image.open(f) as im:
            out.append(np.asarray(im.convert("RGB")))
    return out


def _add_by_reference(ws: Workspace, path: Path, src_px: int, name: str | None = None) -> None:
    """Rows as tiling now writes them: no crop file, the grid's box side recorded."""
    import hashlib

    data = path.read_bytes()
    with Image.open(path) as im:
        w, h = ImageOps.exif_transpose(im).size
    rows = [
        {"row": pb.row, "col": pb.col, "x0": pb.x0, "y0": pb.y0, "x1": pb.x1, "y1": pb.y1,
         "crop": "", "focus": 100.0, "clipped": 0.0, "flags": ""}
        for pb in iter_patch_boxes(h, w, src_px, src_px)
    ]  # fmt: skip
    ws.add_photo_with_patches(
        name=name or path.name, source_path=str(path.resolve()), width=w, height=h,
        gsd_mm=None, group_id=path.stem, sha256=hashlib.sha256(data).hexdigest(),
        patches=rows, grid_px=src_px,
    )  # fmt: skip


@pytest.fixture
def ws(tmp_path):
    return Workspace.create(tmp_path / "ws", class_set=load_class_set("orientation"), tile_px=32)


@pytest.mark.parametrize(
    ("h", "w", "orientation", "src_px"),
    [
        (70, 100, 1, 32),  # border boxes shifted to fit
        (70, 100, 6, 32),  # EXIF: rotate 90 degrees clockwise to view
        (70, 100, 1, 45),  # a box of 45 px shrunk to 32 (tiling by physical size)
        (70, 100, 8, 24),  # a box of 24 px enlarged to 32, EXIF rotated the other way
        (20, 26, 1, 32),  # a photo smaller than one box: edge-padded
    ],
)
def test_on_demand_crops_equal_the_crops_the_old_kit_stored(
    ws, tmp_path, h, w, orientation, src_px
):
    photo = _photo(tmp_path / "p.jpg", h, w, seed=h + w + orientation, orientation=orientation)
    want = _old_kit_crops(photo, 32, src_px, tmp_path)
    _add_by_reference(ws, photo, src_px)
    recs = ws.patches()
    assert len(recs) == len(want) > 0
    got = PatchPixels(ws).get(recs)
    for rec, a, b in zip(recs, got, want, strict=True):
        assert np.array_equal(a, b), rec.box
    assert not (ws.root / "patches").exists() or not any((ws.root / "patches").iterdir())


def test_exif_rotation_is_pillows(tmp_path):
    # Pillow's exif_transpose is the reference for the orientation rule (EXIF 2.32, tag 274).
    photo = _photo(tmp_path / "r.jpg", 40, 60, seed=3, orientation=6)
    from trainkit.core.decode import read_rgb

    with Image.open(photo) as im:
        assert np.array_equal(read_rgb(photo), np.asarray(ImageOps.exif_transpose(im)))
        assert read_rgb(photo).shape == (60, 40, 3)


def test_crops_are_stored_once_and_read_back_without_decoding(ws, tmp_path, monkeypatch):
    photo = _photo(tmp_path / "p.jpg", 64, 96, seed=1)
    _add_by_reference(ws, photo, 32)
    recs = ws.patches()
    first = PatchPixels(ws).get(recs)
    assert CropStore(ws.root).stats()["crops"] == len(recs) == 6

    def no_decoding(*_a, **_k):
        raise AssertionError("decoded the photo although its crops were stored")

    monkeypatch.setattr(pixels_mod, "read_checked_photo", no_decoding)
    again = PatchPixels(ws).get(recs)
    assert np.array_equal(again, first)
    # resampled on the way out, as resize_patch does (Pillow bilinear)
    small = PatchPixels(ws).get(recs[:1], size=16)
    want = np.asarray(Image.fromarray(first[0]).resize((16, 16), Image.Resampling.BILINEAR))
    assert np.array_equal(small[0], want)


def test_store_false_keeps_nothing_and_store_cuts_only_what_is_missing(ws, tmp_path):
    photo = _photo(tmp_path / "p.jpg", 64, 96, seed=2)
    _add_by_reference(ws, photo, 32)
    recs = ws.patches()
    PatchPixels(ws).get(recs, store=False)
    assert CropStore(ws.root).stats()["crops"] == 0
    seen = []
    assert PatchPixels(ws).store(recs[:2], progress=lambda d, n: seen.append((d, n))) == 2
    assert seen[-1] == (2, 2)
    assert PatchPixels(ws).store(recs) == 4  # the first two are not cut again
    assert CropStore(ws.root).stats()["crops"] == 6


def test_a_retiled_photo_finds_its_crops_by_content(ws, tmp_path, monkeypatch):
    photo = _photo(tmp_path / "p.jpg", 64, 64, seed=4)
    _add_by_reference(ws, photo, 32)
    first = PatchPixels(ws).get(ws.patches())
    # the same file tiled again under another name (moved, re-tiled): same keys, no decode
    _add_by_reference(ws, photo, 32, name="elsewhere/p.jpg")
    monkeypatch.setattr(pixels_mod, "read_checked_photo", lambda *a, **k: 1 / 0)
    again = PatchPixels(ws).get([r for r in ws.patches() if r.photo == "elsewhere/p.jpg"])
    assert np.array_equal(again, first)


def test_a_damaged_store_entry_is_dropped_and_cut_again(ws, tmp_path):
    photo = _photo(tmp_path / "p.jpg", 32, 64, seed=5)
    _add_by_reference(ws, photo, 32)
    recs = ws.patches()
    good = PatchPixels(ws).get(recs)
    con = sqlite3.connect(ws.root / "crops.sqlite")
    with con:  # another valid PNG of other pixels under the first key
        other = cv2.imencode(".png", np.zeros((32, 32, 3), np.uint8))[1].tobytes()
        con.execute("UPDATE crops SET png = ? WHERE id = 1", (other,))
    con.close()
    assert np.array_equal(PatchPixels(ws).get(recs), good)


def test_a_changed_or_missing_photo_is_refused_with_what_to_do(ws, tmp_path):
    photo = _photo(tmp_path / "p.jpg", 32, 64, seed=6)
    _add_by_reference(ws, photo, 32)
    recs = ws.patches()
    _photo(photo, 32, 64, seed=7)  # other content at the same path
    with pytest.raises(PhotoMissingError, match=r"photo p\.jpg at .* changed since it was tiled"):
        PatchPixels(ws).get(recs)
    photo.unlink()
    with pytest.raises(PhotoMissingError, match=r"no longer at .*run `trainkit tile FOLDER"):
        PatchPixels(ws).get(recs)


def test_crop_key_is_the_content_address():
    # Same photo bytes and box give one key; any change of photo, box or sides another.
    a = crop_key("ab" * 32, (0, 0, 32, 32), 32, 32)
    assert a == crop_key("ab" * 32, [0, 0, 32, 32], 32, 32)
    others = {
        crop_key("cd" * 32, (0, 0, 32, 32), 32, 32),
        crop_key("ab" * 32, (32, 0, 64, 32), 32, 32),
        crop_key("ab" * 32, (0, 0, 32, 32), 45, 32),
        crop_key("ab" * 32, (0, 0, 32, 32), 32, 64),
    }
    assert a not in others and len(others) == 4


def test_cut_patch_defaults_to_the_tile_side_for_small_boxes():
    img = np.arange(10 * 12 * 3, dtype=np.uint8).reshape(10, 12, 3)
    out = cut_patch(img, (0, 0, 12, 10), 16)
    assert out.shape == (16, 16, 3)
    assert np.array_equal(out[:10, :12], img) and np.array_equal(out[15, 15], img[9, 11])


def test_a_version_2_workspace_opens_and_keeps_using_its_crop_files(tmp_path):
    from _helpers import make_ws

    ws = make_ws(tmp_path / "ws", 2, 3, size=32, gsd_mm=0.5)
    want = {r.id: np.asarray(Image.open(ws.root / r.crop).convert("RGB")) for r in ws.patches()}
    con = sqlite3.connect(ws.db_path)
    with con:  # back to what version 2 had: no grid_px column, version 2
        con.execute("ALTER TABLE photos DROP COLUMN grid_px")
        con.execute("UPDATE meta SET value = '2' WHERE key = 'schema_version'")
    con.close()
    with pytest.warns(TrainkitNote, match=r"upgraded to format 3.*its 6 crop files .* still used"):
        again = Workspace.open(ws.root)
    assert again.meta("schema_version") == "3" and again.meta("migrated_from_2")
    recs = again.patches()
    got = PatchPixels(again).get(recs)
    assert all(np.array_equal(g, want[r.id]) for r, g in zip(recs, got, strict=True))
    assert CropStore(again.root).stats()["crops"] == 0  # crop files are used as they are
    photo = _photo(tmp_path / "new.jpg", 32, 64, seed=8)
    _add_by_reference(again, photo, 32)  # a new photo by reference beside the old ones
    new = [r for r in again.patches() if r.photo == "new.jpg"]
    assert PatchPixels(again).get(new).shape == (2, 32, 32, 3)
    assert all(r.patch_mm == 16.0 for r in recs)  # 32 px x 0.5 mm


def test_summary_counts_equal_the_records(tmp_path):
    # The SQL summary against the same counts made from every PatchRecord.
    from _helpers import make_ws

    ws = make_ws(tmp_path / "ws", 3, 4, skip=[3])
    ids = [r.id for r in ws.patches()]
    ws.add_labels([(ids[0], "none"), (ids[1], "map"), (ids[2], None), (ids[5], "vertical")],
                  reviewer="ana")  # fmt: skip
    ws.add_labels([(ids[0], "horizontal")], reviewer="bo")
    ws.set_split({ids[0]: "train", ids[1]: "test", ids[2]: "val", ids[5]: "val"}, {})
    ws.record_pick(
        [{"patch_id": i, "reason": "spread", "score": None} for i in (ids[6], ids[8])],
        seed=0, model=None, design={},
    )  # fmt: skip
    ws.add_labels([(ids[8], "none")], reviewer="ana")
    s = ws.summary()
    assert s["picked"] == {"patches": 2, "unanswered": 1}
    recs = ws.patches()
    assert s["patches"] == len(recs) == 12 and s["photos"] == 3
    want = dict.fromkeys(ws.class_set.names, 0)
    for r in recs:
        if r.label is not None:
            want[r.label] += 1
    assert s["labeled"] == want and want["horizontal"] == 1 and want["none"] == 1
    assert s["unsure"] == sum(r.labelled and r.label is None for r in recs) == 1
    assert s["unlabeled"] == sum(not r.labelled for r in recs) == 7
    assert s["splits"] == {"train": 1, "val": 1, "test": 1}
    assert s["left_out_of_review"] == sum(r.review_skip for r in recs) == 3
    assert s["flagged"] == sum(bool(r.flags) for r in recs)


def test_the_command_line_prints_the_upgrade_note_once(tmp_path):
    import subprocess
    import sys

    from _helpers import make_ws

    ws = make_ws(tmp_path / "ws", 1, 2, size=32)
    con = sqlite3.connect(ws.db_path)
    with con:
        con.execute("UPDATE meta SET value = '2' WHERE key = 'schema_version'")
    con.close()
    run = [sys.executable, "-m", "trainkit", "status", str(ws.root)]
    first = subprocess.run(run, capture_output=True, text=True, check=True)
    notes = [line for line in first.stderr.splitlines() if line.startswith("trainkit: note:")]
    assert len(notes) == 1 and "upgraded to format 3" in notes[0], first.stderr
    second = subprocess.run(run, capture_output=True, text=True, check=True)
    assert "note:" not in second.stderr


def test_a_photo_re_pointed_while_a_session_runs_is_found_at_its_new_place(ws, tmp_path):
    photo = _photo(tmp_path / "p.jpg", 32, 64, seed=9)
    _add_by_reference(ws, photo, 32)
    recs = ws.patches()
    pixels = PatchPixels(ws)
    first = pixels.get(recs[:1], store=False)  # the photo's place is now known to it
    moved = tmp_path / "moved.jpg"
    photo.rename(moved)
    ws.set_source_path("p.jpg", str(moved))  # what `trainkit tile` on the new folder does
    assert np.array_equal(pixels.get(recs[:1], store=False), first)
