"""Live daemon benchmark against the hand-written yardstick, side by side in one run.

Eight channels of CSV lines go into a pseudo-terminal in 1 ms bursts (square waves toggling
every ``--toggle-ms`` of device time, staggered), into a private local MQTT broker at QoS 1.
The same workload runs through two programs, alternating A B A B at each rate:

* ``daemon`` — ``streamcond run`` with everything on (spool, stats, retained state);
* ``base`` (with ``--base DIR``) — ``streamcond run`` from another checkout DIR (say, the
  main branch), for a before/after comparison in the same run;
* ``hand`` — tests/bench/hand_loop.py, the minimal loop an engineer would write for the bare
  job (pyserial reads, numpy parses each burst, vectorised hysteresis, paho publishes each
  edge at QoS 1; no spool, no stats).

For each it reports the latency from a line written into the pty to the MQTT message of the
edge it caused (p50, p99), the CPU use (share of one core, utime+stime from /proc/<pid>/stat,
and per thread from /proc/<pid>/task) and the peak RSS (VmHWM); then the ratio daemon / hand
per rate. Read the ratios: the machine is shared.

Not part of the test suite (no timed assertions there). Run from the project root, under the
benchmark lock:

    flock /tmp/streamcond-bench.lock python tests/bench/bench_daemon.py [--rates 1000,100,10]
        [--seconds 10] [--reps 2] [--json] [--ramp] [--base DIR --sides daemon,base,hand]

``--ramp`` afterwards steps the daemon's rate up (2 k, 4 k, ...) to find the highest one it
sustains (edges still arriving within 100 ms at the end of a step).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # tests/ (broker.py, daemon_rig.py)

from broker import Collector, broker_kinds, private_broker  # noqa: E402
from daemon_rig import ROOT, DaemonProcess, Pty  # noqa: E402

CHANNELS = 8
LOW, HIGH = 0.3, 0.7
PROFILE = os.environ.get("STREAMCOND_BENCH_PROFILE")  # a path: profile the daemon (cProfile)
#: Each channel toggles every TOGGLE_MS of device time (``--toggle-ms``): 500 ms gives
#: 8 × 2 = 16 edges/s (level-type channels, the usual case), 50 ms gives 160 edges/s
#: (eight 10 Hz pulse channels: a busy station).
TOGGLE_MS = 500
#: ``--base DIR``: the checkout the ``base`` side runs streamcond from.
BASE: Path | None = None


def config(path: Path, port: Path, mqtt_port: int, spool: Path, rate_hz: float) -> None:
    cols = ", ".join(f'"c{i}"' for i in range(CHANNELS))
    chans = "".join(
        f'[[channel]]\nname = "c{i}"\nband = {{ low = {LOW}, high = {HIGH} }}\n' for i in range(CHANNELS)
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
        # A line end first: a reader that joins mid-stream drops everything up to the first
        # one (the daemon does, by design), which must not cost it the first toggle.
        self.pty.write(b"\n")
        while i < n:
            target = t0 + i / self.rate
            now = time.monotonic()
            if target > now:
                time.sleep(target - now)
            # every line due by now, in one write (at most 1 ms of lines)
            due = min(n, max(i + 1, int((time.monotonic() - t0) * self.rate) + 1))
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


def proc_cpu_s(pid: int, task: str = "") -> float:
    p = f"/proc/{pid}/task/{task}/stat" if task else f"/proc/{pid}/stat"
    fields = Path(p).read_text().rsplit(")", 1)[1].split()
    ticks = os.sysconf("SC_CLK_TCK")
    return (int(fields[11]) + int(fields[12])) / ticks  # utime + stime


def thread_cpu(pid: int) -> dict[str, tuple[str, float, int]]:
    """CPU seconds and wake-ups so far of each thread: {tid: (name, seconds, wake-ups)}.

    Wake-ups: the thread's voluntary context switches (``/proc/<pid>/task/<tid>/status``),
    one per time it blocked (a read, a wait with or without timeout) and was woken again."""
    out = {}
    for d in Path(f"/proc/{pid}/task").iterdir():
        try:
            name = (d / "comm").read_text().strip()
            wakes = 0
            for line in (d / "status").read_text().splitlines():
                if line.startswith("voluntary_ctxt_switches:"):
                    wakes = int(line.split()[1])
            out[d.name] = (name, proc_cpu_s(pid, d.name), wakes)
        except OSError:  # the thread ended meanwhile
            pass
    return out


def proc_hwm_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


class HandProcess:
    """The hand-written loop as a subprocess (same interface as DaemonProcess where used)."""

    def __init__(self, port: Path, mqtt_port: int, log: Path) -> None:
        self.cmd = [sys.executable, str(HERE / "hand_loop.py"), str(port), str(CHANNELS), str(LOW),
                    str(HIGH), str(mqtt_port), "bench"]
        self.log = log
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> "HandProcess":
        self._fh = open(self.log, "wb")
        self.proc = subprocess.Popen(self.cmd, stdout=self._fh, stderr=subprocess.STDOUT, cwd=ROOT,
                                     env=dict(os.environ, PYTHONUNBUFFERED="1"))
        return self

    def wait_log(self, text: str, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if text in self.log.read_text(errors="replace"):
                return
            time.sleep(0.05)
        raise AssertionError(f"{text!r} not in {self.log}")

    def signal(self, sig: int) -> None:
        assert self.proc is not None
        self.proc.send_signal(sig)

    def wait(self, timeout: float) -> int:
        assert self.proc is not None
        rc = self.proc.wait(timeout=timeout)
        self._fh.close()
        return rc


def run_step(tmp: Path, broker, side: str, rate_hz: float, seconds: float, tag: str) -> dict:
    name = f"{side}{int(rate_hz)}{tag}"
    pty = Pty(tmp / f"tty-{name}")
    cfgp = tmp / f"bench-{name}.toml"
    config(cfgp, pty.path, broker.port, tmp / f"spool-{name}.sqlite", rate_hz)
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
    if side in ("daemon", "base"):
        prof = ["-m", "cProfile", "-o", PROFILE] if PROFILE and side == "daemon" else None
        root = BASE if side == "base" else None
        proc = DaemonProcess(cfgp, tmp / f"{name}.log", prefix=prof, root=root).start()
    else:
        proc = HandProcess(pty.path, broker.port, tmp / f"{name}.log").start()
    proc.wait_log("opened", 20)
    time.sleep(0.5)
    pid = proc.proc.pid
    spy = None
    if os.environ.get("STREAMCOND_BENCH_PYSPY") and side == "daemon":  # a path: sample with py-spy
        spy = subprocess.Popen(["py-spy", "record", "-p", str(pid), "-o", os.environ["STREAMCOND_BENCH_PYSPY"],
                                "-f", "raw", "-r", "200", "-t", "-d", str(int(seconds))],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    th0 = thread_cpu(pid)
    cpu0, wall0 = proc_cpu_s(pid), time.monotonic()
    w = Writer(pty, rate_hz, seconds)
    w.start()
    w.join()
    cpu1, wall1 = proc_cpu_s(pid), time.monotonic()
    th1 = thread_cpu(pid)
    if spy is not None:
        spy.wait(timeout=30)
    time.sleep(1.0)  # let the tail arrive
    hwm = proc_hwm_mib(pid)
    proc.signal(15)
    proc.wait(20)
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
    wall = wall1 - wall0
    threads = {}
    wakeups = {}
    for tid, (nm, s1, w1) in th1.items():
        _, s0, w0 = th0.get(tid, (nm, 0.0, 0))
        threads[f"{nm}[{tid}]"] = (s1 - s0) / wall
        wakeups[f"{nm}[{tid}]"] = (w1 - w0) / wall
    return {
        "side": side,
        "rate_hz": rate_hz,
        "lines": w.lines,
        "edges_expected": sum(len(x) for x in w.toggle_times),
        "edges_missing": missing,
        "latency_p50_ms": q(0.50),
        "latency_p99_ms": q(0.99),
        "latency_max_ms": lat[-1] * 1000 if lat else float("nan"),
        "tail_latency_ms": max(late_tail) * 1000 if late_tail else float("nan"),
        "cpu_share_of_one_core": (cpu1 - cpu0) / wall,
        "threads_share_of_one_core": dict(sorted(threads.items(), key=lambda kv: -kv[1])),
        "threads_wakeups_per_s": dict(sorted(wakeups.items(), key=lambda kv: -kv[1])),
        "wakeups_per_s": sum(wakeups.values()),
        "peak_rss_mib": hwm,
        "writer_behind_s": w.behind,
    }


def summarise(runs: list[dict]) -> dict:
    by: dict[tuple[str, float], list[dict]] = {}
    for r in runs:
        by.setdefault((r["side"], r["rate_hz"]), []).append(r)
    table = []
    for rate in sorted({r["rate_hz"] for r in runs}, reverse=True):
        d, h = by.get(("daemon", rate), []), by.get(("hand", rate), [])
        if not d or not h:
            continue
        dc = statistics.mean(x["cpu_share_of_one_core"] for x in d)
        hc = statistics.mean(x["cpu_share_of_one_core"] for x in h)
        b = by.get(("base", rate), [])
        bc = statistics.mean(x["cpu_share_of_one_core"] for x in b) if b else None
        table.append({
            "rate_hz": rate,
            "base_cpu": bc,
            "base_ratio": bc / hc if bc is not None and hc > 0 else None,
            "base_ratios_per_pair": [a["cpu_share_of_one_core"] / c["cpu_share_of_one_core"]
                                     if c["cpu_share_of_one_core"] > 0 else float("inf") for a, c in zip(b, h)],
            "base_p99_ms": max(x["latency_p99_ms"] for x in b) if b else None,
            "base_rss_mib": max(x["peak_rss_mib"] for x in b) if b else None,
            "daemon_cpu": dc,
            "hand_cpu": hc,
            "ratio": dc / hc if hc > 0 else float("inf"),
            "ratios_per_pair": [a["cpu_share_of_one_core"] / b["cpu_share_of_one_core"]
                                if b["cpu_share_of_one_core"] > 0 else float("inf") for a, b in zip(d, h)],
            "daemon_p99_ms": max(x["latency_p99_ms"] for x in d),
            "hand_p99_ms": max(x["latency_p99_ms"] for x in h),
            "daemon_rss_mib": max(x["peak_rss_mib"] for x in d),
            "hand_rss_mib": max(x["peak_rss_mib"] for x in h),
            "daemon_missing": sum(x["edges_missing"] for x in d),
            "hand_missing": sum(x["edges_missing"] for x in h),
        })
    return {"table": table}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rates", default="1000,100,10", help="samples/s per channel, comma-separated")
    ap.add_argument("--seconds", type=float, default=10.0, help="length of each run")
    ap.add_argument("--reps", type=int, default=2, help="A/B pairs per rate")
    ap.add_argument("--sides", default="daemon,hand", help="which programs to run")
    ap.add_argument("--ramp", action="store_true", help="afterwards step the daemon's rate up")
    ap.add_argument("--step-seconds", type=float, default=6.0, help="length of each ramp step")
    ap.add_argument("--max-rate", type=float, default=32000.0)
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--base", type=Path, help="checkout to run the 'base' side's streamcond from")
    ap.add_argument("--toggle-ms", type=int, default=500, help="half-period of each channel's square wave")
    args = ap.parse_args()
    global TOGGLE_MS, BASE
    TOGGLE_MS = args.toggle_ms
    BASE = args.base.resolve() if args.base else None
    if "base" in args.sides.split(",") and BASE is None:
        ap.error("the 'base' side needs --base DIR")
    rates = [float(x) for x in args.rates.split(",") if x]
    sides = [s for s in args.sides.split(",") if s]
    out: dict = {"toggle_ms": TOGGLE_MS, "channels": CHANNELS, "seconds": args.seconds}
    runs: list[dict] = []
    with tempfile.TemporaryDirectory(prefix="streamcond-bench-") as d:
        tmp = Path(d)
        with private_broker(broker_kinds()[0], tmp / "broker") as broker:
            out["broker"] = broker.kind
            for rate in rates:
                for rep in range(args.reps):
                    # A B, then B A: neither side always runs first (with three sides, each
                    # runs first in turn)
                    k = rep % len(sides)
                    order = sides[k:] + sides[:k] if len(sides) > 2 else (sides if rep % 2 == 0 else sides[::-1])
                    for side in order:
                        r = run_step(tmp, broker, side, rate, args.seconds, f"-{rep}")
                        runs.append(r)
                        if not args.json:
                            top = ", ".join(f"{k} {v * 100:.1f}%" for k, v in
                                            list(r["threads_share_of_one_core"].items())[:4])
                            print(f"  {side:6s} {rate:6.0f}/s: CPU {r['cpu_share_of_one_core'] * 100:5.1f} %  "
                                  f"p50 {r['latency_p50_ms']:5.1f} ms  p99 {r['latency_p99_ms']:5.1f} ms  "
                                  f"RSS {r['peak_rss_mib']:5.1f} MiB  missing {r['edges_missing']}  "
                                  f"wake-ups {r['wakeups_per_s']:6.0f}/s  threads: {top}", flush=True)
                            if os.environ.get("STREAMCOND_BENCH_WAKEUPS"):
                                print("      wake-ups/s: " + ", ".join(
                                    f"{k} {v:.0f}" for k, v in r["threads_wakeups_per_s"].items()), flush=True)
            steps = []
            if args.ramp:
                rate = 2000.0
                sustained = 1000.0
                while rate <= args.max_rate:
                    r = run_step(tmp, broker, "daemon", rate, args.step_seconds, "-ramp")
                    steps.append(r)
                    ok = r["edges_missing"] == 0 and r["tail_latency_ms"] < 100 and r["writer_behind_s"] < 0.5
                    if not ok:
                        break
                    sustained = rate
                    rate *= 2
                out["highest_sustained_rate_hz"] = sustained
            out["steps"] = steps
    out["runs"] = runs
    out.update(summarise(runs))
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        print(f"broker: {out['broker']}; {CHANNELS} channels, each toggling every {TOGGLE_MS} ms "
              f"({CHANNELS * 1000 // TOGGLE_MS} edges/s), {args.seconds:g} s per run, {args.reps} A/B pair(s) per rate")
        print("| rate per channel | daemon CPU | hand loop CPU | ratio (pairs) | daemon p99 | hand p99 | daemon peak RSS |")
        print("|---|---|---|---|---|---|---|")
        for t in out["table"]:
            pairs = ", ".join(f"{x:.2f}" for x in t["ratios_per_pair"])
            print(f"| {t['rate_hz']:,.0f} samples/s | {t['daemon_cpu'] * 100:.1f} % | {t['hand_cpu'] * 100:.1f} % | "
                  f"{t['ratio']:.2f}× ({pairs}) | {t['daemon_p99_ms']:.1f} ms | {t['hand_p99_ms']:.1f} ms | "
                  f"{t['daemon_rss_mib']:.0f} MiB |")
        if any(t["base_cpu"] is not None for t in out["table"]):
            print(f"base ({BASE}):")
            print("| rate per channel | base CPU | ratio to hand loop (pairs) | base p99 | base peak RSS |")
            print("|---|---|---|---|---|")
            for t in out["table"]:
                if t["base_cpu"] is None:
                    continue
                pairs = ", ".join(f"{x:.2f}" for x in t["base_ratios_per_pair"])
                print(f"| {t['rate_hz']:,.0f} samples/s | {t['base_cpu'] * 100:.1f} % | {t['base_ratio']:.2f}× ({pairs}) | "
                      f"{t['base_p99_ms']:.1f} ms | {t['base_rss_mib']:.0f} MiB |")
        for r in out["steps"]:
            print(f"  ramp {r['rate_hz']:8.0f} samples/s: p99 {r['latency_p99_ms']:7.1f} ms, tail {r['tail_latency_ms']:7.1f} ms,"
                  f" CPU {r['cpu_share_of_one_core'] * 100:5.1f} %, missing {r['edges_missing']}")
        if args.ramp:
            print(f"  highest rate sustained: {out['highest_sustained_rate_hz']:.0f} samples/s × {CHANNELS} channels")
    return 0


if __name__ == "__main__":
    sys.exit(main())
