"""What a recording tells the circuit: the band, σ̂ and ν0, in volts at the comparator input.

The band is the one ``tune`` suggests for the channel (or the configured one), in the
channel's units; the channel maps raw → value as value = gain·raw + offset, and
``--volts-per-raw`` says how many volts at the comparator input one raw unit is (1: the raw
value is volts; 0.15 for a 4–20 mA loop read across a 150 Ω shunt, with raw in mA). So

    volts = (value − offset)/gain · volts_per_raw,   σ_volts = σ/|gain| · |volts_per_raw|.

A negative gain (or factor) turns the band over: the lower threshold in volts is then the
upper one in the channel's units, and the output's sense flips with it.

Two noise figures are kept: σ̂ and ν0 of the conditioned signal (after the prefilter, what
``tune`` reports), and of the scaled signal before the prefilter. A hardware comparator sees the
first only when its input is filtered alike — an RC matching an ``ema`` or a first-order
``lowpass`` (:mod:`.rcfilter`); otherwise it sees the second, and the margin is taken from it.

Everything this package needs from ``tune`` comes through :func:`_tune`, the one place that
imports it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from ..errors import InputError


def _tune() -> Any:
    """The tune analysis module: the one import of it in this package.

    Used from it: ``run(config, recording, channel, target_rate) -> (result, data)`` with
    ``result.suggestion`` (``width``, ``center``), ``result.sigma``, ``.nu0_hz``,
    ``.filter_text``, ``.target_rate_per_hour``, ``.plateau`` (``width_max``), ``.samples``,
    ``.duration_s``, and ``data.channel``, ``.v``, ``.good``, ``.fs``;
    ``rice_rate_per_hour(width, sigma, nu0_hz)``; ``DEFAULT_TARGET_RATE_PER_HOUR``.
    """
    from .. import tune

    return tune


def rice_rate_per_hour(half_width: float, sigma: float, nu0_hz: float) -> float:
    """Rice's up-crossing rate past ``half_width`` above the mean, per hour (tune's formula)."""
    return float(_tune().rice_rate_per_hour(2.0 * half_width, sigma, nu0_hz))


def default_target_rate() -> float:
    return float(_tune().DEFAULT_TARGET_RATE_PER_HOUR)


@dataclass
class Evidence:
    """The band and the noise of one channel, in the channel's units and at the input."""

    channel: str
    unit: str
    band_from: str  # "suggested" | "configured"
    low: float  # the band, channel units
    high: float
    sigma: float  # σ̂ after the prefilter, channel units
    nu0_hz: float
    sigma_unfiltered: float  # σ̂ before the prefilter
    nu0_unfiltered_hz: float
    filter_kind: str
    filter_params: dict[str, Any]
    filter_text: str
    gain: float
    offset: float
    volts_per_raw: float
    target_rate_per_hour: float
    plateau_width_max: float | None  # widest band that still counted the real transitions
    samples: int
    duration_s: float
    #: whether each noise estimate could tell the noise from the signal (DESIGN: "reliable"
    #: and "reason" of estimate_noise), as (filtered, unfiltered); None: the estimate says not
    unreliable: tuple[str | None, str | None] = (None, None)

    def to_volts(self, value: float) -> float:
        return (value - self.offset) / self.gain * self.volts_per_raw

    @property
    def scale(self) -> float:
        """Volts at the input per channel unit (signed)."""
        return self.volts_per_raw / self.gain

    @property
    def band_volts(self) -> tuple[float, float]:
        a, b = self.to_volts(self.low), self.to_volts(self.high)
        return (a, b) if a <= b else (b, a)

    @property
    def center_volts(self) -> float:
        return self.to_volts((self.low + self.high) / 2.0)

    def noise_volts(self, filtered: bool) -> tuple[float, float]:
        s = self.sigma if filtered else self.sigma_unfiltered
        nu = self.nu0_hz if filtered else self.nu0_unfiltered_hz
        return s * abs(self.scale), nu


def from_recording(config_path: str, recording: str, channel: str, configured: bool,
                   volts_per_raw: float, target_rate_per_hour: float | None) -> Evidence:
    """Run the tune analysis on ``channel`` of ``recording`` and collect the evidence."""
    from ..config import FixedBand
    from ..core.noise import estimate_noise

    if not (math.isfinite(volts_per_raw) and volts_per_raw != 0):
        raise InputError("--volts-per-raw must be a number other than 0")
    tune = _tune()
    res, data = tune.run(config_path, recording, channel, target_rate_per_hour)
    ch = data.channel
    if configured:
        if not isinstance(ch.band, FixedBand):
            raise InputError(
                f"Channel {ch.name!r} has an adaptive band, which has no fixed thresholds to "
                f"build in hardware; leave out --configured to use the band tune suggests"
            )
        low, high, src = float(ch.band.low), float(ch.band.high), "configured"
    else:
        s = res.suggestion
        if s.width is None:
            raise InputError(
                f"tune suggests no band for channel {ch.name!r} on this recording (run "
                f"`streamcond tune` for why); give --configured to use the configured band, or "
                f"--low and --high"
            )
        low, high, src = s.center - s.width / 2.0, s.center + s.width / 2.0, "suggested"
    v = data.vg
    raw_est = estimate_noise(v, data.fs)
    filt_est = estimate_noise(data.yg, data.fs) if hasattr(data, "yg") else None

    def why(est: Any) -> str | None:
        if est is None or getattr(est, "reliable", True):
            return None
        return str(getattr(est, "reason", None) or "the estimate is marked unreliable")

    params = ch.filter.model_dump()
    kind = params.pop("kind")
    return Evidence(
        channel=ch.name,
        unit=ch.unit,
        band_from=src,
        low=low,
        high=high,
        sigma=res.sigma,
        nu0_hz=res.nu0_hz,
        sigma_unfiltered=float(raw_est.sigma),
        nu0_unfiltered_hz=float(raw_est.nu0_hz),
        filter_kind=kind,
        filter_params=params,
        filter_text=res.filter_text,
        gain=float(ch.gain),
        offset=float(ch.offset),
        volts_per_raw=float(volts_per_raw),
        target_rate_per_hour=res.target_rate_per_hour,
        plateau_width_max=None if res.plateau is None else float(res.plateau.width_max),
        samples=res.samples,
        duration_s=res.duration_s,
        unreliable=(why(filt_est), why(raw_est)),
    )
