"""The renderer, headless: pixels where the geometry says, and the picture commands.

Frames are drawn off-screen (SDL dummy driver, no display) and read back as
arrays; checks compare pixel colours at places computed here from the
world-to-screen transform written out by hand and from published kinematics.
"""
from __future__ import annotations

import math
import os
import subprocess
import sys

import numpy as np
import pytest

os.environ["SDL_VIDEODRIVER"] = "dummy"
os.environ.setdefault("SDL_AUDIODRIVER", "dummy")

from sim import Simulator, load_robot  # noqa: E402
from sim.view import render  # noqa: E402
from sim.view.render import PALETTE, PANEL_W, Renderer, View, to_array  # noqa: E402

from conftest import ROBOTS, ROOT, SCENARIOS  # noqa: E402

W, H = 1120, 720
R_WHEEL, TRACK = 0.08, 0.44            # ward-cart: wheel radius and track (m)


def robot(name):
    return load_robot(ROBOTS / f"{name}.yaml")


def hand_pixel(x, y, center, scale):
    """World (x, y) m -> pixel, written out: the view fills x >= PANEL_W, world y points up."""
    u0, v0 = PANEL_W + (W - PANEL_W) / 2, H / 2
    return u0 + scale * (x - center[0]), v0 - scale * (y - center[1])


def colour_near(img, u, v, colour, r=1):
    """Whether ``colour`` appears within ``r`` px of pixel (u, v)."""
    u, v = int(round(u)), int(round(v))
    patch = img[max(v - r, 0):v + r + 1, max(u - r, 0):u + r + 1]
    return bool(np.any(np.all(patch == np.array(colour, np.uint8), axis=-1)))


def drawn(rd, row):
    return to_array(rd.draw(row))


def run_steps(sim, n, **cmd):
    row = None
    for _ in range(n):
        row = sim.step(**cmd)
        cmd = {}
    return row


def test_view_transform_by_hand():
    v = View((PANEL_W, 0, W - PANEL_W, H), center=(1.0, 2.0), scale=100.0)
    assert v.to_screen(1.0, 2.0) == pytest.approx((720.0, 360.0))
    assert v.to_screen(2.0, 3.0) == pytest.approx((820.0, 260.0))       # +x right, +y up
    assert v.to_world(820.0, 260.0) == pytest.approx((2.0, 3.0))
    keep = v.to_world(500.0, 100.0)
    v.zoom(2.5, (500.0, 100.0))                                          # zoom about a pixel keeps it
    assert v.scale == 250.0 and v.to_screen(*keep) == pytest.approx((500.0, 100.0))
    v.pan(30.0, -40.0)
    assert v.to_screen(*keep) == pytest.approx((530.0, 60.0))


def test_robot_centre_lands_where_the_transform_says():
    rb = robot("ward-cart")
    sim = Simulator(rb, 0.01, start=(1.0, -0.5, 0.3))
    row = sim.step()
    rd = Renderer(rb, (W, H))
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=(0.0, 0.0), scale=100.0)
    img = drawn(rd, row)
    u, v = hand_pixel(1.0, -0.5, (0.0, 0.0), 100.0)
    assert (u, v) == (820.0, 410.0)
    assert tuple(img[410, 820]) == PALETTE["ink"]                       # the centre dot
    assert tuple(img[410, 820 + 3]) == PALETTE["ink"]
    # the same state drawn with the base moved by 0.5 m moves the dot by 50 px
    row2 = Simulator(rb, 0.01, start=(1.5, -0.5, 0.3)).step()
    img2 = drawn(rd, row2)
    assert tuple(img2[410, 870]) == PALETTE["ink"] and tuple(img2[410, 820]) != PALETTE["ink"]


