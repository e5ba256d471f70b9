"""Reading a firm's crack drawings: mask images, SVG centrelines and centreline CSV, or one-line refusals.

- A mask is a single-channel image in a lossless format (PNG, TIFF, BMP, WebP, PGM/PBM)
  at the photo's size; non-zero = crack. A JPEG mask is refused (its compression leaves
  stray non-zero pixels along every edge), so is a colour one (which channel would be the
  crack?). An EXIF orientation in the mask is applied, as for photos.
- An SVG drawing holds ``<polyline>``, ``<line>`` and ``<path>`` elements in the photo's
  pixel coordinates (user units = pixels: a root ``viewBox``, if any, must be
  ``0 0 WIDTH HEIGHT`` of the photo). ``transform`` attributes (matrix, translate, scale,
  rotate, skewX, skewY) are applied; curves (C, S, Q, T) are flattened to short chords; an
  arc (A) is refused. ``stroke-width`` (attribute or style, inherited, in px or plain
  numbers, scaled by the transform) is the crack's width; without one the width is
  unknown. Each subpath is one crack. Hidden elements (``display:none``), definitions
  (``defs``, ``clipPath``, ``mask``, ``symbol``, ``marker``, ``pattern``) and the
  embedded photo (``image``) are not cracks; other shapes (``rect``, ``circle``,
  ``polygon``, ``text``, ``use``, ...) are counted and named in a note. Documents that
  declare entities are refused (entity expansion is how XML files are made to explode).
- A centreline CSV has columns ``photo, crack_id, x, y`` and optionally ``width_px``: one
  row per vertex, a crack's vertices in drawing order.

Every refusal is a :class:`DrawingError` naming the file (and line or element) and what
would be accepted.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from trainkit.core.errors import TrainkitError

__all__ = [
    "DrawingError",
    "MASK_SUFFIXES",
    "Polyline",
    "SvgDrawing",
    "read_mask",
    "mask_size",
    "read_svg",
    "read_centreline_csv",
    "check_inside",
]

#: Suffixes of mask files (lossless formats Pillow reads).
MASK_SUFFIXES = (".png", ".tif", ".tiff", ".bmp", ".webp", ".pgm", ".pbm", ".pnm")
_LOSSY_SUFFIXES = (".jpg", ".jpeg", ".jpe", ".jfif")
#: Pillow modes of a single-channel image.
_SINGLE_CHANNEL = ("1", "L", "P", "I", "I;16", "I;16B", "I;16L", "F")
#: Largest mask Pillow may open, in pixels (a mask must match its photo, which tiling checked).
_MAX_MASK_PIXELS = 10**10


class DrawingError(TrainkitError):
    """A crack drawing that cannot be read or does not fit its photo; nothing was imported."""


@dataclass(frozen=True)
class Polyline:
    """One traced crack: vertices in photo pixels and, when the drawing gives them, widths.

    Attributes:
        points: (K, 2) x, y in the photo's continuous pixel coordinates.
        widths: (K,) crack width in pixels per vertex, or None when not given.
        crack_id: the drawing's name for it (an SVG element id, a CSV crack_id).
    """

    points: np.ndarray
    widths: np.ndarray | None
    crack_id: str


# ----- masks -----------------------------------------------------------------------------


def _open_mask(path: Path, data: bytes | None):
    """Pillow's image of a mask (header read, nothing decoded) and its EXIF orientation."""
    from PIL import UnidentifiedImageError

    from trainkit.core.decode import open_image

    if path.suffix.lower() in _LOSSY_SUFFIXES:
        raise DrawingError(
            f"mask {path} is a JPEG: lossy compression leaves stray non-zero pixels along "
            "every crack edge; save masks as PNG or TIFF (single channel, non-zero = crack)"
        )
    try:
        im = open_image(io.BytesIO(data) if data is not None else path)
    except (UnidentifiedImageError, OSError, ValueError) as exc:
        raise DrawingError(f"mask {path} cannot be read as an image ({exc})") from None
    if im.format == "JPEG":
        im.close()
        raise DrawingError(
            f"mask {path} holds a JPEG image (lossy); save masks as PNG or TIFF "
            "(single channel, non-zero = crack)"
        )
    if im.mode not in _SINGLE_CHANNEL:
        im.close()
        raise DrawingError(
            f"mask {path} has {len(im.getbands())} channels ({im.mode}); a mask is one "
            "channel (greyscale, 1-bit or palette indices), non-zero = crack"
        )
    if im.width * im.height > _MAX_MASK_PIXELS:
        im.close()
        raise DrawingError(f"mask {path} is {im.width} x {im.height}: too large")
    return im, int(im.getexif().get(0x0112, 1) or 1)


