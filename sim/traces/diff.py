"""Compare two CSV traces, streaming, with per-column tolerances.

:func:`compare` reads both files in chunks of about ``chunk_bytes`` (memory
stays flat however long the traces are) and returns a :class:`DiffReport`:
identical / within tolerance / diverged, the first row where any column leaves
its tolerance, the largest deviation of every column with its time, and the
final-pose difference.  Different column sets, row counts and step times are
reported, not raised.

Rules
-----
- Rows are compared by position (row k of A with row k of B).
- Deviation = ``|b - a|``; heading columns (``theta``, ``*.theta``,
  ``*_theta``, ``*.steer``, ``*.steer_cmd``) use the wrapped difference
  modulo 2 pi, in rad.
- A blank cell (or ``nan``) equals a blank cell; blank against a number is a
  divergence (deviation ``inf``).
- Within tolerance means ``deviation <= tolerance`` in every compared cell.
- Speed: rows whose bytes are identical in both files are not parsed, and in
  rows that differ only the cells that differ are turned into numbers, a
  block at a time with numpy (:class:`~sim.tracecsv.Cells`; the same doubles
  as Python's ``float``).  Anything that reading declines (quoted cells,
  ``nan`` text, a cell that is not a number) goes cell by cell through
  :func:`~sim.tracecsv.floats`, which names the ``file:line``.  Identical
  rows are still checked for cell count and allowed characters.

Bad input (missing file, no header, no ``t`` column, a row with the wrong
number of cells, a cell that is not a number) raises
:class:`~sim.errors.InputError` with ``file:line``.
"""
from __future__ import annotations

import fnmatch
import math
import os
from dataclasses import dataclass, field
from itertools import compress
from operator import itemgetter

import numpy as np

from sim.errors import InputError
from sim.theory.se2 import wrap
from sim.traces.tolerance import DEFAULT_TOLERANCE
from sim.traces.csvread import CHUNK_BYTES, Cells, TraceFile, floats

POSE = ("x", "y", "theta")


def is_heading(name: str) -> bool:
    """Whether column ``name`` holds an angle compared modulo 2 pi."""
    return (name == "theta" or name.endswith((".theta", "_theta", ".steer", ".steer_cmd")))


# -- tolerances and column selection ------------------------------------------
def _matches(pattern, names):
    return [n for n in names if n == pattern or fnmatch.fnmatchcase(n, pattern)]


def _unknown(what, pattern, names):
    import difflib
    close = difflib.get_close_matches(pattern, names, n=1, cutoff=0.6)
    hint = f" (did you mean '{close[0]}'?)" if close else ""
    return InputError(what, None, f"'{pattern}' matches no column of either trace{hint}")


# -- results -------------------------------------------------------------------
@dataclass
class ColumnDiff:
    """Largest deviation of one column.

    ``max_deviation`` is in the column's unit (rad for heading columns), ``inf``
    when one trace has a blank where the other has a number; ``row`` (0-based
    data row) and ``t`` (s, from trace A) say where; ``a``/``b`` the values
    there.  ``blanks`` counts rows blank in one trace only.
    """

    name: str
    tolerance: float
    heading: bool
    max_deviation: float = 0.0
    row: int | None = None
    t: float | None = None
    a: float | None = None
    b: float | None = None
    blanks: int = 0

    @property
    def within(self) -> bool:
        return self.max_deviation <= self.tolerance


@dataclass
class Divergence:
    """The first row where some column leaves its tolerance.

    ``columns`` : list of (name, a, b, deviation, tolerance), the columns out of
    tolerance in that row, in file order.
    """

    row: int
    t_a: float
    t_b: float
    columns: list


