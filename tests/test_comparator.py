"""Tests of the hysteresis comparator (streamcond.core.comparator).

References outside the code under test:

* the rule of a Schmitt trigger stated per sample (any analog electronics text, e.g. Sedra &
  Smith, "Microelectronic Circuits", bistable circuits, from memory): the output goes high when
  the input is above the upper threshold, low when it is below the lower one, and holds its
  state in between;
* for time qualification, the on-delay / off-delay of alarm practice (ISA-18.2 / IEC 62682,
  from memory) as DESIGN.md states it: a change counts only once the signal has stayed past the
  threshold for the dwell time, and the edge keeps the crossing instant. That rule is written
  out below as a plain per-sample loop, independently of the module's run-based code.

Chunk invariance (DESIGN.md "Chunk invariance is a law") is checked with ``np.array_equal``.
"""

from __future__ import annotations

import math
from unittest import mock

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from streamcond.core import comparator
from streamcond.core.comparator import (
    UNKNOWN,
    DwellState,
    crossing_times,
    hysteresis,
    hysteresis_reference,
    qualified_hysteresis,
)

# --- strategies --------------------------------------------------------------------------------


@st.composite
def signal_and_band(draw: st.DrawFn, array_band: bool | None = None):
    """A signal, a band (scalars or per-sample arrays, low < high) and a carried level.

    Signals mix hypothesis-drawn samples (NaN, values exactly on a threshold, constants) with
    seeded numpy families (random walks, noisy sines, uniform samples across the band) so that
    runs, chatter and long quiet stretches all occur.
    """
    n = draw(st.integers(0, 400))
    lo = draw(st.floats(-50, 50, allow_nan=False))
    width = draw(st.one_of(st.just(1.0), st.floats(1e-3, 10)))
    hi = lo + width
    if not hi > lo:  # rounding at large |lo|
        hi = np.nextafter(lo, np.inf)
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    family = draw(st.sampled_from(["drawn", "walk", "sine", "uniform", "constant"]))
    on_band = st.sampled_from([lo, hi, float("nan")])
    if family == "drawn":
        x = draw(
            hnp.arrays(
                np.float64,
                n,
                elements=st.one_of(
                    on_band, st.floats(lo - 2 * width, hi + 2 * width, allow_nan=False)
                ),
            )
        )
    elif family == "walk":
        x = lo + width / 2 + np.cumsum(rng.normal(0.0, width / 3, n))
    elif family == "sine":
        k = np.arange(n)
        x = (lo + hi) / 2 + 1.5 * width * np.sin(2 * np.pi * k / rng.uniform(5, 120))
        x = x + rng.normal(0.0, rng.uniform(0, 0.6) * width, n)
    elif family == "uniform":
        x = rng.uniform(lo - width, hi + width, n)
    else:
        x = np.full(n, draw(st.one_of(on_band, st.floats(lo - width, hi + width))))
    x = np.asarray(x, dtype=np.float64)
    if n and family != "constant":
        # sprinkle NaN and exact-threshold samples into every family
        m = rng.random(n)
        x[m < 0.03] = np.nan
        x[(m >= 0.03) & (m < 0.06)] = lo
        x[(m >= 0.06) & (m < 0.09)] = hi
    use_array = draw(st.booleans()) if array_band is None else array_band
    if use_array:
        # a time-varying band (what an adaptive band hands the kernel): low < high everywhere
        drift = np.cumsum(rng.normal(0.0, width / 10, n))
        low = lo + drift
        high = low + width * rng.uniform(0.2, 2.0, n)
        if n and family != "constant":
            # samples exactly on the moving thresholds too
            pick = rng.random(n)
            x = x.copy()
            x[pick < 0.04] = low[pick < 0.04]
            x[pick > 0.96] = high[pick > 0.96]
    else:
        low, high = lo, hi
    level = draw(st.sampled_from([UNKNOWN, 0, 1]))
    return x, low, high, level


