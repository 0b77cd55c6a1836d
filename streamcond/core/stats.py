"""Per-channel chatter statistics over windows of sample time (the ``stats`` record).

Each window is ``[k·I, (k+1)·I)`` of sample time (I = ``stats.interval_s``; aligned to
multiples of I, so the windows do not depend on where a recording or a block starts). A window's
record is emitted at the first sample past its end. Windows that hold no sample (a gap in the
data) produce no record.

Fields and where their numbers come from:

* ``raw_crossings`` — crossings of the band centre by the *scaled, unfiltered* value: what a
  bare comparator with no prefilter, no hysteresis and no dwell would have reported.
* ``edges`` — the edges this channel actually emitted in the window; ``suppression_ratio`` =
  raw_crossings / edges.
* ``min_edge_spacing_s`` — the shortest time between consecutive edges ending in the window.
* ``noise_sigma``, ``nu0_hz`` — the latest noise estimate (σ̂, zero up-crossing rate),
  ``null`` until the first one; ``noise_window_s`` the span of samples it was measured on
  (the adaptive band's ``window_s``, or ``stats.noise_window_s`` for a fixed band — shorter
  during the warm-up). ``tune`` measures σ̂ over the whole recording instead: on a stationary
  noise the two agree within the estimate's spread; where the noise changes (a pump that
  runs and stops) the whole-recording figure is a pooled one and the stats follow the
  noise of the moment.
* ``reliable`` — whether that estimate could separate the noise from the signal in its
  window (``null`` before the first estimate); when ``false``, ``reliable_reason`` says why,
  and ``margin_sigma`` and ``predicted_false_rate_per_hour`` are ``null`` (never a figure
  from an estimate that says it cannot be trusted).
* ``band_low``, ``band_high`` — the band in force at the window's end; ``margin_sigma`` =
  half-width / σ̂.
* ``predicted_false_rate_per_hour`` — Rice's formula (S. O. Rice, Bell System Technical Journal,
  1944–45): Gaussian noise crosses a level h above its mean upward ν0·exp(−h²/2σ²) times per
  second; with h the half-width this is the rate of false threshold crossings for a signal
  resting at the band centre, an upper bound on false edges (a false edge needs the noise to
  carry the signal past a threshold, and a full false cycle past both).
* ``fault_s`` — time of the window spent in sensor fault (samples at or beyond the channel's
  ``fault`` limits, or levels no sensor measures — :mod:`streamcond.core.levels` — which are
  not levels); ``samples`` counts the other samples.
* ``chattering`` — ``chatter_count`` or more activations (rising edges of the output level)
  within ``chatter_window_s``: the common alarm-management criterion of three or more
  activations of one alarm within one minute (ISA-18.2 practice, from memory).
"""

from __future__ import annotations

import copy
import math
import sys
from collections import deque
from typing import Any

import numpy as np

from .. import records