@dataclass
class DiffReport:
    """The outcome of :func:`compare`.  Rows are 0-based data rows (file line = row + 2)."""

    path_a: str
    path_b: str
    columns_a: tuple
    columns_b: tuple
    rows_a: int = 0
    rows_b: int = 0
    only_a: tuple = ()
    only_b: tuple = ()
    compared: list = field(default_factory=list)
    first: Divergence | None = None
    step_a: float | None = None
    step_b: float | None = None
    step_mismatch: tuple | None = None      # (row, t_a, t_b)
    final_a: tuple | None = None            # (x, y, theta) of the last row
    final_b: tuple | None = None
    equal: bool = True                      # every compared value equal

    @property
    def structure_differs(self) -> bool:
        return bool(self.only_a or self.only_b or self.rows_a != self.rows_b
                    or self.step_mismatch is not None)

    @property
    def diverged(self) -> bool:
        return self.first is not None or self.structure_differs

    @property
    def status(self) -> str:
        """``identical`` | ``within tolerance`` | ``diverged``."""
        if self.diverged:
            return "diverged"
        return "identical" if self.equal else "within tolerance"

    @property
    def final_difference(self):
        """(position m, heading rad) between the last rows, or None."""
        if self.final_a is None or self.final_b is None:
            return None
        (xa, ya, ta), (xb, yb, tb) = self.final_a, self.final_b
        return math.hypot(xb - xa, yb - ya), abs(wrap(tb - ta))

    def summary(self) -> str:
        """One short phrase for tables: where and in what it first diverged."""
        if self.first is not None:
            names = ",".join(c[0] for c in self.first.columns[:3])
            more = "..." if len(self.first.columns) > 3 else ""
            return f"t={_t(self.first.t_a)} s {names}{more}"
        if self.step_mismatch is not None:
            return f"step times at row {self.step_mismatch[0]}"
        if self.only_a or self.only_b:
            return "column sets differ"
        if self.rows_a != self.rows_b:
            return f"rows {self.rows_a} vs {self.rows_b}"
        return ""

    def text(self, label_a="A", label_b="B") -> str:
        """The report for a person (several lines)."""
        out = []
        for lab, path, rows, cols, step in ((label_a, self.path_a, self.rows_a, self.columns_a, self.step_a),
                                            (label_b, self.path_b, self.rows_b, self.columns_b, self.step_b)):
            st = f", step {step:g} s" if step is not None else ""
            out.append(f"{lab:<9} {path}: {rows} rows{st}, {len(cols)} columns")
        out.append(f"result    {self.status.upper()}")
        if self.only_a:
            out.append(f"columns   only in {label_a}: {', '.join(self.only_a)}")
        if self.only_b:
            out.append(f"columns   only in {label_b}: {', '.join(self.only_b)}")
        if self.rows_a != self.rows_b:
            n = min(self.rows_a, self.rows_b)
            out.append(f"rows      {label_a} has {self.rows_a}, {label_b} has {self.rows_b}; "
                       f"compared the first {n}")
        if self.step_mismatch is not None:
            r, ta, tb = self.step_mismatch
            out.append(f"steps     step times differ from row {r} (line {r + 2}): "
                       f"{label_a} t={_t(ta)} s, {label_b} t={_t(tb)} s")
        if self.first is not None:
            f = self.first
            parts = [f"{n} {_dev(d, is_heading(n))} (allowed {_num(tol)})" for n, a, b, d, tol in f.columns[:6]]
            if len(f.columns) > 6:
                parts.append(f"and {len(f.columns) - 6} more columns")
            tb = "" if f.t_b == f.t_a else f" ({label_b} t={_t(f.t_b)} s)"
            out.append(f"first     t={_t(f.t_a)} s{tb} (row {f.row}, line {f.row + 2}): " + "; ".join(parts))
        moved = [c for c in self.compared if c.max_deviation > 0]
        if moved:
            out.append("largest   column                     deviation        at t (s)   allowed")
            for c in moved:
                flag = "" if c.within else "  out"
                blank = f"  ({c.blanks} blank vs number)" if c.blanks else ""
                out.append(f"          {c.name:<26} {_dev(c.max_deviation, c.heading):<16} "
                           f"{_t(c.t):<10} {_num(c.tolerance)}{flag}{blank}")
        same = len(self.compared) - len(moved)
        if same:
            out.append(f"same      {same} of {len(self.compared)} compared columns equal in every row")
        fd = self.final_difference
        if fd is not None:
            out.append(f"final     position {fd[0]:.6g} m, heading {math.degrees(fd[1]):.6g} deg")
        return "\n".join(out)

    def to_dict(self) -> dict:
        """JSON-ready form (``inf`` deviations become null with ``blank_mismatch``)."""
        fd = self.final_difference

        def num(v):
            return None if v is None or not math.isfinite(v) else float(v)

        return {
            "status": self.status,
            "a": {"path": self.path_a, "rows": self.rows_a, "step": self.step_a, "columns": len(self.columns_a)},
            "b": {"path": self.path_b, "rows": self.rows_b, "step": self.step_b, "columns": len(self.columns_b)},
            "only_a": list(self.only_a), "only_b": list(self.only_b),
            "step_mismatch": None if self.step_mismatch is None else
            {"row": self.step_mismatch[0], "t_a": num(self.step_mismatch[1]), "t_b": num(self.step_mismatch[2])},
            "first_divergence": None if self.first is None else {
                "row": self.first.row, "t": num(self.first.t_a), "t_b": num(self.first.t_b),
                "columns": [{"column": n, "a": num(a), "b": num(b), "deviation": num(d),
                             "blank_mismatch": not math.isfinite(d), "tolerance": tol}
                            for n, a, b, d, tol in self.first.columns]},
            "columns": {c.name: {"max_deviation": num(c.max_deviation),
                                 "blank_mismatch": c.blanks, "t": num(c.t), "row": c.row,
                                 "tolerance": c.tolerance, "within": c.within}
                        for c in self.compared},
            "final": None if fd is None else {"position": fd[0], "heading_deg": math.degrees(fd[1])},
        }


