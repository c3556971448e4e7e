"""Key-by-key validation helpers shared by every file reader.

Each helper takes the containing mapping, the key, and a :class:`Where`
(file name plus key path) and returns a clean Python value or raises
:class:`~sim.errors.InputError` with ``file:line: message``.

Numbers must be finite and of a sane size: at most :data:`LIMIT` (1e6) in
magnitude in their SI unit (m, m/s, rad, rad/s, ...; times in s up to
:data:`TIME_LIMIT`), so that a typing slip such as a mount position of 1e11 m
is refused with the allowed range instead of sending the engine into
rounding noise.  Messages quote at most a few dozen characters of a value
(:func:`sim.errors.quote`).
"""
from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass, field

from sim.errors import InputError, InputWarning, clip, quote
from sim.files.yamlread import Map, Seq, line_of

LIMIT = 1e6            # largest magnitude of a length (m), speed (m/s), angle (rad), rate (rad/s), ...
TIME_LIMIT = 1e9       # s: times (steps, durations, command times)
LIMITS = {"s": TIME_LIMIT}

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
        if isinstance(key, int) and not isinstance(key, bool) and key.bit_length() < 64:
            path = f"{self.path}[{key}]"
        else:  # a key from the file: at most a few dozen characters of it
            name = clip(key if isinstance(key, str) else quote(key), 40)
            path = f"{self.path}.{name}" if self.path else name
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
    if len(str(word)) > 64:
        return ""
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
    return quote(value)


def check_keys(mapping: Map, allowed, where: Where, required=()) -> None:
    """Reject unknown keys (with a suggestion) and missing required keys."""
    allowed = list(allowed)
    for key in mapping:
        if key not in allowed:
            w = where.at(mapping, key)
            raise InputError(w.source, w.line,
                             f"{where.path + ': ' if where.path else ''}unknown key {quote(key)}"
                             f"{suggest(key, allowed)}; allowed: {', '.join(allowed)}")
    for key in required:
        if key not in mapping:
            raise where.error(f"missing required key '{key}'")


def limit_for(unit: str) -> float:
    """Largest magnitude allowed for a number in ``unit``."""
    return LIMITS.get(unit, LIMIT)


