"""A one-line progress display on stderr for long replays (only when stderr is a terminal)."""

from __future__ import annotations

import sys
import time
from typing import TextIO


class Progress:
    """Shows bytes done, rows and rate, redrawn at most a few times per second."""

    def __init__(self, total_bytes: int, stream: TextIO | None = None, enabled: bool | None = None,
                 min_interval_s: float = 0.2) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            enabled = bool(getattr(self.stream, "isatty", lambda: False)()) and total_bytes > (4 << 20)
        self.enabled = enabled
        self.total = max(total_bytes, 1)
        self.start = time.monotonic()
        self.last = 0.0
        self.min_interval = min_interval_s
        self._drawn = False

    def update(self, done_bytes: int, rows: int) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self.last < self.min_interval and done_bytes < self.total:
            return
        self.last = now
        frac = min(done_bytes / self.total, 1.0)
        width = 30
        bar = "#" * int(frac * width) + "-" * (width - int(frac * width))
        el = max(now - self.start, 1e-9)
        eta = el * (1 - frac) / frac if frac > 0 else 0.0
        self.stream.write(
            f"\r[{bar}] {frac * 100:5.1f}%  {rows:,} rows  {rows / el:,.0f} rows/s  eta {eta:4.0f} s "
        )
        self.stream.flush()
        self._drawn = True

    def close(self) -> None:
        if self.enabled and self._drawn:
            self.stream.write("\n")
            self.stream.flush()