def test_icr_marker_of_a_diff_drive_turn_at_its_computed_pixel():
    rb = robot("ward-cart")
    wl, wr = 4.0, 5.0
    sim = Simulator(rb, 0.01, start=(0.3, 0.2, 0.4))
    row = run_steps(sim, 40, wheels={"left": wl, "right": wr})        # spin-up over by t = 0.09 s
    # differential drive (common practice): v = r (wR + wL) / 2, omega = r (wR - wL) / b, and the
    # ICR lies on the axle at b (wR + wL) / (2 (wR - wL)) from its centre, on the slower wheel's side
    v, w = R_WHEEL * (wr + wl) / 2, R_WHEEL * (wr - wl) / TRACK
    assert row.twist == pytest.approx([v, 0.0, w], abs=1e-12)
    d = TRACK * (wr + wl) / (2 * (wr - wl))
    assert d == pytest.approx(1.98)
    x, y, th = row.pose
    icr = (x - d * math.sin(th), y + d * math.cos(th))
    assert row.icr == pytest.approx(icr, abs=1e-9)
    center, scale = ((x + icr[0]) / 2, (y + icr[1]) / 2), 150.0
    rd = Renderer(rb, (W, H))
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=center, scale=scale)
    img = drawn(rd, row)
    u, vv = hand_pixel(*icr, center, scale)
    assert rd.icr_pixel(row) == pytest.approx((u, vv), abs=1e-9)
    iu, iv = int(round(u)), int(round(vv))
    assert tuple(img[iv, iu]) == PALETTE["icr"]                        # centre dot
    assert tuple(img[iv - 10, iu]) == PALETTE["icr"]                   # ring (radius 12, 4 px)
    assert tuple(img[iv - 6, iu]) == PALETTE["panel"]                  # white between dot and ring
    # the axle line runs through the ICR: sample it beyond the marker on both sides
    e = np.array([-math.sin(th), -math.cos(th)])                        # axle direction on screen
    hits = [colour_near(img, iu + e[0] * s, iv + e[1] * s, PALETTE["axle"]) for s in
            list(range(-140, -20, 10)) + list(range(20, 140, 10))]
    assert sum(hits) >= 0.9 * len(hits)


def test_axle_lines_of_a_car_like_base_meet_at_the_icr_pixel():
    rb = robot("greenhouse-rover")
    R, v = 2.0, 0.6
    sim = Simulator(rb, 0.01, start=(0.0, 0.0, 0.0))
    row = run_steps(sim, 150, twist=(v, 0.0, v / R))
    # Ackermann geometry (common practice): wheel at (x, y) steers to atan(x / (R - y))
    i_fl, i_fr = rb.index["front_left"], rb.index["front_right"]
    assert row.steer[i_fl] == pytest.approx(math.atan(0.8 / (R - 0.3)), abs=1e-9)
    assert row.steer[i_fr] == pytest.approx(math.atan(0.8 / (R + 0.3)), abs=1e-9)
    x, y, th = row.pose
    icr = (x - R * math.sin(th), y + R * math.cos(th))                  # body (0, R)
    center, scale = (x - 0.5, y + 1.0), 110.0
    rd = Renderer(rb, (W, H))
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=center, scale=scale)
    img = drawn(rd, row)
    iu, iv = hand_pixel(*icr, center, scale)
    assert tuple(img[int(round(iv)), int(round(iu))]) == PALETTE["icr"]
    c, s = math.cos(th), math.sin(th)

    def share(wheel, through, turn=0.0):
        wx = x + c * wheel.x - s * wheel.y
        wy = y + s * wheel.x + c * wheel.y
        p = np.array(hand_pixel(wx, wy, center, scale))
        q = np.array(through)
        d = q - p
        if turn:
            d = np.array([[math.cos(turn), -math.sin(turn)], [math.sin(turn), math.cos(turn)]]) @ d
        n = np.hypot(*d)
        pts = [p + d * f for f in np.linspace(0, 1.6, 60)
               if np.hypot(*(d * f)) > 22 and np.hypot(*(p + d * f - q)) > 22 and rd.view.inside(*(p + d * f), 2)]
        assert len(pts) > 20 and n > 50
        return np.mean([colour_near(img, *pt, PALETTE["axle"]) for pt in pts])

    for wheel in rb.wheels:                                               # every line through wheel and ICR
        assert share(wheel, (iu, iv)) >= 0.9, wheel.name
    # and the test can fail: a line 6 deg off does not follow any drawn axle
    assert share(rb.wheel("front_left"), (iu, iv), math.radians(6)) < 0.4


