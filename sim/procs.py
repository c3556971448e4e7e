"""Worker-process helpers shared by batch runs and parallel trace comparison."""
from __future__ import annotations

import contextlib
import os
import signal
import sys


def cores() -> int:
    """CPU cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:          # not on Linux
        return os.cpu_count() or 1


def pool_context(preload=()):
    """Start method for a pool of fresh workers: ``forkserver`` where there is one, else ``spawn``.

    Not ``fork`` from a process that may run threads (a lock held by another
    thread stays locked in the child).  The fork server imports the modules
    named in ``preload`` once, so each worker starts with them loaded.
    """
    import multiprocessing          # here: every command's start-up imports this module
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(list(preload))
        return ctx
    return multiprocessing.get_context("spawn")


@contextlib.contextmanager
def interrupts_kept(signum: int = signal.SIGINT):
    """While the block runs, an interrupt that Python would drop is delivered again.

    A ``KeyboardInterrupt`` (or a batch's time limit) raised while compiled code is
    calling back into Python (the JIT compiler's cache does) cannot travel up: Python
    prints "Exception ignored ... Traceback" and goes on as if nothing happened.  Here
    such an exception is not printed; a ``KeyboardInterrupt`` is delivered again as
    signal ``signum`` (whose Python handler raises it) a moment later, from a timer thread, and
    a time limit rings again by itself.  Other exceptions are reported as before.
    """
    import _thread
    import threading

    previous = sys.unraisablehook

    def hook(args):
        exc = args.exc_value
        if isinstance(exc, BaseException) and not isinstance(exc, Exception):
            if isinstance(exc, KeyboardInterrupt):  # a moment later, when the callback has returned
                later = threading.Timer(0.02, _thread.interrupt_main, (signum,))
                later.daemon = True
                later.start()
            return
        previous(args)

    sys.unraisablehook = hook
    try:
        yield
    finally:
        sys.unraisablehook = previous
