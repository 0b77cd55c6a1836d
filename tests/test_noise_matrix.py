"""The noise estimate on the matrix of signals a station sees (issue 8): 13 signals × 6 noise
kinds × 4 windows, each realisation's true noise σ known by construction.

Signals (σ = 0.02 V; steps and amplitudes 50σ; pulses 0/5 V; fs = 1 kHz unless said):
constant; slow ramp (5σ/s); sines at 0.1, 0.5 and 2 Hz; square waves at 0.25, 1 and 5 Hz;
paddle-wheel pulse trains (0/5 V, 15–20 Hz, 30 % duty) sampled at 250 Hz and 1 kHz; a pump motor
current with a start inrush (6× the running current, decaying with τ = 0.15 s) and a stop decay;
a random telegraph signal (2 switches/s); single-sample spikes (3/s, 10–100σ).

Noise: white; Gaussian flat to 5, 30 and 100 Hz (an ideal FFT band limit); 50 Hz hum plus white
noise of equal variances; Student t with 3 degrees of freedom (σ its standard deviation,
√3 times its scale: Var t_ν = ν/(ν - 2), any statistics handbook).

Windows: 0.5, 1, 5 and 30 s (cells whose window holds fewer than MIN_SAMPLES samples are left
out).

The pass rule: in every cell whose window holds at least 20 noise correlation times (fs/2B
samples each for noise flat to B Hz: the first zero of its autocorrelation sin(2πBτ)/(2πBτ);
one sample for white, hum and t noise) the median of σ̂/σ over the realisations lies within
[0.85, 1.15] ([0.80, 1.15] for t noise) — or the estimate says it is not reliable. Elsewhere
the estimate must not be silently wrong: either within the band or ``reliable = False``.

This module also holds the generator the bench script ``tests/bench/bench_noise_matrix.py``
uses for the full table.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pytest

from streamcond.core.noise import MIN_SAMPLES, estimate_noise

SIGMA = 0.02  # V, the noise's true standard deviation
AMP = 50 * SIGMA  # steps and amplitudes
FS = 1000.0

SIGNALS = (
    "constant", "ramp", "sine 0.1 Hz", "sine 0.5 Hz", "sine 2 Hz", "square 0.25 Hz",
    "square 1 Hz", "square 5 Hz", "pulses @250 Hz", "pulses @1 kHz", "pump", "telegraph",
    "spikes",
)
NOISES = ("white", "flat to 5 Hz", "flat to 30 Hz", "flat to 100 Hz", "hum + white", "t3")
WINDOWS = (0.5, 1.0, 5.0, 30.0)
BAND_HZ = {"flat to 5 Hz": 5.0, "flat to 30 Hz": 30.0, "flat to 100 Hz": 100.0}


def sample_rate(signal: str) -> float:
    return 250.0 if signal == "pulses @250 Hz" else FS


def correlation_time(noise: str, fs: float) -> float:
    """Samples per noise correlation time: fs/2B for noise flat to B Hz, else 1."""
    b = BAND_HZ.get(noise)
    return fs / (2.0 * b) if b is not None else 1.0


def required(signal: str, noise: str, window_s: float) -> bool:
    """Does the cell's window hold at least 20 noise correlation times?"""
    fs = sample_rate(signal)
    return window_s * fs >= 20.0 * correlation_time(noise, fs)


def cells() -> list[tuple[str, str, float]]:
    out = []
    for s in SIGNALS:
        for z in NOISES:
            for w in WINDOWS:
                if round(w * sample_rate(s)) >= MIN_SAMPLES:
                    out.append((s, z, w))
    return out


# --- signals: (R, n) arrays, vectorised over the realisations -----------------------------------


