"""Mutation fuzzing of every file kind Trundle reads (issue 12).

Hypothesis mutates the bundled robot and scenario files, a command log and calibration
files (measured square-test returns as YAML and CSV, a recorded run for the geometry
fit) with hostile edits: numbers replaced by huge, non-finite or malformed ones, tags,
control characters and stray bytes, lines deleted, repeated or swapped, files cut short.
Each input goes through the command line in-process (``sim.cli.main``) and must end
with exit 0, 1 or 2, never a traceback; exit 2 must be one ``file:line: message`` line
of bounded length and leave no output file; no run may leave a ``.part`` behind.

Runs are kept short (at most ``MAX_STEPS`` steps) so that each input takes milliseconds.
The counts are printed at the end of the module (``pytest -s``).  The suite runs a fixed
set (derandomized); ``TRUNDLE_FUZZ_SCALE=20`` runs twenty times as many random inputs,
for a longer campaign by hand.
"""
from __future__ import annotations

import collections
import os
import pathlib
import re
import shutil
import tempfile
from unittest import mock

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import ROBOTS, SCENARIOS, cli

MAX_STEPS = 3000
STATS = collections.Counter()

HOSTILE = [
    "1e11", "-1.0e7", "9" * 5000, "9" * 400, "1.0.0", ".nan", "-.inf", "1e999", "0x1F", "1_000", "1:30", "0",
    "-0", "1e-320", "!!float abc", "!!int 1.5", "!!bool maybe", "!!python/object/apply:os.system ['true']",
    "!!binary aGk=", "!!timestamp 2001-12-14", "2001-12-14", "~", "[]", "{}", "*nowhere", "&a 1", "'30 deg'",
    "1e999 deg", "30 dge", "\x00", "\x07", "é", "'" + "x" * 300 + "'", "[[[[[[[[", "- ", ": ", "\t", "<<: *a",
    "!local x", "=", "true", "null", "\"\\q\"", "%YAML 1.1", "---", "...", "? ", "|", ">",
]
CELLS = ["nan", "inf", "-inf", "1e7", "-1e7", "9" * 400, "", "x", "1,2", '"', "\"unterminated", "-0", "1_0",
         "0x10", " 5 ", "1e-320", "١", "t", "\r", "\t3"]
NUMBER = re.compile(r"-?\d+(?:\.\d+)?(?:[eE][-+]?\d+)?")


def _mutate(data: bytes, ops, cells=False) -> bytes:
    """Apply ``ops`` ``(kind, position, choice)`` to ``data``."""
    pool = CELLS if cells else HOSTILE
    for kind, pos, pick in ops:
        value = pool[pick % len(pool)].encode("utf-8")
        if kind == "number":                      # one number replaced by a hostile value
            text = data.decode("utf-8", "surrogateescape")
            found = list(NUMBER.finditer(text))
            if found:
                m = found[pos % len(found)]
                data = (text[:m.start()] + value.decode("utf-8") + text[m.end():]).encode("utf-8", "surrogateescape")
        elif kind == "value":                     # what follows one separator (': ' or ',') replaced
            seps = [m.end() for m in re.finditer(rb",|: ", data)]
            if seps:
                at = seps[pos % len(seps)]
                end = min([i for i in (data.find(b",", at), data.find(b"\n", at), data.find(b"}", at)) if i >= 0],
                          default=len(data))
                data = data[:at] + value + data[end:]
        elif kind in ("delete", "repeat", "swap"):
            lines = data.splitlines(keepends=True)
            if len(lines) > 1:
                i = pos % len(lines)
                j = (i + 1) % len(lines)
                if kind == "delete":
                    del lines[i]
                elif kind == "repeat":
                    lines.insert(i, lines[i])
                else:
                    lines[i], lines[j] = lines[j], lines[i]
                data = b"".join(lines)
        elif kind == "insert":                    # a hostile token anywhere
            at = pos % (len(data) + 1)
            data = data[:at] + value + data[at:]
        elif kind == "cut":
            data = data[:pos % (len(data) + 1)]
        elif kind == "byte":
            if data:
                at = pos % len(data)
                data = data[:at] + bytes([pick % 256]) + data[at + 1:]
    return data


OPS = st.lists(st.tuples(st.sampled_from(["number", "value", "delete", "repeat", "swap", "insert", "cut", "byte"]),
                         st.integers(0, 1 << 20), st.integers(0, 255)), min_size=1, max_size=3)
