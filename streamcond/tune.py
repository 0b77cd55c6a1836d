"""``streamcond tune``: measure a channel's noise on a recording and suggest a hysteresis band.

What it does, in the order the report shows it:

1. **The conditioned signal.** The recording is read with the same parser, sample time
   (:class:`~streamcond.core.timebase.Timebase`), scaling (gain·raw + offset) and prefilter
   (:func:`~streamcond.core.channel.build_filter`) as ``replay``, for the one channel asked for.
2. **Noise.** σ̂ and the zero up-crossing rate ν0 of the conditioned signal over the whole
   recording (:func:`~streamcond.core.noise.estimate_noise`).
3. **A sweep of band widths** around the configured centre, log-spaced from 0.25σ̂ to 12σ̂
   (:data:`SWEEP_BASE_POINTS` points) and on with the same ratio until the band is wider than
   the signal's smaller excursion past the centre (where no edge can fire any more): the
   plateau's upper end is set by the signal's steps, not by the noise, and is needed to keep a
   margin from it. When the count is already stable at the narrowest width, the sweep goes on
   downward with the same ratio until the chatter starts (or a limit is reached: fast, clean
   steps need not chatter at any width). Each width gets the edge count of the bare band on
   this recording (the
   comparator kernel, :func:`~streamcond.core.comparator.hysteresis`), with the channel's dwell
   too when it has one, and the false-edge rate Rice's formula predicts (below).
4. **The plateau**: the longest run of consecutive sweep widths that give the same non-zero
   edge count. Why this works: for bands with a common centre, a wider band is nested in a
   narrower one, so between two transitions of the wider band the narrower one must make a
   transition of each kind too; the edge count of the bare band therefore never grows with the
   width (up to the one edge that decides the initial level), and the count-vs-width curve is
   a descending staircase. Narrow bands chatter, and their count changes from one width to the
   next; once the band is wider than the noise's excursions during the slow crossings only the
   real transitions are left, and the count stays put until the band becomes wider than the
   smallest real excursion and transitions start to be missed. The real transitions are
   therefore the longest step (log-spaced widths: "longest" means the largest ratio of widths),
   and no parity or size assumption is needed. The dwell is left out of the plateau on purpose:
   with a dwell the count is no longer monotone, and the band should stand on its own (Rice's
   formula is about the band alone); the dwell is then extra margin, not a crutch. A run of
   fewer than :data:`MIN_PLATEAU_POINTS` points (under a factor of about 1.2 in width) is not
   called a plateau.
5. **The suggestion.** Rice's formula (S. O. Rice, "Mathematical analysis of random noise",
   Bell System Technical Journal, 1944–45): stationary Gaussian noise of standard deviation σ
   crosses the level h above its mean upward ν0·exp(−h²/2σ²) times per second. With h the
   band's half-width that is the rate at which noise alone carries a signal resting at the
   centre past one threshold — an upper bound on false edges, since a full false cycle needs a
   crossing of both thresholds and a signal spends little time at the centre. Meeting a target
   rate R (per hour) needs h ≥ σ·sqrt(2·ln(3600·ν0/R)). The suggested width is the narrowest
   that meets the target and keeps :data:`EDGE_MARGIN_SIGMA`·σ̂ of half-width inside each end of
   the plateau (rounded up to two significant digits): narrow, because a narrower band fires
   sooner after the real crossing (the band adds h/slope of delay) and leaves the most room for
   the smallest real excursions; inside the plateau with a margin, because both ends were set
   by the largest noise excursions of this one recording, and another day's will differ. When no
   width satisfies both, ``tune`` says so, suggests the best the plateau allows and what to do
   (a stronger prefilter lowers σ̂; a dwell makes short excursions harmless).
6. **A check.** The suggested fixed band, and the adaptive alternative, are replayed through
   the real :class:`~streamcond.core.channel.ChannelConditioner` (same filter, same dwell), and
   their edge counts are reported beside the plateau's.

Default target rate: :data:`DEFAULT_TARGET_RATE_PER_HOUR` = 1/24 per hour, one false edge a day
even for a signal resting at the band centre all day (Rice's rate there is the upper bound).
The choice matters little: the width grows only with the square root of the logarithm of
ν0/R, so a tenfold stricter target widens the band by a few per cent.
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import sys
from dataclasses import dataclass, field
from decimal import ROUND_CEILING, ROUND_FLOOR, Decimal, localcontext
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from .config import AdaptiveBand, Channel, Config, FixedBand, load_config
from .errors import ConfigError, InputError

log = logging.getLogger(__name__)

#: Default acceptable false-edge rate from noise alone, per hour: one a day (module docstring).
DEFAULT_TARGET_RATE_PER_HOUR: float = 1.0 / 24.0
#: Wording for ``--target-rate``'s help in cli.py (which imports nothing heavy at start-up, so
#: it carries its own copy of this sentence).
TARGET_RATE_HELP = (
    "acceptable false edges per hour from noise alone, by Rice's formula for a signal resting "
    "at the band centre (an upper bound); default 1/24: one a day"
)

#: The sweep: widths from SWEEP_K_MIN·σ̂ to SWEEP_K_BASE_MAX·σ̂ in SWEEP_BASE_POINTS log-spaced
#: points, continued with the same ratio (about 6.8 % per step) while the band still fits inside
#: the signal's excursions, at most SWEEP_MAX_POINTS points in all.
SWEEP_K_MIN: float = 0.25
SWEEP_K_BASE_MAX: float = 12.0
SWEEP_BASE_POINTS: int = 60
SWEEP_MAX_POINTS: int = 400
#: Fewest consecutive sweep points with the same count that make a plateau (a width ratio of
#: about 1.068³ ≈ 1.22).
MIN_PLATEAU_POINTS: int = 4
#: A plateau ending below this many σ̂ means real steps smaller than ±2σ̂ were counted cleanly,
#: which Gaussian noise of that σ̂ would not allow: the estimate is then suspect (a warning).
PLAUSIBLE_PLATEAU_SIGMA: float = 4.0
#: When the plateau reaches down to the narrowest width swept, the sweep goes on downward with
#: the same ratio for at most this many points, down to at most reach·DOWN_LIMIT.
DOWN_MAX_POINTS: int = 120
DOWN_LIMIT: float = 1e-5
#: The adaptive alternative is replayed on at most this many samples (its noise tracker is the
#: costly part of tune: one whole-window estimate per window_s/10).
ADAPTIVE_CHECK_SAMPLES: int = 300_000
#: Half-width kept inside each end of the plateau, in units of σ̂. Both ends are set by the
#: largest noise excursions of this recording; three sigmas more is our choice of margin
#: (common practice, no published source).
EDGE_MARGIN_SIGMA: float = 3.0


# --- formulas ----------------------------------------------------------------------------------


def rice_rate_per_hour(width: Any, sigma: float, nu0_hz: float) -> Any:
    """Rice's up-crossing rate of the half-width, per hour: 3600·ν0·exp(−h²/2σ²), h = width/2.

    S. O. Rice, Bell System Technical Journal, 1944–45. ``width`` may be an array.
    """
    h = np.asarray(width, dtype=np.float64) / 2.0
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        r = 3600.0 * nu0_hz * np.exp(-(h * h) / (2.0 * sigma * sigma))
    return r if np.ndim(r) else float(r)


def rice_min_width(sigma: float, nu0_hz: float, rate_per_hour: float) -> float:
    """Narrowest width whose Rice rate is at most ``rate_per_hour``: 2σ·sqrt(2·ln(3600·ν0/R)).

    0 when even a zero-width band meets the target (3600·ν0 ≤ R).
    """
    ratio = 3600.0 * nu0_hz / rate_per_hour
    if ratio <= 1.0:
        return 0.0
    return 2.0 * sigma * math.sqrt(2.0 * math.log(ratio))


# --- reading the channel -----------------------------------------------------------------------


@dataclass
class ChannelData:
    """One channel of a recording, as the pipeline sees it.

    With a ``fault`` setting, samples whose raw value is at or beyond the fault limits are not
    levels: as in the channel chain, the prefilter, the noise estimate and the comparator see
    only the other samples (``good``), and ``y`` is NaN at the fault samples.
    """

    cfg: Config
    channel: Channel
    t: np.ndarray  # sample time, s (after the timebase: strictly increasing)
    raw: np.ndarray  # the recording's column, as read
    v: np.ndarray  # scaled: gain·raw + offset
    y: np.ndarray  # scaled and prefiltered (what the comparator sees); NaN at fault samples
    fs: float
    delay_s: float  # the prefilter's DC delay (0 unless compensate_delay)
    bad_lines: int = 0
    gaps: int = 0
    good: np.ndarray | None = None  # indices of the samples that are not faults (None: all)
    fault_samples: int = 0

    @property
    def yg(self) -> np.ndarray:
        """The conditioned samples the comparator sees (faults left out)."""
        return self.y if self.good is None else self.y[self.good]

    @property
    def tg(self) -> np.ndarray:
        return self.t if self.good is None else self.t[self.good]

    @property
    def segment_starts(self) -> np.ndarray:
        """Indices into ``yg`` where a stretch after a fault begins."""
        if self.good is None:
            return np.empty(0, dtype=np.int64)
        return np.flatnonzero(np.diff(self.good) > 1) + 1


def pick_channel(cfg: Config, name: str, config_path: str = "the config") -> Channel:
    for ch in cfg.channel:
        if ch.name == name:
            return ch
    names = ", ".join(c.name for c in cfg.channel)
    raise ConfigError(
        f"The config {config_path} has no channel named {name!r}; its channels are: {names}"
    )


def read_channel(cfg: Config, recording: str | Path, channel: Channel) -> ChannelData:
    """Read ``channel`` of ``recording`` through the replay's parser, timebase and prefilter.

    Plain recordings and captures made by ``streamcond record`` are read as ``replay`` reads
    them (a capture without a time in its data uses the recorded host times).
    """
    from .core.channel import build_filter
    from .core.noise import MIN_SAMPLES
    from .core.timebase import Timebase
    from .replay import check_columns, open_recording

    parser, blocks, host_time = open_recording(cfg, recording)
    src = cfg.source
    tcols: list[np.ndarray] = []
    vcols: list[np.ndarray] = []
    bad = 0
    checked = False
    ti: int | None = None
    vi = 0
    for parsed, _done, _size in blocks:
        bad += parsed.bad
        if parser.columns is None:
            continue
        if not checked:
            check_columns(cfg, parser.columns)
            checked = True
            if host_time:
                ti = len(parser.columns)  # the host time rides as an extra last column
            elif src.time_column:
                ti = parser.columns.index(src.time_column)
            vi = parser.columns.index(channel.source_column)
        if parsed.rows.shape[0]:
            vcols.append(parsed.rows[:, vi].copy())
            if ti is not None:
                tcols.append(parsed.rows[:, ti].copy())
    if parser.columns is None:
        raise InputError(f"The recording {str(recording)!r} holds no data lines")
    if not checked:
        check_columns(cfg, parser.columns)
    raw = np.concatenate(vcols) if vcols else np.empty(0)
    raw_t = np.concatenate(tcols) if tcols else (np.empty(0) if ti is not None else None)
    tb = Timebase(
        time_scale=1.0 if host_time else src.time_scale,
        sample_rate_hz=src.sample_rate_hz,
        has_time_column=ti is not None,
        gap_after_periods=src.gap_after_periods,
    )
    if not tb.ready:
        assert raw_t is not None
        # the whole recording is here: a short one uses the steps it has (as Pipeline.finish)
        if not tb.estimate(raw_t, final=True):
            raise InputError(
                f"The recording {str(recording)!r} has too few samples with increasing "
                f"times to tell the sample rate"
            )
    t, keep, gaps = tb.process(raw_t, raw.size)
    if keep.size != raw.size:
        raw = raw[keep]
    assert tb.period is not None
    fs = 1.0 / tb.period
    good: np.ndarray | None = None
    if channel.fault is not None:
        bad_s = channel.fault.mask(raw)
        if bad_s.any():
            good = np.flatnonzero(~bad_s)
    n_good = raw.size if good is None else good.size
    if n_good < MIN_SAMPLES:
        raise InputError(
            f"The recording {str(recording)!r} has {n_good} usable samples of channel "
            f"{channel.name!r}; tune needs at least {MIN_SAMPLES}"
        )
    v = raw * float(channel.gain) + float(channel.offset)
    filt = build_filter(channel, fs)
    if good is None:
        y = filt.process(v)
    else:
        y = np.full(raw.size, np.nan)
        y[good] = filt.process(v[good])
    delay = filt.delay_samples / fs if channel.compensate_delay else 0.0
    return ChannelData(
        cfg, channel, t, raw, v, y, fs, delay, bad, len(gaps), good,
        raw.size - n_good,
    )


# --- the sweep and the plateau -----------------------------------------------------------------


def band_center(channel: Channel) -> float:
    band = channel.band
    if isinstance(band, (FixedBand, AdaptiveBand)):
        return float(band.center)
    raise TypeError(f"unknown band {band!r}")  # pragma: no cover


def sweep_widths(sigma: float, reach: float) -> np.ndarray:
    """Log-spaced widths from SWEEP_K_MIN·σ to SWEEP_K_BASE_MAX·σ, continued to ``reach``.

    ``reach`` is the width beyond which no edge can fire (twice the smaller excursion of the
    signal past the centre); the grid keeps its ratio and goes one step past it.
    """
    ratio = (SWEEP_K_BASE_MAX / SWEEP_K_MIN) ** (1.0 / (SWEEP_BASE_POINTS - 1))
    n = SWEEP_BASE_POINTS
    top = SWEEP_K_BASE_MAX * sigma
    if reach > top:
        extra = math.ceil(math.log(reach / top) / math.log(ratio)) + 1
        n = min(SWEEP_MAX_POINTS, n + extra)
    return SWEEP_K_MIN * sigma * ratio ** np.arange(n, dtype=np.float64)


def _extend_down(
    data: ChannelData,
    center: float,
    widths: np.ndarray,
    edges: np.ndarray,
    edges_dwell: np.ndarray | None,
    reach: float,
    plateau_edges: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Sweep below the narrowest width until the count leaves the plateau (plus two points)."""
    ratio = float(widths[1] / widths[0])
    rise, fall = float(data.channel.dwell.rise_s), float(data.channel.dwell.fall_s)
    new_w: list[float] = []
    new_e: list[int] = []
    new_d: list[int] = []
    w = float(widths[0])
    after = -1
    for _ in range(DOWN_MAX_POINTS):
        w /= ratio
        if w < reach * DOWN_LIMIT:
            break
        e = count_edges(data.yg, center, w)
        new_w.append(w)
        new_e.append(e)
        if edges_dwell is not None:
            new_d.append(
                count_edges_dwell(data.tg, data.yg, center, w, rise, fall, data.segment_starts)
            )
        if after < 0 and e != plateau_edges:
            after = 2
        elif after > 0:
            after -= 1
        if after == 0:
            break
    if not new_w:
        return widths, edges, edges_dwell
    widths = np.concatenate((np.array(new_w[::-1]), widths))
    edges = np.concatenate((np.array(new_e[::-1], dtype=np.int64), edges))
    if edges_dwell is not None:
        edges_dwell = np.concatenate((np.array(new_d[::-1], dtype=np.int64), edges_dwell))
    return widths, edges, edges_dwell


