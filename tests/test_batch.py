"""`trundle batch`: discovery, worker processes, baselines, the table and JUnit XML."""
from __future__ import annotations

import json
import os
import xml.etree.ElementTree as ET

import pytest

from sim.runs.batch import Unit, find_scenarios, run_one, run_units

ROBOT = """\
    name: axle
    wheels:
      - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}
      - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}
    """


def spin_scenario(left: float, right: float, robot: str = "robots/axle.yaml", duration: float = 1.0) -> str:
    """Constant wheel spins on the test axle; the closed-form arc (common practice:
    v = r (wR + wL) / 2, omega = r (wR - wL) / b) gives the end pose checked."""
    import math
    r, b = 0.08, 0.44
    v, w = r * (right + left) / 2, r * (right - left) / b
    x = v / w * math.sin(w * duration) if w else v * duration
    y = v / w * (1 - math.cos(w * duration)) if w else 0.0
    return f"""\
        robot: {robot}
        step: 0.01
        duration: {duration}
        script:
          - {{at: 0, wheels: {{left: {left}, right: {right}}}}}
        checks:
          - at: end
            pose: {{x: {x!r}, y: {y!r}}}
            tolerance: {{position: 1.0e-9}}
        """


@pytest.fixture
def suite(tmp_path, write_files):
    """A folder of small scenarios, a robot folder and a file that is not a scenario."""
    root = tmp_path / "suite"
    write_files(root, {
        "robots/axle.yaml": ROBOT,
        "a-straight.yaml": spin_scenario(4.0, 4.0),
        "b-arc.yaml": spin_scenario(4.0, 5.0),
        "nested/robots/axle.yaml": ROBOT,
        "nested/c-turn.yaml": spin_scenario(-3.0, 3.0, "robots/axle.yaml"),
        "nested/d-arc.yml": spin_scenario(5.0, 3.0, "robots/axle.yaml", duration=2.0),
        "notes.yaml": "title: not a scenario\nitems: [1, 2]\n",
    })
    return root


def table_rows(out):
    """(scenario, result) of each row of the final table."""
    lines = out.splitlines()
    start = next(i for i, ln in enumerate(lines) if ln.startswith("scenario "))
    rows = []
    for ln in lines[start + 1:]:
        if ln[:1].isdigit():          # "N scenarios: ..."
            break
        parts = ln.split()
        result = " ".join(parts[1:3]) if parts[1] in ("check", "input") else parts[1]
        rows.append((parts[0], result))
    return rows


def test_project_scenarios_match_their_baselines(run_module, repo_root):
    """Every change to the engine shows up here as a trace difference (refresh: DEVELOPERS.md)."""
    proc = run_module(["batch", "scenarios", "--baselines", "scenarios/baselines"], cwd=repo_root, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    rows = table_rows(proc.stdout)
    assert len(rows) == len(find_scenarios([repo_root / "scenarios"])) >= 10
    assert all(r == "pass" for _, r in rows)
    for name, _ in rows:
        base = repo_root / "scenarios" / "baselines" / (os.path.splitext(os.path.basename(name))[0] + ".csv")
        assert base.stat().st_size < 1_100_000


def test_discovery_rule(suite):
    units = find_scenarios([suite])
    assert [u.rel for u in units] == ["a-straight.yaml", "b-arc.yaml", os.path.join("nested", "c-turn.yaml"),
                                      os.path.join("nested", "d-arc.yml")]
    # a file named on the command line is taken whatever it holds
    assert [u.rel for u in find_scenarios([suite / "notes.yaml"])] == ["notes.yaml"]


def test_jobs_do_not_change_results_or_files(suite, tmp_path, cli):
    out = {}
    for jobs in (1, 4):
        code, stdout, err = cli(["batch", suite, "--baselines", tmp_path / f"base{jobs}", "--update",
                                 "--jobs", jobs])
        assert code == 0, stdout + err
        out[jobs] = stdout
    assert table_rows(out[1]) == table_rows(out[4])
    assert [r for _, r in table_rows(out[1])] == ["pass"] * 4

    def tree(folder):
        return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}

    t1, t4 = tree(tmp_path / "base1"), tree(tmp_path / "base4")
    assert sorted(t1) == ["a-straight.csv", "a-straight.csv.meta.json", "b-arc.csv", "b-arc.csv.meta.json",
                          "nested/c-turn.csv", "nested/c-turn.csv.meta.json",
                          "nested/d-arc.csv", "nested/d-arc.csv.meta.json"]
    assert t1 == t4
    # checking against them passes with any number of jobs
    for jobs in (1, 3):
        code, stdout, _ = cli(["batch", suite, "--baselines", tmp_path / "base1", "--jobs", jobs])
        assert code == 0 and table_rows(stdout) == table_rows(out[1])


