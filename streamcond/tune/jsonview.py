"""``tune --json``: the result as the DESIGN keys (``noise_sigma``, ``zero_upcrossing_rate_hz``,
``suggested``, ``sweep``) and extras."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .analysis import TuneResult
from .numbers import inline_table


def _num(x: float | None) -> float | None:
    if x is None or not math.isfinite(x):
        return None
    return float(x)


def to_json(res: TuneResult) -> dict[str, Any]:
    """The DESIGN keys (``noise_sigma``, ``zero_upcrossing_rate_hz``, ``suggested``, ``sweep``)
    and extras."""
    s = res.suggestion
    sig = res.sigma if (res.sigma > 0 and math.isfinite(res.sigma) and res.reliable) else None

    def k_of(w: float | None) -> float | None:
        return None if (w is None or sig is None) else w / sig

    sweep = []
    for i, (w, e, r) in enumerate(zip(res.widths.tolist(), res.edges.tolist(), res.rates.tolist())):
        row: dict[str, Any] = {"width": w, "edges": e, "predicted_false_rate_per_hour": _num(r)}
        row["k"] = k_of(w)
        if res.edges_dwell is not None:
            row["edges_with_dwell"] = int(res.edges_dwell[i])
        sweep.append(row)
    p = res.plateau
    out: dict[str, Any] = {
        "channel": res.channel,
        "mode": res.mode,
        "reliable": res.reliable,
        "reason": res.reason,
        "unit": res.unit,
        "samples": res.samples,
        "sample_rate_hz": res.sample_rate_hz,
        "duration_s": res.duration_s,
        "bad_lines": res.bad_lines,
        "gaps": res.gaps,
        "fault_samples": res.fault_samples,
        "filter": res.filter_text,
        "dwell": {"rise_s": res.dwell[0], "fall_s": res.dwell[1]},
        "noise_sigma": _num(res.sigma),
        "zero_upcrossing_rate_hz": _num(res.nu0_hz),
        "center": res.center,
        "target_rate_per_hour": res.target_rate_per_hour,
        "target_rate_is_default": res.target_is_default,
        "rice_min_width": _num(res.rice_width),
        "configured_width": res.configured_width,
        "suggested": {
            "width": s.width,
            "center": s.center,
            "k": s.k,
            "predicted_false_rate_per_hour": _num(s.predicted_false_rate_per_hour),
            "meets_target": s.meets_target,
            "margin_low_sigma": s.margin_low_sigma,
            "margin_high_sigma": s.margin_high_sigma,
        },
        "plateau": None
        if p is None
        else {
            "width_min": p.width_min,
            "width_max": p.width_max,
            "k_min": k_of(p.width_min),
            "k_max": k_of(p.width_max),
            "edges": p.edges,
            "points": p.points,
            "open_below": p.open_below,
            "open_above": p.open_above,
            "safe_width_min": res.safe_min,
            "safe_width_max": res.safe_max,
        },
        "config": None
        if res.fixed_band is None
        else {
            "fixed": "band = " + inline_table(res.fixed_band),
            "adaptive": None
            if res.adaptive_band is None
            else "band = " + inline_table(res.adaptive_band),
            "dwell": None
            if res.suggested_dwell is None
            else "dwell = " + inline_table(res.suggested_dwell),
        },
        "check": res.check or None,
        "advice": res.advice,
        "sweep": sweep,
    }
    if res.mode == "pulse":
        from .pulse import pulse_json

        out["pulse"] = pulse_json(res)
    return out


def json_default(o: Any) -> Any:
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return float(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")
