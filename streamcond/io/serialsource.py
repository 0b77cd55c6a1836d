"""The serial source: a microcontroller's line stream read from a serial port.

Two parts, split the sans-I/O way (DESIGN.md "Architecture"):

* :class:`LineFramer` — pure: bytes in, complete lines and their host receive times out. No
  port, no clock, no thread; the caller passes the time each read returned.
* :class:`SerialSource` — the thin edge: a pyserial port read in a dedicated thread (pyserial
  is blocking; the asyncio loop must never wait on it), each chunk handed to the event loop
  with :meth:`asyncio.loop.call_soon_threadsafe`. It survives the device vanishing (USB
  unplugged, pty closed): it reports :class:`Lost`, retries with capped exponential backoff,
  and reports :class:`Back` when the port opens again.

How a consumer should wire it::

    src = SerialSource(cfg.source)
    framer = LineFramer(cfg.source.max_line_bytes, resync=True)
    async for ev in src.events():
        if isinstance(ev, Data):
            lines, times, dropped = framer.feed(ev.data, ev.t_host)
            parsed = parser.feed_lines(lines, times)
        elif isinstance(ev, Lost):
            framer.reset()                      # a partial line is garbage now
            ...                                 # a ``fault`` record
        elif isinstance(ev, Back):
            framer.reset(t_start=ev.t_host, resync=True)

``resync=True`` because pyserial flushes the input buffer when it opens a port (and a device
streams without waiting for us), so the first bytes read are most likely the middle of a line.

pyserial on a pseudo-terminal (what the tests use; observed with pyserial 3.5 on Linux):

* Closing the master is the "unplug": the slave's ``/dev/pts/N`` node disappears at once,
  even while the slave is still open; ``in_waiting`` then raises a bare :class:`OSError`
  (EIO) and ``read`` raises :class:`serial.SerialException` ("device reports readiness to read
  but returned no data"), because ``select`` says readable and ``os.read`` returns ``b""``.
  :class:`serial.SerialException` subclasses :class:`OSError`, so one ``except OSError``
  catches both, and an EOF never reaches us as an empty read (a plain empty read is a timeout).
* Bytes written into the master just before it is closed are not delivered to the slave.
* Bytes sent before the port was opened are flushed by ``open()``.
"""

from __future__ import annotations

import asyncio
import logging
import math
import threading
import time
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Union

import numpy as np

from ..ratelimit import RateLimitedLog

if TYPE_CHECKING:
    from ..config import Source

log = logging.getLogger(__name__)

# --- events -----------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Data:
    """Bytes as one read returned them; ``t_host`` is the clock right after that read."""

    data: bytes
    t_host: float


@dataclass(frozen=True, slots=True)
class Lost:
    """The device went away (or could not be opened); the source keeps retrying."""

    t_host: float
    reason: str


@dataclass(frozen=True, slots=True)
class Back:
    """The port is open again after a :class:`Lost`; its input buffer starts empty.

    ``t_host`` is the clock just before the successful open (which flushes the input), so no
    byte read afterwards arrived before it: a valid ``t_start`` for :class:`LineFramer`.
    """

    t_host: float


SourceEvent = Union[Data, Lost, Back]

# --- framing ----------------------------------------------------------------------------------

_EMPTY_TIMES = np.empty(0, dtype=np.float64)


