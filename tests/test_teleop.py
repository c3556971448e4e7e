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
from sim.view.teleop import (LEVELS, TeleopConfig, TeleopState, body_twist, deadband, keep_held,  # noqa: E402
                             key_down, key_up, pad, release_all, request, stick_axes)

from conftest import ROBOTS, ROOT, SCENARIOS  # noqa: E402

CFG = TeleopConfig(max_speed=1.0, max_turn=1.5, deadband=0.15)


def hold(keys, state=None):
    state = state or TeleopState()
    for k in keys:
        state = key_down(state, k)
    return state


# -- pure mapping ---------------------------------------------------------------


def test_a_request_exists_only_while_a_key_is_held():
    assert list(request(TeleopState(), CFG)) == [0.0, 0.0, 0.0]
    s = hold(["f"])                                                   # level 2: 25 % of the caps
    assert list(request(s, CFG)) == [0.25, 0.0, 0.0] and s.source == "keys"
    s = hold(["f", "f", "f"])                                         # key repeat adds nothing
    assert list(request(s, CFG)) == [0.25, 0.0, 0.0]
    s = key_up(s, "f")
    assert list(request(s, CFG)) == [0.0, 0.0, 0.0] and s.source == "none"
    # combined keys: an arc; opposite keys cancel
    assert list(request(hold(["f", "d"]), CFG)) == [0.25, 0.0, 0.375]
    assert list(request(hold(["v", "g", "s"]), CFG)) == [-0.25, 0.25, -0.375]
    assert list(request(hold(["f", "v", "h"]), CFG)) == [0.0, -0.25, 0.0]
    # letting go of one key keeps the other
    assert list(request(key_up(hold(["f", "d"]), "d"), CFG)) == [0.25, 0.0, 0.0]
    assert hold(["x", "f12", "up"]) == TeleopState()                  # other keys: no change
    assert key_up(TeleopState(), "f") == TeleopState()
    assert hold(["escape"]).quit


def test_number_keys_pick_the_speed_level():
    assert LEVELS == {1: 0.10, 2: 0.25, 3: 0.50, 4: 0.75, 5: 1.00}
    for key, frac in (("1", 0.1), ("2", 0.25), ("3", 0.5), ("4", 0.75), ("5", 1.0), ("[3]", 0.5)):
        s = hold([key, "f", "d"])
        assert request(s, CFG) == pytest.approx([frac * 1.0, 0.0, frac * 1.5], abs=1e-15), key
    s = hold(["f", "5"])                                              # a level change applies at once
    assert list(request(s, CFG)) == [1.0, 0.0, 0.0]
    assert hold(["6", "0"]).level == 2                                # only 1..5


def test_frame_and_policy_keys():
    assert hold(["b"]).frame == "world" and hold(["b", "b"]).frame == "body"
    assert [hold(["p"] * n).align for n in range(4)] == ["wait", "cosine", "none", "wait"]


def test_lost_keyboard_lets_go():
    s = hold(["f", "d"])
    assert release_all(s).held == frozenset()
    assert keep_held(s, {"d", "x"}).held == {"d"}                     # "f" went up unseen
    assert keep_held(s, {"f", "d"}) is s


def test_caps_from_the_robot():
    rb = load_robot(ROBOTS / "ward-cart.yaml")
    cfg = TeleopConfig.for_robot(rb)
    assert cfg.max_speed == pytest.approx(25 * 0.08)                  # max_spin x radius
    assert cfg.max_turn == pytest.approx(cfg.max_speed / rb.size)
    assert cfg.enable_buttons == (4, 5)


def test_sticks_drive_only_while_enable_is_held():
    assert deadband(0.1, 0.15) == 0.0 and deadband(-0.15, 0.15) == 0.0
    assert deadband(1.0, 0.15) == 1.0 and deadband(-1.0, 0.15) == -1.0
    assert deadband(0.575, 0.15) == pytest.approx(0.5)                # (0.575 - 0.15) / 0.85
    assert stick_axes([0] * 6) == (1, 0, 3) and stick_axes([0] * 4) == (1, 0, 2)
    full = [0.0, -1.0, 0.0, 0.575, 0.0, 0.0]                          # forward full, turn half right
    off = [False] * 8
    on = [False] * 5 + [True, False, False]                          # button 5 held
    s = pad(TeleopState(), full, off, CFG)
    assert list(request(s, CFG)) == [0.0, 0.0, 0.0] and s.source == "none"      # no enable: nothing
    s = pad(s, full, on, CFG)
    assert s.source == "pad"
    assert request(s, CFG) == pytest.approx([0.25, 0.0, -0.5 * 0.25 * 1.5])     # level 2 scales the stick
    s = pad(s, full, off, CFG)                                        # enable let go: stop at once
    assert list(request(s, CFG)) == [0.0, 0.0, 0.0]
    s = pad(s, [0.0, 0.1, 0.0, 0.0, 0.0, 0.0], on, CFG)               # centred: nothing
    assert list(request(s, CFG)) == [0.0, 0.0, 0.0]
    # held keys take over from the pad
    s = key_down(pad(s, full, on, CFG), "v")
    assert list(request(s, CFG)) == [-0.25, 0.0, 0.0] and s.source == "keys"
    # other enable buttons, and a pad with fewer buttons
    cfg = TeleopConfig(enable_buttons=(0,))
    assert pad(TeleopState(), full, [True], cfg).enabled and not pad(TeleopState(), full, [], CFG).enabled


