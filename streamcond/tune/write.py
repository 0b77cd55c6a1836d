"""``tune --write``: the suggested band (and dwell) put into the config file in place.

The file is edited with :mod:`tomlkit`, a style-preserving TOML library: every comment, blank
line and the order of keys stay as the user wrote them; only the ``band`` (and, for a pulse
channel with measured bounce, the ``dwell``) of each tuned channel changes, written the way the
user wrote it (``low``/``high`` stays ``low``/``high``; ``center``/``width`` stays so; an
adaptive band gets the adaptive suggestion). The new text is validated by the config model
before it is written, the file is replaced atomically (a temporary file beside it, then a
rename) keeping its permissions, and the change is shown as a unified diff.
"""

from __future__ import annotations

import contextlib
import difflib
import os
import tempfile
import tomllib
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Any

from ..config import config_from_dict
from ..errors import ConfigError, InputError
from .analysis import TuneResult


@dataclass
class Edit:
    path: str
    diff: str
    changed: list[str]  # channel names whose settings changed
    skipped: list[str]  # channel names with nothing to write (no suggestion)

    def summary(self) -> str:
        if not self.changed:
            head = f"--write: {self.path} already holds these settings; nothing changed."
        else:
            head = f"--write: {self.path} updated ({', '.join(self.changed)}):\n\n" + self.diff
        if self.skipped:
            head += (
                f"\nNot written (no suggestion to write): {', '.join(self.skipped)}."
            )
        return head.rstrip("\n")


def _number(x: float) -> str:
    """A TOML float the way a person writes it: 2.4, 0.071, 1.0 (never an exponent for
    ordinary magnitudes, never an integer where the model expects a float)."""
    s = format(Decimal(repr(float(x))).normalize(), "f")
    return s if ("." in s or "e" in s.lower()) else s + ".0"


def _inline(d: dict[str, Any]) -> str:
    parts = [
        f'{k} = "{v}"' if isinstance(v, str) else f"{k} = {_number(v)}" for k, v in d.items()
    ]
    return "{ " + ", ".join(parts) + " }"


def _style(item: Any) -> str:
    """How the config writes the band now (from the file, not the model, which turns
    centre/width into low/high): "adaptive", "center_width" or "low_high"."""
    keys = set(item.keys()) if hasattr(item, "keys") else set()
    if "mode" in keys and str(item["mode"]) == "adaptive":
        return "adaptive"
    return "center_width" if "center" in keys else "low_high"


def band_for_config(res: TuneResult, style: str) -> dict[str, Any] | None:
    """The band to write, in the config's present ``style``."""
    if res.fixed_band is None:
        return None
    if style == "adaptive" and res.adaptive_band is not None:
        return dict(res.adaptive_band)
    fb = res.fixed_band
    if "low" in fb:
        low, high = float(fb["low"]), float(fb["high"])
        c, w = (low + high) / 2.0, high - low
    else:
        c, w = float(fb["center"]), float(fb["width"])
        low, high = c - w / 2.0, c + w / 2.0
    if style == "center_width":
        return {"center": float(f"{c:.10g}"), "width": float(f"{w:.10g}")}
    # 10 significant digits: what the centre and width's few digits give, without binary dust
    return {"low": float(f"{low:.10g}"), "high": float(f"{high:.10g}")}


def _set(table: Any, key: str, text: str, after: str | None = None) -> bool:
    """Set ``table[key]`` to the inline table ``text``, keeping the old item's trailing comment
    (or, for a new key, placing it right after ``after``). True when the value changed."""
    import tomlkit

    new = tomlkit.parse(f"{key} = {text}\n")[key]
    if key in table:
        old = table[key]
        if hasattr(old, "unwrap") and old.unwrap() == new.unwrap():
            return False
        trivia = getattr(old, "trivia", None)
        if trivia is not None and hasattr(new, "trivia"):
            # keep the comment in its column when the value's text grows or shrinks
            grow = len(new.as_string()) - len(old.as_string())
            ws = trivia.comment_ws
            new.trivia.comment_ws = " " * max(1, len(ws) - grow) if ws.strip(" ") == "" and ws else ws
            new.trivia.comment = trivia.comment
        if isinstance(old, tomlkit.items.Table) and not isinstance(old, tomlkit.items.InlineTable):
            # a [channel.band] sub-table: replace its keys, keep the table and its comments
            for k in list(old.keys()):
                if k not in new:
                    del old[k]
            for k, v in new.unwrap().items():
                item = tomlkit.item(v)
                prev = old.get(k) if k in old else None
                if prev is not None and hasattr(prev, "trivia"):
                    # keep the key's comment and its line ending (the last key's newline)
                    for attr in ("indent", "comment_ws", "comment", "trail"):
                        setattr(item.trivia, attr, getattr(prev.trivia, attr))
                old[k] = item
            return True
        table[key] = new
        return True
    container = getattr(table, "value", None)
    if after is not None and after in table and hasattr(container, "_insert_after"):
        container._insert_after(after, key, new)
    else:
        table[key] = new
    return True


def write_config(config_path: str, results: list[TuneResult]) -> Edit:
    """Edit ``config_path`` in place with each result's suggestion; returns the diff."""
    try:
        import tomlkit
    except ImportError:  # pragma: no cover - a dependency of the package
        raise InputError("tune --write needs the TOML library tomlkit: pip install tomlkit") from None
    path = Path(config_path)
    try:
        before = path.read_text(encoding="utf-8")
    except OSError as e:
        raise InputError(f"The config {config_path!r} cannot be read: {e.strerror}") from None
    doc = tomlkit.parse(before)
    tables = {str(t.get("name")): t for t in doc.get("channel", [])}
    changed: list[str] = []
    skipped: list[str] = []
    for res in results:
        table = tables.get(res.channel)
        band = None if table is None else band_for_config(res, _style(table.get("band", {})))
        if band is None or table is None:
            skipped.append(res.channel)
            continue
        did = _set(table, "band", _inline(band))
        if res.suggested_dwell is not None:
            did = _set(table, "dwell", _inline(res.suggested_dwell), after="band") or did
        if did:
            changed.append(res.channel)
    after = tomlkit.dumps(doc)
    try:
        config_from_dict(tomllib.loads(after))
    except (ConfigError, tomllib.TOMLDecodeError) as e:  # pragma: no cover - a bug of ours
        msgs = e.messages if isinstance(e, ConfigError) else [str(e)]
        raise InputError(
            [f"tune --write would make {config_path!r} invalid, so it was left alone:"] + msgs
        ) from None
    diff = "".join(
        difflib.unified_diff(
            before.splitlines(keepends=True),
            after.splitlines(keepends=True),
            fromfile=f"{config_path} (before)",
            tofile=f"{config_path} (after)",
        )
    )
    if after != before:
        _replace(path, after)
    return Edit(config_path, diff, changed, skipped)


def _replace(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically, keeping the file's permission bits."""
    try:
        mode = path.stat().st_mode & 0o7777
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
            os.chmod(tmp, mode)
            os.replace(tmp, path)
        except BaseException:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
            raise
    except OSError as e:
        raise InputError(f"The config {str(path)!r} cannot be written: {e.strerror}") from None
