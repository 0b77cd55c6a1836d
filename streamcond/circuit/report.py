"""A design as data (``--json``, the issue's contract), as a table for people, and its verdict."""

from __future__ import annotations

import math
from typing import Any

from .design import Design
from .eseries import format_farads, format_ohms
from .worstcase import DRAWS, QUANTILES, SEED

#: Where each resistor goes, for the table (the JSON names are the contract's).
PLACES = {
    "r_feedback": "output → V+",
    "r_ref": "V+ → reference",
    "r_in": "signal → V+",
    "r_top": "supply → V+",
    "r_bottom": "V+ → ground",
    "r_pullup": "output → supply",
}

#: What to do about the largest contribution to the worst case.
_CURES = {
    "resistor": "choose 1 % parts (--series E96, --tolerance 1) or widen the band",
    "v_pos": "return the divider to a reference rather than the supply (--ref) or use a "
             "tighter supply, or widen the band",
    "v_neg": "a tighter negative supply, or widen the band",
    "v_ref": "a more accurate reference (--ref-tolerance), or widen the band",
    "v_os": "a comparator with a lower input offset (--offset-voltage), or widen the band",
    "loss_high": "a rail-to-rail or open-drain output, whose level is better defined, or widen "
                 "the band",
    "loss_low": "a rail-to-rail or open-drain output, whose level is better defined, or widen "
                "the band",
}

_NAMES = {"v_pos": "the positive supply", "v_neg": "the negative supply",
          "v_ref": "the reference", "v_os": "the comparator's input offset",
          "loss_high": "the output's high level", "loss_low": "the output's low level"}


def _dominant(d: Design) -> str:
    c = dict(d.spread.contributions)
    if not c:
        return "resistor"
    # the resistors as one group: they all come from the same tolerance choice
    group = {"resistor": sum(v for k, v in c.items() if k.startswith("r_"))}
    group.update({k: v for k, v in c.items() if not k.startswith("r_")})
    return max(group, key=lambda n: group[n])


def verdict(d: Design) -> str:
    """The plain sentence: does the worst-case band hold (the noise, when it was measured)?"""
    lo_w, hi_w = d.spread.narrowest
    dom = _dominant(d)
    what = (f"the resistors' ±{d.spec.resistor_tolerance * 100:g} %" if dom == "resistor"
            else _NAMES.get(dom, dom))
    m = d.margin
    if m is None:
        if hi_w <= lo_w:
            return (
                f"The tolerances move the thresholds by more than the band is wide (the largest "
                f"share: {what}), so no input level lies inside the band for every unit built; "
                f"{_CURES[dom]}."
            )
        return (
            f"Every unit built stays within the worst-case thresholds above; the band all of "
            f"them share is {lo_w:.4f} to {hi_w:.4f} V ({mv_text(hi_w - lo_w)})."
        )
    rate = _rate(m.rate_per_hour)
    tgt = _rate(m.target_rate_per_hour)
    if m.holds:
        s = (
            f"The circuit holds the measured noise with margin {m.margin_sigma:.1f}σ̂ at worst "
            f"case (Rice: {rate} false edges per hour from noise alone, target {tgt})."
        )
    else:
        if m.distance > 0:
            s = (
                f"It does not hold the measured noise: at worst case a threshold comes within "
                f"{m.margin_sigma:.1f}σ̂ of the centre (Rice: {rate} false edges per hour, target "
                f"{tgt}); the largest share is {what}: {_CURES[dom]}."
            )
        else:
            s = (
                f"It does not hold: at worst case a threshold lies {mv_text(-m.distance)} past "
                f"the band's centre — the tolerances move the band by more than its half-width; "
                f"the largest share is {what}: {_CURES[dom]}."
            )
    if m.unreliable:
        s += f" Read σ̂ with care: {m.unreliable.rstrip('.')}."
    if m.too_wide and m.plateau_width is not None:
        s += (
            f" At the other extreme the hysteresis ({mv_text(d.spread.hysteresis[1])}) is wider "
            f"than the widest band that still counted every real transition on the recording "
            f"({mv_text(m.plateau_width)}): some units would miss small real changes."
        )
    return s


def _rate(x: float) -> str:
    if not math.isfinite(x):
        return "—"
    if x == 0:
        return "≈ 0"
    if x >= 1e4 or x < 1e-3:
        return f"{x:.1e}"
    return f"{x:.3g}"


def _pair(x: tuple[float, float]) -> list[float]:
    return [float(x[0]), float(x[1])]