def split_points(draw: st.DrawFn, n: int) -> list[int]:
    """Block boundaries for a chunking of n samples: many tiny blocks, empty ones, big ones."""
    style = draw(st.sampled_from(["cuts", "ones", "small"]))
    if style == "ones":
        return list(range(1, n))
    if style == "small":
        size = draw(st.integers(1, 7))
        return list(range(size, n, size))
    return sorted(draw(st.lists(st.integers(0, n), max_size=15)))


def _band_slice(b, a: int, z: int):
    return b if np.ndim(b) == 0 else b[a:z]


# --- 1. kernel == the per-sample rule -----------------------------------------------------------


@settings(deadline=None, max_examples=150)
@given(case=signal_and_band(), sub=st.sampled_from([None, 8, 16, 24, 64]))
def test_kernel_equals_per_sample_rule(case, sub) -> None:
    # sub=None: the kernel as shipped (small blocks take the byte scan); otherwise the word scan
    # Source: the Schmitt-trigger rule, stated per sample by hysteresis_reference.
    x, low, high, level = case
    if sub is None or not hasattr(comparator, "_SUB"):
        tr, new_level = hysteresis(x, low, high, level)
    else:
        # small internal sub-blocks (the kernel documents multiples of 8) put the kernel's
        # own block seams inside the test signals
        # _SMALL = 0 sends every block through the eight-samples-a-word scan, which the kernel
        # otherwise keeps for blocks of 4096 samples or more
        with mock.patch.object(comparator, "_SUB", sub), mock.patch.object(comparator, "_SMALL", 0), \
                mock.patch.object(comparator, "_TINY", 0):
            tr, new_level = hysteresis(x, low, high, level)
    ref_idx, ref_lev, ref_level = hysteresis_reference(x, low, high, level)
    assert tr.index.dtype == np.int64
    assert np.array_equal(tr.index, np.asarray(ref_idx, dtype=np.int64))
    assert np.array_equal(tr.level, np.asarray(ref_lev, dtype=np.int8))
    assert new_level == ref_level
    assert tr.initial == (level == UNKNOWN and len(ref_idx) > 0)
    assert np.all(np.diff(tr.index) > 0)


def _own_rule(x, low, high, level):
    """The rule once more, written here as a loop over numpy scalars (no shared code)."""
    n = x.size
    lo = np.broadcast_to(np.asarray(low, dtype=float), (n,))
    hi = np.broadcast_to(np.asarray(high, dtype=float), (n,))
    idx, lev = [], []
    for i in range(n):
        new = 1 if x[i] > hi[i] else (0 if x[i] < lo[i] else level)
        if new != level:
            idx.append(i)
            lev.append(new)
            level = new
    return idx, lev, level


@settings(deadline=None, max_examples=60)
@given(case=signal_and_band())
def test_reference_itself_states_the_rule(case) -> None:
    # The yardstick must be right too: compare it with a second statement of the rule.
    x, low, high, level = case
    assert hysteresis_reference(x, low, high, level) == _own_rule(x, low, high, level)


@settings(deadline=None, max_examples=100)
@given(data=st.data())
def test_kernel_chunk_invariance(data) -> None:
    # DESIGN.md: blocks of any size give identical transitions, carrying only the level.
    x, low, high, level = data.draw(signal_and_band())
    cuts = split_points(data.draw, x.size)
    whole, whole_level = hysteresis(x, low, high, level)
    idx, lev = [], []
    initial_flags = []
    lv = level
    bounds = [0, *cuts, x.size]
    for a, z in zip(bounds[:-1], bounds[1:]):
        tr, lv = hysteresis(x[a:z], _band_slice(low, a, z), _band_slice(high, a, z), lv)
        idx.append(tr.index + a)
        lev.append(tr.level)
        initial_flags.append(tr.initial)
    assert np.array_equal(np.concatenate(idx), whole.index)
    assert np.array_equal(np.concatenate(lev), whole.level)
    assert lv == whole_level
    # the initial level is reported exactly once, by the block that decided it
    assert sum(initial_flags) == (1 if whole.initial else 0)


