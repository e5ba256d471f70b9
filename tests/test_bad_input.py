"""Bad input corpus for `trainkit tile` and label import, generated here (no committed binaries).

Each case checks the one `trainkit:` line naming the file and the reason, the exit code
(README: 0 all tiled, 1 some skipped, 2 nothing could be tiled) and that a skipped file
leaves no photo row and no crop folder behind.
"""

from __future__ import annotations

import csv
import io
import os
import re
import struct
import zlib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from trainkit.cli import main
from trainkit.core.taxonomy import load_class_set
from trainkit.intake.tiling import tile_into_workspace
from trainkit.labels.labels_io import LabelsIOError, import_csv
from trainkit.store.pixels import PatchPixels
from trainkit.store.workspace import Workspace

TILE = 64


def noise(h, w, seed=0):
    return np.random.default_rng(seed).integers(0, 255, (h, w, 3), dtype=np.uint8)


def png_bytes(arr) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return buf.getvalue()


def chunk(kind: bytes, data: bytes) -> bytes:
    # PNG chunk layout and CRC-32 over type + data: PNG specification (ISO/IEC 15948), 5.3;
    # zlib.crc32 is the same CRC-32 (ISO 3309).
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def bad_crc_png() -> bytes:
    """A valid PNG with one byte inside the IDAT chunk's data flipped (its CRC no longer fits)."""
    data = bytearray(png_bytes(noise(48, 64, seed=3)))
    i = data.find(b"IDAT")
    (n,) = struct.unpack(">I", data[i - 4 : i])
    data[i + 4 + n // 2] ^= 0xFF
    stored_crc = struct.unpack(">I", data[i + 4 + n : i + 8 + n])[0]
    assert zlib.crc32(bytes(data[i : i + 4 + n])) != stored_crc  # the corruption is real
    return bytes(data)


def bomb_png(width=100_000, height=100_000) -> bytes:
    """A tiny PNG whose IHDR (with a correct CRC) claims width x height RGB pixels."""
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    idat = zlib.compress(b"\x00" * 16)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", idat) + chunk(b"IEND", b"")


def bomb_bmp(width=100_000, height=100_000) -> bytes:
    """A 54-byte BMP header (BITMAPINFOHEADER, 24 bit) claiming width x height pixels."""
    # BMP file and info header fields in order; image size 0 is allowed for uncompressed data.
    info = struct.pack("<IiiHHIIiiII", 40, width, height, 1, 24, 0, 0, 2835, 2835, 0, 0)
    return b"BM" + struct.pack("<IHHI", 54, 0, 0, 54) + info


def tile_cli(args, capsys) -> tuple[int, list[str]]:
    code = main(["-q", "tile", *map(str, args), "--tile-px", str(TILE), "--workers", "1"])
    err = capsys.readouterr().err
    return code, err.splitlines()


def stored(ws_dir: Path) -> tuple[list[str], list[str]]:
    """Photo names in the workspace and the photos its patch rows belong to (tiling writes
    no crop files: a patches/ folder must not appear)."""
    ws = Workspace.open(ws_dir)
    names = [r["name"] for r in ws.photos()]
    assert not (ws_dir / "patches").exists()
    return names, sorted({r.photo for r in ws.patches()})


def good_photo(folder: Path, name="good.png", h=100, w=150) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    p = folder / name
    p.write_bytes(png_bytes(noise(h, w, seed=sum(name.encode()))))  # distinct content per name
    return p


# ----- corrupt and hostile files --------------------------------------------------------

BOMB_REASON = (
    r"is larger than the limit of 250000000 pixels \(.+\); raise the limit if the file is trusted"
)

CASES = {
    # name: (bytes maker, regex of the reason after "trainkit: photo NAME ")
    "badcrc.png": (
        bad_crc_png,
        r"cannot be decoded \(broken data stream when reading image file\)",
    ),
    "bomb.png": (bomb_png, BOMB_REASON),
    "bomb.bmp": (bomb_bmp, BOMB_REASON),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_bad_file_next_to_a_good_one_is_skipped_with_exit_1(tmp_path, capsys, name):
    make, reason = CASES[name]
    folder = tmp_path / "in"
    good_photo(folder)
    data = make()
    assert len(data) < 10_000  # tiny on disk, whatever it claims
    (folder / name).write_bytes(data)
    code, lines = tile_cli([folder, "--workspace", tmp_path / "ws"], capsys)
    assert code == 1
    assert len(lines) == 1
    assert re.fullmatch(rf"trainkit: photo {re.escape(name)} {reason}; skipped", lines[0]), lines
    names, dirs = stored(tmp_path / "ws")
    assert names == ["good.png"] and dirs == ["good.png"]  # only the good photo's patches


@pytest.mark.parametrize("name", sorted(CASES))
def test_only_bad_files_exit_2_and_store_nothing(tmp_path, capsys, name):
    make, reason = CASES[name]
    folder = tmp_path / "in"
    folder.mkdir()
    (folder / name).write_bytes(make())
    code, lines = tile_cli([folder, "--workspace", tmp_path / "ws"], capsys)
    assert code == 2
    assert len(lines) == 1 and re.fullmatch(
        rf"trainkit: photo {re.escape(name)} {reason}; skipped", lines[0]
    )
    assert stored(tmp_path / "ws") == ([], [])


def test_bomb_is_refused_before_decoding(tmp_path):
    # tile_into_workspace directly: the 10^10-pixel claim is refused from the header alone
    # (decoding it would need 30 GB), with the file named.
    (tmp_path / "bomb.png").write_bytes(bomb_png())
    ws = Workspace.create(tmp_path / "ws", class_set=load_class_set("presence"), tile_px=TILE)
    res = tile_into_workspace([tmp_path / "bomb.png"], ws, workers=1)
    assert res["photos_added"] == 0 and res["photos_skipped"] == 1
    assert res["problems"][0].startswith("photo bomb.png is larger than the limit")
    assert "(100000 x 100000 pixels)" in res["problems"][0]  # the size it claimed


# ----- tiny photos ---------------------------------------------------------------------


@pytest.mark.parametrize("h,w", [(1, 1), (40, 50), (TILE - 1, TILE)])
def test_photo_smaller_than_one_patch_gives_one_padded_patch(tmp_path, capsys, h, w):
    folder = tmp_path / "in"
    arr = noise(h, w, seed=h * 1000 + w)
    folder.mkdir()
    (folder / "tiny.png").write_bytes(png_bytes(arr))
    code, lines = tile_cli([folder, "--workspace", tmp_path / "ws"], capsys)
    assert code == 0 and lines == []
    ws = Workspace.open(tmp_path / "ws")
    (photo,) = ws.photos()
    assert (photo["name"], photo["width"], photo["height"]) == ("tiny.png", w, h)
    (patch,) = ws.patches()
    assert patch.box == (0, 0, w, h)  # the true extent is recorded
    crop = PatchPixels(ws).one(patch)  # cut from the photo on demand
    # Reference: numpy's own edge padding of the photo to one full patch.
    ref = np.pad(arr, [(0, TILE - h), (0, TILE - w), (0, 0)], mode="edge")
    np.testing.assert_array_equal(crop, ref)


# ----- file names and folders ----------------------------------------------------------


def test_non_utf8_file_name_does_not_crash_and_is_named(tmp_path, capsys):
    folder = tmp_path / "in"
    good_photo(folder, name="a.png")
    bad = os.path.join(os.fsencode(folder), b"bad\xff.png")
    with open(bad, "wb") as fh:
        fh.write(png_bytes(noise(70, 70, seed=5)))
    good_photo(folder, name="z.png")  # after the odd name in sorted order: must still be tiled
    code, lines = tile_cli([folder, "--workspace", tmp_path / "ws"], capsys)
    assert "Traceback" not in "\n".join(lines)
    assert code == 1, lines
    assert lines == [
        "trainkit: photo bad\\xff.png has a file name that is not valid UTF-8; skipped (rename it)"
    ]
    names, dirs = stored(tmp_path / "ws")
    assert names == ["a.png", "z.png"] and len(dirs) == 2


def test_symlink_loop_in_a_folder_terminates_and_tiles_each_photo_once(tmp_path, capsys):
    folder = tmp_path / "in"
    good_photo(folder / "sub", name="a.png")
    good_photo(folder, name="b.png", h=64, w=64)
    os.symlink(folder, folder / "sub" / "loop")  # sub/loop -> in: a cycle
    os.symlink(folder / "self", folder / "self")  # a link to itself (ELOOP when followed)
    code, lines = tile_cli([folder, "--workspace", tmp_path / "ws"], capsys)
    assert code == 0 and lines == []
    names, dirs = stored(tmp_path / "ws")
    assert sorted(names) == ["b.png", "sub/a.png"] and len(dirs) == 2


# ----- label CSV property test ---------------------------------------------------------

COLUMNS = ("photo", "x0", "y0", "x1", "y1", "label")
CLASSES = load_class_set("orientation").names
# a.png is 64 x 64 and b.png 40 x 32 at 32 px: a has four tiles, b two (the second shifted
# inward to end at the border, x 8..40), so a box of one is not a box of the other.
BOXES = {
    "a.png": [(0, 0, 32, 32), (32, 0, 64, 32), (0, 32, 32, 64), (32, 32, 64, 64)],
    "sub/b.png": [(0, 0, 32, 32), (8, 0, 40, 32)],
}


@pytest.fixture(scope="module")
def label_ws(tmp_path_factory):
    root = tmp_path_factory.mktemp("labels")
    good_photo(root / "in", name="a.png", h=64, w=64)
    good_photo(root / "in" / "sub", name="b.png", h=32, w=40)
    ws = Workspace.create(root / "ws", class_set=load_class_set("orientation"), tile_px=32)
    found = [root / "in" / "a.png", root / "in" / "sub" / "b.png"]
    tile_into_workspace(found, ws, workers=1, roots={p: root / "in" for p in found})
    assert {k: sorted(b for (n, b) in ws.patch_lookup() if n == k) for k in BOXES} == {
        k: sorted(v) for k, v in BOXES.items()
    }
    return ws


BAD_PHOTOS = [
    "nope.png",
    "../a.png",
    "sub/../a.png",
    "/tmp/a.png",
    "sub\\b.png",
    "",
    "A.PNG",
    " a.png",
]


@st.composite
def label_row(draw):
    """(fields by column, fields kept, photo and box valid?), known by construction."""
    ok = True
    if draw(st.booleans()):
        photo = draw(st.sampled_from(sorted(BOXES)))
    else:
        photo, ok = draw(st.sampled_from(BAD_PHOTOS)), False
    box_kind = draw(st.sampled_from(["own", "own", "other", "float", "empty", "word"]))
    if box_kind == "own" and photo in BOXES:
        box = [str(v) for v in draw(st.sampled_from(BOXES[photo]))]
    elif box_kind == "other" or box_kind == "own":
        box, ok = ["0", "0", "31", "32"], False  # no photo has this box
        if photo in BOXES:
            other = "sub/b.png" if photo == "a.png" else "a.png"
            box = [str(v) for v in BOXES[other][-1]]
    else:
        box, ok = ["0", "0", {"float": "32.0", "empty": "", "word": "x"}[box_kind], "32"], False
    label = draw(st.sampled_from([*CLASSES, "", " vertical ", "bogus", "Horizontal", "crack"]))
    fields = dict(zip(COLUMNS, [photo, *box, label], strict=True))
    # Missing fields: the row stops early (a missing label is an empty one: no answer).
    keep = draw(st.sampled_from([6, 6, 6, 5, 3, 1]))
    return fields, keep, ok


def _expected_import(rows, order, lookup, last):
    """What the importer must do with these rows, worked out row by row from its rules.

    Returns (first bad line or None, label events to add in order). Rules (labels_io's
    docstring): a row with every field blank is skipped; the place must be valid; an empty
    or missing label is skipped; a label must be a class name (or ``unsure``); a patch
    named again with the same label counts once, with another label is an error; a label
    the same reviewer and origin gave the patch last is not added again.
    """
    seen = {}
    for line, (fields, keep, ok) in enumerate(rows, start=2):  # line 1 is the header
        present = {c: fields[c] for c in order[:keep]}
        if not any(v.strip() for v in present.values()):
            continue
        if not ok or set(order[keep:]) - {"label"}:
            return line, None
        label = present.get("label", "").strip()
        if not label:
            continue
        if label not in CLASSES:
            return line, None
        pid = lookup[(fields["photo"], tuple(int(fields[k]) for k in ("x0", "y0", "x1", "y1")))]
        if seen.setdefault(pid, label) != label:
            return line, None
    return None, [(pid, lab) for pid, lab in seen.items() if last.get(pid, "-") != lab]


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    rows=st.lists(label_row(), min_size=1, max_size=8),
    order=st.permutations(COLUMNS),
)
def test_label_import_is_all_or_nothing_with_the_line_number(
    label_ws, tmp_path_factory, rows, order
):
    path = label_ws.root / "labels.csv"
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(order)
        for fields, keep, _ in rows:
            present = order[:keep]
            w.writerow([fields[c] for c in present])
    before = label_ws.label_events()
    last = {
        e["patch_id"]: e["label"]
        for e in before
        if (e["reviewer"], e["origin"]) == ("import", "file")
    }
    bad_line, want = _expected_import(rows, order, label_ws.patch_lookup(), last)
    if bad_line is None:
        n = import_csv(label_ws, path)
        after = label_ws.label_events()
        assert n == len(want) and len(after) == len(before) + n
        assert [(e["patch_id"], e["label"]) for e in after[len(before) :]] == want
    else:
        with pytest.raises(LabelsIOError, match=rf"^labels\.csv line {bad_line}: "):
            import_csv(label_ws, path)
        assert label_ws.label_events() == before  # nothing from a failed import