def count_edges(y: np.ndarray, center: float, width: float) -> int:
    """Edges a bare band of ``width`` around ``center`` gives on ``y`` (the initial level is
    not an edge)."""
    from .core.comparator import hysteresis

    tr, _ = hysteresis(y, center - width / 2.0, center + width / 2.0)
    return len(tr) - (1 if tr.initial else 0)


def count_edges_dwell(
    t: np.ndarray,
    y: np.ndarray,
    center: float,
    width: float,
    rise_s: float,
    fall_s: float,
    segment_starts: np.ndarray | None = None,
) -> int:
    """Edges with time qualification (the channel's dwell).

    ``segment_starts`` are the indices where a stretch after a sensor fault begins: as in the
    channel chain, the level is held across the fault, and a dwell candidate open when the
    fault began is void (no run is timed across a fault).
    """
    from .core.comparator import DwellState, qualified_hysteresis

    lo, hi = center - width / 2.0, center + width / 2.0
    st = DwellState()
    bounds = [0, *(segment_starts.tolist() if segment_starts is not None else []), y.size]
    n = 0
    for a, b in zip(bounds[:-1], bounds[1:]):
        if a > 0:
            st.prev_t = st.prev_x = float("nan")
            st.pend_class = -1
        q = qualified_hysteresis(t[a:b], y[a:b], lo, hi, rise_s, fall_s, st)
        n += int(q.emit.size)
    return n


