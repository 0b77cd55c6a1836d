"""The serial source: the pure line framer, and the port reader on real pseudo-terminals.

The reader tests use real pty pairs (``os.openpty``), no mocks: the test writes into the
master as a microcontroller would, the source reads the slave through pyserial. The source
is always given a symlink as its port, and before a pty is closed the symlink is pointed at
nothing: a closed pty's ``/dev/pts/N`` number is soon reused by other programs on the machine,
and a retrying source must never open (and flush) someone else's terminal.

No timed assertions: waits are liveness bounds (generous, failing only when something never
happens), the checks are on content, order and counts.
"""

from __future__ import annotations

import asyncio
import logging
import os
import threading
import time
import tty
from pathlib import Path
from typing import Any, AsyncIterator

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamcond.config import Source
from streamcond.io.lineparse import LineParser
from streamcond.io.serialsource import Back, Data, LineFramer, Lost, SerialSource

LIVENESS_S = 15.0  # "never happened" bound for waits; not a performance claim


# --- LineFramer -------------------------------------------------------------------------------


def reference_split(stream: bytes, limit: int) -> tuple[list[bytes], int]:
    """The lines of a newline-terminated stream by the stdlib: ``bytes.split`` on LF, one
    trailing CR removed (``bytes.removesuffix``), empty lines skipped, lines over ``limit``
    counted as dropped."""
    assert stream.endswith(b"\n")
    kept: list[bytes] = []
    dropped = 0
    for raw in stream.split(b"\n")[:-1]:
        line = raw.removesuffix(b"\r")
        if not line:
            continue
        if len(line) > limit:
            dropped += 1
        else:
            kept.append(line)
    return kept, dropped


def feed_all(framer: LineFramer, chunks: list[bytes], t0: float = 0.0) -> tuple[list[bytes], int]:
    lines: list[bytes] = []
    dropped = 0
    for k, c in enumerate(chunks):
        ls, ts, d = framer.feed(c, t0 + k + 1.0)
        assert len(ls) == ts.shape[0]
        lines += ls
        dropped += d
    return lines, dropped


def test_lines_split_across_reads_are_joined() -> None:
    f = LineFramer(64)
    assert f.feed(b"12,3", 1.0)[0] == []
    assert f.partial == b"12,3"
    ls, ts, d = f.feed(b".5,0\n13,", 2.0)
    assert ls == [b"12,3.5,0"] and d == 0
    assert f.partial == b"13,"
    ls, _, _ = f.feed(b"3.6,1\n14,3.7,0\n", 3.0)
    assert ls == [b"13,3.6,1", b"14,3.7,0"]
    assert f.partial == b"" and f.lines == 3


def test_crlf_is_removed_also_when_cr_and_lf_arrive_in_different_reads() -> None:
    f = LineFramer(64)
    ls, _, _ = f.feed(b"a=1 b=2\r\nc=3\r", 1.0)
    assert ls == [b"a=1 b=2"]
    ls, _, _ = f.feed(b"\nd=4\r\n", 2.0)
    assert ls == [b"c=3", b"d=4"]
    # only one trailing CR is a terminator; a CR inside a line is the parser's business
    ls, _, _ = f.feed(b"x\ry\r\r\n", 3.0)
    assert ls == [b"x\ry\r"]


def test_empty_lines_are_skipped_not_counted() -> None:
    f = LineFramer(64)
    ls, ts, d = f.feed(b"\n\r\n1,2\n\n3,4\n", 1.0)
    assert ls == [b"1,2", b"3,4"] and d == 0 and ts.shape == (2,)


def test_line_exactly_at_the_limit_is_kept_one_more_byte_is_dropped() -> None:
    m = 16
    f = LineFramer(m)
    ok, long = b"a" * m, b"b" * (m + 1)
    ls, _, d = f.feed(ok + b"\n" + long + b"\n" + b"c\n", 1.0)
    assert ls == [ok, b"c"] and d == 1
    # m bytes plus the CR of a CRLF, with the LF still to come, is not over the limit
    ls, _, d = f.feed(ok + b"\r", 2.0)
    assert ls == [] and d == 0 and f.partial == ok + b"\r"
    ls, _, d = f.feed(b"\n", 3.0)
    assert ls == [ok] and d == 0
    assert f.dropped == 1


