"""What the README tells a new user, held to the program: roller signs of a mecanum base, the class
names, twist and wheel commands in scenarios, required tolerances, the description."""
from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest

from sim.files.robotfile import load_robot
from sim.files.scenario import load_scenario
from sim.theory.analysis import CLASSES, analyze
from sim.theory.kinematics import inverse_matrix

from conftest import ROBOTS, ROOT, SCENARIOS

README = (ROOT / "README.md").read_text(encoding="utf-8")


def table_after(marker: str) -> list:
    """Rows (lists of cells) of the first Markdown table after ``marker``."""
    rest = README[README.index(marker):]
    lines = rest[rest.index("\n|"):].strip().splitlines()
    rows = []
    for ln in lines:
        if not ln.startswith("|"):
            break
        rows.append([c.strip() for c in ln.strip("|").split("|")])
    return rows[2:]                                     # past the header and the --- line


def test_mecanum_roller_table_drives_as_the_readme_says(robot_from_yaml):
    rows = {corner: cell for corner, cell in table_after("Rollers of a mecanum base")}
    assert set(rows) == {"front left", "front right", "rear left", "rear right"}
    deg = {k: float(v.strip("`").split()[0]) for k, v in rows.items()}
    l, w, r = 0.2, 0.17, 0.05
    where = {"front left": (l, w), "front right": (l, -w), "rear right": (-l, -w), "rear left": (-l, w)}
    order = ["front left", "front right", "rear right", "rear left"]
    text = "wheels:\n" + "".join(
        f"  - {{name: {c.replace(' ', '_')}, type: swedish, x: {where[c][0]}, y: {where[c][1]}, radius: {r}, "
        f"roller: {deg[c]} deg}}\n" for c in order)
    robot = robot_from_yaml(text)
    K, _ = inverse_matrix(robot, robot.arrays.heading)
    # Lynch & Park 2017, eq. (13.10) (from memory), wheels (l, w), (l, -w), (-l, -w), (-l, w), columns (vx, vy, omega)
    H = np.array([[1, -1, -l - w], [1, 1, l + w], [1, -1, l + w], [1, 1, -l - w]]) / r
    np.testing.assert_allclose(K, H, atol=1e-12)
    left = K @ np.array([0.0, 0.2, 0.0])
    # "driving left turns the front left and rear right wheels backward and the other two forward"
    assert left[0] < 0 and left[2] < 0 and left[1] > 0 and left[3] > 0
    assert analyze(robot).uncontrolled == [] and robot.warnings == ()
    # the bundled tote has that pattern
    tote = load_robot(ROBOTS / "tote-mecanum.yaml")
    assert {w.name: round(math.degrees(w.roller)) for w in tote.wheels} == \
        {c.replace(" ", "_"): deg[c] for c in order}
    assert "docs/mecanum-rollers.png" in README and (ROOT / "docs" / "mecanum-rollers.png").exists()


def test_class_table_matches_the_analysis():
    rows = table_after("The five kinds a base can be")
    assert len(rows) == 5
    named = {}
    for cls, name, _, example in rows:
        m, s = (int(v) for v in re.fullmatch(r"\((\d),(\d)\)", cls).groups())
        assert CLASSES[(m, s)] == name
        named[(m, s)] = re.findall(r"`([a-z-]+)`", example)
    assert set(named) | {(1, 0)} == set(CLASSES)
    for (m, s), bases in named.items():
        for b in bases:
            a = analyze(load_robot(ROBOTS / f"{b}.yaml"))
            assert (a.mobility, a.steerability, a.kind) == (m, s, CLASSES[(m, s)]), b
    rover = analyze(load_robot(ROBOTS / "field-rover.yaml"))
    assert (rover.mobility, rover.steerability, rover.kind) == (1, 0, "single-motion type")
    assert "`single-motion type`" in README


def test_omitted_twist_parts_are_zero_and_wheel_commands_take_spin_and_steer(scenario_from_yaml, tmp_path):
    robots = str(ROBOTS)
    scen = scenario_from_yaml(tmp_path, f"""\
        description: a straight run, then one module steered by hand
        robot: {robots}/quad-steer.yaml
        step: 0.01
        duration: 3
        script:
          - at: 0
            twist: {{vx: 0.3}}
          - at: 1
            wheels: {{front_left: {{spin: 6.0, steer: 20 deg}}}}
        """)
    assert scen.script[0].value == (0.3, 0.0, 0.0)
    assert scen.script[1].value == {"front_left": {"spin": 6.0, "steer": math.radians(20)}}
    from sim.runs.runner import run_scenario
    res = run_scenario(scen, keep=True)
    tr = res.trace
    assert tr["front_left.spin_cmd"][-1] == 6.0
    assert tr["front_left.steer"][-1] == pytest.approx(math.radians(20), abs=1e-12)
    # wheels not named keep their last command: the spins the twist asked for
    assert tr["rear_left.spin_cmd"][-1] == tr["rear_left.spin_cmd"][99] != 0.0


def test_a_check_needs_its_tolerance(cli, expect_input_error, write_files, tmp_path):
    p = write_files(tmp_path, {"s.yaml": f"""\
        robot: {ROBOTS}/ward-cart.yaml
        step: 0.01
        duration: 1
        script:
          - {{at: 0, twist: {{vx: 0.2}}}}
        checks:
          - at: end
            pose: {{x: 0.2}}
        """})["s.yaml"]
    code, _, err = cli(["run", p])
    expect_input_error(code, err, p, 7, "missing required key 'tolerance'")


def test_description_is_kept_and_reported(cli):
    scen = SCENARIOS / "field-rover-skid-turn.yaml"
    code, out, _ = cli(["run", scen, "--json"])
    assert code == 0
    assert json.loads(out)["description"] == load_scenario(scen).description
    assert json.loads(out)["description"].startswith("Skid steering: the right side turns faster")
