"""Faults on the way out (issue 12): read-only and missing folders, a full disk, a full or
closed standard output, device nodes as targets, and scenarios that never finish in a batch.

Every output fault must give ``PATH: cannot write ...: reason`` (or, for standard output,
nothing) with exit 2, no traceback and no file left behind (no ``.part`` either).
"""
from __future__ import annotations

import contextlib
import os
import pathlib
import shutil
import signal
import stat
import subprocess
import sys
import tempfile

import pytest

from conftest import ROOT, ROBOTS, SCENARIOS

SHORT = SCENARIOS / "tote-dogleg.yaml"
CART = ROBOTS / "ward-cart.yaml"


def _leftovers(folder) -> list:
    return sorted(p.name for p in pathlib.Path(folder).rglob("*") if p.name.endswith(".part"))


@contextlib.contextmanager
def unprivileged():
    """Run the block as an ordinary user (root ignores a folder's permissions)."""
    if os.geteuid() != 0:
        yield
        return
    os.setegid(65534)
    os.seteuid(65534)
    try:
        yield
    finally:
        os.seteuid(0)
        os.setegid(0)


@pytest.fixture(scope="module")
def shared():
    """A folder everyone may enter (so that the unprivileged user reaches it), removed afterwards."""
    d = pathlib.Path(tempfile.mkdtemp(prefix="trundle-faults-"))
    d.chmod(0o755)
    yield d
    for p in [d, *d.rglob("*")]:
        if p.is_dir():
            p.chmod(0o755)
    shutil.rmtree(d)


@pytest.fixture(scope="module")
def inputs(shared, cli):
    """A trace and its sidecar, a measured-returns file, in ``shared``; modules loaded up front."""
    csv, runs = shared / "trace.csv", shared / "runs.csv"
    # square-test returns of a base whose odometry is exact: every run comes back where it started
    runs.write_text("direction,x,y\n" + "cw,0,0\n" * 3 + "ccw,0,0\n" * 3)
    code, _, err = cli(["run", SHORT, "--csv", csv])
    assert code in (0, 1), err
    # every command once as root, so that what they import lazily is loaded before we drop privileges
    # (an unprivileged user may not read this Python's own library)
    warm = shared / "warm"
    warm.mkdir()
    for argv, out, _ in _commands({"csv": csv, "runs": runs}, warm):
        code, _, err = cli(argv)
        assert code in (0, 1) and out.exists(), err
    shutil.rmtree(warm)
    for p in shared.iterdir():
        p.chmod(0o644)
    return {"csv": csv, "runs": runs}


def _commands(inputs, out):
    """(argv, output path, what) for every command that writes a file, writing into folder ``out``."""
    return [
        (["run", SHORT, "--csv", out / "t.csv"], out / "t.csv", "cannot write the trace"),
        (["run", SHORT, "--png", out / "p.png"], out / "p.png", "cannot write the PNG"),
        (["plot", inputs["csv"], "-o", out / "plot.png"], out / "plot.png", "cannot write the PNG"),
        (["calibrate", CART, "--measured", inputs["runs"], "-o", out / "fixed.yaml"], out / "fixed.yaml",
         "cannot write the corrected robot file"),
        (["analyze", CART, "--export", "c", "-o", out / "m.h"], out / "m.h", "cannot write the C header"),
        (["batch", SHORT, "--jobs", "1", "--junit", out / "j.xml"], out / "j.xml", "cannot write the JUnit report"),
    ]


@pytest.mark.parametrize("i", range(6), ids=["run --csv", "run --png", "plot -o", "calibrate -o",
                                              "analyze --export -o", "batch --junit"])
def test_read_only_folder(i, shared, inputs, cli, expect_input_error):
    ro = shared / f"ro{i}"
    ro.mkdir()
    ro.chmod(0o555)
    argv, out, what = _commands(inputs, ro)[i]
    with unprivileged():
        code, _, err = cli(argv)
    expect_input_error(code, err.splitlines()[-1] + "\n" if i == 5 else err, str(out), None, what,
                       "Permission denied")
    assert list(ro.iterdir()) == []


@pytest.mark.parametrize("i", range(6), ids=["run --csv", "run --png", "plot -o", "calibrate -o",
                                              "analyze --export -o", "batch --junit"])
def test_missing_folder(i, shared, inputs, cli):
    argv, out, what = _commands(inputs, shared / "no" / "such")[i]
    before = sorted(p.name for p in shared.rglob("*"))
    code, _, err = cli(argv)
    assert code == 2 and "Traceback" not in err, err
    last = err.strip().splitlines()[-1]
    assert (last.startswith(f"{out}: {what}: No such file or directory")
            or last.startswith("-o: directory") or last.startswith("--png: directory")), last
    assert sorted(p.name for p in shared.rglob("*")) == before


