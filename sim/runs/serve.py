"""``trundle serve``: a scenario's base driven over TCP by a controller in any language.

Newline-delimited JSON, one object per line, protocol version :data:`PROTOCOL`
(README "Controller in the loop" is the reference).  One client at a time; the
run starts when it connects and ends when it says ``{"bye": true}``, closes the
connection, or the scenario's duration is reached.  The trace, sidecar, checks
and summary are those of ``trundle run`` (:func:`sim.runs.runner.run_scenario`
with a driver from this module; the rows come from
:func:`sim.runs.control.controlled_blocks`).

Two clocks:

* lockstep (default): time advances only when the client asks (``steps``), so a
  run is deterministic and as fast as the client;
* real time: one step per ``step`` seconds of wall-clock time; a command
  applies at the first step after it arrives, each command's latency
  (observation sent to command in effect) is recorded in the trace, and a
  watchdog commands a zero twist (the base ramps to a stop within its
  acceleration limits) when no command has come for longer than ``watchdog``
  seconds of run time.

A bad line never ends the run: it is answered with ``{"error": "..."}`` and the
state is unchanged.  Sockets are waited on with :func:`select.poll`.

The per-message path is kept lean, since in lockstep a client's speed is the
round trip: lines are received into one reused buffer; a well-formed twist
line is read by one strict regular expression (anything it does not match
exactly, errors included, goes through the full JSON parse, so the answers are
the same); each distinct line is checked once; the reply is formatted from the
sensor readings into a template made at the start (byte for byte what the JSON
encoder gives, see :class:`Replies`).
"""
from __future__ import annotations

import json
import math
import re
import select
import socket
import statistics
import time
from collections import deque

from sim.engine.simulator import step_times
from sim.errors import InputError
from sim.files.scenario import Command
from sim.runs.control import (MAX_RATE, MAX_SPEED, CommandError, Decision, Driver, Observation, parse_twist,
                              parse_wheels)
from sim.runs.runner import run_scenario

PROTOCOL = 1
MAX_LINE = 65536              # bytes in one message line
DEFAULT_WATCHDOG = 0.25       # s; velocity-command time-outs of a few hundred ms are common practice
KEYS = ("twist", "wheels", "steps", "bye")
EXAMPLE = '{"twist": [0.3, 0, 0.5], "steps": 1}'


def parse_listen(text: str) -> tuple:
    """``HOST:PORT`` (``[::1]:PORT`` for IPv6) -> (host, port)."""
    host, sep, port = text.rpartition(":")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    if not sep or not host or not port.isdigit() or not 0 <= int(port) <= 65535:
        raise InputError("--listen", None, f"expected HOST:PORT (e.g. 127.0.0.1:0 for a free port on this "
                                           f"machine only), got {text!r}")
    return host, int(port)


def _reject_constant(name):
    raise CommandError(f"{name} is not a number here; send finite numbers")


_ENCODER = json.JSONEncoder(separators=(",", ":"), allow_nan=False)
_DECODER = json.JSONDecoder(parse_constant=_reject_constant)


def _dumps(obj) -> bytes:
    return (_ENCODER.encode(obj) + "\n").encode("utf-8")


# A twist line in its plainest form, e.g. {"twist": [0.3, 0, -0.5], "steps": 2}: JSON
# numbers (RFC 8259 grammar) and JSON white space only, keys in this order, once each.
_WS = rb"[ \t\r\n]*"
_NUM = rb"(-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][-+]?[0-9]+)?)"
_TWIST_LINE = re.compile(
    _WS + rb'\{' + _WS + rb'"twist"' + _WS + rb':' + _WS + rb'\[' + _WS + _NUM + _WS + rb',' + _WS + _NUM + _WS
    + rb',' + _WS + _NUM + _WS + rb'\]' + rb'(?:' + _WS + rb',' + _WS + rb'"steps"' + _WS + rb':' + _WS
    + rb'([1-9][0-9]{0,17}))?' + _WS + rb'\}' + _WS)


