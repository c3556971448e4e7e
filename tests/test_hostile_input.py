"""Tables of hostile input: values the YAML library cannot convert, tags, absurd sizes,
files that are not regular files, other files' contents in messages (issue 12).

Every case must give ``file:line: message`` on stderr, exit code 2, no traceback, a
message that quotes at most a few dozen characters of the offending value, and no
output file (not even a ``.part``).
"""
from __future__ import annotations

import contextlib
import os
import pathlib
import signal
from unittest import mock

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

CART = """\
name: cart
wheels:
  - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}
  - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
"""
HEAD = "robot: cart.yaml\nstep: 0.01\nduration: 1\n"
BIG = "9" * 5000         # more digits than Python converts to int (4300 by default)
WIDE = "9" * 4000        # an int, but too large for a float


def wheel(**kw) -> str:
    """A robot file whose first wheel has ``kw`` (YAML text values) instead of the defaults."""
    w = {"name": "a", "type": "fixed", "x": "0", "y": "0.2", "radius": "0.1"} | kw
    body = "".join(f"    {k}: {v}\n" for k, v in w.items())
    return "wheels:\n  - " + body[4:] + "  - {name: b, type: fixed, x: 0, y: -0.2, radius: 0.1}\n"


# (id, robot file text, line, fragments of the message)
ROBOT_CASES = [
    ("int of 5000 digits", wheel(x=BIG), 4, ["bad value '99999", "(5000 characters)", "too many digits"]),
    ("int too large for a float", wheel(x=WIDE), 4, ["wheels[0].x", "out of range", "-1e+06 and 1e+06 m",
                                                     "a whole number of 4000 digits"]),
    ("1.0.0", wheel(x="1.0.0"), 4, ["wheels[0].x", "expected a number (m)", "'1.0.0'"]),
    ("!!float abc", wheel(x="!!float abc"), 4, ["bad value 'abc'", "read as a number"]),
    ("!!int 1.5", wheel(radius="!!int 1.5"), 6, ["bad value '1.5'", "read as a whole number"]),
    ("!!bool maybe", wheel(driven="!!bool maybe"), 7, ["bad value 'maybe'", "true or false"]),
    ("python tag on a list", wheel(x="!!python/object/apply:os.system ['true']"), 4,
     ["tag '!!python/object/apply:os.system' is not allowed"]),
    ("python tag on a scalar", wheel(x="!!python/name:os.system ''"), 4,
     ["tag '!!python/name:os.system' is not allowed"]),
    ("python tag on a mapping", "wheels: !!python/object/new:dict {}\n", 1, ["'!!python/object/new:dict'"]),
    ("binary", wheel(name="!!binary aGk="), 2, ["tag '!!binary' is not allowed"]),
    ("timestamp", wheel(x="!!timestamp 2001-12-14"), 4, ["tag '!!timestamp' is not allowed"]),
    ("set", "wheels: !!set {a, b}\n", 1, ["tag '!!set' is not allowed"]),
    ("local tag", "wheels: !wheel [a]\n", 1, ["tag '!wheel' is not allowed"]),
    ("str tag on a list", "wheels: !!str [a]\n", 1, ["tag '!!str' is not allowed"]),
    ("mount position 1e11 m", wheel(x="1e11"), 4, ["wheels[0].x", "out of range: must lie between -1e+06 "
                                                   "and 1e+06 m, got 1e+11"]),
    ("radius 1e7 m", wheel(radius="1e7"), 6, ["out of range: must lie between 0 and 1e+06 m"]),
    ("max_spin 1e300", wheel(max_spin="1e300"), 7, ["max_spin", "1e+06 rad/s"]),
    ("heading 1e9 deg", wheel(heading="1e9 deg"), 7, ["heading", "out of range", "rad"]),
    ("footprint 1e7 m", "footprint: {length: 1.0e7, width: 1}\n" + wheel(), 1, ["footprint.length",
                                                                                 "out of range"]),
    ("encoder 10^20", wheel(encoder="100000000000000000000"), 7, ["encoder counts per revolution",
                                                                  "at most 2.81e+14"]),
    ("nested 100 deep", "wheels: " + "[" * 100 + "]" * 100 + "\n", 1, ["nested more than 64 levels"]),
    ("nested 30000 deep", "wheels: " + "[" * 30000 + "]" * 30000 + "\n", 1, ["nested more than"]),
    ("block nesting", "wheels:\n" + "".join(" " * (2 * i) + f"k{i}:\n" for i in range(80)), None,
     ["nested more than 64 levels"]),
    ("long name", wheel(name="x!" * 1500), 2, ["names use letters", "'x!x!x!", "...' (3000 characters)"]),
    ("long unknown key", wheel(**{"k" * 900: "1"}), 7, ["unknown key 'kkkk", "(900 characters)"]),
    ("long wheel type", wheel(type="fixd" * 700), 3, ["expected one of", "(2800 characters)"]),
]


