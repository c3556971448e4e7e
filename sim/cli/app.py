"""The ``trundle`` command line: ``main(argv) -> exit code``.

Each subcommand lives in its own module under :mod:`sim.commands`, exposing
``NAME``, ``HELP``, ``add_arguments(parser)`` and ``run(args) -> int``.  The
library raises :class:`~sim.errors.InputError`; this is the one place that
turns it into ``file:line: message`` on stderr and exit code 2.
"""
from __future__ import annotations

import argparse
import importlib
import sys

from sim import __version__
from sim.errors import InputError

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


def main(argv=None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    import signal

    def _terminate(signum, frame):  # a CI time-out or kill: finish files like Ctrl-C does
        raise KeyboardInterrupt

    try:
        old = signal.signal(signal.SIGTERM, _terminate)
    except ValueError:  # not the main thread
        old = None
    try:
        return int(args._run(args) or 0)
    except InputError as exc:
        print(f"{exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except ModuleNotFoundError as exc:
        if exc.name not in ("pygame", "matplotlib", "distributed"):
            raise
        print(f"trundle {args.command}: needs {exc.name}, which is not installed: "
              "pip install 'trundle[view]' (or '.[view]' in a checkout)", file=sys.stderr)
        return 2
    except BrokenPipeError:
        return 0
    finally:
        if old is not None:
            signal.signal(signal.SIGTERM, old)