SCALE = int(os.environ.get("TRUNDLE_FUZZ_SCALE", "1"))
FUZZ = settings(deadline=None, derandomize=SCALE == 1, database=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow,
                                       HealthCheck.data_too_large])


def _copied(data: bytes, message: str, n: int = 60) -> str:
    """A stretch of ``n`` characters of the input that the message repeats, if any."""
    text = data.decode("utf-8", "replace")
    for line in text.splitlines():
        for i in range(0, len(line) - n + 1, 8):
            if line[i:i + n] in message:
                return line[i:i + n]
    return ""


def _check(kind, argv, folder, outputs=(), data=b""):
    """Run ``argv``; count and check the outcome (see the module docstring).  ``data``: the
    mutated input, of which an error message may quote a few dozen characters at most."""
    STATS[kind] += 1
    try:
        with mock.patch("sim.files.scenario.MAX_STEPS", MAX_STEPS):
            code, out, err = cli(argv)
    except BaseException as exc:  # noqa: BLE001 - counted, then failed
        STATS["tracebacks"] += 1
        raise AssertionError(f"{kind}: {argv} raised {exc!r}") from exc
    if code not in (0, 1, 2) or "Traceback" in err:
        STATS["wrong exits"] += 1
        raise AssertionError(f"{kind}: exit {code}: {err[:2000]}")
    STATS[f"exit {code}"] += 1
    left = sorted(str(p) for p in pathlib.Path(folder).rglob("*.part"))
    if code == 2:
        left += [str(p) for p in outputs if os.path.exists(p)]
        lines = err.strip().splitlines()
        if len(lines) != 1 or len(lines[0]) > 2000 or not re.match(r"^.+?(:\d+)?: \S", lines[0]):
            STATS["wrong exits"] += 1
            raise AssertionError(f"{kind}: message not one file:line line: {err[:2000]!r}")
        if _copied(data, lines[0]):
            STATS["wrong exits"] += 1
            raise AssertionError(f"{kind}: message copies the input: {_copied(data, lines[0])!r} in {err[:2000]!r}")
    if left:
        STATS["leftovers"] += 1
        raise AssertionError(f"{kind}: left {left}")
    return code


@pytest.fixture(scope="module", autouse=True)
def _report():
    yield
    print(f"\nfuzz: {sum(STATS[k] for k in KINDS)} inputs "
          + ", ".join(f"{k} {STATS[k]}" for k in KINDS)
          + f"; exits 0/1/2: {STATS['exit 0']}/{STATS['exit 1']}/{STATS['exit 2']}; tracebacks "
            f"{STATS['tracebacks']}, wrong exits {STATS['wrong exits']}, leftovers {STATS['leftovers']}")


KINDS = ("robot", "scenario", "command log", "returns", "recorded run")
ROBOT_SEEDS = sorted(ROBOTS.glob("*.yaml"))
SCENARIO_SEEDS = sorted(SCENARIOS.glob("*.yaml"))


def _fresh(tmp_path) -> pathlib.Path:
    return pathlib.Path(tempfile.mkdtemp(dir=tmp_path))


@settings(FUZZ, max_examples=90 * SCALE)
@given(seed=st.sampled_from(ROBOT_SEEDS), ops=OPS)
def test_fuzz_robot_files(seed, ops, tmp_path):
    d = _fresh(tmp_path)
    p = d / "robot.yaml"
    p.write_bytes(_mutate(seed.read_bytes(), ops))
    _check("robot", ["analyze", p], d, data=p.read_bytes())
    shutil.rmtree(d)


@settings(FUZZ, max_examples=90 * SCALE)
@given(seed=st.sampled_from(SCENARIO_SEEDS), ops=OPS, other_ops=st.one_of(st.just([]), OPS), which=st.integers(0, 7))
def test_fuzz_scenario_files(seed, ops, other_ops, which, tmp_path):
    """Mutated scenarios (and sometimes a file they name: robot, route, floor, command log),
    run with a CSV trace."""
    d = _fresh(tmp_path)
    for folder in ("robots", "logs", "routes", "floors"):
        if (SCENARIOS / folder).is_dir():
            shutil.copytree(SCENARIOS / folder, d / folder)
    text = seed.read_bytes()
    named = re.findall(rb"^(?:robot|route|floor|commands): (\S+)", text, re.M)
    data = b""
    if other_ops and named:
        target = d / named[which % len(named)].decode()
        if target.is_file():
            target.write_bytes(_mutate(target.read_bytes(), other_ops))
            data = target.read_bytes()
    p = d / "s.yaml"
    p.write_bytes(_mutate(text, ops))
    out = d / "out.csv"
    data = p.read_bytes() + data
    code = _check("scenario", ["run", p, "--csv", out], d, [out, str(out) + ".meta.json"], data)
    if code != 2:
        assert out.exists() and os.path.exists(str(out) + ".meta.json")
    shutil.rmtree(d)


