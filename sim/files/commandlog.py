"""Script entries, and command logs: CSV files of timed commands (``commands: log.csv``).

A command log (README "Scenario file") has a column ``t`` (s) and either
twist columns ``vx, vy, omega`` or wheel columns ``NAME.spin`` /
``NAME.steer``; each row holds until the next.  It is CSV, or Parquet when the
file starts with the Parquet signature (read with polars, column by column).

Reading streams the file a block of lines at a time (:mod:`sim.files.reading`:
regular files only, UTF-8, bounded lines, about 1 MiB at a time), converts each
block to an array and keeps only the numbers: 8 bytes per cell and 4 per row for
its line number, no Python object per row.  The whole log is validated
before a run starts; the result is a :class:`CommandLog`, a sequence of
:class:`Command` made as they are asked for.
"""
from __future__ import annotations

import csv
import math
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import islice

import numpy as np

from sim.errors import InputError, quote
from sim.files import fields as F
from sim.files.reading import open_regular, read_parquet, text_blocks, text_lines

TWIST_COLUMNS = ("vx", "vy", "omega")
PARQUET_MAGIC = b"PAR1"          # a file that starts so is read as Parquet
_UNITS = {"t": "s", "vx": "m/s", "vy": "m/s", "omega": "rad/s", "spin": "rad/s", "steer": "rad"}


@dataclass(frozen=True)
class Command:
    """One script entry, held from ``at`` (s) until the next.

    kind : ``twist`` (value (vx, vy, omega), body frame), ``world_twist`` (value (vx, vy,
    omega), world frame: turned into the body frame every step), ``wheels`` (value
    {name: {"spin"?, "steer"?}}), ``stop``, or ``goto`` (value (x, y, theta or None): plan
    a route there from wherever the base is and track it).
    """

    at: float
    kind: str
    value: object = None
    line: int | None = None


class CommandLog(Sequence):
    """The commands of a log, as arrays; indexing gives :class:`Command` objects.

    Attributes
    ----------
    kind : ``twist`` or ``wheels``.
    columns : tuple of str, the log's columns after ``t``.
    t : ndarray, shape (n,), s, strictly increasing.
    values : ndarray, shape (n, len(columns)): m/s, rad/s, rad.
    lines : ndarray, shape (n,), int32: the line of each row in the file (0 in Parquet,
        which has no lines: the entries' ``line`` is then None).
    source : str, the file name used in messages.
    """

    def __init__(self, kind, columns, t, values, lines, source=""):
        self.kind, self.columns, self.source = kind, tuple(columns), source
        self.t, self.values, self.lines = t, values, lines

    def __len__(self) -> int:
        return len(self.t)

    def __getitem__(self, i):
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(len(self)))]
        i = range(len(self))[i]
        row = [float(v) for v in self.values[i]]
        if self.kind == "twist":
            d = dict(zip(self.columns, row))
            value = (d.get("vx", 0.0), d.get("vy", 0.0), d.get("omega", 0.0))
        else:
            value = {}
            for c, v in zip(self.columns, row):
                name, _, part = c.partition(".")
                value.setdefault(name, {})[part] = v
        return Command(float(self.t[i]), self.kind, value, int(self.lines[i]) or None)

    def __iter__(self):
        for i in range(len(self)):
            yield self[i]

    def __eq__(self, other):
        if not isinstance(other, CommandLog):
            return NotImplemented
        return (self.kind, self.columns) == (other.kind, other.columns) and np.array_equal(self.t, other.t) \
            and np.array_equal(self.values, other.values)

    __hash__ = None

    def __repr__(self) -> str:
        return f"CommandLog({self.source!r}, {self.kind}, {len(self)} rows)"


