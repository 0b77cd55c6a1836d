"""The IEC 60063 preferred-number series (E6 … E96) and resistance values as people write them.

IEC 60063 ("Preferred number series for resistors and capacitors") defines the E*n* series as
n values per decade spaced close to 10^(1/n). The coarse series E6, E12 and E24 are *tables*:
their values were fixed from the historical practice before the formula and several differ from
round(10^(i/n)) (E24 has 2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7 and 8.2 where the formula gives 2.6,
2.9, 3.2, 3.5, 3.8, 4.2, 4.6 and 8.3), so they are written out here. E48 and E96 are three-digit
series that *are* the formula, 10^(i/n) rounded to three significant figures (only E192 has an
exception, 9.20 for 9.19), and are generated. The tests compare both with the standard's tables
(from memory).
"""

from __future__ import annotations

import math
import re

import numpy as np

#: IEC 60063 tables of the coarse series: mantissas of one decade, 1.0 ≤ m < 10.
_TABLES: dict[str, tuple[float, ...]] = {
    "E6": (1.0, 1.5, 2.2, 3.3, 4.7, 6.8),
    "E12": (1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2),
    "E24": (
        1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0,
        3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6, 6.2, 6.8, 7.5, 8.2, 9.1,
    ),
}

#: The series this tool offers for resistors (E6 is offered for capacitors).
RESISTOR_SERIES = ("E12", "E24", "E48", "E96")
CAPACITOR_SERIES = ("E6", "E12")

#: The tolerance IEC 60063 pairs with each series (E6 ±20 %, E12 ±10 %, E24 ±5 %, E48 ±2 %,
#: E96 ±1 %; from memory): the default tolerance when none is given.
DEFAULT_TOLERANCE = {"E6": 0.20, "E12": 0.10, "E24": 0.05, "E48": 0.02, "E96": 0.01}


def mantissas(series: str) -> np.ndarray:
    """The values of one decade of ``series`` (``"E12"`` …), 1.0 ≤ m < 10, ascending."""
    s = series.upper()
    if s in _TABLES:
        return np.array(_TABLES[s], dtype=np.float64)
    if s in ("E48", "E96"):
        n = int(s[1:])
        # three significant figures: 10^(i/n) lies in [1, 10), so two decimals
        return np.round(10.0 ** (np.arange(n) / n), 2)
    raise ValueError(f"unknown series {series!r}; choose one of E6, E12, E24, E48, E96")


def step_ratio(series: str) -> float:
    """The nominal ratio between neighbours in ``series``: 10^(1/n)."""
    return 10.0 ** (1.0 / int(series.upper()[1:]))


def values(series: str, lo: float, hi: float) -> np.ndarray:
    """All values of ``series`` in [lo, hi] (ohms or farads), ascending.

    Decade by decade from the mantissas; values are rounded to 3 significant figures so that
    4.7·10^3 is exactly 4700.0, and the ends are taken with a relative slack of 10^-9.
    """
    if not (0 < lo <= hi and math.isfinite(hi)):
        raise ValueError(f"the range {lo:g} – {hi:g} is not a range of positive values")
    m = mantissas(series)
    d0 = math.floor(math.log10(lo)) - 1
    d1 = math.ceil(math.log10(hi)) + 1
    decades = 10.0 ** np.arange(d0, d1 + 1, dtype=np.float64)
    v = (m[None, :] * decades[:, None]).ravel()
    v = np.array([float(f"{x:.3g}") for x in v.tolist()])
    keep = (v >= lo * (1 - 1e-9)) & (v <= hi * (1 + 1e-9))
    return np.unique(v[keep])


_SI = {"p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "m": 1e-3, "k": 1e3, "K": 1e3, "M": 1e6,
       "G": 1e9, "R": 1.0, "r": 1.0, "F": 1.0}
_VALUE = re.compile(r"^\s*(\d+(?:\.\d*)?|\.\d+)\s*([pnuµmkKMGRrF]?)(\d*)\s*(?:Ω|ohms?|F)?\s*$")


def parse_value(text: str) -> float:
    """``"4k7"``, ``"4.7k"``, ``"1M"``, ``"470"``, ``"100n"`` → a number (ohms, farads).

    The letter may stand for the decimal point (IEC 60062 marking: 4k7 = 4.7 kΩ, 1R5 = 1.5 Ω).
    Raises ValueError with a plain sentence.
    """
    m = _VALUE.match(text)
    if not m:
        raise ValueError(f"{text!r} is not a value like 4700, 4.7k, 4k7 or 1M")
    head, unit, tail = m.groups()
    if tail and "." in head:
        raise ValueError(f"{text!r} is not a value like 4700, 4.7k, 4k7 or 1M")
    num = float(head + ("." + tail if tail else ""))
    v = num * _SI.get(unit, 1.0)
    if not (v > 0 and math.isfinite(v)):
        raise ValueError(f"{text!r} must be a positive value")
    return v


def format_ohms(r: float) -> str:
    """4700.0 → ``"4.7 kΩ"``; 1e6 → ``"1 MΩ"`` (three significant figures at most)."""
    for scale, prefix in ((1e6, "M"), (1e3, "k"), (1.0, "")):
        if r >= scale:
            return f"{r / scale:.3g} {prefix}Ω"
    return f"{r:.3g} Ω"


def format_farads(c: float) -> str:
    """1e-7 → ``"100 nF"``."""
    for scale, prefix in ((1e-6, "µ"), (1e-9, "n"), (1e-12, "p")):
        if c >= scale * 0.9995:
            return f"{c / scale:.3g} {prefix}F"
    return f"{c:.3g} F"
