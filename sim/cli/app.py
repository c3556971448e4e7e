"""The ``trundle`` command line: ``main(argv) -> exit code``.

Each subcommand lives in its own module under :mod:`sim.commands`, exposing
``NAME``, ``HELP``, ``add_arguments(parser)`` and ``run(args) -> int``.  The
library raises :class:`~sim.errors.InputError`; this is the one place that
turns it into ``file:line: message`` on stderr and exit code 2.  An operating
system error that escapes a command (a file that cannot be written) is
``PATH: reason``, exit 2; a standard output that is full or closed ends the
command quietly with exit 2.
"""
from __future__ import annotations

import argparse
import importlib
import io
import os
import signal
import sys

from sim import __version__
from sim.errors import InputError
from sim.procs import interrupts_kept

COMMANDS = ("analyze", "run", "route", "diff", "batch", "study", "drive", "plot", "calibrate", "serve")


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="trundle",
        description="Kinematic analysis and fixed-step simulation of wheeled mobile robot bases.")
    p.add_argument("--version", action="version", version=f"trundle {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        try:
            mod = importlib.import_module(f"sim.cli.cmd_{name}")
        except ModuleNotFoundError as exc:
            if exc.name and exc.name.endswith(f"cmd_{name}"):
                continue  # command not built yet
            raise
        sp = sub.add_parser(mod.NAME, help=mod.HELP, description=mod.HELP)
        mod.add_arguments(sp)
        sp.set_defaults(_run=mod.run)
    return p


class _StdoutGone(Exception):
    """Standard output cannot take more (a full device, a closed pipe)."""


class _Guarded:
    """``sys.stdout`` while a command runs: a write that fails raises :class:`_StdoutGone`,
    so that a full or closed standard output is told apart from a file that cannot be written."""

    def __init__(self, stream):
        self._stream = stream

    def write(self, text):
        try:
            return self._stream.write(text)
        except (OSError, ValueError) as exc:
            raise _StdoutGone() from exc

    def flush(self):
        try:
            self._stream.flush()
        except (OSError, ValueError) as exc:
            raise _StdoutGone() from exc

    def __getattr__(self, name):
        return getattr(self._stream, name)


def main(argv=None) -> int:
    """Run ``trundle ARGV``; return the exit code (argparse raises SystemExit for --help and bad options)."""
    real = sys.stdout
    guarded = _Guarded(real) if real is not None else None
    if guarded is not None:
        sys.stdout = guarded
    try:
        try:
            with interrupts_kept(signal.SIGINT):
                code = _main(argv)
        except SystemExit:
            if guarded is not None:
                guarded.flush()
            raise
        if guarded is not None:
            guarded.flush()
        return code
    except _StdoutGone:
        _silence(real)
        return 2
    finally:
        sys.stdout = real


def _main(argv) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2

    def _terminate(signum, frame):  # a CI time-out or kill: finish files like Ctrl-C does
        raise KeyboardInterrupt

    try:
        old = signal.signal(signal.SIGTERM, _terminate)
    except ValueError:  # not the main thread
        old = None
    try:
        return int(args._run(args) or 0)
    except InputError as exc:
        _say(f"{exc}")
        return 2
    except KeyboardInterrupt:
        _say("interrupted")
        return 130
    except ModuleNotFoundError as exc:
        if exc.name not in ("pygame", "matplotlib", "distributed"):
            raise
        _say(f"trundle {args.command}: needs {exc.name}, which is not installed: "
             "pip install 'trundle[view]' (or '.[view]' in a checkout)")
        return 2
    except OSError as exc:  # a file the command could not write or read, not already reported as such
        where = exc.filename if isinstance(exc.filename, str) else f"trundle {args.command}"
        _say(f"{where}: {exc.strerror or exc}")
        return 2
    finally:
        if old is not None:
            signal.signal(signal.SIGTERM, old)


def _say(text: str) -> None:
    """A line on stderr; quiet when stderr itself is gone."""
    try:
        print(text, file=sys.stderr)
        sys.stderr.flush()
    except (OSError, ValueError):
        pass


def _silence(stream) -> None:
    """Point a failed standard output at the null device, so that the interpreter's own
    flush at exit does not fail again (and print a traceback)."""
    try:
        fd = stream.fileno()
        null = os.open(os.devnull, os.O_WRONLY)
        os.dup2(null, fd)
        os.close(null)
    except (OSError, ValueError, AttributeError, io.UnsupportedOperation):
        pass