def test_kernel_small_known_case() -> None:
    # Hand-worked example of the rule (band 1..2): inside the band nothing is decided,
    # a value equal to a threshold is not past it, NaN decides nothing.
    x = np.array([1.5, 2.0, 2.1, 1.5, np.nan, 1.0, 0.9, 1.9, 2.0, 2.5, 0.0])
    tr, lv = hysteresis(x, 1.0, 2.0)
    assert tr.initial
    assert tr.index.tolist() == [2, 6, 9, 10]
    assert tr.level.tolist() == [1, 0, 1, 0]
    assert lv == 0


def test_kernel_constant_inside_band_decides_nothing() -> None:
    for level in (UNKNOWN, 0, 1):
        tr, lv = hysteresis(np.full(1000, 1.5), 1.0, 2.0, level)
        assert len(tr) == 0 and lv == level and not tr.initial


# --- crossing instants ----------------------------------------------------------------------------


@settings(deadline=None, max_examples=60)
@given(
    a=st.floats(-100, 100),
    b=st.one_of(st.floats(0.01, 100), st.floats(-100, -0.01)),
    dt=st.floats(1e-4, 1.0),
    t0=st.floats(-10, 10),
    frac=st.floats(0.05, 0.95),
    k=st.integers(1, 50),
)
def test_crossing_time_exact_on_a_ramp(a, b, dt, t0, frac, k) -> None:
    # Closed form: the ramp x(t) = a + b·t crosses h at t* = (h − a)/b, and linear
    # interpolation is exact on a straight line.
    n = k + 10
    t = t0 + dt * np.arange(n)
    x = a + b * t
    t_star = t[k - 1] + frac * dt  # put the crossing strictly between samples k-1 and k
    h = a + b * t_star
    level = np.array([1 if b > 0 else 0], dtype=np.int8)
    low, high = (h - 1.0, h) if b > 0 else (h, h + 1.0)
    tc = crossing_times(t, x, np.array([k]), level, low, high, np.nan, np.nan)
    # rounding only: values of size ~|a| + |b|·|t| carry errors of a few ulps, which become
    # time errors once divided by the slope b
    eps = np.finfo(float).eps
    vscale = abs(a) + abs(b) * (abs(t0) + n * dt)
    tol = 64 * eps * vscale / abs(b) + 8 * eps * (abs(t_star) + dt)
    assert tc[0] == pytest.approx((h - a) / b, abs=tol)
    assert t[k - 1] <= tc[0] <= t[k]


def test_crossing_time_uses_previous_block_sample() -> None:
    # Closed form: between (0.0, 0.0) and (0.1, 1.0) the line crosses 0.25 at t = 0.025.
    tc = crossing_times(
        np.array([0.1]), np.array([1.0]), np.array([0]), np.array([1], np.int8), -1.0, 0.25,
        0.0, 0.0,
    )
    assert tc[0] == pytest.approx(0.025, abs=1e-15)
    # before any previous sample exists the instant is the sample time itself (documented)
    tc = crossing_times(
        np.array([0.1]), np.array([1.0]), np.array([0]), np.array([1], np.int8), -1.0, 0.25,
        np.nan, np.nan,
    )
    assert tc[0] == 0.1


# --- 1b. dwell: an independent per-sample statement of the rule -----------------------------------


