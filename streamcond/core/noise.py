"""Robust noise statistics of a channel: standard deviation σ̂ and zero up-crossing rate ν0.

The adaptive band sizes itself from these two numbers and ``tune`` reports them. Rice's
formula (S. O. Rice, "Mathematical analysis of random noise", Bell System Technical Journal,
1944-45) says that a stationary Gaussian noise of standard deviation σ crosses the level u
upward ``ν0·exp(-u²/2σ²)`` times per second, so a quiet signal inside a band of half-width h
chatters at about ``ν0·exp(-h²/2σ²)`` per second. Both numbers must describe the *noise*, not
the signal riding on it.

Method
------
**Noise is what a smooth local fit cannot follow.** The record is cut into K consecutive
segments of m samples (aligned to its end, so a stream's newest samples are always used) and a
cubic (p = 4 parameters) is least-squares fitted to every segment at once: ``(K, m)`` arrays, an
orthonormal polynomial basis, and for the reweighted fits below the p×p normal equations solved
for the whole stack by an elementwise Cholesky. The signal's slow movement goes into the fit — a
ramp exactly; for a sine of amplitude A seen over ±θ radians about the segment centre the
leading residual is ``A·(θ⁴/24)·(8/35)·P₄(x)`` (x⁴ = 8/35·P₄ + ..., Legendre P₄ with RMS 1/3),
about 0.3 % of A (RMS) for a segment of a third of the period. The noise stays in the
residual r.

*Spikes* are handled per sample: a pilot scale ``1.4826·median|r|`` (median over segments of
each segment's median) flags samples with ``|r|`` above 5 pilot sigmas; they get weight 0 and
the segment is refitted, and the flags are recomputed from the refit until they settle (a spike
drags the first fit, and with it its neighbours' residuals). A Gaussian sample passes the 5σ
test with probability 1 - 5.7e-7, so clean noise is not noticeably truncated.

*Steps* (and bursts, fast transients) are handled per segment, by votes across segments:

* a segment with a run of three or more flagged samples, or with fewer than half its samples
  kept, is dropped (a spike is one sample; a step is not);
* each segment's residual variance ``s_k² = RSS_k/(n_k - p)`` (n_k samples kept) is voted on:
  segments whose ``log s_k²`` is more than 4 robust sigmas (1.4826·MAD) from the median are
  dropped;
* the *step statistic* ``max_s (u_sᵀr)² / ||(I - H)u_s||²`` (u_s the unit step from sample s,
  H the fit's hat matrix: the residual variance one added step would explain, i.e. a
  likelihood-ratio statistic for a level shift at an unknown place) must not exceed 6 times its
  median over segments. A step's energy, spread over m - p degrees of freedom in s_k², is
  concentrated in this one number, so a 10σ step stands out even in a 16-sample segment. For
  white noise the statistic is the maximum of m - 1 correlated χ²₁ variables; 6× its median lies
  beyond its 99.9 % point (simulated: median 3.6, 99.9 % point 16 at m = 16; 7.1 and 21 at
  m = 1024), so clean segments are seldom dropped (measured, all votes together: about 1 % or
  less at the segment lengths the selection uses, changing v by under 0.5 %).

The kept segments are pooled: ``v(m) = Σ RSS_k / Σ (n_k - p)``. The divisor ``n - p`` is the
exact small-sample correction for white noise: ``E[RSS] = σ²·tr(I - H) = σ²(n - p)`` for a
least-squares fit of rank p (a standard least-squares result; any regression text).

**Coloured noise and the segment length.** For noise with autocorrelation ρ(l) the fit also
absorbs the noise's own slow part: ``E[RSS] = tr((I - H)C) = mσ² - Σ_j q_jᵀCq_j`` (q_j the
orthonormal basis, C the noise covariance), and ``q_jᵀCq_j ≈ σ²·u`` once the segment is long
compared with the correlation time, ``u = Σ_l ρ(l)`` the integrated correlation time in
samples (u = 1 for white noise, u = fs/2B for noise flat up to B Hz). Hence

    v(m) ≈ σ²·(1 - c/(m - p)),    c = p·(u - 1),

exact for white noise (c = 0). First differences are the extreme short end of this kind of
estimator, ``Var Δx = 2σ²(1 - ρ(1))``, which is why they see almost nothing of low-pass noise.
v is evaluated at dyadic lengths m = 16, 32, 64, ... (while at least 8 segments fit), and each
adjacent pair gives a Richardson extrapolation in x = 1/(m - p) that removes the c/(m - p) term:

    R(m₁, m₂) = (x₁·v(m₂) - x₂·v(m₁)) / (x₁ - x₂),   m₂ = 2·m₁.

Scanning upward (at the longer lengths down to two segments, so that a short window still
reaches segments long compared with a coloured noise's correlation time), the first of these
decides:

1. v itself has stopped growing (``|v(m₂) - v(m₁)| < 10 % of v(m₂)``), and did not rise by more
   than 30 % over the octave before (a noise on its way to σ² rises ever more slowly, so a flat
   step right after a steep one is a fluctuation): σ̂² = R(m₁, m₂). White noise gets here at
   the first pair, whatever the signal does on longer time scales.
2. The extrapolation has converged (two consecutive R within 3 %): σ̂² = the later R.
3. The relative changes of R, after shrinking below 50 % (noise regime, the 1/(m - p) law
   taking hold), grow again — at least doubling and beyond 15 %, as smaller wobbles are the
   spread of a noise with a long correlation tail: the signal's own movement is leaking into
   the longer segments; σ̂² = the R before the growth (the flattest point), trusted only if it
   adds at most 60 % to the v measured there.
4. Out of record: the last R (trusted only if its last change was under 10 %).

Shortest first, because longer segments let more of the signal's curvature and more steps in.
The signal must move slowly compared with the noise: over a segment of a few tens of noise
correlation times it must look like a cubic (measured: Butterworth noise at fs/100 under a sine
of ten times its σ is estimated within 3 % down to a 1 s sine period). No method of this kind
can separate a noise whose spectrum reaches down to the signal's own time scale.

**Steps first.** Sharp steps — pulses, square waves, switching, a motor's start — are taken out
before the segments are fitted (:func:`_destep`): a first difference far off the median of its
neighbours is a step, its height is pooled with every other step of the same transition (the
levels of a pulse train recur), and the record minus those steps keeps the noise whole across
them, so that even a pulse train stepping every 4 samples under a noise correlated over 17 is
measured right. Steps smaller than 10 robust sigmas of the differences are left to the votes.

**Heavy tails.** The spike limit follows the standard deviation of the residuals it keeps
(a fixed point of limit = 6·rms), not only their MAD, so a Student-t noise keeps most of its
tails (its σ̂ is its standard deviation, about 0.9 of it at 3 degrees of freedom) while
one-sample spikes of 10σ and more are still weighted out.

**When the answer is not to be trusted** (``reliable = False`` and a reason): the scan ran out
of record before settling, or a few long segments decided a coloured noise's σ̂ (fewer than
four at the chosen length while v grew by more than 60 % from the shortest length) — "the
window is too short for the noise's correlation time"; or v leapt between two lengths, up to
one past the chosen one (:func:`_leap`) — "the signal moves on the noise's own time scale".
The figures are still returned (the best the window allows), and every caller must read the
flag: the adaptive band keeps its last reliable width, the stats say so.

**ν0 from the same residual, without the separation distorting it.** For a sampled Gaussian
sequence the probability of an up-crossing of the mean between two samples is the bivariate
normal orthant probability ``P(x_k < 0 < x_{k+1}) = arccos(ρ₁)/2π`` (Sheppard's formula,
``P(X > 0, Y > 0) = 1/4 + arcsin(ρ)/2π``, W. F. Sheppard 1899 — citation from memory), so

    ν0 = fs · arccos(ρ₁) / 2π,    ρ₁ = 1 - σ_Δ² / (2σ̂²),

with σ_Δ = 1.4826·median|Δr|, pooled over the kept sample pairs of the kept segments of the
longer scale of the chosen pair. This is the rate a sampled comparator actually sees (white
noise: ρ₁ = 0, ν0 = fs/4), and for densely sampled noise (``arccos(1 - ε) ≈ √(2ε)``) it becomes
Rice's ``ν0 = (1/2π)·sqrt(Var(ẋ)/σ²) = sqrt(∫f²S(f)df / ∫S(f)df)``, which is ``B/√3`` for noise
flat up to B Hz. The separation does not distort it: the fit removes only the noise's lowest
frequencies (about p/2 cycles per segment), which carry a fraction ≈ c/(m - p) of its variance —
restored to σ̂ by the extrapolation — and practically none of its derivative's variance, so σ_Δ
from the residual is the noise's own (from the raw signal it would include the signal's slope).
Dividing by the *uncorrected* residual variance instead of σ̂² would overstate ν0 for coloured
noise.

The MAD constant is ``1/Φ⁻¹(3/4) = 1.482602...``: for Gaussian data the median of
``|x - median|`` is ``σ·Φ⁻¹(3/4)``.

Streaming
---------
:class:`NoiseTracker` keeps the last ``window_n`` samples and, on a schedule of the global
sample count (never of block boundaries), evaluates :func:`estimate_noise` on exactly that
window. Each estimate is thus a function of the window's samples alone, which makes the tracker
chunk-invariant bit for bit (all arithmetic is elementwise numpy or numpy reductions of fixed
order; no BLAS/LAPACK call sees the data). The whole window is recomputed only every
``update_every`` samples; between updates a sample costs an amortised O(1) copy.
"""

