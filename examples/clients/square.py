#!/usr/bin/env python3
"""Drive the ward cart around a 2 m square through ``trundle serve`` (protocol 1).

Standard library only.  The client closes the loop on its own odometry: it reads
the wheels' encoder counts in every reply and dead-reckons the pose with the
differential-drive forward kinematics (common practice); it never sees the true
pose.  Each leg holds the leg's line (heading plus cross-track correction) and
slows down onto the corner; each turn is on the spot.

    trundle serve examples/clients/square.yaml --csv square.csv   # prints: listening on 127.0.0.1:PORT
    python3 examples/clients/square.py 127.0.0.1:PORT [--log commands.csv]

``--log`` writes every command it sent as a command log (``t,vx,vy,omega``), so
a scenario with ``commands: commands.csv`` replays the same run.
Exit status: 0 when the server reports that the scenario's checks passed.
"""
import argparse
import csv
import json
import math
import socket
import sys

RADIUS = 0.08        # m, wheel radius the controller believes (the cart's drawing)
TRACK = 0.44         # m, between the two drive wheels
SIDE = 2.0           # m
SPEED = 1.0          # m/s, cruising speed on a leg
ACCEL = 2.0          # m/s^2, how fast the client changes its requested speed
TURN = 3.0           # rad/s, largest turn rate
STEPS = 5            # engine steps per command (the control period is STEPS x step)


def wrap(a):
    return (a + math.pi) % (2 * math.pi) - math.pi


class Link:
    """One JSON object per line, both ways."""

    def __init__(self, address):
        host, _, port = address.rpartition(":")
        self.sock = socket.create_connection((host.strip("[]"), int(port)))
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.reader = self.sock.makefile("rb")

    def receive(self):
        line = self.reader.readline()
        if not line:
            raise SystemExit("server closed the connection")
        msg = json.loads(line)
        if "error" in msg:
            raise SystemExit(f"server: {msg['error']}")
        return msg

    def send(self, msg):
        self.sock.sendall((json.dumps(msg) + "\n").encode())
        return self.receive()


class Odometry:
    """Pose from the left and right encoder counts (exact arc between readings)."""

    def __init__(self, counts, per_rev):
        self.per_rev = per_rev
        self.last = dict(counts)
        self.x = self.y = self.theta = 0.0

    def update(self, counts):
        d = {n: (counts[n] - self.last[n]) * 2 * math.pi / self.per_rev[n] * RADIUS for n in ("left", "right")}
        self.last = dict(counts)
        ds = (d["right"] + d["left"]) / 2
        dth = (d["right"] - d["left"]) / TRACK
        if abs(dth) < 1e-12:
            dx, dy = ds, 0.0
        else:
            dx, dy = ds * math.sin(dth) / dth, ds * (1 - math.cos(dth)) / dth
        c, s = math.cos(self.theta), math.sin(self.theta)
        self.x += c * dx - s * dy
        self.y += s * dx + c * dy
        self.theta += dth


class Square:
    def __init__(self, link, log=None):
        self.link, self.log = link, log
        hello = link.receive()
        if hello.get("protocol") != 1:
            raise SystemExit(f"this client speaks protocol 1, the server {hello.get('protocol')}")
        self.dt = hello["step"] * STEPS
        self.t = hello["t"]
        self.odo = Odometry(hello["counts"], hello["encoders"])
        self.v = 0.0

    def go(self, vx, omega, steps=STEPS):
        if self.log:
            self.log.writerow([self.t, vx, 0.0, omega])
        reply = self.link.send({"twist": [vx, 0.0, omega], "steps": steps})
        if "counts" not in reply:
            raise SystemExit(f"the run ended early: {reply}")
        self.t = reply["t"]
        self.odo.update(reply["counts"])

    def leg(self, x0, y0, heading):
        ux, uy = math.cos(heading), math.sin(heading)
        while True:
            o = self.odo
            along = (x0 + SIDE * ux - o.x) * ux + (y0 + SIDE * uy - o.y) * uy
            if along < 0.0005:
                break
            cross = (o.x - x0) * -uy + (o.y - y0) * ux
            want = min(SPEED, 4.0 * along, self.v + ACCEL * self.dt, math.sqrt(2 * ACCEL * along))
            self.v = max(want, 0.01)
            self.go(self.v, 4.0 * wrap(heading - o.theta) - 6.0 * cross)
        self.v = 0.0

    def turn(self, heading):
        # one count of difference between the wheels turns the estimate by 2 pi r / (2048 TRACK)
        # = 0.00056 rad, so settle to two counts
        while abs(wrap(heading - self.odo.theta)) > 0.0012:
            err = wrap(heading - self.odo.theta)
            self.go(0.0, math.copysign(min(TURN, max(0.05, 5.0 * abs(err))), err))

    def run(self):
        corners = [(0.0, 0.0), (SIDE, 0.0), (SIDE, SIDE), (0.0, SIDE)]
        for i, (x0, y0) in enumerate(corners):
            self.leg(x0, y0, i * math.pi / 2)
            self.turn((i + 1) * math.pi / 2)
        self.go(0.0, 0.0, 20)            # stand still while the wheels come to rest
        self.link.sock.sendall(b'{"bye": true}\n')
        return self.link.receive()


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("address", help="HOST:PORT that trundle serve printed")
    ap.add_argument("--log", help="write the commands sent as a command log CSV (t,vx,vy,omega)")
    args = ap.parse_args(argv)
    fh = open(args.log, "w", newline="") if args.log else None
    try:
        log = None
        if fh:
            log = csv.writer(fh)
            log.writerow(["t", "vx", "vy", "omega"])
        sq = Square(Link(args.address), log)
        result = sq.run()
    finally:
        if fh:
            fh.close()
    o = sq.odo
    print(f"odometry says x {o.x:.4f} m, y {o.y:.4f} m, theta {math.degrees(o.theta):.2f} deg at t={result['t']:g} s")
    for c in result["checks"]:
        print(("PASS " if c["passed"] else "FAIL ") + c["text"])
    return 0 if result["passed"] else 1


if __name__ == "__main__":
    sys.exit(main())
