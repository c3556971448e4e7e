"""Tolerances for comparing traces: the default, and ``--tol`` specs.

Kept apart from :mod:`sim.tracediff` so that a command can parse its options
without importing numpy (``trundle batch`` starts its workers sooner that way).
"""
from __future__ import annotations

import math
import re

from sim.errors import InputError

DEFAULT_TOLERANCE = 1e-9
_TOL = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(deg|rad)?\s*$")


def parse_tolerances(specs) -> tuple:
    """``--tol`` values -> ``(default, [(pattern, tol), ...])``.

    Each spec is ``VALUE`` (the default for every column) or
    ``COLUMN=VALUE`` where COLUMN may be a shell pattern (``*.steer``).
    VALUE is a number >= 0 in the column's unit, or an angle ``"0.1 deg"``.
    """
    default, rules = DEFAULT_TOLERANCE, []
    for spec in specs or ():
        name, sep, value = str(spec).rpartition("=")
        v = _tol_value(value, spec)
        if sep:
            if not name.strip():
                raise InputError("--tol", None, f"'{spec}': expected COLUMN=VALUE")
            rules.append((name.strip(), v))
        else:
            default = v
    return default, rules


def _tol_value(text, spec) -> float:
    m = _TOL.match(text)
    if not m:
        raise InputError("--tol", None, f"'{spec}': expected a number >= 0 such as 1e-6 or '0.1 deg'")
    v = float(m.group(1))
    if not math.isfinite(v) or v < 0:
        raise InputError("--tol", None, f"'{spec}': the tolerance must be a finite number >= 0")
    return math.radians(v) if m.group(2) == "deg" else v
