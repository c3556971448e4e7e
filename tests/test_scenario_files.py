"""Tables of bad input: robot files (issue 2) and scenario files / command logs (issue 3).

Every case must give ``file:line: message`` on stderr, exit code 2, no traceback,
and (for runs) no CSV or partial CSV left behind.
"""
from __future__ import annotations

import pathlib

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

GOOD_WHEELS = """\
  - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}
  - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
"""

BOMB = "".join(
    f"{chr(ord('a') + i)}: &{chr(ord('a') + i)} [" + ",".join([f"*{chr(ord('a') + i - 1)}"] * 9 if i else ['"lol"'] * 9) + "]\n"
    for i in range(9)) + "wheels: *i\n"

# (id, robot file text, line, fragments of the message)
ROBOT_CASES = [
    ("malformed flow mapping", "name: x\nwheels:\n  - {name: a, type: fixed, x: 0, y: 0.2, radius: 0.1\n"
     "  - {name: b, type: fixed, x: 0, y: -0.2, radius: 0.1}\n", 4, ["malformed YAML"]),
    ("malformed indentation", "name: x\nwheels:\n  - name: a\n    type: fixed\n   x: 0\n", 5, ["malformed YAML"]),
    ("unclosed list at end", "name: x\nwheels:\n  - name: a\n    x: [0\n", 4, ["malformed YAML"]),
    ("tab", "name: x\n\twheels: 3\n", 2, ["malformed YAML"]),
    ("unknown key", "name: x\nwheels:\n" + GOOD_WHEELS + "  - {name: c, type: fixed, x: 0.5, y: 0, raduis: 0.1}\n",
     5, ["unknown key 'raduis'", "did you mean 'radius'"]),
    ("unknown top key", "nmae: x\nwheels:\n" + GOOD_WHEELS, 1, ["unknown key 'nmae'", "did you mean 'name'"]),
    ("unknown wheel type", "wheels:\n  - name: a\n    type: fixd\n    x: 0\n    y: 0\n    radius: 0.1\n",
     3, ["type", "did you mean 'fixed'"]),
    ("unknown wheel type castor", "wheels:\n  - {name: a, type: caster, x: 0, y: 0, radius: 0.1, trail: 0.02}\n",
     2, ["did you mean 'castor'"]),
    ("duplicate names", "wheels:\n" + GOOD_WHEELS + "  - {name: left, type: ball, x: 0.3, y: 0, radius: 0.02}\n",
     4, ["duplicate wheel name 'left'", "line 2"]),
    ("zero radius", "wheels:\n  - {name: a, type: fixed, x: 0, y: 0, radius: 0}\n", 2, ["radius", "> 0"]),
    ("negative radius", "wheels:\n  - name: a\n    type: fixed\n    x: 0\n    y: 0\n    radius: -0.1\n",
     6, ["radius", "> 0"]),
    ("zero trail", "wheels:\n" + GOOD_WHEELS + "  - {name: c, type: castor, x: 0.3, y: 0, radius: 0.04, trail: 0}\n",
     4, ["trail", "> 0"]),
    ("negative trail", "wheels:\n" + GOOD_WHEELS + "  - name: c\n    type: castor\n    x: 0.3\n    y: 0\n"
     "    radius: 0.04\n    trail: -0.03\n", 9, ["trail", "> 0"]),
    ("castor without trail", "wheels:\n  - {name: c, type: castor, x: 0.3, y: 0, radius: 0.04}\n", 2, ["trail"]),
    ("roller +90 deg", "wheels:\n  - {name: o, type: swedish, x: 0, y: 0, radius: 0.05, roller: 90 deg}\n",
     2, ["roller", "strictly between -90 and 90"]),
    ("roller -90 deg", "wheels:\n  - name: o\n    type: swedish\n    x: 0\n    y: 0\n    radius: 0.05\n"
     "    roller: -90 deg\n", 7, ["roller"]),
    ("roller pi/2 rad", "wheels:\n  - {name: o, type: swedish, x: 0, y: 0, radius: 0.05, roller: 1.5707963267948966}\n",
     2, ["roller"]),
    ("roller on a fixed wheel", "wheels:\n  - name: a\n    type: fixed\n    x: 0\n    y: 0\n    radius: 0.1\n"
     "    roller: 45 deg\n", 7, ["'roller' applies to swedish wheels only"]),
    ("nan x", "wheels:\n  - {name: a, type: fixed, x: .nan, y: 0, radius: 0.1}\n", 2, ["finite"]),
    ("inf radius", "wheels:\n  - name: a\n    type: fixed\n    x: 0\n    y: 0\n    radius: .inf\n", 6, ["finite"]),
    ("nan heading", "wheels:\n  - name: a\n    type: fixed\n    x: 0\n    y: 0\n    heading: .NaN\n    radius: 0.1\n",
     6, ["finite"]),
    ("inf deg heading", "wheels:\n  - {name: a, type: fixed, x: 0, y: 0, radius: 0.1, heading: 1e999 deg}\n",
     2, ["finite"]),
    ("-inf max_spin", "wheels:\n  - {name: a, type: fixed, x: 0, y: 0, radius: 0.1, max_spin: -.inf}\n", 2, ["finite"]),
    ("no wheels", "name: bare\nwheels: []\n", 2, ["at least one wheel"]),
    ("no wheels key", "name: bare\n", 1, ["missing required key 'wheels'"]),
    ("empty file", "", 1, ["empty robot description"]),
    ("a list, not a mapping", "- a\n- b\n", 1, ["expected a robot description"]),
    ("duplicate key", "wheels:\n  - name: a\n    type: fixed\n    x: 0\n    x: 1\n    y: 0\n    radius: 0.1\n",
     5, ["key 'x' appears twice"]),
    ("billion laughs", BOMB, 6, ["expands to more than"]),
    ("recursive alias", "a: &a [*a]\nwheels: *a\n", 1, ["expands to more than"]),
    ("steer limits reversed", "wheels:\n  - {name: s, type: steered, x: 0, y: 0, radius: 0.1, "
     "steer_limits: [30 deg, -30 deg]}\n", 2, ["low limit"]),
]