def test_icr_off_the_view_is_an_edge_arrow():
    rb = robot("ward-cart")
    wl, wr = 4.9, 5.0
    row = run_steps(Simulator(rb, 0.01), 40, wheels={"left": wl, "right": wr})
    d = TRACK * (wr + wl) / (2 * (wr - wl))                              # 21.78 m to the left (common practice)
    assert row.icr == pytest.approx((row.pose[0] - d * math.sin(row.pose[2]),
                                     row.pose[1] + d * math.cos(row.pose[2])), abs=1e-9)
    rd = Renderer(rb, (W, H))
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=(row.pose[0], row.pose[1]), scale=150.0)
    img = drawn(rd, row)
    icr_px = np.all(img == np.array(PALETTE["icr"], np.uint8), axis=-1)
    vs, us = np.nonzero(icr_px[:, PANEL_W:])
    # straight up (world +y, heading ~0.014 rad): the arrow sits near the top edge, centred
    u0 = PANEL_W + (W - PANEL_W) / 2
    assert len(vs) > 50
    assert vs.max() < 60 and abs(np.median(us) + PANEL_W - u0) < 12


def test_pure_translation_is_drawn_as_such():
    rb = robot("tote-mecanum")
    row = run_steps(Simulator(rb, 0.01), 60, twist=(0.0, 0.5, 0.0))
    assert not np.any(np.isfinite(row.icr)) and row.twist[1] == pytest.approx(0.5)
    rd = Renderer(rb, (W, H))
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=(row.pose[0], row.pose[1]), scale=150.0)
    img = drawn(rd, row)
    vs, us = np.nonzero(np.all(img[:, PANEL_W:] == np.array(PALETTE["icr"], np.uint8), axis=-1))
    v0 = H / 2
    assert len(vs) > 50
    assert vs.max() < v0 and vs.min() > v0 - 220                        # a marker just ahead (screen up), no ring


def test_skidding_wheels_coloured_and_arrowed_by_their_skid_velocity():
    rb = robot("field-rover")
    cmd = {"left_front": 3.0, "left_middle": 3.0, "left_rear": 3.0,
           "right_front": 6.0, "right_middle": 6.0, "right_rear": 6.0}
    row = run_steps(Simulator(rb, 0.01), 30, wheels=cmd)
    center, scale = (row.pose[0], row.pose[1]), 200.0
    rd = Renderer(rb, (W, H))
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=center, scale=scale)
    img = drawn(rd, row)
    th = row.pose[2]
    c, s = math.cos(th), math.sin(th)
    i = rb.index["left_front"]
    w = rb.wheels[i]
    # README "Traces": slip_long along the rolling direction, slip_lat along the axle (heading + 90 deg)
    sl, st = row.slip_long[i], row.slip_lat[i]
    h = row.steer[i]
    vb = np.array([sl * math.cos(h) - st * math.sin(h), sl * math.sin(h) + st * math.cos(h)])
    speed = float(np.hypot(*vb))
    assert speed > 0.05
    p0 = np.array(hand_pixel(row.pose[0] + c * w.x - s * w.y, row.pose[1] + s * w.x + c * w.y, center, scale))
    d = np.array([c * vb[0] - s * vb[1], -(s * vb[0] + c * vb[1])]) / speed
    length = min(speed * render.ARROW_SCALE, render.ARROW_MAX)
    for f in (0.35, 0.6, 0.85):
        assert colour_near(img, *(p0 + d * length * f), PALETTE["skid"]), f
    assert not colour_near(img, *(p0 + d * (length + 14)), PALETTE["skid"])
    # the wheel body: fully orange at this skid speed (>= SLIP_FULL), on the tyre ends
    ends = [p0 + np.array([math.cos(th + h), -math.sin(th + h)]) * 0.8 * w.radius * scale * k for k in (1, -1)]
    assert any(colour_near(img, *e, PALETTE["wheel_slip"], 0) for e in ends)
    # a wheel that rolls cleanly stays navy (ward cart, consistent spins)
    rb2 = robot("ward-cart")
    row2 = run_steps(Simulator(rb2, 0.01), 30, wheels={"left": 4.0, "right": 4.0})
    assert row2.slip == 0.0
    rd2 = Renderer(rb2, (W, H))
    rd2.view = View((PANEL_W, 0, W - PANEL_W, H), center=(row2.pose[0], row2.pose[1]), scale=200.0)
    img2 = drawn(rd2, row2)
    lw = rb2.wheel("left")
    pu, pv = hand_pixel(row2.pose[0] + 0.6 * lw.radius, row2.pose[1] + lw.y, (row2.pose[0], row2.pose[1]), 200.0)
    assert tuple(img2[int(round(pv)), int(round(pu))]) == PALETTE["wheel_clean"]


