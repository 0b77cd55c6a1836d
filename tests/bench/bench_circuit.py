"""The series search and the Monte Carlo of ``streamcond circuit``, against plain Python loops
doing the same work (not run by pytest; prints figures).

    flock /tmp/streamcond-bench.lock python tests/bench/bench_circuit.py [--rounds N]

Side by side in one run, alternating A B A B: the vectorised search of every E24 triple in
1k–1M for the single-supply circuit against a per-triple Python loop over the same triples
(the loop is run on a slice and scaled, it would take minutes whole), and the 10^5-draw
Monte Carlo against a per-draw loop (also on a slice). Read the ratios.
"""

from __future__ import annotations

import argparse
import itertools
import platform
import time

import numpy as np

from streamcond.circuit import eseries
from streamcond.circuit.networks import Conditions, thresholds
from streamcond.circuit.search import search
from streamcond.circuit.worstcase import Tolerances, spread

COND = Conditions(v_pos=3.3, v_neg=0.0, v_ref=3.3)
WANT = (2.0187, 2.0613)


def search_loop(vals: list[float], limit: int) -> tuple[float, int]:
    """The plain loop: one triple at a time (first ``limit`` triples)."""
    best, n = float("inf"), 0
    for f, t, b in itertools.islice(itertools.product(vals, vals, vals), limit):
        lo, hi = thresholds("single-supply", {"r_feedback": f, "r_top": t, "r_bottom": b}, COND)
        e = max(abs(lo - WANT[0]), abs(hi - WANT[1]))
        best = min(best, e)
        n += 1
    return best, n


def mc_loop(r: dict[str, float], draws: int) -> list[float]:
    rng = np.random.default_rng(1)
    out = []
    for _ in range(draws):
        rr = {k: v * rng.uniform(0.95, 1.05) for k, v in r.items()}
        vp = 3.3 * rng.uniform(0.98, 1.02)
        lo, _hi = thresholds("single-supply", rr, COND.with_(v_pos=vp, v_ref=vp,
                                                            v_os=rng.uniform(-5e-3, 5e-3)))
        out.append(lo)
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rounds", type=int, default=3)
    a = ap.parse_args()
    vals = eseries.values("E24", 1e3, 1e6)
    total = vals.size ** 3
    sl = 50_000
    r = search("single-supply", *WANT, vals, COND).resistors
    tol = Tolerances(resistor=0.05, supply=0.02, v_os=0.005)
    rows = []
    for _ in range(a.rounds):
        t0 = time.perf_counter()
        search("single-supply", *WANT, vals, COND)
        t_vec = time.perf_counter() - t0
        t0 = time.perf_counter()
        search_loop(vals.tolist(), sl)
        t_loop = (time.perf_counter() - t0) * total / sl
        t0 = time.perf_counter()
        spread("single-supply", r, COND, tol, True)
        t_mc = time.perf_counter() - t0
        t0 = time.perf_counter()
        mc_loop(r, 5_000)
        t_mcl = (time.perf_counter() - t0) * 100_000 / 5_000
        rows.append((t_vec, t_loop, t_mc, t_mcl))
    print(f"machine: {platform.machine()} {platform.processor() or ''} python "
          f"{platform.python_version()}")
    print(f"search: {total:,} E24 triples; Monte Carlo: 100,000 draws (+ corners)")
    for t_vec, t_loop, t_mc, t_mcl in rows:
        print(f"  search vectorised {t_vec:.3f} s  loop {t_loop:.1f} s (scaled)  ratio "
              f"{t_loop / t_vec:.0f}×   |   spread {t_mc:.3f} s  loop {t_mcl:.1f} s (scaled)  "
              f"ratio {t_mcl / t_mc:.0f}×")


if __name__ == "__main__":
    main()
