"""Reading a CSV file a person made (labels, a sidecar, a job's answered sample), or refusing it in one line.

UTF-8 is read with or without the byte-order mark a spreadsheet puts first; any other
encoding, a field longer than the csv module's limit, or a NUL byte is a
:class:`CsvFileError` naming the file, the line and what to do, never a traceback.
"""

from __future__ import annotations

import csv
from collections.abc import Iterator
from pathlib import Path

from trainkit.core.errors import TrainkitError

__all__ = ["CsvFileError", "CsvRows", "read_csv"]


class CsvFileError(TrainkitError):
    """A CSV file that cannot be read as text rows; the message names the file and the line."""


class CsvRows:
    """The rows of a CSV file with a header: ``fieldnames``, then ``(line, row)`` pairs.

    ``line`` is the line of the file the row ends on (the header is line 1), as an editor
    or a spreadsheet numbers it when no field spans lines.
    """

    def __init__(self, path: Path, what: str) -> None:
        self.path = path
        self._what = what
        try:
            self._fh = path.open(newline="", encoding="utf-8-sig")
        except OSError as exc:
            raise CsvFileError(
                f"cannot read {what} {path} ({exc.strerror or type(exc).__name__})"
            ) from None
        self._reader = csv.DictReader(self._fh)
        self.fieldnames: list[str] | None = self._guard(lambda: self._reader.fieldnames)

    def __iter__(self) -> Iterator[tuple[int, dict]]:
        while True:
            row = self._guard(lambda: next(self._reader, None))
            if row is None:
                return
            yield self._reader.line_num, row

    def close(self) -> None:
        self._fh.close()

    def __enter__(self) -> CsvRows:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _guard(self, step):
        """Run one read step, turning a decoding or csv error into a :class:`CsvFileError`."""
        try:
            return step()
        except UnicodeDecodeError:
            self.close()
            raise CsvFileError(self._not_utf8()) from None
        except csv.Error as exc:
            self.close()
            # the csv module counts a line once it is parsed: the failing one is the next
            where = f"{self._what} {self.path.name} line {self._reader.line_num + 1}"
            if "field larger than field limit" in str(exc):
                raise CsvFileError(
                    f"{where}: a field is longer than {csv.field_size_limit()} characters "
                    "(is it the right file, with matching quotes?)"
                ) from None
            if "NUL" in str(exc):
                raise CsvFileError(f"{where}: holds a NUL byte; this is not a text CSV") from None
            raise CsvFileError(f"{where}: not a readable CSV ({exc})") from None

    def _not_utf8(self) -> str:
        raw = self.path.read_bytes()
        where, what = f"{self._what} {self.path.name}", "not UTF-8 text"
        try:
            raw.decode("utf-8-sig")
        except UnicodeDecodeError as exc:  # the first byte that is not UTF-8, and its line
            line = raw[: exc.start].count(b"\n") + 1
            where += f" line {line}"
            what += f" (byte 0x{raw[exc.start]:02x})"
        return (
            f"{where}: {what}, perhaps Latin-1 or Windows-1252; save it as UTF-8 (in a "
            "spreadsheet: CSV UTF-8) and try again"
        )


def read_csv(path: str | Path, what: str) -> CsvRows:
    """Open a CSV file with a header row for reading (use it in a ``with`` block).

    Args:
        path: the file.
        what: what the file is, for messages (``label file``, ``sidecar``).

    Raises:
        CsvFileError: the file cannot be opened, is not UTF-8, has a field longer than
            ``csv.field_size_limit()`` or a NUL byte; the message names the file and line.
    """
    return CsvRows(Path(path), what)
