"""Numbers for a config line a person reads: directed rounding and TOML spelling."""

from __future__ import annotations

from decimal import ROUND_CEILING, ROUND_FLOOR, Decimal, localcontext
from typing import Any


def round_to(x: float, digits: int, up: bool) -> Decimal:
    with localcontext() as ctx:
        ctx.prec = digits
        ctx.rounding = ROUND_CEILING if up else ROUND_FLOOR
        return +Decimal(repr(float(x)))


def toml_number(x: float | Decimal) -> str:
    """A number as TOML writes it (no exponent for ordinary magnitudes)."""
    d = x if isinstance(x, Decimal) else Decimal(repr(float(x)))
    s = format(d.normalize(), "f")
    return s


def inline_table(d: dict[str, Any]) -> str:
    """A TOML inline table: strings quoted, numbers in their shortest form."""
    parts = []
    for k, v in d.items():
        parts.append(f'{k} = "{v}"' if isinstance(v, str) else f"{k} = {toml_number(v)}")
    return "{ " + ", ".join(parts) + " }"

