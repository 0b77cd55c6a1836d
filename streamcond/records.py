"""Record construction and serialisation (DESIGN.md "Records").

A record is a plain ``dict`` whose first keys are ``kind``, ``channel`` (except source-wide
records) and ``t`` (sample time, seconds). Every record of every kind is built by a constructor
of this module, so that the two rules below live in one place:

* **Rounding** (:func:`rounded`, applied by :func:`to_json`, hence identically to the JSON-lines
  files of replay and daemon and to the MQTT payloads): times (``t``, ``t_end`` and every field
  ending in ``_s``) to the nanosecond, other floats to :data:`SIGNIFICANT` significant digits.
  ``148.89600000000002`` is written ``148.896``; the in-memory records keep full precision.
* **Wall-clock time** (:func:`utc`): a ``utc`` field, ISO 8601 in UTC with microseconds, is added
  where the wall-clock time of ``t`` is known — live from the host receive time, in a replay of a
  capture from the recorded host time (:meth:`streamcond.core.pipeline.Pipeline.process`).
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timezone
from typing import Any

EDGE = "edge"
STATE = "state"
STATS = "stats"
GAP = "gap"
FAULT = "fault"
SUMMARY = "summary"
HEALTH = "health"
MEASURE = "measure"
INTERRUPTED = "interrupted"

#: Times are rounded to this many decimals of a second: one nanosecond, finer than any sample
#: clock this tool meets (a 1 MHz ADC has 1000 ns between samples).
TIME_DECIMALS = 9
#: Significant digits of the other numbers. A double carries 15–17; 10 keep every digit a
#: 24-bit ADC (about 7 decimal digits) can deliver, with room for gain/offset arithmetic, and
#: drop the binary-fraction noise (0.011000000000000008 → 0.011). Common practice, no
#: published source.
SIGNIFICANT = 10


#: printf's %g to SIGNIFICANT digits (a constant format: a nested f-string spec is rebuilt on
#: every call, a third of the rounding's cost).
_SIG_FORMAT = f"%.{SIGNIFICANT}g"

_TIME_KEYS: dict[str, bool] = {}


def _is_time_key(key: str) -> bool:
    hit = _TIME_KEYS.get(key)
    if hit is None:
        hit = _TIME_KEYS[key] = key in ("t", "t_end") or key.endswith("_s")
    return hit


def _round_value(v: float, is_time: bool) -> float | None:
    if v - v != 0.0:
        return None  # NaN or ±inf: JSON has none; a value that is not known is null
    if is_time:
        return round(v, TIME_DECIMALS)
    if v == 0.0:
        return 0.0
    r = float(_SIG_FORMAT % v)
    return r if r - r == 0.0 else v  # within 1e-10 of the largest double, rounding overflows


def _walk(v: Any, is_time: bool) -> Any:
    if isinstance(v, float):
        return _round_value(v, is_time)
    if isinstance(v, dict):
        return {k: _walk(x, is_time or (isinstance(k, str) and _is_time_key(k))) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_walk(x, is_time) for x in v]
    return v


def rounded(record: dict[str, Any]) -> dict[str, Any]:
    """A copy of ``record`` with its numbers rounded to what they mean (see the module doc):
    times to the nanosecond, other floats to :data:`SIGNIFICANT` digits, NaN/inf to null."""
    out: dict[str, Any] = {}
    for k, v in record.items():
        tv = type(v)
        if tv is float:
            out[k] = _round_value(v, _is_time_key(k))
        elif tv is int or tv is str or tv is bool or v is None:
            out[k] = v  # the common case, no walk
        else:
            out[k] = _walk(v, _is_time_key(k))
    return out


def to_json(record: dict[str, Any]) -> str:
    """One record as a compact JSON line (no trailing newline), numbers rounded.

    The same text as ``json.dumps(rounded(record), separators=(",", ":"), allow_nan=False)``
    (ASCII only, ``ensure_ascii``), written directly for the flat fields that make up nearly
    every record: a replay writes thousands of edges a second, and the general encoder
    (rounding walk, then ``json.dumps``) cost about 1.5 times as much per record (measured
    17 µs against 10-12 µs, a replay's records). Nested values (lists, dicts) still go through
    the walk and the encoder; the tests compare the text with the encoder's.
    """
    parts = []
    for k, v in record.items():
        key = _JSON_KEYS.get(k)
        if key is None:
            key = _JSON_KEYS[k] = (_dumps(k) + ":", _is_time_key(k))
        tv = type(v)
        if tv is float:
            r = _round_value(v, key[1])
            parts.append(key[0] + ("null" if r is None else float.__repr__(r)))
        elif tv is str:
            text = _JSON_STRINGS.get(v)
            if text is None:
                text = _dumps(v)
                if len(_JSON_STRINGS) < _JSON_STRINGS_MAX:
                    _JSON_STRINGS[v] = text
            parts.append(key[0] + text)
        elif tv is int:
            parts.append(key[0] + int.__repr__(v))
        elif tv is bool:
            parts.append(key[0] + ("true" if v else "false"))
        elif v is None:
            parts.append(key[0] + "null")
        else:
            parts.append(key[0] + _dumps(_walk(v, key[1])))
    return "{" + ",".join(parts) + "}"


def _dumps(v: Any) -> str:
    return json.dumps(v, separators=(",", ":"), allow_nan=False)


#: JSON text of the keys met so far (with the colon) and whether each is a time key.
_JSON_KEYS: dict[str, tuple[str, bool]] = {}
#: JSON text of string values met so far (channel names, edge directions, reasons), bounded
#: so that free-text values cannot grow it without limit.
_JSON_STRINGS: dict[str, str] = {}
_JSON_STRINGS_MAX = 4096


def utc(epoch_s: float) -> str | None:
    """ISO 8601 in UTC with microseconds (``2026-12-02T05:43:27.123456Z``) of a host epoch time."""
    if not math.isfinite(epoch_s):
        return None
    try:
        d = datetime.fromtimestamp(epoch_s, timezone.utc)
    except (OverflowError, OSError, ValueError):
        return None
    return d.isoformat(timespec="microseconds").replace("+00:00", "Z")


def with_utc(record: dict[str, Any], epoch_s: float) -> dict[str, Any]:
    """Add the ``utc`` stamp of wall-clock time ``epoch_s`` to a record (in place)."""
    u = utc(epoch_s)
    if u is not None:
        record["utc"] = u
    return record


# -- constructors, one per kind ------------------------------------------------------------------


def edge(channel: str, t: float, level: int, value: float, seq: int) -> dict[str, Any]:
    return {
        "kind": EDGE,
        "channel": channel,
        "t": t,
        "edge": "rising" if level else "falling",
        "level": level,
        "value": value,
        "seq": seq,
    }


def state(channel: str, t: float, level: int, value: float) -> dict[str, Any]:
    return {"kind": STATE, "channel": channel, "t": t, "level": level, "value": value}


def state_after(edge_record: dict[str, Any]) -> dict[str, Any]:
    """The state an edge leaves behind (the retained MQTT state): its channel, ``t``, level and,
    when the edge has them, ``value``, ``seq`` and ``utc``."""
    rec = {"kind": STATE, "channel": edge_record.get("channel"), "t": edge_record.get("t"),
           "level": edge_record.get("level")}
    for k in ("value", "seq", "utc"):
        if k in edge_record:
            rec[k] = edge_record[k]
    return rec


def gap(t: float, t_end: float, reason: str, dropped: int = 0) -> dict[str, Any]:
    """Missing or out-of-order samples between ``t`` and ``t_end`` (source-wide)."""
    return {
        "kind": GAP,
        "t": t,
        "t_end": t_end,
        "duration_s": t_end - t,
        "reason": reason,
        "dropped": dropped,
    }


def fault_start(channel: str, t: float, value: float, reason: str) -> dict[str, Any]:
    """A channel's raw value entered its fault limits (a sensor fault, not a level)."""
    return {"kind": FAULT, "channel": channel, "t": t, "state": "start", "value": value,
            "reason": reason}


def fault_end(channel: str, t: float, value: float, duration_s: float) -> dict[str, Any]:
    return {"kind": FAULT, "channel": channel, "t": t, "state": "end", "value": value,
            "duration_s": duration_s}


def health(**fields: Any) -> dict[str, Any]:
    """The daemon's health record (``<prefix>/health``; fields in :mod:`streamcond.health`)."""
    return {"kind": HEALTH, **fields}


def device_lost(t: float | None, detail: str, port: str | None, host_t: float) -> dict[str, Any]:
    """The serial device vanished (source-wide). ``t`` is *sample* time — the stream's own time
    base, like every other record — or ``None`` before any sample was seen; the host clock's
    reading goes into ``utc``."""
    return with_utc({"kind": FAULT, "t": t, "reason": "device_lost", "detail": detail,
                     "port": port}, host_t)


def stats(channel: str, t: float, t_end: float, **fields: Any) -> dict[str, Any]:
    """A channel's chatter statistics over the sample-time window [t, t_end) (core/stats.py
    names and explains the fields)."""
    return {"kind": STATS, "channel": channel, "t": t, "t_end": t_end, **fields}


def measure(channel: str, t: float, **fields: Any) -> dict[str, Any]:
    """What a channel's edges mean over a window, or at one rising edge (core/measures.py)."""
    return {"kind": MEASURE, "channel": channel, "t": t, **fields}


def summary(t: float, **fields: Any) -> dict[str, Any]:
    """The last record of a replay (source-wide)."""
    return {"kind": SUMMARY, "t": t, **fields}


def interrupted(t: float, reason: str = "SIGINT") -> dict[str, Any]:
    """A replay was stopped before the end of its recording; ``t`` = the last sample time done."""
    return {"kind": INTERRUPTED, "t": t, "reason": reason}
