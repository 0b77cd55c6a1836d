"""The adaptive band (``band = { mode = "adaptive", ... }``): it follows the measured noise,
makes no decision before its first estimate, and never fires an edge by itself.

The signals are synthetic with known noise, so the expected band width (k·σ) and the expected
edges (one per level switch) are known in closed form.
"""

from __future__ import annotations

import numpy as np
import pytest

from conftest import as_json, config_dict, of_kind, run_pipeline
from streamcond.config import config_from_dict
from streamcond.core.channel import ChannelConditioner
from streamcond.core.noise import MIN_SAMPLES

FS = 200.0

# --- a signal switching between two levels, whose noise grows eightfold mid-recording ---------

SIGMA_QUIET = 0.05
SIGMA_LOUD = 8 * SIGMA_QUIET
CENTER = 1.0
# Levels at ±5 loud sigmas from the centre: a band of 6σ (half-width 3σ) sits well inside.
HALF_STEP = 5 * SIGMA_LOUD
DURATION = 120.0
SWITCH_EVERY = 5.0
FIRST_SWITCH = 2.5
RAMP_S = 0.25  # each switch is a ramp through the band, so a narrow band chatters on it
T_NOISE_STEP = 63.0  # half a period after a switch: the next one is 4.5 s away
WINDOW_S = 2.0  # the band's window; no switch falls within one window after the noise step


