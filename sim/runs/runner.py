"""Run a scenario: drive the engine through the script, stream the trace,
evaluate the checks and summarise.

The result is a :class:`RunResult`; with ``keep=True`` it also holds the whole
trace as numpy arrays (one array per CSV column), for scripts and tests.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from sim.engine.notes import Tally
from sim.engine.record import Block, columns
from sim.engine.simulator import Simulator
from sim.files.commandlog import CommandLog
from sim.files.scenario import Scenario
from sim.files.text import fixed
from sim.theory.se2 import wrap
from sim.traces.meta import trace_meta
from sim.traces.writer import TraceWriter

# rows per block: the compiled stretch between two looks at Ctrl-C, the writer, the summary.
# 2048 rows of the four-module base are 0.9 MB: the block the engine writes stays in the core's
# cache while the summary reads it (8192 rows ran about a quarter slower here).
CHUNK = 2048


@dataclass
class CheckResult:
    """One check's outcome: ``text`` says what was checked, measured and expected."""

    passed: bool
    text: str
    line: int | None = None


@dataclass
class RunResult:
    """What a run produced.  Lengths in m, angles in rad, slip in m/s."""

    scenario: Scenario
    rows: int = 0
    distance: float = 0.0
    final_pose: tuple = (0.0, 0.0, 0.0)
    peak_slip: float = 0.0
    peak_slip_t: float = 0.0
    peak_shortfall: float = 0.0
    peak_shortfall_twist: tuple = (0.0, 0.0, 0.0)
    peak_shortfall_t: float = 0.0
    underdetermined_t: float | None = None
    checks: list = field(default_factory=list)
    trace: dict | None = None
    interrupted: bool = False
    odometry: dict | None = None
    decisions: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    tracking: dict | None = None

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)