def mask_size(path: Path) -> tuple[int, int]:
    """(width, height) of a mask file, upright, from its header (nothing decoded).

    Raises:
        DrawingError: not a readable single-channel lossless image.
    """
    im, orientation = _open_mask(path, None)
    im.close()
    return (im.height, im.width) if orientation in (5, 6, 7, 8) else (im.width, im.height)


def read_mask(path: Path, data: bytes, size: tuple[int, int]) -> np.ndarray:
    """A mask as an (H, W) bool array (non-zero = crack), checked against its photo's size.

    Args:
        path: the file (for messages).
        data: its bytes.
        size: the photo's (width, height), upright.

    Raises:
        DrawingError: unreadable, lossy, not single-channel, or not the photo's size.
    """
    from PIL import ImageOps

    im, orientation = _open_mask(path, data)
    try:
        if orientation != 1:
            im = ImageOps.exif_transpose(im)
        if (im.width, im.height) != tuple(size):
            raise DrawingError(
                f"mask {path} is {im.width} x {im.height} pixels, its photo {size[0]} x "
                f"{size[1]}; a mask must be drawn at the photo's size"
            )
        try:
            return np.asarray(im) != 0
        except (OSError, ValueError) as exc:  # a truncated or corrupt file, found on decoding
            raise DrawingError(f"mask {path} cannot be decoded ({exc})") from None
    finally:
        im.close()


# ----- SVG -------------------------------------------------------------------------------

_NUMBER = re.compile(r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?")
_PATH_TOKEN = re.compile(r"([MmLlHhVvCcSsQqTtAaZz])|" + _NUMBER.pattern)
_NOT_DRAWN = {"defs", "clipPath", "mask", "symbol", "marker", "pattern", "metadata", "title",
              "desc", "style", "script", "linearGradient", "radialGradient", "filter"}  # fmt: skip
_CONTAINERS = {"svg", "g", "a", "switch"}
_NOT_CRACKS_QUIET = {"image"}
_CRACK_ELEMENTS = {"polyline", "line", "path"}
_PARAMS = {"M": 2, "L": 2, "H": 1, "V": 1, "C": 6, "S": 4, "Q": 4, "T": 2, "A": 7, "Z": 0}


@dataclass
class SvgDrawing:
    """The cracks of an SVG drawing and the other shapes it held (not taken as cracks)."""

    cracks: list[Polyline] = field(default_factory=list)
    ignored: dict[str, int] = field(default_factory=dict)


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1] if isinstance(tag, str) else ""


def _style(el) -> dict[str, str]:
    out = {}
    for part in (el.get("style") or "").split(";"):
        if ":" in part:
            k, v = part.split(":", 1)
            out[k.strip()] = v.strip()
    return out


def _prop(el, name: str) -> str | None:
    return _style(el).get(name, el.get(name))


