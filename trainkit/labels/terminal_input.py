"""Reads keys and answer lines from the terminal in the order they were typed, none lost.

The review screens take one key per answer, and a quick labeller types the next keys while a
screen is still being drawn. Switching the terminal to raw mode per key with ``TCSAFLUSH``
(what ``click.getchar`` does through ``tty.setraw``) throws those keys away. Here the terminal
stays in key mode (no line buffering, no echo, Ctrl-C and Ctrl-S delivered as keys) for as
long as a :class:`KeyInput` is entered, every mode change uses ``TCSANOW`` (never a flush),
and bytes are read from the file descriptor with ``os.read`` into one buffer, so keys that
arrive while a screen is drawn are applied afterwards, in order. Answer lines (contact-sheet
mode) are read in the terminal's ordinary line mode, entered only for the line and left
after it; any bytes already typed ahead start the line.

The saved terminal settings are restored when the block ends (normally, by Ctrl-C or by an
exception), at interpreter exit, and on SIGTERM/SIGHUP. When the input is not a terminal,
keys and lines are read from the stream as they come.
"""

from __future__ import annotations

import atexit
import contextlib
import os
import select
import signal
import sys
import threading
import weakref
from typing import IO

try:  # POSIX only; on other systems the input is read as a plain stream
    import termios
except ImportError:  # pragma: no cover - Windows
    termios = None  # type: ignore[assignment]

__all__ = ["ESC_WAIT_S", "KEY_NAMES", "KeyInput", "key_mode_attributes", "stdin_keys"]

#: Seconds to wait for the rest of an escape sequence after an ESC byte (an arrow key's bytes
#: arrive together; a lone Escape press is followed by nothing).
ESC_WAIT_S = 0.05
#: Readable names of common escape sequences, for messages.
KEY_NAMES = {
    "\x1b[A": "up arrow",
    "\x1b[B": "down arrow",
    "\x1b[C": "right arrow",
    "\x1b[D": "left arrow",
    "\x1bOA": "up arrow",
    "\x1bOB": "down arrow",
    "\x1bOC": "right arrow",
    "\x1bOD": "left arrow",
    "\x1b[H": "Home",
    "\x1b[F": "End",
    "\x1b": "Escape",
}
_ERASE = (0x7F, 0x08)
_MAX_SEQ = 16  # longest escape sequence parsed as one key


def key_mode_attributes(attrs: list) -> list:
    """Terminal attributes for key mode derived from ``attrs`` (a ``termios.tcgetattr`` list).

    Line buffering, echo, signal keys and extended input processing go off (Ctrl-C arrives as
    the byte 0x03, Ctrl-S as 0x13 instead of stopping output); reads return as soon as one
    byte is there. Output processing is left alone, so printed newlines still return the
    carriage.
    """
    new = list(attrs)
    new[6] = list(attrs[6])
    new[0] &= ~termios.IXON
    new[3] &= ~(termios.ICANON | termios.ECHO | termios.ISIG | termios.IEXTEN)
    new[6][termios.VMIN] = 1
    new[6][termios.VTIME] = 0
    return new


def _utf8_length(lead: int) -> int:
    if lead >= 0xF0:
        return 4
    if lead >= 0xE0:
        return 3
    if lead >= 0xC0:
        return 2
    return 1