class LineFramer:
    """Splits a byte stream into lines and gives each line a host receive time.

    Lines end at ``\\n``; one trailing ``\\r`` is removed (CRLF devices); empty lines carry
    nothing and are skipped (not counted). A line whose content (without the newline and that
    ``\\r``) is longer than ``max_line_bytes`` is dropped and counted. An unterminated line is
    dropped as soon as it is over the limit — memory stays bounded whatever the device sends —
    and the bytes up to its eventual newline are discarded (resync).

    Host times: the bytes of one read arrived after the previous read returned (they were not
    in it) and by the time this read returned, so the ``L`` lines completed by a read at
    ``t_host`` are spread evenly over that interval: line ``j`` (1-based) gets
    ``t_prev + (t_host - t_prev)·j/L``, the last line exactly ``t_host``. Any read counts as
    ``t_prev``, also one that completed no line. Times are therefore strictly increasing while
    read times are (and ``(t_host - t_prev)/L`` is above the float resolution of the clock).

    The very first read has no previous read. If ``t_start`` is given (the time the port was
    opened: nothing read later can have arrived before it, since opening flushes the input)
    it plays the previous read; otherwise every line of the first read gets ``t_host`` itself
    — the one place where equal times can occur; we prefer that to inventing a spacing.

    ``resync=True`` discards everything up to and including the first newline: the stream was
    joined mid-line, and a fragment such as ``3,11.2,0.5`` cut from ``1003,11.2,0.5`` would
    parse as a plausible but wrong row. Skipped fragments are counted in :attr:`fragments`,
    not as dropped lines.
    """

    def __init__(
        self, max_line_bytes: int = 4096, *, t_start: float | None = None, resync: bool = False
    ) -> None:
        if max_line_bytes < 1:
            raise ValueError("max_line_bytes must be at least 1")
        self.max_line_bytes = int(max_line_bytes)
        self._partial = b""
        self._discarding = bool(resync)
        self._resyncing = bool(resync)
        self._t_prev: float | None = t_start
        #: Complete lines returned, lines dropped as over-long, fragments skipped by resync.
        self.lines = 0
        self.dropped = 0
        self.fragments = 0

    def reset(self, *, t_start: float | None = None, resync: bool = False) -> int:
        """Forget the partial line and the previous read time (after a reconnection).

        Returns 1 when a non-empty partial line was discarded (the caller may count it as a
        bad line: its end never came), else 0.
        """
        lost = 1 if (self._partial and not self._discarding) else 0
        self._partial = b""
        self._discarding = bool(resync)
        self._resyncing = bool(resync)
        self._t_prev = t_start
        return lost

    @property
    def partial(self) -> bytes:
        """The bytes of the line not yet ended (empty while discarding)."""
        return self._partial

    def _over(self, line: bytes) -> bool:
        """Is an unterminated line already known to be over the limit?"""
        m = self.max_line_bytes
        n = len(line)
        # A last byte ``\r`` may still turn out to be the CR of a CRLF, which does not count.
        return n > m + 1 or (n == m + 1 and not line.endswith(b"\r"))

    def feed(self, data: bytes, t_host: float) -> tuple[list[bytes], np.ndarray, int]:
        """Take the bytes of one read; return ``(lines, times, dropped)`` for this read.

        ``lines`` are the complete lines (bytes, no terminator), ``times`` their host receive
        times (float64, same length), ``dropped`` the number of over-long lines dropped by
        this call.
        """
        t_prev, self._t_prev = self._t_prev, float(t_host)
        dropped = 0
        buf = bytes(data)
        if self._discarding:
            nl = buf.find(b"\n")
            if nl < 0:
                return [], _EMPTY_TIMES, 0
            buf = buf[nl + 1 :]
            self._discarding = False
            if self._resyncing:
                self._resyncing = False
                self.fragments += 1
        elif self._partial:
            buf = self._partial + buf
        cut = buf.rfind(b"\n")
        if cut < 0:
            body, tail = b"", buf
        else:
            body, tail = buf[:cut], buf[cut + 1 :]
        if self._over(tail):
            # An unterminated over-long line: count it now, drop what we have, and discard
            # the rest of it when it arrives.
            dropped += 1
            tail = b""
            self._discarding = True
        self._partial = tail
        if cut < 0:
            self.dropped += dropped
            return [], _EMPTY_TIMES, dropped

        # CRLF → LF for every line at once (C-level), then split; one \r per line goes.
        if b"\r" in body:
            body = body.replace(b"\r\n", b"\n")
            if body.endswith(b"\r"):
                body = body[:-1]
        lines = body.split(b"\n")
        if b"" in lines:
            lines = list(filter(None, lines))
        m = self.max_line_bytes
        if len(body) > m and lines and max(map(len, lines)) > m:
            # The rare path (something over-long came in whole): filter line by line.
            kept = [ln for ln in lines if len(ln) <= m]
            dropped += len(lines) - len(kept)
            lines = kept
        self.dropped += dropped
        n = len(lines)
        self.lines += n
        if n == 0:
            return [], _EMPTY_TIMES, dropped
        if t_prev is None:
            times = np.full(n, self._t_prev, dtype=np.float64)
        else:
            # Written as t_host − Δ·(L−j)/L so that the last line is exactly t_host.
            span = self._t_prev - t_prev
            times = self._t_prev - span * (np.arange(n - 1, -1, -1, dtype=np.float64) / n)
        return lines, times, dropped


