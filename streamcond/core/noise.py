"""Robust noise statistics of a channel: standard deviation σ̂ and zero up-crossing rate ν0.

The adaptive band sizes itself from these two numbers and ``tune`` reports them. Rice's
formula (S. O. Rice, "Mathematical analysis of random noise", Bell System Technical Journal,
1944-45) says that a stationary Gaussian noise of standard deviation σ crosses the level u
upward at ``ν0·exp(-u²/2σ²)`` per second, so a band of half-width h around a quiet signal
chatters at about ``ν0·exp(-h²/2σ²)`` per second. Both numbers must describe the *noise*, not
the signal riding on it.

Method
------
**Noise is what a smooth local fit cannot follow.** The record is cut into K consecutive
segments of m samples (aligned to its end, so a stream's newest samples are always used) and a
quadratic (p = 3 parameters) is least-squares fitted to each segment, all segments at once
(``(K, m)`` arrays, 3×3 normal equations solved in closed form per segment). Slow movement of
the signal — a ramp exactly, a sine whose period is long compared with the segment nearly
(the residual of a quadratic fit to a sine over a span of θ radians either side of the centre
is of order ``A·θ³/60``) — goes into the fit; the noise stays in the residual r.

**Spikes** are removed per sample: a pilot scale ``1.4826·median|r|`` (median over segments
of each segment's median) flags samples with ``|r| > 5`` pilot sigmas; those get weight 0 and
each segment is refitted (weighted least squares). A Gaussian sample passes the 5σ test with
probability 1 - 5.7e-7, so the clean noise is not truncated noticeably.

**Steps** are removed per segment: a segment that holds a step (or a burst, or a fast
transient) has a residual variance far above the others. Each segment's variance is
``s_k² = RSS_k / (n_k - p)`` (n_k the samples kept); segments whose ``log s_k²`` lies more
than 4 robust standard deviations (1.4826·MAD of the ``log s_k²``) from the median are
outvoted, the rest are pooled: ``v(m) = Σ RSS_k / Σ (n_k - p)``. The divisor ``n - p`` is the
exact small-sample correction for white noise, ``E[RSS] = σ²·tr(I - H) = σ²(n - p)`` for a
least-squares fit with hat matrix H of rank p (Gauss-Markov; any regression text).

**Coloured noise and the segment length.** For noise with autocorrelation ρ(l) the fit also
absorbs the noise's own slow part: ``E[RSS] = tr((I - H)C) ≈ σ²(m - p·u)`` with
``u = Σ_l ρ(l)`` the integrated correlation time in samples (u = 1 for white noise; u = fs/2B
for noise flat up to B Hz), valid once m ≫ u. Hence

    v(m) ≈ σ²·(1 - c/(m - p)),    c = p·(u - 1),

which is exact for white noise (c = 0) and shows why first differences fail for low-pass
noise (they are the m → 2 limit: ``Var Δx = 2σ²(1 - ρ(1))``, almost nothing when ρ(1) ≈ 1).
The estimator therefore evaluates v at dyadic segment lengths m = 16, 32, 64, ... (while at
least 8 segments fit), and at each adjacent pair removes the leading 1/(m - p) term by
Richardson extrapolation in x = 1/(m - p):

    σ̂² = (x₁·v(m₂) - x₂·v(m₁)) / (x₁ - x₂),   m₂ = 2·m₁.

It uses the *shortest* pair whose relative change ``|v(m₂) - v(m₁)| / v(m₂)`` is below 10 %
(the residual variance has reached its plateau: segments are long compared with the noise's
correlation time, so the 1/(m - p) law holds and the remaining correction is small), and
otherwise the flattest pair. Shortest, because longer segments let more of the signal's own
curvature (and more steps) into the residual. The signal must therefore move slowly compared
with the noise: over a segment of ~10-30 noise correlation times it must look like a quadratic.
A noise whose spectrum reaches down to the signal's own time scale cannot be told apart from
the signal by any method of this kind.

**ν0 from the same residual, without the separation distorting it.** For a sampled Gaussian
sequence the probability of an up-crossing of the mean between two samples is the bivariate
normal orthant probability ``P(x_k < 0 < x_{k+1}) = arccos(ρ₁)/2π`` (Sheppard, 1899:
``P(X > 0, Y > 0) = 1/4 + arcsin(ρ)/2π``), so

    ν0 = fs · arccos(ρ₁) / 2π,    ρ₁ = 1 - σ_Δ² / (2σ̂²),

with σ_Δ the robust (1.4826·median|Δr|, pooled over kept sample pairs of the kept segments)
standard deviation of the residual's first differences. This is the rate a sampled comparator
actually sees (white noise: ρ₁ = 0, ν0 = fs/4), and for densely sampled noise
(``arccos(1 - ε) ≈ √(2ε)``) it becomes Rice's ``ν0 = (1/2π)·sqrt(Var(ẋ)/σ²)
= sqrt(∫f²S(f)df / ∫S(f)df)``, which for noise flat up to B Hz is ``B/√3``. The separation
does not distort it because the fit removes only the lowest ~p/(2T) Hz of the noise: that band
holds a fraction ≈ c/m of the variance, which the Richardson step restores to σ̂, and
practically none of the derivative's variance, so σ_Δ comes from the residual unharmed (from
the raw signal it would carry the signal's slope). Using the *uncorrected* residual variance
instead of σ̂ would overstate ν0 for coloured noise.

The MAD constant is ``1/Φ⁻¹(3/4) = 1.482602...``: for Gaussian data the median of
``|x - median|`` is ``σ·Φ⁻¹(3/4)``.

Streaming
---------
:class:`NoiseTracker` keeps the last ``window_n`` samples and, on a schedule of the global
sample count (never of block boundaries), evaluates :func:`estimate_noise` on exactly that
window. The estimate at a given sample is thus a function of the samples alone, which makes
the tracker chunk-invariant bit for bit; the whole window is recomputed only every
``update_every`` samples.
"""

