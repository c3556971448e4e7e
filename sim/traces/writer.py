"""CSV traces: a streaming writer.

One row per step from t = 0 to the end inclusive (``every`` decimates), in the
columns of the step record (:mod:`sim.engine.record`: ``columns``).  Floats are
written with round-trip precision (Python ``repr``); a blank cell means "not
defined" (no ICR, no twist command, no such row for that wheel).  Extra column
groups (odometry) are appended by whoever adds them.
"""
from __future__ import annotations

import os

import numpy as np

from sim.engine.record import columns  # noqa: F401  (the header, re-exported for writers)
from sim.traces.floatfmt import format_block

def row_values(r, extra=()) -> np.ndarray:
    """Flat float row (nan = blank) of a :class:`~sim.engine.record.StepResult`, plus ``extra``."""
    return np.concatenate([r.values, np.asarray(extra, float)])


def format_rows(block: np.ndarray) -> str:
    """RFC 4180 text of float rows, shape (m, ncols): shortest round-trip floats, NaN blank."""
    return format_block(np.asarray(block, dtype=float)).decode("ascii")


class TraceWriter:
    """Stream rows to ``path`` through ``path + '.part'``.

    ``close()`` renames the finished file into place; ``abort()`` removes it
    (used when a run fails for a reason that is not an interruption).  Rows
    are formatted in pieces of at most ``block`` rows (:mod:`sim.floatfmt`)
    and written in order, so memory stays bounded by one piece.
    """

    def __init__(self, path, header, block: int = 8192):
        self.path = os.fspath(path)
        self.part = self.path + ".part"
        self.block = block
        self._buf = []
        try:
            self._fh = open(self.part, "wb")
        except OSError as exc:
            from sim.errors import InputError
            raise InputError(self.path, None, f"cannot write the trace: {exc.strerror}") from None
        self._fh.write((",".join(header) + "\r\n").encode("utf-8"))
        self.rows = 0

    def write(self, values) -> None:
        self._buf.append(values)
        if len(self._buf) >= self.block:
            self._submit(np.asarray(self._buf))
            self._buf = []

    def write_block(self, block: np.ndarray) -> None:
        if self._buf:
            self._submit(np.asarray(self._buf))
            self._buf = []
        self._submit(np.asarray(block, dtype=float))

    def _submit(self, block) -> None:
        if len(block) > self.block:
            for i in range(0, len(block), self.block):
                self._submit(block[i:i + self.block])
            return
        self.rows += len(block)
        self._fh.write(format_block(block))

    def flush(self) -> None:
        if self._buf:
            self._submit(np.asarray(self._buf))
            self._buf = []
        self._fh.flush()

    def close(self) -> None:
        if self._fh is None:
            return
        self.flush()
        self._fh.close()
        self._fh = None
        os.replace(self.part, self.path)

    def abort(self) -> None:
        if self._fh is None:
            return
        self._fh.close()
        self._fh = None
        try:
            os.remove(self.part)
        except FileNotFoundError:
            pass
