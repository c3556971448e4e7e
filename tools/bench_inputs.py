"""Benchmarks for hostile and oversized input: how fast bad files are refused, how much
memory a large command log takes.

    python tools/bench_inputs.py [--repeat 3] [--log-mb 50] [--run]

Each case runs in a fresh Python process, ``--repeat`` times; the table shows the median
wall time and the largest peak resident memory (``ru_maxrss``, MB).  Cases:

1. ``trundle analyze`` on a 1 MiB robot file (refused: larger than the limit), whole process;
2. the same with a 7.9 MiB robot file;
3. loading a robot file just under the size limit (a long comment and two wheels);
4. refusing a robot file just under the size limit that is one list of values
   (the most work a robot file under the limit can ask of the YAML reader);
5. refusing a scenario file just under its size limit that is one list of values;
6. loading a scenario just under its size limit: a script of 4,500 entries;
7. loading a scenario whose command log is ``--log-mb`` MB of ``t,left.spin,right.spin``
   rows, one per step (validated whole, kept as arrays);
8. with ``--run``: running that scenario without a CSV (the engine consumes the log; a
   command on every step is the engine's slowest case, so give a smaller ``--log-mb``).

Files are generated (seeded) into a temporary folder.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
WHEELS = ("wheels:\n  - {name: left, type: fixed, x: 0.0, y: 0.22, radius: 0.08}\n"
          "  - {name: right, type: fixed, x: 0.0, y: -0.22, radius: 0.08}\n")


def _write(folder: str, log_mb: float) -> None:
    def put(name, data):
        with open(os.path.join(folder, name), "wb") as fh:
            fh.write(data if isinstance(data, bytes) else data.encode())

    line = "  - {name: w%06d, type: fixed, x: 0.5, y: 0.25, radius: 0.1}\n"
    put("robot-1mib.yaml", "wheels:\n" + "".join(line % i for i in range((1 << 20) // len(line % 0) + 1)))
    put("robot-8mib.yaml", "wheels:\n" + "".join(line % i for i in range(int(7.9 * (1 << 20)) // len(line % 0))))
    sys.path.insert(0, ROOT)
    from sim.files import robotfile, scenario
    pad = "#" + "x" * 78 + "\n"
    limit = robotfile.MAX_BYTES
    put("robot-limit.yaml", WHEELS + pad * ((limit - len(WHEELS)) // len(pad)))
    put("robot-values.yaml", WHEELS + "extra: [" + "1," * ((limit - len(WHEELS) - 20) // 2) + "1]\n")
    head = "robot: cart.yaml\nstep: 0.01\nduration: 200\n"
    put("scen-values.yaml", head + "script: [" + "1," * ((scenario.MAX_BYTES - len(head) - 20) // 2) + "1]\n")
    put("scen-script.yaml", head + "script:\n" + "".join(f"  - {{at: {i / 100:.2f}, twist: {{vx: 0.4}}}}\n"
                                                         for i in range(4500)))
    rows = int(log_mb * 1e6 / 24)
    put("cart.yaml", "name: cart\n" + WHEELS)
    with open(os.path.join(folder, "log.csv"), "w") as fh:
        fh.write("t,left.spin,right.spin\n")
        for k in range(0, rows, 10000):
            fh.write("".join(f"{i / 100:.2f},{3 + (i % 7) * 0.125:.4f},{3 - (i % 5) * 0.0625:.4f}\n"
                             for i in range(k, min(rows, k + 10000))))
    put("replay.yaml", f"robot: cart.yaml\nstep: 0.01\nduration: {(rows - 1) / 100:.2f}\ncommands: log.csv\n")


def _one(case: str, folder: str) -> dict:
    sys.path.insert(0, ROOT)
    from sim.errors import InputError
    t = time.perf_counter()
    out = {}
    if case in ("3", "4", "5", "6"):
        from sim.files.robotfile import load_robot
        from sim.files.scenario import load_scenario
        name = {"3": "robot-limit.yaml", "4": "robot-values.yaml", "5": "scen-values.yaml", "6": "scen-script.yaml"}
        load = load_robot if case in ("3", "4") else load_scenario
        try:
            load(os.path.join(folder, name[case]))
            out["result"] = "read"
        except InputError as exc:
            out["result"] = str(exc).split(": ", 1)[1][:60]
    elif case in ("7", "8"):
        from sim.files.scenario import load_scenario
        scen = load_scenario(os.path.join(folder, "replay.yaml"))
        out["rows"] = len(scen.script)
        if case == "8":
            from sim.runs.runner import run_scenario
            out["steps"] = run_scenario(scen).rows
    out["wall"] = time.perf_counter() - t
    out["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return out


def _process(argv) -> dict:
    t = time.perf_counter()
    p = subprocess.run([sys.executable, "-c", "import resource, subprocess, sys; "
                        "p = subprocess.run(sys.argv[1:], capture_output=True, text=True); "
                        "print(p.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss); "
                        "print(p.stderr.strip()[-200:])", sys.executable, "-m", "sim", *argv],
                       capture_output=True, text=True, cwd=ROOT)
    wall = time.perf_counter() - t
    first, msg = (p.stdout.splitlines() + ["", ""])[:2]
    code, rss = first.split()
    return {"wall": wall, "peak_mb": int(rss) / 1024.0, "result": f"exit {code}: {msg.split(': ', 1)[-1][:60]}"}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--log-mb", type=float, default=50.0)
    ap.add_argument("--run", action="store_true", help="also run the command-log scenario (case 6)")
    ap.add_argument("--one", help=argparse.SUPPRESS)
    ap.add_argument("--folder", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.one:
        print(json.dumps(_one(args.one, args.folder)))
        return 0
    med = statistics.median
    with tempfile.TemporaryDirectory(prefix="trundle-bench-inputs-") as folder:
        _write(folder, args.log_mb)
        sizes = {n: os.path.getsize(os.path.join(folder, n)) / (1 << 20) for n in os.listdir(folder)}
        cases = [("1", f"analyze: robot file of {sizes['robot-1mib.yaml']:.2f} MiB (process)",
                  lambda: _process(["analyze", os.path.join(folder, "robot-1mib.yaml")])),
                 ("2", f"analyze: robot file of {sizes['robot-8mib.yaml']:.2f} MiB (process)",
                  lambda: _process(["analyze", os.path.join(folder, "robot-8mib.yaml")]))]
        for case, label in (("3", f"load a {sizes['robot-limit.yaml'] * 1024:.0f} KiB robot file"),
                            ("4", f"a {sizes['robot-values.yaml'] * 1024:.0f} KiB robot file: one list of values"),
                            ("5", f"a {sizes['scen-values.yaml']:.2f} MiB scenario: one list of values"),
                            ("6", f"a {sizes['scen-script.yaml']:.2f} MiB scenario: 4,500 script entries"),
                            ("7", f"load a scenario with a {sizes['log.csv']:.1f} MiB command log")
                            ) + ((("8", "run it (no CSV)"),) if args.run else ()):
            cases.append((case, label, lambda case=case: json.loads(subprocess.run(
                [sys.executable, __file__, "--one", case, "--folder", folder], capture_output=True, text=True,
                check=True).stdout.strip().splitlines()[-1])))
        print(f"{'case':<5}{'what':<52}{'wall s':>8}{'peak MB':>9}  result")
        for case, label, fn in cases:
            runs = [fn() for _ in range(args.repeat)]
            r = runs[0]
            result = r.get("result") or (f"{r['rows']:,} rows" + (f", {r['steps']:,} steps" if "steps" in r else ""))
            print(f"{case:<5}{label:<52}{med([x['wall'] for x in runs]):>8.3f}"
                  f"{max(x['peak_mb'] for x in runs):>9.0f}  {result}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
