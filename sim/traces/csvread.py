"""Reading CSV traces in chunks of whole lines, with checks (for :mod:`sim.tracediff`).

:class:`TraceFile` reads the header (line 1: column names, ``t`` required,
no blanks or duplicates) and then yields blocks of data lines as bytes,
about ``chunk_bytes`` at a time, so memory stays flat.  Every block is
checked: a block of only digits, ``. e E + -``, commas and line ends with
the right number of cells per line passes at C speed; anything else (quoted
cells, ``nan``/``inf`` text, spaces, bad cells) goes through a careful
cell-by-cell reading that either normalises the lines or raises
:class:`~sim.errors.InputError` with ``file:line``.  Cells are turned into
numbers only on demand, so cells that are byte-identical in two traces need
never be parsed.

:class:`Cells` locates the cells of a block of lines and reads them as
numbers with whole-array numpy operations (no Python call per cell, see its
docstring); it declines anything unusual, and the caller then falls back to
:func:`floats`, whose per-cell reading gives the ``file:line`` messages.
"""
from __future__ import annotations

import csv
import os

import numpy as np

from sim.errors import InputError

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

    def blocks(self, cells=False):
        """Yield ``(first file line, lines, widest cell)`` per block of about ``chunk`` bytes, validated.

        Lines are bytes without line ends.  With ``cells``, each tuple also
        holds the block's :class:`Cells` (None when the block needed the
        careful reading).
        """
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
                    yield self._block(rest, True, cells)
                return
            data = rest + data
            cut = data.rfind(b"\n")
            if cut < 0:
                rest = data
                continue
            rest = data[cut + 1:]
            yield self._block(data[:cut + 1], False, cells)

    def _block(self, data, final, cells=False):
        """(first file line, lines, widest cell in bytes[, Cells]) of a chunk of whole lines."""
        buf = np.frombuffer(data, np.uint8)
        eol, allowed = b"\n", _FAST_CHARS
        nl = np.count_nonzero(buf == 10)
        if b"\r" in data:
            cr = np.flatnonzero(buf == 13)
            if cr.size == nl and np.all(buf[cr + 1] == 10):
                eol, allowed = b"\r\n", _FAST_CHARS + b"\r"   # all line ends CR LF: split there, no copy
            else:
                data = data.replace(b"\r\n", b"\n")
                buf = np.frombuffer(data, np.uint8)
        ok = not data.translate(None, allowed)
        width, block = 0, None
        if ok:
            sep = np.flatnonzero((buf == 44) | (buf == 10))
            # nc cells per line: nc separators per line end, every nc-th one a line end
            ok = sep.size == nl * self.nc and bool(np.all(buf[sep[self.nc - 1::self.nc]] == 10))
            if ok and sep.size:
                block = Cells.located(data, self.nc, sep, len(eol) - 1)
                width = int(block.lens.max())
        lines = data.split(eol)
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
        return (first, lines, width, block) if cells else (first, lines, width)

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


# -- reading whole blocks of cells with numpy -----------------------------------
_W = 24                                        # widest cell read by Cells: '-1.2345678901234567e-308'
_U = np.uint64
# the same byte in all eight bytes of a word
_B01, _B30, _B76, _B80 = (_U(0x0101010101010101 * b) for b in (0x01, 0x30, 0x76, 0x80))


def _window_masks():
    """(25, 3) uint64: for a cell of n bytes at the end of the 24-byte window, its bytes in each word."""
    out = np.zeros((_W + 1, 3), np.uint64)
    for n in range(_W + 1):
        for k in range(3):
            inside = min(max(8 * (k + 1) - (_W - n), 0), 8)      # top bytes of word k inside the cell
            out[n, k] = ((1 << 64) - (1 << (8 * (8 - inside)))) if inside else 0
    return out


_MASKS = _window_masks()
_MASK_COLS = [np.ascontiguousarray(_MASKS[:, k]) for k in range(3)]


