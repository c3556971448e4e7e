"""Worker-process helpers shared by batch runs and parallel trace comparison."""
from __future__ import annotations

import multiprocessing
import os


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
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(list(preload))
        return ctx
    return multiprocessing.get_context("spawn")
