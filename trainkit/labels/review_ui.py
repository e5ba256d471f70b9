"""Terminal review screens: half-block patch previews, contact-sheet PNGs and key handling.

All decisions (queue, answers, undo, skip) live in :mod:`trainkit.labels.review`; this module
only draws and reads keys. Two modes:

- key mode: one patch at a time drawn with upper-half-block characters, each character
  cell showing two pixels (foreground = upper, background = lower), in true colour;
  one key per answer.
- sheet mode: a numbered grid of patches written to a PNG (opened with ``--viewer``),
  answered by one short line such as ``all none except 3 7`` or ``5=vertical``.

Key mode falls back to sheet mode, with a message, when the terminal is too small,
has no colour or is not a terminal at all.
"""

from __future__ import annotations

import shlex
import subprocess
import tempfile
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter, ImageFont

from trainkit.core.fsutil import atomic_path
from trainkit.labels.orientation import dominant_orientation
from trainkit.labels.review import (
    ReviewError,
    Session,
    SheetAnswerError,
    describe_drawing,
    load_patch,
    parse_sheet_answer,
)
from trainkit.labels.terminal_input import KEY_NAMES, stdin_keys

__all__ = [
    "MIN_COLS",
    "MIN_ROWS",
    "downsample",
    "halfblock_rows",
    "contact_sheet",
    "choose_mode",
    "run_keys",
    "run_sheet",
]

#: Smallest terminal for key mode (columns, rows): a 48 x 48-pixel preview plus text.
MIN_COLS, MIN_ROWS = 60, 34
#: Lines of text around the preview in key mode.
_TEXT_LINES = 11
#: Ctrl-C as key mode reads it (the terminal's signal keys are off): it ends the run as
#: interrupted, which the command line reports with a non-zero exit code.
CTRL_C = "\x03"
_UPPER_HALF = "\u2580"
#: Sheet colours (RGB): background, number tag, tag text, suggestion text.
_SHEET_BG, _TAG_BG, _TAG_FG, _NOTE_FG = (24, 26, 30), (250, 204, 21), (20, 20, 20), (180, 220, 255)


# ----- pixels -------------------------------------------------------------------------------------


def downsample(rgb: np.ndarray, size: int) -> np.ndarray:
    """Resize a square patch to ``size`` pixels, keeping thin dark lines visible.

    Shrinking averages a 1-pixel crack away, so when shrinking the result is the mean
    of a box-filtered image and a box-filtered 3 x 3 minimum (dark-widened) image.
    Enlarging uses nearest neighbour, so every source pixel stays a crisp block.
    """
    im = Image.fromarray(np.asarray(rgb, dtype=np.uint8))
    if size >= im.width:
        return np.asarray(im.resize((size, size), Image.NEAREST))
    box = np.asarray(im.resize((size, size), Image.BOX), dtype=float)
    dark = np.asarray(im.filter(ImageFilter.MinFilter(3)).resize((size, size), Image.BOX))
    return ((box + dark) / 2.0).round().astype(np.uint8)


def halfblock_rows(
    rgb: np.ndarray,
) -> list[list[tuple[tuple[int, int, int], tuple[int, int, int]]]]:
    """Pairs of (upper, lower) pixel colours per character cell; image height must be even."""
    a = np.asarray(rgb, dtype=np.uint8)
    if a.ndim != 3 or a.shape[2] != 3 or a.shape[0] % 2:
        raise ValueError(f"expected an (H, W, 3) image with even H, got shape {a.shape}")
    out = []
    for y in range(0, a.shape[0], 2):
        top, bot = a[y], a[y + 1]
        out.append(
            [(tuple(map(int, t)), tuple(map(int, b))) for t, b in zip(top, bot, strict=True)]
        )
    return out


def halfblock_text(rgb: np.ndarray):
    """A rich Text drawing the image with upper-half blocks (rich downgrades colour as needed)."""
    from rich.style import Style
    from rich.text import Text

    text = Text()
    for line in halfblock_rows(rgb):
        for top, bot in line:
            text.append(_UPPER_HALF, Style(color=f"rgb{top}", bgcolor=f"rgb{bot}"))
        text.append("\n")
    return text


def _font(size: int):
    try:
        return ImageFont.load_default(size=size)
    except TypeError:  # Pillow < 10.1
        return ImageFont.load_default()