def test_an_over_long_partial_is_dropped_at_once_and_resynced_at_the_next_newline() -> None:
    m = 32
    f = LineFramer(m)
    ls, _, d = f.feed(b"good,1\n" + b"x" * 20, 1.0)
    assert ls == [b"good,1"] and d == 0
    ls, _, d = f.feed(b"x" * 20, 2.0)  # 40 bytes, no newline: over the limit now
    assert ls == [] and d == 1 and f.partial == b""
    for k in range(50):  # a line that never ends keeps no memory and is not counted again
        ls, _, d = f.feed(b"\xff" * 1000, 3.0 + k)
        assert ls == [] and d == 0 and f.partial == b""
    ls, _, d = f.feed(b"still the long one\nnext,2\nnext,3", 60.0)
    assert ls == [b"next,2"] and d == 0 and f.partial == b"next,3"
    assert f.dropped == 1


def test_resync_skips_the_fragment_before_the_first_newline() -> None:
    f = LineFramer(64, resync=True)
    ls, _, _ = f.feed(b"3,11.2,0.5", 1.0)  # the tail of "1003,11.2,0.5"
    assert ls == []
    ls, _, d = f.feed(b"\n1004,11.3,0.5\n", 2.0)
    assert ls == [b"1004,11.3,0.5"] and d == 0 and f.fragments == 1
    # reset after a reconnection: the partial line is reported and forgotten
    f.feed(b"1005,11", 3.0)
    assert f.reset(resync=False) == 1
    ls, _, _ = f.feed(b"1006,11.4,0.5\n", 4.0)
    assert ls == [b"1006,11.4,0.5"]


def test_time_spreading_closed_form() -> None:
    # Line j of the L lines completed by a read at t_host gets t_prev + (t_host - t_prev)·j/L
    # (the rule in LineFramer's docstring); dyadic times make the expected values exact.
    f = LineFramer(64, t_start=10.0)
    _, ts, _ = f.feed(b"a\nb\nc\nd\n", 11.0)
    assert np.array_equal(ts, [10.25, 10.5, 10.75, 11.0])
    _, ts, _ = f.feed(b"e\nf\n", 11.5)
    assert np.array_equal(ts, [11.25, 11.5])
    # a read that completes no line still moves t_prev: its bytes had arrived by then
    _, ts, _ = f.feed(b"g", 12.0)
    assert ts.shape == (0,)
    _, ts, _ = f.feed(b"\nh\n", 13.0)
    assert np.array_equal(ts, [12.5, 13.0])
    # dropped lines do not take a share of the interval
    _, ts, d = f.feed(b"i\n" + b"z" * 100 + b"\nj\n", 14.0)
    assert d == 1 and np.array_equal(ts, [13.5, 14.0])


def test_first_read_without_a_start_time_gives_all_its_lines_the_read_time() -> None:
    f = LineFramer(64)
    _, ts, _ = f.feed(b"a\nb\nc\n", 5.0)
    assert np.array_equal(ts, [5.0, 5.0, 5.0])
    _, ts, _ = f.feed(b"d\ne\n", 6.0)
    assert np.array_equal(ts, [5.5, 6.0])
    f.reset(t_start=8.0)
    _, ts, _ = f.feed(b"f\ng\n", 9.0)
    assert np.array_equal(ts, [8.5, 9.0])


_piece = st.one_of(
    st.binary(min_size=0, max_size=40).map(lambda b: b.replace(b"\n", b"").replace(b"\r", b"")),
    st.sampled_from([b"\n", b"\r\n", b"\r", b"\n\n"]),
)


@settings(max_examples=200, deadline=None)
@given(
    pieces=st.lists(_piece, min_size=1, max_size=60),
    cuts=st.lists(st.integers(0, 3000), max_size=30),
    limit=st.integers(1, 24),
)
def test_any_split_into_reads_gives_the_stdlib_lines(
    pieces: list[bytes], cuts: list[int], limit: int
) -> None:
    """Whatever the read boundaries, the lines and the drop count are those of splitting the
    whole stream at once with the standard library (see :func:`reference_split`)."""
    stream = b"".join(pieces) + b"\n"
    bounds = sorted({c % (len(stream) + 1) for c in cuts} | {0, len(stream)})
    chunks = [stream[a:b] for a, b in zip(bounds, bounds[1:])]
    want, want_dropped = reference_split(stream, limit)
    got, got_dropped = feed_all(LineFramer(limit), chunks)
    assert got == want
    assert got_dropped == want_dropped


