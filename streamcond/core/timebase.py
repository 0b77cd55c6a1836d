"""Sample time for a stream of rows: from a time column or from a fixed rate.

Pure and chunk-invariant. Turns the raw time column into seconds (``time_scale``), keeps the
output time strictly increasing, and reports irregularities as ``gap`` records:

* a step of more than ``gap_after_periods`` nominal periods forward is a *jump* (samples kept);
* a step backwards (or a repeated time) by at most that much is an *out-of-order* sample:
  dropped, counted, reported;
* a step backwards by more than that is a *time reset* (a microcontroller that restarted its
  millisecond counter): the new time line is re-based so that output time continues one
  nominal period after the last sample, and the stream goes on.

The nominal period is ``1/sample_rate_hz`` when given, otherwise the median of the first
``ESTIMATE_N`` positive time steps; rows are held back until those have been seen (a fixed
sample count, so the result does not depend on how the rows were chunked).
"""

from __future__ import annotations

import numpy as np

from .. import records
from .noise import _median

#: Time steps used to estimate the nominal period when no rate is configured.
ESTIMATE_N = 16

#: Rows scanned per step while looking for the next irregular time.
_WINDOW = 4096


class Timebase:
    """Converts raw time values (or row counts) to sample time."""

    def __init__(
        self,
        time_scale: float = 1.0,
        sample_rate_hz: float | None = None,
        has_time_column: bool = True,
        gap_after_periods: float = 3.0,
    ) -> None:
        self.time_scale = float(time_scale)
        self.has_time = has_time_column
        self.gap_after = float(gap_after_periods)
        self.period: float | None = 1.0 / sample_rate_hz if sample_rate_hz else None
        if not self.has_time and self.period is None:
            raise ValueError("a fixed sample rate is needed when the data carries no time")
        self.count = 0  # rows emitted so far
        self.last_t = float("nan")
        self.offset = 0.0  # added to scaled raw time after a time reset
        self.dropped = 0

    @property
    def ready(self) -> bool:
        return self.period is not None

    def estimate(self, raw_t: np.ndarray, final: bool = False) -> bool:
        """Try to fix the nominal period from the rows seen so far (all of them, every call).

        ``final``: the stream has ended; a recording shorter than ``ESTIMATE_N`` steps takes the
        median of the steps it has."""
        if self.period is not None:
            return True
        ts = np.asarray(raw_t, dtype=np.float64) * self.time_scale
        d = np.diff(ts)
        d = d[d > 0]
        if d.size < ESTIMATE_N and not (final and d.size):
            return False
        # the median of the first steps as np.median computes it, without np.median: its first
        # call imports numpy.ma, which costs a replay more (10-20 ms) than all the rest here
        self.period = float(_median(d[:ESTIMATE_N]))
        return True

    def process(self, raw_t: np.ndarray | None, n: int) -> tuple[np.ndarray, np.ndarray, list]:
        """Times for ``n`` new rows (the period must be known: see :meth:`estimate`).

        Returns ``(t, keep, gaps)``: ``keep`` indexes the rows that were kept, ``t`` their
        times, ``gaps`` a list of ``(k, record)`` with ``k`` the index in ``t`` of the first
        sample after the gap (or of the sample that took the dropped one's place).
        """
        if self.period is None:
            raise RuntimeError("Timebase.process before the period is known")
        if not self.has_time:
            t = (self.count + np.arange(n, dtype=np.float64)) * self.period
            self.count += n
            if n:
                self.last_t = float(t[-1])
            return t, np.arange(n), []
        ts = np.asarray(raw_t, dtype=np.float64) * self.time_scale
        return self._regularise(ts)

    def _regularise(self, ts: np.ndarray) -> tuple[np.ndarray, np.ndarray, list]:
        n = ts.size
        out_t = ts + self.offset
        limit = self.gap_after * self.period
        gaps: list[tuple[int, dict]] = []
        keep = np.ones(n, dtype=bool)
        last = self.last_t
        start = 0
        ndrop = 0
        while start < n:
            # a bounded window, so that a block full of irregular times costs O(n·W), not O(n²)
            seg = out_t[start : start + _WINDOW]
            prev = np.empty_like(seg)
            prev[0] = last
            prev[1:] = seg[:-1]
            d = seg - prev
            if np.isnan(last):
                d[0] = self.period  # the very first sample
            bad = np.flatnonzero((d <= 0) | (d > limit))
            if bad.size == 0:
                last = float(seg[-1])
                start += seg.size
                continue
            i = start + int(bad[0])
            if i > start:
                last = float(out_t[i - 1])  # the samples before i in this window are regular
            step = out_t[i] - last
            k = i - ndrop  # output index of sample i if kept
            if step > limit:
                gaps.append((k, records.gap(last, float(out_t[i]), "jump")))
                last = float(out_t[i])
            elif step >= -limit:
                # out of order or repeated: drop this one sample
                keep[i] = False
                ndrop += 1
                self.dropped += 1
                gaps.append((k, records.gap(last, last, "out_of_order", dropped=1)))
            else:
                # time reset: re-base so the stream continues one period after the last sample
                # computed from the raw times, never by adding to the shifted ones, so the
                # result does not depend on where the blocks were cut
                self.offset = (last + self.period) - ts[i]
                out_t[i:] = ts[i:] + self.offset
                gaps.append((k, records.gap(last, float(out_t[i]), "time_reset")))
                last = float(out_t[i])
            start = i + 1
        self.last_t = last
        idx = np.flatnonzero(keep)
        self.count += idx.size
        return out_t[idx], idx, gaps
