"""Tests of the robust noise estimate (σ̂, ν0) and its streaming tracker.

Every record is synthetic with a known truth: the noise is normalised so that its realised
sample standard deviation is exactly SIGMA, and the signal it rides on (a pump-station pressure
around 11 kPa: slow swings, pump on/off steps, sensor spikes) is added afterwards. The checks
against theory name their source beside them.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal, stats

from streamcond.core.noise import (
    MAD_TO_SIGMA,
    MIN_SAMPLES,
    NoiseEstimate,
    NoiseTracker,
    estimate_noise,
)

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tools"))
from make_demo import FLOW_SIGMA_V  # noqa: E402  (the demo generator's noise figure)

FS = 1000.0  # Hz
SIGMA = 0.05  # kPa, the noise's true standard deviation
LEVEL = 11.0  # kPa, the pressure the noise sits on
SEEDS = (101, 202, 303)


def white(n: int, rng: np.random.Generator) -> np.ndarray:
    x = rng.standard_normal(n)
    return SIGMA * x / x.std()


def lowpass(n: int, cutoff_hz: float, rng: np.random.Generator) -> np.ndarray:
    """White noise through a 4th-order Butterworth low-pass, start-up transient discarded."""
    sos = signal.butter(4, cutoff_hz, fs=FS, output="sos")
    x = signal.sosfilt(sos, rng.standard_normal(n + 20_000))[20_000:]
    return SIGMA * x / x.std()


def sine(n: int, period_s: float) -> np.ndarray:
    """A slow swing of ten times the noise's σ in amplitude."""
    return 10 * SIGMA * np.sin(2 * np.pi * np.arange(n) / FS / period_s + 0.3)


def square(n: int, period_s: float, height: float) -> np.ndarray:
    """Pump on/off: steps of `height` between two levels."""
    t = np.arange(n) / FS
    return 0.5 * height * np.sign(np.sin(2 * np.pi * t / period_s + 0.1))


def spikes(n: int, rng: np.random.Generator, fraction: float, size: float) -> np.ndarray:
    """Isolated one-sample glitches of ±size at a random `fraction` of the samples."""
    out = np.zeros(n)
    hit = rng.random(n) < fraction
    out[hit] = size * rng.choice([-1.0, 1.0], hit.sum())
    return out


# ---------------------------------------------------------------------------------------------
# The MAD constant


def test_mad_constant_is_inverse_normal_quartile() -> None:
    # Reference: for Gaussian data MAD = σ·Φ⁻¹(3/4); Φ⁻¹ from scipy.stats.norm.ppf.
    assert MAD_TO_SIGMA == pytest.approx(1.0 / stats.norm.ppf(0.75), rel=1e-12)
    assert MAD_TO_SIGMA == pytest.approx(1.4826, abs=5e-5)  # the handbook's rounded value


# ---------------------------------------------------------------------------------------------
# σ̂ within 10 % of the true σ, whatever the signal does (truth: SIGMA by construction)

CASES = {
    # name: (seconds, builder(n, rng) -> noise + signal)
    "white": (30, lambda n, r: white(n, r)),
    "lowpass fs/20": (60, lambda n, r: lowpass(n, FS / 20, r)),
    "lowpass fs/100": (120, lambda n, r: lowpass(n, FS / 100, r)),
    "white + sine 2 s": (30, lambda n, r: white(n, r) + sine(n, 2.0)),
    "white + sine 10 s": (30, lambda n, r: white(n, r) + sine(n, 10.0)),
    "lowpass fs/20 + sine 2 s": (60, lambda n, r: lowpass(n, FS / 20, r) + sine(n, 2.0)),
    "lowpass fs/20 + sine 10 s": (60, lambda n, r: lowpass(n, FS / 20, r) + sine(n, 10.0)),
    "lowpass fs/100 + sine 10 s": (120, lambda n, r: lowpass(n, FS / 100, r) + sine(n, 10.0)),
    "lowpass fs/100 + sine 2 s": (120, lambda n, r: lowpass(n, FS / 100, r) + sine(n, 2.0)),
    "white + ramp": (30, lambda n, r: white(n, r) + 20 * SIGMA * np.arange(n) / FS),
    "white + square, steps 10 sigma": (30, lambda n, r: white(n, r) + square(n, 4.0, 10 * SIGMA)),
    "white + square, steps 40 sigma": (30, lambda n, r: white(n, r) + square(n, 1.0, 40 * SIGMA)),
    "lowpass fs/20 + square, steps 10 sigma": (
        60,
        lambda n, r: lowpass(n, FS / 20, r) + square(n, 4.0, 10 * SIGMA),
    ),
    "white + 5 Hz pulse train, steps 10 sigma": (
        30,
        lambda n, r: white(n, r) + square(n, 0.2, 10 * SIGMA),  # a step every 100 samples
    ),
    "white + 0.5 % spikes of 50 sigma": (
        30,
        lambda n, r: white(n, r) + spikes(n, r, 0.005, 50 * SIGMA),
    ),
    "white + square + sine + spikes": (
        30,
        lambda n, r: white(n, r)
        + square(n, 2.0, 12 * SIGMA)
        + sine(n, 5.0)
        + spikes(n, r, 0.005, 50 * SIGMA),
    ),
}


