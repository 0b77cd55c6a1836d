"""What the live view knows, fed by records and health — pure, no I/O, no clock of its own.

Every feed (the daemon's MQTT topics, or the pipeline run on the port by ``watch --port``)
hands records to :meth:`WatchModel.on_record` and the health record to
:meth:`WatchModel.on_health`, each with ``now`` (host seconds) — so a test can drive it with
arrays and a made-up clock. :meth:`WatchModel.snapshot` turns it into the rows the views draw.
"""

from __future__ import annotations

import collections
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..config import AdaptiveBand, Config, FixedBand

#: Points kept per channel for the trace.
TRACE_POINTS: int = 600
#: Width of the trace, in characters.
TRACE_WIDTH: int = 24
#: "Edges in the last minute".
EDGE_WINDOW_S: float = 60.0
#: Eight heights of a one-line trace (U+2581 ... U+2588, Unicode block elements).
BLOCKS = "▁▂▃▄▅▆▇█"


@dataclass
class ChannelView:
    name: str
    unit: str
    value: float | None = None
    value_at: float | None = None  # host time the value was seen
    level: int | None = None
    band_low: float | None = None
    band_high: float | None = None
    band_kind: str = "fixed"
    sigma: float | None = None
    margin_sigma: float | None = None
    reliable: bool | None = None
    chattering_stats: bool = False
    edge_times: collections.deque = field(default_factory=lambda: collections.deque(maxlen=10_000))
    rising_times: collections.deque = field(default_factory=lambda: collections.deque(maxlen=10_000))
    trace: collections.deque = field(default_factory=lambda: collections.deque(maxlen=TRACE_POINTS))
    edges_total: int = 0
    fault: str | None = None


@dataclass
class Row:
    """One channel as the views draw it (text already decided, colours left to the view)."""

    name: str
    value: str
    band: str
    level: str
    sigma: str
    margin: str
    edges_minute: int
    age: str
    chatter: bool
    counting: bool  # a pulse-counting channel: the chatter criterion does not apply
    trace: str  # block characters
    zones: str  # one of "^", "-", "v", " " per trace character: above, inside, below the band
    fault: str | None = None


@dataclass
class Snapshot:
    title: str
    source: str
    broker: str
    spool: str
    rows: list[Row]
    notes: list[str]
    #: the value column's heading: over MQTT the value is the one the last edge (or the
    #: retained state) carried, not the latest sample
    value_label: str = "value"


