"""Reading CSV traces in chunks of whole lines, with checks (for :mod:`sim.tracediff`).

:class:`TraceFile` reads the header (line 1: column names, ``t`` required,
no blanks or duplicates) and then yields blocks of data lines as bytes,
about ``chunk_bytes`` at a time, so memory stays flat.  Every block is
checked: a block of only digits, ``. e E + -``, commas and line ends with
the right number of cells per line passes at C speed; anything else (quoted
cells, ``nan``/``inf`` text, spaces, bad cells) goes through a careful
cell-by-cell reading that either normalises the lines or raises
:class:`~sim.errors.InputError` with ``file:line``.  Cells are turned into
numbers only on demand (:func:`floats`), so cells that are byte-identical in
two traces need never be parsed.
"""
from __future__ import annotations

import csv
import os

import numpy as np

from .errors import InputError

CHUNK_BYTES = 1 << 20
_FAST_CHARS = b"0123456789.eE+-,\n"      # a chunk of only these needs no careful reading


class TraceFile:
    """One CSV trace read in chunks of whole lines (bytes, without line ends).

    ``start``/``end`` (bytes) and ``line`` (file line of the row at ``start``)
    read only a segment of the data rows; the header is read in any case.
    ``columns`` (tuple of str), ``rows`` (rows read so far), ``head`` (first
    two data lines), ``last`` (last data line) describe what was read.
    """

    def __init__(self, path, chunk_bytes, start=None, end=None, line=2):
        self.path = os.fspath(path)
        self.chunk = max(int(chunk_bytes), 64)
        try:
            self.fh = open(self.path, "rb")
        except FileNotFoundError:
            raise InputError(self.path, None, "file not found") from None
        except IsADirectoryError:
            raise InputError(self.path, None, "is a folder, expected a CSV trace") from None
        except OSError as exc:
            raise InputError(self.path, None, f"cannot read file: {exc.strerror}") from None
        self.rows = 0
        self.line = 2                  # file line of the next data row
        self.head = []                 # first two data lines
        self.last = None               # last data line
        self._rest = b""
        self._eof = False
        try:
            self.columns = self._header()
        except BaseException:
            self.fh.close()
            raise
        self.nc = len(self.columns)
        self.end = end                 # stop reading at this byte offset (None: end of file)
        if start is not None:          # a segment: data rows from byte ``start``, file line ``line``
            self.fh.seek(start)
            self._rest = b""
            self.line = line
        self.pos = self.fh.tell()

    def close(self):
        self.fh.close()

    def _header(self):
        data = b""
        while b"\n" not in data:
            more = self.fh.read(self.chunk)
            if not more:
                break
            data += more
        line, _, self._rest = data.partition(b"\n")
        line = line.rstrip(b"\r")
        if not line.strip():
            raise InputError(self.path, 1, "empty file; expected a header line t,x,y,theta,...")
        try:
            text = line.decode("utf-8-sig")
        except UnicodeDecodeError:
            raise InputError(self.path, 1, "the header is not UTF-8 text") from None
        try:
            names = [n.strip() for n in next(csv.reader([text]))]
        except csv.Error as exc:
            raise InputError(self.path, 1, f"malformed CSV header: {exc}") from None
        if any(not n for n in names):
            raise InputError(self.path, 1, "the header has a blank column name")
        seen = set()
        for n in names:
            if n in seen:
                raise InputError(self.path, 1, f"column '{n}' appears twice in the header")
            seen.add(n)
        if "t" not in seen:
            raise InputError(self.path, 1, "no column 't'; expected a trace header such as t,x,y,theta,...")
        return tuple(names)

    def blocks(self):
        """Yield lists of data lines (bytes), validated, about ``chunk`` bytes each."""
        rest = self._rest
        while True:
            size = self.chunk if self.end is None else min(self.chunk, self.end - self.pos)
            data = self.fh.read(size) if size > 0 else b""
            self.pos += len(data)
            if not data:
                self._eof = True
                if rest:
                    if not rest.endswith(b"\n"):
                        rest += b"\n"                  # last row without a line end (RFC 4180 allows it)
                    yield self._block(rest, final=True)
                return
            data = rest + data
            cut = data.rfind(b"\n")
            if cut < 0:
                rest = data
                continue
            rest = data[cut + 1:]
            yield self._block(data[:cut + 1], final=False)

    def _block(self, data, final):
        """(first file line, lines, widest cell in bytes) of a chunk of whole lines."""
        if b"\r" in data:
            data = data.replace(b"\r\n", b"\n")
        ok = not data.translate(None, _FAST_CHARS)
        width = 0
        if ok:
            buf = np.frombuffer(data, np.uint8)
            sep = np.flatnonzero((buf == 44) | (buf == 10))
            ends = np.flatnonzero(buf[sep] == 10)
            ok = bool(np.all(np.diff(ends, prepend=-1) == self.nc))
            if ok and sep.size:
                width = int(np.max(np.diff(sep, prepend=-1))) - 1
        lines = data.split(b"\n")
        lines.pop()
        if not ok:
            lines = self._careful(lines, final)
            width = max((len(c) for ln in lines for c in ln.split(b",")), default=0)
        first = self.line
        self.line += len(lines)
        self.rows += len(lines)
        if len(self.head) < 2:
            self.head += lines[: 2 - len(self.head)]
        if lines:
            self.last = lines[-1]
        return first, lines, width

    def _careful(self, lines, final):
        """Check every cell of ``lines``; return them normalised (unquoted, stripped)."""
        out = []
        for i, raw in enumerate(lines):
            ln = self.line + i
            try:
                text = raw.decode("ascii")
            except UnicodeDecodeError:
                raise InputError(self.path, ln, "not plain text: a trace holds numbers and blank cells") from None
            if '"' in text:
                try:
                    cells = next(csv.reader([text]))
                except csv.Error as exc:
                    raise InputError(self.path, ln, f"malformed CSV: {exc}") from None
            else:
                cells = text.split(",")
            if not text.strip():
                raise InputError(self.path, ln, f"blank line; expected {self.nc} cells")
            if len(cells) != self.nc:
                last = final or (i == len(lines) - 1 and self._at_end())
                hint = " (the file ends inside this row: truncated?)" if last and len(cells) < self.nc else ""
                raise InputError(self.path, ln, f"expected {self.nc} cells, got {len(cells)}{hint}")
            norm = []
            for name, c in zip(self.columns, cells):
                c = c.strip()
                if c:
                    try:
                        float(c)
                    except ValueError:
                        raise InputError(self.path, ln, f"column '{name}': expected a number or a blank cell, "
                                                        f"got '{c}'") from None
                norm.append(c)
            out.append(",".join(norm).encode("ascii"))
        return out

    def _at_end(self) -> bool:
        pos = self.fh.tell()
        more = self.fh.read(1)
        self.fh.seek(pos)
        return not more


def floats(cells, where):
    """Cells (bytes, blank = nan) -> float array; ``where(i)`` -> (source, line, column) on error."""
    if not cells:
        return np.empty(0)
    s = b",".join(cells)
    if b",," in s or s[:1] == b"," or s[-1:] == b",":
        s = (b"," + s + b",").replace(b",,", b",nan,").replace(b",,", b",nan,")[1:-1]
    elif not s:
        s = b"nan"
    try:
        v = np.fromstring(s, sep=",")
        if v.size == len(cells):
            return v
    except (ValueError, DeprecationWarning):
        pass
    out = np.empty(len(cells))
    for i, c in enumerate(cells):
        try:
            out[i] = float(c) if c else np.nan
        except ValueError:
            src, ln, name = where(i)
            raise InputError(src, ln, f"column '{name}': expected a number or a blank cell, "
                                      f"got '{c.decode('ascii', 'replace')}'") from None
    return out
