"""Rice's formula and the default target rate: the closed forms ``tune`` sizes a band with."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

#: Default acceptable false-edge rate from noise alone, per hour: one a day (module docstring).
DEFAULT_TARGET_RATE_PER_HOUR: float = 1.0 / 24.0
#: Wording for ``--target-rate``'s help in cli.py (which imports nothing heavy at start-up, so
#: it carries its own copy of this sentence).
TARGET_RATE_HELP = (
    "acceptable false edges per hour from noise alone, by Rice's formula for a signal resting "
    "at the band centre (an upper bound); default 1/24: one a day"
)



def rice_rate_per_hour(width: Any, sigma: float, nu0_hz: float) -> Any:
    """Rice's up-crossing rate of the half-width, per hour: 3600·ν0·exp(−h²/2σ²), h = width/2.

    S. O. Rice, Bell System Technical Journal, 1944–45. ``width`` may be an array.
    """
    h = np.asarray(width, dtype=np.float64) / 2.0
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        r = 3600.0 * nu0_hz * np.exp(-(h * h) / (2.0 * sigma * sigma))
    return r if np.ndim(r) else float(r)


def rice_min_width(sigma: float, nu0_hz: float, rate_per_hour: float) -> float:
    """Narrowest width whose Rice rate is at most ``rate_per_hour``: 2σ·sqrt(2·ln(3600·ν0/R)).

    0 when even a zero-width band meets the target (3600·ν0 ≤ R).
    """
    ratio = 3600.0 * nu0_hz / rate_per_hour
    if ratio <= 1.0:
        return 0.0
    return 2.0 * sigma * math.sqrt(2.0 * math.log(ratio))

