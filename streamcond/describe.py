"""``streamcond check``: the resolved settings, as the pipeline will use them.

Prints TOML that loads back as the same config (``streamcond check -c`` on its own output gives
the same settings), every default filled in. What is *derived* rather than set — a band's
centre and width, a prefilter's delay, the MQTT topic prefix and client id the daemon will use —
is printed as a comment beside the key, so the file stays loadable and still shows the real
values. ``--json`` gives the same settings with the derived values as fields.
Secrets are never printed: only the *path* of ``password_file`` appears, never its content.
Uses only the standard library and the config models, so it starts fast.
"""

from __future__ import annotations

import json
import math
from typing import Any

from .config import Config, FixedBand


def _filter_delay(ch: Any, fs: float | None) -> float | None:
    """The prefilter's delay in samples where a closed form gives it (lowpass: its DC group
    delay depends on the design, shown by replay/tune)."""
    f = ch.filter
    if f.kind in ("moving_average", "median"):
        return (f.window - 1) / 2.0  # a symmetric window's centre lies (N−1)/2 samples back
    if f.kind == "ema" and fs:
        a = -math.expm1(-1.0 / (fs * f.tau_s))
        return (1 - a) / a  # first-order IIR: group delay at DC (1−α)/α samples
    if f.kind == "none":
        return 0.0
    return None


def _resolved(cfg: Config) -> tuple[dict[str, Any], dict[str, str], dict[str, Any]]:
    """(settings that load back, comments by key path, derived values by key path)."""
    d = cfg.model_dump(mode="json")
    notes: dict[str, str] = {}
    derived: dict[str, Any] = {}
    fs = cfg.source.sample_rate_hz
    for i, (ch, out) in enumerate(zip(cfg.channel, d["channel"])):
        at = f"channel[{i}]"
        if ch.column is None:
            derived[f"{at}.column"] = ch.source_column  # the channel's name
        if isinstance(ch.band, FixedBand):
            out["band"] = {"mode": "fixed", "low": ch.band.low, "high": ch.band.high}
            notes[f"{at}.band"] = f"center {_num(ch.band.center)}, width {_num(ch.band.width)}"
            derived[f"{at}.band.center"] = ch.band.center
            derived[f"{at}.band.width"] = ch.band.width
        delay = _filter_delay(ch, fs)
        if delay is not None:
            note = f"delay {_num(delay)} samples"
            derived[f"{at}.filter.delay_samples"] = delay
            if fs:
                note += f" = {_num(delay / fs)} s"
                derived[f"{at}.filter.delay_s"] = delay / fs
            elif delay:
                note += " (in seconds once the sample rate is measured)"
            notes[f"{at}.filter"] = note
    d["output"].setdefault("mqtt", None)
    if cfg.output.mqtt is not None:
        m = d["output"]["mqtt"]
        if m.get("topic_prefix") is None:
            derived["output.mqtt.topic_prefix"] = cfg.topic_prefix
        if m.get("client_id") is None:
            derived["output.mqtt.client_id"] = cfg.client_id
    return d, notes, derived


def describe_config(cfg: Config, as_json: bool = False) -> str:
    d, notes, derived = _resolved(cfg)
    if as_json:
        return json.dumps(_with_derived(d, derived), indent=2)
    return (
        "# resolved settings (defaults filled in; derived values in comments).\n"
        "# This output loads back as a config: streamcond check -c FILE\n" + _toml(d, notes, derived)
    )


def _with_derived(d: dict[str, Any], derived: dict[str, Any]) -> dict[str, Any]:
    """The settings with the derived values put in as fields (for --json)."""
    import copy

    out = copy.deepcopy(d)
    for path, v in derived.items():
        node: Any = out
        parts = path.replace("[", ".").replace("]", "").split(".")
        for p in parts[:-1]:
            node = node[int(p)] if p.isdigit() else node[p]
        node[parts[-1]] = v
    return out


def _num(v: float) -> str:
    return f"{v:.12g}"


def _val(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return repr(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            return "nan" if v != v else ("inf" if v > 0 else "-inf")
        r = f"{v:.12g}"
        return r if any(c in r for c in ".en") else r + ".0"
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_val(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_val(x)}" for k, x in v.items() if x is not None) + " }"
    raise TypeError(type(v))


_INLINE = ("filter", "band", "dwell", "measure", "fault")


def _toml(d: dict[str, Any], notes: dict[str, str], derived: dict[str, Any]) -> str:
    lines: list[str] = []

    def line(path: str, k: str, v: Any) -> None:
        key = f"{path}.{k}"
        if v is None:
            if key in derived:
                lines.append(f"# {k} = {_val(derived[key])}   # not set: derived, as the daemon uses it")
            else:
                lines.append(f"# {k} = (not set)")
            return
        note = notes.get(key)
        lines.append(f"{k} = {_val(v)}" + (f"   # {note}" if note else ""))

    def table(name: str, t: dict[str, Any], header: str | None = None) -> None:
        lines.append(f"\n{header or f'[{name}]'}")
        for k, v in t.items():
            if not isinstance(v, dict) or k in _INLINE:
                line(name, k, v)
        for k, v in t.items():
            if isinstance(v, dict) and k not in _INLINE:
                table(f"{name}.{k}", v)

    for key in ("station", "source"):
        table(key, d[key])
    for i, ch in enumerate(d["channel"]):
        table(f"channel[{i}]", ch, header="[[channel]]")
    table("stats", d["stats"])
    out = dict(d["output"])
    mqtt = out.pop("mqtt", None)
    table("output", out)
    if mqtt:
        table("output.mqtt", mqtt)
    return "\n".join(lines).lstrip("\n") + "\n"
