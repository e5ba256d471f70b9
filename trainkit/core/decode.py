"""Decode photos and frames to 8-bit RGB arrays with EXIF orientation applied.

Colour rule: grey, palette, CMYK and RGBA images become 8-bit RGB through Pillow's
conversions (alpha is dropped, not composited; CMYK uses Pillow's plain inversion, no
colour profile); 16-bit grey is scaled by its full range (round(value / 257), computed in
integers; 32-bit integer grey is clipped to 0-255 after the same scaling); 16-bit RGB is
reduced to 8 bits by Pillow the same way. EXIF orientation is then applied to the 8-bit
pixels (the same steps as Pillow's ``ImageOps.exif_transpose``). A file with several pages
or frames (a multi-page TIFF, an animated WebP or PNG) gives its first one, and says so.

Memory: the conversion runs in strips of rows, so a frame costs Pillow's decoded image plus
the 8-bit result and nothing else: 16-bit grey 3 bytes a pixel (2 + 1), then 4 while the
grey is expanded to RGB; 8-bit colour 7 (Pillow keeps RGB in 4 bytes a pixel). Needs only
numpy and Pillow; OpenCV, when installed, speeds up plain JPEGs (3 bytes a pixel).
"""

from __future__ import annotations

import io
import threading
import warnings
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np
from PIL import Image, UnidentifiedImageError

from trainkit.core.errors import TrainkitError

IMAGE_SUFFIXES = (".jpg", ".jpeg", ".png", ".tif", ".tiff", ".webp", ".bmp")


#: Largest image Pillow may open, in pixels (Pillow's own default is about 89 Mpx).
DEFAULT_MAX_PIXELS = 250_000_000
#: Pixels converted at a time (rows of the frame): bounds the conversion's extra memory.
_STRIP_PIXELS = 4_000_000
_INTEGER_GREY = ("I;16", "I;16B", "I;16L", "I")
#: Formats whose extra frames are not further pages of the photo (a phone's MPO JPEG holds
#: the photo first and previews or depth maps after it): no note for those.
_NOT_PAGES = ("MPO",)


class PhotoError(TrainkitError):
    """A photo that cannot be used; the message says which file and why."""


#: Held while Pillow's size limit is lifted: Image.MAX_IMAGE_PIXELS is one global, and
#: threads that lifted and restored it in turn left others opening under Pillow's limit.
_PILLOW_LIMIT = threading.Lock()


def open_image(src: str | Path | io.BytesIO) -> Image.Image:
    """``Image.open`` (the header read, nothing decoded) without Pillow's own size check.

    Pillow warns (a multi-line warning on stderr) between its limit and twice it and
    refuses above that; the kit checks sizes against its own limit instead, so Pillow's
    check is lifted for the open, under a lock so that threads never see it restored early.
    Its DecompressionBombWarning is ignored there too.
    """
    with _PILLOW_LIMIT:
        old_limit = Image.MAX_IMAGE_PIXELS
        Image.MAX_IMAGE_PIXELS = None
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", Image.DecompressionBombWarning)
                return Image.open(src)
        finally:
            Image.MAX_IMAGE_PIXELS = old_limit


class _TooLarge(Exception):
    """The header's size is above the kit's limit."""


@contextmanager
def _opened(path: Path, data: bytes | None, max_pixels: int) -> Iterator[Image.Image]:
    """Pillow's image of the file (header read, pixels not yet decoded); every failure while
    it is open, in the ``with`` body too, becomes one :class:`PhotoError` naming the file.
    The size is checked here against ``max_pixels``, from the header, before anything decodes.
    """
    try:
        with open_image(io.BytesIO(data) if data is not None else path) as im:
            if im.width * im.height > max_pixels:
                raise _TooLarge(f"{im.width} x {im.height} pixels")
            yield im
    except PhotoError:
        raise
    except FileNotFoundError:
        raise PhotoError(f"photo {path} does not exist") from None
    except _TooLarge as exc:
        raise PhotoError(
            f"photo {path.name} is larger than the limit of {max_pixels} pixels ({exc}); "
            "raise the limit if the file is trusted"
        ) from None
    except Image.DecompressionBombError as exc:  # Pillow's own check (a crop's size)
        raise PhotoError(f"photo {path.name} is too large to decode ({exc})") from None
    except UnidentifiedImageError:
        what = (
            "an empty file"
            if data == b"" or (data is None and _size(path) == 0)
            else "not an image"
        )
        raise PhotoError(
            f"photo {path.name} cannot be decoded ({what} in a format Pillow reads)"
        ) from None
    except MemoryError:
        raise PhotoError(
            f"photo {path.name} cannot be decoded (not enough free memory for its pixels)"
        ) from None
    except (OSError, SyntaxError, ValueError, EOFError) as exc:
        raise PhotoError(f"photo {path.name} cannot be decoded ({exc})") from None


