"""Hand driving: the pure key/stick mapping, a hidden-window session with posted
key events and its recording, and the real window under Xvfb.
"""
from __future__ import annotations

import csv
import math
import os
import select
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

os.environ["SDL_VIDEODRIVER"] = "dummy"
os.environ.setdefault("SDL_AUDIODRIVER", "dummy")

from sim import load_robot  # noqa: E402
from sim.view.render import _pg, command_notes  # noqa: E402
from sim.runs.runner import run_scenario  # noqa: E402
from sim.files.scenario import load_scenario  # noqa: E402
from sim.view.teleop import (TeleopConfig, TeleopState, body_twist, deadband, press,  # noqa: E402
                        stick_axes, sticks)

from conftest import ROBOTS, ROOT, SCENARIOS  # noqa: E402

CFG = TeleopConfig(speed_step=0.05, turn_step=0.1, max_speed=1.0, max_turn=1.5, deadband=0.15)


def presses(keys, state=None, cfg=CFG):
    state = state or TeleopState()
    for k in keys:
        state = press(state, k, cfg)
    return state


# -- pure mapping ---------------------------------------------------------------


def test_keys_raise_and_lower_the_request():
    s = presses(["up"] * 4 + ["w"])
    assert (s.vx, s.vy, s.omega) == (0.25, 0.0, 0.0)
    assert presses(["up"] * 7 + ["down"] * 5 + ["s"] * 2).vx == 0.0   # exactly back to zero
    s = presses(["left", "left", "a", "right", "q", "q", "e", "q"])
    assert (s.omega, s.vy) == (0.2, 0.1)
    assert presses(["d"] * 3).omega == -0.3
    assert presses(["up"] * 100).vx == CFG.max_speed                # capped
    assert presses(["right"] * 100).omega == -CFG.max_turn
    s = presses(["up", "left", "q", "space"])
    assert (s.vx, s.vy, s.omega) == (0.0, 0.0, 0.0)
    assert presses(["x", "f1"]) == TeleopState()                     # unknown keys: no change
    assert presses(["escape"]).quit


def test_frame_and_policy_keys():
    assert presses(["b"]).frame == "world" and presses(["b", "b"]).frame == "body"
    assert [presses(["p"] * n).align for n in range(4)] == ["wait", "cosine", "none", "wait"]


def test_caps_from_the_robot():
    rb = load_robot(ROBOTS / "ward-cart.yaml")
    cfg = TeleopConfig.for_robot(rb)
    assert cfg.max_speed == pytest.approx(25 * 0.08)                  # max_spin x radius
    assert cfg.max_turn == pytest.approx(cfg.max_speed / rb.size)


def test_deadband_and_sticks():
    assert deadband(0.1, 0.15) == 0.0 and deadband(-0.15, 0.15) == 0.0
    assert deadband(1.0, 0.15) == 1.0 and deadband(-1.0, 0.15) == -1.0
    assert deadband(0.575, 0.15) == pytest.approx(0.5)               # (0.575 - 0.15) / 0.85
    assert deadband(-0.575, 0.15) == pytest.approx(-0.5)
    assert stick_axes([0] * 6) == (1, 0, 3) and stick_axes([0] * 4) == (1, 0, 2)
    s = sticks(TeleopState(vx=0.3), [0.05, -0.1, 0.0, 0.0, 0.0, 0.0], CFG)
    assert s.vx == 0.3 and s.source == "keys"                         # sticks at rest leave keys alone
    s = sticks(s, [0.0, -1.0, 0.0, 0.575, 0.0, 0.0], CFG)             # forward full, turn half right
    assert (s.vx, s.vy, s.source) == (CFG.max_speed, 0.0, "stick")
    assert s.omega == pytest.approx(-0.5 * CFG.max_turn)
    s = sticks(s, [0.0, 0.1, 0.0, 0.0, 0.0, 0.0], CFG)               # released: back to rest
    assert (s.vx, s.vy, s.omega) == (0.0, 0.0, 0.0)
    s = press(s, "up", CFG)
    assert s.source == "keys" and sticks(s, [0.0] * 6, CFG).vx == 0.05


def test_world_frame_request_rotates_into_the_body():
    # a world vector seen from a body turned by theta is R(-theta) v (rotation matrices, common practice)
    s = TeleopState(vx=0.2, vy=0.0, omega=0.1, frame="world")
    assert body_twist(s, math.pi / 2) == pytest.approx([0.0, -0.2, 0.1], abs=1e-15)
    s = TeleopState(vx=1.0, vy=0.0, omega=0.0, frame="world")
    assert body_twist(s, math.radians(30)) == pytest.approx([math.sqrt(3) / 2, -0.5, 0.0])
    b = TeleopState(vx=0.2, vy=0.1, omega=0.3)
    assert list(body_twist(b, 1.0)) == [0.2, 0.1, 0.3]


# -- a session in a hidden window -------------------------------------------------