# --- real pseudo-terminals --------------------------------------------------------------------


class Pty:
    """A pty pair standing in for a device: write into ``master``, the source reads ``path``."""

    def __init__(self) -> None:
        self.master, self.slave = os.openpty()
        # raw: no echo, no CR/LF mapping, no 8th-bit stripping between master and slave
        tty.setraw(self.master)
        self.path = os.ttyname(self.slave)
        self.closed = False

    def write(self, data: bytes) -> None:
        view = memoryview(data)
        while view:
            n = os.write(self.master, view)
            view = view[n:]

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            os.close(self.master)
            os.close(self.slave)


class Link:
    """The configured port path: a symlink we can re-point atomically."""

    def __init__(self, tmp: Path) -> None:
        self.path = tmp / "ttyPUMP0"
        self._tmp = tmp / "ttyPUMP0.new"
        self.point_at(str(tmp / "nothing-here"))

    def point_at(self, target: str) -> None:
        if self._tmp.is_symlink():
            self._tmp.unlink()
        os.symlink(target, self._tmp)
        os.replace(self._tmp, self.path)

    def dangle(self) -> None:
        self.point_at(str(self.path.parent / "nothing-here"))


@pytest.fixture
def ptys():
    made: list[Pty] = []

    def make() -> Pty:
        p = Pty()
        made.append(p)
        return p

    yield make
    for p in made:
        p.close()


class Reader:
    """Consumes a source's events in the test's event loop, framing the data."""

    def __init__(self, src: SerialSource, max_line_bytes: int = 4096) -> None:
        self.src = src
        self.it: AsyncIterator[Any] = src.events()
        self.framer = LineFramer(max_line_bytes)
        self.lines: list[bytes] = []
        self.times: list[float] = []
        self.dropped = 0
        self.other: list[Any] = []

    async def next_event(self) -> Any:
        ev = await asyncio.wait_for(self.it.__anext__(), LIVENESS_S)
        if isinstance(ev, Data):
            ls, ts, d = self.framer.feed(ev.data, ev.t_host)
            self.lines += ls
            self.times += ts.tolist()
            self.dropped += d
        else:
            self.other.append(ev)
        return ev

    async def until_lines(self, n: int) -> None:
        while len(self.lines) < n:
            await self.next_event()

    async def until(self, kind: type) -> Any:
        while True:
            ev = await self.next_event()
            if isinstance(ev, kind):
                return ev


def paced_writer(pty: Pty, lines: list[bytes], rate_hz: float, burst: int = 1) -> threading.Thread:
    """Write ``lines`` into the pty at ``rate_hz``, scheduled on the clock (not on sleeps),
    ``burst`` lines per write (a microcontroller's USB frames carry several lines)."""

    def run() -> None:
        t0 = time.monotonic()
        for i in range(0, len(lines), burst):
            delay = t0 + i / rate_hz - time.monotonic()
            if delay > 0:
                time.sleep(delay)
            for line in lines[i : i + burst]:  # back-to-back writes, then a pause
                pty.write(line)

    th = threading.Thread(target=run, daemon=True)
    th.start()
    return th


def csv_line(i: int) -> bytes:
    # the pump station's level (kPa) and motor current (A), invented values
    return b"%d,%.3f,%.2f\n" % (i, 11.0 + 0.001 * (i % 500), 4.0 + 0.01 * (i % 7))


