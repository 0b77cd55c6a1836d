"""Health for operations: the retained ``<prefix>/health`` record and the watchdog's progress test.

The health record (DESIGN.md "MQTT topics"; the live view reads exactly these fields):

=======================  =================================================================
``kind``                 ``"health"``
``t``                    sample time of the latest conditioned sample (null before one)
``uptime_s``             seconds since the daemon started
``rows``                 rows (samples) read since the start
``rows_per_s``           rows per second over the last health interval
``bad_lines``            lines that did not parse, since the start
``long_lines``           lines dropped as longer than ``source.max_line_bytes``
``edges``                ``{channel: edges since the start}``
``spool_depth``          records stored and not yet acknowledged by the broker
``spool_oldest_age_s``   age of the oldest of them, in seconds of sample time (null: none)
``dropped``              records the spool dropped by its overflow policy (life of the file)
``reconnects``           MQTT connections made after the first
``broker_connected``     whether the publisher is connected right now
``last_sample_age_s``    seconds since the latest row arrived (host clock; null before one)
``cpu_percent``          the daemon's CPU over the last interval, percent of one core
``rss_mib``              the daemon's resident memory now, MiB
=======================  =================================================================
"""

from __future__ import annotations

import math
import os
import resource
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

from . import records

HEALTH = records.HEALTH
#: A part of the pipeline that has not moved for this long is stalled: the watchdog is then no
#: longer fed, so systemd restarts the service (sd_notify(3), ``WatchdogSec=``). The serial
#: reader turns at least every read timeout (1 s in the daemon) or reconnect attempt (at most 2 s apart),
#: and a spool commit takes milliseconds (tens on an SD card); 5 s is far beyond both.
STALL_S = 5.0


@dataclass
class Snapshot:
    """The counters one health record or metrics scrape is made from."""

    t: float | None
    uptime_s: float
    rows: int
    bad_lines: int
    long_lines: int
    edges: Mapping[str, int]
    spool_depth: int
    spool_oldest_age_s: float | None
    dropped: int
    reconnects: int
    broker_connected: bool
    last_sample_age_s: float | None
    cpu_s: float
    rss_bytes: int


def process_cpu_s() -> float:
    """CPU seconds (user + system) of this process so far."""
    t = os.times()
    return t.user + t.system


def process_rss_bytes() -> int:
    """Resident memory of this process now (``/proc/self/statm``; the peak where that is
    missing)."""
    try:
        with open("/proc/self/statm", "rb") as f:
            return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux: KiB


def _finite(x: float | None, digits: int = 3) -> float | None:
    if x is None or not math.isfinite(x):
        return None
    return round(float(x), digits)


class HealthRecorder:
    """Turns successive :class:`Snapshot` s into health records (rates over the interval)."""

    def __init__(self) -> None:
        self._prev: Snapshot | None = None

    def record(self, s: Snapshot) -> dict[str, Any]:
        p = self._prev
        self._prev = s
        dt = s.uptime_s - p.uptime_s if p is not None else s.uptime_s
        rows_per_s = (s.rows - (p.rows if p else 0)) / dt if dt > 0 else 0.0
        cpu = (s.cpu_s - (p.cpu_s if p else 0.0)) / dt * 100.0 if (dt > 0 and p is not None) else (
            s.cpu_s / s.uptime_s * 100.0 if s.uptime_s > 0 else 0.0
        )
        return records.health(
            t=_finite(s.t, 9),
            uptime_s=round(s.uptime_s, 3),
            rows=s.rows,
            rows_per_s=round(rows_per_s, 3),
            bad_lines=s.bad_lines,
            long_lines=s.long_lines,
            edges=dict(s.edges),
            spool_depth=s.spool_depth,
            spool_oldest_age_s=_finite(s.spool_oldest_age_s),
            dropped=s.dropped,
            reconnects=s.reconnects,
            broker_connected=bool(s.broker_connected),
            last_sample_age_s=_finite(s.last_sample_age_s),
            cpu_percent=round(cpu, 2),
            rss_mib=round(s.rss_bytes / 2**20, 1),
        )


def oldest_age_s(oldest_payload: bytes | None, t_now: float | None) -> float | None:
    """Age of the oldest spooled record in sample seconds: ``t_now`` (the stream's present, in
    sample time) minus the record's ``t``; None when unknown or the spool is empty."""
    if oldest_payload is None or t_now is None or not math.isfinite(t_now):
        return None
    import json

    try:
        t = json.loads(oldest_payload).get("t")
    except (ValueError, AttributeError):
        return None
    if not isinstance(t, (int, float)) or not math.isfinite(t):
        return None
    return max(0.0, t_now - float(t))


class ProgressWatch:
    """Is the pipeline making progress? Each probe returns how long (seconds) its part has been
    stuck; the watchdog is fed only while every probe is under ``stall_s``."""

    def __init__(self, probes: Mapping[str, Callable[[float], float]], stall_s: float = STALL_S,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.probes = dict(probes)
        self.stall_s = float(stall_s)
        self.clock = clock

    def stalled(self) -> list[str]:
        """Names of the parts stuck for ``stall_s`` or more (empty: progress)."""
        now = self.clock()
        return [name for name, p in self.probes.items() if p(now) >= self.stall_s]