def test_frame_not_blank_and_deterministic(tmp_path):
    rb = robot("quad-steer")
    sim = Simulator(rb, 0.01)
    rd = Renderer(rb, (W, H), "test", step=0.01)
    row = None
    for _ in range(120):
        row = sim.step(twist=(0.3, 0.2, 0.4))
        rd.observe(row)
    rd.fit()
    a = drawn(rd, row)
    assert a.shape == (H, W, 3)
    assert len(np.unique(a.reshape(-1, 3), axis=0)) > 30                # many colours, text anti-aliased
    panel_ink = np.all(a[:, :PANEL_W] == np.array(PALETTE["ink"], np.uint8), axis=-1).sum()
    assert panel_ink > 500                                             # the side panel has text
    assert np.array_equal(a, drawn(rd, row))
    render.save_png(rd.draw(row), tmp_path / "a.png")
    render.save_png(rd.draw(row), tmp_path / "b.png")
    assert (tmp_path / "a.png").read_bytes() == (tmp_path / "b.png").read_bytes()
    assert not list(tmp_path.glob("*.part"))
    back = to_array(render._pg().image.load(str(tmp_path / "a.png")))
    assert np.array_equal(back, a)


def test_window_shows_the_same_pixels_as_the_headless_frame():
    rb = robot("pallet-tug")
    sim = Simulator(rb, 0.01)
    rd = Renderer(rb, (W, H), "same")
    row = None
    for _ in range(200):
        row = sim.step(twist=(0.4, 0.0, 0.4))
        rd.observe(row)
    rd.fit()
    headless = drawn(rd, row)
    win = render.Window((W, H), "test", hidden=True, joystick=False)
    try:
        win.show(rd.draw(row))
        assert np.array_equal(win.pixels(), headless)
    finally:
        win.close()


def test_run_png_and_frames(cli, tmp_path):
    png = tmp_path / "arc.png"
    code, out, err = cli(["run", SCENARIOS / "ward-cart-arc.yaml", "--png", png])
    assert code == 0, err
    img = to_array(render._pg().image.load(str(png)))
    assert img.shape == (H, W, 3)
    frames = tmp_path / "frames"
    code, out, err = cli(["run", SCENARIOS / "ward-cart-castor-settle.yaml", "--frames", frames, "--fps", "2"])
    assert code == 0, err
    names = sorted(p.name for p in frames.iterdir())
    assert names == [f"frame-{i:06d}.png" for i in range(7)]             # t = 0, 0.5, ..., 3 s
    first = to_array(render._pg().image.load(str(frames / names[0])))
    last = to_array(render._pg().image.load(str(frames / names[-1])))
    assert not np.array_equal(first, last)
    # the last frame is the final state: the same picture as --png of the same run
    code, _, err = cli(["run", SCENARIOS / "ward-cart-castor-settle.yaml", "--png", tmp_path / "end.png"])
    assert code == 0, err
    assert np.array_equal(to_array(render._pg().image.load(str(tmp_path / "end.png"))), last)


def test_picture_options_bad_input(cli, expect_input_error, tmp_path):
    code, out, err = cli(["run", SCENARIOS / "ward-cart-arc.yaml", "--png", tmp_path / "nope" / "a.png"])
    expect_input_error(code, err, "--png", None, "does not exist")
    code, out, err = cli(["run", SCENARIOS / "ward-cart-arc.yaml", "--frames", tmp_path / "f", "--fps", "0"])
    expect_input_error(code, err, "--fps", None, "> 0")
    (tmp_path / "file").write_text("x")
    code, out, err = cli(["run", SCENARIOS / "ward-cart-arc.yaml", "--frames", tmp_path / "file"])
    expect_input_error(code, err, "--frames", None, "not a directory")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file"]