@pytest.mark.parametrize(
    "n, coalesce_s, burst", [(400, 0.004, 1), (4000, 0.004, 10), (4000, 0.0, 10)]
)
def test_lines_at_1khz_all_arrive_in_order_with_increasing_host_times(
    tmp_path, ptys, n, coalesce_s, burst
) -> None:
    # 4000 lines with coalesced hand-overs: a second read of the port inside the coalescing
    # wait once lost bytes here ("readiness to read but returned no data")
    sent = [csv_line(i) for i in range(n)]
    pty = ptys()
    link = Link(tmp_path)
    link.point_at(pty.path)

    async def main() -> tuple[Reader, float, float]:
        src = SerialSource(str(link.path), clock=time.monotonic, coalesce_s=coalesce_s)
        r = Reader(src)
        assert await src.wait_open(LIVENESS_S)
        assert src.opened_at is not None
        r.framer.reset(t_start=src.opened_at)
        t_begin = time.monotonic()
        writer = paced_writer(pty, sent, rate_hz=1000.0, burst=burst)
        try:
            await r.until_lines(n)
        finally:
            await asyncio.to_thread(writer.join, LIVENESS_S)
            src.stop()
        return r, src.opened_at, t_begin

    r, opened_at, t_begin = asyncio.run(main())
    assert r.lines == [s.rstrip(b"\n") for s in sent]
    assert r.dropped == 0 and not r.other
    t = np.asarray(r.times)
    assert np.all(np.diff(t) > 0)
    # the injected clock is the one used (time.monotonic, far from time.time's epoch values)
    assert opened_at <= t_begin and opened_at < t[0] and t[-1] <= time.monotonic()


def test_garbage_and_over_long_lines_are_dropped_and_counted_good_lines_survive(
    tmp_path, ptys
) -> None:
    limit = 64
    good = [b"%d,%.1f,%.2f" % (i, 10.0 + i, 0.5 * i) for i in range(1, 7)]
    stream = (
        good[0] + b"\n"
        + b"\x00\xff\xfe\x80\x13junk\n"              # binary junk: a line the parser rejects
        + good[1] + b"\r\n"
        + b"7" * (limit + 10) + b"\n"                 # over-long, complete
        + good[2] + b"\n"
        + b"\xaa" * 3000                              # over-long, sent in pieces below
    )
    tail = b"\x55" * 3000 + b"\n" + good[3] + b"\n" + b"4,5\n" + good[4] + b"\n" + good[5] + b"\n"
    pty = ptys()
    link = Link(tmp_path)
    link.point_at(pty.path)

    async def main() -> Reader:
        src = SerialSource(str(link.path), clock=time.monotonic)
        r = Reader(src, max_line_bytes=limit)
        assert await src.wait_open(LIVENESS_S)
        try:
            pty.write(stream)
            await asyncio.sleep(0.05)  # let a read see the unterminated part alone
            pty.write(tail)
            await r.until_lines(8)  # 6 good lines, the junk line and the short "4,5"
        finally:
            src.stop()
        return r

    r = asyncio.run(main())
    assert r.dropped == 2
    parser = LineParser("csv", columns=["t", "level", "amps"], needed=["t", "level", "amps"],
                        max_line_bytes=limit)
    parsed = parser.feed_lines(r.lines, np.asarray(r.times))
    assert parsed.bad == 2  # the binary junk and the two-field line
    want = np.array([[float(x) for x in g.split(b",")] for g in good])
    assert np.array_equal(parsed.rows[:, :3], want)


def test_closed_pty_gives_lost_then_a_new_pty_behind_the_symlink_gives_back(
    tmp_path, ptys, caplog
) -> None:
    caplog.set_level(logging.INFO, logger="streamcond.io.serialsource")
    first, second = ptys(), ptys()  # second is made now but connected later
    link = Link(tmp_path)
    link.point_at(first.path)

    class CountingSource(SerialSource):
        """Counts open attempts (it still opens the real port)."""

        attempts = 0

        def _open(self) -> Any:
            CountingSource.attempts += 1
            return super()._open()

    async def main() -> tuple[Reader, Lost, Back, int]:
        src = CountingSource(
            str(link.path), clock=time.monotonic, min_backoff_s=0.01, max_backoff_s=0.05
        )
        r = Reader(src)
        assert await src.wait_open(LIVENESS_S)
        try:
            first.write(b"1,11.0,4.0\n2,11.1,4.0\n")
            await r.until_lines(2)
            link.dangle()
            first.close()
            lost = await r.until(Lost)
            r.framer.reset()
            at_loss = CountingSource.attempts
            deadline = time.monotonic() + LIVENESS_S
            while CountingSource.attempts < at_loss + 5 and time.monotonic() < deadline:
                await asyncio.sleep(0.01)  # let several reopen attempts fail
            retries = CountingSource.attempts - at_loss
            link.point_at(second.path)
            back = await r.until(Back)
            r.framer.reset(t_start=back.t_host)
            second.write(b"3,11.2,4.1\n4,11.3,4.1\n")
            await r.until_lines(4)
        finally:
            src.stop()
        return r, lost, back, retries

    r, lost, back, retries = asyncio.run(main())
    assert r.lines == [b"1,11.0,4.0", b"2,11.1,4.0", b"3,11.2,4.1", b"4,11.3,4.1"]
    assert lost.reason
    assert retries >= 5
    # one Lost for the whole outage, however many retries, then one Back
    assert [type(e) for e in r.other] == [Lost, Back]
    assert r.times[1] <= lost.t_host <= back.t_host < r.times[2]
    # rate-limited log: the loss once and the return once, not a line per retry
    msgs = [
        rec.getMessage()
        for rec in caplog.records
        if rec.name == "streamcond.io.serialsource" and rec.levelno >= logging.WARNING
    ]
    assert len(msgs) == 2, msgs
    assert msgs[0].startswith("lost ") and "is back" in msgs[1]


