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
from .channel import ChannelConditioner
from .timebase import Timebase


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
        tagged: list[tuple[int, int, int, dict[str, Any]]] = []
        for k, rec in gaps:
            tagged.append((k, -1, 0, rec))
        self.gaps += len(gaps)
        assert self.channels is not None
        for ci, (ch, col) in enumerate(zip(self.channels, self.chan_cols)):
            for i, rank, rec in ch.process(t, rows[:, col]):
                tagged.append((i, ci, rank, rec))
        if t.size:
            self.last_t = float(t[-1])
        self.samples += int(t.size)
        if len(tagged) > 1:
            tagged.sort(key=lambda r: (r[0], r[1], r[2]))
        if self.host_col is not None and t.size:
            host = rows[:, self.host_col]
            self.last_host_t = float(host[-1])
            _stamp(tagged, t, host)
        return [r[3] for r in tagged]

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
        if not self.timebase.ready and self._held.shape[0]:
            if self.timebase.estimate(self._held[:, self.time_col], final=True):
                held, self._held = self._held, np.empty((0, len(self.columns)))
                out = self.process(held)
        out.extend(self.flush())
        return out

    def flush(self) -> list[dict[str, Any]]:
        """End of stream or clean stop: every channel's current, partial stats window (and its
        measure record), marked ``partial``, so the last seconds are not lost. The windows start
        afresh at the next sample."""
        out: list[dict[str, Any]] = []
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
        """Per-channel state to save; channels not started yet keep what was restored."""
        out = dict(self._restore)
        for ch in self.channels or []:
            out[ch.name] = ch.snapshot()
        return out

    def adopt(self, old: "Pipeline") -> None:
        """Continue from a running pipeline after a config reload: the time base (same source)
        and, for every channel whose name is unchanged, its state (see
        :meth:`ChannelConditioner.adopt`)."""
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

    def edges_by_channel(self) -> dict[str, int]:
        return {c.name: c.edges for c in self.channels or []} or {
            ch.name: 0 for ch in self.cfg.channel
        }


def _stamp(tagged: list[tuple[int, int, int, dict[str, Any]]], t: np.ndarray, host: np.ndarray) -> None:
    """``utc`` of every record: the wall-clock time of its ``t``, from the host receive time of
    the sample at which it was emitted shifted by ``t`` minus that sample's time."""
    last = t.size - 1
    for i, _, _, rec in tagged:
        k = min(max(i, 0), last)
        rt = rec.get("t")
        h = float(host[k])
        if isinstance(rt, float) and np.isfinite(rt):
            h += rt - float(t[k])
        records.with_utc(rec, h)
