"""Recovery after a broker outage, and how long a half-open endpoint holds a reconnect.

Not part of the test suite (no timed assertions there). The daemon reads 8 channels × 100
samples/s from a pseudo-terminal (each channel a square wave toggling every 500 ms: 16 edges/s)
and publishes through a loopback relay to a private broker. The relay is cut for a while and
resumed; from the moment the relay accepts connections again the script measures

* ``backlog_s``: until the last edge written *before* the resume has arrived;
* ``live_s``: until live latency (line written → MQTT message of its edge) is back under 20 ms:
  the arrival of the first edge written after the resume that, like every edge written in the
  second after it, took less than 20 ms;
* ``live_p99_ms``: p99 latency of the edges written from 2 s after the resume to the end.

A 10-minute outage at 16 edges/s leaves 9,600 edges (and their retained states) in the spool;
``--long`` makes that backlog in 60 s by toggling every 50 ms during the outage (160 edges/s),
and ``--real-long`` waits the 10 minutes out.

``--before DIR`` runs a second copy of streamcond (a tree holding ``streamcond/``, e.g. made with
``git archive <commit> streamcond | tar -x -C DIR``) on the same workload, alternating
before/after runs, and prints the two side by side.

Half-open endpoints: a TCP port that accepts and never answers CONNECT, and one that accepts
and closes at once; the time one connection attempt of the publisher is held is printed.

    flock /tmp/streamcond-bench.lock python tests/bench/bench_recovery.py [--before DIR] [--long]
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent
sys.path.insert(0, str(HERE.parent))  # tests/ (broker.py, daemon_rig.py)

from broker import Collector, broker_kinds, private_broker  # noqa: E402
from daemon_rig import DaemonProcess, Pty, Relay  # noqa: E402

CHANNELS = 8
RATE_HZ = 100.0
LIVE_MS = 20.0


def config(path: Path, port: Path, mqtt_port: int, spool: Path) -> None:
    cols = ", ".join(f'"c{i}"' for i in range(CHANNELS))
    chans = "".join(
        f'[[channel]]\nname = "c{i}"\nband = {{ low = 0.3, high = 0.7 }}\n' for i in range(CHANNELS)
    )
    path.write_text(
        '[station]\nname = "rec"\n'
        f'[source]\nkind = "serial"\nport = "{port}"\nformat = "csv"\n'
        f'columns = ["t_us", {cols}]\ntime_column = "t_us"\ntime_scale = 1e-6\n'
        f"sample_rate_hz = {RATE_HZ}\n" + chans
        + '[stats]\ninterval_s = 10.0\n[output]\nevents = ""\n'
        f'[output.mqtt]\nhost = "127.0.0.1"\nport = {mqtt_port}\nqos = 1\n'
        f'topic_prefix = "rec"\nspool_path = "{spool}"\n'
    )


class Writer(threading.Thread):
    """Lines at RATE_HZ; channel c flips every ``half_ms`` of device time (changeable while it
    runs); the wall-clock write time of each flip is kept: flip k of channel c is edge seq k."""

    def __init__(self, pty: Pty) -> None:
        super().__init__(daemon=True)
        self.pty = pty
        self.half_ms = 500
        self.flips: list[list[float]] = [[] for _ in range(CHANNELS)]
        self.stop = threading.Event()

    def run(self) -> None:
        level = [0] * CHANNELS
        # staggered so the channels' edges do not coincide
        next_flip = [1000 + c * 500 // CHANNELS for c in range(CHANNELS)]
        t0 = time.monotonic()
        i = 0
        while not self.stop.is_set():
            target = t0 + i / RATE_HZ
            now = time.monotonic()
            if target > now:
                time.sleep(target - now)
            t_ms = i * 1000 / RATE_HZ
            stamp = time.time()
            for c in range(CHANNELS):
                if t_ms >= next_flip[c]:
                    level[c] ^= 1
                    next_flip[c] += self.half_ms
                    self.flips[c].append(stamp)
            self.pty.write(b"%d," % int(t_ms * 1000) + b",".join(b"1" if v else b"0" for v in level) + b"\n")
            i += 1


class Daemon(DaemonProcess):
    """The daemon run from ``tree`` (a directory holding ``streamcond/``): ``python -m`` puts the
    working directory first on the import path, ahead of the installed package."""

    def __init__(self, config: Path, log: Path, tree: Path) -> None:
        super().__init__(config, log)
        self.tree = tree

    def start(self) -> "Daemon":
        self._fh = open(self.log, "ab")
        self._offset = self._fh.tell()
        env = dict(os.environ, PYTHONUNBUFFERED="1")
        env.pop("NOTIFY_SOCKET", None)
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "streamcond", "run", "-c", str(self.config)],
            stdout=self._fh, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, cwd=self.tree, env=env,
        )
        return self


def outage_run(tmp: Path, broker, tree: Path, tag: str, outage_s: float, fill_half_ms: int,
               after_s: float = 6.0) -> dict:
    pty = Pty(tmp / f"tty-{tag}")
    relay = Relay(broker.port)
    cfgp = tmp / f"{tag}.toml"
    config(cfgp, pty.path, relay.port, tmp / f"{tag}.sqlite")
    arrivals: list[dict[int, float]] = [{} for _ in range(CHANNELS)]
    col = Collector(broker.host, broker.port, ["rec/+/edge"])
    orig = col._on_message

    def on_message(client, userdata, msg):  # stamp arrival in the paho thread
        now = time.time()
        ch = int(msg.topic.split("/")[1][1:])
        arrivals[ch].setdefault(json.loads(msg.payload)["seq"], now)
        orig(client, userdata, msg)

    col._c.on_message = on_message
    col.start()
    daemon = Daemon(cfgp, tmp / f"{tag}.log", tree).start()
    try:
        daemon.wait_log("opened", 20)
        w = Writer(pty)
        w.start()
        time.sleep(3.0)
        relay.cut()
        w.half_ms = fill_half_ms
        time.sleep(outage_s)
        w.half_ms = 500
        before = [len(f) for f in w.flips]  # edges written before the resume (backlog)
        t_resume = time.time()
        relay.resume()
        time.sleep(after_s)
        w.stop.set()
        w.join()
        time.sleep(1.0)
    finally:
        daemon.signal(15)
        try:
            daemon.wait(30)
        except subprocess.TimeoutExpired:
            daemon.kill()
        col.close()
        relay.close()
        pty.unplug()
    backlog_done = t_resume
    missing = 0
    live_lat: list[float] = []
    post: list[tuple[float, float, float]] = []  # (written, arrived, latency ms) after the resume
    for c in range(CHANNELS):
        for k, tw in enumerate(w.flips[c]):
            ta = arrivals[c].get(k + 1)
            if ta is None:
                missing += 1
                continue
            if k < before[c]:
                backlog_done = max(backlog_done, ta)
            else:
                post.append((tw, ta, (ta - tw) * 1000))
                if tw >= t_resume + 2.0:
                    live_lat.append((ta - tw) * 1000)
    # Live latency is back once an edge arrives under LIVE_MS and every edge written in the
    # second after it does too (a lone late edge later on is the machine's noise, counted
    # in the p99 instead).
    post.sort()
    late_arrival = float("nan")
    for i, (tw, ta, lat) in enumerate(post):
        window = [x for x in post[i:] if x[0] <= tw + 1.0]
        if post[-1][0] >= tw + 1.0 and all(x[2] < LIVE_MS for x in window):
            late_arrival = ta
            break
    live_lat.sort()
    p99 = live_lat[min(len(live_lat) - 1, int(0.99 * len(live_lat)))] if live_lat else float("nan")
    return {
        "outage_s": outage_s,
        "backlog_edges": sum(before),
        "backlog_s": backlog_done - t_resume,
        "live_s": max(0.0, late_arrival - t_resume) if late_arrival == late_arrival else float("inf"),
        "live_p99_ms": p99,
        "missing": missing,
    }


async def _hold(port: int) -> float:
    """Seconds one publisher session is held by the endpoint at ``port`` before it fails."""
    from streamcond.config import Mqtt
    from streamcond.io.mqtt import Publisher
    from streamcond.io.spool import Spool

    with tempfile.TemporaryDirectory() as d:
        sp = Spool(Path(d) / "s.sqlite")
        pub = Publisher(Mqtt(host="127.0.0.1", port=port, spool_path=str(Path(d) / "s.sqlite")),
                        "rec", sp)
        t0 = time.monotonic()
        try:
            await asyncio.wait_for(pub._session(asyncio.Event()), 60)
        except Exception:
            pass
        held = time.monotonic() - t0
        sp.close()
        return held


def half_open(mode: str) -> float:
    ls = socket.socket()
    ls.bind(("127.0.0.1", 0))
    ls.listen(8)
    port = ls.getsockname()[1]
    held: list[socket.socket] = []

    def serve() -> None:
        while True:
            try:
                c, _ = ls.accept()
            except OSError:
                return
            if mode == "close":
                c.close()
            else:
                held.append(c)  # accepts, reads nothing, answers nothing

    threading.Thread(target=serve, daemon=True).start()
    try:
        return asyncio.run(_hold(port))
    finally:
        ls.close()
        for c in held:
            c.close()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--before", type=Path, help="a tree with the streamcond to compare against")
    ap.add_argument("--repeat", type=int, default=2, help="runs of each side per outage")
    ap.add_argument("--long", action="store_true", help="add the 10-minute backlog made in 60 s")
    ap.add_argument("--real-long", action="store_true", help="add a real 10-minute outage")
    ap.add_argument("--outages", default="2,30", help="outage lengths in seconds (default 2,30)")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    sides = [("after", ROOT)] + ([("before", args.before.resolve())] if args.before else [])
    scenarios = [(float(s), 500, f"{float(s):g} s") for s in args.outages.split(",") if s]
    if args.long:
        scenarios.append((60.0, 50, "10 min of edges (made in 60 s)"))
    if args.real_long:
        scenarios.append((600.0, 500, "600 s"))
    results: dict[str, dict[str, list[dict]]] = {}
    with tempfile.TemporaryDirectory(prefix="streamcond-recovery-") as d:
        tmp = Path(d)
        with private_broker(broker_kinds()[0], tmp / "broker") as broker:
            n = 0
            for outage_s, half, label in scenarios:
                for rep in range(args.repeat):
                    for name, tree in (sides if rep % 2 == 0 else sides[::-1]):  # A B B A ...
                        n += 1
                        r = outage_run(tmp, broker, tree, f"r{n}", outage_s, half)
                        results.setdefault(label, {}).setdefault(name, []).append(r)
                        print(f"  {label:32s} {name:6s} backlog {r['backlog_s']:6.2f} s  live {r['live_s']:6.2f} s"
                              f"  p99 {r['live_p99_ms']:6.1f} ms  ({r['backlog_edges']} edges, {r['missing']} missing)",
                              file=sys.stderr, flush=True)
    holds = {}
    for name, tree in sides:
        if name == "after":
            holds[name] = {m: half_open(m) for m in ("silent", "close")}
    if args.json:
        print(json.dumps({"outages": results, "half_open_hold_s": holds}, indent=2))
        return 0
    print("outage → backlog delivered / live latency < 20 ms again (seconds after the broker "
          "accepts connections), median of the runs; p99 live latency from 2 s after")
    for label, by_side in results.items():
        row = [f"{label:32s}"]
        for name, _ in sides:
            rs = by_side.get(name, [])
            med = lambda key: sorted(r[key] for r in rs)[len(rs) // 2]  # noqa: E731
            row.append(f"{name}: {med('backlog_s'):5.2f} / {med('live_s'):5.2f} s, p99 {med('live_p99_ms'):5.1f} ms")
        if len(sides) == 2 and by_side.get("before") and by_side.get("after"):
            b = sorted(r["live_s"] for r in by_side["before"])[len(by_side["before"]) // 2]
            a = sorted(r["live_s"] for r in by_side["after"])[len(by_side["after"]) // 2]
            row.append(f"ratio before/after {b / a if a > 0 else float('inf'):.1f}×")
        print("  " + "   ".join(row))
    for name, h in holds.items():
        print(f"half-open endpoint ({name}): silent after accept held {h['silent']:.2f} s, "
              f"closing at once held {h['close']:.2f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
