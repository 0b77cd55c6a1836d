"""Edge instants and records of the conditioning pipeline, against closed-form results.

* sine crossings: x = A·sin(2πft) rises through level v at t = (asin(v/A) + 2πn)/(2πf) and
  falls through it at t = (π − asin(v/A) + 2πn)/(2πf) (trigonometry);
* linear interpolation is exact on a straight line, and its error on a smooth curve is at most
  h²·max|x''|/8 in value (the linear-interpolation remainder, any numerical analysis text,
  e.g. Burden & Faires, from memory);
* the op-amp Schmitt trigger with a reference (DESIGN.md "Numbers the field gives us"; any
  analog electronics text, e.g. Sedra & Smith, "Microelectronic Circuits", bistable circuits,
  from memory): thresholds V_ref·R1/(R1+R2) ± V_sat·R2/(R1+R2);
* the ramp lag of a unity-DC-gain filter equals its DC group delay (moving average (N−1)/2
  samples: linear-phase FIR, e.g. Oppenheim & Schafer, from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from conftest import config_dict, emitted_at, of_kind, run_pipeline
from streamcond.core.filters import make_filter

# --- 2. noisy sine and pure ramp ------------------------------------------------------------------


def sine_crossings(A: float, f: float, v: float, t_end: float, rising: bool) -> np.ndarray:
    """Closed-form instants in [0, t_end] where A·sin(2πft) passes v upward (or downward)."""
    base = math.asin(v / A) if rising else math.pi - math.asin(v / A)
    n = np.arange(-1, int(f * t_end) + 2)
    t = (base + 2 * math.pi * n) / (2 * math.pi * f)
    return t[(t >= 0) & (t <= t_end)]


def nearest_error(t_edges: np.ndarray, t_true: np.ndarray) -> np.ndarray:
    j = np.clip(np.searchsorted(t_true, t_edges), 1, t_true.size - 1)
    cand = np.stack((t_true[j - 1], t_true[j]))
    k = np.argmin(np.abs(cand - t_edges), axis=0)
    return t_edges - cand[k, np.arange(t_edges.size)]


@pytest.mark.parametrize("seed, phase_s", [(1, 0.0), (2, 0.1234), (3, 0.377)])
def test_noisy_sine_edge_times_within_a_tenth_of_a_sample(seed, phase_s) -> None:
    A, f, fs, u, sigma = 1.0, 1.3, 200.0, 0.3, 0.002
    dur = 20.0
    rng = np.random.default_rng(seed)
    t = np.arange(int(dur * fs)) / fs
    x = A * np.sin(2 * np.pi * f * (t + phase_s)) + rng.normal(0.0, sigma, t.size)
    cfg = config_dict(
        [{"name": "pump", "column": "x", "band": {"low": -u, "high": u}}],
        columns=["t", "x"], sample_rate_hz=fs,
    )
    recs = run_pipeline(cfg, np.column_stack((t, x)), [97] * 1000)
    edges = of_kind(recs, "edge")
    te_r = np.array([e["t"] for e in edges if e["edge"] == "rising"])
    te_f = np.array([e["t"] for e in edges if e["edge"] == "falling"])
    # rising edges fire on the upper threshold +u, falling ones on the lower threshold −u
    # (closed form above with v = +u upward, v = −u downward), shifted by the phase
    tr = sine_crossings(A, f, u, dur + phase_s, rising=True) - phase_s
    tf = sine_crossings(A, f, -u, dur + phase_s, rising=False) - phase_s
    # the crossing that decides the initial level is a state, not an edge
    (st0,) = of_kind(recs, "state")
    t0 = st0["t"]
    tr, tf = tr[(tr > t0) & (tr < t[-1])], tf[(tf > t0) & (tf < t[-1])]
    # no chatter (σ ≪ the band): exactly one edge per crossing, excluding the initial level
    assert te_r.size == tr.size and te_f.size == tf.size
    err = np.concatenate((nearest_error(te_r, tr), nearest_error(te_f, tf))) * fs  # in samples
    # expected: noise/slope, σ/(2πfA·cos(asin(u/A))/fs) ≈ 0.05 sample, times 0.7..1 for the
    # interpolated noise and ≈ 0.8 for mean |·| of a Gaussian: ≈ 0.03 sample (measured
    # 0.030..0.035). Asked: well under a tenth of a sample period (edges placed at the sample
    # times instead would be ≈ 0.46 sample off).
    assert np.mean(np.abs(err)) < 0.05
    assert np.max(np.abs(err)) < 0.5
    assert abs(np.mean(err)) < 0.03  # zero-mean noise: no bias beyond the scatter


def test_noise_free_sine_error_within_interpolation_bound() -> None:
    # Without noise the only error is the interpolation remainder: ≤ h²·max|x''|/8 in value,
    # divided by the slope at the crossing to give time (Burden & Faires, from memory).
    A, f, fs, u = 2.0, 0.7, 100.0, 0.5
    t = np.arange(3000) / fs
    x = A * np.sin(2 * np.pi * f * t)
    cfg = config_dict(
        [{"name": "pump", "column": "x", "band": {"low": -u, "high": u}}],
        columns=["t", "x"], sample_rate_hz=fs,
    )
    recs = run_pipeline(cfg, np.column_stack((t, x)))
    edges = of_kind(recs, "edge")
    te = np.array([e["t"] for e in edges if e["edge"] == "rising"])
    tr = sine_crossings(A, f, u, t[-1], rising=True)
    tr = tr[tr > of_kind(recs, "state")[0]["t"]]  # the first crossing decides the state
    h = 1 / fs
    slope = A * 2 * np.pi * f * math.cos(math.asin(u / A))
    bound = h**2 * A * (2 * np.pi * f) ** 2 / 8 / slope
    assert te.size == tr.size
    assert np.max(np.abs(te - tr)) <= bound * 1.01 + 1e-12
    assert np.max(np.abs(te - tr)) < 0.01 * h


@pytest.mark.parametrize("a, b", [(-5.0, 2.0), (7.0, -3.5), (-100.0, 37.0)])
def test_pure_ramp_edge_time_is_exact(a, b) -> None:
    # Closed form: x = a + b·t crosses h at t* = (h − a)/b; interpolation on a line is exact.
    fs = 50.0
    low, high = -1.25, 0.75
    t = np.arange(500) / fs
    x = a + b * t
    cfg = config_dict(
        [{"name": "tank", "column": "x", "band": {"low": low, "high": high}}],
        columns=["t", "x"], sample_rate_hz=fs,
    )
    recs = run_pipeline(cfg, np.column_stack((t, x)), [3] * 200)
    (st0,) = of_kind(recs, "state")
    (e,) = of_kind(recs, "edge")
    thr = high if b > 0 else low
    assert st0["level"] == (0 if b > 0 else 1) and st0["t"] == 0.0
    assert e["edge"] == ("rising" if b > 0 else "falling")
    assert e["t"] == pytest.approx((thr - a) / b, abs=1e-12 * max(1.0, abs(a / b)))
    # the value that fired it is the first sample past the threshold
    k = math.floor((thr - a) / b * fs) + 1
    assert e["value"] == pytest.approx(a + b * k / fs, abs=1e-12 * abs(a))


# --- 3. op-amp Schmitt trigger --------------------------------------------------------------------


def schmitt_thresholds(r1: float, r2: float, v_ref: float, v_sat: float) -> tuple[float, float]:
    """Inverting op-amp Schmitt trigger with a reference, symmetric output swing ±V_sat.

    The input drives the inverting input; the non-inverting input sits on a divider between the
    output (through R1) and V_ref (through R2). By superposition (Millman's theorem) that node is
    V+ = V_ref·R1/(R1+R2) + V_out·R2/(R1+R2), so the input thresholds are
    V_ref·R1/(R1+R2) ± V_sat·R2/(R1+R2) (DESIGN.md; Sedra & Smith, from memory).
    """
    centre = v_ref * r1 / (r1 + r2)
    half = v_sat * r2 / (r1 + r2)
    return centre - half, centre + half


def triangle(t: np.ndarray, vp: float, period: float) -> np.ndarray:
    """Triangle wave: −vp at t = 0, +vp at period/2, −vp at period (slope ±4·vp/period)."""
    ph = np.mod(t / period, 1.0)
    return np.where(ph < 0.5, -vp + 4 * vp * ph, 3 * vp - 4 * vp * ph)


def simulate_op_amp(vin: np.ndarray, r1: float, r2: float, v_ref: float, v_sat: float):
    """Ideal op-amp, sample by sample: the output saturates at the sign of V+ − Vin, with V+
    the divider node computed from the present output (Kirchhoff's current law at the node)."""
    out = np.empty(vin.size)
    vo = -v_sat  # arbitrary: the triangle starts below both thresholds, so sample 0 decides
    for i, v in enumerate(vin):
        vplus = (vo / r1 + v_ref / r2) / (1 / r1 + 1 / r2)
        if v > vplus:
            vo = -v_sat
        elif v < vplus:
            vo = v_sat
        out[i] = vo
    return out


@pytest.mark.parametrize(
    "r1, r2, v_ref, v_sat",
    [
        (10e3, 4.7e3, 2.5, 12.0),  # level board of the orchard tank (invented values)
        (100e3, 10e3, 0.0, 13.5),  # symmetric band around 0 V
        (22e3, 47e3, -1.2, 5.0),  # wide band, negative reference
    ],
)
def test_schmitt_trigger_switches_at_op_amp_thresholds(r1, r2, v_ref, v_sat) -> None:
    v_tl, v_th = schmitt_thresholds(r1, r2, v_ref, v_sat)
    vp, period, fs = 1.25 * max(abs(v_tl), abs(v_th)) + 0.5, 0.8, 1000.0
    t = np.arange(int(4 * period * fs)) / fs
    vin = triangle(t, vp, period)
    cfg = config_dict(
        [{
            "name": "tank_high",
            "column": "vin",
            "unit": "V",
            "invert": True,  # an inverting comparator: input above the band → output low
            "band": {"low": v_tl, "high": v_th},
        }],
        columns=["t", "vin"], sample_rate_hz=fs,
    )
    recs = run_pipeline(cfg, np.column_stack((t, vin)), [250] * 100)
    (st0,) = of_kind(recs, "state")
    edges = of_kind(recs, "edge")
    # the triangle starts at −vp < V_TL: an inverting trigger's output is high
    assert st0["level"] == 1
    slope = 4 * vp / period
    cycles = np.arange(4)
    t_fall = cycles * period + (v_th + vp) / slope  # rising input reaches V_TH: output falls
    t_rise = cycles * period + period / 2 + (vp - v_tl) / slope  # falling input reaches V_TL
    want = np.sort(np.concatenate((t_fall, t_rise)))
    want_kind = ["falling" if w in t_fall else "rising" for w in want]
    assert [e["edge"] for e in edges] == want_kind
    te = np.array([e["t"] for e in edges])
    np.testing.assert_allclose(te, want, atol=1e-9)
    # the input at each edge instant is the computed threshold (closed-form triangle)
    at = triangle(te, vp, period)
    np.testing.assert_allclose(at, [v_th if k == "falling" else v_tl for k in want_kind],
                               atol=1e-8)
    # the value that fired each edge lies within one sample step past its threshold
    for e in edges:
        if e["edge"] == "falling":
            assert v_th < e["value"] <= v_th + slope / fs + 1e-9
        else:
            assert v_tl - slope / fs - 1e-9 <= e["value"] < v_tl
    # and the software output equals an ideal op-amp simulated sample by sample
    analog = simulate_op_amp(vin, r1, r2, v_ref, v_sat)
    assert analog[0] == v_sat
    sw_switch = np.flatnonzero(np.diff(analog)) + 1
    # each software edge sits between the sample before the switch and the switching sample
    np.testing.assert_array_equal(sw_switch, np.ceil(te * fs - 1e-9).astype(int))
    assert [("rising" if analog[i] > 0 else "falling") for i in sw_switch] == want_kind


# --- 6. records -----------------------------------------------------------------------------------


def chatter_rows(n: int = 3000, fs: float = 100.0, seed: int = 5) -> np.ndarray:
    """Orchard tank level near its mark: slow waves, noise, a few hard steps."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs
    lvl = 2.4 + 0.08 * np.sin(2 * np.pi * 0.2 * t) + rng.normal(0, 0.03, n)
    lvl[1000:1200] += 0.3
    amps = np.where((t % 7.0) < 3.0, 6.0, 0.2) + rng.normal(0, 0.8, n)
    return np.column_stack((t, lvl, amps))


MULTI = [
    {"name": "tank_high", "column": "level", "band": {"center": 2.4, "width": 0.04}},
    {"name": "tank_slow", "column": "level", "filter": {"kind": "median", "window": 5},
     "band": {"center": 2.4, "width": 0.04}, "dwell": {"rise_s": 0.05, "fall_s": 0.03}},
    {"name": "pump", "column": "amps", "filter": {"kind": "ema", "tau_s": 0.05},
     "band": {"low": 2.0, "high": 4.0}, "invert": True},
]


def test_seq_contiguous_from_one_and_state_first() -> None:
    recs = run_pipeline(
        config_dict(MULTI, columns=["t", "level", "amps"], sample_rate_hz=100.0),
        chatter_rows(), [33] * 200,
    )
    for ch in MULTI:
        mine = [r for r in recs if r.get("channel") == ch["name"]
                and r["kind"] in ("state", "edge")]
        edges = of_kind(mine, "edge")
        assert len(edges) >= 4  # the data do move this channel
        assert [e["seq"] for e in edges] == list(range(1, len(edges) + 1))  # DESIGN.md
        # one state record, before any edge; no edge for the initial level
        assert mine[0]["kind"] == "state"
        assert len(of_kind(mine, "state")) == 1
        assert edges[0]["level"] != mine[0]["level"]
        # levels alternate; the edge name matches the new level
        levels = [mine[0]["level"]] + [e["level"] for e in edges]
        assert all(a != b for a, b in zip(levels, levels[1:]))
        assert all(e["edge"] == ("rising" if e["level"] == 1 else "falling") for e in edges)
        assert all(r["t"] <= s["t"] for r, s in zip(edges, edges[1:]))


def test_invert_flips_edge_and_level_only() -> None:
    cols = ["t", "level", "amps"]
    plain = [dict(c, invert=False) for c in MULTI]
    inv = [dict(c, invert=True) for c in MULTI]
    a = run_pipeline(config_dict(plain, columns=cols, sample_rate_hz=100.0), chatter_rows())
    b = run_pipeline(config_dict(inv, columns=cols, sample_rate_hz=100.0), chatter_rows())
    assert len(a) == len(b)
    flip = {"rising": "falling", "falling": "rising"}
    for ra, rb in zip(a, b):
        assert ra["kind"] == rb["kind"] and ra["t"] == rb["t"]
        if ra["kind"] in ("edge", "state"):
            assert rb["level"] == 1 - ra["level"]
            assert rb["value"] == ra["value"]
        if ra["kind"] == "edge":
            assert rb["edge"] == flip[ra["edge"]] and rb["seq"] == ra["seq"]


def _trapezoid(fs: float, t_up: float, hold: float):
    """−2 until t_up, a 40 units/s ramp to +3, held for ``hold`` seconds, back down, −2."""
    knots_t = [0.0, t_up, t_up + 0.125, t_up + 0.125 + hold, t_up + 0.25 + hold, 10.0]
    knots_v = [-2.0, -2.0, 3.0, 3.0, -2.0, -2.0]
    t = np.arange(int(3.0 * fs)) / fs
    return t, np.interp(t, knots_t, knots_v), knots_t


@pytest.mark.parametrize("hold, expect_edges", [(0.0, 0), (0.05, 0), (0.3, 2)])
def test_dwell_short_excursion_ignored_long_one_keeps_crossing_time(hold, expect_edges) -> None:
    fs, rise_s, fall_s = 100.0, 0.2, 0.05
    t_up = 1.0
    t, x, kt = _trapezoid(fs, t_up, hold)
    cfg = config_dict(
        [{"name": "tank_high", "column": "x", "band": {"low": -1.0, "high": 1.0},
          "dwell": {"rise_s": rise_s, "fall_s": fall_s}}],
        columns=["t", "x"], sample_rate_hz=fs,
    )
    rows = np.column_stack((t, x))
    got = emitted_at(cfg, rows)
    edges = [(i, r) for i, r in got if r["kind"] == "edge"]
    assert [r["kind"] for _, r in got if r["kind"] in ("state", "edge")][0] == "state"
    assert len(edges) == expect_edges
    # closed form, on the ramp segments: up through +1 at t_up + (1 − (−2))/40,
    # down through −1 at (t_up + 0.125 + hold) + (3 − (−1))/40
    tc_up = t_up + 3.0 / 40.0
    tc_dn = kt[3] + 4.0 / 40.0
    # time above +1: from tc_up to the down-crossing of +1 at kt[3] + 2/40
    above = kt[3] + 2.0 / 40.0 - tc_up
    assert (above >= rise_s) == (expect_edges > 0)
    if expect_edges:
        (i_up, up), (i_dn, dn) = edges
        assert up["edge"] == "rising" and dn["edge"] == "falling"
        assert up["t"] == pytest.approx(tc_up, abs=1e-9)  # the crossing, not the confirmation
        assert dn["t"] == pytest.approx(tc_dn, abs=1e-9)
        # emitted at the first sample with t ≥ crossing + dwell (ISA-18.2 on-delay, from memory)
        assert i_up == math.ceil((tc_up + rise_s) * fs - 1e-9)
        assert i_dn == math.ceil((tc_dn + fall_s) * fs - 1e-9)


@pytest.mark.parametrize(
    "kind, params, exact",
    [
        ("moving_average", {"window": 9}, True),
        ("median", {"window": 7}, True),
        ("ema", {"tau_s": 0.05}, False),
        ("lowpass", {"cutoff_hz": 4.0, "order": 2}, False),
    ],
)
def test_compensate_delay_takes_back_the_filter_delay(kind, params, exact) -> None:
    # Closed form: a unity-DC-gain filter passes a ramp a + b·t as a + b·(t − τ) once settled
    # (τ the DC group delay: (N−1)/2 samples for a window of N), so the crossing of h by the
    # filtered ramp is at (h − a)/b + τ, and compensate_delay must bring it back to (h − a)/b.
    fs, a, b, low, high = 100.0, -5.0, 1.0, -1.0, 3.0
    t = np.arange(1200) / fs
    x = a + b * t
    rows = np.column_stack((t, x))
    delay_s = make_filter(kind, fs, **params).delay_samples / fs
    if kind in ("moving_average", "median"):
        assert delay_s == (params["window"] - 1) / 2 / fs
    out = {}
    for comp in (True, False):
        cfg = config_dict(
            [{"name": "tank", "column": "x", "filter": {"kind": kind, **params},
              "band": {"low": low, "high": high}, "compensate_delay": comp}],
            columns=["t", "x"], sample_rate_hz=fs,
        )
        (e,) = of_kind(run_pipeline(cfg, rows, [17] * 100), "edge")
        out[comp] = e["t"]
    t_star = (high - a) / b
    tol = 1e-9 if exact else 1e-6
    assert out[True] == pytest.approx(t_star, abs=tol)
    assert out[False] == pytest.approx(t_star + delay_s, abs=tol)
    # the shift is exactly the filter's delay_samples / rate
    assert out[False] - out[True] == pytest.approx(delay_s, abs=1e-12)