from __future__ import annotations

import copy as _copy
import functools
import logging
import math
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "MAD_TO_SIGMA",
    "MIN_SAMPLES",
    "NoiseEstimate",
    "NoiseTracker",
    "NoiseUpdates",
    "estimate_noise",
]

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
#: Records whose largest magnitude exceeds this (or lies below its inverse) are scaled by a power
#: of two first: squares of 2^±400 and their sums over any window stay far inside the normal
#: doubles (2^-1022 to about 2^1024).
_BIG = 2.0**400
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


#: Up to this many values a median sorts them: np.sort is faster than np.partition's selection
#: on the short arrays of the votes (measured: 1-1.7 µs against 1.8-2.7 µs for 5-150 values).
_SORT_MAX = 256


def _median(a: NDArray[np.float64]) -> Any:
    """np.median of a 1-D array without its overhead (no NaN check; the samples are finite by
    contract): the middle order statistic, or the mean of the two middle ones for an even
    count. Order statistics are exact values of ``a``, so sorting and selecting give the same
    figure bit for bit."""
    n = a.size
    k = n // 2
    if n <= _SORT_MAX:
        s = np.sort(a)
        return s[k] if n % 2 else 0.5 * (s[k - 1] + s[k])
    if n % 2:
        return np.partition(a, k)[k]
    p = np.partition(a, (k - 1, k))
    return 0.5 * (p[k - 1] + p[k])