def _num(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def fmt(x: float | None, digits: int = 4) -> str:
    if x is None or not math.isfinite(x):
        return "—"
    return f"{x:.{digits}g}"


def fmt_age(s: float | None) -> str:
    if s is None or not math.isfinite(s):
        return "—"
    if s < 10:
        return f"{s:.1f} s"
    if s < 120:
        return f"{s:.0f} s"
    if s < 7200:
        return f"{s / 60:.0f} min"
    return f"{s / 3600:.1f} h"


def sparkline(values: np.ndarray, low: float | None, high: float | None,
              width: int = TRACE_WIDTH) -> tuple[str, str]:
    """A one-line trace of ``values`` against the band: block heights over the range of the
    values and the band together, and per character whether it lies above, inside or below the
    band (``^``, ``-``, ``v``). The last ``width`` buckets of equal sample count, each drawn at
    its last value (what the comparator saw last)."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return " " * width, " " * width
    if v.size > width:
        idx = np.linspace(0, v.size, width + 1).astype(np.int64)[1:] - 1
        v = v[idx]
    lo_r = [float(v.min())] + ([low] if low is not None else [])
    hi_r = [float(v.max())] + ([high] if high is not None else [])
    ymin, ymax = min(lo_r), max(hi_r)
    span = ymax - ymin
    if span <= 0:
        h = np.full(v.size, 3, dtype=np.int64)
    else:
        h = np.clip(np.round((v - ymin) / span * 7.0).astype(np.int64), 0, 7)
    chars = "".join(BLOCKS[i] for i in h.tolist())
    if low is None or high is None:
        zones = " " * v.size
    else:
        zones = "".join("^" if x > high else ("v" if x < low else "-") for x in v.tolist())
    pad = width - v.size
    return " " * pad + chars, " " * pad + zones


class WatchModel:
    """The live state of one station, as far as the feeds tell it."""

    def __init__(self, cfg: Config, mode: str) -> None:
        self.cfg = cfg
        self.mode = mode  # "mqtt" or "port"
        self.channels: dict[str, ChannelView] = {}
        for ch in cfg.channel:
            cv = ChannelView(ch.name, ch.unit)
            if isinstance(ch.band, FixedBand):
                cv.band_low, cv.band_high = float(ch.band.low), float(ch.band.high)
            elif isinstance(ch.band, AdaptiveBand):
                cv.band_kind = "adaptive"
            self.channels[ch.name] = cv
        # channels whose edges are pulses to count (a flow meter, a shaft): many activations a
        # minute are their normal work, not chatter
        self._counting = {
            ch.name for ch in cfg.channel
            if ch.measure is not None and (ch.measure.pulses_per_unit is not None
                                           or ch.measure.pulses_per_rev is not None
                                           or ch.measure.frequency)
        }
        self.health: dict[str, Any] | None = None
        self.health_at: float | None = None
        self.status: str | None = None
        self.connected: bool | None = None  # the watch's own link to the broker
        self.link_error: str | None = None
        self.rows = 0
        self.bad_lines = 0
        self.rate_window: collections.deque = collections.deque(maxlen=4096)  # (now, rows)
        self.last_sample_at: float | None = None
        self.started_at: float | None = None
        self.notes: collections.deque = collections.deque(maxlen=3)

    # -- feeding ---------------------------------------------------------------------------------
    def on_record(self, rec: dict[str, Any], now: float) -> None:
        kind = rec.get("kind")
        cv = self.channels.get(str(rec.get("channel")))
        if kind == "edge" and cv is not None:
            cv.level = int(rec.get("level", 0))
            cv.edges_total += 1
            cv.edge_times.append(now)
            if cv.level == 1:  # an activation (the output level going high)
                cv.rising_times.append(now)
            v = _num(rec.get("value"))
            if v is not None:
                cv.value, cv.value_at = v, now
                if self.mode == "mqtt":
                    cv.trace.append(v)
        elif kind == "state" and cv is not None:
            lv = rec.get("level")
            cv.level = None if lv is None else int(lv)
            v = _num(rec.get("value"))
            if v is not None and cv.value is None:
                cv.value, cv.value_at = v, now
        elif kind == "stats" and cv is not None:
            lo, hi = _num(rec.get("band_low")), _num(rec.get("band_high"))
            if lo is not None and hi is not None:
                cv.band_low, cv.band_high = lo, hi
            cv.sigma = _num(rec.get("noise_sigma"))
            cv.margin_sigma = _num(rec.get("margin_sigma"))
            rel = rec.get("reliable")
            cv.reliable = None if rel is None else bool(rel)
            cv.chattering_stats = bool(rec.get("chattering"))
        elif kind == "fault":
            if cv is not None:  # the fault's start names it; its end clears it
                ended = rec.get("state") == "end"
                cv.fault = None if ended else str(rec.get("reason") or "fault")
            else:
                self.notes.append(f"source fault: {rec.get('reason')} {rec.get('detail') or ''}".strip())
        elif kind == "gap":
            self.notes.append(
                f"gap of {fmt(_num(rec.get('duration_s')), 3)} s ({rec.get('reason')})"
            )

    def on_health(self, doc: dict[str, Any], now: float) -> None:
        self.health, self.health_at = doc, now

    def on_status(self, text: str, now: float) -> None:
        self.status = text

    def on_rows(self, n: int, bad: int, now: float) -> None:
        """Port mode: ``n`` rows and ``bad`` bad lines parsed at ``now``."""
        self.rows += n
        self.bad_lines += bad
        if n:
            self.last_sample_at = now
            self.rate_window.append((now, n))

    def on_values(self, name: str, values: np.ndarray, now: float) -> None:
        """Port mode: the newest scaled values of a channel."""
        cv = self.channels.get(name)
        if cv is None or values.size == 0:
            return
        cv.value, cv.value_at = float(values[-1]), now
        cv.trace.extend(values[-TRACE_POINTS:].tolist())

    # -- reading ---------------------------------------------------------------------------------
    def _rate(self, now: float) -> float | None:
        while self.rate_window and now - self.rate_window[0][0] > 5.0:
            self.rate_window.popleft()
        if len(self.rate_window) < 2:
            return None
        span = now - self.rate_window[0][0]
        return sum(n for _, n in self.rate_window) / span if span > 0 else None

    def _chatter(self, cv: ChannelView, now: float) -> bool:
        """The stats record's flag, or, between two stats records, the same criterion on the
        edges seen here ([stats] chatter_count activations within chatter_window_s; three in a
        minute is the alarm-management practice of ISA-18.2, from memory). Not for a channel
        that counts pulses (a ``measure`` with a frequency, pulses per unit or per revolution):
        its activations are its work."""
        if cv.name in self._counting:
            return False
        if cv.chattering_stats:
            return True
        st = self.cfg.stats
        recent = sum(1 for t in cv.rising_times if now - t <= st.chatter_window_s)
        return recent >= st.chatter_count

    def snapshot(self, now: float) -> Snapshot:
        rows = []
        for cv in self.channels.values():
            u = f" {cv.unit}" if cv.unit else ""
            if cv.band_low is not None and cv.band_high is not None:
                band = f"{fmt(cv.band_low)} – {fmt(cv.band_high)}"
            else:
                band = "adaptive (warming up)" if cv.band_kind == "adaptive" else "—"
            values = np.fromiter(cv.trace, dtype=np.float64, count=len(cv.trace))
            trace, zones = sparkline(values, cv.band_low, cv.band_high)
            margin = fmt(cv.margin_sigma, 3) if cv.margin_sigma is not None else "—"
            if cv.reliable is False:
                margin += " (σ̂ unreliable)"
            rows.append(Row(
                name=cv.name,
                value=(fmt(cv.value) + u) if cv.value is not None else "—",
                band=band,
                level={None: "?", 0: "low", 1: "HIGH"}.get(cv.level, str(cv.level)),
                sigma=fmt(cv.sigma, 3),
                margin=margin,
                edges_minute=sum(1 for t in cv.edge_times if now - t <= EDGE_WINDOW_S),
                age=fmt_age(None if cv.value_at is None else now - cv.value_at),
                chatter=self._chatter(cv, now),
                counting=cv.name in self._counting,
                trace=trace,
                zones=zones,
                fault=cv.fault,
            ))
        title = f"streamcond watch — station {self.cfg.station.name}"
        if self.mode == "port":
            rate = self._rate(now)
            age = None if self.last_sample_at is None else now - self.last_sample_at
            source = (
                f"{self.cfg.source.port}: {fmt(rate, 4) if rate is not None else '—'} rows/s, "
                f"{self.rows:,} rows, {self.bad_lines:,} bad lines, last sample "
                f"{fmt_age(age)} ago"
            )
            broker = "not used (watch --port runs the pipeline here; no daemon publishes)"
            spool = "—"
        else:
            source, broker, spool = self._from_health(now)
        label = "value" if self.mode == "port" else "edge value"
        return Snapshot(title, source, broker, spool, rows, list(self.notes), label)

    def _from_health(self, now: float) -> tuple[str, str, str]:
        mq = self.cfg.output.mqtt
        where = f"{mq.host}:{mq.port}" if mq is not None else "?"
        if self.connected is False:
            link = f"watch cannot reach the broker {where}: {self.link_error or 'not connected'}"
        elif self.connected:
            link = f"watch connected to {where}"
        else:
            link = f"connecting to {where} …"
        status = {"online": "daemon online", "offline": "daemon OFFLINE"}.get(
            self.status or "", "daemon status unknown"
        )
        h = self.health
        if h is None:
            return ("no health record yet (the daemon publishes one every "
                    "[output.mqtt] health_interval_s)", f"{link}; {status}", "—")
        seen = 0.0 if self.health_at is None else max(0.0, now - self.health_at)
        age = _num(h.get("last_sample_age_s"))
        source = (
            f"{fmt(_num(h.get('rows_per_s')), 4)} rows/s, {int(h.get('rows') or 0):,} rows, "
            f"{int(h.get('bad_lines') or 0):,} bad lines, {int(h.get('long_lines') or 0):,} "
            f"over-long; last sample {fmt_age(None if age is None else age + seen)} ago"
        )
        bc = h.get("broker_connected")
        daemon_link = {True: "daemon connected", False: "daemon DISCONNECTED"}.get(bc, "daemon link ?")
        broker = (
            f"{link}; {status}, {daemon_link}, {int(h.get('reconnects') or 0)} reconnects; "
            f"uptime {fmt_age(_num(h.get('uptime_s')))}; health {fmt_age(seen)} old"
        )
        oldest = _num(h.get("spool_oldest_age_s"))
        spool = (
            f"{int(h.get('spool_depth') or 0):,} queued"
            + (f", oldest {fmt_age(oldest)}" if oldest else "")
            + f", {int(h.get('dropped') or 0):,} dropped"
        )
        extra = []
        if _num(h.get("cpu_percent")) is not None:
            extra.append(f"CPU {fmt(_num(h.get('cpu_percent')), 3)} %")
        if _num(h.get("rss_mib")) is not None:
            extra.append(f"RSS {fmt(_num(h.get('rss_mib')), 3)} MiB")
        if extra:
            source += "; daemon " + ", ".join(extra)
        return source, broker, spool