def _t(t) -> str:
    return "-" if t is None else ("blank" if t != t else f"{t:.6g}")


def _num(v) -> str:
    return f"{v:.3g}"


def _dev(d, heading) -> str:
    if not math.isfinite(d):
        return "blank vs number"
    return f"{d:.3e}" + (" rad" if heading else "")


# -- comparing -----------------------------------------------------------------
class _Compare:
    """Accumulates deviations over aligned runs of rows."""

    def __init__(self, ta: TraceFile, tb: TraceFile, names, tols, tol_t):
        self.ta, self.tb = ta, tb
        self.names = names
        self.ia = [ta.columns.index(n) for n in names]
        self.ib = [tb.columns.index(n) for n in names]
        self.ita, self.itb = ta.columns.index("t"), tb.columns.index("t")
        self.tol = np.asarray(tols, float)
        self.tol_t = tol_t
        self.heading = np.array([is_heading(n) for n in names], bool)
        self.same_layout = ta.columns == tb.columns
        self.colmask = np.array([n in names for n in ta.columns], bool)
        self.colpos = np.array([names.index(n) if n in names else -1 for n in ta.columns], int)
        k = len(names)
        self.max_dev = np.zeros(k)
        self.max_row = np.full(k, -1)
        self.max_t = np.full(k, np.nan)
        self.max_a = np.full(k, np.nan)
        self.max_b = np.full(k, np.nan)
        self.blanks = np.zeros(k, int)
        self.first = None
        self.step = None
        self.equal = True

    def state(self) -> dict:
        """Everything a merge needs, as plain picklable values."""
        return {"rows_a": self.ta.rows, "rows_b": self.tb.rows, "head_a": self.ta.head, "head_b": self.tb.head,
                "last_a": self.ta.last, "last_b": self.tb.last, "first": self.first, "step": self.step,
                "equal": self.equal, "blanks": self.blanks, "max_dev": self.max_dev, "max_row": self.max_row,
                "max_t": self.max_t, "max_a": self.max_a, "max_b": self.max_b}

    def pair(self, la, lb, row0, line_a, line_b, width, cells_a=(None, 0), cells_b=(None, 0)):
        """Compare aligned lines ``la[i]``, ``lb[i]`` = data row ``row0 + i``; cells at most ``width`` bytes.

        ``cells_a`` = (Cells of the block holding ``la``, row of ``la[0]`` in it),
        or (None, 0); the same for B.
        """
        idx = list(compress(range(len(la)), map(bytes.__ne__, la, lb)))
        if not idx:
            return
        k = len(idx)
        got = self._differing_fast(la, lb, idx, cells_a, cells_b, line_a, line_b)
        if got is None:
            got = self._differing_careful(_pick(la, idx), _pick(lb, idx), idx, line_a, line_b, width)
        r, c, va, vb, t_ne, t_pairs, time_a, time_b = got
        d, eq, blank = _deviation(va, vb, self.heading[c])
        self.equal &= bool(eq.all())
        ncomp = len(self.names)
        if blank.any():
            self.blanks += np.bincount(c[blank], minlength=ncomp)
        D = np.zeros((ncomp, k))                   # deviations, column by column (0 where the bytes agree)
        D[c, r] = d
        at = np.empty((ncomp, k), np.int64)         # where D[m, j] came from in va, vb (cells that differ)
        at[c, r] = np.arange(r.size)
        if self.step is None and t_ne.size:
            tA, tB = t_pairs()
            dt, _, _ = _deviation(tA, tB, np.zeros(t_ne.size, bool))
            bad = np.flatnonzero(dt > self.tol_t)
            if bad.size:
                j = bad[0]
                self.step = (row0 + idx[t_ne[j]], float(tA[j]), float(tB[j]))
        if self.first is None:
            exceed = D > self.tol[:, None]
            hit = np.flatnonzero(exceed.any(axis=0))
            if hit.size:
                j = hit[0]
                cols = [(self.names[m], float(va[at[m, j]]), float(vb[at[m, j]]), float(D[m, j]),
                         float(self.tol[m])) for m in np.flatnonzero(exceed[:, j])]
                self.first = Divergence(row0 + idx[j], time_a(j), time_b(j), cols)
        top = D.argmax(axis=1)
        val = D[np.arange(ncomp), top]
        for m in np.flatnonzero(val > self.max_dev):    # (a deviation > 0: that cell differs, at[] is set)
            j = int(top[m])
            self.max_dev[m] = val[m]
            self.max_row[m] = row0 + idx[j]
            self.max_t[m] = time_a(j)
            self.max_a[m] = va[at[m, j]]
            self.max_b[m] = vb[at[m, j]]

    def _differing_fast(self, la, lb, idx, cells_a, cells_b, line_a, line_b):
        """The differing compared cells of rows ``idx``, read by :class:`Cells`; None if it declines.

        Returns ``(r, c, va, vb, t_ne, t_pairs, time_a, time_b)``: row (index
        into ``idx``) and compared-column index of each cell that differs in
        bytes, its values in A and B; the rows whose ``t`` cells differ and a
        function giving their times (s) in A and B; functions row -> time (s).
        """
        k, nca, ncb = len(idx), self.ta.nc, self.tb.nc
        rows = np.asarray(idx, dtype=np.int64)
        (A, oa), (B, ob) = cells_a, cells_b
        if A is None:                              # (the careful reading normalised the block's lines)
            A, oa = Cells.of(_pick(la, idx), nca), np.arange(k) - rows
        if B is None:
            B, ob = Cells.of(_pick(lb, idx), ncb), np.arange(k) - rows
        if A is None or B is None:
            return None
        ra, rb = (rows + oa) * nca, (rows + ob) * ncb              # first cell of each row in A, B
        if self.same_layout:
            ne = A.differ(B, (ra[:, None] + np.arange(nca)).ravel(), (rb[:, None] + np.arange(ncb)).ravel())
            ne = ne.reshape(k, nca)
            t_ne = np.flatnonzero(ne[:, self.ita])
            ne &= self.colmask
            r, cf = np.divmod(np.flatnonzero(ne), nca)
            c = self.colpos[cf]
            fa, fb = ra[r] + cf, rb[r] + cf
        else:
            cells_a = (ra[:, None] + np.asarray(self.ia, int)).ravel()
            cells_b = (rb[:, None] + np.asarray(self.ib, int)).ravel()
            t_ne = np.flatnonzero(A.differ(B, ra + self.ita, rb + self.itb))
            hit = np.flatnonzero(A.differ(B, cells_a, cells_b))
            r, c = np.divmod(hit, len(self.names))
            fa, fb = cells_a[hit], cells_b[hit]
        va = A.values(fa)
        vb = B.values(fb) if va is not None else None
        if vb is None:
            return None                            # a cell is not a number: the careful reading says where

        def times(cells, first_cells, it, path, line0, rows_):
            """Times (s) of ``rows_`` (indices into idx) from their t cells."""
            at = (first_cells[rows_] + it).tolist()
            v = cells.values(at) if len(at) > 16 else None
            if v is None:                          # few cells, or a bad one: floats() raises with file:line
                v = floats([cells.text(i) for i in at], lambda m: (path, line0 + idx[rows_[m]], "t"))
            return v

        def t_pairs():
            return (times(A, ra, self.ita, self.ta.path, line_a, t_ne),
                    times(B, rb, self.itb, self.tb.path, line_b, t_ne))

        def time_a(j):
            return float(times(A, ra, self.ita, self.ta.path, line_a, np.array([j]))[0])

        def time_b(j):
            return float(times(B, rb, self.itb, self.tb.path, line_b, np.array([j]))[0])

        return r, c, va, vb, t_ne, t_pairs, time_a, time_b

    def _differing_careful(self, la, lb, idx, line_a, line_b, width):
        """As :meth:`_differing_fast`, cell by cell with :func:`floats` (its errors give ``file:line``)."""
        k = len(idx)
        nca, ncb = self.ta.nc, self.tb.nc
        ca = b",".join(la).split(b",")
        cb = b",".join(lb).split(b",")
        if self.same_layout:
            dt = f"S{max(width, 1)}"
            ne = (np.array(ca, dtype=dt) != np.array(cb, dtype=dt)).reshape(k, nca)
            t_ne = np.flatnonzero(ne[:, self.ita])
            ne &= self.colmask
            fa = np.flatnonzero(ne)
            r, cf = np.divmod(fa, nca)
            c = self.colpos[cf]
            fb = fa
        else:
            A = np.array(ca, dtype=object).reshape(k, nca)
            B = np.array(cb, dtype=object).reshape(k, ncb)
            t_ne = np.flatnonzero(A[:, self.ita] != B[:, self.itb])
            r, c = np.nonzero(A[:, self.ia] != B[:, self.ib])
            fa = r * nca + np.asarray(self.ia, int)[c]
            fb = r * ncb + np.asarray(self.ib, int)[c]
        va = floats(_pick(ca, fa.tolist()), lambda i: (self.ta.path, line_a + idx[r[i]], self.names[c[i]]))
        vb = floats(_pick(cb, fb.tolist()), lambda i: (self.tb.path, line_b + idx[r[i]], self.names[c[i]]))

        def t_pairs():                             # times (s) of the rows whose t cells differ
            tA = floats([ca[j * nca + self.ita] for j in t_ne], lambda i: (self.ta.path, line_a + idx[t_ne[i]], "t"))
            tB = floats([cb[j * ncb + self.itb] for j in t_ne], lambda i: (self.tb.path, line_b + idx[t_ne[i]], "t"))
            return tA, tB

        def time_a(j):                             # time of differing row j (s)
            return float(floats([ca[j * nca + self.ita]], lambda i: (self.ta.path, line_a + idx[j], "t"))[0])

        def time_b(j):
            return float(floats([cb[j * ncb + self.itb]], lambda i: (self.tb.path, line_b + idx[j], "t"))[0])

        return r, c, va, vb, t_ne, t_pairs, time_a, time_b