class ChannelStats:
    """Accumulates one channel's statistics and emits a record per sample-time window."""

    def __init__(
        self,
        channel: str,
        interval_s: float,
        center: float,
        chatter_window_s: float = 60.0,
        chatter_count: int = 3,
        period_s: float = 0.0,
    ) -> None:
        self.period = float(period_s)  # nominal sample period (fault time from sample counts)
        self.channel = channel
        self.interval = float(interval_s)
        self.center = float(center)
        self.chatter_window = float(chatter_window_s)
        self.chatter_count = int(chatter_count)
        self.window: int | None = None  # index k of the current window [kI, (k+1)I)
        self._reset_counts()
        self.prev_above: bool | None = None  # last raw sample above the centre?
        self.last_edge_t = math.nan
        self.activations: deque[float] = deque(maxlen=max(self.chatter_count, 1))
        self.sigma = math.nan
        self.nu0 = math.nan
        self.reliable: bool | None = None
        self.reason: str | None = None
        self.noise_window_s = math.nan

    def _reset_counts(self) -> None:
        self.fault_samples = 0
        self.samples = 0
        self.raw = 0
        self.edges = 0
        self.min_spacing = math.inf
        self.chattering = False

    # -- window bookkeeping -----------------------------------------------------------------
    def boundaries(self, t: np.ndarray) -> list[int]:
        """Indices into ``t`` where a new window starts (the first sample past a window end)."""
        out: list[int] = []
        if t.size == 0:
            return out
        # A sample's window is window_of(t) = floor(t / interval), here as everywhere.
        # The end is searched in t against (k + 1) * interval and then moved to where that
        # number changes: rounding can put a sample at or past the product with its quotient
        # just below k + 1 (0.58 / 0.02 = 28.999999999999996, 29 × 0.02 = 0.58), or the other
        # way round, and a search that disagreed with the numbering stood still.
        interval = self.interval
        k = self.window
        if k is None:
            k = self.window_of(float(t[0]))
            self.window = k
        n = t.size
        start = 0
        while True:
            j = int(np.searchsorted(t[start:], (k + 1) * interval, side="left")) + start
            while j < n and self.window_of(float(t[j])) <= k:
                j += 1
            while j > start and self.window_of(float(t[j - 1])) > k:
                j -= 1
            if j >= n:
                break
            out.append(j)
            k = self.window_of(float(t[j]))  # skips windows with no samples (gaps)
            start = j
        return out

    def window_of(self, t: float) -> int:
        """The number k of the window [k·I, (k+1)·I) that holds the sample time ``t``: the one
        statement of the rule (window ends, the quiet test and close() all number by it)."""
        return math.floor(t / self.interval)

    def ends_by(self, t: float) -> bool:
        """Does the current window end at or before the sample time ``t`` (or is there none
        yet)? By the window numbers, as :meth:`boundaries` finds the ends."""
        return self.window is None or self.window_of(t) != self.window

    def window_bounds(self) -> tuple[float, float]:
        assert self.window is not None
        return self.window * self.interval, (self.window + 1) * self.interval

    def add_fault(self, samples: int) -> None:
        """Samples of the window that were sensor faults (not levels)."""
        self.fault_samples += samples

    @property
    def fault_s(self) -> float:
        # from the integer count, so the figure does not depend on how blocks were cut
        return self.fault_samples * self.period

    def close(self, t_next: float, low: float, high: float) -> dict[str, Any] | None:
        """Emit the record of the current window (at the sample ``t_next``), start the next."""
        assert self.window is not None
        rec = self._record(low, high) if (self.samples or self.fault_samples) else None
        self.window = self.window_of(t_next)
        self._reset_counts()
        return rec

    def close_partial(self, t_end: float, low: float, high: float) -> dict[str, Any] | None:
        """End of the stream inside the current window: its record so far, ``t_end`` the end of
        the data, marked ``partial``; the next sample starts a window afresh."""
        if self.window is None:
            return None
        rec = self._record(low, high) if (self.samples or self.fault_samples) else None
        if rec is not None:
            rec["t_end"] = t_end
            rec["partial"] = True
        self.window = None
        self._reset_counts()
        return rec

    def _record(self, low: float, high: float) -> dict[str, Any]:
        k = self.window
        half = (high - low) / 2.0
        sig, nu0 = self.sigma, self.nu0
        trusted = self.reliable is True
        margin = half / sig if trusted and sig > 0 and math.isfinite(half) else math.nan
        if trusted and sig > 0 and nu0 >= 0 and math.isfinite(half):
            # Rice: ν0·exp(−h²/2σ²); by the margin h/σ where h² or 2σ² leaves the normal doubles
            # (σ below about 1e-154: a channel in tiny units, or a tiny gain), which would divide
            # by zero or lose the quotient's precision
            two_var, hh = 2.0 * sig * sig, half * half
            normal = two_var >= sys.float_info.min and (hh >= sys.float_info.min or hh == 0.0)
            z = hh / two_var if normal else 0.5 * margin * margin
            rate = nu0 * math.exp(-z) * 3600.0
        else:
            rate = math.nan
        extra: dict[str, Any] = {}
        if self.reliable is False:
            extra["reliable_reason"] = self.reason
        return records.stats(
            self.channel,
            k * self.interval,
            (k + 1) * self.interval,
            samples=self.samples,
            raw_crossings=self.raw,
            edges=self.edges,
            suppression_ratio=(self.raw / self.edges) if self.edges else None,
            min_edge_spacing_s=self.min_spacing if math.isfinite(self.min_spacing) else None,
            noise_sigma=sig,
            nu0_hz=nu0,
            band_low=low,
            band_high=high,
            margin_sigma=margin,
            predicted_false_rate_per_hour=rate,
            chattering=self.chattering,
            fault_s=self.fault_s,
            reliable=self.reliable,
            noise_window_s=self.noise_window_s,
            **extra,
        )

    # -- accumulation -------------------------------------------------------------------------
    def add_samples(self, v: np.ndarray) -> None:
        """Scaled, unfiltered values of consecutive samples inside the current window."""
        if v.size == 0:
            return
        above = v > self.center
        n = int(np.count_nonzero(above[1:] != above[:-1]))
        if self.prev_above is not None and bool(above[0]) != self.prev_above:
            n += 1
        self.raw += n
        self.prev_above = bool(above[-1])
        self.samples += int(v.size)

    def add_edges(self, times: list[float], levels: list[int]) -> None:
        """Edges emitted in the current window (times in order, output levels)."""
        for t, lv in zip(times, levels):
            self.edges += 1
            if math.isfinite(self.last_edge_t):
                self.min_spacing = min(self.min_spacing, t - self.last_edge_t)
            self.last_edge_t = t
            if lv == 1:
                self.activations.append(t)
                if (
                    len(self.activations) >= self.chatter_count
                    and t - self.activations[0] <= self.chatter_window
                ):
                    self.chattering = True

    def noise(
        self, sigma: float, nu0: float, reliable: bool = True, reason: str | None = None,
        window_s: float = math.nan,
    ) -> None:
        """The latest noise estimate, over ``window_s`` seconds of samples."""
        self.sigma, self.nu0 = float(sigma), float(nu0)
        self.reliable, self.reason = bool(reliable), reason
        self.noise_window_s = float(window_s)

    def copy(self) -> "ChannelStats":
        new = copy.copy(self)
        new.activations = deque(self.activations, maxlen=self.activations.maxlen)
        return new