def to_json(d: Design) -> dict[str, Any]:
    """Everything as data: the contract's keys first, then the rest."""
    s, ch, sp = d.spec, d.choice, d.spread
    out: dict[str, Any] = {
        "circuit": s.circuit,
        "resistors": dict(ch.resistors),
        "output_low": d.output_low,
        "output_high": d.output_high,
        "thresholds": {"low": ch.low, "high": ch.high},
        "hysteresis": ch.high - ch.low,
        "worst_case": {"low": _pair(sp.low), "high": _pair(sp.high),
                       "hysteresis": _pair(sp.hysteresis)},
    }
    if d.margin is not None:
        out["margin_sigma"] = _finite(d.margin.margin_sigma)
        out["predicted_false_rate_per_hour"] = _finite(d.margin.rate_per_hour)
    out.update({
        "requested": {"low": s.want_low, "high": s.want_high,
                      "hysteresis": s.want_high - s.want_low},
        "error": {"low": ch.low - s.want_low, "high": ch.high - s.want_high},
        "output_stage": s.output,
        "output_inverted": d.inverted,
        "supply": {"positive": s.v_pos, "negative": s.v_neg, "tolerance": s.supply_tolerance},
        "reference": {
            "volts": s.conditions().v_ref,
            "from": "supply" if s.ref_follows_supply else ("given" if s.ref is not None
                                                          else "ground"),
            "tolerance": s.ref_tolerance if s.ref is not None else None,
        },
        "output_loss_per_rail": list(s.loss),
        "series": s.series,
        "tolerance": s.resistor_tolerance,
        "resistance_range": list(s.r_range),
        "offset_voltage": s.v_os,
        "network_current": ch.current,
        "max_current": s.max_current,
        "worst_case_method": "corners of the tolerance box"
        + (" (exact: monotone)" if sp.monotone else " (estimate: not monotone)"),
        "monte_carlo": {
            "draws": DRAWS, "seed": SEED, "quantiles": list(QUANTILES),
            "low": _pair(sp.mc_low), "high": _pair(sp.mc_high),
            "hysteresis": _pair(sp.mc_hysteresis),
        },
        "contributions": sp.contributions,
        "tolerance_box": {k: list(v) for k, v in sp.parameters.items()},
        "reference_needed": d.reference_needed,
        "input_filter": None if d.rc is None else d.rc.to_json(),
        "input_filter_note": d.rc_note,
    })
    ev = s.evidence
    if ev is not None and d.margin is not None:
        m = d.margin
        out["recording"] = {
            "channel": ev.channel, "unit": ev.unit, "band_from": ev.band_from,
            "band": {"low": ev.low, "high": ev.high}, "gain": ev.gain, "offset": ev.offset,
            "volts_per_raw": ev.volts_per_raw, "filter": ev.filter_text,
            "noise_sigma": ev.sigma, "zero_upcrossing_rate_hz": ev.nu0_hz,
            "noise_sigma_unfiltered": ev.sigma_unfiltered,
            "zero_upcrossing_rate_unfiltered_hz": ev.nu0_unfiltered_hz,
        }
        out["noise"] = {"sigma_volts": m.sigma, "nu0_hz": m.nu0_hz,
                        "measured": "after the prefilter" if m.filtered else "before the prefilter",
                        "reliable": m.unreliable is None, "reason": m.unreliable}
        out["margin_distance_volts"] = m.distance
        out["target_rate_per_hour"] = m.target_rate_per_hour
        out["holds"] = m.holds
    out["verdict"] = verdict(d)
    out["warnings"] = list(d.warnings)
    return out