def _row_median(a: NDArray[np.float64]) -> NDArray[np.float64]:
    """Median of each row of a 2-D array (as :func:`_median`). Sorted: on rows of 16 to 2048
    values np.sort is cheaper than np.partition for the two middle order statistics (measured
    about 2× at m = 2048 to 4.6× at m = 16)."""
    s = np.sort(a, axis=1)
    k = a.shape[1] // 2
    return s[:, k] if a.shape[1] % 2 else 0.5 * (s[:, k - 1] + s[:, k])


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
    nv = int(np.count_nonzero(valid))
    if nv == 0:
        return np.zeros(z.shape, dtype=bool)
    every = nv == z.size
    vals = z if every else z[valid]
    med = float(_median(vals))
    dev = np.abs(vals - med)
    spread = MAD_TO_SIGMA * float(_median(dev))
    inside = dev <= _SEGMENT_Z * spread
    if every:
        return inside
    out = np.zeros(z.shape, dtype=bool)
    out[valid] = inside
    return out


def _step_statistic(rz: NDArray[np.float64], m: int) -> NDArray[np.float64]:
    """Per segment (row of ``rz``, the residual with flagged samples zeroed), the residual
    variance one added step at the best place would explain: max_s (u_sᵀr)² / ||(I - H)u_s||².
    u_sᵀr are suffix sums of r, taken as the total minus the prefix sums (np.cumsum: a
    sequential sum, the same in either layout).

    Many short segments are worked on transposed, (m, K): numpy's elementwise loops and its
    maximum then run along the K segments instead of paying a call per short row (measured:
    about half the time at m = 16, K = 312; no gain once K < m)."""
    d = _basis(m)[2]
    if rz.shape[0] > m:
        csum = np.cumsum(rz.T.copy(), axis=0)
        tail = csum[-1] - csum[:-1]
        np.multiply(tail, tail, out=tail)
        np.divide(tail, d[:, None], out=tail)
        return tail.max(axis=0)
    csum = np.cumsum(rz, axis=1)
    tail = csum[:, -1:] - csum[:, :-1]
    np.multiply(tail, tail, out=tail)
    np.divide(tail, d, out=tail)
    return tail.max(axis=1)


