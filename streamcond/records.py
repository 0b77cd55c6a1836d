"""Record construction and serialisation (DESIGN.md "Records").

A record is a plain ``dict`` whose first keys are ``kind``, ``channel`` (except source-wide
records) and ``t`` (sample time, seconds). Serialised as one JSON object per line; floats are
written with Python's shortest round-trip repr, so equal records give equal bytes.
"""

from __future__ import annotations

import json
import math
from typing import Any

EDGE = "edge"
STATE = "state"
STATS = "stats"
GAP = "gap"
FAULT = "fault"
SUMMARY = "summary"


def _clean(v: Any) -> Any:
    # JSON has no NaN/Infinity: a value that is not known is null.
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, dict):
        return {k: _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    return v


def to_json(record: dict[str, Any]) -> str:
    """One record as a compact JSON line (no trailing newline)."""
    try:
        return json.dumps(record, separators=(",", ":"), allow_nan=False)
    except ValueError:  # a NaN or infinity somewhere: those are null
        return json.dumps(_clean(record), separators=(",", ":"), allow_nan=False)


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
