"""Butterworth low-pass design and second-order-section filtering without ``scipy.signal``.

Importing the ``scipy.signal`` package costs about half a second (it loads scipy.special,
scipy.linalg, scipy.interpolate, ...), more than parsing a million-row recording, and the
lowpass prefilter needs only two things from it: the design (``butter(..., output="sos")``)
and the section loop (``sosfilt``). This module provides both with numpy alone plus SciPy's
compiled section loop loaded on its own:

* **Design** follows the textbook route of :func:`scipy.signal.butter` (the reference the
  tests compare against, bit for bit): analog prototype poles on the unit circle
  ``p_m = -exp(j*pi*m/(2N))`` for ``m = -N+1, -N+3, ..., N-1`` (Butterworth's maximally flat
  magnitude; Oppenheim & Schafer, *Discrete-Time Signal Processing*, 3rd ed., sec. 7.2),
  frequency scaling to the pre-warped cutoff ``w_a = 2 fs' tan(pi Wn / fs')`` with the
  normalised ``fs' = 2`` (so the digital -3.01 dB point falls exactly on the cutoff), the
  bilinear transform ``z = (2 fs' + s) / (2 fs' - s)`` with the N zeros at ``s = inf`` mapped to
  ``z = -1`` (ibid., sec. 7.2.2), and grouping of poles and zeros into sections with the poles
  nearest the unit circle last and each pole pair given the nearest zeros (the "nearest"
  pairing of ``scipy.signal.zpk2sos``). Every step uses the same numpy operations in the same
  order as SciPy, so the coefficients are identical, not merely close: the pipeline's records
  stay bit for bit what they were when the design came from SciPy.
* **Filtering** runs SciPy's own compiled direct-form-II-transposed section loop
  (``scipy/signal/_sosfilt``), loaded straight from its file so that the ``scipy.signal``
  package is never imported. Should that fail (another SciPy layout, a frozen install), the
  normal ``scipy.signal.sosfilt`` is used; the arithmetic is the same kernel either way.
* The **EMA** and **median** prefilters are served the same way: SciPy's compiled ``lfilter``
  loop (``scipy/signal/_sigtools``) with a numpy ``lfilter_zi``, and scipy.ndimage's compiled
  1-D rank loop (``scipy/ndimage/_rank_filter_1d``), each with the public function as fallback.
"""

from __future__ import annotations

import importlib.machinery
import importlib.util
import os
from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import NDArray

__all__ = ["butter_lowpass_sos", "lfilter", "lfilter_zi", "rank_filter_nearest", "sosfilt",
           "sosfilt_zi"]

FloatArray = NDArray[np.float64]


# --- design -----------------------------------------------------------------------------------


def butter_lowpass_sos(order: int, cutoff_hz: float, fs: float) -> FloatArray:
    """Return the (n_sections, 6) sections of a digital Butterworth low-pass.

    Same result as ``scipy.signal.butter(order, cutoff_hz, btype="lowpass", output="sos",
    fs=fs)`` (see the module notes); ``0 < cutoff_hz < fs/2`` and ``order >= 1`` are the
    caller's to check.
    """
    n = int(order)
    # Normalised cutoff (1 = Nyquist), then pre-warping with the normalised rate fs' = 2.
    wn = np.asarray(cutoff_hz)
    wn = 2 * wn / fs
    fs_n = 2.0
    warped = 2 * fs_n * np.tan(np.pi * wn / fs_n)
    # Analog prototype: no finite zeros, poles on the unit circle's left half, gain 1.
    m = np.arange(-n + 1, n, 2, dtype=np.float64)
    p = -np.exp(1j * np.pi * m / (2 * n))
    z = np.asarray([], dtype=np.float64)
    # Low-pass to low-pass: s -> s / w_a scales poles (and zeros) by w_a, the gain by w_a^N.
    wo = float(warped)
    z = wo * z
    p = wo * p
    k: Any = 1.0 * wo**n
    # Bilinear transform; the N zeros at infinity land on z = -1.
    fs2 = 2.0 * fs_n
    z_z = (fs2 + z) / (fs2 - z)
    p_z = (fs2 + p) / (fs2 - p)
    z_z = np.concatenate((z_z, -np.ones(n)))
    k_z = k * np.real(np.prod(fs2 - z) / np.prod(fs2 - p))
    return _zpk2sos_nearest(z_z, p_z, k_z)


