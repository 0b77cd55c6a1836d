"""Pulse channels: a signal that sits at two levels and jumps between them many times.

A paddle-wheel flow sensor, a reed contact, a tachometer pick-up: the information is in the
*timing* of the jumps, not in a slow level crossing a mark. The level-channel method (noise
σ̂, a sweep of widths, Rice's formula) answers the wrong question here — its σ̂ is dominated
by the jumps themselves, and a band sized from it can come out wider than the pulse
("at least 15.7 V" on a 3.3 V signal). Instead:

1. **The two levels.** The conditioned samples are split into a low and a high group at the
   threshold that best separates them (Otsu's method: N. Otsu, "A threshold selection method
   from gray-level histograms", IEEE Trans. SMC 9, 1979 — the split maximising the
   between-group variance); each level is its group's median, its noise the group's robust
   spread 1.4826·MAD (the Gaussian consistency factor of the MAD).
2. **Is it a pulse train?** (:func:`is_pulse_train`, used when neither ``--pulse`` nor
   ``--no-pulse`` is given): both levels hold a fair share of the samples, the levels lie many
   noise sigmas apart, the signal spends little time between them, and it jumps at least
   :data:`MIN_PULSES` times. A slow level signal spends its time between any two levels; a pump
   that starts five times is a level channel with five real transitions.
3. **The band between the levels**, at 30 % and 70 % of the swing: the CMOS logic input levels
   (V_IL = 0.3·V_DD, V_IH = 0.7·V_DD; JEDEC logic families, from memory), so a sample counts as
   high or low where a logic input would read it so. Rounded to two significant digits of the
   swing; the margin of each threshold from its level is given in that level's noise sigmas.
4. **Bounce and the dwell.** With that band and no dwell, the comparator's runs (time between
   consecutive edges) fall into the real half-periods and much shorter runs: contact bounce
   (or glitches) at the edges. A run shorter than :data:`BOUNCE_FRACTION` of the typical real
   run is bounce. The suggested dwell is the longest bounce run seen plus one sample period,
   rounded up to a millisecond: a run must outlast every bounce seen here to count. It is
   checked against the shortest real run (a dwell must stay well below it).
5. **The pulse rate**, from the edges of the suggested band and dwell replayed through the real
   channel chain: pulses (rising edges of the input), their mean rate over the recording, and
   the instantaneous frequency while pulsing (median and range).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..config import Dwell, FixedBand
from ..errors import InputError
from .reading import ChannelData

#: Fewest jumps (rising and falling) of a pulse train; fewer is a level channel with a few
#: transitions (the demo pump starts five times). Our choice (no published source).
MIN_JUMPS: int = 40
MIN_PULSES: int = MIN_JUMPS // 2
#: Each level must hold at least this share of the samples.
MIN_LEVEL_SHARE: float = 0.02
#: At most this share of the samples may lie in the middle 60 % of the swing (transitions).
MAX_BETWEEN_SHARE: float = 0.03
#: The levels must be at least this many of their noise sigmas apart: a logic-level pulse
#: output is many tens of sigmas (the demo flow sensor: 3.18 V over 0.018 V, 177σ), a level
#: signal stepping 20σ is better tuned as a level channel. Our choice (no published source).
MIN_SEPARATION_SIGMA: float = 30.0
#: Thresholds at these fractions of the swing (CMOS V_IL / V_IH, JEDEC, from memory).
LOW_FRACTION: float = 0.3
HIGH_FRACTION: float = 0.7
#: A run shorter than this fraction of the real runs around it is bounce (our choice, no
#: published source), judged against the upper quartile of LOCAL_RUNS runs.
BOUNCE_FRACTION: float = 0.35
LOCAL_RUNS: int = 17
#: Contact bounce is systematic: fewer short runs than this share of all runs are isolated
#: short pulses (at a start or a stop), not bounce.
MIN_BOUNCE_SHARE: float = 0.01
#: The dwell must stay below this share of the shortest real run, or it would swallow pulses.
MAX_DWELL_SHARE: float = 0.75
#: Gaps between rising edges longer than this many median periods are stops, not periods.
STOP_PERIODS: float = 5.0


@dataclass
class Levels:
    low: float
    high: float
    low_sigma: float
    high_sigma: float
    low_share: float
    high_share: float
    between_share: float

    @property
    def swing(self) -> float:
        return self.high - self.low

    @property
    def separation_sigma(self) -> float:
        s = max(self.low_sigma, self.high_sigma)
        return self.swing / s if s > 0 else math.inf


def _otsu(y: np.ndarray, bins: int = 256) -> float | None:
    """Otsu's threshold of ``y`` (Otsu 1979: the split maximising the between-class variance
    w0·w1·(μ0 − μ1)² over a histogram)."""
    lo, hi = np.percentile(y, [0.5, 99.5])
    if not hi > lo:
        return None
    counts, edges = np.histogram(y, bins=bins, range=(lo, hi))
    mids = (edges[:-1] + edges[1:]) / 2.0
    w0 = np.cumsum(counts).astype(np.float64)
    total = w0[-1]
    if total <= 0:
        return None
    s0 = np.cumsum(counts * mids)
    w1 = total - w0
    with np.errstate(divide="ignore", invalid="ignore"):
        mu0 = s0 / w0
        mu1 = (s0[-1] - s0) / w1
        between = w0 * w1 * (mu0 - mu1) ** 2
    between[~np.isfinite(between)] = -1.0
    i = int(np.argmax(between))
    return float(edges[i + 1])


def _robust_sigma(x: np.ndarray) -> float:
    """1.4826·MAD: the standard deviation of Gaussian data, robust to outliers."""
    if x.size == 0:
        return math.nan
    return 1.4826 * float(np.median(np.abs(x - np.median(x))))


def find_levels(y: np.ndarray) -> Levels | None:
    """The two levels of ``y`` (see the module docstring), or None when it has no spread."""
    y = y[np.isfinite(y)]
    if y.size < 16:
        return None
    split = _otsu(y)
    if split is None:
        return None
    lo_s, hi_s = y[y < split], y[y >= split]
    if lo_s.size == 0 or hi_s.size == 0:
        return None
    low, high = float(np.median(lo_s)), float(np.median(hi_s))
    swing = high - low
    if not swing > 0:
        return None
    mid = (y > low + 0.2 * swing) & (y < high - 0.2 * swing)
    return Levels(
        low=low,
        high=high,
        low_sigma=_robust_sigma(lo_s),
        high_sigma=_robust_sigma(hi_s),
        low_share=lo_s.size / y.size,
        high_share=hi_s.size / y.size,
        between_share=float(np.count_nonzero(mid)) / y.size,
    )


def _jumps(y: np.ndarray, lv: Levels) -> int:
    from .sweep import count_edges

    lo = lv.low + LOW_FRACTION * lv.swing
    hi = lv.low + HIGH_FRACTION * lv.swing
    return count_edges(y, (lo + hi) / 2.0, hi - lo)


def is_pulse_train(y: np.ndarray, fs: float) -> bool:
    """Whether ``y`` looks like a pulse train (module docstring, step 2)."""
    lv = find_levels(y)
    if lv is None:
        return False
    if min(lv.low_share, lv.high_share) < MIN_LEVEL_SHARE:
        return False
    if lv.between_share > MAX_BETWEEN_SHARE:
        return False
    if lv.separation_sigma < MIN_SEPARATION_SIGMA:
        return False
    return _jumps(y[np.isfinite(y)], lv) >= MIN_JUMPS


@dataclass
class PulseFindings:
    levels: Levels
    chosen: str  # "from the signal" or "by --pulse"
    threshold_low: float
    threshold_high: float
    margin_low_sigma: float  # threshold_low above the low level, in the low level's sigmas
    margin_high_sigma: float
    transitions: int  # the comparator's edges on the conditioned signal with the band, runs > bounce
    bounce_runs: int  # runs shorter than BOUNCE_FRACTION of the typical run, after the prefilter
    bounce_max_s: float
    raw_bounce_runs: int  # the same on the scaled signal before the prefilter
    raw_bounce_max_s: float
    shortest_run_s: float
    typical_run_s: float
    dwell_s: float | None  # suggested; None: no bounce reaches the comparator, keep the dwell
    pulses: int  # rising edges of the input with the suggested band and dwell (real chain)
    edges: int
    pulse_rate_hz: float  # pulses / duration
    frequency_median_hz: float | None
    frequency_min_hz: float | None
    frequency_max_hz: float | None
    duty: float | None
    dwell_too_long: bool = False


def _runs(y: np.ndarray, t: np.ndarray, lo: float, hi: float) -> tuple[np.ndarray, np.ndarray]:
    """Edge sample indices of the bare band and the durations between consecutive edges."""
    from ..core.comparator import hysteresis

    tr, _ = hysteresis(y, lo, hi)
    idx = tr.index[1:] if tr.initial else tr.index
    return idx, np.diff(t[idx]) if idx.size > 1 else np.empty(0)


def _split_runs(runs: np.ndarray) -> tuple[np.ndarray, float]:
    """Bounce mask of ``runs`` and the typical real run.

    A run is bounce when it is shorter than BOUNCE_FRACTION of its *local* reference: the
    upper quartile of the LOCAL_RUNS runs around it. Local, because the pulse rate drifts
    (a real half-period at 25 Hz is as short as a glitch at 5 Hz); the upper quartile, because
    a bouncing edge adds two short runs, so that short runs can be the majority (most edges
    bouncing) while the real runs still fill the upper quarter.
    """
    if runs.size == 0:
        return np.zeros(0, dtype=bool), math.nan
    half = LOCAL_RUNS // 2
    padded = np.pad(runs.astype(np.float64), half, mode="reflect" if runs.size > half else "edge")
    win = np.lib.stride_tricks.sliding_window_view(padded, 2 * half + 1)
    ref = np.percentile(win, 75.0, axis=1)
    bounce = runs < BOUNCE_FRACTION * ref
    if np.count_nonzero(bounce) < max(3.0, MIN_BOUNCE_SHARE * runs.size):
        # a few isolated short runs (a pulse cut short at a start or stop) are not bounce
        bounce[:] = False
    real = runs[~bounce]
    return bounce, float(np.median(real)) if real.size else math.nan


def analyse_pulse(
    data: ChannelData, target: float, target_is_default: bool, forced: bool = False
) -> Any:
    """Tune ``data`` as a pulse channel: a :class:`~streamcond.tune.analysis.TuneResult` with
    ``mode = "pulse"`` and :class:`PulseFindings` in ``pulse``."""
    from .analysis import (
        Suggestion,
        TuneResult,
        _conditioner,
        _filter_text,
        _records,
        noise_of,
    )

    ch = data.channel
    y, t = data.yg, data.tg
    lv = find_levels(y)
    if lv is None or lv.separation_sigma < 3.0:
        raise InputError(
            f"Channel {ch.name!r} does not show two separate levels on this recording, so it "
            f"cannot be tuned as a pulse channel; tune it as a level channel (without --pulse)"
        )
    step = 10.0 ** (math.floor(math.log10(lv.swing)) - 1)  # two significant digits of the swing
    lo_thr = round(round((lv.low + LOW_FRACTION * lv.swing) / step) * step, 12)
    hi_thr = round(round((lv.low + HIGH_FRACTION * lv.swing) / step) * step, 12)
    if not hi_thr > lo_thr:
        lo_thr = lv.low + LOW_FRACTION * lv.swing
        hi_thr = lv.low + HIGH_FRACTION * lv.swing
    period = 1.0 / data.fs
    idx, runs = _runs(y, t, lo_thr, hi_thr)
    bounce, typical = _split_runs(runs)
    real_runs = runs[~bounce]
    _, raw_runs = _runs(data.vg, t, lo_thr, hi_thr)
    raw_bounce, _ = _split_runs(raw_runs)
    bounce_max = float(runs[bounce].max()) if bounce.any() else 0.0
    shortest = float(real_runs.min()) if real_runs.size else math.nan
    dwell: float | None = None
    too_long = False
    if bounce.any():
        # a run must outlast the longest bounce seen: one sample period more, to the next ms up
        dwell = math.ceil(round((bounce_max + period) * 1000.0, 6)) / 1000.0
        if math.isfinite(shortest) and dwell > MAX_DWELL_SHARE * shortest:
            too_long, dwell = True, None
    band = {"low": lo_thr, "high": hi_thr}
    dwell_cfg = (
        {"rise_s": dwell, "fall_s": dwell}
        if dwell is not None
        else {"rise_s": float(ch.dwell.rise_s), "fall_s": float(ch.dwell.fall_s)}
    )
    band_m = FixedBand.model_validate(band)
    Dwell.model_validate(dwell_cfg)
    chk_ch = data.channel.model_copy(update={"dwell": Dwell.model_validate(dwell_cfg)})
    chk_data = ChannelData(**{**data.__dict__, "channel": chk_ch})
    recs = _records(_conditioner(chk_data, band_m), chk_data, 0, data.t.size)
    edge_recs = [r for r in recs if r["kind"] == "edge"]
    inv = ch.invert
    rising_t = np.array([r["t"] for r in edge_recs if (r["level"] == 1) != inv])
    duration = float(data.t[-1] - data.t[0]) + period
    f_med = f_min = f_max = duty = None
    if rising_t.size >= 3:
        per = np.diff(rising_t)
        med = float(np.median(per))
        running = per[per < STOP_PERIODS * med]
        if running.size:
            f = 1.0 / running
            f_med, f_min, f_max = float(np.median(f)), float(f.min()), float(f.max())
    if real_runs.size >= 2:
        # duty: the typical high run over the typical period
        lv_after = (y[idx[:-1]] > (lo_thr + hi_thr) / 2.0)  # the level each run is at
        real = ~bounce
        hi_runs = runs[real & lv_after]
        lo_runs = runs[real & ~lv_after]
        if hi_runs.size and lo_runs.size:
            h, l_ = float(np.median(hi_runs)), float(np.median(lo_runs))
            duty = h / (h + l_)
    sigma, nu0, reliable, reason = noise_of(y, data.fs)
    findings = PulseFindings(
        levels=lv,
        chosen="by --pulse" if forced else "from the signal",
        threshold_low=lo_thr,
        threshold_high=hi_thr,
        margin_low_sigma=(lo_thr - lv.low) / lv.low_sigma if lv.low_sigma > 0 else math.inf,
        margin_high_sigma=(lv.high - hi_thr) / lv.high_sigma if lv.high_sigma > 0 else math.inf,
        transitions=_transitions(idx.size, bounce),
        bounce_runs=int(np.count_nonzero(bounce)),
        bounce_max_s=bounce_max,
        raw_bounce_runs=int(np.count_nonzero(raw_bounce)),
        raw_bounce_max_s=float(raw_runs[raw_bounce].max()) if raw_bounce.any() else 0.0,
        shortest_run_s=shortest,
        typical_run_s=typical,
        dwell_s=dwell,
        pulses=int(rising_t.size),
        edges=len(edge_recs),
        pulse_rate_hz=rising_t.size / duration,
        frequency_median_hz=f_med,
        frequency_min_hz=f_min,
        frequency_max_hz=f_max,
        duty=duty,
        dwell_too_long=too_long,
    )
    advice: list[str] = []
    if too_long:
        advice.append(
            f"The bounce lasts up to {bounce_max * 1000:.1f} ms, while the shortest real run "
            f"is {shortest * 1000:.1f} ms: a dwell long enough for the bounce would also "
            f"swallow short pulses, so none is suggested. A median prefilter of "
            f"{2 * round(bounce_max * data.fs) + 1} samples (twice the bounce, plus one) "
            f"removes glitches of up to {bounce_max * 1000:.1f} ms before the comparator"
        )
    if findings.edges != findings.transitions:
        advice.append(
            f"Replayed through the channel with this band the channel gives {findings.edges} "
            f"edges, against {findings.transitions} transitions found between the bounce: "
            f"check the recording around the differences (tune --plot shows them)"
        )
    res = TuneResult(
        channel=ch.name,
        unit=ch.unit,
        samples=int(data.t.size),
        sample_rate_hz=data.fs,
        duration_s=duration,
        center=float(f"{(lo_thr + hi_thr) / 2.0:.10g}"),
        sigma=sigma,
        nu0_hz=nu0,
        target_rate_per_hour=target,
        target_is_default=target_is_default,
        rice_width=math.nan,
        widths=np.empty(0),
        edges=np.empty(0, dtype=np.int64),
        edges_dwell=None,
        rates=np.empty(0),
        plateau=None,
        # the width and centre of the two rounded thresholds, without binary dust (1.3, not
        # 1.2999999999999998)
        suggestion=Suggestion(float(f"{hi_thr - lo_thr:.10g}"),  # type: ignore[arg-type]
                              float(f"{(lo_thr + hi_thr) / 2.0:.10g}"), None, None, None),
        safe_min=None,
        safe_max=None,
        configured_width=float(ch.band.width) if isinstance(ch.band, FixedBand) else None,
        advice=advice,
        fixed_band=band,
        check={"fixed_edges": len(edge_recs), "plateau_edges": None,
               "transitions": findings.transitions},
        fixed_edge_records=edge_recs,
        dwell=(float(ch.dwell.rise_s), float(ch.dwell.fall_s)),
        filter_text=_filter_text(ch),
        bad_lines=data.bad_lines,
        gaps=data.gaps,
        fault_samples=data.fault_samples,
        mode="pulse",
        reliable=reliable,
        reason=reason,
        pulse=findings,
        suggested_dwell=None if dwell is None else {"rise_s": dwell, "fall_s": dwell},
    )
    return res


def _transitions(n_edges: int, bounce: np.ndarray) -> int:
    """Edges left when the bounce runs are taken out. The comparator's level alternates at
    each edge, so run j (between edges j and j+1) has the parity of j, the run before the first
    edge parity 1 and the run after the last edge (open, real) that of n_edges − 1; a real
    transition is a change of parity between consecutive real runs."""
    if n_edges == 0:
        return 0
    real = np.append(~bounce, True)[:n_edges]
    n, level = 0, 1
    for j in np.flatnonzero(real).tolist():  # a loop over edges (sparse), not samples
        if j % 2 != level:
            n += 1
            level = j % 2
    return n


def pulse_json(res: Any) -> dict[str, Any]:
    p: PulseFindings = res.pulse
    d = asdict(p)
    d["levels"] = {**asdict(p.levels), "swing": p.levels.swing}
    for k, v in list(d.items()):
        if isinstance(v, float) and not math.isfinite(v):
            d[k] = None
    return d


def _g(x: float | None, d: int = 3) -> str:
    if x is None or not math.isfinite(x):
        return "—"
    return f"{x:.{d}g}"


def format_pulse_report(res: Any, plot_path: str | None = None) -> str:
    from .numbers import inline_table

    p: PulseFindings = res.pulse
    lv = p.levels
    u = f" {res.unit}" if res.unit else ""
    L: list[str] = []
    L.append(
        f"Channel {res.channel}: {res.samples:,} samples at {res.sample_rate_hz:g} Hz "
        f"({res.duration_s:.1f} s); prefilter {res.filter_text}"
        + (f"; dwell rise {res.dwell[0]:g} s, fall {res.dwell[1]:g} s" if any(res.dwell) else "")
    )
    if getattr(res, "fault_samples", 0):
        from .report import fault_sentence

        L.append(fault_sentence(res.fault_samples))
    L.append(
        f"Pulse channel ({p.chosen}: two levels, {p.pulses:,} pulses): the band goes between "
        f"the levels and the dwell is sized from the bounce; the noise sweep and Rice's "
        f"formula do not apply to a pulse train."
    )
    L.append(
        f"Levels: low {_g(lv.low, 4)}{u} (noise σ {_g(lv.low_sigma, 2)}{u}), high "
        f"{_g(lv.high, 4)}{u} (σ {_g(lv.high_sigma, 2)}{u}); swing {_g(lv.swing, 4)}{u}; "
        f"{lv.between_share * 100:.1f} % of the samples lie between them."
    )
    L.append(
        f"Band at {LOW_FRACTION * 100:.0f} % and {HIGH_FRACTION * 100:.0f} % of the swing (the "
        f"CMOS logic input levels): low {_g(p.threshold_low, 4)}{u}, high "
        f"{_g(p.threshold_high, 4)}{u} — {p.margin_low_sigma:.0f}σ above the low level, "
        f"{p.margin_high_sigma:.0f}σ below the high level."
    )
    raw = (
        f" (before the prefilter: {p.raw_bounce_runs:,}, up to {p.raw_bounce_max_s * 1000:.1f} ms)"
        if p.raw_bounce_runs != p.bounce_runs
        else ""
    )
    if p.bounce_runs:
        cure = (
            f"a dwell of {p.dwell_s * 1000:.0f} ms outlasts them"
            if p.dwell_s is not None
            else "no dwell can remove them without losing real pulses"
        )
        L.append(
            f"Bounce: {p.bounce_runs:,} runs much shorter than the runs around them (a typical "
            f"half-period is {p.typical_run_s * 1000:.1f} ms) reach the comparator, the "
            f"longest {p.bounce_max_s * 1000:.1f} ms{raw}; {cure} (the shortest real run is "
            f"{p.shortest_run_s * 1000:.1f} ms)."
        )
    else:
        L.append(
            f"Bounce: none reaches the comparator{raw}; the channel's dwell "
            f"({res.dwell[0]:g} s / {res.dwell[1]:g} s) is kept."
        )
    freq = ""
    if p.frequency_median_hz is not None:
        freq = (
            f"; while pulsing {_g(p.frequency_min_hz)}–{_g(p.frequency_max_hz)} Hz "
            f"(median {_g(p.frequency_median_hz)} Hz)"
        )
    duty = f"; duty {p.duty * 100:.0f} %" if p.duty is not None else ""
    L.append(
        f"Pulses: {p.pulses:,} in {res.duration_s:.1f} s, {p.pulse_rate_hz:.3g} per second "
        f"on average{freq}{duty}."
    )
    for a in res.advice:
        L.append("")
        L.append(a + ("" if a.endswith(".") else "."))
    L.append("")
    L.append(f"Put in the config, under the [[channel]] with name = \"{res.channel}\":")
    L.append("")
    L.append("    band = " + inline_table(res.fixed_band))
    if res.suggested_dwell is not None:
        L.append("    dwell = " + inline_table(res.suggested_dwell))
    L.append("")
    same = "as the transitions found" if p.edges == p.transitions else (
        f"NOT the {p.transitions:,} transitions found"
    )
    L.append(f"  (replayed through the channel: {p.edges:,} edges = {p.pulses:,} pulses, {same})")
    if plot_path:
        L.append("")
        L.append(f"Picture: {plot_path}")
    return "\n".join(L) + "\n"


def plot_pulse(res: Any, data: ChannelData, path: str | Path) -> None:
    """A pulse channel's picture: a short stretch with the band and the edges (a dozen
    periods, so markers stay apart), the histogram of the levels with the band, and the pulse
    frequency over the recording."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .plot import save, show_band

    p: PulseFindings = res.pulse
    lv = p.levels
    ulab = f" ({res.unit})" if res.unit else ""
    lo, hi = p.threshold_low, p.threshold_high
    edges = res.fixed_edge_records
    inv = data.channel.invert
    t = data.t
    ty = t - data.delay_s
    fig = plt.figure(figsize=(11.5, 11.0), dpi=100, layout="constrained")
    gs = fig.add_gridspec(3, 1, height_ratios=[1.1, 0.9, 0.9])
    ax1, ax2, ax3 = (fig.add_subplot(gs[i]) for i in range(3))
    fig.suptitle(
        f"streamcond tune — pulse channel {res.channel}\n"
        f"levels {_g(lv.low, 4)} / {_g(lv.high, 4)}{ulab}; band {_g(lo, 4)} – {_g(hi, 4)}; "
        + (f"dwell {p.dwell_s * 1000:.0f} ms; " if p.dwell_s is not None else "")
        + f"{p.pulses:,} pulses, {p.pulse_rate_hz:.3g}/s on average",
        fontsize=12,
    )
    # 1. a dozen periods around the first bounce (or the first pulses)
    rising = [r["t"] for r in edges if (r["level"] == 1) != inv]
    per = 1.0 / p.frequency_median_hz if p.frequency_median_hz else (res.duration_s / 20.0)
    if rising:
        t0 = rising[min(len(rising) - 1, len(rising) // 3)] - 2 * per
    else:
        t0 = float(t[0])
    t1 = t0 + 12 * per
    sel = (t >= t0) & (t <= t1)
    sely = (ty >= t0) & (ty <= t1)
    ax1.plot(t[sel], data.vl[sel], color="0.6", lw=0.8, marker=".", ms=3, label="scaled input")
    ax1.plot(ty[sely], data.y[sely], color="C0", lw=1.2, label="conditioned")
    show_band(ax1, lo, hi)
    er = [r for r in edges if t0 <= r["t"] <= t1]
    up = [r["t"] for r in er if (r["level"] == 1) != inv]
    dn = [r["t"] for r in er if (r["level"] == 1) == inv]
    ax1.plot(up, [hi] * len(up), "^", color="C2", mec="k", ms=8, zorder=5, label="rising edges")
    ax1.plot(dn, [lo] * len(dn), "v", color="C3", mec="k", ms=8, zorder=5, label="falling edges")
    ax1.set_xlim(t0, t1)
    ax1.set_xlabel("sample time (s)")
    ax1.set_ylabel(f"{res.channel}{ulab}")
    ax1.grid(alpha=0.3)
    ax1.legend(loc="upper right", fontsize=8, framealpha=0.9)
    ax1.set_title("A dozen periods: the band between the two levels and the edges it gives",
                  fontsize=10)
    # 2. histogram of the conditioned values
    yg = data.yg
    ax2.hist(yg, bins=200, color="C0", alpha=0.8, log=True)
    ax2.axvspan(lo, hi, color="C2", alpha=0.25, lw=0, label="band")
    for x, name in ((lv.low, "low level"), (lv.high, "high level")):
        ax2.axvline(x, color="k", lw=1.0, ls="--")
        ax2.annotate(name, xy=(x, 0.95), xycoords=("data", "axes fraction"), xytext=(4, 0),
                     textcoords="offset points", fontsize=8, va="top")
    ax2.set_xlabel(f"conditioned value{ulab}")
    ax2.set_ylabel("samples (log scale)")
    ax2.legend(loc="upper center", fontsize=8)
    ax2.set_title("Where the samples lie: two levels, few samples between them", fontsize=10)
    # 3. pulse frequency over time
    if len(rising) >= 2:
        rt = np.asarray(rising)
        f = 1.0 / np.diff(rt)
        ax3.plot(rt[1:], f, ".", ms=2, color="C0", label="1 / time since the previous pulse")
        if p.frequency_max_hz:
            ax3.set_ylim(0, p.frequency_max_hz * 1.3)
    ax3.set_xlim(float(t[0]), float(t[-1]))
    ax3.set_xlabel("sample time (s)")
    ax3.set_ylabel("pulse frequency (Hz)")
    ax3.grid(alpha=0.3)
    ax3.set_title("Pulse frequency at each rising edge", fontsize=10)
    save(fig, path)
