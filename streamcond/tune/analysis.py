"""The analysis behind ``tune`` (steps 2, 5 and 6 of the method in :mod:`streamcond.tune`): noise,
suggestion and the replay check. Pure: a :class:`~streamcond.tune.reading.ChannelData` in, a
:class:`TuneResult` out; the report, the JSON and the picture are views of that result."""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..config import AdaptiveBand, Channel, FixedBand
from ..errors import InputError
from .numbers import round_to
from .reading import ChannelData
from .rice import DEFAULT_TARGET_RATE_PER_HOUR, rice_min_width, rice_rate_per_hour
from .sweep import (
    _extend_down,
    band_center,
    count_edges,
    count_edges_dwell,
    find_plateau,
    Plateau,
    sweep_widths,
)

log = logging.getLogger("streamcond.tune")

#: A plateau ending below this many σ̂ means real steps smaller than ±2σ̂ were counted cleanly,
#: which Gaussian noise of that σ̂ would not allow: the estimate is then suspect (a warning).
PLAUSIBLE_PLATEAU_SIGMA: float = 4.0
#: The adaptive alternative is replayed on at most this many samples (its noise tracker is the
#: costly part of tune: one whole-window estimate per window_s/10).
ADAPTIVE_CHECK_SAMPLES: int = 300_000
#: A plateau of fewer edges than this rests on too few transitions to trust (a warning).
FEW_TRANSITIONS: int = 6
#: Half-width kept inside each end of the plateau, in units of σ̂. Both ends are set by the
#: largest noise excursions of this recording; three sigmas more is our choice of margin
#: (common practice, no published source).
EDGE_MARGIN_SIGMA: float = 3.0


@dataclass
class Suggestion:
    width: float | None
    center: float
    k: float | None
    predicted_false_rate_per_hour: float | None
    meets_target: bool
    margin_low_sigma: float | None = None  # half-width above the plateau's lower end, in σ̂
    margin_high_sigma: float | None = None  # half-width below the plateau's upper end, in σ̂


@dataclass
class TuneResult:
    channel: str
    unit: str
    samples: int
    sample_rate_hz: float
    duration_s: float
    center: float
    sigma: float
    nu0_hz: float
    target_rate_per_hour: float
    target_is_default: bool
    rice_width: float
    widths: np.ndarray
    edges: np.ndarray
    edges_dwell: np.ndarray | None
    rates: np.ndarray
    plateau: Plateau | None
    suggestion: Suggestion
    safe_min: float | None
    safe_max: float | None
    configured_width: float | None
    advice: list[str] = field(default_factory=list)
    fixed_band: dict[str, Any] | None = None
    adaptive_band: dict[str, Any] | None = None
    check: dict[str, Any] = field(default_factory=dict)
    fixed_edge_records: list[dict[str, Any]] = field(default_factory=list)
    dwell: tuple[float, float] = (0.0, 0.0)
    filter_text: str = ""
    bad_lines: int = 0
    gaps: int = 0
    fault_samples: int = 0
    #: "level" (noise, sweep, plateau, Rice) or "pulse" (:mod:`streamcond.tune.pulse`)
    mode: str = "level"
    #: whether the noise estimate could separate the noise from the signal, and why not
    reliable: bool = True
    reason: str | None = None
    #: the pulse channel's findings (mode "pulse")
    pulse: Any = None
    #: a dwell to put in the config with the band (pulse mode), else None: keep the channel's
    suggested_dwell: dict[str, float] | None = None


def _fallback_scale(y: np.ndarray) -> float:
    """A width scale when σ̂ is 0 or unknown: a thousandth of the 1-99 % spread of ``y``."""
    lo, hi = np.nanpercentile(y, [1.0, 99.0])
    span = float(hi - lo)
    return span * 1e-3 if span > 0 else 1e-9