@pytest.mark.parametrize("name", list(CASES))
def test_sigma_within_ten_percent(name: str) -> None:
    seconds, build = CASES[name]
    n = int(seconds * FS)
    for seed in SEEDS:
        x = LEVEL + build(n, np.random.default_rng(seed))
        est = estimate_noise(x, FS)
        assert isinstance(est, NoiseEstimate)
        # Truth: SIGMA, the realised noise's standard deviation by construction.
        assert est.sigma == pytest.approx(SIGMA, rel=0.10), (name, seed, est)


@pytest.mark.parametrize(("cutoff", "seconds"), [(FS / 20, 60), (FS / 100, 120)])
def test_coloured_noise_correction_leaves_no_bias(cutoff: float, seconds: int) -> None:
    # Truth: SIGMA by construction. The mean of σ̂/σ over the seeds has a statistical error of
    # about 0.6 % here (spread measured at 1 % per record); 2 % leaves room for it. Without the
    # extrapolation in 1/(m - p) the fit's share of the noise, ≈ p·(u - 1)/(m - p), would be
    # missing: about -4 % at the segment lengths chosen.
    n = int(seconds * FS)
    ratios = [
        estimate_noise(lowpass(n, cutoff, np.random.default_rng(seed)), FS).sigma / SIGMA
        for seed in SEEDS
    ]
    assert np.mean(ratios) == pytest.approx(1.0, abs=0.02), ratios


def test_spikes_do_not_move_the_estimate() -> None:
    # Truth: the estimate of the same noise without its spikes. 0.5 % spikes of 50σ must not
    # shift it noticeably: each one is flagged and the fit recomputed without it (a spike
    # dragging the fit would bias σ̂ by about -1 %).
    n = 30_000
    for seed in SEEDS:
        rng = np.random.default_rng(seed)
        noise = LEVEL + white(n, rng)
        spiky = noise + spikes(n, rng, 0.005, 50 * SIGMA)
        ratio = estimate_noise(spiky, FS).sigma / estimate_noise(noise, FS).sigma
        assert ratio == pytest.approx(1.0, abs=0.004), seed


def test_first_differences_alone_would_fail_on_lowpass_noise() -> None:
    # Why the estimator needs long segments: Var Δx = 2σ²(1 - ρ(1)) (closed form), and for
    # noise low-passed at fs/100, ρ(1) is close to 1. The first-difference MAD estimate sees a
    # small fraction of σ; the segment estimator sees all of it.
    x = lowpass(120_000, FS / 100, np.random.default_rng(7))
    naive = MAD_TO_SIGMA * np.median(np.abs(np.diff(x))) / math.sqrt(2)
    assert naive < 0.1 * SIGMA
    assert estimate_noise(x, FS).sigma == pytest.approx(SIGMA, rel=0.10)


