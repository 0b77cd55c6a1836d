"""The whole conditioning core for one source: rows in, records out.

``Pipeline.process(rows)`` takes a 2-D float64 block (one row per sample, one column per
source column) and returns the records it produced, in an order that depends only on the
samples: by the global index of the sample at which each record was emitted, then source-wide
records before channel records, then channels in config order. That ordering, together with
every stage carrying its state on sample count/time, is what makes the output identical however
the stream is chunked (DESIGN.md "Chunk invariance is a law").

No I/O, no clocks: the replay command and the live daemon both drive this class.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .. import records
from ..config import Config
from ..io.lineparse import HOST_T
from . import levels
from .channel import ChannelConditioner
from .timebase import Timebase


#: At most this many samples of one channel wait for conditioning (memory bound; 64 k float64
#: pairs = 1 MiB per channel).
MAX_DEFERRED = 65536


class Pipeline:
    """Conditions the configured channels of one source."""

    def __init__(self, cfg: Config, columns: list[str], host_time: bool = False) -> None:
        """``columns`` name the row columns; with ``host_time`` the last one holds host receive
        times in seconds (used as sample time when the data carries none)."""
        self.cfg = cfg
        self.columns = list(columns)
        src = cfg.source
        col_index = {c: i for i, c in enumerate(self.columns)}
        if host_time:
            self.time_col: int | None = len(self.columns) - 1
            scale = 1.0
        else:
            self.time_col = col_index[src.time_column] if src.time_column else None
            scale = src.time_scale
        self.chan_cols = [col_index[ch.source_column] for ch in cfg.channel]
        # host receive times (live, and captures): the wall-clock stamp (``utc``) of records
        self.host_col: int | None = col_index.get(HOST_T)
        self.last_host_t = float("nan")
        self.timebase = Timebase(
            time_scale=scale,
            sample_rate_hz=src.sample_rate_hz,
            has_time_column=self.time_col is not None,
            gap_after_periods=src.gap_after_periods,
        )
        self.channels: list[ChannelConditioner] | None = None
        self._restore: dict[str, dict[str, Any]] = {}
        self._adopt: dict[str, ChannelConditioner] = {}
        self._held = np.empty((0, len(self.columns)))
        self._hold_info: Any = None  # may_emit's per-channel static test, for self.channels
        # per channel: samples deferred by _quiet_channels — [(t, x), ...], their count, and
        # the global index of the first
        self._pending: list[list[tuple[np.ndarray, np.ndarray]]] = []
        self._pending_n: list[int] = []
        self._pending_at: list[int] = []
        self._carry: list[tuple[int, int, int, dict[str, Any]]] = []
        self.samples = 0  # samples passed to the channels so far
        self.gaps = 0
        self.last_t = float("nan")

    @property
    def sample_rate_hz(self) -> float | None:
        p = self.timebase.period
        return None if p is None else 1.0 / p

    def _start_channels(self) -> None:
        fs = self.sample_rate_hz
        assert fs is not None
        from ..validate import start_channels

        # settings that only the sample rate shows to be impossible: sentences naming the keys
        rate_from = "source.sample_rate_hz" if self.cfg.source.sample_rate_hz else "the measured sample rate"
        channels = start_channels(self.cfg, fs, rate_from)
        for ch in channels:
            if ch.name in self._adopt:
                ch.adopt(self._adopt[ch.name])
            elif ch.name in self._restore:
                ch.restore(self._restore[ch.name])
        self._adopt.clear()
        self.channels = channels
        self._pending = [[] for _ in channels]
        self._pending_n = [0] * len(channels)
        self._pending_at = [0] * len(channels)

    def process(self, rows: np.ndarray) -> list[dict[str, Any]]:
        """Condition a block of rows; returns the records it completed."""
        rows = np.asarray(rows, dtype=np.float64)
        if rows.ndim != 2 or rows.shape[1] != len(self.columns):
            raise ValueError(f"rows must be (n, {len(self.columns)})")
        if not self.timebase.ready:
            self._held = np.concatenate((self._held, rows)) if self._held.size else rows
            if not self.timebase.estimate(self._held[:, self.time_col]):
                return []
            rows, self._held = self._held, np.empty((0, len(self.columns)))
        if self.channels is None:
            self._start_channels()
        n = rows.shape[0]
        if n == 0:
            return []
        raw_t = rows[:, self.time_col] if self.time_col is not None else None
        t, keep, gaps = self.timebase.process(raw_t, n)
        if keep.size != n:
            rows = rows[keep]
        base = self.samples  # global index of this block's first sample
        tagged: list[tuple[int, int, int, dict[str, Any]]] = list(self._carry)
        self._carry = []
        for k, rec in gaps:
            tagged.append((base + k, -1, 0, rec))
        self.gaps += len(gaps)
        chans = self.channels
        assert chans is not None
        quiet = self._quiet_channels(t, rows) if t.size else None
        for ci, (ch, col) in enumerate(zip(chans, self.chan_cols)):
            x = rows[:, col]
            pend = self._pending[ci]
            if quiet is not None and quiet[ci] and self._pending_n[ci] + t.size <= MAX_DEFERRED:
                # provably no record from this channel in these samples: condition them later,
                # together with more (its records come out at their global sample index)
                if not pend:
                    self._pending_at[ci] = base
                pend.append((t, x))
                self._pending_n[ci] += t.size
                continue
            if pend:
                at = self._pending_at[ci]
                tt = np.concatenate([p[0] for p in pend] + [t])
                xx = np.concatenate([p[1] for p in pend] + [x])
                pend.clear()
                self._pending_n[ci] = 0
            else:
                at, tt, xx = base, t, x
            for i, rank, rec in ch.process(tt, xx):
                tagged.append((at + i, ci, rank, rec))
        if t.size:
            self.last_t = float(t[-1])
        self.samples += int(t.size)
        if len(tagged) > 1:
            tagged.sort(key=lambda r: (r[0], r[1], r[2]))
        if self.host_col is not None:
            host = rows[:, self.host_col]
            # A gap starts at the last sample kept before it (its t): its utc is that sample's
            # host time, in this block or the one before — whichever block holds the dropped
            # or jumping sample (stamped by the next sample, it moved with the split).
            for k, rec in gaps:
                records.with_utc(rec, float(host[k - 1]) if k >= 1 else self.last_host_t)
            if t.size:
                self.last_host_t = float(host[-1])
                _stamp(tagged, t, host, base)
        return [r[3] for r in tagged]

    def _quiet_channels(self, t: np.ndarray, rows: np.ndarray) -> list[bool]:
        """Per channel: can it provably emit no record over these samples (see
        :meth:`may_emit`; besides: no stats window ends and no noise estimate is due in them)?
        Then conditioning them may wait: the per-call cost of a channel's chain is far above
        its per-sample cost, and in a live stream most channels are quiet in most blocks."""
        chans = self.channels
        assert chans is not None
        info = self._holdable()
        t_last = float(t[-1])
        # the state tests first: in a long block (a replay's) a stats window always ends, and
        # the value ranges need not be computed at all
        maybe = [info[1][ci] and self._quiet(ch, t_last, self._pending_n[ci] + t.size)
                 for ci, ch in enumerate(chans)]
        if not any(maybe):
            return maybe
        lo_v, hi_v = self._column_ranges(rows)
        return [m and _keeps_side(ch, ch.dwell.level, lo_v[ci], hi_v[ci])
                for ci, (m, ch) in enumerate(zip(maybe, chans))]

    def _holdable(self) -> tuple:
        """(channels, per channel: no prefilter and no fault limits), cached per channel list:
        only such channels can be proven to keep their level from their raw values."""
        chans = self.channels
        info = self._hold_info
        if info is None or info[0] is not chans:
            info = self._hold_info = (chans, [
                ch.cfg.filter.kind == "none" and ch.cfg.fault is None for ch in chans
            ])
        return info

    def _column_ranges(self, rows: np.ndarray) -> tuple[list[float], list[float]]:
        """Per channel column, the smallest and largest raw value of ``rows``."""
        if rows.shape[0] == 1:  # the usual live read at low rates: no numpy reductions
            r = rows[0].tolist()
            v = [r[c] for c in self.chan_cols]
            return v, v
        sub = rows[:, self.chan_cols]
        return sub.min(axis=0).tolist(), sub.max(axis=0).tolist()

    @staticmethod
    def _quiet(ch: ChannelConditioner, t_last: float, n_new: int) -> bool:
        """The state half of the test: no edge pending, no fault, a known level, no stats
        window ending and no noise estimate due in these samples (the values are tested by
        :func:`_keeps_side`)."""
        st = ch.dwell
        level = st.level
        if st.pend_class != -1 or ch.in_fault or not (level == 0 or level == 1):
            return False
        if ch._pending_noise is not None:
            return False
        if ch.stats.ends_by(t_last):
            return False  # a stats window ends (or starts) in these samples
        nt = ch.noise
        n0 = nt.samples_seen
        wn, every = nt.window_n, nt.update_every
        first = wn if n0 < wn else wn + ((n0 - wn) // every + 1) * every
        return first > n0 + n_new  # else a noise estimate is due

    def _drain(self) -> None:
        """Condition every channel's deferred samples now (before state is read or handed
        on); their records (by construction none) are kept for the next output."""
        for ci, ch in enumerate(self.channels or []):
            pend = self._pending[ci]
            if not pend:
                continue
            at = self._pending_at[ci]
            tt = np.concatenate([p[0] for p in pend])
            xx = np.concatenate([p[1] for p in pend])
            pend.clear()
            self._pending_n[ci] = 0
            for i, rank, rec in ch.process(tt, xx):
                self._carry.append((at + i, ci, rank, rec))

    def may_emit(self, rows: np.ndarray) -> bool:
        """Could conditioning ``rows`` now emit an edge or a ``state`` record? Conservative:
        False only when every channel provably keeps its level over these rows, so a caller
        may hold them back and condition them later together with more (the records do not
        depend on the blocking). One pass over all channel columns at once (2-D min/max).

        A channel keeps its level when its level is known, it has no prefilter (a filter's
        memory reaches back into rows already conditioned), no fault limits, no dwell
        candidate pending, and its values stay on the current side: above the lower
        threshold at level 1, below the upper at level 0. For an adaptive band the
        thresholds can move at a noise update inside the rows, but never inside
        ``center ± min_width/2`` (the narrowest band), which is therefore the test.
        """
        chans = self.channels
        if chans is None or not self.timebase.ready or rows.shape[0] == 0:
            return True
        info = self._holdable()
        if not all(info[1]):
            return True
        lo_v, hi_v = self._column_ranges(rows)
        for ch, a, b in zip(chans, lo_v, hi_v):
            st = ch.dwell
            level = st.level
            if st.pend_class != -1 or ch.in_fault or not (level == 0 or level == 1):
                return True
            if not _keeps_side(ch, level, a, b):
                return True
        return False

    def host_to_sample_time(self, host_t: float) -> float | None:
        """The sample time of a host clock reading (live: a device lost or back), from the last
        sample's pair of times; ``None`` before any sample."""
        if not np.isfinite(self.last_t) or not np.isfinite(self.last_host_t):
            return None
        return self.last_t + (host_t - self.last_host_t)

    def finish(self) -> list[dict[str, Any]]:
        """End of stream: rows still held back for the period estimate are conditioned with
        the period estimated from what there is (a recording shorter than the estimate)."""
        out: list[dict[str, Any]] = []
        self._drain()
        if not self.timebase.ready and self._held.shape[0]:
            if self.timebase.estimate(self._held[:, self.time_col], final=True):
                held, self._held = self._held, np.empty((0, len(self.columns)))
                out = self.process(held)
                self._drain()
        out.extend(self.flush())
        return out

    def flush(self) -> list[dict[str, Any]]:
        """End of stream or clean stop: every channel's current, partial stats window (and its
        measure record), marked ``partial``, so the last seconds are not lost. The windows start
        afresh at the next sample."""
        self._drain()  # the deferred samples belong in those windows
        out: list[dict[str, Any]] = []
        if self._carry:  # (none by construction: deferred samples emit nothing)
            carry, self._carry = sorted(self._carry, key=lambda r: (r[0], r[1], r[2])), []
            out.extend(r[3] for r in carry)
        if not np.isfinite(self.last_t):
            return out
        for ch in self.channels or []:
            out.extend(ch.finish(self.last_t))
        if self.host_col is not None and np.isfinite(self.last_host_t):
            for r in out:
                records.with_utc(r, self.last_host_t + (r["t"] - self.last_t))
        return out

    def totals(self) -> dict[str, dict[str, Any]]:
        """Final totals per channel (the replay's ``summary``): edges of this run and, with a
        count measure, the totalizer (rising edges over the life of the state)."""
        out: dict[str, dict[str, Any]] = {}
        for ch in self.channels or []:
            out[ch.name] = ch.totals()
        return out or {ch.name: {"edges": 0} for ch in self.cfg.channel}

    # -- state across restarts and reloads -----------------------------------------------------
    def restore(self, state: dict[str, dict[str, Any]]) -> None:
        """Per-channel state saved by an earlier run (applied when the channels start)."""
        self._restore = dict(state)
        if self.channels is not None:
            for ch in self.channels:
                if ch.name in state:
                    ch.restore(state[ch.name])

    def snapshot(self) -> dict[str, dict[str, Any]]:
        """Per-channel state to save; channels not started yet keep what was restored.

        No need to condition deferred samples first: a channel's samples are deferred only
        while they provably change neither its numbering, its level nor its measures."""
        out = dict(self._restore)
        for ch in self.channels or []:
            out[ch.name] = ch.snapshot()
        return out

    def adopt(self, old: "Pipeline") -> None:
        """Continue from a running pipeline after a config reload: the time base (same source)
        and, for every channel whose name is unchanged, its state (see
        :meth:`ChannelConditioner.adopt`)."""
        old._drain()
        self._carry = old._carry
        old._carry = []
        if old.columns == self.columns and old.time_col == self.time_col:
            self.timebase = old.timebase
            self._held = old._held
        self.samples, self.gaps, self.last_t = old.samples, old.gaps, old.last_t
        self.last_host_t = old.last_host_t
        self._restore = {k: v for k, v in old.snapshot().items()}
        names = {c.name for c in self.cfg.channel}
        self._adopt = {c.name: c for c in (old.channels or []) if c.name in names}
        if self.timebase.ready:
            self._start_channels()
            # A channel whose settings, stats settings and sample rate are all unchanged goes
            # on as it was: the same conditioner object, so its stats window (sample counts),
            # noise estimate, filter, band and measures continue exactly as without a reload.
            same_stats = old.cfg.stats == self.cfg.stats
            old_by_name = {c.name: c for c in old.channels or []}
            assert self.channels is not None
            for i, ch in enumerate(self.channels):
                prev = old_by_name.get(ch.name)
                if same_stats and prev is not None and prev.cfg == ch.cfg and prev.period == ch.period:
                    self.channels[i] = prev

    def edges_by_channel(self) -> dict[str, int]:
        return {c.name: c.edges for c in self.channels or []} or {
            ch.name: 0 for ch in self.cfg.channel
        }