def _from_plateau_alone(plateau: Plateau, center: float, sigma: float) -> Suggestion:
    """The middle of the plateau on the log-width scale (its geometric mean), two significant
    digits kept inside it: the width farthest, in ratio, from both ends where the count
    changes."""
    mid = math.sqrt(plateau.width_min * plateau.width_max)
    w = float(round_to(mid, 2, up=False))
    if not plateau.width_min <= w <= plateau.width_max:
        w = float(round_to(mid, 4, up=False))
        if not plateau.width_min <= w <= plateau.width_max:
            w = mid
    k = w / sigma if sigma > 0 and math.isfinite(sigma) else None
    return Suggestion(w, center, k, None, False)


def _filter_text(ch: Channel) -> str:
    f = ch.filter
    params = ", ".join(f"{k} {v:g}" for k, v in f.model_dump().items() if k != "kind")
    return f.kind + (f" ({params})" if params else "")


def noise_of(y: np.ndarray, fs: float) -> tuple[float, float, bool, str | None]:
    """σ̂, ν0, and whether the estimate could separate the noise from the signal (with the
    estimator's reason when it could not). Read with ``getattr`` so that an estimate without
    the ``reliable``/``reason`` fields counts as reliable."""
    from ..core.noise import estimate_noise

    est = estimate_noise(y, fs)
    reliable = bool(getattr(est, "reliable", True))
    reason = getattr(est, "reason", None)
    return float(est.sigma), float(est.nu0_hz), reliable, (None if reliable else reason)