def test_world_frame_request_rotates_into_the_body():
    # a world vector seen from a body turned by theta is R(-theta) v (rotation matrices, common practice)
    s = hold(["5", "f", "d", "b"])
    cfg = TeleopConfig(max_speed=0.2, max_turn=0.1)
    assert body_twist(s, math.pi / 2, cfg) == pytest.approx([0.0, -0.2, 0.1], abs=1e-15)
    cfg = TeleopConfig(max_speed=1.0)
    assert body_twist(hold(["5", "f", "b"]), math.radians(30), cfg) == pytest.approx([math.sqrt(3) / 2, -0.5, 0.0])
    assert list(body_twist(hold(["5", "f", "s", "d"]), 1.0, TeleopConfig(0.2, 0.3))) == [0.2, 0.2, 0.3]


# -- a session in a hidden window -------------------------------------------------


def _post(kind, name):
    pg = _pg()
    code = pg.key.key_code(name)
    pg.event.post(pg.event.Event(kind, key=code, mod=0, unicode="", scancode=0))


def down(name):
    _post(_pg().KEYDOWN, name)


def up(name):
    _post(_pg().KEYUP, name)


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


def test_held_keys_drive_and_letting_go_ramps_to_a_stop(session_factory, tmp_path):
    rec = tmp_path / "drive.csv"
    s = session_factory("ward-cart", record=rec)
    cap = 25 * 0.08                                                    # m/s, max_spin x radius
    v, w = 0.25 * cap, 0.25 * cap / s.robot.size                      # level 2
    down("f")
    assert s.frame(100)                                                # 1 s forward, held
    down("d")
    assert s.frame(150)                                                # 1.5 s on an arc, both held
    down("s")
    assert s.frame(50)                                                 # sideways: a diff drive cannot
    notes = command_notes(s.robot, s.row)
    up("s")
    up("d")
    up("f")
    assert s.frame(100)                                                # nothing held: the base stops
    down("escape")
    assert not s.frame(1)
    files = s.close()
    assert {os.path.basename(f) for f in files} >= {"drive.csv", "drive.commands.csv", "drive.scenario.yaml"}
    assert not list(tmp_path.glob("*.part"))
    tr = read_csv(rec)
    t = tr["t"]
    assert len(t) == 400 and t[-1] == pytest.approx(3.99)
    np.testing.assert_array_equal(tr["cmd_vx"][:300], v)
    np.testing.assert_array_equal(tr["cmd_omega"][:100], 0.0)
    np.testing.assert_array_equal(tr["cmd_omega"][100:300], w)
    # straight segment once spun up: x grows by v dt per step (common practice)
    k1, k2 = 30, 99
    assert tr["vx"][k1] == pytest.approx(v, abs=1e-12)
    assert tr["x"][k2] - tr["x"][k1] == pytest.approx(v * (t[k2] - t[k1]), abs=1e-12)
    assert tr["y"][k2] == pytest.approx(0.0, abs=1e-12)
    # arc: constant (v, omega) moves a unicycle along a circle of radius v / omega (common practice)
    k1, k2 = 140, 249
    assert tr["vx"][k1] == pytest.approx(v, abs=1e-9) and tr["omega"][k1] == pytest.approx(w, abs=1e-9)
    th1, dt = tr["theta"][k1], t[k2] - t[k1]
    assert tr["x"][k2] == pytest.approx(tr["x"][k1] + v / w * (math.sin(th1 + w * dt) - math.sin(th1)), abs=1e-9)
    assert tr["y"][k2] == pytest.approx(tr["y"][k1] - v / w * (math.cos(th1 + w * dt) - math.cos(th1)), abs=1e-9)
    # the sideways request is recorded, not followed, and said so
    np.testing.assert_array_equal(tr["cmd_vy"][250:300], 0.25 * cap)
    assert np.nanmax(np.abs(tr["vy"])) < 1e-12
    assert any(f"cannot follow vy {0.25 * cap:.3f}" in n for n in notes)
    # let go at t = 3 s: the request is 0 and the wheels ramp down at max_spin_accel = 60 rad/s^2, i.e.
    # by 0.6 rad/s a step (constant deceleration, common practice), all together, until the base stands
    np.testing.assert_array_equal(tr["cmd_vx"][300:], 0.0)
    np.testing.assert_array_equal(tr["cmd_omega"][300:], 0.0)
    # (row 300 holds the state at t = 3 s, still at speed; the ramp runs over the steps from there)
    spin = np.abs(np.column_stack([tr["left.spin"], tr["right.spin"]]))
    np.testing.assert_array_equal(spin[300], spin[299])
    dec = -np.diff(spin[300:], axis=0)
    fast = int(np.argmax(spin[300]))
    n_ramp = math.ceil(spin[300, fast] / 0.6)
    np.testing.assert_allclose(dec[:n_ramp - 1, fast], 0.6, rtol=1e-9)
    assert np.all(spin[300 + n_ramp:] == 0.0) and n_ramp < 100
    assert tr["vx"][-1] == 0.0 and tr["omega"][-1] == 0.0
    # the replay scenario reproduces the recording byte for byte on the reference engine
    scen = load_scenario(tmp_path / "drive.scenario.yaml")
    run_scenario(scen, csv=tmp_path / "replay.csv")
    assert (tmp_path / "replay.csv").read_bytes() == rec.read_bytes()


