"""Raw readings to levels: gain and offset, and which samples are no level at all.

The one statement of the rule (the channel, ``tune`` and the quiet-channel test of the pipeline
all ask here): a sample is a *sensor fault*, not a level, when its raw value is at or beyond the
channel's configured fault limits, or when its scaled value ``gain·raw + offset`` lies beyond
±:data:`LEVEL_LIMIT` or is not a number at all.

Why a limit on the scaled value: a parser passes any finite double, and 1e308 is one (IEEE 754:
the largest is about 1.798e308), but nothing downstream can take it. Through an IIR prefilter it
overflows the state to ±inf and then inf - inf = NaN, so the channel would stay dead for the
rest of the stream; a pair like -1.7e308, +1.7e308 overflows the comparator's interpolation;
the noise fit squares its residuals. No sensor's unit reaches 1e150, and with every level
within it the squares (below 1e300) and their sums over any window stay finite.
"""

from __future__ import annotations

import math

import numpy as np

from ..config import Fault

#: Scaled values beyond ± this are no measurement (see the module docstring).
LEVEL_LIMIT = 1e150


def within(lo: float, hi: float) -> bool:
    """Are all levels from ``lo`` to ``hi`` measurable? (False for NaN.)"""
    return -LEVEL_LIMIT <= lo and hi <= LEVEL_LIMIT


def scale(
    raw: np.ndarray, gain: float, offset: float, fault: Fault | None
) -> tuple[np.ndarray, np.ndarray | None]:
    """The scaled levels of a block of raw values, and where the samples are faults (None:
    no fault in the block)."""
    bad = fault.mask(raw) if fault is not None else None
    if gain != 1.0 or offset != 0.0:
        with np.errstate(over="ignore", invalid="ignore"):
            v = raw * gain + offset
    else:
        v = raw
    if v.size and not within(float(v.min()), float(v.max())):
        beyond = ~(np.abs(v) <= LEVEL_LIMIT)
        bad = beyond if bad is None else bad | beyond
    return v, bad


def reason(raw: float, gain: float, offset: float, fault: Fault | None) -> str:
    """Why the sample with raw value ``raw`` is a fault (for its record)."""
    lo, hi = fault.limits if fault is not None else (-math.inf, math.inf)
    if raw <= lo:
        return f"raw value at or below {lo:g}"
    if raw >= hi:
        return f"raw value at or above {hi:g}"
    if math.isnan(raw):
        return "raw value not a number"
    with np.errstate(over="ignore", invalid="ignore"):
        v = float(np.float64(raw) * gain + offset)
    if not math.isfinite(v):
        return f"raw value {raw:g} scaled by gain and offset is beyond any number"
    what = f"raw value {raw:g}" if v == raw else f"raw value {raw:g} (scaled {v:g})"
    return f"{what} lies beyond ±{LEVEL_LIMIT:g} (no sensor measures that)"
