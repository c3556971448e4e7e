"""Compare two traces (CSV or Parquet), streaming, with per-column tolerances.

:func:`compare` reads both files a page at a time (:mod:`sim.traces.read`;
memory stays flat however long the traces are) and returns a
:class:`DiffReport`: identical / within tolerance / diverged, the first row
where any column leaves its tolerance, the largest deviation of every column
with its time, and the final-pose difference.  Different column sets, row
counts and times are reported, not raised.

Rules
-----
- Rows are compared at equal times: row i of A with the row of B whose ``t``
  is the same (to a millionth of the shorter step, or a few units in the last
  place of t).  Traces on one grid (same step and ``every``) pair row k with
  row k; a full-rate run and a thinned baseline, or runs with different
  steps, are compared at the times both contain, and the report says how
  many rows matched and which times were only in one file.
- Diverged: some compared value leaves its tolerance, the column sets
  differ, or the two traces do not start and end at shared times (one is
  cut short).  Identical: every row matched and every value equal.
- Deviation = ``|b - a|``; heading columns (``theta``, ``*.theta``,
  ``*_theta``, ``*.steer``, ``*.steer_cmd``) use the wrapped difference
  modulo 2 pi, in rad.
- A blank cell (``nan``, or a null in Parquet) equals a blank cell; blank
  against a number is a divergence (deviation ``inf``).
- Within tolerance means ``deviation <= tolerance`` in every compared cell.
- ``t`` must be a number in every row and increase.
- Speed: when both traces are CSV files with the same columns, pages whose
  bytes are equal (the same number of lines) are not parsed, only checked
  for their shape.

Bad input (missing file, no header, no ``t`` column, a row with the wrong
number of cells, a cell that is not a number) raises
:class:`~sim.errors.InputError` with ``file:line`` (``file: row N`` in Parquet).
"""
from __future__ import annotations

import fnmatch
import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from sim.errors import InputError
from sim.theory.se2 import wrap
from sim.traces.read import CHUNK_BYTES, TraceReader
from sim.traces.tolerance import DEFAULT_TOLERANCE

POSE = ("x", "y", "theta")
MATCH = 1e-6            # times within this fraction of the shorter step are the same time
SAMPLE = 5              # times listed per file when some are only in one


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
    data row of A) and ``t`` (s, from trace A) say where; ``a``/``b`` the values
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
    """The first matched row where some column leaves its tolerance.

    ``row`` is A's data row (0-based); ``columns`` : list of (name, a, b,
    deviation, tolerance), the columns out of tolerance there, in file order.
    """

    row: int
    t_a: float
    t_b: float
    columns: list


@dataclass
class OnlyTimes:
    """Times (s) of rows that have no row at the same time in the other trace."""

    count: int = 0
    first: list = field(default_factory=list)     # the earliest few
    last: float | None = None

    def add(self, t) -> None:
        if len(t):
            self.count += len(t)
            self.first += [float(v) for v in t[:SAMPLE - len(self.first)]]
            self.last = float(t[-1])

    def text(self) -> str:
        shown = ", ".join(_t(v) for v in self.first)
        if self.count > len(self.first):
            shown += (", ..." if self.count > len(self.first) + 1 else ",") + f" {_t(self.last)}"
        return f"{self.count} only in {{}} (t = {shown} s)"

    def to_dict(self) -> dict:
        return {"count": self.count, "first": self.first, "last": self.last}


