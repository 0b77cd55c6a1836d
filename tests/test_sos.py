"""Tests of the numpy-only Butterworth design and the direct section loop (streamcond.core.sos).

The reference is SciPy itself: ``scipy.signal.butter(..., output="sos")``, ``sosfilt_zi`` and
``sosfilt``. The design must match bit for bit (``np.array_equal``), not approximately, because
the pipeline's records are pinned by golden files made when the design came from SciPy.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from scipy import ndimage, signal

from streamcond.core import sos as S

_RNG = np.random.default_rng(20261202)
_CASES = [
    (order, fs, float(frac * fs))
    for order in range(1, 11)
    for fs in (1.0, 3.7, 100.0, 1000.0, 44100.0)
    for frac in [0.001, 0.01, 0.1, 0.25, 0.49, *_RNG.uniform(1e-4, 0.4999, 6)]
]


@pytest.mark.parametrize(("order", "fs", "cutoff"), _CASES)
def test_design_and_start_state_equal_scipy_bit_for_bit(order: int, fs: float, cutoff: float) -> None:
    # Reference: scipy.signal.butter / scipy.signal.sosfilt_zi.
    ours = S.butter_lowpass_sos(order, cutoff, fs)
    ref = signal.butter(order, cutoff, btype="lowpass", output="sos", fs=fs)
    assert ours.shape == ref.shape
    assert np.array_equal(ours, ref)
    assert np.array_equal(S.sosfilt_zi(ours), signal.sosfilt_zi(ref))


def test_design_meets_butterworth_definition() -> None:
    # Butterworth: |H| = 1/sqrt(2) at the cutoff, 1 at DC (Oppenheim & Schafer 3rd ed. sec. 7.2).
    sos = S.butter_lowpass_sos(4, 50.0, 1000.0)
    _, h = signal.sosfreqz(sos, worN=[0.0, 50.0], fs=1000.0)
    np.testing.assert_allclose(np.abs(h), [1.0, 1.0 / np.sqrt(2.0)], rtol=1e-12)


@pytest.mark.parametrize("use_kernel", [True, False])
def test_sosfilt_equals_scipy_and_leaves_inputs(use_kernel: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: scipy.signal.sosfilt with zi; both paths (direct kernel, fallback) must agree.
    if not use_kernel:
        monkeypatch.setattr(S, "_KERNELS", {"_sosfilt": None, "_sigtools": None, "_rank_filter_1d": None})
    sos = signal.butter(5, 12.0, output="sos", fs=1000.0)
    x = _RNG.normal(size=5000)
    zi = signal.sosfilt_zi(sos) * x[0]
    x0, zi0 = x.copy(), zi.copy()
    y, zf = S.sosfilt(sos, x, zi)
    y_ref, zf_ref = signal.sosfilt(sos, x, zi=zi)
    assert np.array_equal(y, y_ref) and np.array_equal(zf, zf_ref)
    assert np.array_equal(x, x0) and np.array_equal(zi, zi0)


@pytest.mark.parametrize("use_kernel", [True, False])
@pytest.mark.parametrize("tau_fs", [0.3, 5.0, 123.4])
def test_first_order_lfilter_equals_scipy(use_kernel: bool, tau_fs: float,
                                          monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: scipy.signal.lfilter_zi and scipy.signal.lfilter with zi (the EMA's recursion).
    if not use_kernel:
        monkeypatch.setattr(S, "_KERNELS", {"_sosfilt": None, "_sigtools": None, "_rank_filter_1d": None})
    pole = float(np.exp(-1.0 / tau_fs))
    b, a = np.array([-np.expm1(-1.0 / tau_fs)]), np.array([1.0, -pole])
    zi_ref = signal.lfilter_zi(b, a)
    assert np.array_equal(S.lfilter_zi(b, a), zi_ref)
    x = _RNG.normal(size=3000)
    zi = zi_ref * x[0]
    zi0 = zi.copy()
    y, zf = S.lfilter(b, a, x, zi)
    y_ref, zf_ref = signal.lfilter(b, a, x, zi=zi)
    assert np.array_equal(y, y_ref) and np.array_equal(zf, zf_ref)
    assert np.array_equal(zi, zi0)


@pytest.mark.parametrize("use_kernel", [True, False])
def test_rank_filter_equals_ndimage(use_kernel: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: scipy.ndimage.rank_filter(mode="nearest"), every rank of windows 3..24 and
    # arrays shorter than, as long as and longer than the window.
    if not use_kernel:
        monkeypatch.setattr(S, "_KERNELS", {"_rank_filter_1d": None})
    for n in range(3, 25):
        for length in (1, n // 2, n - 1, n, 257):
            x = _RNG.normal(size=length)
            for rank in range(1, n - 1):
                ref = ndimage.rank_filter(x, rank=rank, size=n, mode="nearest")
                assert np.array_equal(S.rank_filter_nearest(x, rank, n), ref)


def test_direct_kernel_loads_without_the_signal_package() -> None:
    # The point of the module: a lowpass filter works without importing scipy.signal.
    code = (
        "import sys, numpy as np\n"
        "from streamcond.core.filters import make_filter\n"
        "f = make_filter('lowpass', 1000.0, cutoff_hz=20.0, order=3)\n"
        "f.process(np.arange(100.0))\n"
        "from streamcond.core import sos\n"
        "g = make_filter('ema', 1000.0, tau_s=0.05)\n"
        "g.process(np.arange(100.0))\n"
        "h = make_filter('median', 1000.0, window=6)\n"
        "h.process(np.arange(100.0))\n"
        "assert all(sos._KERNELS[k] is not None for k in ('_sosfilt', '_sigtools', '_rank_filter_1d'))\n"
        "loaded = sorted(m for m in sys.modules if 'scipy' in m)\n"
        "assert 'scipy.signal' not in sys.modules and 'scipy.ndimage' not in sys.modules, loaded\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True)
