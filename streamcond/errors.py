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
    if typ in _TEMPLATES:
        fields = _Ctx(ctx, where=where)
        fields.setdefault("discriminator", "kind")
        return _TEMPLATES[typ].format_map(fields)
    return f"{where}: {err['msg']}"


def from_validation_error(exc: Any) -> ConfigError:
    """Turn a pydantic ``ValidationError`` into a :class:`ConfigError` of plain sentences."""
    seen: list[str] = []
    for err in exc.errors(include_url=False):
        msg = _describe(err)
        if msg not in seen:
            seen.append(msg)
    return ConfigError(seen)
