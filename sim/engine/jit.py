"""Where engine code finds the compile decorator: :func:`sim.jit.kernel` (options live in :mod:`sim.jit`)."""
from sim.jit import kernel

__all__ = ["kernel"]
