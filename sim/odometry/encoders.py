"""Wheel odometry: the encoders a real base would read, and dead reckoning from them.

Two halves:

* :class:`DeadReckoner`, the estimator: wheel rotations (rad) read over one
  step become a body displacement through the *nominal* forward kinematics,
  the least-squares solution of the rolling rows of the measured wheels and
  the no-sliding rows of the fixed wheels (and of measured steered wheels),
  rows from :mod:`sim.constraints`; the pose advances by the exact SE(2)
  exponential (:mod:`sim.se2`).
* :class:`Odometer`, the sensor model around it: from the true cumulative
  wheel rotations of a run (``StepResult.angle``) it makes the encoder counts
  the base would see (floor-quantized, with random errors) and the steering
  angle readings (rounded to ``steer_resolution``), feeds them to the
  estimator and compares its pose with the ground truth.

Semantics of a scenario's ``odometry`` section: the scenario's robot is the
base **as built** (the engine drives this true geometry); ``nominal`` lists
the values the estimator **believes** where they differ (radius, mount
position x/y, mount heading of fixed and Swedish wheels).  See README
"Odometry".

Random errors, both random walks whose variance grows with the motion, so
that they do not depend on the step size:

``count_noise`` (counts per sqrt(revolution))
    a wheel turning through one revolution gains a count error of standard
    deviation ``count_noise``; through ``q`` revolutions, ``count_noise *
    sqrt(q)``.
``slip_noise`` (dimensionless)
    a wheel slipping at ``s`` m/s (root-sum-square of its ``slip_long`` and
    ``slip_lat``) for ``T`` s gains an error of standard deviation
    ``slip_noise * s * sqrt(T * 1 s)`` metres of rolling distance.

Frames and units: world pose (x, y, theta) m, m, rad; body x forward, y left.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from sim.jit import compile_all
from sim.theory.constraints import rolling_rows, sliding_rows
from sim.theory.kinematics import twist_scale
from sim.theory.linalg import lstsq_many_into, pinv
from sim.model.robot import Robot
from sim.theory.se2 import body_increment, integrate, wrap

compile_all()  # odometry runs over whole blocks: the physics it calls must be compiled

COLUMNS = ("odom_x", "odom_y", "odom_theta")


@dataclass(frozen=True)
class OdometrySpec:
    """A validated ``odometry`` section.

    wheels : tuple of str
        Measured wheels (each has ``encoder`` counts per revolution), file order.
    nominal : tuple of (wheel name, key, value)
        What the estimator believes instead of the robot file: ``radius``,
        ``x``, ``y`` (m), ``heading`` (rad, fixed and Swedish wheels only).
    count_noise : float
        counts per sqrt(revolution), >= 0 (see module docstring).
    slip_noise : float
        dimensionless, >= 0 (see module docstring).
    seed : int or None
        Seed of :func:`numpy.random.default_rng` for the random errors.
    """

    wheels: tuple
    nominal: tuple = ()
    count_noise: float = 0.0
    slip_noise: float = 0.0
    seed: int | None = None
    line: int | None = None

    @property
    def noisy(self) -> bool:
        return self.count_noise > 0.0 or self.slip_noise > 0.0


def nominal_robot(robot: Robot, spec: OdometrySpec) -> Robot:
    """``robot`` (as built) with the values the estimator believes."""
    if not spec.nominal:
        return robot
    wheels = list(robot.wheels)
    for name, key, value in spec.nominal:
        i = robot.index[name]
        wheels[i] = replace(wheels[i], **{key: value})
    return replace(robot, wheels=tuple(wheels))


class DeadReckoner:
    """Body displacements from wheel readings through a base's forward kinematics.

    Parameters
    ----------
    robot : Robot
        The geometry the estimator believes (nominal).
    measured : sequence of int, length k
        Indices of the measured wheels.

    Rows (each acting on the body displacement ``(dx, dy, dtheta)``, m, m, rad):
    the rolling row of every measured wheel, right-hand side ``r cos(roller)
    dphi``; the no-sliding row of every fixed wheel and every measured steered
    wheel, right-hand side 0.  Headings of measured steered wheels and castors
    come from their readings (``read`` lists them); all others are the robot's.
    The solution is least squares with the twist metric of
    :mod:`sim.kinematics` (minimum norm when rank-deficient).
    """

    def __init__(self, robot: Robot, measured):
        a = robot.arrays
        self.robot = robot
        self.measured = np.asarray(measured, dtype=int)
        m = np.zeros(len(robot.wheels), bool)
        m[self.measured] = True
        self.slide = np.flatnonzero(a.is_("fixed") | (a.is_("steered") & m))
        self.read = np.flatnonzero(a.is_("steered", "castor") & m)
        self.coef = a.radius[self.measured] * np.cos(a.roller[self.measured])
        self.S = twist_scale(robot)
        self._P = None if len(self.read) else self._pinv(self.rows(a.heading))

    def rows(self, heading) -> np.ndarray:
        """Stacked rows, shape (..., k + s, 3), for wheel headings (..., n) rad."""
        a = self.robot.arrays
        h = np.asarray(heading, dtype=float)
        i, j = self.measured, self.slide
        roll = rolling_rows(a.x[i], a.y[i], h[..., i], a.roller[i])
        slide = sliding_rows(a.x[j], a.y[j], h[..., j])
        return np.concatenate([roll, slide], axis=-2)

    def rank(self, heading) -> int:
        """Rank of the rows at one set of wheel headings (n,) rad."""
        return pinv(self.rows(heading), self.S)[1]

    def _pinv(self, A):
        return pinv(A, self.S)[0]

    def increments(self, dphi, read_heading=None) -> np.ndarray:
        """Body displacements, shape (m, 3) (dx, dy, dtheta in the starting body frame).

        Parameters
        ----------
        dphi : array_like, shape (m, k)
            rad, rotation of each measured wheel over each step.
        read_heading : array_like, shape (m, len(read)), optional
            rad, headings read for the wheels in ``read`` during each step.
        """
        dphi = np.asarray(dphi, dtype=float)
        m = len(dphi)
        b = np.zeros((m, len(self.measured) + len(self.slide)))
        b[:, : len(self.measured)] = dphi * self.coef
        if self._P is not None:
            xi = b @ self._P.T
        else:
            h = np.broadcast_to(self.robot.arrays.heading, (m, len(self.robot.wheels))).copy()
            h[:, self.read] = read_heading
            xi = np.empty((m, 3))
            lstsq_many_into(np.ascontiguousarray(self.rows(h)), b, self.S, xi)
        return body_increment(xi, 1.0)


def steer_reading(heading, resolution) -> np.ndarray:
    """Steering angle readings: ``heading`` (..., k) rad rounded to ``resolution`` (k,) rad
    where that is > 0, exact elsewhere."""
    h = np.asarray(heading, dtype=float)
    res = np.asarray(resolution, dtype=float)
    q = res > 0
    if np.any(q):
        h = h.copy()
        h[..., q] = np.round(h[..., q] / res[q]) * res[q]
    return h


class Odometer:
    """Encoder readings and dead reckoning alongside a run, one row (or block) at a time.

    Parameters
    ----------
    spec : OdometrySpec
    robot : Robot
        The base as built (the geometry the engine drives).
    dt : float
        s, the run's step.
    start : (x, y, theta)
        The estimator's starting pose (the true start), m, m, rad.
    rng : numpy.random.Generator, optional
        Source of the random errors (default: ``default_rng(spec.seed)``).

    ``columns`` are the extra CSV columns: ``odom_x, odom_y, odom_theta`` (world
    frame, m, m, rad, theta continuous), then ``NAME.counts`` per measured wheel
    (cumulative encoder counts).  Row k holds the estimate at t_k from the
    counts read at t_0 .. t_k; the steering readings of row k-1 serve the step
    from t_{k-1} to t_k.
    """

    def __init__(self, spec: OdometrySpec, robot: Robot, dt: float, start=(0.0, 0.0, 0.0), rng=None):
        self.spec = spec
        self.robot = robot
        self.dt = float(dt)
        idx = np.array([robot.index[n] for n in spec.wheels], dtype=int)
        self.idx = idx
        self.reckoner = DeadReckoner(nominal_robot(robot, spec), idx)
        cpr = np.array([robot.wheels[i].encoder for i in idx], dtype=float)
        self.per_rad = cpr / (2 * math.pi)            # counts per rad
        self._idx, self._per_rad = idx.tolist(), self.per_rad.tolist()   # the same, as plain lists
        self.tick = 2 * math.pi / cpr                 # rad per count
        self.radius = robot.arrays.radius[idx]        # true radii, m
        read = self.reckoner.read
        self.res = np.array([robot.wheels[i].steer_resolution or 0.0 for i in read], dtype=float)
        self.rng = rng if rng is not None else (np.random.default_rng(spec.seed) if spec.noisy else None)
        self.columns = COLUMNS + tuple(f"{n}.counts" for n in spec.wheels)
        self.pose = np.array(start, dtype=float)
        self.k = 0
        self._err = np.zeros(len(idx))               # accumulated reading error, rad
        self._prev = None                            # (angle, counts, steer reading, slip) of the last row
        self._ahead = None                           # random normals drawn by reading() for the next row
        self.final_pos = self.final_head = 0.0
        self.peak_pos = self.peak_head = 0.0
        self.peak_pos_t = self.peak_head_t = 0.0

    def _read_steer(self, steer):
        return steer_reading(steer[:, self.reckoner.read], self.res)

    def reading(self, angle) -> np.ndarray:
        """Counts (k,) the measured wheels show at the next row's time, before that row is made.

        ``angle`` (n,) rad: every wheel's true cumulative rotation at that time
        (the state a step has just reached).  This is what a controller reads
        from its encoders.  The row's random errors are drawn here and kept, so
        the :meth:`update` / :meth:`update_block` that later takes the row gives
        the same counts (and the random stream is the same as without reading).
        """
        ang = np.asarray(angle, dtype=float)[self.idx]
        if self.rng is None:
            return np.floor((ang + self._err) * self.per_rad)
        if self._ahead is None:
            self._ahead = self.rng.standard_normal((1, 2, len(self.idx)))
        if self._prev is None:
            prev_ang, prev_slip = ang, np.zeros(len(self.idx))
        else:
            prev_ang, prev_slip = self._prev[0], self._prev[3]
        err = self._err + self._noise(ang - prev_ang, prev_slip, self._ahead[0])
        return np.floor((ang + err) * self.per_rad)

    def reading_list(self, angle) -> list:
        """:meth:`reading` as a list of floats.  Without random errors it is worked out
        wheel by wheel in plain floats (the same IEEE double arithmetic, so the same
        counts), which is faster than numpy on a few wheels; the server reads it every
        round trip."""
        if self.rng is not None:
            return self.reading(angle).tolist()
        ang = angle.tolist() if isinstance(angle, np.ndarray) else list(angle)
        return [float(math.floor((ang[i] + e) * p)) for i, e, p in zip(self._idx, self._err.tolist(), self._per_rad)]

    def _noise(self, dphi_true, prev_slip, z):
        """Reading error (rad) gained over steps of true rotation ``dphi_true`` after slip
        ``prev_slip`` (m/s), from standard normals ``z`` (..., 2, k)."""
        sig = (self.spec.count_noise * self.tick * np.sqrt(np.abs(dphi_true) / (2 * math.pi)),
               self.spec.slip_noise * prev_slip * math.sqrt(self.dt) / self.radius)
        return sig[0] * z[..., 0, :] + sig[1] * z[..., 1, :]

    def update(self, row) -> tuple:
        """One :class:`~sim.engine.StepResult`; returns the extra column values."""
        out = self._block(row.angle[None, :], row.steer[None, :], row.slip_long[None, :],
                          row.slip_lat[None, :], row.pose[None, :])
        return tuple(float(v) for v in out[0])

    def update_block(self, block) -> np.ndarray:
        """Rows of a block (anything with ``angle``, ``steer``, ``slip_long``,
        ``slip_lat`` (m, n) and ``pose`` (m, 3)); returns shape (m, len(columns))."""
        return self._block(np.asarray(block.angle, float), np.asarray(block.steer, float),
                           np.asarray(block.slip_long, float), np.asarray(block.slip_lat, float),
                           np.asarray(block.pose, float))

    def _block(self, angle, steer, slip_long, slip_lat, pose) -> np.ndarray:
        m = len(angle)
        if m == 0:
            return np.zeros((0, len(self.columns)))
        ang = angle[:, self.idx]
        slip = np.hypot(np.nan_to_num(slip_long[:, self.idx]), np.nan_to_num(slip_lat[:, self.idx]))
        hread = self._read_steer(steer)
        if self._prev is None:
            c0 = np.floor((ang[0] + self._err) * self.per_rad)
            self._prev = (ang[0], c0, hread[0], np.zeros(len(self.idx)))
        pa, pc, ph, ps = self._prev
        prev_ang = np.vstack([pa, ang[:-1]])
        prev_slip = np.vstack([ps, slip[:-1]])
        prev_h = np.vstack([ph, hread[:-1]])
        if self.rng is not None:
            z = self.rng.standard_normal((m - (self._ahead is not None), 2, len(self.idx)))
            if self._ahead is not None:  # drawn by reading() for this row
                z, self._ahead = np.concatenate([self._ahead, z]), None
            noise = self._noise(ang - prev_ang, prev_slip, z)
            err = np.cumsum(np.vstack([self._err, noise]), axis=0)[1:]
        else:
            err = np.broadcast_to(self._err, ang.shape)
        counts = np.floor((ang + err) * self.per_rad)
        dc = counts - np.vstack([pc, counts[:-1]])
        inc = self.reckoner.increments(dc * self.tick, prev_h)
        poses = integrate(self.pose, inc)
        self._track(poses, pose)
        self.pose = poses[-1].copy()
        self._err = np.array(err[-1])
        self._prev = (ang[-1], counts[-1], hread[-1], slip[-1])
        return np.hstack([poses, counts])

    def _track(self, est, truth):
        m = len(est)
        pos = np.hypot(est[:, 0] - truth[:, 0], est[:, 1] - truth[:, 1])
        head = np.abs(wrap(est[:, 2] - truth[:, 2]))
        i, j = int(np.argmax(pos)), int(np.argmax(head))
        if pos[i] > self.peak_pos:
            self.peak_pos, self.peak_pos_t = float(pos[i]), (self.k + i) * self.dt
        if head[j] > self.peak_head:
            self.peak_head, self.peak_head_t = float(head[j]), (self.k + j) * self.dt
        self.final_pos, self.final_head = float(pos[-1]), float(head[-1])
        self.k += m

    def summary(self) -> dict:
        """Errors of the estimate against the ground truth: m and rad; times in s."""
        return {"final_position_error": self.final_pos, "final_heading_error": self.final_head,
                "peak_position_error": self.peak_pos, "peak_heading_error": self.peak_head,
                "peak_position_t": self.peak_pos_t, "peak_heading_t": self.peak_head_t}