from __future__ import annotations

import copy as _copy
import functools
import logging
import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "MAD_TO_SIGMA",
    "MIN_SAMPLES",
    "NoiseEstimate",
    "NoiseTracker",
    "estimate_noise",
]

logger = logging.getLogger(__name__)

#: 1/Φ⁻¹(3/4): σ = MAD_TO_SIGMA · MAD for Gaussian data (Φ⁻¹ the standard normal quantile).
MAD_TO_SIGMA: float = 1.482602218505602

#: Parameters of the local fit (polynomial degree _P - 1).
_P = 4
#: Shortest segment. With p = 3 it still leaves 13 degrees of freedom per segment.
_M_MIN = 16
#: Fewest segments at any scale, so that the median/MAD vote across segments means something.
_K_MIN = 8
#: Fewest samples :func:`estimate_noise` accepts (one scale of _K_MIN segments of _M_MIN).
MIN_SAMPLES: int = _M_MIN * _K_MIN
#: Samples whose residual exceeds this many pilot sigmas are treated as spikes (weight 0).
_SPIKE_Z = 5.0
#: Rounds of spike flagging and refitting at most.
_REFITS = 4
#: Segments whose log-variance is this many robust sigmas from the median are outvoted.
_SEGMENT_Z = 4.0
#: Relative change of v(m) between adjacent scales that counts as "on the plateau".
_PLATEAU = 0.10
_STEP_FACTOR = 6.0
_RTOL = 0.03
_CONVERGING = 0.5


@dataclass(frozen=True)
class NoiseEstimate:
    """Noise statistics of one record or window."""

    sigma: float
    """Robust noise standard deviation, in the signal's units."""
    nu0_hz: float
    """Zero (mean) up-crossing rate of the noise residual, per second."""


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
        z[:, j] = (b[:, j] - sum((low[:, j, i] * z[:, i] for i in range(j)), np.zeros(k))) / low[
            :, j, j
        ]
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


def _vote(z: NDArray[np.float64], valid: NDArray[np.bool_], upper_only: bool) -> NDArray[np.bool_]:
    """Segments whose value lies within _SEGMENT_Z robust sigmas (1.4826·MAD) of the median.

    Only ``valid`` entries take part; invalid ones come back False.
    """
    out = np.zeros(z.shape, dtype=bool)
    if not valid.any():
        return out
    vals = z[valid]
    med = float(np.median(vals))
    spread = MAD_TO_SIGMA * float(np.median(np.abs(vals - med)))
    dev = vals - med
    out[valid] = (dev if upper_only else np.abs(dev)) <= _SEGMENT_Z * spread
    return out