@dataclass(frozen=True)
class Plateau:
    """The run of sweep points ``[first, last]`` (inclusive) with the same edge count."""

    first: int
    last: int
    edges: int
    width_min: float
    width_max: float
    open_below: bool  # the run starts at the first sweep point (its end may lie lower)
    open_above: bool  # the run ends at the last sweep point

    @property
    def points(self) -> int:
        return self.last - self.first + 1


def find_plateau(widths: np.ndarray, edges: np.ndarray) -> Plateau | None:
    """The longest run of consecutive sweep points with the same non-zero edge count.

    Ties (equally long runs) go to the run with more edges, the one that keeps more of the
    transitions. None when no run reaches :data:`MIN_PLATEAU_POINTS`.
    """
    e = np.asarray(edges)
    if e.size == 0:
        return None
    change = np.flatnonzero(e[1:] != e[:-1]) + 1
    starts = np.concatenate(([0], change))
    ends = np.concatenate((change, [e.size])) - 1
    best: tuple[int, int, int] | None = None  # (length, edges, start index in runs)
    for j, (a, b) in enumerate(zip(starts.tolist(), ends.tolist())):
        cnt = int(e[a])
        if cnt == 0:
            continue
        key = (b - a + 1, cnt)
        if best is None or key > best[:2]:
            best = (key[0], key[1], j)
    if best is None or best[0] < MIN_PLATEAU_POINTS:
        return None
    a, b = int(starts[best[2]]), int(ends[best[2]])
    return Plateau(
        first=a,
        last=b,
        edges=int(e[a]),
        width_min=float(widths[a]),
        width_max=float(widths[b]),
        open_below=a == 0,
        open_above=b == e.size - 1,
    )