class _Checks:
    def __init__(self, scen: Scenario):
        self.scen = scen
        self.last = None  # the last row seen
        self.at_rows = {}
        for c in scen.checks:
            if c.at is not None:
                self.at_rows[int(round(c.at / scen.step))] = None
        self.meter = None  # clearance to the floor over the run, measured as the blocks go by
        if any(c.kind in ("clearance_above", "no_contact") and c.at is None for c in scen.checks):
            from sim.runs.clearance import ClearanceMeter
            self.meter = ClearanceMeter(scen.robot.outline, scen.floor)

    def observe(self, block) -> None:
        """Take one block of rows (consumed now: the engine reuses its buffer)."""
        if self.meter is not None:
            self.meter.add(block.t, block.pose)

    def evaluate(self, res: RunResult, odo_summary) -> list:
        out = []
        dt = self.scen.step
        for c in self.scen.checks:
            row = self.at_rows.get(int(round(c.at / dt))) if c.at is not None else None
            if row is None and c.end and self.last is not None:  # a controlled run that ended early
                row = self.last
                c = replace(c, at=row.t)
            if c.at is not None and row is None:
                out.append(CheckResult(False, f"{c.kind} at t={c.at:g} s: run ended before this time", c.line))
                continue
            out.append(getattr(self, "_" + c.kind)(c, row, res, odo_summary))
        return out

    def _pose(self, c, row, res, _):
        want = c.params["pose"]
        tol = c.params["tolerance"]
        ok, parts = True, []
        if "x" in want or "y" in want:
            dx = row.pose[0] - want.get("x", row.pose[0])
            dy = row.pose[1] - want.get("y", row.pose[1])
            err = math.hypot(dx, dy)
            lim = tol.get("position", 0.0)
            ok &= err <= lim
            parts.append(f"position ({fixed(row.pose[0], 4)}, {fixed(row.pose[1], 4)}) m vs "
                         f"({fixed(want.get('x', row.pose[0]), 4)}, {fixed(want.get('y', row.pose[1]), 4)}): "
                         f"off {err:.3g} m, allowed {lim:g}")
        if "theta" in want:
            err = abs(wrap(row.pose[2] - want["theta"]))
            lim = tol.get("heading", 0.0)
            ok &= err <= lim
            parts.append(f"heading {fixed(math.degrees(row.pose[2]))} deg vs {fixed(math.degrees(want['theta']))}: "
                         f"off {math.degrees(err):.3g} deg, allowed {math.degrees(lim):g}")
        return CheckResult(bool(ok), f"pose at t={c.at:g} s: " + "; ".join(parts), c.line)

    def _slip(self, c, row, res, above):
        thr = c.params["threshold"]
        if row is None:
            val, when = res.peak_slip, f"peak {res.peak_slip:.3g} m/s at t={res.peak_slip_t:g} s"
        else:
            val, when = row.slip, f"slip {row.slip:.3g} m/s at t={c.at:g} s"
        ok = val > thr if above else val < thr
        rel = "above" if above else "below"
        return CheckResult(bool(ok), f"slip {rel} {thr:g} m/s: {when}", c.line)

    def _slip_below(self, c, row, res, _):
        return self._slip(c, row, res, False)

    def _slip_above(self, c, row, res, _):
        return self._slip(c, row, res, True)

    def _wheel(self, c, row, res, _):
        p = c.params
        i = self.scen.robot.index[p["wheel"]]
        tol = p["tolerance"]
        ok, parts = True, []
        if "steer" in p:
            err = abs(wrap(row.steer[i] - p["steer"]))
            lim = tol.get("steer", 0.0)
            ok &= err <= lim
            parts.append(f"steer {math.degrees(row.steer[i]):.3f} deg vs {math.degrees(p['steer']):.3f}: "
                         f"off {math.degrees(err):.3g} deg, allowed {math.degrees(lim):g}")
        if "spin" in p:
            err = abs(row.spin[i] - p["spin"])
            lim = tol.get("spin", 0.0)
            ok &= err <= lim
            parts.append(f"spin {row.spin[i]:.4f} rad/s vs {p['spin']:.4f}: off {err:.3g}, allowed {lim:g}")
        return CheckResult(bool(ok), f"wheel {p['wheel']} at t={c.at:g} s: " + "; ".join(parts), c.line)

    def _arrive_within(self, c, row, res, _):
        tr = res.tracking or {}
        tol = c.params["tolerance"] or tr.get("route_tolerance")
        when = (tr.get("arrival") or {}).get(tuple(tol))
        lim = c.params["time"]
        within = f"within {tol[0]:g} m and {math.degrees(tol[1]):g} deg of the end pose"
        if when is None:
            return CheckResult(False, f"arrive within {lim:g} s: never settled {within}", c.line)
        plan = tr.get("plan_time")
        planned = f" (planned {plan:.3f} s)" if plan is not None else ""
        return CheckResult(bool(when <= lim), f"arrive within {lim:g} s: arrived at t={when:g} s{planned}, "
                           f"{within}", c.line)

    def _tracking_error_below(self, c, row, res, _):
        thr, after = c.params["threshold"], c.params["after"]
        peak, when = ((res.tracking or {}).get("peak_error") or {}).get(after, (0.0, None))
        since = f" after t={after:g} s" if after else ""
        at = f" at t={when:g} s" if when is not None else ""
        return CheckResult(bool(peak < thr), f"tracking error below {thr:g} m{since}: peak {peak:.3g} m{at}",
                           c.line)

    def _odometry_error_below(self, c, row, res, odo):
        tol = c.params["tolerance"]
        if odo is None:
            return CheckResult(False, "odometry error: the scenario has no odometry section", c.line)
        ok, parts = True, []
        if "position" in tol:
            ok &= odo["peak_position_error"] <= tol["position"]
            parts.append(f"peak position error {odo['peak_position_error']:.4g} m, allowed {tol['position']:g}")
        if "heading" in tol:
            ok &= odo["peak_heading_error"] <= tol["heading"]
            parts.append(f"peak heading error {math.degrees(odo['peak_heading_error']):.4g} deg, "
                         f"allowed {math.degrees(tol['heading']):g}")
        return CheckResult(bool(ok), "odometry: " + "; ".join(parts), c.line)

    # -- clearance to the scenario's floor (sim.runs.clearance) ----------------
    def _clearance_above(self, c, row, res, _):
        thr = c.params["threshold"]
        cl = self._clearance(c, row, res)
        n = cl.nearest
        if n is None:
            return CheckResult(True, f"clearance above {thr:g} m: the floor has no features", c.line)
        when = f"at t={c.at:g} s" if row is not None else f"smallest at t={n.t:g} s"
        text = (f"clearance above {thr:g} m: {n.distance:.4g} m to '{n.feature}' {when}, base point "
                f"({n.body_point[0]:.3f}, {n.body_point[1]:.3f}) m (body frame), feature point "
                f"({n.feature_point[0]:.3f}, {n.feature_point[1]:.3f}) m")
        if row is None:
            text += "; " + ("no contact" if cl.first_contact is None else self._contact_text(cl))
            text += self._partial(res)
        return CheckResult(bool(n.distance > thr), text, c.line)

    def _no_contact(self, c, row, res, _):
        cl = self._clearance(c, row, res)
        when = f" at t={c.at:g} s" if row is not None else ""
        n = cl.nearest
        near = f"; smallest clearance {n.distance:.4g} m to '{n.feature}' at t={n.t:g} s" if n and row is None else ""
        part = self._partial(res) if row is None else ""
        return CheckResult(cl.first_contact is None, f"no contact{when}: {self._contact_text(cl)}{near}{part}", c.line)

    @staticmethod
    def _partial(res) -> str:
        return f" (over the {res.rows} rows before the run was interrupted)" if res.interrupted else ""

    def _contact_text(self, cl) -> str:
        f = cl.first_contact
        if f is None:
            return "none"
        return (f"first contact with '{f.feature}' at t={f.t:g} s at ({f.point[0]:.3f}, {f.point[1]:.3f}) m, "
                f"{cl.contact_rows} rows ({cl.contact_rows * self.scen.step:g} s) in contact")

    def _clearance(self, c, row, res):
        """The clearance at ``row`` (a check at a time), or over every row the run made
        (measured block by block as the run went: any run, scripted or controlled)."""
        from sim.runs.clearance import clearance_along

        if row is not None:
            return clearance_along(self.scen.robot.outline, np.asarray(row.pose, float)[None], self.scen.floor,
                                   t=np.array([float(row.t)]))
        cached = self.__dict__.get("clearance_result")
        if cached is None:
            cached = self.clearance_result = self.meter.result()
        return cached