def test_update_says_what_changed_and_check_reports_divergence(suite, tmp_path, cli, write_files):
    base = tmp_path / "base"
    assert cli(["batch", suite, "--baselines", base, "--update", "--jobs", "1"])[0] == 0
    code, out, _ = cli(["batch", suite, "--baselines", base, "--update", "--jobs", "1"])
    assert code == 0 and "baselines: 4 unchanged" in out
    # move the right wheel 1 mm outward: the arcs change, the straight run does not
    write_files(suite, {"robots/axle.yaml": ROBOT.replace("y: -0.22", "y: -0.221")})
    code, out, _ = cli(["batch", suite, "--baselines", base, "--jobs", "1"])
    assert code == 1
    rows = dict(table_rows(out))
    # equal spins: omega = 0 whatever the track, so the straight run keeps its trace
    assert rows[str(suite / "a-straight.yaml")] == "pass"
    # the arc leaves its closed-form end pose and its baseline; the cause is named
    assert rows[str(suite / "b-arc.yaml")] == "check failed"
    assert "likely cause: the robot changed" in out and "DIVERGED" in out
    # nested scenarios use their own robots/ folder, which did not change
    assert rows[str(suite / "nested" / "c-turn.yaml")] == "pass"
    stamp = (base / "nested" / "d-arc.csv").stat().st_mtime_ns
    code, out, _ = cli(["batch", suite, "--baselines", base, "--update", "--jobs", "1"])
    rows = {ln.split()[0]: ln for ln in out.splitlines() if ln.startswith(str(suite))}
    assert "changed, diverged t=" in rows[str(suite / "b-arc.yaml")]
    # the straight run moved by rounding only: within tolerance, so its trace is kept and only
    # its sidecar (the new robot hash) is rewritten
    straight = (base / "a-straight.csv").read_bytes()
    assert "metadata only, within tolerance" in rows[str(suite / "a-straight.yaml")]
    assert "unchanged" in rows[str(suite / "nested" / "c-turn.yaml")]
    summary = out.split("baselines:")[1]
    assert "1 changed, 1 metadata only, 2 unchanged" in summary
    assert f"changed       {base / 'b-arc.csv'}" in summary
    assert (base / "a-straight.csv").read_bytes() == straight
    from sim.files.scenario import load_scenario
    assert json.loads((base / "a-straight.csv.meta.json").read_text())["robot_hash"] == \
        load_scenario(suite / "a-straight.yaml").robot_hash
    # a tighter --tol than that rounding rewrites the trace too
    code, out, _ = cli(["batch", suite, "--baselines", base, "--update", "--jobs", "1", "--tol", "0"])
    rows = {ln.split()[0]: ln for ln in out.splitlines() if ln.startswith(str(suite))}
    assert "changed, diverged t=" in rows[str(suite / "a-straight.yaml")]
    assert (base / "a-straight.csv").read_bytes() != straight
    assert (base / "nested" / "d-arc.csv").stat().st_mtime_ns == stamp     # untouched
    # a comment in a scenario changes its hash only: the sidecar is rewritten, not the trace
    text = (suite / "nested" / "d-arc.yml").read_text()
    (suite / "nested" / "d-arc.yml").write_text("# reviewed\n" + text)
    code, out, _ = cli(["batch", suite, "--baselines", base, "--update", "--jobs", "1"])
    assert "1 metadata only, 3 unchanged" in out
    assert f"metadata only {base / 'nested' / 'd-arc.csv'}" in out
    assert (base / "nested" / "d-arc.csv").stat().st_mtime_ns == stamp
    assert not [p for p in base.rglob("*") if p.name.startswith(".") or p.suffix == ".part"]


