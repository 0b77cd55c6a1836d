"""One design: the request in, the chosen values and all their consequences out.

This is the library entry point behind ``streamcond circuit``: it validates the request,
searches the series (:mod:`.search`), computes the worst case (:mod:`.worstcase`), the input RC
(:mod:`.rcfilter`) and, with a recording's evidence (:mod:`.evidence`), the margin of the
worst-case band against the measured noise by Rice's formula.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from ..errors import InputError
from . import eseries, rcfilter
from .evidence import Evidence, default_target_rate, rice_rate_per_hour
from .networks import CIRCUITS, Conditions, inverted, output_levels
from .search import Choice, NoNetwork, reference_for, search
from .worstcase import Spread, Tolerances, spread

#: Default comparator input offset, volts: the data-sheet maximum of common general-purpose
#: comparators is a few millivolts (5 mV for the LM393 class at 25 °C, from memory).
DEFAULT_OFFSET_V: float = 0.005
#: Default supply tolerance: a common regulator's rating over line, load and temperature
#: (common practice, no published source).
DEFAULT_SUPPLY_TOLERANCE: float = 0.02
#: Default tolerance of an explicit reference (common practice, no published source).
DEFAULT_REF_TOLERANCE: float = 0.01
DEFAULT_PULLUP: float = 10e3
DEFAULT_RANGE: tuple[float, float] = (1e3, 1e6)
#: The triple search visits n³ networks (six decades of E96: 577 values, 1.9·10^8 networks,
#: some seconds); more would take minutes.
MAX_TRIPLE_VALUES: int = 600


@dataclass
class Spec:
    """What is asked for (volts at the signal input, ohms, fractions)."""

    circuit: str
    want_low: float
    want_high: float
    v_pos: float
    v_neg: float = 0.0
    ref: float | None = None  # None: ground (two-resistor circuits) or the supply (single)
    output: str = "push-pull"
    loss: tuple[float, float] = (0.0, 0.0)  # output loss per rail, min and max, volts
    r_pullup: float | None = None
    series: str = "E24"
    tolerance: float | None = None  # None: the series' own (IEC 60063)
    r_range: tuple[float, float] = DEFAULT_RANGE
    max_current: float | None = None
    v_os: float = DEFAULT_OFFSET_V
    supply_tolerance: float = DEFAULT_SUPPLY_TOLERANCE
    ref_tolerance: float = DEFAULT_REF_TOLERANCE
    rc_tau: float | None = None
    cap_series: str = "E12"
    evidence: Evidence | None = None
    target_rate_per_hour: float | None = None

    @property
    def open_drain(self) -> bool:
        return self.output == "open-drain"

    @property
    def ref_follows_supply(self) -> bool:
        return self.circuit == "single-supply" and self.ref is None

    @property
    def resistor_tolerance(self) -> float:
        if self.tolerance is not None:
            return self.tolerance
        return eseries.DEFAULT_TOLERANCE[self.series]

    def conditions(self) -> Conditions:
        """The nominal surroundings (offset 0, loss at the middle of its range)."""
        mid = 0.5 * (self.loss[0] + self.loss[1])
        if self.ref is not None:
            v_ref = self.ref
        else:
            v_ref = self.v_pos if self.circuit == "single-supply" else 0.0
        return Conditions(v_pos=self.v_pos, v_neg=self.v_neg, v_ref=v_ref, loss_high=mid,
                          loss_low=mid, v_os=0.0, open_drain=self.open_drain)

    def tolerances(self) -> Tolerances:
        return Tolerances(
            resistor=self.resistor_tolerance,
            supply=self.supply_tolerance,
            loss_high=self.loss,
            loss_low=self.loss,
            v_os=self.v_os,
            ref=self.ref_tolerance if self.ref is not None else 0.0,
        )


@dataclass
class Margin:
    """The worst-case band against the measured noise (volts at the input)."""

    center: float
    sigma: float
    nu0_hz: float
    filtered: bool  # σ̂ of the prefiltered signal (the RC matches it) or of the raw one
    distance: float  # from the centre to the nearer worst-case threshold
    margin_sigma: float
    rate_per_hour: float
    target_rate_per_hour: float
    holds: bool
    too_wide: bool  # the largest worst-case hysteresis is wider than the plateau
    plateau_width: float | None
    unreliable: str | None = None  # why σ̂ may not be the noise alone (None: it is)


@dataclass
class Design:
    spec: Spec
    choice: Choice
    output_low: float
    output_high: float
    spread: Spread
    reference_needed: float | None
    rc: rcfilter.RCFilter | None
    rc_note: str | None
    margin: Margin | None
    warnings: list[str] = field(default_factory=list)

    @property
    def inverted(self) -> bool:
        return inverted(self.spec.circuit)


def validate(spec: Spec) -> None:
    """Plain sentences for a request that cannot be designed (InputError, exit 2)."""
    problems: list[str] = []
    if spec.circuit not in CIRCUITS:
        problems.append(f"--circuit must be one of {', '.join(CIRCUITS)}")
    if spec.series not in eseries.RESISTOR_SERIES:
        problems.append(f"--series must be one of {', '.join(eseries.RESISTOR_SERIES)}")
    for name, v in (("--low", spec.want_low), ("--high", spec.want_high)):
        if not math.isfinite(v):
            problems.append(f"{name} must be a finite number of volts")
    if math.isfinite(spec.want_low) and math.isfinite(spec.want_high):
        if not spec.want_low < spec.want_high:
            problems.append(
                f"The lower threshold ({spec.want_low:g} V) must be below the upper one "
                f"({spec.want_high:g} V)"
            )
    if not spec.v_pos > spec.v_neg:
        problems.append("The supply must have its positive rail above its negative one")
    lo_v, hi_v = output_levels(spec.conditions().with_(loss_low=spec.loss[1],
                                                       loss_high=spec.loss[1]))
    if not hi_v > lo_v:
        problems.append(
            f"An output loss of {spec.loss[1]:g} V per rail leaves no swing on a "
            f"{spec.v_pos - spec.v_neg:g} V supply"
        )
    a, b = spec.r_range
    if not (0 < a < b and math.isfinite(b)):
        problems.append("--range must be two resistances, the smaller first (e.g. 1k:1M)")
    if spec.open_drain and not (spec.r_pullup and spec.r_pullup > 0):
        problems.append("An open-drain output needs a pull-up resistance (--pullup)")
    if problems:
        raise InputError(problems)


def design(spec: Spec) -> Design:
    """Search, worst case, RC filter and margin for ``spec``."""
    validate(spec)
    cond = spec.conditions()
    vals = eseries.values(spec.series, *spec.r_range)
    if vals.size < 2:
        raise InputError(f"The range holds fewer than two {spec.series} values; widen --range")
    if spec.circuit == "single-supply" and vals.size > MAX_TRIPLE_VALUES:
        raise InputError(
            f"The range holds {vals.size} {spec.series} values, and the search tries every "
            f"triple of them; narrow --range to at most six decades of E96 (or a coarser series)"
        )
    r_pullup = spec.r_pullup if spec.open_drain else None
    try:
        choice = search(spec.circuit, spec.want_low, spec.want_high, vals, cond,
                        r_pullup=r_pullup, max_current=spec.max_current)
    except NoNetwork:
        raise InputError(
            f"No {spec.series} network in the range draws at most "
            f"{spec.max_current * 1e3:g} mA (--max-current); raise the limit or the range"
        ) from None
    out_lo, out_hi = output_levels(cond)
    sp = spread(spec.circuit, choice.resistors, cond, spec.tolerances(), spec.ref_follows_supply)
    warnings: list[str] = []
    hyst = spec.want_high - spec.want_low
    ref_needed = reference_for(spec.circuit, spec.want_low, spec.want_high, cond)
    rails = (spec.v_neg, spec.v_pos)
    if ref_needed is not None and not rails[0] <= ref_needed <= rails[1] \
            and abs(ref_needed - float(cond.v_ref)) > 0.01 * hyst:
        warnings.append(
            f"This circuit cannot place both thresholds: it would need a reference of "
            f"{ref_needed:.4g} V, outside the supply; use the single-supply circuit, or another "
            f"supply"
        )
    elif ref_needed is not None and abs(ref_needed - float(cond.v_ref)) > 0.01 * hyst:
        warnings.append(
            f"With the reference at {float(cond.v_ref):g} V this circuit cannot place both "
            f"thresholds (it sets the hysteresis, and the reference sets where it sits): a "
            f"reference of {ref_needed:.4g} V would (--ref), or use the single-supply circuit, "
            f"whose divider makes its own reference"
        )
    elif ref_needed is None:
        if not _reachable(spec, cond):
            warnings.append(
                "These thresholds lie outside what this supply and output swing can reach "
                "with a divider: each threshold must lie between ground and the divider's top, "
                "and the hysteresis must be smaller than the output's swing"
            )
        elif choice.error > 0.02 * hyst:
            finer = "a wider --range" if spec.series == "E96" else \
                "a finer series (--series E96) or a wider --range"
            warnings.append(
                f"The nearest {spec.series} network misses the request by "
                f"{choice.error * 1e3:.3g} mV ({choice.error / hyst * 100:.2g} % of the "
                f"hysteresis); {finer} may come closer"
            )
    if spec.circuit != "non-inverting" and (spec.want_low < rails[0] or spec.want_high > rails[1]):
        warnings.append(
            "A threshold lies outside the supply rails, where the signal on the comparator's "
            "input cannot go (its inputs must stay within their common-mode range)"
        )
    if not sp.monotone:
        warnings.append(
            "A threshold is not monotone in some quantity over the tolerance box, so the "
            "corner bounds are estimates; the Monte Carlo points still hold"
        )
    if spec.evidence is not None and spec.evidence.scale < 0:
        warnings.append(
            "The scaling is negative (gain × --volts-per-raw < 0): a rising value is a falling "
            "voltage at the input, so the output's sense is turned over against the channel's"
        )
    rc, rc_note = _rc(spec)
    if spec.circuit == "non-inverting":
        # the source drives r_in and r_feedback in series, so its own resistance adds to r_in
        extra = " and so does the input RC's resistor (put it before a buffer)" if rc else ""
        warnings.append(
            f"The non-inverting circuit loads the signal through r_in: the source's own "
            f"resistance adds to r_in and shifts the thresholds{extra}"
        )
    if rc is not None and abs(rc.error) > 0.05:
        warnings.append(
            f"No standard R ({eseries.format_ohms(rcfilter.R_RANGE[0])}–"
            f"{eseries.format_ohms(rcfilter.R_RANGE[1])}) and C "
            f"({eseries.format_farads(rcfilter.C_RANGE[0])}–"
            f"{eseries.format_farads(rcfilter.C_RANGE[1])}) come within 5 % of τ = "
            f"{rc.tau_wanted:g} s"
        )
    margin = _margin(spec, sp, rc) if spec.evidence is not None else None
    return Design(spec, choice, float(out_lo), float(out_hi), sp, ref_needed, rc, rc_note,
                  margin, warnings)


def _reachable(spec: Spec, cond: Conditions) -> bool:
    """Whether a single-supply divider can meet the request with a push-pull output.

    With a = hysteresis/swing the node's weights are a (output), t = (L − a·V_ol)/V_top
    (top) and 1 − a − t (bottom); all three must be positive. An open-drain output moves
    the figures a little (the pull-up), so this is a guide, not a proof, there.
    """
    v_lo, v_hi = output_levels(cond)
    swing = float(v_hi - v_lo)
    top = float(cond.v_ref)
    if swing <= 0 or top <= 0:
        return False
    a = (spec.want_high - spec.want_low) / swing
    t = (spec.want_low - a * float(v_lo)) / top
    return 0 < a < 1 and t > 0 and a + t < 1


def _rc(spec: Spec) -> tuple[rcfilter.RCFilter | None, str | None]:
    tau, note = None, None
    source = ""
    if spec.rc_tau is not None:
        tau, source = spec.rc_tau, f"τ = {spec.rc_tau:g} s (--rc-tau)"
    elif spec.evidence is not None:
        ev = spec.evidence
        tau, source = rcfilter.tau_of_filter(ev.filter_kind, ev.filter_params)
        if tau is None:
            note, source = source, ""
    if tau is None:
        return None, note
    return rcfilter.match(tau, spec.series, spec.cap_series, source), None


def _margin(spec: Spec, sp: Spread, rc: rcfilter.RCFilter | None) -> Margin:
    ev = spec.evidence
    assert ev is not None
    # The comparator sees the prefiltered noise only through a matching RC (or no prefilter).
    matched = rc is not None and spec.rc_tau is None
    filtered = matched or ev.filter_kind == "none"
    sigma, nu0 = ev.noise_volts(filtered)
    target = spec.target_rate_per_hour or ev.target_rate_per_hour or default_target_rate()
    reason = ev.unreliable[0 if filtered else 1]
    c = 0.5 * (spec.want_low + spec.want_high)
    lo_w, hi_w = sp.narrowest
    d = min(hi_w - c, c - lo_w)
    if sigma > 0:
        m = d / sigma
        # Rice: up-crossings of the nearer worst-case threshold by noise about the centre;
        # a threshold already past the centre leaves the comparator at the bare-threshold
        # chatter rate, 3600·ν0 per hour.
        rate = rice_rate_per_hour(d, sigma, nu0) if d > 0 else 3600.0 * nu0
    else:
        m, rate = math.inf, 0.0
    plateau = None if ev.plateau_width_max is None else ev.plateau_width_max * abs(ev.scale)
    # a unit's band is its hysteresis: wider than the plateau, it misses real transitions
    wide = plateau is not None and sp.hysteresis[1] > plateau
    return Margin(c, sigma, nu0, filtered, d, m, rate, target, d > 0 and rate <= target,
                  wide, plateau, reason)
