"""What a channel's edges mean: frequency (a speed, a flow rate), duty cycle, pulse counts.

The measure stage sits after the comparator and sees only the *edges* of the output level
(sparse: plain Python over edges is fine, there is no per-sample work here). It is pure and
stateful like every core stage: :meth:`MeasureTracker.edges` takes edges in time order,
:meth:`MeasureTracker.close` ends a stats window of sample time and returns its ``measure``
record. Nothing depends on how the edges were batched across ``edges()`` calls: every edge is
folded into the same accumulators in the same order, so the records depend only on the edge
sequence and on where the windows are closed (DESIGN.md "Chunk invariance is a law").

Which window an edge belongs to
    An edge counts in the window in which it is *reported*: the edges passed to ``edges()``
    since the previous ``close()``. This is the rule of the ``stats`` record's ``edges`` count
    too, so the two agree. With dwell an edge is reported once confirmed but carries its
    crossing instant, which may lie before the window's start; for the duty such an edge is
    taken at the window's start (the previous window is already published and is not revised).
    Periods and pulse widths always use the true (unclamped) edge times.

Frequency (``frequency_hz``, ``period_s``, ``periods``, ``rate``, ``rate_unit``, ``stale``)
    A period is the time between successive rising edges. The window's frequency is the number
    of periods completed in it divided by their total duration; the first one is measured
    against the last rising edge before the window, so with sub-sample edge times the mean is
    precise to a small fraction of a sample over the whole window (the reciprocal, period-timing
    counter: an error of δ in the two end instants gives a relative error of about δ/duration).

    Staleness: a stopped shaft is 0 rpm, not its last speed. When no rising edge has come for
    longer than ``stale_s`` before the window's end (``t_end − t_last_rise > stale_s``), the
    window reports ``frequency_hz = 0``, ``rate = 0`` and ``stale = true``, even if periods
    completed earlier in the same window (their ``period_s`` statistics are still given). A
    time between rising edges longer than ``stale_s`` is therefore not a period either: the
    signal was stale in between, and the rising edge after it starts a new pulse train. The
    slowest measurable frequency is thus 1/``stale_s``.

    Between those: a window that holds one slow period (or several) and whose last rising edge
    is at most ``stale_s`` before its end reports that period's frequency. A window that
    completes no period and is not stale (pulses slower than the window is long) reports
    1/max(last period, t_end − t_last_rise): the latest period, lowered to what the time
    already waited for the next edge allows (the next period is at least that long), with
    ``periods = 0``; ``null`` when no period of the current train is known yet.

    ``rate``: with ``pulses_per_rev`` the speed in rev per ``rate_per`` (rpm =
    60·f/pulses_per_rev for "min"); with ``pulses_per_unit`` (a K-factor) f/K in
    ``quantity_unit`` per ``rate_per`` (e.g. L/min); with neither the frequency itself in Hz.

Duty (``duty``, ``high_s``)
    duty = (time at output level 1 in the window − fault time at level 1) / (window length −
    ``fault_s``), from the edge times and the level carried into the window; ``null`` while the
    level at the window's start is not known (the first window of a fresh channel). The fault
    time at level 1 is ``fault_high_s`` when the caller knows it; otherwise the fault time is
    taken to split between the levels as the rest of the window does (which is exact when the
    window holds no edge: the comparator holds its level through a fault). ``high_s`` gives
    {min, mean, max} of the complete high pulses (rising → falling) that ended in the window.

Count (``count``, ``total``, ``total_units``, ``quantity_unit``)
    ``count`` = rising edges reported in the window; ``total`` = rising edges over the life of
    the state (the totalizer: an integer, never goes backwards, survives restarts through
    :meth:`snapshot`/:meth:`restore`); with ``pulses_per_unit``, ``total_units`` = total / K,
    divided on output from the exact integer count (one rounding, no accumulated error).

A window whose edges are interrupted by a restart loses its partial counts (as the ``stats``
record does); the totalizer does not, because it is counted when an edge is reported.
"""

from __future__ import annotations

import copy
import math
from typing import Any, Iterable

from .. import records
from ..config import RATE_PER_S, Measure

MEASURE = records.MEASURE

_REV_UNIT = {"s": "rev/s", "min": "rpm", "h": "rev/h"}


def _opt(x: float) -> float | None:
    """A float for a record or a snapshot; ``None`` (JSON null) when not known."""
    return x if math.isfinite(x) else None


def _num(x: Any) -> float:
    return math.nan if x is None else float(x)


class _Spread:
    """Running min / mean / max of durations, folded in edge order (bit-reproducible)."""

    __slots__ = ("n", "total", "lo", "hi")

    def __init__(self) -> None:
        self.n = 0
        self.total = 0.0
        self.lo = math.inf
        self.hi = -math.inf

    def add(self, d: float) -> None:
        self.n += 1
        self.total += d
        if d < self.lo:
            self.lo = d
        if d > self.hi:
            self.hi = d

    def record(self) -> dict[str, float] | None:
        if self.n == 0:
            return None
        return {"min": self.lo, "mean": self.total / self.n, "max": self.hi}