def _pulses(t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    # Frequency wandering over 15–20 Hz (a paddle wheel whose flow changes), 30 % duty.
    r = t.shape[0]
    ph0 = rng.random((r, 1))
    wander = 2 * np.pi * rng.random((r, 1))
    f = 17.5 + 2.5 * np.sin(2 * np.pi * t / 7.0 + wander)
    dt = t[0, 1] - t[0, 0]
    phase = ph0 + np.cumsum(f, axis=1) * dt
    return 5.0 * (np.mod(phase, 1.0) < 0.3)


def _pump(t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    # Cycles of 3 s: running 2 s, off 1 s, random phase. Start: direct-on-line inrush of 6×
    # the running current decaying with τ = 0.15 s; stop: the current decays with τ = 0.05 s.
    r = t.shape[0]
    run = AMP
    tc = np.mod(t + 3.0 * rng.random((r, 1)), 3.0)
    on = tc < 2.0
    inrush = run * (1.0 + 5.0 * np.exp(-tc / 0.15))
    off = run * (1.0 + 5.0 * math.exp(-2.0 / 0.15)) * np.exp(-(tc - 2.0) / 0.05)
    return np.where(on, inrush, off)


def _telegraph(n: int, r: int, fs: float, rng: np.random.Generator) -> np.ndarray:
    flips = rng.random((r, n)) < 2.0 / fs  # 2 switches per second (Poisson)
    start = rng.integers(0, 2, (r, 1))
    level = (np.cumsum(flips, axis=1) + start) % 2
    return AMP * (level - 0.5)


def _spikes(n: int, r: int, fs: float, rng: np.random.Generator) -> np.ndarray:
    hit = rng.random((r, n)) < 3.0 / fs
    size = rng.uniform(10 * SIGMA, 100 * SIGMA, (r, n)) * rng.choice([-1.0, 1.0], (r, n))
    return np.where(hit, size, 0.0)


def make_signal(name: str, n: int, r: int, rng: np.random.Generator) -> np.ndarray:
    fs = sample_rate(name)
    t = np.broadcast_to(np.arange(n) / fs, (r, n))
    ph = 2 * np.pi * rng.random((r, 1))
    if name == "constant":
        return np.ones((r, n))
    if name == "ramp":
        return 1.0 + 5 * SIGMA * (t + 30.0 * rng.random((r, 1)))
    if name.startswith("sine"):
        f = float(name.split()[1])
        return AMP * np.sin(2 * np.pi * f * t + ph)
    if name.startswith("square"):
        f = float(name.split()[1])
        return 0.5 * AMP * np.where(np.sin(2 * np.pi * f * t + ph) >= 0, 1.0, -1.0)
    if name.startswith("pulses"):
        return _pulses(t, rng)
    if name == "pump":
        return _pump(t, rng)
    if name == "telegraph":
        return _telegraph(n, r, fs, rng)
    if name == "spikes":
        return _spikes(n, r, fs, rng)
    raise KeyError(name)


def make_noise(name: str, n: int, r: int, fs: float, rng: np.random.Generator) -> np.ndarray:
    """Noise of standard deviation SIGMA (in expectation), (R, n)."""
    if name == "white":
        return SIGMA * rng.standard_normal((r, n))
    if name in BAND_HZ:
        # Ideal band limit: flat spectrum up to B, nothing above (FFT of white noise with the
        # bins above B zeroed; the kept share of the variance is restored by the scale).
        spec = np.fft.rfft(rng.standard_normal((r, n)), axis=1)
        keep = np.fft.rfftfreq(n, 1.0 / fs) <= BAND_HZ[name]
        spec[:, ~keep] = 0.0
        x = np.fft.irfft(spec, n, axis=1)
        # E[x²] = (Σ_k w_k |keep_k|)/n with w = 1 at DC and Nyquist, 2 elsewhere (Parseval)
        w = np.full(keep.size, 2.0)
        w[0] = 1.0
        if n % 2 == 0:
            w[-1] = 1.0
        return SIGMA * x / math.sqrt(float((w * keep).sum()) / n)
    if name == "hum + white":
        # equal variances: a 50 Hz sine of amplitude σ (variance σ²/2) and white of σ/√2
        t = np.arange(n) / fs
        hum = SIGMA * np.sin(2 * np.pi * 50.0 * t + 2 * np.pi * rng.random((r, 1)))
        return hum + SIGMA / math.sqrt(2.0) * rng.standard_normal((r, n))
    if name == "t3":
        return SIGMA / math.sqrt(3.0) * rng.standard_t(3, (r, n))
    raise KeyError(name)


def realisations(signal: str, noise: str, window_s: float, r: int, seed: int) -> np.ndarray:
    """(R, n) records: signal + noise, fixed seed per cell."""
    fs = sample_rate(signal)
    n = int(round(window_s * fs))
    rng = np.random.default_rng(
        [seed, SIGNALS.index(signal), NOISES.index(noise), WINDOWS.index(window_s)]
    )
    return make_signal(signal, n, r, rng) + make_noise(noise, n, r, fs, rng)


@dataclass
class CellResult:
    ratios: np.ndarray  # σ̂/σ per realisation
    reliable: np.ndarray  # bool per realisation
    reasons: list[str | None]

    @property
    def median(self) -> float:
        return float(np.median(self.ratios))


def run_cell(
    signal: str, noise: str, window_s: float, r: int, seed: int = 8,
    estimator: Callable | None = None,
) -> CellResult:
    est_fn = estimator or estimate_noise
    x = realisations(signal, noise, window_s, r, seed)
    fs = sample_rate(signal)
    ratios, rel, why = [], [], []
    for row in x:
        e = est_fn(row, fs)
        ratios.append(e.sigma / SIGMA)
        rel.append(bool(getattr(e, "reliable", True)))
        why.append(getattr(e, "reason", None))
    return CellResult(np.array(ratios), np.array(rel), why)


def limits(noise: str) -> tuple[float, float]:
    return (0.80, 1.15) if noise == "t3" else (0.85, 1.15)


# --- the tests ----------------------------------------------------------------------------------

REALISATIONS = 6
#: Cells with at least 20 correlation times where the estimate today answers only "not
#: reliable" (measured; see the README's adaptive-band section): an honest answer, but not
#: yet the right one — issue 8 asks for a value here. Shrink this set; never grow it.
KNOWN_UNRELIABLE: set[tuple[str, str, float]] = {
    # noise flat to 30 Hz (17 samples per correlation time) in 0.5 and 1 s windows, and flat
    # to 5 Hz in 5 s windows: 20-60 correlation times, where the segment fit needs a few long
    # segments and one of them decides (see noise.py, _K_RELIABLE); and smooth signals that
    # move on the noise's own time scale (a 0.5 or 2 Hz sine under noise flat to 5 or 30 Hz,
    # the pump's inrush under noise flat to 5 Hz), which a local fit cannot separate
    ('constant', 'flat to 5 Hz', 5.0),
    ('constant', 'flat to 30 Hz', 0.5),
    ('constant', 'flat to 30 Hz', 1.0),
    ('ramp', 'flat to 5 Hz', 5.0),
    ('ramp', 'flat to 30 Hz', 0.5),
    ('ramp', 'flat to 30 Hz', 1.0),
    ('sine 0.1 Hz', 'flat to 30 Hz', 0.5),
    ('sine 0.1 Hz', 'flat to 30 Hz', 1.0),
    ('sine 0.5 Hz', 'flat to 5 Hz', 5.0),
    ('sine 0.5 Hz', 'flat to 5 Hz', 30.0),
    ('sine 0.5 Hz', 'flat to 30 Hz', 0.5),
    ('sine 0.5 Hz', 'flat to 30 Hz', 1.0),
    ('sine 0.5 Hz', 'flat to 100 Hz', 0.5),
    ('sine 2 Hz', 'flat to 5 Hz', 5.0),
    ('sine 2 Hz', 'flat to 5 Hz', 30.0),
    ('sine 2 Hz', 'flat to 30 Hz', 0.5),
    ('sine 2 Hz', 'flat to 30 Hz', 1.0),
    ('sine 2 Hz', 'flat to 30 Hz', 5.0),
    ('sine 2 Hz', 'flat to 30 Hz', 30.0),
    ('square 0.25 Hz', 'flat to 5 Hz', 5.0),
    ('square 0.25 Hz', 'flat to 30 Hz', 0.5),
    ('square 0.25 Hz', 'flat to 30 Hz', 1.0),
    ('square 0.25 Hz', 'flat to 100 Hz', 0.5),
    ('square 1 Hz', 'flat to 30 Hz', 0.5),
    ('square 1 Hz', 'flat to 30 Hz', 1.0),
    ('square 5 Hz', 'flat to 5 Hz', 5.0),
    ('square 5 Hz', 'flat to 30 Hz', 0.5),
    ('square 5 Hz', 'flat to 30 Hz', 1.0),
    ('square 5 Hz', 'flat to 100 Hz', 0.5),
    ('pulses @250 Hz', 'flat to 5 Hz', 5.0),
    ('pulses @250 Hz', 'flat to 30 Hz', 1.0),
    ('pulses @1 kHz', 'flat to 30 Hz', 0.5),
    ('pulses @1 kHz', 'flat to 30 Hz', 1.0),
    ('pump', 'flat to 5 Hz', 5.0),
    ('pump', 'flat to 5 Hz', 30.0),
    ('pump', 'flat to 30 Hz', 0.5),
    ('pump', 'flat to 30 Hz', 1.0),
    ('telegraph', 'flat to 30 Hz', 0.5),
    ('telegraph', 'flat to 30 Hz', 1.0),
    ('spikes', 'flat to 30 Hz', 0.5),
    ('spikes', 'flat to 30 Hz', 1.0),
}
#: Cells where the median of the reliable realisations is measured just outside the band
#: (checked only for "never silently wrong"): none today.
KNOWN_OFF: set[tuple[str, str, float]] = set()


@pytest.mark.parametrize(("signal", "noise", "window_s"), cells())
def test_matrix_cell(signal: str, noise: str, window_s: float) -> None:
    res = run_cell(signal, noise, window_s, REALISATIONS)
    lo, hi = limits(noise)
    # Never silently wrong by a large factor: a realisation called reliable lies within a
    # factor of 1.5 of the truth (the band of the issue applies to the median; a single short
    # window of a coloured noise has a spread of its own: about ±sqrt(1/(2·N)) in σ for N
    # correlation times, the chi-square spread of a variance, any statistics text).
    rel = res.ratios[res.reliable]
    assert np.all((rel > 1 / 1.5) & (rel < 1.5)), (res.ratios.tolist(), res.reasons)
    if 2 * rel.size >= res.ratios.size and (signal, noise, window_s) not in KNOWN_OFF:
        # Truth: SIGMA by construction; the band of the issue, on the median over the
        # realisations (those called reliable, when they are at least half).
        med = float(np.median(rel))
        assert lo <= med <= hi, (res.ratios.tolist(), res.reasons)
    if required(signal, noise, window_s) and (signal, noise, window_s) not in KNOWN_UNRELIABLE:
        assert rel.size, f"no reliable estimate in a cell that must have one: {res.reasons}"
    # An unreliable estimate always carries its reason.
    assert all(w for w, r_ in zip(res.reasons, res.reliable) if not r_)
