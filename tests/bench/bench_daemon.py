"""Live daemon benchmark: 8 channels × 1,000 samples/s over a pseudo-terminal into a private
local MQTT broker, in one run.

Reports the latency from a line written into the pty to the MQTT message of the edge it caused
(p50, p99), the daemon's CPU use (share of one core, from /proc/<pid>/stat) and peak RSS
(VmHWM), and then steps the sample rate up to find the highest one the daemon sustains without
falling behind (edges still arriving within 100 ms at the end of a step).

Not part of the test suite (no timed assertions there). Run from the project root:

    python tests/bench/bench_daemon.py [--seconds 20] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # tests/ (broker.py, daemon_rig.py)

from broker import Collector, broker_kinds, private_broker  # noqa: E402
from daemon_rig import DaemonProcess, Pty  # noqa: E402

CHANNELS = 8
PROFILE = os.environ.get("STREAMCOND_BENCH_PROFILE")  # a path: profile the daemon (cProfile)
#: Each channel toggles every TOGGLE_MS of device time (``--toggle-ms``): 500 ms gives
#: 8 × 2 = 16 edges/s (level-type channels, the usual case), 50 ms gives 160 edges/s
#: (eight 10 Hz pulse channels: a busy station).
TOGGLE_MS = 500


def config(path: Path, port: Path, mqtt_port: int, spool: Path, rate_hz: float) -> None:
    cols = ", ".join(f'"c{i}"' for i in range(CHANNELS))
    chans = "".join(
        f'[[channel]]\nname = "c{i}"\nband = {{ low = 0.3, high = 0.7 }}\n' for i in range(CHANNELS)
    )
    path.write_text(
        '[station]\nname = "bench"\n'
        f'[source]\nkind = "serial"\nport = "{port}"\nformat = "csv"\n'
        f'columns = ["t_us", {cols}]\ntime_column = "t_us"\ntime_scale = 1e-6\n'
        f"sample_rate_hz = {rate_hz}\n"
        + chans
        + '[stats]\ninterval_s = 10.0\n[output]\nevents = ""\n'
        f'[output.mqtt]\nhost = "127.0.0.1"\nport = {mqtt_port}\nqos = 1\n'
        f'topic_prefix = "bench"\nspool_path = "{spool}"\n'
    )


class Writer(threading.Thread):
    """Writes lines at ``rate_hz`` (in bursts of 1 ms), remembering when each toggle line was
    written: toggle k of channel i is the k-th edge of channel i."""

    def __init__(self, pty: Pty, rate_hz: float, seconds: float) -> None:
        super().__init__(daemon=True)
        self.pty, self.rate, self.seconds = pty, rate_hz, seconds
        self.toggle_times: list[list[float]] = [[] for _ in range(CHANNELS)]
        self.lines = 0
        self.behind = 0.0

    def run(self) -> None:
        n = int(self.rate * self.seconds)
        dt_us = 1e6 / self.rate
        t0 = time.monotonic()
        last = [None] * CHANNELS
        i = 0
        while i < n:
            target = t0 + i / self.rate
            now = time.monotonic()
            if target > now:
                time.sleep(target - now)
            # every line due by now, in one write
            due = min(n, int((time.monotonic() - t0) * self.rate) + 1)
            buf = []
            stamp = time.time()
            for k in range(i, due):
                t_us = int(k * dt_us)
                levels = []
                for c in range(CHANNELS):
                    # channels are staggered so their edges don't all coincide
                    lv = ((t_us // 1000 + c * (TOGGLE_MS // CHANNELS)) // TOGGLE_MS) % 2
                    if last[c] is not None and lv != last[c]:
                        self.toggle_times[c].append(stamp)
                    last[c] = lv
                    levels.append(b"1" if lv else b"0")
                buf.append(b"%d," % t_us + b",".join(levels) + b"\n")
            self.pty.write(b"".join(buf))
            self.lines += due - i
            i = due
        self.behind = time.monotonic() - (t0 + self.seconds)


def proc_cpu_s(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    ticks = os.sysconf("SC_CLK_TCK")
    return (int(fields[11]) + int(fields[12])) / ticks  # utime + stime


def proc_hwm_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def run_step(tmp: Path, broker, rate_hz: float, seconds: float) -> dict:
    pty = Pty(tmp / f"tty{int(rate_hz)}")
    cfgp = tmp / f"bench{int(rate_hz)}.toml"
    config(cfgp, pty.path, broker.port, tmp / f"spool{int(rate_hz)}.sqlite", rate_hz)
    arrivals: list[list[tuple[int, float]]] = [[] for _ in range(CHANNELS)]
    col = Collector(broker.host, broker.port, ["bench/+/edge"])

    orig = col._on_message

    def on_message(client, userdata, msg):  # stamp arrival in the paho thread
        now = time.time()
        ch = int(msg.topic.split("/")[1][1:])
        seq = json.loads(msg.payload)["seq"]
        arrivals[ch].append((seq, now))
        orig(client, userdata, msg)

    col._c.on_message = on_message
    col.start()
    prof = ["-m", "cProfile", "-o", PROFILE] if PROFILE else None
    daemon = DaemonProcess(cfgp, tmp / f"daemon{int(rate_hz)}.log", prefix=prof).start()
    daemon.wait_log("opened", 20)
    time.sleep(0.5)
    pid = daemon.proc.pid
    spy = None
    if os.environ.get("STREAMCOND_BENCH_PYSPY"):  # a path: sample the daemon with py-spy
        import subprocess
        spy = subprocess.Popen(["py-spy", "record", "-p", str(pid), "-o", os.environ["STREAMCOND_BENCH_PYSPY"],
                                "-f", "raw", "-r", "200", "-d", str(int(seconds))],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    cpu0, wall0 = proc_cpu_s(pid), time.monotonic()
    w = Writer(pty, rate_hz, seconds)
    w.start()
    w.join()
    cpu1, wall1 = proc_cpu_s(pid), time.monotonic()
    if spy is not None:
        spy.wait(timeout=30)
    time.sleep(1.0)  # let the tail arrive
    hwm = proc_hwm_mib(pid)
    daemon.signal(15)
    daemon.wait(20)
    col.close()
    pty.unplug()
    lat = []
    late_tail = []
    missing = 0
    for c in range(CHANNELS):
        first = {}
        for seq, t in arrivals[c]:
            first.setdefault(seq, t)
        # seq 1 is the first toggle after the initial state
        for k, tw in enumerate(w.toggle_times[c]):
            t = first.get(k + 1)
            if t is None:
                missing += 1
            else:
                lat.append(t - tw)
        tail = w.toggle_times[c][-5:]
        for k0, tw in enumerate(tail, len(w.toggle_times[c]) - len(tail)):
            t = first.get(k0 + 1)
            late_tail.append(float("inf") if t is None else t - tw)
    lat.sort()
    q = lambda p: lat[min(len(lat) - 1, int(p * len(lat)))] * 1000 if lat else float("nan")  # noqa: E731
    return {
        "rate_hz": rate_hz,
        "lines": w.lines,
        "edges_expected": sum(len(x) for x in w.toggle_times),
        "edges_missing": missing,
        "latency_p50_ms": q(0.50),
        "latency_p99_ms": q(0.99),
        "latency_max_ms": lat[-1] * 1000 if lat else float("nan"),
        "tail_latency_ms": max(late_tail) * 1000 if late_tail else float("nan"),
        "cpu_share_of_one_core": (cpu1 - cpu0) / (wall1 - wall0),
        "peak_rss_mib": hwm,
        "writer_behind_s": w.behind,
    }


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=20.0, help="length of the 1 kHz run")
    ap.add_argument("--step-seconds", type=float, default=6.0, help="length of each rate step")
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--max-rate", type=float, default=32000.0)
    ap.add_argument("--toggle-ms", type=int, default=500, help="half-period of each channel's square wave")
    args = ap.parse_args()
    global TOGGLE_MS
    TOGGLE_MS = args.toggle_ms
    out: dict = {}
    with tempfile.TemporaryDirectory(prefix="streamcond-bench-") as d:
        tmp = Path(d)
        with private_broker(broker_kinds()[0], tmp / "broker") as broker:
            out["broker"] = broker.kind
            out["at_1khz"] = run_step(tmp, broker, 1000.0, args.seconds)
            steps = []
            rate = 2000.0
            sustained = 1000.0
            while rate <= args.max_rate:
                r = run_step(tmp, broker, rate, args.step_seconds)
                steps.append(r)
                ok = r["edges_missing"] == 0 and r["tail_latency_ms"] < 100 and r["writer_behind_s"] < 0.5
                if not ok:
                    break
                sustained = rate
                rate *= 2
            out["steps"] = steps
            out["highest_sustained_rate_hz"] = sustained
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        a = out["at_1khz"]
        print(f"broker: {out['broker']}; {CHANNELS} channels × 1,000 samples/s for {args.seconds:g} s, "
              f"each toggling every {TOGGLE_MS} ms ({CHANNELS * 1000 // TOGGLE_MS} edges/s):")
        print(f"  latency line→MQTT  p50 {a['latency_p50_ms']:.1f} ms   p99 {a['latency_p99_ms']:.1f} ms"
              f"   max {a['latency_max_ms']:.1f} ms   ({a['edges_expected']} edges, {a['edges_missing']} missing)")
        print(f"  daemon CPU {a['cpu_share_of_one_core'] * 100:.1f} % of one core, peak RSS {a['peak_rss_mib']:.0f} MiB")
        for r in out["steps"]:
            print(f"  {r['rate_hz']:8.0f} samples/s: p99 {r['latency_p99_ms']:7.1f} ms, tail {r['tail_latency_ms']:7.1f} ms,"
                  f" CPU {r['cpu_share_of_one_core'] * 100:5.1f} %, missing {r['edges_missing']}")
        print(f"  highest rate sustained: {out['highest_sustained_rate_hz']:.0f} samples/s × {CHANNELS} channels")
    return 0


if __name__ == "__main__":
    sys.exit(main())