def _scale_fit(x: NDArray[np.float64], m: int) -> _Scale:
    """Fit all segments of length m (aligned to the end of x) and vote on them."""
    k = x.size // m
    y = x[x.size - k * m :].reshape(k, m)
    r0 = _fit_residual(y, None, m)
    pilot = MAD_TO_SIGMA * float(np.median(np.median(np.abs(r0), axis=1)))
    limit = _SPIKE_Z * pilot
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
    if ok.any():
        keep &= _vote(np.log(s2, where=ok, out=np.zeros_like(s2)), ok, upper_only=False)
        keep &= step <= _STEP_FACTOR * float(np.median(step[ok]))
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
    d = np.abs(np.diff(sc.r, axis=1))
    valid = sc.w[:, 1:] & sc.w[:, :-1] & sc.keep[:, None]
    if not valid.any():
        return 0.0
    return MAD_TO_SIGMA * float(np.median(d[valid]))


def _select(a: NDArray[np.float64], first: _Scale) -> tuple[float, _Scale]:
    """Scan dyadic segment lengths and pick σ² (see module docstring).

    Returns σ² and the scale whose residual serves for ν0 (the longer of the chosen pair).
    """
    scales = [first]  # only the last three are kept alive (memory: one residual array each)
    rs: list[float] = []  # rs[j]: Richardson estimate from scales j and j + 1
    ds: list[float] = []  # ds[j - 1]: relative change from rs[j - 1] to rs[j]
    while a.size // (2 * scales[-1].m) >= _K_MIN:
        lo = scales[-1]
        hi = _scale_fit(a, 2 * lo.m)
        scales = scales[-2:] + [hi]
        rs.append(_richardson(lo, hi))
        if hi.v > 0 and abs(hi.v - lo.v) < _PLATEAU * hi.v:
            return rs[-1], hi  # v itself is flat: the segments are long enough already
        if len(rs) >= 2:
            ds.append(abs(rs[-1] - rs[-2]) / rs[-1] if rs[-1] > 0 else math.inf)
            if ds[-1] < _RTOL:
                return rs[-1], hi  # the extrapolation has converged
            if len(ds) >= 2 and ds[-2] < _CONVERGING and ds[-1] > ds[-2]:
                # The changes were shrinking (noise regime) and grow again: the signal's own
                # movement leaks in at this length. Take the flattest point before it.
                logger.debug("noise: extrapolation flattest at m=%d", lo.m)
                return rs[-2], lo
    if not rs:  # too short for two scales: one scale, no colour correction
        return first.v, first
    if not ds:
        return rs[0], scales[-1]
    # Ran out of record while the changes were still shrinking: the longest pair is best.
    return rs[-1], scales[-1]


def estimate_noise(x: ArrayLike, sample_rate_hz: float) -> NoiseEstimate:
    """Whole-array robust estimate of the noise σ and zero up-crossing rate ν0.

    Method and formulas in the module docstring. ``x`` is a 1-D array of at least
    :data:`MIN_SAMPLES` finite samples at ``sample_rate_hz``; a record without any
    variation gives ``NoiseEstimate(0.0, 0.0)``.
    """
    fs = float(sample_rate_hz)
    if not (math.isfinite(fs) and fs > 0):
        raise ValueError(f"sample rate must be a positive number, got {sample_rate_hz!r}")
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 1:
        raise ValueError(f"noise estimate needs a 1-D array, got shape {a.shape}")
    if a.size < MIN_SAMPLES:
        raise ValueError(f"noise estimate needs at least {MIN_SAMPLES} samples, got {a.size}")
    if not np.isfinite(a).all():
        raise ValueError("noise estimate needs finite samples (split the record at gaps)")

    first = _scale_fit(a, _M_MIN)
    if first.v <= 0.0:
        return NoiseEstimate(0.0, 0.0)
    sigma2, ref = _select(a, first)
    sigma = math.sqrt(sigma2)
    sd = _diff_sigma(ref)
    rho1 = min(1.0, max(-1.0, 1.0 - sd * sd / (2.0 * sigma2)))
    nu0 = fs * math.acos(rho1) / (2.0 * math.pi)
    return NoiseEstimate(sigma=sigma, nu0_hz=nu0)


