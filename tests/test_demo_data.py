"""The demo recording (replay_data/orchard_pump.csv): reproducible, current, and physically coherent.

The generator is tools/make_demo.py; these tests pin that regenerating gives the committed bytes,
that the truth JSON agrees with what was synthesised, and that each channel is what the README
says it is.
"""

from __future__ import annotations

import importlib.util
import json
import re
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

REPO = Path(__file__).resolve().parent.parent
CSV = REPO / "replay_data" / "orchard_pump.csv"
TRUTH = REPO / "replay_data" / "orchard_pump.truth.json"
README = REPO / "replay_data" / "README.md"


def _load_make_demo():
    spec = importlib.util.spec_from_file_location("make_demo", REPO / "tools" / "make_demo.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules["make_demo"] = mod  # dataclasses resolve the module by name
    spec.loader.exec_module(mod)
    return mod


md = _load_make_demo()


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """The default recording written twice through main(), to two separate folders."""
    a = tmp_path_factory.mktemp("a") / "orchard_pump.csv"
    b = tmp_path_factory.mktemp("b") / "orchard_pump.csv"
    assert md.main(["--out", str(a)]) == 0
    assert md.main(["--out", str(b)]) == 0
    return a, b


@pytest.fixture(scope="module")
def demo():
    header, array, truth = md.generate()
    _, comps, _ = md.synthesise()
    t = array[:, 0] * 1e-3
    return header, array, truth, comps, t


# --- reproducibility -------------------------------------------------------------------------


def test_regeneration_is_byte_identical(regenerated: tuple[Path, Path]) -> None:
    a, b = regenerated
    assert a.read_bytes() == b.read_bytes()
    assert md.truth_path_for(a).read_bytes() == md.truth_path_for(b).read_bytes()


def test_committed_recording_and_truth_are_current(regenerated: tuple[Path, Path]) -> None:
    a, _ = regenerated
    assert CSV.read_bytes() == a.read_bytes(), "replay_data/orchard_pump.csv is stale: run tools/make_demo.py"
    assert TRUTH.read_bytes() == md.truth_path_for(a).read_bytes(), "truth JSON is stale: run tools/make_demo.py"


def test_other_seed_gives_another_recording_with_the_same_invariants() -> None:
    header, a1, truth1 = md.generate(seed=7, duration_s=100.0)
    raw, comps, truth = md.synthesise(seed=7, duration_s=100.0)
    assert truth == truth1
    assert a1.shape == (25_000, 4)
    assert not np.array_equal(a1[:, 1], md.generate(seed=8, duration_s=100.0)[1][:, 1])
    assert truth["pump"]["starts"] >= 2
    rising = np.count_nonzero(np.diff(comps.flow_clean.astype(np.int16)) == 1)
    assert rising == truth["flow"]["pulses"]


def test_generator_refuses_a_rate_too_low_for_the_pulses() -> None:
    with pytest.raises(ValueError):
        md.generate(rate_hz=100.0)


# --- file format -----------------------------------------------------------------------------


def test_file_format(demo) -> None:
    header, array, truth, _, _ = demo
    text = CSV.read_text(encoding="ascii")
    lines = text.splitlines()
    assert lines[0] == "t_ms,level_ma,pump_a,flow_v" == header
    assert len(lines) - 1 == truth["rows"] == 45_000  # 180 s at 250 Hz
    row = re.compile(r"^\d+,\d+\.\d{4},\d+\.\d{3},\d+\.\d{3}$")
    assert all(row.match(line) for line in lines[1:])
    assert CSV.stat().st_size < 1_500_000
    assert np.array_equal(np.diff(array[:, 0]), np.full(array.shape[0] - 1, 4.0))  # 4 ms = 1/250 Hz
    assert array[0, 0] == truth["time"]["t0_ms"] == 0
    # generate() returns exactly what the file holds
    assert np.array_equal(np.loadtxt(CSV, delimiter=",", skiprows=1), array)


# --- level transmitter ---------------------------------------------------------------------------


def _fault_mask(truth, t):
    f = truth["fault"]
    return (t >= f["t_start"]) & (t <= f["t_end"])


def test_level_in_4_20_ma_except_during_the_fault(demo) -> None:
    _, a, truth, _, t = demo
    level = a[:, 1]
    fault = _fault_mask(truth, t)
    # NAMUR NE 43 (from memory): <= 3.6 mA signals a failed transmitter; 3.8-20.5 mA is measurement.
    assert np.all(level[fault] <= 3.6)
    assert np.all((level[~fault] >= 4.0) & (level[~fault] <= 20.0))
    dur = truth["fault"]["t_end"] - truth["fault"]["t_start"]
    assert 2.0 <= dur <= 8.0  # "a few seconds"
    # one episode: the failure-current samples are contiguous
    assert np.all(np.diff(np.flatnonzero(level <= 3.6)) == 1)


def test_fault_sits_in_a_quiet_stretch(demo) -> None:
    _, _, truth, _, _ = demo
    f = truth["fault"]
    busy = [c["t"] for c in truth["level"]["crossings"]]
    busy += [r["start"] for r in truth["pump"]["runs"]] + [r["stop"] for r in truth["pump"]["runs"]]
    assert all(b < f["t_start"] - 1.0 or b > f["t_end"] + 1.0 for b in busy)


def test_level_scaling_and_marks(demo) -> None:
    _, _, truth, comps, _ = demo
    lv = truth["level"]
    # linear 4-20 mA transmitter over 0-4 m: mA = 4 + 16 * h / 4
    assert lv["low_mark_ma"] == pytest.approx(4.0 + 16.0 * lv["low_mark_m"] / 4.0)
    assert lv["high_mark_ma"] == pytest.approx(4.0 + 16.0 * lv["high_mark_m"] / 4.0)
    drift = lv["drift_ma"] * comps.t_s / truth["duration_s"]
    assert np.allclose(comps.level_clean_ma, 4.0 + 4.0 * comps.level_m + drift, rtol=0, atol=1e-12)


def test_tank_mass_balance(demo) -> None:
    _, _, truth, comps, _ = demo
    tk = truth["tank"]
    # continuity: A * (h_end - h_start) = V_in - V_out
    dh = (tk["volume_in_l"] - tk["volume_out_l"]) / tk["litres_per_m"]
    assert tk["level_end_m"] - tk["level_start_m"] == pytest.approx(dh, abs=2e-6)
    dt = 1.0 / truth["rate_hz"]
    assert np.sum(comps.q_in_lps) * dt == pytest.approx(tk["volume_in_l"], abs=1e-6)


def test_level_noise_is_small_coloured_and_has_rare_single_sample_spikes(demo) -> None:
    _, a, truth, comps, t = demo
    resid = a[:, 1] - comps.level_clean_ma
    spike_idx = np.searchsorted(t, [s["t"] for s in truth["level"]["spikes"]])
    keep = ~_fault_mask(truth, t)
    keep[spike_idx] = False
    r = resid[keep]
    sigma = 1.4826 * np.median(np.abs(r - np.median(r)))  # robust scale, sigma = 1.4826 * MAD for Gaussian data
    assert 0.02 <= sigma <= 0.05
    r = r - r.mean()
    rho1 = np.dot(r[1:], r[:-1]) / np.dot(r, r)
    assert rho1 > 0.3  # white noise alone would give ~0: a low-pass part is present
    # spikes: single samples well away from both neighbours, and rare
    x = a[:, 1]
    assert 3 <= len(spike_idx) <= 15
    for i, s in zip(spike_idx, truth["level"]["spikes"]):
        assert abs(resid[i]) >= 0.3
        assert abs(x[i] - x[i - 1]) > 0.25 and abs(x[i] - x[i + 1]) > 0.25
    others = np.ones(len(x), dtype=bool)
    others[spike_idx] = False
    assert np.max(np.abs(resid[others & ~_fault_mask(truth, t)])) < 0.3


def test_level_crossings_are_slow_and_a_bare_threshold_chatters(demo) -> None:
    _, a, truth, comps, t = demo
    lv = truth["level"]
    rate = truth["rate_hz"]
    slope = np.gradient(comps.level_clean_ma, t)
    raw_crossings = 0
    for mark in ("low", "high"):
        cs = [c for c in lv["crossings"] if c["mark"] == mark]
        assert len(cs) >= 6  # several passes of each mark
        dirs = [c["direction"] for c in cs]
        assert all(d1 != d2 for d1, d2 in zip(dirs, dirs[1:]))  # up and down alternate
        m_ma = lv[f"{mark}_mark_ma"]
        for c in cs:
            i = int(np.searchsorted(t, c["t"]))
            assert abs(slope[i]) < 0.5  # mA/s: slow against the ~0.04 mA noise
            w = slice(i - int(0.5 * rate), i + int(0.5 * rate))
            assert np.median(a[w, 1]) == pytest.approx(m_ma, abs=0.06)
            w = slice(i - int(1.5 * rate), i + int(1.5 * rate))
            above = a[w, 1] >= m_ma
            raw_crossings += np.count_nonzero(above[1:] != above[:-1])
    assert raw_crossings >= 3 * len(lv["crossings"])


# --- pump current ----------------------------------------------------------------------------------


def test_pump_cycles_follow_the_level_logic(demo) -> None:
    _, _, truth, comps, t = demo
    runs = truth["pump"]["runs"]
    assert 4 <= truth["pump"]["starts"] == len(runs) <= 6
    assert truth["pump"]["stops"] == truth["pump"]["starts"]
    cs = truth["level"]["crossings"]
    for r in runs:
        i0, i1 = np.searchsorted(t, [r["start"], r["stop"]])
        assert comps.level_m[i0] <= truth["level"]["pump_start_level_m"]
        assert comps.level_m[i1] >= truth["level"]["pump_stop_level_m"]
        before = [c for c in cs if c["t"] < r["start"]][-1]
        assert (before["mark"], before["direction"]) == ("low", "falling")
        before_stop = [c for c in cs if c["t"] < r["stop"]][-1]
        assert (before_stop["mark"], before_stop["direction"]) == ("high", "rising")


def test_pump_current_running_inrush_and_off(demo) -> None:
    _, a, truth, _, t = demo
    amps = a[:, 2]
    off = np.ones(len(t), dtype=bool)
    for r in truth["pump"]["runs"]:
        running = amps[(t >= r["start"] + 1.0) & (t < r["stop"])]
        med = np.median(running)
        assert 6.0 <= med <= 7.0
        assert med == pytest.approx(r["running_a"], abs=0.3)
        start = (t >= r["start"]) & (t < r["start"] + 0.4)
        peak = amps[start].max()
        # direct-on-line start: locked-rotor current is several times full-load current
        # (5-8 x is the usual handbook range; from memory)
        assert peak >= 4.0 * med
        assert peak == pytest.approx(r["inrush_peak_a"], abs=0.2)
        high = np.count_nonzero(amps[start] > 4.0 * med) / truth["rate_hz"]
        assert 0.15 <= high <= 0.35  # the ~0.2-0.3 s run-up
        assert r["run_up_s"] - 0.02 <= high <= r["run_up_s"] + 0.05
        off &= ~((t >= r["start"]) & (t < r["stop"] + 0.06))
    assert np.all(amps[off] < 0.1)
    # duty cycle: fraction of time running, counted from the recorded current
    duty = np.count_nonzero(amps > 3.0) / len(amps)
    assert duty == pytest.approx(truth["pump"]["duty"], abs=10 * len(truth["pump"]["runs"]) / len(amps))


# --- flow sensor -----------------------------------------------------------------------------------


def test_pulse_count_matches_the_clean_pulse_train(demo) -> None:
    _, _, truth, comps, t = demo
    fl = truth["flow"]
    rising = np.flatnonzero(np.diff(comps.flow_clean.astype(np.int16)) == 1) + 1
    assert len(rising) == fl["pulses"]
    starts = [r["start"] for r in fl["runs"]] + [t[-1] + 1.0]
    per_run = [np.count_nonzero((t[rising] >= s0) & (t[rising] < s1)) for s0, s1 in zip(starts, starts[1:])]
    assert per_run == [r["pulses"] for r in fl["runs"]]
    assert sum(per_run) == fl["pulses"]
    # K-factor: pulses = K x volume of the flow that turns the paddle (below the stall flow it stands still)
    dt = 1.0 / truth["rate_hz"]
    turning = comps.flow_hz > 0
    vol = np.sum(comps.q_in_lps[turning]) * dt
    assert abs(fl["pulses"] - fl["k_factor_pulses_per_l"] * vol) <= 1.0
    assert np.allclose(comps.flow_hz[turning], fl["k_factor_pulses_per_l"] * comps.q_in_lps[turning])


def test_pulse_frequencies(demo) -> None:
    _, a, truth, comps, t = demo
    fl = truth["flow"]
    rate = truth["rate_hz"]
    rising = np.flatnonzero(np.diff(comps.flow_clean.astype(np.int16)) == 1) + 1
    for fr, pr in zip(fl["runs"], truth["pump"]["runs"]):
        assert 10.0 <= fr["f_settled_hz"] <= 25.0
        assert 10.0 <= fr["f_min_settled_hz"] and fr["f_max_hz"] <= 25.0
        # within a run, the clean pulse period is >= 10 samples (f <= 25 Hz at 250 Hz)
        ri = rising[(t[rising] > pr["start"] + 1.0) & (t[rising] < pr["stop"])]
        assert np.diff(ri).min() >= 10
        # the recorded signal's spectral peak over the last 5 s of the run is the truth's frequency
        # (reference: scipy.signal.periodogram; a square wave's strongest line is its fundamental)
        w = (t >= pr["stop"] - 5.0) & (t < pr["stop"])
        f, p = signal.periodogram(a[w, 3], fs=rate, nfft=2**16, detrend="constant")
        assert f[np.argmax(p)] == pytest.approx(fr["f_last5s_hz"], abs=0.15)
        # the flow settles after start: early frequency differs from the settled one
        early = comps.flow_hz[(t >= pr["start"] + 0.8) & (t < pr["start"] + 1.5)].mean()
        assert early > 1.05 * fr["f_last5s_hz"]


def test_flow_bounce_is_short_and_right_after_edges(demo) -> None:
    _, a, truth, comps, t = demo
    fl = truth["flow"]
    mid = 0.5 * (fl["high_v"] + fl["low_v"])
    seen = (a[:, 3] >= mid).astype(np.int16)
    # each glitch adds one rising transition; noise alone never reaches mid-rail
    raw_rising = np.count_nonzero(np.diff(seen) == 1)
    assert raw_rising == fl["pulses"] + fl["bounce_glitches"]
    edges = np.flatnonzero(np.diff(comps.flow_clean.astype(np.int16))) + 1
    assert fl["bounce_glitches"] >= 0.2 * len(edges)
    diff = np.flatnonzero(seen != comps.flow_clean)
    # every wrong sample lies 1..3 samples after a clean edge
    prev_edge = edges[np.searchsorted(edges, diff, side="right") - 1]
    assert np.all((diff - prev_edge >= 1) & (diff - prev_edge <= 3))
    # idle paddle: no transitions at all
    still = comps.flow_hz == 0
    assert np.count_nonzero(np.diff(seen)[still[1:] & still[:-1]]) == 0


def test_readme_event_table_is_current(demo) -> None:
    _, _, truth, _, _ = demo
    text = README.read_text(encoding="utf-8")
    assert md.events_markdown(truth) in text, "replay_data/README.md event table is stale (tools/make_demo.py --events)"
    assert "7.5 pulses per litre" in text
    assert json.loads(TRUTH.read_text()) == truth
