"""Recording a hand-driven run so that it can be replayed as a scenario.

``trundle drive ROBOT.yaml --record PATH`` writes three files side by side
(for ``PATH = out/drive.csv``):

* ``out/drive.csv``: the trace, the same columns as ``trundle run --csv``
  (:mod:`sim.traces.writer`; Parquet when PATH ends in ``.parquet``), one row
  per step, flushed to ``out/drive.csv.part`` as it goes and renamed into
  place when the drive ends;
* ``out/drive.commands.csv``: the command log ``t,vx,vy,omega`` (body
  twist, m/s and rad/s), one row whenever the command changed;
* ``out/drive.scenario.yaml``: a scenario that replays the command log on the
  same robot with the same step, so ``trundle run out/drive.scenario.yaml
  --csv again.csv`` reproduces ``out/drive.csv`` byte for byte (as long as
  the steering policy was not changed while driving; the file says so when
  it was).

Plus the ``.meta.json`` sidecar of the trace, as for ``trundle run``.
"""
from __future__ import annotations

import json
import os

from sim.errors import InputError
from sim.engine.record import columns
from sim.files.atomic import check_target, write_text
from sim.traces.writer import TraceWriter, row_values


def companion_paths(path) -> tuple:
    """(command log, scenario) paths that go with trace ``path``."""
    path = os.fspath(path)
    stem = path
    for suffix in (".csv", ".parquet"):
        if path.lower().endswith(suffix):
            stem = path[:-len(suffix)]
    return stem + ".commands.csv", stem + ".scenario.yaml"


class Recorder:
    """Streams a drive to disk.

    Parameters
    ----------
    path : trace CSV path.
    robot : Robot, robot_path : its file (for the replay scenario).
    step : s.  align : the policy at the start.
    """

    def __init__(self, path, robot, robot_path, step: float, align: str):
        self.path = os.fspath(path)
        d = os.path.dirname(os.path.abspath(self.path))
        if not os.path.isdir(d):
            raise InputError("--record", None, f"directory '{os.path.dirname(self.path) or '.'}' does not exist")
        self.log_path, self.scen_path = companion_paths(self.path)
        from sim.traces.meta import meta_path
        for target, what in ((self.path, "the trace"), (meta_path(self.path), "the trace's sidecar"),
                             (self.log_path, "the command log"), (self.scen_path, "the replay scenario")):
            check_target(target, what)
        self.robot, self.robot_path, self.step = robot, os.fspath(robot_path), float(step)
        self.align = align
        self.policy_changes = []
        self.header = columns(robot)
        self.trace = TraceWriter(self.path, self.header)
        try:
            self._log = TraceWriter(self.log_path, ["t", "vx", "vy", "omega"])
        except BaseException:
            self.trace.abort()
            raise
        self._last_cmd = None
        self.rows = 0
        self.last_t = 0.0

    def write(self, row, align: str) -> None:
        """Append row k (a :class:`~sim.engine.StepResult`) driven under policy ``align``."""
        if align != self.align and (not self.policy_changes or self.policy_changes[-1][1] != align):
            self.policy_changes.append((row.t, align))
        cmd = (0.0, 0.0, 0.0) if row.cmd_twist is None else tuple(float(v) for v in row.cmd_twist)
        if cmd != self._last_cmd:
            self._log.write([row.t, *cmd])
            self._last_cmd = cmd
        self.trace.write(row_values(row))
        self.rows += 1
        self.last_t = row.t

    def flush(self) -> None:
        """Push everything written so far to the ``.part`` files."""
        self.trace.flush()
        self._log.flush()

    def close(self) -> list:
        """Finish all files (the trace last, then its sidecar); returns the paths written."""
        self._log.close()
        write_text(self.scen_path, self.scenario_text(), "the replay scenario")
        out = [self.path, self.log_path, self.scen_path]
        meta = None
        try:
            from sim.files.scenario import load_scenario
            from sim.traces.meta import meta_path, trace_meta
            meta = trace_meta(load_scenario(self.scen_path), self.header, 1)
        except ImportError:
            pass
        self.trace.close(meta=meta)
        if meta is not None:
            out.append(meta_path(self.path))
        return out

    def abort(self) -> None:
        """Remove the partial files (the drive failed)."""
        self.trace.abort()
        self._log.abort()

    def scenario_text(self) -> str:
        """The replay scenario (YAML)."""
        sdir = os.path.dirname(os.path.abspath(self.scen_path))
        rob = os.path.abspath(self.robot_path)
        try:
            rob = os.path.relpath(rob, sdir)
        except ValueError:
            pass
        duration = (max(self.rows, 1) - 1) * self.step
        lines = ["# Written by trundle drive: replays the recorded commands.",
                 f"# trace: {os.path.basename(self.path)}"]
        for t, pol in self.policy_changes:
            lines.append(f"# note: the steering policy changed to '{pol}' at t = {t:.3f} s while driving;")
            lines.append(f"#       this replay keeps '{self.align}' throughout and will differ from then on.")
        lines += [f"description: {json.dumps('hand-driven ' + self.robot.name + ', recorded by trundle drive')}",
                  f"robot: {json.dumps(rob.replace(os.sep, '/'))}",
                  f"step: {_yaml_float(self.step)}",
                  f"duration: {_yaml_float(duration)}",
                  f"align: {self.align}",
                  f"commands: {json.dumps(os.path.basename(self.log_path))}", ""]
        return "\n".join(lines)


def _yaml_float(v: float) -> str:
    """``repr(v)`` written so that a YAML 1.1 reader also takes it as a float (1e-05 -> 1.0e-05)."""
    s = repr(float(v))
    if "e" in s and "." not in s.split("e")[0]:
        m, e = s.split("e")
        s = f"{m}.0e{e if e[0] in '+-' else '+' + e}"
    return s
