"""Decode photos to 8-bit RGB arrays, and the scale (ground sampling distance) arithmetic.

Colour rule: EXIF orientation is applied first; then grey, palette, CMYK and RGBA
images become 8-bit RGB (alpha is dropped, not composited); 16-bit images are
scaled to 8 bits by their full range (value / 257).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

__all__ = [
    "PhotoError",
    "IMAGE_SUFFIXES",
    "read_rgb",
    "gsd_mm_per_px",
    "FULL_FRAME_WIDTH_MM",
    "list_images",
]

IMAGE_SUFFIXES = (".jpg", ".jpeg", ".png", ".tif", ".tiff", ".webp", ".bmp")

#: Width of a 35 mm full-frame sensor, used with a 35 mm-equivalent focal length.
FULL_FRAME_WIDTH_MM = 36.0

#: Largest image Pillow may open, in pixels (Pillow's own default is about 89 Mpx).
DEFAULT_MAX_PIXELS = 250_000_000


class PhotoError(ValueError):
    """A photo that cannot be used; the message says which file and why."""


def read_rgb(path: str | Path, *, max_pixels: int = DEFAULT_MAX_PIXELS) -> np.ndarray:
    """Read an image file as an (H, W, 3) uint8 RGB array with EXIF orientation applied.

    Raises:
        PhotoError: the file is missing, unreadable, truncated or too large.
    """
    path = Path(path)
    old_limit = Image.MAX_IMAGE_PIXELS
    Image.MAX_IMAGE_PIXELS = max_pixels
    try:
        with Image.open(path) as im:
            im.load()
            im = ImageOps.exif_transpose(im)
            return _to_rgb8(im)
    except FileNotFoundError:
        raise PhotoError(f"photo {path} does not exist") from None
    except Image.DecompressionBombError as exc:
        raise PhotoError(
            f"photo {path.name} is larger than the limit of {max_pixels} pixels ({exc}); "
            "raise the limit if the file is trusted"
        ) from None
    except (OSError, SyntaxError, ValueError) as exc:
        raise PhotoError(f"photo {path.name} cannot be decoded ({exc})") from None
    finally:
        Image.MAX_IMAGE_PIXELS = old_limit


def _to_rgb8(im: Image.Image) -> np.ndarray:
    if im.mode in ("I;16", "I;16B", "I;16L", "I"):
        arr = np.asarray(im, dtype=np.float64)
        arr = np.clip(np.round(arr / 257.0), 0, 255).astype(np.uint8)
        return np.repeat(arr[..., None], 3, axis=2)
    if im.mode != "RGB":
        im = im.convert("RGB")
    return np.asarray(im, dtype=np.uint8).copy()


def gsd_mm_per_px(
    *, sensor_width_mm: float, distance_m: float, focal_mm: float, image_width_px: int
) -> float:
    """Ground sampling distance in mm per pixel by the pinhole relation.

    GSD = sensor width x distance / (focal length x image width in pixels), with the
    distance converted to mm.
    """
    for name, v in (
        ("sensor_width_mm", sensor_width_mm),
        ("distance_m", distance_m),
        ("focal_mm", focal_mm),
        ("image_width_px", image_width_px),
    ):
        if not v > 0:
            raise ValueError(f"{name} must be positive, got {v}")
    return sensor_width_mm * distance_m * 1000.0 / (focal_mm * image_width_px)


def list_images(paths: list[Path]) -> list[Path]:
    """Expand files and folders (recursively, sorted) into image files by suffix."""
    out: list[Path] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            out.extend(
                sorted(
                    q for q in p.rglob("*") if q.is_file() and q.suffix.lower() in IMAGE_SUFFIXES
                )
            )
        elif p.is_file():
            out.append(p)
        else:
            raise PhotoError(f"{p} does not exist")
    return out
