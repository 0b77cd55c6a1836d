"""The threshold formulas of the comparator circuits, from the node equation of each network.

Every circuit here is a comparator with positive feedback: the output drives a resistor into
the non-inverting node, so the node — and with it the switching point — moves with the output,
and the input must travel back past the other threshold to switch it again (hysteresis).

The node voltage is the conductance-weighted mean of the voltages its resistors return to
(Kirchhoff's current law at a node with no other load; Millman's theorem):

    V+ = Σ V_i/R_i / Σ 1/R_i.

**inverting** (signal on the inverting input; ``r_feedback`` output → V+, ``r_ref`` V+ →
reference): the thresholds are V+ in the two output states,

    V_th = V_ref·R_f/(R_f + R_ref) + V_out·R_ref/(R_f + R_ref),

i.e. V_ref·R1/(R1+R2) ± V_sat·R2/(R1+R2) with R1 = R_f and R2 = R_ref for a symmetric swing
(any analog electronics text, e.g. Horowitz & Hill, *The Art of Electronics*; from memory).
The output goes low when the input rises past the upper threshold: the output is inverted.

**non-inverting** (signal through ``r_in`` into V+, ``r_feedback`` output → V+, the inverting
input at the reference): it switches when V+ = V_ref, so

    V_th = V_ref·(1 + R_in/R_f) − V_out·R_in/R_f,

the upper threshold with the output low, the lower with it high; hysteresis
(V_oh − V_ol)·R_in/R_f (same texts). The output follows the input.

**single-supply** (signal on the inverting input; ``r_top`` supply → V+, ``r_bottom`` V+ →
ground, ``r_feedback`` output → V+): the reference is the divider's own Thevenin equivalent,

    V_th = (V_s/R_top + V_out/R_f) / (1/R_top + 1/R_bottom + 1/R_f),

three resistors for two thresholds, so both can be met; the output is inverted.

**Output stages.** Push-pull: the output is a voltage source at the rail minus a loss per
rail (0 for rail-to-rail outputs, about 1.5–2 V for older bipolar op-amps). Open-drain/open-
collector: low, the output transistor holds the output near the negative rail (the loss is its
saturation voltage) and ``r_feedback`` returns to it; high, the transistor is off and the
feedback branch returns to the positive supply through the pull-up in series, so R_f is
replaced by R_f + R_pullup in the high state (the pull-up enters the formulas; the load of
whatever the output drives is neglected).

**Input offset.** The comparator switches when V+ − V− = V_os, not at 0: an inverting
circuit's thresholds move by −V_os, a non-inverting one's by V_os·(1 + R_in/R_f').

All functions take numbers or numpy arrays and broadcast, so the search and the Monte Carlo
evaluate many networks in one call.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any, Mapping

import numpy as np

CIRCUITS = ("inverting", "non-inverting", "single-supply")

#: The searched resistors of each circuit, by their JSON names (the issue's contract). The
#: pull-up of an open-drain output is given, not searched.
RESISTORS: dict[str, tuple[str, ...]] = {
    "inverting": ("r_feedback", "r_ref"),
    "non-inverting": ("r_feedback", "r_in"),
    "single-supply": ("r_feedback", "r_top", "r_bottom"),
}

OUTPUTS = ("push-pull", "open-drain")


@dataclass(frozen=True)
class Conditions:
    """The electrical surroundings of the network: numbers, or arrays that broadcast.

    ``v_ref`` is the reference for the inverting and non-inverting circuits and the voltage the
    divider's top returns to for the single-supply circuit (the positive supply unless a
    reference is given).
    """

    v_pos: Any
    v_neg: Any
    v_ref: Any
    loss_high: Any = 0.0  # output's drop from the positive rail when high (push-pull)
    loss_low: Any = 0.0  # output's rise above the negative rail when low (both stages)
    v_os: Any = 0.0  # comparator input offset: it switches at V+ − V− = v_os
    open_drain: bool = False

    def with_(self, **kw: Any) -> "Conditions":
        return replace(self, **kw)


def output_levels(c: Conditions) -> tuple[Any, Any]:
    """(low, high) output voltage of the stage, unloaded: what the feedback branch returns to."""
    low = c.v_neg + c.loss_low
    high = c.v_pos if c.open_drain else c.v_pos - c.loss_high
    return low, high


def _feedback(r: Mapping[str, Any], c: Conditions, high: bool) -> tuple[Any, Any]:
    """(voltage, resistance) the feedback branch returns to in one output state."""
    low_v, high_v = output_levels(c)
    rf = r["r_feedback"]
    if not high:
        return low_v, rf
    if c.open_drain:
        return high_v, rf + r["r_pullup"]
    return high_v, rf


def node_voltage(circuit: str, r: Mapping[str, Any], c: Conditions, high: bool,
                 v_in: Any = 0.0) -> Any:
    """V+ in one output state (Millman): Σ V_i/R_i / Σ 1/R_i over the node's resistors."""
    v_out, r_out = _feedback(r, c, high)
    if circuit == "inverting":
        legs = ((c.v_ref, r["r_ref"]), (v_out, r_out))
    elif circuit == "single-supply":
        legs = ((c.v_ref, r["r_top"]), (0.0, r["r_bottom"]), (v_out, r_out))
    elif circuit == "non-inverting":
        legs = ((v_in, r["r_in"]), (v_out, r_out))
    else:
        raise ValueError(f"unknown circuit {circuit!r}")
    num = sum(v / rr for v, rr in legs)
    den = sum(1.0 / rr for _v, rr in legs)
    return num / den


def thresholds(circuit: str, r: Mapping[str, Any], c: Conditions) -> tuple[Any, Any]:
    """(lower, upper) switching thresholds at the signal input, volts (module docstring)."""
    if circuit == "non-inverting":
        # switches where V+ = V_ref + V_os; V+ = (V_in/R_in + V_out/R_out)/(1/R_in + 1/R_out)
        # solved for V_in. Upper threshold: output low; lower threshold: output high.
        vs = c.v_ref + c.v_os
        out = []
        for high in (True, False):
            v_out, r_out = _feedback(r, c, high)
            r_in = r["r_in"]
            out.append(vs + (vs - v_out) * r_in / r_out)
        return out[0], out[1]
    # signal on the inverting input: it switches where V_in = V+ − V_os; the upper threshold
    # is V+ with the output high (the input rising from below), the lower with it low.
    lower = node_voltage(circuit, r, c, high=False) - c.v_os
    upper = node_voltage(circuit, r, c, high=True) - c.v_os
    return lower, upper


def inverted(circuit: str) -> bool:
    """Whether the output is low above the upper threshold (signal on the inverting input)."""
    return circuit != "non-inverting"


def network_current(circuit: str, r: Mapping[str, Any], c: Conditions) -> Any:
    """The largest current in any resistor of the network, amps, over both output states
    with the input at the threshold where that state ends (the pull-up's own current to an
    output held low is the output stage's, not the divider's, and is left out)."""
    lo, hi = thresholds(circuit, r, c)
    worst = 0.0
    for high, v_in in ((True, hi), (False, lo)):
        v_out, r_out = _feedback(r, c, high)
        if circuit == "non-inverting":
            vp = c.v_ref + c.v_os
            legs = ((v_in, r["r_in"]), (v_out, r_out))
        else:
            vp = node_voltage(circuit, r, c, high)
            legs = ((v_out, r_out), (c.v_ref, r.get("r_ref", r.get("r_top"))))
            if circuit == "single-supply":
                legs = legs + ((0.0, r["r_bottom"]),)
        for v, rr in legs:
            worst = np.maximum(worst, np.abs(v - vp) / rr)
    return worst
