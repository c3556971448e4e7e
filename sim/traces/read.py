"""Reading traces, CSV or Parquet, a page of whole rows at a time (polars does the parsing).

:class:`TraceReader` opens a trace (a Parquet file is recognised by its
``PAR1`` signature, anything else is read as CSV), checks its header and hands
out :class:`Page` objects of whole rows, about ``chunk_bytes`` of CSV text or
``PARQUET_ROWS`` rows at a time, so memory stays flat however long the trace.
A page's numbers come from :meth:`Page.values`: float64, NaN for a blank cell
(or a null in Parquet), shape (rows, columns).

CSV pages are checked before polars parses them: every line must hold exactly
one cell per column and no quote.  Polars reports a bad cell without its line,
so any page that fails the check or that polars declines is read again
cell by cell with the csv module and ``float()`` (the slower pass): that pass
either accepts what polars did not (spaces around a number, quoted cells) or
raises :class:`~sim.errors.InputError` ``file:line: message``.  A cell is a
number in Python's syntax (``inf`` and ``nan`` included) or blank.

A trace needs a ``t`` column, unique non-blank column names, and (Parquet)
numeric column types.  Rows are addressed by data row (0-based); CSV rows
also by file line (data row + 2).
"""
from __future__ import annotations

import csv
import io
import os

import numpy as np

from sim.errors import InputError, clip, quote
from sim.files.reading import open_regular
from sim.files.table import PARQUET_MAGIC

CHUNK_BYTES = 4 << 20          # CSV text per page
PARQUET_ROWS = 1 << 14         # Parquet rows per page
PARQUET_READ = 1 << 16         # Parquet rows decoded at a time


def _open_error(path, exc: OSError, what="a trace") -> InputError:
    if isinstance(exc, FileNotFoundError):
        return InputError(path, None, "file not found")
    if isinstance(exc, IsADirectoryError):
        return InputError(path, None, f"is a folder, expected {what}")
    return InputError(path, None, f"cannot read file: {exc.strerror or exc}")


def check_header(names, path, require_t=True) -> tuple:
    """Column names as given (stripped): none blank, none twice, ``t`` present."""
    names = [str(n).strip() for n in names]
    if any(not n for n in names):
        raise InputError(path, 1, "the header has a blank column name")
    seen = set()
    for n in names:
        if n in seen:
            raise InputError(path, 1, f"column {quote(n)} appears twice in the header")
        seen.add(n)
    if require_t and "t" not in seen:
        raise InputError(path, 1, "no column 't'; expected a trace header such as t,x,y,theta,...")
    return tuple(names)


class Page:
    """Rows ``first_row .. first_row + len - 1`` of a trace.

    CSV: ``data`` holds the page's lines as in the file, each ending in
    ``\n`` (a ``\r`` before it kept); Parquet: ``data`` is None and the
    page holds its numbers already.
    """

    def __init__(self, reader, first_row, n, data=None, frame=None, final=False):
        self.reader = reader
        self.first_row = first_row
        self.n = n
        self.data = data
        self._frame = frame
        self._ends = None
        self.final = final              # the last page of the file

    def __len__(self) -> int:
        return self.n

    @property
    def ends(self) -> np.ndarray:
        """Byte offsets of the line ends (CSV), shape (n,)."""
        if self._ends is None:
            self._ends = np.flatnonzero(np.frombuffer(self.data, np.uint8) == 10)
        return self._ends

    def line(self, i) -> bytes:
        """Raw line ``i`` (CSV; without the ``\n``)."""
        ends = self.ends
        return self.data[(int(ends[i - 1]) + 1 if i else 0):int(ends[i])]

    @property
    def lines(self) -> list:
        """The raw lines (CSV; bytes without the ``\n``)."""
        return self.data.split(b"\n")[:-1]

    def error(self, i, message) -> InputError:
        """InputError located at row ``i`` of this page (``file:line`` or ``file: row N``)."""
        return self.reader.error(self.first_row + i, message)

    def check(self) -> None:
        """Check the shape without reading numbers: one cell per column on every line, no quotes.

        A page that fails goes through the careful reading, which raises at
        the first bad line (or accepts, e.g. quoted cells).
        """
        if self.data is None:
            return
        nc = self.reader.nc
        buf = np.frombuffer(self.data, np.uint8)
        sep = np.flatnonzero((buf == 44) | (buf == 10))
        # nc separators per line, every nc-th one a line end
        if (b'"' in self.data or sep.size != self.n * nc
                or not bool(np.all(buf[sep[nc - 1::nc]] == 10))):
            self.values()
        elif self._ends is None:
            self._ends = sep[nc - 1::nc]

    def values(self, rows=None, cols=None) -> np.ndarray:
        """Numbers of ``rows`` (indices into the page, default all) and ``cols`` (column
        indices, default all): float64 (len(rows), len(cols)), Fortran order, NaN blank."""
        rd = self.reader
        cols = list(range(rd.nc)) if cols is None else [int(c) for c in cols]
        uniq = list(dict.fromkeys(cols))
        if len(uniq) != len(cols):         # a column asked for twice: read it once
            got = self.values(rows, uniq)
            return np.asfortranarray(got[:, [uniq.index(c) for c in cols]])
        if self.data is None:
            frame = self._frame if rows is None else self._frame[np.asarray(rows, dtype=np.int64)]
            return frame.select([rd.keys[c] for c in cols]).to_numpy(order="fortran").astype(np.float64, copy=False)
        if rows is None:
            idx, data, n = range(self.n), self.data, self.n
        else:
            idx = [int(r) for r in rows]
            data = b"".join([self.line(i) + b"\n" for i in idx])
            n = len(idx)
        if n == 0:
            return np.empty((0, len(cols)), order="F")
        got = rd.parse(data, n, cols)
        if got is None:
            lines = self.lines
            got = rd.careful([lines[i] for i in idx], idx, self, cols)
        return got


