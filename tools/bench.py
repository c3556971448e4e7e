"""Benchmarks for Trundle's engine, trace writer and reader, batch runner and start-up.

    python tools/bench.py [--repeat 3] [--skip 4,6] [--only 13,14] [--root OTHER_CHECKOUT]

Each case runs in a fresh Python process (so peak memory is its own), several
times; the table shows the median.  Cases:

1. four-module steered base, dt 1 ms, 1,000 s, twist commands changing every
   2 s with rate-limited steering, no CSV; also the ratio against
   tools/naive_loop.py (build the stacked matrix, pinv, forward Euler per
   step) timed in the same process on the first steps of the same case;
2. the same, writing a CSV row for every step;
3. differential drive with two castors, dt 1 ms, 1,000 s, wheel commands
   changing every 0.5 s;
4. ``trundle batch`` over 200 generated 10 s scenarios, ``--jobs 1`` and all cores, run
   alternately (the ratio is the median of the pairs' ratios);
5. start-up: ``trundle analyze`` on a small base, whole process;
6. peak memory of a one-hour run at 1 kHz streaming CSV;
7. the per-step API: ``Simulator.step(twist=...)`` in a Python loop on the
   four-module steered base (the path of a user's own controller), beside the
   naive loop;
8. the first call in a fresh process: import, load the base, one stretch, with
   numba's on-disk cache warm and cold (an empty cache folder), against the
   same work once everything is loaded;
9. ``trundle route`` on the bundled ward corridor route with three bases, whole process.
10. ``trundle serve`` in lockstep on loopback, the ward cart: round trips per second with
   ``steps: 1`` (a twist, one step, the reply with the counts), repeating one twist line and
   cycling through 1,000 different ones (each read afresh), from a lean client in this
   process (raw socket with TCP_NODELAY, requests encoded beforehand, replies not decoded),
   with the server's and the client's CPU per round trip; beside it the engine's own
   single-step rate (``Simulator.step`` in a loop) and a bare standard-library echo of one
   canned reply per line, driven by the same client, the two floors it stands on; and where
   the server's CPU goes, measured in this process without sockets;
11. the same server with ``steps: 100``: engine steps per second;
12. clearance of a 100,000-row run (the four-module base weaving along a 50 m corridor, dt
    1 ms) against 200 wall segments: the nearest approach to every segment and the first
    contact (what the checks compute), then the same with the swept area; and the peak memory
    the measuring adds over 10^5 and 10^6 rows fed in chunks (flat: it keeps only minima);
13. ``trundle study`` of 1,000 variants (wheel radius x track x max_spin of the ward cart,
   10 x 10 x 10) of a 10 s scenario at 100 Hz, no cache, whole process, ``--jobs 1``
   and all cores; beside it the time one variant takes in a warm process, split into
   building and checking it (robot, scenario) and running it.
14. the trace writer alone: the 1,000,001 rows of case 1's run, kept in memory, handed to
    ``TraceWriter`` in blocks of 32,768 rows, as CSV and as Parquet: rows/s, CPU seconds (all
    threads) and file size;
15. ``trundle diff`` of two million-row traces (the two-castor cart of case 3): identical, and
    every row differing (the second run's right wheel 0.1 um larger), as CSV and as Parquet;
    wall time, CPU seconds of the process (user + system) and peak memory.
16. a command log with a command for every step: the ward cart replaying a 1 kHz log of
    wheel commands (200,001 rows, read before timing), 200 s at dt 1 ms, no CSV;

Cases 14 and 15 also print the load average (1 min) when they ran: on a shared
machine the wall time follows the load, the CPU seconds much less.

Peak memory is the largest resident size of the process (and of any processes it
starts), sampled.  CPU seconds are worth a look on a shared machine, where wall
time also measures the neighbours.  ``--root DIR`` measures the ``sim`` package
of another checkout (say the previous version, from ``git worktree add``) with
this file's cases 1 to 8, 10, 11 (the server; the split without sockets is always
this checkout's), 13 and 14.

Scenario files are generated (seeded) into a temporary folder.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import platform
import random
import resource
import statistics
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
ROBOTS = os.path.join(ROOT, "scenarios", "robots")
NAIVE_STEPS = 20_000
CASES = [str(c) for c in range(1, 17)]


def _write_cases(folder: str, duration: float = 1000.0) -> None:
    rng = random.Random(7)
    lines = [f"robot: {os.path.join(ROBOTS, 'quad-steer.yaml')}", "step: 0.001",
             f"duration: {duration:g}", "script:"]
    for i in range(int(duration // 2)):
        vx, vy, w = (round(rng.uniform(-a, a), 3) for a in (0.8, 0.5, 0.6))
        lines.append(f"  - {{at: {2 * i}, twist: {{vx: {vx}, vy: {vy}, omega: {w}}}}}")
    with open(os.path.join(folder, "steered.yaml"), "w") as fh:
        fh.write("\n".join(lines) + "\n")
    lines = [f"robot: {os.path.join(ROBOTS, 'ward-cart.yaml')}", "step: 0.001",
             f"duration: {duration:g}", "script:"]
    for i in range(int(duration * 2)):
        left, right = (round(rng.uniform(-6, 8), 2) for _ in range(2))
        lines.append(f"  - {{at: {i * 0.5:g}, wheels: {{left: {left}, right: {right}}}}}")
    with open(os.path.join(folder, "castors.yaml"), "w") as fh:
        fh.write("\n".join(lines) + "\n")
    hour = [f"robot: {os.path.join(ROBOTS, 'ward-cart.yaml')}", "step: 0.001", "duration: 3600",
            "script:"] + [f"  - {{at: {i * 5}, wheels: {{left: {3 + i % 3}, right: {4 - i % 2}}}}}"
                          for i in range(720)]
    with open(os.path.join(folder, "hour.yaml"), "w") as fh:
        fh.write("\n".join(hour) + "\n")
    lines = [f"robot: {os.path.join(ROBOTS, 'quad-steer.yaml')}", "floor: corridor.geojson", "step: 0.001",
             "duration: 99.999", "start: {x: -24, y: 0}", "script:"]
    for i in range(50):                     # weaving: the heading swings +-0.08 rad and back
        w = (1, -1, -1, 1)[i % 4] * 0.04
        lines.append(f"  - {{at: {2 * i}, twist: {{vx: 0.45, vy: 0, omega: {w}}}}}")
    walls = ",\n".join(
        f'{{"type": "Feature", "properties": {{"name": "{side}-{i}"}}, "geometry": {{"type": "LineString", '
        f'"coordinates": [[{-25 + 0.5 * i}, {y}], [{-24.5 + 0.5 * i}, {y}]]}}}}'
        for side, y in (("north", 0.9), ("south", -0.9)) for i in range(100))
    with open(os.path.join(folder, "corridor.geojson"), "w") as fh:
        fh.write('{"type": "FeatureCollection", "features": [\n' + walls + "\n]}\n")
    with open(os.path.join(folder, "weave.yaml"), "w") as fh:
        fh.write("\n".join(lines) + "\n")
    log = ["t,left.spin,right.spin"] + [f"{k / 1000:g},{3 + 2 * math.sin(k / 700):.6f},{3 + 2 * math.cos(k / 500):.6f}"
                                         for k in range(200_001)]
    with open(os.path.join(folder, "dense-log.csv"), "w") as fh:
        fh.write("\n".join(log) + "\n")
    with open(os.path.join(folder, "dense.yaml"), "w") as fh:
        fh.write(f"robot: {os.path.join(ROBOTS, 'ward-cart.yaml')}\nstep: 0.001\nduration: 200\n"
                 "commands: dense-log.csv\n")
    batch = os.path.join(folder, "batch")
    os.makedirs(batch, exist_ok=True)
    names = ["ward-cart", "tote-mecanum", "quad-steer", "greenhouse-rover", "camera-dolly"]
    for i in range(200):
        robot = names[i % len(names)]
        vx, w = round(rng.uniform(0.1, 0.5), 3), round(rng.uniform(-0.4, 0.4), 3)
        text = (f"robot: {os.path.join(ROBOTS, robot + '.yaml')}\nstep: 0.001\nduration: 10\n"
                f"script:\n  - {{at: 0, twist: {{vx: {vx}, omega: {w}}}}}\n  - {{at: 6, stop: true}}\n"
                f"checks:\n  - slip_below: 1.0\n")
        with open(os.path.join(batch, f"run-{i:03d}.yaml"), "w") as fh:
            fh.write(text)


def _tree_rss_mb(root: int) -> float:
    """MB resident in process ``root`` and all its descendants (Linux /proc)."""
    kids, rss = {}, {}
    for d in os.listdir("/proc"):
        if not d.isdigit():
            continue
        try:
            with open(f"/proc/{d}/stat") as fh:
                parts = fh.read().rsplit(")", 1)[1].split()
            kids.setdefault(int(parts[1]), []).append(int(d))
            rss[int(d)] = int(parts[21]) * os.sysconf("SC_PAGE_SIZE")
        except (OSError, IndexError, ValueError):
            continue
    total, todo = 0, [root]
    while todo:
        p = todo.pop()
        total += rss.get(p, 0)
        todo += kids.get(p, [])
    return total / 1e6


class _PeakTree:
    """Samples the resident memory of this process and its descendants every 0.1 s."""

    def __enter__(self):
        import threading
        self.peak, self._stop = 0.0, threading.Event()
        self._t = threading.Thread(target=self._run, daemon=True)
        self._t.start()
        return self

    def _run(self):
        while not self._stop.is_set():
            self.peak = max(self.peak, _tree_rss_mb(os.getpid()))
            self._stop.wait(0.1)

    def __exit__(self, *exc):
        self._stop.set()
        self._t.join()
        own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
        self.peak = max(self.peak, own)


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _write_diff_cases(folder: str) -> None:
    """The pair of case 15: the two-castor cart, and the same with its right wheel 0.1 um larger."""
    with open(os.path.join(ROBOTS, "ward-cart.yaml")) as fh:
        text = fh.read()
    changed = text.replace("name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08,",
                           "name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.0800001,")
    assert changed != text
    with open(os.path.join(folder, "ward-cart-b.yaml"), "w") as fh:
        fh.write(changed)
    with open(os.path.join(folder, "castors.yaml")) as fh:
        scen = fh.read()
    with open(os.path.join(folder, "castors-b.yaml"), "w") as fh:
        fh.write(scen.replace(os.path.join(ROBOTS, "ward-cart.yaml"), os.path.join(folder, "ward-cart-b.yaml")))


def _warm(scen, csv=None) -> None:
    """Run 10 steps of ``scen`` first (writing ``csv`` if given), so that a steady-state
    case does not count the first call's loading of compiled code from the cache:
    case 8 measures that on its own."""
    from dataclasses import replace
    from sim import run_scenario
    run_scenario(replace(scen, duration=9 * scen.step), csv=csv)
    for path in (csv, f"{csv}.meta.json") if csv else ():
        if os.path.exists(path):
            os.remove(path)


def _one(case: str, folder: str, root: str = ROOT) -> dict:
    """Run one case in this process; return measurements."""
    sys.path.insert(0, root)
    from sim import load_scenario, run_scenario
    if case in ("1", "2"):
        scen = load_scenario(os.path.join(folder, "steered.yaml"))
        csv = os.path.join(folder, "trace.csv") if case == "2" else None
        _warm(scen, csv)
        t = time.perf_counter()         # peak memory: the process's own (no sampling thread to compete)
        res = run_scenario(scen, csv=csv)
        wall = time.perf_counter() - t
        out = {"steps": res.rows, "wall": wall, "peak_mb": _peak_mb()}
        if case == "1":
            sys.path.insert(0, os.path.join(ROOT, "tools"))
            import naive_loop
            from sim.runs.runner import entry_steps
            ks = entry_steps(scen.script, scen.step)
            script = [(k, c.value) for k, c in zip(ks, scen.script) if c.kind == "twist"]
            t = time.perf_counter()
            naive_loop.run(scen.robot, scen.step, script, NAIVE_STEPS)
            out["naive_steps_per_s"] = NAIVE_STEPS / (time.perf_counter() - t)
        if csv:
            out["csv_mb"] = os.path.getsize(csv) / 1e6
            os.remove(csv)
        return out
    if case in ("3", "16"):
        scen = load_scenario(os.path.join(folder, "castors.yaml" if case == "3" else "dense.yaml"))
        _warm(scen)
        t = time.perf_counter()
        res = run_scenario(scen)
        return {"steps": res.rows, "wall": time.perf_counter() - t, "peak_mb": _peak_mb()}
    if case == "14":
        import numpy as np
        from sim.traces import writer as W
        scen = load_scenario(os.path.join(folder, "steered.yaml"))
        res = run_scenario(scen, keep=True)
        header = list(res.trace)
        rows = np.column_stack([res.trace[c] for c in header])
        del res
        out = {"rows": len(rows), "columns": len(header)}
        for fmt in ("csv", "parquet"):
            if fmt == "parquet" and not hasattr(W, "is_parquet_path"):
                continue                                  # a version without Parquet
            path = os.path.join(folder, "w." + fmt)
            t, c = time.perf_counter(), time.process_time()
            w = W.TraceWriter(path, header)
            for i in range(0, len(rows), 32768):
                w.write_block(rows[i:i + 32768])
            w.close()
            out[fmt] = {"wall": time.perf_counter() - t, "cpu": time.process_time() - c,
                        "mb": os.path.getsize(path) / 1e6}
            os.remove(path)
        return out
    if case == "7":
        from sim import Simulator, load_robot
        robot = load_robot(os.path.join(ROBOTS, "quad-steer.yaml"))
        sim = Simulator(robot, 0.001)
        twists = [(0.5, 0.2, 0.3), (0.4, -0.1, -0.2)]
        for _ in range(1000):
            sim.step(twist=twists[0])
        n = 200_000
        t = time.perf_counter()
        for i in range(n):
            sim.step(twist=twists[(i // 2000) % 2])
        wall = time.perf_counter() - t
        sys.path.insert(0, os.path.join(ROOT, "tools"))
        import naive_loop
        t = time.perf_counter()
        naive_loop.run(robot, 0.001, [(0, twists[0])], NAIVE_STEPS)
        return {"steps": n, "wall": wall, "peak_mb": _peak_mb(),
                "naive_steps_per_s": NAIVE_STEPS / (time.perf_counter() - t)}
    if case == "8":
        t0 = time.perf_counter()
        from sim import Simulator, load_robot
        from sim.engine import simulator  # noqa: F401  (the engine's imports, numba among them)
        robot = load_robot(os.path.join(ROBOTS, "quad-steer.yaml"))
        imports = time.perf_counter() - t0
        times = []
        for _ in range(2):
            t = time.perf_counter()
            sim = Simulator(robot, 0.001)
            sim.command_twist((0.5, 0.2, 0.3))
            sim.advance(1000)
            times.append(time.perf_counter() - t)
        return {"steps": 1000, "wall": times[0], "steady": times[1], "imports": imports, "peak_mb": _peak_mb()}
    if case == "12":
        import numpy as np
        import tracemalloc
        from sim.runs.clearance import ClearanceMeter, clearance_along
        scen = load_scenario(os.path.join(folder, "weave.yaml"))
        tr = run_scenario(scen, keep=True).trace
        poses = np.column_stack([tr["x"], tr["y"], tr["theta"]])
        out = {"steps": len(poses)}
        clearance_along(scen.robot.outline, poses[:100], scen.floor, swept=True)   # load shapely, numba
        t, c = time.perf_counter(), time.process_time()
        cl = clearance_along(scen.robot.outline, poses, scen.floor, t=tr["t"])
        out["wall"], out["cpu"] = time.perf_counter() - t, time.process_time() - c
        out["nearest"] = [cl.nearest.distance, cl.nearest.feature, cl.contact_rows]
        t = time.perf_counter()
        cl = clearance_along(scen.robot.outline, poses, scen.floor, t=tr["t"], swept=True)
        out["swept_wall"] = time.perf_counter() - t
        out["swept_area"] = cl.swept_area
        del tr, poses, cl
        # memory the measuring adds, rows fed in chunks of 20,000 (a run's blocks)
        for rows in (100_000, 1_000_000):
            meter = ClearanceMeter(scen.robot.outline, scen.floor)
            tracemalloc.start()
            for k in range(0, rows, 20_000):
                tt = np.arange(k, k + 20_000) * 0.001
                p = np.column_stack([tt * 0.45 - 24 - 45 * (tt // 100), 0.3 * np.sin(tt), 0.1 * np.cos(tt)])
                meter.add(tt, p)
            out[f"mem_{rows}"] = tracemalloc.get_traced_memory()[1] / 1e6
            tracemalloc.stop()
        out["peak_mb"] = _peak_mb()
        return out
    if case == "13":
        return _study_split(folder)
    if case == "6":
        scen = load_scenario(os.path.join(folder, "hour.yaml"))
        csv = os.path.join(folder, "hour.csv")
        with _PeakTree() as mem:
            t = time.perf_counter()
            res = run_scenario(scen, csv=csv)
            wall = time.perf_counter() - t
        out = {"steps": res.rows, "wall": wall, "peak_mb": mem.peak, "csv_mb": os.path.getsize(csv) / 1e6}
        os.remove(csv)
        return out
    raise SystemExit(f"unknown case {case}")


def _engine_steps_per_s(seconds: float) -> float:
    """``Simulator.step`` on the ward cart under a twist command, in this process."""
    sys.path.insert(0, ROOT)
    from sim import Simulator, load_robot
    sim = Simulator(load_robot(os.path.join(ROBOTS, "ward-cart.yaml")), 0.01)
    sim.command_twist((0.3, 0.0, 0.2))
    n, t0, c0 = 0, time.perf_counter(), time.process_time()
    while time.perf_counter() - t0 < seconds:
        for _ in range(100):
            sim.step()
        n += 100
    return {"per_s": n / (time.perf_counter() - t0), "cpu_us": 1e6 * (time.process_time() - c0) / n}


_ECHO = r"""
import socket
srv = socket.create_server(("127.0.0.1", 0))
print(srv.getsockname()[1], flush=True)
conn, _ = srv.accept()
conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
buf = bytearray(65536)
reply = b'{"t":0.01,"counts":{"left":12,"right":13},"steer":{"castor_front":0.0,"castor_rear":0.0}}\n'
while conn.recv_into(buf):        # one request line per read in lockstep
    conn.sendall(reply)
