"""Every bundled scenario runs and passes; the holonomic vs re-steering comparison."""
from __future__ import annotations

import math
import pathlib
import shutil
import subprocess

import numpy as np
import pytest
from scipy.integrate import quad

from sim.runs.runner import run_scenario
from sim.files.scenario import load_scenario

SCENARIOS = pathlib.Path(__file__).resolve().parents[1] / "scenarios"
ALL = sorted(p.name for p in SCENARIOS.glob("*.yaml"))


def test_there_are_demo_scenarios_for_every_bundled_base():
    robots = {load_scenario(SCENARIOS / s).robot.name for s in ALL}
    assert robots >= {p.stem for p in (SCENARIOS / "robots").glob("*.yaml")}


@pytest.mark.parametrize("name", ALL)
def test_demo_scenario_runs_and_passes(name, run_module, tmp_path):
    # `trundle run` if installed, else the same entry point as `python -m sim run`
    exe = shutil.which("trundle")
    if exe:
        p = subprocess.run([exe, "run", str(SCENARIOS / name), "--csv", str(tmp_path / "t.csv")],
                           capture_output=True, text=True, timeout=120)
    else:
        p = run_module(["run", SCENARIOS / name, "--csv", tmp_path / "t.csv"])
    assert p.returncode == 0, p.stdout + p.stderr
    assert "FAIL" not in p.stdout and p.stdout.count("PASS") >= 1
    assert (tmp_path / "t.csv").stat().st_size > 0


def _arrival(tr, y0):
    """First time (interpolated between rows) the base reaches world y = y0."""
    k = int(np.flatnonzero(tr["y"] >= y0)[0])
    t0, t1, a, b = tr["t"][k - 1], tr["t"][k], tr["y"][k - 1], tr["y"][k]
    return t0 + (y0 - a) / (b - a) * (t1 - t0)


def test_steered_base_arrives_later_by_the_resteer_time():
    # The classic point (issue 3): two bases of maneuverability 3 -- the mecanum tote
    # (3, 0) and the four-module steered base (1, 2) -- run the same script: 0.5 m/s forward,
    # then from t = 2 s 0.5 m/s sideways.  Worked by hand from the bases' files:
    #
    # tote (r 0.05 m, 80 rad/s^2): the wheel pattern changes by 20 rad/s at most, all wheels
    #   ramping together, so the twist blends linearly over Tb = 0.25 s; it reaches y0 at
    #   2 + Tb + (y0 - v Tb / 2) / v.
    # quad-steer (r 0.075 m, 40 rad/s^2, 3 rad/s steering, align: wait, 2 deg tolerance):
    #   the modules turn 90 deg at 3 rad/s while the spins ramp down (Td = (v / r) / 40 s),
    #   the base coasting along the turning wheels (y_dec = int (v - 40 r s) sin(3 s) ds);
    #   the drive waits until the modules are within 2 deg, ts = (90 - 2) deg / 3 rad/s,
    #   then ramps up over Tu = Td: it reaches y0 at 2 + ts + Tu + (y0 - y_dec - v Tu / 2) / v.
    #
    # So the steered base is late by ts + Tu / 2 - Tb / 2 - y_dec / v: the re-steer time less
    # the difference in ramps.
    tote = run_scenario(load_scenario(SCENARIOS / "tote-dogleg.yaml"), keep=True).trace
    quadr = run_scenario(load_scenario(SCENARIOS / "quad-steer-dogleg.yaml"), keep=True).trace
    v = 0.5
    Tb = 20.0 / 80.0
    r, acc, rate = 0.075, 40.0, 3.0
    Td = Tu = (v / r) / acc
    # which way the modules turned (+90 or -90 deg are equally near; the sign sets y_dec's sign)
    sgn = math.copysign(1.0, quadr["front_left.steer"][int(np.argmin(np.abs(quadr["t"] - 3.0)))])
    y_dec = sgn * quad(lambda s: (v - acc * r * s) * math.sin(rate * s), 0.0, Td)[0]
    ts = (math.pi / 2 - math.radians(2.0)) / rate
    for y0 in (0.3, 0.5, 0.6):
        t_tote = 2 + Tb + (y0 - v * Tb / 2) / v
        t_quad = 2 + ts + Tu + (y0 - y_dec - v * Tu / 2) / v
        got_tote, got_quad = _arrival(tote, y0), _arrival(quadr, y0)
        # a row holds the actuators at its start and they move over the step (README "Trace
        # columns"): the ramps lag the continuous ones by half a step, and the drive starts
        # in the step after the one whose start finds the modules within tolerance: within
        # one step for the tote, two for the steered base
        assert abs(got_tote - t_tote) < 0.01
        assert abs(got_quad - t_quad) < 0.02
        lag = got_quad - got_tote
        assert abs(lag - (ts + Tu / 2 - Tb / 2 - y_dec / v)) < 0.02
        assert lag > 0.4
    # neither base slips: the comparison is about time, not about skidding
    assert np.max(tote["slip"]) < 1e-9 and np.max(quadr["slip"]) < 1e-9
    # and the steered base really stood still while re-steering
    waiting = (quadr["t"] > 2 + Td + 0.02) & (quadr["t"] < 2 + ts - 0.02)
    assert waiting.sum() > 20
    np.testing.assert_allclose(quadr["vx"][waiting], 0.0, atol=1e-12)
    np.testing.assert_allclose(quadr["vy"][waiting], 0.0, atol=1e-12)
