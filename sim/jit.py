"""Compile options for every numba kernel, in one place, and the physics registry.

The physics (wheel rows, the SE(2) exponential, castor swivel, the small
solves, the step) is written once, as plain Python functions on scalars and
small arrays, marked with :func:`physics`.  Until the engine loads they are
ordinary functions: ``trundle analyze`` calls them uncompiled and never
imports numba (which alone takes about half a second to load).  When a module
that needs speed loads, it calls :func:`compile_all`, which replaces every
marked function, wherever a ``sim`` module holds it, by its numba compilation
with :data:`OPTIONS`, so compiled functions call compiled functions.
Engine-level kernels that are never used uncompiled are decorated with
:func:`kernel` directly (never with ``numba.njit``: ``tests/test_layers.py``
checks that).

* ``cache=True``: compiled code is kept on disk beside the module
  (``__pycache__``), so a fresh process loads it instead of compiling again;
* ``fastmath=False``: IEEE arithmetic in the written order, so runs are
  byte-identical from machine to machine of the same kind;
* ``error_model="numpy"``: division by zero gives inf/nan as in numpy, no exception.

``NUMBA_DISABLE_JIT=1`` in the environment runs the same functions as plain
Python (numba honours it itself), for stepping through them in a debugger.
"""
from __future__ import annotations

import sys

OPTIONS = {"cache": True, "fastmath": False, "nogil": True, "error_model": "numpy"}

_PHYSICS = []
_done = 0  # how many of _PHYSICS are compiled


def physics(fn):
    """Mark ``fn`` as physics: plain Python until :func:`compile_all`, compiled after."""
    _PHYSICS.append(fn)
    return fn


def kernel(fn):
    """Compile ``fn`` with :data:`OPTIONS` now (lazily on first call); makes sure
    the physics it may call is compiled too.  A compiled call takes a reference count
    (an atomic operation) on each array it is given, every time: a loop of many cheap
    steps belongs inside one function (as :func:`sim.engine.step.step_into` does)."""
    compile_all()
    return _numba().njit(**OPTIONS)(fn)


def compile_all() -> None:
    """Replace every :func:`physics` function by its compiled form in every loaded
    ``sim`` module.  Cheap when nothing new was marked since the last call."""
    global _done
    if _done == len(_PHYSICS):
        return
    numba = _numba()
    compiled = {id(fn): (fn, numba.njit(**OPTIONS)(fn)) for fn in _PHYSICS[_done:]}
    for name, mod in list(sys.modules.items()):
        if mod is None or not (name == "sim" or name.startswith("sim.")):
            continue
        d = mod.__dict__
        for key, value in list(d.items()):
            hit = compiled.get(id(value))
            if hit is not None and hit[0] is value:
                d[key] = hit[1]
    _done = len(_PHYSICS)


def _numba():
    """numba, with its array-math module loaded without its probe of scipy's BLAS.

    When scipy is installed, ``numba.np.arraymath`` imports
    ``scipy.linalg.cython_blas`` as it loads (the first time anything compiles or
    loads from the cache), only to pick the inner loop of ``np.convolve`` and
    ``np.correlate``: about 0.35 s of a fresh process's first step on a quiet
    machine.  Nothing here calls BLAS (:mod:`sim.theory.linalg` is written out), so
    the probe is answered "absent" while that module loads; numba still imports
    scipy's BLAS itself when some other code compiles ``np.dot`` or ``np.linalg``.
    """
    import numba
    if "numba.np.arraymath" not in sys.modules:
        probe = "scipy.linalg.cython_blas"
        hide = probe not in sys.modules
        if hide:
            sys.modules[probe] = None       # import of it raises ImportError
        try:
            import numba.np.arraymath  # noqa: F401
        finally:
            if hide and sys.modules.get(probe, 0) is None:
                del sys.modules[probe]
    return numba