class MeasureTracker:
    """Frequency, duty and counts of one channel's output edges, per stats window."""

    def __init__(self, channel: str, spec: Measure) -> None:
        self.channel = channel
        self.spec = spec
        self.stale_s = float(spec.stale_s)
        per = RATE_PER_S[spec.rate_per]
        # rate = frequency · rate_scale
        if spec.pulses_per_rev is not None:
            self.rate_scale = per / float(spec.pulses_per_rev)
            self.rate_unit = _REV_UNIT[spec.rate_per]
        elif spec.pulses_per_unit is not None:
            self.rate_scale = per / float(spec.pulses_per_unit)
            self.rate_unit = f"{spec.quantity_unit or 'unit'}/{spec.rate_per}"
        else:
            self.rate_scale = 1.0
            self.rate_unit = "Hz"
        # -- state over the life of the channel --
        self.total = 0  # rising edges ever reported (the totalizer)
        self.level = -1  # output level after the last edge (or as told by close)
        self.carry = -1  # level at the start of the current window
        self.last_rise = math.nan  # time of the latest rising edge of the current train
        self.last_period = math.nan  # latest period of the current train
        self.high_since = math.nan  # rising edge of the high pulse in progress
        self.since = math.nan  # start of observation: staleness reference before any rise
        self.last_edge = math.nan  # time of the latest edge (detects a time base that restarted)
        self.closed = False  # a window has been closed in this run
        self.known_from = -math.inf  # sample time from which the level is known (initial())
        self.known_from = -math.inf  # sample time from which the level is known (initial())
        # -- the current window --
        self._reset_window()

    def _reset_window(self) -> None:
        self.win_edges: list[tuple[float, int]] = []  # (t, level) for the duty
        self.count = 0
        self.periods = _Spread()
        self.highs = _Spread()

    def _restart_timing(self, t: float) -> None:
        """Sample time went backwards (a device counter restarted between runs): periods and
        pulse widths across that point mean nothing; start a new train at ``t``."""
        self.last_rise = math.nan
        self.last_period = math.nan
        self.high_since = math.nan
        self.last_edge = math.nan
        self.since = t

    def _rate(self, f: float | None) -> float | None:
        return None if f is None else f * self.rate_scale


    def initial(self, t: float, level: int) -> None:
        """The channel's first level (its ``state`` record) at sample time ``t``: the duty of
        the window it falls in is taken over the part from ``t`` on, where the level is known."""
        if level in (0, 1) and self.level not in (0, 1):
            self.level = self.carry = int(level)
            self.known_from = float(t)

    # -- the stream ----------------------------------------------------------------------------
    def edges(self, times: Iterable[float], levels: Iterable[int]) -> list[dict[str, Any]]:
        """Edges of the output level in time order (``level`` = the new level, 0 or 1).

        Updates the accumulators; when ``spec.per_edge``, returns one ``measure`` record per
        rising edge that completes a period (``t``, ``period_s``, ``frequency_hz``, ``rate``,
        ``rate_unit``).
        """
        if hasattr(times, "tolist"):
            times = times.tolist()  # type: ignore[union-attr]
        if hasattr(levels, "tolist"):
            levels = levels.tolist()  # type: ignore[union-attr]
        out: list[dict[str, Any]] = []
        per_edge = self.spec.per_edge
        keep = self.spec.duty
        stale = self.stale_s
        for t, lv in zip(times, levels):
            t = float(t)
            lv = 1 if lv else 0
            if t < self.last_edge:
                self._restart_timing(t)
            self.last_edge = t
            if not self.since <= t:  # first edge ever (nan) or before the observation start
                self.since = t
            if keep:
                self.win_edges.append((t, lv))
            if lv == 1:
                self.total += 1
                self.count += 1
                p = t - self.last_rise  # nan without a previous rising edge
                if 0.0 < p <= stale:
                    self.periods.add(p)
                    self.last_period = p
                    if per_edge:
                        f = 1.0 / p
                        out.append(
                            records.measure(
                                self.channel,
                                t,
                                period_s=p,
                                frequency_hz=f,
                                rate=f * self.rate_scale,
                                rate_unit=self.rate_unit,
                            )
                        )
                elif not p <= 0.0:
                    # no previous rise, or stale in between: a new pulse train starts here
                    self.last_period = math.nan
                self.last_rise = t
                self.high_since = t
            else:
                d = t - self.high_since
                if d >= 0.0:
                    self.highs.add(d)
                self.high_since = math.nan
            self.level = lv
        return out

    def close(
        self,
        t_start: float,
        t_end: float,
        level: int,
        fault_s: float = 0.0,
        fault_high_s: float | None = None,
    ) -> dict[str, Any] | None:
        """End of the stats window [t_start, t_end) of sample time; returns its record.

        ``level`` is the output level at ``t_end`` (−1 if not known yet); ``fault_s`` the time
        of the window spent in sensor fault, excluded from the duty (``fault_high_s``, optional,
        the part of it during which the held output level was 1). ``None`` when the spec
        enables none of frequency, duty and count.
        """
        spec = self.spec
        t_start, t_end = float(t_start), float(t_end)
        if not self.closed:
            self.closed = True
            if not self.since <= t_start:
                self.since = t_start
        ref = self.last_rise if math.isfinite(self.last_rise) else self.since
        if t_end < ref:
            self._restart_timing(t_start)
            ref = t_start
        rec: dict[str, Any] | None = None
        if spec.frequency or spec.duty or spec.count:
            rec = records.measure(self.channel, t_start, t_end=t_end)
        if rec is not None and spec.frequency:
            stale = (t_end - ref) > self.stale_s
            n = self.periods.n
            f: float | None
            if stale:
                f = 0.0
            elif n:
                f = n / self.periods.total
            elif math.isfinite(self.last_period):
                f = 1.0 / max(self.last_period, t_end - self.last_rise)
            else:
                f = None
            rec["frequency_hz"] = f
            rec["period_s"] = self.periods.record()
            rec["periods"] = n
            rec["rate"] = self._rate(f)
            rec["rate_unit"] = self.rate_unit
            rec["stale"] = stale
        if rec is not None and spec.duty:
            rec["duty"] = self._duty(t_start, t_end, fault_s, fault_high_s)
            rec["high_s"] = self.highs.record()
        if rec is not None and spec.count:
            rec["count"] = self.count
            rec["total"] = self.total
            if spec.pulses_per_unit is not None:
                rec["total_units"] = self.total / spec.pulses_per_unit
                rec["quantity_unit"] = spec.quantity_unit
        # the level carried into the next window: the channel's word when it has one
        if level in (0, 1):
            self.level = int(level)
        self.carry = self.level
        self._reset_window()
        return rec

    def _duty(
        self, t_start: float, t_end: float, fault_s: float, fault_high_s: float | None
    ) -> float | None:
        if self.known_from > t_start:
            t_start = min(self.known_from, t_end)  # the level was not known before
        if self.known_from > t_start:
            t_start = min(self.known_from, t_end)  # the level was not known before
        length = t_end - t_start
        fault = min(max(float(fault_s), 0.0), length) if math.isfinite(fault_s) else 0.0
        good = length - fault
        lev = self.carry
        if lev not in (0, 1) or not good > 0.0:
            return None
        high = 0.0
        prev = t_start
        for t, lv in self.win_edges:
            # an edge reported late (dwell) is taken at the window's start; times stay monotone
            tau = t_end if t > t_end else (prev if t < prev else t)
            if lev == 1:
                high += tau - prev
            prev, lev = tau, lv
        if lev == 1:
            high += t_end - prev
        if fault_high_s is not None and math.isfinite(fault_high_s):
            f_high = min(max(float(fault_high_s), 0.0), fault, high)
        else:
            f_high = fault * high / length  # the fault splits like the rest of the window
        d = (high - f_high) / good
        return min(max(d, 0.0), 1.0)

    # -- state that outlives a run -------------------------------------------------------------
    def snapshot(self) -> dict[str, Any]:
        """What must survive a daemon restart (JSON-safe): the totalizer, the level, and the
        timing of the current pulse train (so a stream split across a restart measures its
        first period across the split). The partial window's counts are not kept."""
        return {
            "total": self.total,
            "level": self.level,
            "last_rise_t": _opt(self.last_rise),
            "last_period_s": _opt(self.last_period),
            "high_since_t": _opt(self.high_since),
            "since_t": _opt(self.since),
            "last_edge_t": _opt(self.last_edge),
        }

    def restore(self, state: dict[str, Any]) -> None:
        """Continue from :meth:`snapshot` of an earlier run (meant for a fresh tracker). A
        time base that restarted in between is detected at the first edge or window that lies
        before the saved times, and the pulse-train timing is then started afresh."""
        total = int(state.get("total", 0))
        if total < 0:
            raise ValueError("a measure snapshot's total must not be negative")
        self.total = total
        level = int(state.get("level", -1))
        self.level = level if level in (0, 1) else -1
        self.carry = self.level
        self.last_rise = _num(state.get("last_rise_t"))
        self.last_period = _num(state.get("last_period_s"))
        self.high_since = _num(state.get("high_since_t"))
        self.since = _num(state.get("since_t"))
        self.last_edge = _num(state.get("last_edge_t"))
        self.closed = math.isfinite(self.since)

    def copy(self) -> "MeasureTracker":
        new = copy.copy(self)
        new.win_edges = list(self.win_edges)
        new.periods = copy.copy(self.periods)
        new.highs = copy.copy(self.highs)
        return new