class TraceReader:
    """A trace opened for reading in pages (see module docstring).

    ``path``, ``columns`` (tuple of str), ``kind`` ('csv' | 'parquet');
    ``rows`` counts the rows handed out so far.  Use as a context manager or
    call :meth:`close`.
    """

    def __init__(self, path, chunk_bytes: int = CHUNK_BYTES, require_t: bool = True):
        self.path = os.fspath(path)
        self.chunk = max(int(chunk_bytes), 64)
        self.rows = 0
        self._fh = None
        self._eof = False
        self._buf = b""
        self._pending = None
        self._offset = 0
        try:  # a regular file only: a FIFO or device is refused, never waited on
            with open_regular(self.path, "trace") as fh:
                self.kind = "parquet" if fh.read(4) == PARQUET_MAGIC else "csv"
        except OSError as exc:
            raise _open_error(self.path, exc) from None
        if self.kind == "parquet":
            self.columns = self._parquet_header(require_t)
        else:
            try:
                self._fh = open(self.path, "rb")
            except OSError as exc:
                raise _open_error(self.path, exc) from None
            try:
                self.columns = self._csv_header(require_t)
            except BaseException:
                self.close()
                raise
        self.keys = [f"c{i}" for i in range(len(self.columns))]     # names polars sees
        self._float_schema = None
        if self.kind == "csv":
            import polars as pl
            self._float_schema = {k: pl.Float64 for k in self.keys}
        self.nc = len(self.columns)

    # -- opening ---------------------------------------------------------------
    def _csv_header(self, require_t) -> tuple:
        data = b""
        while b"\n" not in data:
            more = self._fh.read(self.chunk)
            if not more:
                self._eof = True
                break
            data += more
        line, _, self._buf = data.partition(b"\n")
        line = line.rstrip(b"\r")
        if not line.strip():
            raise InputError(self.path, 1, "empty file; expected a header line t,x,y,theta,...")
        try:
            text = line.decode("utf-8-sig")
        except UnicodeDecodeError:
            raise InputError(self.path, 1, "the header is not UTF-8 text") from None
        try:
            names = next(csv.reader([text], strict=True))
        except csv.Error as exc:
            raise InputError(self.path, 1, f"malformed CSV header: {exc}") from None
        return check_header(names, self.path, require_t)

    def _parquet_header(self, require_t) -> tuple:
        import polars as pl
        try:
            schema = pl.read_parquet_schema(self.path)
        except Exception as exc:                          # noqa: BLE001 - polars raises several kinds
            raise InputError(self.path, None, f"not a readable Parquet file: {_first_line(exc)}") from None
        names = check_header(list(schema), self.path, require_t)
        for name, dtype in schema.items():
            if not (dtype.is_numeric() or dtype == pl.Null):
                raise InputError(self.path, None, f"column '{name}' holds {dtype}; a trace holds numbers")
        self._schema = list(schema)
        return names

    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None
        self._pending = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def error(self, row, message) -> InputError:
        """InputError at data row ``row`` (0-based): ``file:line`` (CSV) or ``file: row N`` (Parquet)."""
        if self.kind == "csv":
            return InputError(self.path, row + 2, message)
        return InputError(self.path, None, f"row {row + 1}: {message}")

    # -- pages -----------------------------------------------------------------
    def take(self, n: int | None = None) -> Page | None:
        """The next page: ``n`` rows (fewer at the end) or, by default, about a chunk; None at the end."""
        page = self._take_parquet(n) if self.kind == "parquet" else self._take_csv(n)
        if page is not None:
            self.rows += len(page)
        return page

    def pages(self):
        """Every remaining page, in order."""
        while True:
            p = self.take()
            if p is None:
                return
            yield p

    def _take_parquet(self, n):
        import polars as pl
        frame = self._pending
        if frame is None or len(frame) == 0:
            if self._eof:
                return None
            try:                                  # one row group's worth at a time: memory stays flat
                frame = pl.scan_parquet(self.path).slice(self._offset, PARQUET_READ).select(
                    [pl.col(c).cast(pl.Float64).alias(k) for c, k in zip(self._schema, self.keys)]).collect()
            except Exception as exc:                          # noqa: BLE001
                raise InputError(self.path, None, f"not a readable Parquet file: {_first_line(exc)}") from None
            self._offset += len(frame)
            if len(frame) < PARQUET_READ:
                self._eof = True
            if len(frame) == 0:
                return None
        take = min(n or PARQUET_ROWS, len(frame))
        self._pending = frame[take:]
        return Page(self, self.rows, take, frame=frame[:take])

    def _fill(self, want_lines=None, want_bytes=None) -> None:
        """Read until the buffer holds a chunk, ``want_lines`` line ends or ``want_bytes`` bytes, or the end."""
        counted = _count(self._buf, 10) if want_lines is not None else 0
        while not self._eof:
            if want_lines is not None:
                if counted >= want_lines:
                    return
            elif want_bytes is not None:
                if len(self._buf) >= want_bytes:
                    return
            elif len(self._buf) >= self.chunk and b"\n" in self._buf:
                return
            more = self._fh.read(self.chunk)
            if not more:
                self._eof = True
                return
            if want_lines is not None:
                counted += _count(more, 10)
            self._buf += more

    def take_like(self, page) -> Page | None:
        """The next page of this CSV trace: a copy of ``page`` (another trace's) when the bytes
        that follow here are the same, else as many rows as it has."""
        size = len(page.data)
        self._fill(want_bytes=size)
        if self._buf.startswith(page.data):
            data, self._buf = self._buf[:size], self._buf[size:]
            self.rows += page.n
            return Page(self, self.rows - page.n, page.n, data=data, final=self._eof and not self._buf)
        return self.take(page.n)

    def _take_csv(self, n):
        if n is not None and n <= 0:
            return None
        self._fill(n)
        buf = self._buf
        if n is None:
            cut = len(buf) if self._eof else buf.rfind(b"\n") + 1
        else:
            ends = np.flatnonzero(np.frombuffer(buf, np.uint8) == 10)
            cut = int(ends[n - 1]) + 1 if ends.size >= n else len(buf)
        data, self._buf = buf[:cut], buf[cut:]
        final = self._eof and not self._buf
        if final:                           # blank lines at the very end are no rows
            data = data.rstrip(b" \t\r\n")
        if data and not data.endswith(b"\n"):
            data += b"\n"                   # the last line may lack its line end (RFC 4180)
        if not data:
            return None
        return Page(self, self.rows, _count(data, 10), data=data, final=final)

    # -- parsing CSV -----------------------------------------------------------
    def parse(self, data, n, cols) -> np.ndarray | None:
        """Polars' reading of ``n`` whole lines (columns ``cols``), or None when it declines.

        The total number of separators must match (polars reads a short row
        as blanks, and refuses a long one), and no cell may be quoted.
        """
        import polars as pl
        if b'"' in data or _count(data, 44) != n * (self.nc - 1):
            return None
        try:   # polars reads the columns in file order; select puts them in the order asked (no copy)
            frame = pl.read_csv(data, has_header=False, schema=self._float_schema,
                                columns=sorted(set(cols)), raise_if_empty=False)
        except Exception:                                     # noqa: BLE001 - the careful pass says what
            return None
        if len(frame) != n:
            return None
        return frame.select([self.keys[c] for c in cols]).to_numpy(order="fortran").astype(np.float64, copy=False)

    def careful(self, lines, idx, page, cols) -> np.ndarray:
        """The slower pass: lines cell by cell (csv module, ``float``); InputError at the first bad one."""
        out = np.empty((len(lines), len(cols)), order="F")
        for k, (i, raw) in enumerate(zip(idx, lines)):
            raw = raw[:-1] if raw.endswith(b"\r") else raw
            try:
                text = raw.decode("ascii")
            except UnicodeDecodeError:
                raise page.error(i, "not plain text: a trace holds numbers and blank cells") from None
            if not text.strip():
                raise page.error(i, f"blank line; expected {self.nc} cells")
            try:
                cells = next(csv.reader([text]))
            except csv.Error as exc:
                raise page.error(i, f"malformed CSV: {clip(exc, 80)}") from None
            if len(cells) != self.nc:
                hint = (" (the file ends inside this row: truncated?)"
                        if page.final and i == page.n - 1 and len(cells) < self.nc else "")
                raise page.error(i, f"expected {self.nc} cells, got {len(cells)}{hint}")
            for j, c in enumerate(cols):
                cell = cells[c].strip()
                try:
                    out[k, j] = float(cell) if cell else np.nan
                except ValueError:
                    raise page.error(i, f"column {quote(self.columns[c])}: expected a number or a blank cell, "
                                        f"got {quote(cell)}") from None
            for c in set(range(self.nc)) - set(cols):       # the other cells must be numbers too
                cell = cells[c].strip()
                if cell:
                    try:
                        float(cell)
                    except ValueError:
                        raise page.error(i, f"column {quote(self.columns[c])}: expected a number or a blank "
                                            f"cell, got {quote(cell)}") from None
        return out


def _count(data: bytes, byte: int) -> int:
    """How many times ``byte`` occurs in ``data`` (numpy: faster than ``bytes.count`` for one byte)."""
    return int(np.count_nonzero(np.frombuffer(data, np.uint8) == byte))


def _first_line(exc) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