def _scale_fit(x: NDArray[np.float64], m: int) -> _Scale:
    """Fit all segments of length m (aligned to the end of x) and vote on them.

    Written for few numpy calls per segment length, with results identical bit for bit to
    the plain statement of the method (``tests/noise_reference.py`` keeps it; a test compares
    the two): every sum and einsum is the same call on the same array, medians are the same
    order statistics (sorted instead of selected), and the cumulative sum and elementwise
    operations give the same values in any memory layout. The shortcuts only skip work
    whose outcome is known: the refit when no sample is flagged (it would return the first
    fit's residual and the same flags), a round of the tail limit that keeps the same samples
    as the round before (it would find the same limit), and the step statistic when there
    are too few segments to vote.
    """
    k = x.size // m
    y = x[x.size - k * m :].reshape(k, m)
    r0 = _fit_residual(y, None, m)
    a0 = np.abs(r0)
    pilot = MAD_TO_SIGMA * float(_median(_row_median(a0)))
    limit = _SPIKE_Z * pilot
    # Heavy-tailed noise (a Student t) has a MAD well below its standard deviation, and
    # 5 pilot sigmas would trim much of its variance; the limit follows the standard deviation
    # of what it keeps instead (a fixed point of limit = _TAIL_Z·rms(|r| <= limit), rms
    # corrected for the fit's p degrees of freedom), capped at _TAIL_CAP times the pilot's limit
    # so that a segment full of step residuals cannot carry it away.
    sq = r0 * r0
    last = -1
    for _ in range(3):
        kept = sq <= limit * limit
        cnt = int(np.count_nonzero(kept))
        if cnt == 0:
            break
        if cnt == last:
            # The thresholds are nested, so the same count is the same samples: the same
            # rms, the same limit again (the fixed point is reached).
            break
        rms = math.sqrt(float(np.sum(sq, where=kept)) / cnt / (1.0 - _P / m))
        new = min(max(_TAIL_Z * rms, _SPIKE_Z * pilot), _TAIL_CAP * _SPIKE_Z * pilot)
        if new == limit:
            break
        limit = new
        last = cnt
    w = a0 <= limit
    if w.all():
        # Nothing flagged: the refit below would return r0 and the same flags, no run of
        # flags can drop a segment, and every segment keeps its m samples (n_k - p = m - p
        # everywhere, so s_k² is a division by that one number).
        r = rz = r0
        rss = np.einsum("km,km->k", rz, r)
        s2 = rss / float(m - _P)
        ok = s2 > 0
        n_dof = None
    else:
        # Hard-rejection reweighting: a spike drags the unweighted fit and with it the
        # residuals of its neighbours, so flags are recomputed from the refit (a wrongly
        # flagged clean sample is reinstated) until they settle; two or three rounds suffice
        # in practice.
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
        rz = np.where(w, r, 0.0)
        rss = np.einsum("km,km->k", rz, r)
        n_dof = n - _P
        # A run of flagged samples is a step, burst or transient, not an isolated spike: the
        # whole segment is outvoted (so is one with most of its samples flagged).
        flagged = ~w
        run = (flagged[:, :-2] & flagged[:, 1:-1] & flagged[:, 2:]).any(axis=1)
        ok = (n >= m / 2) & ~run
        s2 = np.where(ok, rss / np.where(ok, n_dof, 1.0), 0.0)
        ok &= s2 > 0
    keep = ok.copy()
    if np.count_nonzero(ok) >= _K_VOTE:  # votes across fewer segments would mean nothing
        keep &= _vote(np.log(s2, where=ok, out=np.zeros_like(s2)), ok)
        # The step statistic concentrates a step's energy in one number, so a step stands
        # out far more clearly than in s_k² alone (where it is spread over m - p degrees of
        # freedom).
        step = _step_statistic(rz, m)
        keep &= step <= _STEP_FACTOR * float(_median(step[ok]))
    if not keep.any():
        v = 0.0
    elif n_dof is None:
        # Σ(n_k - p) over the kept segments: whole numbers, so summing them in any order is
        # exact, and here each is m - p.
        v = float(rss[keep].sum() / float((m - _P) * int(np.count_nonzero(keep))))
    else:
        v = float(rss[keep].sum() / n_dof[keep].sum())
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
    if top > _BIG or 0.0 < top < 1.0 / _BIG:
        # The fit squares its residuals: beyond 2^400 their sums could overflow, below 2^-400
        # they would underflow to nothing (a "record without variation"). Scaling by
        # a power of two is exact in binary floating point and every step of the estimate
        # scales with it (σ̂ with the factor, ν0 not at all), so the record is brought to a
        # largest magnitude in [0.5, 1) and σ̂ scaled back.
        e = math.frexp(top)[1]
        est = estimate_noise(np.ldexp(a, -e), fs)
        try:
            return NoiseEstimate(math.ldexp(est.sigma, e), est.nu0_hz, est.reliable, est.reason)
        except OverflowError:  # σ̂ of a record near the largest double can exceed it
            return NoiseEstimate(math.inf, est.nu0_hz, False, "the noise is beyond any number")

    a, steps = _destep(a)
    # Variation within a few units in the last place of the samples is rounding in the fit,
    # not noise that could be measured. The samples' size is their 90th percentile, not their
    # largest: one spike far above the rest (a 1e13 glitch over noise of 0.01) is weighted out
    # of the fit, and must not raise the floor above the noise (σ̂ = 0, "without variation").
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