def key(name):
    pg = _pg()
    code = pg.key.key_code(name)
    pg.event.post(pg.event.Event(pg.KEYDOWN, key=code, mod=0, unicode="", scancode=0))


def read_csv(path):
    with open(path, newline="") as fh:
        rows = list(csv.reader(fh))
    head = rows[0]
    arr = np.array([[float(c) if c else np.nan for c in r] for r in rows[1:]])
    return {c: arr[:, i] for i, c in enumerate(head)}


@pytest.fixture
def session_factory(tmp_path):
    from sim.view.drive import DriveSession

    made = []

    def make(name, **kw):
        rb = load_robot(ROBOTS / f"{name}.yaml")
        s = DriveSession(rb, ROBOTS / f"{name}.yaml", hidden=True, joystick=False, **kw)
        made.append(s)
        return s

    yield make
    for s in made:
        s.abort()


def test_keys_drive_the_recorded_trace(session_factory, tmp_path):
    rec = tmp_path / "drive.csv"
    s = session_factory("ward-cart", record=rec)
    for _ in range(4):
        key("up")
    assert s.frame(100)                                                # 1 s at 0.2 m/s
    for _ in range(3):
        key("left")
    assert s.frame(150)                                                # 1.5 s on an arc
    key("q")
    assert s.frame(50)                                                 # sideways: a diff drive cannot
    notes = command_notes(s.robot, s.row)
    key("space")
    assert s.frame(100)
    key("escape")
    assert not s.frame(1)
    files = s.close()
    assert {os.path.basename(f) for f in files} >= {"drive.csv", "drive.commands.csv", "drive.scenario.yaml"}
    assert not list(tmp_path.glob("*.part"))
    tr = read_csv(rec)
    t = tr["t"]
    assert len(t) == 400 and t[-1] == pytest.approx(3.99)
    np.testing.assert_array_equal(tr["cmd_vx"][:300], 0.2)
    np.testing.assert_array_equal(tr["cmd_omega"][100:250], 0.3)
    # straight segment once spun up: x grows by v dt per step (common practice)
    k1, k2 = 30, 99
    assert tr["vx"][k1] == pytest.approx(0.2, abs=1e-12)
    assert tr["x"][k2] - tr["x"][k1] == pytest.approx(0.2 * (t[k2] - t[k1]), abs=1e-12)
    assert tr["y"][k2] == pytest.approx(0.0, abs=1e-12)
    # arc: constant (v, omega) moves a unicycle along a circle of radius v / omega (common practice)
    k1, k2 = 140, 249
    v, w = 0.2, 0.3
    assert tr["vx"][k1] == pytest.approx(v, abs=1e-9) and tr["omega"][k1] == pytest.approx(w, abs=1e-9)
    th1, dt = tr["theta"][k1], t[k2] - t[k1]
    assert tr["x"][k2] == pytest.approx(tr["x"][k1] + v / w * (math.sin(th1 + w * dt) - math.sin(th1)), abs=1e-9)
    assert tr["y"][k2] == pytest.approx(tr["y"][k1] - v / w * (math.cos(th1 + w * dt) - math.cos(th1)), abs=1e-9)
    # the sideways request is recorded, not followed, and said so
    np.testing.assert_array_equal(tr["cmd_vy"][250:300], 0.05)
    assert np.nanmax(np.abs(tr["vy"])) < 1e-12
    assert any("cannot follow vy 0.050" in n for n in notes)
    # space: the base comes to rest
    assert tr["vx"][-1] == 0.0 and tr["omega"][-1] == 0.0
    # the replay scenario reproduces the recording byte for byte on the reference engine
    scen = load_scenario(tmp_path / "drive.scenario.yaml")
    run_scenario(scen, csv=tmp_path / "replay.csv")
    assert (tmp_path / "replay.csv").read_bytes() == rec.read_bytes()


def test_world_frame_strafe_on_a_mecanum_base(session_factory, tmp_path):
    s = session_factory("tote-mecanum", record=tmp_path / "m.csv")
    key("b")
    for _ in range(4):
        key("q")                                                       # world vy 0.2 m/s
    for _ in range(5):
        key("left")                                                    # while turning at 0.5 rad/s
    assert s.frame(300)
    key("p")                                                           # policy change: noted in the replay
    assert s.frame(10)
    key("escape")
    assert not s.frame(1)
    s.close()
    tr = read_csv(tmp_path / "m.csv")
    k = np.arange(100, 299)
    vxw = np.diff(tr["x"])[k] / 0.01
    vyw = np.diff(tr["y"])[k] / 0.01
    # in the world frame the base keeps going straight up while it spins (within the
    # per-step rotation of the body twist, omega dt = 0.005 rad)
    assert np.max(np.abs(vyw - 0.2)) < 2e-3 and np.max(np.abs(vxw)) < 2e-3
    assert tr["theta"][299] == pytest.approx(tr["theta"][100] + 0.5 * 1.99, abs=1e-9)
    text = (tmp_path / "m.scenario.yaml").read_text()
    assert "policy changed to 'cosine'" in text and "align: wait" in text