def test_cli_import_loads_neither_pygame_nor_matplotlib():
    code = ("import sys, sim.cli.app; sim.cli.app._parser(); "
            "print('pygame' in sys.modules, 'matplotlib' in sys.modules)")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True,
                         timeout=60)
    assert out.stdout.strip() == "False False", out.stderr


def test_path_shows_under_the_base_up_to_the_body_origin():
    # field rover driving straight: all six wheels at one spin roll without slip (common practice:
    # v = r * omega_wheel for a fixed wheel rolling along x), so the path is a straight line along x
    rb = robot("field-rover")
    sim = Simulator(rb, 0.01)
    spins = {w.name: 3.0 for w in rb.wheels}
    rd = Renderer(rb, (W, H))
    row, cmd = None, {"wheels": spins}
    for _ in range(150):
        row = sim.step(**cmd)
        cmd = {}
        rd.observe(row)
    assert row.slip == pytest.approx(0.0, abs=1e-12) and row.pose[1] == pytest.approx(0.0, abs=1e-12)
    center, scale = (row.pose[0], 0.0), 200.0
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=center, scale=scale)
    img = drawn(rd, row)
    # 0.1 m and 0.3 m behind the body origin: inside the 1.0 m footprint, clear of the wheels (y = +-0.33)
    for back in (0.1, 0.3):
        u, v = hand_pixel(row.pose[0] - back, 0.0, center, scale)
        assert tuple(img[int(round(v)), int(round(u))]) == PALETTE["path"], back
    # beside the path, still inside the footprint, the fill shows
    u, v = hand_pixel(row.pose[0] - 0.3, 0.15, center, scale)
    assert tuple(img[int(round(v)), int(round(u))]) == PALETTE["body_fill"]


def test_ball_wheels_are_grey_discs_unlike_the_origin_dot():
    rb = robot("pallet-tug")
    row = Simulator(rb, 0.01, start=(0.0, 0.0, 0.0)).step()
    center, scale = (0.0, 0.0), 170.0                      # a ball (radius 25 mm) is ~4 px: drawn larger
    rd = Renderer(rb, (W, H))
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=center, scale=scale)
    img = drawn(rd, row)
    u0, v0 = (int(round(c)) for c in hand_pixel(0.0, 0.0, center, scale))
    assert tuple(img[v0, u0]) == PALETTE["ink"]                          # the body origin: black dot
    for name in ("ball_left", "ball_right"):
        b = rb.wheel(name)
        u, v = (int(round(c)) for c in hand_pixel(b.x, b.y, center, scale))
        assert tuple(img[v, u]) == PALETTE["ball"], name                 # grey centre, not black
        assert tuple(img[v, u + render.BALL_MIN_PX - 3]) == PALETTE["ball"]
        r = render.BALL_MIN_PX
        assert all(colour_near(img, u + du, v + dv, PALETTE["ink"]) for du, dv in ((r, 0), (-r, 0), (0, r), (0, -r)))


def test_png_at_a_time_is_that_frame(cli, tmp_path):
    scen = SCENARIOS / "field-rover-skid-turn.yaml"
    code, out, err = cli(["run", scen, "--png", tmp_path / "at.png", "--at", "2.5"])
    assert code == 0, err
    assert "picture   " + str(tmp_path / "at.png") + " (at t = 2.5 s)" in out
    code, _, err = cli(["run", scen, "--frames", tmp_path / "f", "--fps", "2"])
    assert code == 0, err
    load = lambda p: to_array(render._pg().image.load(str(p)))
    at = load(tmp_path / "at.png")
    # the same state, trail and view as the frame written at t = 2.5 s
    assert np.array_equal(at, load(tmp_path / "f" / "frame-000005.png"))
    # mid-turn every wheel but the middle pair skids: vermillion arrows; at the end the base is at rest
    code, _, err = cli(["run", scen, "--png", tmp_path / "end.png"])
    assert code == 0, err
    skid = lambda img: int(np.all(img[:, PANEL_W:] == np.array(PALETTE["skid"], np.uint8), axis=-1).sum())
    assert skid(at) > 300 and skid(load(tmp_path / "end.png")) < 50


