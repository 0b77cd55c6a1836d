"""Tests of the sample timebase (streamcond.core.timebase) and its use by the Pipeline.

External references: the closed form t_n = n / f_s of a fixed-rate sampler; numpy.median for the
period estimate; and the irregularities a microcontroller's millisecond counter produces (a
missed stretch = jump, a duplicated or swapped line = out of order, a restart = time reset),
with the contract of DESIGN.md ("gap" records; output time strictly increasing).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import config_dict, of_kind, run_pipeline
from streamcond.config import config_from_dict
from streamcond.core.pipeline import Pipeline
from streamcond.core.timebase import ESTIMATE_N, Timebase

PERIOD_MS = 4.0  # 250 Hz, the rate of the orchard pump station's logger
FS = 1000.0 / PERIOD_MS


def run_tb(tb: Timebase, raw: np.ndarray, cuts=()):
    """Feed ``raw`` in blocks split at ``cuts``; global (t, keep, gaps)."""
    ts, keeps, gaps = [], [], []
    bounds = [0, *sorted(cuts), raw.size]
    emitted = 0
    for a, z in zip(bounds[:-1], bounds[1:]):
        t, keep, g = tb.process(raw[a:z], z - a)
        ts.append(t)
        keeps.append(keep + a)
        gaps.extend((k + emitted, rec) for k, rec in g)
        emitted += t.size
    return np.concatenate(ts), np.concatenate(keeps), gaps


def ms_tb(**kw) -> Timebase:
    return Timebase(time_scale=0.001, sample_rate_hz=FS, has_time_column=True, **kw)


# --- fixed rate ---------------------------------------------------------------------------------


@pytest.mark.parametrize("cuts", [(), (1, 2, 3), tuple(range(7, 1000, 7)), (500,)])
def test_fixed_rate_times_are_n_over_fs(cuts) -> None:
    # Closed form: sample n of a fixed-rate sampler is at n / f_s.
    tb = Timebase(sample_rate_hz=FS, has_time_column=False)
    t, keep, gaps = run_tb(tb, np.zeros(1000), cuts)
    n = np.arange(1000)
    np.testing.assert_allclose(t, n / FS, rtol=1e-15, atol=0)
    assert np.array_equal(keep, n) and gaps == []
    # and bit-identical whatever the chunking (DESIGN.md law)
    t1, _, _ = run_tb(Timebase(sample_rate_hz=FS, has_time_column=False), np.zeros(1000))
    assert np.array_equal(t, t1)


def test_fixed_rate_needs_a_rate() -> None:
    with pytest.raises(ValueError):
        Timebase(sample_rate_hz=None, has_time_column=False)


def test_fixed_rate_pipeline_edge_times() -> None:
    # No time column: a step from −1 to +1 at row 37 is a rising edge interpolated on the
    # n / f_s grid: the line from (36/f_s, −1) to (37/f_s, +1) crosses 0.5 at (36 + 0.75)/f_s.
    cfg = config_dict(
        [{"name": "pump", "column": "v", "band": {"low": -0.5, "high": 0.5}}],
        columns=["v"], time_column=None, sample_rate_hz=FS,
    )
    rows = np.where(np.arange(100) < 37, -1.0, 1.0)[:, None]
    recs = run_pipeline(cfg, rows, [5] * 20)
    (st0,) = of_kind(recs, "state")
    (e,) = of_kind(recs, "edge")
    assert st0["t"] == 0.0 and st0["level"] == 0
    assert e["t"] == pytest.approx(36.75 / FS, abs=1e-12)


# --- time column --------------------------------------------------------------------------------


def test_regular_time_column_is_scaled_to_seconds() -> None:
    raw = np.arange(500) * PERIOD_MS
    t, keep, gaps = run_tb(ms_tb(), raw, (3, 100, 101))
    np.testing.assert_allclose(t, np.arange(500) * 0.004, rtol=1e-13)  # ms · 0.001 = s
    assert keep.size == 500 and gaps == []


def test_jump_is_reported_and_samples_kept() -> None:
    # 0.4 s of lines lost: time goes 396 ms → 1000 ms, more than 3 periods (12 ms).
    raw = np.concatenate((np.arange(100) * PERIOD_MS, 1000.0 + np.arange(100) * PERIOD_MS))
    tb = ms_tb()
    t, keep, gaps = run_tb(tb, raw)
    assert keep.size == 200  # nothing dropped
    np.testing.assert_allclose(t, raw * 0.001, rtol=1e-13)
    assert len(gaps) == 1
    k, rec = gaps[0]
    assert k == 100 and rec["kind"] == "gap" and rec["reason"] == "jump"
    assert rec["t"] == pytest.approx(0.396) and rec["t_end"] == pytest.approx(1.0)
    assert rec["duration_s"] == pytest.approx(0.604)


def test_out_of_order_and_repeated_times_are_dropped() -> None:
    # a repeated line (12 ms twice) and a late one (14 ms after 16 ms): both dropped
    raw = np.array([0, 4, 8, 12, 12, 16, 14, 20, 24, 28, 32, 36, 40], dtype=float)
    tb = ms_tb()
    t, keep, gaps = run_tb(tb, raw)
    assert keep.tolist() == [0, 1, 2, 3, 5, 7, 8, 9, 10, 11, 12]
    assert np.all(np.diff(t) > 0)
    assert [g[1]["reason"] for g in gaps] == ["out_of_order", "out_of_order"]
    assert [g[1]["dropped"] for g in gaps] == [1, 1]
    assert tb.dropped == 2
    np.testing.assert_allclose(t, raw[keep] * 0.001, rtol=1e-13)


def test_time_reset_rebases_one_period_after_the_last_sample() -> None:
    # The logger restarts its millisecond counter at 0 after 1.996 s.
    a = np.arange(500) * PERIOD_MS
    b = np.arange(300) * PERIOD_MS
    raw = np.concatenate((a, b))
    t, keep, gaps = run_tb(ms_tb(), raw)
    assert keep.size == 800
    assert np.all(np.diff(t) > 0)  # strictly increasing (DESIGN.md)
    np.testing.assert_allclose(t[:500], a * 0.001, rtol=1e-13)
    # re-based: the first sample after the reset is one nominal period after the last one,
    # and the spacing of the new time line is kept
    assert t[500] == pytest.approx(t[499] + 1.0 / FS, abs=1e-12)
    np.testing.assert_allclose(t[500:] - t[500], b * 0.001, atol=1e-12)
    assert [(k, g["reason"]) for k, g in gaps] == [(500, "time_reset")]
    assert gaps[0][1]["t"] == pytest.approx(t[499])


def test_two_time_resets() -> None:
    parts = [np.arange(200) * PERIOD_MS, 3.0 + np.arange(200) * PERIOD_MS,
             1.0 + np.arange(200) * PERIOD_MS]
    t, keep, gaps = run_tb(ms_tb(), np.concatenate(parts))
    assert keep.size == 600
    assert np.all(np.diff(t) > 0)
    assert [(k, g["reason"]) for k, g in gaps] == [(200, "time_reset"), (400, "time_reset")]
    for k in (200, 400):
        assert t[k] == pytest.approx(t[k - 1] + 1.0 / FS, abs=1e-12)
    np.testing.assert_allclose(np.diff(t), 0.004, atol=1e-12)


def test_two_time_resets_chunk_invariant() -> None:
    # DESIGN.md law: after a second counter restart, the times must not depend on whether the
    # block boundary falls before or after the later samples (bit for bit).
    parts = [np.arange(200) * PERIOD_MS, 3.0 + np.arange(200) * PERIOD_MS,
             1.0 + np.arange(200) * PERIOD_MS]
    raw = np.concatenate(parts)
    whole, _, _ = run_tb(ms_tb(), raw)
    differs = [
        c for c in range(1, raw.size) if not np.array_equal(whole, run_tb(ms_tb(), raw, [c])[0])
    ]
    assert differs == []


def test_irregularity_in_the_very_first_block() -> None:
    # The first block must be handled like any other (no previous sample yet): a reset at
    # row 10 of the first block still gives finite, increasing times.
    raw = np.concatenate((np.arange(10) * PERIOD_MS, np.arange(10) * PERIOD_MS))
    t, keep, gaps = run_tb(ms_tb(), raw)
    assert np.all(np.isfinite(t)) and np.all(np.diff(t) > 0)
    assert [g[1]["reason"] for g in gaps] == ["time_reset"]


@st.composite
def irregular_times(draw):
    """A millisecond counter with random jumps, repeats, late lines and restarts."""
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    n = draw(st.integers(1, 600))
    steps = np.full(n, PERIOD_MS)
    ev = rng.random(n)
    steps[ev < 0.01] = rng.uniform(20, 500, (ev < 0.01).sum())  # jump
    steps[(ev >= 0.01) & (ev < 0.03)] = 0.0  # repeated time
    late = (ev >= 0.03) & (ev < 0.05)
    steps[late] = -rng.uniform(0.5, 3 * PERIOD_MS, late.sum())  # out of order
    raw = 1000.0 + np.cumsum(steps)
    for r in np.flatnonzero(ev > 0.995):  # counter restarts
        raw[r:] -= raw[r] - rng.uniform(0, 50)
    cuts = sorted(draw(st.lists(st.integers(0, n), max_size=20)))
    if draw(st.booleans()):
        cuts = list(range(1, n, draw(st.integers(1, 5))))
    return raw, cuts


@settings(deadline=None, max_examples=60)
@given(case=irregular_times())
def test_timebase_is_chunk_invariant_and_increasing(case) -> None:
    # DESIGN.md: identical results for any chunking; output time strictly increasing.
    raw, cuts = case
    t1, k1, g1 = run_tb(ms_tb(), raw)
    t2, k2, g2 = run_tb(ms_tb(), raw, cuts)
    assert np.all(np.isfinite(t1))
    assert np.all(np.diff(t1) > 0)
    assert np.array_equal(t1, t2) and np.array_equal(k1, k2)
    assert [(k, sorted(r.items())) for k, r in g1] == [(k, sorted(r.items())) for k, r in g2]


# --- period estimate ----------------------------------------------------------------------------


def test_period_estimate_is_median_of_first_steps() -> None:
    rng = np.random.default_rng(7)
    raw = np.cumsum(rng.uniform(3.5, 4.5, 40))  # jittery 4 ms clock
    raw[5] = raw[4]  # a repeated time: its zero step is not counted
    tb = Timebase(time_scale=0.001, sample_rate_hz=None, has_time_column=True)
    assert not tb.ready
    steps = np.diff(raw * 0.001)
    steps = steps[steps > 0]
    # the estimate needs ESTIMATE_N positive steps
    assert not tb.estimate(raw[: ESTIMATE_N + 1])  # only 15 positive steps (one repeat)
    assert tb.estimate(raw[: ESTIMATE_N + 2])
    assert tb.period == pytest.approx(float(np.median(steps[:ESTIMATE_N])), rel=1e-15)  # numpy


def test_pipeline_holds_rows_until_period_known() -> None:
    cfg = config_dict(
        [{"name": "tank", "column": "v", "band": {"low": -0.5, "high": 0.5}}],
        columns=["t", "v"], time_column="t", time_scale=0.001,
    )
    pipe = Pipeline(config_from_dict(cfg), ["t", "v"])
    t = np.arange(40) * PERIOD_MS
    v = np.where(np.arange(40) < 20, -1.0, 1.0)
    rows = np.column_stack((t, v))
    got = []
    for i in range(ESTIMATE_N):  # 16 rows = 15 steps: not enough yet
        assert pipe.process(rows[i : i + 1]) == []
        assert pipe.sample_rate_hz is None
    got += pipe.process(rows[ESTIMATE_N : ESTIMATE_N + 1])  # the 16th step
    assert pipe.sample_rate_hz == pytest.approx(FS)
    # the held rows were conditioned: the state from row 0 comes out now
    levels = [r for r in got if r["kind"] in ("state", "edge")]
    assert [r["kind"] for r in levels] == ["state"] and levels[0]["t"] == 0.0
    got += pipe.process(rows[ESTIMATE_N + 1 :])
    (e,) = of_kind(got, "edge")
    # closed form: −1 → +1 between 76 ms and 80 ms crosses 0.5 at 79 ms
    assert e["t"] == pytest.approx(0.079, abs=1e-12)


def test_short_recording_is_conditioned_at_finish() -> None:
    cfg = config_dict(
        [{"name": "tank", "column": "v", "band": {"low": -0.5, "high": 0.5}}],
        columns=["t", "v"], time_column="t", time_scale=0.001,
    )
    t = np.arange(10) * PERIOD_MS
    v = np.where(np.arange(10) < 5, -1.0, 1.0)
    recs = run_pipeline(cfg, np.column_stack((t, v)), [1] * 10, finish=False)
    assert recs == []
    recs = run_pipeline(cfg, np.column_stack((t, v)), [1] * 10, finish=True)
    recs = [r for r in recs if r["kind"] in ("state", "edge")]
    assert [r["kind"] for r in recs] == ["state", "edge"]
    assert recs[1]["t"] == pytest.approx(0.019, abs=1e-12)  # 16 ms (−1) → 20 ms (+1) crosses 0.5


def test_pipeline_reports_gaps_and_keeps_edge_times_increasing() -> None:
    # a square wave logged with a jump, a repeated line and a counter restart
    n = 600
    raw = np.arange(n) * PERIOD_MS
    raw[300:] += 500.0  # jump
    raw[150] = raw[149]  # repeated
    raw[450:] -= raw[450] - 2.0  # restart of the counter
    v = np.where((np.arange(n) // 37) % 2 == 0, -1.0, 1.0)
    cfg = config_dict(
        [{"name": "flow", "column": "v", "band": {"low": -0.5, "high": 0.5}}],
        columns=["t", "v"], time_column="t", time_scale=0.001, sample_rate_hz=FS,
    )
    recs = run_pipeline(cfg, np.column_stack((raw, v)), [64] * 20)
    reasons = [r["reason"] for r in of_kind(recs, "gap")]
    assert reasons == ["out_of_order", "jump", "time_reset"]
    te = [r["t"] for r in of_kind(recs, "edge")]
    # the dropped line (row 150) is inside a segment, so every change of v is one edge
    assert len(te) == np.count_nonzero(np.diff(v))
    assert np.all(np.diff(te) > 0)


@pytest.mark.parametrize("n", [2, 3, 8, 17, 40])
def test_period_is_numpys_median_of_the_first_steps(n):
    """The nominal period is the median of the first ESTIMATE_N positive steps, exactly as
    numpy.median computes it (reference: numpy.median), for odd and even counts."""
    from streamcond.core.timebase import ESTIMATE_N

    rng = np.random.default_rng(n)
    t = np.cumsum(rng.uniform(0.5, 1.5, n + 1))
    tb = Timebase(time_scale=1.0)
    assert tb.estimate(t, final=True)
    assert tb.period == float(np.median(np.diff(t)[:ESTIMATE_N]))


def test_a_gaps_wall_clock_stamp_does_not_depend_on_the_block_split():
    # Rows with host receive times (a capture): a gap starts at the last sample kept before it
    # (its t), so its utc is that sample's host time — once taken from the sample after it,
    # which moved with the split, and missing in blocks of one row (the dropped row's block
    # keeps no sample). One sample goes back in time (out of order), one jumps ahead.
    from streamcond import records
    from streamcond.io.lineparse import HOST_T

    n = 400
    t = np.arange(n, dtype=float)
    t[180] -= 3.0  # out of order
    t[300:] += 50.0  # a jump of 50 periods
    host = 1.7e9 + np.arange(n) * 0.001 + 0.0005 * (np.arange(n) % 3)  # jittered arrivals
    rows = np.column_stack([t, np.sin(t / 40.0), host])
    c = {"source": {"kind": "file", "time_column": "t", "time_scale": 0.001,
                    "sample_rate_hz": 1000.0},
         "channel": [{"name": "a", "band": {"low": -0.3, "high": 0.3}}]}

    def run(cuts):
        p = Pipeline(config_from_dict(c), ["t", "a", HOST_T])
        out, a = [], 0
        for b in list(cuts) + [n]:
            out += p.process(rows[a:b])
            a = b
        return [records.to_json(r) for r in out + p.finish()]

    whole = run([])
    gaps = [g for g in whole if '"kind":"gap"' in g]
    assert len(gaps) == 2 and all('"utc"' in g for g in gaps)
    for cuts in ([180], [181], [300], [299], range(1, n), range(7, n, 7)):
        assert run(cuts) == whole, list(cuts)[:3]