def _zpk2sos_nearest(z: NDArray[Any], p: NDArray[Any], k: Any) -> FloatArray:
    """Group digital zeros/poles into sections, "nearest" pairing (as scipy.signal.zpk2sos)."""
    k = np.asarray(k)
    p = np.concatenate((p, np.zeros(max(len(z) - len(p), 0))))
    z = np.concatenate((z, np.zeros(max(len(p) - len(z), 0))))
    n_sections = (max(len(p), len(z)) + 1) // 2
    if len(p) % 2 == 1:
        # An odd count gets a pole and a zero at the origin so every section has two.
        p = np.concatenate((p, [0.0]))
        z = np.concatenate((z, [0.0]))
    z = np.concatenate(_cplxreal(z))
    p = np.concatenate(_cplxreal(p))
    k = k.real

    def idx_worst(q: NDArray[Any]) -> Any:
        # The pole nearest the unit circle: it is placed last, where its gain hurts least.
        return np.argmin(np.abs(1 - np.abs(q)))

    sos = np.zeros((n_sections, 6))
    for si in range(n_sections - 1, -1, -1):
        p1_idx = idx_worst(p)
        p1 = p[p1_idx]
        p = np.delete(p, p1_idx)
        if np.isreal(p1) and np.isreal(p).sum() == 0:
            z1_idx = _nearest_idx(z, p1, "real")
            z1 = z[z1_idx]
            z = np.delete(z, z1_idx)
            sos[si] = _single_section([z1, 0], [p1, 0])
        elif (len(p) + 1 == len(z) and not np.isreal(p1)
              and np.isreal(p).sum() == 1 and np.isreal(z).sum() == 1):
            z1_idx = _nearest_idx(z, p1, "complex")
            z1 = z[z1_idx]
            z = np.delete(z, z1_idx)
            sos[si] = _single_section([z1, z1.conj()], [p1, p1.conj()])
        else:
            if np.isreal(p1):
                prealidx = np.flatnonzero(np.isreal(p))
                p2_idx = prealidx[idx_worst(p[prealidx])]
                p2 = p[p2_idx]
                p = np.delete(p, p2_idx)
            else:
                p2 = p1.conj()
            if len(z) > 0:
                z1_idx = _nearest_idx(z, p1, "any")
                z1 = z[z1_idx]
                z = np.delete(z, z1_idx)
                if not np.isreal(z1):
                    sos[si] = _single_section([z1, z1.conj()], [p1, p2])
                elif len(z) > 0:
                    z2_idx = _nearest_idx(z, p1, "real")
                    z2 = z[z2_idx]
                    z = np.delete(z, z2_idx)
                    sos[si] = _single_section([z1, z2], [p1, p2])
                else:
                    sos[si] = _single_section([z1], [p1, p2])
            else:
                sos[si] = _single_section([], [p1, p2])
    sos[0][:3] *= k
    return sos


def _cplxreal(z: NDArray[Any]) -> tuple[NDArray[Any], NDArray[Any]]:
    """Split into complex values with positive imaginary part (one per pair) and real ones.

    Sorted by real part, then |imag|; a value counts as real within 100 eps of its size,
    and each conjugate pair is averaged (as scipy.signal's ``_cplxreal``).
    """
    z = np.atleast_1d(z)
    if z.size == 0:
        return z, z
    tol = 100 * np.finfo((1.0 * z).dtype).eps
    z = z[np.lexsort((abs(z.imag), z.real))]
    real_indices = abs(z.imag) <= tol * abs(z)
    zr = z[real_indices].real
    if len(zr) == len(z):
        return np.array([]), zr
    z = z[~real_indices]
    zp = z[z.imag > 0]
    zn = z[z.imag < 0]
    if len(zp) != len(zn):
        raise ValueError("A complex value has no matching conjugate.")
    same_real = np.diff(zp.real) <= tol * abs(zp[:-1])
    diffs = np.diff(np.concatenate(([0], same_real, [0])))
    run_starts = np.nonzero(diffs > 0)[0]
    run_stops = np.nonzero(diffs < 0)[0]
    for start, stop in zip(run_starts, run_stops + 1):
        for chunk in (zp[start:stop], zn[start:stop]):
            chunk[...] = chunk[np.lexsort([abs(chunk.imag)])]
    if any(abs(zp - zn.conj()) > tol * abs(zn)):
        raise ValueError("A complex value has no matching conjugate.")
    zc = (zp + zn.conj()) / 2
    return zc, zr


