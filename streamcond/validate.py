"""Everything that can be known about a config before it runs: the one deep check.

The pydantic models (:mod:`streamcond.config`) check each key on its own. Some settings can
only be judged together with the sample rate (a low-pass cutoff, a noise window in samples) or
against the machine (a certificate file that cannot be read). This module checks those by
doing what a run would do: it *builds* every channel's chain at the configured rate — or, for a
running daemon, at the rate it has measured — and feeds each one a short synthetic block, and it
opens the files the MQTT client will need. ``check``, the start of ``replay`` and ``run``, and
the daemon's reload all call :func:`validate`; the pipeline builds its channels with
:func:`start_channels`, so the run and the check cannot disagree.

Every problem is one plain sentence naming the key (:class:`streamcond.errors.ConfigError`,
exit code 2); nothing here raises anything else.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from .config import Config, FixedBand
from .errors import ConfigError

if TYPE_CHECKING:  # the core is imported only when a rate is known (``check`` starts fast)
    from .core.channel import ChannelConditioner

#: A noise window longer than this many samples is refused: the tracker keeps the whole window
#: in memory (8 bytes a sample: 128 MiB), which a small board does not have to spare.
MAX_WINDOW_SAMPLES = 1 << 24

#: Samples of the synthetic trial block fed to each channel (a ramp across its band and back).
TRIAL_SAMPLES = 512

#: Errors a chain can raise on impossible numbers (an overflow to infinity turned into an int,
#: a division by a rate that rounds to zero, a filter design that fails).
_NUMERIC = (ValueError, ArithmeticError, MemoryError, IndexError)


def _sentence(cfg: Config, i: int, e: BaseException, fs: float, rate_from: str) -> str:
    where = f"channel[{i}]"
    msg = str(e).strip() or type(e).__name__
    if "{at}" in msg:
        return msg.replace("{at}", where)
    if isinstance(e, (ArithmeticError, MemoryError)):
        return (f"{where} cannot run at {fs:g} Hz ({rate_from}): its numbers go out of range "
                f"({type(e).__name__}: {msg.rstrip('.')})")
    f = cfg.channel[i].filter
    params = ", ".join(f"{k} = {v:g}" if isinstance(v, float) else f"{k} = {v}"
                       for k, v in f.model_dump().items() if k != "kind")
    return f"{where}.filter: {msg.rstrip('.')} ({f.kind}, {params}, at {fs:g} Hz, {rate_from})"


def _window_problems(cfg: Config, fs: float, rate_from: str) -> list[str]:
    out = []
    for i, ch in enumerate(cfg.channel):
        if isinstance(ch.band, FixedBand):
            key, window_s = "stats.noise_window_s", cfg.stats.noise_window_s
        else:
            key, window_s = f"channel[{i}].band.window_s", ch.band.window_s
        n = window_s * fs
        if n > MAX_WINDOW_SAMPLES:
            out.append(
                f"{key} ({window_s:g} s) holds {n:.3g} samples of channel[{i}] at {fs:g} Hz "
                f"({rate_from}); at most {MAX_WINDOW_SAMPLES:,} fit in memory"
            )
    return list(dict.fromkeys(out))


def start_channels(
    cfg: Config, sample_rate_hz: float, rate_from: str = "source.sample_rate_hz"
) -> list[ChannelConditioner]:
    """Every channel's conditioning chain at ``sample_rate_hz``.

    :raises ConfigError: one sentence per channel that cannot be built, naming its key.
    """
    from .core.channel import ChannelConditioner

    fs = float(sample_rate_hz)
    problems = _window_problems(cfg, fs, rate_from)
    if problems:
        raise ConfigError(problems)
    channels = []
    for i, ch in enumerate(cfg.channel):
        try:
            channels.append(ChannelConditioner(ch, fs, cfg.stats))
        except _NUMERIC as e:
            problems.append(_sentence(cfg, i, e, fs, rate_from))
    if problems:
        raise ConfigError(problems)
    return channels


def _trial(cfg: Config, channels: list[Any], fs: float, rate_from: str) -> list[str]:
    """Feed each fresh chain a ramp across its band and back; the problems it raised."""
    import numpy as np

    n = TRIAL_SAMPLES
    t = np.arange(n, dtype=np.float64) / fs
    up = np.linspace(0.0, 1.0, n // 2)
    shape = np.concatenate((up, up[::-1], np.zeros(n - 2 * up.size)))
    out = []
    for i, (ch, conditioner) in enumerate(zip(cfg.channel, channels)):
        b = ch.band
        lo, hi = (b.low, b.high) if isinstance(b, FixedBand) else (b.center - 1.0, b.center + 1.0)
        span = hi - lo
        value = (lo - span) + 3.0 * span * shape  # from below the band to above it and back
        raw = (value - ch.offset) / ch.gain
        try:
            with np.errstate(all="ignore"):
                conditioner.process(t, raw)
        except _NUMERIC as e:
            out.append(_sentence(cfg, i, e, fs, rate_from))
    return out


def _file_problems(cfg: Config) -> list[str]:
    """The MQTT client's files: present, readable, and (for TLS) usable as such."""
    mq = cfg.output.mqtt
    if mq is None:
        return []
    out = []
    for key in ("password_file", "ca_file", "cert_file", "key_file"):
        path = getattr(mq, key)
        if path is None:
            continue
        try:
            with open(path, "rb") as f:
                f.read(1)
        except IsADirectoryError:
            out.append(f"output.mqtt.{key} {path!r} is a directory, not a file")
        except OSError as e:
            out.append(f"output.mqtt.{key} {path!r} cannot be read: {e.strerror or e}")
    if mq.key_file is not None and mq.cert_file is None:
        out.append("output.mqtt.key_file is set without output.mqtt.cert_file (the client "
                   "certificate it belongs to)")
    if out or (mq.ca_file is None and mq.cert_file is None):
        return out
    import ssl

    try:
        ctx = ssl.create_default_context(ssl.Purpose.SERVER_AUTH, cafile=mq.ca_file)
    except (ssl.SSLError, ValueError) as e:
        return [f"output.mqtt.ca_file {mq.ca_file!r} holds no usable CA certificate ({e})"]
    if mq.cert_file is not None:
        try:
            ctx.load_cert_chain(mq.cert_file, mq.key_file)
        except (ssl.SSLError, ValueError) as e:
            where = "cert_file" if mq.key_file is None else "cert_file and key_file"
            out.append(f"output.mqtt.{where} do not hold a usable client certificate and "
                       f"private key ({e})")
    return out


def validate(
    cfg: Config,
    measured_rate_hz: float | None = None,
    *,
    files: bool = True,
) -> None:
    """Check everything about ``cfg`` that can be known without running it.

    The channels are built and tried at ``source.sample_rate_hz`` or, when that is not set, at
    ``measured_rate_hz`` (the rate a running pipeline has measured); with neither, only the
    checks that need no rate are made. ``files``: also check the MQTT client's files.

    :raises ConfigError: one sentence per problem, each naming its key.
    """
    problems: list[str] = _file_problems(cfg) if files else []
    fs = cfg.source.sample_rate_hz
    rate_from = "source.sample_rate_hz"
    if fs is None and measured_rate_hz:
        fs, rate_from = float(measured_rate_hz), "the measured sample rate"
    if fs is not None:
        try:
            channels = start_channels(cfg, fs, rate_from)
        except ConfigError as e:
            problems.extend(e.messages)
        else:
            problems.extend(_trial(cfg, channels, fs, rate_from))
    if problems:
        raise ConfigError(problems)
