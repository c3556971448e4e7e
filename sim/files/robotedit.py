"""Rewrite values in a user's robot file, keeping everything else as the user wrote it.

``trundle calibrate`` corrects a few numbers (wheel radii, mount positions) of
the robot file it was given.  The corrected file is that file with only those
values replaced: comments, key order, flow or block style, quoting and the
other numbers stay as they were.  This uses ruamel.yaml's round-trip mode
(a well-kept library made for exactly this); the file has already been read
and validated by the safe loader (:mod:`sim.files.yamlread`), and the
round-trip loader builds no objects from tags, so nothing in it runs.  The
loader tells where each value stands; the new number text replaces the old
one there, so every other byte of the file stays.

Values are written rounded to a stated resolution (:func:`number_text`), the
digits the measurement supports, not every digit of a double.
"""
from __future__ import annotations

import math
import os

from sim.errors import InputError
from sim.files import atomic

RES_MIN, RES_MAX = 1e-9, 1e-3   # m: resolutions of written lengths are kept within these


def resolution(sigma: float) -> float:
    """The decade (m) to round a length with standard error ``sigma`` m to: ``10^floor(log10 sigma)``,
    at least :data:`RES_MIN` and at most :data:`RES_MAX` (a nanometre and a millimetre)."""
    if not (sigma > 0 and math.isfinite(sigma)):
        return RES_MIN
    return min(max(10.0 ** math.floor(math.log10(sigma) + 1e-12), RES_MIN), RES_MAX)


def number_text(value: float, res: float) -> str:
    """``value`` rounded to a multiple of ``res`` (a power of ten) as plain decimal text, no
    trailing zeros beyond the first decimal (``0.080123``, ``-0.2201``, ``0.5``)."""
    digits = max(1, -int(round(math.log10(res))))
    t = f"{value + 0.0:.{digits}f}"
    if "." in t:
        t = t.rstrip("0")
        t = t + "0" if t.endswith(".") else t
    return "0.0" if float(t) == 0.0 else t


def _yaml():
    from ruamel.yaml import YAML

    y = YAML(typ="rt")
    y.preserve_quotes = True
    return y


def _scalar_end(line: str, col: int) -> int:
    """End column (exclusive) of the scalar starting at ``col`` in ``line``."""
    q = line[col:col + 1]
    if q in ("'", '"'):
        k = col + 1
        while k < len(line):
            if line[k] == q:
                if q == "'" and line[k + 1:k + 2] == "'":     # '' inside single quotes
                    k += 2
                    continue
                return k + 1
            if q == '"' and line[k] == "\\":
                k += 1
            k += 1
        return len(line.rstrip("\r\n"))
    k = col
    while k < len(line) and line[k] not in ",}]#\r\n":
        k += 1
    while k > col and line[k - 1] in " \t":
        k -= 1
    return k


def rewrite(text: str, source: str, changes: dict, header=()) -> str:
    """``text`` (a robot file) with wheel values replaced, everything else kept byte for byte.

    changes : {(wheel name, key): number text}, e.g. ``{("left", "radius"): "0.080123"}``;
    each key must already be in the file (x, y and radius always are).
    header : lines put first, as ``# `` comments.
    The file is parsed with ruamel.yaml's round-trip loader, which records where each
    value stands; each changed value's text is replaced there, in place.
    Raises :class:`InputError` when a named wheel or key is not in the file.
    """
    data = _yaml().load(text)
    lines = text.splitlines(keepends=True)
    wheels = {w.get("name"): w for w in data.get("wheels", [])}
    edits = []
    for (name, key), new in changes.items():
        w = wheels.get(name)
        if w is None or key not in w:
            raise InputError(source, None, f"no '{key}' of a wheel named '{name}' in the file to correct")
        ln, col = w.lc.value(key)
        edits.append((ln, col, _scalar_end(lines[ln], col), str(new)))
    for ln, col, end, new in sorted(edits, reverse=True):
        lines[ln] = lines[ln][:col] + new + lines[ln][end:]
    return "".join(f"# {h}\n" for h in header) + "".join(lines)


def write_corrected(path_in, path_out, changes: dict, header=()) -> None:
    """Write robot file ``path_in`` with ``changes`` (see :func:`rewrite`) to ``path_out``, whole or not at all."""
    src = os.fspath(path_in)
    try:
        with open(src, encoding="utf-8") as fh:
            text = fh.read()
    except OSError as exc:
        raise InputError(src, None, f"cannot read file: {exc.strerror}") from None
    atomic.write_text(path_out, rewrite(text, src, changes, header), "the corrected robot file")
