"""The one place where errors become plain sentences for users.

Config problems are reported one sentence per problem, naming the key path the way a user
writes it in TOML (``channel[1].band.low``), never as a traceback (DESIGN.md: exit code 2).
"""

from __future__ import annotations

import re
import typing
from typing import Any, Iterable

# Tags pydantic inserts into error locations for discriminated unions; not part of the user's key.
_UNION_TAGS = {
    "none",
    "moving_average",
    "median",
    "ema",
    "lowpass",
    "fixed",
    "adaptive",
}


class StreamcondError(Exception):
    """An error with a message meant for the user (exit code 2)."""

    exit_code = 2

    def __init__(self, messages: Iterable[str] | str):
        if isinstance(messages, str):
            messages = [messages]
        self.messages = [m if m.endswith((".", "?", "!")) else m + "." for m in messages]
        super().__init__("\n".join(self.messages))

    def __reduce__(self):  # pickled whole (a replay's reader process sends its errors)
        return (type(self), (self.messages,))


class ConfigError(StreamcondError):
    """The config failed to load or validate."""


class InputError(StreamcondError):
    """An input (recording, golden file) cannot be used."""


def key_path(loc: tuple[Any, ...]) -> str:
    """``('channel', 1, 'band', 'fixed', 'low')`` → ``channel[1].band.low``."""
    out = ""
    parts = list(loc)
    for i, part in enumerate(parts):
        if isinstance(part, int):
            out += f"[{part}]"
            continue
        # drop the discriminator tag pydantic puts after a union field
        if part in _UNION_TAGS and i > 0 and parts[i - 1] in ("filter", "band"):
            continue
        if part.startswith("function-") or part.endswith("]"):
            continue
        out += ("." if out else "") + str(part)
    return out


#: Sentences for pydantic's error types; ``{where}`` is the key path, the rest comes from the
#: error's context.
_TEMPLATES: dict[str, str] = {
    "missing": "{where} is required",
    "extra_forbidden": "{where} is not a known setting",
    "literal_error": "{where} must be one of {expected}",
    "union_tag_not_found": "{where} needs a {discriminator} key",
    "greater_than": "{where} must be greater than {gt}",
    "greater_than_equal": "{where} must be at least {ge}",
    "less_than": "{where} must be less than {lt}",
    "less_than_equal": "{where} must be at most {le}",
    "string_pattern_mismatch": "{where} may only contain letters, digits, '_' and '-'",
    "too_short": "{where} must have at least {min_length} item(s)",
    "float_parsing": "{where} must be a number",
    "float_type": "{where} must be a number",
    "int_parsing": "{where} must be a whole number",
    "int_type": "{where} must be a whole number",
    "int_from_float": "{where} must be a whole number",
    "bool_parsing": "{where} must be true or false",
    "bool_type": "{where} must be true or false",
    "string_type": "{where} must be a string",
    "list_type": "{where} must be a list",
    "model_type": "{where} must be a table",
    "dict_type": "{where} must be a table",
    "model_attributes_type": "{where} must be a table",
}


class _Ctx(dict):
    def __missing__(self, key: str) -> str:
        return ""


def _describe(err: dict[str, Any]) -> str:
    typ = err["type"]
    ctx = err.get("ctx") or {}
    path = key_path(err["loc"])
    where = path or "the config"
    if typ in ("value_error", "assertion_error"):
        msg = str(ctx.get("error", err["msg"]))
        msg = msg.removeprefix("Value error, ").removeprefix("Assertion failed, ")
        if "{at}" in msg:
            return msg.replace("{at}", path or "config")
        if path and not msg.startswith(path):
            return f"{path}: {msg}"
        return msg
    if typ == "union_tag_invalid":
        key = "mode" if where.endswith("band") else "kind"
        return f"{where}.{key} must be one of {ctx.get('expected_tags', '')}, not {ctx.get('tag')!r}"
    if typ == "extra_forbidden":
        loc = [p for p in err["loc"] if not (isinstance(p, str) and p.startswith("function-"))]
        name = str(loc[-1]) if loc else ""
        return f"{where} is not a known setting" + suggestion(name, known_keys(tuple(loc[:-1])))
    if typ in _TEMPLATES:
        fields = _Ctx(ctx, where=where)
        fields.setdefault("discriminator", "kind")
        return _TEMPLATES[typ].format_map(fields)
    return f"{where}: {err['msg']}"