def _pick(seq, idx):
    """``[seq[i] for i in idx]`` at C speed (a tuple or the list itself)."""
    if len(idx) == len(seq):
        return seq
    if len(idx) == 1:
        return (seq[idx[0]],)
    return itemgetter(*idx)(seq) if idx else ()


def _deviation(va, vb, heading):
    """Deviation of value pairs (shape (n,)): |b - a|, wrapped for heading; nan rules.

    Returns (deviation, equal, blank_mismatch).
    """
    na, nb = np.isnan(va), np.isnan(vb)
    with np.errstate(invalid="ignore", over="ignore"):
        d = np.abs(vb - va)
        if heading.any():
            d[heading] = np.abs(np.remainder(vb[heading] - va[heading] + np.pi, 2 * np.pi) - np.pi)
    eq = (va == vb) | (na & nb)
    blank = na ^ nb
    d[eq] = 0.0
    d[np.isnan(d) | blank] = np.inf
    return d, eq, blank


def compare(path_a, path_b, tol: float = DEFAULT_TOLERANCE, rules=(), columns=None,
            chunk_bytes: int = CHUNK_BYTES, jobs: int = 1) -> DiffReport:
    """Compare trace ``path_b`` against ``path_a``.

    Parameters
    ----------
    tol : float
        Default absolute tolerance (column units; rad for heading columns).
    rules : list of (pattern, tolerance)
        Per-column tolerances; a pattern is a column name or a shell pattern;
        the last rule matching a column wins.
    columns : list of str or None
        Compare only these columns (names or patterns); ``t`` is always read
        for times and the step check.
    chunk_bytes : int
        Read size per file; memory is a few times this (per process).
    jobs : int
        Worker processes for large files (above ``PARALLEL_BYTES`` together):
        each compares its own range of rows.  The report is the same for any
        number of jobs.
    """
    ta = TraceFile(path_a, chunk_bytes)
    try:
        tb = TraceFile(path_b, chunk_bytes)
    except BaseException:
        ta.close()
        raise
    try:
        plan = _plan(ta, tb, tol, rules, columns)
    finally:
        ta.close()
        tb.close()
    cuts = _cuts(plan, jobs, chunk_bytes) if jobs > 1 else None
    if cuts is None:
        states = [_segment(plan, chunk_bytes, None)]
    else:
        states = _parallel(plan, chunk_bytes, cuts)
    return _report(plan, states)


