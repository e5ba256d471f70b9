"""One way to open the kit's SQLite files (the workspace database, the crop store)."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

__all__ = ["transaction"]


@contextmanager
def transaction(
    path: str | Path, *, foreign_keys: bool = False, schema: str | None = None
) -> Iterator[sqlite3.Connection]:
    """A connection in WAL mode (synchronous NORMAL, 30 s busy timeout): commits when the
    block ends, rolls back on any error, always closes.

    Args:
        path: the database file.
        foreign_keys: enforce foreign keys on this connection.
        schema: a script run first (``CREATE ... IF NOT EXISTS`` statements).
    """
    con = sqlite3.connect(path, timeout=30.0)
    try:
        con.execute("PRAGMA journal_mode=WAL")
        if foreign_keys:
            con.execute("PRAGMA foreign_keys=ON")
        con.execute("PRAGMA synchronous=NORMAL")
        if schema is not None:
            con.executescript(schema)
        yield con
        con.commit()
    except BaseException:
        con.rollback()
        raise
    finally:
        con.close()