def _json_number(token: bytes, value: float) -> float:
    """The float json's reading of ``token`` gives (its integers via int): ``value``
    except for the integer -0, read as 0 (not -0.0)."""
    return 0.0 if value == 0.0 and token.lstrip(b"-").isdigit() else value


def plain_twist(line: bytes):
    """The twist line ``line`` as ``("go", Command, steps)`` when it is in the plainest
    form and every value is within bounds; None otherwise (:func:`parse_json_message`
    decides).  Where both answer they give the same result (tests/test_serve.py checks it)."""
    m = _TWIST_LINE.fullmatch(line)
    if m is None:
        return None
    a, b, c, steps = m.groups()
    vx, vy, w = float(a), float(b), float(c)
    if not (-MAX_SPEED <= vx <= MAX_SPEED and -MAX_SPEED <= vy <= MAX_SPEED and -MAX_RATE <= w <= MAX_RATE):
        return None               # out of bounds, infinite or too long: the full parse names it
    if vx == 0.0 or vy == 0.0 or w == 0.0:
        vx, vy, w = _json_number(a, vx), _json_number(b, vy), _json_number(c, w)
    return "go", Command(0.0, "twist", (vx, vy, w)), int(steps) if steps is not None else 1


def parse_message(line: bytes, robot):
    """One client line -> ``("bye", None, 0)`` or ``("go", command or None, steps)``.

    Raises :class:`~sim.runs.control.CommandError` naming the problem and what is allowed.
    """
    return plain_twist(line) or parse_json_message(line, robot)


def parse_json_message(line: bytes, robot):
    """:func:`parse_message` through the JSON decoder: every message, every error."""
    try:
        text = line.decode("utf-8")
    except UnicodeDecodeError:
        raise CommandError("the line is not UTF-8 text; send one JSON object per line") from None
    try:
        msg = _DECODER.decode(text)
    except json.JSONDecodeError as exc:
        raise CommandError(f"malformed JSON at column {exc.colno}: {exc.msg}; send one JSON object per "
                           f"line, e.g. {EXAMPLE}") from None
    except RecursionError:
        raise CommandError("JSON nested too deeply; send one flat JSON object per line") from None
    except ValueError as exc:   # e.g. an integer with thousands of digits
        why = str(exc).split(":")[0].split(";")[0]
        raise CommandError(f"unreadable JSON ({why}); send one JSON object per line, e.g. {EXAMPLE}") from None
    if not isinstance(msg, dict):
        raise CommandError(f"expected a JSON object with twist, wheels, steps or bye, e.g. {EXAMPLE}")
    for key in msg:
        if key not in KEYS:
            raise CommandError(f"unknown key {key!r}; allowed: {', '.join(KEYS)}")
    if "bye" in msg:
        if msg["bye"] is not True or len(msg) != 1:
            raise CommandError('bye ends the run: send {"bye": true} alone')
        return "bye", None, 0
    if "twist" in msg and "wheels" in msg:
        raise CommandError("give either twist or wheels, not both")
    if not msg:
        raise CommandError(f"empty message; give twist, wheels, steps or bye, e.g. {EXAMPLE}")
    steps = msg.get("steps", 1)
    if isinstance(steps, bool) or not isinstance(steps, int) or steps < 1:
        raise CommandError(f"steps must be a whole number >= 1, got {json.dumps(steps)}")
    cmd = None
    if "twist" in msg:
        cmd = Command(0.0, "twist", parse_twist(msg["twist"]))
    elif "wheels" in msg:
        cmd = Command(0.0, "wheels", parse_wheels(msg["wheels"], robot))
    return "go", cmd, steps


BUFFER = MAX_LINE + 65536 + 2   # bytes; what is not yet a whole line is at most MAX_LINE of it


