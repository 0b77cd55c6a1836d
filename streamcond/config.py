"""The configuration: one set of pydantic models, loaded from TOML with :mod:`tomllib`.

These models are the only definition of the config (DESIGN.md "Config (contract, TOML)").
Unknown keys are rejected everywhere (``extra="forbid"``) so that a typo is an error, not a
silently ignored setting. Turning validation errors into sentences is done in one place,
:mod:`streamcond.errors`.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from typing import Annotated, Any, Literal, Union

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    Tag,
    Discriminator,
    field_validator,
    model_validator,
)

NAME_PATTERN = r"^[A-Za-z0-9_-]+$"

#: Bounds that keep absurd-but-valid numbers out of the core (an overflow to infinity when a
#: duration is turned into a sample count, a period that rounds to nothing). A serial line
#: carries at most about 10^5 lines a second (1 Mbaud, ten bits a byte, ten bytes a line), so
#: 10^6 samples a second is a generous ceiling; 10^8 s is more than three years.
MAX_SAMPLE_RATE_HZ = 1e6
MAX_DURATION_S = 1e8


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Station(_Model):
    name: str = Field("streamcond", pattern=NAME_PATTERN)


class Source(_Model):
    """Where samples come from and how a line becomes a row."""

    kind: Literal["serial", "file"] = "file"
    # serial (pyserial): a device path or a pyserial URL
    port: str | None = None
    baud: int = Field(115200, gt=0)
    parity: Literal["N", "E", "O", "M", "S"] = "N"
    bytesize: Literal[5, 6, 7, 8] = 8
    stopbits: Literal[1, 1.5, 2] = 1
    max_line_bytes: int = Field(4096, ge=16)
    # file
    path: str | None = None
    # line format
    format: Literal["csv", "kv", "json"] = "csv"
    columns: list[Annotated[str, Field(min_length=1)]] | None = None
    time_column: str | None = None
    time_scale: float = Field(1.0, gt=0, le=1e6)
    sample_rate_hz: float | None = Field(None, gt=0, le=MAX_SAMPLE_RATE_HZ)
    #: A step in sample time larger than this many nominal sample periods is a gap.
    gap_after_periods: float = Field(3.0, gt=1)

    @field_validator("columns")
    @classmethod
    def _unique_columns(cls, v: list[str] | None) -> list[str] | None:
        if v is not None and len(set(v)) != len(v):
            raise ValueError("must not name a column twice")
        return v

    @property
    def host_time(self) -> bool:
        """No time column and no fixed rate: sample time is the host receive time."""
        return self.time_column is None and self.sample_rate_hz is None

    @model_validator(mode="after")
    def _needs_time(self) -> "Source":
        # Without time_column and sample_rate_hz, sample time is the host receive time: the
        # live serial source and captures made by `streamcond record` carry it; a plain
        # recording does not, which replay reports when it opens one.
        if self.kind == "serial" and not self.port:
            raise ValueError("source.port is required when source.kind is \"serial\"")
        if self.columns is not None and self.time_column is not None:
            if self.time_column not in self.columns:
                raise ValueError(
                    f"source.time_column {self.time_column!r} is not one of source.columns"
                )
        return self


# --- prefilters -------------------------------------------------------------------------------


class NoFilter(_Model):
    kind: Literal["none"] = "none"


class MovingAverageFilter(_Model):
    kind: Literal["moving_average"]
    window: int = Field(ge=1, le=100_000)


class MedianFilter(_Model):
    kind: Literal["median"]
    window: int = Field(ge=1, le=10_001)


class EmaFilter(_Model):
    kind: Literal["ema"]
    tau_s: float = Field(gt=0, le=MAX_DURATION_S)


class LowpassFilter(_Model):
    kind: Literal["lowpass"]
    cutoff_hz: float = Field(gt=0, le=MAX_SAMPLE_RATE_HZ)
    order: int = Field(2, ge=1, le=8)


FilterSpec = Annotated[
    Union[NoFilter, MovingAverageFilter, MedianFilter, EmaFilter, LowpassFilter],
    Field(discriminator="kind"),
]


# --- band -------------------------------------------------------------------------------------


class FixedBand(_Model):
    """A fixed hysteresis band, given as low/high or as center/width."""

    mode: Literal["fixed"] = "fixed"
    low: float
    high: float

    @model_validator(mode="before")
    @classmethod
    def _from_center(cls, data: Any) -> Any:
        if isinstance(data, dict) and ("center" in data or "width" in data):
            from .errors import suggestion

            data = dict(data)
            for k in data:
                if k not in ("mode", "low", "high", "center", "width"):
                    # a typo beside center/width is the problem, not a missing key
                    hint = suggestion(str(k), ("low", "high", "center", "width"))
                    raise ValueError(f"{{at}}.{k} is not a known setting{hint}")
            if "low" in data or "high" in data:
                raise ValueError("{at} takes either low and high, or center and width, not both")
            if "center" not in data or "width" not in data:
                raise ValueError("{at} needs both center and width (or low and high)")
            c, w = data.pop("center"), data.pop("width")
            if not isinstance(c, (int, float)) or not isinstance(w, (int, float)):
                raise ValueError("{at}.center and {at}.width must be numbers")
            if w <= 0:
                raise ValueError("{at}.width must be greater than 0")
            data["low"] = c - w / 2.0
            data["high"] = c + w / 2.0
        return data

    @model_validator(mode="after")
    def _ordered(self) -> "FixedBand":
        if not (math.isfinite(self.low) and math.isfinite(self.high)):
            raise ValueError("{at}.low and {at}.high must be finite numbers")
        if not self.low < self.high:
            raise ValueError(f"{{at}}.low ({self.low:g}) must be below {{at}}.high ({self.high:g})")
        return self

    @property
    def center(self) -> float:
        return (self.low + self.high) / 2.0

    @property
    def width(self) -> float:
        return self.high - self.low


class AdaptiveBand(_Model):
    """A band of width clamp(k·σ̂, min_width, max_width) around ``center``, σ̂ measured live."""

    mode: Literal["adaptive"]
    center: float
    k: float = Field(6.0, gt=0)
    window_s: float = Field(5.0, gt=0, le=MAX_DURATION_S)
    min_width: float = Field(0.0, ge=0)
    max_width: float | None = Field(None, gt=0)
    #: Width in force before the first reliable noise estimate (warm-up); without it no
    #: decisions are made until then (min_width is a clamp, not a guess for the start).
    initial_width: float | None = Field(None, gt=0)

    @model_validator(mode="after")
    def _ordered(self) -> "AdaptiveBand":
        if self.max_width is not None and self.max_width < self.min_width:
            raise ValueError("{at}.max_width must not be below {at}.min_width")
        return self


def _band_mode(v: Any) -> str:
    if isinstance(v, dict):
        return v.get("mode", "fixed")
    return getattr(v, "mode", "fixed")


BandSpec = Annotated[
    Union[Annotated[FixedBand, Tag("fixed")], Annotated[AdaptiveBand, Tag("adaptive")]],
    Discriminator(_band_mode),
]


class Dwell(_Model):
    """Time qualification: how long the signal must stay past a threshold before an edge counts."""

    rise_s: float = Field(0.0, ge=0, le=MAX_DURATION_S)
    fall_s: float = Field(0.0, ge=0, le=MAX_DURATION_S)


RATE_PER_S = {"s": 1.0, "min": 60.0, "h": 3600.0}


class Measure(_Model):
    """What a channel's edges mean: frequency, duty, counts (a ``measure`` record per stats
    window, optionally one per rising edge)."""

    frequency: bool = True
    duty: bool = True
    count: bool = True
    #: also a record at every rising edge (instantaneous period and frequency)
    per_edge: bool = False
    #: K-factor: pulses per unit of quantity (a flow meter's pulses per litre)
    pulses_per_unit: float | None = Field(None, gt=0)
    #: name of that quantity's unit ("L", "m3", "kWh")
    quantity_unit: str = ""
    #: pulses per revolution of a shaft: gives a speed in rpm
    pulses_per_rev: float | None = Field(None, gt=0)
    #: the rate is given per "s", "min" or "h" (default "min": L/min, rpm)
    rate_per: Literal["s", "min", "h"] = "min"
    #: no rising edge for longer than this: the rate is 0 (a stopped shaft is 0 rpm)
    stale_s: float = Field(2.0, gt=0, le=MAX_DURATION_S)

    @model_validator(mode="after")
    def _one_scale(self) -> "Measure":
        if self.pulses_per_unit is not None and self.pulses_per_rev is not None:
            raise ValueError("{at} takes pulses_per_unit or pulses_per_rev, not both")
        return self


#: Named fault presets. NAMUR NE 43 (from memory): 3.8–20.5 mA is measurement, ≤ 3.6 mA or
#: ≥ 21.0 mA signals a failed transmitter; between those is out of range but not a failure.
FAULT_PRESETS: dict[str, tuple[float, float]] = {"namur_ne43": (3.6, 21.0)}


class Fault(_Model):
    """Raw values (before gain/offset) at or beyond which the sample is a sensor fault, not a
    level: while in fault the comparator holds its level and fires no edges. (A scaled level
    beyond ±1e150, or not a number, is a fault with or without these limits:
    :mod:`streamcond.core.levels`.)"""

    preset: Literal["namur_ne43"] | None = None
    at_or_below: float | None = None
    at_or_above: float | None = None

    @model_validator(mode="after")
    def _limits(self) -> "Fault":
        if self.preset is not None:
            if self.at_or_below is not None or self.at_or_above is not None:
                raise ValueError("{at} takes a preset or at_or_below/at_or_above, not both")
        elif self.at_or_below is None and self.at_or_above is None:
            raise ValueError("{at} needs a preset or at least one of at_or_below, at_or_above")
        lo, hi = self.limits
        if lo > -math.inf and hi < math.inf and not lo < hi:
            raise ValueError("{at}.at_or_below must be below {at}.at_or_above")
        return self

    def mask(self, raw: Any) -> Any:
        """True where a raw sample (an array) is a fault; the one statement of the rule."""
        lo, hi = self.limits
        return (raw <= lo) | (raw >= hi)

    @property
    def limits(self) -> tuple[float, float]:
        if self.preset is not None:
            return FAULT_PRESETS[self.preset]
        lo = self.at_or_below if self.at_or_below is not None else -math.inf
        hi = self.at_or_above if self.at_or_above is not None else math.inf
        return lo, hi


class Channel(_Model):
    name: str = Field(pattern=NAME_PATTERN)
    column: str | None = None
    gain: float = 1.0
    offset: float = 0.0
    unit: str = ""
    invert: bool = False
    filter: FilterSpec = Field(default_factory=NoFilter)
    band: BandSpec
    dwell: Dwell = Field(default_factory=Dwell)
    compensate_delay: bool = True
    measure: Measure | None = None
    fault: Fault | None = None

    @property
    def source_column(self) -> str:
        return self.column if self.column is not None else self.name

    @field_validator("gain")
    @classmethod
    def _gain_nonzero(cls, v: float) -> float:
        if v == 0 or not math.isfinite(v):
            raise ValueError("must be a finite number other than 0")
        return v


class Stats(_Model):
    interval_s: float = Field(10.0, gt=0, le=MAX_DURATION_S)
    #: Chattering: this many activations (rising edges) within chatter_window_s. Three within
    #: 60 s is the common alarm-management criterion (ISA-18.2 practice, from memory).
    chatter_count: int = Field(3, ge=2)
    chatter_window_s: float = Field(60.0, gt=0, le=MAX_DURATION_S)
    #: Window of the noise estimate in the stats of a channel with a fixed band (an adaptive
    #: band uses its own window_s): at least 128 samples, and long compared with the noise's
    #: correlation time — a 1 s window reads low-pass noise far too low.
    noise_window_s: float = Field(5.0, gt=0, le=MAX_DURATION_S)
    #: ... refreshed every this many seconds of sample time (at least once per stats window):
    #: noise changes slowly, and one estimate costs a few milliseconds of a replay.
    noise_refresh_s: float = Field(60.0, gt=0, le=MAX_DURATION_S)


class Mqtt(_Model):
    host: str = "127.0.0.1"
    port: int = Field(1883, ge=1, le=65535)
    topic_prefix: str | None = None
    qos: Literal[0, 1, 2] = 1
    client_id: str | None = None
    username: str | None = None
    password_file: str | None = None
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    keepalive_s: int = Field(30, ge=5)
    spool_path: str = "state/spool.sqlite"
    spool_max_records: int = Field(1_000_000, ge=100)
    #: "always": the spool's log is synced to the disk at every commit (survives a power cut;
    #: one fsync per batch of records). "interval": synced at most every
    #: spool_sync_interval_ms (a power cut may lose that much; a crash or SIGKILL loses nothing).
    spool_sync: Literal["always", "interval"] = "always"
    spool_sync_interval_ms: int = Field(1000, ge=10, le=60_000)
    #: Seconds between two retained health records on ``<prefix>/health`` (streamcond.health).
    health_interval_s: float = Field(30.0, gt=0)


class Rotate(_Model):
    """Rotation of the events file (a daemon on an SD card must not fill it): start a new file
    when this one reaches ``max_bytes`` or has been open ``max_age_s``; keep ``keep`` old ones
    (NAME.1 newest … NAME.keep oldest)."""

    max_bytes: int | None = Field(None, ge=1024)
    max_age_s: float | None = Field(None, gt=0)
    keep: int = Field(5, ge=1, le=1000)

    @model_validator(mode="after")
    def _some_limit(self) -> "Rotate":
        if self.max_bytes is None and self.max_age_s is None:
            raise ValueError("{at} needs max_bytes or max_age_s (or both)")
        return self


class Output(_Model):
    events: str = "-"  # "" = no events file (e.g. a daemon that only publishes)
    #: Rotation of the events file (none by default).
    rotate: Rotate | None = None
    #: Channel state (seq, levels) of the live daemon when there is no MQTT spool to hold it.
    state_path: str = "state/streamcond.sqlite"
    mqtt: Mqtt | None = None

    @property
    def store_path(self) -> Path:
        """Where the live daemon keeps its spool and channel state (one SQLite file): the MQTT
        spool when it publishes, else ``state_path``."""
        return Path(self.mqtt.spool_path if self.mqtt is not None else self.state_path)


class Metrics(_Model):
    """The optional Prometheus endpoint (streamcond.metrics)."""

    #: ``"host:port"`` to serve ``/metrics`` on; a bare port binds 127.0.0.1. None: off.
    listen: str | None = None

    @field_validator("listen")
    @classmethod
    def _listen(cls, v: str | None) -> str | None:
        if v is not None:
            from .metrics import parse_listen

            parse_listen(v)
        return v


class Config(_Model):
    station: Station = Field(default_factory=Station)
    source: Source
    channel: list[Channel] = Field(min_length=1)
    stats: Stats = Field(default_factory=Stats)
    output: Output = Field(default_factory=Output)
    metrics: Metrics = Field(default_factory=Metrics)

    @model_validator(mode="after")
    def _cross_checks(self) -> "Config":
        names = [c.name for c in self.channel]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"channel names must be unique; repeated: {', '.join(dup)}")
        src = self.source
        for i, ch in enumerate(self.channel):
            col = ch.source_column
            if src.columns is not None and col not in src.columns:
                raise ValueError(
                    f"channel[{i}].column {col!r} is not one of source.columns"
                )
            if src.time_column is not None and col == src.time_column:
                raise ValueError(f"channel[{i}] reads the time column {col!r} as a value")
            f = ch.filter
            if isinstance(f, LowpassFilter) and src.sample_rate_hz is not None:
                if f.cutoff_hz >= src.sample_rate_hz / 2:
                    raise ValueError(
                        f"channel[{i}].filter.cutoff_hz must be below half of "
                        f"source.sample_rate_hz ({src.sample_rate_hz / 2:g} Hz)"
                    )
        return self

    @property
    def topic_prefix(self) -> str:
        if self.output.mqtt is not None and self.output.mqtt.topic_prefix:
            return self.output.mqtt.topic_prefix
        return f"streamcond/{self.station.name}"

    @property
    def client_id(self) -> str | None:
        """The MQTT client id the daemon uses: ``output.mqtt.client_id``, else derived from the
        topic prefix (:func:`default_client_id`); None without ``[output.mqtt]``."""
        if self.output.mqtt is None:
            return None
        return self.output.mqtt.client_id or default_client_id(self.topic_prefix)


def default_client_id(prefix: str) -> str:
    """``streamcond-`` and 12 hex digits of SHA-256 of the prefix: 23 characters.

    Stable across restarts (a station keeps its identity) and within the 23 characters every
    MQTT 3.1.1 server must accept (§3.1.3.1).
    """
    import hashlib

    return "streamcond-" + hashlib.sha256(prefix.encode("utf-8")).hexdigest()[:12]


def load_config(path: str | Path) -> Config:
    """Read and validate a TOML config; raises :class:`streamcond.errors.ConfigError`."""
    from .errors import ConfigError

    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
        if text.startswith("\ufeff"):
            raise ConfigError([
                f"The config file {str(p)!r} starts with a UTF-8 byte order mark (BOM), which "
                "TOML does not allow; save it as UTF-8 without a BOM"
            ])
        data = tomllib.loads(text)
    except FileNotFoundError:
        raise ConfigError([f"The config file {str(p)!r} does not exist."]) from None
    except (OSError, UnicodeDecodeError) as e:
        raise ConfigError([f"The config file {str(p)!r} cannot be read: {e}."]) from None
    except tomllib.TOMLDecodeError as e:
        raise ConfigError([f"The config file {str(p)!r} is not valid TOML: {e}."]) from None
    return config_from_dict(data, text)


def config_from_dict(data: dict[str, Any], text: str | None = None) -> Config:
    """Validate a config's data; ``text`` (the TOML) lets messages give a channel's line."""
    from pydantic import ValidationError

    from .errors import from_validation_error

    try:
        return Config.model_validate(data)
    except ValidationError as e:
        raise from_validation_error(e, data, text) from None