def test_device_node_is_never_replaced(tmp_path, cli, expect_input_error):
    """``run --csv`` at a device node (a FIFO when not root) is refused; the node stays as it was."""
    node = tmp_path / "dev"
    if os.geteuid() == 0:
        os.mknod(node, stat.S_IFCHR | 0o666, os.makedev(1, 3))  # what /dev/null is on Linux
        is_kind = stat.S_ISCHR
    elif hasattr(os, "mkfifo"):
        os.mkfifo(node)
        is_kind = stat.S_ISFIFO
    else:
        pytest.skip("no device node or FIFO here")
    trace = tmp_path / "x.csv"
    assert cli(["run", SHORT, "--csv", trace])[0] in (0, 1)
    for argv in (["run", SHORT, "--csv", node], ["plot", trace, "-o", node],
                 ["batch", SHORT, "--jobs", "1", "--junit", node]):
        code, _, err = cli(argv)
        expect_input_error(code, err, str(node), None, "is not a regular file")
        assert is_kind(os.stat(node).st_mode)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["dev", "x.csv", "x.csv.meta.json"]


def _module(args, stdout, **kw):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "sim", *map(str, args)], cwd=ROOT, env=env, stdout=stdout,
                          stderr=subprocess.PIPE, text=True, timeout=120, **kw)


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="needs /dev/full")
@pytest.mark.parametrize("args", [["analyze", CART], ["run", SHORT], ["--help"], ["analyze", CART, "--export", "c"]],
                         ids=["analyze", "run", "--help", "export to stdout"])
def test_full_standard_output_ends_quietly(args):
    with open("/dev/full", "w") as full:
        p = _module(args, full)
    assert p.returncode == 2 and p.stderr == "", p.stderr


def test_closed_pipe_ends_quietly():
    r, w = os.pipe()
    os.close(r)
    try:
        p = _module(["analyze", CART, "--matrices"], w)
    finally:
        os.close(w)
    assert p.returncode == 2 and p.stderr == "", p.stderr


@pytest.mark.skipif(not hasattr(os, "setrlimit") and sys.platform != "linux", reason="needs RLIMIT_FSIZE")
def test_file_size_limit_mid_run_leaves_nothing(tmp_path):
    """The disk "fills" (RLIMIT_FSIZE) while the trace streams: one line, exit 2, no CSV, no .part."""
    import resource

    def small_files():
        resource.setrlimit(resource.RLIMIT_FSIZE, (20000, 20000))
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    out = tmp_path / "out.csv"
    p = _module(["run", SHORT, "--csv", out], subprocess.PIPE, preexec_fn=small_files)
    assert p.returncode == 2 and "Traceback" not in p.stderr, p.stderr
    assert p.stderr.startswith(f"{out}: cannot write the trace: ") and "File too large" in p.stderr, p.stderr
    assert len(p.stderr.strip().splitlines()) == 1
    assert sorted(q.name for q in tmp_path.iterdir()) == []


def _can_mount() -> bool:
    if not sys.platform.startswith("linux") or os.geteuid() != 0 or shutil.which("unshare") is None:
        return False
    p = subprocess.run(["unshare", "-m", "sh", "-c", "mount -t tmpfs -o size=16k tmpfs /mnt && umount /mnt"],
                       capture_output=True, timeout=30)
    return p.returncode == 0


@pytest.mark.skipif(not _can_mount(), reason="needs root and mount namespaces (a small tmpfs)")
@pytest.mark.parametrize("args,what", [(["run", SHORT, "--csv", "{d}/out.csv"], "cannot write the trace"),
                                       (["plot", "{trace}", "-o", "{d}/plot.png"], "cannot write the PNG")],
                         ids=["run --csv", "plot -o"])
def test_full_disk_leaves_nothing(args, what, tmp_path, cli):
    """A real full disk: a 64 KiB tmpfs in a private mount namespace."""
    trace = tmp_path / "trace.csv"
    assert cli(["run", SHORT, "--csv", trace])[0] in (0, 1)
    d = tmp_path / "small"
    d.mkdir()
    argv = " ".join(f"'{a}'" for a in [sys.executable, "-m", "sim",
                                        *(str(a).format(d=d, trace=trace) for a in args)])
    script = (f"mount -t tmpfs -o size=64k tmpfs '{d}' && cd '{ROOT}' && PYTHONPATH='{ROOT}' {argv}; "
              f"rc=$?; ls -A '{d}' >&2; exit $rc")
    p = subprocess.run(["unshare", "-m", "sh", "-c", script], capture_output=True, text=True, timeout=120)
    assert p.returncode == 2, p.stderr
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"{d}/") and f"{what}: " in lines[0], p.stderr
    assert "No space left on device" in lines[0], p.stderr  # and `ls -A` printed nothing: no file, no .part


# -- a batch always finishes -------------------------------------------------------------

ROBOT = "name: axle\nwheels:\n  - {name: l, type: fixed, x: 0, y: 0.2, radius: 0.1}\n" \
        "  - {name: r, type: fixed, x: 0, y: -0.2, radius: 0.1}\n"


