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
import weakref

import numpy as np

from sim.errors import InputError
from sim.files.atomic import AtomicFile, signals_held
from sim.traces.meta import PARQUET_KEY, finished, meta_text, write_sidecar

PARQUET_SUFFIX = ".parquet"
CSV_BLOCK = 8192               # rows a caller's rows are cut into on the way to the writer's thread
CSV_FRAME = 32768              # rows polars formats at a time (blocks are gathered into frames)
PARQUET_BLOCK = 32768
ROW_GROUP = 65536              # Parquet rows per row group, and per frame
AHEAD = 3                      # Parquet: frames polars may hold before the next is handed over
BATCH = 1024                   # CSV rows per piece of text polars formats on one thread


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
    writer, whole frames of rows at a time (Parquet: one row group of
    ``ROW_GROUP`` rows per frame however the rows were handed in, so the same
    rows give the same file), so the run goes on meanwhile and the file only
    ever holds whole rows; ``rows`` counts the rows handed to polars, all of
    them in the file once :meth:`flush` or :meth:`close` returns.
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
        self.frame_rows = ROW_GROUP if self.parquet else CSV_FRAME
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
            # a copy, transposed: shape (ncols, m), one column after the other, which polars
            # takes without another copy (numpy's order="F" copy of C-order rows is ~4x slower)
            self._worker.put(np.ascontiguousarray(block[i:i + self.block].T, dtype=np.float64))

    def _drain(self) -> None:
        if self._buf:
            rows, self._buf = np.array(self._buf, dtype=np.float64).T.copy(), []
            self._worker.put(rows)

    def frame(self, cols):
        """A polars frame of the rows whose columns are ``cols`` (ncols, m), NaN as null.

        Only the columns that hold a NaN get the null mask (a NaN anywhere makes the
        column's sum NaN; a sum that is NaN for another reason only costs a look).
        """
        import polars as pl
        frame = pl.from_numpy(cols.T, schema=self._schema)
        with np.errstate(invalid="ignore", over="ignore"):
            nan = np.flatnonzero(np.isnan(np.add.reduce(cols, axis=1)))
        if nan.size:
            frame = frame.with_columns([pl.nth(int(j)).fill_nan(None) for j in nan])
        return frame

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


_END, _CANCEL, _FLUSH = object(), object(), object()


class _Worker:
    """The writer's thread: takes blocks from a short queue and writes them.

    The thread runs one of polars' streaming writers (``sink_csv`` or
    ``sink_parquet``) on the ``.part`` file; its source is this queue, read
    by :meth:`_frames`, which gathers the blocks into frames of about
    ``writer.frame_rows`` rows (polars formats and compresses a frame on all
    its threads while the next one is gathered).  CSV: a flush ends the
    streaming writer (everything given so far is then in the file) and the
    next block starts another, which appends.  Parquet: one streaming writer
    for the whole file; the footer (with the metadata callback, so it sees
    the final row count) is written when the queue ends.  Errors are kept and
    raised as :class:`InputError` by the next :meth:`put`, :meth:`wait` or
    :meth:`finish`.
    """

    def __init__(self, writer: TraceWriter):
        self.w = writer
        self.q = queue.Queue(maxsize=3)
        self.error = None
        self.ended = False
        self.at_flush = False
        self.freed = threading.Condition()        # rows polars has let go of (Parquet)
        self.freed_rows = 0
        self.thread = threading.Thread(target=self._parquet if writer.parquet else self._csv,
                                       name="trundle-trace-writer", daemon=True)
        self.thread.start()

    def _frames(self, stop_at_flush: bool):
        """Frames from the queue, in order.  Returns at the end, or (``stop_at_flush``) at a
        flush, whose marker :meth:`_csv` marks done once the file holds the rows before it."""
        pending, n = [], 0
        while True:
            item = self.q.get()
            if item is _CANCEL:
                self.q.task_done()
                raise _Stop()
            if item is _END or item is _FLUSH:
                if item is _END:
                    self.ended = True
                if item is _END or stop_at_flush:
                    self.at_flush = item is _FLUSH
                    if item is _END:
                        self.q.task_done()
                    if pending:
                        yield self._gather(pending)
                    return
                self.q.task_done()                 # Parquet: nothing is readable before the end anyway
                if pending:
                    yield self._gather(pending)
                    pending, n = [], 0
                continue
            pending.append(item)
            n += item.shape[1]
            self.q.task_done()
            while n >= self.w.frame_rows:          # frames of exactly frame_rows rows (one row group)
                extra = n - self.w.frame_rows
                rest = None
                if extra:
                    last = pending[-1]
                    pending[-1], rest = last[:, :last.shape[1] - extra], last[:, last.shape[1] - extra:]
                yield self._gather(pending)
                pending, n = ([rest], extra) if extra else ([], 0)

    def _gather(self, pending):
        """One frame of the blocks (each (ncols, m)), without copying them; rows counted."""
        import polars as pl
        if self.w.parquet:
            self._hold_back()
            for cols in pending:                   # polars lets go of a block once it is encoded
                weakref.finalize(cols, self._let_go, cols.shape[1])
        frames = [self.w.frame(cols) for cols in pending]
        self.w.rows += sum(cols.shape[1] for cols in pending)
        return frames[0] if len(frames) == 1 else pl.concat(frames, rechunk=False)

    def _let_go(self, rows):
        with self.freed:
            self.freed_rows += rows
            self.freed.notify_all()

    def _hold_back(self):
        """Keep memory flat: polars' streaming writer takes frames from its source as fast as
        they come; wait (a while at most) until it has encoded all but ``AHEAD`` rows."""
        with self.freed:
            self.freed.wait_for(lambda: self.w.rows - self.freed_rows <= AHEAD * self.w.frame_rows, timeout=2.0)

    def _source(self, stop_at_flush):
        from polars.io.plugins import register_io_source

        def source(with_columns, predicate, n_rows, batch_size):
            return self._frames(stop_at_flush)

        return register_io_source(source, schema=self.w._schema)

    def _csv(self):
        fh = self.w._file.fh
        try:
            while not self.ended:
                for frame in self._frames(True):
                    frame.write_csv(fh, include_header=False, line_terminator="\r\n", null_value="",
                                    batch_size=BATCH)
                self._flushed()                    # the rows before the flush are in the file
        except BaseException as exc:              # noqa: BLE001 - raised in the caller's thread
            self._flushed()
            self._failed(exc)

    def _flushed(self):
        if self.at_flush:
            self.at_flush = False
            self.q.task_done()

    def _parquet(self):
        try:
            self._source(False).sink_parquet(
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
        """Until every block given is written (CSV: in the file; Parquet: taken by polars)."""
        self.put(_FLUSH)
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