def _header(header, src, robot, line=1) -> str:
    """Check the header row (at ``line``; None in Parquet); return the kind of log (``twist`` or ``wheels``)."""
    if not header or header[0] != "t":
        raise InputError(src, line, "the first column must be 't' (s)")
    cols = header[1:]
    if len(set(header)) != len(header):
        dup = next(c for c in header if header.count(c) > 1)
        raise InputError(src, line, f"column {quote(dup)} appears twice")
    if cols and set(cols) <= set(TWIST_COLUMNS):
        return "twist"
    for c in cols:
        name, _, part = c.partition(".")
        if c in TWIST_COLUMNS:
            raise InputError(src, line, "a command log holds either twist columns (vx, vy, omega) or wheel "
                                        "columns (NAME.spin, NAME.steer), not both")
        if name not in robot.index or part not in ("spin", "steer"):
            raise InputError(src, line, f"unknown column {quote(c)}"
                                        f"{F.suggest(c, [n + '.spin' for n in robot.index])}; "
                                        "allowed: t, vx, vy, omega, or NAME.spin / NAME.steer per wheel")
        wh = robot.wheel(name)
        if part == "spin" and not wh.driven:
            raise InputError(src, line, f"column {quote(c)}: wheel '{name}' is not driven")
        if part == "steer" and wh.type != "steered":
            raise InputError(src, line, f"column {quote(c)}: wheel '{name}' is not steered")
    return "wheels"


def _unit(column: str) -> str:
    return _UNITS.get(column, _UNITS.get(column.partition(".")[2], ""))


class _Blocks:
    """Checks blocks of converted rows and keeps them, carrying the last ``t`` across blocks."""

    def __init__(self, header, src, duration, parquet=False):
        self.header, self.src, self.duration, self.parquet = header, src, duration, parquet
        self.units = [_unit(c) for c in header]
        self.limits = np.array([F.limit_for(u) for u in self.units])
        self.last = -math.inf
        self.t, self.values, self.lines = [], [], []

    def convert(self, rows, lines) -> np.ndarray:
        """Float array (m, ncols) of text rows; InputError at the first cell that is not a number."""
        try:
            return np.array(rows, dtype=float).reshape(len(rows), len(self.header))
        except ValueError:  # find the cell, with its line and column
            return np.array([[F.cell_number(cell, self.src, ln, c, u)
                              for c, cell, u in zip(self.header, row, self.units)]
                             for row, ln in zip(rows, lines)], dtype=float)

    def error(self, loc: int, message: str) -> InputError:
        """``file:line: message`` (CSV), or ``file: row N: message`` (Parquet, ``loc`` = N)."""
        if self.parquet:
            return InputError(self.src, None, f"row {loc}: {message}")
        return InputError(self.src, loc, message)

    def add(self, arr, lines, cell) -> None:
        """Check rows ``arr`` (m, ncols) from file lines ``lines`` (m,) (Parquet: row numbers);
        ``cell(i, j)`` is the text of a cell."""
        bad = ~np.isfinite(arr) | (np.abs(arr) > self.limits)
        if bad.any():
            i, j = np.argwhere(bad)[0]
            col, unit, v = quote(self.header[j]), self.units[j], arr[i, j]
            if not np.isfinite(v):
                raise self.error(int(lines[i]), f"column {col}: expected a finite number, got {quote(cell(i, j))}")
            raise self.error(int(lines[i]), f"column {col}: {F.describe_range(self.limits[j], unit)}, got {v:g}")
        t = arr[:, 0]
        prev = np.concatenate([[self.last], t[:-1]])
        wrong = np.flatnonzero((t < 0) | (t <= prev))
        if len(wrong):
            i = wrong[0]
            raise self.error(int(lines[i]), f"'t' must start at >= 0 and increase, got {t[i]:g} after {prev[i]:g}")
        if self.duration is not None:
            late = np.flatnonzero(t > self.duration + 1e-12)
            if len(late):
                i = late[0]
                raise self.error(int(lines[i]), f"command at t={t[i]:g} s comes after the end of the run "
                                                f"({self.duration:g} s); shorten the log or lengthen 'duration'")
        self.last = float(t[-1])
        self.t.append(t.copy())
        self.values.append(arr[:, 1:].copy())
        self.lines.append(np.asarray(lines, dtype=np.int32))