@dataclass
class DiffReport:
    """The outcome of :func:`compare`.  Rows are 0-based data rows (CSV file line = row + 2)."""

    path_a: str
    path_b: str
    columns_a: tuple
    columns_b: tuple
    rows_a: int = 0
    rows_b: int = 0
    only_a: tuple = ()                      # columns only in A
    only_b: tuple = ()
    compared: list = field(default_factory=list)
    first: Divergence | None = None
    step_a: float | None = None
    step_b: float | None = None
    final_a: tuple | None = None            # (x, y, theta) of the last row
    final_b: tuple | None = None
    equal: bool = True                      # every compared value equal
    matched: int = 0                        # rows of A paired with a row of B at the same time
    times_only_a: OnlyTimes = field(default_factory=OnlyTimes)
    times_only_b: OnlyTimes = field(default_factory=OnlyTimes)
    ends_matched: bool = True               # both traces start and end at shared times

    @property
    def all_matched(self) -> bool:
        return self.matched == self.rows_a == self.rows_b

    @property
    def structure_differs(self) -> bool:
        return bool(self.only_a or self.only_b or not self.ends_matched)

    @property
    def diverged(self) -> bool:
        return self.first is not None or self.structure_differs

    @property
    def status(self) -> str:
        """``identical`` | ``within tolerance`` | ``diverged``."""
        if self.diverged:
            return "diverged"
        return "identical" if self.equal and self.all_matched else "within tolerance"

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
        if self.only_a or self.only_b:
            return "column sets differ"
        if not self.ends_matched:
            return f"times: {self.times_only_a.count} only in A, {self.times_only_b.count} only in B"
        return ""

    def text(self, label_a="A", label_b="B") -> str:
        """The report for a person (several lines)."""
        out = []
        for lab, path, rows, cols, step in ((label_a, self.path_a, self.rows_a, self.columns_a, self.step_a),
                                            (label_b, self.path_b, self.rows_b, self.columns_b, self.step_b)):
            st = f", a row every {step:g} s" if step is not None else ""
            out.append(f"{lab:<9} {path}: {rows} rows{st}, {len(cols)} columns")
        out.append(f"result    {self.status.upper()}")
        if self.only_a:
            out.append(f"columns   only in {label_a}: {', '.join(self.only_a)}")
        if self.only_b:
            out.append(f"columns   only in {label_b}: {', '.join(self.only_b)}")
        if self.rows_a != self.rows_b:
            out.append(f"rows      {label_a} has {self.rows_a}, {label_b} has {self.rows_b}")
        if not self.all_matched:
            parts = [f"compared {self.matched} rows at times in both"]
            for only, lab in ((self.times_only_a, label_a), (self.times_only_b, label_b)):
                parts.append(only.text().format(lab) if only.count else f"none only in {lab}")
            out.append("times     " + "; ".join(parts))
            if not self.ends_matched:
                out.append("          the traces do not start and end at shared times (one is cut short?)")
        if self.first is not None:
            f = self.first
            parts = [f"{n} {_dev(d, is_heading(n))} (allowed {_num(tol)})" for n, a, b, d, tol in f.columns[:6]]
            if len(f.columns) > 6:
                parts.append(f"and {len(f.columns) - 6} more columns")
            tb = "" if f.t_b == f.t_a else f" ({label_b} t={_t(f.t_b)} s)"
            out.append(f"first     t={_t(f.t_a)} s{tb} (row {f.row}): " + "; ".join(parts))
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
            out.append(f"same      {same} of {len(self.compared)} compared columns equal in every compared row")
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
            "times": {"matched": self.matched, "ends_matched": self.ends_matched,
                      "only_a": self.times_only_a.to_dict(), "only_b": self.times_only_b.to_dict()},
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


def _same(va, vb) -> bool:
    """Whether two float arrays hold equal values (a blank equals a blank): the same bits
    (one pass), else value by value (+0 equals -0, NaNs of any payload are equal)."""
    if np.array_equal(va.view(np.uint64), vb.view(np.uint64)):
        return True
    return bool(np.array_equal(va, vb, equal_nan=True))


def _deviation(va, vb, heading):
    """Deviations of value pairs, shape (k, m); ``heading`` (m,) bool wraps modulo 2 pi.

    Returns (deviation, blank mismatches per column (m,) or None when no cell is blank).
    ``|b - a|``; a blank (NaN) equals a blank, and against a number is ``inf``;
    equal infinities deviate by 0.  Only the columns whose deviations hold a NaN
    (found by their sum) go through the blank rules; heading and blank columns are
    worked on in place, one column at a time (no gathered copies).
    """
    with np.errstate(invalid="ignore", over="ignore"):
        d = np.subtract(vb, va, order="F")
        for j in np.flatnonzero(heading):
            col = d[:, j]
            np.add(col, np.pi, out=col)
            np.remainder(col, 2 * np.pi, out=col)
            np.subtract(col, np.pi, out=col)
        np.abs(d, out=d)
        odd = np.flatnonzero(np.isnan(np.add.reduce(d, axis=0)))
    if not odd.size:
        return d, None
    blanks = np.zeros(d.shape[1], np.int64)
    for j in odd:
        a, b, col = va[:, j], vb[:, j], d[:, j]
        na, nb = np.isnan(a), np.isnan(b)
        nan = np.isnan(col)
        col[nan] = np.inf                         # blank against a number; inf - inf
        col[(na & nb) | (nan & (a == b))] = 0.0   # blank against blank; equal infinities
        blanks[j] = np.count_nonzero(na ^ nb)
    return d, blanks