def test_at_needs_png_and_a_time_within_the_run(cli, expect_input_error, tmp_path):
    scen = SCENARIOS / "field-rover-skid-turn.yaml"
    code, _, err = cli(["run", scen, "--at", "2"])
    expect_input_error(code, err, "--at", None, "needs --png")
    for bad in ("-1", "6.5", "nan"):
        code, _, err = cli(["run", scen, "--png", tmp_path / "a.png", "--at", bad])
        expect_input_error(code, err, "--at", None, "from 0 to the end of the run (6 s)")
    code, _, err = cli(["run", scen, "--png", tmp_path / "a.jpg"])    # PNG bytes under another name: refused
    expect_input_error(code, err, "--png", None, "ending in .png")
    assert list(tmp_path.iterdir()) == []


def _text_pixels(text, colour, background, size):
    """What ``text`` looks like drawn with the renderer's font on ``background`` (pygame's own rendering)."""
    pg = render._pg()
    if not pg.font.get_init():
        pg.font.init()
    img = pg.font.Font(None, size).render(text, True, colour)
    surf = pg.Surface(img.get_size(), 0, 32)
    surf.fill(background)
    surf.blit(img, (0, 0))
    return to_array(surf)


def _patch(img, rect):
    return img[rect.top:rect.bottom, rect.left:rect.right]


def test_window_shows_state_speed_and_checks_in_the_picture():
    from sim.view.playback import _Player

    rb = robot("ward-cart")
    row = run_steps(Simulator(rb, 0.01), 50, wheels={"left": 4.0, "right": 5.0})
    rd = Renderer(rb, (W, H), "state")
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=(row.pose[0], row.pose[1]), scale=150.0)
    win = render.Window((W, H), "test", hidden=True, joystick=False)
    try:
        player = _Player(rd, win, None, 30.0, 0.01, None)
        player.speed = 8.0
        checks = [(True, "slip below 0.001 m/s: peak 0 m/s at t=0 s"),
                  (False, "pose at t=10 s: position off 0.0308 m, allowed 0.01")]
        player._show(row, "finished", checks)
        img = win.pixels()
        drawn_texts = [(t, r, c, b, s) for t, r, c, b, s in rd.texts if not t.endswith(" m")]
        words = [t for t, *_ in drawn_texts]
        assert words == ["finished", "speed x8", "PASS", checks[0][1], "FAIL", checks[1][1]]
        for text, rect, colour, background, size in drawn_texts:
            # read back from the window: exactly pygame's rendering of that text, inside the view
            assert rd.view.inside(rect.left, rect.top) and rd.view.inside(rect.right, rect.bottom)
            assert np.array_equal(_patch(img, rect), _text_pixels(text, colour, background, size)), text
        colour_of = {t: c for t, _, c, _, _ in drawn_texts}
        assert colour_of["PASS"] == PALETTE["body_edge"] and colour_of["FAIL"] == PALETTE["skid"]
        # while playing, paused: the state and speed only
        player.speed = 0.25
        player._show(row)
        assert [t for t, *_ in rd.texts if not t.endswith(" m")] == ["playing", "speed x0.25"]
        player.paused = True
        player._show(row)
        assert [t for t, *_ in rd.texts if not t.endswith(" m")] == ["paused", "speed x0.25"]
        assert "paused" in render._pg().display.get_caption()[0]
    finally:
        win.close()
    # PNGs carry no status box: the same pixels as a window frame of the same state without one
    assert not [t for t, *_ in (rd.draw(row) and rd.texts) if not t.endswith(" m")]


