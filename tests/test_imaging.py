"""Decoding to 8-bit RGB and the ground-sampling-distance arithmetic."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from trainkit.core.decode import PhotoError, list_images, read_rgb
from trainkit.intake.scale import FULL_FRAME_WIDTH_MM, gsd_mm_per_px


def test_gsd_worked_examples():
    # Pinhole relation, standard photogrammetry (shared REFERENCES): sensor 13.125 mm,
    # focal 15.4 mm, 100 m, 4608 px -> 18.4955 mm/px and a footprint of 85.2 m.
    g = gsd_mm_per_px(sensor_width_mm=13.125, distance_m=100, focal_mm=15.4, image_width_px=4608)
    assert g == pytest.approx(18.4955, abs=1e-4)
    assert g * 4608 / 1000 == pytest.approx(85.2, abs=0.05)
    # Sensor 6.17 mm, focal 5 mm, 4000 px, GSD 50 mm/px <-> distance 162.07 m.
    g2 = gsd_mm_per_px(sensor_width_mm=6.17, distance_m=162.07, focal_mm=5, image_width_px=4000)
    assert g2 == pytest.approx(50.0, abs=0.01)
    assert FULL_FRAME_WIDTH_MM == 36.0  # 35 mm-equivalent focal length uses the 36 mm width
    with pytest.raises(ValueError, match="focal_mm must be positive"):
        gsd_mm_per_px(sensor_width_mm=6.17, distance_m=1, focal_mm=0, image_width_px=4000)


@pytest.mark.parametrize("mode", ["L", "P", "CMYK", "RGBA", "RGB"])
def test_colour_modes_become_rgb8(tmp_path, mode):
    rgb = np.random.default_rng(0).integers(0, 255, (20, 30, 3), dtype=np.uint8)
    im = Image.fromarray(rgb).convert(mode)
    path = tmp_path / f"x.{'tif' if mode == 'CMYK' else 'png'}"
    im.save(path)
    out = read_rgb(path)
    assert out.shape == (20, 30, 3) and out.dtype == np.uint8
    np.testing.assert_array_equal(out, np.asarray(im.convert("RGB")))


def test_sixteen_bit_is_scaled(tmp_path):
    arr = np.array([[0, 257 * 100, 65535]], dtype=np.uint16)
    path = tmp_path / "g16.png"
    Image.fromarray(arr).save(path)
    out = read_rgb(path)
    assert out[0, :, 0].tolist() == [0, 100, 255]


def test_exif_orientation_is_applied(tmp_path):
    arr = np.zeros((10, 20, 3), np.uint8)
    arr[:, :5] = 255  # bright left edge
    im = Image.fromarray(arr)
    exif = im.getexif()
    exif[0x0112] = 6  # rotate 90 CW on display
    path = tmp_path / "o.jpg"
    im.save(path, exif=exif, quality=95)
    out = read_rgb(path)
    assert out.shape == (20, 10, 3)
    assert out[:5].mean() > 200  # left edge is now the top


def test_broken_files_say_which_and_why(tmp_path):
    (tmp_path / "empty.jpg").write_bytes(b"")
    with pytest.raises(PhotoError, match="empty.jpg cannot be decoded"):
        read_rgb(tmp_path / "empty.jpg")
    (tmp_path / "text.jpg").write_text("not an image")
    with pytest.raises(PhotoError, match="text.jpg"):
        read_rgb(tmp_path / "text.jpg")
    with pytest.raises(PhotoError, match="does not exist"):
        read_rgb(tmp_path / "missing.jpg")
    big = Image.new("L", (200, 200))
    big.save(tmp_path / "big.png")
    with pytest.raises(PhotoError, match="larger than the limit"):
        read_rgb(tmp_path / "big.png", max_pixels=1000)


def test_list_images(tmp_path):
    (tmp_path / "a").mkdir()
    for n in ("a/1.JPG", "a/2.png", "a/notes.txt", "3.tif"):
        (tmp_path / n).write_bytes(b"x")
    names = [p.name for p in list_images([tmp_path])]
    assert names == ["3.tif", "1.JPG", "2.png"]  # sorted by full path, suffix case-insensitive


def test_webp_and_sixteen_bit_tiff(tmp_path):
    rgb = np.random.default_rng(1).integers(0, 255, (16, 24, 3), dtype=np.uint8)
    Image.fromarray(rgb).save(tmp_path / "x.webp", lossless=True)
    np.testing.assert_array_equal(read_rgb(tmp_path / "x.webp"), rgb)
    grey16 = (np.arange(16 * 24, dtype=np.uint16).reshape(16, 24) * 170).astype(np.uint16)
    Image.fromarray(grey16).save(tmp_path / "g.tif")
    out = read_rgb(tmp_path / "g.tif")
    np.testing.assert_array_equal(out[..., 0], np.round(grey16 / 257.0).astype(np.uint8))


def test_sixteen_bit_rgb_png_written_by_opencv(tmp_path):
    """48-bit RGB PNG (written by OpenCV, a reference library) reduces to 8 bits per channel."""
    import cv2

    rgb16 = (np.random.default_rng(2).integers(0, 65535, (8, 8, 3))).astype(np.uint16)
    cv2.imwrite(str(tmp_path / "c.png"), rgb16[..., ::-1])  # OpenCV writes BGR
    out = read_rgb(tmp_path / "c.png")
    assert out.dtype == np.uint8 and out.shape == (8, 8, 3)
    assert np.max(np.abs(out.astype(int) - np.round(rgb16 / 257.0))) <= 1


def _jpeg_bytes(arr: np.ndarray, orientation: int = 1, mode: str = "RGB") -> bytes:
    import io

    im = Image.fromarray(arr).convert(mode)
    exif = Image.Exif()
    if orientation != 1:
        exif[0x0112] = orientation
    buf = io.BytesIO()
    im.save(buf, format="JPEG", quality=92, exif=exif.tobytes())
    return buf.getvalue()


@pytest.mark.parametrize("orientation", range(1, 9))
def test_fast_jpeg_path_matches_pillows_exif_transpose(tmp_path, monkeypatch, orientation):
    """OpenCV decode + our orientation steps against Pillow's decode + ImageOps.exif_transpose."""
    from trainkit.core.decode import read_rgb_fast

    rng = np.random.default_rng(orientation)
    base = (rng.random((48, 80, 3)) * 60 + np.linspace(0, 180, 80)[None, :, None]).astype(np.uint8)
    data = _jpeg_bytes(base, orientation)
    path = tmp_path / "f.jpg"
    path.write_bytes(data)
    want = read_rgb(path, data=data)
    import trainkit.core.decode as imaging

    def no_pillow(*_a, **_k):
        raise AssertionError("fell back to Pillow: the OpenCV path was not taken")

    monkeypatch.setattr(imaging, "read_rgb", no_pillow)
    got = read_rgb_fast(path, data=data)
    assert got.shape == want.shape and got.dtype == np.uint8
    # Two builds of the JPEG decoder: a level or two apart at most, never a different layout.
    assert np.abs(got.astype(int) - want.astype(int)).max() <= 3