def suggestion(name: str, known: Iterable[str]) -> str:
    """``"; did you mean 'width'?"`` for the nearest known key (difflib's ratio, cutoff 0.6), or ``""``."""
    import difflib  # only for a mistyped key: not on every run's import path

    close = difflib.get_close_matches(name, list(known), n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


def _models(tp: Any) -> list[Any]:
    """The pydantic models an annotation can hold (Optional, list, Annotated and unions unwrapped)."""
    from pydantic import BaseModel

    origin = typing.get_origin(tp)
    if origin is typing.Annotated:
        return _models(typing.get_args(tp)[0])
    if origin is not None:
        return [m for a in typing.get_args(tp) for m in _models(a)]
    if isinstance(tp, type) and issubclass(tp, BaseModel):
        return [tp]
    return []


def _tag_of(model: Any) -> set[str]:
    tags: set[str] = set()
    for key in ("kind", "mode"):
        f = model.model_fields.get(key)
        if f is not None and typing.get_origin(f.annotation) is typing.Literal:
            tags.update(str(a) for a in typing.get_args(f.annotation))
    return tags


def known_keys(loc: tuple[Any, ...]) -> list[str]:
    """The setting names the config accepts in the table at ``loc`` (a pydantic error location)."""
    from .config import Config

    models: list[Any] = [Config]
    for part in loc:
        if isinstance(part, int):
            continue
        if part in _UNION_TAGS:
            tagged = [m for m in models if part in _tag_of(m)]
            if tagged:
                models = tagged
                continue
        nxt: list[Any] = []
        for m in models:
            f = m.model_fields.get(part)
            if f is not None:
                nxt += _models(f.annotation)
        models = nxt
        if not models:
            return []
    return sorted({k for m in models for k in m.model_fields})


class SourceText:
    """Where the config's channels are, for messages: their names and the lines of their
    ``[[channel]]`` headers (TOML parsers give no line numbers; the headers are found in the text)."""

    def __init__(self, data: dict[str, Any] | None, text: str | None = None) -> None:
        chans = data.get("channel") if isinstance(data, dict) else None
        self.names = [c.get("name") if isinstance(c, dict) else None for c in chans] if isinstance(chans, list) else []
        self.lines: list[int] = []
        self.text = text is not None
        if text is not None:
            self.lines = [
                text.count("\n", 0, m.start()) + 1
                for m in re.finditer(r"^[ \t]*\[\[[ \t]*channel[ \t]*\]\]", text, re.M)
            ]
            if len(self.lines) != len(self.names):
                self.lines = []  # channels given some other way (an inline array): no lines

    def where(self, message: str) -> str:
        """The message with the channel it is about named: ``In channel 'pump' (line 21): ...``
        (only for a config read from a file: messages about a dict keep their plain form)."""
        m = re.search(r"channel\[(\d+)\]", message) if self.text else None
        if not m:
            return message
        i = int(m.group(1))
        name = self.names[i] if i < len(self.names) else None
        parts = []
        if isinstance(name, str) and name:
            parts.append(f"channel {name!r}")
        if i < len(self.lines):
            parts.append(f"line {self.lines[i]}")
        if not parts:
            return message
        return f"In {parts[0]}" + (f" ({parts[1]})" if len(parts) > 1 else "") + f": {message}"


def from_validation_error(
    exc: Any, data: dict[str, Any] | None = None, text: str | None = None
) -> ConfigError:
    """Turn a pydantic ``ValidationError`` into a :class:`ConfigError` of plain sentences;
    with the config's ``data`` (and ``text``) a channel is named by its name and line."""
    src = SourceText(data, text)
    seen: list[str] = []
    for err in exc.errors(include_url=False):
        msg = src.where(_describe(err))
        if msg not in seen:
            seen.append(msg)
    return ConfigError(seen)