"""


class _LeanClient:
    """The benchmark's client: a raw socket (TCP_NODELAY), the request pre-encoded, replies
    read into one reused buffer and not decoded (the last one is, to check it), so the
    figure measures the server rather than the client."""

    def __init__(self, port: int):
        import socket
        self.sock = socket.create_connection(("127.0.0.1", port))
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.buf = bytearray(1 << 16)
        self.view = memoryview(self.buf)

    def line(self) -> int:
        """Read one reply line; returns its length (with the newline)."""
        n = self.sock.recv_into(self.buf)
        while n and self.buf[n - 1] != 10:
            n += self.sock.recv_into(self.view[n:])
        if not n:
            raise RuntimeError("the server closed the connection")
        return n

    def trips(self, msgs) -> int:
        """One round trip per request in ``msgs`` (encoded lines); returns the last reply's length."""
        send, recv_into, buf, view = self.sock.sendall, self.sock.recv_into, self.buf, self.view
        n = 0
        for msg in msgs:
            send(msg)
            n = recv_into(buf)
            while n and buf[n - 1] != 10:
                n += recv_into(view[n:])
            if not n:
                raise RuntimeError("the server closed the connection")
        return n

    def close(self) -> None:
        self.sock.close()


def _echo_rate(seconds: float) -> dict:
    """Round trips per second between the benchmark's client and a minimal standard-library
    echo of one canned reply per line on loopback: the floor that any Python server of this
    protocol stands on, on this machine, now."""
    proc = subprocess.Popen([sys.executable, "-c", _ECHO], stdout=subprocess.PIPE, text=True)
    try:
        c = _LeanClient(int(proc.stdout.readline()))
        msgs = [b'{"twist":[0.3,0.0,0.2],"steps":1}\n'] * 200
        c.trips(msgs[:100])
        n, wall, client_cpu, server_cpu, _ = _timed_trips(c, msgs, seconds, proc.pid)
        out = {"per_s": n / wall, "server_cpu_us": 1e6 * server_cpu / n, "client_cpu_us": 1e6 * client_cpu / n}
        c.close()
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    return out


