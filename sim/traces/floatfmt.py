"""Fast, exact text for arrays of floats: the same strings as Python's ``repr``.

Writing a trace spends most of its time turning floats into text; ``repr``
costs about half a microsecond per value.  This module produces the same
shortest round-trip strings for whole arrays with numpy:

1. ``|x| * 10**k`` is formed as a double-double (Dekker's exact product with a
   double-double power of ten), giving the 17-digit mantissa ``M17`` and its
   remainder to far better than a unit;
2. the 16- and 15-digit roundings of ``M17`` are kept when they lie surely
   inside the interval of reals that read back as ``x`` (0.998 of the
   narrower half gap); the shortest kept one, with trailing zeros dropped, is
   repr's string (:func:`_mantissas` says why);
3. anything else goes through ``repr``: zeros, infinities, subnormals,
   exponents beyond +-280, a candidate too near the edge of that interval
   (near-ties, the lopsided gaps below a power of two) and exact halfway cases
   (repr rounds those to even).

Digits are laid out as ``repr`` does (positional for 1e-4 <= |x| < 1e16, else
``d.ddde+XX``), by gathering from a per-value symbol table with a layout
pattern that depends only on (sign, number of digits, exponent).  NaN becomes
an empty field (a blank CSV cell).  :func:`format_block_numpy` also formats
each run of repeated values in a column only once.

The same algorithm, one value at a time, is compiled from ``sim/_csvtext.c``
when the package is installed with a C compiler at hand; :func:`format_block`
uses it when it is there (about five times faster per value), and the numpy
code when it is not.  Both write exactly the bytes ``repr`` would.
"""
from __future__ import annotations

import numpy as np

try:
    from sim.traces import _csvtext
except ImportError:  # installed without a C compiler
    _csvtext = None

_W = 25  # widest layout: '-' + '0.000' + 17 digits, or '-d.' + 16 digits + 'e-308'
# symbol indices in the per-value table
_DOT, _E, _MINUS, _PLUS, _X100, _X10, _X1, _ZERO, _NUL = range(17, 26)
_E0 = 400  # exponent offset in the layout key
_patterns = {}
_LAYOUTS = None  # (quad digit table, layout table, built mask): made on first use (16 MB, ~15 ms)


