"""Tests of the streaming prefilters (streamcond.core.filters).

Each filter is checked against a reference outside the project: SciPy/NumPy
functions run on the whole array (with the same start-up state), closed-form
responses (ramp lag of a linear-phase FIR, RC step response), and the
definition of the Butterworth cutoff. Chunk invariance is checked bit for bit
with ``np.array_equal``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from numpy.lib.stride_tricks import sliding_window_view
from scipy import ndimage, signal

from streamcond.core.filters import (
    FILTER_KINDS,
    StreamFilter,
    make_filter,
    sos_dc_group_delay,
)

FS = 1000.0

# --- helpers ---------------------------------------------------------------


def run_chunked(filt: StreamFilter, x: np.ndarray, cuts: list[int]) -> np.ndarray:
    """Feed ``x`` to ``filt`` split at ``cuts`` (sorted, may repeat: empty blocks)."""
    outs = []
    for block in np.split(x, sorted(cuts)):
        y = filt.process(block)
        assert y.dtype == np.float64 and y.shape == block.shape
        outs.append(y)
    return np.concatenate(outs) if outs else np.empty(0)


def left_padded(x: np.ndarray, n: int) -> np.ndarray:
    """``x`` preceded by n-1 copies of its first sample (the start-up rule)."""
    return np.concatenate((np.full(n - 1, x[0]), x))


signals = hnp.arrays(
    np.float64,
    st.integers(0, 200),
    elements=st.floats(-1e3, 1e3, allow_nan=False, allow_infinity=False),
)


@st.composite
def signal_and_cuts(draw: st.DrawFn) -> tuple[np.ndarray, list[int]]:
    x = draw(signals)
    cuts = draw(st.lists(st.integers(0, x.size), max_size=12))
    return x, cuts


filter_specs = st.one_of(
    st.just(("none", {})),
    st.tuples(st.just("moving_average"), st.fixed_dictionaries({"window": st.integers(1, 40)})),
    st.tuples(st.just("median"), st.fixed_dictionaries({"window": st.integers(1, 40)})),
    st.tuples(st.just("ema"), st.fixed_dictionaries({"tau_s": st.floats(1e-4, 1.0)})),
    st.tuples(
        st.just("lowpass"),
        st.fixed_dictionaries(
            {"cutoff_hz": st.floats(0.01 * FS / 2, 0.9 * FS / 2), "order": st.integers(1, 6)}
        ),
    ),
)


# --- chunk invariance and references ---------------------------------------


@settings(deadline=None, max_examples=50)
@given(spec=filter_specs, data=signal_and_cuts())
def test_any_chunking_is_bit_identical_to_one_call(spec, data) -> None:
    kind, params = spec
    x, cuts = data
    whole = make_filter(kind, FS, **params).process(x)
    chunked = run_chunked(make_filter(kind, FS, **params), x, cuts)
    # The project's chunk-invariance law: identical bits, not merely close.
    assert np.array_equal(chunked, whole)


@settings(deadline=None, max_examples=50)
@given(data=signal_and_cuts(), window=st.integers(1, 40))
def test_moving_average_matches_lfilter_fir(data, window) -> None:
    x, cuts = data
    if x.size == 0:
        return
    y = run_chunked(make_filter("moving_average", FS, window=window), x, cuts)
    # Reference: scipy.signal.lfilter with the boxcar FIR b = ones(N)/N, run on
    # the whole array left-padded with x0. Summation order differs, so the
    # comparison is to rounding (a few ulps of the window sum).
    ref = signal.lfilter(np.ones(window) / window, [1.0], left_padded(x, window))[window - 1 :]
    scale = max(1.0, float(np.max(np.abs(x))))
    np.testing.assert_allclose(y, ref, rtol=0, atol=1e-12 * scale)


@settings(deadline=None, max_examples=50)
@given(
    x=hnp.arrays(np.float64, st.integers(1, 200), elements=st.integers(-10**6, 10**6).map(float)),
    cuts=st.lists(st.integers(0, 200), max_size=8),
    window=st.integers(1, 40),
)
def test_moving_average_exact_on_integer_data(x, cuts, window) -> None:
    cuts = [min(c, x.size) for c in cuts]
    y = run_chunked(make_filter("moving_average", FS, window=window), x, cuts)
    # Reference: numpy sum over sliding windows divided by N. Sums of integers
    # below 2**53 are exact in any order, and IEEE division is correctly
    # rounded, so the two must agree bit for bit.
    ref = sliding_window_view(left_padded(x, window), window).sum(axis=1) / window
    assert np.array_equal(y, ref)


@settings(deadline=None, max_examples=50)
@given(data=signal_and_cuts(), half=st.integers(0, 25))
def test_median_odd_matches_ndimage_and_medfilt(data, half) -> None:
    x, cuts = data
    if x.size == 0:
        return
    n = 2 * half + 1
    y = run_chunked(make_filter("median", FS, window=n), x, cuts)
    padded = left_padded(x, n)
    # Reference 1: scipy.ndimage.median_filter (centred window) on the
    # left-padded array; the causal output at sample k is the centred output
    # at padded index k + half, whose window padded[k : k+n] is wholly inside.
    ref_nd = ndimage.median_filter(padded, size=n, mode="constant")[half : half + x.size]
    assert np.array_equal(y, ref_nd)
    # Reference 2: scipy.signal.medfilt, same alignment (its zero padding at
    # the edges never reaches the kept outputs).
    ref_mf = signal.medfilt(padded, n)[half : half + x.size]
    assert np.array_equal(y, ref_mf)


@settings(deadline=None, max_examples=50)
@given(data=signal_and_cuts(), half=st.integers(1, 20))
def test_median_even_matches_numpy_median(data, half) -> None:
    x, cuts = data
    if x.size == 0:
        return
    n = 2 * half
    y = run_chunked(make_filter("median", FS, window=n), x, cuts)
    # Reference: numpy.median over sliding windows of the left-padded array
    # (mean of the two middle values for an even count).
    ref = np.median(sliding_window_view(left_padded(x, n), n), axis=1)
    assert np.array_equal(y, ref)


@settings(deadline=None, max_examples=50)
@given(data=signal_and_cuts(), tau_s=st.floats(1e-4, 1.0))
def test_ema_matches_lfilter(data, tau_s) -> None:
    x, cuts = data
    if x.size == 0:
        return
    filt = make_filter("ema", FS, tau_s=tau_s)
    y = run_chunked(filt, x, cuts)
    # Reference 1: scipy.signal.lfilter on the whole array with the filter's
    # own coefficients and zi = lfilter_zi(b, a) * x0 -- identical bits.
    ref = signal.lfilter(filt.b, filt.a, x, zi=signal.lfilter_zi(filt.b, filt.a) * x[0])[0]
    assert np.array_equal(y, ref)
    # Reference 2: coefficients written from the RC discretisation formula
    # alpha = 1 - exp(-dt/tau), y[n] = alpha x[n] + (1 - alpha) y[n-1]
    # (alpha computed differently, so equal to rounding).
    alpha = 1.0 - math.exp(-1.0 / (FS * tau_s))
    b, a = [alpha], [1.0, -(1.0 - alpha)]
    ref2 = signal.lfilter(b, a, x, zi=signal.lfilter_zi(b, a) * x[0])[0]
    scale = max(1.0, float(np.max(np.abs(x))))
    np.testing.assert_allclose(y, ref2, rtol=0, atol=1e-9 * scale)


@settings(deadline=None, max_examples=50)
@given(
    data=signal_and_cuts(),
    frac=st.floats(0.01, 0.9),
    order=st.integers(1, 8),
)
def test_lowpass_matches_sosfilt(data, frac, order) -> None:
    x, cuts = data
    if x.size == 0:
        return
    cutoff = frac * FS / 2
    y = run_chunked(make_filter("lowpass", FS, cutoff_hz=cutoff, order=order), x, cuts)
    # Reference: scipy.signal.butter(..., output="sos", fs=FS) designed here,
    # run once with scipy.signal.sosfilt and zi = sosfilt_zi(sos) * x0.
    sos = signal.butter(order, cutoff, output="sos", fs=FS)
    ref = signal.sosfilt(sos, x, zi=signal.sosfilt_zi(sos) * x[0])[0]
    assert np.array_equal(y, ref)


ALL_SPECS = [
    ("none", {}),
    ("moving_average", {"window": 1}),
    ("moving_average", {"window": 7}),
    ("moving_average", {"window": 64}),
    ("median", {"window": 1}),
    ("median", {"window": 6}),
    ("median", {"window": 51}),
    ("ema", {"tau_s": 0.02}),
    ("lowpass", {"cutoff_hz": 25.0, "order": 2}),
    ("lowpass", {"cutoff_hz": 3.0, "order": 5}),
]


@pytest.mark.parametrize(("kind", "params"), ALL_SPECS)
def test_blocks_of_one_and_empty_blocks(kind, params) -> None:
    rng = np.random.default_rng(7)
    x = 11.0 + rng.normal(0.0, 0.3, 500)
    whole = make_filter(kind, FS, **params).process(x)
    filt = make_filter(kind, FS, **params)
    # Empty blocks before the first sample must not start the filter.
    assert filt.process(np.empty(0)).shape == (0,)
    outs = []
    for v in x:
        outs.append(filt.process(np.array([v])))
        outs.append(filt.process(np.empty(0)))
    assert np.array_equal(np.concatenate(outs), whole)


# --- start-up ---------------------------------------------------------------


@pytest.mark.parametrize(("kind", "params"), ALL_SPECS)
def test_start_up_as_if_constant_forever(kind, params) -> None:
    # A sensor sitting at 11 kPa: a filter whose past was 11 forever outputs
    # 11 (unity DC gain), from the first sample on.
    # The tolerance allows for rounding in the recursive sections: for a low
    # cutoff the pole sums 1 + a1 + a2 are ~1e-4, which amplifies the state's
    # rounding to ~1e-12 relative (measured 1.0e-12 for 3 Hz, order 5).
    filt = make_filter(kind, FS, **params)
    y = filt.process(np.full(300, 11.0))
    np.testing.assert_allclose(y, 11.0, rtol=1e-10)


def test_empty_before_start_leaves_state_alone() -> None:
    filt = make_filter("ema", FS, tau_s=0.1)
    out = filt.process([])
    assert out.dtype == np.float64 and out.size == 0
    # The first real sample still defines the start-up state.
    y = filt.process(np.array([5.0, 5.0]))
    np.testing.assert_allclose(y, 5.0, rtol=1e-12)


# --- delay ------------------------------------------------------------------


@pytest.mark.parametrize("window", [1, 2, 5, 20, 51])
def test_moving_average_ramp_lag_is_half_window(window) -> None:
    filt = make_filter("moving_average", FS, window=window)
    n = np.arange(2000.0)
    y = filt.process(0.01 * n)
    assert filt.delay_samples == (window - 1) / 2
    # Closed form: the mean of a ramp over x[n-N+1..n] is the ramp at
    # n - (N-1)/2 (linear-phase FIR lag on a ramp).
    k = n[window - 1 :]
    np.testing.assert_allclose(y[window - 1 :], 0.01 * (k - filt.delay_samples), rtol=0, atol=1e-10)


@pytest.mark.parametrize("window", [1, 3, 4, 21, 50])
def test_median_ramp_lag_is_half_window(window) -> None:
    filt = make_filter("median", FS, window=window)
    n = np.arange(2000.0)
    y = filt.process(0.01 * n)
    assert filt.delay_samples == (window - 1) / 2
    # Closed form: the median of a monotone window is its middle element
    # (mean of the two middle ones for even N), i.e. the ramp at n - (N-1)/2.
    k = n[window - 1 :]
    np.testing.assert_allclose(y[window - 1 :], 0.01 * (k - filt.delay_samples), rtol=0, atol=1e-10)


@pytest.mark.parametrize("tau_s", [0.002, 0.02, 0.2])
def test_ema_ramp_lag_equals_dc_group_delay(tau_s) -> None:
    filt = make_filter("ema", FS, tau_s=tau_s)
    r = 1.0 / (FS * tau_s)
    alpha = 1.0 - math.exp(-r)
    # DC group delay of alpha / (1 - (1-alpha) z^-1): (1-alpha)/alpha.
    np.testing.assert_allclose(filt.delay_samples, (1 - alpha) / alpha, rtol=1e-12)
    # Laurent series 1/(e^r - 1) = 1/r - 1/2 + r/12 - r^3/720 + ... (Bernoulli
    # numbers): the delay is tau*fs - 1/2 + r/12 to third order.
    assert abs(filt.delay_samples - (tau_s * FS - 0.5 + r / 12)) <= r**3 / 700
    # Steady-state ramp lag of a unity-DC-gain LTI filter equals its DC group
    # delay (standard result); run 40 time constants so the start transient
    # (decaying as exp(-t/tau)) is gone.
    n_samples = int(40 * tau_s * FS) + 10
    slope = 1e-3
    x = slope * np.arange(float(n_samples))
    y = filt.process(x)
    lag = (x[-1] - y[-1]) / slope
    np.testing.assert_allclose(lag, filt.delay_samples, rtol=1e-6)


@pytest.mark.parametrize(
    ("cutoff_hz", "order"), [(10.0, 1), (10.0, 2), (10.0, 4), (40.0, 5), (100.0, 8), (2.0, 3)]
)
def test_lowpass_ramp_lag_equals_dc_group_delay(cutoff_hz, order) -> None:
    filt = make_filter("lowpass", FS, cutoff_hz=cutoff_hz, order=order)
    # Steady-state ramp lag of a unity-DC-gain LTI filter equals its DC group
    # delay (standard result). The slowest Butterworth pole pair decays at
    # wc*sin(pi/(2*order)) rad/s; run 40 of those time constants.
    decay = 2 * math.pi * cutoff_hz * math.sin(math.pi / (2 * order))
    n_samples = int(40 / decay * FS) + 10
    slope = 1e-3
    x = slope * np.arange(float(n_samples))
    y = filt.process(x)
    lag = (x[-1] - y[-1]) / slope
    np.testing.assert_allclose(lag, filt.delay_samples, rtol=1e-3)


@pytest.mark.parametrize(("cutoff_hz", "order"), [(10.0, 2), (40.0, 5), (150.0, 3)])
def test_lowpass_delay_agrees_with_scipy_group_delay(cutoff_hz, order) -> None:
    filt = make_filter("lowpass", FS, cutoff_hz=cutoff_hz, order=order)
    # Reference: scipy.signal.group_delay of the cascaded transfer function
    # (sos2tf) at a very low frequency (the delay is even in w, so the
    # difference from DC is O(w^2)).
    b, a = signal.sos2tf(filt.sos)
    _, gd = signal.group_delay((b, a), w=[1e-4], fs=2 * np.pi)
    np.testing.assert_allclose(filt.delay_samples, gd[0], rtol=1e-5)


def test_sos_dc_group_delay_of_pure_delay_and_moving_average() -> None:
    # z^-1 has a group delay of exactly 1 sample; z^-2 of exactly 2 (definition).
    assert sos_dc_group_delay([[0, 1, 0, 1, 0, 0]]) == 1.0
    assert sos_dc_group_delay([[0, 0, 1, 1, 0, 0], [0, 1, 0, 1, 0, 0]]) == 3.0
    # A 3-tap boxcar (1 + z^-1 + z^-2)/3 is linear phase with delay (N-1)/2 = 1.
    assert sos_dc_group_delay([[1 / 3, 1 / 3, 1 / 3, 1, 0, 0]]) == pytest.approx(1.0, rel=1e-15)
    with pytest.raises(ValueError):
        sos_dc_group_delay([[1, -1, 0, 1, 0, 0]])  # zero at DC


def test_delay_seconds() -> None:
    filt = make_filter("median", 250.0, window=11)
    assert filt.delay_s == pytest.approx(5 / 250.0)


# --- frequency- and time-domain closed forms --------------------------------


@pytest.mark.parametrize("tau_samples", [10, 50, 200])
def test_ema_step_reaches_one_minus_inv_e_at_tau(tau_samples) -> None:
    tau_s = tau_samples / FS
    filt = make_filter("ema", FS, tau_s=tau_s)
    s = 10
    x = np.concatenate((np.zeros(s), np.ones(5 * tau_samples)))
    y = filt.process(x)
    np.testing.assert_array_equal(y[:s], 0.0)
    # Closed-form RC step response 1 - exp(-t/tau), with each sample standing
    # for the input over the period ending at it (zero-order hold): sample
    # s+m is t = (m+1) dt after the step.
    m = np.arange(x.size - s)
    np.testing.assert_allclose(y[s:], 1.0 - np.exp(-(m + 1) / tau_samples), rtol=0, atol=1e-12)
    # At t = tau: 1 - 1/e.
    assert y[s + tau_samples - 1] == pytest.approx(1.0 - math.exp(-1.0), abs=1e-12)


@pytest.mark.parametrize(("cutoff_hz", "order"), [(5.0, 1), (10.0, 2), (50.0, 4), (200.0, 7)])
def test_lowpass_attenuation_at_cutoff_is_3db(cutoff_hz, order) -> None:
    filt = make_filter("lowpass", FS, cutoff_hz=cutoff_hz, order=order)
    # Definition of the Butterworth cutoff: |H(fc)| = 1/sqrt(2), i.e.
    # -10*log10(2) = -3.0103 dB; unity gain at DC. Evaluated with
    # scipy.signal.sosfreqz on the filter's sections.
    _, h = signal.sosfreqz(filt.sos, worN=[0.0, cutoff_hz], fs=FS)
    db = 20 * np.log10(np.abs(h))
    assert db[0] == pytest.approx(0.0, abs=1e-9)
    assert db[1] == pytest.approx(-10 * math.log10(2.0), abs=1e-9)
    assert db[1] == pytest.approx(-3.01, abs=0.001)


@pytest.mark.parametrize(("cutoff_hz", "order"), [(50.0, 2), (20.0, 4)])
def test_lowpass_sine_at_cutoff_comes_out_at_1_over_sqrt2(cutoff_hz, order) -> None:
    # Time-domain check of the same definition through process(): a unit sine
    # at the cutoff leaves with amplitude 1/sqrt(2) once the transient is gone.
    filt = make_filter("lowpass", FS, cutoff_hz=cutoff_hz, order=order)
    t = np.arange(8000) / FS
    x = np.sin(2 * np.pi * cutoff_hz * t)
    y = np.concatenate([filt.process(b) for b in np.array_split(x, 13)])
    tail = slice(4000, None)
    basis = np.column_stack(
        (np.sin(2 * np.pi * cutoff_hz * t[tail]), np.cos(2 * np.pi * cutoff_hz * t[tail]))
    )
    coef, *_ = np.linalg.lstsq(basis, y[tail], rcond=None)
    assert math.hypot(*coef) == pytest.approx(1 / math.sqrt(2), rel=1e-4)


def test_median_removes_isolated_spikes_and_keeps_steps() -> None:
    # Definition of the median: up to (N-1)/2 outliers in a window do not move
    # it, and a step passes unsmeared, delayed by (N-1)/2 samples.
    n = 5
    x = np.full(200, 11.0)
    x[100:] = 13.0
    x[[30, 31, 60, 150]] = [80.0, -50.0, 90.0, -7.0]
    y = make_filter("median", FS, window=n).process(x)
    expected = np.full(200, 11.0)
    expected[100 + (n - 1) // 2 :] = 13.0
    assert np.array_equal(y, expected)


# --- copy, input handling, validation ---------------------------------------


@pytest.mark.parametrize(("kind", "params"), ALL_SPECS)
def test_copy_is_independent(kind, params) -> None:
    rng = np.random.default_rng(3)
    x = 11.0 + rng.normal(0.0, 1.0, 400)
    reference = make_filter(kind, FS, **params).process(x)
    filt = make_filter(kind, FS, **params)
    head = filt.process(x[:150])
    twin = filt.copy()
    assert twin is not filt and type(twin) is type(filt)
    assert twin.delay_samples == filt.delay_samples
    # Feeding the copy something else must not disturb the original ...
    twin.process(rng.normal(0.0, 100.0, 77))
    tail = filt.process(x[150:])
    assert np.array_equal(np.concatenate((head, tail)), reference)
    # ... and a copy taken mid-stream continues exactly like the original.
    filt2 = make_filter(kind, FS, **params)
    filt2.process(x[:150])
    twin2 = filt2.copy()
    assert np.array_equal(twin2.process(x[150:]), reference[150:])


def test_output_is_a_new_array() -> None:
    x = np.array([1.0, 2.0, 3.0])
    y = make_filter("none", FS).process(x)
    y[0] = 99.0
    assert x[0] == 1.0


def test_integer_input_is_converted() -> None:
    y = make_filter("moving_average", FS, window=2).process(np.array([2, 4, 6]))
    assert y.dtype == np.float64
    assert np.array_equal(y, [2.0, 3.0, 5.0])


def test_rejects_non_1d_block() -> None:
    with pytest.raises(ValueError, match="1-D"):
        make_filter("none", FS).process(np.zeros((2, 3)))


@pytest.mark.parametrize(
    ("kind", "kwargs"),
    [
        ("bogus", {}),
        ("moving_average", {}),
        ("moving_average", {"window": 0}),
        ("median", {"window": -3}),
        ("median", {"window": 2.5}),
        ("median", {"window": True}),
        ("ema", {"tau_s": 0.0}),
        ("ema", {"tau_s": -1.0}),
        ("ema", {"tau_s": float("nan")}),
        ("ema", {"tau_s": float("inf")}),
        ("ema", {"tau_s": "fast"}),
        ("lowpass", {"cutoff_hz": 0.0}),
        ("lowpass", {"cutoff_hz": FS / 2}),
        ("lowpass", {"cutoff_hz": 0.8 * FS}),
        ("lowpass", {"cutoff_hz": 10.0, "order": 0}),
        ("lowpass", {"cutoff_hz": 10.0, "order": 1.5}),
        ("ema", {"tau_s": 0.1, "window": 5}),
        ("none", {"cutoff_hz": 10.0}),
    ],
)
def test_impossible_parameters_raise_value_error(kind, kwargs) -> None:
    with pytest.raises(ValueError) as excinfo:
        make_filter(kind, FS, **kwargs)
    message = str(excinfo.value)
    # One plain sentence, not a traceback dump.
    assert message.endswith(".") and "\n" not in message


@pytest.mark.parametrize("rate", [0.0, -10.0, float("nan"), float("inf")])
def test_bad_sample_rate_raises(rate) -> None:
    for kind, params in ALL_SPECS:
        with pytest.raises(ValueError):
            make_filter(kind, rate, **params)


def test_every_kind_is_constructible() -> None:
    params = {"none": {}, "moving_average": {"window": 3}, "median": {"window": 3},
              "ema": {"tau_s": 0.1}, "lowpass": {"cutoff_hz": 10.0}}
    assert set(params) == set(FILTER_KINDS)
    for kind in FILTER_KINDS:
        filt = make_filter(kind, FS, **params[kind])
        assert filt.kind == kind
        assert isinstance(filt, StreamFilter)