def _transform(text: str, where: str) -> np.ndarray:
    """The 3 x 3 matrix of an SVG ``transform`` list (applied right to left, as SVG does)."""
    m = np.eye(3)
    for name, args in re.findall(r"([A-Za-z]+)\s*\(([^)]*)\)", text):
        v = [float(x) for x in _NUMBER.findall(args)]
        if name == "matrix" and len(v) == 6:
            t = np.array([[v[0], v[2], v[4]], [v[1], v[3], v[5]], [0, 0, 1]])
        elif name == "translate" and len(v) in (1, 2):
            t = np.array([[1, 0, v[0]], [0, 1, v[1] if len(v) == 2 else 0.0], [0, 0, 1]])
        elif name == "scale" and len(v) in (1, 2):
            t = np.diag([v[0], v[1] if len(v) == 2 else v[0], 1.0])
        elif name == "rotate" and len(v) in (1, 3):
            a = math.radians(v[0])
            r = np.array([[math.cos(a), -math.sin(a), 0], [math.sin(a), math.cos(a), 0], [0, 0, 1]])
            if len(v) == 3:
                cx, cy = v[1], v[2]
                t = np.array([[1, 0, cx], [0, 1, cy], [0, 0, 1]]) @ r
                t = t @ np.array([[1, 0, -cx], [0, 1, -cy], [0, 0, 1]])
            else:
                t = r
        elif name in ("skewX", "skewY") and len(v) == 1:
            k = math.tan(math.radians(v[0]))
            t = np.array([[1, k, 0], [0, 1, 0], [0, 0, 1]]) if name == "skewX" else (
                np.array([[1, 0, 0], [k, 1, 0], [0, 0, 1]]))  # fmt: skip
        else:
            raise DrawingError(
                f"{where}: cannot read transform {name}({args.strip()}); expected matrix(6 "
                "numbers), translate, scale, rotate, skewX or skewY"
            )
        m = m @ t
    return m


def _width(value: str | None, where: str) -> float | None:
    if value is None or value.strip() in ("", "inherit"):
        return None
    v = value.strip()
    m = re.fullmatch(r"(" + _NUMBER.pattern + r")\s*(px)?", v)
    if not m:
        raise DrawingError(
            f"{where}: stroke-width {v!r} is not in pixels; give a plain number or px "
            "(the drawing's units are the photo's pixels)"
        )
    w = float(m.group(1))
    if not (w > 0 and math.isfinite(w)):
        raise DrawingError(f"{where}: stroke-width {v!r} must be a positive number of pixels")
    return w


def _bezier(ctrl: np.ndarray) -> np.ndarray:
    """Points along a Bezier curve (control points (n, 2)), its start left out."""
    span = float(np.sum(np.hypot(*np.diff(ctrl, axis=0).T)))
    steps = int(min(256, max(4, math.ceil(span / 4.0))))
    t = np.linspace(0.0, 1.0, steps + 1)[1:, None]
    if len(ctrl) == 3:
        return (1 - t) ** 2 * ctrl[0] + 2 * (1 - t) * t * ctrl[1] + t**2 * ctrl[2]
    return (
        (1 - t) ** 3 * ctrl[0]
        + 3 * (1 - t) ** 2 * t * ctrl[1]
        + 3 * (1 - t) * t**2 * ctrl[2]
        + t**3 * ctrl[3]
    )


def _path_subpaths(d: str, where: str) -> list[np.ndarray]:
    """The subpaths of an SVG path's ``d`` as point arrays (curves flattened)."""
    tokens = [(m.group(1), m.group(0)) for m in _PATH_TOKEN.finditer(d)]
    out: list[list[np.ndarray]] = []
    cur = np.zeros(2)
    start = np.zeros(2)
    last_ctrl: np.ndarray | None = None
    last_cmd = ""
    cmd = ""
    i = 0
    while i < len(tokens):
        if tokens[i][0]:
            cmd = tokens[i][0]
            i += 1
        elif not cmd:
            raise DrawingError(f"{where}: path data must start with a command (M), got {d[:20]!r}")
        up = cmd.upper()
        if up == "A":
            raise DrawingError(
                f"{where}: path uses an arc (A); convert arcs to curves or lines in the "
                "drawing program (e.g. 'Object to Path' then flatten)"
            )
        n = _PARAMS[up]
        if up == "Z":
            if out and len(out[-1]):
                out[-1].append(start.copy())
            cur = start.copy()
            last_cmd, last_ctrl = "Z", None
            cmd = ""  # a number after Z needs a new command
            continue
        vals = []
        for _ in range(n):
            if i >= len(tokens) or tokens[i][0]:
                raise DrawingError(f"{where}: path command {cmd} needs {n} numbers")
            vals.append(float(tokens[i][1]))
            i += 1
        rel = cmd.islower()
        base = cur if rel else np.zeros(2)
        if up == "M":
            cur = base + vals
            start = cur.copy()
            out.append([cur.copy()])
            cmd = "l" if rel else "L"  # further pairs after M are lines
            last_ctrl = None
        elif up in ("L", "H", "V"):
            if up == "H":
                cur = np.array([vals[0] + (cur[0] if rel else 0.0), cur[1]])
            elif up == "V":
                cur = np.array([cur[0], vals[0] + (cur[1] if rel else 0.0)])
            else:
                cur = base + vals
            out[-1].append(cur.copy()) if out else out.append([cur.copy()])
            last_ctrl = None
        else:
            pts = np.array(vals).reshape(-1, 2) + base
            if up in ("S", "T"):
                reflect = 2 * cur - last_ctrl if (
                    last_ctrl is not None and last_cmd in (("C", "S") if up == "S" else ("Q", "T"))
                ) else cur.copy()  # fmt: skip
                pts = np.vstack([reflect, pts])
            ctrl = np.vstack([cur, pts])
            if not out:
                out.append([cur.copy()])
            out[-1].extend(_bezier(ctrl))
            last_ctrl = ctrl[-2]
            cur = ctrl[-1].copy()
        last_cmd = up
    return [np.array(p) for p in out if len(p) >= 1]