def _timed_trips(c, msgs, seconds: float, pid: int) -> tuple:
    """Round trips from client ``c``, 200 requests at a time taken in turn from ``msgs``, for
    about ``seconds``: (round trips, wall s, client CPU s, server ``pid``'s CPU s, the end of
    the last reply in ``c.buf``)."""
    n, t0, c0, s0 = 0, time.perf_counter(), time.process_time(), _cpu_s(pid)
    while time.perf_counter() - t0 < seconds:
        last = c.trips(msgs[n % len(msgs):n % len(msgs) + 200])
        n += 200
    return n, time.perf_counter() - t0, time.process_time() - c0, _cpu_s(pid) - s0, last


def _cpu_s(pid: int) -> float:
    """CPU time (user + system, s) used so far by process ``pid`` (Linux /proc)."""
    with open(f"/proc/{pid}/stat") as fh:
        parts = fh.read().rsplit(")", 1)[1].split()
    return (int(parts[11]) + int(parts[12])) / os.sysconf("SC_CLK_TCK")


def _serve_rate(folder: str, steps: int, seconds: float, root: str = ROOT, distinct: bool = False) -> dict:
    """Lockstep round trips against ``trundle serve`` on loopback for about ``seconds``, from
    the lean client; the last reply is decoded and its time checked against the steps asked.
    ``distinct``: cycle through 1,000 different twists (more than the server remembers, so
    every line is read afresh, as a controller's would be) instead of repeating one."""
    scen = os.path.join(folder, "serve.yaml")
    with open(scen, "w") as fh:
        fh.write(f"robot: {os.path.join(ROBOTS, 'ward-cart.yaml')}\nstep: 0.01\nduration: 1000000\n")
    env = dict(os.environ, PYTHONPATH=root)
    proc = subprocess.Popen([sys.executable, "-m", "sim", "serve", scen], stdout=subprocess.PIPE,
                            stderr=subprocess.DEVNULL, text=True, env=env, cwd=root)
    try:
        host, port = proc.stdout.readline().split()[-1].rsplit(":", 1)
        c = _LeanClient(int(port))
        c.line()                                            # hello
        msgs = [(json.dumps({"twist": [0.3 + i * 1e-4 if distinct else 0.3, 0.0, 0.2], "steps": steps})
                 + "\n").encode() for i in range(1000 if distinct else 1)] * (1 if distinct else 200)
        warm = 50
        c.trips(msgs[:warm])
        n, wall, client_cpu, server_cpu, last = _timed_trips(c, msgs, seconds, proc.pid)
        reply = json.loads(bytes(c.buf[:last]))
        if reply.get("t") != (warm + n) * steps / 100:
            raise RuntimeError(f"unexpected reply after {warm + n} requests: {reply}")
        c.sock.sendall(b'{"bye": true}\n')
        c.line()
        c.close()
        proc.wait(timeout=600)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    return {"round_trips": n, "wall": wall, "per_s": n / wall, "steps_per_s": n * steps / wall,
            "server_cpu_us": 1e6 * server_cpu / n, "client_cpu_us": 1e6 * client_cpu / n}


