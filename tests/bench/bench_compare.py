"""Benchmark: `streamcond compare` over many recordings, local pool (1 and 2 jobs) and a Dask
LocalCluster (two worker processes on this machine).

    flock /tmp/streamcond-bench.lock python tests/bench/bench_compare.py [--copies 32] [--rows 1000000]

One generated 1 M-row, 4-channel CSV (the recording of `streamcond bench`), linked 32 times
under different names (hard links: 32 recordings to replay, one file's worth of disk and page
cache). Config B moves every channel's band a little, so every task replays each recording
twice and compares the edges. Each figure is the wall time of a whole `streamcond compare`
process (median of the rounds) and the CPU time it took (the process and its pool, or the
cluster's workers and the client); the three sides alternate within each round (1, 2, cluster, then cluster, 2, 1, ...)
so that a change in the machine's load falls on all of them. The peak resident memory of each
worker is read from /proc (local pool: the pool's processes; cluster: the worker processes),
and a single-job run on a recording a quarter as long shows whether it depends on the
recording's length (it should not: each task keeps edges and counts, not the records).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from streamcond.bench import BENCH_CONFIG, CHANNEL, write_csv


def _config(low: float, high: float) -> str:
    chans = "".join(CHANNEL.format(name=n) for n in "abcd").replace(
        "band = { low = -0.1, high = 0.1 }", f"band = {{ low = {low}, high = {high} }}"
    )
    return BENCH_CONFIG.format(channels=chans)


def _descendants(pid: int) -> list[int]:
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        try:
            kids = Path(f"/proc/{p}/task/{p}/children").read_text().split()
        except OSError:
            continue
        for k in map(int, kids):
            out.append(k)
            todo.append(k)
    return out


def _hwm_mib(pid: int) -> float:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    except (OSError, ValueError):
        pass
    return 0.0


def run_compare(argv: list[str], watch: list[int] | None = None) -> tuple[float, float, float]:
    """Wall time of one compare process, its CPU time (s, user + system, with the pool
    processes it reaped), and the largest worker peak RSS seen (MiB): of the process's
    children, or of the given worker pids."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    peak: dict[int, float] = {}
    while True:
        pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
        if pid:
            break
        for p in watch if watch is not None else _descendants(proc.pid):
            peak[p] = max(peak.get(p, 0.0), _hwm_mib(p))
        time.sleep(0.05)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    err = proc.stderr.read().decode(errors="replace") if proc.stderr else ""
    if proc.returncode not in (0, 1):
        raise RuntimeError(f"{' '.join(argv)} failed ({proc.returncode}): {err.strip()}")
    return wall, usage.ru_utime + usage.ru_stime, max(peak.values(), default=0.0)


