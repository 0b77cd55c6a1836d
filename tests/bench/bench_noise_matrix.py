"""The noise estimate on the full matrix of issue 8, beside simple baselines.

Prints, per cell (signal × noise × window), the median and the 10th/90th percentiles of σ̂/σ
over the realisations, the share of realisations the estimate calls reliable, and the median
of three simple baselines:

* ``dMAD``: 1.4826·median|Δx|/√2, the MAD of first differences (Var Δx = 2σ² for white noise);
* ``rmed``: 1.4826·median|x - median₅(x)|, the residual of a 5-sample running median, scaled by
  the factor that makes it 1 on white Gaussian noise (simulated here, 10⁶ samples);
* ``SG``: 1.4826·median|x - SG(x)|/sqrt(1 - c₀), the residual of a Savitzky–Golay fit (21
  samples, cubic; c₀ its central coefficient: for white noise Var(x - Hx) = σ²(1 - c₀), H a
  projection);

and, for band-limited noise, ν0 against Rice's B/√3 (S. O. Rice, BSTJ 1944-45).

Usage::

    flock /tmp/streamcond-bench.lock python tests/bench/bench_noise_matrix.py [-r 8] [--module PATH]
        [--timing]

``--module PATH`` runs an estimator from another file (a copy of an older noise.py) for a
before/after comparison; ``--timing`` also times one update of a 1 s window at 1 kHz
(alternating the two estimators when ``--module`` is given).
"""

from __future__ import annotations

import argparse
import importlib.util
import math
import sys
import time
from pathlib import Path

import numpy as np
from scipy import ndimage, signal

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import test_noise_matrix as M  # noqa: E402

from streamcond.core.noise import estimate_noise  # noqa: E402

MAD = 1.482602218505602


def _dmad(x: np.ndarray) -> float:
    return MAD * float(np.median(np.abs(np.diff(x)))) / math.sqrt(2.0)


_RMED = None


def _rmed(x: np.ndarray) -> float:
    global _RMED
    if _RMED is None:
        w = np.random.default_rng(0).standard_normal(1_000_000)
        _RMED = MAD * float(np.median(np.abs(w - ndimage.median_filter(w, 5, mode="nearest"))))
    return MAD * float(np.median(np.abs(x - ndimage.median_filter(x, 5, mode="nearest")))) / _RMED


_SG_C0 = float(signal.savgol_coeffs(21, 3)[10])


def _sg(x: np.ndarray) -> float:
    r = x - signal.savgol_filter(x, 21, 3)
    return MAD * float(np.median(np.abs(r))) / math.sqrt(1.0 - _SG_C0)


def load(path: str):
    spec = importlib.util.spec_from_file_location("noise_other", path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules["noise_other"] = mod
    assert spec.loader is not None
    spec.loader.exec_module(mod)
    return mod.estimate_noise


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("-r", "--realisations", type=int, default=8)
    ap.add_argument("--module", help="a noise.py to compare with (before)")
    ap.add_argument("--timing", action="store_true", help="also time single estimates")
    ap.add_argument("--timing-only", action="store_true", help="time, without the matrix")
    args = ap.parse_args()
    other = load(args.module) if args.module else None
    r = args.realisations
    print(f"noise matrix: σ̂/σ over {r} realisations per cell; * = window holds >= 20 "
          "correlation times; ok = median within the band")
    head = f"{'signal':15} {'noise':15} {'win':>5}  {'med':>6} {'p10':>6} {'p90':>6} {'rel':>4}"
    if other:
        head += f"  {'before':>6}"
    head += f"  {'dMAD':>6} {'rmed':>6} {'SG':>6}  {'ν0/Rice':>7}"
    print(head)
    if args.timing_only:
        args.timing = True
    n_req = n_ok = n_unrel = n_ok_before = n_cells = n_ok_all = n_silent = n_silent_b = 0
    for s, z, w in [] if args.timing_only else M.cells():
        x = M.realisations(s, z, w, r, seed=8)
        fs = M.sample_rate(s)
        res = [estimate_noise(row, fs) for row in x]
        q = np.array([e.sigma for e in res]) / M.SIGMA
        rel = np.array([bool(getattr(e, "reliable", True)) for e in res])
        lo, hi = M.limits(z)
        med = float(np.median(q))
        req = M.required(s, z, w)
        ok = lo <= med <= hi
        n_cells += 1
        n_ok_all += ok
        if req:
            n_req += 1
            n_ok += ok
            n_unrel += (not ok) and not rel.any()
        # silently wrong: outside the band and called reliable
        n_silent += int(np.any(((q < lo) | (q > hi)) & rel))
        line = (f"{s:15} {z:15} {w:5g}{'*' if req else ' '} {med:6.3f} "
                f"{np.percentile(q, 10):6.3f} {np.percentile(q, 90):6.3f} {rel.mean():4.2f}")
        if other:
            qb = np.array([other(row, fs).sigma for row in x]) / M.SIGMA
            mb = float(np.median(qb))
            n_ok_before += req and (lo <= mb <= hi)
            n_silent_b += int(np.any((qb < lo) | (qb > hi)))
            line += f"  {mb:6.3f}"
        base = [np.median([f(row) for row in x]) / M.SIGMA for f in (_dmad, _rmed, _sg)]
        line += "  " + " ".join(f"{b:6.3f}" for b in base)
        if z in M.BAND_HZ and rel.any():
            # Rice: ν0 = B/√3 for noise flat to B Hz (median over the reliable realisations)
            nu = np.median([e.nu0_hz for e, r_ in zip(res, rel) if r_])
            line += f"  {nu / (M.BAND_HZ[z] / math.sqrt(3.0)):7.3f}"
        else:
            line += f"  {'':7}"
        line += "" if ok else ("  (unreliable)" if not rel.any() else "  OUT")
        print(line, flush=True)
    if not args.timing_only:
        print(f"\ncells: {n_cells}; within the band: {n_ok_all}; required (>= 20 correlation "
              f"times): {n_req}, within the band: {n_ok}, outside but all realisations called "
              f"unreliable: {n_unrel}")
        print(f"cells with a realisation outside the band yet called reliable: {n_silent}")
        if other:
            print(f"before: required cells within the band: {n_ok_before}; cells with a "
                  f"realisation outside the band (before had no flag): {n_silent_b}")
    if args.timing:
        fns = [("after", estimate_noise)] + ([("before", other)] if other else [])
        print("\ntime per estimate (ms), alternating the estimators A B A B ...:")
        for sig, z in (("sine 0.5 Hz", "white"), ("pulses @1 kHz", "white"),
                       ("sine 0.5 Hz", "flat to 30 Hz")):
            for w in (1.0, 5.0, 30.0):
                x = M.realisations(sig, z, w, 1, seed=1)[0]
                reps = max(5, int(200 / w))
                tot = {k: 0.0 for k, _ in fns}
                for _ in range(5):
                    for k, f in fns:
                        t0 = time.perf_counter()
                        for _ in range(max(1, reps // 5)):
                            f(x, 1000.0)
                        tot[k] += time.perf_counter() - t0
                per = {k: 1e3 * v / (5 * max(1, reps // 5)) for k, v in tot.items()}
                line = f"  {sig:14} {z:14} {w:4g} s: " + "  ".join(
                    f"{k} {v:6.2f}" for k, v in per.items())
                if other:
                    line += f"  ratio {per['after'] / per['before']:.2f}"
                print(line, flush=True)


if __name__ == "__main__":
    main()