# --- rounding for the config line --------------------------------------------------------------


def _round(x: float, digits: int, up: bool) -> Decimal:
    with localcontext() as ctx:
        ctx.prec = digits
        ctx.rounding = ROUND_CEILING if up else ROUND_FLOOR
        return +Decimal(repr(float(x)))


def toml_number(x: float | Decimal) -> str:
    """A number as TOML writes it (no exponent for ordinary magnitudes)."""
    d = x if isinstance(x, Decimal) else Decimal(repr(float(x)))
    s = format(d.normalize(), "f")
    return s


def inline_table(d: dict[str, Any]) -> str:
    """A TOML inline table: strings quoted, numbers in their shortest form."""
    parts = []
    for k, v in d.items():
        parts.append(f'{k} = "{v}"' if isinstance(v, str) else f"{k} = {toml_number(v)}")
    return "{ " + ", ".join(parts) + " }"


# --- the analysis ------------------------------------------------------------------------------


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


def _filter_text(ch: Channel) -> str:
    f = ch.filter
    params = ", ".join(f"{k} {v:g}" for k, v in f.model_dump().items() if k != "kind")
    return f.kind + (f" ({params})" if params else "")


def analyse(data: ChannelData, target_rate_per_hour: float | None = None) -> TuneResult:
    """Noise, sweep, plateau and suggestion for one channel (see the module docstring)."""
    from .core.noise import estimate_noise

    ch = data.channel
    target = DEFAULT_TARGET_RATE_PER_HOUR if target_rate_per_hour is None else target_rate_per_hour
    if not (target > 0 and math.isfinite(target)):
        raise InputError("The target rate must be a positive number of false edges per hour")
    y = data.yg  # the samples the comparator sees (sensor faults left out)
    est = estimate_noise(y, data.fs)
    sigma, nu0 = float(est.sigma), float(est.nu0_hz)
    if not sigma > 0:
        raise InputError(
            f"Channel {ch.name!r} shows no measurable noise on this recording (the conditioned "
            f"signal does not vary); tune sizes the band from the noise and has nothing to go on"
        )
    c = band_center(ch)
    # Beyond twice the smaller excursion past the centre no threshold pair is crossed both ways.
    reach = 2.0 * min(float(np.max(y)) - c, c - float(np.min(y)))
    widths = sweep_widths(sigma, reach)
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
    rates = rice_rate_per_hour(widths, sigma, nu0)
    w_rice = rice_min_width(sigma, nu0, target)
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
    else:
        safe_min = plateau.width_min + m
        safe_max = plateau.width_max - m
        lo = max(w_rice, safe_min)
        if lo <= safe_max:
            # two significant digits for a config a person reads, three when two would
            # widen the band by more than 5 % (a leading 1), more when the plateau is tight
            w = float(_round(lo, 2, up=True))
            if w > 1.05 * lo:
                w = float(_round(lo, 3, up=True))
            if w > safe_max:
                w = float(_round(lo, 4, up=True))
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
                w = float(_round(safe_max, 3, up=False))
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
                w = float(_round((plateau.width_min + plateau.width_max) / 2.0, 3, up=False))
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
    )
    if sug.width is not None:
        _recommend_and_check(data, res)
    return res


