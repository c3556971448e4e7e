"""Trace files: exact numbers in CSV and Parquet, determinism, other readers, interruptions.

References: Python's ``float()`` and ``repr`` (correctly rounded parsing; ``repr`` gives the
shortest string that reads back to the same double: Python's documented float repr, after
Steele & White / Gay), the csv module, pandas and pyarrow (general-purpose readers).
"""
from __future__ import annotations

import csv
import json
import math
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sim.errors import InputError
from sim.files.scenario import load_scenario
from sim.runs.runner import run_scenario
from sim.traces.meta import meta_text, read_meta
from sim.traces.read import TraceReader
from sim.traces.writer import TraceWriter

from conftest import ROOT, SCENARIOS


def hard_doubles() -> np.ndarray:
    """Doubles that are hard to write and read back: shape (n,), no NaN."""
    rng = np.random.default_rng(2024)
    bits = rng.integers(0, 2 ** 63, size=3000, dtype=np.uint64) * np.uint64(2) + \
        rng.integers(0, 2, size=3000, dtype=np.uint64)                       # any sign, any exponent
    rand = bits.view(np.float64)
    rand = rand[~np.isnan(rand)]
    sub = (rng.integers(1, 2 ** 52, size=300, dtype=np.uint64)).view(np.float64)   # exponent 0: subnormal
    pow2 = np.ldexp(1.0, np.arange(-1074, 1024))                             # every power of two
    special = np.array([0.0, -0.0, np.inf, -np.inf, 5e-324, -5e-324, 2.2250738585072014e-308,
                        2.225073858507201e-308, 1.7976931348623157e308, 0.1, 0.2, 0.3, 1 / 3, 1e23, 8.41e21,
                        9007199254740992.0, 9007199254740994.0, 1e16, 1e-4, 9.999999999999999e-5, 123456.0,
                        # decimal expansions ending in 5 (ties for a formatter that rounds digits)
                        0.5, 0.125, 2.5, 1.5e-5, np.ldexp(1.0, -20), np.ldexp(3.0, -30), 1.25e-300])
    near = np.concatenate([np.nextafter(pow2[1:-1], 0.0), np.nextafter(pow2[1:-1], np.inf)])
    vals = np.concatenate([rand, sub, -sub, pow2, -pow2, special, -special, near])
    return vals


def digits(text: str) -> str:
    """Significant decimal digits of a number's text ('1.250e-05' -> '125')."""
    mant = text.lstrip("+-").lower().split("e")[0].replace(".", "")
    return mant.strip("0") or "0"


