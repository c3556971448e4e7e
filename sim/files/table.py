"""Small tables: command logs and measured return errors, as CSV or Parquet.

:func:`read_table` reads the whole file.  A file that starts with the
Parquet signature ``PAR1`` is read with polars, anything else as CSV with the
csv module (RFC 4180: a header row, quoted cells allowed, blank rows
skipped), so every problem is located: ``file:line: message`` in CSV,
``file: row N: message`` in Parquet (which has no lines).  Long traces are
read a page at a time by :mod:`sim.traces.read` instead.
"""
from __future__ import annotations

import csv
import io
import math
import os
from dataclasses import dataclass

from sim.errors import InputError, quote
from sim.files import fields as F
from sim.files.reading import open_regular, read_limited, read_parquet

MAX_BYTES = 16 << 20   # a small table is read whole: at most this much (command logs are read in blocks)

PARQUET_MAGIC = b"PAR1"


@dataclass
class Table:
    """A table read whole.

    ``rows`` : list of (where, cells): ``where`` is the CSV line (int) or
    ``"row N"`` (Parquet); ``cells`` are strings (CSV) or the Parquet values
    (float, int, str or None for null), one per header column.
    """

    source: str
    header: list
    rows: list
    parquet: bool

    @property
    def header_line(self) -> int | None:
        """Where to report a header problem: line 1 in CSV, nowhere in particular in Parquet."""
        return None if self.parquet else 1

    def error(self, where, message) -> InputError:
        """InputError at ``where`` (a row's location from :attr:`rows`)."""
        if isinstance(where, str):
            return InputError(self.source, None, f"{where}: {message}")
        return InputError(self.source, where, message)

    def number(self, cell, where, column, unit="") -> float:
        """A finite number from a cell, or :meth:`error` ``column 'c': expected a number ...``."""
        if isinstance(cell, str) or not self.parquet:
            if isinstance(where, int):
                return F.cell_number(cell, self.source, where, column, unit)
            try:
                v = float(cell)
            except (TypeError, ValueError):
                raise self.error(where, f"column {quote(column)}: expected a number, got {quote(cell)}") from None
        elif cell is None:
            raise self.error(where, f"column '{column}': expected a number{' (' + unit + ')' if unit else ''}, "
                                    "got a blank cell")
        else:
            v = float(cell)
        if not math.isfinite(v):
            raise self.error(where, f"column {quote(column)}: expected a finite number, got {v!r}")
        if abs(v) > F.limit_for(unit):
            raise self.error(where, f"column {quote(column)}: {F.describe_range(F.limit_for(unit), unit)}, "
                                    f"got {v:g}")
        return v

    @staticmethod
    def text(cell) -> str:
        return "" if cell is None else str(cell)


def is_parquet(path) -> bool:
    """Whether the file at ``path`` starts with the Parquet signature (False for anything but a
    regular file, which its reader then refuses; a FIFO is never waited on)."""
    try:
        with open_regular(path) as fh:
            return fh.read(4) == PARQUET_MAGIC
    except (InputError, OSError):
        return False


def read_table(path, empty: str, what: str = "file", source: str | None = None) -> Table:
    """Read a small table (see module docstring).

    ``empty`` is the message for a file without a header; ``what`` names the
    file in messages; ``source`` is the name errors give (default ``path``).
    """
    path = os.fspath(path)
    source = source or path
    try:
        raw = read_limited(path, MAX_BYTES, what)
    except InputError as exc:
        raise InputError(source, exc.line, exc.message) from None
    if raw[:4] == PARQUET_MAGIC:
        return _parquet(path, source)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        start = raw.rfind(b"\n", 0, exc.start) + 1
        raise InputError(source, line, f"{what} is not UTF-8 text (byte {exc.start - start + 1} of this line)") from None
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    header = F.csv_header(reader, source, empty)
    rows = list(F.csv_records(reader, source, len(header)))
    return Table(source, header, rows, False)


def _parquet(path, source) -> Table:
    frame, header = read_parquet(path, source)
    rows = [(f"row {i + 1}", list(r)) for i, r in enumerate(frame.iter_rows())]
    return Table(source, header, rows, True)
