"""The search of a resistor series for the network closest to the requested thresholds.

Rounding each ideal value to its nearest standard value alone can land far from the request:
the thresholds depend on *ratios*, and two roundings in the same direction add up. The search
instead evaluates every combination of standard values in the range — all pairs for the
two-resistor circuits, all triples for the single-supply circuit (in blocks, so memory stays
bounded) — with the threshold formulas of :mod:`.networks`, vectorised, and keeps the one whose
larger threshold error is smallest.

Many combinations are equally good (scaling every resistor by ten gives the same thresholds),
so among those within :data:`TIE_FRACTION` of the requested hysteresis of the best the one
whose resistors stay closest to the middle of the range (geometric) is taken: low values load
the output and draw current, high ones turn the comparator's input bias current into an
offset and pick up interference (common practice, no published source).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .networks import RESISTORS, Conditions, network_current, output_levels, thresholds

#: Errors closer than this fraction of the requested hysteresis count as a tie.
TIE_FRACTION: float = 1e-4
#: Elements per block of the triple search (about 8 MB per float64 array).
BLOCK_ELEMENTS: int = 1_000_000


@dataclass
class Choice:
    """The standard values chosen and what they give with nominal parts."""

    resistors: dict[str, float]
    low: float
    high: float
    error: float  # the larger of |low − wanted low| and |high − wanted high|, volts
    current: float  # the largest current in the network's resistors, amps


class NoNetwork(ValueError):
    """No combination in the range meets the current limit."""


def _score(circuit: str, r: dict[str, Any], cond: Conditions, want_low: float,
           want_high: float, max_current: float | None) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = thresholds(circuit, r, cond)
    err = np.maximum(np.abs(lo - want_low), np.abs(hi - want_high))
    err = np.where(np.isfinite(err), err, np.inf)
    if max_current is not None:
        err = np.where(network_current(circuit, r, cond) <= max_current, err, np.inf)
    return err, lo


def search(circuit: str, want_low: float, want_high: float, values: np.ndarray,
           cond: Conditions, r_pullup: float | None = None,
           max_current: float | None = None) -> Choice:
    """The best network of ``values`` (ohms, ascending) for the requested thresholds."""
    names = RESISTORS[circuit]
    v = np.asarray(values, dtype=np.float64)
    n = v.size
    logv = np.log(v)
    mid = 0.5 * (logv[0] + logv[-1])
    dist = np.abs(logv - mid)  # distance from the middle of the range, per value
    tie = TIE_FRACTION * abs(want_high - want_low)
    extra = {} if r_pullup is None else {"r_pullup": r_pullup}

    if len(names) == 2:
        r = {names[0]: v[:, None], names[1]: v[None, :], **extra}
        err, _ = _score(circuit, r, cond, want_low, want_high, max_current)
        best = float(err.min())
        if not np.isfinite(best):
            raise NoNetwork("no pair of values in the range meets the current limit")
        pref = np.maximum(dist[:, None], dist[None, :])
        pref = np.where(err <= best + tie, pref, np.inf)
        i, j = np.unravel_index(int(np.argmin(pref)), pref.shape)
        chosen = {names[0]: float(v[i]), names[1]: float(v[j])}
    else:
        # blocks of feedback values × all (top, bottom) pairs
        k = max(1, BLOCK_ELEMENTS // (n * n))
        blocks = [(a, min(n, a + k)) for a in range(0, n, k)]

        def block(a: int, b: int) -> tuple[np.ndarray, dict[str, Any]]:
            r = {names[0]: v[a:b, None, None], names[1]: v[None, :, None],
                 names[2]: v[None, None, :], **extra}
            return _score(circuit, r, cond, want_low, want_high, max_current)[0], r

        mins = [float(block(a, b)[0].min()) for a, b in blocks]
        best = min(mins)
        if not np.isfinite(best):
            raise NoNetwork("no three values in the range meet the current limit")
        top: tuple[float, tuple[int, int, int]] | None = None
        for (a, b), m in zip(blocks, mins):
            if m > best + tie:
                continue
            err, _ = block(a, b)
            pref = np.maximum(np.maximum(dist[a:b, None, None], dist[None, :, None]),
                              dist[None, None, :])
            pref = np.where(err <= best + tie, pref, np.inf)
            flat = int(np.argmin(pref))
            p = float(pref.ravel()[flat])
            if top is None or p < top[0]:
                i, j, l = np.unravel_index(flat, pref.shape)
                top = (p, (a + int(i), int(j), int(l)))
        assert top is not None
        i, j, l = top[1]
        chosen = {names[0]: float(v[i]), names[1]: float(v[j]), names[2]: float(v[l])}
    chosen.update(extra)
    lo, hi = thresholds(circuit, chosen, cond)
    return Choice(
        resistors=chosen,
        low=float(lo),
        high=float(hi),
        error=max(abs(float(lo) - want_low), abs(float(hi) - want_high)),
        current=float(network_current(circuit, chosen, cond)),
    )


def reference_for(circuit: str, want_low: float, want_high: float,
                  cond: Conditions) -> float | None:
    """The reference voltage at which a two-resistor circuit meets both thresholds exactly
    (push-pull output; with an open drain, approximately), or None for the single-supply one.

    From the formulas of :mod:`.networks`: with a = (H − L)/(V_oh − V_ol), the inverting
    circuit needs V_ref = (L − a·V_ol)/(1 − a) and the non-inverting one
    V_ref = (H + a·V_ol)/(1 + a).
    """
    v_low, v_high = output_levels(cond)
    swing = float(v_high - v_low)
    if swing <= 0:
        return None
    a = (want_high - want_low) / swing
    if circuit == "inverting":
        return None if a >= 1 else (want_low - a * float(v_low)) / (1 - a) + float(cond.v_os)
    if circuit == "non-inverting":
        return (want_high + a * float(v_low)) / (1 + a) - float(cond.v_os)
    return None
