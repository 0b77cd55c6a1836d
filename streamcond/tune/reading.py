"""One channel of a recording as the pipeline sees it (the I/O edge of ``tune``): parser, sample
time, scaling, sensor faults and prefilter exactly as ``replay`` applies them."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..config import Channel, Config
from ..core import levels
from ..errors import ConfigError, InputError


@dataclass
class ChannelData:
    """One channel of a recording, as the pipeline sees it.

    Samples that are sensor faults (a raw value at or beyond the ``fault`` limits, or a level
    no sensor measures: :mod:`streamcond.core.levels`) are not levels: as in the channel
    chain, the prefilter, the noise estimate and the comparator see only the other samples
    (``good``), and ``y`` is NaN at the fault samples.
    """

    cfg: Config
    channel: Channel
    t: np.ndarray  # sample time, s (after the timebase: strictly increasing)
    raw: np.ndarray  # the recording's column, as read
    v: np.ndarray  # scaled: gain·raw + offset
    y: np.ndarray  # scaled and prefiltered (what the comparator sees); NaN at fault samples
    fs: float
    delay_s: float  # the prefilter's DC delay (0 unless compensate_delay)
    bad_lines: int = 0
    gaps: int = 0
    good: np.ndarray | None = None  # indices of the samples that are not faults (None: all)
    fault_samples: int = 0

    @property
    def yg(self) -> np.ndarray:
        """The conditioned samples the comparator sees (faults left out)."""
        return self.y if self.good is None else self.y[self.good]

    @property
    def vg(self) -> np.ndarray:
        """The scaled input at the samples that are levels (faults left out)."""
        return self.v if self.good is None else self.v[self.good]

    @property
    def vl(self) -> np.ndarray:
        """The scaled input with NaN at the fault samples (for pictures: a gap, not a value)."""
        if self.good is None:
            return self.v
        out = np.full(self.v.size, np.nan)
        out[self.good] = self.v[self.good]
        return out

    @property
    def tg(self) -> np.ndarray:
        return self.t if self.good is None else self.t[self.good]

    @property
    def segment_starts(self) -> np.ndarray:
        """Indices into ``yg`` where a stretch after a fault begins."""
        if self.good is None:
            return np.empty(0, dtype=np.int64)
        return np.flatnonzero(np.diff(self.good) > 1) + 1


def pick_channel(cfg: Config, name: str, config_path: str = "the config") -> Channel:
    for ch in cfg.channel:
        if ch.name == name:
            return ch
    names = ", ".join(c.name for c in cfg.channel)
    raise ConfigError(
        f"The config {config_path} has no channel named {name!r}; its channels are: {names}"
    )


def read_channel(cfg: Config, recording: str | Path, channel: Channel) -> ChannelData:
    """Read ``channel`` of ``recording`` (see :func:`read_channels`)."""
    return read_channels(cfg, recording, [channel])[0]


def read_channels(
    cfg: Config, recording: str | Path, channels: list[Channel]
) -> list[ChannelData]:
    """Read ``channels`` of ``recording`` in one pass through the replay's parser, timebase
    and each channel's prefilter.

    Plain recordings and captures made by ``streamcond record`` are read as ``replay`` reads
    them (a capture without a time in its data uses the recorded host times).
    """
    from ..core.channel import build_filter
    from ..core.noise import MIN_SAMPLES
    from ..core.timebase import Timebase
    from ..replay import check_columns, open_recording

    parser, blocks, host_time, _capture = open_recording(cfg, recording)
    src = cfg.source
    tcols: list[np.ndarray] = []
    vcols: list[np.ndarray] = []
    bad = 0
    checked = False
    ti: int | None = None
    vi: list[int] = []
    for parsed, _done, _size in blocks:
        bad += parsed.bad
        if parser.columns is None:
            continue
        if not checked:
            check_columns(cfg, parser.columns)
            checked = True
            if host_time:
                ti = len(parser.columns)  # the host time rides as an extra last column
            elif src.time_column:
                ti = parser.columns.index(src.time_column)
            vi = [parser.columns.index(ch.source_column) for ch in channels]
        if parsed.rows.shape[0]:
            vcols.append(parsed.rows[:, vi].copy())
            if ti is not None:
                tcols.append(parsed.rows[:, ti].copy())
    if parser.columns is None:
        raise InputError(f"The recording {str(recording)!r} holds no data lines")
    if not checked:
        check_columns(cfg, parser.columns)
    raws = np.concatenate(vcols) if vcols else np.empty((0, len(channels)))
    raw_t = np.concatenate(tcols) if tcols else (np.empty(0) if ti is not None else None)
    tb = Timebase(
        time_scale=1.0 if host_time else src.time_scale,
        sample_rate_hz=src.sample_rate_hz,
        has_time_column=ti is not None,
        gap_after_periods=src.gap_after_periods,
    )
    if not tb.ready:
        assert raw_t is not None
        # the whole recording is here: a short one uses the steps it has (as Pipeline.finish)
        if not tb.estimate(raw_t, final=True):
            raise InputError(
                f"The recording {str(recording)!r} has too few samples with increasing "
                f"times to tell the sample rate"
            )
    t, keep, gaps = tb.process(raw_t, raws.shape[0])
    if keep.size != raws.shape[0]:
        raws = raws[keep]
    assert tb.period is not None
    fs = 1.0 / tb.period
    out: list[ChannelData] = []
    for j, channel in enumerate(channels):
        raw = np.ascontiguousarray(raws[:, j])
        good: np.ndarray | None = None
        # the fault rule of the channel itself: limits, and levels no sensor measures
        v, bad_s = levels.scale(raw, float(channel.gain), float(channel.offset), channel.fault)
        if bad_s is not None and bad_s.any():
            good = np.flatnonzero(~bad_s)
        n_good = raw.size if good is None else good.size
        if n_good < MIN_SAMPLES:
            raise InputError(
                f"The recording {str(recording)!r} has {n_good} usable samples of channel "
                f"{channel.name!r}; tune needs at least {MIN_SAMPLES}"
            )
        filt = build_filter(channel, fs)
        if good is None:
            y = filt.process(v)
        else:
            y = np.full(raw.size, np.nan)
            y[good] = filt.process(v[good])
        delay = filt.delay_samples / fs if channel.compensate_delay else 0.0
        out.append(ChannelData(
            cfg, channel, t, raw, v, y, fs, delay, bad, len(gaps), good,
            raw.size - n_good,
        ))
    return out