PARALLEL_BYTES = 64 << 20


@dataclass
class _Plan:
    """What to compare (picklable, sent to segment workers)."""

    path_a: str
    path_b: str
    columns_a: tuple
    columns_b: tuple
    names: list
    tols: list
    tol_t: float
    only_a: tuple
    only_b: tuple


def _plan(ta, tb, tol, rules, columns) -> _Plan:
    every = list(ta.columns) + [n for n in tb.columns if n not in ta.columns]
    if columns:
        chosen = []
        for pat in columns:
            got = _matches(pat, every)
            if not got:
                raise _unknown("--columns", pat, every)
            chosen += [n for n in got if n not in chosen]
        chosen = [n for n in every if n in chosen]
    else:
        chosen = every
    for pat, _ in rules:
        if not _matches(pat, every):
            raise _unknown("--tol", pat, every)

    def tol_of(name):
        v = tol
        for pat, t in rules:
            if name == pat or fnmatch.fnmatchcase(name, pat):
                v = t
        return v

    names = [n for n in chosen if n in ta.columns and n in tb.columns]
    return _Plan(ta.path, tb.path, ta.columns, tb.columns, names, [tol_of(n) for n in names], tol_of("t"),
                 tuple(n for n in chosen if n not in tb.columns), tuple(n for n in chosen if n not in ta.columns))


