"""Frozen reference copy of the noise estimate, as it was before its per-call overhead was cut.

This is the straightforward implementation of :func:`streamcond.core.noise.estimate_noise`
(commit 2b7fe41), kept verbatim — constants, helpers and ``estimate_noise`` — except for two
changes of the method itself, made on purpose with tests of their own and applied here in the
same statements: records far from unit scale are scaled by a power of two first, and the
rounding floor is sized by the samples' 90th percentile instead of their largest. So that
``test_noise_speed_identity.py`` can check that the optimised estimator returns the same
figures bit for bit. The method is documented in the module docstring of
``streamcond/core/noise.py``. Leave this file as it is: if the estimator's results are ever
changed on purpose, that change needs tests of its own, and this file is then replaced by a
fresh copy of the new straightforward version in the same commit.
"""

from __future__ import annotations

import functools
import logging
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

logger = logging.getLogger(__name__)

#: 1/Φ⁻¹(3/4): σ = MAD_TO_SIGMA · MAD for Gaussian data (Φ⁻¹ the standard normal quantile).
MAD_TO_SIGMA: float = 1.482602218505602

#: Parameters of the local fit: a cubic (see the module docstring for why not lower or higher:
#: a quadratic follows a sine over a shorter span, so it needs shorter segments and removes
#: more of a coloured noise; a quartic follows steps too well for them to be voted out).
_P = 4
#: Shortest segment; leaves 12 degrees of freedom per segment with a cubic.
_M_MIN = 16
#: Fewest segments at any length, so that the votes across segments mean something.
_K_MIN = 8
#: Fewest segments at the longer lengths of the scan (a short window needs long segments
#: for a coloured noise, and few of them fit).
_K_LONG = 2
#: Fewest segments for the votes across segments to be taken.
_K_VOTE = 4
#: Fewest samples :func:`estimate_noise` accepts (one length, _K_MIN segments of _M_MIN).
MIN_SAMPLES: int = _M_MIN * _K_MIN
#: A sample whose residual exceeds this many pilot sigmas is a spike (weight 0).
_SPIKE_Z = 5.0
#: The spike limit in standard deviations of the kept residual (heavy tails), and its cap in
#: multiples of the MAD-based limit.
_TAIL_Z = 6.0
_TAIL_CAP = 3.0
#: At most this many rounds of spike flagging and refitting.
_REFITS = 4
#: Segments whose log-variance lies this many robust sigmas from the median are dropped.
_SEGMENT_Z = 4.0
#: Segments whose step statistic exceeds this multiple of its median are dropped.
_STEP_FACTOR = 6.0
#: Relative change of v between adjacent lengths that counts as "v has stopped growing".
_PLATEAU = 0.10
#: A renewed growth of the extrapolation's changes counts as the signal leaking in when the
#: change at least doubles and exceeds 15 % (smaller wobbles are the spread of a noise with
#: a long correlation tail, whose v keeps creeping up over many octaves).
_REGROW = 2.0
_RTOL_LEAK = 0.15
#: Out of record with the last change of the extrapolation below this: nearly converged.
_OUT_RTOL = 0.10
#: Growth of v over the octave before that still allows a plateau.
_STEADY = 1.3
#: Relative change between consecutive extrapolations that counts as "converged".
_RTOL = 0.03
#: Below this relative change of the extrapolation the noise regime has been reached, and a
#: renewed growth means the signal leaks in.
_CONVERGING = 0.5
#: Fewest segments at the chosen length for an answer called reliable (with fewer, one
#: segment's share of a coloured noise decides: a spread the votes cannot check).
_K_RELIABLE = 4
#: A "flattest point" answer is trusted when it adds at most this factor to the measured v.
_FLAT_GAIN = 1.6
#: An implausible jump of v between adjacent lengths (see _leap).
_LEAP = 8.0
_LEAP_SHARE = 0.6
#: A first difference standing this many robust sigmas off its local median is a step
#: candidate (steps smaller than this are left to the segment votes).
_STEP_Z = 10.0
#: Two step heights agree (the same transition of a multi-level signal) when they differ by
#: less than this many robust sigmas of the local height error.
_HEIGHT_Z = 5.0


@dataclass(frozen=True)
class _Steps:
    """Sharp steps found in a record and taken out of it."""

    n: int  # steps removed
    pooled: float  # median number of steps whose height each step's estimate pools
    min_gap: int  # fewest samples between two consecutive steps (n if fewer than two)