def test_crash_and_bad_input_do_not_stop_the_others(suite, tmp_path, cli, write_files, monkeypatch):
    import sim.runs.runner

    write_files(suite, {"e-bad.yaml": spin_scenario(1.0, 2.0).replace("step: 0.01", "stpe: 0.01")})
    real = sim.runs.runner.run_scenario

    def flaky(scen, *a, **kw):
        if scen.source.endswith("b-arc.yaml"):
            raise ZeroDivisionError("injected fault")
        return real(scen, *a, **kw)

    monkeypatch.setattr(sim.runs.runner, "run_scenario", flaky)
    junit = tmp_path / "out.xml"
    code, out, err = cli(["batch", suite, "--jobs", "1", "--junit", junit])
    assert code == 1
    rows = table_rows(out)
    assert rows == [(str(suite / "a-straight.yaml"), "pass"), (str(suite / "b-arc.yaml"), "crashed"),
                    (str(suite / "e-bad.yaml"), "input error"),
                    (str(suite / "nested" / "c-turn.yaml"), "pass"), (str(suite / "nested" / "d-arc.yml"), "pass")]
    assert "ZeroDivisionError: injected fault" in out
    assert f"{suite / 'e-bad.yaml'}:2: unknown key 'stpe' (did you mean 'step'?)" in out
    assert "Traceback" not in err

    # JUnit XML: the commonly used schema shape (testsuites > testsuite > testcase >
    # failure | error, with tests/failures/errors counts; common practice)
    root = ET.parse(junit).getroot()
    assert root.tag == "testsuites"
    (ts,) = root.findall("testsuite")
    cases = ts.findall("testcase")
    assert int(ts.get("tests")) == len(cases) == 5
    assert int(ts.get("errors")) == 2 and int(ts.get("failures")) == 0
    assert all(c.get("name") and c.get("classname") and float(c.get("time")) >= 0 for c in cases)
    by = {c.get("name"): c for c in cases}
    assert by["a-straight.yaml"].find("failure") is None and by["a-straight.yaml"].find("error") is None
    crash = by["b-arc.yaml"].find("error")
    assert crash.get("type") == "crashed" and "injected fault" in crash.text
    assert by["e-bad.yaml"].find("error").get("message").startswith("input error: ")


def test_junit_failure_for_failed_check(tmp_path, cli, write_files):
    write_files(tmp_path, {"robots/axle.yaml": ROBOT,
                           "ok.yaml": spin_scenario(4.0, 5.0),
                           "off.yaml": spin_scenario(4.0, 5.0).replace("right: 5.0", "right: 5.01")})
    junit = tmp_path / "j.xml"
    code, out, _ = cli(["batch", tmp_path, "--jobs", "2", "--junit", junit])
    assert code == 1
    assert dict(table_rows(out))[str(tmp_path / "off.yaml")] == "check failed"
    ts = ET.parse(junit).getroot().find("testsuite")
    assert ts.get("failures") == "1" and ts.get("errors") == "0"
    fail = {c.get("name"): c for c in ts.findall("testcase")}["off.yaml"].find("failure")
    assert fail.get("type") == "check failed" and "FAIL pose" in fail.text


def dying_unit(path, baselines_dir, update, **kw):
    """A work unit whose worker process dies outright for one scenario."""
    if path.endswith("b-arc.yaml"):
        os._exit(3)
    return run_one(path, baselines_dir, update, **kw)