def _short(err: str) -> None:
    """One line on stderr, of bounded length (values are quoted, never whole lines of a file)."""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err[:2000]
    assert len(lines[0]) < 400, lines[0][:2000]


@pytest.mark.parametrize("text,line,fragments", [c[1:] for c in ROBOT_CASES], ids=[c[0] for c in ROBOT_CASES])
def test_hostile_robot_file(text, line, fragments, tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    pathlib.Path("robot.yaml").write_text(text, encoding="utf-8")
    code, out, err = cli(["analyze", "robot.yaml"])
    if line is None:
        assert code == 2 and err.startswith("robot.yaml:"), err
    else:
        expect_input_error(code, err, "robot.yaml", line, *fragments)
    for frag in fragments:
        assert frag in err, (frag, err[:500])
    assert out == ""
    _short(err)


def test_dates_and_equals_signs_read_as_text(robot_from_yaml):
    # YAML 1.1 would make 2001-12-14 a date and '=' a "default value" marker; we read both as text
    robot = robot_from_yaml(wheel(name="2001-12-14"))
    assert robot.wheels[0].name == "2001-12-14"
    from sim.files.yamlread import load_text
    assert load_text("a: =\nb: 2001-12-14 10:00:00\n") == {"a": "=", "b": "2001-12-14 10:00:00"}


def test_numbers_at_the_limits_are_accepted(robot_from_yaml):
    robot = robot_from_yaml(wheel(x="1.0e6", y="-1.0e6", radius="1e-9", max_spin="1.0e6"))
    w = robot.wheels[0]
    assert (w.x, w.y, w.radius, w.max_spin) == (1e6, -1e6, 1e-9, 1e6)


def test_robot_file_size_limit(tmp_path, cli, expect_input_error):
    from sim.files.robotfile import MAX_BYTES
    p = tmp_path / "robot.yaml"
    pad = "#" * 79 + "\n"
    p.write_text(CART + pad * (MAX_BYTES // 80 + 1))
    code, out, err = cli(["analyze", str(p)])
    expect_input_error(code, err, str(p), None, "robot file is larger than 64 KiB")
    p.write_text(CART + pad * ((MAX_BYTES - len(CART)) // 80))  # just under: read
    assert cli(["analyze", str(p)])[0] == 0


@contextlib.contextmanager
def deadline(seconds=30):
    """Fail (instead of hanging the suite) if the block blocks, e.g. on a FIFO."""
    def ring(signum, frame):
        raise AssertionError(f"blocked for more than {seconds} s")
    old = signal.signal(signal.SIGALRM, ring)
    signal.alarm(seconds)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)


needs_fifo = pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="FIFOs (Unix)")


@needs_fifo
@pytest.mark.parametrize("command", [["analyze"], ["calibrate", "--measured"], ["run"]])
def test_fifo_given_as_input_is_refused_at_once(command, tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    pathlib.Path("cart.yaml").write_text(CART)
    os.mkfifo("pipe")
    argv = [command[0], "cart.yaml", command[1], "pipe"] if len(command) == 2 else [command[0], "pipe"]
    with deadline():
        code, _, err = cli(argv)
    expect_input_error(code, err, "pipe", None, "is a FIFO", "regular file")


def test_folder_given_as_input(tmp_path, cli, expect_input_error):
    code, _, err = cli(["analyze", str(tmp_path)])
    expect_input_error(code, err, str(tmp_path), None, "is a folder")


PASSWD = "".join(f"user{i}:x:{1000 + i}:{1000 + i}:Secret Person {i}:/home/user{i}:/bin/sh\n" for i in range(40))


# (id, scenario text, extra files, file in the message, line, fragments)
SCENARIO_CASES = [
    ("robot names another kind of file", "robot: passwd\nstep: 0.01\nduration: 1\nscript: []\n",
     {"passwd": PASSWD}, "passwd", 1, ["expected a robot description", "'user0:x:1000:1000:Secret Person 0:/home/...'",
                                      "characters)"]),
    ("step of 5000 digits", f"robot: cart.yaml\nstep: {BIG}\nduration: 1\nscript: []\n", {}, "s.yaml", 2,
     ["bad value", "too many digits"]),
    ("duration beyond the time limit", "robot: cart.yaml\nstep: 0.01\nduration: 1.0e12\nscript: []\n", {},
     "s.yaml", 3, ["duration", "out of range", "1e+09 s"]),
    ("start 1e11 m", HEAD + "start: {x: 1.0e11}\nscript: []\n", {}, "s.yaml", 4, ["start.x", "out of range"]),
    ("twist 1e7 m/s", HEAD + "script:\n  - at: 0\n    twist: {vx: 1.0e7}\n", {}, "s.yaml", 6,
     ["vx", "out of range", "1e+06 m/s"]),
    ("spin 4000 digits", HEAD + f"script:\n  - at: 0\n    wheels: {{left: {WIDE}}}\n", {}, "s.yaml", 6,
     ["out of range", "rad/s"]),
    ("tag on the checks", HEAD + "script: []\nchecks: !!python/object/new:list []\n", {}, "s.yaml", 5,
     ["tag '!!python/object/new:list' is not allowed"]),
    ("float tag on text", HEAD + "script:\n  - {at: !!float soon, stop: true}\n", {}, "s.yaml", 5,
     ["bad value 'soon'"]),
    ("log: spin 1e7", HEAD + "commands: log.csv\n", {"log.csv": "t,left.spin\n0,1\n0.5,1e7\n"}, "log.csv", 3,
     ["column 'left.spin'", "out of range", "1e+06 rad/s"]),
    ("log: 400 nines", HEAD + "commands: log.csv\n", {"log.csv": "t,vx\n0,1\n0.5," + "9" * 400 + "\n"},
     "log.csv", 3, ["finite", "(400 characters)"]),
    ("log: long line", HEAD + "commands: log.csv\n", {"log.csv": "t,vx\n0," + "1" * 70000 + "\n"}, "log.csv", 2,
     ["longer than 64 KiB"]),
    ("log: long text cell", HEAD + "commands: log.csv\n", {"log.csv": "t,vx\n0,1\n0.5,x" + "y" * 5000 + "\n"},
     "log.csv", 3, ["expected a number", "(5001 characters)"]),
    ("log: duplicate column", HEAD + "commands: log.csv\n", {"log.csv": "t,vx,vx\n0,1,2\n"}, "log.csv", 1,
     ["column 'vx' appears twice"]),
    ("log: t beyond the run", HEAD + "commands: log.csv\n", {"log.csv": "t,vx\n0,1\n0.5,1\n2,1\n"}, "log.csv", 4,
     ["t=2 s comes after the end of the run (1 s)"]),
    ("log: t in a later block", HEAD.replace("duration: 1", "duration: 100") + "commands: log.csv\n",
     {"log.csv": "t,vx\n" + "".join(f"{i * 0.01:.2f},1\n" for i in range(9000)) + "89,1\n"}, "log.csv", 9002,
     ["'t' must start at >= 0 and increase, got 89 after 89.99"]),
    ("log: bad byte late", HEAD.replace("duration: 1", "duration: 100") + "commands: log.csv\n",
     {"log.csv": ("t,vx\n" + "".join(f"{i * 0.01:.2f},1\n" for i in range(9000))).encode() + b"90,\xff\n"},
     "log.csv", 9002, ["not UTF-8"]),
]


@pytest.mark.parametrize("text,extra,where,line,fragments", [c[1:] for c in SCENARIO_CASES],
                         ids=[c[0] for c in SCENARIO_CASES])
def test_hostile_scenario(text, extra, where, line, fragments, tmp_path, run_bad_scenario, expect_input_error):
    code, err = run_bad_scenario(tmp_path, text, {"cart.yaml": CART, **extra})
    expect_input_error(code, err, where, line, *fragments)
    _short(err)


def test_system_file_as_robot_is_not_echoed(tmp_path, cli):
    # a scenario pointing at a system file: the message names it and quotes a few dozen characters at most
    target = "/etc/passwd" if os.path.isfile("/etc/passwd") else None
    if target is None:
        pytest.skip("no /etc/passwd")
    (tmp_path / "s.yaml").write_text(f"robot: {target}\nstep: 0.01\nduration: 1\nscript: []\n")
    code, out, err = cli(["run", str(tmp_path / "s.yaml")])
    assert code == 2 and err.startswith(target + ":")
    _short(err)
    lines = pathlib.Path(target).read_text(errors="replace").splitlines()
    assert not any(len(ln) > 45 and ln in err for ln in lines)
    assert len(err) < 300


@needs_fifo
@pytest.mark.parametrize("key", ["robot", "commands"])
def test_fifo_named_in_a_scenario_is_an_input_error_at_once(key, tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    pathlib.Path("cart.yaml").write_text(CART)
    os.mkfifo("pipe")
    text = (HEAD + "commands: pipe\n") if key == "commands" else "robot: pipe\nstep: 0.01\nduration: 1\nscript: []\n"
    pathlib.Path("s.yaml").write_text(text)
    with deadline():
        code, _, err = cli(["run", "s.yaml"])
    expect_input_error(code, err, "s.yaml", 4 if key == "commands" else 1, "'pipe' is not a regular file")


def test_scenario_file_size_limit(tmp_path, cli, expect_input_error):
    from sim.files.scenario import MAX_BYTES
    (tmp_path / "cart.yaml").write_text(CART)
    p = tmp_path / "s.yaml"
    p.write_text(HEAD + "script: []\n" + ("#" * 99 + "\n") * (MAX_BYTES // 100 + 1))
    code, _, err = cli(["run", str(p)])
    expect_input_error(code, err, str(p), None, "scenario file is larger than 256 KiB")


def test_command_log_is_kept_as_arrays(tmp_path, scenario_from_yaml):
    """The log's numbers are kept in arrays (8 bytes a cell, no object per row); entries come out
    as the same Commands a script would give, with their lines."""
    log = "t,left.spin,right.spin\n0,1,2\n\n0.5,3,-4.25\n"
    scen = scenario_from_yaml(tmp_path, HEAD + "commands: log.csv\n", extra={"cart.yaml": CART, "log.csv": log})
    script = scen.script
    assert script.values.dtype == float and script.values.shape == (2, 2) and script.lines.tolist() == [2, 4]
    assert len(script) == 2
    c = script[1]
    assert (c.at, c.kind, c.value, c.line) == (0.5, "wheels", {"left": {"spin": 3.0}, "right": {"spin": -4.25}}, 4)
    assert [x.at for x in script] == [0.0, 0.5] and script[-1] == c and script[:1] == [script[0]]


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(st.tuples(st.floats(-5, 5), st.floats(-5, 5), st.sampled_from(["", "q", "blank", "crlf"])),
                     min_size=1, max_size=40),
       chunk=st.integers(8, 200))
def test_command_log_blocks_do_not_change_what_is_read(rows, chunk, tmp_path):
    """Read in blocks of a few bytes (lines cut anywhere, quoted cells and blank lines sent the
    slow way) or in one piece, a log gives the same numbers and line numbers."""
    from sim.files import reading
    from sim.files.commandlog import read_command_log
    from sim.files.robotfile import robot_from_data
    from sim.files.yamlread import load_text
    robot = robot_from_data(load_text(CART))
    text = "t,left.spin,right.spin\n"
    for k, (a, b, how) in enumerate(rows):
        cell = f'"{a!r}"' if how == "q" else repr(a)
        text += ("\n" if how == "blank" else "") + f"{k * 0.5},{cell},{b!r}" + ("\r\n" if how == "crlf" else "\n")
    p = tmp_path / "log.csv"
    p.write_text(text, newline="")
    whole = read_command_log(p, "log.csv", robot)
    with mock.patch.object(reading, "CHUNK", chunk):
        pieces = read_command_log(p, "log.csv", robot)
    assert pieces == whole and pieces.lines.tolist() == whole.lines.tolist()
    assert whole.values.tolist() == [[a, b] for a, b, _ in rows]
    blanks = [0] + [how == "blank" for _, _, how in rows]
    assert whole.lines.tolist() == [2 + k + sum(blanks[1:k + 2]) for k in range(len(rows))]


# -- calibration files -----------------------------------------------------------------------

CALIB_CASES = [
    ("non-UTF-8 header", "runs.csv", b"direction,x,\xffy\ncw,0,0\n", 1, ["not UTF-8"]),
    ("non-UTF-8 cell", "runs.csv", b"direction,x,y\ncw,0,0\nccw,\xe9,0\n", 3, ["not UTF-8"]),
    ("cell 1e7 m", "runs.csv", b"direction,x,y\ncw,0,1e7\n", 2, ["column 'y'", "out of range", "1e+06 m"]),
    ("long direction", "runs.csv", b"direction,x,y\n" + b"w" * 3000 + b",0,0\n", 2,
     ["direction must be cw or ccw", "(3000 characters)"]),
    ("yaml float tag", "runs.yaml", b"cw: [[!!float abc, 0]]\nccw: []\n", 1, ["bad value 'abc'"]),
    ("yaml 1e11", "runs.yaml", b"cw: [[1.0e11, 0]]\nccw: []\n", 1, ["cw[0][0]", "out of range"]),
    ("yaml 5000 digits", "runs.yaml", b"side: " + BIG.encode() + b"\ncw: []\nccw: []\n", 1, ["too many digits"]),
]


@pytest.mark.parametrize("name,data,line,fragments", [c[1:] for c in CALIB_CASES], ids=[c[0] for c in CALIB_CASES])
def test_hostile_calibration_file(name, data, line, fragments, tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    pathlib.Path("cart.yaml").write_text(CART)
    pathlib.Path(name).write_bytes(data)
    code, out, err = cli(["calibrate", "cart.yaml", "--measured", name, "-o", "fixed.yaml"])
    expect_input_error(code, err, name, line, *fragments)
    _short(err)
    assert sorted(os.listdir(tmp_path)) == sorted(["cart.yaml", name])


FIT_CASES = [
    ("non-UTF-8 header", b"t,x,y,th\xffeta,left.spin,right.spin\n", 1, ["not UTF-8"]),
    ("counts of 400 digits", b"t,x,y,theta,left.counts,right.counts\n0,0,0,0,0,0\n0.1,0,0,0," + b"9" * 400 + b",0\n",
     3, ["column 'left.counts'", "finite"]),
    ("theta 1e9 rad", b"t,x,y,theta,left.spin,right.spin\n0,0,0,1e9,0,0\n", 2, ["column 'theta'", "out of range"]),
]


@pytest.mark.parametrize("data,line,fragments", [c[1:] for c in FIT_CASES], ids=[c[0] for c in FIT_CASES])
def test_hostile_recorded_run(data, line, fragments, tmp_path, monkeypatch, cli, expect_input_error):
    monkeypatch.chdir(tmp_path)
    pathlib.Path("cart.yaml").write_text(CART.replace("radius: 0.08}", "radius: 0.08, encoder: 2048}"))
    pathlib.Path("run.csv").write_bytes(data)
    code, out, err = cli(["calibrate", "cart.yaml", "--fit", "run.csv", "-o", "fixed.yaml"])
    expect_input_error(code, err, "run.csv", line, *fragments)
    _short(err)
    assert sorted(os.listdir(tmp_path)) == ["cart.yaml", "run.csv"]
