"""trundle serve: the JSON-lines protocol, lockstep and real time, the example clients."""
from __future__ import annotations

import csv
import json
import math
import os
import pathlib
import queue
import re
import shutil
import socket
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

from sim.files.scenario import load_scenario
from sim.runs.runner import run_scenario
from sim.runs.serve import serve

ROOT = pathlib.Path(__file__).resolve().parents[1]
CART = ROOT / "scenarios" / "robots" / "ward-cart.yaml"
EXAMPLES = ROOT / "examples" / "clients"
TIMEOUT = 120


class Client:
    """A test client: one JSON object per line."""

    def __init__(self, address):
        host, _, port = address.rpartition(":")
        self.sock = socket.create_connection((host, int(port)), timeout=TIMEOUT)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.file = self.sock.makefile("rb")

    def read(self):
        line = self.file.readline()
        return json.loads(line) if line else None

    def raw(self, data: bytes):
        self.sock.sendall(data)
        return self.read()

    def send(self, msg):
        return self.raw((json.dumps(msg) + "\n").encode())

    def close(self):
        self.file.close()
        self.sock.close()


class ThreadServer:
    """``serve`` in a thread of this process (fast; lockstep tests)."""

    def __init__(self, scen, **kw):
        self.where = queue.Queue()
        self.result = None
        self.thread = threading.Thread(target=self._run, args=(scen,), kwargs=kw, daemon=True)
        self.thread.start()
        self.address = self.where.get(timeout=TIMEOUT).split()[-1]

    def _run(self, scen, **kw):
        self.result = serve(scen, announce=self.where.put, **kw)

    def join(self):
        self.thread.join(TIMEOUT)
        assert not self.thread.is_alive()
        return self.result


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    return env


