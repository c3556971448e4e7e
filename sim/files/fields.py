"""Key-by-key validation helpers shared by every file reader.

Each helper takes the containing mapping, the key, and a :class:`Where`
(file name plus key path) and returns a clean Python value or raises
:class:`~sim.errors.InputError` with ``file:line: message``.
"""
from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass, field

from sim.errors import InputError, InputWarning
from sim.files.yamlread import Map, Seq, line_of

_ANGLE = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(deg|rad)?\s*$")


@dataclass(frozen=True)
class Where:
    """Where a value sits: file name, key path like ``wheels[2].radius``, line.

    ``notes`` (a list shared by every location of one file, or None) collects
    plausibility warnings (:meth:`warn`); with None they are dropped.
    """

    source: str
    path: str = ""
    line: int | None = None
    notes: list | None = field(default=None, compare=False, repr=False)

    def at(self, container, key) -> "Where":
        """The location of ``container[key]``."""
        if isinstance(key, int):
            path = f"{self.path}[{key}]"
        else:
            path = f"{self.path}.{key}" if self.path else str(key)
        return Where(self.source, path, line_of(container, key, self.line), self.notes)

    def error(self, message: str) -> InputError:
        label = f"{self.path}: " if self.path else ""
        return InputError(self.source, self.line, f"{label}{message}")

    def warn(self, message: str) -> None:
        """Note a plausibility warning here (kept in ``notes``, if any)."""
        if self.notes is not None:
            label = f"{self.path}: " if self.path else ""
            w = InputWarning(self.source, self.line, f"{label}{message}")
            if w not in self.notes:
                self.notes.append(w)