def analyse(
    data: ChannelData,
    target_rate_per_hour: float | None = None,
    *,
    pulse: bool | None = None,
) -> TuneResult:
    """Noise, sweep, plateau and suggestion for one channel (see the module docstring).

    ``pulse``: True tunes the channel as a pulse channel (:mod:`streamcond.tune.pulse`), False
    as a level channel, None decides from the signal (:func:`~streamcond.tune.pulse.is_pulse_train`).
    """
    from .pulse import analyse_pulse, is_pulse_train

    ch = data.channel
    target = DEFAULT_TARGET_RATE_PER_HOUR if target_rate_per_hour is None else target_rate_per_hour
    if not (target > 0 and math.isfinite(target)):
        raise InputError("The target rate must be a positive number of false edges per hour")
    y = data.yg  # the samples the comparator sees (sensor faults left out)
    if pulse is True or (pulse is None and is_pulse_train(y, data.fs)):
        return analyse_pulse(data, target, target_rate_per_hour is None, forced=pulse is True)
    sigma, nu0, reliable, reason = noise_of(y, data.fs)
    if not sigma > 0 and reliable:
        raise InputError(
            f"Channel {ch.name!r} shows no measurable noise on this recording (the conditioned "
            f"signal does not vary); tune sizes the band from the noise and has nothing to go on"
        )
    c = band_center(ch)
    # Beyond twice the smaller excursion past the centre no threshold pair is crossed both ways.
    reach = 2.0 * min(float(np.max(y)) - c, c - float(np.min(y)))
    # the sweep's scale: σ̂, or, when the estimate is not to be trusted and gave nothing, a
    # thousandth of the signal's spread (the sweep extends downward from there if needed)
    scale = sigma if (sigma > 0 and math.isfinite(sigma)) else _fallback_scale(y)
    widths = sweep_widths(scale, reach)
    edges = np.array([count_edges(y, c, w) for w in widths.tolist()], dtype=np.int64)
    rise, fall = float(ch.dwell.rise_s), float(ch.dwell.fall_s)
    edges_dwell = None
    if rise > 0 or fall > 0:
        edges_dwell = np.array(
            [
                count_edges_dwell(data.tg, y, c, w, rise, fall, data.segment_starts)
                for w in widths.tolist()
            ],
            dtype=np.int64,
        )
    plateau = find_plateau(widths, edges)
    log.debug("tune %s: sigma %g, nu0 %g Hz, %d widths, plateau %s", ch.name, sigma, nu0,
              widths.size, plateau)
    if plateau is not None and plateau.open_below:
        # The count is stable from the narrowest width swept: look further down for where
        # the chatter starts, so that the plateau's lower end is known (a signal with clean,
        # fast steps may not chatter at any width; the search then stops at its limit).
        widths, edges, edges_dwell = _extend_down(
            data, c, widths, edges, edges_dwell, reach, plateau.edges
        )
        plateau = find_plateau(widths, edges)
    if reliable:
        rates = rice_rate_per_hour(widths, sigma, nu0)
        w_rice = rice_min_width(sigma, nu0, target)
    else:
        # Rice's formula needs a σ̂ that describes the noise: no figures from it
        rates = np.full(widths.size, np.nan)
        w_rice = math.nan
    configured = float(ch.band.width) if isinstance(ch.band, FixedBand) else None
    advice: list[str] = []
    safe_min = safe_max = None
    m = 2.0 * EDGE_MARGIN_SIGMA * sigma  # the half-width margin, as width
    if plateau is None:
        if reach <= 0:
            advice.append(
                f"The conditioned signal never crosses the band centre {c:g} {ch.unit} on this "
                f"recording, so no band around it gives an edge; check the centre (the mark) "
                f"and the scaling (gain, offset)"
            )
        else:
            advice.append(
                "The edge count never settles as the band widens: the signal's steps are too "
                "small for its noise, or the recording holds no clean transition. Reduce the "
                "noise before the comparator (a stronger prefilter: a longer median or moving "
                "average, a lower lowpass cutoff), add a dwell (rise_s/fall_s) so that short "
                "excursions do not count, and run tune again"
            )
        sug = Suggestion(None, c, None, None, False)
    elif not reliable:
        sug = _from_plateau_alone(plateau, c, sigma)
        advice.append(
            f"The noise estimate could not separate the noise from the signal on this "
            f"recording ({reason or 'no reason given'}), so σ̂ and Rice's formula are not used: "
            f"the suggested width is the middle of the plateau (on a log scale), sized from "
            f"the edge counts alone"
        )
    else:
        safe_min = plateau.width_min + m
        safe_max = plateau.width_max - m
        lo = max(w_rice, safe_min)
        if lo <= safe_max:
            # two significant digits for a config a person reads, three when two would
            # widen the band by more than 5 % (a leading 1), more when the plateau is tight
            w = float(round_to(lo, 2, up=True))
            if w > 1.05 * lo:
                w = float(round_to(lo, 3, up=True))
            if w > safe_max:
                w = float(round_to(lo, 4, up=True))
                if w > safe_max:
                    w = lo
            ok = True
        else:
            ok = False
            u = f" {ch.unit}" if ch.unit else ""
            tgt = "1/24" if target_rate_per_hour is None else f"{target:g}"
            cure = (
                "Reduce the noise before the comparator (a stronger prefilter: a longer median "
                "or moving average, a lower lowpass cutoff — it lowers σ̂), add a dwell "
                "(rise_s/fall_s) so that short excursions do not count, or accept a higher rate "
                "with --target-rate"
            )
            if safe_max >= safe_min:
                # the widest safe width: the lowest false-edge rate the plateau allows
                w = float(round_to(safe_max, 3, up=False))
                advice.append(
                    f"No width meets both: the target of {tgt} false edges per hour needs a "
                    f"band at least {w_rice:.3g}{u} wide ({w_rice / sigma:.1f}σ̂), but the real "
                    f"transitions are safe only in bands up to {safe_max:.3g}{u} "
                    f"({EDGE_MARGIN_SIGMA:g}σ̂ inside the plateau's upper end) — the signal's "
                    f"steps are too small for its noise. {cure}. The width suggested below is "
                    f"the widest the plateau allows"
                )
            else:
                # the plateau is shorter than the two margins: its middle, the width farthest
                # (in half-width, as the margins are counted) from both of its ends
                w = float(round_to((plateau.width_min + plateau.width_max) / 2.0, 3, up=False))
                need = (
                    f"; the target of {tgt} false edges per hour would need at least "
                    f"{w_rice:.3g}{u}"
                    if w_rice > w
                    else ""
                )
                advice.append(
                    f"The plateau ({plateau.width_min:.3g} – {plateau.width_max:.3g}{u}) is too "
                    f"short to keep {EDGE_MARGIN_SIGMA:g}σ̂ from both of its ends{need}. The "
                    f"width suggested below is its middle. {cure}"
                )
        h = w / 2.0
        sug = Suggestion(
            width=w,
            center=c,
            k=w / sigma,
            predicted_false_rate_per_hour=float(rice_rate_per_hour(w, sigma, nu0)),
            meets_target=ok,
            margin_low_sigma=(h - plateau.width_min / 2.0) / sigma,
            margin_high_sigma=(plateau.width_max / 2.0 - h) / sigma,
        )
        if plateau.width_max < PLAUSIBLE_PLATEAU_SIGMA * sigma:
            advice.append(
                f"Read σ̂ with care: the edge count stays clean up to a band of only "
                f"{plateau.width_max / sigma:.1f}σ̂, so the real steps are smaller than noise of "
                f"this σ̂ would allow to be counted cleanly. The noise estimate probably "
                f"includes the signal's own fast movement (pulses only a few samples long, fast "
                f"transients), and the Rice rates above are then too pessimistic; size the band "
                f"from the plateau"
            )
        if plateau.open_above:
            advice.append(
                "The edge count is still stable at the widest band swept; its upper end was "
                "not found"
            )
    if plateau is not None and plateau.edges < FEW_TRANSITIONS:
        advice.append(
            f"Only {plateau.edges} real transition{'s' if plateau.edges != 1 else ''} on this "
            f"recording: the plateau rests on very few crossings, and a stretch of chatter can "
            f"look like one. Tune again on a longer recording (or a longer --port-seconds) "
            f"that holds several real transitions of this channel"
        )
    n = data.t.size
    res = TuneResult(
        channel=ch.name,
        unit=ch.unit,
        samples=int(n),
        sample_rate_hz=data.fs,
        duration_s=float(data.t[-1] - data.t[0]) + 1.0 / data.fs,
        center=c,
        sigma=sigma,
        nu0_hz=nu0,
        target_rate_per_hour=target,
        target_is_default=target_rate_per_hour is None,
        rice_width=w_rice,
        widths=widths,
        edges=edges,
        edges_dwell=edges_dwell,
        rates=rates,
        plateau=plateau,
        suggestion=sug,
        safe_min=safe_min,
        safe_max=safe_max,
        configured_width=configured,
        advice=advice,
        dwell=(rise, fall),
        filter_text=_filter_text(ch),
        bad_lines=data.bad_lines,
        gaps=data.gaps,
        fault_samples=data.fault_samples,
        reliable=reliable,
        reason=reason,
    )
    if sug.width is not None:
        _recommend_and_check(data, res)
    return res


