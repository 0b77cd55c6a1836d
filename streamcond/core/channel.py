"""One channel's conditioning: scale → prefilter → band → comparator (+ dwell) → records.

Pure and stateful; :meth:`ChannelConditioner.process` takes a block of sample times and raw
values and returns the records the block produced, each tagged with the index of the sample at
which it was emitted (so the pipeline can merge channels in an order that does not depend on
how the stream was chunked).
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np

from .. import records
from ..config import Channel, FixedBand
from .comparator import UNKNOWN, DwellState, crossing_times, hysteresis, qualified_hysteresis
from .filters import StreamFilter, make_filter

#: Emission order of records of one channel at the same sample.
RANK_STATS = 0
RANK_STATE = 1
RANK_EDGE = 2

Tagged = tuple[int, int, dict[str, Any]]  # (sample index in block, rank, record)


def build_filter(ch: Channel, sample_rate_hz: float) -> StreamFilter:
    f = ch.filter
    params = {k: v for k, v in f.model_dump().items() if k != "kind"}
    return make_filter(f.kind, sample_rate_hz, **params)


class FixedBandStage:
    """A constant band; the adaptive band (noise-following) has the same interface."""

    def __init__(self, band: FixedBand) -> None:
        self.low = float(band.low)
        self.high = float(band.high)

    def thresholds(self, y: np.ndarray, level: int) -> tuple[float | np.ndarray, float | np.ndarray]:
        return self.low, self.high

    def copy(self) -> "FixedBandStage":
        return copy.copy(self)


class ChannelConditioner:
    """The conditioning chain of one configured channel."""

    def __init__(self, cfg: Channel, sample_rate_hz: float) -> None:
        self.cfg = cfg
        self.name = cfg.name
        self.gain = float(cfg.gain)
        self.offset = float(cfg.offset)
        self.invert = bool(cfg.invert)
        self.period = 1.0 / sample_rate_hz
        self.filter = build_filter(cfg, sample_rate_hz)
        self.delay_s = self.filter.delay_samples * self.period if cfg.compensate_delay else 0.0
        if isinstance(cfg.band, FixedBand):
            self.band: Any = FixedBandStage(cfg.band)
        else:  # pragma: no cover - adaptive band arrives with the noise tracker
            raise NotImplementedError("adaptive band")
        self.rise_s = float(cfg.dwell.rise_s)
        self.fall_s = float(cfg.dwell.fall_s)
        self.dwell = DwellState()
        self.seq = 0  # last seq issued
        self.edges = 0  # edges emitted in this run

    # -- state that outlives a run (daemon restarts) --------------------------------------
    @property
    def level(self) -> int:
        """Comparator level (before ``invert``), UNKNOWN before the first decisive sample."""
        return self.dwell.level

    def output_level(self, level: int) -> int:
        return level ^ 1 if self.invert else level

    def process(self, t: np.ndarray, raw: np.ndarray) -> list[Tagged]:
        """Condition one block; returns ``(sample index, rank, record)`` tuples in order."""
        if t.size == 0:
            return []
        v = raw * self.gain + self.offset if (self.gain != 1.0 or self.offset != 0.0) else raw
        y = self.filter.process(np.asarray(v, dtype=np.float64))
        low, high = self.band.thresholds(y, self.dwell.level)
        st = self.dwell
        out: list[Tagged] = []
        if self.rise_s == 0.0 and self.fall_s == 0.0:
            # The fast path: the block kernel, then interpolation at the sparse transitions.
            prev_t, prev_x = st.prev_t, st.prev_x
            tr, st.level = hysteresis(y, low, high, st.level)
            st.prev_t, st.prev_x = float(t[-1]), float(y[-1])
            idx, lev = tr.index, tr.level
            if tr.initial:
                i0 = int(idx[0])
                out.append(self._state(i0, float(t[i0]), int(lev[0]), float(y[i0])))
                idx, lev = idx[1:], lev[1:]
            if idx.size:
                tc = crossing_times(t, y, idx, lev, low, high, prev_t, prev_x)
                out.extend(self._edges(idx, tc, y[idx], lev))
            return out
        q = qualified_hysteresis(t, y, low, high, self.rise_s, self.fall_s, st)
        if q.initial is not None:
            i0, l0, t0, v0 = q.initial
            out.append(self._state(i0, t0, l0, v0))
        if q.emit.size:
            out.extend(self._edges(q.emit, q.t, q.value, q.level))
        return out

    def _state(self, i: int, t: float, level: int, value: float) -> Tagged:
        # The sample time itself: the prefilter starts from a steady state, so there is no
        # delay to take back before the first decision.
        rec = records.state(self.name, t, self.output_level(level), value)
        return (i, RANK_STATE, rec)

    def _edges(
        self, emit: np.ndarray, tc: np.ndarray, value: np.ndarray, level: np.ndarray
    ) -> list[Tagged]:
        out: list[Tagged] = []
        tcs = (tc - self.delay_s).tolist()
        vals = value.tolist()
        levs = level.tolist()
        for i, tt, vv, lv in zip(emit.tolist(), tcs, vals, levs):
            self.seq += 1
            self.edges += 1
            out.append((i, RANK_EDGE, records.edge(self.name, tt, self.output_level(lv), vv, self.seq)))
        return out

    def copy(self) -> "ChannelConditioner":
        new = copy.copy(self)
        new.filter = self.filter.copy()
        new.band = self.band.copy()
        new.dwell = copy.copy(self.dwell)
        return new