def test_fast_jpeg_path_falls_back_for_grey_truncated_and_other_files(tmp_path):
    from trainkit.core.decode import read_rgb_fast

    arr = np.random.default_rng(0).integers(0, 255, (40, 40, 3), dtype=np.uint8)
    grey = _jpeg_bytes(arr, mode="L")
    p = tmp_path / "g.jpg"
    p.write_bytes(grey)
    assert np.array_equal(read_rgb_fast(p, data=grey), read_rgb(p, data=grey))
    cut = _jpeg_bytes(arr)[:-400]  # truncated: no end-of-image marker
    p.write_bytes(cut)
    with pytest.raises(PhotoError, match="cannot be decoded"):
        read_rgb_fast(p, data=cut)
    png = tmp_path / "x.png"
    Image.fromarray(arr).save(png)
    assert np.array_equal(read_rgb_fast(png, data=png.read_bytes()), arr)


@pytest.mark.parametrize("orientation", range(1, 9))
def test_luma_path_matches_pillows_grey_of_its_upright_colour(tmp_path, monkeypatch, orientation):
    """Tiling's luminance-only decode against Pillow: its decode, ImageOps.exif_transpose,
    then ``convert("L")`` (ITU-R 601-2 luma, Pillow's documented rule) as the reference."""
    from PIL import ImageOps

    import trainkit.core.decode as imaging
    from trainkit.core.decode import read_luma_fast

    rng = np.random.default_rng(10 + orientation)
    base = (rng.random((48, 80, 3)) * 60 + np.linspace(0, 180, 80)[None, :, None]).astype(np.uint8)
    base[..., 0] //= 2  # colour, not grey: the chroma is really left out
    data = _jpeg_bytes(base, orientation)
    path = tmp_path / "f.jpg"
    path.write_bytes(data)
    with Image.open(io.BytesIO(data)) as im:
        want = np.asarray(ImageOps.exif_transpose(im).convert("L"))

    def no_pillow(*_a, **_k):
        raise AssertionError("fell back to Pillow: the OpenCV path was not taken")

    monkeypatch.setattr(imaging, "read_rgb", no_pillow)
    got = read_luma_fast(path, data=data)
    assert got.shape == want.shape and got.dtype == np.uint8 and got.flags.c_contiguous
    # Y straight from the decoder against Y of the rounded RGB: nearly always equal; a
    # few levels apart only where a colour was clipped to 0-255 (measured: under 0.1 %
    # of pixels more than 1 apart, at most 6).
    diff = np.abs(got.astype(int) - want.astype(int))
    assert diff.mean() < 0.05 and (diff > 1).mean() < 0.005 and diff.max() <= 8


