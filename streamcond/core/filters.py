"""Streaming prefilters: per-channel smoothing before the hysteresis comparator.

Every filter here is a pure, stateful stage in the ``zi``/``zf`` style of
:func:`scipy.signal.lfilter`: :meth:`StreamFilter.process` takes one block of
scaled values (float64, finite) and returns a block of the same length,
carrying whatever it needs into the next call. Three rules shape the code:

* **Start-up.** Before the first sample the filter behaves as if the signal had
  been constant at that first sample's value forever, so a sensor sitting at
  11 kPa starts at 11 kPa instead of ramping up from 0 and firing a spurious
  edge. For the IIR filters this is ``lfilter_zi(b, a) * x0`` /
  ``sosfilt_zi(sos) * x0``; for the window filters the history is filled
  with ``x0``.
* **Chunk invariance, bit for bit.** Any split of the input into blocks
  (including empty ones and blocks of one sample) gives exactly the same
  output as one call on the whole array. Each output sample is therefore
  computed by the same floating-point operations whatever the block
  boundaries are. This is why the moving average is *not* a cumulative sum
  (its rounding depends on where the sum started) and *not*
  ``scipy.signal.lfilter`` with an FIR ``b``: for ``len(a) == 1`` SciPy runs
  ``np.convolve`` on the block and adds ``zi`` to the first outputs, so the
  summation order near block starts depends on the split.
* **Vectorised.** No per-sample Python loop: the window filters work on
  (history + block) with whole-array numpy operations or
  :func:`scipy.ndimage.rank_filter`'s 1-D kernel; the IIR filters run in
  SciPy's C loops.

``delay_samples`` is the group delay at DC in samples. The pipeline uses it to
shift edge times back (``compensate_delay``): a slowly moving signal comes out
of a unity-DC-gain linear filter delayed by exactly this amount (for a ramp
input the steady-state lag equals the DC group delay).
"""

from __future__ import annotations

import copy
import logging
import math
import operator
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from streamcond.core import sos as _sos
# SciPy is imported on first use, not with this module: the live daemon loads it only when
# its config has a filter that needs it (a board's memory budget; SciPy is about 20 MiB). The
# IIR filters need only SciPy's compiled loops, loaded without scipy.signal (core/sos.py).

__all__ = [
    "FILTER_KINDS",
    "ButterworthLowpassFilter",
    "EmaFilter",
    "IdentityFilter",
    "MedianFilter",
    "MovingAverageFilter",
    "StreamFilter",
    "make_filter",
    "sos_dc_group_delay",
]

logger = logging.getLogger(__name__)

FILTER_KINDS: tuple[str, ...] = ("none", "moving_average", "median", "ema", "lowpass")

FloatArray = NDArray[np.float64]


class StreamFilter:
    """Base class of the streaming prefilters.

    Subclasses implement :meth:`_start` (set the state from the first sample)
    and :meth:`_filter` (filter one non-empty block, updating the state).
    The base class handles input conversion, empty blocks and the start-up
    rule, so every filter gets them identically.

    Attributes:
        kind: the config name of the filter (``"median"``, ...).
        sample_rate_hz: the nominal sample rate the filter was designed for.
        delay_samples: group delay at DC, in samples (see the module notes).
    """

    kind: str = "abstract"
    delay_samples: float = 0.0

    def __init__(self, sample_rate_hz: float) -> None:
        self.sample_rate_hz = _check_rate(sample_rate_hz)
        self._started = False

    def process(self, x: ArrayLike) -> FloatArray:
        """Filter one block and return a new float64 array of the same length.

        State is carried to the next call. An empty block returns an empty
        array and leaves the state untouched (even before the first sample).
        The values are assumed finite (the scaling stage guarantees it); a NaN
        would poison the state of the recursive filters.
        """
        block = np.asarray(x, dtype=np.float64)
        if block.ndim != 1:
            raise ValueError(f"A filter block must be a 1-D array, got shape {block.shape}.")
        if block.size == 0:
            return np.empty(0, dtype=np.float64)
        if not self._started:
            self._start(float(block[0]))
            self._started = True
        return self._filter(block)

    def copy(self) -> StreamFilter:
        """Return an independent deep copy of the configuration and state."""
        return copy.deepcopy(self)

    @property
    def delay_s(self) -> float:
        """The DC group delay in seconds (``delay_samples / sample_rate_hz``)."""
        return self.delay_samples / self.sample_rate_hz

    def _start(self, x0: float) -> None:
        raise NotImplementedError

    def _filter(self, block: FloatArray) -> FloatArray:
        raise NotImplementedError

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in self._params().items())
        return f"{type(self).__name__}({params})"

    def _params(self) -> dict[str, Any]:
        return {"sample_rate_hz": self.sample_rate_hz}