def _note_pages(im: Image.Image, path: Path, notes: list[str] | None) -> None:
    pages = getattr(im, "n_frames", 1) if im.format not in _NOT_PAGES else 1
    if notes is not None and pages > 1:
        notes.append(f"photo {path.name} has {pages} pages; only page 1 is used")


def read_rgb(
    path: str | Path,
    *,
    max_pixels: int = DEFAULT_MAX_PIXELS,
    data: bytes | None = None,
    notes: list[str] | None = None,
) -> np.ndarray:
    """Read an image file as an (H, W, 3) uint8 RGB array with EXIF orientation applied.

    Args:
        path: the file (named in error messages even when ``data`` is given).
        max_pixels: decompression-bomb limit; larger images are refused.
        data: the file's bytes, if already read (saves a second read when hashing).
        notes: when given, things worth saying about the file are appended (e.g. that it
            has several pages and only the first is used).

    Raises:
        PhotoError: the file is missing, unreadable, truncated or too large.
    """
    path = Path(path)
    with _opened(path, data, max_pixels) as im:
        _note_pages(im, path, notes)
        orientation = im.getexif().get(0x0112, 1)
        im.load()
        pixels = _to_array8(im)
        im.close()  # frees Pillow's pixels now (leaving the block only closes the file)
    _give_back(pixels)
    return _as_rgb(_upright(pixels, orientation))


def read_rgb_reduced(
    path: str | Path,
    *,
    data: bytes,
    scale: float,
    max_pixels: int = DEFAULT_MAX_PIXELS,
    notes: list[str] | None = None,
) -> tuple[np.ndarray, tuple[int, int, float] | None]:
    """A JPEG decoded at reduced size (the decoder's 1/2, 1/4 or 1/8 modes) when the caller
    needs at most ``scale`` of its width; any other file as :func:`read_rgb` gives it.

    Returns:
        (rgb, None) at full size, or (rgb, (full_height, full_width, k)) when reduced, k
        being full-size pixels per decoded pixel (upright sizes: EXIF orientation applied).

    Raises:
        PhotoError: as :func:`read_rgb` (also for a truncated JPEG or a bomb's header).
    """
    path = Path(path)
    if data[:2] != b"\xff\xd8" or not scale < 1:
        return read_rgb(path, data=data, max_pixels=max_pixels, notes=notes), None
    with _opened(path, data, max_pixels) as im:
        _note_pages(im, path, notes)
        w0, h0 = im.size
        orientation = im.getexif().get(0x0112, 1)
        im.draft("RGB", (max(1, int(w0 * scale)), max(1, int(h0 * scale))))
        im.load()
        pixels = _to_array8(im)
        im.close()
    _give_back(pixels)
    rgb = _as_rgb(_upright(pixels, orientation))
    full_w, full_h = (h0, w0) if orientation in (5, 6, 7, 8) else (w0, h0)
    if rgb.shape[1] >= full_w:  # the decoder did not reduce
        return rgb, None
    return rgb, (full_h, full_w, full_w / rgb.shape[1])


#: After decoding a frame this large (pixels), the freed memory is handed back at once.
_GIVE_BACK_PIXELS = 16_000_000


def _give_back(pixels: np.ndarray) -> None:
    """Return the memory Pillow freed to the system (glibc's malloc_trim) after a large frame.

    Pillow allocates a decoded image row by row; once the process has freed a few large
    numpy buffers, glibc keeps such freed rows in its heaps instead of returning them, so a
    large frame's decoded image would stay resident beside its RGB copy, and one more per
    decoding thread. Without glibc nothing happens.
    """
    if pixels.shape[0] * pixels.shape[1] < _GIVE_BACK_PIXELS:
        return
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass


def image_pixels(path: str | Path) -> int | None:
    """Width x height from the file's header (nothing decoded), or None if it cannot be read."""
    try:
        with open_image(path) as im:
            return int(im.width) * int(im.height)
    except Exception:  # the decode that follows words the error
        return None


#: EXIF orientation -> numpy steps that make the pixels upright (what PIL's exif_transpose does);
#: they work on (H, W) grey and (H, W, 3) colour arrays alike and return views.
_ORIENT = {
    2: lambda a: a[:, ::-1],
    3: lambda a: a[::-1, ::-1],
    4: lambda a: a[::-1],
    5: lambda a: a.swapaxes(0, 1),
    6: lambda a: np.rot90(a, -1),
    7: lambda a: a[::-1, ::-1].swapaxes(0, 1),
    8: lambda a: np.rot90(a, 1),
}


def _upright(a: np.ndarray, orientation: int) -> np.ndarray:
    step = _ORIENT.get(orientation)
    return a if step is None else step(a)


def _as_rgb(a: np.ndarray) -> np.ndarray:
    """(H, W, 3) uint8, C-contiguous and writable: grey is expanded, a view is copied."""
    if a.ndim == 2:
        out = np.empty((*a.shape, 3), dtype=np.uint8)
        out[...] = a[..., None]
        return out
    if a.flags.c_contiguous and a.flags.writeable:
        return a
    return np.ascontiguousarray(a)


def _plain_jpeg(data: bytes, max_pixels: int, modes: tuple[str, ...]) -> tuple | None:
    """(cv2, (width, height), EXIF orientation) when OpenCV may decode ``data``, else None.

    A complete JPEG (start and end-of-image markers) of one of ``modes`` and at most
    ``max_pixels``, with OpenCV installed; anything odd is left to Pillow's path, which
    decides and words the error.
    """
    if not (data[:2] == b"\xff\xd8" and data.rstrip(b"\x00")[-2:] == b"\xff\xd9"):
        return None
    try:  # the header only
        with open_image(io.BytesIO(data)) as im:
            if im.format != "JPEG" or im.mode not in modes:
                return None
            size = im.size
            orientation = im.getexif().get(0x0112, 1)
    except Exception:
        return None
    try:  # OpenCV is optional here: the Screener's own install has only Pillow
        import cv2
    except ImportError:
        return None
    if size[0] * size[1] > max_pixels:
        return None
    return cv2, size, orientation


def read_rgb_fast(
    path: str | Path,
    *,
    data: bytes,
    max_pixels: int = DEFAULT_MAX_PIXELS,
    notes: list[str] | None = None,
) -> np.ndarray:
    """:func:`read_rgb` with OpenCV's JPEG decoder for complete 8-bit colour JPEGs.

    About 2.5x faster than Pillow's path on 12-megapixel frames (benchmarks/run.py
    scan); pixels may differ from Pillow's by a level or two (two builds of the JPEG
    decoder). Anything else (other formats, greyscale or CMYK JPEG, a file without the
    end-of-image marker, a decoder failure) goes through :func:`read_rgb`, so errors
    and the colour rule stay the same.
    """
    plain = _plain_jpeg(data, max_pixels, ("RGB",))
    if plain is not None:
        cv2, size, orientation = plain
        flags = cv2.IMREAD_COLOR | cv2.IMREAD_IGNORE_ORIENTATION
        bgr = cv2.imdecode(np.frombuffer(data, np.uint8), flags)
        if bgr is not None and bgr.shape[:2] == (size[1], size[0]):
            rgb = cv2.cvtColor(bgr, cv2.COLOR_BGR2RGB, dst=bgr)  # in place: one buffer
            step = _ORIENT.get(orientation)
            return rgb if step is None else np.ascontiguousarray(step(rgb))
    return read_rgb(path, data=data, max_pixels=max_pixels, notes=notes)