def test_scale_and_offset_equivariance() -> None:
    # σ̂ is a scale: multiplying the record by g multiplies σ̂ by |g| and leaves ν0 alone;
    # an offset changes nothing (the fit contains a constant). Closed-form property.
    x = white(20_000, np.random.default_rng(5)) + sine(20_000, 3.0)
    base = estimate_noise(x, FS)
    moved = estimate_noise(-4.0 * x + 123.0, FS)
    assert moved.sigma == pytest.approx(4.0 * base.sigma, rel=1e-9)
    assert moved.nu0_hz == pytest.approx(base.nu0_hz, rel=1e-9)


@pytest.mark.parametrize("factor", [2.0**600, 2.0**-600, 1e300, 1e-300])
def test_records_far_from_unit_scale_are_measured_not_overflowed(factor: float) -> None:
    # The same equivariance where the fit's squares would leave the doubles (IEEE 754 binary64:
    # normal numbers from 2^-1022 to about 2^1024): (1e300)² overflows, (1e-300)² underflows
    # to 0, which once made the record look "without variation" (σ̂ = 0). White noise of σ = SIGMA
    # scaled by the factor has σ = factor·SIGMA (definition of the standard deviation).
    x = white(20_000, np.random.default_rng(5))
    base = estimate_noise(x, FS)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no overflow or underflow warning either
        far = estimate_noise(factor * x, FS)
    assert far.sigma == pytest.approx(factor * base.sigma, rel=1e-12)
    assert far.sigma == pytest.approx(factor * SIGMA, rel=0.03)
    assert far.nu0_hz == pytest.approx(base.nu0_hz, rel=1e-12) and far.reliable


@pytest.mark.parametrize("glitch", [1e13, 1e149])
def test_one_glitch_far_above_the_noise_does_not_hide_it(glitch: float) -> None:
    # The rounding floor (16 ulps of the samples' size, squared) once took the largest sample
    # as that size: one glitch of 1e13 over noise of σ = 0.01 raised it to
    # (16 · 2.2e-16 · 1e13)² ≈ 1.3e-3, above σ² = 1e-4, and the record came out "without
    # variation" (σ̂ = 0, reliable), which would snap an adaptive band to min_width. The glitch
    # is weighted out of the fit; σ̂ is the noise's σ (definition), within the estimator's 3 %.
    assert (16 * np.finfo(np.float64).eps * 1e13) ** 2 > 0.01**2
    x = white(20_000, np.random.default_rng(8)) * (0.01 / SIGMA)
    x[7_000] = glitch
    est = estimate_noise(x, FS)
    assert est.sigma == pytest.approx(0.01, rel=0.03) and est.reliable


def test_a_record_near_the_largest_double_says_its_noise_is_beyond_any_number() -> None:
    # ±M, M the largest binary64 (about 1.8e308): σ is M itself, and σ̂ a little above it
    # overflows; the answer is inf, marked unreliable, not an OverflowError.
    big = np.finfo(np.float64).max
    est = estimate_noise(np.tile([big, -big], 64), FS)
    assert est.sigma == math.inf and not est.reliable and "beyond any number" in est.reason


# ---------------------------------------------------------------------------------------------
# ν0 and Rice's formula


def brickwall_noise(n: int, fs: float, band_hz: float, rng: np.random.Generator) -> np.ndarray:
    """Gaussian noise with a flat spectrum up to band_hz and nothing above (ideal FFT filter)."""
    spec = np.fft.rfft(rng.standard_normal(n))
    spec[np.fft.rfftfreq(n, 1.0 / fs) > band_hz] = 0.0
    x = np.fft.irfft(spec, n)
    return x / x.std()


def upcrossings(x: np.ndarray, level: float) -> int:
    return int(np.count_nonzero((x[:-1] < level) & (x[1:] >= level)))


def test_rice_upcrossing_rates_of_band_limited_noise() -> None:
    fs, band, seconds = 2000.0, 100.0, 300.0
    x = brickwall_noise(int(fs * seconds), fs, band, np.random.default_rng(42))
    # Rice (BSTJ 1944-45): ν0 = sqrt(∫f²S(f)df / ∫S(f)df); for S flat on [0, B] this is
    # sqrt((B³/3) / B) = B/√3. Up-crossings of level u: ν0·exp(-u²/2σ²) per second.
    nu0 = band / math.sqrt(3.0)
    for u in (0.0, 1.0, 2.0):  # in units of σ (x has unit standard deviation)
        expected = nu0 * math.exp(-u * u / 2.0) * seconds
        # Statistical error: Poisson count, ±3√N.
        assert abs(upcrossings(x, u) - expected) <= 3.0 * math.sqrt(expected), u
    est = estimate_noise(x, fs)
    assert est.nu0_hz == pytest.approx(nu0, rel=0.10)  # Rice, B/√3
    assert est.sigma == pytest.approx(1.0, rel=0.10)