def test_losing_the_keyboard_stops_the_base(session_factory):
    s = session_factory("ward-cart")
    down("f")
    assert s.frame(20) and s.row.cmd_twist[0] > 0
    pg = _pg()
    if not hasattr(pg, "WINDOWFOCUSLOST"):
        pytest.skip("pygame without window focus events")
    pg.event.post(pg.event.Event(pg.WINDOWFOCUSLOST, window=None))
    assert s.frame(1)
    assert list(s.row.cmd_twist) == [0.0, 0.0, 0.0] and s.state.held == frozenset()


def test_world_frame_strafe_on_a_mecanum_base(session_factory, tmp_path):
    s = session_factory("tote-mecanum", record=tmp_path / "m.csv")
    cap = 30 * 0.05
    down("b")
    down("1")                                                          # level 1: 10 %
    down("s")                                                          # world vy 0.15 m/s
    down("d")                                                          # while turning
    w = 0.1 * cap / s.robot.size
    assert s.frame(300)
    down("p")                                                          # policy change: noted in the replay
    assert s.frame(10)
    down("escape")
    assert not s.frame(1)
    s.close()
    tr = read_csv(tmp_path / "m.csv")
    k = np.arange(100, 299)
    vxw = np.diff(tr["x"])[k] / 0.01
    vyw = np.diff(tr["y"])[k] / 0.01
    # in the world frame the base keeps going straight up while it spins (within the
    # per-step rotation of the body twist, omega dt)
    assert np.max(np.abs(vyw - 0.1 * cap)) < 2e-3 and np.max(np.abs(vxw)) < 2e-3
    assert tr["theta"][299] == pytest.approx(tr["theta"][100] + w * 1.99, abs=1e-9)
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
                         capture_output=True, text=True, timeout=150)   # a first run may compile the engine
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
    part = tmp_path / "x.csv.part"

    def last_cells():
        if not part.exists():
            return []
        lines = part.read_text().splitlines()[1:]
        cells = lines[-1].split(",") if lines else []
        return cells if len(cells) > 10 and cells[10] else []

    try:
        _window_of(proc, xvfb)
        subprocess.run(["xdotool", "keydown", "f"], env=xvfb, timeout=10, check=True)
        # held: the request is level 2 (25 %) of the cap, 25 rad/s x 0.08 m
        _wait_for(lambda: (c := last_cells()) and float(c[10]) == 0.5, "the recorded command to reach 0.5 m/s")
        n = len(part.read_text().splitlines())
        _wait_for(lambda: len(part.read_text().splitlines()) > n + 100, "1 s more of driving")
        subprocess.run(["xdotool", "keyup", "f"], env=xvfb, timeout=10, check=True)
        # let go: the command drops to 0 and the base ramps to a stop (vx is column 4)
        _wait_for(lambda: (c := last_cells()) and float(c[10]) == 0.0 and float(c[4]) == 0.0,
                  "the base to stop after the key was let go")
        out, err = _escape(proc, xvfb)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, err
    assert rec.exists() and not part.exists()
    tr = read_csv(rec)
    held = np.flatnonzero(tr["cmd_vx"] == 0.5)
    assert len(held) > 100 and tr["x"][-1] > 0.4
    after = tr["cmd_vx"][held[-1] + 1:]
    assert len(after) and np.all(after == 0.0) and tr["vx"][-1] == 0.0
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
        _wait_for(lambda: "finished" in title(), "the run to finish", 120)
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
