"""Closed-loop runs: a tracking controller computes the twist command every step.

Used by :func:`sim.runs.runner.run_scenario` for scenarios with a ``route``, ``goto``
entries or world-frame twists (``Scenario.closed_loop``).  The run yields the same
blocks of rows as the open-loop engines, plus four columns (:data:`COLUMNS`): the
reference pose ``ref_x, ref_y, ref_theta`` (world, m, rad; blank while no controller
drives) and ``track_error``, the tracked point's distance from the planned path (m).

Under a plan each stretch between script entries runs in compiled code
(:func:`sim.engine.tracking.run_tracking`): per step, the motion already under way, the
control law and the engine's step.
"""
from __future__ import annotations

import math

import numpy as np

from sim.engine.record import Block
from sim.engine.tracking import DEFAULT_GAINS, LAWS, motion_now
from sim.errors import InputError
from sim.model.route import DEFAULT_TOLERANCE, Route
from sim.theory.kinematics import twist_scale
from sim.theory.se2 import body_twist_for_world, wrap
from sim.theory.speedplan import motion_of, plan_route, plan_turn

COLUMNS = ("ref_x", "ref_y", "ref_theta", "track_error")


class Tracking:
    """The plan being followed, as the arrays the compiled law takes (see
    :meth:`sim.engine.simulator.Simulator.advance_tracking`)."""

    def __init__(self, plan, t0, motion, gains, robot, lead):
        self.t0 = t0
        self.lead = bool(lead)
        self.plan = plan
        self.law = LAWS[motion.law]
        self.arrays = (np.ascontiguousarray(plan.t), np.ascontiguousarray(plan.pose),
                       np.ascontiguousarray(plan.speed), np.ascontiguousarray(plan.hint), np.ascontiguousarray(plan.index),
                       np.ascontiguousarray(plan.path.xy))
        self.frame = np.array(motion.guide, dtype=float)
        self.gains = np.array(gains, dtype=float)
        self.size = float(robot.size)
        self.steered = bool(motion.steered)
        self.goal = np.array(plan.end_pose, dtype=float)


def lead_of(robot) -> bool:
    """Whether a command shapes the motion only from the next row: some drive has a
    ``max_spin_accel`` or some steered wheel a ``max_steer_rate`` (the engine ramps them
    over the step; unlimited actuators are at their command at once)."""
    a = robot.arrays
    st = a.is_("steered")
    return bool(np.any(np.isfinite(a.max_spin_accel[a.driven])) or np.any(np.isfinite(a.max_steer_rate[st])))