def test_nu0_of_white_noise_is_a_quarter_of_the_sample_rate() -> None:
    # Independent samples: P(x_k < 0 < x_{k+1}) = 1/4 (Sheppard's orthant probability
    # 1/4 - arcsin(ρ)/2π with ρ = 0), so ν0 = fs/4.
    x = white(100_000, np.random.default_rng(3))
    assert estimate_noise(x, FS).nu0_hz == pytest.approx(FS / 4, rel=0.03)


@pytest.mark.parametrize("cutoff", [FS / 20, FS / 100])
def test_nu0_of_butterworth_noise_under_a_slow_signal(cutoff: float) -> None:
    # Rice's ν0² = m2/m0 for the Butterworth spectrum |H|² = 1/(1 + (f/fc)^2n), with
    # ∫0^∞ x^(μ-1)/(1 + x^ν) dx = (π/ν)/sin(μπ/ν) (Gradshteyn & Ryzhik 3.241.2, from memory):
    # ν0 = fc·sqrt(sin(π/2n)/sin(3π/2n)), n = 4 here. The signal (sine, square steps) must not
    # pull the estimate: its own slope and steps are kept out of the residual.
    nu0 = cutoff * math.sqrt(math.sin(math.pi / 8) / math.sin(3 * math.pi / 8))
    n = 120_000
    for seed in SEEDS:
        noise = lowpass(n, cutoff, np.random.default_rng(seed))
        x = LEVEL + noise + sine(n, 10.0) + square(n, 8.0, 12 * SIGMA)
        est = estimate_noise(x, FS)
        assert est.nu0_hz == pytest.approx(nu0, rel=0.10), (seed, est)
        # Cross-check with the counted mean up-crossings of the noise alone (same tolerance).
        assert est.nu0_hz == pytest.approx(upcrossings(noise, 0.0) / (n / FS), rel=0.10)


# ---------------------------------------------------------------------------------------------
# Edge cases


def test_constant_record_has_no_noise() -> None:
    assert estimate_noise(np.full(1000, LEVEL), FS) == NoiseEstimate(0.0, 0.0)


def test_bad_input_is_refused() -> None:
    with pytest.raises(ValueError):
        estimate_noise(np.zeros(MIN_SAMPLES - 1), FS)
    with pytest.raises(ValueError):
        estimate_noise(np.r_[np.zeros(500), np.nan], FS)
    with pytest.raises(ValueError):
        estimate_noise(np.zeros(1000), 0.0)
    with pytest.raises(ValueError):
        NoiseTracker(FS, window_s=0.05)  # 50 samples: fewer than MIN_SAMPLES
    with pytest.raises(ValueError):
        NoiseTracker(FS, window_s=1.0, update_every=0)


# ---------------------------------------------------------------------------------------------
# The streaming tracker


def feed(tracker: NoiseTracker, x: np.ndarray, cuts: list[int]) -> tuple[np.ndarray, ...]:
    """Feed x split at `cuts`; global indices, sigmas, ν0s, reliable flags, window sizes."""
    idx, sig, nu, rel, win = [], [], [], [], []
    start = 0
    for stop in [*cuts, x.size]:
        u = tracker.process(x[start:stop])
        assert u.idx.dtype == np.int64 and u.idx.shape == u.sigma.shape == u.nu0.shape
        assert u.reliable.shape == u.idx.shape == u.samples.shape and len(u.reason) == u.idx.size
        idx.append(u.idx + start)
        sig.append(u.sigma)
        nu.append(u.nu0)
        rel.append(u.reliable)
        win.append(u.samples)
        start = stop
    return tuple(np.concatenate(v) for v in (idx, sig, nu, rel, win))