class Link:
    """The listening socket and the one connected client, read line by line.

    Parameters
    ----------
    host, port : where to listen (port 0 picks a free one).
    """

    def __init__(self, host: str, port: int):
        try:
            infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
        except socket.gaierror as exc:
            raise InputError("--listen", None, f"cannot resolve host {host!r}: {exc.strerror}") from None
        family, _, _, _, addr = infos[0]
        self.server = socket.socket(family, socket.SOCK_STREAM)
        try:
            self.server.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            self.server.bind(addr)
            self.server.listen(4)
        except OSError as exc:
            self.server.close()
            raise InputError("--listen", None, f"cannot listen on {host}:{port}: {exc.strerror}") from None
        self.server.setblocking(False)
        h, p = self.server.getsockname()[:2]
        self.address = f"[{h}]:{p}" if ":" in h else f"{h}:{p}"
        self.poller = select.poll()
        self.server_fd = self.server.fileno()
        self.poller.register(self.server_fd, select.POLLIN)
        self.client = None
        self.client_fd = -1
        self.peer = ""
        self.gone = False          # the client closed or reset the connection
        self.buf = bytearray(BUFFER)   # received bytes: buf[start:end] is not yet handled
        self.view = memoryview(self.buf)
        self.start = self.end = self.scan = 0   # scan: where the search for a newline resumes
        self.skipping = False      # dropping the rest of an over-long line
        self.lines = deque()       # complete lines not yet handled
        self.sent_at = 0.0         # monotonic time of the last message sent
        self.turned_away = 0

    def accept_first(self) -> str:
        """Block until the first client connects; returns its address."""
        while self.client is None:
            self.poll(None)
        return self.peer

    def _accept(self) -> None:
        try:
            conn, addr = self.server.accept()
        except (BlockingIOError, InterruptedError):
            return
        if self.client is not None or self.gone:
            self.turned_away += 1
            try:
                conn.setblocking(True)
                conn.settimeout(1.0)
                conn.sendall(_dumps({"error": f"busy: another client ({self.peer}) is driving this run; "
                                              "one client at a time"}))
            except OSError:
                pass
            conn.close()
            return
        conn.setblocking(True)
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.client = conn
        self.client_fd = conn.fileno()
        self.peer = f"{addr[0]}:{addr[1]}"
        self.poller.register(self.client_fd, select.POLLIN)

    def send(self, obj) -> None:
        """Send one message (a JSON-able object)."""
        self.send_bytes(_dumps(obj))

    def send_bytes(self, data: bytes) -> None:
        """Send one encoded message line."""
        if self.gone or self.client is None:
            return
        try:
            self.client.sendall(data)
        except OSError:
            self._lost()
            return
        self.sent_at = time.monotonic()

    def _lost(self) -> None:
        if not self.gone:
            self.gone = True
            if self.client is not None:
                self.poller.unregister(self.client_fd)

    def poll(self, timeout: float | None) -> None:
        """Wait up to ``timeout`` s (None: until something happens) for input; new
        complete lines go to :attr:`lines`."""
        ms = -1 if timeout is None else math.ceil(timeout * 1000.0)
        for fd, _ in self.poller.poll(ms):
            if fd == self.server_fd:
                self._accept()
            elif fd == self.client_fd and not self.gone:
                self._receive()

    def _receive(self) -> None:
        try:
            n = self.client.recv_into(self.view[self.end:])
        except (BlockingIOError, InterruptedError):
            return
        except OSError:
            n = 0
        if not n:
            self._lost()
            return
        self.end += n
        self._split()

    def _split(self) -> None:
        """Whole lines of buf[start:end] to :attr:`lines` (blank ones dropped, over-long
        ones as None); keeps the unfinished rest."""
        buf, lines = self.buf, self.lines
        while True:
            i = buf.find(b"\n", self.scan, self.end)
            if i < 0:
                break
            line = bytes(self.view[self.start:i]).rstrip(b"\r")
            self.start = self.scan = i + 1
            if self.skipping:
                self.skipping = False
            elif len(line) > MAX_LINE:
                lines.append(None)
            elif line.strip():
                lines.append(line)
        self.scan = self.end
        rest = self.end - self.start
        if rest > MAX_LINE:            # no end in sight: answer once, drop it up to its newline
            if not self.skipping:
                lines.append(None)
            self.skipping = True
            rest = 0
        if rest == 0:
            self.start = self.end = self.scan = 0
        elif self.end > BUFFER - 65536:
            buf[:rest] = buf[self.start:self.end]
            self.start, self.end, self.scan = 0, rest, rest

    def next_line(self, deadline: float | None = None):
        """The next line (bytes; None for an over-long one), or ``...`` when the client is
        gone or the deadline (monotonic s) passes first."""
        lines = self.lines
        if lines:
            return lines.popleft()
        while not lines:
            if self.gone:
                return ...
            if deadline is None:
                self.poll(None)
                continue
            left = deadline - time.monotonic()
            self.poll(max(left, 0.0))
            if not lines and left <= 0:
                return ...
        return lines.popleft()

    def close(self) -> None:
        if self.client is not None:
            try:
                self.client.close()
            except OSError:
                pass
        self.server.close()