def entry_steps(script, dt: float) -> list:
    """Step index at which each script entry takes effect: the first k with k dt >= at."""
    at = script.t if isinstance(script, CommandLog) else np.array([c.at for c in script], dtype=float)
    return steps_at(at, dt).tolist()


def steps_at(at: np.ndarray, dt: float) -> np.ndarray:
    """The first step k (int, (R,)) with k dt >= at, for times ``at`` (R,) s (within 1e-9 dt)."""
    k = np.maximum(0.0, np.ceil(at / dt - 1e-9))
    while True:
        up = k * dt + 1e-9 * dt < at
        if not up.any():
            break
        k[up] += 1.0
    while True:
        down = (k > 0) & ((k - 1.0) * dt + 1e-9 * dt >= at)
        if not down.any():
            break
        k[down] -= 1.0
    return k.astype(np.int64)


def _segments(scen: Scenario, chunk: int):
    """(first step, number of steps, commands to apply first) covering the run."""
    ks = entry_steps(scen.script, scen.step)
    n = scen.steps
    j, k = 0, 0
    while k < n:
        todo = []
        while j < len(ks) and ks[j] <= k:
            todo.append(scen.script[j])
            j += 1
        nxt = ks[j] if j < len(ks) else n
        m = min(nxt, n, k + chunk) - k
        yield k, m, todo
        k += m


def simulator_for(scen: Scenario) -> Simulator:
    """A simulator at the scenario's start, with its step and policies."""
    return Simulator(scen.robot, scen.step, scen.start, scen.align, scen.align_tolerance,
                     skid=scen.skid)