def _worker_cpu() -> float:
    import resource

    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--copies", type=int, default=32)
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()

    from dask.distributed import Client, LocalCluster

    load0 = os.getloadavg()
    with tempfile.TemporaryDirectory(prefix="streamcond-bench-compare-") as tmp:
        d = Path(tmp)
        base = d / "base.csv"
        write_csv(base, args.rows)
        short = d / "short.csv"
        write_csv(short, args.rows // 4)
        recs = []
        for i in range(args.copies):
            p = d / f"station{i:02d}.csv"
            os.link(base, p)
            recs.append(str(p))
        (d / "a.toml").write_text(_config(-0.1, 0.1))
        (d / "b.toml").write_text(_config(-0.12, 0.12))
        cmd = [sys.executable, "-m", "streamcond", "compare", str(d / "a.toml"), str(d / "b.toml"),
               "--no-progress", "--json"]
        times: dict[str, list[float]] = {"1 job": [], "2 jobs": [], "cluster": []}
        cpu: dict[str, list[float]] = {k: [] for k in times}
        rss: dict[str, float] = {}
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                          dashboard_address=None) as cluster:
            client = Client(cluster)
            worker_pids = list(client.run(os.getpid).values())
            sides = {
                "1 job": (cmd + recs + ["--jobs", "1"], None),
                "2 jobs": (cmd + recs + ["--jobs", "2"], None),
                "cluster": (cmd + recs + ["--scheduler", cluster.scheduler_address], worker_pids),
            }
            # warm the cluster up (its workers import streamcond once), as a standing one is
            run_compare(cmd + [str(short), "--scheduler", cluster.scheduler_address], worker_pids)
            order = list(sides)
            for r in range(args.rounds):
                for name in order if r % 2 == 0 else order[::-1]:
                    argv, watch = sides[name]
                    before = sum(client.run(_worker_cpu).values()) if watch else 0.0
                    wall, cpu_s, peak = run_compare(argv, watch)
                    if watch:  # the cluster's workers did the work: their CPU, and the client's
                        cpu_s += sum(client.run(_worker_cpu).values()) - before
                    times[name].append(wall)
                    cpu[name].append(cpu_s)
                    rss[name] = max(rss.get(name, 0.0), peak)
                    print(f"round {r + 1}: {name:8s} {wall:7.1f} s wall, {cpu_s:7.1f} s CPU, "
                          f"worker peak RSS {peak:6.0f} MiB, load {os.getloadavg()[0]:.1f}",
                          file=sys.stderr, flush=True)
            client.close()
        # memory against recording length: one task, a recording 4x shorter vs the full one
        _, _, rss_short = run_compare(cmd + [str(short), "--jobs", "1"])
        _, _, rss_full = run_compare(cmd + [recs[0], "--jobs", "1"])
        size_mb = base.stat().st_size / 1e6
    import statistics

    best = {k: statistics.median(v) for k, v in times.items()}
    cpu_med = {k: statistics.median(v) for k, v in cpu.items()}
    res = {
        "recordings": args.copies,
        "rows_each": args.rows,
        "file_mb_each": round(size_mb, 1),
        "cpus": os.cpu_count(),
        "loadavg_before": [round(x, 2) for x in load0],
        "loadavg_after": [round(x, 2) for x in os.getloadavg()],
        "wall_s": {k: [round(x, 2) for x in v] for k, v in times.items()},
        "median_wall_s": {k: round(v, 2) for k, v in best.items()},
        "cpu_s": {k: [round(x, 2) for x in v] for k, v in cpu.items()},
        "median_cpu_s": {k: round(v, 2) for k, v in cpu_med.items()},
        "cpu_2_jobs_vs_1": round(cpu_med["2 jobs"] / cpu_med["1 job"], 2),
        "cpu_cluster_vs_1": round(cpu_med["cluster"] / cpu_med["1 job"], 2),
        "speedup_2_jobs": round(best["1 job"] / best["2 jobs"], 2),
        "speedup_cluster": round(best["1 job"] / best["cluster"], 2),
        "cluster_vs_2_jobs": round(best["cluster"] / best["2 jobs"], 2),
        "rows_per_s_1_job": round(2 * args.copies * args.rows / best["1 job"]),
        "worker_peak_rss_mib": {k: round(v) for k, v in rss.items()},
        "worker_peak_rss_mib_quarter_vs_full_recording": [round(rss_short), round(rss_full)],
    }
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        print(f"{args.copies} recordings x {args.rows:,} rows ({size_mb:.0f} MB each), compare "
              f"(2 replays each), {os.cpu_count()} CPUs, load {load0[0]:.1f} before")
        for k in times:
            print(f"  {k:8s} median {best[k]:6.1f} s wall (runs: {', '.join(f'{x:.1f}' for x in times[k])}),"
                  f" {cpu_med[k]:6.1f} s CPU, worker peak RSS {rss[k]:.0f} MiB")
        print(f"  speed-up: 2 jobs {res['speedup_2_jobs']}x, cluster {res['speedup_cluster']}x "
              f"(cluster / 2 jobs = {res['cluster_vs_2_jobs']})")
        print(f"  worker peak RSS, one task: {rss_short:.0f} MiB on {args.rows // 4:,} rows, "
              f"{rss_full:.0f} MiB on {args.rows:,} rows")
    return 0


if __name__ == "__main__":
    sys.exit(main())