def test_a_port_missing_at_start_is_lost_from_the_start_and_back_when_it_appears(
    tmp_path, ptys
) -> None:
    link = Link(tmp_path)  # dangling
    pty = ptys()

    async def main() -> Reader:
        src = SerialSource(str(link.path), min_backoff_s=0.01, max_backoff_s=0.05)
        r = Reader(src)
        try:
            lost = await r.until(Lost)
            assert "cannot open" in lost.reason
            assert not src.is_open
            link.point_at(pty.path)
            await r.until(Back)
            assert src.is_open
            pty.write(b"1,10.5,3.9\n")
            await r.until_lines(1)
        finally:
            src.stop()
        return r

    r = asyncio.run(main())
    assert r.lines == [b"1,10.5,3.9"]


def test_stop_wakes_a_blocked_read_and_a_backoff_wait(tmp_path, ptys) -> None:
    """The source's own waits here are 30 s (read) and 60 s (backoff); ``stop`` must not wait
    for them: it returns with the thread ended, well inside its 10 s join bound."""
    pty = ptys()
    link = Link(tmp_path)
    link.point_at(pty.path)
    (tmp_path / "sub").mkdir()
    missing = Link(tmp_path / "sub")  # dangling

    async def main() -> None:
        reading = SerialSource(str(link.path), read_timeout_s=30.0)
        assert await reading.wait_open(LIVENESS_S)
        it = reading.events()
        pty.write(b"1,2,3\n")
        got = b""
        while not got.endswith(b"\n"):
            ev = await asyncio.wait_for(it.__anext__(), LIVENESS_S)
            assert isinstance(ev, Data)
            got += ev.data
        # everything sent has been read: the thread is now in (or entering) a 30 s read
        reading.stop(timeout=10.0)
        assert reading._thread is not None and not reading._thread.is_alive()
        assert not reading.is_open
        rest = [ev async for ev in it]  # the event stream ends
        assert rest == []

        waiting = SerialSource(str(missing.path), min_backoff_s=60.0, max_backoff_s=60.0)
        it = waiting.events()
        assert isinstance(await asyncio.wait_for(it.__anext__(), LIVENESS_S), Lost)
        waiting.stop(timeout=10.0)
        assert waiting._thread is not None and not waiting._thread.is_alive()

    asyncio.run(main())


def test_config_source_is_accepted_and_a_bad_setting_is_raised_not_retried(
    tmp_path, ptys
) -> None:
    pty = ptys()
    cfg = Source(kind="serial", port=pty.path, baud=9600, parity="E", bytesize=7, stopbits=2,
                 columns=["t", "level"], time_column="t")
    src = SerialSource(cfg)
    assert (src.port, src.baud, src.parity, src.bytesize, src.stopbits) == (
        pty.path, 9600, "E", 7, 2
    )
    link = Link(tmp_path)
    link.point_at(pty.path)

    async def main() -> None:
        bad = SerialSource(str(link.path), baud=-1)  # pyserial: "Not a valid baudrate"
        with pytest.raises(ValueError):
            async for _ in bad.events():
                pass
        bad.stop()

    asyncio.run(main())