def _obs_json(obs, end: bool = False) -> dict:
    d = {"t": obs.t, "counts": obs.counts, "steer": obs.steer}
    if obs.pose is not None:
        d["pose"] = list(obs.pose)
    if end:
        d["end"] = True
    return d


class Replies:
    """Observation replies, ``{"t":..,"counts":{..},"steer":{..}}`` (plus ``"pose"``,
    ``"end"``, ``"watchdog"``), formatted from :meth:`~sim.runs.control.Sensors.readings`
    into a template made once.

    The bytes are those of the JSON encoder on :func:`_obs_json` (compact
    separators; floats as ``repr``, which is what the encoder writes; names
    encoded by it): the template only saves building a dict and walking it
    for every reply.  Values that are not finite go through the encoder, which
    refuses them as it always did.
    """

    def __init__(self, sensors):
        self.sensors = sensors
        self.dt = sensors.sim.dt

        def key(name):
            return json.dumps(name).replace("%", "%%")

        counts = ",".join(f"{key(n)}:%d" for n in sensors.measured)
        steer = ",".join(f"{key(n)}:%r" for n in sensors.steered)
        self.template = '{"t":%r,"counts":{' + counts + '},"steer":{' + steer + "}"
        if sensors.truth:
            self.template += ',"pose":[%r,%r,%r]'

    def observation(self, k: int, end: bool = False, watchdog: bool = False) -> bytes:
        """The reply for the state now, row ``k`` (``end``: the run is over; ``watchdog``: the
        watchdog holds the base)."""
        counts, steer, pose = self.sensors.readings()
        t = step_times(k, self.dt)
        vals = (t, *counts, *steer) if pose is None else (t, *counts, *steer, *pose)
        total = sum(vals)
        if total - total != 0.0:        # inf or nan somewhere (or an overflowing sum)
            return self.generic(vals, end, watchdog)
        text = self.template % vals
        if end:
            text += ',"end":true'
        if watchdog:
            text += ',"watchdog":true'
        return (text + "}\n").encode()

    def generic(self, vals, end: bool = False, watchdog: bool = False) -> bytes:
        """The same reply through the JSON encoder (``vals`` as :meth:`observation` gathers them)."""
        s = self.sensors
        nc, ns = len(s.measured), len(s.steered)
        obs = Observation(vals[0], dict(zip(s.measured, map(int, vals[1:1 + nc]))),
                          dict(zip(s.steered, vals[1 + nc:1 + nc + ns])),
                          tuple(vals[1 + nc + ns:]) if s.truth else None)
        d = _obs_json(obs, end)
        if watchdog:
            d["watchdog"] = True
        return _dumps(d)


