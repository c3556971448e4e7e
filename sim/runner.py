"""Run a scenario: drive the engine through the script, stream the trace,
evaluate the checks and summarise.

The result is a :class:`RunResult`; with ``keep=True`` it also holds the whole
trace as numpy arrays (one array per CSV column), for scripts and tests.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .engine import Simulator, StepResult
from .scenario import Scenario
from .trace import TraceWriter, columns, row_values


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
    underdetermined_t: float | None = None
    checks: list = field(default_factory=list)
    trace: dict | None = None
    interrupted: bool = False
    odometry: dict | None = None

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)


def _wrap(a):
    return (a + math.pi) % (2 * math.pi) - math.pi


class _Checks:
    def __init__(self, scen: Scenario):
        self.scen = scen
        self.at_rows = {}
        for c in scen.checks:
            if c.at is not None:
                self.at_rows[int(round(c.at / scen.step))] = None

    def see(self, k, row: StepResult):
        if k in self.at_rows:
            self.at_rows[k] = row

    def evaluate(self, res: RunResult, odo_summary) -> list:
        out = []
        dt = self.scen.step
        for c in self.scen.checks:
            row = self.at_rows.get(int(round(c.at / dt))) if c.at is not None else None
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
            parts.append(f"position ({row.pose[0]:.4f}, {row.pose[1]:.4f}) m vs "
                         f"({want.get('x', row.pose[0]):.4f}, {want.get('y', row.pose[1]):.4f}): "
                         f"off {err:.3g} m, allowed {lim:g}")
        if "theta" in want:
            err = abs(_wrap(row.pose[2] - want["theta"]))
            lim = tol.get("heading", 0.0)
            ok &= err <= lim
            parts.append(f"heading {math.degrees(row.pose[2]):.3f} deg vs {math.degrees(want['theta']):.3f}: "
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
            err = abs(_wrap(row.steer[i] - p["steer"]))
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


def apply_command(sim: Simulator, cmd) -> None:
    """Apply one script :class:`~sim.scenario.Command` to a simulator."""
    if cmd.kind == "twist":
        sim.command_twist(cmd.value)
    elif cmd.kind == "wheels":
        sim.command_wheels(cmd.value)
    else:
        sim.stop()


def run_scenario(scen: Scenario, csv: str | None = None, every: int = 1, keep: bool = False,
                 on_row=None) -> RunResult:
    """Run ``scen`` to the end.

    Parameters
    ----------
    csv : path or None
        Stream the trace there (written as ``csv + '.part'`` and renamed when
        done, also when interrupted; removed if the run crashes).
    every : int
        Keep every N-th row in the CSV / kept trace (the last row always).
    keep : bool
        Also return the trace as arrays in ``RunResult.trace`` (memory grows
        with the run; use the CSV for long runs).
    on_row : callable(StepResult) or None
        Called after every step (a renderer, a progress bar).
    """
    sim = Simulator(scen.robot, scen.step, scen.start, scen.align, scen.align_tolerance)
    odo = None
    if scen.odometry is not None:
        from .odometry import Odometer
        odo = Odometer(scen.odometry, scen.robot, scen.step, scen.start)
    extra_cols = tuple(odo.columns) if odo else ()
    header = columns(scen.robot, extra_cols)
    writer = TraceWriter(csv, header) if csv else None
    kept = [] if keep else None
    res = RunResult(scen)
    checks = _Checks(scen)
    script = scen.script
    j = 0
    n = scen.steps
    dt = scen.step
    last_pos = None
    try:
        for k in range(n):
            t = k * dt
            while j < len(script) and script[j].at <= t + 1e-9 * dt:
                apply_command(sim, script[j])
                j += 1
            row = sim.step()
            extra = odo.update(row) if odo else ()
            checks.see(k, row)
            pos = row.pose
            if last_pos is not None:
                res.distance += math.hypot(pos[0] - last_pos[0], pos[1] - last_pos[1])
            last_pos = pos
            if row.slip > res.peak_slip:
                res.peak_slip, res.peak_slip_t = row.slip, row.t
            sf = float(np.linalg.norm(row.shortfall))
            if sf > res.peak_shortfall:
                res.peak_shortfall = sf
            if row.rank < 3 and res.underdetermined_t is None:
                res.underdetermined_t = row.t
            res.rows = k + 1
            res.final_pose = tuple(float(v) for v in pos)
            if k % every == 0 or k == n - 1:
                if writer or kept is not None:
                    vals = row_values(row, extra)
                    if writer:
                        writer.write(vals)
                    if kept is not None:
                        kept.append(vals)
            if on_row is not None:
                on_row(row)
    except KeyboardInterrupt:
        res.interrupted = True
    except BaseException:
        if writer:
            writer.abort()
        raise
    if writer:
        writer.close()
    if odo:
        res.odometry = odo.summary()
    res.checks = checks.evaluate(res, res.odometry)
    if kept is not None:
        arr = np.asarray(kept) if kept else np.zeros((0, len(header)))
        res.trace = {c: arr[:, i] for i, c in enumerate(header)}
    return res


def summary_text(res: RunResult) -> str:
    """The short, human summary printed by ``trundle run``."""
    s = res.scenario
    x, y, th = res.final_pose
    lines = [f"scenario  {s.source}  ({s.robot.name}, {res.rows} steps of {s.step:g} s"
             f"{', INTERRUPTED' if res.interrupted else ''})",
             f"distance  {res.distance:.4f} m",
             f"final     x {x:.4f} m  y {y:.4f} m  theta {math.degrees(th):.3f} deg",
             f"peak slip {res.peak_slip:.4g} m/s at t={res.peak_slip_t:g} s"]
    if res.peak_shortfall > 1e-9:
        lines.append(f"twist     requests the base cannot follow: largest shortfall {res.peak_shortfall:.4g}")
    if res.underdetermined_t is not None:
        lines.append(f"note      from t={res.underdetermined_t:g} s the driven wheels left some motion undetermined; "
                     "the minimum-norm motion was used")
    if res.odometry:
        o = res.odometry
        lines.append(f"odometry  final error {o['final_position_error']:.4g} m, "
                     f"{math.degrees(o['final_heading_error']):.4g} deg; peak {o['peak_position_error']:.4g} m, "
                     f"{math.degrees(o['peak_heading_error']):.4g} deg")
    for c in res.checks:
        lines.append(f"{'PASS' if c.passed else 'FAIL'}      {c.text}")
    if not res.checks:
        lines.append("checks    none in this scenario")
    return "\n".join(lines)
