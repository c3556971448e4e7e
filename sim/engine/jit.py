"""Compile options for every numba kernel, in one place.

Every compiled function in Trundle is decorated with :func:`kernel` (never with
``numba.njit`` directly; ``tests/test_layers.py`` checks that), so all share:

* ``cache=True``: compiled code is kept on disk beside the module (``__pycache__``),
  so a fresh process loads it instead of compiling again;
* ``fastmath=False``: IEEE arithmetic in the written order, so runs are
  byte-identical from machine to machine of the same kind;
* ``nogil=True``: a compiled stretch does not hold up other Python threads.

``NUMBA_DISABLE_JIT=1`` in the environment runs the same functions as plain
Python (numba honours it itself), for stepping through them in a debugger.
"""
from __future__ import annotations

import numba

OPTIONS = {"cache": True, "fastmath": False, "nogil": True, "error_model": "numpy"}


def kernel(fn):
    """Compile ``fn`` with :data:`OPTIONS` (lazily, on first call)."""
    return numba.njit(**OPTIONS)(fn)