def test_worker_process_death_takes_only_its_scenario(suite):
    units = find_scenarios([suite])
    results = run_units(units, jobs=2, work=dying_unit)
    assert [r["result"] for r in results] == ["pass", "crashed", "pass", "pass"]
    assert "worker process died" in results[1]["details"][0]


def test_work_unit_is_plain_and_picklable(suite):
    import pickle
    u = find_scenarios([suite])[1]
    r = run_one(u.path, None, False)
    assert r["result"] == "pass" and r["peak_slip"] < 1e-9
    assert pickle.loads(pickle.dumps(r)) == r
    assert pickle.loads(pickle.dumps(run_one)) is run_one


def test_missing_baseline_and_bad_arguments(suite, tmp_path, cli, expect_input_error):
    (tmp_path / "empty").mkdir()
    code, out, _ = cli(["batch", suite / "b-arc.yaml", "--baselines", tmp_path / "empty", "--jobs", "1"])
    assert code == 1 and "input error" in out and "baseline not found" in out
    code, _, err = cli(["batch", suite, "--update"])
    expect_input_error(code, err, "--update", None, "needs --baselines")
    code, _, err = cli(["batch", tmp_path / "nowhere"])
    expect_input_error(code, err, tmp_path / "nowhere", None, "no such file or folder")
    code, _, err = cli(["batch", suite, "--jobs", "0"])
    expect_input_error(code, err, "--jobs", None, ">= 1")
    code, _, err = cli(["batch", tmp_path / "empty"])
    expect_input_error(code, err, tmp_path / "empty", None, "found no scenarios")


def test_failed_check_and_missing_baseline_are_both_reported(suite, tmp_path, cli):
    # the end pose asked for is 1 cm off the closed-form arc: the check fails, and there is no baseline
    import textwrap
    text = textwrap.dedent(spin_scenario(4.0, 5.0)) + "  - {at: end, pose: {x: 0.0}, tolerance: {position: 0.01}}\n"
    (suite / "b-arc.yaml").write_text(text)
    (tmp_path / "empty").mkdir()
    code, out, _ = cli(["batch", suite / "b-arc.yaml", suite / "a-straight.yaml", "--baselines", tmp_path / "empty",
                        "--jobs", "1"])
    assert code == 1
    rows = dict(table_rows(out))
    assert rows[str(suite / "b-arc.yaml")] == "check failed"
    assert rows[str(suite / "a-straight.yaml")] == "input error"          # checks pass, baseline missing
    table = {ln.split()[0]: ln for ln in out.splitlines() if ln.startswith(str(suite))}
    assert table[str(suite / "b-arc.yaml")].endswith("no baseline")
    block = out.split(f"--- {suite / 'b-arc.yaml'}: check failed")[1].split("---")[0]
    assert "FAIL pose at t=1 s" in block and "baseline not found" in block and str(tmp_path / "empty") in block


def test_baseline_of_another_scenario_is_named(suite, tmp_path, cli):
    import shutil
    base = tmp_path / "base"
    assert cli(["batch", suite / "a-straight.yaml", "--baselines", base, "--update", "--jobs", "1"])[0] == 0
    shutil.copy(base / "a-straight.csv", base / "b-arc.csv")
    shutil.copy(base / "a-straight.csv.meta.json", base / "b-arc.csv.meta.json")
    code, out, _ = cli(["batch", suite / "b-arc.yaml", "--baselines", base, "--jobs", "1"])
    assert code == 1 and dict(table_rows(out))[str(suite / "b-arc.yaml")] == "diverged"
    assert "recorded from another scenario, 'a-straight.yaml' (this run is 'b-arc.yaml')" in out
    assert "the scenario file changed" not in out
    # the same through trundle run --baseline
    code, out, _ = cli(["run", suite / "b-arc.yaml", "--baseline", base / "b-arc.csv"])
    assert code == 1 and "'a-straight.yaml'" in out and "the scenario file changed" not in out