def contact_sheet(
    images: list[np.ndarray],
    *,
    cols: int = 6,
    cell: int = 200,
    notes: list[str] | None = None,
) -> Image.Image:
    """A numbered grid of patches (numbers from 1, left to right, top to bottom).

    Args:
        images: (S, S, 3) uint8 patches.
        cols: patches per row.
        cell: side of each patch on the sheet in pixels (enlarged by nearest neighbour).
        notes: optional short text under each patch (e.g. orientation or model suggestion).
    """
    if not images:
        raise ValueError("expected at least one patch for a contact sheet, got 0")
    gap, note_h = 8, 22 if notes else 0
    rows = (len(images) + cols - 1) // cols
    w = cols * cell + (cols + 1) * gap
    h = rows * (cell + note_h) + (rows + 1) * gap
    sheet = Image.new("RGB", (w, h), _SHEET_BG)
    draw = ImageDraw.Draw(sheet)
    tag_font, note_font = _font(max(14, cell // 7)), _font(14)
    for k, img in enumerate(images):
        r, c = divmod(k, cols)
        x = gap + c * (cell + gap)
        y = gap + r * (cell + note_h + gap)
        tile = Image.fromarray(np.asarray(img, dtype=np.uint8)).resize((cell, cell), Image.NEAREST)
        sheet.paste(tile, (x, y))
        label = str(k + 1)
        tw = draw.textlength(label, font=tag_font)
        th = max(14, cell // 7)
        draw.rectangle([x, y, x + tw + 10, y + th + 8], fill=_TAG_BG)
        draw.text((x + 5, y + 3), label, fill=_TAG_FG, font=tag_font)
        if notes:
            draw.text((x + 2, y + cell + 3), notes[k][:40], fill=_NOTE_FG, font=note_font)
    return sheet


# ----- mode and screen helpers --------------------------------------------------------------------


def choose_mode(want_sheet: bool, console, *, num_classes: int) -> tuple[str, str | None]:
    """``("keys" | "sheet", message)``: key mode needs a big enough colour terminal and <= 10 classes."""
    if want_sheet:
        return "sheet", None
    size = console.size
    if not console.is_terminal:
        return "sheet", "not a terminal: using contact-sheet mode"
    if console.color_system is None:
        return "sheet", "this terminal shows no colour: using contact-sheet mode"
    if size.width < MIN_COLS or size.height < MIN_ROWS:
        return "sheet", (
            f"terminal {size.width}x{size.height} is smaller than {MIN_COLS}x{MIN_ROWS}: "
            "using contact-sheet mode (enlarge the window for one-key mode)"
        )
    if num_classes > 10:
        return (
            "sheet",
            f"{num_classes} classes do not fit on the number keys: using contact-sheet mode",
        )
    return "keys", None


def _status(session: Session) -> str:
    p = session.progress()
    return (
        f"reviewer {session.reviewer} | done {p['done']} | remaining {p['remaining']} | "
        f"{p['per_minute']:.1f} per min"
    )


def _legend(session: Session) -> str:
    return "  ".join(f"{i} {n}" for i, n in enumerate(session.class_set.names))


def _open_viewer(viewer: str | None, path: Path) -> None:
    if not viewer:
        return
    try:
        subprocess.Popen(
            [*shlex.split(viewer), str(path)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            start_new_session=True,
        )
    except OSError as exc:
        raise ReviewError(f"cannot start viewer {viewer!r}: {exc}") from None


def _save_png(img: Image.Image, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path) as tmp:
        img.save(tmp)


def _patch_lines(session: Session, rec, img: np.ndarray) -> list[str]:
    mm = f", {rec.patch_mm:.0f} mm wide" if rec.patch_mm else ""
    lines = [
        f"patch {rec.id}  {rec.photo}  row {rec.row} col {rec.col}{mm}"
        + (f"  flags: {rec.flags}" if rec.flags else ""),
        "orientation: " + dominant_orientation(img).describe(session.class_set),
    ]
    drawn = session.drawing(rec.id)
    if drawn is not None:
        lines.append(describe_drawing(drawn))
    sug = session.suggestion(rec.id)
    if sug:
        lines.append(f"model suggests: {sug[0]} ({sug[1]:.0%})  [Enter accepts]")
    others = session.settles.get(rec.id)
    if others:
        hist = session.ws.label_history(rec.id)
        said = {e["reviewer"]: e["label"] for e in hist}
        lines.append("conflict: " + ", ".join(f"{r} said {said.get(r)}" for r in others))
    return lines


KEY_HELP = """One key per answer:
  0-9     label with the class of that number (see the legend)
  Enter   accept the model's suggestion (only with --model)
  x       unsure (kept out of training)
  s       skip: the patch moves to the end of your queue
  u       undo the last answer or skip
  z       zoom: whole patch, then each quarter enlarged
  v       open the patch in the --viewer program
  c       switch to contact-sheet mode
  ?       this help
  q       quit (everything answered is already saved; run again to resume)
Press any key to go back."""

SHEET_HELP = """Answer a whole sheet in one line (numbers as on the sheet):
  all none                 every patch is 'none'
  all none except 3 7      all 'none' but leave 3 and 7 for later
  5=vertical 9-11=map      these patches get these classes
  all 0 4=v 6=x            classes by number, unique start of the name, x = unsure
  s  skip this sheet    u  undo the last sheet    ?  this help    q  quit"""


# ----- key mode -------------------------------------------------------------------------------------


def run_keys(session: Session, console, *, viewer: str | None = None, getchar=None) -> str:
    """Run one-key review until the queue ends or the reviewer quits.

    Without ``getchar`` keys come from :func:`~trainkit.labels.terminal_input.stdin_keys`,
    with the terminal held in key mode for the whole run (restored however the run ends), so
    keys typed while a screen is drawn are applied in order and a typed-ahead ``q`` quits
    after the keys before it.

    Args:
        getchar: optional function returning the next key (raising EOFError at the end).

    Returns:
        ``"quit"`` (q, or Ctrl-D), ``"interrupted"`` (Ctrl-C), ``"finished"`` or ``"sheet"``
        (the reviewer switched to sheet mode). Every answer is saved as it is given.
    """
    if getchar is not None:
        return _key_loop(session, console, viewer, getchar)
    keys = stdin_keys()
    with keys:
        return _key_loop(session, console, viewer, keys.key)


def _key_loop(session: Session, console, viewer: str | None, getchar) -> str:
    names = session.class_set.names
    zoom = 0
    message = ""
    while True:
        rec = session.current()
        if rec is None:
            return "finished"
        img = load_patch(session.ws, rec)
        view = img
        if zoom:
            h, w = img.shape[:2]
            r, c = divmod(zoom - 1, 2)
            view = img[r * h // 2 : (r + 1) * h // 2, c * w // 2 : (c + 1) * w // 2]
        size = console.size
        px = min(2 * (size.height - _TEXT_LINES), size.width - 2)
        px -= px % 2
        console.clear()
        console.print(_status(session), style="bold", highlight=False)
        console.print(halfblock_text(downsample(view, px)), end="")
        where = ["whole patch", "upper-left", "upper-right", "lower-left", "lower-right"][zoom]
        console.print(
            f"view: {where} ({img.shape[1]} px shown as {px})", highlight=False, soft_wrap=True
        )
        for line in _patch_lines(session, rec, img):
            console.print(line, highlight=False)
        console.print(_legend(session), style="cyan", highlight=False)
        console.print(
            "x unsure  s skip  u undo  z zoom  c sheet  ? help  q quit",
            highlight=False,
            soft_wrap=True,
        )
        if message:
            console.print(message, style="yellow", highlight=False)
            message = ""
        try:
            key = getchar()
        except EOFError:
            return "quit"
        if key == CTRL_C:
            return "interrupted"
        if key in ("q", "Q", "\x04"):
            return "quit"
        if key.isdigit() and int(key) < len(names):
            session.answer(names[int(key)])
            zoom = 0
        elif key.isdigit():
            message = f"no class {key}: classes are 0-{len(names) - 1}"
        elif key in ("\r", "\n"):
            if session.suggestion(rec.id) is None:
                message = "no model suggestion here; start with --model EXP_OR_ONNX to get one"
            else:
                session.accept_suggestion()
                zoom = 0
        elif key == "x":
            session.answer(None)
            zoom = 0
        elif key == "s":
            session.skip()
            zoom = 0
        elif key == "u":
            back = session.undo()
            message = "nothing to undo" if back is None else f"undone: patch {back.id} again"
            zoom = 0
        elif key == "z":
            zoom = (zoom + 1) % 5
        elif key == "v":
            if not viewer:
                message = "no viewer set; start with --viewer COMMAND (e.g. --viewer xdg-open)"
            else:
                path = Path(tempfile.gettempdir()) / f"trainkit-patch-{rec.id}.png"
                _save_png(Image.fromarray(img).resize((512, 512), Image.NEAREST), path)
                _open_viewer(viewer, path)
        elif key == "c":
            return "sheet"
        elif key == "?":
            console.clear()
            console.print(KEY_HELP, highlight=False)
            console.print(_legend(session), style="cyan", highlight=False)
            try:
                if getchar() == CTRL_C:
                    return "interrupted"
            except EOFError:
                return "quit"
        else:
            message = f"key {KEY_NAMES.get(key, repr(key))} does nothing here; ? shows the keys"


# ----- sheet mode -----------------------------------------------------------------------------------


def _notes(session: Session, recs, imgs) -> list[str]:
    out = []
    for r, img in zip(recs, imgs, strict=True):
        sug = session.suggestion(r.id)
        drawn = session.drawing(r.id)
        if sug:
            out.append(f"model: {sug[0]} {sug[1]:.0%}")
        elif drawn is not None:
            out.append(describe_drawing(drawn, short=True))
        else:
            o = dominant_orientation(img)
            out.append(
                f"{o.angle_deg:.0f} deg {session.class_set.names[session.class_set.class_for_angle(o.angle_deg)]}"
                if o.clear
                else "no clear direction"
            )
    return out


def run_sheet(
    session: Session,
    console,
    sheet_path: Path,
    *,
    cols: int = 6,
    rows: int = 4,
    viewer: str | None = None,
    read_line=None,
) -> str:
    """Run contact-sheet review until the queue ends or the reviewer quits.

    Each round writes ``sheet_path`` (a PNG of the next ``cols x rows`` patches), opens it
    with the viewer, and reads one answer line. Without ``read_line`` lines come from
    :func:`~trainkit.labels.terminal_input.stdin_keys` in the terminal's line mode; keys
    typed ahead in key mode (after ``c``) start the first line, none are lost.

    Returns:
        ``"quit"`` or ``"finished"``.
    """
    if read_line is None:
        keys = stdin_keys()
        read_line = lambda: keys.read_line("answer> ")  # noqa: E731
    message = ""
    last_ids: list[int] = []
    while True:
        recs = session.upcoming(cols * rows)
        if not recs:
            return "finished"
        ids = [r.id for r in recs]
        if ids != last_ids:
            imgs = [load_patch(session.ws, r) for r in recs]
            _save_png(contact_sheet(imgs, cols=cols, notes=_notes(session, recs, imgs)), sheet_path)
            _open_viewer(viewer, sheet_path)
            last_ids = ids
        console.print(_status(session), style="bold", highlight=False)
        console.print(
            f"sheet: {sheet_path} ({len(recs)} patches, numbered 1-{len(recs)})", highlight=False
        )
        console.print("classes: " + _legend(session), style="cyan", highlight=False)
        console.print(
            "e.g. 'all none except 3 7', '5=vertical'; s skip sheet, u undo, ? help, q quit",
            highlight=False,
        )
        if message:
            console.print(message, style="yellow", highlight=False)
            message = ""
        try:
            line = read_line().strip()
        except EOFError:
            return "quit"
        low = line.lower()
        if low in ("q", "quit"):
            return "quit"
        if low in ("?", "help"):
            console.print(SHEET_HELP, highlight=False)
            continue
        if low == "s":
            session.skip(len(recs))
            continue
        if low == "u":
            back = session.undo()
            message = "nothing to undo" if back is None else "undone: the last sheet answer"
            continue
        try:
            answers = parse_sheet_answer(line, len(recs), session.class_set)
        except SheetAnswerError as exc:
            message = str(exc)
            continue
        if not answers:
            message = "nothing answered; every patch was left out"
            continue
        session.answer_many({k - 1: v for k, v in answers.items()})
        message = f"saved {len(answers)} labels"