def write_trace(path, values, ncols=4):
    """``values`` (n,) into a trace with a ``t`` column (row number) and ``ncols - 1`` value columns."""
    n = -(-len(values) // (ncols - 1))
    block = np.full((n, ncols), np.nan)
    block[:, 0] = np.arange(n)
    block[:, 1:].reshape(-1)[:len(values)] = values
    w = TraceWriter(path, ["t"] + [f"v{j}" for j in range(1, ncols)])
    for i in range(0, n, 500):                 # several blocks
        w.write_block(block[i:i + 500])
    w.close()
    return block


def read_all(path) -> np.ndarray:
    with TraceReader(path) as rd:
        return np.vstack([p.values() for p in rd.pages()])


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_every_double_reads_back_identical(tmp_path, suffix):
    vals = hard_doubles()
    path = tmp_path / ("t" + suffix)
    block = write_trace(path, vals)
    got = read_all(path)
    assert got.shape == block.shape
    same = (got.view(np.uint64) == block.view(np.uint64)) | (np.isnan(got) & np.isnan(block))
    assert same.all(), block[~same][:5]                       # bit for bit, -0.0 and subnormals included


def test_csv_text_is_the_shortest_that_reads_back(tmp_path):
    """Reference: Python's float() reads each cell back to the same double, and its repr
    (the shortest round-trip string) has the same significant digits."""
    vals = hard_doubles()
    block = write_trace(tmp_path / "t.csv", vals)
    raw = (tmp_path / "t.csv").read_bytes()
    assert raw.endswith(b"\r\n") and raw.count(b"\r\n") == raw.count(b"\n") == len(block) + 1
    with open(tmp_path / "t.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["t", "v1", "v2", "v3"]
    cells = [c for r in rows[1:] for c in r[1:]]
    want = block[:, 1:].reshape(-1)
    for c, v in zip(cells, want):
        if math.isnan(v):
            assert c == ""                                    # NaN: a blank cell
            continue
        assert float(c) == v and math.copysign(1, float(c)) == math.copysign(1, v), (c, v)
        if math.isfinite(v):
            assert digits(c) == digits(repr(float(v))), (c, repr(float(v)))
        else:
            assert c in ("inf", "-inf")


@settings(max_examples=40, deadline=None)
@given(st.lists(st.one_of(st.floats(allow_nan=False).map(repr),
                          st.from_regex(r"\A[-+]?([0-9]{1,20}\.?[0-9]{0,20}|\.[0-9]{1,20})([eE][-+]?[0-9]{1,3})?\Z")),
                min_size=1, max_size=30))
def test_reading_decimal_text_rounds_like_python(tmp_path_factory, texts):
    """Any decimal text in a cell reads as the nearest double, halfway cases to even.

    Reference: Python's float(), correctly rounded (IEEE 754 round-half-even).
    """
    path = tmp_path_factory.mktemp("read") / "d.csv"
    halfway = ["9007199254740993", "9007199254740995", "2.4703282292062327e-324", "2.4703282292062328e-324",
               "1.00000000000000011102230246251565404236316680908203125"]
    cells = texts + halfway
    path.write_text("t,x\r\n" + "".join(f"{k},{c}\r\n" for k, c in enumerate(cells)))
    got = read_all(path)[:, 1]
    want = np.array([float(c) for c in cells])
    assert np.array_equal(got.view(np.uint64), want.view(np.uint64))


def test_same_run_twice_gives_identical_files(tmp_path):
    scen = load_scenario(SCENARIOS / "ward-cart-castor-settle.yaml")
    for suffix in (".csv", ".parquet"):
        run_scenario(scen, csv=tmp_path / ("a" + suffix))
        run_scenario(scen, csv=tmp_path / ("b" + suffix))
        assert (tmp_path / ("a" + suffix)).read_bytes() == (tmp_path / ("b" + suffix)).read_bytes(), suffix
        assert (tmp_path / ("a" + suffix + ".meta.json")).read_bytes() == \
            (tmp_path / ("b" + suffix + ".meta.json")).read_bytes()


def test_pandas_reads_csv_and_parquet_to_the_same_numbers(tmp_path):
    """Reference: pandas (its CSV reader, and pyarrow for Parquet) and pyarrow's metadata reader."""
    pd = pytest.importorskip("pandas")
    pq = pytest.importorskip("pyarrow.parquet")
    scen = load_scenario(SCENARIOS / "ward-cart-castor-settle.yaml")      # blank ICR cells in most rows
    res = run_scenario(scen, csv=tmp_path / "r.csv", keep=True)
    run_scenario(scen, csv=tmp_path / "r.parquet")
    a = pd.read_csv(tmp_path / "r.csv")
    b = pd.read_parquet(tmp_path / "r.parquet")
    assert list(a.columns) == list(b.columns) == list(res.trace)
    assert np.isnan(a["icr_x"].to_numpy()).sum() > 100
    for c, col in res.trace.items():
        assert np.array_equal(a[c].to_numpy(dtype=float), col, equal_nan=True), c
        assert np.array_equal(b[c].to_numpy(dtype=float), col, equal_nan=True), c
    kv = pq.read_metadata(tmp_path / "r.parquet").metadata[b"trundle"].decode()
    assert kv == (tmp_path / "r.parquet.meta.json").read_text() == meta_text(read_meta(tmp_path / "r.parquet"))
    assert json.loads(kv)["rows"] == len(a) == res.rows
    # without its sidecar a Parquet trace still says what produced it
    os.remove(tmp_path / "r.parquet.meta.json")
    assert read_meta(tmp_path / "r.parquet")["scenario_hash"] == scen.scenario_hash


def test_full_rate_run_against_its_thinned_baseline(tmp_path, cli, write_files):
    """A 2501-step run is recorded as a baseline keeping every 2nd row; the full-rate run,
    compared with it, is within tolerance at the 1251 times both contain."""
    files = write_files(tmp_path, {"s/long.yaml": f"""\
        robot: {SCENARIOS / 'robots' / 'ward-cart.yaml'}
        step: 0.01
        duration: 25
        script:
          - {{at: 0, twist: {{vx: 0.3, omega: 0.2}}}}
          - {{at: 12, twist: {{vx: 0.2, omega: -0.3}}}}
        """})
    assert cli(["batch", tmp_path / "s", "--baselines", tmp_path / "base", "--update", "--jobs", "1"])[0] == 0
    base = tmp_path / "base" / "long.csv"
    assert json.loads((tmp_path / "base" / "long.csv.meta.json").read_text())["every"] == 2
    assert cli(["run", files["s/long.yaml"], "--csv", tmp_path / "full.csv"])[0] == 0
    code, out, err = cli(["diff", base, tmp_path / "full.csv"])
    assert code == 0, err
    assert "result    WITHIN TOLERANCE" in out
    assert "compared 1251 rows at times in both; none only in A; 1250 only in B (t = 0.01, 0.03, 0.05" in out
    # run --baseline keeping every 3rd row: compared at every 6th step and the last
    code, out, _ = cli(["run", files["s/long.yaml"], "--baseline", base, "--every", "3"])
    assert code == 0 and "WITHIN TOLERANCE" in out and "compared 418 rows at times in both" in out
    # the same run as Parquet: equal numbers at every row
    assert cli(["run", files["s/long.yaml"], "--csv", tmp_path / "full.parquet"])[0] == 0
    code, out, _ = cli(["diff", tmp_path / "full.csv", tmp_path / "full.parquet"])
    assert code == 0 and "IDENTICAL" in out


def test_parquet_in_every_reader(tmp_path, cli, write_files):
    """Plots, --fit, command logs, measured returns and baselines read Parquet as they read CSV."""
    pl = pytest.importorskip("polars")
    from sim.runs import calibrate as C
    from sim.runs import geomfit as G
    from sim.view.plot import read_trace
    from sim.files.robotfile import load_robot

    scen = load_scenario(SCENARIOS / "ward-cart-odometry.yaml")
    run_scenario(scen, csv=tmp_path / "o.csv")
    run_scenario(scen, csv=tmp_path / "o.parquet")
    a, b = read_trace(tmp_path / "o.csv"), read_trace(tmp_path / "o.parquet")
    assert a.columns == b.columns and a.rows == b.rows
    for c in a.columns:
        assert np.array_equal(a[c], b[c], equal_nan=True), c
    robot = load_robot(SCENARIOS / "robots" / "ward-cart.yaml")
    ra, rb = (G.read_record(tmp_path / f, robot, ["left", "right"]) for f in ("o.csv", "o.parquet"))
    assert np.array_equal(ra.dphi, rb.dphi) and np.array_equal(ra.pose, rb.pose)
    # a command log as Parquet replays like the CSV one
    log = pl.read_csv(SCENARIOS / "logs" / "ward-cart-commands.csv")
    log.write_parquet(tmp_path / "log.parquet")
    text = (SCENARIOS / "ward-cart-replay.yaml").read_text()
    text = text.replace("robots/", str(SCENARIOS / "robots") + "/").replace("logs/ward-cart-commands.csv", "log.parquet")
    write_files(tmp_path, {"replay.yaml": text})
    r1 = run_scenario(load_scenario(tmp_path / "replay.yaml"), keep=True).trace
    r2 = run_scenario(load_scenario(SCENARIOS / "ward-cart-replay.yaml"), keep=True).trace
    assert all(np.array_equal(r1[c], r2[c], equal_nan=True) for c in r1)
    # measured return errors
    pl.DataFrame({"direction": ["cw", "ccw", "cw", "ccw", "cw", "ccw"], "x": [0.1, -0.2, 0.1, -0.2, 0.1, -0.2],
                  "y": [0.05, 0.3, 0.05, 0.3, 0.05, 0.3]}).write_parquet(tmp_path / "m.parquet")
    runs = C.read_runs(tmp_path / "m.parquet")
    assert runs.cw.tolist() == [[0.1, 0.05]] * 3 and runs.ccw.tolist() == [[-0.2, 0.3]] * 3
    # a Parquet baseline
    code, out, _ = cli(["run", SCENARIOS / "ward-cart-odometry.yaml", "--baseline", tmp_path / "o.parquet"])
    assert code == 0 and "IDENTICAL" in out


def test_bad_parquet_input(tmp_path, cli, expect_input_error, write_files):
    pl = pytest.importorskip("polars")
    pl.DataFrame({"t": [0.0, 0.01], "x": ["a", "b"]}).write_parquet(tmp_path / "s.parquet")
    code, _, err = cli(["diff", tmp_path / "s.parquet", tmp_path / "s.parquet"])
    expect_input_error(code, err, tmp_path / "s.parquet", None, "column 'x' holds String")
    (tmp_path / "c.parquet").write_bytes(b"PAR1" + b"\0" * 40)
    code, _, err = cli(["plot", tmp_path / "c.parquet", "-o", tmp_path / "c.png"])
    expect_input_error(code, err, tmp_path / "c.parquet", None, "not a readable Parquet file")
    pl.DataFrame({"t": [0.0, None, 0.02], "x": [1.0, 2.0, 3.0]}).write_parquet(tmp_path / "n.parquet")
    code, _, err = cli(["diff", tmp_path / "n.parquet", tmp_path / "n.parquet"])
    expect_input_error(code, err, tmp_path / "n.parquet", None, "row 2: column 't' is blank")
    pl.DataFrame({"t": [0.0, 0.5], "vx": [0.1, None]}).write_parquet(tmp_path / "log.parquet")
    write_files(tmp_path, {"robot.yaml": (SCENARIOS / "robots" / "ward-cart.yaml").read_text(),
                           "s.yaml": "robot: robot.yaml\nstep: 0.01\nduration: 1\ncommands: log.parquet\n"})
    code, _, err = cli(["run", tmp_path / "s.yaml"])          # (the log named as the scenario names it)
    assert code == 2 and "log.parquet: row 2: column 'vx': expected a number, got a blank cell" in err


def _lines_and_sidecar(path):
    raw = path.read_bytes()
    assert raw.endswith(b"\r\n")
    rows = raw.split(b"\r\n")[1:-1]
    ncols = raw.split(b"\r\n")[0].count(b",") + 1
    assert all(r.count(b",") == ncols - 1 for r in rows)        # whole rows only
    return rows, json.loads(path.with_name(path.name + ".meta.json").read_text())


@pytest.mark.parametrize("sig, suffix", [(signal.SIGINT, ".csv"), (signal.SIGTERM, ".csv"),
                                         (signal.SIGINT, ".parquet")])
def test_interrupted_run_keeps_whole_rows_and_the_sidecar_counts_them(tmp_path, write_files, sig, suffix):
    """Ctrl-C or SIGTERM while a long run streams its trace: exit 130, the file holds whole rows,
    and the sidecar's row count is exactly the number of rows in it."""
    files = write_files(tmp_path, {"long.yaml": f"""\
        robot: {SCENARIOS / 'robots' / 'ward-cart.yaml'}
        step: 0.001
        duration: 2000
        script:
          - {{at: 0, wheels: {{left: 3, right: 4}}}}
        """})
    out = tmp_path / ("run" + suffix)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, "-m", "sim", "run", files["long.yaml"], "--csv", out],
                            cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    part = tmp_path / ("run" + suffix + ".part")
    end = time.monotonic() + 120
    while time.monotonic() < end and proc.poll() is None:
        if part.exists() and part.stat().st_size > 200_000:
            break
        time.sleep(0.02)
    proc.send_signal(sig)
    stdout, stderr = proc.communicate(timeout=120)
    assert not part.exists() and "Traceback" not in stderr
    if suffix == ".parquet" and proc.returncode == 2:
        # known limit: polars' Parquet writer can be cut off by the interrupt before its footer;
        # then no file is kept, and the run says so (never a broken file in place)
        assert "no trace kept" in stderr and not out.exists()
        return
    assert proc.returncode == 130, stderr
    assert "INTERRUPTED" in stdout
    if suffix == ".csv":
        rows, meta = _lines_and_sidecar(out)
        n = len(rows)
    else:
        n = len(read_all(out))
        meta = json.loads((tmp_path / "run.parquet.meta.json").read_text())
    assert 0 < n < 2_000_001 and meta["rows"] == n and meta["complete"] is False
    t = read_all(out)[:, 0]
    assert np.allclose(np.diff(t), 0.001, atol=1e-9)


def test_writer_holds_whole_blocks_when_interrupted_in_the_middle(tmp_path, monkeypatch):
    """A KeyboardInterrupt raised while a block is being handed over: the file gets whole rows,
    and ``rows`` and the sidecar count them."""
    import sim.traces.writer as W

    meta = {"trundle": "test", "columns": ["t", "x"]}
    w = TraceWriter(tmp_path / "w.csv", ["t", "x"], meta)
    w.write_block(np.column_stack([np.arange(10.0), np.arange(10.0)]))
    real = W._Worker.put

    def put_then_interrupt(self, item):
        real(self, item)
        raise KeyboardInterrupt

    monkeypatch.setattr(W._Worker, "put", put_then_interrupt)
    with pytest.raises(KeyboardInterrupt):
        w.write_block(np.column_stack([np.arange(10.0, 15.0), np.zeros(5)]))
    monkeypatch.setattr(W._Worker, "put", real)
    w.close(complete=False)
    rows, side = _lines_and_sidecar(tmp_path / "w.csv")
    assert len(rows) == 15 == side["rows"] == w.rows and side["complete"] is False
    with pytest.raises(InputError):
        TraceWriter(tmp_path, ["t"])                     # a folder: no partial file, an input error