def _serve_split(folder: str, n: int = 20000) -> dict | None:
    """Where a lockstep round trip's server CPU goes, measured in this process without sockets
    (CPU us per round trip, each part in its own warm loop): the engine through its surface
    (``Simulator.command`` + ``advance(1)``), the reply (``Replies.observation``), reading a
    twist line never seen before (the plain-twist reader, and the general JSON reader for
    comparison), and the whole lockstep decision path (driver, engine, reply, parse) fed lines
    from memory.  None for a checkout without these parts."""
    sys.path.insert(0, ROOT)
    try:
        from sim.runs.serve import LockstepDriver, Replies, parse_json_message, parse_message
    except ImportError:
        return None
    import numpy as np
    from sim.engine.simulator import Simulator
    from sim.files.scenario import load_scenario
    from sim.runs.control import Sensors
    from sim.runs.runner import run_scenario
    scen = load_scenario(os.path.join(folder, "serve.yaml"))
    sim = Simulator(scen.robot, scen.step, scen.start)
    sensors, out = Sensors(scen, sim), np.empty((1, sim.width))
    replies = Replies(sensors)
    lines = [(json.dumps({"twist": [0.3 + i * 1e-4, 0.0, 0.2], "steps": 1})).encode() for i in range(1000)]
    res = {}

    def cpu(name, fn):
        fn(200)
        c0 = time.process_time()
        fn(n)
        res[name] = 1e6 * (time.process_time() - c0) / n

    def engine(m):
        for i in range(m):
            sim.command("twist", (0.3, 0.0, 0.2 + 1e-6 * (i & 1)))
            sim.advance(1, out=out)

    def reply(m):
        k = sim.k
        for _ in range(m):
            replies.observation(k)

    def parse(m, reader=parse_message):
        robot = scen.robot
        for i in range(m):
            reader(lines[i % 1000], robot)

    class Lines:       # a link that hands the driver lines from memory and drops its replies
        peer, turned_away, gone, sent_at = "memory", 0, False, 0.0

        def __init__(self, m):
            self.left = m

        def send(self, obj):
            pass

        def send_bytes(self, data):
            pass

        def next_line(self, deadline=None):
            self.left -= 1
            return lines[self.left % 1000] if self.left >= 0 else b'{"bye": true}'

    cpu("engine", engine)
    cpu("reply", reply)
    cpu("parse", parse)
    cpu("json", lambda m: parse(m, parse_json_message))
    cpu("path", lambda m: run_scenario(scen, controller=LockstepDriver(Lines(m), scen)))
    return res