def switching_signal(seed: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(t, x, switch times): levels CENTER ± HALF_STEP, first switch rising."""
    n = int(DURATION * FS)
    t = np.arange(n) / FS
    switches = np.arange(FIRST_SWITCH, DURATION, SWITCH_EVERY)
    s = np.zeros(n)
    for j, tc in enumerate(switches):
        sign = 1.0 if j % 2 == 0 else -1.0
        s += sign * np.clip((t - tc) / RAMP_S + 0.5, 0.0, 1.0)
    level = CENTER - HALF_STEP + 2 * HALF_STEP * s
    sigma = np.where(t < T_NOISE_STEP, SIGMA_QUIET, SIGMA_LOUD)
    rng = np.random.default_rng(seed)
    return t, level + sigma * rng.standard_normal(n), switches


def replay(band: dict, t: np.ndarray, x: np.ndarray, sizes=None) -> list[dict]:
    cfg = config_dict([{"name": "x", "band": band}], columns=["t", "x"])
    cfg["stats"] = {"interval_s": 1.0}
    return run_pipeline(cfg, np.column_stack([t, x]), sizes)


ADAPTIVE = {"mode": "adaptive", "center": CENTER, "k": 6.0, "window_s": WINDOW_S}


@pytest.fixture(scope="module")
def switching():
    t, x, switches = switching_signal()
    return t, x, switches, replay(ADAPTIVE, t, x)


def _width(rec: dict) -> float | None:
    lo, hi = rec["band_low"], rec["band_high"]
    if lo is None or hi is None or not (np.isfinite(lo) and np.isfinite(hi)):
        return None
    return hi - lo


def test_adaptive_band_follows_the_noise_within_its_window(switching):
    t, x, switches, recs = switching
    stats = of_kind(recs, "stats")
    quiet = [_width(r) for r in stats if r["t_end"] <= T_NOISE_STEP and _width(r) is not None]
    # an update every window/10 after a full window of loud samples
    settled = T_NOISE_STEP + WINDOW_S * 1.1
    loud = [_width(r) for r in stats if r["t"] >= settled]
    assert len(quiet) > 50 and len(loud) > 50
    # width = k·σ (DESIGN: clamp(k·σ̂, min_width, max_width)); σ known by construction. ±25 %:
    # the spread of a robust σ estimate from one 400-sample window (common practice, no
    # published source for the exact bound; measured 0.83–1.17 over 20 seeds).
    assert 0.75 * 6 * SIGMA_QUIET < min(quiet) and max(quiet) < 1.25 * 6 * SIGMA_QUIET
    assert 0.75 * 6 * SIGMA_LOUD < min(loud) and max(loud) < 1.25 * 6 * SIGMA_LOUD


def test_adaptive_band_gives_one_edge_per_switch_before_and_after_the_noise_step(switching):
    t, x, switches, recs = switching
    edges = of_kind(recs, "edge")
    # No decision during the warm-up (one window): the switches after it each give one edge.
    expected = switches[switches > WINDOW_S]
    assert len(edges) == expected.size
    times = np.array([e["t"] for e in edges])
    # each edge belongs to its own switch: within the ramp's duration of the centre crossing
    assert np.all(np.abs(times - expected) < RAMP_S)
    kinds = [e["edge"] for e in edges]
    # the warm-up ends at 2.0 s with the signal low; the first switch (2.5 s) rises, and
    # they alternate from there
    assert kinds == ["rising" if j % 2 == 0 else "falling" for j in range(len(kinds))]


def test_fixed_band_sized_for_the_quiet_part_chatters_after_the_step(switching):
    t, x, switches, _ = switching
    recs = replay({"center": CENTER, "width": 6 * SIGMA_QUIET}, t, x)
    edges = np.array([e["t"] for e in of_kind(recs, "edge")])
    before = switches[switches < T_NOISE_STEP]
    after = switches[switches >= T_NOISE_STEP]
    assert np.count_nonzero(edges < T_NOISE_STEP) == before.size  # fine while it is quiet
    # ... and chatters once the noise is 8x: the band is then 0.75σ wide, and Rice's formula
    # (S. O. Rice, Bell System Technical Journal, 1944-45) puts a crossing of a level 0.375σ
    # from a resting signal at 0.93·ν0 per second — many per ramp (measured 2.5x-4.6x).
    assert np.count_nonzero(edges >= T_NOISE_STEP) >= 2 * after.size


def test_adaptive_band_is_chunk_invariant(switching):
    t, x, _, recs = switching
    n = t.size
    rng = np.random.default_rng(7)
    sizes = rng.integers(1, 400, size=n // 100).tolist()
    again = replay(ADAPTIVE, t, x, sizes)
    # DESIGN "Chunk invariance is a law": identical records, bit for bit (equal JSON bytes).
    assert as_json(again) == as_json(recs)


# --- warm-up --------------------------------------------------------------------------------


def _first_estimate_n(band: dict) -> int:
    """The sample count of the tracker's first estimate: the earliest point of its grid (every
    window_n // 10 samples, reaching back from the first full window) holding MIN_SAMPLES."""
    window_n = int(round(band["window_s"] * FS))
    every = window_n // 10
    return window_n - ((window_n - MIN_SAMPLES) // every) * every


def test_no_decision_before_the_first_estimate_without_initial_width():
    t, x, _ = switching_signal(seed=3)
    recs = replay(ADAPTIVE, t, x)
    first_n = _first_estimate_n(ADAPTIVE)
    # The first estimate covers samples 0 .. first_n-1 and is in force from sample first_n:
    # as soon as the estimator has enough samples, well before one full window_s.
    first_estimate_t = first_n / FS
    assert first_estimate_t < WINDOW_S
    decisions = [r for r in recs if r["kind"] in ("state", "edge")]
    assert decisions[0]["kind"] == "state"
    assert decisions[0]["t"] >= first_estimate_t
    # the first stats window (to 1 s) already carries that warm-up estimate, over the samples
    # it had: fewer than one window_s
    first = of_kind(recs, "stats")[0]
    assert first["reliable"] is True and first["noise_window_s"] == pytest.approx(first_estimate_t)
    assert _width(first) == pytest.approx(6 * first["noise_sigma"])


def test_min_width_is_no_guess_for_the_warm_up():
    """A signal resting at the band centre (the worst case for a band that is too narrow):
    with only min_width (tiny) and no initial_width, nothing is decided until the noise is
    measured, and then the band is k·σ̂ — no burst of false edges at start-up."""
    n = int(10 * FS)
    t = np.arange(n) / FS
    x = CENTER + SIGMA_QUIET * np.random.default_rng(11).standard_normal(n)
    band = dict(ADAPTIVE, min_width=0.001)
    recs = replay(band, t, x)
    first_estimate_t = _first_estimate_n(band) / FS
    decisions = [r for r in recs if r["kind"] in ("state", "edge")]
    assert decisions and decisions[0]["t"] >= first_estimate_t
    # Rice (S. O. Rice, BSTJ 1944-45): white noise sampled at FS crosses a level 3σ above its
    # mean upward at ν0·e^(-4.5), ν0 = FS/4 (Sheppard's orthant probability, from memory):
    # about 0.56 per second here, so a 6σ band gives a handful of edges in 10 s — where a
    # band of min_width (0.02σ) would give one at nearly every other sample (measured: over
    # 1,000).
    expected = (FS / 4) * np.exp(-4.5) * (t[-1] - first_estimate_t)
    edges = of_kind(recs, "edge")
    assert len(edges) <= expected + 4 * np.sqrt(expected)  # Poisson, 4 standard deviations


def test_unreliable_estimates_keep_the_last_reliable_band():
    """Noise flat to 2 Hz (correlation time fs/2B = 50 samples) in a 1 s window (200 samples,
    4 correlation times): the estimate cannot be trusted and says so; the band never moves from
    initial_width, and the stats records carry reliable = false with a reason."""
    n = int(30 * FS)
    t = np.arange(n) / FS
    spec = np.fft.rfft(np.random.default_rng(5).standard_normal(n))
    spec[np.fft.rfftfreq(n, 1 / FS) > 2.0] = 0.0
    x = np.fft.irfft(spec, n)
    x = CENTER + SIGMA_QUIET * x / x.std()
    band = {"mode": "adaptive", "center": CENTER, "k": 6.0, "window_s": 1.0,
            "initial_width": 0.4}
    recs = replay(band, t, x)
    stats = of_kind(recs, "stats")
    assert stats and all(r["reliable"] is False and r["reliable_reason"] for r in stats[1:])
    assert all(_width(r) == pytest.approx(0.4) for r in stats)
    def missing(v: float | None) -> bool:  # null in the JSON line
        return v is None or not np.isfinite(v)

    assert all(missing(r["margin_sigma"]) and missing(r["predicted_false_rate_per_hour"])
               for r in stats[1:])


def test_initial_width_decides_from_the_first_sample():
    t, x, _ = switching_signal(seed=3)
    band = dict(ADAPTIVE, initial_width=6 * SIGMA_QUIET)
    recs = replay(band, t, x)
    state = of_kind(recs, "state")[0]
    # the signal starts at CENTER - HALF_STEP, far below the initial band: decisive at once
    assert state["t"] == t[0] and state["level"] == 0


# --- an update that would flip the level is held back ---------------------------------------


def test_narrowing_update_that_would_flip_the_level_is_held_back():
    """Loud noise with the signal high; then, at once, the noise drops 100x and the signal
    steps to -2, inside the loud band (±3σ_loud) but below the centre. The narrow band the
    quiet noise asks for (±0.03) would put -2 below its low threshold and flip the level with
    no crossing by the signal: those updates are held back. At 20 s the signal really falls
    to -6; only that fires the falling edge."""
    w = 2.0
    n = int(26 * FS)
    t = np.arange(n) / FS
    level = np.where(t < 6.0, 10.0, np.where(t < 20.0, -2.0, -6.0))
    sigma = np.where(t < 6.0, 1.0, 0.01)
    x = level + sigma * np.random.default_rng(1).standard_normal(n)
    cfg = config_from_dict(
        config_dict(
            [{"name": "x", "band": {"mode": "adaptive", "center": 0.0, "k": 6.0, "window_s": w}}],
            columns=["t", "x"],
        )
        | {"stats": {"interval_s": 1.0}}
    )
    cond = ChannelConditioner(cfg.channel[0], FS, cfg.stats)
    recs = [r for _i, _rank, r in cond.process(t, x)]
    edges = of_kind(recs, "edge")
    assert len(edges) == 1 and edges[0]["edge"] == "falling"
    assert cond.band.held_back > 0
    stats = of_kind(recs, "stats")
    resting = [r for r in stats if 7.0 <= r["t"] and r["t_end"] <= 20.0]
    # σ̂ is the quiet one (0.01), but the band in force is still the loud one: wide enough to
    # hold -2 inside it, and unchanged while held back
    assert all(r["noise_sigma"] < 0.02 for r in resting[1:])
    assert all(r["band_low"] < -2.0 for r in resting)
    low = resting[-1]["band_low"]
    assert all(r["band_low"] == low for r in resting[1:])
    # The edge time is the linear interpolation between the samples that straddle the held
    # low threshold (t = t0 + (thr - x0)/(x1 - x0)·Δt; DESIGN "Records"): they are the last
    # sample at -2 and the first at -6.
    i = int(np.searchsorted(t, 20.0))
    expect = t[i - 1] + (low - x[i - 1]) / (x[i] - x[i - 1]) * (t[i] - t[i - 1])
    assert edges[0]["t"] == pytest.approx(expect, abs=1e-12)
    # after the flip nothing holds it back: the band narrows to k·σ_quiet (±25 %, as above)
    after = [_width(r) for r in stats if r["t"] >= 21.0]
    assert after and all(0.75 * 0.06 < wd < 1.25 * 0.06 for wd in after)


def test_a_sine_starting_at_its_zero_crossing_gives_no_start_up_burst():
    """A 0.5 Hz sine of 40σ starting at the band centre, min_width tiny: before the noise is
    measured nothing is decided; afterwards each crossing of the centre gives one edge."""
    n = int(20 * FS)
    t = np.arange(n) / FS
    x = CENTER + 40 * SIGMA_QUIET * np.sin(2 * np.pi * 0.5 * t)
    x = x + SIGMA_QUIET * np.random.default_rng(12).standard_normal(n)
    band = dict(ADAPTIVE, min_width=0.001)
    recs = replay(band, t, x)
    first_estimate_t = _first_estimate_n(band) / FS
    state = of_kind(recs, "state")[0]
    assert state["t"] >= first_estimate_t
    edges = of_kind(recs, "edge")
    # Truth: the sine crosses its centre at t = k·1 s (closed form), k = 1 .. 19 after the
    # first decision (< 1 s); one edge each, alternating, within the time the sine needs to
    # cross half the band (h/slope, slope 2π·0.5·40σ at a crossing: about 12 ms for h = 3σ).
    crossings = np.arange(1, 20)
    assert len(edges) == crossings.size
    assert np.all(np.abs(np.array([e["t"] for e in edges]) - crossings) < 0.05)


def test_an_update_held_back_at_a_block_start_is_judged_as_in_one_block():
    """An estimate completing on a block's last sample applies from the next block's first:
    if a sensor fault starts right there, the hold-back test must still read the last level
    before it (as in one block, where it reads the sample before), not the fault's cleared
    interpolation state — which let the narrow band through and fired an edge that one block,
    or blocks of one sample, never fire. The level steps from 1.5 to -0.5 inside the wide
    initial band; the quiet noise asks for a band (±0.03) that would flip it by itself."""
    from streamcond.core.noise import NoiseTracker

    fs, win = 100.0, 1.5
    t = np.arange(0, 6, 1 / fs)
    base = np.where(t < 1.0, 1.5, -0.5) + 0.01 * np.random.default_rng(0).standard_normal(t.size)
    cfg = config_dict([{"name": "a", "band": {"mode": "adaptive", "center": 0.0,
                                              "window_s": win, "initial_width": 2.0}}],
                      columns=["t", "a"], sample_rate_hz=fs) | {"stats": {"interval_s": 100.0}}
    nt = NoiseTracker(fs, win)
    checked = 0
    for n in range(nt.first_n, t.size - 1, nt.update_every):  # each estimate's sample number
        x = base.copy()
        x[n] = np.nan  # a fault on the sample after the estimate's last (index n - 1)
        rows = np.column_stack([t, x])
        whole = as_json(run_pipeline(cfg, rows))
        assert as_json(run_pipeline(cfg, rows, [n, t.size - n])) == whole, n
        checked += 1
    assert checked > 20
    # the updates are held back: no edge at all (the level never crosses the wide band)
    assert not of_kind(run_pipeline(cfg, np.column_stack([t, base])), "edge")