class _Driver(Driver):
    """What both clocks share: the hello, parsing, error replies, bookkeeping."""

    columns = ()
    clock = ""

    def __init__(self, link: Link, scen, watchdog: float | None = None):
        self.link = link
        self.scen = scen
        self.robot = scen.robot
        self.watchdog = watchdog
        self.started = False
        self.commands = 0
        self.errors = 0
        self.first_error = ""
        self.ended_by = ""          # "bye" | "disconnect" | "duration"
        self._seen = {}             # line -> parse's result (valid lines only)
        self.end_t = None
        self.replies = None         # Replies, made at the first decision

    def hello(self, sensors) -> None:
        self.replies = Replies(sensors)
        r = self.robot
        d = {"hello": "trundle", "protocol": PROTOCOL, "robot": r.name, "step": self.scen.step,
             "duration": self.scen.duration, "clock": self.clock, "watchdog": self.watchdog,
             "wheels": [w.name for w in r.wheels], "driven": [w.name for w in r.wheels if w.driven],
             "steered": [w.name for w in r.wheels if w.type == "steered"],
             "encoders": dict(sensors.encoders), "truth": sensors.truth}
        d.update(_obs_json(sensors.observe()))
        self.link.send(d)

    def error(self, text: str) -> None:
        self.errors += 1
        if not self.first_error:
            self.first_error = text
        self.link.send({"error": text})

    def parse(self, line, left: int):
        """A line -> ``(kind, command, steps, Decision)`` (parse_message's tuple and the
        decision it makes), or None after answering an error."""
        if line is None:
            self.error(f"line longer than {MAX_LINE} bytes; send one JSON object per line")
            return None
        try:
            msg = self._seen.get(line)
            if msg is None:
                kind, cmd, steps = parse_message(line, self.robot)
                msg = kind, cmd, steps, Decision(cmd, steps)
                if len(self._seen) < 256:     # clients repeat their lines: check each text once
                    self._seen[line] = msg
            if msg[0] == "go" and msg[2] > left:
                steps = msg[2]
                raise CommandError(f"steps {steps} would pass the end of the run (duration "
                                   f"{self.scen.duration:g} s): {left} step{'s' if left != 1 else ''} left")
        except CommandError as exc:
            self.error(str(exc))
            return None
        except Exception as exc:  # noqa: BLE001 - a message must never end the run
            self.error(f"cannot read this message ({type(exc).__name__}: {exc}); send one JSON object per "
                       f"line, e.g. {EXAMPLE}")
            return None
        return msg

    def end(self, why: str, t: float):
        self.ended_by, self.end_t = why, t
        return None

    def summary_lines(self) -> list:
        how = {"bye": "ended by bye", "disconnect": "disconnected without bye",
               "duration": "reached the scenario's duration"}.get(self.ended_by, "")
        out = [f"client    {self.link.peer}: {self.commands} command{'s' if self.commands != 1 else ''}, "
               f"{how} at t={self.end_t:g} s" if self.end_t is not None else f"client    {self.link.peer}"]
        if self.errors:
            out.append(f"errors    {self.errors} bad message{'s' if self.errors != 1 else ''} answered with "
                       f"an error (first: {self.first_error})")
        if self.link.turned_away:
            out.append(f"busy      {self.link.turned_away} other connection{'s' if self.link.turned_away != 1 else ''} "
                       "turned away (one client at a time)")
        return out


class LockstepDriver(_Driver):
    """Time advances only by the client's requests."""

    clock = "lockstep"

    def decide(self, k: int, left: int, sensors):
        link = self.link
        if not self.started:
            self.started = True
            self.hello(sensors)
        else:
            link.send_bytes(self.replies.observation(k, left == 0))
        if left == 0:
            return self.end("duration", sensors.sim.t)
        while True:
            line = link.next_line()
            if line is ...:
                return self.end("disconnect", sensors.sim.t)
            msg = self.parse(line, left)
            if msg is None:
                continue
            if msg[0] == "bye":
                return self.end("bye", sensors.sim.t)
            if msg[1] is not None:
                self.commands += 1
            return msg[3]