def _segment(plan: _Plan, chunk_bytes, cut) -> dict:
    """Compare one range of rows; ``cut`` = (row0, start_a, end_a, start_b, end_b) or None for all."""
    if cut is None:
        row, sa, ea, sb, eb = 0, None, None, None, None
    else:
        row, sa, ea, sb, eb = cut
    ta = TraceFile(plan.path_a, chunk_bytes, sa, ea, row + 2)
    try:
        tb = TraceFile(plan.path_b, chunk_bytes, sb, eb, row + 2)
    except BaseException:
        ta.close()
        raise
    try:
        cmp_ = _Compare(ta, tb, plan.names, plan.tols, plan.tol_t)
        ga, gb = ta.blocks(cells=True), tb.blocks(cells=True)
        la = lb = ()
        a0 = b0 = wa = wb = 0                      # file line of la[0], lb[0]; widest cells
        ca = cb = None                             # the blocks' Cells, la[0] is row oa of ca
        oa = ob = 0
        while True:
            if not la:
                nxt = next(ga, None)
                if nxt is None:
                    break
                a0, la, wa, ca = nxt
                oa = 0
            if not lb:
                nxt = next(gb, None)
                if nxt is None:
                    break
                b0, lb, wb, cb = nxt
                ob = 0
            m = min(len(la), len(lb))
            if m == len(la) == len(lb):
                cmp_.pair(la, lb, row, a0, b0, max(wa, wb), (ca, oa), (cb, ob))
                la = lb = ()
            else:
                cmp_.pair(la[:m], lb[:m], row, a0, b0, max(wa, wb), (ca, oa), (cb, ob))
                la, lb = la[m:], lb[m:]
                a0, b0, oa, ob = a0 + m, b0 + m, oa + m, ob + m
            row += m
        for _ in ga:                               # read (and check) what is left
            pass
        for _ in gb:
            pass
        return cmp_.state()
    finally:
        ta.close()
        tb.close()


