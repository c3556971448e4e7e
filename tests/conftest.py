"""Shared helpers for the test suite.

Fixtures hand out plain functions (session scope, so hypothesis tests may use
them too):

* ``robot_from_yaml(text)``: a :class:`sim.model.robot.Robot` from inline YAML;
  ``car_robot(wheelbase, track)``: a car-like base (fixed rear, steered front);
* ``scenario_files(tmp_path, {name: text})`` / ``scenario_from_yaml``: write
  files and load a scenario;
* ``cli(argv)``: ``sim.cli.main(argv)`` -> (exit code, stdout, stderr);
* ``run_module(args, cwd)``: ``python -m sim ARGS`` in a subprocess;
* ``expect_input_error(code, err, path, line)``: the ``file:line: message``
  shape of bad input (exit 2, no traceback);
* ``textbook``: the wheel equations in the polar alpha/l/beta form of
  Siegwart et al. 2011, section 3.2, written out independently of
  :mod:`sim.constraints`.
"""
from __future__ import annotations

import contextlib
import math
import os
import pathlib
import subprocess
import sys
import textwrap

import numpy as np
import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]
SCENARIOS = ROOT / "scenarios"
ROBOTS = SCENARIOS / "robots"


def robot_from_yaml(text: str, source: str = "<inline>"):
    """A validated Robot from (indented) inline YAML text."""
    from sim.files.robotfile import robot_from_data
    from sim.files.yamlread import load_text

    return robot_from_data(load_text(textwrap.dedent(text), source), source)


def car_robot(wheelbase: float, track: float):
    """A car-like base (m): fixed rear wheels at x = 0, unpowered steered front wheels at
    x = wheelbase, each pair ``track`` apart, radius 0.15 m."""
    L, h = wheelbase, track / 2
    return robot_from_yaml(f"""
        wheels:
          - {{name: rl, type: fixed, x: 0.0, y: {h}, radius: 0.15}}
          - {{name: rr, type: fixed, x: 0.0, y: {-h}, radius: 0.15}}
          - {{name: fl, type: steered, x: {L}, y: {h}, radius: 0.15, driven: false}}
          - {{name: fr, type: steered, x: {L}, y: {-h}, radius: 0.15, driven: false}}
    """)


def write_files(folder, files: dict) -> dict:
    """Write ``{relative name: text}`` under ``folder``; return {name: path}."""
    out = {}
    for name, text in files.items():
        p = pathlib.Path(folder) / name
        p.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(text, bytes):
            p.write_bytes(text)
        else:
            p.write_text(textwrap.dedent(text), encoding="utf-8")
        out[name] = p
    return out


def scenario_from_yaml(folder, text: str, name: str = "scenario.yaml", extra: dict | None = None):
    """Write a scenario (and ``extra`` files beside it) and load it."""
    from sim.files.scenario import load_scenario

    paths = write_files(folder, {name: text, **(extra or {})})
    return load_scenario(paths[name])


def cli(argv):
    """Run ``sim.cli.main(argv)`` in-process; return (exit code, stdout, stderr)."""
    import contextlib
    import io

    from sim.cli import main

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()


def run_module(args, cwd=None, timeout=120):
    """``python -m sim ARGS`` (the ``trundle`` command) in a subprocess."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    return subprocess.run([sys.executable, "-m", "sim", *map(str, args)], cwd=cwd or ROOT,
                          env=env, capture_output=True, text=True, timeout=timeout)


def run_bad_scenario(folder, text: str, files: dict):
    """``trundle run s.yaml --csv out.csv`` in ``folder`` on scenario ``text`` (written as is)
    with ``files`` beside it; checks it printed nothing on stdout and left no ``out.csv*``.
    Returns (exit code, stderr) for :func:`expect_input_error`."""
    folder = pathlib.Path(folder)
    write_files(folder, files)
    (folder / "s.yaml").write_text(text, encoding="utf-8")
    with contextlib.chdir(folder):
        code, out, err = cli(["run", "s.yaml", "--csv", "out.csv"])
    assert out == ""
    assert not any(p.name.startswith("out.csv") for p in folder.iterdir()), os.listdir(folder)
    return code, err


def expect_input_error(code, err, path, line, *fragments):
    """Bad input: exit 2, one ``path:line: message`` line, no traceback."""
    assert code == 2, (code, err)
    assert "Traceback" not in err, err
    first = err.strip().splitlines()[0] if err.strip() else ""
    prefix = f"{path}:{line}: " if line is not None else f"{path}: "
    assert first.startswith(prefix), (first, prefix)
    for frag in fragments:
        assert frag in first, (frag, first)
    return first


class Textbook:
    """Siegwart, Nourbakhsh & Scaramuzza 2011, section 3.2 (wheel kinematic constraints).

    A wheel at polar mount angle ``alpha`` and distance ``l`` with wheel-plane
    angle ``beta`` to the chassis line (and Swedish roller angle ``gamma``):

    rolling   ``[sin(a+b+g), -cos(a+b+g), -l cos(b+g)] R(theta) xi = r phidot cos g``
    sliding   ``[cos(a+b), sin(a+b), l sin b] R(theta) xi = 0``
    castor    ``[cos(a+b), sin(a+b), d + l sin b] R(theta) xi + d betadot = 0``

    Our file's heading of a standard or Swedish wheel is ``alpha + beta - 90 deg``; a
    castor's heading is the textbook castor angle plus 180 deg, i.e.
    ``alpha + beta + 90 deg`` (its positive spin rolls away from the trail).
    """

    @staticmethod
    def polar(x, y, heading, castor=False):
        a = math.atan2(y, x)
        l = math.hypot(x, y)
        b = heading + (-math.pi / 2 if castor else math.pi / 2) - a
        return a, l, b

    @classmethod
    def rolling(cls, x, y, heading, gamma=0.0):
        a, l, b = cls.polar(x, y, heading)
        return np.array([math.sin(a + b + gamma), -math.cos(a + b + gamma), -l * math.cos(b + gamma)])

    @classmethod
    def sliding(cls, x, y, heading):
        a, l, b = cls.polar(x, y, heading)
        return np.array([math.cos(a + b), math.sin(a + b), l * math.sin(b)])

    @classmethod
    def castor(cls, x, y, heading, d):
        """(row, betadot coefficient) of the castor constraint."""
        a, l, b = cls.polar(x, y, heading, castor=True)
        return np.array([math.cos(a + b), math.sin(a + b), d + l * math.sin(b)]), d

    @staticmethod
    def contact_velocity(x, y, xi):
        """Body-frame velocity of body point (x, y) under twist xi (rigid body, common practice)."""
        vx, vy, w = xi
        return np.array([vx - w * y, vy + w * x])


@pytest.fixture(scope="session", name="robot_from_yaml")
def _robot_from_yaml():
    return robot_from_yaml


@pytest.fixture(scope="session", name="car_robot")
def _car_robot():
    return car_robot


@pytest.fixture(scope="session", name="scenario_from_yaml")
def _scenario_from_yaml():
    return scenario_from_yaml


@pytest.fixture(scope="session", name="write_files")
def _write_files():
    return write_files


@pytest.fixture(scope="session", name="cli")
def _cli():
    return cli


@pytest.fixture(scope="session", name="run_module")
def _run_module():
    return run_module


@pytest.fixture(scope="session", name="run_bad_scenario")
def _run_bad_scenario():
    return run_bad_scenario


@pytest.fixture(scope="session", name="expect_input_error")
def _expect_input_error():
    return expect_input_error


@pytest.fixture(scope="session")
def textbook():
    return Textbook


@pytest.fixture(scope="session")
def repo_root():
    return ROOT