# -- comparing -----------------------------------------------------------------
class _Side:
    """One trace's reading state: its pending rows (not yet paired) and what the report needs."""

    def __init__(self, reader: TraceReader, names):
        self.rd = reader
        self.cols = [reader.columns.index(n) for n in names] + [reader.columns.index("t")]
        self.t = np.empty(0)                      # pending rows: times (s),
        self.v = np.empty((0, len(names)))        # compared values,
        self.row = np.empty(0, np.int64)          # data rows
        self.last_t = -math.inf                   # time of the last row read
        self.done = False
        self.last_page = None
        self.first_matched = False
        self.last_matched_row = -1
        self.only = OnlyTimes()

    def read(self, page) -> np.ndarray:
        """The page's numbers (compared columns, then t), its times checked."""
        values = page.values(cols=self.cols)
        t = values[:, -1]
        bad = np.flatnonzero(~np.isfinite(t))
        if bad.size:
            i = int(bad[0])
            raise page.error(i, "column 't' is blank" if np.isnan(t[i]) else f"column 't' is {t[i]!r}")
        if t[0] <= self.last_t or (t.size > 1 and not bool(np.all(t[1:] > t[:-1]))):
            prev = np.concatenate([[self.last_t], t[:-1]])
            i = int(np.flatnonzero(t <= prev)[0])
            raise page.error(i, f"column 't' must increase from row to row: {t[i]!r} s after {prev[i]!r} s")
        self.last_t = float(t[-1])
        return values

    def add(self, page, values) -> None:
        """Append rows to the pending ones."""
        self.t = np.concatenate([self.t, values[:, -1]])
        self.v = np.concatenate([self.v, values[:, :-1]])
        self.row = np.concatenate([self.row, page.first_row + np.arange(len(values))])

    def keep(self, mask) -> None:
        self.t, self.v, self.row = self.t[mask], self.v[mask], self.row[mask]

    def matched(self, first, last) -> None:
        """Rows ``first`` .. ``last`` (in increasing order) have partners."""
        self.first_matched |= first == 0
        self.last_matched_row = max(self.last_matched_row, int(last))