class NoiseTracker:
    """Streaming noise estimate over a sliding window, chunk-invariant.

    Keeps the last ``window_n = round(window_s * sample_rate_hz)`` samples. Once a full window
    has been seen (warm-up), it evaluates :func:`estimate_noise` on the window ending at the
    samples with global count ``n = window_n + j * update_every`` (j = 0, 1, ...; n counts
    samples from 1). The schedule depends only on the global sample count, and each estimate
    only on the window's samples, so any split of the input into blocks gives identical
    results. Cost: one whole-window estimate per ``update_every`` samples, nothing per sample
    in between.
    """

    def __init__(
        self, sample_rate_hz: float, window_s: float, update_every: int | None = None
    ) -> None:
        fs = float(sample_rate_hz)
        if not (math.isfinite(fs) and fs > 0):
            raise ValueError(f"sample rate must be a positive number, got {sample_rate_hz!r}")
        if not (math.isfinite(window_s) and window_s > 0):
            raise ValueError(f"noise window must be a positive number of seconds, got {window_s!r}")
        window_n = int(round(window_s * fs))
        if window_n < MIN_SAMPLES:
            raise ValueError(
                f"noise window of {window_s:g} s holds {window_n} samples at {fs:g} Hz; "
                f"the noise estimate needs at least {MIN_SAMPLES}"
            )
        if update_every is None:
            update_every = max(1, window_n // 10)
        if int(update_every) != update_every or update_every < 1:
            raise ValueError(f"update_every must be a positive integer, got {update_every!r}")
        self.sample_rate_hz = fs
        self.window_s = float(window_s)
        self.window_n = window_n
        self.update_every = int(update_every)
        self._count = 0  # samples seen so far
        self._buf = np.empty(0, dtype=np.float64)  # the last <= window_n samples

    @property
    def samples_seen(self) -> int:
        """Number of samples processed since construction."""
        return self._count

    def process(
        self, x: ArrayLike
    ) -> tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.float64]]:
        """Feed one block; return ``(idx, sigma, nu0)`` for the estimates it completes.

        ``idx`` are int64 indices into this block of the samples at which a new estimate
        becomes available (the estimate uses the window of samples up to and including
        ``idx``); ``sigma`` and ``nu0`` (Hz) are the estimates. Empty arrays when the block
        completes none. The first estimate comes once a full window has been seen.
        """
        a = np.asarray(x, dtype=np.float64).ravel()
        if a.size and not np.isfinite(a).all():
            raise ValueError("noise tracker needs finite samples (split the stream at gaps)")
        n0 = self._count
        n1 = n0 + a.size
        wn, every = self.window_n, self.update_every
        # Global counts n in (n0, n1] with n >= wn and (n - wn) % every == 0.
        first = wn if n0 < wn else wn + ((n0 - wn) // every + 1) * every
        counts = np.arange(first, n1 + 1, every, dtype=np.int64)
        ext = np.concatenate([self._buf, a]) if counts.size else None
        sig = np.empty(counts.size, dtype=np.float64)
        nu = np.empty(counts.size, dtype=np.float64)
        if ext is not None:
            base = n0 - self._buf.size  # global count of samples before ext[0]
            for j, n in enumerate(counts.tolist()):  # one estimate per scheduled update (sparse)
                end = n - base
                est = estimate_noise(np.array(ext[end - wn : end]), self.sample_rate_hz)
                sig[j] = est.sigma
                nu[j] = est.nu0_hz
        if a.size:
            keep = min(wn, self._buf.size + a.size)
            if a.size >= keep:
                self._buf = a[a.size - keep :].copy()
            else:
                self._buf = np.concatenate([self._buf[self._buf.size - (keep - a.size) :], a])
        self._count = n1
        return counts - n0 - 1, sig, nu

    def copy(self) -> NoiseTracker:
        """An independent tracker in the same state (for what-if runs)."""
        return _copy.deepcopy(self)
