"""Decode photos and frames to 8-bit RGB arrays with EXIF orientation applied.

Colour rule: EXIF orientation is applied first; then grey, palette, CMYK and RGBA
images become 8-bit RGB through Pillow's conversions (alpha is dropped, not
composited; CMYK uses Pillow's plain inversion, no colour profile); 16-bit grey is
scaled by its full range (round(value / 257)); 16-bit RGB is reduced to 8 bits by
Pillow the same way. Memory: the decoded image and one array copy are held, no more.
Needs only numpy and Pillow; OpenCV, when installed, speeds up plain JPEGs.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from trainkit.core.errors import TrainkitError

IMAGE_SUFFIXES = (".jpg", ".jpeg", ".png", ".tif", ".tiff", ".webp", ".bmp")


#: Largest image Pillow may open, in pixels (Pillow's own default is about 89 Mpx).
DEFAULT_MAX_PIXELS = 250_000_000


class PhotoError(TrainkitError):
    """A photo that cannot be used; the message says which file and why."""


def read_rgb(
    path: str | Path, *, max_pixels: int = DEFAULT_MAX_PIXELS, data: bytes | None = None
) -> np.ndarray:
    """Read an image file as an (H, W, 3) uint8 RGB array with EXIF orientation applied.

    Args:
        path: the file (named in error messages even when ``data`` is given).
        max_pixels: decompression-bomb limit; larger images are refused.
        data: the file's bytes, if already read (saves a second read when hashing).

    Raises:
        PhotoError: the file is missing, unreadable, truncated or too large.
    """
    import io

    path = Path(path)
    old_limit = Image.MAX_IMAGE_PIXELS
    Image.MAX_IMAGE_PIXELS = max_pixels
    try:
        src = io.BytesIO(data) if data is not None else path
        with Image.open(src) as im:
            if im.width * im.height > max_pixels:
                raise Image.DecompressionBombError(f"{im.width} x {im.height} pixels")
            im.load()
            upright = ImageOps.exif_transpose(im)
            return _to_rgb8(upright)
    except FileNotFoundError:
        raise PhotoError(f"photo {path} does not exist") from None
    except Image.DecompressionBombError as exc:
        raise PhotoError(
            f"photo {path.name} is larger than the limit of {max_pixels} pixels ({exc}); "
            "raise the limit if the file is trusted"
        ) from None
    except UnidentifiedImageError:
        what = (
            "an empty file"
            if data == b"" or (data is None and _size(path) == 0)
            else "not an image"
        )
        raise PhotoError(
            f"photo {path.name} cannot be decoded ({what} in a format Pillow reads)"
        ) from None
    except (OSError, SyntaxError, ValueError) as exc:
        raise PhotoError(f"photo {path.name} cannot be decoded ({exc})") from None
    finally:
        Image.MAX_IMAGE_PIXELS = old_limit


#: EXIF orientation -> numpy steps that make the pixels upright (what PIL's exif_transpose does).
_ORIENT = {
    2: lambda a: a[:, ::-1],
    3: lambda a: a[::-1, ::-1],
    4: lambda a: a[::-1],
    5: lambda a: a.transpose(1, 0, 2),
    6: lambda a: np.rot90(a, -1),
    7: lambda a: a[::-1, ::-1].transpose(1, 0, 2),
    8: lambda a: np.rot90(a, 1),
}


def read_rgb_fast(
    path: str | Path, *, data: bytes, max_pixels: int = DEFAULT_MAX_PIXELS
) -> np.ndarray:
    """:func:`read_rgb` with OpenCV's JPEG decoder for complete 8-bit colour JPEGs.

    About 2.5x faster than Pillow's path on 12-megapixel frames (benchmarks/run.py
    scan); pixels may differ from Pillow's by a level or two (two builds of the JPEG
    decoder). Anything else (other formats, greyscale or CMYK JPEG, a file without the
    end-of-image marker, a decoder failure) goes through :func:`read_rgb`, so errors
    and the colour rule stay the same.
    """
    import io

    if data[:2] == b"\xff\xd8" and data.rstrip(b"\x00")[-2:] == b"\xff\xd9":
        old_limit = Image.MAX_IMAGE_PIXELS
        Image.MAX_IMAGE_PIXELS = None  # the size is checked below against max_pixels
        try:
            with Image.open(io.BytesIO(data)) as im:  # reads the header only
                plain = im.format == "JPEG" and im.mode == "RGB"
                size = im.size
                orientation = im.getexif().get(0x0112, 1) if plain else 1
        except Exception:  # anything odd: Pillow's path decides and words the error
            plain = False
        finally:
            Image.MAX_IMAGE_PIXELS = old_limit
        try:  # OpenCV is optional here: the Screener's own install has only Pillow
            import cv2
        except ImportError:
            plain = False
        if plain and size[0] * size[1] <= max_pixels:
            flags = cv2.IMREAD_COLOR | cv2.IMREAD_IGNORE_ORIENTATION
            bgr = cv2.imdecode(np.frombuffer(data, np.uint8), flags)
            if bgr is not None and bgr.shape[:2] == (size[1], size[0]):
                rgb = cv2.cvtColor(
                    bgr, cv2.COLOR_BGR2RGB, dst=bgr
                )  # in place: one frame-sized buffer
                step = _ORIENT.get(orientation)
                return rgb if step is None else np.ascontiguousarray(step(rgb))
    return read_rgb(path, data=data, max_pixels=max_pixels)


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return -1


def _to_rgb8(im: Image.Image) -> np.ndarray:
    if im.mode in ("I;16", "I;16B", "I;16L", "I"):
        arr = np.asarray(im, dtype=np.float64)
        arr = np.clip(np.round(arr / 257.0), 0, 255).astype(np.uint8)
        return np.repeat(arr[..., None], 3, axis=2)
    if im.mode != "RGB":
        im = im.convert("RGB")
    return np.array(im, dtype=np.uint8)


def list_images(paths: list[Path]) -> list[Path]:
    """Expand files and folders (recursively, sorted) into image files by suffix."""
    return [p for p, _ in find_images(paths)]


def find_images(paths: list[Path]) -> list[tuple[Path, Path | None]]:
    """Image files under the given files and folders, each with the folder it was found in.

    Folders are searched recursively in sorted order; symbolic links to folders are not
    followed (no loops). A file given directly has no folder (None). Suffixes are matched
    case-insensitively against IMAGE_SUFFIXES; other files in a folder are ignored.
    """
    out: list[tuple[Path, Path | None]] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            found = sorted(
                q for q in p.rglob("*") if q.suffix.lower() in IMAGE_SUFFIXES and q.is_file()
            )
            out.extend((q, p) for q in found)
        elif p.is_file():
            out.append((p, None))
        else:
            raise PhotoError(f"{p} does not exist")
    return out
