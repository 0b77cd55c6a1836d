"""Worst case (corners) and Monte Carlo; the input RC filter."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from streamcond.circuit import rcfilter
from streamcond.circuit.networks import Conditions, thresholds
from streamcond.circuit.worstcase import DRAWS, Tolerances, spread

CASES = [
    ("single-supply", {"r_feedback": 240e3, "r_top": 12e3, "r_bottom": 20e3},
     Conditions(v_pos=3.3, v_neg=0.0, v_ref=3.3), True),
    ("inverting", {"r_feedback": 100e3, "r_ref": 10e3},
     Conditions(v_pos=9.0, v_neg=-9.0, v_ref=0.0, loss_high=1.75, loss_low=1.75), False),
    ("non-inverting", {"r_feedback": 150e3, "r_in": 10e3},
     Conditions(v_pos=5.0, v_neg=0.0, v_ref=2.5), False),
    ("single-supply", {"r_feedback": 220e3, "r_top": 10e3, "r_bottom": 15e3, "r_pullup": 4.7e3},
     Conditions(v_pos=5.0, v_neg=0.0, v_ref=5.0, loss_low=0.2, open_drain=True), True),
]


@pytest.mark.parametrize("circuit, r, c, follows", CASES)
def test_monte_carlo_inside_the_corner_bounds(circuit, r, c, follows):
    def around(x: float) -> tuple[float, float]:  # a loss range centred on the nominal
        return (x - 0.25, x + 0.25) if x > 0.5 else (x / 2, x * 1.5)

    tol = Tolerances(resistor=0.05, supply=0.05, loss_high=around(c.loss_high),
                     loss_low=around(c.loss_low), v_os=0.005, ref=0.01)
    s = spread(circuit, r, c, tol, follows)
    assert s.monotone
    lo0, hi0 = thresholds(circuit, r, c)
    for (a, b), (qa, qb), nominal in ((s.low, s.mc_low, lo0), (s.high, s.mc_high, hi0)):
        assert a <= qa <= qb <= b
        assert a < nominal < b
    a, b = s.hysteresis
    assert a <= s.mc_hysteresis[0] <= s.mc_hysteresis[1] <= b
    # and every single draw, not only the reported points: a fresh sample of the box
    rng = np.random.default_rng(11)
    p = {k: rng.uniform(x, y, 20_000) for k, (x, y) in s.parameters.items()}
    rr = {k: p.get(k, v) for k, v in r.items()}
    vp = p.get("v_pos", c.v_pos)
    cc = c.with_(v_pos=vp, v_neg=p.get("v_neg", c.v_neg),
                 v_ref=vp if follows else p.get("v_ref", c.v_ref),
                 loss_high=p.get("loss_high", c.loss_high), loss_low=p.get("loss_low", c.loss_low),
                 v_os=p.get("v_os", 0.0))
    lo, hi = thresholds(circuit, rr, cc)
    eps = 1e-12
    assert np.all(lo >= s.low[0] - eps) and np.all(lo <= s.low[1] + eps)
    assert np.all(hi >= s.high[0] - eps) and np.all(hi <= s.high[1] + eps)


def test_corner_bound_by_hand():
    # an inverting pair, ±1 % resistors only: the upper threshold V_sat·R2/(R1+R2) is largest
    # with R2 high and R1 low (the formula of Horowitz & Hill, from memory)
    r1, r2, vs = 100e3, 10e3, 10.0
    c = Conditions(v_pos=vs, v_neg=-vs, v_ref=0.0)
    s = spread("inverting", {"r_feedback": r1, "r_ref": r2}, c, Tolerances(resistor=0.01),
               False)
    assert s.high[1] == pytest.approx(vs * r2 * 1.01 / (r1 * 0.99 + r2 * 1.01), rel=1e-12)
    assert s.high[0] == pytest.approx(vs * r2 * 0.99 / (r1 * 1.01 + r2 * 0.99), rel=1e-12)


def test_monte_carlo_is_reproducible_and_sized():
    circuit, r, c, follows = CASES[0]
    tol = Tolerances(resistor=0.01, supply=0.02, v_os=0.005)
    a = spread(circuit, r, c, tol, follows)
    b = spread(circuit, r, c, tol, follows)
    assert a.mc_low == b.mc_low and a.mc_high == b.mc_high  # fixed seed
    assert DRAWS == 100_000


def test_ema_rc_matches_tau():
    # an RC lowpass has τ = RC; the ema with α = 1 − exp(−dt/τ) is its sampled step response
    rc = rcfilter.match(0.02, "E24", "E12", "ema")
    assert abs(rc.error) < 0.02
    assert rc.r * rc.c == pytest.approx(rc.tau)


@pytest.mark.parametrize("fc", [3.0, 50.0, 1000.0])
def test_first_order_lowpass_rc_cutoff(fc):
    tau, _ = rcfilter.tau_of_filter("lowpass", {"cutoff_hz": fc, "order": 1})
    assert tau == pytest.approx(1 / (2 * math.pi * fc))
    rc = rcfilter.match(tau, "E24", "E12")
    # reference: scipy.signal.freqs of H(s) = 1/(RCs + 1): |H| = 1/√2 at the cutoff, within
    # the error of the standard values
    _, h = signal.freqs([1.0], [rc.r * rc.c, 1.0], worN=[2 * math.pi * fc])
    assert abs(h[0]) == pytest.approx(1 / math.sqrt(2), rel=0.02)


def test_filters_without_an_rc_equivalent():
    for kind, params in (("median", {"window": 5}), ("lowpass", {"cutoff_hz": 5.0, "order": 2}),
                         ("none", {})):
        tau, why = rcfilter.tau_of_filter(kind, params)
        assert tau is None and why