STUDY_SCENARIO = """\
robot: {robot}
step: 0.01
duration: 10
script:
  - {{at: 0, twist: {{vx: 0.4}}}}
  - {{at: 3, twist: {{vx: 0.3, omega: 0.5}}}}
  - {{at: 6, twist: {{omega: -0.8}}}}
  - {{at: 8, stop: true}}
checks:
  - slip_below: 0.001
"""

STUDY = """\
robot: {robot}
parameters:
  - {{name: radius, wheels: [left, right], key: radius, range: {{from: 0.06, to: 0.10, count: 10}}}}
  - {{name: half_track, wheels: [left, right], key: y, mirror: true, range: {{from: 0.18, to: 0.26, count: 10}}}}
  - {{name: max_spin, wheels: [left, right], key: max_spin, range: {{from: 15, to: 30, count: 10}}}}
scenarios: [ten-seconds.yaml]
figures: [peak_slip, checks]
"""


def _write_study(folder: str) -> str:
    robot = os.path.join(ROBOTS, "ward-cart.yaml")
    with open(os.path.join(folder, "ten-seconds.yaml"), "w") as fh:
        fh.write(STUDY_SCENARIO.format(robot=robot))
    path = os.path.join(folder, "study.yaml")
    with open(path, "w") as fh:
        fh.write(STUDY.format(robot=robot))
    return path


def _study_split(folder: str, n: int = 50) -> dict:
    """Seconds per variant in a warm process: building and checking it, and running it."""
    from sim.files.robotfile import robot_from_data
    from sim.files.scenario import scenario_from_data
    from sim.files.studyfile import load_study
    from sim.files.yamlread import Map, load_file
    from sim.runs import study as S
    from sim.runs.runner import run_scenario
    st = load_study(os.path.join(folder, "study.yaml"))
    base, scen_data = load_file(st.robot_path), load_file(st.scenarios[0].path)
    variants = S.design(st)[:n]
    S.run_variant(S.spec(st, S.overrides(st, variants[0])))  # warm: compiled code loaded
    build = run = 0.0
    for v in variants:
        t = time.perf_counter()
        data = S.variant_data(base, S.overrides(st, v))
        robot_from_data(data, st.robot_path)
        d = Map(scen_data)
        d.line, d.lines = scen_data.line, dict(scen_data.lines)
        d["robot"] = data
        scen = scenario_from_data(d, st.scenarios[0].path)
        t1 = time.perf_counter()
        run_scenario(scen)
        t2 = time.perf_counter()
        build += t1 - t
        run += t2 - t1
    return {"build": build / n, "run": run / n}


