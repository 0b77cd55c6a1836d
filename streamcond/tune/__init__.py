"""``streamcond tune``: measure each channel's noise on a recording (or the live port) and suggest
a hysteresis band.

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

Unreliable noise estimate: when :func:`~streamcond.core.noise.estimate_noise` says it could
not separate the noise from the signal (``reliable`` false, with a ``reason``), ``tune`` says so
and sizes the band from the plateau alone: the middle of the plateau on the log-width scale,
with no Rice figures.

Pulse channels (:mod:`streamcond.tune.pulse`): a signal that sits at two levels and jumps
between them many times (a paddle wheel, a reed contact, a tachometer) is tuned differently:
the band goes between the two levels, the dwell is sized from the bounce measured at the edges,
and the pulse rate is reported; the noise sweep and Rice's formula say nothing useful there.

Layout: :mod:`.reading` (the I/O edge: a recording or the live port → the conditioned samples),
:mod:`.sweep` and :mod:`.analysis` and :mod:`.pulse` (pure: samples in, a result out),
:mod:`.report`, :mod:`.jsonview` and :mod:`.plot` (views of the result), :mod:`.write` (``--write``:
the config edited in place, comments kept), :mod:`.command` (the command).
"""

from __future__ import annotations

from .analysis import (
    ADAPTIVE_CHECK_SAMPLES,
    EDGE_MARGIN_SIGMA,
    PLAUSIBLE_PLATEAU_SIGMA,
    Suggestion,
    TuneResult,
    analyse,
)
from .command import main, run, run_all
from .jsonview import to_json
from .numbers import inline_table, toml_number
from .reading import ChannelData, pick_channel, read_channel, read_channels
from .report import format_report
from .rice import DEFAULT_TARGET_RATE_PER_HOUR, TARGET_RATE_HELP, rice_min_width, rice_rate_per_hour
from .sweep import (
    MIN_PLATEAU_POINTS,
    SWEEP_BASE_POINTS,
    SWEEP_K_BASE_MAX,
    SWEEP_K_MIN,
    Plateau,
    count_edges,
    count_edges_dwell,
    find_plateau,
    sweep_widths,
)

__all__ = [
    "ADAPTIVE_CHECK_SAMPLES", "ChannelData", "DEFAULT_TARGET_RATE_PER_HOUR", "EDGE_MARGIN_SIGMA",
    "MIN_PLATEAU_POINTS", "PLAUSIBLE_PLATEAU_SIGMA", "Plateau", "SWEEP_BASE_POINTS",
    "SWEEP_K_BASE_MAX", "SWEEP_K_MIN", "Suggestion", "TARGET_RATE_HELP", "TuneResult", "analyse",
    "count_edges", "count_edges_dwell", "find_plateau", "format_report", "inline_table", "main",
    "pick_channel", "read_channel", "read_channels", "rice_min_width", "rice_rate_per_hour", "run",
    "run_all", "sweep_widths", "to_json", "toml_number",
]
