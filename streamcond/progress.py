"""A one-line progress display on stderr for replays (only when stderr is a terminal).

Driven by *sample time*: the replay reports after every piece it feeds the pipeline (also when
paced by ``--speed``), so the line moves with the data, not once per file block. The fraction
done is the share of the file's bytes read, estimated inside a block from the rows done; the
remaining time is extrapolated from the elapsed time.
"""

from __future__ import annotations

import math
import sys
import time
from typing import Callable, TextIO


class Progress:
    """Shows sample time reached, fraction, rows and remaining time, redrawn a few times a
    second; nothing at all for a replay that ends within ``show_after_s``."""

    def __init__(self, total_bytes: int, stream: TextIO | None = None, enabled: bool | None = None,
                 min_interval_s: float = 0.2, show_after_s: float = 0.5,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            enabled = bool(getattr(self.stream, "isatty", lambda: False)())
        self.enabled = enabled
        self.total = max(total_bytes, 1)
        self.clock = clock
        self.start = clock()
        self.last = -math.inf
        self.min_interval = min_interval_s
        self.show_after = show_after_s
        self._drawn = False

    def update(self, done_bytes: int, rows: int, t: float | None = None) -> None:
        """``t``: the sample time reached (seconds), when known."""
        if not self.enabled:
            return
        now = self.clock()
        if now - self.start < self.show_after:
            return
        if now - self.last < self.min_interval and done_bytes < self.total:
            return
        self.last = now
        frac = min(max(done_bytes / self.total, 0.0), 1.0)
        width = 24
        bar = "#" * int(frac * width) + "-" * (width - int(frac * width))
        el = max(now - self.start, 1e-9)
        eta = el * (1 - frac) / frac if frac > 0 else 0.0
        at = f"t = {t:,.1f} s  " if t is not None and math.isfinite(t) else ""
        self.stream.write(
            f"\r{at}[{bar}] {frac * 100:5.1f}%  {rows:,} rows  {rows / el:,.0f} rows/s  "
            f"eta {eta:4.0f} s "
        )
        self.stream.flush()
        self._drawn = True

    def close(self) -> None:
        if self.enabled and self._drawn:
            self.stream.write("\n")
            self.stream.flush()
