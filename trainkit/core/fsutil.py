"""Crash-safe file writing: write to a unique temporary name in the same folder, then rename."""

from __future__ import annotations

import hashlib
import os
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from trainkit.core.jsonsafe import dumps

__all__ = [
    "atomic_path",
    "atomic_write_text",
    "atomic_write_bytes",
    "atomic_write_json",
    "file_sha256",
]


@contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success it replaces ``path`` in one step.

    A reader sees either the old file or the complete new one, never a half-written
    file; on an exception the temporary file is removed and ``path`` is untouched.
    The temporary name is unique (a random 96-bit name in the target's folder, not
    created here, so the writer creates it with the usual permissions), so two processes
    or threads writing the same file at once never share a temporary file: the last
    rename wins and each result is whole. The name keeps the suffix so that writers
    choosing a format by suffix (Pillow, matplotlib, torch) still work.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.stem}.{uuid.uuid4().hex[:24]}.tmp{path.suffix}")
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


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write bytes to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)


def atomic_write_json(path: str | Path, obj: Any, **dump_kwargs: Any) -> None:
    """Write ``obj`` as JSON (UTF-8, indent 2 unless given) to ``path`` atomically.

    Numpy values are made plain and NaN or infinity written as null
    (:func:`trainkit.core.jsonsafe.dumps`), so every reader can parse the file.
    """
    dump_kwargs.setdefault("indent", 2)
    atomic_write_text(path, dumps(obj, **dump_kwargs))


def file_sha256(path: str | Path) -> str:
    """The SHA-256 hex digest of a file, read in 1 MiB blocks.

    Raises:
        OSError: the file cannot be read.
    """
    h = hashlib.sha256()
    with Path(path).open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()