@pytest.mark.parametrize("text,line,fragments", [c[1:] for c in ROBOT_CASES], ids=[c[0] for c in ROBOT_CASES])
def test_bad_robot_file(text, line, fragments, tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    pathlib.Path("robot.yaml").write_text(text, encoding="utf-8")
    code, out, err = cli(["analyze", "robot.yaml"])
    expect_input_error(code, err, "robot.yaml", line, *fragments)
    assert out == ""


def test_bad_robot_bytes(tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    pathlib.Path("robot.yaml").write_bytes(b"name: x\nwheels:\n  - {name: \xff\xfe}\n")
    code, _, err = cli(["analyze", "robot.yaml"])
    expect_input_error(code, err, "robot.yaml", 3, "not UTF-8")


def test_missing_robot_file(tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    code, _, err = cli(["analyze", "nothere.yaml"])
    expect_input_error(code, err, "nothere.yaml", None, "not found")


@pytest.mark.parametrize("case", ["billion laughs", "malformed flow mapping", "unknown key"])
def test_bad_robot_in_a_real_process(case, tmp_path, run_module):
    # the installed entry point prints one line and exits 2, even for the alias bomb
    text, line, fragments = next(c[1:] for c in ROBOT_CASES if c[0] == case)
    (tmp_path / "robot.yaml").write_text(text, encoding="utf-8")
    p = run_module(["analyze", "robot.yaml"], cwd=tmp_path, timeout=30)
    assert p.returncode == 2
    assert "Traceback" not in p.stderr
    assert p.stderr.startswith(f"robot.yaml:{line}: ")
    assert len(p.stderr.strip().splitlines()) == 1


def test_merge_keys_fill_in_and_explicit_keys_win(robot_from_yaml):
    # YAML 1.1 merge key type (yaml.org/type/merge): explicit keys override merged ones, and
    # earlier mappings in a merge list override later ones.
    robot = robot_from_yaml("""
        wheels:
          - &d {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08, max_spin: 20}
          - {<<: *d, name: right, y: -0.22, radius: 0.1}
          - {<<: [{max_spin: 5}, *d], name: third, x: 0.5, y: 0.0}
    """)
    left, right, third = robot.wheels
    assert (right.type, right.x, right.y, right.radius, right.max_spin) == ("fixed", 0.0, -0.22, 0.1, 20.0)
    assert third.max_spin == 5.0 and third.radius == 0.08 and third.x == 0.5


# ---- scenarios --------------------------------------------------------------------------

CART = """\
name: cart
wheels:
  - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}
  - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
  - {name: castor_front, type: castor, x: 0.28, y: 0.0, radius: 0.04, trail: 0.03}
"""
HEAD = "robot: cart.yaml\nstep: 0.01\nduration: 1\n"

# (id, scenario text, extra files, file in the message, line, fragments)
SCENARIO_CASES = [
    ("unknown wheel in script", HEAD + "script:\n  - at: 0\n    wheels: {lft: 3}\n", {}, "s.yaml", 6,
     ["no wheel named 'lft'", "did you mean 'left'"]),
    ("at not increasing", HEAD + "script:\n  - {at: 0, stop: true}\n  - {at: 0.5, stop: true}\n"
     "  - {at: 0.4, stop: true}\n", {}, "s.yaml", 7, ["'at' must increase"]),
    ("at repeated", HEAD + "script:\n  - {at: 0.5, stop: true}\n  - {at: 0.5, stop: true}\n", {}, "s.yaml", 6,
     ["'at' must increase"]),
    ("negative at", HEAD + "script:\n  - {at: -1, stop: true}\n", {}, "s.yaml", 5, [">= 0"]),
    ("zero step", "robot: cart.yaml\nstep: 0\nduration: 1\nscript: []\n", {}, "s.yaml", 2, ["step", "> 0"]),
    ("negative step", "robot: cart.yaml\nstep: -0.01\nduration: 1\nscript: []\n", {}, "s.yaml", 2, ["> 0"]),
    ("too many steps", "robot: cart.yaml\nstep: 0.001\nduration: 1.0e7\nscript: []\n", {}, "s.yaml", 3,
     ["1e+10 steps", "at most"]),
    ("tiny step", "robot: cart.yaml\nstep: 1.0e-300\nduration: 1\nscript: []\n", {}, "s.yaml", 3, ["at most"]),
    ("not whole steps", "robot: cart.yaml\nstep: 0.03\nduration: 1\nscript: []\n", {}, "s.yaml", 3,
     ["whole number of steps"]),
    ("missing robot file", "robot: nothere.yaml\nstep: 0.01\nduration: 1\nscript: []\n", {}, "s.yaml", 1,
     ["robot file 'nothere.yaml' not found"]),
    ("bad robot inside", HEAD + "script: []\n", {"cart.yaml": CART.replace("radius: 0.08}", "radius: -1}", 1)},
     "cart.yaml", 3, ["radius"]),
    ("bad inline robot", "robot:\n  wheels:\n    - {name: a, type: fixed, x: 0, y: 0.2, radius: 0}\n"
     "step: 0.01\nduration: 1\nscript: []\n", {}, "s.yaml", 3, ["radius"]),
    ("step is text", "robot: cart.yaml\nstep: fast\nduration: 1\nscript: []\n", {}, "s.yaml", 2,
     ["expected a number", "'fast'"]),
    ("duration is a list", "robot: cart.yaml\nstep: 0.01\nduration: [1]\nscript: []\n", {}, "s.yaml", 3,
     ["expected a number"]),
    ("twist is a number", HEAD + "script:\n  - {at: 0, twist: 3}\n", {}, "s.yaml", 5, ["expected a twist"]),
    ("stop is text", HEAD + "script:\n  - {at: 0, stop: yes please}\n", {}, "s.yaml", 5, ["true or false"]),
    ("spin is text", HEAD + "script:\n  - at: 0\n    wheels: {left: fast}\n", {}, "s.yaml", 6,
     ["expected a number"]),
    ("script is a mapping", HEAD + "script: {at: 0}\n", {}, "s.yaml", 4, ["list"]),
    ("robot is a number", "robot: 3\nstep: 0.01\nduration: 1\nscript: []\n", {}, "s.yaml", 1,
     ["robot file path or an inline robot"]),
    ("nan step", "robot: cart.yaml\nstep: .nan\nduration: 1\nscript: []\n", {}, "s.yaml", 2, ["finite"]),
    ("inf duration", "robot: cart.yaml\nstep: 0.01\nduration: .inf\nscript: []\n", {}, "s.yaml", 3, ["finite"]),
    ("nan twist", HEAD + "script:\n  - at: 0\n    twist: {vx: .nan}\n", {}, "s.yaml", 6, ["finite"]),
    ("nan omega", HEAD + "script:\n  - at: 0\n    twist: {omega: .nan}\n", {}, "s.yaml", 6, ["finite"]),
    ("unknown top key", "robot: cart.yaml\nstpe: 0.01\nduration: 1\nscript: []\n", {}, "s.yaml", 2,
     ["unknown key 'stpe'", "did you mean 'step'"]),
    ("steer on a fixed wheel", HEAD + "script:\n  - at: 0\n    wheels: {left: {steer: 3 deg}}\n", {}, "s.yaml", 6,
     ["not steered"]),
    ("spin on a castor", HEAD + "script:\n  - at: 0\n    wheels: {castor_front: 3}\n", {}, "s.yaml", 6,
     ["not driven"]),
    ("check after the end", HEAD + "script: []\nchecks:\n  - {at: 2, slip_below: 0.1}\n", {}, "s.yaml", 6,
     ["after the end"]),
    ("no script", HEAD, {}, "s.yaml", 1, ["no script or commands", "--controller"]),
    ("control period not whole steps", HEAD + "control_period: 0.025\nscript: []\n", {}, "s.yaml", 4,
     ["not a whole number of steps"]),
    ("control period zero", HEAD + "control_period: 0\nscript: []\n", {}, "s.yaml", 4, ["> 0"]),
    ("observe_truth not a boolean", HEAD + "observe_truth: maybe\nscript: []\n", {}, "s.yaml", 4,
     ["true or false"]),
    ("unknown align", HEAD + "align: wiat\nscript: []\n", {}, "s.yaml", 4, ["did you mean 'wait'"]),
    # command logs
    ("log: first column not t", HEAD + "commands: log.csv\n", {"log.csv": "time,left.spin\n0,1\n"}, "log.csv", 1,
     ["first column must be 't'"]),
    ("log: unknown wheel column", HEAD + "commands: log.csv\n", {"log.csv": "t,lefft.spin\n0,1\n"}, "log.csv", 1,
     ["unknown column 'lefft.spin'", "did you mean 'left.spin'"]),
    ("log: not a number", HEAD + "commands: log.csv\n", {"log.csv": "t,left.spin,right.spin\n0,1,2\n0.5,x,2\n"},
     "log.csv", 3, ["expected a number", "'x'"]),
    ("log: t not increasing", HEAD + "commands: log.csv\n",
     {"log.csv": "t,left.spin,right.spin\n0,1,2\n0.5,1,2\n0.4,1,2\n"}, "log.csv", 4, ["increase"]),
    ("log: short row", HEAD + "commands: log.csv\n", {"log.csv": "t,left.spin,right.spin\n0,1,2\n0.5,1\n"},
     "log.csv", 3, ["expected 3 cells, got 2"]),
    ("log: nan cell", HEAD + "commands: log.csv\n", {"log.csv": "t,vx,omega\n0,1,2\n0.5,nan,2\n"}, "log.csv", 3,
     ["finite"]),
    ("log: inf cell", HEAD + "commands: log.csv\n", {"log.csv": "t,vx,omega\n0,1,2\n0.5,1,-inf\n"}, "log.csv", 3,
     ["finite"]),
    ("log: twist and wheel columns", HEAD + "commands: log.csv\n", {"log.csv": "t,vx,left.spin\n0,1,2\n"},
     "log.csv", 1, ["not both"]),
    ("log: castor spin column", HEAD + "commands: log.csv\n", {"log.csv": "t,castor_front.spin\n0,1\n"},
     "log.csv", 1, ["not driven"]),
    ("log: empty", HEAD + "commands: log.csv\n", {"log.csv": ""}, "log.csv", 1, ["empty command log"]),
    ("log: header only", HEAD + "commands: log.csv\n", {"log.csv": "t,vx\n"}, "log.csv", 2, ["no rows"]),
    ("log: unterminated quote", HEAD + "commands: log.csv\n", {"log.csv": 't,vx\n0,"1\n'}, "log.csv", 2,
     ["malformed CSV"]),
    ("log: not UTF-8", HEAD + "commands: log.csv\n", {"log.csv": b"t,vx\n0,1\n\xff\xfe\n"}, "log.csv", 3,
     ["not UTF-8"]),
    ("log: missing", HEAD + "commands: nolog.csv\n", {}, "s.yaml", 4, ["'nolog.csv' not found"]),
    ("log and script", HEAD + "commands: log.csv\nscript: []\n", {"log.csv": "t,vx\n0,1\n"}, "s.yaml", 1,
     ["either 'script' or 'commands'"]),
]


@pytest.mark.parametrize("text,extra,where,line,fragments", [c[1:] for c in SCENARIO_CASES],
                         ids=[c[0] for c in SCENARIO_CASES])
def test_bad_scenario(text, extra, where, line, fragments, tmp_path, run_bad_scenario, expect_input_error):
    code, err = run_bad_scenario(tmp_path, text, {"cart.yaml": CART, **extra})
    expect_input_error(code, err, where, line, *fragments)


def test_bad_scenario_in_a_real_process(tmp_path, run_module):
    (tmp_path / "cart.yaml").write_text(CART)
    (tmp_path / "s.yaml").write_text(HEAD + "script:\n  - at: 0\n    wheels: {lft: 3}\n")
    p = run_module(["run", "s.yaml", "--csv", "out.csv"], cwd=tmp_path, timeout=30)
    assert p.returncode == 2 and "Traceback" not in p.stderr
    assert p.stderr.startswith("s.yaml:6: ")
    assert not (tmp_path / "out.csv").exists() and not (tmp_path / "out.csv.part").exists()


def test_unwritable_csv_is_input_error(tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    pathlib.Path("cart.yaml").write_text(CART)
    pathlib.Path("s.yaml").write_text(HEAD + "script: []\n")
    code, _, err = cli(["run", "s.yaml", "--csv", "no/such/folder/out.csv"])
    expect_input_error(code, err, "no/such/folder/out.csv", None, "cannot write")


# ---- random input never shows a traceback ---------------------------------------------

_TOKENS = list("{}[]:,-&*!|>'\"#\n .0123456789abcdefnrstwxy_<") + [
    "wheels: ", "name: ", "type: ", "fixed", "castor", "steered", "swedish", "ball", "radius: ",
    "trail: ", "roller: ", " deg", ".nan", ".inf", "\n  - ", "{name: a, type: fixed, x: 0, y: 0.2, radius: 0.1}"]
YAMLISH = st.lists(st.sampled_from(_TOKENS), max_size=60).map("".join)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.one_of(st.binary(max_size=400), YAMLISH.map(lambda s: s.encode("utf-8"))))
def test_random_robot_files_exit_0_or_2(data, tmp_path, cli):
    p = tmp_path / "random.yaml"
    p.write_bytes(data)
    code, out, err = cli(["analyze", str(p)])  # an exception here would fail the test
    assert code in (0, 2)
    assert "Traceback" not in err
    if code == 2:
        assert err.startswith(f"{p}:") or err.startswith(f"{p}: ")
