"""``streamcond check``: the resolved settings, as the pipeline will use them.

Prints TOML (or JSON) with every default filled in and bands resolved to low/high/center/width.
Secrets are never printed: only the *path* of ``password_file`` appears, never its content.
Uses only the standard library and the config models, so it starts fast.
"""

from __future__ import annotations

import json
import math
from typing import Any

from .config import Config, FixedBand


def _resolved(cfg: Config) -> dict[str, Any]:
    d = cfg.model_dump(mode="json")
    fs = cfg.source.sample_rate_hz
    for ch, out in zip(cfg.channel, d["channel"]):
        out["column"] = ch.source_column
        if isinstance(ch.band, FixedBand):
            out["band"] = {
                "mode": "fixed",
                "low": ch.band.low,
                "high": ch.band.high,
                "center": ch.band.center,
                "width": ch.band.width,
            }
        f = ch.filter
        delay = None
        if f.kind in ("moving_average", "median"):
            delay = (f.window - 1) / 2.0
        elif f.kind == "ema" and fs:
            a = -math.expm1(-1.0 / (fs * f.tau_s))
            delay = (1 - a) / a
        elif f.kind == "none":
            delay = 0.0
        if delay is not None:
            out["filter"]["delay_samples"] = delay
            if fs:
                out["filter"]["delay_s"] = delay / fs
    d["output"].setdefault("mqtt", None)
    if cfg.output.mqtt is not None:
        d["output"]["mqtt"]["topic_prefix"] = cfg.topic_prefix
    return d


def describe_config(cfg: Config, as_json: bool = False) -> str:
    d = _resolved(cfg)
    if as_json:
        return json.dumps(d, indent=2)
    return "# resolved settings (defaults filled in)\n" + _toml(d)


def _val(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return repr(v)
    if isinstance(v, float):
        r = f"{v:.12g}"
        return r if any(c in r for c in ".en") else r + ".0"
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_val(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_val(x)}" for k, x in v.items() if x is not None) + " }"
    raise TypeError(type(v))


def _toml(d: dict[str, Any]) -> str:
    lines: list[str] = []

    def table(name: str, t: dict[str, Any]) -> None:
        scalars = {k: v for k, v in t.items() if not isinstance(v, dict) or k in ("filter", "band", "dwell")}
        lines.append(f"\n[{name}]")
        for k, v in scalars.items():
            if v is None:
                lines.append(f"# {k} = (not set)")
            else:
                lines.append(f"{k} = {_val(v)}")
        for k, v in t.items():
            if isinstance(v, dict) and k not in ("filter", "band", "dwell"):
                table(f"{name}.{k}", v)

    for key in ("station", "source"):
        table(key, d[key])
    for ch in d["channel"]:
        lines.append("\n[[channel]]")
        for k, v in ch.items():
            lines.append(f"# {k} = (not set)" if v is None else f"{k} = {_val(v)}")
    table("stats", d["stats"])
    out = dict(d["output"])
    mqtt = out.pop("mqtt", None)
    table("output", out)
    if mqtt:
        table("output.mqtt", mqtt)
    return "\n".join(lines).lstrip("\n") + "\n"