def _finite(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _v(x: float) -> str:
    return f"{x:.4f} V"


def _dmv(x: float) -> str:
    """A signed error in millivolts, volts when large (no "-0.00")."""
    if abs(x) >= 1:
        return f"{x:+.4g} V"
    return f"{round(x * 1e3, 2) + 0.0:+.2f} mV"


def _span(a: float, b: float) -> str:
    return f"{a:.4f} to {b:.4f} V"


def mv_text(x: float) -> str:
    return f"{x * 1e3:.3g} mV" if abs(x) < 1 else f"{x:.4g} V"


def _supply(d: Design) -> str:
    s = d.spec
    if s.v_neg == -s.v_pos:
        return f"±{s.v_pos:g} V"
    if s.v_neg == 0:
        return f"{s.v_pos:g} V"
    return f"+{s.v_pos:g}/{s.v_neg:g} V"


def _stage(d: Design) -> str:
    s = d.spec
    lo, hi = s.loss
    if s.open_drain:
        loss = "" if hi == 0 else f", low {lo:g}–{hi:g} V above the rail"
        return f"open-drain output, {format_ohms(s.r_pullup or 0)} pull-up to the supply{loss}"
    if hi == 0:
        return "push-pull output, rail to rail"
    span = f"{lo:g}" if lo == hi else f"{lo:g}–{hi:g}"
    return f"push-pull output, {span} V short of each rail"


def format_text(d: Design, plot_path: str | None = None) -> str:
    """The table and the verdict."""
    s, ch, sp = d.spec, d.choice, d.spread
    lines = [
        f"streamcond circuit: {s.circuit} comparator, {_supply(d)} supply (±"
        f"{s.supply_tolerance * 100:g} %), {_stage(d)}; {s.series} ±"
        f"{s.resistor_tolerance * 100:g} %, {format_ohms(s.r_range[0])}–"
        f"{format_ohms(s.r_range[1])}",
    ]
    ev = s.evidence
    if ev is not None:
        u = f" {ev.unit}" if ev.unit else ""
        off = f" − {ev.offset:g}" if ev.offset > 0 else (f" + {-ev.offset:g}" if ev.offset else "")
        lines.append(
            f"  from         channel {ev.channel}: the {ev.band_from} band {ev.low:.6g} to "
            f"{ev.high:.6g}{u}; volts = (value{off})/{ev.gain:g} × {ev.volts_per_raw:g}"
        )
    lines += [
        f"  asked        low {_v(s.want_low)}   high {_v(s.want_high)}   hysteresis "
        f"{mv_text(s.want_high - s.want_low)}",
    ]
    ref = s.conditions().v_ref
    if s.circuit != "single-supply" or s.ref is not None:
        where = ("ground" if s.ref is None else f"{ref:g} V (±{s.ref_tolerance * 100:g} %)")
        lines.append(f"  reference    {where}")
    places = dict(PLACES)
    if s.ref is not None:
        places["r_top"] = "reference → V+"
    lines.append("  resistors    " + "   ".join(
        f"{k} {format_ohms(v)} ({places[k]})" for k, v in ch.resistors.items()))
    lines.append(f"  output       low {d.output_low:g} V, high {d.output_high:g} V"
                 + (" (unloaded, through the pull-up)" if s.open_drain else "")
                 + ("; low above the upper threshold (inverted)" if d.inverted
                    else "; high above the upper threshold"))
    lines.append(
        f"  nominal      low {_v(ch.low)} ({_dmv(ch.low - s.want_low)})   high "
        f"{_v(ch.high)} ({_dmv(ch.high - s.want_high)})   hysteresis "
        f"{mv_text(ch.high - ch.low)}"
    )
    lines.append(
        f"  worst case   low {_span(*sp.low)}   high {_span(*sp.high)}   hysteresis "
        f"{mv_text(sp.hysteresis[0])} to {mv_text(sp.hysteresis[1])}"
        f"   (corners{'' if sp.monotone else ', estimate'})"
    )
    lines.append(
        f"  Monte Carlo  low {_span(*sp.mc_low)}   high {_span(*sp.mc_high)}   hysteresis "
        f"{mv_text(sp.mc_hysteresis[0])} to {mv_text(sp.mc_hysteresis[1])}   (0.1 % and 99.9 % points "
        f"of {DRAWS:,} draws)"
    )
    parts = sorted(sp.contributions.items(), key=lambda kv: -kv[1])
    short = {"v_pos": "supply", "v_neg": "negative supply", "v_ref": "reference",
             "v_os": "offset", "loss_high": "output high", "loss_low": "output low"}
    lines.append("  shares       " + ", ".join(
        f"{short.get(k, k)} ±{mv_text(v)}" for k, v in parts[:4])
        + "  (largest threshold move, each alone)")
    lines.append(
        f"  tolerances   resistors ±{s.resistor_tolerance * 100:g} %, supply "
        f"±{s.supply_tolerance * 100:g} %, comparator offset ±{s.v_os * 1e3:g} mV"
    )
    lines.append(f"  current      {ch.current * 1e3:.3g} mA at most in the network"
                 + (f" (limit {s.max_current * 1e3:g} mA)" if s.max_current else ""))
    if d.rc is not None:
        rc = d.rc
        lines.append(
            f"  input RC     {format_ohms(rc.r)} in series, {format_farads(rc.c)} to ground: "
            f"τ = {rc.tau:.4g} s ({rc.error * 100:+.1f} % against {rc.source})"
        )
    elif d.rc_note:
        lines.append(f"  input RC     none: {d.rc_note}")
    m = d.margin
    if m is not None and ev is not None:
        how = ("after the prefilter, which the input RC matches" if m.filtered and
               ev.filter_kind != "none" else "of the signal as recorded"
               if ev.filter_kind == "none" else
               f"before the prefilter: the comparator does not see the {ev.filter_text} filter")
        lines.append(f"  noise        σ̂ {mv_text(m.sigma)}, ν0 {m.nu0_hz:.3g} Hz ({how})")
        if m.distance > 0:
            lines.append(
                f"  margin       {m.margin_sigma:.2f}σ̂ from the centre {m.center:.4f} V to the "
                f"nearer worst-case threshold; Rice: {_rate(m.rate_per_hour)} false edges per "
                f"hour"
            )
        else:
            lines.append(
                f"  margin       none: a worst-case threshold lies {mv_text(-m.distance)} past "
                f"the centre {m.center:.4f} V ({m.margin_sigma:.1f}σ̂)"
            )
    for w in d.warnings:
        lines.append(f"  note         {w}")
    if plot_path:
        lines.append(f"  picture      {plot_path}")
    lines.append("")
    lines.append(verdict(d))
    lines.append("Low-voltage signals only; not a safety-rated function (see the README's cautions).")
    return "\n".join(lines) + "\n"
