"""Design studies: closed-form answers, the same table wherever it runs, the cache, bad studies."""
import math
import os
import textwrap

import pytest

from sim.cli import main
from sim.files.studyfile import load_study
from sim.runs import study as S

DIFF = """\
name: diff
footprint: {length: 0.5, width: 0.4}
wheels:
  - {name: left,  type: fixed, x: 0, y: 0.2, radius: 0.1, max_spin: 10, max_spin_accel: 5}
  - {name: right, type: fixed, x: 0, y: -0.2, radius: 0.1, max_spin: 10, max_spin_accel: 5}
  - {name: front, type: castor, x: 0.3, y: 0, radius: 0.03, trail: 0.02}
"""

TRIKE = """\
name: trike
footprint: {length: 1.6, width: 0.7, x: 0.5}
wheels:
  - {name: rear_left,  type: fixed, x: 0, y: 0.3, radius: 0.15, max_spin: 12, max_spin_accel: 20}
  - {name: rear_right, type: fixed, x: 0, y: -0.3, radius: 0.15, max_spin: 12, max_spin_accel: 20}
  - {name: nose, type: steered, x: 1.0, y: 0, radius: 0.15, driven: false,
     steer_limits: [-30 deg, 30 deg], max_steer_rate: 2}
"""

STRAIGHT = "waypoints: [[0, 0], [5, 0]]\n"
CORNER = "waypoints: [[0, 0], [6, 0], [6, 6]]\ncorner_radius: 2.0\n"
RADII = [0.05, 0.08, 0.1, 0.12, 0.15]


def _write(folder, name, text):
    p = folder / name
    p.write_text(textwrap.dedent(text))
    return str(p)


def _diff_study(tmp_path, radii=RADII, extra=""):
    _write(tmp_path, "diff.yaml", DIFF)
    _write(tmp_path, "straight.yaml", STRAIGHT)
    vals = ", ".join(str(r) for r in radii)
    return _write(tmp_path, "study.yaml", f"""\
robot: diff.yaml
parameters:
  - name: radius
    wheels: [left, right]
    key: radius
    values: [{vals}]
{extra}routes: [straight.yaml]
figures: [route_time, resteer_time]
""")


def test_differential_straight_route_time_follows_trapezoid(tmp_path):
    """From rest to rest over L at most v = r max_spin and a = r max_spin_accel:
    t = L/v + v/a when L >= v^2/a (kinematics of a trapezoidal profile, common practice)."""
    run = S.run_study(load_study(_diff_study(tmp_path)))
    assert [r["radius"] for r in run.rows] == RADII
    for row in run.rows:
        r = row["radius"]
        v, a = r * 10.0, r * 5.0
        assert 5.0 >= v * v / a
        assert row["status"] == "ok"
        assert row["route_time"] == pytest.approx(5.0 / v + v / a, rel=0.01)
        assert row["resteer_time"] == 0.0


def test_car_like_base_infeasible_where_turning_radius_passes_corner(tmp_path):
    """A tricycle's guide point (rear axle middle) turns no tighter than L / tan(max steer)
    (Ackermann geometry, common practice): with 30 deg and a 2 m corner the limit is
    L = 2 tan 30 deg = 1.1547 m."""
    _write(tmp_path, "trike.yaml", TRIKE)
    _write(tmp_path, "corner.yaml", CORNER)
    bases = [0.6, 0.9, 1.1, 1.15, 1.16, 1.2, 1.5]
    path = _write(tmp_path, "study.yaml", f"""\
robot: trike.yaml
parameters:
  - {{name: wheelbase, wheel: nose, key: x, values: {bases}}}
routes: [corner.yaml]
""")
    run = S.run_study(load_study(path))
    limit = 2.0 * math.tan(math.radians(30))
    for row in run.rows:
        feasible = row["status"] == "ok"
        assert feasible == (row["wheelbase"] < limit), row
        if not feasible:
            assert row["status"] == "infeasible" and "corner" in row["reason"]
            assert row["route_time"] is None
        else:
            assert row["route_time"] > 0


def test_smallest_clearance_to_a_wall_beside_a_straight_route(tmp_path):
    """A rectangle of width w driven along y = 0 past a wall on y = 0.6 stays 0.6 - w/2 from it
    (plane geometry), 0 once they touch or overlap."""
    _write(tmp_path, "diff.yaml", DIFF)
    _write(tmp_path, "straight.yaml", STRAIGHT)
    _write(tmp_path, "wall.yaml", "wall: {line: [[-1, 0.6], [6, 0.6]]}\n")
    widths = [0.4, 0.6, 0.8, 1.2, 1.4]
    path = _write(tmp_path, "study.yaml", f"""\
robot: diff.yaml
parameters:
  - {{footprint: width, values: {widths}}}
routes:
  - {{route: straight.yaml, floor: wall.yaml}}
figures: [smallest_clearance, route_time]
""")
    run = S.run_study(load_study(path))
    assert [r["footprint.width"] for r in run.rows] == widths
    for r in run.rows:
        assert r["smallest_clearance"] == pytest.approx(max(0.0, 0.6 - r["footprint.width"] / 2), abs=1e-9)
    assert S.pareto(run.rows, "route_time", "smallest_clearance") == [run.rows[0]]  # same time, most room


def test_same_table_on_one_or_two_processes_and_on_dask(tmp_path):
    path = _diff_study(tmp_path, extra="""\
  - name: accel
    wheels: [left, right]
    key: max_spin_accel
    samples: 3
    range: {from: 4, to: 8}
""")
    study = load_study(path)
    one = S.run_study(study, jobs=1)
    two = S.run_study(study, jobs=2)
    assert len(one.rows) == 15 and two.rows == one.rows and two.ran == 15
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, protocol="tcp://",
                                  host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        remote = S.run_study(study, scheduler=cluster.scheduler_address)
    assert remote.rows == one.rows


