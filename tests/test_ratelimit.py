"""The one rate-limited log (streamcond.ratelimit): first lines at once, then one line per
interval that says how many it stands for; nothing is lost from the count."""

from __future__ import annotations

import logging

from streamcond.ratelimit import RateLimitedLog


class Clock:
    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t


def test_first_lines_then_one_summary_per_interval(caplog):
    clock = Clock()
    log = logging.getLogger("test.ratelimit")
    rl = RateLimitedLog(log, 60.0, first=2, clock=clock)
    caplog.set_level(logging.WARNING, logger="test.ratelimit")
    written = [rl.log(logging.WARNING, "bad line %d", i) for i in range(10)]
    assert written == [True, True] + [False] * 8  # 2 at once, 8 held back
    assert rl.held() == 8
    clock.t = 59.9
    assert not rl.log(logging.WARNING, "bad line %d", 10)
    clock.t = 60.0
    assert rl.log(logging.WARNING, "bad line %d", 11)
    msgs = [r.getMessage() for r in caplog.records]
    # the summary line stands for itself and the 9 held back before it: 2 + 9 + 1 = 12 calls
    assert msgs == ["bad line 0", "bad line 1", "bad line 11 (and 9 more since the last report)"]
    assert rl.held() == 0


def test_counts_without_a_line_and_keys_are_separate():
    clock = Clock()
    rl = RateLimitedLog(logging.getLogger("test.ratelimit"), 10.0, first=1, clock=clock)
    assert rl.due(3, key="a") == 3  # the first report carries all three
    assert rl.due(5, key="a") == 0
    assert rl.due(1, key="b") == 1  # another kind is not held back by "a"
    clock.t = 10.0
    assert rl.due(2, key="a") == 7  # 5 held + 2 now: nothing lost from the count


def test_start_gives_a_steady_pace_from_the_moment_a_condition_began():
    clock = Clock()
    rl = RateLimitedLog(logging.getLogger("test.ratelimit"), 30.0, first=0, clock=clock)
    rl.start()
    ticks = []
    for s in range(0, 95):  # a "still ..." check every second for 95 s
        clock.t = float(s)
        if rl.due():
            ticks.append(s)
    assert ticks == [30, 60, 90]
    rl.reset()
    assert rl.due() == 1  # reset: the next occurrence is reported again at once (first=0 → due)


def test_drain_hands_over_what_is_held_once():
    # Reference: the counts put in; what was reported plus what drain returns is all of them.
    clock = Clock()
    rl = RateLimitedLog(logging.getLogger("test.ratelimit"), 10.0, first=1, clock=clock)
    reported = rl.due(2, key="edge") + rl.due(5, key="edge") + rl.due(1, key="stats") + rl.due(4, key="stats")
    assert reported == 2 + 1
    assert rl.drain() == {"edge": 5, "stats": 4}
    assert rl.drain() == {} and rl.held("edge") == 0
