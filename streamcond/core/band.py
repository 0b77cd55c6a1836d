"""Hysteresis bands: fixed, or adaptive — following the measured noise.

An adaptive band has width ``clamp(k·σ̂, min_width, max_width)`` around ``center``, σ̂ being the
channel's noise estimate from :class:`~streamcond.core.noise.NoiseTracker`. The band changes only
at the tracker's update points (a fixed sample-count schedule, so chunk-invariant), and never in
a way that fires an edge by itself: an update that would make the latest sample decisive against
the current level (a narrowing band overtaking a signal that sits inside the old band) is held
back, and the next update point tries again with the newest estimate. The signal must then cross
a threshold itself to change the level.

Why ``k = 6`` by default: the band is then 6σ̂ wide, half-width h = 3σ̂. A signal resting on
one side of the band must be carried a full width (6σ) by noise alone to give a false edge,
which Rice's formula (S. O. Rice, Bell System Technical Journal, 1944–45; up-crossings of level
u at ν0·exp(−u²/2σ²) per second) puts at ν0·e^(−18) ≈ 1.5·10⁻⁸·ν0; even a signal resting exactly
at the centre sees one threshold crossed only at ν0·e^(−4.5) ≈ 0.011·ν0. ``tune`` sizes the band
for a stated false-edge rate instead.

Warm-up: the band is ``initial_width`` if configured until the first *reliable* estimate
(which comes as soon as the estimator has enough samples for this noise, often well before a
full ``window_s``); without ``initial_width`` the channel makes no decision at all (no
``state``, no edges) until then — an honest "not yet known" rather than a guess. ``min_width``
is a clamp on measured widths, not a guess for the start. An estimate that says it is not
reliable (:attr:`~streamcond.core.noise.NoiseEstimate.reliable`) moves no band: the band
keeps its last reliable width.
"""

from __future__ import annotations

import copy
import math

from ..config import AdaptiveBand, FixedBand


class FixedBandStage:
    """A constant band."""

    adaptive = False

    def __init__(self, band: FixedBand) -> None:
        self.low = float(band.low)
        self.high = float(band.high)
        self.center = (self.low + self.high) / 2.0

    def propose(self, sigma: float, level: int, last: float) -> None:
        """Noise updates do not move a fixed band."""

    def copy(self) -> "FixedBandStage":
        return copy.copy(self)


class AdaptiveBandStage:
    """A band that follows the measured noise (see module docstring)."""

    adaptive = True

    def __init__(self, band: AdaptiveBand) -> None:
        self.center = float(band.center)
        self.k = float(band.k)
        self.min_width = float(band.min_width)
        self.max_width = float(band.max_width) if band.max_width is not None else math.inf
        w0 = band.initial_width
        if w0 is not None and w0 > 0:
            self.low, self.high = self.center - w0 / 2.0, self.center + w0 / 2.0
        else:
            # no decisions before the first estimate: nothing is above +inf or below -inf
            self.low, self.high = -math.inf, math.inf
        self.held_back = 0  # updates postponed because they would have fired an edge

    def width_for(self, sigma: float) -> float:
        w = min(max(self.k * sigma, self.min_width), self.max_width)
        return w

    def propose(self, sigma: float, level: int, last: float) -> None:
        """Apply the band for a new σ̂ unless it would flip ``level`` by itself at ``last``."""
        if not math.isfinite(sigma):
            return
        w = self.width_for(sigma)
        if not w > 0:
            return  # a noiseless signal and no min_width: keep what we have
        lo, hi = self.center - w / 2.0, self.center + w / 2.0
        if (level == 1 and last < lo) or (level == 0 and last > hi):
            self.held_back += 1
            return
        self.low, self.high = lo, hi

    def copy(self) -> "AdaptiveBandStage":
        return copy.copy(self)


def make_band(band: FixedBand | AdaptiveBand) -> FixedBandStage | AdaptiveBandStage:
    if isinstance(band, FixedBand):
        return FixedBandStage(band)
    return AdaptiveBandStage(band)
