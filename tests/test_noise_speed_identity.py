"""The optimised noise estimate returns the same figures, bit for bit, as the plain one.

``streamcond.core.noise.estimate_noise`` skips work whose outcome is known and uses cheaper
numpy calls for the same values (see ``_scale_fit``). The reference is the frozen copy of the
straightforward implementation in ``tests/noise_reference.py``; both run on a seeded corpus of
white, Butterworth-coloured (scipy.signal.butter) and heavy-tailed (Student t, Cauchy) noise,
under sines, ramps, square waves, pulse trains, spikes, steps, bursts and a chirp, and on degenerate
records (constant, a few ulps of variation, one deviant sample, quantised counts), at lengths
from MIN_SAMPLES up. σ̂ and ν0 are compared as float.hex, so even a last-bit or a signed-zero
difference fails.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

import noise_reference as ref
from streamcond.core.noise import MIN_SAMPLES, estimate_noise

FS = 1000.0


def _noise(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    if kind == "white":
        return rng.standard_normal(n)
    if kind.startswith("lp"):  # 4th-order Butterworth low-pass at a fraction of fs
        sos = signal.butter(4, FS * float(kind[2:]), fs=FS, output="sos")
        return signal.sosfilt(sos, rng.standard_normal(n + 3000))[3000:]
    if kind == "t3":
        return rng.standard_t(3.0, n)
    if kind == "cauchy":
        return rng.standard_cauchy(n)
    if kind == "counts":  # an ADC's whole counts: many equal values
        return np.round(0.7 * rng.standard_normal(n))
    raise KeyError(kind)


def _signal(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    t = np.arange(n) / FS
    amp = float(rng.choice([0.5, 5.0, 40.0]))
    if kind == "none":
        return np.zeros(n)
    if kind == "sine":
        return amp * np.sin(2 * np.pi * t / float(rng.choice([0.2, 1.0, 5.0])) + 0.3)
    if kind == "ramp":
        return amp * t
    if kind == "square":
        return 0.5 * amp * np.sign(np.sin(2 * np.pi * t / float(rng.choice([0.05, 1.0])) + 0.1))
    if kind == "pulses":
        return amp * ((np.arange(n) % 37) < 9)
    if kind == "spikes":
        out = np.zeros(n)
        hit = rng.random(n) < 0.005
        out[hit] = 10 * amp * rng.choice([-1.0, 1.0], hit.sum())
        return out
    if kind == "steps":
        out = np.zeros(n)
        for _ in range(3):
            out[int(rng.integers(0, n)) :] += amp * rng.standard_normal()
        return out
    if kind == "burst":
        out = np.zeros(n)
        s = int(rng.integers(0, n - 40))
        out[s : s + 30] = amp * rng.standard_normal()
        return out
    if kind == "chirp":  # a sweep up into the noise's own band
        return amp * signal.chirp(t, 0.1, t[-1], 50.0)
    raise KeyError(kind)


NOISES = ["white", "lp0.1", "lp0.02", "lp0.005", "t3", "cauchy", "counts"]
SIGNALS = ["none", "sine", "ramp", "square", "pulses", "spikes", "steps", "burst", "chirp"]
LENGTHS = [MIN_SAMPLES, MIN_SAMPLES + 1, 159, 255, 257, 1000, 1023, 2049, 4999, 5000, 6001]


def _degenerate(n: int, rng: np.random.Generator) -> list[np.ndarray]:
    lvl = 11.0
    one = np.full(n, lvl)
    one[int(rng.integers(0, n))] += 1.0
    spiked = 0.01 * rng.standard_normal(n)
    spiked[int(rng.integers(0, n))] = 1e13
    return [
        np.full(n, lvl),  # no variation at all
        lvl + np.spacing(lvl) * rng.integers(-3, 4, n),  # a few ulps: rounding, not noise
        one,  # a single deviant sample
        np.round(0.3 * rng.standard_normal(n)),  # mostly one value
        np.arange(n, dtype=float),  # a pure ramp
        1e150 * rng.standard_normal(n),  # huge and tiny scales
        1e-150 * rng.standard_normal(n),
        1e300 * rng.standard_normal(n),  # beyond 2^±400: scaled by a power of two first
        1e-300 * rng.standard_normal(n),
        spiked,  # one glitch far above the noise: it must not set the rounding floor
    ]


def _corpus() -> list[tuple[str, np.ndarray]]:
    cases = []
    for i, n in enumerate(LENGTHS):
        rng = np.random.default_rng([2026, i])
        for nk in NOISES:
            sk = SIGNALS[int(rng.integers(len(SIGNALS)))]
            z = _noise(nk, n, rng)
            cases.append((f"{nk}+{sk} n={n}", 11.0 + 0.05 * z / z.std() + 0.05 * _signal(sk, n, rng)))
        cases += [(f"degenerate {j} n={n}", x) for j, x in enumerate(_degenerate(n, rng))]
    # A sine that the cubic stops following where the noise is only just reached (the
    # "signal moves on the noise's own time scale" answer): found by trying, seeds fixed.
    for n in (1000, 5000):
        z = _noise("lp0.1", n, np.random.default_rng([7, n]))
        s = 0.5 * np.sin(2 * np.pi * np.arange(n) / FS / 0.2)
        cases.append((f"lp0.1+fast sine n={n}", 11.0 + 0.05 * z / z.std() + s))
    return cases


def _figures(est) -> tuple[str, str, bool, str | None]:
    return (float(est.sigma).hex(), float(est.nu0_hz).hex(), bool(est.reliable), est.reason)


CORPUS = _corpus()


@pytest.mark.parametrize("fs", [FS, 48_000.0])
def test_optimised_estimate_is_bit_identical_to_the_reference(fs: float) -> None:
    diffs = []
    for name, x in CORPUS:
        got, want = _figures(estimate_noise(x, fs)), _figures(ref.estimate_noise(x, fs))
        if got != want:
            diffs.append((name, got, want))
    assert not diffs, diffs[:5]


def test_corpus_reaches_every_kind_of_answer() -> None:
    # The comparison means something only if the corpus takes the estimator down each of its
    # paths: reliable answers, each reason for an unreliable one, and the zero answer.
    answers = {ref.estimate_noise(x, FS).reason for _, x in CORPUS}
    assert None in answers
    assert "the window is too short for the noise's correlation time" in answers
    assert "the signal moves on the noise's own time scale" in answers
    assert any(ref.estimate_noise(x, FS).sigma == 0.0 for _, x in CORPUS)


def test_input_layouts_give_the_same_figures_as_the_reference() -> None:
    # A strided view, float32 samples and a Python list reach the estimator as they are.
    rng = np.random.default_rng(7)
    x = 11.0 + 0.05 * rng.standard_normal(3000) + 0.2 * np.sin(np.arange(3000) / 300.0)
    wide = np.empty(2 * x.size)
    wide[::2] = x
    for variant in (wide[::2], x[::-1], x.astype(np.float32), x[:500].tolist()):
        assert _figures(estimate_noise(variant, FS)) == _figures(ref.estimate_noise(variant, FS))
