"""The one write-then-rename helper: every file Trundle writes goes through here.

A file is written to a temporary name beside its destination (same folder, so
the rename is atomic on POSIX) and renamed into place only when complete.  A
failure (permission, missing folder, full disk) becomes an
:class:`~sim.errors.InputError` ``PATH: cannot write WHAT: reason`` (exit 2 on
the command line) and the temporary file is removed.  The destination, when it
exists, must be a regular file: a device node, FIFO or folder is never replaced.

Streaming writers (traces) keep the file open: :class:`AtomicFile` with
``commit()`` / ``abort()``.  Whole files: :func:`write_bytes`, :func:`write_text`.
:func:`signals_held` keeps Ctrl-C and SIGTERM from cutting a write in half
(a trace block, a trace and its sidecar).
"""
from __future__ import annotations

import contextlib
import os
import signal
import stat
import threading

from sim.errors import InputError


def check_target(path, what: str = "the file") -> None:
    """InputError unless ``path`` is absent or a regular file (a device node, FIFO or
    folder is never replaced).  Writers that do not go through :class:`AtomicFile`
    (a trace streamed by the engine) call it before they start."""
    _refuse_unless_regular(os.fspath(path), what)


def _refuse_unless_regular(path: str, what: str) -> None:
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return
    except OSError as exc:
        raise InputError(path, None, f"cannot write {what}: {exc.strerror}") from None
    if not stat.S_ISREG(st.st_mode):
        raise InputError(path, None, f"cannot write {what}: it exists and is not a regular file "
                                     "(give a new file name or a regular file to replace)")


class AtomicFile:
    """A binary file written at ``path + '.part'`` and renamed to ``path`` on :meth:`commit`.

    Parameters
    ----------
    path : str or os.PathLike
        Destination.
    what : str
        Named in error messages ("the trace", "the PNG", ...).
    """

    def __init__(self, path, what: str = "the file"):
        self.path = os.fspath(path)
        self.part = self.path + ".part"
        self.what = what
        _refuse_unless_regular(self.path, what)
        try:
            self.fh = open(self.part, "wb")
        except OSError as exc:
            raise self._error(exc) from None

    def _error(self, exc: OSError) -> InputError:
        return InputError(self.path, None, f"cannot write {self.what}: {exc.strerror or exc}")

    def write(self, data: bytes) -> None:
        try:
            self.fh.write(data)
        except OSError as exc:
            self.abort()
            raise self._error(exc) from None

    def flush(self) -> None:
        try:
            self.fh.flush()
        except OSError as exc:
            self.abort()
            raise self._error(exc) from None

    def commit(self) -> None:
        """Flush, close and rename into place."""
        if self.fh is None:
            return
        try:
            self.fh.flush()
            os.fsync(self.fh.fileno())
            self.fh.close()
            self.fh = None
            os.replace(self.part, self.path)
        except OSError as exc:
            self.abort()
            raise self._error(exc) from None

    def abort(self) -> None:
        """Close and remove the temporary file (the destination is untouched)."""
        if self.fh is not None:
            try:
                self.fh.close()
            except OSError:
                pass
            self.fh = None
        try:
            os.remove(self.part)
        except OSError:
            pass

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.commit()
        else:
            self.abort()
        return False


def write_bytes(path, data: bytes, what: str = "the file") -> None:
    """Write ``data`` to ``path`` through a temporary file (see module docstring)."""
    with AtomicFile(path, what) as f:
        f.write(data)


def write_text(path, text: str, what: str = "the file", encoding: str = "utf-8") -> None:
    """Write ``text`` (``\\n`` line ends) to ``path`` through a temporary file."""
    write_bytes(path, text.encode(encoding), what)


@contextlib.contextmanager
def signals_held(signals=(signal.SIGINT, signal.SIGTERM)):
    """Hold back SIGINT and SIGTERM until the block is done, then deliver the first one.

    Python runs signal handlers in the main thread, between bytecodes, so a
    Ctrl-C can otherwise land in the middle of a write.  Inside the block the
    handlers only note the signal; afterwards the old handlers are back and
    the noted signal is raised again (Ctrl-C still interrupts, just after the
    write).  Blocking the signal in the kernel would not do: threads started
    by libraries (polars, numba) would receive it instead.  Outside the main
    thread this does nothing (no signal handler runs there).
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    got, old = [], {}

    def note(signum, frame):
        got.append(signum)

    try:
        for s in signals:
            if signal.getsignal(s) is not None:       # None: a handler set outside Python, left alone
                old[s] = signal.signal(s, note)
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)
        if got:
            signal.raise_signal(got[0])
