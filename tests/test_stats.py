"""The stats record: counts against closed forms, Rice's prediction, the chattering criterion."""

from __future__ import annotations

import math

import numpy as np
import pytest

from streamcond.config import config_from_dict
from streamcond.core.pipeline import Pipeline
from streamcond.core.stats import ChannelStats

FS = 1000.0


def run(cfg: dict, t: np.ndarray, x: np.ndarray, chunk: int | None = None) -> list[dict]:
    c = config_from_dict(cfg)
    p = Pipeline(c, ["t", "x"])
    rows = np.column_stack([t, x])
    out: list[dict] = []
    step = chunk or len(rows)
    for a in range(0, len(rows), step):
        out += p.process(rows[a : a + step])
    return out + p.finish()


def base(band: dict, **stats) -> dict:
    return {
        "source": {"kind": "file", "time_column": "t", "sample_rate_hz": FS},
        "channel": [{"name": "x", "band": band}],
        "stats": {"interval_s": 10.0, **stats},
    }


def test_windows_are_aligned_to_sample_time_and_count_crossings():
    # A clean 0.7 Hz sine through the centre: a bare comparator at the centre flips twice per
    # period (closed form: 2·f·T crossings in a window of T seconds, ±1 at the window edges);
    # with a band of ±0.5 of a unit-amplitude sine the hysteresis gives the same count.
    t = np.arange(0, 35.0, 1 / FS) + 3.0  # starts mid-window: windows stay aligned to 10 s
    x = np.sin(2 * np.pi * 0.7 * t)
    recs = [r for r in run(base({"low": -0.5, "high": 0.5}), t, x) if r["kind"] == "stats"]
    # the last window, 30-38 s, is flushed at the end of the stream and marked partial
    assert [(r["t"], r["t_end"]) for r in recs] == [(0.0, 10.0), (10.0, 20.0), (20.0, 30.0), (30.0, 38.0)]
    assert [r.get("partial", False) for r in recs] == [False, False, False, True]
    assert recs[-1]["samples"] == 8000
    assert recs[0]["samples"] == 7000 and recs[1]["samples"] == 10000
    assert abs(recs[-1]["raw_crossings"] - 2 * 0.7 * 8) <= 1  # same closed form over 8 s
    for r in recs[1:-1]:
        assert abs(r["raw_crossings"] - 2 * 0.7 * 10) <= 1
        assert abs(r["edges"] - r["raw_crossings"]) <= 1
        # consecutive edges of a sine at ±0.5: arcsin spacing, closed form
        # rising at asin(0.5)/ω, falling at (π + asin(0.5))/ω ... spacing π/ω = 1/(2f)
        assert r["min_edge_spacing_s"] == pytest.approx(1 / (2 * 0.7), rel=1e-3)
        assert (r["band_low"], r["band_high"]) == (-0.5, 0.5)


def test_noise_margin_and_rice_prediction():
    # white noise, σ = 0.1, around a level far inside the band's lower side
    rng = np.random.default_rng(4)
    t = np.arange(0, 30.0, 1 / FS)
    x = 0.1 * rng.standard_normal(t.size)
    recs = [r for r in run(base({"low": -0.2, "high": 0.2}), t, x) if r["kind"] == "stats"]
    r = recs[-1]
    assert r["noise_sigma"] == pytest.approx(0.1, rel=0.1)
    assert r["margin_sigma"] == pytest.approx(0.2 / r["noise_sigma"])
    # Rice (S. O. Rice, BSTJ 1944-45): ν0·exp(−h²/2σ²) per second, h the half-width
    expect = r["nu0_hz"] * math.exp(-(0.2**2) / (2 * r["noise_sigma"] ** 2)) * 3600
    assert r["predicted_false_rate_per_hour"] == pytest.approx(expect)
    # a bare comparator at the centre flips at ~2·ν0 per second on this noise
    assert r["raw_crossings"] == pytest.approx(2 * r["nu0_hz"] * 10, rel=0.15)
    # and sampled white noise has ν0 = fs·arccos(0)/2π = fs/4 (Sheppard's orthant probability)
    assert r["nu0_hz"] == pytest.approx(FS / 4, rel=0.05)