def _layouts():
    """Lookup tables of the numpy path: digits 0000..9999 as character codes, and
    the layout of each (sign, p, digits, exponent) key, filled in as keys appear."""
    global _LAYOUTS
    if _LAYOUTS is None:
        v = np.arange(10000)
        quad = np.stack([48 + v // 1000 % 10, 48 + v // 100 % 10, 48 + v // 10 % 10, 48 + v % 10],
                        axis=1).astype(np.uint8)
        _LAYOUTS = (quad, np.full((2 * 3 * 17 * 800, _W), _NUL, dtype=np.intp),
                    np.zeros(2 * 3 * 17 * 800, dtype=bool))
    return _LAYOUTS


def _pattern(neg: int, nd: int, e10: int) -> list:
    """Symbol indices of the repr layout for ``nd`` digits, decimal exponent ``e10``."""
    out = [_MINUS] if neg else []
    if -4 <= e10 < 16:
        if e10 >= 0:
            n_int = e10 + 1
            out += [j if j < nd else _ZERO for j in range(n_int)] + [_DOT]
            out += list(range(n_int, nd)) if nd > n_int else [_ZERO]
        else:
            out += [_ZERO, _DOT] + [_ZERO] * (-e10 - 1) + list(range(nd))
    else:
        out += [0] + ([_DOT] + list(range(1, nd)) if nd > 1 else [])
        out += [_E, _MINUS if e10 < 0 else _PLUS] + ([_X100] if abs(e10) >= 100 else []) + [_X10, _X1]
    return out + [_NUL] * (_W - len(out))


def _p10_table():
    """10**k for k in [-_KMAX, _KMAX] as double-doubles (hi + lo, |lo| <= ulp(hi)/2)."""
    from fractions import Fraction
    hi = np.empty(2 * _KMAX + 1)
    lo = np.empty(2 * _KMAX + 1)
    for i, k in enumerate(range(-_KMAX, _KMAX + 1)):
        exact = Fraction(10) ** k
        h = float(exact)
        hi[i], lo[i] = h, float(exact - Fraction(h))
    return hi, lo


_KMAX = 300
_TIE = 1e-6  # in units of the last digit: far above the error of the double-double product (~1e-14)
_P10 = None


def _split(a):
    c = 134217729.0 * a  # Veltkamp split for Dekker's exact product
    h = c - (c - a)
    return h, a - h


def _mantissas(a):
    """17-digit mantissas and the 16- and 15-digit ones that also round-trip.

    ``a`` > 0 (finite, normal, below 1e300).  ``a * 10**k`` is formed as a
    double-double (Dekker's exact product with a double-double power of ten,
    error about 2**-104 relative), so ``a * 10**k = M17 + frac`` with
    ``|frac| <= 1/2`` is known to far better than a unit.  A p-digit candidate
    is kept when its distance to ``a`` is below 0.998 of half the gap to the
    nearer neighbouring double: it then converts back to exactly ``a``.  One
    that is not kept but lies within 1.002 of half the wider gap may or may not
    read back as ``a`` (a near-tie, or the wide side below a power of two),
    and ``a`` may lie halfway between two p-digit decimals (repr takes the
    even one): ``ok`` is then False and ``repr`` decides.  Otherwise the nearest p-digit
    decimal is repr's string: the shortest one that reads back, nearest to ``a``.
    Returns ``(M, p, e10, ok)`` with the shortest p in {15, 16, 17} found.
    """
    ph_table, pl_table = _powers()
    e10 = np.floor(np.log10(a)).astype(np.int64)
    for _ in range(2):
        k = np.clip(16 - e10, -_KMAX, _KMAX)
        ph, pl = ph_table[k + _KMAX], pl_table[k + _KMAX]
        # exact product a * ph = hi + err (Dekker), then add a * pl
        hi = a * ph
        ah, al = _split(a)
        bh, bl = _split(ph)
        err = ((ah * bh - hi) + ah * bl + al * bh) + al * bl
        lo = err + a * pl
        r = np.rint(hi)
        f = (hi - r) + lo
        rf = np.rint(f)
        M17 = r.astype(np.int64) + rf.astype(np.int64)
        frac = f - rf  # a * 10**k = M17 + frac
        up, down = M17 >= 10 ** 17, M17 < 10 ** 16
        if not np.any(up | down):
            break
        e10 = e10 + up - down  # log10 was off by one next to a power of ten
    below, above = a - np.nextafter(a, 0.0), np.spacing(a)  # gaps to the neighbours (in units of 10**-k below)
    limit = 0.499 * np.minimum(below, above) * ph  # 0.998 of the narrower half gap: surely reads back as a
    unsure = 0.501 * np.maximum(below, above) * ph  # up to 1.002 of the wider one: repr must decide
    M, p = M17.copy(), np.full(len(a), 17)
    ok = (np.abs(frac) < limit) & ~up & ~down & (np.abs(16 - e10) < _KMAX)
    near_tie = np.abs(np.abs(frac) - 0.5) < _TIE  # halfway between two 17-digit decimals
    E = e10.copy()
    for digits, div in ((16, 10), (15, 100)):
        q, rem = np.divmod(M17, div)
        t = (rem + frac) / div
        cand = q + (t >= 0.5)
        dist = np.abs((cand * div - M17) - frac)
        fits = ok & (dist < limit)
        near_tie |= ok & ((~fits & (dist < unsure)) | (np.abs(rem + frac - div / 2) < _TIE))
        carry = cand >= 10 ** digits  # 99..9.5 rounded up: one digit more, one decade up
        M = np.where(fits, np.where(carry, cand // 10, cand), M)
        E = np.where(fits, e10 + carry, E)
        p = np.where(fits, digits, p)
    return M, p, E, ok & ~near_tie


def _chars(x):
    """Character codes, shape (N, _W) uint8 (0 = nothing), for flat float64 ``x``."""
    N = len(x)
    out = np.zeros((N, _W), dtype=np.uint8)
    normal = np.isfinite(x) & (x != 0.0)
    a = np.abs(np.where(normal, x, 1.0))
    normal &= (a < 1e280) & (a > 1e-280)
    todo = ~normal
    M = np.zeros(N, dtype=np.int64)
    e10 = np.zeros(N, dtype=np.int64)
    nd = np.zeros(N, dtype=np.int64)
    idx = np.flatnonzero(normal)
    if len(idx):
        Mi, pi, ei, ok = _mantissas(a[idx])
        got = idx[ok]
        M[got], nd[got], e10[got] = Mi[ok], pi[ok], ei[ok]
        todo[idx[~ok]] = True
    use = np.flatnonzero(~todo)
    if len(use):
        quad, table, built = _layouts()
        Mu, pu, eu = M[use], nd[use], e10[use]
        # 17 digits, zero-padded on the left, four at a time from a lookup table
        sym = np.empty((len(use), 26), dtype=np.uint8)
        rem = Mu
        for c in (13, 9, 5, 1):
            sym[:, c:c + 4] = quad[rem % 10000]
            rem = rem // 10000
        sym[:, 0] = rem + 48
        # significant digits: p less the trailing zeros (digit j sits at column 17 - p + j)
        n = np.maximum(pu - np.argmax(sym[:, 16::-1] != 48, axis=1), 1)
        ae = np.abs(eu)
        sym[:, _DOT], sym[:, _E], sym[:, _MINUS], sym[:, _PLUS] = 46, 101, 45, 43
        sym[:, _X100], sym[:, _X10], sym[:, _X1] = ae // 100 + 48, ae // 10 % 10 + 48, ae % 10 + 48
        sym[:, _ZERO], sym[:, _NUL] = 48, 0
        key = (((x[use] < 0) * 3 + (pu - 15)) * 17 + (n - 1)) * 800 + np.clip(eu + _E0, 0, 799)
        missing = np.unique(key[~built[key]])
        for kcode in missing.tolist():
            e = kcode % 800 - _E0
            rest = kcode // 800
            nd_, rest = rest % 17 + 1, rest // 17
            p_, neg = rest % 3 + 15, rest // 3
            table[kcode] = [c + 17 - p_ if c < 17 else c for c in _pattern(neg, nd_, e)]
            built[kcode] = True
        out[use] = np.take_along_axis(sym, table[key], axis=1)
    for i in np.flatnonzero(todo & ~np.isnan(x)):
        s = repr(float(x[i])).encode("ascii")
        out[i, : len(s)] = np.frombuffer(s, dtype=np.uint8)
    return out


def reprs(values) -> list:
    """The strings of a float array, flattened (as ``repr``; NaN -> ``''``)."""
    chars = _chars(np.ascontiguousarray(values, dtype=np.float64).reshape(-1))
    return [bytes(row[row != 0]).decode("ascii") for row in chars]


def _powers():
    global _P10
    if _P10 is None:
        _P10 = _p10_table()
        if _csvtext is not None:
            _csvtext.set_powers(_P10[0].tobytes(), _P10[1].tobytes())
    return _P10


def format_block(values) -> bytes:
    """CSV text (CRLF line ends) of a float array, shape (m, ncols); NaN -> blank.

    Compiled when available, else :func:`format_block_numpy`; the same bytes.
    """
    v = np.asarray(values, dtype=np.float64)
    if v.ndim != 2 or v.size == 0:
        return b""
    if _csvtext is None:
        return format_block_numpy(v)
    _powers()
    return _csvtext.format_block(np.ascontiguousarray(v))


def format_block_numpy(values) -> bytes:
    """:func:`format_block` in numpy: each run of equal values within a column is formatted once."""
    v = np.asarray(values, dtype=np.float64)
    if v.ndim != 2 or v.size == 0:
        return b""
    m, ncols = v.shape
    # runs of repeated values per column: the same bits (so -0.0 after 0.0 is new), or both NaN
    nan = np.isnan(v)
    bits = v.view(np.uint64)
    new = np.ones((m, ncols), dtype=bool)
    new[1:] = (bits[1:] != bits[:-1]) & ~(nan[1:] & nan[:-1])
    order = new.T.reshape(-1)  # column-major: unique values column by column
    uniq = v.T.reshape(-1)[order]
    run = np.cumsum(order).reshape(ncols, m).T - 1  # (m, ncols) index into uniq
    chars = _chars(uniq)
    lengths = np.count_nonzero(chars, axis=1)
    # each column as wide as its widest value, then its separator
    bounds = np.concatenate([[0], np.cumsum(order.reshape(ncols, m).sum(axis=1))])
    widths = [int(lengths[bounds[j]:bounds[j + 1]].max()) if bounds[j + 1] > bounds[j] else 0
              for j in range(ncols)]
    total = sum(widths) + ncols + 1
    full = np.zeros((m, total), dtype=np.uint8)
    pos = 0
    for j, w in enumerate(widths):
        if w:
            full[:, pos:pos + w] = chars[run[:, j], :w]
        pos += w
        full[:, pos] = 44 if j < ncols - 1 else 13
        pos += 1
    full[:, pos] = 10
    flat = full.reshape(-1)
    return flat[flat != 0].tobytes()


def fixed(v, nd=3) -> str:
    """Text for people: ``v`` with ``nd`` decimals, never as '-0.000'."""
    s = f"{float(v):.{nd}f}"
    return s[1:] if s.startswith("-") and float(s) == 0.0 else s
