"""One channel's conditioning: scale → prefilter → band → comparator (+ dwell) → records.

Pure and stateful; :meth:`ChannelConditioner.process` takes a block of sample times and raw
values and returns the records the block produced, each tagged with the index of the sample at
which it was emitted (so the pipeline can merge channels in an order that does not depend on
how the stream was chunked).

Inside a block the work is split at the *events* that change the rules — a noise-estimate update
(the adaptive band may move) and the end of a stats window — which sit at fixed sample counts
and sample times; between them the comparator kernels run over whole segments.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np

from .. import records
from ..config import Channel, Stats
from . import levels
from .band import make_band
from .comparator import DwellState, crossing_times, hysteresis, qualified_hysteresis
from .filters import StreamFilter, make_filter
from .noise import MIN_SAMPLES, NoiseTracker
from .stats import ChannelStats

#: Emission order of records of one channel at the same sample.
RANK_STATS = 0
RANK_MEASURE = 1
RANK_FAULT = 2
RANK_STATE = 3
RANK_EDGE = 4
RANK_EDGE_MEASURE = 5

Tagged = tuple[int, int, dict[str, Any]]  # (sample index in block, rank, record)


def build_filter(ch: Channel, sample_rate_hz: float) -> StreamFilter:
    f = ch.filter
    params = {k: v for k, v in f.model_dump().items() if k != "kind"}
    return make_filter(f.kind, sample_rate_hz, **params)


class ChannelConditioner:
    """The conditioning chain of one configured channel."""

    def __init__(self, cfg: Channel, sample_rate_hz: float, stats: Stats | None = None) -> None:
        stats = stats or Stats()
        self.cfg = cfg
        self.name = cfg.name
        self.gain = float(cfg.gain)
        self.offset = float(cfg.offset)
        self.invert = bool(cfg.invert)
        self.period = 1.0 / sample_rate_hz
        self.filter = build_filter(cfg, sample_rate_hz)
        self.delay_s = self.filter.delay_samples * self.period if cfg.compensate_delay else 0.0
        self.band = make_band(cfg.band)
        if self.band.adaptive:
            n_win = round(cfg.band.window_s * sample_rate_hz)
            if n_win < MIN_SAMPLES:
                raise ValueError(
                    f"{{at}}.band.window_s ({cfg.band.window_s:g} s) holds {n_win} samples at "
                    f"{sample_rate_hz:g} Hz; the noise estimate needs at least {MIN_SAMPLES}"
                )
            self.noise = NoiseTracker(sample_rate_hz, cfg.band.window_s)
        else:
            # A fixed band needs σ̂ only for the stats records: an estimate every
            # max(interval_s, noise_refresh_s), over at least the estimator's minimum samples.
            every = max(1, round(max(stats.interval_s, stats.noise_refresh_s) * sample_rate_hz))
            window_s = max(stats.noise_window_s, MIN_SAMPLES / sample_rate_hz)
            self.noise = NoiseTracker(sample_rate_hz, window_s, update_every=every)
        self.stats = ChannelStats(
            cfg.name, stats.interval_s, self.band.center, stats.chatter_window_s,
            stats.chatter_count, period_s=self.period,
        )
        self.rise_s = float(cfg.dwell.rise_s)
        self.fall_s = float(cfg.dwell.fall_s)
        self.dwell = DwellState()
        self._pending_noise: tuple[float, float, bool, str | None, float] | None = None
        self.in_fault = False
        self.fault_t0 = float("nan")
        # The last conditioned value (NaN at a fault sample), for a noise update applied at the
        # next block's first sample; unlike dwell.prev_x, which a fault start clears (no
        # interpolation across a fault), a fault starting at that sample leaves it as in one
        # block, where the update reads the sample before.
        self.last_y = float("nan")
        if cfg.measure is not None:
            from .measures import MeasureTracker

            self.measure: Any = MeasureTracker(cfg.name, cfg.measure)
        else:
            self.measure = None
        self.seq = 0  # last seq issued
        self.edges = 0  # edges emitted in this run

    @property
    def level(self) -> int:
        """Comparator level (before ``invert``), UNKNOWN before the first decisive sample."""
        return self.dwell.level

    def output_level(self, level: int) -> int:
        return level ^ 1 if self.invert else level

    def process(self, t: np.ndarray, raw: np.ndarray) -> list[Tagged]:
        """Condition one block; returns ``(sample index, rank, record)`` tuples in order."""
        n = t.size
        if n == 0:
            return []
        raw = np.asarray(raw, dtype=np.float64)
        # a raw value at or beyond the fault limits, or one whose level no sensor measures
        # (beyond ±LEVEL_LIMIT, or not a number), is a fault: see levels
        v, bad = levels.scale(raw, self.gain, self.offset, self.cfg.fault)
        # events inside the block: (sample index, order, payload); at one index: the stats
        # window closes first, then a fault starts or ends, then a noise estimate applies
        events: list[tuple[int, int, Any]] = []
        if bad is None and self.in_fault:
            bad = np.zeros(n, dtype=bool)  # an overflow fault that ends at this block's start
        if bad is not None:
            flips = np.flatnonzero(bad[1:] != bad[:-1]) + 1
            if bool(bad[0]) != self.in_fault:
                flips = np.concatenate((np.zeros(1, np.int64), flips))
            for k in flips.tolist():
                events.append((k, 1, bool(bad[k])))
            good = np.flatnonzero(~bad) if bad.any() else None
        else:
            good = None
        if good is None:
            y = self.filter.process(v)
            yg = y
        else:
            # fault samples are not levels: the filter, the noise estimate and the comparator
            # never see them
            y = np.full(n, np.nan)
            yg = self.filter.process(v[good])
            y[good] = yg
        if self._pending_noise is not None:
            # an estimate that completed on the previous block's last sample
            events.append((0, 2, self._pending_noise))
            self._pending_noise = None
        upd = self.noise.process(yg)
        idx = upd.idx if good is None else good[upd.idx]
        for i, s_, n_, r_, why, m_ in zip(
            idx.tolist(), upd.sigma.tolist(), upd.nu0.tolist(), upd.reliable.tolist(),
            upd.reason, upd.samples.tolist(),
        ):
            est = (s_, n_, bool(r_), why, m_ * self.period)
            if i + 1 < n:
                events.append((i + 1, 2, est))  # the estimate includes sample i
            else:
                self._pending_noise = est  # applies from the next block's first sample
        for j in self.stats.boundaries(t):
            events.append((j, 0, None))
        events.sort(key=lambda e: (e[0], e[1]))
        out: list[Tagged] = []
        # Only a fault change, or a noise estimate for an adaptive band, changes what the
        # comparator does; a stats window's end (or a noise figure for the stats alone) only
        # needs the records up to its sample. So the kernel runs once per stretch between the
        # former, and the latter cut its results (see _span).
        moves = (1, 2) if self.band.adaptive else (1,)
        a = 0
        stops: list[tuple[int, int, Any]] = []
        for ev in events:
            k, order, payload = ev
            if order not in moves:
                stops.append(ev)
                continue
            out.extend(self._span(t, v, y, a, k, stops))
            stops = []
            a = k
            if order == 1:
                out.append(self._fault_change(k, float(t[k]), float(raw[k]), payload))
            else:
                self._apply_noise(payload, y, k)
        out.extend(self._span(t, v, y, a, n, stops))
        self.last_y = float(y[-1])
        return out

    def _stop(self, ev: tuple[int, int, Any], t: np.ndarray, y: np.ndarray) -> list[Tagged]:
        """An event that leaves the comparator as it is: a window's end, or (fixed band) a
        noise estimate for the stats."""
        k, order, payload = ev
        if order == 0:
            return self._close_window(k, float(t[k]))
        self._apply_noise(payload, y, k)
        return []

    def _span(
        self, t: np.ndarray, v: np.ndarray, y: np.ndarray, a: int, b: int,
        stops: list[tuple[int, int, Any]],
    ) -> list[Tagged]:
        """Samples [a, b) under one band, with ``stops`` (events at samples a .. b-1, in
        order) handled where they fall.

        On the fast path (no dwell, no fault) the kernel runs over the whole stretch once and
        its transitions are cut at the stops: the same records as one kernel call per piece
        (the kernel is chunk-invariant — the same transitions, and the same crossing instants,
        since the sample before a piece's first is the one the previous piece ended on) for
        one call's overhead instead of one per stats window. Otherwise piece by piece."""
        out: list[Tagged] = []
        if not stops:
            return self._segment(t, v, y, a, b) if b > a else out
        if b <= a or self.in_fault or self.rise_s != 0.0 or self.fall_s != 0.0:
            for ev in stops:
                if ev[0] > a:
                    out.extend(self._segment(t, v, y, a, ev[0]))
                    a = ev[0]
                out.extend(self._stop(ev, t, y))
            if b > a:
                out.extend(self._segment(t, v, y, a, b))
            return out
        ts, ys = t[a:b], y[a:b]
        low, high = self.band.low, self.band.high
        st = self.dwell
        level0 = st.level
        tr, level_end = hysteresis(ys, low, high, level0)
        idx, lev = tr.index, tr.level
        i_init = int(idx[0]) if tr.initial else -1
        first = 1 if tr.initial else 0  # the transitions from here on are edges
        tc = crossing_times(ts, ys, idx[first:], lev[first:], low, high, st.prev_t, st.prev_x)
        # per piece: how many transitions (the initial state included) lie before its end
        ends = [ev[0] - a for ev in stops] + [b - a]
        cuts = np.searchsorted(idx, ends, side="left").tolist()
        pos = e0 = 0
        for ev, end, e1 in zip(stops + [None], ends, cuts):
            if end > pos:
                self.stats.add_samples(v[a + pos : a + end])
                if pos <= i_init < end:
                    out.append(
                        self._state(a + i_init, float(ts[i_init]), int(lev[0]), float(ys[i_init]))
                    )
                lo_e = max(e0, first)
                if e1 > lo_e:
                    sel = idx[lo_e:e1]
                    out.extend(
                        self._edges(sel + a, tc[lo_e - first : e1 - first], ys[sel], lev[lo_e:e1])
                    )
                st.level = int(lev[e1 - 1]) if e1 > 0 else level0
                pos, e0 = end, e1
            if ev is not None:
                out.extend(self._stop(ev, t, y))
        st.level = level_end
        st.prev_t, st.prev_x = float(ts[-1]), float(ys[-1])
        return out

    def _close_window(self, k: int, t_next: float) -> list[Tagged]:
        out: list[Tagged] = []
        t0, t1 = self.stats.window_bounds()
        fault_s = self.stats.fault_s
        rec = self.stats.close(t_next, self.band.low, self.band.high)
        if rec is not None:
            out.append((k, RANK_STATS, rec))
            if self.measure is not None:
                lv = self.dwell.level
                m = self.measure.close(t0, t1, self.output_level(lv) if lv in (0, 1) else -1, fault_s)
                if m is not None:
                    out.append((k, RANK_MEASURE, m))
        return out

    def finish(self, t_last: float) -> list[dict[str, Any]]:
        """End of stream at sample time ``t_last``: the current window's stats and measure
        records, covering the data up to one sample period past ``t_last``, marked partial."""
        if self.stats.window is None:
            return []
        t0, t1 = self.stats.window_bounds()
        t_end = min(t1, t_last + self.period)
        fault_s = self.stats.fault_s
        rec = self.stats.close_partial(t_end, self.band.low, self.band.high)
        if rec is None:
            return []
        out = [rec]
        if self.measure is not None:
            lv = self.dwell.level
            m = self.measure.close(t0, t_end, self.output_level(lv) if lv in (0, 1) else -1, fault_s)
            if m is not None:
                m["partial"] = True
                out.append(m)
        return out

    def totals(self) -> dict[str, Any]:
        """This channel's final totals: edges of this run, and the totalizer of a count measure."""
        out: dict[str, Any] = {"edges": self.edges}
        m = self.measure
        if m is not None and m.spec.count:
            out["total"] = m.total
            if m.spec.pulses_per_unit is not None:
                out["total_units"] = m.total / m.spec.pulses_per_unit
                out["quantity_unit"] = m.spec.quantity_unit
        return out

    def _fault_change(self, k: int, t: float, value: float, starts: bool) -> Tagged:
        st = self.dwell
        if starts:
            self.in_fault = True
            self.fault_t0 = t
            # no interpolation across the fault, and a dwell candidate is void
            st.prev_t = st.prev_x = float("nan")
            st.pend_class = -1
            why = levels.reason(value, self.gain, self.offset, self.cfg.fault)
            rec = records.fault_start(self.name, t, value, f"{why}: a sensor fault, not a level")
        else:
            self.in_fault = False
            rec = records.fault_end(self.name, t, value, t - self.fault_t0)
        return (k, RANK_FAULT, rec)

    def _apply_noise(
        self, est: tuple[float, float, bool, str | None, float], y: np.ndarray, k: int
    ) -> None:
        """A new noise estimate, in force from sample ``k`` of the block. An estimate that is
        not reliable moves no band: the band keeps its last reliable width (or, before the
        first one, ``initial_width`` or no decision at all)."""
        sigma, nu0, reliable, reason, window_s = est
        self.stats.noise(sigma, nu0, reliable, reason, window_s)
        if not reliable:
            return
        last = y[k - 1] if k > 0 else self.last_y
        self.band.propose(sigma, self.dwell.level, float(last))

    def _segment(self, t: np.ndarray, v: np.ndarray, y: np.ndarray, a: int, b: int) -> list[Tagged]:
        """Run the comparator over samples [a, b) with the band in force."""
        if self.in_fault:
            # the level is held; the time counts as fault time in the stats
            self.stats.add_fault(b - a)
            return []
        ts, ys = t[a:b], y[a:b]
        low, high = self.band.low, self.band.high
        st = self.dwell
        out: list[Tagged] = []
        self.stats.add_samples(v[a:b])
        if self.rise_s == 0.0 and self.fall_s == 0.0:
            # The fast path: the block kernel, then interpolation at the sparse transitions.
            prev_t, prev_x = st.prev_t, st.prev_x
            tr, st.level = hysteresis(ys, low, high, st.level)
            st.prev_t, st.prev_x = float(ts[-1]), float(ys[-1])
            idx, lev = tr.index, tr.level
            if tr.initial:
                i0 = int(idx[0])
                out.append(self._state(a + i0, float(ts[i0]), int(lev[0]), float(ys[i0])))
                idx, lev = idx[1:], lev[1:]
            if idx.size:
                tc = crossing_times(ts, ys, idx, lev, low, high, prev_t, prev_x)
                out.extend(self._edges(idx + a, tc, ys[idx], lev))
            return out
        q = qualified_hysteresis(ts, ys, low, high, self.rise_s, self.fall_s, st)
        if q.initial is not None:
            i0, l0, t0, v0 = q.initial
            out.append(self._state(a + i0, t0, l0, v0))
        if q.emit.size:
            out.extend(self._edges(q.emit + a, q.t, q.value, q.level))
        return out

    def _state(self, i: int, t: float, level: int, value: float) -> Tagged:
        # Delay-compensated like the edges, so that an edge never precedes its state (an edge's
        # crossing lies after the first decisive sample); with a prefilter the state's time may
        # therefore lie up to the filter delay before the first sample.
        rec = records.state(self.name, t - self.delay_s, self.output_level(level), value)
        if self.measure is not None:
            self.measure.initial(rec["t"], rec["level"])
        return (i, RANK_STATE, rec)

    def _edges(
        self, emit: np.ndarray, tc: np.ndarray, value: np.ndarray, level: np.ndarray
    ) -> list[Tagged]:
        out: list[Tagged] = []
        tcs = (tc - self.delay_s).tolist()
        levs = [self.output_level(lv) for lv in level.tolist()]
        for i, tt, vv, lv in zip(emit.tolist(), tcs, value.tolist(), levs):
            self.seq += 1
            self.edges += 1
            out.append((i, RANK_EDGE, records.edge(self.name, tt, lv, vv, self.seq)))
        self.stats.add_edges(tcs, levs)
        if self.measure is not None:
            per_edge = self.measure.edges(tcs, levs)
            if per_edge:
                # a per-edge measure belongs to the rising edge that completed its period
                at = {t_: i for i, t_ in zip(emit.tolist(), tcs)}
                for m in per_edge:
                    out.append((at.get(m["t"], int(emit[-1])), RANK_EDGE_MEASURE, m))
        return out

    # -- state that outlives a run ------------------------------------------------------------
    def snapshot(self) -> dict[str, Any]:
        """What must survive a daemon restart: the edge numbering and the current level."""
        snap: dict[str, Any] = {"seq": self.seq, "level": self.dwell.level}
        if self.measure is not None:
            snap["measure"] = self.measure.snapshot()
        return snap

    def restore(self, state: dict[str, Any]) -> None:
        """Continue the numbering and the level of an earlier run (a restart)."""
        self.seq = int(state.get("seq", 0))
        level = int(state.get("level", -1))
        if level in (0, 1):
            self.dwell.level = level
        if self.measure is not None and "measure" in state:
            self.measure.restore(state["measure"])

    def adopt(self, old: "ChannelConditioner") -> None:
        """Take over a running channel's state on a config reload: numbering, level and last
        sample always; the filter's state when the filter is unchanged; the noise tracker when
        its window is unchanged; the band's current thresholds when the band is unchanged."""
        self.seq = old.seq
        self.edges = old.edges
        self.dwell = copy.copy(old.dwell)
        self.in_fault, self.fault_t0 = old.in_fault, old.fault_t0
        self.last_y = old.last_y
        if self.measure is not None and old.measure is not None:
            self.measure.restore(old.measure.snapshot())
        if old.cfg.filter == self.cfg.filter and old.period == self.period:
            self.filter = old.filter
        if old.cfg.band == self.cfg.band:
            self.band = old.band
            self.noise = old.noise
            self._pending_noise = old._pending_noise
        else:
            self.dwell.pend_class = -1  # a dwell candidate judged by the old band is void

    def copy(self) -> "ChannelConditioner":
        new = copy.copy(self)
        new.filter = self.filter.copy()
        new.band = self.band.copy()
        new.noise = self.noise.copy()
        new.stats = self.stats.copy()
        new.dwell = copy.copy(self.dwell)
        if self.measure is not None:
            new.measure = self.measure.copy()
        return new
