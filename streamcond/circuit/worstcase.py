"""Worst case of the thresholds over the tolerances: corners of the box, and Monte Carlo.

The uncertain quantities are each resistor (±tolerance), each supply rail (±supply
tolerance; the single-supply divider's top and an open-drain pull-up return to the positive
rail, so they move *with* it), the output's loss per rail (a range), the comparator's input
offset (±V_os) and an explicit reference (±its tolerance). Together they span a box.

**Interval (extreme-value) analysis.** Each threshold is a conductance-weighted mean of the
node's source voltages (:mod:`.networks`), which is monotone in every resistor, rail, loss and
offset as long as no source voltage changes sides with the node — so its extremes over the box
lie at corners, and evaluating all 2^k corners (k ≤ 10: at most 1024 networks, one vectorised
call) gives the exact interval. Whether the monotonicity held is checked on the corners
themselves (each parameter must move the threshold the same way at every corner); when it
does not, the result says so and the corner bounds are then only estimates.

**Monte Carlo.** :data:`DRAWS` draws, every quantity independently uniform over its interval
(uniform is the conservative choice for parts screened to a tolerance), fixed seed
:data:`SEED` so that the report is reproducible; the 0.1 % and 99.9 % points of each threshold
and of the hysteresis are reported. They lie inside the corner bounds — the tests check it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from .networks import Conditions, thresholds

DRAWS: int = 100_000
SEED: int = 60063  # fixed: the same report every run
QUANTILES: tuple[float, float] = (0.001, 0.999)


@dataclass(frozen=True)
class Tolerances:
    resistor: float  # fraction, 0.01 = ±1 %
    supply: float = 0.0  # fraction of each rail
    loss_high: tuple[float, float] = (0.0, 0.0)  # volts below the positive rail, output high
    loss_low: tuple[float, float] = (0.0, 0.0)  # volts above the negative rail, output low
    v_os: float = 0.0  # |input offset| at most, volts
    ref: float = 0.0  # fraction, for an explicit reference


@dataclass
class Spread:
    """Bounds of the thresholds and hysteresis: corners, and the Monte Carlo points."""

    low: tuple[float, float]
    high: tuple[float, float]
    hysteresis: tuple[float, float]
    mc_low: tuple[float, float]
    mc_high: tuple[float, float]
    mc_hysteresis: tuple[float, float]
    monotone: bool
    parameters: dict[str, tuple[float, float]] = field(default_factory=dict)
    #: per quantity: the largest move of either threshold from nominal when only it varies
    contributions: dict[str, float] = field(default_factory=dict)

    @property
    def narrowest(self) -> tuple[float, float]:
        """The band every network in the box contains: [max of low, min of high]."""
        return self.low[1], self.high[0]

    @property
    def widest(self) -> tuple[float, float]:
        return self.low[0], self.high[1]


def box(resistors: dict[str, float], nominal: Conditions, tol: Tolerances,
        ref_follows_supply: bool) -> dict[str, tuple[float, float]]:
    """The interval of every uncertain quantity (a degenerate one is left out)."""
    out: dict[str, tuple[float, float]] = {}
    for name, r in resistors.items():
        out[name] = (r * (1 - tol.resistor), r * (1 + tol.resistor))
    for rail in ("v_pos", "v_neg"):
        v = float(getattr(nominal, rail))
        out[rail] = tuple(sorted((v * (1 - tol.supply), v * (1 + tol.supply))))  # type: ignore
    if not nominal.open_drain:
        out["loss_high"] = tol.loss_high
    out["loss_low"] = tol.loss_low
    out["v_os"] = (-tol.v_os, tol.v_os)
    if not ref_follows_supply:
        v = float(nominal.v_ref)
        out["v_ref"] = tuple(sorted((v * (1 - tol.ref), v * (1 + tol.ref))))  # type: ignore
    return {k: (float(a), float(b)) for k, (a, b) in out.items() if b > a}


def _evaluate(circuit: str, resistors: dict[str, float], nominal: Conditions,
              ref_follows_supply: bool, p: dict[str, Any]) -> tuple[Any, Any]:
    r = {k: p.get(k, v) for k, v in resistors.items()}
    v_pos = p.get("v_pos", nominal.v_pos)
    cond = nominal.with_(
        v_pos=v_pos,
        v_neg=p.get("v_neg", nominal.v_neg),
        v_ref=v_pos if ref_follows_supply else p.get("v_ref", nominal.v_ref),
        loss_high=p.get("loss_high", nominal.loss_high),
        loss_low=p.get("loss_low", nominal.loss_low),
        v_os=p.get("v_os", nominal.v_os),
    )
    return thresholds(circuit, r, cond)


def _monotone(f: np.ndarray, k: int) -> bool:
    """Whether every parameter moves ``f`` the same way at every corner (bit i = parameter i)."""
    idx = np.arange(f.size)
    for i in range(k):
        up = (idx >> i) & 1 == 1
        d = f[idx[up]] - f[idx[up] ^ (1 << i)]
        if (d > 1e-12).any() and (d < -1e-12).any():
            return False
    return True


def spread(circuit: str, resistors: dict[str, float], nominal: Conditions, tol: Tolerances,
           ref_follows_supply: bool, draws: int = DRAWS, seed: int = SEED) -> Spread:
    """Corner bounds and Monte Carlo points of the thresholds (module docstring)."""
    bx = box(resistors, nominal, tol, ref_follows_supply)
    names = list(bx)
    k = len(names)
    bits = (np.arange(2 ** k)[:, None] >> np.arange(k)[None, :]) & 1
    corners = {n: np.where(bits[:, i] == 1, bx[n][1], bx[n][0]) for i, n in enumerate(names)}
    ev: Callable[[dict[str, Any]], tuple[Any, Any]] = lambda p: _evaluate(  # noqa: E731
        circuit, resistors, nominal, ref_follows_supply, p)
    lo_c, hi_c = (np.broadcast_to(np.asarray(a, dtype=np.float64), (2 ** k,))
                  for a in ev(corners))
    hy_c = hi_c - lo_c
    monotone = all(_monotone(f, k) for f in (lo_c, hi_c, hy_c))

    lo0, hi0 = (float(a) for a in ev({}))
    contributions = {}
    for n, (a, b) in bx.items():
        lo1, hi1 = ev({n: np.array([a, b])})
        contributions[n] = float(max(np.max(np.abs(np.asarray(lo1) - lo0)),
                                     np.max(np.abs(np.asarray(hi1) - hi0))))

    rng = np.random.default_rng(seed)
    sample = {n: rng.uniform(a, b, draws) for n, (a, b) in bx.items()}
    lo_m, hi_m = (np.broadcast_to(np.asarray(a, dtype=np.float64), (draws,))
                  for a in ev(sample))
    q = np.array(QUANTILES)

    def pts(x: np.ndarray) -> tuple[float, float]:
        a, b = np.quantile(x, q)
        return float(a), float(b)

    return Spread(
        low=(float(lo_c.min()), float(lo_c.max())),
        high=(float(hi_c.min()), float(hi_c.max())),
        hysteresis=(float(hy_c.min()), float(hy_c.max())),
        mc_low=pts(lo_m),
        mc_high=pts(hi_m),
        mc_hysteresis=pts(hi_m - lo_m),
        monotone=monotone,
        parameters=bx,
        contributions=contributions,
    )
