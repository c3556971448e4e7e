"""The step record: what the engine writes for every step, defined once.

Row k of a run is the state at t_k and what the engine does from t_k on:

* ``t``, the pose at t_k, every actuator at t_k (a steered wheel's ``steer``, a
  driven wheel's ``spin``), a castor's heading at t_k, each wheel's cumulative
  rotation ``angle`` at t_k;
* the body twist the wheels give from t_k to t_k + dt (least squares over the
  constraint rows at those values), its ICR, the slip (row residuals), the
  passive wheels' spins under that twist;
* the commands in force and what the engine decided about them: the request
  (``cmd_*``), the factor ``scale`` by which ``max_spin`` cut it, the
  ``short_*`` part of it the fixed wheels do not allow, how it was ``fit``,
  whether the drives are ``held`` waiting for steering, and per wheel the
  steering still ``to_go`` and whether it sits ``at_limit``.

Over the step the actuators then move toward their commands within their rate
limits, castors swivel and the pose advances by the exact SE(2) exponential;
that is row k + 1.  An actuator without a rate limit is at its command from
the instant the command is given (row k already shows it there).

The tables below are the whole definition: the compiled step writes row
arrays in exactly this column order (its column indices come from here), the
trace header is made from it, and :class:`Block` and :class:`StepResult` read
their fields through it.  Adding a column is one edit here plus the line of
the step that fills it.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: (name, unit, meaning) of the per-row columns, in trace order.
ROW_FIELDS = (
    ("t", "s", "time t_k"),
    ("x", "m", "world x of the body origin at t_k"),
    ("y", "m", "world y of the body origin at t_k"),
    ("theta", "rad", "heading at t_k, continuous (not wrapped)"),
    ("vx", "m/s", "body twist from t_k on: forward"),
    ("vy", "m/s", "body twist: left"),
    ("omega", "rad/s", "body twist: turn rate, CCW"),
    ("icr_x", "m", "world x of the ICR (blank when omega is 0)"),
    ("icr_y", "m", "world y of the ICR (blank when omega is 0)"),
    ("slip", "m/s", "root sum of squares of all row residuals"),
    ("cmd_vx", "m/s", "requested twist (blank under wheel commands)"),
    ("cmd_vy", "m/s", "requested twist"),
    ("cmd_omega", "rad/s", "requested twist"),
    ("scale", "1", "factor max_spin applied to the request (1: none; blank under wheel commands)"),
    ("short_vx", "m/s", "requested minus allowed by the fixed wheels (before scaling)"),
    ("short_vy", "m/s", "as short_vx"),
    ("short_omega", "rad/s", "as short_vx"),
    ("fit", "code", "0 followed, 1 projected onto what the fixed wheels allow, 2 skid steering"),
    ("held", "0/1", "1 while the drives wait for steered wheels (align wait)"),
    ("rank", "0-3", "rank of the rows; below 3 the minimum-norm motion was used"),
)

#: (name, unit, meaning) of the per-wheel columns, ``NAME.field``, wheels in file order.
WHEEL_FIELDS = (
    ("spin_cmd", "rad/s", "spin the drive is heading for (blank for undriven wheels)"),
    ("spin", "rad/s", "spin at t_k (driven: actuator; passive: rolling freely)"),
    ("steer_cmd", "rad", "steering goal (steered), the fixed heading (fixed, Swedish, ball); blank for castors"),
    ("steer", "rad", "heading at t_k"),
    ("slip_long", "m/s", "residual of the rolling row (blank when the wheel has none)"),
    ("slip_lat", "m/s", "residual of the no-sliding row (blank when the wheel has none)"),
    ("angle", "rad", "cumulative rotation at t_k"),
    ("to_go", "rad", "steered wheels: reachable goal minus steer (blank for others)"),
    ("at_limit", "0/1", "steered wheels: 1 when the goal lies beyond a steering limit (blank for others)"),
)

ROW = {name: i for i, (name, _, _) in enumerate(ROW_FIELDS)}
WHEEL = {name: i for i, (name, _, _) in enumerate(WHEEL_FIELDS)}
NROW = len(ROW_FIELDS)
NWHEEL = len(WHEEL_FIELDS)
UNITS = {name: unit for name, unit, _ in ROW_FIELDS} | {"." + name: unit for name, unit, _ in WHEEL_FIELDS}


def width(n: int) -> int:
    """Columns of a row of a base of ``n`` wheels."""
    return NROW + NWHEEL * n


def columns(robot, extra=()) -> list:
    """Trace header of ``robot``: the row fields, then ``NAME.field`` per wheel, then ``extra``."""
    cols = [name for name, _, _ in ROW_FIELDS]
    for w in robot.wheels:
        cols += [f"{w.name}.{name}" for name, _, _ in WHEEL_FIELDS]
    return cols + list(extra)


def unit_of(column: str) -> str:
    """Unit of a trace column (``''`` when it is not one of the engine's)."""
    if column in UNITS:
        return UNITS[column]
    _, dot, field = column.rpartition(".")
    return UNITS.get("." + field, "") if dot else ""


class Block:
    """Rows ``k0 .. k0 + m - 1`` of a run: a view over the engine's row array.

    ``values`` has shape (m, width(n)) in trace column order.  Row fields read as
    arrays of shape (m,) (``block.slip``, ``block.held``); ``pose``, ``twist``,
    ``cmd``, ``shortfall`` as (m, 3); ``icr`` as (m, 2); wheel fields as (m, n)
    (``block.spin``, ``block.steer``).
    """

    def __init__(self, k0: int, values: np.ndarray, n: int):
        self.k0 = k0
        self.values = values
        self.n = n

    def __len__(self) -> int:
        return len(self.values)

    def __getattr__(self, name):
        if name in ROW:
            return self.values[:, ROW[name]]
        if name in WHEEL:
            return self.values[:, NROW + WHEEL[name]: NROW + NWHEEL * self.n: NWHEEL]
        group = _GROUPS.get(name)
        if group is not None:
            return self.values[:, ROW[group[0]]: ROW[group[-1]] + 1]
        raise AttributeError(name)

    def row(self, i: int) -> "StepResult":
        """Row ``k0 + i`` (its own copy of the values)."""
        return StepResult(self.values[i].copy(), self.n)


# (contiguous columns: read as views)
_GROUPS = {"pose": ("x", "y", "theta"), "twist": ("vx", "vy", "omega"), "icr": ("icr_x", "icr_y"),
           "cmd": ("cmd_vx", "cmd_vy", "cmd_omega"), "shortfall": ("short_vx", "short_vy", "short_omega")}


@dataclass(frozen=True, eq=False)
class StepResult:
    """Row k of a run (see the module docstring), read from its row array ``values``.

    Scalars: ``t`` s, ``slip`` m/s, ``scale``, ``fit``, ``held``, ``rank``.  Arrays:
    ``pose`` (3,) world (x, y, theta); ``twist`` (3,) body; ``icr`` (2,) world or nan;
    ``cmd_twist`` (3,) or None under wheel commands; ``shortfall`` (3,); per wheel (n,):
    ``spin_cmd``, ``spin``, ``steer_cmd``, ``steer``, ``slip_long``, ``slip_lat``,
    ``angle``, ``to_go``, ``at_limit``.
    """

    values: np.ndarray
    n: int

    def __getattr__(self, name):
        v = self.values
        if name in ROW:
            x = float(v[ROW[name]])
            return int(x) if name in ("rank", "fit", "held") else x
        if name in WHEEL:
            return v[NROW + WHEEL[name]: NROW + NWHEEL * self.n: NWHEEL]
        if name == "cmd_twist":
            c = v[ROW["cmd_vx"]: ROW["cmd_omega"] + 1]
            return None if c[0] != c[0] else c
        group = _GROUPS.get(name)
        if group is not None:
            return v[ROW[group[0]]: ROW[group[-1]] + 1]
        raise AttributeError(name)