def _adaptive_window(data: ChannelData) -> float:
    from .core.noise import MIN_SAMPLES

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
    assert sug.width is not None and res.safe_min is not None and res.safe_max is not None
    center = float(f"{res.center:.10g}")
    fixed: dict[str, Any] = {"center": center, "width": sug.width}
    k = float(_round(sug.k if sug.k is not None else 0.0, 3, up=True))
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
        adaptive["min_width"] = float(_round(max(lo_safe, sug.width * 0.5), 2, up=True))
        adaptive["max_width"] = float(_round(hi_safe, 2, up=False))
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
    from .core.channel import ChannelConditioner

    ch = data.channel.model_copy(update={"band": band})
    return ChannelConditioner(ch, data.fs, data.cfg.stats)


def _records(cond: Any, data: ChannelData, a: int, b: int) -> list[dict[str, Any]]:
    """The records ``cond`` gives for samples [a, b) of the channel."""
    return [rec for _i, _rank, rec in cond.process(data.t[a:b], data.raw[a:b])]


# --- output ------------------------------------------------------------------------------------


def _num(x: float | None) -> float | None:
    if x is None or not math.isfinite(x):
        return None
    return float(x)


def to_json(res: TuneResult) -> dict[str, Any]:
    """The DESIGN keys (``noise_sigma``, ``zero_upcrossing_rate_hz``, ``suggested``, ``sweep``)
    and extras."""
    s = res.suggestion
    sweep = []
    for i, (w, e, r) in enumerate(zip(res.widths.tolist(), res.edges.tolist(), res.rates.tolist())):
        row: dict[str, Any] = {"width": w, "edges": e, "predicted_false_rate_per_hour": r}
        row["k"] = w / res.sigma
        if res.edges_dwell is not None:
            row["edges_with_dwell"] = int(res.edges_dwell[i])
        sweep.append(row)
    p = res.plateau
    out: dict[str, Any] = {
        "channel": res.channel,
        "unit": res.unit,
        "samples": res.samples,
        "sample_rate_hz": res.sample_rate_hz,
        "duration_s": res.duration_s,
        "bad_lines": res.bad_lines,
        "gaps": res.gaps,
        "fault_samples": res.fault_samples,
        "filter": res.filter_text,
        "dwell": {"rise_s": res.dwell[0], "fall_s": res.dwell[1]},
        "noise_sigma": res.sigma,
        "zero_upcrossing_rate_hz": res.nu0_hz,
        "center": res.center,
        "target_rate_per_hour": res.target_rate_per_hour,
        "target_rate_is_default": res.target_is_default,
        "rice_min_width": res.rice_width,
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
            "k_min": p.width_min / res.sigma,
            "k_max": p.width_max / res.sigma,
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
            "adaptive": "band = " + inline_table(res.adaptive_band or {}),
        },
        "check": res.check or None,
        "advice": res.advice,
        "sweep": sweep,
    }
    return out


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