def _stamp(tagged: list[tuple[int, int, int, dict[str, Any]]], t: np.ndarray, host: np.ndarray,
           base: int = 0) -> None:
    """``utc`` of every record: the wall-clock time of its ``t``, from the host receive time of
    the sample at which it was emitted shifted by ``t`` minus that sample's time (records are
    tagged with global sample indices; ``base`` is the block's first)."""
    last = t.size - 1
    for i, _, _, rec in tagged:
        if "utc" in rec:  # a gap, stamped by its own sample
            continue
        k = min(max(i - base, 0), last)
        rt = rec.get("t")
        h = float(host[k])
        if isinstance(rt, float) and np.isfinite(rt):
            h += rt - float(t[k])
        records.with_utc(rec, h)


def _keeps_side(ch: ChannelConditioner, level: int, a: float, b: float) -> bool:
    """Do raw values in [a, b] keep ``ch`` at ``level``? Scaled by gain/offset, they must stay
    above the lower threshold at level 1 and below the upper at level 0. For an adaptive band
    the thresholds can move at a noise update, but never inside ``center ± min_width/2`` (the
    narrowest band), which is therefore the test. NaN compares False: never provable."""
    band = ch.band
    if band.adaptive:
        half = band.min_width / 2.0
        low, high = band.center - half, band.center + half
    else:
        low, high = band.low, band.high
    g = ch.gain
    if g != 1.0 or ch.offset != 0.0:
        a, b = a * g + ch.offset, b * g + ch.offset
        if g < 0:
            a, b = b, a
    if not levels.within(a, b):
        return False  # a level no sensor measures is a fault (a record)
    if level == 1:
        return a >= low
    return b <= high
