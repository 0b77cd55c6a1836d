"""An input RC filter that matches the channel's software prefilter.

A first-order RC lowpass (series R, C to ground, at the comparator's signal input) has the
step response 1 − exp(−t/RC). The ``ema`` prefilter is that response sampled (its
α = 1 − exp(−dt/τ), see :class:`streamcond.core.filters.EmaFilter`), so it matches an RC of
τ = RC exactly; a first-order Butterworth ``lowpass`` of cutoff f_c matches τ = 1/(2π·f_c)
(the −3 dB point of an RC is 1/(2πRC)). Higher orders, medians and moving averages have no
single-RC equivalent.

The R is taken from the resistor series and the C from E6 or E12 (IEC 60063); every pair in
the ranges is tried and the one with the τ nearest (in ratio) wins; among those within
:data:`TIE_RATIO` of the best, the R nearest :data:`R_PREFERRED` (common practice, no published
source: low enough that the comparator's input bias current drops little across it, high
enough not to load the source).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import eseries

R_RANGE: tuple[float, float] = (1e3, 100e3)
C_RANGE: tuple[float, float] = (100e-12, 10e-6)
R_PREFERRED: float = 10e3
TIE_RATIO: float = 0.005


@dataclass
class RCFilter:
    tau_wanted: float
    r: float
    c: float
    source: str  # what the τ came from

    @property
    def tau(self) -> float:
        return self.r * self.c

    @property
    def error(self) -> float:
        """Relative error of the τ the parts give."""
        return self.tau / self.tau_wanted - 1.0

    def to_json(self) -> dict[str, Any]:
        return {"r": self.r, "c": self.c, "tau_s": self.tau, "tau_wanted_s": self.tau_wanted,
                "error": self.error, "from": self.source}


def tau_of_filter(kind: str, params: dict[str, Any]) -> tuple[float | None, str]:
    """(τ, description) of a prefilter, or (None, why not) when no single RC matches it."""
    if kind == "ema":
        tau = float(params["tau_s"])
        return tau, f"ema τ = {tau:g} s"
    if kind == "lowpass":
        fc, order = float(params["cutoff_hz"]), int(params.get("order", 2))
        if order == 1:
            return 1.0 / (2.0 * math.pi * fc), f"first-order lowpass at {fc:g} Hz"
        return None, (f"the channel's lowpass is of order {order}; a single RC is first-order "
                      f"and matches only order 1")
    if kind == "none":
        return None, "the channel has no prefilter"
    return None, f"a {kind} prefilter has no RC equivalent"


def match(tau: float, resistor_series: str, cap_series: str = "E12",
          source: str = "") -> RCFilter:
    """The standard R and C whose product is nearest ``tau`` seconds (module docstring)."""
    if not (tau > 0 and math.isfinite(tau)):
        raise ValueError("the RC time constant must be a positive number of seconds")
    r = eseries.values(resistor_series, *R_RANGE)
    c = eseries.values(cap_series, *C_RANGE)
    err = np.abs(np.log(r[:, None] * c[None, :] / tau))
    best = float(err.min())
    pref = np.where(err <= best + TIE_RATIO, np.abs(np.log(r / R_PREFERRED))[:, None], np.inf)
    i, j = np.unravel_index(int(np.argmin(pref)), pref.shape)
    return RCFilter(tau, float(r[i]), float(c[j]), source)