def _nearest_idx(fro: NDArray[Any], to: Any, which: str) -> Any:
    order = np.argsort(np.abs(fro - to))
    if which == "any":
        return order[0]
    mask = np.isreal(fro[order])
    if which == "complex":
        mask = ~mask
    return order[np.nonzero(mask)[0][0]]


def _poly(roots: list[Any]) -> NDArray[Any]:
    """Monic polynomial with these roots, by repeated convolution (as numpy.poly)."""
    seq = np.atleast_1d(np.asarray(roots))
    if seq.shape[0] == 0:
        return np.asarray(1.0, dtype=np.real(seq).dtype)
    a = np.ones((1,), dtype=seq.dtype)
    one = np.ones_like(seq[0])
    for root in seq:
        a = np.convolve(a, np.stack((one, -root)), mode="full")
    if np.iscomplexobj(a):
        r = np.asarray(seq, dtype=np.complex128)
        if np.all(np.sort(np.imag(r)) == np.sort(np.imag(np.conj(r)))):
            a = np.asarray(np.real(a)).copy()
    return a


def _single_section(z: list[Any], p: list[Any]) -> FloatArray:
    zz, pp = np.asarray(z), np.asarray(p)
    k = np.asarray(1, dtype=np.result_type(np.real(zz), np.real(pp), 1))
    if k.dtype.kind in "iu":
        k = k.astype(np.float64)
    b = np.multiply(np.atleast_1d(k), _poly(z))
    a = np.atleast_1d(_poly(p))
    sec = np.zeros(6)
    sec[3 - len(b):3] = b
    sec[6 - len(a):6] = a
    return sec


# --- initial state ----------------------------------------------------------------------------


def sosfilt_zi(sos: FloatArray) -> FloatArray:
    """Steady-state section states for a unit step (as ``scipy.signal.sosfilt_zi``).

    For each section with b, a (a0 = 1) the state zi solving ``(I - A^T) zi = b[1:] - a[1:] b0``
    (A the companion matrix of a) is the DF-II-transposed state after an infinitely long unit
    input; later sections see the DC gain sum(b)/sum(a) of the earlier ones.
    """
    sos = np.asarray(sos, dtype=np.float64)
    zi = np.empty((sos.shape[0], 2), dtype=sos.dtype)
    scale = 1.0
    for section in range(sos.shape[0]):
        b = sos[section, :3]
        a = sos[section, 3:]
        zi[section, ...] = scale * _lfilter_zi(b, a)
        scale *= np.sum(b) / np.sum(a)
    return zi


def _lfilter_zi(b: FloatArray, a: FloatArray) -> FloatArray:
    if a[0] != 1.0:
        b = b / a[0]
        a = a / a[0]
    n = a.shape[0]
    companion = np.zeros((n - 1, n - 1), dtype=a.dtype)
    companion[0] = -a[1:] / (1.0 * a[0])
    companion[list(range(1, n - 1)), list(range(0, n - 2))] = 1
    i_minus_a = np.eye(n - 1) - companion.T
    rhs = b[1:] - a[1:] * b[0]
    return np.linalg.solve(i_minus_a, rhs)


# --- filtering --------------------------------------------------------------------------------


def _load_compiled(module: str, attr: str, package: str = "signal") -> Callable[..., Any] | None:
    """A function of one of SciPy's compiled ``scipy.<package>`` modules, loaded from its file
    without importing that package (only the top-level ``scipy``, which is light).

    Returns None when the file is not where SciPy keeps it or does not load; the callers then
    fall back to the public ``scipy.signal`` function, which runs the same compiled loop.
    """
    import sys

    name = f"scipy.{package}.{module}"
    try:
        loaded = sys.modules.get(name)
        if loaded is None:
            spec = importlib.util.find_spec("scipy")
            if spec is None or not spec.submodule_search_locations:
                return None
            folder = os.path.join(list(spec.submodule_search_locations)[0], package)
            for suffix in importlib.machinery.EXTENSION_SUFFIXES:
                path = os.path.join(folder, module + suffix)
                if os.path.isfile(path):
                    loader = importlib.machinery.ExtensionFileLoader(name, path)
                    mod_spec = importlib.util.spec_from_file_location(name, path, loader=loader)
                    if mod_spec is None:
                        return None
                    loaded = importlib.util.module_from_spec(mod_spec)
                    loader.exec_module(loaded)
                    # registered, so a later `import scipy.signal` reuses this very module
                    sys.modules.setdefault(name, loaded)
                    break
            else:
                return None
        func = getattr(loaded, attr, None)
        return func if callable(func) else None
    except Exception:  # any surprise in a foreign layout: use the public function instead
        return None


