"""Photo scale: ground sampling distance from camera geometry or EXIF, and which source wins."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

__all__ = [
    "gsd_mm_per_px",
    "FULL_FRAME_WIDTH_MM",
    "ExifInfo",
    "read_exif",
    "gsd_from_exif",
    "ScaleOptions",
    "resolve_scale",
]


#: Width of a 35 mm full-frame sensor, used with a 35 mm-equivalent focal length.
FULL_FRAME_WIDTH_MM = 36.0


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


# ----- EXIF ------------------------------------------------------------------------

_TAG_ORIENTATION = 0x0112
_IFD_EXIF = 0x8769
_TAG_FOCAL = 0x920A
_TAG_FOCAL_35 = 0xA405
_TAG_DATETIME_ORIGINAL = 0x9003
_TAG_DATETIME = 0x0132


@dataclass(frozen=True)
class ExifInfo:
    """The EXIF fields the kit uses; None where the file does not carry them."""

    focal_mm: float | None
    focal_35mm: float | None
    capture_date: str | None  # ISO date YYYY-MM-DD
    orientation: int | None


def read_exif(path: str | Path, *, data: bytes | None = None) -> ExifInfo:
    """Focal length, 35 mm-equivalent focal length, capture date and orientation tag."""
    import io

    from trainkit.core.decode import open_image

    try:  # the kit's size limit, not Pillow's (its warning or refusal of a large photo)
        with open_image(io.BytesIO(data) if data is not None else path) as im:
            exif = im.getexif()
            sub = exif.get_ifd(_IFD_EXIF)
    except Exception:  # unreadable EXIF is not an error: the photo just has no EXIF scale
        return ExifInfo(None, None, None, None)

    def num(v) -> float | None:
        try:
            f = float(v)
        except (TypeError, ValueError, ZeroDivisionError):
            return None
        return f if f > 0 else None

    date = None
    raw = sub.get(_TAG_DATETIME_ORIGINAL) or exif.get(_TAG_DATETIME)
    if isinstance(raw, str) and len(raw) >= 10 and raw[4] == ":" and raw[7] == ":":
        date = f"{raw[0:4]}-{raw[5:7]}-{raw[8:10]}"
    orient = exif.get(_TAG_ORIENTATION)
    return ExifInfo(
        focal_mm=num(sub.get(_TAG_FOCAL)),
        focal_35mm=num(sub.get(_TAG_FOCAL_35)),
        capture_date=date,
        orientation=int(orient) if isinstance(orient, int) else None,
    )


def gsd_from_exif(
    exif: ExifInfo,
    *,
    distance_m: float,
    image_width_px: int,
    sensor_width_mm: float | None = None,
) -> float | None:
    """Scale from EXIF and a camera-to-surface distance, or None when EXIF lacks the focal length.

    With the true focal length and a known sensor width, the pinhole relation is used
    directly; otherwise the 35 mm-equivalent focal length with the 36 mm full-frame
    width stands in (the two agree when focal_35mm = focal_mm x 36 / sensor width).
    """
    if exif.focal_mm and sensor_width_mm:
        return gsd_mm_per_px(
            sensor_width_mm=sensor_width_mm,
            distance_m=distance_m,
            focal_mm=exif.focal_mm,
            image_width_px=image_width_px,
        )
    if exif.focal_35mm:
        return gsd_mm_per_px(
            sensor_width_mm=FULL_FRAME_WIDTH_MM,
            distance_m=distance_m,
            focal_mm=exif.focal_35mm,
            image_width_px=image_width_px,
        )
    return None


@dataclass(frozen=True)
class ScaleOptions:
    """Command-line scale settings, used when the sidecar does not give a photo's scale."""

    gsd_mm: float | None = None
    distance_m: float | None = None
    focal_mm: float | None = None
    sensor_width_mm: float | None = None


def resolve_scale(
    rec: dict, image_width_px: int, options: ScaleOptions | float | None = None, exif=None
) -> tuple[float | None, str]:
    """Scale of one photo and where it came from, in order of precedence.

    1. sidecar ``gsd_mm`` ("sidecar"); 2. sidecar camera geometry ("sidecar-camera");
    3. option ``--gsd-mm`` ("option"); 4. option camera geometry ("option-camera");
    5. EXIF focal length with a distance from the sidecar or the options ("exif");
    otherwise no scale ("none").
    """
    if not isinstance(options, ScaleOptions):
        options = ScaleOptions(gsd_mm=options)
    if "gsd_mm" in rec:
        return float(rec["gsd_mm"]), "sidecar"
    if {"distance_m", "focal_mm", "sensor_width_mm"} <= rec.keys():
        return gsd_mm_per_px(
            sensor_width_mm=rec["sensor_width_mm"],
            distance_m=rec["distance_m"],
            focal_mm=rec["focal_mm"],
            image_width_px=image_width_px,
        ), "sidecar-camera"
    if options.gsd_mm:
        return float(options.gsd_mm), "option"
    distance = rec.get("distance_m", options.distance_m)
    sensor = rec.get("sensor_width_mm", options.sensor_width_mm)
    if distance and options.focal_mm and sensor:
        return gsd_mm_per_px(
            sensor_width_mm=sensor,
            distance_m=distance,
            focal_mm=options.focal_mm,
            image_width_px=image_width_px,
        ), "option-camera"
    if distance and exif is not None:
        g = gsd_from_exif(
            exif, distance_m=distance, image_width_px=image_width_px, sensor_width_mm=sensor
        )
        if g is not None:
            return g, "exif"
    return None, "none"
