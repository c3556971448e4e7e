"""The README's Python API example, extracted from README.md and run verbatim."""
from __future__ import annotations

import math
import os
import pathlib
import re
import subprocess
import sys

ROOT = pathlib.Path(__file__).resolve().parents[1]


def readme_example() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## Python API"):]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def readme_stated_output() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## Python API"):]
    return re.search(r"It prints\n\n```text\n(.*?)\n```", section, re.S).group(1)


def test_readme_python_example_runs():
    code = readme_example()
    assert "Simulator(" in code and "sim.step(" in code
    p = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=60,
                       env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert p.returncode == 0, p.stderr
    assert p.stdout.strip() == readme_stated_output()      # the README says what it prints
    nums = [float(v) for v in re.findall(r"[-+]?\d+\.?\d*(?:e[-+]?\d+)?", p.stdout)]
    t, x, y, theta, slip = nums
    # 4 x (200 + 100) steps of 0.01 s: sim.t and sim.pose are the state after step 1199, t = 12 s
    assert t == 12.0
    assert slip == 0.0                     # consistent twist commands never skid
    # Heading, worked by hand: each turn asks pi/2 rad/s for 1 s.  With 60 rad/s^2 and all
    # wheels ramping together, the change between a straight leg (v / r = 6.25 rad/s per
    # wheel) and a turn (+-b omega / (2 r) = 4.32 rad/s) takes T = 10.57 / 60 = 0.176 s, a
    # linear blend, so each turn's ramp-in loses (pi/2) T / 2 and the next leg's ramp-out
    # gives it back; only the last turn keeps its loss.  A row holds the speeds at its start
    # and the drives ramp over the step, so the engine's ramp lags the continuous one by
    # about half a step.
    r, b, dt = 0.08, 0.44, 0.01
    T = (0.5 / r + b / 2 * math.pi / 2 / r) / 60.0
    want = 2 * math.pi - math.pi / 2 * (T / 2) - math.pi / 2 * dt / 2
    assert abs(theta - want) < 2e-3
    # open loop, the square nearly closes: the blended corners leave it a few cm off
    assert math.hypot(x, y) < 0.05