class RealtimeDriver(_Driver):
    """One step per ``step`` s of wall-clock time; latency and watchdog in the trace."""

    clock = "realtime"
    columns = ("cmd_latency", "watchdog")

    def __init__(self, link: Link, scen, watchdog: float = DEFAULT_WATCHDOG):
        super().__init__(link, scen, watchdog)
        self.t0 = 0.0
        self.due = []               # steps at which a reply is owed
        self.last_cmd_k = None      # row at which the last command took effect
        self.tripped = False
        self.trips = []             # run times (s) at which the watchdog stopped the base
        self.latencies = []         # s, observation sent -> command in effect
        self.lag = 0.0              # s, worst lateness of a step behind the wall clock
        self.limit = int(math.floor(watchdog / scen.step + 1e-9)) + 1  # steps without a command that trip it

    def decide(self, k: int, left: int, sensors):
        link = self.link
        if not self.started:
            self.started = True
            self.hello(sensors)
            self.t0 = time.monotonic()
        target = self.t0 + k * self.scen.step
        pending, pending_sent = None, 0.0   # the last command read for this step
        while True:   # read what arrives until this step's time
            line = link.next_line(target)
            if line is ...:
                if link.gone:
                    return self.end("disconnect", sensors.sim.t)
                break
            msg = self.parse(line, max(left, 1))
            if msg is None:
                continue
            kind, cmd, steps, _ = msg
            if kind == "bye":
                return self.end("bye", sensors.sim.t)
            self.due.append(k + steps)
            if cmd is not None:
                self.commands += 1
                pending, pending_sent = cmd, link.sent_at
        now = time.monotonic()
        self.lag = max(self.lag, now - target)
        if left == 0:
            link.send_bytes(self.replies.observation(k, True))
            return self.end("duration", sensors.sim.t)
        owed = self.due.count(k)          # one reply per command due now
        if owed:
            self.due = [d for d in self.due if d != k]
            reply = self.replies.observation(k, watchdog=self.tripped)
            for _ in range(owed):
                link.send_bytes(reply)
        latency = math.nan
        command = None
        if pending is not None:
            command = pending
            self.last_cmd_k = k
            latency = now - pending_sent
            self.latencies.append(latency)
            self.tripped = False
        elif self.last_cmd_k is not None and not self.tripped and k - self.last_cmd_k >= self.limit:
            self.tripped = True
            self.trips.append(sensors.sim.t)
            command = Command(0.0, "twist", (0.0, 0.0, 0.0))
        return Decision(command, 1, (latency, 1.0 if self.tripped else 0.0))

    def final_extra(self) -> tuple:
        return (math.nan, 1.0 if self.tripped else 0.0)

    def summary_lines(self) -> list:
        out = super().summary_lines()
        if self.latencies:
            ms = sorted(v * 1000 for v in self.latencies)
            out.append(f"latency   observation sent to command in effect: median {statistics.median(ms):.3g} ms, "
                       f"max {ms[-1]:.3g} ms over {len(ms)} commands")
        out.append(f"realtime  steps at most {self.lag * 1000:.3g} ms behind the wall clock")
        if self.trips:
            ts = ", ".join(f"{t:g}" for t in self.trips[:5]) + (", ..." if len(self.trips) > 5 else "")
            out.append(f"WATCHDOG  no command for more than {self.watchdog:g} s: base commanded to stop "
                       f"{len(self.trips)} time{'s' if len(self.trips) != 1 else ''}, at t={ts} s "
                       "(trace column 'watchdog')")
        else:
            out.append(f"watchdog  never tripped ({self.watchdog:g} s)")
        return out


def farewell(link: Link, res) -> None:
    """Tell a client that is still there how the run ended."""
    t = step_times(res.rows - 1, res.scenario.step) if res.rows else 0.0
    d = {"bye": True, "t": t, "rows": res.rows, "passed": res.passed,
         "checks": [{"passed": c.passed, "text": c.text} for c in res.checks]}
    if res.interrupted:
        d["interrupted"] = True
    link.send(d)


def serve(scen, host: str = "127.0.0.1", port: int = 0, realtime: bool = False,
          watchdog: float = DEFAULT_WATCHDOG, csv=None, announce=None):
    """Listen, run ``scen`` for the first client, answer it, close.  Returns ``(RunResult, driver)``.

    ``announce(text)`` is called with ``listening on HOST:PORT`` once the socket
    listens (default: print it and flush).  Interrupting before a client has
    connected raises KeyboardInterrupt (nothing written); during the run it
    ends the run like ``trundle run`` (``RunResult.interrupted``).
    """
    if announce is None:
        def announce(text):
            print(text, flush=True)
    link = Link(host, port)
    try:
        announce(f"listening on {link.address}")
        link.accept_first()
        driver = RealtimeDriver(link, scen, watchdog) if realtime else LockstepDriver(link, scen)
        res = run_scenario(scen, csv=csv, controller=driver)
        farewell(link, res)
    finally:
        link.close()
    return res, driver