def _blocks(scen, odo, on_row):
    """Blocks of up to CHUNK rows.  Each script segment runs as a compiled stretch; short
    segments fill one block together, so the summary and the writer see few, large blocks.
    A command log runs whole blocks in compiled code, its commands applied as their steps
    come (a log may hold a command for every step)."""
    sim = simulator_for(scen)
    buf = np.empty((min(CHUNK, max(scen.steps, 1)), sim.width))  # reused: each block is consumed before the next
    fill, start = 0, 0

    def done(rows):
        block = Block(start, buf[:rows], sim.n)
        if on_row is not None:
            for i in range(rows):
                on_row(block.row(i))
        return block, (odo.update_block(block) if odo else None)

    log = scen.script
    if isinstance(log, CommandLog):
        timed = sim.timed(log.kind, log.columns, steps_at(log.t, scen.step), log.values)
        for start in range(0, scen.steps, len(buf)):
            m = min(len(buf), scen.steps - start)
            sim.advance_timed(m, timed, out=buf[:m])
            yield done(m)
        return
    for k0, m, todo in _segments(scen, CHUNK):
        if fill + m > len(buf):
            yield done(fill)
            fill, start = 0, k0
        for c in todo:
            sim.command(c.kind, c.value)
        sim.advance(m, out=buf[fill:fill + m])
        fill += m
    if fill:
        yield done(fill)


def run_scenario(scen: Scenario, csv: str | None = None, every: int = 1, keep: bool = False,
                 on_row=None, controller=None) -> RunResult:
    """Run ``scen`` to the end.

    Parameters
    ----------
    csv : path or None
        Stream the trace there, CSV or (for ``*.parquet``) Parquet, with its
        sidecar (written as ``csv + '.part'`` and renamed when done, also when
        interrupted; removed if the run crashes).
    every : int
        Keep every N-th row in the CSV / kept trace (the last row always).
    keep : bool
        Also return the trace as arrays in ``RunResult.trace`` (memory grows
        with the run; use the CSV for long runs).
    on_row : callable(StepResult) or None
        Called with every row (a renderer, a progress bar), a block at a time.
    controller : object with ``command(observation)``, or a driver
        Commands the base instead of the script (:mod:`sim.runs.control`).
    """
    if controller is None and not scen.scripted:
        from sim.errors import InputError
        raise InputError(scen.source, 1, "no script or commands: nothing commands the base; give a script, "
                                         "or drive it with 'trundle run --controller package.module:Name' "
                                         "or 'trundle serve'")
    odo = None
    if scen.odometry is not None:
        from sim.odometry.encoders import Odometer
        odo = Odometer(scen.odometry, scen.robot, scen.step, scen.start)
    extra_cols = tuple(odo.columns) if odo else ()
    loop = None
    if controller is not None:
        from sim.runs.control import Driver, PeriodDriver, controlled_blocks
        driver = controller if isinstance(controller, Driver) else PeriodDriver(controller, scen)
        blocks = controlled_blocks(scen, odo, driver, on_row)
        extra_cols += tuple(driver.columns)
    elif scen.closed_loop:
        from sim.runs.closedloop import ClosedLoop  # a controller computes the twist every step
        loop = ClosedLoop(scen, entry_steps(scen.script, scen.step), simulator_for(scen), odo, on_row)
        blocks = loop.blocks()
        extra_cols += tuple(loop.columns)
    else:
        blocks = _blocks(scen, odo, on_row)
    header = columns(scen.robot, extra_cols)
    writer = TraceWriter(csv, header, trace_meta(scen, header, every)) if csv else None
    kept = [] if keep else None
    res = RunResult(scen)
    checks = _Checks(scen)
    tally = Tally(scen.robot, scen.step)
    n = scen.steps
    try:
        for block, extra in blocks:
            if writer or kept is not None:
                k = block.k0 + np.arange(len(block))
                sel = (k % every == 0) | (k == n - 1)
                vals = block.values
                if extra is not None:
                    vals = np.hstack([vals, extra])
                vals = vals[sel]
                if writer:
                    writer.write_block(vals)
                if kept is not None:
                    kept.append(vals)
            _account(res, checks, tally, block)  # after writing: the summary never claims unwritten rows
    except KeyboardInterrupt:
        res.interrupted = True
    except BaseException:
        if writer:
            writer.abort()
        raise
    if writer:
        writer.close(complete=not res.interrupted)    # the trace, then its sidecar
    if odo:
        res.odometry = odo.summary()
    _figures(res, tally)
    res.decisions, res.notes = tally.kinds, tally.lines()
    if loop:
        res.tracking = loop.summary()
    res.checks = checks.evaluate(res, res.odometry)
    if kept is not None:
        arr = np.vstack(kept) if kept else np.zeros((0, len(header)))
        res.trace = {c: arr[:, i] for i, c in enumerate(header)}
    return res