def _plain(text: str, ncols: int):
    """A block of rows of plain numbers: ``(array (m, ncols), cells)``, or None.

    Only when every line has ``ncols`` cells and :class:`float` reads every cell, which is
    exactly when the csv module would give the same cells (no quotes, no blank lines);
    anything else goes the slow way.  ``cells[i * ncols + j]`` is the text of a cell.
    """
    b = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    commas = np.cumsum(b == 44)                      # ","
    ends = np.flatnonzero(b == 10)                   # "\n"
    per_line = np.diff(np.concatenate([[0], commas[ends], commas[-1:]]))
    if not len(b) or (per_line != ncols - 1).any():
        return None
    cells = text.replace("\n", ",").split(",")
    try:
        flat = list(map(float, cells))
    except ValueError:
        return None
    return np.array(flat, dtype=float).reshape(len(ends) + 1, ncols), cells


def read_command_log(path, src: str, robot, duration: float | None = None) -> CommandLog:
    """Read and validate a command log (CSV, or Parquet) for ``robot``; ``src`` names it in messages.

    ``duration`` (s), when given, refuses commands after the end of the run.
    Raises InputError (``src:line: message``; Parquet, which has no lines:
    ``src: row N: message``).  CSV rows are read a block of lines at a time: plain
    numbers straight into arrays, anything else (quotes, blank lines, a bad cell)
    through the csv module, which also finds the line and column of an error.
    """
    with open_regular(path, "command log") as fh:
        if fh.read(4) == PARQUET_MAGIC:
            return _parquet(path, src, robot, duration)
        fh.seek(0)
        first = list(islice(text_lines(fh, src, "command log"), 1))
        header = F.csv_header(csv.reader(first, strict=True), src,
                              "empty command log; expected a header row starting with t")
        kind = _header(header, src, robot)
        ncols = len(header)
        blocks = _Blocks(header, src, duration)
        for n, text in text_blocks(fh, src, "command log", first=2):
            plain = _plain(text, ncols)
            if plain is not None:
                arr, cells = plain
                blocks.add(arr, np.arange(n, n + len(arr)), lambda i, j: cells[i * ncols + j])
                continue
            rows, lns = [], []
            for ln, row in F.csv_records(csv.reader(text.split("\n"), strict=True), src, ncols, first=n):
                rows.append(row)
                lns.append(ln)
            if rows:
                blocks.add(blocks.convert(rows, lns), lns, lambda i, j: rows[i][j])
    if not blocks.t:
        raise InputError(src, 2, "command log has no rows")
    return CommandLog(kind, header[1:], np.concatenate(blocks.t), np.concatenate(blocks.values),
                      np.concatenate(blocks.lines), src)


def _parquet(path, src, robot, duration) -> CommandLog:
    """A command log written as Parquet: its columns straight into arrays (polars)."""
    import polars as pl

    frame, header = read_parquet(path, src)
    kind = _header(header, src, robot, None)
    if frame.height == 0:
        raise InputError(src, None, "command log has no rows")
    blocks = _Blocks(header, src, duration, parquet=True)
    cols = []
    for j, name in enumerate(frame.columns):
        s = frame.get_column(name)
        if s.null_count():
            i = int(s.is_null().arg_max())
            raise blocks.error(i + 1, f"column {quote(header[j])}: expected a number, got a blank cell")
        try:
            cols.append(s.cast(pl.Float64, strict=True).to_numpy())
        except Exception:                                  # noqa: BLE001 - text or other kinds: find the cell
            for i, v in enumerate(s.to_list()):
                try:
                    float(v)
                except (TypeError, ValueError):
                    raise blocks.error(i + 1, f"column {quote(header[j])}: expected a number, "
                                              f"got {quote(v)}") from None
            cols.append(np.array([float(v) for v in s.to_list()]))
    arr = np.column_stack(cols).astype(float)
    rows = np.arange(1, len(arr) + 1)
    blocks.add(arr, rows, lambda i, j: repr(arr[i, j]))
    return CommandLog(kind, header[1:], blocks.t[0], blocks.values[0], np.zeros(len(arr), dtype=np.int32), src)