def suggest(word, choices) -> str:
    """`` (did you mean 'x'?)`` for the closest choice, or ``""``."""
    close = difflib.get_close_matches(str(word), [str(c) for c in choices], n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def expect_map(value, where: Where, what: str = "a mapping") -> Map:
    if not isinstance(value, dict):
        raise where.error(f"expected {what}, got {describe(value)}")
    return value


def expect_list(value, where: Where, what: str = "a list") -> Seq:
    if not isinstance(value, list):
        raise where.error(f"expected {what}, got {describe(value)}")
    return value


def describe(value) -> str:
    if value is None:
        return "nothing"
    if isinstance(value, bool):
        return f"'{value}' (true/false)"
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    return f"'{value}'"


def check_keys(mapping: Map, allowed, where: Where, required=()) -> None:
    """Reject unknown keys (with a suggestion) and missing required keys."""
    allowed = list(allowed)
    for key in mapping:
        if key not in allowed:
            w = where.at(mapping, key)
            raise InputError(w.source, w.line,
                             f"{where.path + ': ' if where.path else ''}unknown key '{key}'"
                             f"{suggest(key, allowed)}; allowed: {', '.join(allowed)}")
    for key in required:
        if key not in mapping:
            raise where.error(f"missing required key '{key}'")


def number(value, where: Where, *, positive=False, nonnegative=False,
           minimum=None, maximum=None, unit="") -> float:
    """A finite real number, optionally range-checked."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        if isinstance(value, str):
            try:
                value = float(value)
            except ValueError:
                raise where.error(f"expected a number{_u(unit)}, got {describe(value)}") from None
        else:
            raise where.error(f"expected a number{_u(unit)}, got {describe(value)}")
    value = float(value)
    if not math.isfinite(value):
        raise where.error(f"expected a finite number{_u(unit)}, got {value}")
    if positive and value <= 0:
        raise where.error(f"must be > 0{_u(unit)}, got {value:g}")
    if nonnegative and value < 0:
        raise where.error(f"must be >= 0{_u(unit)}, got {value:g}")
    if minimum is not None and value < minimum:
        raise where.error(f"must be >= {minimum:g}{_u(unit)}, got {value:g}")
    if maximum is not None and value > maximum:
        raise where.error(f"must be <= {maximum:g}{_u(unit)}, got {value:g}")
    return value


def _u(unit):
    return f" ({unit})" if unit else ""


PLAIN_ANGLE_WARN = 2 * math.pi   # rad: a plain angle beyond this is probably degrees written without "deg"


def angle(value, where: Where, rate: bool = False) -> float:
    """An angle in rad: a plain number (rad) or a string ``'30 deg'`` / ``'0.5 rad'``.

    A plain number (no unit) larger than 2 pi in size is taken as radians but
    warned about (:meth:`Where.warn`): it is most likely degrees.  ``rate``:
    the value is a turn rate (rad/s, ``'30 deg'`` meaning 30 deg/s).
    """
    if isinstance(value, str):
        m = _ANGLE.match(value)
        if not m:
            raise where.error(f"expected an angle such as 0.5, '30 deg' or '0.5 rad', got '{value}'")
        v = float(m.group(1))
        if not math.isfinite(v):
            raise where.error(f"expected a finite angle, got '{value}'")
        if m.group(2) is None:
            _plain_angle(v, m.group(1), where, rate)
        return math.radians(v) if m.group(2) == "deg" else v
    if isinstance(value, float) and not math.isfinite(value):
        raise where.error(f"expected a finite angle, got {value}")
    try:
        v = number(value, where, unit="rad")
    except InputError:
        raise where.error(f"expected an angle such as 0.5, '30 deg' or '0.5 rad', got {describe(value)}") from None
    _plain_angle(v, value, where, rate)
    return v


def _plain_angle(v: float, written, where: Where, rate: bool = False) -> None:
    if abs(v) > PLAIN_ANGLE_WARN:
        u, du, turn = ("rad/s", "deg/s", "a full turn per second") if rate else ("rad", "deg", "a full turn")
        where.warn(f"{written} is read as {v:g} {u} ({math.degrees(v):.6g} {du}), more than {turn}; "
                   f"did you mean '{written} deg'? (plain numbers are radians)")


def boolean(value, where: Where) -> bool:
    if not isinstance(value, bool):
        raise where.error(f"expected true or false, got {describe(value)}")
    return value


def choice(value, choices, where: Where) -> str:
    if not isinstance(value, str) or value not in choices:
        raise where.error(f"expected one of {', '.join(choices)}, got {describe(value)}{suggest(value, choices)}")
    return value


def name(value, where: Where) -> str:
    if not isinstance(value, str) or not re.fullmatch(r"[A-Za-z0-9_-]+", value):
        raise where.error(f"names use letters, digits, '_' and '-' only, got {describe(value)}")
    return value


def geometry_problem(geom) -> str:
    """Why a shapely geometry is not valid, from GEOS, with its point written ``(x, y)``."""
    import shapely

    reason = shapely.is_valid_reason(geom)
    m = re.match(r"^(.*?)\s*\[([-+0-9.eE]+) ([-+0-9.eE]+)\]$", reason or "")
    if m:
        return f"{m.group(1).lower()} at ({float(m.group(2)):g}, {float(m.group(3)):g})"
    return (reason or "invalid").lower()


def cell_number(cell: str, source: str, line: int, column: str, unit: str = "") -> float:
    """A finite number from a CSV cell, or InputError ``source:line: column 'c': ...``."""
    try:
        v = float(cell)
    except ValueError:
        raise InputError(source, line, f"column '{column}': expected a number{_u(unit)}, got '{cell}'") from None
    if not math.isfinite(v):
        raise InputError(source, line, f"column '{column}': expected a finite number, got '{cell}'")
    return v


def csv_header(reader, source: str, empty: str) -> list:
    """The first row of a ``csv.reader``, stripped; InputError at line 1 if missing or malformed."""
    import csv
    try:
        return [h.strip() for h in next(reader)]
    except StopIteration:
        raise InputError(source, 1, empty) from None
    except csv.Error as exc:
        raise InputError(source, 1, f"malformed CSV: {exc}") from None


def csv_records(reader, source: str, ncells: int):
    """Yield ``(line, row)`` for the non-blank rows of a ``csv.reader``.

    Every row must have ``ncells`` cells; malformed CSV becomes InputError at its line.
    """
    import csv
    try:
        for row in reader:
            ln = reader.line_num
            if not row or all(not c.strip() for c in row):
                continue
            if len(row) != ncells:
                raise InputError(source, ln, f"expected {ncells} cells, got {len(row)}")
            yield ln, row
    except csv.Error as exc:
        raise InputError(source, reader.line_num, f"malformed CSV: {exc}") from None