def test_luma_path_reads_grey_jpegs_and_hands_other_files_to_pillow(tmp_path):
    from trainkit.core.decode import read_luma_fast

    arr = np.random.default_rng(0).integers(0, 255, (40, 40, 3), dtype=np.uint8)
    grey = _jpeg_bytes(arr, mode="L")
    p = tmp_path / "g.jpg"
    p.write_bytes(grey)
    with Image.open(p) as im:
        want = np.asarray(im)  # an 8-bit grey JPEG: Pillow's own levels
    got = read_luma_fast(p, data=grey)
    assert got.shape == (40, 40) and np.abs(got.astype(int) - want.astype(int)).max() <= 1
    png = tmp_path / "x.png"
    Image.fromarray(arr).save(png)
    assert np.array_equal(read_luma_fast(png, data=png.read_bytes()), arr)  # RGB, as it is
    cut = _jpeg_bytes(arr)[:-400]
    p.write_bytes(cut)
    with pytest.raises(PhotoError, match="cannot be decoded"):
        read_luma_fast(p, data=cut)


def _with_header_size(data: bytes, width: int, height: int) -> bytes:
    """The JPEG with the frame size in its SOF0 header replaced (ITU T.81 B.2.2 layout)."""
    i = data.index(b"\xff\xc0")
    return data[: i + 5] + height.to_bytes(2, "big") + width.to_bytes(2, "big") + data[i + 9 :]


@pytest.mark.filterwarnings("ignore::PIL.Image.DecompressionBombWarning")
def test_fast_jpeg_path_refuses_crafted_sizes_like_pillows_path(tmp_path):
    """A header claiming 14000 x 14000 px (above Pillow's own bomb limit) in a few kB:
    one PhotoError, as read_rgb gives, never Pillow's own DecompressionBombError."""
    from trainkit.core.decode import read_rgb_fast

    arr = np.random.default_rng(1).integers(0, 255, (40, 40, 3), dtype=np.uint8)
    data = _with_header_size(_jpeg_bytes(arr), 14000, 14000)
    p = tmp_path / "bomb.jpg"
    p.write_bytes(data)
    with pytest.raises(PhotoError, match="larger than the limit"):
        read_rgb_fast(p, data=data, max_pixels=100_000_000)


def test_every_sixteen_bit_level_matches_the_float_rule(tmp_path):
    """All 65536 grey levels: the integer path gives round(v / 257) exactly (numpy's float
    rounding as the reference); 32-bit 'I' values outside 0-65535 are clipped."""
    levels = np.arange(65536, dtype=np.uint16).reshape(256, 256)
    Image.fromarray(levels).save(tmp_path / "all.png")
    out = read_rgb(tmp_path / "all.png")
    want = np.round(levels / 257.0).astype(np.uint8)
    np.testing.assert_array_equal(out[..., 0], want)
    np.testing.assert_array_equal(out[..., 2], want)
    wide = np.array([[-500, 0, 128, 129, 65535, 70000]], dtype=np.int32)
    Image.fromarray(wide, mode="I").save(tmp_path / "wide.tif")
    assert read_rgb(tmp_path / "wide.tif")[0, :, 1].tolist() == [0, 0, 0, 1, 255, 255]


@pytest.mark.parametrize("orientation", range(1, 9))
@pytest.mark.parametrize("mode", ["I;16", "L", "RGBA", "RGB"])
def test_orientation_applied_after_conversion_matches_pillow(tmp_path, orientation, mode):
    """The upright pixels equal Pillow's own ImageOps.exif_transpose followed by the colour rule
    (Pillow as the reference), for every EXIF orientation."""
    from PIL import ImageOps

    rng = np.random.default_rng(orientation)
    if mode == "I;16":
        im = Image.fromarray(rng.integers(0, 65535, (12, 20), dtype=np.uint16))
    else:
        im = Image.fromarray(rng.integers(0, 255, (12, 20, 3), dtype=np.uint8)).convert(mode)
    exif = Image.Exif()
    exif[0x0112] = orientation
    path = tmp_path / "o.png"
    im.save(path, exif=exif.tobytes())
    with Image.open(path) as ref:
        upright = ImageOps.exif_transpose(ref)
        if mode == "I;16":
            want = np.round(np.asarray(upright, dtype=np.float64) / 257.0).astype(np.uint8)
            want = np.repeat(want[..., None], 3, axis=2)
        else:
            want = np.asarray(upright.convert("RGB"))
    got = read_rgb(path)
    assert got.flags.writeable and got.dtype == np.uint8
    np.testing.assert_array_equal(got, want)