def test_grid_labels_whole_signed_and_clear_of_lines_and_insets():
    rb = robot("field-rover")                   # three axle lines, slanted across the labels
    row = run_steps(Simulator(rb, 0.01, start=(0.0, 0.0, 0.6)), 30, wheels={w.name: 3.0 for w in rb.wheels})
    rd = Renderer(rb, (W, H))
    l, t, w, h = PANEL_W, 0, W - PANEL_W, H
    crossed = compass_band = 0
    # 400 px/m: grid every 0.1 m, labels every 0.5 m.  The first view puts the x = -0.5 m line one
    # pixel left of the view's edge: its label would start inside the view with its minus sign cut off.
    views = [(0.5025, 0.0)] + [(0.13 * k - 0.4, 0.11 * k - 0.3) for k in range(12)]
    for cx, cy in views:
        rd.view = View((l, t, w, h), center=(cx, cy), scale=400.0)
        img = to_array(rd.draw(row, status=render.Status("paused", 2.0)))
        labels = [x for x in rd.texts if x[0].endswith(" m")]
        assert len(labels) >= 3
        for text, rect, colour, background, size in labels:
            box = rect.inflate(4, 2)
            assert l + 2 <= box.left and box.right <= l + w - 2 and t + 2 <= box.top and box.bottom <= t + h - 2
            assert box.collidelist(rd.reserved) == -1, text                     # not under an inset
            # the value of the grid line it stands beside, sign included
            val = float(text[:-2])
            if rect.top == t + 4:                                                # along the top: x lines
                assert rd.view.to_world(rect.left - 3, 0)[0] == pytest.approx(val, abs=1.5 / 400)
            else:                                                                # along the right: y lines
                assert rd.view.to_world(0, rect.bottom + 2)[1] == pytest.approx(val, abs=1.5 / 400)
            # drawn whole, on its own paper: the pixels are pygame's rendering of the text
            assert np.array_equal(_patch(img, rect), _text_pixels(text, colour, background, size)), text
            ring = np.concatenate([img[box.top:box.bottom, box.left - 1], img[box.top:box.bottom, box.right],
                                   img[box.top - 1, box.left:box.right], img[box.bottom, box.left:box.right]])
            crossed += bool(np.any(np.all(ring == np.array(PALETTE["axle"], np.uint8), axis=-1)))
        if cx == 0.5025:
            top = sorted((x[1].left, x[0]) for x in labels if x[1].top == t + 4)
            assert top[0][1] == "0 m" and "-0.5 m" not in [x for _, x in top]
        v_lines = [rd.view.to_screen(0, 0.5 * k)[1] for k in range(-10, 11)]
        compass_band += any(t + h - 78 <= v <= t + h - 12 for v in v_lines)
    assert crossed >= 1            # axle lines do run right up to some labels (and not through them)
    assert compass_band >= 1       # some labelled y lines pass behind the compass inset (and are not labelled there)
def test_route_waypoints_and_target_point_are_drawn():
    # a planned L route: grey band along it, waypoint circles, the target at the plan's pose at t
    from sim.engine.record import ROW, StepResult
    from sim.model.route import Route
    from sim.theory.speedplan import plan_route

    rb = robot("tote-mecanum")
    rt = Route("l", [[0, 0], [2, 0], [2, 1.5]], (None, None, None))
    plan = plan_route(rb, rt)
    k = int(np.flatnonzero(plan.pose[:, 0] > 1.0)[0])        # a plan row on the first leg
    rd = Renderer(rb, (W, H))
    rd.set_route(plan.path.xy, rt.waypoints, plan)
    rd.view = View((PANEL_W, 0, W - PANEL_W, H), center=(1.0, 0.75), scale=200.0)
    row = Simulator(rb, 0.01, start=(0.2, 1.2, 0.0)).step()
    vals = row.values.copy()
    vals[ROW["t"]] = plan.t[k]                              # the same row, at the plan's time
    row = StepResult(vals, row.n)
    img = drawn(rd, row)
    tx, ty = plan.pose[k, :2]
    assert colour_near(img, *hand_pixel(tx, ty, (1.0, 0.75), 200.0), PALETTE["target"])
    assert colour_near(img, *hand_pixel(2.0, 0.75, (1.0, 0.75), 200.0), PALETTE["route"])   # second leg
    u, v = hand_pixel(2.0, 1.5, (1.0, 0.75), 200.0)
    assert colour_near(img, u, v - 6, PALETTE["ink"]) and colour_near(img, u, v, PALETTE["panel"])
    # the view fits the route, not just the poses seen
    rd2 = Renderer(rb, (W, H))
    rd2.set_route(plan.path.xy, rt.waypoints, plan)
    rd2.fit(None)
    assert rd2.view.inside(*rd2.view.to_screen(2.0, 1.5)) and rd2.view.inside(*rd2.view.to_screen(0.0, 0.0))
