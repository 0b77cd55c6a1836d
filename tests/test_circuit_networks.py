"""Threshold formulas against the textbook forms and an independent nodal solution."""

from __future__ import annotations

import numpy as np
import pytest

from streamcond.circuit.networks import Conditions, network_current, thresholds


def test_inverting_matches_textbook_formula():
    # Horowitz & Hill, The Art of Electronics, the inverting Schmitt trigger (from memory):
    # thresholds = V_ref·R1/(R1+R2) ± V_sat·R2/(R1+R2), R1 from the output, R2 to the reference.
    rng = np.random.default_rng(1)
    for _ in range(200):
        r1, r2 = 10 ** rng.uniform(3, 6, 2)
        v_ref = rng.uniform(-3, 3)
        v_sat = rng.uniform(1, 12)
        c = Conditions(v_pos=v_sat, v_neg=-v_sat, v_ref=v_ref)
        lo, hi = thresholds("inverting", {"r_feedback": r1, "r_ref": r2}, c)
        mid = v_ref * r1 / (r1 + r2)
        half = v_sat * r2 / (r1 + r2)
        assert lo == pytest.approx(mid - half, rel=1e-12, abs=1e-12)
        assert hi == pytest.approx(mid + half, rel=1e-12, abs=1e-12)


def test_non_inverting_matches_textbook_formula():
    # Horowitz & Hill, the non-inverting Schmitt trigger (from memory): it switches where the
    # + node crosses V_ref, at V_in = V_ref·(1 + R_in/R_f) − V_out·R_in/R_f; hysteresis
    # (V_oh − V_ol)·R_in/R_f.
    rng = np.random.default_rng(2)
    for _ in range(200):
        r_in, r_f = 10 ** rng.uniform(3, 6, 2)
        v_ref = rng.uniform(0, 4)
        c = Conditions(v_pos=5.0, v_neg=0.0, v_ref=v_ref)
        lo, hi = thresholds("non-inverting", {"r_feedback": r_f, "r_in": r_in}, c)
        assert hi == pytest.approx(v_ref * (1 + r_in / r_f) - 0.0 * r_in / r_f, rel=1e-12)
        assert lo == pytest.approx(v_ref * (1 + r_in / r_f) - 5.0 * r_in / r_f, rel=1e-12,
                                   abs=1e-12)
        assert hi - lo == pytest.approx(5.0 * r_in / r_f, rel=1e-12)


def _solve(resistors, fixed):
    """Node voltages of a resistor network by nodal analysis (numpy.linalg.solve):
    G·v = i over the free nodes, the fixed ones (sources) moved to the right-hand side."""
    free = sorted({n for a, b, _ in resistors for n in (a, b)} - set(fixed))
    idx = {n: i for i, n in enumerate(free)}
    g = np.zeros((len(free), len(free)))
    i = np.zeros(len(free))
    for a, b, r in resistors:
        y = 1.0 / r
        for p, q in ((a, b), (b, a)):
            if p in idx:
                g[idx[p], idx[p]] += y
                if q in idx:
                    g[idx[p], idx[q]] -= y
                else:
                    i[idx[p]] += y * fixed[q]
    v = np.linalg.solve(g, i)
    return {**fixed, **{n: float(v[idx[n]]) for n in free}}


def _nodal_threshold(circuit, r, c: Conditions, output_high: bool) -> float:
    """The input voltage at which V+ − V− = V_os, with the output held in one state: the
    network is built element by element and solved at two inputs (both nodes are linear in
    V_in), independently of streamcond.circuit.networks."""
    def diff(v_in: float) -> float:
        res = [("P", "OUT", r["r_feedback"])]
        fixed = {"VIN": v_in, "GND": 0.0, "VREF": c.v_ref, "VCC": c.v_pos}
        if c.open_drain and output_high:
            res.append(("OUT", "VCC", r["r_pullup"]))  # the transistor is off
        elif c.open_drain:
            fixed["OUT"] = c.v_neg + c.loss_low  # the transistor holds the output low
        else:
            fixed["OUT"] = (c.v_pos - c.loss_high) if output_high else (c.v_neg + c.loss_low)
        if circuit == "inverting":
            res.append(("P", "VREF", r["r_ref"]))
            minus = "VIN"
        elif circuit == "single-supply":
            res += [("P", "VREF", r["r_top"]), ("P", "GND", r["r_bottom"])]
            minus = "VIN"
        else:
            res.append(("P", "VIN", r["r_in"]))
            minus = "VREF"
        v = _solve(res, fixed)
        return v["P"] - v[minus] - c.v_os

    f0, f1 = diff(0.0), diff(1.0)
    return -f0 / (f1 - f0)


@pytest.mark.parametrize("circuit", ["inverting", "non-inverting", "single-supply"])
@pytest.mark.parametrize("open_drain", [False, True])
def test_thresholds_match_nodal_solution(circuit, open_drain):
    rng = np.random.default_rng(3)
    for _ in range(60):
        r = {"r_feedback": 10 ** rng.uniform(4, 6), "r_ref": 10 ** rng.uniform(3, 5),
             "r_in": 10 ** rng.uniform(3, 5), "r_top": 10 ** rng.uniform(3, 5),
             "r_bottom": 10 ** rng.uniform(3, 5), "r_pullup": 10 ** rng.uniform(3, 4.5)}
        split = rng.uniform() < 0.5
        v = rng.uniform(3, 15)
        c = Conditions(v_pos=v, v_neg=-v if split else 0.0, v_ref=rng.uniform(0.5, v),
                       loss_high=rng.uniform(0, 1.5), loss_low=rng.uniform(0, 1.5),
                       v_os=rng.uniform(-0.01, 0.01), open_drain=open_drain)
        lo, hi = thresholds(circuit, r, c)
        # the upper threshold is crossed by a rising input, so the output is in the state it
        # has below the band: high for the inverting circuits, low for the non-inverting one
        inv = circuit != "non-inverting"
        assert hi == pytest.approx(_nodal_threshold(circuit, r, c, output_high=inv), rel=1e-9)
        assert lo == pytest.approx(_nodal_threshold(circuit, r, c, output_high=not inv),
                                   rel=1e-9)
        assert hi > lo  # positive feedback: hysteresis


def test_common_practice_bipolar_swing():
    # 10 kΩ feedback and 1 kΩ to ground on a ±9 V supply, an older bipolar op-amp's output
    # 1.5–2 V short of each rail: about a volt or so of hysteresis (common practice, no
    # published source).
    for loss in (1.5, 2.0):
        c = Conditions(v_pos=9.0, v_neg=-9.0, v_ref=0.0, loss_high=loss, loss_low=loss)
        lo, hi = thresholds("inverting", {"r_feedback": 10e3, "r_ref": 1e3}, c)
        assert 0.8 < hi - lo < 2.0
        assert lo == pytest.approx(-hi)  # symmetric about a ground reference


def test_network_current():
    # a 1k/1k divider from 4 V with a negligible feedback leg: V+ = 2 V, so 2 mA through each
    # divider leg (Ohm's law)
    c = Conditions(v_pos=4.0, v_neg=0.0, v_ref=4.0)
    r = {"r_top": 1e3, "r_bottom": 1e3, "r_feedback": 1e12}
    assert network_current("single-supply", r, c) == pytest.approx(2e-3, rel=1e-6)