def dwell_rule(t, x, low, high, rise_s, fall_s):
    """Time-qualified hysteresis, one sample at a time (written for this test).

    The level starts unknown; the first sample past either threshold sets it (no edge). After
    that, a *run* is a maximal stretch of consecutive samples above ``high`` (class 1) or below
    ``low`` (class 0); a sample that is neither (inside the band, on a threshold, NaN) ends it.
    A run starts with the crossing instant, linearly interpolated between the sample before it
    and its first sample on the threshold it passed (kept inside that interval; the sample time
    itself when there is no usable previous sample). A run of the class opposite to the level
    changes the level at its first sample whose time is at least crossing + dwell (rise_s for
    class 1, fall_s for class 0); the edge keeps the crossing instant and the run's first value.

    Returns (initial, edges) with initial = (index, level, t, value) or None and edges a list of
    (emit index, t, value, level).
    """
    level = UNKNOWN
    initial = None
    edges = []
    run_cls = None
    run_tc = run_v = math.nan
    pt = px = math.nan
    for i in range(len(x)):
        ti, v = float(t[i]), float(x[i])
        cls = 1 if v > high else (0 if v < low else None)
        if level == UNKNOWN:
            if cls is not None:
                level = cls
                initial = (i, cls, ti, v)
            run_cls = cls
        elif cls is None:
            run_cls = None
        else:
            if run_cls != cls:
                run_cls = cls
                thr = high if cls == 1 else low
                tc = pt + (thr - px) / (v - px) * (ti - pt) if v != px else math.nan
                if math.isfinite(tc):
                    tc = min(max(tc, pt), ti)
                else:
                    tc = ti
                run_tc, run_v = tc, v
            if cls != level and ti >= run_tc + (rise_s if cls == 1 else fall_s):
                level = cls
                edges.append((i, run_tc, run_v, cls))
        pt, px = ti, v
    return initial, edges


def run_qualified(t, x, low, high, rise_s, fall_s, cuts):
    """qualified_hysteresis over the blocks given by ``cuts``; results in global indices."""
    st_ = DwellState()
    initial = None
    emit, tt, vv, ll = [], [], [], []
    bounds = [0, *cuts, x.size]
    for a, z in zip(bounds[:-1], bounds[1:]):
        q = qualified_hysteresis(t[a:z], x[a:z], low, high, rise_s, fall_s, st_)
        if q.initial is not None:
            assert initial is None, "initial level reported twice"
            i0, l0, t0, v0 = q.initial
            initial = (i0 + a, l0, t0, v0)
        emit.append(q.emit + a)
        tt.append(q.t)
        vv.append(q.value)
        ll.append(q.level)
    cat = lambda p, d: np.concatenate(p) if p else np.empty(0, d)  # noqa: E731
    return initial, cat(emit, np.int64), cat(tt, float), cat(vv, float), cat(ll, np.int8), st_


@st.composite
def dwell_case(draw: st.DrawFn):
    n = draw(st.integers(1, 400))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    dt = 0.01
    # sample times: strictly increasing, irregular steps (what the timebase hands on)
    steps = rng.uniform(0.3, 1.7, n) * dt
    t = 100.0 * rng.random() + np.cumsum(steps)
    low, high = -1.0, 1.0
    family = draw(st.sampled_from(["square", "walk", "uniform", "drawn"]))
    if family == "square":
        # a noisy square wave with random durations: excursions shorter and longer than the dwell
        seg = rng.integers(1, 40, n)
        lv = np.repeat(rng.choice([-2.5, 0.0, 2.5], seg.size), seg)[:n]
        x = lv + rng.normal(0, rng.uniform(0, 1.2), n)
    elif family == "walk":
        x = np.cumsum(rng.normal(0, 0.5, n))
    elif family == "uniform":
        x = rng.uniform(-3, 3, n)
    else:
        x = draw(
            hnp.arrays(
                np.float64,
                n,
                elements=st.one_of(
                    st.sampled_from([low, high, math.nan]), st.floats(-3, 3, allow_nan=False)
                ),
            )
        )
    x = np.asarray(x, dtype=np.float64).copy()
    m = rng.random(n)
    x[m < 0.02] = np.nan
    x[(m > 0.98)] = high
    dwell = st.one_of(st.just(0.0), st.floats(0.0, 25 * dt))
    rise_s, fall_s = draw(dwell), draw(dwell)
    cuts = split_points(draw, n)
    return t, x, low, high, rise_s, fall_s, cuts