def test_chattering_flag_three_activations_within_a_minute():
    # ISA-18.2 practice (from memory): three or more activations within 60 s is chattering.
    s = ChannelStats("x", 600.0, 0.0)
    s.add_edges([0.0, 10.0, 25.0, 70.0], [1, 0, 1, 0])
    assert not s.chattering  # two activations
    s.add_edges([59.0], [1])  # third activation 59 s after the first
    assert s.chattering
    s2 = ChannelStats("x", 600.0, 0.0)
    s2.add_edges([0.0, 30.0, 61.0], [1, 1, 1])  # three activations spread over 61 s
    assert not s2.chattering


def test_stats_records_do_not_depend_on_chunking():
    rng = np.random.default_rng(9)
    t = np.arange(0, 25.0, 1 / FS)
    x = np.sign(np.sin(2 * np.pi * 0.3 * t)) + 0.2 * rng.standard_normal(t.size)
    cfg = base({"low": -0.3, "high": 0.3})
    whole = run(cfg, t, x)
    for chunk in (1, 333, 4096):
        assert run(cfg, t, x, chunk) == whole


def test_gap_leaves_no_empty_windows():
    t = np.r_[np.arange(0, 12, 1 / FS), np.arange(45, 52, 1 / FS)]
    x = np.zeros(t.size)
    recs = [r for r in run(base({"low": -1, "high": 1}), t, x) if r["kind"] in ("stats", "gap")]
    assert [(r["kind"], r["t"]) for r in recs] == [
        ("stats", 0.0),
        ("gap", pytest.approx(12 - 1 / FS)),
        ("stats", 10.0),  # 10-12 s, closed by the first sample after the gap
        ("stats", 40.0),  # 45-50 s; the windows 20-40 s held no sample and give no record
        ("stats", 50.0),  # 50-52 s: the last, partial window, flushed at the end
    ]


def test_window_ends_follow_the_quotient_where_rounding_disagrees_with_the_product():
    # 0.58 s on a 5 ms clock is 116 × 0.005; IEEE 754 doubles give 0.58 / 0.02 =
    # 28.999999999999996 while 29 × 0.02 == 0.58 (checked with Python's float arithmetic).
    # A window end found from the product but numbered from the quotient used to stand still
    # there; windows are numbered floor(t / interval) throughout, and each starts where that
    # number changes (numpy.floor and numpy.diff as the reference).
    # The other way round: 1.43 / 0.13 = 11.0 while 11 × 0.13 = 1.4300000000000002 (the
    # sample at 1.43 s opens window 11 though it lies below the product).
    assert 0.58 / 0.02 < 29 and 29 * 0.02 == 0.58
    assert 1.43 / 0.13 == 11.0 and 11 * 0.13 > 1.43
    t = np.arange(400) * 0.005
    for interval in (0.02, 0.13):
        s = ChannelStats("x", interval_s=interval, center=0.0)
        got = s.boundaries(t)
        assert got == (np.flatnonzero(np.diff(np.floor(t / interval))) + 1).tolist()
        # in pieces, each starting where the last one stopped, the same ends
        s = ChannelStats("x", interval_s=interval, center=0.0)
        pieces = []
        for a in range(0, 400, 37):
            pieces += [a + j for j in s.boundaries(t[a : a + 37])]
            s.window = math.floor(t[min(a + 36, 399)] / interval)  # as close() would leave it
        assert pieces == got
    # and a whole run on that clock closes one window per quotient step, in any blocks
    cfg = base({"low": -0.5, "high": 0.5}, interval_s=0.02)
    x = np.sin(2 * np.pi * 3.0 * t)
    whole = [r for r in run(cfg, t, x) if r["kind"] == "stats"]
    assert len(whole) == len(np.unique(np.floor(t / 0.02)))
    assert [r for r in run(cfg, t, x, chunk=3) if r["kind"] == "stats"] == whole