class IdentityFilter(StreamFilter):
    """``kind = "none"``: passes the values through unchanged; delay 0."""

    kind = "none"

    def __init__(self, sample_rate_hz: float) -> None:
        super().__init__(sample_rate_hz)
        self.delay_samples = 0.0

    def _start(self, x0: float) -> None:
        pass

    def _filter(self, block: FloatArray) -> FloatArray:
        # A copy, so a caller editing the output in place cannot edit its input.
        return block.copy()


class _WindowFilter(StreamFilter):
    """Shared machinery of the causal sliding-window filters.

    The output at sample n depends on the window x[n-N+1 .. n]. The last N-1
    input samples are kept as history; each block is filtered as
    (history + block), producing exactly one output per block sample. At
    start-up the history is N-1 copies of the first sample.

    The DC group delay of a symmetric window of N samples ending at the
    current sample is its centre, (N-1)/2 samples (the linear-phase FIR
    result; for the median it is the lag on any monotone signal).
    """

    def __init__(self, sample_rate_hz: float, window: int) -> None:
        super().__init__(sample_rate_hz)
        self.window = _check_window(window)
        self.delay_samples = (self.window - 1) / 2.0
        self._history: FloatArray = np.empty(0, dtype=np.float64)

    def _start(self, x0: float) -> None:
        self._history = np.full(self.window - 1, x0, dtype=np.float64)

    def _filter(self, block: FloatArray) -> FloatArray:
        n_hist = self.window - 1
        if n_hist == 0:
            return self._windows(block.copy())
        ext = np.concatenate((self._history, block))
        out = self._windows(ext)
        # Copy so the history does not keep the whole extended block alive.
        self._history = ext[-n_hist:].copy()
        return out

    def _windows(self, ext: FloatArray) -> FloatArray:
        """Return the statistic of every full window of ``ext`` (len(ext)-N+1 values)."""
        raise NotImplementedError

    def _params(self) -> dict[str, Any]:
        return {"sample_rate_hz": self.sample_rate_hz, "window": self.window}


def _window_sums(ext: FloatArray, n: int) -> FloatArray:
    """Sums of every run of ``n`` consecutive values of ``ext`` (len(ext)-n+1 of them).

    Built by doubling: ``s_w[i] = sum(ext[i:i+w])`` for w = 1, 2, 4, ... with
    ``s_2w = s_w[:-w] + s_w[w:]``, then the binary digits of n are combined.
    Each sum is a fixed tree of elementwise additions of the same n values,
    so the result at a position does not depend on where the array starts
    (chunk invariance), there is no accumulated rounding drift (unlike a
    running sum), the error is that of pairwise summation, and the cost is
    O(len * log2 n) rather than O(len * n).
    """
    n_out = ext.size - n + 1
    total: FloatArray | None = None
    offset = 0
    width = 1
    sums = ext
    remaining = n
    while remaining:
        if remaining & 1:
            part = sums[offset : offset + n_out]
            total = part.copy() if total is None else total + part
            offset += width
        remaining >>= 1
        if remaining:
            sums = sums[:-width] + sums[width:]
            width *= 2
    assert total is not None  # n >= 1
    return total