class ProcessServer:
    """``trundle serve`` in its own process; the first stdout line says where it listens."""

    def __init__(self, args, cwd):
        self.proc = subprocess.Popen([sys.executable, "-m", "sim", "serve", *map(str, args)], cwd=cwd,
                                     env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        first = self.proc.stdout.readline()
        m = re.fullmatch(r"listening on (127\.0\.0\.1:\d+)\n", first)
        assert m, (first, self.proc.stderr.read() if self.proc.poll() is not None else "")
        self.address = m.group(1)

    def finish(self):
        try:
            out, err = self.proc.communicate(timeout=TIMEOUT)
        finally:
            if self.proc.poll() is None:
                self.proc.kill()
                self.proc.wait()
        return self.proc.returncode, out, err


def _scenario(tmp_path, body, name="s.yaml"):
    p = tmp_path / name
    p.write_text(f"robot: {CART}\nstep: 0.01\n" + body)
    return load_scenario(p)


def _last_row(path):
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    return rows


# ---- lockstep: the Python example against a scripted replay ---------------------------

def test_python_example_trace_equals_the_scripted_replay(tmp_path):
    served, log = tmp_path / "served.csv", tmp_path / "commands.csv"
    server = ProcessServer([EXAMPLES / "square.yaml", "--csv", served], ROOT)
    client = subprocess.run([sys.executable, EXAMPLES / "square.py", server.address, "--log", log],
                            capture_output=True, text=True, timeout=TIMEOUT)
    code, out, err = server.finish()
    assert client.returncode == 0, client.stdout + client.stderr
    assert code == 0, out + err
    assert "ended by bye" in out and "PASS      pose at t=" in out
    rows = _last_row(served)
    x, y = float(rows[-1]["x"]), float(rows[-1]["y"])
    assert math.hypot(x, y) < 0.02                                # back at the start
    assert max(float(r["x"]) for r in rows) == pytest.approx(2.0, abs=0.02)   # after a 2 m square
    assert max(float(r["y"]) for r in rows) == pytest.approx(2.0, abs=0.02)
    # the same commands at the same steps as a scripted scenario (a command log)
    end = rows[-1]["t"]
    replay = tmp_path / "replay.yaml"
    replay.write_text(f"robot: {CART}\nstep: 0.01\nduration: {end}\ncommands: commands.csv\n")
    run_scenario(load_scenario(replay), csv=str(tmp_path / "replay.csv"))
    assert (tmp_path / "replay.csv").read_bytes() == served.read_bytes()


# ---- the C example ----------------------------------------------------------------------

@pytest.mark.skipif(shutil.which("gcc") is None, reason="gcc is not installed")
def test_c_example_drives_the_square_on_its_own_odometry(tmp_path, cli):
    code, out, _ = cli(["analyze", CART, "--export", "c", "-o", tmp_path / "ward_cart.h"])
    assert code == 0, out
    # the header kept beside the example is the one trundle writes today
    assert (tmp_path / "ward_cart.h").read_text() == (EXAMPLES / "ward_cart.h").read_text()
    exe = tmp_path / "square"
    shutil.copy(EXAMPLES / "square.c", tmp_path / "square.c")
    cc = subprocess.run(["gcc", "-Wall", "-Wextra", "-Werror", "-std=c99", "-pedantic", "-O2", "-o", exe,
                         tmp_path / "square.c", "-lm"], capture_output=True, text=True, timeout=TIMEOUT)
    assert cc.returncode == 0, cc.stderr
    trace = tmp_path / "c.csv"
    server = ProcessServer([EXAMPLES / "square.yaml", "--csv", trace], ROOT)
    client = subprocess.run([exe, server.address], capture_output=True, text=True, timeout=TIMEOUT)
    code, out, err = server.finish()
    assert client.returncode == 0, client.stdout + client.stderr
    assert code == 0, out + err
    assert '"passed":true' in client.stdout
    rows = _last_row(trace)
    assert math.hypot(float(rows[-1]["x"]), float(rows[-1]["y"])) < 0.02
    assert max(float(r["x"]) for r in rows) == pytest.approx(2.0, abs=0.02)
    assert rows[-1]["cmd_vx"] == ""                              # it commanded wheels, not twists


# ---- real time and the watchdog ------------------------------------------------------------

def test_realtime_watchdog_stops_a_silent_client(tmp_path):
    scen = tmp_path / "rt.yaml"
    scen.write_text(f"robot: {CART}\nstep: 0.01\nduration: 30\n")
    trace = tmp_path / "rt.csv"
    server = ProcessServer([scen, "--realtime", "--watchdog", "0.1", "--csv", trace], tmp_path)
    c = Client(server.address)
    hello = c.read()
    assert hello["clock"] == "realtime" and hello["watchdog"] == 0.1
    reply = c.send({"twist": [0.5, 0, 0.2], "steps": 2})
    assert reply["t"] >= 0.02 and "error" not in reply
    time.sleep(0.5)                       # the client hangs; the base must not roll on
    bye = c.send({"bye": True})
    c.close()
    code, out, err = server.finish()
    assert code == 0, out + err
    assert bye["bye"] is True
    assert "WATCHDOG  no command for more than 0.1 s: base commanded to stop 1 time" in out
    rows = _last_row(trace)
    assert list(rows[0])[-2:] == ["cmd_latency", "watchdog"]
    cmd = [i for i, r in enumerate(rows) if r["cmd_latency"] != ""]
    trip = next(i for i, r in enumerate(rows) if r["watchdog"] == "1.0")
    assert len(cmd) == 1 and float(rows[cmd[0]]["cmd_latency"]) >= 0
    dt = 0.01
    assert 0 < (trip - cmd[0]) * dt <= 0.1 + dt + 1e-9              # within watchdog + one step
    assert all(r["cmd_vx"] == "0.0" and r["cmd_omega"] == "0.0" for r in rows[trip:])
    assert all(r["watchdog"] == "1.0" for r in rows[trip:])
    # the base ramps down within its wheels' acceleration limit (60 rad/s^2) and stops
    spins = [float(r["left.spin"]) for r in rows[trip - 1:]]
    assert all(abs(b - a) <= 60 * dt + 1e-9 for a, b in zip(spins, spins[1:]))
    assert float(rows[-1]["vx"]) == 0.0 and float(rows[trip]["vx"]) > 0


# ---- bad messages ---------------------------------------------------------------------------------

BAD = [
    (b"{nope\n", "malformed JSON"),
    (b"[1, 2]\n", "expected a JSON object"),
    (b'{"speed": 1}\n', "unknown key 'speed'; allowed: twist, wheels, steps, bye"),
    (b'{"wheels": {"lefty": 1}}\n', "no wheel named 'lefty'; wheels: left, right, castor_front, castor_rear"),
    (b'{"wheels": {"castor_front": 1}}\n', "not driven"),
    (b'{"wheels": {"left": {"steer": 0.2}}}\n', "not steered"),
    (b'{"twist": [NaN, 0, 0]}\n', "NaN is not a number"),
    (b'{"twist": [0, Infinity, 0]}\n', "Infinity is not a number"),
    (b'{"twist": [1e999, 0, 0]}\n', "finite"),
    (b'{"twist": [0, 0, 1e6]}\n', "beyond the allowed +/-100 rad/s"),
    (b'{"twist": [1' + b"0" * 5000 + b', 0, 0]}\n', "unreadable JSON"),
    (b'{"twist": [1, 2]}\n', "expected [vx, vy, omega]"),
    (b'{"twist": [1, 0, 0], "wheels": {"left": 1}}\n', "not both"),
    (b'{"twist": [0.1, 0, 0], "steps": 0}\n', "whole number >= 1"),
    (b'{"twist": [0.1, 0, 0], "steps": 2.5}\n', "whole number >= 1"),
    (b'{"steps": 1000}\n', "would pass the end of the run"),
    (b'{"bye": false}\n', "bye ends the run"),
    (b"\xff\xfe{}\n", "not UTF-8"),
    (b"{" + b" " * 70000 + b"}\n", "line longer than 65536 bytes"),
    (b"{}\n", "empty message"),
]


def _drive(address, bad=()):
    """A fixed lockstep session; ``bad`` lines are sent in the middle, each must be refused."""
    c = Client(address)
    hello = c.read()
    assert hello["hello"] == "trundle" and hello["protocol"] == 1 and hello["clock"] == "lockstep"
    assert hello["wheels"] == ["left", "right", "castor_front", "castor_rear"]
    assert hello["driven"] == ["left", "right"] and hello["encoders"] == {"left": 2048, "right": 2048}
    r1 = c.send({"twist": [0.4, 0, 0.5], "steps": 7})
    assert r1["t"] == 0.07
    for line, fragment in bad:
        reply = c.raw(line)
        assert set(reply) == {"error"} and fragment in reply["error"], (line[:40], reply)
    if bad:
        other = Client(address)                       # a second client while one is connected
        busy = other.read()
        assert "busy" in busy["error"] and "one client at a time" in busy["error"]
        other.close()
    r2 = c.send({"wheels": {"left": 3.0, "right": {"spin": 4.0}}, "steps": 5})
    assert r2["t"] == 0.12 and r2["counts"]["left"] > r1["counts"]["left"]   # time resumed where it was
    r3 = c.send({"steps": 3})
    assert r3["t"] == 0.15
    bye = c.send({"bye": True})
    c.close()
    return bye


def test_every_bad_message_gets_an_error_and_changes_nothing(tmp_path):
    scen = _scenario(tmp_path, "duration: 1\n")
    clean = ThreadServer(scen, csv=str(tmp_path / "clean.csv"))
    _drive(clean.address)
    clean.join()
    noisy = ThreadServer(scen, csv=str(tmp_path / "bad.csv"))
    bye = _drive(noisy.address, BAD)
    res, driver = noisy.join()
    assert bye == {"bye": True, "t": 0.15, "rows": 16, "passed": True, "checks": []}
    assert driver.errors == len(BAD) and driver.link.turned_away == 1
    assert (tmp_path / "bad.csv").read_bytes() == (tmp_path / "clean.csv").read_bytes()
    lines = driver.summary_lines()
    assert any(f"{len(BAD)} bad messages answered with an error" in s for s in lines)


def test_a_vanishing_client_ends_the_run_with_complete_files(tmp_path):
    scen = _scenario(tmp_path, "duration: 5\nchecks:\n  - at: end\n    pose: {y: 0}\n"
                               "    tolerance: {position: 0.001}\n")
    out = tmp_path / "v.csv"
    srv = ThreadServer(scen, csv=str(out))
    c = Client(srv.address)
    c.read()
    c.send({"twist": [0.3, 0, 0], "steps": 20})
    c.sock.sendall(b'{"twist": [0.3, 0, 0], "steps": 4}\n')
    c.sock.shutdown(socket.SHUT_RDWR)                  # gone without a word
    c.close()
    res, driver = srv.join()
    assert driver.ended_by == "disconnect"
    assert res.rows in (21, 25) and not res.interrupted and res.passed   # the end check took the last row
    rows = _last_row(out)
    assert len(rows) == res.rows and rows[-1]["t"] == str((res.rows - 1) / 100)
    meta = json.loads((tmp_path / "v.csv.meta.json").read_text())
    assert meta["complete"] is True and meta["rows"] == res.rows
    assert not (tmp_path / "v.csv.part").exists()


def test_lockstep_run_ends_at_the_duration(tmp_path):
    scen = _scenario(tmp_path, "duration: 0.05\nobserve_truth: true\n")
    srv = ThreadServer(scen)
    c = Client(srv.address)
    hello = c.read()
    assert hello["truth"] is True and hello["pose"] == [0.0, 0.0, 0.0]
    assert "steps 6 would pass the end" in c.send({"twist": [0.2, 0, 0], "steps": 6})["error"]
    last = c.send({"twist": [0.2, 0, 0], "steps": 5})
    assert last["t"] == 0.05 and last["end"] is True and last["pose"][0] > 0
    bye = c.read()                                     # the server finishes on its own
    assert bye["bye"] is True and bye["rows"] == 6
    assert c.read() is None                             # and closes
    c.close()
    res, driver = srv.join()
    assert driver.ended_by == "duration" and res.rows == 6


@pytest.mark.parametrize("args,where,fragment", [
    (["--listen", "localhost"], "--listen", "expected HOST:PORT"),
    (["--listen", "127.0.0.1:99999"], "--listen", "expected HOST:PORT"),
    (["--watchdog", "0.1"], "--watchdog", "applies to --realtime only"),
    (["--realtime", "--watchdog", "0"], "--watchdog", "> 0"),
    (["--csv", "no/such/dir/x.csv"], "--csv", "does not exist"),
])
def test_serve_option_errors(tmp_path, cli, expect_input_error, args, where, fragment):
    code, out, err = cli(["serve", EXAMPLES / "square.yaml", *args])
    expect_input_error(code, err, where, None, fragment)
    assert out == ""


# ---- the lean per-message path gives what the general one gives -------------------------------------

PLAIN = [   # (line, taken by the plain-twist reader)
    (b'{"twist": [0.3, 0.0, 0.2], "steps": 1}', True),
    (b'{"twist":[0.3,0,-0.5]}', True),
    (b' \t{ "twist" : [ -0 , -0.0 , -0e0 ] , "steps" : 12 } \r', True),   # json: int -0 is 0, float -0.0 stays
    (b'{"twist": [1E1, 2.5e-3, -100], "steps": 3}', True),
    (b'{"twist": [100, -100, 100.0]}', True),                           # on the bounds: allowed
    (b'{"twist": [5e-324, 0, -1e-400]}', True),
    (b'{"twist": [100.00000000001, 0, 0]}', False),                     # beyond: the general reader names it
    (b'{"twist": [1e999, 0, 0]}', False),
    (b'{"twist": [01, 0, 0]}', False),                                  # not JSON
    (b'{"twist": [.5, 0, 0]}', False),
    (b'{"twist": [0.5, 0, 0], "steps": 0}', False),
    (b'{"twist": [0.5, 0, 0], "steps": 2.0}', False),
    (b'{"steps": 2, "twist": [0.5, 0, 0]}', False),                     # other key order: general reader
    (b'{"twist": [0.5, 0, 0], "twist": [0.1, 0, 0]}', False),
    (b'{"tw\\u0069st": [0.5, 0, 0]}', False),
]


def _general(line, robot):
    from sim.runs.control import CommandError
    from sim.runs.serve import parse_json_message
    try:
        return parse_json_message(line, robot)
    except CommandError as exc:
        return str(exc)


@pytest.mark.parametrize("line,plain", PLAIN)
def test_plain_twist_lines_read_as_the_json_decoder_reads_them(line, plain):
    # reference: the standard library's JSON decoder (through the general reader)
    from sim.files.robotfile import load_robot
    from sim.runs.serve import plain_twist
    robot = load_robot(CART)
    got, want = plain_twist(line), _general(line, robot)
    assert (got is not None) == plain
    if plain:   # the same values to the bit, signed zeros included
        assert got == want
        assert [math.copysign(1, v) for v in got[1].value] == [math.copysign(1, v) for v in want[1].value]


def test_replies_are_the_json_encoders_bytes(tmp_path):
    # reference: json.dumps of the observation (compact separators) for every reply form
    from sim.engine.simulator import Simulator
    from sim.runs.control import Sensors
    from sim.runs.serve import Replies
    for truth in (False, True):
        scen = _scenario(tmp_path, f"duration: 1\nobserve_truth: {str(truth).lower()}\n")
        sim = Simulator(scen.robot, scen.step, scen.start)
        sensors = Sensors(scen, sim)
        replies = Replies(sensors)
        for k, twist in enumerate([(0.4, 0, 0.7), (0.1, 0, -1.3), (0, 0, 0.3)]):
            sim.command_twist(twist)
            sim.advance(7 * k + 1)
            obs = sensors.observe()
            for end, wd in ((False, False), (True, False), (False, True)):
                d = {"t": obs.t, "counts": obs.counts, "steer": obs.steer}
                if truth:
                    d["pose"] = list(obs.pose)
                if end:
                    d["end"] = True
                if wd:
                    d["watchdog"] = True
                want = (json.dumps(d, separators=(",", ":")) + "\n").encode()
                assert replies.observation(sim.k, end, wd) == want


def test_link_splits_lines_however_they_arrive():
    from sim.runs.serve import MAX_LINE, Link
    link = Link("127.0.0.1", 0)
    try:
        host, port = link.address.rsplit(":", 1)
        c = socket.create_connection((host, int(port)))
        link.accept_first()
        for part in (b'{"a"', b':1}\r\n\n  \n{"b":2}\n{"c"', b":3}\n" + b"x" * (MAX_LINE + 10), b"yy\n{\"d\":4}\n"):
            c.sendall(part)
            time.sleep(0.05)
        got = [link.next_line() for _ in range(5)]
        assert got == [b'{"a":1}', b'{"b":2}', b'{"c":3}', None, b'{"d":4}']   # None: answered "too long"
        c.close()
        assert link.next_line() is ...                                        # gone
    finally:
        link.close()


def test_exact_counts_as_plain_floats_are_numpys():
    from sim.files.robotfile import load_robot
    from sim.odometry.encoders import Odometer, OdometrySpec
    robot = load_robot(CART)
    odo = Odometer(OdometrySpec(wheels=("right", "left")), robot, 0.01)
    rng = np.random.default_rng(5)
    angles = [np.array([-0.0, 0.0, 1.0, 2.0]), np.array([1e9, -1e9, 0.0, 0.0]),
              np.array([2 * math.pi / 2048 * 7, -2 * math.pi / 2048 * 7, 0, 0])] + list(rng.normal(0, 50, (20, 4)))
    for a in angles:
        assert odo.reading_list(a) == odo.reading(a).tolist()