def test_latin_hypercube_one_point_per_stratum():
    """Each coordinate of an N-point Latin hypercube has exactly one point in each of N
    equal strata (McKay, Beckman & Conover 1979); scipy.stats.qmc's discrepancy of ours is
    no worse than of plain random points with the same seed (a loose reference check)."""
    import numpy as np
    from scipy.stats import qmc
    pts = np.array(S.latin_hypercube([(0.0, 1.0), (2.0, 4.0)], 16, seed=3))
    for j, (lo, hi) in enumerate([(0.0, 1.0), (2.0, 4.0)]):
        strata = np.floor((pts[:, j] - lo) / (hi - lo) * 16).astype(int)
        assert sorted(strata) == list(range(16))
    unit = (pts - [0.0, 2.0]) / [1.0, 2.0]
    rand = np.random.default_rng(3).random((16, 2))
    assert qmc.discrepancy(unit) < qmc.discrepancy(rand)
    assert S.latin_hypercube([(0.0, 1.0)], 5, 3) == S.latin_hypercube([(0.0, 1.0)], 5, 3)


def test_interrupted_study_reruns_only_what_is_new(tmp_path, monkeypatch):
    path = _diff_study(tmp_path)
    cache = str(tmp_path / "results.cache.json")
    calls = []
    real = S.run_variant

    def counting(unit):
        calls.append(unit)
        return real(unit)

    monkeypatch.setattr(S, "run_variant", counting)

    def stop_after_two(done, todo, row):
        if done == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        S.run_study(load_study(path), cache=cache, on_done=stop_after_two)
    assert len(calls) == 2 and os.path.isfile(cache)
    calls.clear()
    path = _diff_study(tmp_path, radii=RADII + [0.2])  # and one more value
    run = S.run_study(load_study(path), cache=cache)
    assert len(calls) == len(RADII) + 1 - 2 and run.ran == 4 and run.cached == 2
    calls.clear()
    again = S.run_study(load_study(path), cache=cache)
    assert calls == [] and again.rows == run.rows
    fresh = S.run_study(load_study(path))
    assert fresh.rows == run.rows


def test_variant_failing_validation_is_a_status(tmp_path):
    run = S.run_study(load_study(_diff_study(tmp_path, radii=[-0.1, 0.1])))
    bad, good = run.rows
    assert bad["status"] == "invalid" and "radius" in bad["reason"] and "must be > 0" in bad["reason"]
    assert bad["route_time"] is None and good["status"] == "ok"


def test_cli_writes_table_and_plot(tmp_path, capsys):
    import polars as pl
    path = _diff_study(tmp_path)
    out, png = str(tmp_path / "res.parquet"), str(tmp_path / "study.png")
    code = main(["study", path, "-o", out, "--jobs", "1", "--plot", png, "--sort", "route_time"])
    text = capsys.readouterr().out
    assert code == 0 and os.path.getsize(png) > 10_000
    df = pl.read_parquet(out)
    assert df.columns == ["variant", "radius", "route_time", "resteer_time", "status", "reason"]
    assert df["radius"].to_list() == RADII
    assert "best      variant 5: radius 0.15" in text  # the largest wheels are fastest
    csv = str(tmp_path / "res.csv")
    assert main(["study", path, "-o", csv, "--jobs", "1"]) == 0
    assert "5 from the cache, 0 to run" in capsys.readouterr().err  # res.cache.json beside both
    assert pl.read_csv(csv)["route_time"].to_list() == df["route_time"].to_list()


BAD = [
    ("wheels: [left, rigth]", "no wheel named 'rigth'", 5),
    ("wheels: [left, right]\n    key: wheelbase", "a wheel has no number 'wheelbase'", 6),
    ("wheels: [left, right]\n    key: max_steer_rate", "applies to steered wheels only", 5),
    ("wheels: [left, right]\n    key: radius\n    range: {from: 0.2, to: 0.1, count: 3}", "empty range", 7),
    ("wheels: [left, right]\n    key: radius\n    values: []", "the list of values is empty", 7),
    ("wheels: [left, right]\n    key: radius\n    values: [0.1, big]", "expected a number", 7),
    ("wheels: [left, right]\n    key: radius\n    samples: 0\n    range: {from: 0.1, to: 0.2}",
     "expected a whole number of samples", 7),
    ("footprint: height\n    values: [1]", "the footprint has no number 'height'", 5),
]


@pytest.mark.parametrize("param, message, line", BAD)
def test_bad_study_is_file_line_exit_2(tmp_path, capsys, param, message, line):
    _write(tmp_path, "diff.yaml", DIFF)
    _write(tmp_path, "straight.yaml", STRAIGHT)
    path = _write(tmp_path, "study.yaml", f"robot: diff.yaml\nroutes: [straight.yaml]\nparameters:\n  - name: p\n"
                                          f"    {param}\n")
    if "values" not in param and "range" not in param and "footprint" not in param:
        with open(path, "a") as fh:
            fh.write("    values: [0.1]\n")
    out = str(tmp_path / "r.parquet")
    code = main(["study", path, "-o", out, "--jobs", "1"])
    err = capsys.readouterr().err
    assert code == 2 and f"study.yaml:{line}: " in err and message in err, err
    assert "Traceback" not in err and not os.path.exists(out)