class MovingAverageFilter(_WindowFilter):
    """``kind = "moving_average"``: causal mean of the last ``window`` samples.

    y[n] = (x[n-N+1] + ... + x[n]) / N, a linear-phase FIR with unity DC gain
    and DC group delay (N-1)/2 samples. The sums are exact windows (see
    :func:`_window_sums`), not a cumulative sum, so they are bit-identical for
    any block split and do not drift over a long run.
    """

    kind = "moving_average"

    def _windows(self, ext: FloatArray) -> FloatArray:
        out = _window_sums(ext, self.window)
        out /= self.window
        return out


class MedianFilter(_WindowFilter):
    """``kind = "median"``: causal median of the last ``window`` samples.

    Removes isolated spikes (up to (N-1)/2 in a window) without smearing
    steps, which a mean would turn into ramps. Odd windows give the middle
    order statistic; even windows give the mean of the two middle ones (the
    ``numpy.median`` definition). Order statistics are computed with
    :func:`scipy.ndimage.rank_filter` (its fast 1-D kernel); a median is one
    of the input values, so chunk invariance is exact. The delay on a monotone
    signal is (N-1)/2 samples, the window centre.
    """

    kind = "median"

    def _windows(self, ext: FloatArray) -> FloatArray:
        n = self.window
        n_out = ext.size - n + 1
        # The filter is centred on index c = i + n//2 for the window
        # ext[i:i+n]; only centres whose window lies wholly inside `ext` are
        # kept, so the boundary mode never affects the result.
        start = n // 2
        # scipy.ndimage.rank_filter's compiled 1-D loop, loaded without the scipy.ndimage
        # package (0.45 s of imports; see core/sos.py), whenever ndimage itself would use it.
        upper = _sos.rank_filter_nearest(ext, n // 2, n)
        out = upper[start : start + n_out]
        if n % 2 == 0:
            lower = _sos.rank_filter_nearest(ext, n // 2 - 1, n)
            out = (lower[start : start + n_out] + out) / 2.0
        else:
            out = out.copy()
        return out


class EmaFilter(StreamFilter):
    """``kind = "ema"``: first-order RC low-pass, exact (step-invariant) discretisation.

    The RC response to an input held constant over one sample period
    dt = 1/fs is exact in closed form, which gives the recursion

        y[n] = alpha * x[n] + (1 - alpha) * y[n-1],   alpha = 1 - exp(-dt/tau)

    (zero-order hold: sample x[n] stands for the input over the period that
    ends at sample n, so a step first seen at sample s reaches
    1 - exp(-(m+1) dt/tau) at sample s+m, the continuous RC step response at
    t = (m+1) dt). ``alpha`` is computed as ``-expm1(-dt/tau)`` to keep
    precision when tau >> dt.

    The transfer function H(z) = alpha / (1 - (1-alpha) z^-1) has unity DC
    gain and DC group delay (1-alpha)/alpha samples (from
    tau_g = sum(k a_k)/sum(a_k) for the denominator, see
    :func:`sos_dc_group_delay`); this is ~ tau*fs - 1/2.
    """

    kind = "ema"

    def __init__(self, sample_rate_hz: float, tau_s: float) -> None:
        super().__init__(sample_rate_hz)
        self.tau_s = _check_positive("tau_s", tau_s)
        r = 1.0 / (self.sample_rate_hz * self.tau_s)  # dt / tau
        self.alpha = float(-math.expm1(-r))
        pole = math.exp(-r)  # = 1 - alpha, without the cancellation
        self.b: FloatArray = np.array([self.alpha], dtype=np.float64)
        self.a: FloatArray = np.array([1.0, -pole], dtype=np.float64)
        self.delay_samples = pole / self.alpha
        self._zi: FloatArray = np.zeros(1, dtype=np.float64)

    def _start(self, x0: float) -> None:
        self._zi = _sos.lfilter_zi(self.b, self.a) * x0

    def _filter(self, block: FloatArray) -> FloatArray:
        # len(a) == 2, so SciPy's per-sample direct-form-II-transposed loop runs
        # (loaded without the scipy.signal package, see core/sos.py): every
        # output is the same arithmetic whatever the block split.
        out, self._zi = _sos.lfilter(self.b, self.a, block, self._zi)
        return out

    def _params(self) -> dict[str, Any]:
        return {"sample_rate_hz": self.sample_rate_hz, "tau_s": self.tau_s}


class ButterworthLowpassFilter(StreamFilter):
    """``kind = "lowpass"``: Butterworth low-pass of ``order`` with -3.01 dB at ``cutoff_hz``.

    Designed as ``scipy.signal.butter(order, cutoff_hz, output="sos",
    fs=sample_rate_hz)`` would (bilinear transform with pre-warping, so
    |H| = 1/sqrt(2) exactly at the cutoff; numpy-only, identical coefficients,
    see :mod:`streamcond.core.sos`) and run as second-order sections with
    SciPy's compiled ``sosfilt`` loop carrying ``zi``; sections stay numerically
    sound for low cutoffs where a single high-order polynomial would not.

    ``delay_samples`` is the DC group delay computed analytically from the
    sections by :func:`sos_dc_group_delay` (not by sampling
    ``scipy.signal.group_delay`` near DC).
    """

    kind = "lowpass"

    def __init__(self, sample_rate_hz: float, cutoff_hz: float, order: int = 2) -> None:
        super().__init__(sample_rate_hz)
        self.cutoff_hz = _check_positive("cutoff_hz", cutoff_hz)
        nyquist = self.sample_rate_hz / 2.0
        if self.cutoff_hz >= nyquist:
            raise ValueError(
                f"The lowpass cutoff_hz ({self.cutoff_hz:g} Hz) must be below the Nyquist "
                f"frequency, half the sample rate ({nyquist:g} Hz)."
            )
        self.order = _check_order(order)
        # The same coefficients as scipy.signal.butter (tested bit for bit), without importing
        # scipy.signal (half a second, more than a replay's parse): see core/sos.py.
        self.sos: FloatArray = np.asarray(
            _sos.butter_lowpass_sos(self.order, self.cutoff_hz, self.sample_rate_hz),
            dtype=np.float64,
        )
        self.delay_samples = sos_dc_group_delay(self.sos)
        self._zi: FloatArray = np.zeros((self.sos.shape[0], 2), dtype=np.float64)

    def _start(self, x0: float) -> None:
        self._zi = _sos.sosfilt_zi(self.sos) * x0

    def _filter(self, block: FloatArray) -> FloatArray:
        out, self._zi = _sos.sosfilt(self.sos, block, self._zi)
        return out

    def _params(self) -> dict[str, Any]:
        return {"sample_rate_hz": self.sample_rate_hz, "cutoff_hz": self.cutoff_hz,
                "order": self.order}


def sos_dc_group_delay(sos: ArrayLike) -> float:
    """DC group delay, in samples, of a cascade of second-order sections.

    For a polynomial P(z) = sum_k p_k z^-k with P(1) != 0, near w = 0
    P(e^{jw}) ~ sum_k p_k (1 - j k w), so its phase is ~ -w * sum(k p_k) / sum(p_k)
    and its group delay -d(phase)/dw at DC is sum(k p_k) / sum(p_k). For
    H = B/A the delays subtract, and for a cascade they add:

        tau_g(0) = sum over sections of
                   (b1 + 2 b2)/(b0 + b1 + b2) - (a1 + 2 a2)/(a0 + a1 + a2)

    Raises ValueError when a section has a zero or pole at z = 1 (no DC
    group delay is defined then).
    """
    s = np.asarray(sos, dtype=np.float64)
    if s.ndim != 2 or s.shape[1] != 6:
        raise ValueError(f"Second-order sections must have shape (n, 6), got {s.shape}.")
    b, a = s[:, :3], s[:, 3:]
    k = np.arange(3.0)
    b_dc, a_dc = b.sum(axis=1), a.sum(axis=1)
    if np.any(b_dc == 0.0) or np.any(a_dc == 0.0):
        raise ValueError("The filter has a zero or pole at DC, so it has no DC group delay.")
    return float(np.sum((b @ k) / b_dc - (a @ k) / a_dc))


def make_filter(
    kind: str,
    sample_rate_hz: float,
    *,
    window: int | None = None,
    tau_s: float | None = None,
    cutoff_hz: float | None = None,
    order: int = 2,
) -> StreamFilter:
    """Build the prefilter named by ``kind`` for a stream at ``sample_rate_hz``.

    Kinds: ``none``; ``moving_average`` and ``median`` (``window`` samples);
    ``ema`` (``tau_s`` seconds); ``lowpass`` (``cutoff_hz``, ``order``,
    default 2). A parameter that does not belong to the kind is refused
    rather than silently ignored (``order`` excepted, since it has a
    default). Raises ValueError with one plain sentence for a bad kind,
    a missing or impossible parameter.
    """
    if not isinstance(kind, str) or kind not in FILTER_KINDS:
        raise ValueError(
            f"Unknown filter kind {kind!r}; expected one of: {', '.join(FILTER_KINDS)}."
        )
    given = {"window": window, "tau_s": tau_s, "cutoff_hz": cutoff_hz}
    needed = {
        "none": (),
        "moving_average": ("window",),
        "median": ("window",),
        "ema": ("tau_s",),
        "lowpass": ("cutoff_hz",),
    }[kind]
    for name, value in given.items():
        if name in needed and value is None:
            raise ValueError(f"A {kind} filter needs {name}.")
        if name not in needed and value is not None:
            raise ValueError(f"The parameter {name} does not apply to a {kind} filter.")

    filt: StreamFilter
    if kind == "none":
        filt = IdentityFilter(sample_rate_hz)
    elif kind == "moving_average":
        assert window is not None
        filt = MovingAverageFilter(sample_rate_hz, window)
    elif kind == "median":
        assert window is not None
        filt = MedianFilter(sample_rate_hz, window)
    elif kind == "ema":
        assert tau_s is not None
        filt = EmaFilter(sample_rate_hz, tau_s)
    else:
        assert cutoff_hz is not None
        filt = ButterworthLowpassFilter(sample_rate_hz, cutoff_hz, order)
    logger.debug("made %r, delay %.6g samples", filt, filt.delay_samples)
    return filt


# --- parameter checks (plain sentences; the config layer validates too) ---


def _check_rate(sample_rate_hz: float) -> float:
    rate = _as_real("sample_rate_hz", sample_rate_hz)
    if not (math.isfinite(rate) and rate > 0.0):
        raise ValueError(f"The sample rate must be a positive finite number of Hz, got {rate!r}.")
    return rate


def _check_positive(name: str, value: float) -> float:
    v = _as_real(name, value)
    if not (math.isfinite(v) and v > 0.0):
        raise ValueError(f"The filter parameter {name} must be a positive finite number, got {v!r}.")
    return v


def _as_real(name: str, value: Any) -> float:
    if isinstance(value, bool):
        raise ValueError(f"The filter parameter {name} must be a number, got {value!r}.")
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ValueError(f"The filter parameter {name} must be a number, got {value!r}.") from None


def _as_int(name: str, value: Any) -> int:
    if isinstance(value, bool):
        raise ValueError(f"The filter parameter {name} must be a whole number, got {value!r}.")
    try:
        return operator.index(value)
    except TypeError:
        raise ValueError(f"The filter parameter {name} must be a whole number, got {value!r}.") from None


def _check_window(window: Any) -> int:
    n = _as_int("window", window)
    if n < 1:
        raise ValueError(f"The filter window must be at least 1 sample, got {n}.")
    return n


def _check_order(order: Any) -> int:
    n = _as_int("order", order)
    if n < 1:
        raise ValueError(f"The lowpass order must be at least 1, got {n}.")
    return n