def format_report(res: TuneResult, plot_path: str | None = None) -> str:
    """The table and the plain-words recommendation (the default output)."""
    u = f" {res.unit}" if res.unit else ""
    L: list[str] = []
    L.append(
        f"Channel {res.channel}: {res.samples:,} samples at {res.sample_rate_hz:g} Hz "
        f"({res.duration_s:.1f} s); prefilter {res.filter_text}"
        + (f"; dwell rise {res.dwell[0]:g} s, fall {res.dwell[1]:g} s" if any(res.dwell) else "")
    )
    if res.fault_samples:
        L.append(
            f"{res.fault_samples:,} samples at the sensor-fault limits were left out, as the "
            f"channel leaves them out (no filter, noise estimate or comparator sees them)."
        )
    L.append(
        f"Noise of the conditioned signal: σ̂ = {_g(res.sigma)}{u}, zero up-crossing rate "
        f"ν0 = {_g(res.nu0_hz)} Hz. Band centre {_g(res.center, 6)}{u}."
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
        kr = f"{_g(w0 / res.sigma)} – {_g(w1 / res.sigma)}" if b > a else _g(w0 / res.sigma)
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
            f"({_g(p.width_min / res.sigma)}σ̂ – {_g(p.width_max / res.sigma)}σ̂) gives "
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
    L.append(
        f"Target: at most {tgt} from noise alone; Rice's formula asks for a width "
        f"of at least {_g(res.rice_width)}{u} ({res.rice_width / res.sigma:.2f}σ̂)."
    )
    s = res.suggestion
    if s.width is not None:
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
        rate_now = _rate(float(rice_rate_per_hour(cw, res.sigma, res.nu0_hz)))
        L.append(
            f"The config's present width is {_g(cw)}{u} ({cw / res.sigma:.2f}σ̂, predicted "
            f"{rate_now} per hour{cnt}{count_note})."
        )
    if plot_path:
        L.append("")
        L.append(f"Picture: {plot_path}")
    return "\n".join(L) + "\n"


# --- the picture -------------------------------------------------------------------------------


def worst_chatter(t: np.ndarray, v: np.ndarray, center: float) -> tuple[float, float, int]:
    """The stretch where a bare comparator at ``center`` flips most: (t0, t1, flips).

    Flips of ``v > center`` are counted in every window of 1 % of the recording (at least 20
    samples) starting at a flip; the densest window's flips, padded on both sides, are returned.
    """
    flips = np.flatnonzero(np.diff(v > center)) + 1
    dur = float(t[-1] - t[0])
    span = max(0.01 * dur, 20.0 * dur / max(t.size - 1, 1))
    if flips.size == 0:
        mid = float(t[t.size // 2])
        return mid - 2 * span, mid + 2 * span, 0
    tf = t[flips]
    j_end = np.searchsorted(tf, tf + span, side="right")
    cnt = j_end - np.arange(tf.size)
    i = int(np.argmax(cnt))
    a, b = float(tf[i]), float(tf[j_end[i] - 1])
    pad = max(0.75 * (b - a), span)
    return max(a - pad, float(t[0])), min(b + pad, float(t[-1])), int(cnt[i])


def plot(res: TuneResult, data: ChannelData, path: str | Path) -> None:
    """Trace with the suggested band and its edges, a zoom on the worst chatter, the sweep."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    ulab = f" ({res.unit})" if res.unit else ""
    s = res.suggestion
    c = res.center
    lo = hi = None
    if s.width is not None:
        lo, hi = c - s.width / 2.0, c + s.width / 2.0
    t = data.t
    ty = t - data.delay_s  # the filtered trace, shifted back by the delay the edge times drop

    fig = plt.figure(figsize=(11.5, 12.0), dpi=100, layout="constrained")
    gs = fig.add_gridspec(3, 1, height_ratios=[1.0, 1.0, 1.35])
    ax1 = fig.add_subplot(gs[0])
    ax2 = fig.add_subplot(gs[1])
    ax3 = fig.add_subplot(gs[2])
    title = f"streamcond tune — channel {res.channel}"
    sub = (
        rf"noise $\hat\sigma$ = {_g(res.sigma)}{' ' + res.unit if res.unit else ''}, "
        rf"zero up-crossing rate $\nu_0$ = {_g(res.nu0_hz)} Hz; prefilter {res.filter_text}; "
        f"{res.samples:,} samples at {res.sample_rate_hz:g} Hz"
    )
    if res.fixed_band is not None:
        verdict = "meets" if s.meets_target else "does NOT meet"
        sub += (
            f"\nsuggested: band = {inline_table(res.fixed_band)} — {verdict} the target of "
            f"{res.target_rate_per_hour:.3g} false edges per hour"
        )
    else:
        sub += "\nno band suggested: the edge count never settles (see the report)"
    fig.suptitle(title + "\n" + sub, fontsize=12)

    # 1. the whole trace
    step = max(1, t.size // 200_000)  # enough points for the eye, not for the file size
    ax1.plot(t[::step], data.v[::step], color="0.75", lw=0.6, label="scaled input")
    ax1.plot(ty[::step], data.y[::step], color="C0", lw=0.8, label="conditioned")
    edges = res.fixed_edge_records

    def mark_edges(ax, t0: float | None = None, t1: float | None = None) -> None:
        if lo is None:
            return
        ax.axhspan(lo, hi, color="C2", alpha=0.18, lw=0)
        ax.axhline(hi, color="C2", lw=0.9)
        ax.axhline(lo, color="C2", lw=0.9)
        er = [r for r in edges if (t0 is None or t0 <= r["t"] <= t1)]
        # the threshold the conditioned signal crossed (before invert: rising input → upper)
        inv = data.channel.invert
        up = [r["t"] for r in er if (r["level"] == 1) != inv]
        dn = [r["t"] for r in er if (r["level"] == 1) == inv]
        ax.plot(up, [hi] * len(up), "^", color="C2", mec="k", mew=0.6, ms=8, zorder=5)
        ax.plot(dn, [lo] * len(dn), "v", color="C3", mec="k", mew=0.6, ms=8, zorder=5)

    mark_edges(ax1)
    ax1.axhline(c, color="k", lw=0.7, ls="--")
    ax1.set_xlim(float(t[0]), float(t[-1]))
    ax1.set_xlabel("sample time (s)")
    ax1.set_ylabel(f"{res.channel}{ulab}")
    ax1.grid(alpha=0.3)
    n_up = sum(1 for r in edges if r["level"] == 1)
    n_dn = len(edges) - n_up
    handles = [
        Line2D([], [], color="0.75", lw=1.2, label="scaled input"),
        Line2D([], [], color="C0", lw=1.2, label="conditioned"),
        Line2D([], [], color="k", lw=0.8, ls="--", label=f"centre {_g(c, 6)}"),
    ]
    if lo is not None:
        handles += [
            Patch(color="C2", alpha=0.3, label=f"suggested band, width {_g(s.width, 6)}"),
            Line2D([], [], ls="", marker="^", color="C2", mec="k", label=f"rising edges ({n_up})"),
            Line2D([], [], ls="", marker="v", color="C3", mec="k", label=f"falling edges ({n_dn})"),
        ]
    ax1.legend(handles=handles, loc="best", fontsize=8, ncol=2, framealpha=0.9)
    dw = " (with the channel's dwell)" if any(res.dwell) else ""
    ax1.set_title(f"Whole recording: the edges the suggested band gives{dw}", fontsize=10)

    # 2. zoom on the worst chatter of a bare comparator at the centre
    z0, z1, _densest = worst_chatter(t, data.v, c)
    sel = (t >= z0) & (t <= z1)
    sely = (ty >= z0) & (ty <= z1)
    ax2.plot(t[sel], data.v[sel], color="0.6", lw=0.8, marker=".", ms=2, label="scaled input")
    ax2.plot(ty[sely], data.y[sely], color="C0", lw=1.2, label="conditioned")
    vz = data.v[sel]
    fl = np.flatnonzero(np.diff(vz > c)) + 1
    tz = t[sel]
    if fl.size:
        ax2.plot(tz[fl], np.full(fl.size, c), "|", color="C3", ms=14, mew=1.2, zorder=4)
    ax2.axhline(c, color="k", lw=0.7, ls="--")
    mark_edges(ax2, z0, z1)
    vals = np.concatenate([vz, data.y[sely]]) if sely.any() else vz
    ylo, yhi = float(np.nanmin(vals)), float(np.nanmax(vals))
    if lo is not None:
        ylo, yhi = min(ylo, lo), max(yhi, hi)
    pad = 0.08 * (yhi - ylo or 1.0)
    ax2.set_ylim(ylo - pad, yhi + pad)
    ax2.set_xlim(z0, z1)
    ax2.set_xlabel("sample time (s)")
    ax2.set_ylabel(f"{res.channel}{ulab}")
    ax2.grid(alpha=0.3)
    nz = sum(1 for r in edges if z0 <= r["t"] <= z1)
    nflip = int(fl.size)  # the flips shown, in the same stretch as the edges counted
    gives = f"the suggested band gives {nz} edge{'s' if nz != 1 else ''}"
    if nflip > max(2, 1.2 * nz):
        ztitle = (
            f"Zoom on the worst chatter: a bare comparator at the centre flips {nflip} times "
            f"here (red ticks); {gives}"
        )
    else:
        ztitle = (
            f"Zoom on the busiest stretch: a bare comparator at the centre flips "
            f"{'once' if nflip == 1 else f'{nflip} times'} here (red ticks; no chatter); {gives}"
        )
    ax2.set_title(ztitle, fontsize=10)
    handles2 = [
        Line2D([], [], color="0.6", marker=".", lw=0.8, label="scaled input"),
        Line2D([], [], color="C0", lw=1.2, label="conditioned"),
        Line2D([], [], color="C3", ls="", marker="|", ms=10, mew=1.2,
               label="bare comparator flips"),
    ]
    if lo is not None:
        handles2.append(Patch(color="C2", alpha=0.3, label="suggested band"))
    ax2.legend(handles=handles2, loc="upper left", fontsize=8, framealpha=0.9)

    # 3. the sweep
    w = res.widths
    ax3.plot(w, res.edges, "o-", color="C0", ms=3, lw=1.2, label="edges, band alone")
    if res.edges_dwell is not None:
        ax3.plot(w, res.edges_dwell, "s--", color="C4", ms=2.5, lw=0.9,
                 label=f"edges with the dwell ({res.dwell[0]:g} s / {res.dwell[1]:g} s)")
    ax3.set_xscale("log")
    emax = int(max(res.edges.max(), 1))
    p = res.plateau
    if p is not None and emax > 20 * max(p.edges, 1):
        ax3.set_yscale("symlog", linthresh=max(1, p.edges))
    ax3.set_ylim(bottom=0)
    if p is not None:
        ax3.axvspan(p.width_min, p.width_max, color="C2", alpha=0.15, lw=0,
                    label=f"plateau: {p.edges} edges")
        if res.safe_min is not None and res.safe_max is not None and res.safe_max > res.safe_min:
            ax3.axvspan(res.safe_min, res.safe_max, ymax=0.04, color="C2", alpha=0.7, lw=0,
                        label=rf"safe part ({EDGE_MARGIN_SIGMA:g}$\hat\sigma$ inside each end)")
    if s.width is not None:
        ax3.axvline(s.width, color="C2", lw=2.0,
                    label=f"suggested {_g(s.width, 6)} (k = {s.k:.2f})")
    if res.rice_width > 0:
        ax3.axvline(res.rice_width, color="C1", lw=1.0, ls=":",
                    label=f"narrowest for the target ({_g(res.rice_width)})")
    if res.configured_width is not None and w[0] <= res.configured_width <= w[-1]:
        ax3.axvline(res.configured_width, color="0.4", lw=1.0, ls="--",
                    label=f"configured now ({_g(res.configured_width)})")
    ax3.set_xlabel(f"band width{ulab}  (log scale)")
    ax3.set_ylabel("edges on this recording")
    ax3.grid(alpha=0.3, which="both")
    sec = ax3.secondary_xaxis("top", functions=(lambda x: x / res.sigma, lambda k: k * res.sigma))
    sec.set_xlabel(r"k = width / $\hat\sigma$")
    ax3r = ax3.twinx()
    ax3r.plot(w, res.rates, color="C1", lw=1.2, label="predicted false edges/h (Rice)")
    ax3r.axhline(res.target_rate_per_hour, color="C1", lw=0.9, ls="--",
                 label=f"target {res.target_rate_per_hour:.3g}/h")
    ax3r.set_yscale("log")
    rmax = float(np.nanmax(res.rates))
    ax3r.set_ylim(max(min(res.target_rate_per_hour / 1e3, rmax / 1e6), 1e-12), rmax * 3)
    ax3r.set_ylabel("predicted false edges per hour (Rice)", color="C1")
    ax3r.tick_params(axis="y", colors="C1")
    h1, l1 = ax3.get_legend_handles_labels()
    h2, l2 = ax3r.get_legend_handles_labels()
    ax3.legend(h1 + h2, l1 + l2, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=4,
               fontsize=8, frameon=False)
    ax3.set_title("Sweep: edge count vs band width (the real transitions form the plateau)",
                  fontsize=10)
    try:
        fig.savefig(path)
    except OSError as e:
        raise InputError(f"The picture {str(path)!r} cannot be written: {e.strerror}") from None
    finally:
        plt.close(fig)


# --- the command -------------------------------------------------------------------------------


def run(
    config_path: str,
    recording: str,
    channel: str,
    target_rate_per_hour: float | None = None,
) -> tuple[TuneResult, ChannelData]:
    """Load, read and analyse (no output): the library entry point behind the command."""
    cfg = load_config(config_path)
    ch = pick_channel(cfg, channel, repr(str(config_path)))
    data = read_channel(cfg, recording, ch)
    return analyse(data, target_rate_per_hour), data


def main(args: argparse.Namespace, out: TextIO | None = None) -> int:
    """``streamcond tune``: exit code 0 (errors are raised as StreamcondError, exit 2)."""
    out = out or sys.stdout
    res, data = run(args.config, args.recording, args.channel, args.target_rate)
    if args.plot:
        plot(res, data, args.plot)
    if args.json:
        doc = to_json(res)
        if args.plot:
            doc["plot"] = str(args.plot)
        out.write(json.dumps(doc, indent=2, allow_nan=False, default=_json_default) + "\n")
    else:
        out.write(format_report(res, args.plot))
    return 0


def _json_default(o: Any) -> Any:
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return float(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")