def _position_tables():
    """Per window byte p (0..23) and p = 24 for none: the flag 0x80 at p; bytes after p; their number."""
    flag = np.zeros((_W + 1, 3), np.uint64)
    after = np.zeros((_W + 1, 3), np.uint64)
    for p in range(_W):
        flag[p, p // 8] = 0x80 << (8 * (p % 8))
        for b in range(p + 1, _W):
            after[p, b // 8] |= np.uint64(0xFF << (8 * (b % 8)))
    after[_W] = 0xFFFFFFFFFFFFFFFF                # no point: every byte stays where it is
    return flag, after, np.array([_W - 1 - p for p in range(_W)] + [0])


_FLAG_AT, _AFTER, _N_AFTER = _position_tables()
_MUL = np.concatenate([np.ones(22), 10.0 ** np.arange(23)])        # 10**q for q = 0..22, else 1 (exact)
_DIV = np.concatenate([10.0 ** np.arange(22, 0, -1), np.ones(23)])  # 10**-q for q = -22..-1, else 1
_QMIN, _QMAX = -300, 300
_DD = None                                      # 10**q as double-doubles, q in [_QMIN, _QMAX]


def _count_bytes(flags):
    """Number of bytes with the top bit set in each word of ``flags`` (only 0x80 / 0 bytes)."""
    return ((flags >> _U(7)) * _B01) >> _U(56)


def _eight_digits(z):
    """Words of eight digit values 0..9 (first digit in the lowest byte) -> their number (SWAR)."""
    for mul, shift, keep in ((10, 8, 0x00FF00FF00FF00FF), (100, 16, 0x0000FFFF0000FFFF), (10000, 32, 0xFFFFFFFF)):
        hi = z >> _U(shift)
        z = z * _U(mul)
        z += hi
        z &= _U(keep)
    return z


def _dd_powers():
    """10**q (q = _QMIN.._QMAX) as double-doubles hi + lo, |hi + lo - 10**q| <= 2**-106 10**q."""
    global _DD
    if _DD is None:
        from fractions import Fraction
        hi = np.empty(_QMAX - _QMIN + 1)
        lo = np.empty(_QMAX - _QMIN + 1)
        for i, q in enumerate(range(_QMIN, _QMAX + 1)):
            exact = Fraction(10) ** q
            hi[i] = float(exact)                # float(Fraction) rounds correctly
            lo[i] = float(exact - Fraction(float(hi[i])))
        _DD = hi, lo
    return _DD


def _split(a):
    c = 134217729.0 * a                         # Veltkamp split (2**27 + 1) for Dekker's exact product
    h = c - (c - a)
    return h, a - h


def _to_double(M, q):
    """Correctly rounded doubles of ``M * 10**q`` (``M`` uint64 < 2**62, ``q`` int64; shape (n,)).

    Returns ``(x, ok)``; where ``ok`` is False the caller must convert another way.
    Clinger's fast path (common practice): for M < 2**53 and |q| <= 22 both M
    and 10**|q| are exact doubles, so one IEEE multiply or divide rounds
    correctly.  Otherwise M * 10**q is formed as a double-double (Dekker's exact
    product with a double-double power of ten; error below 2**-100 relative),
    rounded, and kept only when the exact remainder of that rounding lies
    clearly inside half the gap to the neighbouring double on its side.
    """
    Mh = M.astype(np.float64)
    qc = np.minimum(np.maximum(q, -22), 22) + 22
    x = Mh * _MUL[qc] / _DIV[qc]                 # one of the two is 1: a single rounding
    ok = (M < _U(1 << 53)) & (qc == q + 22)
    slow = np.flatnonzero(~ok)
    if not slow.size:
        return x, ok
    hi, lo = _dd_powers()
    qs, Mh = q[slow], Mh[slow]
    qi = np.minimum(np.maximum(qs, _QMIN), _QMAX) - _QMIN
    ph, pl = hi[qi], lo[qi]
    Ml = (M[slow].astype(np.int64) - Mh.astype(np.int64)).astype(np.float64)     # M = Mh + Ml exactly
    with np.errstate(invalid="ignore", over="ignore", under="ignore"):     # out of range: not ok below
        p = Mh * ph
        ah, al = _split(Mh)
        bh, bl = _split(ph)
        c = (((ah * bh - p) + ah * bl + al * bh) + al * bl) + (Mh * pl + Ml * ph)
        r = p + c
        bb = r - p
        err = (p - (r - bb)) + (c - bb)          # p + c = r + err exactly (Knuth's two-sum)
        # the neighbouring double on err's side (r > 0: its bit pattern +-1), and the gap to it
        gap = np.abs((r.view(np.int64) + ((err >= 0) * 2 - 1)).view(np.float64) - r)
        good = np.abs(err) + r * 2.0 ** -90 < 0.5 * gap
        good &= (r > 1e-250) & (r < 1e250) & (qs >= _QMIN) & (qs <= _QMAX)
    x[slow] = r
    ok[slow] = good
    return x, ok


class Cells:
    """The cells of a block of CSV lines, located and turned into numbers at C speed.

    ``Cells.of(lines, ncols)`` takes lines (bytes without line ends) of
    ``ncols`` cells each and returns None unless every line has exactly
    ``ncols`` cells of only ``0-9 . e E + -``; :meth:`located` is the same for
    a block whose separators are already known.  Cell ``i`` (flat, row-major:
    row ``i // ncols``) ends at byte ``ends[i]`` of the block and is
    ``lens[i]`` bytes long.  A cell is handled as the 24-byte window that ends
    with it, three little-endian uint64 words with the bytes before the cell
    cleared (:meth:`word`); ``fits`` says whether every cell fits (at most 24
    bytes; :meth:`values` declines otherwise).

    :meth:`differ` compares cells of two blocks byte for byte (lengths, then
    only the words a cell reaches into).  :meth:`values` reads cells as
    Python's ``float`` does (correctly rounded, blank = nan) without a Python
    call per cell: the words are checked for the number syntax
    ``[+-] digits [. digits] [e [+-] digits]``, the exponent and the point are
    found with byte tricks on whole words, the digits become an integer M,
    eight at a time, and ``M * 10**q`` is rounded by :func:`_to_double`.  Cells
    it cannot settle that way (mantissas beyond 2**62, extreme exponents,
    near-ties) go through ``float`` one by one.
    """

    BATCH = 16384                                # cells per pass of :meth:`values` (its arrays stay in cache)

    def __init__(self, data, rows, ncols, ends, lens):
        self.data, self.rows, self.ncols = data, rows, ncols
        self.ends, self.lens = ends, lens
        self.fits = bool(lens.max(initial=0) <= _W)
        self._pad = None

    def _views(self):
        """(X, windows): X[j] = the 8 bytes from byte j of the padded block (unaligned view), and
        windows[j] = its 24 bytes from j; cell i's window starts at byte ends[i] of the padding."""
        if self._pad is None:                   # (made on first use: blocks equal in both traces never need it)
            pad = bytes(_W) + self.data + bytes(8)
            self._pad = (np.ndarray((len(pad) - 7,), "<u8", buffer=pad, strides=(1,)),
                         np.lib.stride_tricks.sliding_window_view(np.frombuffer(pad, np.uint8), _W))
        return self._pad

    @classmethod
    def located(cls, data, ncols, sep, cr=0):
        """Cells of ``data`` (whole lines) with separators (',' and line feeds) at byte offsets ``sep``.

        ``sep`` must hold ``ncols`` offsets per line, every ``ncols``-th a line
        feed; ``cr`` = 1 when each line feed follows a carriage return.
        """
        ends = sep
        if cr:
            ends = sep.copy()
            ends[ncols - 1::ncols] -= 1
        lens = np.empty_like(ends)
        lens[0] = ends[0]
        np.subtract(ends[1:], sep[:-1] + 1, out=lens[1:])
        return cls(data, ends.size // ncols, ncols, ends, lens)

    @classmethod
    def of(cls, lines, ncols):
        """Cells of ``lines`` (bytes without line ends), or None unless they suit :class:`Cells`."""
        data = b"\n".join(lines) + b"\n"
        if data.translate(None, _FAST_CHARS):
            return None
        buf = np.frombuffer(data, np.uint8)
        sep = np.flatnonzero((buf == 44) | (buf == 10))
        if sep.size != len(lines) * ncols or not np.all(buf[sep[ncols - 1::ncols]] == 10):
            return None
        return cls.located(data, ncols, sep)

    def word(self, i, k):
        """Word ``k`` (0..2) of the windows of cells ``i`` (of longer cells: their last 24 bytes).

        uint64, shape (len(i),).
        """
        L = np.minimum(self.lens[i], _W)
        return self._views()[0][self.ends[i] + 8 * k] & _MASK_COLS[k][L]   # (np.take would copy the view)

    def differ(self, other, i, j):
        """Bool array: cell ``i`` here differs in bytes from cell ``j`` of ``other`` (flat indices, shape (n,))."""
        La, Lb = self.lens[i], other.lens[j]
        out = La != Lb
        cand = np.flatnonzero(~out & (La > 0))
        for k, least in ((2, 0), (1, 8), (0, 16)):      # only the words the cells reach into
            cand = cand[La[cand] > least]
            if not cand.size:
                break
            d = self.word(i[cand], k) != other.word(j[cand], k)
            out[cand[d]] = True
            cand = cand[~d]
        if not (self.fits and other.fits):
            for m in cand[La[cand] > _W].tolist():     # cells longer than a window: compare in full
                out[m] = self.text(i[m]) != other.text(j[m])
        return out

    def text(self, i) -> bytes:
        """The bytes of cell ``i``."""
        end = int(self.ends[i])
        return self.data[end - int(self.lens[i]):end]

    def values(self, idx):
        """Floats of cells ``idx`` (flat indices, shape (n,)), nan for blank; None if one is not a number."""
        idx = np.asarray(idx, dtype=np.int64)
        if not self.fits and (self.lens[idx] > _W).any():
            return None
        out = np.empty(idx.size)
        for b in range(0, idx.size, self.BATCH):
            part = idx[b:b + self.BATCH]
            x = self._values(part)
            if x is None:
                return None
            out[b:b + self.BATCH] = x
        return out

    def _values(self, idx):
        L = self.lens[idx]
        n = idx.size
        # digits become 0..9, '.' 0x1e, '+' 0x1b, '-' 0x1d, 'e' 0x55, 'E' 0x75; bytes outside the cell 0
        x = self._views()[1][self.ends[idx]].view("<u8")
        x ^= _B30
        x &= np.take(_MASKS, L, axis=0)
        nd = x + _B76
        nd &= _B80                                # 0x80 on every byte that is not a digit
        marker = x << _U(1)
        marker &= _B80                            # 0x80 on 'e' and 'E' (bit 6: no other byte has it)
        if (marker[:, 0] | marker[:, 1]).any():
            return None                          # exponent longer than 7 bytes, or a misplaced marker
        e2 = marker[:, 2]
        if (e2 & (e2 - _U(1))).any():
            return None                          # two markers
        q = np.zeros(n, np.int64)
        ml = L.copy()                            # bytes of the mantissa
        sub = np.flatnonzero(e2)
        if sub.size:                             # cells with an exponent: read it, then shift it out
            xs = x[sub]
            te = e2[sub] >> _U(7)
            le = _count_bytes(~((te << _U(8)) - _U(1)) & _B80)                  # bytes after the marker
            ex = xs[:, 2] >> (_U(64) - _U(8) * le)                              # their text, first byte lowest
            b0 = ex & _U(0xFF)
            eneg = b0 == _U(0x1D)
            esign = (eneg | (b0 == _U(0x1B))).astype(np.uint64)
            nde = le - esign
            z = (ex >> (_U(8) * esign)) << (_U(8) * (_U(8) - nde))              # digits at the top
            if (nde == _U(0)).any() or ((z + _B76) & _B80).any():
                return None
            ev = _eight_digits(z).astype(np.int64)
            q[sub] = np.where(eneg, -ev, ev)
            sh = np.repeat(_U(8) * (le + _U(1)), 3).reshape(-1, 3)     # (same shapes: no slow broadcast)
            shifted = xs << sh
            shifted[:, 1:] |= xs[:, :-1] >> (_U(64) - sh[:, 1:])
            x[sub] = shifted
            nd[sub] = (shifted + _B76) & _B80
            ml[sub] -= (le + _U(1)).astype(np.int64)
        t = x << _U(7)
        np.bitwise_and(nd, ~t, out=t)            # '.': the non-digit with bit 0 clear
        signs = nd ^ t
        t >>= _U(7)
        first = np.frombuffer(self.data, np.uint8)[self.ends[idx] - L]
        neg = first == 45
        ndot = ((t[:, 0] + t[:, 1] + t[:, 2]) * _B01) >> _U(56)
        signs &= ~np.take(_FLAG_AT, _W - ml, axis=0)
        ml -= ndot.astype(np.int64)
        ml -= neg | (first == 43)
        if signs.any() or (ndot > _U(1)).any() or ((ml < 1) & (L > 0)).any():
            return None                          # a sign not in front, two points, or no digit
        # digits only, then close the gap the point leaves (bytes before it move up one)
        nd >>= _U(7)
        nd *= _U(0xFF)
        x &= ~nd
        # window byte of the point: t = 2**(8 j) in word k, so its double has exponent 8 j
        j = t.astype(np.float64).view(np.int64)
        j >>= 52
        j -= 1023
        j >>= 3                                  # -128 where none
        pos = np.maximum(np.maximum(j[:, 0], j[:, 1] + 8), j[:, 2] + 16)
        pos[pos < 0] = _W
        after = np.take(_AFTER, pos, axis=0)
        before = x & ~after
        x &= after
        z = x.reshape(-1)
        before = before.reshape(-1)
        z |= before << _U(8)
        before >>= _U(56)
        z[1:] |= before[:-1]                     # into the next word (never out of a row's last word)
        v = _eight_digits(x)
        v0 = v[:, 0]
        big = v0 >= _U(461)                      # M >= 2**62
        M = v0 * _U(10 ** 8)
        M += v[:, 1]
        M *= _U(10 ** 8)
        M += v[:, 2]
        M[big] = 0
        q -= _N_AFTER[pos]
        x, ok = _to_double(M, q)
        ok &= ~big
        np.negative(x, out=x, where=neg)
        x[L == 0] = np.nan
        for i in np.flatnonzero(~ok & (L > 0)).tolist():
            x[i] = float(self.text(idx[i]))
        return x