class _Compare:
    """Reads two traces side by side, pairs rows at equal times, accumulates deviations."""

    def __init__(self, ra, rb, plan, match_tol):
        self.a, self.b = _Side(ra, plan.names), _Side(rb, plan.names)
        self.plan = plan
        self.names = plan.names
        self.tol = np.asarray(plan.tols, float)
        self.heading = np.array([is_heading(n) for n in self.names], bool)
        self.match_tol = match_tol
        k = len(self.names)
        self.max_dev = np.zeros(k)
        self.max_row = np.full(k, -1)
        self.max_t = np.full(k, np.nan)
        self.max_a = np.full(k, np.nan)
        self.max_b = np.full(k, np.nan)
        self.blanks = np.zeros(k, int)
        self.first = None
        self.equal = True
        self.matched = 0
        self.same_text = ra.kind == rb.kind == "csv" and ra.columns == rb.columns

    def run(self) -> None:
        with ThreadPoolExecutor(1, thread_name_prefix="trundle-diff") as self.pool:
            self._run()

    def _run(self) -> None:
        a, b = self.a, self.b
        while not (a.done and b.done):
            aligned = not (a.t.size or b.t.size)
            if aligned and not a.done and not b.done:
                self._pair()
            elif not a.done and (b.done or a.last_t <= b.last_t):
                self._read(a)
            else:
                self._read(b)
            self._resolve()

    def _read(self, side) -> None:
        page = side.rd.take()
        if page is None:
            side.done = True
            return
        side.last_page = page
        side.add(page, side.read(page))

    def _pair(self) -> None:
        """A page of A and as many rows of B.  Pages of equal bytes pair without being parsed;
        pages with the same times pair row by row; anything else waits for :meth:`_resolve`."""
        a, b = self.a, self.b
        pa = a.rd.take()
        if pa is None:
            a.done = True
            return
        a.last_page = pa
        pb = b.rd.take_like(pa) if self.same_text else b.rd.take(len(pa))
        if pb is None:
            b.done = True
            a.add(pa, a.read(pa))
            return
        b.last_page = pb
        n = len(pa)
        if self.same_text and pa.data == pb.data:
            pa.check()                             # the shape (the same bytes in both)
            t = pa.values(rows=[0, n - 1], cols=[a.cols[-1]])[:, 0]
            if np.isfinite(t).all() and t[0] > max(a.last_t, b.last_t) and t[-1] >= t[0]:
                for side in (a, b):
                    side.last_t = float(t[-1])
                    side.matched(pa.first_row, pa.first_row + n - 1)
                self.matched += n
                return
        later = self.pool.submit(b.read, pb)     # the two pages are parsed side by side
        va = a.read(pa)
        vb = later.result()
        if len(pb) == n and np.array_equal(va[:, -1], vb[:, -1]):
            rows = pa.first_row + np.arange(n)
            self._accumulate(va[:, :-1], vb[:, :-1], rows, va[:, -1], vb[:, -1])
            a.matched(pa.first_row, pa.first_row + n - 1)
            b.matched(pb.first_row, pb.first_row + n - 1)
            self.matched += n
            return
        a.add(pa, va)
        b.add(pb, vb)

    def _resolve(self) -> None:
        """Pair pending rows at equal times; settle rows that can have no partner any more."""
        a, b = self.a, self.b
        if a.t.size and b.t.size:
            tol = np.maximum(self.match_tol, 4 * np.spacing(np.abs(a.t)))
            j = np.searchsorted(b.t, a.t - tol, "left")
            jc = np.minimum(j, b.t.size - 1)
            hit = (j < b.t.size) & (np.abs(b.t[jc] - a.t) <= tol)
            ia = np.flatnonzero(hit)
            ib = jc[ia]
            if ia.size > 1:                        # one partner each
                first = np.concatenate([[True], ib[1:] != ib[:-1]])
                ia, ib = ia[first], ib[first]
            if ia.size:
                self._accumulate(a.v[ia], b.v[ib], a.row[ia], a.t[ia], b.t[ib])
                a.matched(a.row[ia[0]], a.row[ia[-1]])
                b.matched(b.row[ib[0]], b.row[ib[-1]])
                self.matched += ia.size
                keep_a = np.ones(a.t.size, bool)
                keep_a[ia] = False
                keep_b = np.ones(b.t.size, bool)
                keep_b[ib] = False
                a.keep(keep_a)
                b.keep(keep_b)
        for side, other in ((a, b), (b, a)):
            if not side.t.size:
                continue
            # no partner can come any more: the other trace is done, or already past this time
            settled = np.ones(side.t.size, bool) if other.done else \
                side.t + np.maximum(self.match_tol, 4 * np.spacing(np.abs(side.t))) < other.last_t
            if settled.any():
                side.only.add(side.t[settled])
                side.keep(~settled)

    def _accumulate(self, va, vb, rows, ta, tb) -> None:
        """Fold matched rows (values (k, m), A's data rows (k,), times (k,)) into the report."""
        if self.equal:
            if _same(va, vb):
                return                             # every deviation 0: nothing to fold in
            self.equal = False
        d, blanks = _deviation(va, vb, self.heading)
        if blanks is not None:
            self.blanks += blanks
        top = d.argmax(axis=0)
        val = d[top, np.arange(d.shape[1])]
        if self.first is None and bool((val > self.tol).any()):
            hit = np.flatnonzero((d > self.tol).any(axis=1))
            j = int(hit[0])
            cols = [(self.names[m], float(va[j, m]), float(vb[j, m]), float(d[j, m]), float(self.tol[m]))
                    for m in np.flatnonzero(d[j] > self.tol)]
            self.first = Divergence(int(rows[j]), float(ta[j]), float(tb[j]), cols)
        for m in np.flatnonzero(val > self.max_dev):
            j = top[m]
            self.max_dev[m], self.max_row[m], self.max_t[m] = val[m], rows[j], ta[j]
            self.max_a[m], self.max_b[m] = va[j, m], vb[j, m]

    def report(self) -> DiffReport:
        plan, a, b = self.plan, self.a, self.b
        rep = DiffReport(plan.path_a, plan.path_b, plan.columns_a, plan.columns_b,
                         rows_a=a.rd.rows, rows_b=b.rd.rows, only_a=plan.only_a, only_b=plan.only_b,
                         first=self.first, equal=self.equal, matched=self.matched,
                         times_only_a=a.only, times_only_b=b.only, step_a=plan.step_a, step_b=plan.step_b)
        rep.ends_matched = all(
            (s.rd.rows == 0 and o.rd.rows == 0)
            or (s.first_matched and s.last_matched_row == s.rd.rows - 1) for s, o in ((a, b), (b, a)))
        rep.final_a, rep.final_b = _final(a), _final(b)
        for j, n in enumerate(self.names):
            cd = ColumnDiff(n, float(self.tol[j]), is_heading(n))
            if self.max_row[j] >= 0:
                cd.max_deviation = float(self.max_dev[j])
                cd.row = int(self.max_row[j])
                cd.t, cd.a, cd.b = float(self.max_t[j]), float(self.max_a[j]), float(self.max_b[j])
            cd.blanks = int(self.blanks[j])
            rep.compared.append(cd)
        return rep