def test_tracker_schedule_and_definition() -> None:
    x = LEVEL + white(6_000, np.random.default_rng(8)) + sine(6_000, 2.0)
    tr = NoiseTracker(FS, window_s=1.0, update_every=250)
    assert tr.window_n == 1000
    idx, sig, nu, rel, win = feed(tr, x, list(range(0, 6_000, 333)))
    # Warm-up: the grid of every 250th sample reaching back from the first full window, from
    # the first point with at least MIN_SAMPLES (250), then every 250.
    assert np.array_equal(idx, np.arange(249, 6_000, 250))
    # Each estimate is the whole-array estimate of the window ending at that sample (shorter
    # before the first full window).
    for i, s, v, r, w in zip(idx.tolist(), sig.tolist(), nu.tolist(), rel.tolist(), win.tolist()):
        assert w == min(i + 1, 1000)
        ref = estimate_noise(x[i + 1 - w : i + 1], FS)
        assert (s, v, r) == (ref.sigma, ref.nu0_hz, ref.reliable)
    assert tr.samples_seen == 6_000
    assert NoiseTracker(FS, window_s=1.0).update_every == 100  # default window_n // 10
    assert NoiseTracker(FS, window_s=1.0).first_n == 200  # the first of 1000 - j·100 >= 128


def test_tracker_follows_a_noise_step_within_one_window() -> None:
    n, step_at = 40_000, 20_000
    rng = np.random.default_rng(9)
    noise = white(n, rng)
    noise[step_at:] = 8.0 * white(n - step_at, rng)  # σ steps up to 8σ
    x = LEVEL + noise + sine(n, 5.0)
    tr = NoiseTracker(FS, window_s=2.0, update_every=100)
    idx, sig, _, _, _ = feed(tr, x, list(range(0, n, 1000)))
    wn = tr.window_n
    before = (idx < step_at) & (idx >= wn - 1)  # full windows entirely before the step
    after = idx >= step_at + wn - 1  # windows entirely after it
    assert before.sum() > 100 and after.sum() > 100
    # Truth: SIGMA before the step and 8·SIGMA after it, by construction.
    assert np.all(np.abs(sig[before] / SIGMA - 1) < 0.10)
    assert np.all(np.abs(sig[after] / (8 * SIGMA) - 1) < 0.10)


def test_tracker_copy_is_independent() -> None:
    x = LEVEL + white(5_000, np.random.default_rng(10))
    a = NoiseTracker(FS, window_s=0.5, update_every=123)
    a.process(x[:2_345])
    b = a.copy()
    ra = a.process(x[2_345:])
    rb = b.process(x[2_345:])
    for u, v in zip(ra, rb):
        assert np.array_equal(np.asarray(u), np.asarray(v))
    assert a.samples_seen == b.samples_seen == 5_000


CHUNK_X = (
    LEVEL
    + white(4_000, np.random.default_rng(12))
    + sine(4_000, 1.5)
    + square(4_000, 1.2, 12 * SIGMA)
    + spikes(4_000, np.random.default_rng(13), 0.005, 50 * SIGMA)
)


def test_tracker_reference_run_has_estimates() -> None:
    # Guard for the chunk-invariance property below: the reference produces many estimates.
    tr = NoiseTracker(FS, window_s=0.5, update_every=97)
    idx, sig, _, _, _ = feed(tr, CHUNK_X, [])
    assert idx.size == (4_000 - tr.first_n) // 97 + 1
    assert np.all(np.abs(sig / SIGMA - 1) < 0.25)


@settings(deadline=None, max_examples=30)
@given(
    cuts=st.lists(st.integers(min_value=0, max_value=CHUNK_X.size), max_size=40),
    every=st.sampled_from([1_000, 97, 250]),
)
def test_tracker_is_chunk_invariant(cuts: list[int], every: int) -> None:
    # Law of the core: any split of the input gives identical results, bit for bit.
    whole = feed(NoiseTracker(FS, window_s=0.5, update_every=every), CHUNK_X, [])
    split = feed(NoiseTracker(FS, window_s=0.5, update_every=every), CHUNK_X, sorted(cuts))
    for u, v in zip(whole, split):
        assert np.array_equal(u, v)