def _sub(case, folder, env=None, root=ROOT) -> dict:
    r = subprocess.run([sys.executable, __file__, "--one", case, "--folder", folder, "--root", root],
                       capture_output=True, text=True, check=True, env=env)
    return json.loads(r.stdout.strip().splitlines()[-1])


def _timed(cmd, root=ROOT, cpu=False):
    """Wall seconds of a whole process (and, with ``cpu``, its CPU seconds, user + system)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    subprocess.run(cmd, capture_output=True, check=False, cwd=root,
                   env=dict(os.environ, PYTHONPATH=root + os.pathsep + os.environ.get("PYTHONPATH", "")))
    wall = time.perf_counter() - t
    if not cpu:
        return wall
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def _diff_case(folder, root, repeat) -> list:
    """Case 15: make the traces with ``root``'s writer, then time its ``trundle diff`` on them."""
    import shutil
    _write_diff_cases(folder)
    code = ("import sys; sys.path.insert(0, {root!r}); from sim import load_scenario, run_scenario; "
            "run_scenario(load_scenario({scen!r}), csv={out!r})")
    fmts = ["csv"] + (["parquet"] if os.path.isfile(os.path.join(root, "sim", "traces", "read.py")) else [])
    out = []
    for fmt in fmts:
        paths = {}
        for name, scen in (("a", "castors.yaml"), ("b", "castors-b.yaml")):
            paths[name] = os.path.join(folder, f"diff-{name}.{fmt}")
            subprocess.run([sys.executable, "-c", code.format(root=root, scen=os.path.join(folder, scen),
                                                              out=paths[name])], check=True, cwd=root)
        paths["a2"] = os.path.join(folder, f"diff-a2.{fmt}")
        shutil.copyfile(paths["a"], paths["a2"])
        for label, other in (("identical", "a2"), ("every row differs", "b")):
            walls, cpus, peaks, loads = [], [], [], []
            for _ in range(repeat):
                cmd = [sys.executable, "-m", "sim", "diff", paths["a"], paths[other]]
                loads.append(os.getloadavg()[0])
                with _PeakTree() as mem:
                    wall, cpu = _timed(cmd, root, cpu=True)
                walls.append(wall)
                cpus.append(cpu)
                peaks.append(mem.peak)
            out.append({"fmt": fmt, "label": label, "wall": statistics.median(walls), "peak_mb": max(peaks),
                        "cpu": statistics.median(cpus), "load": statistics.median(loads),
                        "mb": os.path.getsize(paths["a"]) / 1e6})
        for p in paths.values():
            for q in (p, p + ".meta.json"):
                if os.path.exists(q):
                    os.remove(q)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--one", help=argparse.SUPPRESS)
    ap.add_argument("--folder", help=argparse.SUPPRESS)
    ap.add_argument("--skip", default="", help="comma-separated case numbers to skip")
    ap.add_argument("--only", default="", help="comma-separated case numbers to run (default all)")
    ap.add_argument("--root", default=ROOT, help="checkout whose sim package is measured (default this one)")
    args = ap.parse_args(argv)
    root = os.path.abspath(args.root)
    if args.one:
        print(json.dumps(_one(args.one, args.folder, root)))
        return 0
    skip = set(filter(None, args.skip.split(",")))
    if args.only:
        skip = set(CASES) - set(args.only.split(","))
    extra = []
    rows = []
    with tempfile.TemporaryDirectory(prefix="trundle-bench-") as folder:
        _write_cases(folder)
        med = lambda xs: statistics.median(xs)
        for case, label in (("1", "steered base, 1e6 steps, no CSV (steady)"),
                            ("2", "steered base, 1e6 steps, CSV every step (steady)"),
                            ("3", "diff drive + castors, 1e6 steps (steady)"),
                            ("16", "command log, a command every step, 2e5 steps")):
            if case in skip:
                continue
            runs = [_sub(case, folder, root=root) for _ in range(args.repeat)]
            wall = med([r["wall"] for r in runs])
            steps = runs[0]["steps"]
            row = {"case": case, "label": label, "steps": steps, "wall_s": wall,
                   "steps_per_s": steps / wall, "peak_mb": max(r["peak_mb"] for r in runs)}
            if case == "1":
                naive = med([r["naive_steps_per_s"] for r in runs])
                row["naive_steps_per_s"] = naive
                row["ratio"] = row["steps_per_s"] / naive
            rows.append(row)
        if "4" not in skip:
            # alternate the two so that both see the same machine: on a shared host its speed
            # drifts over minutes; the ratio is the median of the pairs' ratios
            cmd = [sys.executable, "-m", "sim", "batch", os.path.join(folder, "batch")]
            pairs = [(_timed(cmd + ["--jobs", "1"], root), _timed(cmd + ["--jobs", str(os.cpu_count() or 1)], root))
                     for _ in range(args.repeat)]
            one, allc = med([p[0] for p in pairs]), med([p[1] for p in pairs])
            rows.append({"case": "4", "label": f"batch of 200 x 10 s, --jobs 1 vs {os.cpu_count()}",
                         "steps": 200 * 10001, "wall_s": allc, "steps_per_s": 200 * 10001 / allc,
                         "jobs1_s": one, "ratio": med([a / b for a, b in pairs]), "peak_mb": float("nan")})
        if "13" not in skip:
            study = _write_study(folder)
            cmd = [sys.executable, "-m", "sim", "study", study, "--no-cache"]
            pairs = [(_timed(cmd + ["--jobs", "1"]), _timed(cmd + ["--jobs", str(os.cpu_count() or 1)]))
                     for _ in range(args.repeat)]
            one, allc = med([p[0] for p in pairs]), med([p[1] for p in pairs])
            split = _sub("13", folder)
            rows.append({"case": "13", "label": f"study, 1,000 variants x 10 s at 100 Hz, {os.cpu_count()} cores",
                         "steps": 1000 * 1001, "wall_s": allc, "steps_per_s": 1000 * 1001 / allc,
                         "jobs1_s": one, "ratio": med([a / b for a, b in pairs]), "peak_mb": float("nan"),
                         "split": split})
        if "5" not in skip:
            cmd = [sys.executable, "-m", "sim", "analyze", os.path.join(ROBOTS, "ward-cart.yaml")]
            floor = [sys.executable, "-c", "import numpy"]       # the floor: Python and numpy alone
            pairs = [(_timed(cmd, root), _timed(floor, root)) for _ in range(max(5, args.repeat))]
            wall, base = med([p[0] for p in pairs]), med([p[1] for p in pairs])
            rows.append({"case": "5", "label": "start-up: trundle analyze (whole process)",
                         "steps": 0, "wall_s": wall, "steps_per_s": float("nan"), "peak_mb": float("nan")})
            extra.append(f"case 5 trundle analyze {wall:.3f} s; beside it 'python -c \"import numpy\"' took "
                         f"{base:.3f} s, so the command's own share is {wall - base:.3f} s")
        if "7" not in skip:
            runs = [_sub("7", folder, root=root) for _ in range(args.repeat)]
            wall = med([r["wall"] for r in runs])
            naive = med([r["naive_steps_per_s"] for r in runs])
            rows.append({"case": "7", "label": "per-step API, sim.step(twist) loop", "steps": runs[0]["steps"],
                         "wall_s": wall, "steps_per_s": runs[0]["steps"] / wall,
                         "ratio": runs[0]["steps"] / wall / naive, "naive_steps_per_s": naive,
                         "peak_mb": max(r["peak_mb"] for r in runs)})
        if "8" not in skip:
            _sub("8", folder, root=root)  # make sure the cache is warm
            warm = [_sub("8", folder, root=root) for _ in range(args.repeat)]
            with tempfile.TemporaryDirectory(prefix="trundle-numba-") as cache:
                cold = _sub("8", folder, env=dict(os.environ, NUMBA_CACHE_DIR=cache), root=root)
            w, st = med([r["wall"] for r in warm]), med([r["steady"] for r in warm])
            rows.append({"case": "8", "label": "first stretch, fresh process, cache warm", "steps": 1000,
                         "wall_s": w, "steps_per_s": float("nan"), "peak_mb": float("nan"), "steady": st,
                         "cold": cold["wall"], "imports": med([r["imports"] for r in warm])})
        if "9" not in skip:
            cmd = [sys.executable, "-m", "sim", "route", os.path.join(ROOT, "scenarios", "routes", "ward-corridor.yaml")]
            cmd += [os.path.join(ROBOTS, f"{b}.yaml") for b in ("ward-cart", "tote-mecanum", "quad-steer")]
            wall = med([_timed(cmd) for _ in range(max(3, args.repeat))])
            rows.append({"case": "9", "label": "trundle route, demo route, 3 bases (process)",
                         "steps": 0, "wall_s": wall, "steps_per_s": float("nan"), "peak_mb": float("nan")})
        if "12" not in skip:
            runs = [_sub("12", folder) for _ in range(args.repeat)]
            r = runs[0]
            rows.append({"case": "12", "label": "clearance, 1e5 rows x 200 wall segments", "steps": r["steps"],
                         "wall_s": med([x["wall"] for x in runs]), "steps_per_s": float("nan"),
                         "peak_mb": max(x["peak_mb"] for x in runs), "cpu_s": med([x["cpu"] for x in runs]),
                         "swept_s": med([x["swept_wall"] for x in runs]), "swept_area": r["swept_area"],
                         "nearest": r["nearest"], "mem": (r["mem_100000"], r["mem_1000000"])})
        if "6" not in skip:
            r = _sub("6", folder, root=root)
            rows.append({"case": "6", "label": "one hour at 1 kHz, CSV streamed", "steps": r["steps"],
                         "wall_s": r["wall"], "steps_per_s": r["steps"] / r["wall"], "peak_mb": r["peak_mb"]})
        if "10" not in skip or "11" not in skip:
            eng = [_engine_steps_per_s(2.0) for _ in range(args.repeat)]
            echo = [_echo_rate(2.0) for _ in range(args.repeat)]
            engine = {"per_s": med([e["per_s"] for e in eng]), "cpu_us": med([e["cpu_us"] for e in eng]),
                      "echo": med([e["per_s"] for e in echo]),
                      "echo_server_us": med([e["server_cpu_us"] for e in echo]),
                      "echo_client_us": med([e["client_cpu_us"] for e in echo])}
        for case, steps, distinct in (("10", 1, False), ("10", 1, True), ("11", 100, False)):
            if case in skip:
                continue
            runs = [_serve_rate(folder, steps, 3.0, root, distinct) for _ in range(args.repeat)]
            what = "engine steps" if steps > 1 else "round trips, 1,000 twists" if distinct else "round trips"
            rows.append({"case": case, "label": f"serve lockstep, steps {steps}: {what}", "distinct": distinct,
                         "steps": runs[0]["round_trips"] * steps, "wall_s": med([r["wall"] for r in runs]),
                         "steps_per_s": med([r["per_s" if steps == 1 else "steps_per_s"] for r in runs]),
                         "peak_mb": float("nan"), "engine": engine,
                         "server_cpu_us": med([r["server_cpu_us"] for r in runs]),
                         "client_cpu_us": med([r["client_cpu_us"] for r in runs])})
        if "10" not in skip:
            split = _serve_split(folder)
            if split:
                extra.append("10   server CPU per round trip without sockets (us, in this process): whole "
                             f"lockstep path {split['path']:.1f}, of which the engine (command + advance(1)) "
                             f"{split['engine']:.1f}, the reply {split['reply']:.1f}, reading a new twist line "
                             f"{split['parse']:.1f} (the general JSON reader: {split['json']:.1f})")
        if "14" not in skip:
            loads = []
            runs = []
            for _ in range(args.repeat):
                loads.append(os.getloadavg()[0])
                runs.append(_sub("14", folder, root=root))
            for fmt in ("csv", "parquet"):
                if fmt in runs[0]:
                    wall = med([r[fmt]["wall"] for r in runs])
                    cpu = med([r[fmt]["cpu"] for r in runs])
                    extra.append(f"14   writer alone, {fmt:<8} {runs[0]['rows'] / wall:>10,.0f} rows/s  "
                                 f"wall {wall:.2f} s  cpu {cpu:.2f} s ({runs[0]['rows'] / cpu:,.0f} rows per "
                                 f"CPU second)  {runs[0][fmt]['mb']:.0f} MB  ({runs[0]['columns']} columns; "
                                 f"load {med(loads):.1f})")
        if "15" not in skip:
            for r in _diff_case(folder, root, args.repeat):
                extra.append(f"15   diff 10^6 rows, {r['fmt']:<8} {r['label']:<18} wall {r['wall']:.2f} s  "
                             f"cpu {r['cpu']:.2f} s  peak {r['peak_mb']:.0f} MB  ({r['mb']:.0f} MB per file; "
                             f"load {r['load']:.1f})")
    sys.path.insert(0, root)
    import numpy
    import polars
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
          f"numpy {numpy.__version__}, polars {polars.__version__}, {platform.system()} {platform.release()}; "
          f"sim from {root}; load average {os.getloadavg()[0]:.1f}")
    print(f"{'case':<5}{'what':<46}{'steps':>10}{'wall s':>9}{'steps/s':>12}{'ratio':>8}{'peak MB':>9}")
    for r in rows:
        ratio = f"{r['ratio']:.2f}x" if r["case"] in ("4", "13") else f"{r['ratio']:.1f}x" if "ratio" in r else ""
        sps = f"{r['steps_per_s']:,.0f}" if r["steps_per_s"] == r["steps_per_s"] else ""
        pk = f"{r['peak_mb']:.0f}" if r["peak_mb"] == r["peak_mb"] else ""
        print(f"{r['case']:<5}{r['label']:<46}{r['steps']:>10}{r['wall_s']:>9.3f}{sps:>12}{ratio:>8}{pk:>9}")
    for r in rows:
        if r["case"] == "1":
            print(f"case 1 naive loop (pinv + Euler per step): {r['naive_steps_per_s']:,.0f} steps/s "
                  f"over its first {NAIVE_STEPS} steps")
        if r["case"] == "4":
            print(f"case 4 --jobs 1: {r['jobs1_s']:.2f} s; all cores: {r['wall_s']:.2f} s")
        if r["case"] == "13":
            sp = r["split"]
            print(f"case 13 --jobs 1: {r['jobs1_s']:.2f} s; all cores: {r['wall_s']:.2f} s; one variant in a warm "
                  f"process: {1e3 * sp['build']:.1f} ms building and checking it, {1e3 * sp['run']:.1f} ms running")
        if r["case"] == "7":
            print(f"case 7 naive loop beside it: {r['naive_steps_per_s']:,.0f} steps/s")
        if r["case"] == "8":
            print(f"case 8 first stretch {r['wall_s']:.3f} s with the cache warm ({r['wall_s'] - r['steady']:.3f} s "
                  f"above the same work once loaded, {r['steady']:.4f} s), after {r['imports']:.2f} s of imports "
                  f"(numpy, numba, the engine); cold cache (compiling): {r['cold']:.1f} s")
        if r["case"] == "10":
            e = r["engine"]
            if r["distinct"]:
                print(f"case 10 with 1,000 different twists (every line read afresh): {r['steps_per_s']:,.0f} "
                      f"round trips/s; server CPU per round trip {r['server_cpu_us']:,.0f} us")
            else:
                print(f"case 10 {r['steps_per_s']:,.0f} round trips/s; CPU per round trip: server "
                      f"{r['server_cpu_us']:,.0f} us, of which one engine step {e['cpu_us']:,.0f} us "
                      f"(Simulator.step alone: {e['per_s']:,.0f} steps/s), client {r['client_cpu_us']:,.0f} us; "
                      f"a bare standard-library line echo on the same loopback with the same client: "
                      f"{e['echo']:,.0f} round trips/s, CPU per round trip: echo {e['echo_server_us']:,.1f} us, "
                      f"client {e['echo_client_us']:,.1f} us")
        if r["case"] == "11":
            e = r["engine"]
            print(f"case 11 {r['steps_per_s']:,.0f} steps/s through the server "
                  f"({r['steps_per_s'] / e['per_s']:.0%} of Simulator.step alone); server CPU per request "
                  f"{r['server_cpu_us']:,.0f} us for 100 steps")
        if r["case"] == "12":
            d, name, contact = r["nearest"]
            print(f"case 12 CPU time {r['cpu_s']:.2f} s; nearest approach {d:.4f} m to {name} ({contact} rows in "
                  f"contact); with the swept area ({r['swept_area']:.2f} m^2): {r['swept_s']:.2f} s; memory the "
                  f"measuring adds: {r['mem'][0]:.1f} MB over 1e5 rows, {r['mem'][1]:.1f} MB over 1e6 rows")
    for line in extra:
        print(line)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