def _account(res: RunResult, checks, tally, block) -> None:
    """Fold one block of rows into the running summary and the checks."""
    m = len(block)
    checks.last = block.row(m - 1)
    checks.observe(block)
    for k in checks.at_rows:
        if block.k0 <= k < block.k0 + m:
            checks.at_rows[k] = block.row(k - block.k0)
    tally.fold(block)
    res.rows = block.k0 + m
    res.final_pose = tuple(float(v) for v in block.pose[-1])


def _figures(res: RunResult, tally) -> None:
    """The run's figures from its tally."""
    res.distance = tally.distance
    res.peak_slip, res.peak_slip_t = tally.peak_slip
    res.underdetermined_t = tally.underdetermined_t
    proj = tally.kinds.get("projected")
    if proj is not None:
        res.peak_shortfall, res.peak_shortfall_t = proj["extreme"], proj["extreme_t"]
        res.peak_shortfall_twist = tuple(proj["twist"])


def summary_text(res: RunResult) -> str:
    """The short, human summary printed by ``trundle run``."""
    s = res.scenario
    x, y, th = res.final_pose
    lines = [f"scenario  {s.source}  ({s.robot.name}, {res.rows} rows: t = 0 to "
             f"{(res.rows - 1) * s.step:g} s in steps of {s.step:g} s{', INTERRUPTED' if res.interrupted else ''})",
             f"distance  {res.distance:.4f} m",
             f"final     x {fixed(x, 4)} m  y {fixed(y, 4)} m  theta {fixed(math.degrees(th))} deg",
             f"peak slip {res.peak_slip:.4g} m/s at t={res.peak_slip_t:g} s"]
    for note in res.notes:
        lines.append(f"engine    {note}")
    if res.underdetermined_t is not None:
        lines.append(f"note      from t={res.underdetermined_t:g} s the driven wheels left some motion undetermined; "
                     "the minimum-norm motion was used")
    if res.odometry:
        o = res.odometry
        lines.append(f"odometry  final error {o['final_position_error']:.4g} m, "
                     f"{math.degrees(o['final_heading_error']):.4g} deg; peak {o['peak_position_error']:.4g} m, "
                     f"{math.degrees(o['peak_heading_error']):.4g} deg")
    if res.tracking:
        tr = res.tracking
        peak, when = tr["peak_error"][0.0]
        lines.append(f"tracking  peak error {peak:.4g} m" + (f" at t={when:g} s" if when is not None else ""))
        tol = tr["route_tolerance"]
        arr = tr["arrival"].get(tuple(tol))
        if tr.get("plan_time") is not None:
            lines.append(f"route     planned {tr['plan_time']:.3f} s; "
                         + (f"arrived at t={arr:g} s" if arr is not None else "not settled at the end pose")
                         + f" (within {tol[0]:g} m, {math.degrees(tol[1]):g} deg)")
    for c in res.checks:
        lines.append(f"{'PASS' if c.passed else 'FAIL'}      {c.text}")
    if not res.checks:
        lines.append("checks    none in this scenario")
    return "\n".join(lines)