#: Prints the process's peak resident memory in kB: VmHWM of /proc/self/status (Linux,
#: proc(5)), which starts afresh at exec; getrusage's ru_maxrss keeps the high-water mark of
#: the process before exec (the forked test worker's, gigabytes under pytest-xdist).
PEAK_KB = (
    "print(next(int(line.split()[1]) for line in open('/proc/self/status') "
    "if line.startswith('VmHWM:')))"
)


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
def test_sixteen_bit_frame_decodes_without_eight_byte_floats(tmp_path):
    """Issue 27: a 16-bit grey frame went through float64 (8 bytes a pixel, several copies).
    An 8000 x 8000 16-bit PNG (64 Mpx, a few hundred kB) decoded in a fresh process peaked
    near 1.7 GB that way; the integer path holds the 2-byte image, a 1-byte grey copy and
    the 3-byte RGB result, about 0.4 GB. The bound is generous: 0.7 GB."""
    import subprocess
    import sys

    levels = np.full((8000, 8000), 30000, np.uint16)
    levels[1000:1100] = 5000
    Image.fromarray(levels).save(tmp_path / "g16.png", compress_level=1)
    code = (
        "from trainkit.core.decode import read_rgb; "
        f"a = read_rgb({str(tmp_path / 'g16.png')!r}); "
        "assert a.shape == (8000, 8000, 3) and a[1050, 5, 0] == 19 and a[0, 0, 0] == 117; "
        f"{PEAK_KB}"
    )
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    peak_mb = int(res.stdout) / 1024
    assert peak_mb < 700, f"decoding peaked at {peak_mb:.0f} MB"


def test_multi_page_file_notes_that_page_one_is_used(tmp_path):
    pages = [Image.fromarray(np.full((8, 8, 3), v, np.uint8)) for v in (10, 20, 30)]
    pages[0].save(tmp_path / "multi.tif", save_all=True, append_images=pages[1:])
    notes: list[str] = []
    out = read_rgb(tmp_path / "multi.tif", notes=notes)
    assert out[0, 0, 0] == 10
    assert notes == ["photo multi.tif has 3 pages; only page 1 is used"]
    single: list[str] = []
    read_rgb(tmp_path / "multi.tif", notes=single, data=(tmp_path / "multi.tif").read_bytes())
    assert single == notes
    Image.new("RGB", (8, 8)).save(tmp_path / "one.tif")
    none: list[str] = []
    read_rgb(tmp_path / "one.tif", notes=none)
    assert none == []


def test_find_images_reports_the_files_it_skips(tmp_path):
    from trainkit.core.decode import find_images

    (tmp_path / "sub").mkdir()
    for n in ("a.jpg", "sub/b.gif", "c.GIF", "notes.txt", ".hidden.gif"):
        (tmp_path / n).write_bytes(b"x")
    skipped: list = []
    found = find_images([tmp_path], skipped=skipped)
    assert [p.name for p, _ in found] == ["a.jpg"]
    assert sorted(p.name for p in skipped) == ["b.gif", "c.GIF", "notes.txt"]  # not hidden ones


def _png_header(width: int, height: int) -> bytes:
    """A PNG claiming width x height pixels in a few bytes (PNG spec: IHDR, then IDAT)."""
    import struct
    import zlib

    def chunk(kind, data):
        return (
            struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
        )

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\0" * 99))


def test_a_bomb_names_only_the_limit_that_applied_even_from_many_threads(tmp_path):
    """tile decodes in threads: each refusal names the kit's limit alone, never Pillow's own
    (178956970 pixels, twice its MAX_IMAGE_PIXELS default), and Pillow warns about nothing."""
    import sys
    import warnings
    from concurrent.futures import ThreadPoolExecutor

    p = tmp_path / "bomb.png"
    p.write_bytes(_png_header(20000, 20000))

    def refusal(_):
        try:
            read_rgb(p, max_pixels=250_000_000)
        except PhotoError as exc:
            return str(exc)
        return "no error"

    switch = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)  # threads interleave often, as under real decoding load
    try:
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            with ThreadPoolExecutor(8) as pool:
                messages = set(pool.map(refusal, range(400)))
    finally:
        sys.setswitchinterval(switch)
    assert messages == {
        "photo bomb.png is larger than the limit of 250000000 pixels (20000 x 20000 pixels); "
        "raise the limit if the file is trusted"
    }
    assert not [w for w in seen if issubclass(w.category, Image.DecompressionBombWarning)]
