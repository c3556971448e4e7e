"""Traces: a streaming writer (CSV or Parquet, through polars).

One row per step from t = 0 to the end inclusive (``every`` decimates), in the
columns of the step record (:mod:`sim.engine.record`: ``columns``).  Extra
column groups (odometry) are appended by whoever adds them.

CSV: plain RFC 4180 with a header and CR LF line ends; every value is the
shortest text that reads back to the same double (polars' float writer), a
NaN is a blank cell ("not defined": no ICR, no twist command), infinities are
``inf`` / ``-inf``.  A path ending in ``.parquet`` gets a Parquet file
instead (zstd, one float64 column per trace column, NaN stored as null), whose
key-value metadata holds the sidecar's JSON under ``trundle``.
"""
from __future__ import annotations

import os
import queue
import signal
import threading

import numpy as np

from sim.errors import InputError
from sim.files.atomic import AtomicFile, signals_held
from sim.traces.meta import PARQUET_KEY, finished, meta_text, write_sidecar

PARQUET_SUFFIX = ".parquet"
CSV_BLOCK = 8192               # rows formatted at a time (memory: one block of text)
PARQUET_BLOCK = 65536          # rows handed to the Parquet writer at a time
ROW_GROUP = 65536              # Parquet rows per row group


def row_values(r, extra=()) -> np.ndarray:
    """Flat float row (nan = blank) of a :class:`~sim.engine.record.StepResult`, plus ``extra``."""
    return np.concatenate([r.values, np.asarray(extra, float)])


def is_parquet_path(path) -> bool:
    """Whether a trace written to ``path`` is Parquet (the name ends in ``.parquet``)."""
    return os.fspath(path).lower().endswith(PARQUET_SUFFIX)


class TraceWriter:
    """Stream rows to ``path`` (CSV, or Parquet for ``*.parquet``) through ``path + '.part'``.

    Parameters
    ----------
    path : str or os.PathLike
    header : list of str, the column names (unique).
    meta : dict or None
        What produced the trace (:func:`sim.traces.meta.trace_meta`).  When
        given, :meth:`close` writes the sidecar ``PATH.meta.json`` after the
        trace, with ``rows`` the rows in the file, and a Parquet file holds
        the same text in its metadata.

    ``write(row)`` and ``write_block(values (m, ncols))`` add rows (float, NaN
    for blank).  The text (or Parquet) is made and written by a thread of the
    writer, whole blocks at a time, so the run goes on meanwhile and the file
    only ever holds whole rows; ``rows`` counts the rows in the file.
    ``flush()`` waits until every row given is in the ``.part`` file (a CSV
    ``.part`` is then readable up to there; Parquet only once closed).
    ``close()`` writes what is left, finishes the file, renames it into place
    and then writes the sidecar, with Ctrl-C and SIGTERM held back until all
    of that is done: the sidecar always counts exactly the rows in the file.
    ``abort()`` removes the ``.part`` file (a run that failed for a reason
    other than an interruption).
    """

    def __init__(self, path, header, meta=None, block: int | None = None):
        import polars as pl

        self.path = os.fspath(path)
        self.header = list(header)
        self.meta = meta
        self.parquet = is_parquet_path(self.path)
        self.block = block or (PARQUET_BLOCK if self.parquet else CSV_BLOCK)
        self.rows = 0
        self._buf = []
        self._complete = True
        self._schema = {n: pl.Float64 for n in self.header}
        if len(self._schema) != len(self.header):
            raise ValueError("trace column names must be unique")
        self._file = AtomicFile(self.path, "the trace")
        if not self.parquet:
            self._file.write((",".join(self.header) + "\r\n").encode("utf-8"))
        self._sigint = _OwnInterrupt()
        self._worker = _Worker(self)

    # -- rows --------------------------------------------------------------------
    def write(self, values) -> None:
        """Add one row (ncols,)."""
        self._buf.append(values)
        if len(self._buf) >= self.block:
            self._drain()

    def write_block(self, block) -> None:
        """Add rows, shape (m, ncols) (copied: the caller may reuse the array)."""
        self._drain()
        block = np.asarray(block)
        if block.ndim != 2 or block.shape[1] != len(self.header):
            raise ValueError(f"expected rows of {len(self.header)} values, got shape {block.shape}")
        for i in range(0, len(block), self.block):
            # a copy in column order: what polars takes without another copy
            self._worker.put(np.array(block[i:i + self.block], dtype=np.float64, order="F"))

    def _drain(self) -> None:
        if self._buf:
            rows, self._buf = np.array(self._buf, dtype=np.float64, order="F"), []
            self._worker.put(rows)

    def frame(self, block):
        """A polars frame of float rows (m, ncols), NaN as null."""
        import polars as pl
        return pl.from_numpy(block, schema=self._schema).fill_nan(None)

    def parquet_meta(self, _context=None) -> dict:
        """Key-value metadata for the Parquet footer (called when the file is finished)."""
        if self.meta is None:
            return {}
        return {PARQUET_KEY: meta_text(finished(self.meta, self.rows, self._complete))}

    # -- finishing ---------------------------------------------------------------
    def flush(self) -> None:
        """Wait until every row given so far is in the ``.part`` file."""
        self._drain()
        self._worker.wait()
        if not self.parquet:
            self._file.flush()

    def close(self, complete: bool = True, meta=None) -> None:
        """Finish the file and rename it into place, then write the sidecar (when there is metadata).

        ``complete`` False marks an interrupted run; ``meta`` replaces the
        metadata given at the start.
        """
        if self._file is None:
            return
        if meta is not None:
            self.meta = meta
        self._complete = bool(complete)
        try:
            with signals_held():
                try:
                    self._drain()
                    self._worker.finish()
                    if self.parquet:
                        self._check_parquet_end()
                    self._file.commit()
                except BaseException:
                    self._discard()
                    raise
                self._file = None
                if self.meta is not None:
                    write_sidecar(self.path, finished(self.meta, self.rows, self._complete))
        finally:
            self._sigint.restore()

    def _check_parquet_end(self) -> None:
        """A Parquet file ends with its footer and ``PAR1``; polars' writer, cut off by an
        interrupt that reached it despite :class:`_OwnInterrupt`, can stop without one.  Such a
        file is never renamed into place."""
        fh = self._file.fh
        fh.flush()
        with open(self._file.part, "rb") as part:
            part.seek(0, os.SEEK_END)
            size = part.tell()
            part.seek(max(size - 4, 0))
            ok = size >= 8 and part.read(4) == b"PAR1"
        if not ok:
            raise InputError(self.path, None, "the Parquet writer was cut off by the interrupt before it could "
                                              "finish the file; no trace kept (a CSV trace keeps the rows of an "
                                              "interrupted run)")

    def abort(self) -> None:
        """Stop and remove the ``.part`` file (the destination is untouched)."""
        if self._file is None:
            return
        self._discard()
        self._sigint.restore()

    def _discard(self) -> None:
        self._worker.cancel()
        self._file.abort()
        self._file = None