def _segment_job(plan, chunk_bytes, cut):
    """Worker side of :func:`_segment`: errors come back as values (InputError does not pickle)."""
    try:
        return ("ok", _segment(plan, chunk_bytes, cut))
    except InputError as exc:
        return ("error", exc.source, exc.line, exc.message)


def _nth_line_end(fh, n, pos=0, chunk=CHUNK_BYTES):
    """Byte offset just after the n-th line end (1-based) counting from ``pos``; None if fewer."""
    fh.seek(pos)
    seen = 0
    while True:
        data = fh.read(chunk)
        if not data:
            return None
        c = data.count(b"\n")
        if seen + c >= n:
            i = np.flatnonzero(np.frombuffer(data, np.uint8) == 10)[n - seen - 1]
            return pos + int(i) + 1
        seen += c
        pos += len(data)


def _cuts(plan, jobs, chunk_bytes):
    """Row ranges of about equal size for ``jobs`` workers, or None (small files, or a file ends early)."""
    size_a, size_b = os.path.getsize(plan.path_a), os.path.getsize(plan.path_b)
    if size_a + size_b < PARALLEL_BYTES:
        return None
    with open(plan.path_a, "rb") as fa, open(plan.path_b, "rb") as fb:
        head_a = _nth_line_end(fa, 1)
        head_b = _nth_line_end(fb, 1)
        if head_a is None or head_b is None:
            return None
        bounds = [(0, head_a, head_b)]
        for j in range(1, jobs):
            target = size_a * j // jobs
            fa.seek(0)
            newlines, pos = 0, 0
            while pos < target:                    # line ends before the target byte
                data = fa.read(min(chunk_bytes, target - pos))
                if not data:
                    break
                newlines += data.count(b"\n")
                pos += len(data)
            start_a = _nth_line_end(fa, 1, target)
            if start_a is None:
                return None
            row = newlines                         # header + newlines - 1 complete data rows, next is row `newlines`
            start_b = _nth_line_end(fb, row + 1)
            if start_b is None or row <= bounds[-1][0]:
                return None
            bounds.append((row, start_a, start_b))
    cuts = []
    for j, (row, sa, sb) in enumerate(bounds):
        nxt = bounds[j + 1] if j + 1 < len(bounds) else (None, None, None)
        cuts.append((row, sa, nxt[1], sb, nxt[2]))
    return cuts