def read_luma_fast(
    path: str | Path,
    *,
    data: bytes,
    max_pixels: int = DEFAULT_MAX_PIXELS,
    notes: list[str] | None = None,
) -> np.ndarray:
    """The photo's grey levels, upright: (H, W) uint8 for a complete 8-bit JPEG, else RGB.

    A colour or grey JPEG is decoded by OpenCV to its luminance alone (the JPEG's Y
    channel, ITU-R BT.601 weights, the same as the RGB-to-grey conversion of
    ``cv2.cvtColor`` and of Pillow's ``convert("L")`` up to a level of rounding), which
    skips the chroma and the colour conversion: about half the time of a colour decode of a
    12-megapixel frame. Anything else goes through :func:`read_rgb` and comes back as
    (H, W, 3) RGB, so callers that only need grey levels must accept both.
    """
    plain = _plain_jpeg(data, max_pixels, ("RGB", "L"))
    if plain is not None:
        cv2, size, orientation = plain
        flags = cv2.IMREAD_GRAYSCALE | cv2.IMREAD_IGNORE_ORIENTATION
        grey = cv2.imdecode(np.frombuffer(data, np.uint8), flags)
        if grey is not None and grey.shape[:2] == (size[1], size[0]):
            step = _ORIENT.get(orientation)
            return grey if step is None else np.ascontiguousarray(step(grey))
    return read_rgb(path, data=data, max_pixels=max_pixels, notes=notes)


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return -1


def _to_array8(im: Image.Image) -> np.ndarray:
    """The loaded image as uint8: (H, W) for grey (8-bit, or 16/32-bit integer scaled by
    round(v / 257)), else (H, W, 3) RGB; converted strip by strip (see the module docstring)."""
    w, h = im.size
    rows = max(1, _STRIP_PIXELS // max(w, 1))
    whole = rows >= h

    def strips() -> Iterator[tuple[int, Image.Image]]:
        if whole:
            yield 0, im
            return
        for y0 in range(0, h, rows):
            yield y0, im.crop((0, y0, w, min(h, y0 + rows)))

    if im.mode in _INTEGER_GREY or im.mode == "L":
        out = np.empty((h, w), dtype=np.uint8)
        for y0, part in strips():
            a = np.asarray(part)
            if im.mode != "L":  # round(v / 257) exactly: (v + 128) // 257 for integers
                wide: np.ndarray = a.astype(np.int64 if im.mode == "I" else np.uint32)
                wide += 128
                wide //= 257
                a = np.clip(wide, 0, 255)
            out[y0 : y0 + a.shape[0]] = a
        return out
    out = np.empty((h, w, 3), dtype=np.uint8)
    for y0, part in strips():
        a = np.asarray(part if part.mode == "RGB" else part.convert("RGB"))
        out[y0 : y0 + a.shape[0]] = a
    return out


def list_images(paths: list[Path]) -> list[Path]:
    """Expand files and folders (recursively, sorted) into image files by suffix."""
    return [p for p, _ in find_images(paths)]


def skipped_files_line(skipped: list[Path]) -> str:
    """One line on the files :func:`find_images` left out: how many, by suffix, an example."""
    by_suffix = Counter(q.suffix.lower() or "(no suffix)" for q in skipped)
    kinds = ", ".join(f"{n} {s}" for s, n in sorted(by_suffix.items(), key=lambda t: (-t[1], t[0])))
    files = f"{len(skipped)} file" + ("" if len(skipped) == 1 else "s")
    return (
        f"{files} skipped: not a photo format the kit reads ({kinds}; "
        f"e.g. {skipped[0]}); it reads {', '.join(IMAGE_SUFFIXES)}"
    )


def find_images(
    paths: list[Path], *, skipped: list[Path] | None = None
) -> list[tuple[Path, Path | None]]:
    """Image files under the given files and folders, each with the folder it was found in.

    Folders are searched recursively in sorted order; symbolic links to folders are not
    followed (no loops). A file given directly has no folder (None). Suffixes are matched
    case-insensitively against IMAGE_SUFFIXES; other files in a folder are left out, and
    listed in ``skipped`` when it is given (hidden files, whose names start with a dot,
    are not listed).
    """
    out: list[tuple[Path, Path | None]] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            found, other = [], []
            for q in p.rglob("*"):
                if q.suffix.lower() in IMAGE_SUFFIXES:
                    if q.is_file():
                        found.append(q)
                elif skipped is not None and not q.name.startswith(".") and q.is_file():
                    other.append(q)
            out.extend((q, p) for q in sorted(found))
            if skipped is not None:
                skipped.extend(sorted(other))
        elif p.is_file():
            out.append((p, None))
        else:
            raise PhotoError(f"{p} does not exist")
    return out
