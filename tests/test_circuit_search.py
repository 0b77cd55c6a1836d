"""The series search: the best combination (checked by brute force), and the round trip."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from streamcond.circuit import eseries
from streamcond.circuit.networks import Conditions, network_current, thresholds
from streamcond.circuit.search import NoNetwork, reference_for, search


def _err(circuit, r, c, lo, hi):
    a, b = thresholds(circuit, r, c)
    return max(abs(a - lo), abs(b - hi))


def test_triple_search_is_the_brute_force_optimum():
    # every triple of E12 values 1k–100k tried one by one in plain Python
    v = eseries.values("E12", 1e3, 100e3).tolist()
    c = Conditions(v_pos=5.0, v_neg=0.0, v_ref=5.0)
    want = (1.7, 1.95)
    best = min(
        _err("single-supply", {"r_feedback": f, "r_top": t, "r_bottom": b}, c, *want)
        for f, t, b in itertools.product(v, v, v)
    )
    ch = search("single-supply", *want, np.array(v), c)
    assert ch.error == pytest.approx(best, rel=1e-9, abs=1e-15)


def test_pair_search_is_the_brute_force_optimum():
    v = eseries.values("E24", 1e3, 1e6).tolist()
    c = Conditions(v_pos=12.0, v_neg=-12.0, v_ref=0.0, loss_high=1.5, loss_low=1.5)
    want = (-0.3, 0.3)
    best = min(_err("inverting", {"r_feedback": f, "r_ref": r}, c, *want)
               for f, r in itertools.product(v, v))
    ch = search("inverting", *want, np.array(v), c)
    assert ch.error == pytest.approx(best, rel=1e-9, abs=1e-15)


def _ideal_single_supply(lo, hi, v_top, v_ol, v_oh, scale):
    """The exact (continuous) three resistors for a push-pull output, from the node
    equation (weights a, t, 1 − a − t of output, top and bottom; see networks)."""
    a = (hi - lo) / (v_oh - v_ol)
    t = (lo - a * v_ol) / v_top
    return {"r_feedback": scale / a, "r_top": scale / t, "r_bottom": scale / (1 - a - t)}


def _nearest(values, x):
    return float(values[np.argmin(np.abs(np.log(values / x)))])


@pytest.mark.parametrize("series", ["E24", "E96"])
def test_round_trip_within_the_series_step(series):
    # thresholds asked → values chosen → thresholds recomputed: within the series' step
    # (10^(1/n) − 1 of the threshold), and no worse than rounding each ideal value alone
    rng = np.random.default_rng(4)
    vals = eseries.values(series, 1e3, 1e6)
    step = eseries.step_ratio(series) - 1.0
    c = Conditions(v_pos=3.3, v_neg=0.0, v_ref=3.3)
    for _ in range(6):
        lo = rng.uniform(0.5, 2.5)
        hi = lo + rng.uniform(0.02, 0.3)
        ch = search("single-supply", lo, hi, vals, c)
        a, b = thresholds("single-supply", ch.resistors, c)
        assert abs(a - lo) <= step * lo and abs(b - hi) <= step * hi
        ideal = _ideal_single_supply(lo, hi, 3.3, 0.0, 3.3, scale=5e3)
        assert _err("single-supply", ideal, c, lo, hi) < 1e-12  # the ideal is exact
        rounded = {k: _nearest(vals, x) for k, x in ideal.items()}
        if all(1e3 <= x <= 1e6 for x in ideal.values()):
            assert ch.error <= _err("single-supply", rounded, c, lo, hi) + 1e-15


def test_current_limit_is_kept():
    vals = eseries.values("E24", 1e3, 1e6)
    c = Conditions(v_pos=5.0, v_neg=0.0, v_ref=5.0)
    free = search("single-supply", 2.0, 2.2, vals, c)
    limit = free.current / 4
    ch = search("single-supply", 2.0, 2.2, vals, c, max_current=limit)
    assert ch.current <= limit
    assert network_current("single-supply", ch.resistors, c) <= limit
    with pytest.raises(NoNetwork):
        search("single-supply", 2.0, 2.2, eseries.values("E24", 1e3, 2e3), c, max_current=1e-6)


def test_ties_prefer_the_middle_of_the_range():
    # only the ratio matters for the inverting pair, so 1:10 is met at every scale; the
    # middle of 1k–1M (√(1k·1M) ≈ 31.6k) is preferred
    vals = eseries.values("E12", 1e3, 1e6)
    c = Conditions(v_pos=11.0, v_neg=-11.0, v_ref=0.0)
    ch = search("inverting", -1.0, 1.0, vals, c)
    assert ch.error < 1e-12
    r = ch.resistors
    assert r["r_feedback"] / r["r_ref"] == pytest.approx(10.0)
    assert max(abs(math.log(x / math.sqrt(1e9))) for x in (r["r_feedback"], r["r_ref"])) < \
        math.log(10) * 1.01


@pytest.mark.parametrize("circuit", ["inverting", "non-inverting"])
def test_reference_for_meets_both_thresholds(circuit):
    c = Conditions(v_pos=5.0, v_neg=0.0, v_ref=0.0)
    ref = reference_for(circuit, 1.8, 2.1, c)
    assert ref is not None
    c2 = c.with_(v_ref=ref)
    vals = eseries.values("E96", 1e3, 1e6)
    ch = search(circuit, 1.8, 2.1, vals, c2)
    assert ch.error < 0.003  # within E96 resolution once the reference is right