_NO_IDX = np.empty(0, dtype=np.int64)
_NO_VAL = np.empty(0, dtype=np.float64)
_NO_IDX.flags.writeable = False
_NO_VAL.flags.writeable = False
_NO_BOOL = np.empty(0, dtype=bool)
_NO_BOOL.flags.writeable = False


class NoiseUpdates(NamedTuple):
    """The estimates one block of a :class:`NoiseTracker` completed (all empty when none)."""

    idx: NDArray[np.int64]
    """Indices into the block of the samples at which each estimate becomes available (it
    uses the window of samples up to and including ``idx``)."""
    sigma: NDArray[np.float64]
    nu0: NDArray[np.float64]
    reliable: NDArray[np.bool_]
    reason: list[str | None]
    samples: NDArray[np.int64]
    """Samples in each estimate's window (fewer than ``window_n`` during the warm-up)."""


class NoiseTracker:
    """Streaming noise estimate over a sliding window, chunk-invariant.

    Keeps the last ``window_n = round(window_s * sample_rate_hz)`` samples. Counting samples
    from 1 over the tracker's life, it evaluates :func:`estimate_noise` at the sample numbers
    ``n = window_n + j * update_every`` (j = ..., -2, -1, 0, 1, 2, ...; ``update_every``
    defaults to ``window_n // 10``, at least 1) that are at least :data:`MIN_SAMPLES`, on the
    last ``min(n, window_n)`` samples. The first estimate thus comes as soon as the
    estimator has enough samples (warm-up: a shorter window than configured, whose estimate
    says itself whether it is reliable — a coloured noise needs a long one), and from the
    first full window on every estimate covers ``window_n`` samples. The schedule depends only
    on the sample count and each estimate only on its window's samples, so any split of the
    input into blocks gives identical results, bit for bit. Cost: one estimate per
    ``update_every`` samples; in between, an amortised O(1) copy per sample.
    """

    def __init__(
        self, sample_rate_hz: float, window_s: float, update_every: int | None = None
    ) -> None:
        fs = float(sample_rate_hz)
        if not (math.isfinite(fs) and fs > 0):
            raise ValueError(
                f"The sample rate must be a positive number of Hz, got {sample_rate_hz!r}."
            )
        if not (math.isfinite(window_s) and window_s > 0):
            raise ValueError(
                f"The noise window must be a positive number of seconds, got {window_s!r}."
            )
        window_n = int(round(window_s * fs))
        if window_n < MIN_SAMPLES:
            raise ValueError(
                f"The noise window of {window_s:g} s holds {window_n} samples at {fs:g} Hz; "
                f"the noise estimate needs at least {MIN_SAMPLES}."
            )
        if update_every is None:
            update_every = max(1, window_n // 10)
        if isinstance(update_every, bool) or int(update_every) != update_every or update_every < 1:
            raise ValueError(
                f"update_every must be a positive whole number of samples, got {update_every!r}."
            )
        self.sample_rate_hz = fs
        self.window_s = float(window_s)
        self.window_n = window_n
        self.update_every = int(update_every)
        #: the first scheduled sample number: the earliest of the grid with MIN_SAMPLES
        self.first_n = window_n - ((window_n - MIN_SAMPLES) // self.update_every) * self.update_every
        self._count = 0  # samples seen so far
        # History: the valid samples are _store[:_fill], the newest last; the capacity of
        # 2·window_n lets small blocks be appended in place, compacting once per window_n.
        self._store = np.empty(2 * window_n, dtype=np.float64)
        self._fill = 0

    @property
    def samples_seen(self) -> int:
        """Number of samples processed so far."""
        return self._count

    def process(self, x: ArrayLike) -> NoiseUpdates:
        """Feed one block; return the estimates it completes (:class:`NoiseUpdates`)."""
        a = np.asarray(x, dtype=np.float64).ravel()
        if not np.isfinite(a).all():
            raise ValueError("The noise tracker needs finite samples (split the stream at gaps).")
        wn, every, n_first = self.window_n, self.update_every, self.first_n
        n0 = self._count
        n1 = n0 + a.size
        # Sample numbers n in (n0, n1] with n >= n_first and (n - n_first) % every == 0.
        first = n_first if n0 < n_first else n_first + ((n0 - n_first) // every + 1) * every
        if first > n1 and a.size <= wn and self._fill + a.size <= self._store.size:
            # no estimate due in this (short) block: just keep the samples (the common case
            # for a live block of a few milliseconds)
            self._store[self._fill : self._fill + a.size] = a
            self._fill += a.size
            self._count = n1
            return NoiseUpdates(_NO_IDX, _NO_VAL, _NO_VAL, _NO_BOOL, [], _NO_IDX)
        due = np.arange(first, n1 + 1, every, dtype=np.int64)

        if a.size <= wn:
            if self._fill + a.size > self._store.size:  # compact to the last window_n samples
                keep = min(self._fill, wn)
                self._store[:keep] = self._store[self._fill - keep : self._fill]
                self._fill = keep
            self._store[self._fill : self._fill + a.size] = a
            self._fill += a.size
            ext = self._store[: self._fill]
        else:  # a long block: history and block side by side once, then keep the block's tail
            ext = np.concatenate([self._store[: self._fill], a])
            self._store[:wn] = a[a.size - wn :]
            self._fill = wn
        base = n1 - ext.size  # number of samples before ext[0]

        sigma = np.empty(due.size, dtype=np.float64)
        nu0 = np.empty(due.size, dtype=np.float64)
        rel = np.empty(due.size, dtype=bool)
        why: list[str | None] = []
        for j, n in enumerate(due.tolist()):  # one estimate per scheduled update
            end = n - base
            est = estimate_noise(np.array(ext[end - min(n, wn) : end]), self.sample_rate_hz)
            sigma[j] = est.sigma
            nu0[j] = est.nu0_hz
            rel[j] = est.reliable
            why.append(est.reason)
        self._count = n1
        return NoiseUpdates(due - (n0 + 1), sigma, nu0, rel, why, np.minimum(due, wn))

    def copy(self) -> NoiseTracker:
        """An independent tracker in the same state."""
        return _copy.deepcopy(self)
