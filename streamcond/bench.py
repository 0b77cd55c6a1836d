"""``streamcond bench``: throughput on this machine, measured side by side in one run.

Figures (DESIGN.md "bench --json"):

* ``kernel_msps`` — the hysteresis comparator kernel on 10 M float64 samples;
* ``floor_msps`` — a comparator *without* hysteresis on the same samples,
  ``np.flatnonzero(np.diff(x > c))``: a single numpy threshold-and-difference pass, the floor a
  vectorised kernel can hope to reach;
* ``naive_msps`` — the straightforward per-sample Python loop over ``x.tolist()`` doing the same
  hysteresis (timed on a slice, it is slow);
* ``replay_rows_per_s`` / ``loadtxt_rows_per_s`` — ``streamcond replay`` of a generated
  1 M-row, 4-channel CSV with a lowpass on every channel, as a whole process, next to a process
  that imports numpy and scipy.signal and parses the same file with ``numpy.loadtxt``; with the
  peak RSS of each (and of a replay of a quarter of the file, to show memory does not grow with
  the file).

Shared machines are noisy, so the kernel figures are the best of ``--repeat`` runs, the
processes' times the median of up to five rounds (every side once a round, each round starting
one side later), and a ratio the median of the rounds' ratios: read the ratios. Nothing here is
asserted by the test suite.
"""

from __future__ import annotations

import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np