def test_units_keep_their_order(suite):
    units = [Unit(str(suite / n), n) for n in ("b-arc.yaml", "a-straight.yaml")]
    seen = []
    results = run_units(units, jobs=2, on_done=lambda i, r: seen.append(i))
    assert [r["scenario"] for r in results] == [u.path for u in units]
    assert sorted(seen) == [0, 1]


FORKED_BATCH = """\
import os, sys
from sim.runs.batch import find_scenarios, prepare_parent, run_one, run_units, worker_context

def dying_unit(path, baselines_dir, update, **kw):
    if path.endswith("b-arc.yaml"):
        os._exit(3)
    return run_one(path, baselines_dir, update, **kw)

if __name__ == "__main__":
    prepare_parent(2)
    method = worker_context().get_start_method()
    units = find_scenarios([sys.argv[1]])
    results = run_units(units, jobs=2, work=dying_unit)
    threads = open("/proc/self/stat").read().rsplit(")", 1)[1].split()[17]
    print(method, "numpy" in sys.modules, threads)
    print(*[r["result"] for r in results])
"""


@pytest.mark.skipif(not hasattr(os, "fork"), reason="fork start method only")
def test_batch_parent_forks_its_workers(suite, tmp_path):
    """``trundle batch`` loads the engine with one-thread math libraries before any
    worker exists, so it stays single-threaded and forks its workers (which start with
    the engine loaded); a dying one is still isolated."""
    import subprocess
    import sys

    from conftest import ROOT
    from sim.runs.batch import MATH_THREADS
    script = tmp_path / "forked.py"
    script.write_text(FORKED_BATCH)
    env = {k: v for k, v in os.environ.items() if k not in MATH_THREADS}
    env["PYTHONPATH"] = str(ROOT)
    r = subprocess.run([sys.executable, str(script), str(suite)], capture_output=True, text=True,
                       env=env, timeout=120)
    assert r.returncode == 0, r.stderr
    head, results = r.stdout.splitlines()
    assert head == "fork True 1"
    assert results.split() == ["pass", "crashed", "pass", "pass"]
    # the command line itself: building the parser and finding scenarios loads no numpy (fast start)
    probe = ("import sys; from sim.cli.app import _parser; from sim.runs.batch import find_scenarios; "
             f"_parser(); find_scenarios([{str(suite)!r}]); print('numpy' in sys.modules)")
    r = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, env=env, timeout=60)
    assert r.stdout.strip() == "False", r.stderr


def test_no_fork_while_another_thread_runs():
    """Forking while a second thread runs could copy a held lock: workers then come
    from a fork server (or spawn)."""
    import threading

    from sim.runs.batch import worker_context
    stop = threading.Event()
    t = threading.Thread(target=stop.wait)
    t.start()
    try:
        assert worker_context().get_start_method() in ("forkserver", "spawn")
    finally:
        stop.set()
        t.join()


def test_worker_dying_between_results_is_still_isolated(suite, write_files):
    """The parent hands a unit to a worker that has just died (its previous result was
    still being reported): that unit goes to a new worker, only the fatal one is lost."""
    import time
    write_files(suite, {"e-extra.yaml": spin_scenario(2.0, 3.0)})
    units = find_scenarios([suite])
    assert [u.rel for u in units][:3] == ["a-straight.yaml", "b-arc.yaml", "e-extra.yaml"]
    results = run_units(units, jobs=2, work=dying_unit,
                        on_done=lambda i, r: time.sleep(0.3) if i == 0 else None)
    assert [r["result"] for r in results] == ["pass", "crashed", "pass", "pass", "pass"]