def _parallel(plan, chunk_bytes, cuts) -> list:
    from concurrent.futures import ProcessPoolExecutor

    from sim.procs import pool_context

    with ProcessPoolExecutor(max_workers=len(cuts), mp_context=pool_context(("numpy", "sim.traces.diff"))) as ex:
        outs = list(ex.map(_segment_job, [plan] * len(cuts), [chunk_bytes] * len(cuts), cuts))
    for kind, *rest in outs:                       # the earliest segment's error, like a serial read
        if kind == "error":
            raise InputError(*rest)
    return [o[1] for o in outs]


def _report(plan: _Plan, states) -> DiffReport:
    """Merge segment states (in row order) into the report."""
    rep = DiffReport(plan.path_a, plan.path_b, plan.columns_a, plan.columns_b,
                     only_a=plan.only_a, only_b=plan.only_b)
    k = len(plan.names)
    max_dev, max_row = np.zeros(k), np.full(k, -1)
    max_t, max_a, max_b = np.full(k, np.nan), np.full(k, np.nan), np.full(k, np.nan)
    blanks = np.zeros(k, int)
    head_a, head_b, last_a, last_b = [], [], None, None
    for st in states:
        rep.rows_a += st["rows_a"]
        rep.rows_b += st["rows_b"]
        head_a += st["head_a"]
        head_b += st["head_b"]
        last_a = st["last_a"] if st["last_a"] is not None else last_a
        last_b = st["last_b"] if st["last_b"] is not None else last_b
        rep.first = rep.first or st["first"]
        rep.step_mismatch = rep.step_mismatch or st["step"]
        rep.equal &= st["equal"]
        blanks += st["blanks"]
        better = st["max_dev"] > max_dev
        for arr, new in ((max_dev, "max_dev"), (max_row, "max_row"), (max_t, "max_t"),
                         (max_a, "max_a"), (max_b, "max_b")):
            arr[better] = st[new][better]
    it_a, it_b = plan.columns_a.index("t"), plan.columns_b.index("t")
    rep.step_a = _step(head_a[:2], it_a, plan.path_a, plan.columns_a)
    rep.step_b = _step(head_b[:2], it_b, plan.path_b, plan.columns_b)
    rep.final_a = _final(last_a, plan.columns_a, plan.path_a, rep.rows_a + 1)
    rep.final_b = _final(last_b, plan.columns_b, plan.path_b, rep.rows_b + 1)
    for j, n in enumerate(plan.names):
        cd = ColumnDiff(n, float(plan.tols[j]), is_heading(n))
        if max_row[j] >= 0:
            cd.max_deviation = float(max_dev[j])
            cd.row = int(max_row[j])
            cd.t, cd.a, cd.b = float(max_t[j]), float(max_a[j]), float(max_b[j])
        cd.blanks = int(blanks[j])
        rep.compared.append(cd)
    return rep


def _values(line: bytes, path, ln, columns) -> np.ndarray:
    """All cells of data line ``ln`` of ``path`` as floats, nan for blank; shape (ncols,)."""
    out = []
    for name, c in zip(columns, line.split(b",")):
        try:
            out.append(float(c) if c else np.nan)
        except ValueError:                      # (a row equal in both traces was never read as numbers)
            raise InputError(path, ln, f"column '{name}': expected a number or a blank cell, "
                                       f"got '{c.decode('ascii', 'replace')}'") from None
    return np.array(out)


def _step(head, it, path, columns):
    if len(head) < 2:
        return None
    t0, t1 = (_values(line, path, ln, columns)[it] for ln, line in enumerate(head, start=2))
    return float(t1 - t0) if math.isfinite(t1 - t0) else None


def _final(last, columns, path, ln):
    if last is None or not all(p in columns for p in POSE):
        return None
    v = _values(last, path, ln, columns)
    pose = tuple(float(v[columns.index(p)]) for p in POSE)
    return pose if all(math.isfinite(p) for p in pose) else None