def test_a_quiet_channel_is_not_deferred_past_a_window_end_that_rounding_hides():
    # 286 × 0.005 = 1.43 on this clock; 1.43 / 0.13 = 11.0 but 11 × 0.13 = 1.4300000000000002
    # (IEEE 754 doubles, checked with Python's float arithmetic): the sample at 1.43 s opens
    # window 11 though it is below that product. A channel that provably emits nothing may be
    # conditioned later, but not across that window's end, or its stats record comes out
    # after the other channel's and the order depends on the blocks.
    t = np.arange(400) * 0.005
    k = np.floor(t / 0.13)
    assert np.any((k * 0.13 > t) & (np.diff(k, prepend=-1.0) > 0))
    # one step, then quiet; with no prefilter (channel a) that is provable from the raw values
    x = np.where(t < 0.5, 0.0, 1.0)
    cfg = {
        "source": {"kind": "file", "time_column": "t", "sample_rate_hz": 200.0},
        "channel": [{"name": "a", "column": "x", "band": {"low": 0.4, "high": 0.6}},
                    {"name": "b", "column": "x", "band": {"low": 0.3, "high": 0.7},
                     "filter": {"kind": "moving_average", "window": 2}}],
        "stats": {"interval_s": 0.13},
    }
    whole = run(cfg, t, x)
    assert [r for r in run(cfg, t, x, chunk=1)] == whole
    stats = [(r["t"], r["channel"]) for r in whole if r["kind"] == "stats"]
    assert stats == sorted(stats, key=lambda s: (s[0], s[1]))


def test_a_channel_in_tiny_units_gets_its_stats_not_a_division_by_zero():
    # σ̂ of 1e-170 (a channel in tiny units, or a gain of 1e-170) is measured, and 2σ² then
    # underflows to 0 in binary64 (the smallest normal double is about 2.2e-308): Rice's rate
    # ν0·exp(-h²/2σ²) is taken by the margin h/σ instead, here 1e170: exp(-5e339) = 0.
    t = np.arange(0, 30, 0.01)
    x = 1e-170 * np.random.default_rng(0).standard_normal(t.size)
    assert 2.0 * (1e-170) ** 2 == 0.0
    c = {"source": {"kind": "file", "time_column": "t", "sample_rate_hz": 100.0},
         "channel": [{"name": "x", "band": {"low": -1.0, "high": 1.0}}],
         "stats": {"interval_s": 10.0, "noise_window_s": 5.0, "noise_refresh_s": 5.0}}
    p = Pipeline(config_from_dict(c), ["t", "x"])
    stats = [r for r in p.process(np.column_stack([t, x])) + p.finish() if r["kind"] == "stats"]
    measured = [r for r in stats if r["noise_sigma"] is not None]
    assert measured and all(r["reliable"] for r in measured)
    for r in measured:
        assert r["noise_sigma"] == pytest.approx(1e-170, rel=0.05)
        assert r["margin_sigma"] == pytest.approx(1.0 / r["noise_sigma"])
        assert r["predicted_false_rate_per_hour"] == 0.0


def test_rice_rate_where_two_sigma_squared_is_subnormal_follows_the_margin():
    # σ̂ ≈ 2e-162: 2σ² ≈ 8e-324 is a subnormal double (IEEE 754 binary64: normal from about
    # 2.2e-308), where h²/2σ² keeps few bits; the rate must be Rice's ν0·exp(−m²/2)·3600 for
    # the record's own margin m = h/σ.
    t = np.arange(0, 30, 0.01)
    x = 2e-162 * np.random.default_rng(0).standard_normal(t.size)
    assert 0.0 < 2.0 * (2e-162) ** 2 < 2.2250738585072014e-308
    c = {"source": {"kind": "file", "time_column": "t", "sample_rate_hz": 100.0},
         "channel": [{"name": "x", "band": {"low": -5e-162, "high": 5e-162}}],
         "stats": {"interval_s": 10.0, "noise_window_s": 5.0, "noise_refresh_s": 5.0}}
    p = Pipeline(config_from_dict(c), ["t", "x"])
    stats = [r for r in p.process(np.column_stack([t, x])) + p.finish()
             if r["kind"] == "stats" and r["noise_sigma"] is not None]
    assert stats
    for r in stats:
        m = r["margin_sigma"]
        assert 1.0 < m < 5.0
        want = r["nu0_hz"] * math.exp(-0.5 * m * m) * 3600.0
        assert r["predicted_false_rate_per_hour"] == pytest.approx(want, rel=1e-12)