class KeyInput:
    """Keys and lines from one input stream, in the order typed, across screens and modes.

    Enter the object (``with keys:``) to put a terminal in key mode; entering again while
    inside is allowed and changes nothing. Outside a ``with`` block keys can still be read
    (useful for a stream that is not a terminal).

    Args:
        stream: the input (default ``sys.stdin``); its file descriptor is read directly when
            it has one, otherwise the stream's own ``read(1)``.
        out: where prompts and echoed lines are written (default ``sys.stdout``).
    """

    def __init__(self, stream: IO | None = None, out: IO | None = None) -> None:
        self.stream = stream if stream is not None else sys.stdin
        self.out = out
        self._buf = bytearray()
        self._eof = False
        self._depth = 0
        self._saved: list | None = None  # terminal attributes to restore, while in key mode
        self._old_handlers: dict[int, object] = {}
        try:
            self._fd: int | None = self.stream.fileno()
        except (AttributeError, OSError, ValueError):
            self._fd = None
        self.is_terminal = bool(
            termios is not None and self._fd is not None and os.isatty(self._fd)
        )

    # ----- terminal mode ------------------------------------------------------------------------

    def __enter__(self) -> KeyInput:
        self._depth += 1
        if self._depth == 1 and self.is_terminal:
            self._saved = termios.tcgetattr(self._fd)
            atexit.register(self._restore)
            self._catch_signals()
            termios.tcsetattr(self._fd, termios.TCSANOW, key_mode_attributes(self._saved))
        return self

    def __exit__(self, *exc) -> None:
        self._depth -= 1
        if self._depth == 0:
            self._restore()

    @property
    def in_key_mode(self) -> bool:
        """Whether the terminal is currently in key mode (set by this object)."""
        return self._saved is not None

    def _restore(self) -> None:
        """Put the terminal back as it was found (idempotent; safe at interpreter exit)."""
        saved, self._saved = self._saved, None
        if saved is None:
            return
        atexit.unregister(self._restore)
        for signum, handler in self._old_handlers.items():
            signal.signal(signum, handler)
        self._old_handlers = {}
        with contextlib.suppress(termios.error, OSError):
            termios.tcsetattr(self._fd, termios.TCSANOW, saved)

    def _catch_signals(self) -> None:
        """Restore the terminal on SIGTERM/SIGHUP too, then die of the signal as before."""
        if threading.current_thread() is not threading.main_thread():
            return
        for signum in (signal.SIGTERM, signal.SIGHUP):
            if signal.getsignal(signum) is signal.SIG_DFL:
                self._old_handlers[signum] = signal.signal(signum, self._on_signal)

    def _on_signal(self, signum, frame) -> None:
        self._restore()
        signal.signal(signum, signal.SIG_DFL)
        os.kill(os.getpid(), signum)

    @contextlib.contextmanager
    def _line_mode(self):
        """The terminal's own line mode for one answer line, then key mode again (no flush)."""
        saved = self._saved
        if saved is None:
            yield
            return
        termios.tcsetattr(self._fd, termios.TCSANOW, saved)
        try:
            yield
        finally:
            termios.tcsetattr(self._fd, termios.TCSANOW, key_mode_attributes(saved))

    # ----- bytes ----------------------------------------------------------------------------------

    def _fill(self, timeout: float | None) -> bool:
        """Append what arrives within ``timeout`` seconds (None: wait); False on EOF/timeout."""
        if self._eof:
            return False
        if self._fd is None:
            data = self.stream.read(1)
            data = data.encode("utf-8") if isinstance(data, str) else data
        else:
            if timeout is not None:
                ready, _, _ = select.select([self._fd], [], [], timeout)
                if not ready:
                    return False
            data = os.read(self._fd, 4096)
        if not data:
            self._eof = True
            return False
        self._buf += data
        return True

    def _drain(self) -> None:
        """Move every byte the terminal already holds into the buffer, without waiting."""
        if self._fd is not None:
            while self._fill(0):
                pass

    def _take(self, n: int) -> bytes:
        out = bytes(self._buf[:n])
        del self._buf[:n]
        return out

    # ----- keys and lines -----------------------------------------------------------------------

    def key(self) -> str:
        """The next key typed: one character, or a whole escape sequence such as ``"\\x1b[A"``.

        Raises:
            EOFError: the input has ended.
        """
        if not self._buf and not self._fill(None):
            raise EOFError("end of input")
        if self._buf[0] == 0x1B:
            return self._escape()
        n = _utf8_length(self._buf[0])
        while len(self._buf) < n and self._fill(None):
            pass
        return self._take(n).decode("utf-8", errors="replace")

    def _escape(self) -> str:
        """ESC alone, Alt+key (ESC x), SS3 (ESC O x) or CSI (ESC [ params final-byte)."""
        if len(self._buf) < 2 and not self._fill(ESC_WAIT_S):
            return self._take(1).decode()
        second = self._buf[1]
        if second not in (ord("["), ord("O")):
            return self._take(1).decode() + self.key()
        i = 2
        while i < _MAX_SEQ:
            if i >= len(self._buf) and not self._fill(ESC_WAIT_S):
                break
            if second == ord("O") or 0x40 <= self._buf[i] <= 0x7E:
                i += 1
                break
            i += 1
        return self._take(i).decode("utf-8", errors="replace")

    def read_line(self, prompt: str = "") -> str:
        """One answer line (without its newline), read in the terminal's line mode.

        Bytes typed ahead (while in key mode) come first: a whole line among them is the
        answer at once (and is shown after the prompt); a partial one is shown after the
        prompt and the rest is typed with the terminal's own line editing.

        Raises:
            EOFError: the input ended before anything was typed.
        """
        out = self.out or sys.stdout
        self._drain()
        line = self._split_line()
        if line is not None:
            out.write(prompt + (line + "\n" if self.is_terminal else ""))
            out.flush()
            return line
        prefix = self._erase_applied(self._take(len(self._buf)))
        self._buf += prefix
        out.write(prompt + (prefix.decode("utf-8", errors="replace") if self.is_terminal else ""))
        out.flush()
        with self._line_mode():
            while line is None and self._fill(None):
                line = self._split_line()
        if line is None:  # end of input: the last unterminated line, if any
            if not self._buf:
                raise EOFError("end of input")
            line = self._take(len(self._buf)).decode("utf-8", errors="replace")
        return line

    def _split_line(self) -> str | None:
        """Take one line (up to CR or LF) off the buffer, or None if no line end is there."""
        ends = [i for i in (self._buf.find(b"\n"), self._buf.find(b"\r")) if i >= 0]
        if not ends:
            return None
        end = min(ends)
        raw = self._erase_applied(self._take(end + 1)[:-1])
        return raw.decode("utf-8", errors="replace")

    @staticmethod
    def _erase_applied(raw: bytes) -> bytes:
        """Apply Backspace/Delete bytes typed in key mode (where the terminal does not)."""
        kept = bytearray()
        for b in raw:
            if b in _ERASE:
                while kept and 0x80 <= kept[-1] < 0xC0:  # continuation bytes of one character
                    kept.pop()
                if kept:
                    kept.pop()
            else:
                kept.append(b)
        return bytes(kept)


_BY_STREAM: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()


def stdin_keys() -> KeyInput:
    """The one :class:`KeyInput` of the current ``sys.stdin``, so that bytes typed ahead in one
    screen (key mode) are still there for the next (sheet mode)."""
    stream = sys.stdin
    try:
        keys = _BY_STREAM.get(stream)
    except TypeError:  # a stream that cannot be weakly referenced: no sharing
        return KeyInput(stream)
    if keys is None:
        keys = KeyInput(stream)
        _BY_STREAM[stream] = keys
    return keys