# --- the port reader --------------------------------------------------------------------------


def _name_os_thread(name: str) -> None:
    """Give the calling thread an OS-visible name (Linux ``prctl(PR_SET_NAME)``, 15 bytes), so
    per-thread CPU in ``/proc/<pid>/task/*/comm`` and ``top -H`` says which thread is which."""
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(15, name.encode()[:15], 0, 0, 0)  # 15 = PR_SET_NAME (linux/prctl.h)
    except (OSError, AttributeError):  # not Linux: the name is cosmetic
        pass


_STOP = object()  # end of the event stream


class _Failure:
    """An unexpected exception of the reader thread, re-raised by :meth:`SerialSource.events`."""

    __slots__ = ("exc",)

    def __init__(self, exc: BaseException) -> None:
        self.exc = exc


class SerialSource:
    """Reads a serial port in a thread and yields :data:`SourceEvent` to asyncio.

    Each read takes whatever has arrived (``read(in_waiting or 1)``: it returns as soon as a
    byte is there, then takes the rest in the next read), so a chunk's ``t_host`` is close to
    the arrival of its last byte and chunks stay small.

    Loss: any :class:`OSError` from the port (pyserial's :class:`serial.SerialException` is
    one) closes it and emits :class:`Lost` once; reopening is retried after ``min_backoff_s``,
    doubling up to ``max_backoff_s``, forever, and :class:`Back` is emitted when it works. A
    port that cannot be opened at start counts as lost from the start. Exceptions of any other
    kind (a bad setting: :class:`ValueError`) end the source and are raised from
    :meth:`events`.

    Logging is rate-limited (:class:`streamcond.ratelimit.RateLimitedLog`): the loss once,
    then "still waiting" at most once per ``log_every_s``, and the return once.

    ``stop()`` ends the thread at once (pyserial's ``cancel_read`` wakes a blocked read, a
    :class:`threading.Event` wakes a backoff wait) and the thread closes the port.
    """

    def __init__(
        self,
        source: "Source | str",
        *,
        baud: int | None = None,
        parity: str | None = None,
        bytesize: int | None = None,
        stopbits: float | None = None,
        clock: Callable[[], float] = time.time,
        read_timeout_s: float = 0.1,
        min_backoff_s: float = 0.1,
        max_backoff_s: float = 2.0,
        log_every_s: float = 60.0,
        coalesce_s: float = 0.004,
        sink: Callable[[SourceEvent], None] | None = None,
    ) -> None:
        """``source`` is the config's :class:`streamcond.config.Source` (``port``, ``baud``,
        ``parity``, ``bytesize``, ``stopbits``) or just a port (device path or pyserial URL,
        then 115200 8N1 unless given); framing keywords override the config's values.

        ``sink``: called in the reader thread with every :data:`SourceEvent` instead of
        queueing it for :meth:`events` (which then only ends at stop, or raises what the
        thread raised). For a consumer whose work is itself blocking-free and thread-safe
        (the daemon's conditioning): it saves an event-loop wake-up per read. An exception
        from the sink ends the source like any other unexpected exception."""
        if isinstance(source, str):
            port, cfg = source, None
        else:
            port, cfg = source.port, source
        if not port:
            raise ValueError("a serial port (device path or pyserial URL) is required")
        if not (0 < min_backoff_s <= max_backoff_s):
            raise ValueError("need 0 < min_backoff_s <= max_backoff_s")

        def pick(given: Any, name: str, default: Any) -> Any:
            if given is not None:
                return given
            return getattr(cfg, name) if cfg is not None else default

        self.port: str = port
        self.baud = int(pick(baud, "baud", 115200))
        self.parity = str(pick(parity, "parity", "N"))
        self.bytesize = int(pick(bytesize, "bytesize", 8))
        self.stopbits = pick(stopbits, "stopbits", 1)
        self.clock = clock
        self.read_timeout_s = float(read_timeout_s)
        self.min_backoff_s = float(min_backoff_s)
        self.max_backoff_s = float(max_backoff_s)
        self.log_every_s = float(log_every_s)
        #: Shortest time between two hand-overs of data to the event loop while bytes keep
        #: coming (bounds the wake-ups; a line is never held longer than this).
        self.coalesce_s = float(coalesce_s)
        self._sink = sink
        #: ``time.monotonic()`` of the reader loop's latest turn (a read returned or an open
        #: was tried): the daemon's watchdog checks that the reader is alive.
        self.heartbeat = time.monotonic()
        self._waiting_log = RateLimitedLog(log, self.log_every_s, first=0)
        #: Clock time just before the last successful open (``None`` until then); see
        #: :class:`Back` for why "before".
        self.opened_at: float | None = None
        self._stop = threading.Event()
        self._lock = threading.Lock()  # guards _serial between the reader and stop()
        self._serial: Any = None
        self._thread: threading.Thread | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._queue: asyncio.Queue[Any] | None = None
        self._open_evt: asyncio.Event | None = None

    # -- public, called from the event loop --------------------------------------------------
    @property
    def is_open(self) -> bool:
        """Whether the port is open right now."""
        return self._serial is not None

    def start(self) -> None:
        """Start the reader thread (idempotent). Must be called with a running event loop."""
        if self._thread is not None:
            return
        self._loop = asyncio.get_running_loop()
        self._queue = asyncio.Queue()
        self._open_evt = asyncio.Event()
        self._thread = threading.Thread(
            target=self._run, name=f"serial-reader {self.port}", daemon=True
        )
        self._thread.start()

    async def wait_open(self, timeout: float | None = None) -> bool:
        """Wait until the port is open (starting the source if needed); False on timeout."""
        self.start()
        assert self._open_evt is not None
        try:
            await asyncio.wait_for(self._open_evt.wait(), timeout)
        except asyncio.TimeoutError:
            return False
        return True

    async def events(self) -> AsyncIterator[SourceEvent]:
        """Yield :class:`Data`, :class:`Lost` and :class:`Back` until :meth:`stop`."""
        self.start()
        assert self._queue is not None
        while True:
            item = await self._queue.get()
            if item is _STOP:
                return
            if isinstance(item, _Failure):
                raise item.exc
            yield item

    def stop(self, timeout: float = 2.0) -> None:
        """End the reader thread and close the port; returns once the thread has ended.

        Blocks the caller for the time it takes the thread to notice (a wake-up, not a
        timeout: normally well under a millisecond).
        """
        self._stop.set()
        with self._lock:
            ser = self._serial
            if ser is not None:
                cancel = getattr(ser, "cancel_read", None)
                if cancel is not None:
                    try:
                        cancel()
                    except OSError:  # the port is going away anyway
                        pass
        t = self._thread
        if t is not None and t is not threading.current_thread():
            t.join(timeout)
            if t.is_alive():
                log.error("serial reader for %s did not stop within %.1f s", self.port, timeout)

    async def __aenter__(self) -> "SerialSource":
        self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        self.stop()

    # -- the reader thread -------------------------------------------------------------------
    def _post(self, item: Any) -> None:
        if self._sink is not None and isinstance(item, (Data, Lost, Back)):
            # Consumed right here in the reader thread: no hand-over, no event-loop wake-up.
            self._sink(item)
            return
        loop, q = self._loop, self._queue
        assert loop is not None and q is not None
        try:
            loop.call_soon_threadsafe(q.put_nowait, item)
        except RuntimeError:
            # The loop is closed: nobody is listening any more.
            self._stop.set()

    def _set_open(self, is_open: bool) -> None:
        loop, evt = self._loop, self._open_evt
        assert loop is not None and evt is not None
        try:
            loop.call_soon_threadsafe(evt.set if is_open else evt.clear)
        except RuntimeError:
            self._stop.set()

    def _open(self) -> Any:
        import serial  # pyserial; imported here so the pure framer needs no serial package

        return serial.serial_for_url(
            self.port,
            baudrate=self.baud,
            parity=self.parity,
            bytesize=self.bytesize,
            stopbits=self.stopbits,
            timeout=self.read_timeout_s,
        )

    def _close(self) -> None:
        with self._lock:
            ser, self._serial = self._serial, None
        if ser is not None:
            try:
                ser.close()
            except OSError:
                pass
            self._set_open(False)

    def _connect(self, first: bool) -> bool:
        """Open the port, retrying with backoff; False when stopped first."""
        delay = self.min_backoff_s
        lost_at: float | None = None  # monotonic, for the log only
        if not first:
            lost_at = time.monotonic()
            self._waiting_log.start()
        while not self._stop.is_set():
            self.heartbeat = time.monotonic()
            # Taken before opening: open() flushes the input, so every byte read later
            # arrived after this instant (a valid ``t_start`` for the framer).
            t = self.clock()
            try:
                ser = self._open()
            except OSError as e:
                now = time.monotonic()
                if lost_at is None:
                    # could not open at start: lost from the start
                    lost_at = now
                    self._waiting_log.start()
                    log.warning("cannot open %s (%s); will keep retrying", self.port, e)
                    self._post(Lost(self.clock(), f"cannot open: {e}"))
                else:
                    self._waiting_log.log(
                        logging.WARNING, "still waiting for %s (down %.0f s; last error: %s)",
                        self.port, now - lost_at, e,
                    )
                if self._stop.wait(delay):
                    return False
                delay = min(2.0 * delay, self.max_backoff_s)
                continue
            with self._lock:
                if self._stop.is_set():
                    ser.close()
                    return False
                self._serial = ser
            self.opened_at = t
            self._set_open(True)
            if lost_at is None:
                log.info("opened %s at %d baud", self.port, self.baud)
            else:
                log.warning("%s is back after %.1f s", self.port, time.monotonic() - lost_at)
                self._post(Back(t))
            return True
        return False

    def _run(self) -> None:
        _name_os_thread("serial-reader")
        try:
            if not self._connect(first=True):
                return
            pending: list[bytes] = []
            last_post = -math.inf
            while not self._stop.is_set():
                ser = self._serial
                try:
                    waiting = ser.in_waiting
                    data = ser.read(waiting or 1)
                    if data and not waiting:
                        # woken by the first byte: the rest of its line is usually there
                        # already; take it in this turn (one hand-over, not two)
                        more = ser.in_waiting
                        if more:
                            data += ser.read(more)
                    t = self.clock()
                    self.heartbeat = time.monotonic()
                    if data:
                        pending.append(data)
                    # Hand over at most every coalesce_s: each hand-over wakes the event loop,
                    # and at a kilohertz of lines those wake-ups would cost more than the
                    # conditioning. Too soon: wait out the rest; then a quiet line is handed
                    # over at once, a busy one by the next read (always the plain
                    # in_waiting-then-read pattern above: nothing else reads the port).
                    if pending and t - last_post < self.coalesce_s:
                        self._stop.wait(self.coalesce_s - (t - last_post))
                        if ser.in_waiting:
                            continue
                        t = self.clock()
                except OSError as e:
                    # SerialException is an OSError; a hung-up pty gives EIO from in_waiting
                    # or "readiness to read but returned no data" from read.
                    if self._stop.is_set():
                        break
                    t = self.clock()
                    if pending:  # what had arrived before the loss is still data
                        self._post(Data(b"".join(pending), t))
                        pending.clear()
                    log.warning("lost %s (%s); will keep retrying", self.port, e)
                    self._close()
                    self._post(Lost(t, str(e) or type(e).__name__))
                    if not self._connect(first=False):
                        break
                    continue
                if pending and not self._stop.is_set():
                    self._post(Data(b"".join(pending), t))
                    pending.clear()
                    last_post = t
        except BaseException as e:  # a bug or a bad setting: surface it, do not die silently
            log.exception("serial reader for %s failed", self.port)
            self._post(_Failure(e))
        finally:
            self._close()
            self._post(_STOP)