class ClosedLoop:
    """Runs ``scen`` under control on the simulator ``sim`` (at the scenario's start).
    ``entry_steps`` (list) is the step at which each script entry takes effect (from
    :mod:`sim.runs.runner`); open-loop entries go to :meth:`Simulator.command`.
    ``odo``: an :class:`~sim.odometry.encoders.Odometer` or None; ``on_row``: called with
    every :class:`~sim.engine.record.StepResult`.

    After the run, :meth:`summary` gives the tracking figures the checks use.
    """

    columns = COLUMNS

    def __init__(self, scen, entry_steps, sim, odo=None, on_row=None):
        self.scen = scen
        self.sim = sim
        self.ks = list(entry_steps)
        self.odo = odo
        self.on_row = on_row
        self.motion = motion_of(scen.robot)
        self.gains = scen.controller if scen.controller is not None else DEFAULT_GAINS.get(self.motion.law, ())
        route_tol = scen.route.tolerance if scen.route is not None else DEFAULT_TOLERANCE
        self.tolerances = sorted({tuple(c.params["tolerance"] or route_tol) for c in scen.checks
                                  if c.kind == "arrive_within"} | {tuple(route_tol)})
        self.afters = sorted({c.params["after"] for c in scen.checks if c.kind == "tracking_error_below"} | {0.0})
        self.inside = {tol: None for tol in self.tolerances}     # time the base last came within tolerance
        self.peak = {a: (0.0, None) for a in self.afters}         # (m, s) peak path error after a
        self.last_goto = max((i for i, c in enumerate(scen.script) if c.kind == "goto"), default=None)
        self.final = scen.route is not None                       # tracking the run's last plan
        self.plan_time = scen.plan.time if scen.plan is not None else None
        self.track = None
        self.world = None
        self.lead = lead_of(scen.robot)
        n = len(scen.robot.wheels)
        self._fk = (scen.robot.packed, twist_scale(scen.robot), np.zeros((2 * n, 3)), np.zeros((3, 2 * n)),
                    np.zeros((2, 2 * n), dtype=np.int64), np.zeros((2 * n + 4, 3)), np.zeros(2 * n))

    # -- script ------------------------------------------------------------------------
    def _command(self, sim, i, cmd):
        if cmd.kind == "goto":
            self.world = None
            self.track = self._goto(sim, cmd)
            self.final = i == self.last_goto
            self.plan_time = self.track.plan.time
            for tol in self.inside:
                self.inside[tol] = None
        elif cmd.kind == "world_twist":
            self.track, self.final, self.world = None, False, np.array(cmd.value, dtype=float)
        else:
            self.track, self.final, self.world = None, False, None
            sim.command(cmd.kind, cmd.value)

    def _goto(self, sim, cmd) -> Tracking:
        robot = self.scen.robot
        x, y, th = cmd.value
        gx, gy, phi = self.motion.guide
        c, s = math.cos(sim.pose[2]), math.sin(sim.pose[2])
        here = (sim.pose[0] + c * gx - s * gy, sim.pose[1] + s * gx + c * gy)
        if math.hypot(x - here[0], y - here[1]) <= 1e-6:
            plan = plan_turn(robot, here, float(sim.pose[2]), float(sim.pose[2]) if th is None else th,
                             steer=sim.heading, headroom=self.scen.headroom)
        else:
            route = Route("goto", [here, (x, y)], (float(sim.pose[2]), th))
            plan = plan_route(robot, route, steer=sim.heading, headroom=self.scen.headroom)
        if not plan.feasible:
            raise InputError(self.scen.source, cmd.line, f"goto ({x:g}, {y:g}) from ({here[0]:.4g}, {here[1]:.4g}): "
                             f"{plan.reason}")
        return Tracking(plan, sim.t + self._delay(), self.motion, self.gains, robot, self.lead)

    def _delay(self) -> float:
        """s: when a plan begins after the step it is made at.  With rate-limited actuators the
        first command moves the base only from the next row, so the plan starts there."""
        return self.sim.dt if self.lead else 0.0

    # -- the stepping ----------------------------------------------------------------------
    def _world_steps(self, sim, m, out, extra):
        """``m`` steps under a world-frame twist (a body twist recomputed every step), into ``out``."""
        dt = sim.dt
        now = np.zeros(3)
        P, scale, A, Pm, rows, W, res = self._fk
        k0 = sim.k
        for i in range(m):
            motion_now(P, scale, sim.heading, sim.spin, A, Pm, rows, W, res, now)
            # the command acts from the heading the base will have when it takes effect
            th = float(sim.pose[2]) + (float(now[2]) * dt if self.lead else 0.0)
            out[i] = sim.step(twist=body_twist_for_world(th, self.world, dt)).values
        extra[:m] = math.nan
        return Block(k0, out[:m], sim.n)

    # -- blocks for the runner --------------------------------------------------------------
    def blocks(self, block_rows: int = 2048):
        """Yield (Block, extra (m, len(odo columns) + 4)) covering the run.  Between script
        entries each stretch runs in compiled code: under a plan the tracking law and the
        engine's step together (:meth:`Simulator.advance_tracking`), open loop the engine alone."""
        scen = self.scen
        sim = self.sim
        if scen.plan is not None:
            self.track = Tracking(scen.plan, self._delay(), self.motion, self.gains, scen.robot, self.lead)
        script, ks, total = scen.script, self.ks, scen.steps
        rows_max = min(block_rows, max(total, 1))
        out = np.empty((rows_max, sim.width))
        extra = np.empty((rows_max, len(COLUMNS)))
        k, j = 0, 0
        while k < total:
            while j < len(ks) and ks[j] <= k:
                self._command(sim, j, script[j])
                j += 1
            m = min(ks[j] if j < len(ks) else total, total, k + rows_max) - k
            if self.track is not None:
                block = sim.advance_tracking(m, self.track, out, extra)
            elif self.world is not None:
                block = self._world_steps(sim, m, out, extra)
            else:
                block = sim.advance(m, out=out[:m])
                extra[:m] = math.nan
            ext = extra[:m]
            for i in range(m):
                row = block.row(i)
                self._observe(row, ext[i, :3], float(ext[i, 3]))
                if self.on_row is not None:
                    self.on_row(row)
            yield block, (np.hstack([self.odo.update_block(block), ext]) if self.odo is not None else ext.copy())
            k += m

    def _observe(self, row, ref, err):
        if math.isfinite(err):
            for a in self.afters:
                if row.t >= a - 1e-9 * self.scen.step and err > self.peak[a][0]:
                    self.peak[a] = (err, float(row.t))
        if not self.final or self.track is None:
            return
        goal = self.track.goal
        d = math.hypot(row.pose[0] - goal[0], row.pose[1] - goal[1])
        e = abs(wrap(row.pose[2] - goal[2]))
        for tol in self.tolerances:
            if d <= tol[0] and e <= tol[1]:
                if self.inside[tol] is None:
                    self.inside[tol] = float(row.t)
            else:
                self.inside[tol] = None

    def summary(self) -> dict:
        """``arrival``: {(position m, heading rad): time s the base came within that tolerance of
        the final goal and stayed, or None}; ``peak_error``: {after s: (m, s)}; ``plan_time``: s
        of the final plan (None without one); ``goal``: its end pose."""
        return {"arrival": dict(self.inside), "peak_error": dict(self.peak), "plan_time": self.plan_time,
                "goal": None if self.track is None else tuple(float(v) for v in self.track.goal),
                "route_tolerance": tuple(self.scen.route.tolerance) if self.scen.route is not None
                else DEFAULT_TOLERANCE}
