"""A deliberately simple simulation loop, kept as the yardstick for tools/bench.py.

Per step it does what a first attempt would: resolve the twist command into
wheel angles and spins, build the stacked constraint matrix from scratch,
take ``numpy.linalg.pinv`` of it, and advance the pose by forward Euler.  No
actuator limits, no castor swivel, no slip accounting: it is only a measure
of the cost of the obvious per-step approach.
"""
from __future__ import annotations

import math

import numpy as np


def run(robot, dt, script, steps):
    """Run ``steps`` steps; ``script`` is a list of (step index, twist) sorted by step.

    Returns the final pose (x, y, theta).
    """
    wheels = [w for w in robot.wheels if w.type in ("fixed", "steered", "swedish")]
    pose = np.zeros(3)
    twist = np.zeros(3)
    j = 0
    heading = {w.name: w.heading for w in wheels}
    for k in range(steps):
        while j < len(script) and script[j][0] <= k:
            twist = np.asarray(script[j][1], dtype=float)
            j += 1
        rows, rhs = [], []
        for w in wheels:
            vx = twist[0] - twist[2] * w.y
            vy = twist[1] + twist[2] * w.x
            if w.type == "steered" and math.hypot(vx, vy) > 1e-9:
                heading[w.name] = math.atan2(vy, vx)
            h = heading[w.name]
            g = w.roller
            c, s = math.cos(h + g), math.sin(h + g)
            spin = (c * vx + s * vy) / (w.radius * math.cos(g)) if w.driven else 0.0
            if w.driven:
                rows.append([c, s, w.x * s - w.y * c])
                rhs.append(w.radius * math.cos(g) * spin)
            if w.type in ("fixed", "steered"):
                ch, sh = math.cos(h), math.sin(h)
                rows.append([-sh, ch, w.x * ch + w.y * sh])
                rhs.append(0.0)
        A = np.array(rows)
        xi = np.linalg.pinv(A) @ np.array(rhs)
        c, s = math.cos(pose[2]), math.sin(pose[2])
        pose = pose + dt * np.array([c * xi[0] - s * xi[1], s * xi[0] + c * xi[1], xi[2]])
    return pose