def _final(side):
    page, cols = side.last_page, side.rd.columns
    if page is None or not all(p in cols for p in POSE):
        return None
    v = page.values(rows=[len(page) - 1], cols=[cols.index(p) for p in POSE])[0]
    return tuple(float(x) for x in v) if np.isfinite(v).all() else None


@dataclass
class _Plan:
    """What to compare."""

    path_a: str
    path_b: str
    columns_a: tuple
    columns_b: tuple
    names: list
    tols: list
    only_a: tuple
    only_b: tuple
    step_a: float | None = None
    step_b: float | None = None


def _plan(ra, rb, tol, rules, columns) -> _Plan:
    every = list(ra.columns) + [n for n in rb.columns if n not in ra.columns]
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

    names = [n for n in chosen if n in ra.columns and n in rb.columns]
    return _Plan(ra.path, rb.path, ra.columns, rb.columns, names, [tol_of(n) for n in names],
                 tuple(n for n in chosen if n not in rb.columns), tuple(n for n in chosen if n not in ra.columns))


def head_step(path) -> float | None:
    """``t1 - t0`` of a trace's first two rows (s), or None (fewer rows, or not a positive step)."""
    with TraceReader(path, 1 << 16) as rd:
        it = rd.columns.index("t")
        got = []
        while len(got) < 2:
            page = rd.take(2 - len(got))
            if page is None:
                return None
            got += list(page.values(cols=[it])[:, 0])
    step = got[1] - got[0]
    return float(step) if math.isfinite(step) and step > 0 else None


def compare(path_a, path_b, tol: float = DEFAULT_TOLERANCE, rules=(), columns=None,
            chunk_bytes: int = CHUNK_BYTES) -> DiffReport:
    """Compare trace ``path_b`` against ``path_a`` (CSV or Parquet, see module docstring).

    Parameters
    ----------
    tol : float
        Default absolute tolerance (column units; rad for heading columns).
    rules : list of (pattern, tolerance)
        Per-column tolerances; a pattern is a column name or a shell pattern;
        the last rule matching a column wins.
    columns : list of str or None
        Compare only these columns (names or patterns); ``t`` is always read
        to pair the rows.
    chunk_bytes : int
        CSV text read per page and file; memory is a few times this.
    """
    with TraceReader(path_a, chunk_bytes) as ra, TraceReader(path_b, chunk_bytes) as rb:
        plan = _plan(ra, rb, tol, rules, columns)
        plan.step_a, plan.step_b = head_step(path_a), head_step(path_b)
        steps = [s for s in (plan.step_a, plan.step_b) if s is not None]
        cmp_ = _Compare(ra, rb, plan, MATCH * min(steps) if steps else 0.0)
        cmp_.run()
        return cmp_.report()