def _neighbour_median(d: NDArray[np.float64]) -> NDArray[np.float64]:
    """Median of each sample's four neighbours (two each side, itself left out; edges: the
    nearest full neighbourhood). Leaving the sample out keeps d_i - median from being exactly
    0 whenever d is locally monotone (a smooth noise), which would make its MAD 0."""
    if d.size < 5:
        return np.full(d.size, float(np.median(d)) if d.size else 0.0)
    a, b, c, e = d[:-4], d[1:-3], d[3:-1], d[4:]
    # median of four = (sum - max - min)/2, elementwise (no sort)
    hi = np.maximum(np.maximum(a, b), np.maximum(c, e))
    lo = np.minimum(np.minimum(a, b), np.minimum(c, e))
    med = 0.5 * (((a + b) + (c + e)) - hi - lo)
    return np.concatenate((np.full(2, med[0]), med, np.full(2, med[-1])))


def _destep(a: NDArray[np.float64]) -> tuple[NDArray[np.float64], _Steps]:
    """Take sharp steps (level shifts from one sample to the next) out of the record.

    Steps, pulses and switching transients are signal, however dense. Noise flat to B Hz
    changes little from one sample to the next when B is well below fs/2 (Var Δn = 2σ²(1 - ρ₁)),
    while a step puts its whole height into one first difference. A first difference d_i that
    stands more than :data:`_STEP_Z` robust sigmas off the median of its five neighbours (which
    follows the slope of a smooth signal) is a step of height h_i = d_i - median; two adjacent
    candidates of opposite sign that cancel are a one-sample spike, left to the segment fit's
    spike weights. The step's local height carries the noise of one difference (error about
    the robust scale s of d - median); a multi-level signal (pulses, a square wave, a telegraph
    signal) repeats the same transition many times, so each height is replaced by the mean of
    all heights that agree with it within :data:`_HEIGHT_Z`·√2·s (the same transition seen
    again), which shrinks that error by the square root of their number. The record minus the
    cumulative sum of the heights is the noise plus the smooth part of the signal, with the
    noise's correlation intact across the steps (a fit broken at each step would absorb the
    slow part of a coloured noise between them).
    """
    n = a.size
    d = a[1:] - a[:-1]
    e = d - _neighbour_median(d)
    ae = np.abs(e)
    k = ae.size // 2
    # the upper median (np.partition: cheaper than np.median, and a scale needs no average)
    s = MAD_TO_SIGMA * float(np.partition(ae, k)[k])
    none = _Steps(0, 0.0, n)
    if not s > 0:
        return a, none
    cand = ae > _STEP_Z * s
    if not cand.any():
        return a, none
    # one-sample spikes: adjacent candidates that (nearly) cancel
    both = cand[:-1] & cand[1:]
    tol = _HEIGHT_Z * math.sqrt(2.0) * s
    spike = both & (np.abs(e[:-1] + e[1:]) <= np.maximum(tol, 0.25 * np.abs(e[:-1])))
    drop = np.zeros(cand.size, dtype=bool)
    drop[:-1] |= spike
    drop[1:] |= spike
    idx = np.flatnonzero(cand & ~drop)
    if idx.size == 0:
        return a, none
    h = e[idx]
    # pool the heights that agree (sorted: each one's agreeing range by two searches)
    order = np.argsort(h, kind="stable")
    hs = h[order]
    lo = np.searchsorted(hs, hs - tol, side="left")
    hi = np.searchsorted(hs, hs + tol, side="right")
    csum = np.concatenate(([0.0], np.cumsum(hs)))
    count = hi - lo
    pooled = np.empty(h.size)
    pooled[order] = (csum[hi] - csum[lo]) / count
    jumps = np.zeros(n)
    jumps[idx + 1] = pooled
    gaps = idx[1:] - idx[:-1]
    info = _Steps(
        int(idx.size), float(np.median(count)), int(gaps.min()) if gaps.size else n
    )
    return a - np.cumsum(jumps), info


@dataclass(frozen=True)
class NoiseEstimate:
    """Noise statistics of one record or window."""

    sigma: float
    """Robust noise standard deviation, in the signal's units."""
    nu0_hz: float
    """Zero (mean) up-crossing rate of the noise residual, per second."""
    reliable: bool = True
    """Could the window separate the noise from the signal? When False, ``sigma`` and
    ``nu0_hz`` are the best the window allows but must not be trusted (see ``reason``)."""
    reason: str | None = None
    """Why the estimate is not reliable (a short sentence), None when it is."""