def number(value, where: Where, *, positive=False, nonnegative=False,
           minimum=None, maximum=None, unit="", limit=None) -> float:
    """A finite real number of magnitude at most ``limit`` (default :func:`limit_for` ``unit``),
    optionally range-checked."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        if isinstance(value, str):
            try:
                value = float(value)
            except ValueError:
                raise where.error(f"expected a number{_u(unit)}, got {describe(value)}") from None
        else:
            raise where.error(f"expected a number{_u(unit)}, got {describe(value)}")
    limit = limit_for(unit) if limit is None else limit
    try:
        value = float(value)
    except OverflowError:
        raise where.error(f"{describe_range(limit, unit, positive, nonnegative)}, got {quote(value)}") from None
    if not math.isfinite(value):
        raise where.error(f"expected a finite number{_u(unit)}, got {value}")
    if abs(value) > limit:
        raise where.error(f"{describe_range(limit, unit, positive, nonnegative)}, got {value:g}")
    if positive and value <= 0:
        raise where.error(f"must be > 0{_u(unit)}, got {value:g}")
    if nonnegative and value < 0:
        raise where.error(f"must be >= 0{_u(unit)}, got {value:g}")
    if minimum is not None and value < minimum:
        raise where.error(f"must be >= {minimum:g}{_u(unit)}, got {value:g}")
    if maximum is not None and value > maximum:
        raise where.error(f"must be <= {maximum:g}{_u(unit)}, got {value:g}")
    return value


def describe_range(limit: float, unit: str = "", positive=False, nonnegative=False) -> str:
    """``must lie between -1e+06 and 1e+06 m`` (or ``0 and ...`` for signless values)."""
    low = "0" if positive or nonnegative else f"{-limit:g}"
    return f"out of range: must lie between {low} and {limit:g}{' ' + unit if unit else ''}"


def whole(value, where: Where, *, minimum: int = 0, maximum: int, what: str = "a whole number") -> int:
    """An integer (not a bool) with ``minimum <= value <= maximum``."""
    if isinstance(value, bool) or not isinstance(value, int) or not minimum <= value <= maximum:
        top = f"{maximum:,}" if maximum < 10 ** 12 else f"{float(maximum):.3g}"
        raise where.error(f"expected {what} >= {minimum} (at most {top}), got {describe(value)}")
    return value


def _u(unit):
    return f" ({unit})" if unit else ""


PLAIN_ANGLE_WARN = 2 * math.pi   # rad: a plain angle beyond this is probably degrees written without "deg"


def angle(value, where: Where, rate: bool = False) -> float:
    """An angle in rad: a plain number (rad) or a string ``'30 deg'`` / ``'0.5 rad'``.

    At most :data:`LIMIT` rad in magnitude.  A plain number (no unit) larger
    than 2 pi in size is taken as radians but warned about (:meth:`Where.warn`):
    it is most likely degrees.  ``rate``: the value is a turn rate (rad/s,
    ``'30 deg'`` meaning 30 deg/s).
    """
    if isinstance(value, str):
        m = _ANGLE.match(value)
        if not m:
            raise where.error(f"expected an angle such as 0.5, '30 deg' or '0.5 rad', got {describe(value)}")
        v = float(m.group(1))
        if not math.isfinite(v):
            raise where.error(f"expected a finite angle, got {describe(value)}")
        if m.group(2) is None:
            _plain_angle(v, m.group(1), where, rate)
        v = math.radians(v) if m.group(2) == "deg" else v
        if abs(v) > LIMIT:
            raise where.error(f"{describe_range(LIMIT, 'rad')} ({math.degrees(LIMIT):.4g} deg), "
                              f"got {describe(value)}")
        return v
    if isinstance(value, float) and not math.isfinite(value):
        raise where.error(f"expected a finite angle, got {value}")
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise where.error(f"expected an angle such as 0.5, '30 deg' or '0.5 rad', got {describe(value)}")
    v = number(value, where, unit="rad")
    _plain_angle(v, value, where, rate)
    return v


def _plain_angle(v: float, written, where: Where, rate: bool = False) -> None:
    if abs(v) > PLAIN_ANGLE_WARN:
        u, du, turn = ("rad/s", "deg/s", "a full turn per second") if rate else ("rad", "deg", "a full turn")
        where.warn(f"{clip(written, 40)} is read as {v:g} {u} ({math.degrees(v):.6g} {du}), more than {turn}; "
                   f"did you mean '{clip(written, 40)} deg'? (plain numbers are radians)")


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


def cell_number(cell: str, source: str, line: int, column: str, unit: str = "", limit=None) -> float:
    """A finite number of magnitude at most ``limit`` (default :func:`limit_for` ``unit``) from a
    CSV cell, or InputError ``source:line: column 'c': ...``."""
    try:
        v = float(cell)
    except ValueError:
        raise InputError(source, line, f"column {quote(column)}: expected a number{_u(unit)}, "
                                       f"got {quote(cell)}") from None
    if not math.isfinite(v):
        raise InputError(source, line, f"column {quote(column)}: expected a finite number, got {quote(cell)}")
    limit = limit_for(unit) if limit is None else limit
    if abs(v) > limit:
        raise InputError(source, line, f"column {quote(column)}: {describe_range(limit, unit)}, got {v:g}")
    return v


def csv_header(reader, source: str, empty: str) -> list:
    """The first row of a ``csv.reader``, stripped; InputError at line 1 if missing or malformed."""
    import csv
    try:
        return [h.strip() for h in next(reader)]
    except StopIteration:
        raise InputError(source, 1, empty) from None
    except csv.Error as exc:
        raise InputError(source, 1, f"malformed CSV: {clip(exc, 80)}") from None


def csv_records(reader, source: str, ncells: int, first: int = 1):
    """Yield ``(line, row)`` for the non-blank rows of a ``csv.reader``.

    Every row must have ``ncells`` cells; malformed CSV becomes InputError at its line.
    ``first``: the file's line number of the reader's first line.
    """
    import csv
    shift = first - 1
    try:
        for row in reader:
            if len(row) == ncells and row[0].strip():
                yield reader.line_num + shift, row
                continue
            if not row or all(not c.strip() for c in row):
                continue
            raise InputError(source, reader.line_num + shift, f"expected {ncells} cells, got {len(row)}")
    except csv.Error as exc:
        raise InputError(source, reader.line_num + shift, f"malformed CSV: {clip(exc, 80)}") from None


def points(value, where: Where, what: str = "a list of points [x, y] (m)", noun: str = "point") -> list:
    """A list of [x, y] pairs (m) into a list of (x, y) float tuples; ``noun`` names one pair
    in messages ("point", "vertex")."""
    items = expect_list(value, where, what)
    pts = []
    for k, item in enumerate(items):
        w = where.at(items, k)
        pair = expect_list(item, w, f"a {noun} [x, y] (m)")
        if len(pair) != 2:
            raise w.error(f"a {noun} is [x, y] (2 numbers, m), got {len(pair)} values")
        pts.append((number(pair[0], w.at(pair, 0), unit="m"), number(pair[1], w.at(pair, 1), unit="m")))
    return pts