@pytest.mark.skipif(not hasattr(os, "mkfifo") or not hasattr(signal, "setitimer"), reason="FIFOs, SIGALRM")
def test_batch_with_endless_and_blocking_scenarios_finishes(tmp_path, write_files):
    """10^9 steps and a FIFO as robot file: both marked, the others run, table and JUnit written."""
    write_files(tmp_path, {
        "robots/axle.yaml": ROBOT,
        "endless.yaml": "robot: robots/axle.yaml\nstep: 0.001\nduration: 1000000\n"
                        "script:\n  - {at: 0, wheels: {l: 1, r: 2}}\n",
        "fifo.yaml": "robot: robots/pipe.yaml\nstep: 0.01\nduration: 1\nscript: []\n",
        "fine.yaml": "robot: robots/axle.yaml\nstep: 0.01\nduration: 1\nscript:\n  - {at: 0, wheels: {l: 1, r: 1}}\n",
    })
    os.mkfifo(tmp_path / "robots" / "pipe.yaml")
    os.mkfifo(tmp_path / "pipe.yaml")  # a FIFO among the scenarios
    junit = tmp_path / "junit.xml"
    # 8 s: room for a worker's first use of the compiled engine on a busy machine
    p = _module(["batch", tmp_path, "--jobs", 2, "--timeout", "8", "--junit", junit], subprocess.PIPE)
    assert p.returncode == 1 and "Traceback" not in p.stderr, p.stderr
    rows = {ln.split()[0]: " ".join(ln.split()[1:3]) for ln in p.stdout.splitlines() if ln.startswith(str(tmp_path))}
    want = {"endless.yaml": "timed out", "fifo.yaml": "input error", "fine.yaml": "pass", "pipe.yaml": "input error"}
    assert {k: rows[str(tmp_path / k)][:len(v)] for k, v in want.items()} == want, p.stdout
    assert "4 scenarios: 1 pass, 2 input error, 1 timed out" in p.stdout
    assert "'robots/pipe.yaml' is not a regular file" in p.stdout
    import xml.etree.ElementTree as ET
    cases = {c.get("name"): c for c in ET.parse(junit).getroot().iter("testcase")}
    assert cases["endless.yaml"].find("error").get("type") == "timed out"
    assert cases["fifo.yaml"].find("error").get("type") == "input error"
    assert cases["fine.yaml"].find("error") is None and cases["fine.yaml"].find("failure") is None
    assert _leftovers(tmp_path) == []


def _result(path):
    return {"scenario": path, "result": "pass", "wall": 0.0, "peak_slip": None, "first_divergence": "",
            "baseline": None, "change": None, "details": []}


def sleepy_unit(path, baselines_dir, update, **kw):
    """``slow`` sleeps; ``deaf`` drops its first alarm (as when it lands in a callback from compiled code)."""
    import time

    from sim.runs.batch import TimeLimit
    if path == "deaf":
        try:
            time.sleep(30)
        except TimeLimit:
            pass
    if path in ("slow", "deaf"):
        time.sleep(30)
    return _result(path)


@pytest.mark.skipif(not hasattr(signal, "setitimer"), reason="SIGALRM")
@pytest.mark.parametrize("jobs", [1, 2])
def test_time_limit_in_this_process_and_in_workers(jobs):
    import time

    from sim.runs import batch
    t0 = time.monotonic()
    units = [batch.Unit(n, n) for n in ("a", "slow", "b", "deaf", "c")]
    results = batch.run_units(units, jobs=jobs, work=sleepy_unit, timeout=0.5)
    assert [r["result"] for r in results] == ["pass", "timed out", "pass", "timed out", "pass"]
    assert "still running after 0.5 s" in results[1]["details"][0]
    assert time.monotonic() - t0 < 20


def stubborn_unit(path, baselines_dir, update, **kw):
    """A unit that ignores its alarm and SIGTERM (as code stuck outside Python would)."""
    import time
    if path == "stuck":
        signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGALRM, signal.SIGTERM})
        time.sleep(60)
    return _result(path)


@pytest.mark.skipif(not hasattr(signal, "pthread_sigmask"), reason="signal masks (Unix)")
def test_unit_that_ignores_its_alarm_has_its_worker_stopped(monkeypatch):
    import time

    from sim.runs import batch
    monkeypatch.setattr(batch, "GRACE", 0.5)
    t0 = time.monotonic()
    units = [batch.Unit(n, n) for n in ("a", "stuck", "b", "c")]
    results = batch.run_units(units, jobs=2, work=stubborn_unit, timeout=1.0)
    assert [r["result"] for r in results] == ["pass", "timed out", "pass", "pass"]
    assert "its worker process was stopped" in results[1]["details"][0]
    assert time.monotonic() - t0 < 20


def test_interrupt_dropped_in_a_callback_comes_back(capsys):
    """Ctrl-C while compiled code calls back into Python (numba's cache does): Python would print
    "Exception ignored" with a traceback and carry on; it is delivered again instead, quietly."""
    import ctypes
    import time

    from sim.procs import interrupts_kept

    def callback():
        raise KeyboardInterrupt

    call = ctypes.CFUNCTYPE(None)(callback)
    reached = False
    with pytest.raises(KeyboardInterrupt):
        with interrupts_kept():
            call()              # dropped here...
            reached = True
            for _ in range(1000):
                time.sleep(0.001)   # ...and raised again here
    assert reached
    assert "Exception ignored" not in capsys.readouterr().err