def _median(a: NDArray[np.float64], axis: int | None = None) -> Any:
    """np.median without its overhead (no NaN check; the samples are finite by contract):
    the mean of the two middle order statistics for an even count, by np.partition."""
    if axis is None:
        a = a.ravel()
        axis = 0
    n = a.shape[axis]
    k = n // 2
    if n % 2:
        return np.take(np.partition(a, k, axis=axis), k, axis=axis)
    p = np.partition(a, (k - 1, k), axis=axis)
    return 0.5 * (np.take(p, k - 1, axis=axis) + np.take(p, k, axis=axis))


@functools.lru_cache(maxsize=32)
def _basis(m: int) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Orthonormal polynomial basis of degree < _P on m equally spaced points.

    Returns (Q, QQ, D): Q is (m, _P) with orthonormal columns spanning 1, t, ..., t^(_P-1)
    (discrete Legendre/Gram polynomials, t in [-1, 1]); QQ the (m, _P, _P) outer products for
    the weighted normal equations; D[s - 1] = ||(I - QQᵀ)u_s||² for the unit step u_s (1 from
    sample s on), s = 1 .. m-1, the energy a step keeps after the fit. Cached; read-only.
    """
    half = (m - 1) / 2.0
    t = (np.arange(m, dtype=np.float64) - half) / half
    q, _ = np.linalg.qr(np.polynomial.legendre.legvander(t, _P - 1))
    q = np.ascontiguousarray(q)
    qq = np.ascontiguousarray(q[:, :, None] * q[:, None, :])
    tail = np.cumsum(q[::-1], axis=0)[::-1][1:]  # Qᵀu_s for s = 1 .. m-1
    d = (m - np.arange(1, m, dtype=np.float64)) - np.einsum("sj,sj->s", tail, tail)
    for arr in (q, qq, d):
        arr.flags.writeable = False
    return q, qq, d


@dataclass
class _Scale:
    """Residuals and votes of the segment fit at one segment length."""

    m: int
    v: float  # pooled residual variance per degree of freedom over kept segments
    r: NDArray[np.float64]  # (K, m) residuals of the weighted refit
    w: NDArray[np.bool_]  # (K, m) samples kept (not spikes)
    keep: NDArray[np.bool_]  # (K,) segments kept by the vote


def _solve_spd(g: NDArray[np.float64], b: NDArray[np.float64]) -> NDArray[np.float64]:
    """Solve g[k] @ c[k] = b[k] for a stack of small SPD matrices (Cholesky, elementwise).

    Written out over the tiny matrix indices so that every operation is an elementwise numpy
    ufunc over the stack: no LAPACK call whose rounding might depend on buffer layout (chunk
    invariance needs bit-identical results). Rows whose matrix is not positive definite get
    a zero solution (their segment is dropped by the caller's sample count test).
    """
    k, p = b.shape
    low = np.zeros((k, p, p))
    bad = np.zeros(k, dtype=bool)
    for j in range(p):
        d = g[:, j, j] - sum((low[:, j, i] * low[:, j, i] for i in range(j)), np.zeros(k))
        bad |= ~(d > 0)
        dj = np.sqrt(np.where(d > 0, d, 1.0))
        low[:, j, j] = dj
        for r in range(j + 1, p):
            acc = g[:, r, j] - sum((low[:, r, i] * low[:, j, i] for i in range(j)), np.zeros(k))
            low[:, r, j] = acc / dj
    z = np.zeros((k, p))
    for j in range(p):
        acc = b[:, j] - sum((low[:, j, i] * z[:, i] for i in range(j)), np.zeros(k))
        z[:, j] = acc / low[:, j, j]
    c = np.zeros((k, p))
    for j in reversed(range(p)):
        acc = z[:, j] - sum((low[:, i, j] * c[:, i] for i in range(j + 1, p)), np.zeros(k))
        c[:, j] = acc / low[:, j, j]
    c[bad] = 0.0
    return c


def _fit_residual(
    y: NDArray[np.float64], w: NDArray[np.bool_] | None, m: int
) -> NDArray[np.float64]:
    """Residual of the per-row (weighted) least-squares polynomial fit; w None: all kept."""
    q, qq, _ = _basis(m)
    if w is None:
        coef = np.einsum("km,mj->kj", y, q)  # orthonormal columns: Qᵀy
    else:
        wf = w.astype(np.float64)
        coef = _solve_spd(np.einsum("km,mab->kab", wf, qq), np.einsum("km,mj->kj", wf * y, q))
    return y - np.einsum("kj,mj->km", coef, q)


def _vote(z: NDArray[np.float64], valid: NDArray[np.bool_]) -> NDArray[np.bool_]:
    """Segments whose value lies within _SEGMENT_Z robust sigmas (1.4826·MAD) of the median.

    Only ``valid`` entries take part; invalid ones come back False.
    """
    out = np.zeros(z.shape, dtype=bool)
    if not valid.any():
        return out
    vals = z[valid]
    med = float(_median(vals))
    spread = MAD_TO_SIGMA * float(_median(np.abs(vals - med)))
    out[valid] = np.abs(vals - med) <= _SEGMENT_Z * spread
    return out


def _scale_fit(x: NDArray[np.float64], m: int) -> _Scale:
    """Fit all segments of length m (aligned to the end of x) and vote on them."""
    k = x.size // m
    y = x[x.size - k * m :].reshape(k, m)
    r0 = _fit_residual(y, None, m)
    pilot = MAD_TO_SIGMA * float(_median(_median(np.abs(r0), axis=1)))
    limit = _SPIKE_Z * pilot
    # Heavy-tailed noise (a Student t) has a MAD well below its standard deviation, and
    # 5 pilot sigmas would trim much of its variance; the limit follows the standard deviation
    # of what it keeps instead (a fixed point of limit = _TAIL_Z·rms(|r| <= limit), rms
    # corrected for the fit's p degrees of freedom), capped at _TAIL_CAP times the pilot's limit
    # so that a segment full of step residuals cannot carry it away.
    sq = r0 * r0
    for _ in range(3):
        kept = sq <= limit * limit
        cnt = int(np.count_nonzero(kept))
        if cnt == 0:
            break
        rms = math.sqrt(float(np.sum(sq, where=kept)) / cnt / (1.0 - _P / m))
        new = min(max(_TAIL_Z * rms, _SPIKE_Z * pilot), _TAIL_CAP * _SPIKE_Z * pilot)
        if new == limit:
            break
        limit = new
    w = np.abs(r0) <= limit
    # Hard-rejection reweighting: a spike drags the unweighted fit and with it the residuals
    # of its neighbours, so flags are recomputed from the refit (a wrongly flagged clean
    # sample is reinstated) until they settle; two or three rounds suffice in practice.
    def residual(keep: NDArray[np.bool_]) -> NDArray[np.float64]:
        rows = np.flatnonzero(~keep.all(axis=1))
        if rows.size == 0:
            return r0
        out = r0.copy()
        out[rows] = _fit_residual(y[rows], keep[rows], m)
        return out

    for _ in range(_REFITS):
        r = residual(w)
        w_new = np.abs(r) <= limit
        if np.array_equal(w_new, w):
            break
        w = w_new
    else:
        r = residual(w)
    n = w.sum(axis=1).astype(np.float64)
    rss = np.einsum("km,km->k", np.where(w, r, 0.0), r)
    dof = n - _P
    # A run of flagged samples is a step, burst or transient, not an isolated spike: the
    # whole segment is outvoted (so is one with most of its samples flagged).
    flagged = ~w
    run = (flagged[:, :-2] & flagged[:, 1:-1] & flagged[:, 2:]).any(axis=1)
    ok = (n >= m / 2) & ~run
    s2 = np.where(ok, rss / np.where(ok, dof, 1.0), 0.0)
    ok &= s2 > 0
    # Step statistic: the residual variance explained by one added step at the best place,
    # max_s (u_sᵀr)² / ||(I - H)u_s||² (u_sᵀr are suffix sums of r, which sum to zero). It
    # concentrates a step's energy in one number, so a step stands out far more clearly
    # than in s_k² alone (where it is spread over m - p degrees of freedom).
    rz = np.where(w, r, 0.0)
    csum = np.cumsum(rz, axis=1)
    tail = csum[:, -1:] - csum[:, :-1]
    step = np.max(tail * tail / _basis(m)[2], axis=1)
    keep = ok.copy()
    if ok.sum() >= _K_VOTE:  # votes across fewer segments would mean nothing
        keep &= _vote(np.log(s2, where=ok, out=np.zeros_like(s2)), ok)
        keep &= step <= _STEP_FACTOR * float(_median(step[ok]))
    v = float(rss[keep].sum() / dof[keep].sum()) if keep.any() else 0.0
    return _Scale(m=m, v=v, r=r, w=w, keep=keep)


def _richardson(lo: _Scale, hi: _Scale) -> float:
    """σ² from v at two segment lengths, removing the c/(m - p) term (see module docstring)."""
    x1 = 1.0 / (lo.m - _P)
    x2 = 1.0 / (hi.m - _P)
    s2 = (x1 * hi.v - x2 * lo.v) / (x1 - x2)
    # Far off the plateau the linear law is only a guide; never go below half the measured.
    return max(s2, 0.5 * hi.v)


def _diff_sigma(sc: _Scale) -> float:
    """Robust standard deviation of the residual's first differences (kept pairs only)."""
    d = np.abs(sc.r[:, 1:] - sc.r[:, :-1])
    valid = sc.w[:, 1:] & sc.w[:, :-1] & sc.keep[:, None]
    if not valid.any():
        return 0.0
    return MAD_TO_SIGMA * float(_median(d[valid]))


def _select(
    a: NDArray[np.float64], first: _Scale, vs: list[float]
) -> tuple[float, _Scale, str]:
    """Scan dyadic segment lengths and pick σ² (see module docstring).

    ``vs`` receives v at every length scanned, shortest first. Returns σ², the scale whose
    residual serves for ν0 (the longer of the chosen pair) and how the scan ended: "plateau", "converged", "flattest", "out" (out of record) or "single" (one
    length only).
    """
    rs: list[float] = []  # rs[j]: Richardson estimate from lengths j and j + 1
    ds: list[float] = []  # ds[j - 1]: relative change from rs[j - 1] to rs[j]
    lo = first
    vs.append(first.v)
    while a.size // (2 * lo.m) >= _K_LONG:
        hi = _scale_fit(a, 2 * lo.m)
        vs.append(hi.v)
        rs.append(_richardson(lo, hi))
        steady = len(vs) < 3 or vs[-2] <= _STEADY * vs[-3]
        if hi.v > 0 and abs(hi.v - lo.v) < _PLATEAU * hi.v and steady:
            # v itself is flat: the segments are long enough. (Not right after a steep rise:
            # a noise on its way to σ² rises ever more slowly, ≈ σ²(1 - c/(m - p)), so a
            # flat step after a steep one is a fluctuation, not the plateau.)
            return rs[-1], hi, "plateau"
        if len(rs) >= 2:
            ds.append(abs(rs[-1] - rs[-2]) / rs[-1] if rs[-1] > 0 else math.inf)
            if ds[-1] < _RTOL:
                return rs[-1], hi, "converged"  # the extrapolation has converged
            if len(ds) >= 2 and ds[-2] < _CONVERGING and ds[-1] > max(_REGROW * ds[-2], _RTOL_LEAK):
                # The changes were shrinking (noise regime) and grow again: the signal's own
                # movement leaks into the longer segments. Take the flattest point before it.
                logger.debug("noise: extrapolation flattest at m=%d", lo.m)
                # Trusted only where the extrapolation adds little to what was measured at
                # that length: beyond that it rests on the 1/(m - p) law, which the scan has
                # not shown to hold (a noise with a long correlation tail keeps v growing).
                ok = rs[-2] <= _FLAT_GAIN * lo.v
                return rs[-2], lo, "flattest" if ok else "unsettled"
        lo = hi
    if not rs:  # too short for two lengths: one length, no colour correction
        return first.v, first, "single"
    # Out of record while the changes were still shrinking: the longest pair is the best —
    # trusted when the last change was already small (nearly converged).
    if ds and ds[-1] < _OUT_RTOL:
        return rs[-1], lo, "nearly"
    return rs[-1], lo, "out"


def _leap(vs: list[float], sigma2: float, v_ref: float) -> bool:
    """Does v leap between two adjacent lengths, up to one past the chosen one?

    ``vs`` are v at the lengths scanned, up to one past the chosen scale (whose v is
    ``v_ref``). A noise's v(m) approaches σ² gradually — v ≈ σ²(1 - c/(m - p)) at long m, so
    from one length to the next it at most doubles once it holds a sizeable share of σ² —
    while a smooth signal that the cubic stops following at some length leaks in at once (its
    residual grows as m⁴, its variance as m⁸). Two signs of that leak: a jump of more than
    :data:`_LEAP` times onto a level above :data:`_LEAP_SHARE` of the chosen σ² (the plateau
    after it is the signal's own variance), or such a jump right after the chosen length (the
    signal starts leaking where the noise has only just been reached: no separation).
    Measured on the matrix, noise alone never jumps more than about 2× into the last 40 % of
    its σ², nor 8× beyond the length the scan chooses.
    """
    for v1, v2 in zip(vs[:-1], vs[1:]):
        if v2 > _LEAP * v1 and v2 > _LEAP_SHARE * sigma2:
            return True
    return len(vs) >= 2 and vs[-2] == v_ref and vs[-1] > _LEAP * v_ref


def estimate_noise(x: ArrayLike, sample_rate_hz: float) -> NoiseEstimate:
    """Whole-array robust estimate of the noise σ and zero up-crossing rate ν0 (for ``tune``).

    Method and formulas in the module docstring. ``x`` is a 1-D array of at least
    :data:`MIN_SAMPLES` finite samples at ``sample_rate_hz``. A record without any variation
    gives ``NoiseEstimate(0.0, 0.0)``. The result's ``reliable`` says whether the record could
    separate the noise from the signal (``reason`` says why not); read it before using
    ``sigma``: an unreliable figure is the best the record allows, not a measurement.
    """
    fs = float(sample_rate_hz)
    if not (math.isfinite(fs) and fs > 0):
        raise ValueError(
            f"The sample rate must be a positive number of Hz, got {sample_rate_hz!r}."
        )
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 1:
        raise ValueError(f"The noise estimate needs a 1-D array of samples, got shape {a.shape}.")
    if a.size < MIN_SAMPLES:
        raise ValueError(f"The noise estimate needs at least {MIN_SAMPLES} samples, got {a.size}.")
    if not np.isfinite(a).all():
        raise ValueError("The noise estimate needs finite samples (split the record at gaps).")

    top = float(np.max(np.abs(a)))
    if top > 2.0**400 or 0.0 < top < 2.0**-400:  # (changed on purpose, see the docstring)
        e = math.frexp(top)[1]
        est = estimate_noise(np.ldexp(a, -e), fs)
        try:
            return NoiseEstimate(math.ldexp(est.sigma, e), est.nu0_hz, est.reliable, est.reason)
        except OverflowError:
            return NoiseEstimate(math.inf, est.nu0_hz, False, "the noise is beyond any number")

    a, steps = _destep(a)
    # Variation within a few units in the last place of the samples is rounding in the fit,
    # not noise that could be measured. (Changed on purpose: the 90th percentile of |a|, not
    # its largest value.)
    mag = np.abs(a)
    k = (9 * (mag.size - 1)) // 10
    floor = (16.0 * np.finfo(np.float64).eps * float(np.partition(mag, k)[k])) ** 2
    first = _scale_fit(a, _M_MIN)
    if first.v <= floor:
        return NoiseEstimate(0.0, 0.0)
    vs: list[float] = []
    sigma2, ref, how = _select(a, first, vs)
    if not sigma2 > floor:
        return NoiseEstimate(0.0, 0.0)
    sd = _diff_sigma(ref)
    rho1 = min(1.0, max(-1.0, 1.0 - sd * sd / (2.0 * sigma2)))
    nu0 = fs * math.acos(rho1) / (2.0 * math.pi)
    logger.debug("noise: n=%d steps=%s scan=%s", a.size, steps, how)
    reliable, reason = True, None
    # few long segments decide a coloured noise's σ̂ (v grew well beyond the shortest length)
    few = (
        how != "plateau" and a.size // ref.m < _K_RELIABLE and sigma2 > _FLAT_GAIN * first.v
    )
    if how in ("out", "unsettled") or few:
        reliable = False
        reason = "the window is too short for the noise's correlation time"
    elif how == "single":
        reliable = False
        reason = "the window is too short for a colour correction"
    elif _leap(vs[: int(round(math.log2(ref.m / _M_MIN))) + 2], sigma2, ref.v):
        reliable = False
        reason = "the signal moves on the noise's own time scale"
    return NoiseEstimate(sigma=math.sqrt(sigma2), nu0_hz=nu0, reliable=reliable, reason=reason)
