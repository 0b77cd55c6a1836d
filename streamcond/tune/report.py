"""``tune``'s text report: the sweep table and the recommendation in plain words."""

from __future__ import annotations

import math

import numpy as np

from .analysis import TuneResult
from .numbers import inline_table
from .rice import rice_rate_per_hour


def _g(x: float | None, d: int = 3) -> str:
    if x is None or not math.isfinite(x):
        return "—"
    return f"{x:.{d}g}"


def _rate(x: float) -> str:
    if not math.isfinite(x):
        return "—"
    if x == 0:
        return "≈ 0"
    if x >= 1e5 or (x < 1e-3 and x != 0):
        return f"{x:.1e}"
    return f"{x:.3g}"


def fault_sentence(n: int) -> str:
    """What the report says of a recording's fault samples (level and pulse reports alike)."""
    return (
        f"{n:,} samples are sensor faults (at the fault limits, or levels no sensor measures) "
        f"and were left out, as the channel leaves them out (no filter, noise estimate or "
        f"comparator sees them)."
    )


def format_report(res: TuneResult, plot_path: str | None = None) -> str:
    """The table and the plain-words recommendation (the default output)."""
    if res.mode == "pulse":
        from .pulse import format_pulse_report

        return format_pulse_report(res, plot_path)
    u = f" {res.unit}" if res.unit else ""
    sig = res.sigma if (res.sigma > 0 and math.isfinite(res.sigma)) else math.nan

    def k_of(w: float) -> float:
        return w / sig

    L: list[str] = []
    L.append(
        f"Channel {res.channel}: {res.samples:,} samples at {res.sample_rate_hz:g} Hz "
        f"({res.duration_s:.1f} s); prefilter {res.filter_text}"
        + (f"; dwell rise {res.dwell[0]:g} s, fall {res.dwell[1]:g} s" if any(res.dwell) else "")
    )
    if res.fault_samples:
        L.append(fault_sentence(res.fault_samples))
    if res.reliable:
        L.append(
            f"Noise of the conditioned signal: σ̂ = {_g(res.sigma)}{u}, zero up-crossing rate "
            f"ν0 = {_g(res.nu0_hz)} Hz. Band centre {_g(res.center, 6)}{u}."
        )
    else:
        L.append(
            f"The noise estimate cannot separate the noise from the signal on this recording"
            f" ({res.reason or 'no reason given'}): σ̂ = {_g(res.sigma)}{u} is shown but not "
            f"used, and there are no Rice figures. Band centre {_g(res.center, 6)}{u}."
        )
    L.append("")
    p = res.plateau
    head = f"  {'band width' + u:>22}   {'k = w/σ̂':>13}   {'edges':>6}"
    if res.edges_dwell is not None:
        head += f"   {'w/ dwell':>9}"
    head += "   predicted false edges/h (Rice)"
    L.append(head)
    e = res.edges
    change = np.flatnonzero(e[1:] != e[:-1]) + 1
    starts = np.concatenate(([0], change)).tolist()
    ends = (np.concatenate((change, [e.size])) - 1).tolist()
    for a, b in zip(starts, ends):
        w0, w1 = res.widths[a], res.widths[b]
        wr = f"{_g(w0)} – {_g(w1)}" if b > a else _g(w0)
        kr = f"{_g(k_of(w0))} – {_g(k_of(w1))}" if b > a else _g(k_of(w0))
        rr = f"{_rate(res.rates[a])} – {_rate(res.rates[b])}" if b > a else _rate(res.rates[a])
        line = f"  {wr:>22}   {kr:>13}   {int(e[a]):>6}"
        if res.edges_dwell is not None:
            d = res.edges_dwell[a : b + 1]
            dr = f"{int(d[0])}" if d.min() == d.max() else f"{int(d[0])} → {int(d[-1])}"
            line += f"   {dr:>9}"
        line += f"   {rr}"
        if p is not None and a == p.first:
            line += "   ◀ plateau"
        L.append(line)
    L.append("")
    tgt = (
        "1/24 false edges per hour (one a day, the default)"
        if res.target_is_default
        else f"{res.target_rate_per_hour:g} false edges per hour"
    )
    if p is not None:
        below = " or less" if p.open_below else ""
        above = " or more" if p.open_above else ""
        L.append(
            f"Plateau: every width from {_g(p.width_min)}{u}{below} to {_g(p.width_max)}{u}{above} "
            + (f"({_g(k_of(p.width_min))}σ̂ – {_g(k_of(p.width_max))}σ̂) " if res.reliable else "")
            + f"gives "
            f"{p.edges} edges: the real transitions. "
            + (
                "No narrower band swept chatters (the steps are fast or the noise small); "
                if p.open_below
                else "Narrower bands chatter; "
            )
            + (
                "no wider band swept misses one."
                if p.open_above
                else "wider ones miss transitions."
            )
        )
    if res.reliable:
        L.append(
            f"Target: at most {tgt} from noise alone; Rice's formula asks for a width "
            f"of at least {_g(res.rice_width)}{u} ({k_of(res.rice_width):.2f}σ̂)."
        )
    s = res.suggestion
    if s.width is not None and not res.reliable:
        L.append(
            f"Suggested (from the plateau alone): width {_g(s.width, 6)}{u} around "
            f"{_g(s.center, 6)}{u}, the middle of the plateau."
        )
    elif s.width is not None:
        verdict = "meets the target" if s.meets_target else "does NOT meet the target"
        L.append(
            f"Suggested: width {_g(s.width, 6)}{u} around {_g(s.center, 6)}{u} "
            f"(k = {s.k:.2f}), predicted {_rate(s.predicted_false_rate_per_hour or 0.0)} "
            f"false edges per hour — {verdict}; {s.margin_low_sigma:.1f}σ̂ of half-width above "
            f"the plateau's lower end, {s.margin_high_sigma:.1f}σ̂ below its upper end."
        )
    for a in res.advice:
        L.append("")
        L.append(a + ("" if a.endswith(".") else "."))
    if res.fixed_band is not None:
        chk = res.check
        L.append("")
        L.append(f"Put in the config, under the [[channel]] with name = \"{res.channel}\":")
        L.append("")
        L.append("    band = " + inline_table(res.fixed_band))
        L.append("")
        same = "as the plateau" if chk["fixed_edges"] == chk["plateau_edges"] else (
            f"NOT the plateau's {chk['plateau_edges']}"
        )
        dw = " with the channel's dwell" if any(res.dwell) else ""
        L.append(f"  (replayed{dw}: {chk['fixed_edges']} edges, {same})")
    if res.fixed_band is not None and res.adaptive_band is not None:
        chk = res.check
        L.append("")
        L.append("or, for a band that follows the measured noise:")
        L.append("")
        L.append("    band = " + inline_table(res.adaptive_band or {}))
        L.append("")
        rng = ""
        if chk.get("adaptive_width_min") is not None:
            rng = (
                f"its width ranged {_g(chk['adaptive_width_min'])} – "
                f"{_g(chk['adaptive_width_max'])}{u}; "
            )
        if chk["adaptive_checked_whole"]:
            ref, what = chk["plateau_edges"], "the plateau"
        else:
            ref, what = chk["fixed_edges_same_stretch"], "the fixed band"
            rng = f"first {chk['adaptive_checked_until_s']:.0f} s of the recording: " + rng
        same = f"as {what}" if chk["adaptive_edges"] == ref else (
            f"NOT the {ref} of {what} — prefer the fixed band"
        )
        if "max_width" in (res.adaptive_band or {}):
            L.append(f"  (replayed: {rng}{chk['adaptive_edges']} edges, {same}; min_width and")
            L.append("   max_width keep it inside the part of the plateau found safe here)")
        else:
            L.append(f"  (replayed: {rng}{chk['adaptive_edges']} edges, {same})")
    if res.configured_width is not None and s.width is not None:
        cw = res.configured_width
        cnt = count_note = ""
        i = int(np.argmin(np.abs(np.log(res.widths / cw))))
        if res.widths[0] <= cw <= res.widths[-1]:
            cnt = f", about {int(res.edges[i])} edges on this recording"
        if p is not None and not (p.width_min <= cw <= p.width_max):
            count_note = " — off the plateau"
        L.append("")
        if res.reliable:
            rate_now = _rate(float(rice_rate_per_hour(cw, res.sigma, res.nu0_hz)))
            L.append(
                f"The config's present width is {_g(cw)}{u} ({k_of(cw):.2f}σ̂, predicted "
                f"{rate_now} per hour{cnt}{count_note})."
            )
        else:
            L.append(f"The config's present width is {_g(cw)}{u}{cnt}{count_note}.")
    if plot_path:
        L.append("")
        L.append(f"Picture: {plot_path}")
    return "\n".join(L) + "\n"

