"""Keys and lines read in typing order from a pseudo-terminal (os.openpty) and from streams.

Terminal behaviour relied on is POSIX termios (tcsetattr(3)): TCSAFLUSH discards input
received but not read, TCSANOW changes the mode at once and keeps it; with ICANON off a read
returns as soon as VMIN=1 byte is there.
"""

from __future__ import annotations

import io
import os
import signal
import subprocess
import sys
import termios
import threading
import time
import tty

import pytest

from trainkit.labels.terminal_input import KeyInput, key_mode_attributes


@pytest.fixture
def pty_pair():
    master, slave = os.openpty()
    stream = os.fdopen(slave, "rb", buffering=0, closefd=False)
    yield master, slave, stream
    stream.close()
    os.close(master)
    os.close(slave)


def _lflag(fd: int) -> int:
    return termios.tcgetattr(fd)[3]


def test_keys_typed_before_key_mode_are_kept_where_a_flushing_raw_switch_loses_them(pty_pair):
    master, slave, stream = pty_pair
    # reference (POSIX tcsetattr: TCSAFLUSH discards unread input): tty.setraw, as used per key
    # by click.getchar, throws away keys typed while the screen was drawn
    before = termios.tcgetattr(slave)
    os.write(master, b"9z")
    time.sleep(0.05)
    tty.setraw(slave)
    os.write(master, b"k")
    assert os.read(slave, 32) == b"k"
    termios.tcsetattr(slave, termios.TCSANOW, before)
    # key mode keeps every byte typed ahead, in order, even a quit key at the end
    os.write(master, b"003u15q")
    time.sleep(0.05)
    out = []
    with KeyInput(stream, out=io.StringIO()) as keys:
        assert keys.in_key_mode
        os.write(master, b"!")  # typed after key mode began: marks the end
        while (key := keys.key()) != "!":
            out.append(key)
    assert out == list("003u15q")


def test_key_mode_attributes_and_restore_on_exit_and_on_error(pty_pair):
    master, slave, stream = pty_pair
    before = termios.tcgetattr(slave)
    assert _lflag(slave) & termios.ICANON and _lflag(slave) & termios.ECHO
    keys = KeyInput(stream, out=io.StringIO())
    with pytest.raises(RuntimeError, match="crash"):
        with keys:
            now = termios.tcgetattr(slave)
            assert now == key_mode_attributes(before)
            assert not now[3] & (termios.ICANON | termios.ECHO | termios.ISIG)
            assert now[6][termios.VMIN] == 1
            with keys:  # entering again changes nothing
                pass
            assert termios.tcgetattr(slave) == now
            raise RuntimeError("crash")
    assert termios.tcgetattr(slave) == before
    assert not keys.in_key_mode


@pytest.mark.parametrize(
    ("ending", "code"),
    [("sys.exit(3)", 3), ("os.kill(os.getpid(), signal.SIGTERM); time.sleep(5)", -15)],
)
def test_terminal_restored_when_the_process_ends_inside_key_mode(pty_pair, ending, code):
    """Leaving without the with-block ending (interpreter exit: atexit; SIGTERM: handler)."""
    master, slave, stream = pty_pair
    before = termios.tcgetattr(slave)
    script = (
        "import os, signal, sys, time\n"
        "from trainkit.labels.terminal_input import KeyInput\n"
        "KeyInput().__enter__()\n"
        f"{ending}\n"
    )
    res = subprocess.run([sys.executable, "-c", script], stdin=slave, timeout=60)
    assert res.returncode == code
    assert termios.tcgetattr(slave) == before


def test_escape_sequences_and_utf8_are_one_key_each(pty_pair):
    master, slave, stream = pty_pair
    with KeyInput(stream, out=io.StringIO()) as keys:
        os.write(master, "\x1b[Ax\x1bOD\x1b[1;5C\u00e9\x1bq".encode())
        got = [keys.key() for _ in range(6)]
        os.write(master, b"\x1b")  # a lone Escape: nothing follows within the wait
        got.append(keys.key())
    assert got == ["\x1b[A", "x", "\x1bOD", "\x1b[1;5C", "\u00e9", "\x1bq", "\x1b"]


def test_line_after_keys_keeps_typed_ahead_bytes(pty_pair):
    """A whole typed-ahead line is the answer at once; a partial one starts the line, whose
    rest is typed in the terminal's line mode; key mode comes back afterwards."""
    master, slave, stream = pty_pair
    out = io.StringIO()
    with KeyInput(stream, out=out) as keys:
        os.write(master, b"c5=v\nq")
        time.sleep(0.05)
        assert keys.key() == "c"
        assert keys.read_line("answer> ") == "5=v"
        assert keys.key() == "q"
        os.write(master, b"all nx\x7fo")  # typed in key mode, with a backspace
        time.sleep(0.05)
        modes = []

        def type_rest():
            time.sleep(0.3)
            modes.append(_lflag(slave) & termios.ICANON)
            os.write(master, b"ne\n")

        t = threading.Thread(target=type_rest)
        t.start()
        line = keys.read_line("answer> ")
        t.join()
        assert line == "all none"
        assert modes == [termios.ICANON]  # line mode while the rest was typed
        assert not _lflag(slave) & termios.ICANON  # key mode again
        os.write(master, b"0")
        assert keys.key() == "0"
    assert out.getvalue() == "answer> 5=v\nanswer> all no"


def test_not_a_terminal_reads_the_stream_in_order():
    keys = KeyInput(io.StringIO("ab\x1b[Bc\nrest line\nlast"), out=io.StringIO())
    with keys:
        assert not keys.is_terminal and not keys.in_key_mode
        assert [keys.key() for _ in range(3)] == ["a", "b", "\x1b[B"]
        assert keys.read_line("> ") == "c"
        assert keys.read_line("> ") == "rest line"
        assert keys.read_line("> ") == "last"
        with pytest.raises(EOFError):
            keys.read_line("> ")
        with pytest.raises(EOFError):
            keys.key()


def test_pipe_is_read_through_its_descriptor():
    r, w = os.pipe()
    os.write(w, b"0s\nall none\n")
    os.close(w)
    with os.fdopen(r, "rb", buffering=0) as stream:
        keys = KeyInput(stream, out=io.StringIO())
        assert not keys.is_terminal
        assert [keys.key(), keys.key()] == ["0", "s"]
        assert keys.read_line() == ""
        assert keys.read_line() == "all none"


def test_sigterm_handler_is_put_back(pty_pair):
    master, slave, stream = pty_pair
    outer = signal.signal(signal.SIGTERM, signal.SIG_DFL)
    try:
        with KeyInput(stream, out=io.StringIO()):
            assert signal.getsignal(signal.SIGTERM) is not signal.SIG_DFL
        assert signal.getsignal(signal.SIGTERM) is signal.SIG_DFL
    finally:
        signal.signal(signal.SIGTERM, outer)
