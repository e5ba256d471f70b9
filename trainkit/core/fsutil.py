"""Crash-safe file writing: write to a temporary name in the same folder, then rename."""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_path", "atomic_write_text"]


@contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success it replaces ``path`` in one step.

    A reader sees either the old file or the complete new one, never a half-written
    file; on an exception the temporary file is removed and ``path`` is untouched.
    The temporary name keeps the suffix so that writers choosing a format by suffix
    (Pillow, matplotlib) still work.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.stem}.tmp-{os.getpid()}{path.suffix}")
    try:
        yield tmp
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def atomic_write_text(path: str | Path, text: str) -> None:
    """Write text (UTF-8) to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