@settings(deadline=None, max_examples=150)
@given(case=dwell_case())
def test_qualified_hysteresis_equals_per_sample_dwell_rule(case) -> None:
    # Source: the on/off-delay rule (ISA-18.2, from memory; DESIGN.md "dwell"), per sample above.
    t, x, low, high, rise_s, fall_s, cuts = case
    initial, emit, tt, vv, ll, _ = run_qualified(t, x, low, high, rise_s, fall_s, cuts)
    ref_initial, ref_edges = dwell_rule(t, x, low, high, rise_s, fall_s)
    assert initial == ref_initial
    assert emit.tolist() == [e[0] for e in ref_edges]
    assert ll.tolist() == [e[3] for e in ref_edges]
    assert vv.tolist() == [e[2] for e in ref_edges]
    np.testing.assert_allclose(tt, [e[1] for e in ref_edges], rtol=1e-12, atol=1e-12)
    # the edge time is the crossing, never later than the sample that confirmed it
    assert np.all(tt <= t[emit])


@settings(deadline=None, max_examples=100)
@given(case=dwell_case())
def test_qualified_hysteresis_chunk_invariance(case) -> None:
    # DESIGN.md "Chunk invariance is a law": bit-identical for any chunking.
    t, x, low, high, rise_s, fall_s, cuts = case
    whole = run_qualified(t, x, low, high, rise_s, fall_s, [])
    parts = run_qualified(t, x, low, high, rise_s, fall_s, cuts)
    assert whole[0] == parts[0]
    for w, p in zip(whole[1:5], parts[1:5]):
        assert w.dtype == p.dtype and np.array_equal(w, p)
    assert whole[5].level == parts[5].level


@settings(deadline=None, max_examples=60)
@given(case=dwell_case())
def test_zero_dwell_is_the_plain_kernel(case) -> None:
    # With no qualification the rule reduces to the Schmitt trigger: same transitions as the
    # kernel (the first one being the initial level) and the interpolated crossing instants.
    t, x, low, high, _, _, cuts = case
    initial, emit, tt, vv, ll, _ = run_qualified(t, x, low, high, 0.0, 0.0, cuts)
    tr, _ = hysteresis(x, low, high)
    idx, lev = tr.index, tr.level
    if tr.initial:
        assert initial is not None and initial[0] == idx[0] and initial[1] == lev[0]
        idx, lev = idx[1:], lev[1:]
    else:
        assert initial is None
    assert np.array_equal(emit, idx)
    assert np.array_equal(ll, lev)
    assert np.array_equal(vv, x[idx])
    tc = crossing_times(t, x, idx, lev, low, high, np.nan, np.nan)
    np.testing.assert_allclose(tt, tc, rtol=1e-12, atol=1e-12)


def test_dwell_known_case() -> None:
    # Hand-worked: band ±1, samples every 0.1 s, rise_s = 0.25 s.
    t = np.arange(12) * 0.1
    x = np.array([-2, 0, 2, 2, 0, 2, 2, 2, 2, 0, -2, -2], dtype=float)
    q = qualified_hysteresis(t, x, -1.0, 1.0, 0.25, 0.0, DwellState())
    assert q.initial is not None and q.initial[:2] == (0, 0)
    # first excursion (samples 2..3) lasts 0.2 s past its crossing at 0.15 s: cancelled.
    # second: crossing at 0.45 s (0→2 between 0.4 and 0.5), confirmed at first t ≥ 0.70 s.
    assert q.emit.tolist() == [7, 10]
    assert q.level.tolist() == [1, 0]
    assert q.t[0] == pytest.approx(0.45, abs=1e-12)
    # falling: -1 is crossed between 0.9 s (0) and 1.0 s (-2) at 0.95 s, no fall dwell.
    assert q.t[1] == pytest.approx(0.95, abs=1e-12)
    assert q.value.tolist() == [2.0, -2.0]