def read_svg(path: Path, data: bytes, size: tuple[int, int]) -> SvgDrawing:
    """The cracks of an SVG drawing over a photo of ``size`` (width, height) pixels.

    Raises:
        DrawingError: not SVG, entities declared, a viewBox other than the photo's, an
            arc, a transform or width that cannot be read (naming the element).
    """
    import xml.etree.ElementTree as ET

    if b"<!ENTITY" in data:
        raise DrawingError(
            f"drawing {path} declares XML entities (<!ENTITY ...>), which this reader "
            "refuses; save it as plain SVG"
        )
    try:
        root = ET.fromstring(data)
    except ET.ParseError as exc:
        raise DrawingError(f"drawing {path} is not readable XML ({exc})") from None
    if _local(root.tag) != "svg":
        raise DrawingError(f"drawing {path} is not SVG (its root is <{_local(root.tag)}>)")
    vb = root.get("viewBox")
    if vb is not None:
        v = [float(x) for x in _NUMBER.findall(vb)]
        if len(v) != 4 or v[0] != 0 or v[1] != 0 or (v[2], v[3]) != tuple(map(float, size)):
            raise DrawingError(
                f"drawing {path} has viewBox {vb!r}, not '0 0 {size[0]} {size[1]}' of its "
                "photo: its coordinates must be the photo's pixels"
            )
    out = SvgDrawing()
    counter = [0]

    def visit(el, ctm: np.ndarray, width: float | None) -> None:
        tag = _local(el.tag)
        if tag in _NOT_DRAWN or _prop(el, "display") == "none":
            return
        where = f"drawing {path} <{tag}{' id=' + repr(el.get('id')) if el.get('id') else ''}>"
        if el.get("transform"):
            ctm = ctm @ _transform(el.get("transform"), where)
        scale = math.sqrt(abs(np.linalg.det(ctm[:2, :2])))
        w = _width(_prop(el, "stroke-width"), where)
        width = w * scale if w is not None else width
        if tag in _CONTAINERS or tag == "":
            for child in el:
                visit(child, ctm, width)
            return
        if tag in _NOT_CRACKS_QUIET:
            return
        if tag not in _CRACK_ELEMENTS:
            out.ignored[tag] = out.ignored.get(tag, 0) + 1
            return
        if tag == "polyline":
            nums = [float(x) for x in _NUMBER.findall(el.get("points") or "")]
            if len(nums) % 2:
                raise DrawingError(f"{where}: points must be x,y pairs, got {len(nums)} numbers")
            subpaths = [np.array(nums).reshape(-1, 2)]
        elif tag == "line":
            subpaths = [
                np.array([[float(el.get(k) or 0) for k in pair] for pair in (("x1", "y1"), ("x2", "y2"))])
            ]  # fmt: skip
        else:
            subpaths = _path_subpaths(el.get("d") or "", where)
        for k, pts in enumerate(subpaths):
            if len(pts) < 2:
                continue
            xy = (np.c_[pts, np.ones(len(pts))] @ ctm.T)[:, :2]
            if not np.all(np.isfinite(xy)):
                raise DrawingError(f"{where}: coordinates must be finite numbers")
            counter[0] += 1
            name = el.get("id") or f"{tag} {counter[0]}"
            crack_id = name if len(subpaths) == 1 else f"{name}.{k + 1}"
            widths = None if width is None else np.full(len(xy), width)
            out.cracks.append(Polyline(xy, widths, crack_id))

    visit(root, np.eye(3), None)
    return out