def test_interrupted_update_keeps_the_old_baseline(suite, tmp_path, monkeypatch):
    """Ctrl-C while recording: the cut-off run must not replace the baseline."""
    from sim.runs import baseline, runner
    from sim.files.scenario import load_scenario
    scen = load_scenario(suite / "b-arc.yaml")
    path = tmp_path / "b-arc.csv"
    _, change, _ = baseline.record(scen, path)
    assert change == "new"
    before = path.read_bytes(), (tmp_path / "b-arc.csv.meta.json").read_bytes()

    def interrupt(*a, **k):
        raise KeyboardInterrupt
    monkeypatch.setattr(runner, "_account", interrupt)
    res, change, report = baseline.record(scen, path)
    assert res.interrupted and change is None and report is None
    assert (path.read_bytes(), (tmp_path / "b-arc.csv.meta.json").read_bytes()) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b-arc.csv", "b-arc.csv.meta.json", "suite"]  # no leftovers


ORPHANS = """\
import sys, time
from sim.runs.batch import Unit, prepare_parent, run_units

def short_nap(path, baselines_dir, update, **kw):
    time.sleep(0.5)
    return {"scenario": path}

if __name__ == "__main__":
    prepare_parent(2)
    run_units([Unit(f"u{i}", f"u{i}") for i in range(40)], jobs=2, work=short_nap)
"""


@pytest.mark.skipif(not os.path.isdir("/proc/self/task"), reason="reads /proc (Linux)")
def test_workers_end_when_the_parent_is_killed(tmp_path):
    """A parent killed outright (kill -9, out of memory): its forked workers finish the
    unit in hand and exit instead of waiting forever on the pipe."""
    import signal
    import subprocess
    import sys
    import time

    from conftest import ROOT
    from sim.runs.batch import MATH_THREADS
    script = tmp_path / "orphans.py"
    script.write_text(ORPHANS)
    env = {k: v for k, v in os.environ.items() if k not in MATH_THREADS}
    env["PYTHONPATH"] = str(ROOT)
    p = subprocess.Popen([sys.executable, str(script)], env=env)
    children = []
    for _ in range(200):  # until both workers exist (up to 20 s)
        time.sleep(0.1)
        with open(f"/proc/{p.pid}/task/{p.pid}/children") as fh:
            children = [int(c) for c in fh.read().split()]
        if len(children) == 2:
            break
    assert len(children) == 2
    os.kill(p.pid, signal.SIGKILL)
    p.wait()
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and any(os.path.exists(f"/proc/{c}") for c in children):
        time.sleep(0.1)
    assert not any(os.path.exists(f"/proc/{c}") for c in children)


@pytest.mark.skipif(not hasattr(os, "killpg"), reason="process groups (Unix)")
def test_interrupted_batch_update_writes_nothing(tmp_path, write_files):
    """Ctrl-C (SIGINT to the process group) during ``batch --update --jobs 2``: exit 130,
    no baseline and no temporary file left behind."""
    import signal
    import subprocess
    import sys
    import time

    from conftest import ROOT
    write_files(tmp_path / "long", {"robots/axle.yaml": ROBOT} | {
        f"s{i}.yaml": spin_scenario(4.0, 4.0 + i, duration=20000.0).replace("step: 0.01", "step: 0.001")
        for i in range(2)})
    bl = tmp_path / "bl"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    p = subprocess.Popen([sys.executable, "-m", "sim", "batch", str(tmp_path / "long"), "--jobs", "2",
                          "--baselines", str(bl), "--update"], env=env, stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True, start_new_session=True)
    time.sleep(1.5)
    os.killpg(p.pid, signal.SIGINT)
    out, err = p.communicate(timeout=120)
    assert p.returncode == 130, (out, err)
    assert "Traceback" not in err
    assert not bl.exists() or [q.name for q in bl.iterdir()] == []


def pid_unit(path, baselines_dir, update, **kw):
    import time
    time.sleep(0.2)
    return {"scenario": path, "pid": os.getpid()}


def test_as_many_units_as_workers_use_them_all():
    """With two units and two workers, each worker gets one (none queues a second
    unit while another worker is idle)."""
    results = run_units([Unit("a", "a"), Unit("b", "b")], jobs=2, work=pid_unit)
    assert len({r["pid"] for r in results}) == 2
