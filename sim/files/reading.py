"""Opening input files safely: regular files only, bounded size, bounded lines.

Every file reader in :mod:`sim.files` (and the calibration readers) opens its
input here, so that the same promises hold everywhere:

* only a regular file is read: a folder, FIFO, socket or device node is an
  input error at once (a FIFO is opened without blocking and refused, so a
  run never hangs on one);
* whole-file readers (YAML) read at most a stated number of bytes and refuse
  a larger file before parsing anything;
* line readers (CSV) stream the file in pieces, decode each line as UTF-8
  (a bad byte is ``file:line: not UTF-8``) and refuse a line longer than
  :data:`MAX_LINE` bytes, so memory stays flat whatever the file holds.
"""
from __future__ import annotations

import os
import stat

from sim.errors import InputError

MAX_LINE = 64 * 1024     # bytes: the longest line a CSV reader accepts
CHUNK = 1 << 20          # bytes read from the disk at a time


def size_text(n: int) -> str:
    """``256 KiB``, ``1 MiB``: a byte count for messages."""
    for unit, scale in (("MiB", 1 << 20), ("KiB", 1 << 10)):
        if n >= scale and n % scale == 0:
            return f"{n // scale} {unit}"
    return f"{n} bytes"


def open_regular(path, what: str = "file"):
    """Open ``path`` for binary reading; InputError unless it is a regular file.

    ``what`` names the file in messages ("robot file", "command log").  The
    file is opened with ``O_NONBLOCK`` (where there is one) and checked with
    ``fstat`` before anything is read, so a FIFO is refused instead of waited on.
    """
    source = os.fspath(path)
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0)
    try:
        fd = os.open(source, flags)
    except FileNotFoundError:
        raise InputError(source, None, "file not found") from None
    except IsADirectoryError:
        raise InputError(source, None, f"is a folder, expected a {what}") from None
    except OSError as exc:
        raise InputError(source, None, f"cannot read the {what}: {exc.strerror or exc}") from None
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            kind = ("a folder" if stat.S_ISDIR(st.st_mode) else "a FIFO" if stat.S_ISFIFO(st.st_mode)
                    else "a device" if stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode)
                    else "a socket" if stat.S_ISSOCK(st.st_mode) else "not a regular file")
            raise InputError(source, None, f"is {kind}, expected a {what} (a regular file)")
        if hasattr(os, "set_blocking"):
            os.set_blocking(fd, True)
        fh = os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise
    return fh


def read_limited(path, limit: int, what: str = "file") -> bytes:
    """The whole content of regular file ``path``; InputError if it is larger than ``limit`` bytes."""
    source = os.fspath(path)
    with open_regular(source, what) as fh:
        try:
            raw = fh.read(limit + 1)
        except OSError as exc:
            raise InputError(source, None, f"cannot read the {what}: {exc.strerror or exc}") from None
    if len(raw) > limit:
        raise InputError(source, None, f"{what} is larger than {size_text(limit)}, the most Trundle reads; "
                                       "refusing to read it")
    return raw


def text_blocks(fh, source: str, what: str = "file", first: int = 1, max_line: int = MAX_LINE,
                chunk: int | None = None):
    """Yield ``(number of its first line, text)``: the rest of binary file ``fh`` in blocks of
    whole lines (about ``chunk`` bytes; the text without its last ``\\n``); ``first`` is the
    number of the next line.  Bytes that are not UTF-8, or a line longer than ``max_line``
    bytes, raise InputError at their line.  Memory holds about one block.
    """
    import numpy as np  # here, not at the top: finding scenarios (batch) starts without numpy

    n, carry = first, b""
    chunk = chunk or CHUNK
    while True:
        try:
            raw = fh.read(chunk)
        except OSError as exc:
            raise InputError(source, n, f"cannot read the {what}: {exc.strerror or exc}") from None
        data = carry + raw
        if raw:
            cut = data.rfind(b"\n") + 1
            body, carry = data[:cut], data[cut:]
        else:
            body, carry = data, b""
        if len(carry) > max_line:
            raise InputError(source, n + body.count(b"\n"),
                             f"line is longer than {size_text(max_line)}; refusing to read it")
        if body:
            if body.endswith(b"\n"):
                body = body[:-1]
            b = np.frombuffer(body, dtype=np.uint8)
            ends = np.flatnonzero(b == 10)
            lengths = np.diff(np.concatenate([[-1], ends, [len(b)]])) - 1
            if lengths.max() > max_line:
                raise InputError(source, n + int(np.argmax(lengths > max_line)),
                                 f"line is longer than {size_text(max_line)}; refusing to read it")
            try:
                text = body.decode("utf-8")
            except UnicodeDecodeError as exc:
                start = body.rfind(b"\n", 0, exc.start) + 1
                raise InputError(source, n + body.count(b"\n", 0, exc.start),
                                 f"{what} is not UTF-8 text (byte {exc.start - start + 1} of this line)") from None
            yield n, text
            n += len(ends) + 1
        if not raw:
            return


def text_lines(fh, source: str, what: str = "file", max_line: int = MAX_LINE):
    """Yield the lines of binary file ``fh`` as text (line ends kept), one at a time.

    A line that is not UTF-8, or longer than ``max_line`` bytes, raises
    InputError at its line.  A UTF-8 byte order mark at the start is dropped.
    """
    n = 0
    while True:
        try:
            raw = fh.readline(max_line + 1)
        except OSError as exc:
            raise InputError(source, n + 1, f"cannot read the {what}: {exc.strerror or exc}") from None
        if not raw:
            return
        n += 1
        if len(raw) > max_line and not raw.endswith(b"\n"):
            raise InputError(source, n, f"line is longer than {size_text(max_line)}; refusing to read it")
        if n == 1 and raw.startswith(b"\xef\xbb\xbf"):
            raw = raw[3:]
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise InputError(source, n, f"{what} is not UTF-8 text (byte {exc.start + 1} of this line)") from None
        yield text


def read_parquet(path, source):
    """A whole (small) Parquet file through polars: (frame, header with names stripped).
    A file polars cannot read is ``source: not a readable Parquet file: reason``."""
    import polars as pl

    from sim.errors import clip
    try:
        frame = pl.read_parquet(path)
    except Exception as exc:                               # noqa: BLE001 - polars raises several kinds
        msg = str(exc).strip().splitlines()
        raise InputError(source, None, f"not a readable Parquet file: {clip(msg[0] if msg else repr(exc), 100)}") from None
    return frame, [str(c).strip() for c in frame.columns]