# ----- CSV -------------------------------------------------------------------------------


def read_centreline_csv(path: Path) -> Iterator[tuple[str, Polyline, int]]:
    """The cracks of a centreline CSV: ``(photo, polyline, line of its first row)``, in the
    order their first rows appear.

    Raises:
        DrawingError: missing columns, a non-number, a crack of one point, widths on some
            points of a crack only (naming the line).
        CsvFileError: not UTF-8 text, a NUL byte (naming file and line).
    """
    from trainkit.core.csvfile import read_csv

    cracks: dict[tuple[str, str], dict] = {}
    with read_csv(path, "centreline file") as reader:
        cols = set(reader.fieldnames or [])
        if not {"photo", "crack_id", "x", "y"} <= cols:
            raise DrawingError(
                f"{path.name}: expected columns photo,crack_id,x,y (and optionally width_px); "
                f"got {reader.fieldnames}"
            )
        has_width = "width_px" in cols
        for line, row in reader:
            where = f"{path.name} line {line}"
            if not any((v or "").strip() for v in row.values() if isinstance(v, str)):
                continue
            photo = (row["photo"] or "").strip()
            crack = (row["crack_id"] or "").strip()
            if not photo or not crack:
                raise DrawingError(f"{where}: photo and crack_id must not be empty")
            try:
                x, y = float(row["x"]), float(row["y"])
            except (TypeError, ValueError):
                raise DrawingError(
                    f"{where}: x and y must be numbers (photo pixels), got {row['x']!r}, "
                    f"{row['y']!r}"
                ) from None
            w_text = (row.get("width_px") or "").strip() if has_width else ""
            w = math.nan
            if w_text:
                try:
                    w = float(w_text)
                except ValueError:
                    w = -1.0
                if not (w > 0 and math.isfinite(w)):
                    raise DrawingError(
                        f"{where}: width_px must be a positive number of pixels or empty, "
                        f"got {w_text!r}"
                    )
            if not (math.isfinite(x) and math.isfinite(y)):
                raise DrawingError(f"{where}: x and y must be finite numbers")
            rec = cracks.setdefault((photo, crack), {"line": line, "xy": [], "w": []})
            rec["xy"].append((x, y))
            rec["w"].append(w)
    for (photo, crack), rec in cracks.items():
        where = f"{path.name} line {rec['line']}"
        if len(rec["xy"]) < 2:
            raise DrawingError(
                f"{where}: crack {crack!r} of photo {photo!r} has one point; a centreline "
                "needs at least two"
            )
        w = np.array(rec["w"])
        given = np.isfinite(w)
        if given.any() and not given.all():
            raise DrawingError(
                f"{where}: crack {crack!r} of photo {photo!r} gives width_px on "
                f"{int(given.sum())} of its {len(w)} points; give it on all or none"
            )
        yield photo, Polyline(np.array(rec["xy"]), w if given.all() else None, crack), rec["line"]


def check_inside(cracks: list[Polyline], size: tuple[int, int], where: str) -> None:
    """Refuse cracks with a vertex well outside the photo (wrong units or wrong photo):
    more than 1 % of the photo's longer side (at least 2 px) beyond its frame."""
    w, h = size
    tol = max(2.0, 0.01 * max(w, h))
    for c in cracks:
        x, y = c.points[:, 0], c.points[:, 1]
        bad = (x < -tol) | (x > w + tol) | (y < -tol) | (y > h + tol)
        if bad.any():
            px, py = c.points[int(np.argmax(bad))]
            raise DrawingError(
                f"{where}: crack {c.crack_id!r} has a point ({px:g}, {py:g}) outside its "
                f"photo ({w} x {h} pixels); coordinates must be the photo's pixels"
            )