def _interrupt(signum, frame):
    raise KeyboardInterrupt


class _OwnInterrupt:
    """While a writer's thread runs polars, Ctrl-C is raised by a handler of ours.

    Polars cancels the queries it is running, in every thread, on a Ctrl-C
    that reaches Python's default handler; the writer's thread must instead
    finish the rows it was given (the main thread gets the KeyboardInterrupt
    as usual and closes the writer).  Main thread only; the default handler
    is back when the last open writer is closed.
    """

    open_writers = 0

    def __init__(self):
        self.counted = False
        if threading.current_thread() is not threading.main_thread():
            return
        handler = signal.getsignal(signal.SIGINT)
        if handler is signal.default_int_handler:
            signal.signal(signal.SIGINT, _interrupt)
        elif handler is not _interrupt:
            return                                   # someone else's handler: theirs to keep
        _OwnInterrupt.open_writers += 1
        self.counted = True

    def restore(self):
        if not self.counted:
            return
        self.counted = False
        _OwnInterrupt.open_writers -= 1
        if _OwnInterrupt.open_writers == 0 and signal.getsignal(signal.SIGINT) is _interrupt:
            signal.signal(signal.SIGINT, signal.default_int_handler)


class _Stop(Exception):
    pass


_END, _CANCEL = object(), object()


class _Worker:
    """The writer's thread: takes blocks from a short queue and writes them.

    CSV: polars formats each block and the text is appended to the ``.part``
    file.  Parquet: the thread runs polars' streaming Parquet writer, whose
    source is this queue; the footer (with the metadata callback, so it sees
    the final row count) is written when the queue ends.  Errors are kept and
    raised as :class:`InputError` by the next :meth:`put`, :meth:`wait` or
    :meth:`finish`.
    """

    def __init__(self, writer: TraceWriter):
        self.w = writer
        self.q = queue.Queue(maxsize=3)
        self.error = None
        self.thread = threading.Thread(target=self._parquet if writer.parquet else self._csv,
                                       name="trundle-trace-writer", daemon=True)
        self.thread.start()

    def _blocks(self):
        while True:
            item = self.q.get()
            try:
                if item is _END:
                    return
                if item is _CANCEL:
                    raise _Stop()
                yield item
            finally:
                self.q.task_done()

    def _csv(self):
        fh = self.w._file.fh
        try:
            for block in self._blocks():
                self.w.frame(block).write_csv(fh, include_header=False, line_terminator="\r\n", null_value="")
                self.w.rows += len(block)
        except BaseException as exc:              # noqa: BLE001 - raised in the caller's thread
            self._failed(exc)

    def _parquet(self):
        from polars.io.plugins import register_io_source

        def source(with_columns, predicate, n_rows, batch_size):
            for block in self._blocks():
                frame = self.w.frame(block)
                self.w.rows += len(block)
                yield frame

        try:
            register_io_source(source, schema=self.w._schema).sink_parquet(
                self.w._file.fh, compression="zstd", compression_level=1, row_group_size=ROW_GROUP,
                metadata=self.w.parquet_meta)
        except BaseException as exc:              # noqa: BLE001
            self._failed(exc)

    def _failed(self, exc):
        if not isinstance(exc, _Stop) and self.error is None:
            self.error = exc
        while True:                               # unblock a waiting caller
            try:
                self.q.get_nowait()
                self.q.task_done()
            except queue.Empty:
                return

    def _raise(self):
        if self.error is not None:
            msg = str(self.error).strip().splitlines()
            raise InputError(self.w.path, None, f"cannot write the trace: {msg[0] if msg else self.error!r}")

    def put(self, item) -> None:
        while True:
            self._raise()
            if not self.thread.is_alive():
                return
            try:
                self.q.put(item, timeout=0.2)
                return
            except queue.Full:
                continue

    def wait(self) -> None:
        """Until the queue is empty and its last block written."""
        self._raise()
        if self.thread.is_alive():
            self.q.join()
        self._raise()

    def finish(self) -> None:
        self.put(_END)
        self.thread.join()
        self._raise()

    def cancel(self) -> None:
        if self.thread.is_alive():
            self.put(_CANCEL)
            self.thread.join()