@settings(FUZZ, max_examples=60 * SCALE)
@given(ops=OPS, cells=st.booleans())
def test_fuzz_command_logs(ops, cells, tmp_path):
    d = _fresh(tmp_path)
    shutil.copytree(SCENARIOS / "robots", d / "robots")
    (d / "logs").mkdir()
    log = (SCENARIOS / "logs" / "ward-cart-commands.csv").read_bytes()
    (d / "logs" / "ward-cart-commands.csv").write_bytes(_mutate(log, ops, cells=cells))
    shutil.copy(SCENARIOS / "ward-cart-replay.yaml", d / "s.yaml")
    out = d / "out.csv"
    _check("command log", ["run", d / "s.yaml", "--csv", out], d, [out],
           (d / "logs" / "ward-cart-commands.csv").read_bytes())
    shutil.rmtree(d)


RETURNS_CSV = ("direction,x,y\n" + "".join(f"cw,{-0.02 + 0.001 * i},{-0.021 + 0.001 * i}\n" for i in range(4))
               + "".join(f"ccw,{0.01 + 0.001 * i},{-0.011 - 0.001 * i}\n" for i in range(4))).encode()
RETURNS_YAML = ("side: 4\ncw:\n" + "".join(f"  - [{-0.02 + 0.001 * i}, {-0.021 + 0.001 * i}]\n" for i in range(4))
                + "ccw:\n" + "".join(f"  - {{x: {0.01 + 0.001 * i}, y: {-0.011 - 0.001 * i}}}\n"
                                     for i in range(4))).encode()


@settings(FUZZ, max_examples=40 * SCALE)
@given(yaml_form=st.booleans(), ops=OPS)
def test_fuzz_square_test_returns(yaml_form, ops, tmp_path):
    d = _fresh(tmp_path)
    src = d / ("runs.yaml" if yaml_form else "runs.csv")
    src.write_bytes(_mutate(RETURNS_YAML if yaml_form else RETURNS_CSV, ops, cells=not yaml_form))
    out = d / "fixed.yaml"
    _check("returns", ["calibrate", ROBOTS / "ward-cart.yaml", "--measured", src, "-o", out], d, [out],
           src.read_bytes())
    shutil.rmtree(d)


@pytest.fixture(scope="module")
def recorded_run(tmp_path_factory):
    """A short run of the ward cart with encoders: t, x, y, theta and the wheel counts (120 rows)."""
    d = tmp_path_factory.mktemp("rec")
    robot = (ROBOTS / "ward-cart.yaml").read_text()
    (d / "cart.yaml").write_text(robot)
    (d / "s.yaml").write_text("robot: cart.yaml\nstep: 0.05\nduration: 6\nscript:\n  - {at: 0, twist: {vx: 0.4, "
                              "omega: 0.3}}\n  - {at: 3, twist: {vx: 0.3, omega: -0.4}}\nodometry: {}\n")
    code, _, err = cli(["run", d / "s.yaml", "--csv", d / "full.csv"])
    assert code == 0, err
    rows = [ln.split(",") for ln in (d / "full.csv").read_text().splitlines()]
    keep = [rows[0].index(c) for c in ("t", "x", "y", "theta", "left.counts", "right.counts")]
    return "".join(",".join(r[i] for i in keep) + "\n" for r in rows).encode()


@settings(FUZZ, max_examples=30 * SCALE)
@given(ops=OPS, cells=st.booleans())
def test_fuzz_recorded_runs(ops, cells, recorded_run, tmp_path):
    d = _fresh(tmp_path)
    src = d / "run.csv"
    src.write_bytes(_mutate(recorded_run, ops, cells=cells))
    out = d / "fitted.yaml"
    _check("recorded run", ["calibrate", ROBOTS / "ward-cart.yaml", "--fit", src, "-o", out], d, [out],
           src.read_bytes())
    shutil.rmtree(d)
