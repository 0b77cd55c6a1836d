"""The spool's disk traffic: fsyncs and bytes written per second, for each durability setting.

Not part of the test suite. A child process drives a :class:`~streamcond.io.spool.Spool` the way
the live daemon does with 8 channels and the broker reachable: blocks every 8 ms; each edge
is stored as its edge record and its retained state, with the channels' state snapshot, in one
``put_many``; a stats record per channel every 10 s; the publisher reads what was stored and
acknowledges it at once (the broker's PUBACK). Counted outside the spool:

* fsync and fdatasync calls, by the kernel's tracer (``strace -f -c``);
* bytes handed to ``write`` (``wchar``) and bytes the process dirtied for the storage layer
  (``write_bytes``), from ``/proc/<pid>/io``.

The two settings run alternately (always, interval, always, interval ...) at each edge rate.
Run it on the disk the spool will live on (a tmpfs makes fsync free and the figures meaningless):

    flock /tmp/streamcond-bench.lock python tests/bench/bench_spool_io.py [--dir DIR] [--seconds 10]
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

CHILD = textwrap.dedent(
    """
    import json, sys, time
    from streamcond import records
    from streamcond.io.spool import Spool

    path, sync, rate, seconds = sys.argv[1], sys.argv[2], float(sys.argv[3]), float(sys.argv[4])
    CH = 8
    try:
        sp = Spool(path, sync=sync, sync_interval_s=1.0)
    except TypeError:  # a streamcond from before the durability setting (--before)
        sp = Spool(path)
    def io():
        d = dict(l.split(": ") for l in open("/proc/self/io").read().splitlines())
        return int(d["wchar"]), int(d["write_bytes"])
    seq = [0] * CH
    level = [0] * CH
    block = 0.008
    t0 = time.monotonic()
    w0, b0 = io()
    due = 0.0
    next_stats = 10.0
    n_blocks = int(seconds / block)
    for k in range(n_blocks):
        target = t0 + k * block
        now = time.monotonic()
        if target > now:
            time.sleep(target - now)
        t = k * block
        items = []
        due += rate * block
        while due >= 1.0:
            due -= 1.0
            c = (seq[0] + seq[1] + seq[2] + seq[3] + seq[4] + seq[5] + seq[6] + seq[7]) % CH
            seq[c] += 1
            level[c] ^= 1
            e = records.edge(f"c{c}", t, level[c], 0.7 if level[c] else 0.3, seq[c])
            items.append((f"bench/c{c}/edge", records.to_json(e).encode(), 1, False, "edge"))
            st = {"kind": "state", "channel": f"c{c}", "t": t, "level": level[c], "seq": seq[c]}
            items.append((f"bench/c{c}/state", records.to_json(st).encode(), 1, True, "state"))
        if t >= next_stats:
            next_stats += 10.0
            for c in range(CH):
                s = {"kind": "stats", "channel": f"c{c}", "t": t, "edges": seq[c], "raw_crossings": seq[c]}
                items.append((f"bench/c{c}/stats", records.to_json(s).encode(), 1, False, "stats"))
        if items:
            snap = {f"c{c}": {"seq": seq[c], "level": level[c]} for c in range(CH)}
            sp.put_many(items, snap)
            got = sp.peek(1024)
            sp.ack([i.id for i in got])
    elapsed = time.monotonic() - t0
    w1, b1 = io()
    sp.close()
    print(json.dumps({"elapsed_s": elapsed, "wchar": w1 - w0, "write_bytes": b1 - b0,
                      "edges": sum(seq)}))
    """
)


def run(d: Path, sync: str, rate: float, seconds: float, tag: str, tree: Path | None = None) -> dict:
    path = d / f"{tag}.sqlite"
    trace = d / f"{tag}.strace"
    cmd = [sys.executable, "-c", CHILD, str(path), sync, str(rate), str(seconds)]
    if shutil.which("strace"):
        cmd = ["strace", "-f", "-c", "-e", "trace=fsync,fdatasync", "-o", str(trace)] + cmd
    # `python -c` puts the working directory first on the import path: --before's tree wins
    r = subprocess.run(cmd, capture_output=True, text=True, check=True, cwd=tree or Path.cwd())
    out = json.loads(r.stdout.strip().splitlines()[-1])
    fsyncs = None
    if trace.exists():
        fsyncs = 0
        for line in trace.read_text().splitlines():
            parts = line.split()
            if parts and parts[-1] in ("fsync", "fdatasync"):
                fsyncs += int(parts[3])  # % time, seconds, usecs/call, calls, [errors,] syscall
    secs = out["elapsed_s"]
    return {
        "sync": sync,
        "edges_per_s": out["edges"] / secs,
        "fsyncs_per_s": None if fsyncs is None else fsyncs / secs,
        "kib_written_per_s": out["write_bytes"] / 1024 / secs,
        "kib_to_write_per_s": out["wchar"] / 1024 / secs,
    }


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dir", type=Path, default=None, help="where the spool files go (its disk)")
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--before", type=Path, default=None,
                    help="a tree holding an earlier streamcond/ to run beside (its one mode)")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    sides = [("always", None), ("interval", None)]
    if args.before:
        sides.append(("before", args.before.resolve()))
    results: list[dict] = []
    with tempfile.TemporaryDirectory(prefix="streamcond-spool-io-", dir=args.dir) as d:
        n = 0
        for rate in (16.0, 160.0):
            for rep in range(args.repeat):
                for name, tree in (sides if rep % 2 == 0 else sides[::-1]):
                    n += 1
                    sync = "always" if name == "before" else name
                    r = run(Path(d), sync, rate, args.seconds, f"r{n}", tree)
                    results.append({"rate": rate, **r, "sync": name})
    if args.json:
        print(json.dumps(results, indent=2))
        return 0
    print("spool disk traffic (8 channels, broker reachable), mean of the runs:")
    print(f"  {'edges/s':>8} {'sync':>9} {'fsync/s':>8} {'KiB dirtied/s':>14} {'KiB write()/s':>14}")
    for rate in (16.0, 160.0):
        for sync, _ in sides:
            rs = [r for r in results if r["rate"] == rate and r["sync"] == sync]
            mean = lambda k: sum(r[k] for r in rs) / len(rs)  # noqa: E731
            fs = "n/a" if rs[0]["fsyncs_per_s"] is None else f"{mean('fsyncs_per_s'):.1f}"
            print(f"  {mean('edges_per_s'):8.1f} {sync:>9} {fs:>8} {mean('kib_written_per_s'):14.1f}"
                  f" {mean('kib_to_write_per_s'):14.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