def _adaptive_window(data: ChannelData) -> float:
    from ..core.noise import MIN_SAMPLES

    ch = data.channel
    if isinstance(ch.band, AdaptiveBand):
        w = float(ch.band.window_s)
    else:
        # the adaptive band's own default window (longer than the stats' quick estimate)
        w = float(AdaptiveBand.model_fields["window_s"].default)
    return max(w, math.ceil(MIN_SAMPLES / data.fs * 100.0) / 100.0)


def _recommend_and_check(data: ChannelData, res: TuneResult) -> None:
    """The config lines, validated by the config model and replayed through the real channel."""
    sug = res.suggestion
    assert sug.width is not None
    center = float(f"{res.center:.10g}")
    fixed: dict[str, Any] = {"center": center, "width": sug.width}
    if not res.reliable or res.safe_min is None or res.safe_max is None:
        # no trustworthy σ̂: no adaptive band (it is k·σ̂), the fixed band checked alone
        FixedBand.model_validate(fixed)
        res.fixed_band = fixed
        recs = _records(_conditioner(data, FixedBand.model_validate(fixed)), data, 0, data.t.size)
        res.fixed_edge_records = [r for r in recs if r["kind"] == "edge"]
        res.check = {
            "fixed_edges": len(res.fixed_edge_records),
            "plateau_edges": res.plateau.edges if res.plateau else None,
        }
        return
    k = float(round_to(sug.k if sug.k is not None else 0.0, 3, up=True))
    adaptive: dict[str, Any] = {
        "mode": "adaptive",
        "center": center,
        "k": k,
        "window_s": float(f"{_adaptive_window(data):.4g}"),
    }
    # Clamp the adaptive band to the plateau's safe part seen here: a quieter or noisier
    # stretch (or an estimate thrown by a transient) cannot take it where this recording
    # says edges go wrong; min_width > 0 also lets it decide during the warm-up window.
    lo_safe, hi_safe = res.safe_min, res.safe_max
    if lo_safe <= sug.width <= hi_safe:
        adaptive["min_width"] = float(round_to(max(lo_safe, sug.width * 0.5), 2, up=True))
        adaptive["max_width"] = float(round_to(hi_safe, 2, up=False))
        if adaptive["max_width"] < adaptive["min_width"]:
            adaptive.pop("max_width")
    fixed_m = FixedBand.model_validate(fixed)
    adaptive_m = AdaptiveBand.model_validate(adaptive)
    res.fixed_band = fixed
    res.adaptive_band = adaptive
    # The adaptive band re-estimates the noise every window_s/10: on a long recording that is
    # the bulk of tune's time, so it is checked on the first ADAPTIVE_CHECK_SAMPLES samples,
    # against the fixed band on the same stretch (fed in two blocks: chunk invariance makes
    # that the same as one).
    n = data.t.size
    n_chk = min(n, ADAPTIVE_CHECK_SAMPLES)
    fixed_cond = _conditioner(data, fixed_m)
    head = _records(fixed_cond, data, 0, n_chk)
    fixed_recs = head + (_records(fixed_cond, data, n_chk, n) if n_chk < n else [])
    adaptive_recs = _records(_conditioner(data, adaptive_m), data, 0, n_chk)
    res.fixed_edge_records = [r for r in fixed_recs if r["kind"] == "edge"]
    widths = [
        r["band_high"] - r["band_low"]
        for r in adaptive_recs
        if r["kind"] == "stats"
        and r.get("band_low") is not None
        and math.isfinite(r["band_low"])
        and math.isfinite(r["band_high"])
    ]
    res.check = {
        "fixed_edges": len(res.fixed_edge_records),
        "plateau_edges": res.plateau.edges if res.plateau else None,
        "adaptive_checked_until_s": float(data.t[n_chk - 1]),
        "adaptive_checked_whole": n_chk == n,
        "adaptive_edges": sum(1 for r in adaptive_recs if r["kind"] == "edge"),
        "fixed_edges_same_stretch": sum(1 for r in head if r["kind"] == "edge"),
        "adaptive_width_min": min(widths) if widths else None,
        "adaptive_width_max": max(widths) if widths else None,
    }


def _conditioner(data: ChannelData, band: FixedBand | AdaptiveBand) -> Any:
    """The real channel chain with ``band`` (everything else as configured)."""
    from ..core.channel import ChannelConditioner

    ch = data.channel.model_copy(update={"band": band})
    return ChannelConditioner(ch, data.fs, data.cfg.stats)


def _records(cond: Any, data: ChannelData, a: int, b: int) -> list[dict[str, Any]]:
    """The records ``cond`` gives for samples [a, b) of the channel."""
    return [rec for _i, _rank, rec in cond.process(data.t[a:b], data.raw[a:b])]