def test_tracker_chunk_invariant_in_single_samples() -> None:
    x = CHUNK_X[:1_500]
    whole = feed(NoiseTracker(FS, window_s=0.5, update_every=61), x, [])
    ones = feed(NoiseTracker(FS, window_s=0.5, update_every=61), x, list(range(1, x.size)))
    for u, v in zip(whole, ones):
        assert np.array_equal(u, v)


# ---------------------------------------------------------------------------------------------
# The demo's pulse channel (issue 8): 0/3.2 V paddle-wheel pulses with contact bounce, a
# 3-sample median prefilter, white noise of FLOW_SIGMA_V from the generator.

DEMO = Path(__file__).resolve().parents[1]
RECORDING = DEMO / "replay_data" / "orchard_pump.csv"
CONFIG = DEMO / "config" / "orchard_pump.toml"
TRUTH = DEMO / "replay_data" / "orchard_pump.truth.json"


def _flow() -> tuple:
    from streamcond.config import load_config
    from streamcond.core.channel import build_filter
    from streamcond.tune import pick_channel, read_channel

    cfg = load_config(str(CONFIG))
    ch = pick_channel(cfg, "flow")
    data = read_channel(cfg, RECORDING, ch)  # as `tune` reads it
    truth = json.loads(TRUTH.read_text())["flow"]
    # The noise-free signal: each sample's level (the noise, 0.018 V, is 180 times smaller
    # than the levels' distance, so the nearest level is the true one).
    mid = (truth["high_v"] + truth["low_v"]) / 2
    clean = np.where(data.raw > mid, truth["high_v"], truth["low_v"])
    # The conditioned signal's own noise: filter(signal + noise) - filter(signal).
    noise_c = data.y - build_filter(ch, data.fs).process(clean)
    return data, clean, noise_c


def test_demo_flow_noise_as_tune_measures_it() -> None:
    data, clean, noise_c = _flow()
    # tune's figure: estimate_noise on the conditioned channel (before this estimator: 1.6 V)
    est = estimate_noise(data.yg, data.fs)
    assert est.reliable
    # Truth: the standard deviation of the noise the comparator sees (the median of 3 makes
    # it smaller than the generator's 0.018 V: 1 - √3/π of the variance for white Gaussian
    # noise away from the edges, the order statistics of three normals — from memory).
    assert est.sigma == pytest.approx(float(noise_c.std()), rel=0.15)
    # The unfiltered channel against the generator's own figure (tools/make_demo.py).
    raw_est = estimate_noise(data.v, data.fs)
    assert raw_est.reliable and raw_est.sigma == pytest.approx(FLOW_SIGMA_V, rel=0.15)


def test_demo_flow_adaptive_band_counts_every_pulse(tmp_path: Path) -> None:
    # An adaptive band on the flow channel, loose max_width (the case that once grew wider
    # than the pulse and stopped the edges: 31 edges for 1,842 pulses).
    text = CONFIG.read_text()
    fixed = 'band = { low = 1.0, high = 2.3 }'
    assert fixed in text
    adaptive = 'band = { mode = "adaptive", center = 1.65, k = 6.0, window_s = 5.0, max_width = 3.0 }'
    cfg = tmp_path / "flow_adaptive.toml"
    cfg.write_text(text.replace(fixed, adaptive))
    events = tmp_path / "events.jsonl"
    run = subprocess.run(
        [sys.executable, "-m", "streamcond", "replay", str(RECORDING), "-c", str(cfg),
         "--events", str(events)],
        capture_output=True, text=True, timeout=120,
    )
    assert run.returncode == 0, run.stderr
    recs = [json.loads(line) for line in events.read_text().splitlines()]
    rising = [r for r in recs if r["kind"] == "edge" and r["channel"] == "flow"
              and r["edge"] == "rising"]
    # Truth: the generator's pulse count (replay_data/orchard_pump.truth.json).
    assert len(rising) == json.loads(TRUTH.read_text())["flow"]["pulses"]
    stats = [r for r in recs if r["kind"] == "stats" and r["channel"] == "flow"]
    assert stats and all(r["reliable"] for r in stats)
