"""One rate-limited log: a daemon that runs for months must not fill a disk with one message.

The rule is the same wherever something can repeat without end (bad input lines, a device that
stays away, a broker that stays away, a full spool): the first ``first`` occurrences of a kind
are logged as they come, then at most one line per ``interval_s`` per kind, and that line says
how many occurrences it stands for. Nothing is lost from the count, only from the log.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Hashable


class RateLimitedLog:
    """At most one line per ``interval_s`` for each ``key`` after the first ``first`` lines.

    ``due(count)`` records occurrences and returns how many the caller should report now (0:
    stay quiet); ``log(level, msg, *args)`` does that and writes the line, adding "(and N more
    since the last report)" when it stands for held-back occurrences too. ``start()`` makes the
    next line wait a full interval (a steady "still ..." pace from the moment a condition began).
    """

    def __init__(
        self,
        logger: logging.Logger,
        interval_s: float,
        *,
        first: int = 1,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if interval_s < 0 or first < 0:
            raise ValueError("interval_s and first must not be negative")
        self.logger = logger
        self.interval_s = float(interval_s)
        self.first = int(first)
        self.clock = clock
        self._held: dict[Hashable, int] = {}
        self._last: dict[Hashable, float] = {}
        self._logged: dict[Hashable, int] = {}

    def start(self, key: Hashable = None) -> None:
        """Treat now as the time of the last report for ``key`` (and forget what was held)."""
        self._last[key] = self.clock()
        self._held[key] = 0
        self._logged[key] = max(self._logged.get(key, 0), self.first)

    def reset(self, key: Hashable = None) -> None:
        """The condition ended: the next occurrence is logged at once again."""
        self._held.pop(key, None)
        self._last.pop(key, None)
        self._logged.pop(key, None)

    def held(self, key: Hashable = None) -> int:
        """Occurrences counted but not reported yet."""
        return self._held.get(key, 0)

    def drain(self) -> dict[Hashable, int]:
        """Every key's occurrences counted but not reported yet (those with any), forgotten
        here: for a last report at a close."""
        out = {k: n for k, n in self._held.items() if n}
        for k in out:
            self._held[k] = 0
        return out

    def due(self, count: int = 1, key: Hashable = None) -> int:
        """Count ``count`` occurrences of ``key``; return how many to report now (0: none)."""
        total = self._held.get(key, 0) + max(0, int(count))
        if total == 0:
            return 0
        now = self.clock()
        logged = self._logged.get(key, 0)
        if logged < self.first or now - self._last.get(key, -math.inf) >= self.interval_s:
            self._held[key] = 0
            self._last[key] = now
            self._logged[key] = logged + 1
            return total
        self._held[key] = total
        return 0

    def log(self, level: int, msg: str, *args: object, count: int = 1, key: Hashable = None) -> bool:
        """Log ``msg % args`` if due (see :meth:`due`); True when a line was written."""
        n = self.due(count, key)
        if n == 0:
            return False
        if n > count:
            msg = f"{msg} (and %d more since the last report)"
            args = (*args, n - count)
        self.logger.log(level, msg, *args)
        return True