# -- the real window under Xvfb ----------------------------------------------------


@pytest.fixture(scope="module")
def xvfb():
    if not (shutil.which("Xvfb") and shutil.which("xdotool")):
        pytest.skip("Xvfb / xdotool not installed")
    r, w = os.pipe()
    proc = subprocess.Popen(["Xvfb", "-displayfd", str(w), "-screen", "0", "1280x800x24", "-nolisten", "tcp"],
                            pass_fds=(w,), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    os.close(w)
    ready, _, _ = select.select([r], [], [], 20)
    num = os.read(r, 64).decode().strip() if ready else ""
    if not num:                       # (the pipe stays open while Xvfb runs: it may write again)
        proc.kill()
        pytest.fail("Xvfb did not start")
    env = dict(os.environ, DISPLAY=f":{num}", SDL_VIDEODRIVER="x11", PYTHONPATH=str(ROOT))
    _wait_for(lambda: subprocess.run(["xdotool", "getmouselocation"], env=env, capture_output=True,
                                     timeout=10).returncode == 0, "the X server to accept clients", 10)
    yield env
    proc.send_signal(signal.SIGTERM)
    proc.wait(timeout=10)
    os.close(r)


def _window_of(proc, env):
    out = subprocess.run(["xdotool", "search", "--sync", "--pid", str(proc.pid)], env=env,
                         capture_output=True, text=True, timeout=30)
    if not out.stdout.split():
        proc.kill()
        pytest.fail(f"no window on {env.get('DISPLAY')}: {out.stderr} / {proc.communicate()}")
    wid = out.stdout.split()[0]
    subprocess.run(["xdotool", "windowfocus", "--sync", wid], env=env, timeout=10, check=True)
    return wid


def _keys(env, *names):
    subprocess.run(["xdotool", "key", "--delay", "40", *names], env=env, timeout=10, check=True)


def _escape(proc, env):
    """Press Escape (once more if an X event went astray) and collect the output."""
    for _ in range(2):
        _keys(env, "Escape")
        try:
            return proc.communicate(timeout=15)
        except subprocess.TimeoutExpired:
            pass
    proc.kill()
    out, err = proc.communicate()
    pytest.fail(f"the program did not quit on Escape: {err}")


def _wait_for(pred, what, timeout=30):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return
        time.sleep(0.05)
    pytest.fail(f"timed out waiting for {what}")


def test_drive_in_a_real_window(xvfb, tmp_path):
    rec = tmp_path / "x.csv"
    proc = subprocess.Popen([sys.executable, "-m", "sim", "drive", ROBOTS / "ward-cart.yaml", "--record", rec],
                            cwd=ROOT, env=xvfb, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        _window_of(proc, xvfb)
        _keys(xvfb, "Up", "Up", "Up")
        part = tmp_path / "x.csv.part"

        def moving():
            if not part.exists():
                return False
            lines = part.read_text().splitlines()[1:]
            cells = lines[-1].split(",") if lines else []
            return len(lines) > 50 and len(cells) > 10 and cells[10] and float(cells[10]) == 0.15
        _wait_for(moving, "the recorded command to reach 0.15 m/s")
        _wait_for(lambda: len(part.read_text().splitlines()) > 250, "2 s more of driving")
        out, err = _escape(proc, xvfb)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, err
    assert rec.exists() and not part.exists()
    tr = read_csv(rec)
    assert tr["cmd_vx"][-1] == pytest.approx(0.15) and tr["x"][-1] > 0.1
    assert (tmp_path / "x.scenario.yaml").exists()


def test_run_window_matches_the_headless_picture(xvfb, tmp_path, cli):
    scen = SCENARIOS / "ward-cart-castor-settle.yaml"
    proc = subprocess.Popen([sys.executable, "-m", "sim", "run", scen, "--window", "--png", tmp_path / "w.png",
                             "--csv", tmp_path / "w.csv"], cwd=ROOT, env=xvfb,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        wid = _window_of(proc, xvfb)
        _keys(xvfb, "bracketright", "bracketright", "bracketright")  # x8

        def title():
            return subprocess.run(["xdotool", "getwindowname", wid], env=xvfb, capture_output=True,
                                  text=True, timeout=10).stdout
        _wait_for(lambda: "finished" in title(), "the run to finish")
        assert "x8" in title()
        out, err = _escape(proc, xvfb)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, err
    code, _, err = cli(["run", scen, "--png", tmp_path / "h.png"])
    assert code == 0, err
    assert (tmp_path / "w.png").read_bytes() == (tmp_path / "h.png").read_bytes()
    ref = run_scenario(load_scenario(scen), csv=tmp_path / "ref.csv")
    assert ref.rows == 601
    assert (tmp_path / "w.csv").read_bytes() == (tmp_path / "ref.csv").read_bytes()
