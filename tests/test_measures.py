"""The measure stage (frequency, duty, counts of a channel's edges) against closed forms.

External checks used here:

* a periodic pulse train of frequency f has period 1/f between successive rising edges
  (definition of frequency);
* a trapezoidal pulse with equal rise and fall ramps, timed at the 50 % reference level, has
  duration = duty·T; a comparator band symmetric about that level fires its rising edge
  Δ after the 50 % crossing and its falling edge Δ after the falling 50 % crossing, so the high
  time between edges is exactly duty·T (pulse duration at the 50 % reference level as in
  IEEE Std 181, from memory; the symmetry argument is plain geometry of the straight ramps);
* linear interpolation is exact on a straight line (any numerical analysis text, e.g. Burden
  & Faires, from memory), which is why the core's edge times on the ramps are sub-sample;
* the time average of a periodic indicator over a whole number of periods is its duty, from
  any starting phase (periodicity);
* speed from a pulse pickup: rpm = 60·f / pulses_per_rev (definition of rev/min);
* a K-factor meter (K pulses per unit): quantity = pulses / K (definition of the K-factor).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import of_kind, run_pipeline
from streamcond import records
from streamcond.config import Measure
from streamcond.core.measures import MeasureTracker

AMP = 3.3  # V: a 3.3 V logic-level pickup on the pump station's ADC
BAND = {"low": 1.0, "high": 2.3}  # symmetric about AMP/2 = 1.65 V


# --- helpers ----------------------------------------------------------------------------------


def trapezoid(t: np.ndarray, f: float, duty: float, ramp: float, t0: float) -> np.ndarray:
    """Pulse train 0..AMP: a rising ramp starts at t0 + k/f, the falling ramp duty/f later;
    both ramps last ``ramp`` seconds, so the 50 % crossings are exactly duty/f apart."""
    T = 1.0 / f
    s = np.mod(t - t0, T)
    hi = duty * T
    x = np.where(
        s < ramp,
        s / ramp,
        np.where(s < hi, 1.0, np.where(s < hi + ramp, 1.0 - (s - hi) / ramp, 0.0)),
    )
    return AMP * x


def core_edges(t: np.ndarray, x: np.ndarray, sizes=None) -> tuple[list[tuple[float, int]], int]:
    """Edge (t, level) pairs and the initial level from the real conditioning core."""
    cfg = {
        "source": {"kind": "file", "time_column": "t", "columns": ["t", "p"]},
        "channel": [{"name": "p", "band": BAND}],
    }
    recs = run_pipeline(cfg, np.column_stack([t, x]), sizes)
    states = of_kind(recs, "state", "p")
    assert len(states) == 1
    edges = [(e["t"], e["level"]) for e in of_kind(recs, "edge", "p")]
    return edges, int(states[0]["level"])


def drive(
    tr: MeasureTracker,
    edges: list[tuple[float, int]],
    windows: list[tuple[float, float]],
    level0: int = -1,
    batches: list[int] | None = None,
) -> tuple[list[dict], list[dict]]:
    """Do what the channel does: report the edges of each window (in batches of the given
    sizes, cycled), then close it with the output level at its end. Returns (window records,
    per-edge records)."""
    out, per = [], []
    level = level0
    i = 0
    bi = 0
    for a, b in windows:
        j = i
        while j < len(edges) and edges[j][0] < b:
            j += 1
        while i < j:
            n = j - i if not batches else min(j - i, batches[bi % len(batches)])
            bi += 1
            chunk = edges[i : i + n]
            per.extend(tr.edges([e[0] for e in chunk], [e[1] for e in chunk]))
            level = chunk[-1][1]
            i += n
        rec = tr.close(a, b, level)
        if rec is not None:
            out.append(rec)
    return out, per


def windows_over(t0: float, t1: float, interval: float) -> list[tuple[float, float]]:
    k0, k1 = math.floor(t0 / interval), math.ceil(t1 / interval)
    return [(k * interval, (k + 1) * interval) for k in range(k0, k1)]


def pulses(times: np.ndarray, high_s: float) -> list[tuple[float, int]]:
    """Exact edges of pulses rising at ``times``, each high for ``high_s``."""
    out: list[tuple[float, int]] = []
    for r in times.tolist():
        out += [(r, 1), (r + high_s, 0)]
    return out


# --- frequency --------------------------------------------------------------------------------


def test_frequency_of_noisy_pulse_train_through_the_core() -> None:
    f, fs, ramp, dur, interval = 23.7, 1000.0, 0.006, 40.0, 1.0
    rng = np.random.default_rng(11)
    t = np.arange(int(dur * fs)) / fs
    x = trapezoid(t, f, 0.5, ramp, t0=0.01234) + rng.normal(0.0, 0.005, t.size)
    edges, level0 = core_edges(t, x, [613] * 100)
    spec = Measure(duty=False, count=False)
    tr = MeasureTracker("p", spec)
    recs, _ = drive(tr, edges, windows_over(0.0, dur, interval), level0)
    full = recs[1:-1]  # whole windows inside the recording
    assert len(full) == 38
    for r in full:
        # the definition of frequency: the pulse train's known f
        assert abs(r["frequency_hz"] / f - 1.0) < 1e-4
        assert r["stale"] is False
        assert r["rate_unit"] == "Hz" and r["rate"] == r["frequency_hz"]
        assert r["period_s"]["min"] <= r["period_s"]["mean"] <= r["period_s"]["max"]
        assert r["period_s"]["mean"] == pytest.approx(1.0 / r["frequency_hz"], rel=1e-12)
    # the same edges rounded to whole samples miss that bound: sub-sample timing is what
    # makes it (so the check above can fail)
    coarse = [(math.ceil(e[0] * fs) / fs, e[1]) for e in edges]
    tr2 = MeasureTracker("p", spec)
    recs2, _ = drive(tr2, coarse, windows_over(0.0, dur, interval), level0)
    worst = max(abs(r["frequency_hz"] / f - 1.0) for r in recs2[1:-1])
    assert worst > 1e-4


def test_frequency_with_exact_edge_times_and_windows_cutting_pulses() -> None:
    f = 7.3
    rises = 0.0421 + np.arange(200) / f
    edges = pulses(rises, 0.3 / f)
    tr = MeasureTracker("shaft", Measure())
    recs, _ = drive(tr, edges, windows_over(0.0, 27.0, 2.5), level0=0)
    for r in recs[1:-1]:
        # period 1/f between successive rising edges (definition), to rounding
        assert r["frequency_hz"] == pytest.approx(f, rel=1e-12)
        assert r["periods"] in (18, 19)
    # the first window's first rising edge has no predecessor: one period fewer than rises
    assert recs[0]["count"] == recs[0]["periods"] + 1


def test_rpm_from_pulses_per_rev() -> None:
    f, ppr = 25.0, 4.0
    rises = 0.013 + np.arange(500) / f
    tr = MeasureTracker("shaft", Measure(pulses_per_rev=ppr, rate_per="min"))
    recs, _ = drive(tr, pulses(rises, 0.01), windows_over(0.0, 19.0, 1.0), level0=0)
    for r in recs[1:]:
        # rpm = 60·f/ppr (definition of rev/min): 375 rpm
        assert r["rate"] == pytest.approx(60.0 * f / ppr, rel=1e-12)
        assert r["rate_unit"] == "rpm"
    tr_h = MeasureTracker("shaft", Measure(pulses_per_rev=ppr, rate_per="h"))
    recs_h, _ = drive(tr_h, pulses(rises, 0.01), windows_over(0.0, 19.0, 1.0), level0=0)
    # rev/h = 3600·f/ppr
    assert recs_h[5]["rate"] == pytest.approx(3600.0 * f / ppr, rel=1e-12)
    assert recs_h[5]["rate_unit"] == "rev/h"


def test_flow_rate_from_k_factor() -> None:
    K, f = 7.5, 12.0  # pulses per litre; 12 Hz = 12/7.5 L/s = 96 L/min
    rises = 0.2 + np.arange(300) / f
    spec = Measure(pulses_per_unit=K, quantity_unit="L", rate_per="min")
    tr = MeasureTracker("flow", spec)
    recs, _ = drive(tr, pulses(rises, 0.02), windows_over(0.0, 20.0, 5.0), level0=0)
    # quantity rate = f/K per second (definition of the K-factor), ×60 per minute
    assert recs[1]["rate"] == pytest.approx(60.0 * f / K, rel=1e-12)
    assert recs[1]["rate_unit"] == "L/min"


# --- staleness ----------------------------------------------------------------------------------


def test_stopped_shaft_is_zero_rpm_and_stale() -> None:
    f, ppr = 10.0, 2.0
    rises = 0.05 + np.arange(123) / f  # last rising edge at 12.25 s
    spec = Measure(pulses_per_rev=ppr, stale_s=2.0)
    tr = MeasureTracker("shaft", spec)
    recs, _ = drive(tr, pulses(rises, 0.02), windows_over(0.0, 30.0, 5.0), level0=0)
    assert [r["t"] for r in recs] == [0.0, 5.0, 10.0, 15.0, 20.0, 25.0]
    assert recs[1]["rate"] == pytest.approx(60.0 * f / ppr, rel=1e-12)  # 300 rpm, closed form
    assert recs[1]["stale"] is False
    # [10, 15): the shaft stopped at 12.25 s, 2.75 s > stale_s before the window's end: 0 rpm,
    # although periods completed in the window (their statistics are kept)
    w = recs[2]
    assert w["stale"] is True and w["rate"] == 0.0 and w["frequency_hz"] == 0.0
    assert w["periods"] == 23 and w["period_s"]["mean"] == pytest.approx(0.1, rel=1e-9)
    for w in recs[3:]:
        assert w["stale"] is True and w["rate"] == 0.0 and w["periods"] == 0
        assert w["period_s"] is None and w["count"] == 0


def test_one_slow_period_versus_stale() -> None:
    spec = Measure(stale_s=2.0, duty=False)
    tr = MeasureTracker("shaft", spec)
    # rising edges 1.8 s apart: one slow period per window of 2 s, never stale
    rises = 0.5 + 1.8 * np.arange(12)
    recs, _ = drive(tr, pulses(rises, 0.1), windows_over(0.0, 20.0, 2.0), level0=0)
    for r in recs:
        assert r["stale"] is False
        if r["periods"]:
            assert r["frequency_hz"] == pytest.approx(1.0 / 1.8, rel=1e-12)
        elif r["t"] > 1.0:
            # no period completed here and the wait so far is below 1.8 s: the last period's
            # frequency (1/max(last period, time waited))
            assert r["frequency_hz"] == pytest.approx(1.0 / 1.8, rel=1e-12)
    # a rising edge 2.5 s after the previous one (> stale_s) is not a 2.5 s period: the train
    # restarts; waiting 1.5 s after a 1.2 s period lowers the estimate to 1/1.5 Hz
    tr = MeasureTracker("shaft", spec)
    edges = pulses(np.array([0.1, 2.6, 3.8]), 0.05)
    recs, _ = drive(tr, edges, [(0.0, 2.0), (2.0, 5.3)], level0=0)
    assert recs[0]["frequency_hz"] is None and recs[0]["stale"] is False
    assert recs[1]["periods"] == 1 and recs[1]["period_s"]["max"] == pytest.approx(1.2)
    assert recs[1]["frequency_hz"] == pytest.approx(1.0 / 1.2)
    r = tr.close(5.3, 5.8, 0)  # waited 2.0 s ≤ stale_s, no new period
    assert r["periods"] == 0 and r["stale"] is False
    assert r["frequency_hz"] == pytest.approx(1.0 / 2.0)
    r = tr.close(5.8, 6.3, 0)  # waited 2.5 s > stale_s
    assert r["stale"] is True and r["frequency_hz"] == 0.0


def test_no_pulse_ever_is_stale_after_stale_s_of_observation() -> None:
    tr = MeasureTracker("shaft", Measure(stale_s=2.0))
    r = tr.close(0.0, 1.0, 0)
    assert r["stale"] is False and r["frequency_hz"] is None
    r = tr.close(1.0, 3.0, 0)
    assert r["stale"] is True and r["rate"] == 0.0


# --- duty -----------------------------------------------------------------------------------------


@pytest.mark.parametrize("duty", [0.1, 0.5, 0.9])
def test_pwm_duty_through_the_core(duty: float) -> None:
    f, fs, ramp, dur = 4.0, 997.0, 0.008, 21.0
    rng = np.random.default_rng(int(duty * 100))
    t = np.arange(int(dur * fs)) / fs
    x = trapezoid(t, f, duty, ramp, t0=0.0371) + rng.normal(0.0, 0.01, t.size)
    edges, level0 = core_edges(t, x, [1000] * 30)
    tr = MeasureTracker("pump", Measure())
    recs, _ = drive(tr, edges, windows_over(0.0, dur, 2.5), level0)
    full = recs[1:-1]
    assert len(full) == 7
    for r in full:
        # a window of 10 whole periods: duty = high time / period (periodicity), with high
        # time = duty·T between the band's edges (symmetric ramps, see the module docstring)
        assert abs(r["duty"] - duty) < 1e-3
        assert r["high_s"]["mean"] == pytest.approx(duty / f, abs=1e-4)
        assert r["count"] == 10


def test_duty_unknown_until_level_known_and_late_edges() -> None:
    tr = MeasureTracker("pump", Measure())
    # first window: the level at its start is not known -> null
    tr.edges([0.5, 0.8], [1, 0])
    r = tr.close(0.0, 1.0, 0)
    assert r["duty"] is None
    assert r["high_s"] == {"min": pytest.approx(0.3), "mean": pytest.approx(0.3),
                           "max": pytest.approx(0.3)}
    # second: low in, high 1.25..1.75 -> 0.5 s of 1 s
    tr.edges([1.25, 1.75], [1, 0])
    assert tr.close(1.0, 2.0, 0)["duty"] == pytest.approx(0.5)
    # an edge reported late (dwell): its crossing lies before the window; it counts from the
    # window's start, its pulse width uses the true time
    r = tr.close(2.0, 3.0, 0)
    assert r["duty"] == 0.0
    tr.edges([2.9, 3.4], [1, 0])
    r = tr.close(3.0, 4.0, 0)
    assert r["duty"] == pytest.approx(0.4)
    assert r["high_s"]["max"] == pytest.approx(0.5)


def test_duty_excludes_fault_time() -> None:
    tr = MeasureTracker("pump", Measure())
    tr.close(0.0, 10.0, 1)
    # held high through a 4 s fault, no edges: duty 1 (the comparator holds its level)
    assert tr.close(10.0, 20.0, 1, fault_s=4.0)["duty"] == pytest.approx(1.0)
    # high 20..26, low after; 2 s of fault while high: (6 − 2) / (10 − 2)
    tr.edges([26.0], [0])
    r = tr.close(20.0, 30.0, 0, fault_s=2.0, fault_high_s=2.0)
    assert r["duty"] == pytest.approx(4.0 / 8.0)
    # a window entirely in fault has no duty
    assert tr.close(30.0, 40.0, 0, fault_s=10.0)["duty"] is None


# --- counts and the totalizer ---------------------------------------------------------------------


def test_totals_exact_across_a_restart() -> None:
    K, N = 10.0, 10_000  # 10 pulses per litre: N/K = 1000 L exactly (definition of K)
    spec = Measure(pulses_per_unit=K, quantity_unit="L")
    rises = 0.001 + np.arange(N) * 0.0123
    edges = pulses(rises, 0.004)
    wins = windows_over(0.0, float(rises[-1]) + 1.0, 10.0)
    half = len(wins) // 2
    tr = MeasureTracker("flow", spec)
    first, _ = drive(tr, edges, wins[:half], level0=0)
    # the daemon restarts mid-window: a few edges of the next window are reported, then the
    # state is saved (through JSON, as the daemon stores it) and a new tracker continues
    start = sum(1 for e in edges if e[0] < wins[half][0])
    cut = next(i for i, e in enumerate(edges) if e[0] >= wins[half][0] + 3.0)
    tr.edges([e[0] for e in edges[start:cut]], [e[1] for e in edges[start:cut]])
    saved = json.loads(json.dumps(tr.snapshot()))
    tr2 = MeasureTracker("flow", spec)
    tr2.restore(saved)
    second, _ = drive(tr2, edges[cut:], wins[half:], level0=int(saved["level"]))
    totals = [r["total"] for r in first + second]
    assert totals == sorted(totals)  # never backwards
    assert second[-1]["total"] == N
    assert second[-1]["total_units"] == 1000.0  # exact: an accumulated 0.1 per pulse is not
    assert sum(0.1 for _ in range(N)) != 1000.0  # (the reason to keep the integer count)
    assert second[-1]["quantity_unit"] == "L"
    # the interrupted window's partial count is lost (like the stats record), never the total
    lost = sum(1 for e in edges[start:cut] if e[1] == 1)
    assert lost > 0
    assert sum(r["count"] for r in first + second) == N - lost


def test_count_per_window() -> None:
    tr = MeasureTracker("flow", Measure(pulses_per_unit=450.0, quantity_unit="L"))
    rises = 0.05 + np.arange(4500) * 0.002  # 4500 pulses in 9 s
    recs, _ = drive(tr, pulses(rises, 0.0005), windows_over(0.0, 10.0, 1.0), level0=0)
    assert [r["count"] for r in recs] == [475] + [500] * 8 + [25]
    assert recs[-1]["total"] == 4500 and recs[-1]["total_units"] == 10.0  # 4500/450 L


# --- per-edge records -------------------------------------------------------------------------------


def test_per_edge_records() -> None:
    K = 5.0
    spec = Measure(per_edge=True, pulses_per_unit=K, quantity_unit="L", rate_per="min")
    tr = MeasureTracker("flow", spec)
    rises = np.concatenate([0.1 + 0.25 * np.arange(8), 10.0 + 0.5 * np.arange(4)])
    recs, per = drive(tr, pulses(rises, 0.05), [(0.0, 5.0), (5.0, 15.0)], level0=0)
    # one per rising edge completing a period; the first edge and the first after the pause
    # (> stale_s) complete none
    assert len(per) == 7 + 3
    for p in per:
        assert set(p) == {"kind", "channel", "t", "period_s", "frequency_hz", "rate", "rate_unit"}
        assert p["kind"] == "measure" and p["channel"] == "flow"
        assert p["frequency_hz"] == pytest.approx(1.0 / p["period_s"], rel=1e-15)
        assert p["rate"] == pytest.approx(60.0 * p["frequency_hz"] / K, rel=1e-15)  # f/K per min
        assert p["rate_unit"] == "L/min"
    assert [p["period_s"] for p in per[:7]] == pytest.approx([0.25] * 7)
    assert [p["period_s"] for p in per[7:]] == pytest.approx([0.5] * 3)
    assert [p["t"] for p in per] == rises[1:8].tolist() + rises[9:].tolist()
    no = MeasureTracker("flow", Measure(pulses_per_unit=K))
    _, per_off = drive(no, pulses(rises, 0.05), [(0.0, 5.0), (5.0, 15.0)], level0=0)
    assert per_off == []


def test_disabled_parts_are_absent() -> None:
    tr = MeasureTracker("x", Measure(frequency=False, duty=False))
    tr.edges([0.5], [1])
    r = tr.close(0.0, 1.0, 1)
    assert set(r) == {"kind", "channel", "t", "t_end", "count", "total"}
    tr = MeasureTracker("x", Measure(frequency=False, duty=False, count=False))
    assert tr.close(0.0, 1.0, 1) is None


# --- chunk invariance ---------------------------------------------------------------------------


@st.composite
def edge_streams(draw):
    gaps = draw(st.lists(st.floats(1e-3, 3.0, allow_nan=False), min_size=0, max_size=60))
    first = draw(st.integers(0, 1))
    t0 = draw(st.floats(0.0, 5.0, allow_nan=False))
    times = (t0 + np.cumsum([0.0] + gaps)).tolist()
    levels = [(first + i) % 2 for i in range(len(times))]
    interval = draw(st.floats(0.3, 4.0, allow_nan=False))
    end = times[-1] + 1e-6 + draw(st.floats(0.0, 6.0, allow_nan=False))
    wins = windows_over(0.0, end, interval)  # the last window holds every edge left
    # the channel skips windows that hold no sample (a gap in the data)
    skip = draw(st.lists(st.booleans(), min_size=len(wins), max_size=len(wins)))
    skip[-1] = False
    wins = [w for w, s in zip(wins, skip) if not s]
    batches = draw(st.lists(st.integers(1, 7), min_size=1, max_size=10))
    spec = Measure(
        per_edge=True,
        stale_s=draw(st.floats(0.5, 3.0, allow_nan=False)),
        pulses_per_rev=draw(st.sampled_from([None, 1.0, 3.0])),
    )
    return list(zip(times, levels)), wins, batches, spec, 1 - first


@settings(deadline=None, max_examples=60)
@given(edge_streams())
def test_batching_invariance(stream) -> None:
    edges, wins, batches, spec, level0 = stream
    ref, ref_per = drive(MeasureTracker("c", spec), edges, wins, level0)
    got, got_per = drive(MeasureTracker("c", spec), edges, wins, level0, batches)
    # bit for bit: shortest round-trip JSON text is equal iff the floats are equal
    assert [records.to_json(r) for r in got] == [records.to_json(r) for r in ref]
    assert [records.to_json(r) for r in got_per] == [records.to_json(r) for r in ref_per]
    assert ref[-1]["total"] == sum(1 for e in edges if e[1] == 1)
    # a restart at a window boundary continues exactly as if there had been none
    k = len(wins) // 2
    tr = MeasureTracker("c", spec)
    a, a_per = drive(tr, edges, wins[:k], level0)
    tr2 = MeasureTracker("c", spec)
    tr2.restore(json.loads(json.dumps(tr.snapshot())))
    n_fed = sum(1 for e in edges if e[0] < wins[k - 1][1]) if k else 0
    b, b_per = drive(tr2, edges[n_fed:], wins[k:], tr.level if k else level0)
    assert [records.to_json(r) for r in a + b] == [records.to_json(r) for r in ref]
    assert [records.to_json(r) for r in a_per + b_per] == [records.to_json(r) for r in ref_per]
    # a copy continues independently and identically
    tr3 = MeasureTracker("c", spec)
    drive(tr3, edges[:n_fed], wins[:k], level0)
    c = tr3.copy()
    x, _ = drive(tr3, edges[n_fed:], wins[k:], tr3.level if k else level0)
    y, _ = drive(c, edges[n_fed:], wins[k:], c.level if k else level0)
    assert [records.to_json(r) for r in x] == [records.to_json(r) for r in y]


def test_core_edges_do_not_depend_on_row_chunking() -> None:
    f, fs = 9.1, 1000.0
    rng = np.random.default_rng(5)
    t = np.arange(int(12 * fs)) / fs
    x = trapezoid(t, f, 0.3, 0.006, 0.0) + rng.normal(0.0, 0.01, t.size)
    wins = windows_over(0.0, 12.0, 2.0)
    out = []
    for sizes in (None, [7] * 3000, [1] * 50 + [4093] * 10):
        edges, level0 = core_edges(t, x, sizes)
        recs, _ = drive(MeasureTracker("p", Measure()), edges, wins, level0)
        out.append([records.to_json(r) for r in recs])
    assert out[0] == out[1] == out[2]
