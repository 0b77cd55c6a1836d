"""The one place where errors become plain sentences for users.

Config problems are reported one sentence per problem, naming the key path the way a user
writes it in TOML (``channel[1].band.low``), never as a traceback (DESIGN.md: exit code 2).
"""

from __future__ import annotations

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


def _describe(err: dict[str, Any]) -> str:
    typ = err["type"]
    ctx = err.get("ctx") or {}
    path = key_path(err["loc"])
    where = path or "the config"
    if typ == "missing":
        return f"{where} is required"
    if typ == "extra_forbidden":
        return f"{where} is not a known setting"
    if typ in ("value_error", "assertion_error"):
        msg = str(ctx.get("error", err["msg"]))
        msg = msg.removeprefix("Value error, ").removeprefix("Assertion failed, ")
        if "{at}" in msg:
            return msg.replace("{at}", path or "config")
        if path and not msg.startswith(path):
            return f"{path}: {msg}"
        return msg
    if typ == "literal_error":
        return f"{where} must be one of {ctx.get('expected', '')}"
    if typ == "union_tag_invalid":
        key = "mode" if where.endswith("band") else "kind"
        return f"{where}.{key} must be one of {ctx.get('expected_tags', '')}, not {ctx.get('tag')!r}"
    if typ == "union_tag_not_found":
        return f"{where} needs a {ctx.get('discriminator', 'kind')} key"
    if typ == "greater_than":
        return f"{where} must be greater than {ctx.get('gt')}"
    if typ == "greater_than_equal":
        return f"{where} must be at least {ctx.get('ge')}"
    if typ == "less_than":
        return f"{where} must be less than {ctx.get('lt')}"
    if typ == "less_than_equal":
        return f"{where} must be at most {ctx.get('le')}"
    if typ == "string_pattern_mismatch":
        return f"{where} may only contain letters, digits, '_' and '-'"
    if typ == "too_short":
        return f"{where} must have at least {ctx.get('min_length')} item(s)"
    if typ in ("float_parsing", "float_type"):
        return f"{where} must be a number"
    if typ in ("int_parsing", "int_type", "int_from_float"):
        return f"{where} must be a whole number"
    if typ in ("bool_parsing", "bool_type"):
        return f"{where} must be true or false"
    if typ in ("string_type",):
        return f"{where} must be a string"
    if typ in ("list_type",):
        return f"{where} must be a list"
    if typ in ("model_type", "dict_type", "model_attributes_type"):
        return f"{where} must be a table"
    return f"{where}: {err['msg']}"


def from_validation_error(exc: Any) -> ConfigError:
    """Turn a pydantic ``ValidationError`` into a :class:`ConfigError` of plain sentences."""
    seen: list[str] = []
    for err in exc.errors(include_url=False):
        msg = _describe(err)
        if msg not in seen:
            seen.append(msg)
    return ConfigError(seen)