def _best(fn: Callable[[], Any], repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _signal(n: int, seed: int = 7) -> np.ndarray:
    """A slow sine with noise: many chattering threshold crossings, like a real slow signal."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / 1000.0
    return np.sin(2 * np.pi * 0.5 * t) + 0.05 * rng.standard_normal(n)


def kernel_figures(n: int, repeat: int) -> dict[str, Any]:
    from .core.comparator import hysteresis, hysteresis_reference

    x = _signal(n)
    low, high = -0.1, 0.1
    floor = _best(lambda: np.flatnonzero(np.diff(x > 0.0)), repeat)
    kern = _best(lambda: hysteresis(x, low, high, -1), repeat)
    m = min(n, 1_000_000)
    naive = _best(lambda: hysteresis_reference(x[:m], low, high, -1), max(1, min(repeat, 2)))
    tr, _ = hysteresis(x, low, high, -1)
    ref_idx, ref_lev, _ = hysteresis_reference(x[:m], low, high, -1)
    tr_m, _ = hysteresis(x[:m], low, high, -1)
    agree = bool(np.array_equal(tr_m.index, ref_idx) and np.array_equal(tr_m.level, ref_lev))
    return {
        "samples": n,
        "kernel_msps": n / kern / 1e6,
        "floor_msps": n / floor / 1e6,
        "naive_msps": m / naive / 1e6,
        "naive_samples": m,
        "kernel_vs_floor": floor / kern,
        "kernel_vs_naive": (m / naive) and (n / kern) / (m / naive),
        "kernel_transitions": len(tr),
        "kernel_agrees_with_loop": agree,
    }


def write_csv(path: Path, rows: int, seed: int = 11) -> None:
    """A 4-channel, 1 kHz recording with a millisecond time column (written in blocks)."""
    rng = np.random.default_rng(seed)
    with open(path, "w", encoding="ascii") as fh:
        fh.write("t_ms,a,b,c,d\n")
        step = 200_000
        for a in range(0, rows, step):
            k = np.arange(a, min(a + step, rows))
            t = k / 1000.0
            cols = [
                np.sin(2 * np.pi * f * t) + 0.05 * rng.standard_normal(k.size)
                for f in (0.2, 0.5, 1.0, 2.0)
            ]
            block = np.column_stack([k] + cols)
            np.savetxt(fh, block, fmt=["%d", "%.5f", "%.5f", "%.5f", "%.5f"], delimiter=",")


BENCH_CONFIG = """
[source]
kind = "file"
time_column = "t_ms"
time_scale = 0.001
{channels}
[output]
events = "-"
"""

CHANNEL = """
[[channel]]
name = "{name}"
filter = {{ kind = "lowpass", cutoff_hz = 20.0, order = 2 }}
band = {{ low = -0.1, high = 0.1 }}
"""


def _run_process(argv: list[str], env: dict[str, str] | None = None) -> tuple[float, float]:
    """Wall time (s) and peak RSS (MiB) of one child process.

    The peak is the high-water mark (``VmHWM`` in /proc) of the largest single process among
    the child and its own children (a replay's reader process), read by a thread every 50 ms
    while it runs (``ru_maxrss`` would also count the parent's pages the child carried between
    fork and exec). The wall time is taken when the child is reaped, not at a poll; polling
    more often was measured to take CPU from a two-process replay on a two-core machine.
    """
    import threading

    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            env=None if env is None else {**os.environ, **env})
    hwm_kib = [0]
    done = threading.Event()

    def watch() -> None:
        while not done.wait(0.05):
            for pid in [proc.pid, *_children(proc.pid)]:
                hwm_kib[0] = max(hwm_kib[0], _hwm_kib(pid))

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    _, err_b = proc.communicate()
    wall = time.perf_counter() - t0
    done.set()
    watcher.join()
    err = err_b.decode(errors="replace") if err_b else ""
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(argv)} failed: {err.strip()}")
    return wall, hwm_kib[0] / 1024.0


def _hwm_kib(pid: int) -> int:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except (OSError, ValueError):
        pass
    return 0


def _children(pid: int) -> list[int]:
    out: list[int] = []
    try:
        for task in Path(f"/proc/{pid}/task").iterdir():
            out += [int(x) for x in (task / "children").read_text().split()]
    except (OSError, ValueError):
        pass
    return out


def _compile_package() -> None:
    """Byte-compile streamcond's modules, as ``pip install`` does for an installed package and
    did for numpy, pandas and pyarrow: an editable checkout run with PYTHONDONTWRITEBYTECODE
    would otherwise compile every module at every start (measured: about 0.1 s a process),
    a cost no installed copy pays. A read-only install is left as it is."""
    import compileall

    try:
        compileall.compile_dir(str(Path(__file__).resolve().parent), quiet=2)
    except OSError:
        pass


def _have(module: str) -> bool:
    import importlib.util

    return importlib.util.find_spec(module) is not None


def replay_figures(rows: int, repeat: int, workdir: Path) -> dict[str, Any]:
    """Whole processes, interleaved (A B C ... A B C ...) so every side sees the same load."""
    csv = workdir / "bench.csv"
    quarter = workdir / "bench_quarter.csv"
    write_csv(csv, rows)
    write_csv(quarter, max(rows // 4, 1000))
    cfg = workdir / "bench.toml"
    cfg.write_text(
        BENCH_CONFIG.format(channels="".join(CHANNEL.format(name=n) for n in "abcd")),
        encoding="utf-8",
    )
    events = workdir / "events.jsonl"
    py = sys.executable
    _compile_package()

    def replay_of(path: Path) -> list[str]:
        return [py, "-m", "streamcond", "replay", str(path), "-c", str(cfg), "--events",
                str(events), "--force", "--no-progress"]

    have_arrow, have_pandas = _have("pyarrow"), _have("pandas")
    # (name, argv, extra environment)
    sides: list[tuple[str, list[str], dict[str, str] | None]] = [
        ("replay", replay_of(csv), {"STREAMCOND_CSV_READER": "numpy"}),
        ("loadtxt", [py, "-c", "import sys, numpy, scipy.signal; "
                     "numpy.loadtxt(sys.argv[1], delimiter=',', skiprows=1)", str(csv)], None),
    ]
    if have_arrow:
        from .config import load_config
        from .convert import convert

        parquet = workdir / "bench.parquet"
        convert(load_config(cfg), csv, parquet, force=True)
        sides += [
            ("replay_fast", replay_of(csv), {"STREAMCOND_CSV_READER": "auto"}),  # as installed
            ("pyarrow_csv", [py, "-c", "import sys, pyarrow.csv as c; c.read_csv(sys.argv[1])",
                             str(csv)], None),
            ("replay_parquet", replay_of(parquet), None),
            ("parquet_numpy", [py, "-c", "import sys, numpy, scipy.signal, pyarrow.parquet as pq; "
                               "t = pq.read_table(sys.argv[1]); "
                               "[c.to_numpy() for c in t.columns]", str(parquet)], None),
        ]
    if have_pandas:
        sides.append(("pandas_csv", [py, "-c", "import sys, pandas; pandas.read_csv(sys.argv[1])",
                                     str(csv)], None))
    reps = max(1, min(repeat, 5))
    times: dict[str, list[float]] = {name: [] for name, _, _ in sides}
    rss = {name: 0.0 for name, _, _ in sides}
    for k in range(reps):
        # every side in each round, each round starting one side later, so that a side's
        # ratio to another is taken from runs next to each other on the same machine
        for name, argv, env in sides[k % len(sides):] + sides[: k % len(sides)]:
            w, m = _run_process(argv, env)
            times[name].append(w)
            rss[name] = max(rss[name], m)
    _, q_rss = _run_process(replay_of(quarter), {"STREAMCOND_CSV_READER": "numpy"})
    med = {name: statistics.median(v) for name, v in times.items()}

    def ratio(a: str, b: str) -> float:
        """The median over rounds of a's time over b's in the same round."""
        return statistics.median(x / y for x, y in zip(times[a], times[b]))

    out: dict[str, Any] = {
        "rows": rows,
        "rounds": reps,
        "replay_rows_per_s": rows / med["replay"],
        "loadtxt_rows_per_s": rows / med["loadtxt"],
        "replay_s": med["replay"],
        "loadtxt_s": med["loadtxt"],
        "replay_vs_loadtxt_time": ratio("replay", "loadtxt"),
        "replay_peak_rss_mib": rss["replay"],
        "replay_quarter_file_peak_rss_mib": q_rss,
        "loadtxt_peak_rss_mib": rss["loadtxt"],
        "csv_mib": csv.stat().st_size / 2**20,
        "pyarrow_installed": have_arrow,
        "pandas_installed": have_pandas,
        "processes": {n: {"s": med[n], "peak_rss_mib": rss[n]} for n in med},
    }
    if have_arrow:
        out["replay_fast_vs_pyarrow_time"] = ratio("replay_fast", "pyarrow_csv")
        out["replay_parquet_vs_read_time"] = ratio("replay_parquet", "parquet_numpy")
        out["parquet_mib"] = (workdir / "bench.parquet").stat().st_size / 2**20
    if have_pandas and have_arrow:
        out["replay_fast_vs_pandas_time"] = ratio("replay_fast", "pandas_csv")
    return out


#: the reader goals (fast text path, fast reader, Parquet): (figure, bound, what it compares)
READER_TARGETS = [
    ("replay_vs_loadtxt_time", 0.7, "replay (numpy reader) / numpy.loadtxt process"),
    ("replay_fast_vs_pandas_time", 1.2, "replay (pyarrow reader) / pandas.read_csv process"),
    ("replay_fast_vs_pyarrow_time", 1.5, "replay (pyarrow reader) / pyarrow.csv.read_csv process"),
    ("replay_parquet_vs_read_time", 1.3, "replay of Parquet / reading it into numpy"),
]


def machine() -> dict[str, Any]:
    model = platform.processor() or ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    import scipy

    return {
        "cpu": model,
        "cores": os.cpu_count(),
        "machine": platform.machine(),
        "system": f"{platform.system()} {platform.release()}",
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
    }


def run(samples: int = 10_000_000, rows: int = 1_000_000, repeat: int = 5,
        progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    say = progress or (lambda s: None)
    say(f"kernel: {samples:,} samples ...")
    out: dict[str, Any] = {"machine": machine()}
    out.update(kernel_figures(samples, repeat))
    say(f"replay: generating a {rows:,}-row CSV and timing both processes ...")
    with tempfile.TemporaryDirectory(prefix="streamcond-bench-") as d:
        out.update(replay_figures(rows, repeat, Path(d)))
    return out


#: The speed targets the README's Performance section states: result key → (comparison, bound).
TARGETS: dict[str, tuple[str, float]] = {
    "kernel_vs_floor": (">=", 0.8),
    "kernel_vs_naive": (">=", 15.0),
    "replay_vs_loadtxt_time": ("<=", 0.7),
}


def target_met(r: dict[str, Any], key: str) -> bool:
    op, bound = TARGETS[key]
    v = r[key]
    return v >= bound if op == ">=" else v <= bound


def _target(r: dict[str, Any], key: str, unit: str = "") -> str:
    op, bound = TARGETS[key]
    return f"(target {op} {bound:g}{unit}: {'met' if target_met(r, key) else 'NOT met'})"


def format_table(r: dict[str, Any]) -> str:
    m = r["machine"]
    lines = [
        f"machine: {m['cpu']} ({m['cores']} cores), Python {m['python']}, numpy {m['numpy']}, "
        f"scipy {m['scipy']}",
        "",
        f"comparator on {r['samples']:,} float64 samples (best of runs):",
        f"  hysteresis kernel        {r['kernel_msps']:9.1f} Msample/s",
        f"  bare numpy comparator    {r['floor_msps']:9.1f} Msample/s   "
        f"kernel/floor = {r['kernel_vs_floor']:.2f}  {_target(r, 'kernel_vs_floor')}",
        f"  per-sample Python loop   {r['naive_msps']:9.2f} Msample/s   "
        f"kernel/loop  = {r['kernel_vs_naive']:.0f}x  {_target(r, 'kernel_vs_naive', 'x')}",
        f"  kernel agrees with loop: {'yes' if r['kernel_agrees_with_loop'] else 'NO'}",
        "",
        f"replay of a {r['rows']:,}-row, 4-channel CSV ({r['csv_mib']:.0f} MiB), lowpass on every "
        "channel, whole process:",
        f"  streamcond replay        {r['replay_rows_per_s']:12,.0f} rows/s  "
        f"{r['replay_s']:6.2f} s  peak {r['replay_peak_rss_mib']:.0f} MiB "
        f"(quarter file: {r['replay_quarter_file_peak_rss_mib']:.0f} MiB)",
        f"  numpy.loadtxt            {r['loadtxt_rows_per_s']:12,.0f} rows/s  "
        f"{r['loadtxt_s']:6.2f} s  peak {r['loadtxt_peak_rss_mib']:.0f} MiB",
        f"  replay/loadtxt time = {r['replay_vs_loadtxt_time']:.2f}  {_target(r, 'replay_vs_loadtxt_time')}",
    ]
    procs = r.get("processes", {})
    if procs:
        lines.append("")
        lines.append(f"whole processes, side by side (median of {r.get('rounds', 1)} rounds; "
                     "ratios: the median of each round's ratio):")
        for name, v in procs.items():
            lines.append(f"  {name:18s} {v['s']:6.2f} s  peak {v['peak_rss_mib']:5.0f} MiB")
    if not r.get("pyarrow_installed", False):
        lines.append("  pyarrow is not installed: no fast reader, Parquet or pyarrow figures "
                     "(pip install 'streamcond[fast]')")
    if not r.get("pandas_installed", False):
        lines.append("  pandas is not installed: no pandas.read_csv figure")
    lines.append("")
    lines.append("reader goals:")
    for key, bound, what in READER_TARGETS:
        if key in r:
            met = "met" if r[key] <= bound else "NOT met"
            # three decimals: a ratio just over its bound must not print as the bound itself
            lines.append(f"  {what}: {r[key]:.3f} (target <= {bound}) {met}")
        else:
            lines.append(f"  {what}: not measured (reader not installed)")
    return "\n".join(lines)


def main(args: Any) -> int:
    def say(s: str) -> None:
        if not args.json:
            print(s, file=sys.stderr, flush=True)

    r = run(args.samples, args.rows, args.repeat, progress=say)
    r["targets_met"] = {k: target_met(r, k) for k in TARGETS}
    if args.json:
        print(json.dumps(r, indent=2))
    else:
        print(format_table(r))
    return 0