_KERNELS: dict[str, Callable[..., Any] | None] = {}


def _kernel(module: str = "_sosfilt", attr: str = "_sosfilt", package: str = "signal"
            ) -> Callable[..., Any] | None:
    """The compiled loop (cached), or None: not found, or STREAMCOND_SOSFILT=scipy (tests)."""
    if module not in _KERNELS:
        use = os.environ.get("STREAMCOND_SOSFILT") != "scipy"
        _KERNELS[module] = _load_compiled(module, attr, package) if use else None
    return _KERNELS[module]


def sosfilt(sos: FloatArray, x: FloatArray, zi: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Filter the 1-D float64 block ``x`` through the sections, from state ``zi`` (n, 2).

    Returns (y, zf) like ``scipy.signal.sosfilt(sos, x, zi=zi)``; neither input is modified.
    """
    kernel = _kernel()
    if kernel is None:
        from scipy import signal

        y, zf = signal.sosfilt(sos, x, zi=zi)
        return np.asarray(y, dtype=np.float64), np.asarray(zf, dtype=np.float64)
    # The kernel's calling convention: C-contiguous float64 sos (n, 6), x (rows, samples)
    # and zi (rows, n, 2), both filtered in place.
    sos_c = np.ascontiguousarray(sos, dtype=np.float64)
    y = np.array(x, dtype=np.float64, order="C").reshape(1, -1)
    z = np.array(zi, dtype=np.float64, order="C").reshape(1, sos_c.shape[0], 2)
    kernel(sos_c, y, z)
    return y.reshape(-1), z.reshape(sos_c.shape[0], 2)


def lfilter(b: FloatArray, a: FloatArray, x: FloatArray, zi: FloatArray
            ) -> tuple[FloatArray, FloatArray]:
    """``scipy.signal.lfilter(b, a, x, zi=zi)`` for a 1-D float64 block and ``len(a) > 1``
    with ``a[0] == 1`` (SciPy's compiled direct-form-II-transposed loop, called as lfilter
    calls it for that case; neither input is modified)."""
    kernel = _kernel("_sigtools", "_linear_filter")
    if kernel is None or len(a) < 2:
        from scipy import signal

        y, zf = signal.lfilter(b, a, x, zi=zi)
        return np.asarray(y, dtype=np.float64), np.asarray(zf, dtype=np.float64)
    y, zf = kernel(np.asarray(b), np.asarray(a), np.asarray(x), -1, np.asarray(zi))
    return np.asarray(y, dtype=np.float64), np.asarray(zf, dtype=np.float64)


def lfilter_zi(b: FloatArray, a: FloatArray) -> FloatArray:
    """Steady-state state of lfilter for a unit step (as ``scipy.signal.lfilter_zi``)."""
    b = np.atleast_1d(np.asarray(b))
    a = np.atleast_1d(np.asarray(a))
    while a.shape[0] > 1 and a[0] == 0.0:
        a = a[1:]
    n = max(a.shape[0], b.shape[0])
    if a[0] != 1.0:
        b = b / a[0]
        a = a / a[0]
    if a.shape[0] < n:
        a = np.concatenate((a, np.zeros(n - a.shape[0], dtype=a.dtype)))
    elif b.shape[0] < n:
        b = np.concatenate((b, np.zeros(n - b.shape[0], dtype=b.dtype)))
    return _lfilter_zi(b, a)


def rank_filter_nearest(x: FloatArray, rank: int, size: int) -> FloatArray:
    """``scipy.ndimage.rank_filter(x, rank=rank, size=size, mode="nearest")`` for a 1-D float64
    array and ``0 < rank < size - 1`` (the case scipy.ndimage hands to its compiled 1-D rank
    loop, called here the same way: mode code 0 = "nearest", cval 0, origin 0)."""
    kernel = _kernel("_rank_filter_1d", "rank_filter", "ndimage")
    xc = np.ascontiguousarray(x, dtype=np.float64)
    if kernel is None or not 0 < rank < size - 1 or xc.size < (size - 1) // 2:
        from scipy import ndimage

        return np.asarray(ndimage.rank_filter(xc, rank=rank, size=size, mode="nearest"))
    out = np.empty_like(xc)
    kernel(xc, int(rank), int(size), out, 0, np.float64(0.0), 0)
    return out
