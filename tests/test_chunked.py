"""The chunked engine against the step-by-step reference engine.

The reference (sim.engine.Simulator) is the definition; the chunked engine
computes the same steps across time.  They must agree to rounding on every
demo scenario and on awkward chunk boundaries.
"""
import glob
import math
import os

import numpy as np
import pytest

from sim.engine.chunked import ChunkedSimulator, castor_path, prefix_products
from sim.theory.castor import swivel
from sim.runs.runner import run_scenario
from sim.files.scenario import load_scenario

HERE = os.path.dirname(__file__)
SCENARIOS = sorted(glob.glob(os.path.join(HERE, "..", "scenarios", "*.yaml")))


def _close(a, b, atol):
    """Arrays equal where both are blank (NaN), within atol elsewhere."""
    both = np.isnan(a) & np.isnan(b)
    assert np.array_equal(np.isnan(a), np.isnan(b)), "blank cells differ"
    d = np.where(both, 0.0, np.abs(a - b))
    return float(np.max(d)) if d.size else 0.0


@pytest.mark.parametrize("path", SCENARIOS, ids=os.path.basename)
def test_chunked_agrees_with_reference(path):
    scen = load_scenario(path)
    ref = run_scenario(scen, keep=True, engine="reference")
    fast = run_scenario(scen, keep=True, engine="chunked")
    assert ref.trace.keys() == fast.trace.keys()
    worst = max(_close(ref.trace[c], fast.trace[c], 1e-9) for c in ref.trace)
    assert worst < 1e-9, worst
    assert [c.passed for c in ref.checks] == [c.passed for c in fast.checks]


def test_chunk_size_does_not_matter(monkeypatch):
    """Splitting a run into odd-sized chunks gives the same rows to rounding."""
    import sim.runs.runner as runner
    scen = load_scenario(os.path.join(HERE, "..", "scenarios", "quad-steer-dogleg.yaml"))
    whole = run_scenario(scen, keep=True, engine="chunked").trace
    monkeypatch.setattr(runner, "CHUNK", 37)
    pieces = run_scenario(scen, keep=True, engine="chunked").trace
    assert max(_close(whole[c], pieces[c], 1e-12) for c in whole) < 1e-12


def test_prefix_products_match_sequential_products():
    rng = np.random.default_rng(3)
    M = rng.normal(size=(50, 2, 2, 2))
    P = prefix_products(M)
    acc = np.broadcast_to(np.eye(2), (2, 2, 2)).copy()
    for i in range(50):
        acc = M[i] @ acc
        # products are rescaled: compare directions (projective equality)
        for c in range(2):
            ratio = P[i, c] / acc[c]
            assert np.allclose(ratio, ratio[0, 0], rtol=1e-9)


def test_castor_path_equals_repeated_swivel():
    """The scan of per-step maps equals stepping the exact swivel one step at a time."""
    rng = np.random.default_rng(5)
    twists = np.cumsum(rng.normal(scale=0.05, size=(400, 3)), axis=0)
    x, y, trail = np.array([0.3, -0.2]), np.array([0.1, -0.25]), np.array([0.04, 0.02])
    h = np.array([2.0, -1.0])
    path = castor_path(h, x, y, trail, twists, 0.01)
    for j in range(400):
        h = swivel(h, x, y, trail, twists[j], 0.01)
        assert np.allclose(path[j + 1], h, atol=1e-9)


def test_tractrix_through_chunked_engine():
    """Castor dragged straight from 90 deg: tan(psi/2) = tan(psi0/2) exp(-v t / d) (tractrix, classical)."""
    from sim.files.robotfile import robot_from_data
    from sim.files.yamlread import load_text
    robot = robot_from_data(load_text(
        "wheels:\n"
        "  - {name: l, type: fixed, x: 0, y: 0.2, radius: 0.05}\n"
        "  - {name: r, type: fixed, x: 0, y: -0.2, radius: 0.05}\n"
        "  - {name: c, type: castor, x: 0.3, y: 0, radius: 0.03, trail: 0.05, heading: 90 deg}\n"))
    sim = ChunkedSimulator(robot, 0.001)
    sim.command_wheels({"l": 10.0, "r": 10.0})  # v = 0.5 m/s
    block = sim.advance(2001)
    t = block.t
    expect = 2 * np.arctan(math.tan(math.pi / 4) * np.exp(-0.5 * t / 0.05))
    assert np.max(np.abs(block.steer[:, 2] - expect)) < 1e-9


@pytest.mark.parametrize("robot_file", ["quad-steer.yaml", "greenhouse-rover.yaml", "tote-mecanum.yaml",
                                        "ward-cart.yaml"])
def test_normal_matrix_shortcut_equals_the_full_sum(repo_root, robot_file):
    """The heading-free term of wheels with both rows, plus the other rows' terms, is the
    normal matrix A^T A of the scaled rows at any steering (checked at random headings
    against the sum built from sim.theory.constraints' rows)."""
    from sim.theory.kinematics import twist_scale
    from sim.theory.constraints import motion_rows
    from sim.files.robotfile import load_robot
    robot = load_robot(repo_root / "scenarios" / "robots" / robot_file)
    sim = ChunkedSimulator(robot, 0.01)
    rng = np.random.default_rng(3)
    S = twist_scale(robot)
    lone = sim._lone_rows()
    for _ in range(20):
        h = robot.arrays.heading + rng.uniform(-math.pi, math.pi, len(robot.wheels))
        A, _, _ = motion_rows(robot, h)
        AS = A * S
        shortcut = sim._paired_gram() + AS[lone].T @ AS[lone]
        np.testing.assert_allclose(shortcut, AS.T @ AS, rtol=0, atol=1e-13)
