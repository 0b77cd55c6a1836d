"""MQTT publisher: records from the durable spool to the broker, at least once, in order.

Topics (DESIGN.md "MQTT topics (contract)"; ``<prefix>`` is ``Config.topic_prefix``, by
default ``streamcond/<station.name>``):

=============================  ========================================  =====  ========
topic                          payload                                   QoS    retained
=============================  ========================================  =====  ========
``<prefix>/<channel>/edge``    the ``edge`` record                       config no
``<prefix>/<channel>/state``   current level: a ``state`` record, or,    config yes
                               after an edge, ``{"kind":"state",
                               "channel","t","level","value","seq"}``
                               taken from that edge
``<prefix>/<channel>/stats``   the ``stats`` record                      config no
``<prefix>/<channel>/measure`` the latest ``measure`` record             config yes
``<prefix>/<channel>/fault``   a channel ``fault`` record                config no
``<prefix>/fault``             a source-wide ``fault`` record            config no
``<prefix>/gap``               a ``gap`` record (source-wide)            config no
``<prefix>/status``            ``online`` on every (re)connect;          1      yes
                               ``offline`` on a clean stop and as the
                               broker-held last will
=============================  ========================================  =====  ========

``summary`` records (end of a replay) are not published. Payloads are
:func:`streamcond.records.to_json` of the record, UTF-8. Every edge is followed by the
retained state it leaves behind, so a late subscriber learns the current level of each channel
from the broker alone.

Delivery
--------
Records are stored in the spool (:mod:`streamcond.io.spool`) before they are sent; the
publisher drains the spool in id order and removes an item only after the broker has
acknowledged it (QoS 1: PUBACK; QoS 2: PUBCOMP; QoS 0: once the packet has been handed to
the socket). It keeps up to ``window`` QoS ≥ 1 messages in flight: a stop-and-wait sender
(window 1) is limited to one message per round trip, a window lets the broker's
acknowledgements stream back while later messages are already on the wire.

Ordering: MQTT 3.1.1 §4.6 (OASIS standard, 2014) has the broker forward the messages of one
client on a topic in the order it received them, and one TCP connection delivers packets in
order. The publisher hands spool items to the paho client's synchronous ``publish`` in
spool-id order, so the PUBLISH packets go out in that order, and acknowledges in the spool
only the *contiguous* prefix of completed messages. After a connection loss everything not
acknowledged is sent again from the oldest un-acknowledged item, on a fresh session:
delivery is at least once, so consumers drop duplicates by ``seq`` (edges) or ``t``.

Catching up: after an outage the spool may hold tens of thousands of records; the issue's
goal is the backlog delivered within about a second of the broker's return. The cost is per
message, so (1) spool items go to paho's ``publish`` directly, one ``on_publish`` callback
marking them done — not one coroutine, task and timeout per message through aiomqtt's
``publish``; (2) paho's own in-flight limit is switched off (0), because under its limit paho
rescans every message it holds at each acknowledgement, and the window is kept here; (3) the
spool is read ahead in pages of :data:`PAGE` and acknowledgements are written in batches of up
to :data:`ACK_BATCH`, as one range delete each; (4) in a backlog (:data:`BACKLOG` or more
items read ahead) a retained ``state`` followed by a later ``state`` of the same channel is
acknowledged without being sent — the broker would replace it at once, and every edge still
goes out, so a subscriber loses nothing it could not get from the edges.

aiomqtt facts this relies on (aiomqtt 2.x, read from its source): the paho client is
``Client._client`` and its ``on_publish`` is aiomqtt's, which the publisher wraps for the
session (the status messages still go through ``await client.publish(..., timeout=...)``,
which returns after the PUBACK). A publish pending when the connection drops is *not* failed
by aiomqtt; the loss is seen through ``client.messages``, whose iteration raises
:class:`aiomqtt.MqttError` on disconnection, so the publisher watches that, and an item not
acknowledged within ``publish_timeout_s`` ends the session. aiomqtt ignores a disconnection
before CONNACK and would wait out its whole connect timeout on an endpoint that accepts the
connection and closes it; the publisher wraps ``on_disconnect`` to fail that attempt at once.

Live, caught up (the usual case): the daemon's emitter hands each batch it has just committed
to :meth:`Publisher.offer` with the ids the spool gave it, and a publisher that has read
everything before them sends them as they are — no read back from the spool; anything that
does not follow on (a gap, a backlog still being read, a new session) sends it back to reading
the spool, so the shortcut never skips or reorders. The acknowledgements of a live stream go
with the spool's next commit (``Spool.ack_soon``: no transaction and no thread hop of their
own; on their own after :data:`ACK_FLUSH_S` when nothing else is committed): a SIGKILL before
that can only bring acknowledged records back, to be sent again — at least once, never a loss.

The event loop: the other spool calls (``peek``, ``ack``) run in a worker thread
(:func:`asyncio.to_thread`). They are short — a range read of at most :data:`PAGE` rows, one
DELETE per batch of acknowledgements, batched so a burst of PUBACKs costs one commit — but the
spool serialises callers with a lock, and the daemon's ``put_many`` holds it through an fsync
(``synchronous=FULL``), which on an SD card can take tens of milliseconds; on the loop thread
that wait would stall the serial reader's hand-offs and the MQTT keepalive. The spool is
thread-safe (an internal lock), so this costs one thread hop per batch. Connecting (socket,
TLS handshake) runs in a worker thread inside aiomqtt; reading the password and certificate
files via :func:`asyncio.to_thread` as well.

Secrets: the password is read from ``password_file`` at each connection attempt (so a
rotated password is picked up on reconnect), handed to the client and never stored on the
publisher, logged or put into an exception message.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import logging
import math
import ssl
import time
from dataclasses import dataclass, field
from typing import Any

import aiomqtt

from ..config import Mqtt
from .. import records
from ..ratelimit import RateLimitedLog
from ..records import to_json
from .spool import Spool, SpoolError, SpoolItem

log = logging.getLogger(__name__)

STATUS_ONLINE = b"online"
STATUS_OFFLINE = b"offline"
#: QoS of the status topic and of the last will (the contract asks for QoS 1 there).
STATUS_QOS = 1

#: One message as stored in the spool: topic, payload, qos, retain, kind.
Message = tuple[str, bytes, int, bool, str]

_CHANNEL_TOPICS = {
    # kind: (topic segment, retained)
    "edge": ("edge", False),
    "state": ("state", True),
    "stats": ("stats", False),
    "measure": ("measure", True),
    "fault": ("fault", False),
}
_SOURCE_TOPICS = {"gap": ("gap", False), "fault": ("fault", False)}
_NOT_PUBLISHED = frozenset({"summary"})
_TOPIC_FORBIDDEN = ("+", "#", "\x00")


def _raise_if_cancelled(cause: BaseException | None = None) -> None:
    """End a task whose cancellation was swallowed on the way.

    In Python 3.11 ``asyncio.wait_for`` (which the MQTT client uses for its timeouts) can
    return a result, or raise its timeout, when the outer task is cancelled at the moment the
    inner operation finishes; the request stays pending (``Task.cancelling()``) but nothing
    raises it, and a publisher then idling on its events would never end.
    """
    me = asyncio.current_task()
    if me is not None and me.cancelling():
        raise asyncio.CancelledError() from cause


def _check_prefix(prefix: str) -> str:
    p = prefix.rstrip("/")
    if not p or any(c in p for c in _TOPIC_FORBIDDEN):
        raise ValueError(
            f"the MQTT topic prefix {prefix!r} must be non-empty and contain no '+', '#' or NUL"
        )
    return p


def _check_channel(channel: Any) -> str:
    if not isinstance(channel, str) or not channel or "/" in channel or any(
        c in channel for c in _TOPIC_FORBIDDEN
    ):
        raise ValueError(f"channel name {channel!r} cannot be an MQTT topic segment")
    return channel


def topic_for(record: dict[str, Any], prefix: str, qos: int) -> list[Message]:
    """The MQTT messages for one record, per the table in this module's docstring.

    Returns ``(topic, payload, qos, retain, kind)`` tuples, ready for ``Spool.put_many``;
    ``kind`` is the record kind the payload carries (``"state"`` for the state derived from
    an edge). An empty list for records that are not published (``summary``). Raises
    :class:`ValueError` for a record kind the contract has no topic for, so a new kind is a
    decision, not a silent drop.
    """
    if qos not in (0, 1, 2):
        raise ValueError(f"MQTT QoS must be 0, 1 or 2, not {qos!r}")
    p = _check_prefix(prefix)
    kind = record.get("kind")
    if kind in _NOT_PUBLISHED:
        return []
    channel = record.get("channel")
    if channel is None:
        if kind not in _SOURCE_TOPICS:
            raise ValueError(f"record kind {kind!r} without a channel has no MQTT topic")
        seg, retain = _SOURCE_TOPICS[kind]
        return [(f"{p}/{seg}", to_json(record).encode("utf-8"), qos, retain, kind)]
    if kind not in _CHANNEL_TOPICS:
        raise ValueError(f"record kind {kind!r} has no MQTT topic")
    ch = _check_channel(channel)
    seg, retain = _CHANNEL_TOPICS[kind]
    out: list[Message] = [(f"{p}/{ch}/{seg}", to_json(record).encode("utf-8"), qos, retain, kind)]
    if kind == "edge":
        # The level an edge leaves behind is the channel's current state: retained, so a
        # subscriber arriving later still learns it.
        state = records.state_after(record)
        out.append((f"{p}/{ch}/state", to_json(state).encode("utf-8"), qos, True, "state"))
    return out


def default_client_id(prefix: str) -> str:
    """The derived client id (one statement of the rule: :func:`streamcond.config.default_client_id`)."""
    from ..config import default_client_id as derive

    return derive(prefix)


def read_password(path: str) -> str:
    """The password in ``path``: the file's text without one trailing line break.

    Raises :class:`OSError`/:class:`ValueError` naming the path only, never the content.
    """
    try:
        with open(path, "rb") as f:
            raw = f.read()
    except OSError as e:
        raise OSError(f"cannot read the MQTT password file {path!r}: {e.strerror or e}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise ValueError(f"the MQTT password file {path!r} is not UTF-8 text") from None
    if text.endswith("\r\n"):
        text = text[:-2]
    elif text.endswith("\n"):
        text = text[:-1]
    return text


def _tls_context(cfg: Mqtt) -> ssl.SSLContext | None:
    """A verifying client TLS context when ``ca_file`` or ``cert_file`` is set, else None."""
    if cfg.ca_file is None and cfg.cert_file is None:
        return None
    ctx = ssl.create_default_context(ssl.Purpose.SERVER_AUTH, cafile=cfg.ca_file)
    if cfg.cert_file is not None:
        ctx.load_cert_chain(cfg.cert_file, cfg.key_file)
    return ctx


@dataclass
class PublisherCounters:
    """Counters for the log and the stats records."""

    published: int = 0  #: PUBLISH calls made for spool items (re-sends included)
    acked: int = 0  #: spool items acknowledged by the broker and removed from the spool
    connects: int = 0  #: successful connections
    reconnects: int = 0  #: successful connections after the first
    connect_failures: int = 0  #: connection attempts that failed
    connection_losses: int = 0  #: established connections that ended in an error
    superseded: int = 0  #: retained states not sent: a later state of the channel was queued
    last_error: str | None = None  #: the most recent connection or publish error, as text
    connected: bool = False

    def as_dict(self) -> dict[str, Any]:
        return {
            "published": self.published,
            "acked": self.acked,
            "connects": self.connects,
            "reconnects": self.reconnects,
            "connect_failures": self.connect_failures,
            "connection_losses": self.connection_losses,
            "superseded": self.superseded,
            "last_error": self.last_error,
            "connected": self.connected,
        }


@dataclass
class _Sent:
    """A spool item handed to the MQTT client, waiting for the broker's acknowledgement."""

    item: Any
    t0: float  #: loop time it was handed over (its acknowledgement is due by t0 + timeout)
    done: bool = False


@dataclass
class _Session:
    inflight: collections.deque[_Sent] = field(default_factory=collections.deque)


class _QuietLog(logging.LoggerAdapter):
    """The MQTT client's own logger, rate-limited (:class:`streamcond.ratelimit.RateLimitedLog`).

    paho logs every socket error ("failed to receive on socket ...") at ERROR, again at every
    reconnect attempt while a broker is away; the publisher reports the same failures itself
    (once per series, see ``Publisher._record_error``). Here each message template is logged
    at WARNING at most once per :data:`CLIENT_LOG_INTERVAL_S` (with the count held back since),
    the rest at DEBUG.
    """

    def __init__(self, logger: logging.Logger, interval_s: float, clock: Any = time.monotonic) -> None:
        super().__init__(logger, {})
        self.interval_s = interval_s
        self._limit = RateLimitedLog(logger, interval_s, clock=clock)

    def log(self, level: int, msg: Any, *args: Any, **kwargs: Any) -> None:
        if level >= logging.WARNING:
            n = self._limit.due(1, key=str(msg))
            if n:
                if n > 1:
                    msg = f"{msg} ({n - 1} more like it in the last {self.interval_s:g} s)"
                level = logging.WARNING
                kwargs.pop("exc_info", None)  # a socket error needs no traceback
            else:
                level = logging.DEBUG
        super().log(level, msg, *args, **kwargs)


#: At most one WARNING per message of the MQTT client's own log in this many seconds.
CLIENT_LOG_INTERVAL_S = 60.0

#: Acknowledgements are written to the spool in batches of up to this many (one commit each);
#: a smaller batch is written whenever nothing is in flight, and when a session ends.
ACK_BATCH = 256

#: Spool items read ahead per page (a backlog is read in pages this long; see ``_pump``).
PAGE = 1024

#: Acknowledgements left for the spool's next commit (``Spool.ack_soon``) are committed on
#: their own after this long without one (a quiet stream), and at once beyond ACK_BATCH.
ACK_FLUSH_S = 1.0

#: Items handed over by :meth:`Publisher.offer` and not yet taken are kept up to this many;
#: beyond, they are forgotten and read from the spool instead (a slow broker).
FED_MAX = 4096

#: This many items read ahead and not yet sent make a *backlog* (a broker coming back after an
#: outage): in it, a retained ``state`` followed by a later ``state`` of the same channel is
#: not sent (see the module docstring, "Catching up").
BACKLOG = 256


class Publisher:
    """Drains a :class:`~streamcond.io.spool.Spool` to an MQTT broker (see module docstring).

    ``run(stop)`` connects, reconnects with exponential backoff (``min_backoff_s`` doubling up
    to ``max_backoff_s``, so a backlog starts draining within about ``max_backoff_s`` of the
    broker coming back: an attempt at a broker that is down is refused at once and costs a
    few milliseconds, so trying twice a second is cheap) and publishes until ``stop`` is set. ``notify()`` wakes it after new
    items were put into the spool. ``shutdown(timeout_s)`` drains what the broker accepts
    within the timeout, publishes the retained ``offline`` status and disconnects cleanly.
    """

    def __init__(
        self,
        cfg: Mqtt,
        prefix: str,
        spool: Spool,
        *,
        window: int = 256,
        connect_timeout_s: float = 5.0,
        publish_timeout_s: float | None = None,
        min_backoff_s: float = 0.1,
        max_backoff_s: float = 0.5,
    ) -> None:
        if window < 1:
            raise ValueError("window must be at least 1")
        if not (0 < min_backoff_s <= max_backoff_s):
            raise ValueError("need 0 < min_backoff_s <= max_backoff_s")
        self.cfg = cfg
        self.prefix = _check_prefix(prefix)
        self.spool = spool
        self.window = int(window)
        self.connect_timeout_s = float(connect_timeout_s)
        # A PUBACK overdue by two keepalive periods means the connection is dead even if the
        # socket has not said so; paho's keepalive ping would close it by then anyway.
        self.publish_timeout_s = (
            float(publish_timeout_s) if publish_timeout_s is not None else 2.0 * cfg.keepalive_s
        )
        self.min_backoff_s = float(min_backoff_s)
        self.max_backoff_s = float(max_backoff_s)
        self.client_id = cfg.client_id or default_client_id(self.prefix)
        self.status_topic = f"{self.prefix}/status"
        self.counters = PublisherCounters()
        self._wake = asyncio.Event()
        # Items just committed, handed over by offer(): (first id, items), in commit order.
        self._fed: collections.deque[tuple[int, list[Message]]] = collections.deque()
        self._fed_n = 0
        self._unread = False  # the spool may hold items neither read nor handed over
        self._kick_fut: asyncio.Future[None] | None = None  # what the pump waits on (_kick)
        self._closing = asyncio.Event()  # shutdown() asked for the final drain
        self._deadline: float | None = None
        self._run_task: asyncio.Task[Any] | None = None
        self._run_done = asyncio.Event()
        self._quiet_failures = False  # log repeated connect failures at DEBUG only
        self._client_log = _QuietLog(logging.getLogger(__name__ + ".client"), CLIENT_LOG_INTERVAL_S)

    # -- public API ---------------------------------------------------------------------------

    def notify(self) -> None:
        """New items are in the spool (call after each ``put_many``); cheap, never blocks."""
        self._unread = True
        self._wake.set()
        self._kick()

    def _kick(self, *_: Any) -> None:
        """Wake the pump: something it waits for happened (it looks again at everything)."""
        f = self._kick_fut
        if f is not None and not f.done():
            f.set_result(None)

    def offer(self, first_id: int | None, items: list[Message]) -> None:
        """Items just committed to the spool (``(topic, payload, qos, retain, kind)`` as given
        to ``put_many``, ids from ``first_id`` on, as it returned), handed over so that a
        publisher that has read everything before them sends them without reading them back.
        Only a shortcut: whenever they do not follow on from what was read (a gap, a backlog,
        a new session), the spool is read instead. Call it on the event loop."""
        if first_id is None or not items:
            self.notify()
            return
        if self._fed_n + len(items) > FED_MAX:
            self._drop_fed()
            self._unread = True
        else:
            self._fed.append((first_id, items))
            self._fed_n += len(items)
        self._wake.set()
        self._kick()

    def _take_fed(self, last_read: int, unsent: collections.deque[Any]) -> int:
        """Move the offered items that follow on from ``last_read`` into ``unsent``; the new
        last id read. A gap (an item committed but not offered) makes the spool be read."""
        fed = self._fed
        while fed:
            first, items = fed.popleft()
            self._fed_n -= len(items)
            last = first + len(items) - 1
            if last <= last_read:
                continue  # already read from the spool
            if first > last_read + 1:
                self._unread = True  # something between: read it from the spool
                self._drop_fed()
                break
            for k in range(last_read + 1 - first, len(items)):
                topic, payload, qos, retain, kind = items[k]
                unsent.append(SpoolItem(first + k, topic, payload, qos, retain, kind))
            last_read = last
        return last_read

    def _drop_fed(self) -> None:
        self._fed.clear()
        self._fed_n = 0

    @property
    def published(self) -> int:
        return self.counters.published

    @property
    def acked(self) -> int:
        return self.counters.acked

    @property
    def reconnects(self) -> int:
        return self.counters.reconnects

    @property
    def last_error(self) -> str | None:
        return self.counters.last_error

    async def run(self, stop: asyncio.Event) -> None:
        """Publish until ``stop`` is set (or, after :meth:`shutdown`, until drained/timed out)."""
        loop = asyncio.get_running_loop()
        self._run_task = asyncio.current_task()
        self._run_done.clear()
        backoff = self.min_backoff_s
        try:
            while not self._finished(stop, loop):
                connected_before = self.counters.connects
                try:
                    await self._session(stop)
                    return  # a session ends without error only when stopping
                except (aiomqtt.MqttError, OSError, ValueError, SpoolError) as e:
                    # a cancellation that met a timeout inside the client can surface as an
                    # error: a task being cancelled must end, not reconnect
                    _raise_if_cancelled(e)
                    # SpoolError too: the daemon goes on, and nothing is acknowledged that
                    # was not sent, so retrying later is safe.
                    self._record_error(e, lost=self.counters.connects > connected_before)
                if self.counters.connects > connected_before:
                    backoff = self.min_backoff_s  # the broker was there: retry soon
                if self._finished(stop, loop):
                    return
                await self._sleep_or_stop(backoff, stop, loop)
                backoff = min(backoff * 2.0, self.max_backoff_s)
        finally:
            self.counters.connected = False
            self._run_task = None
            self._run_done.set()

    async def shutdown(self, timeout_s: float) -> None:
        """Drain as far as the broker allows within ``timeout_s``, publish ``offline``, disconnect.

        If :meth:`run` is active it does the final drain itself (and keeps retrying the
        connection until the deadline); otherwise a single connection is made for it. Items
        not acknowledged by then stay in the spool for the next start.
        """
        loop = asyncio.get_running_loop()
        self._deadline = loop.time() + max(0.0, float(timeout_s))
        self._closing.set()
        self._wake.set()
        if self._run_task is not None and not self._run_task.done():
            task = self._run_task
            try:
                # A little grace beyond the deadline for the offline status and DISCONNECT.
                await asyncio.wait_for(self._run_done.wait(), timeout_s + 2.0)
            except asyncio.TimeoutError:
                log.warning("MQTT publisher did not stop within %.1f s; cancelling it", timeout_s)
                task.cancel()
                with contextlib.suppress(asyncio.CancelledError, Exception):
                    await task
            return
        never = asyncio.Event()
        while not self._finished(never, loop):
            try:
                await asyncio.wait_for(self._session(never), self._remaining(loop) + 2.0)
                return
            except (aiomqtt.MqttError, OSError, ValueError, SpoolError, asyncio.TimeoutError) as e:
                self._record_error(e, lost=False)
            await self._sleep_or_stop(self.min_backoff_s, never, loop)

    # -- internals ----------------------------------------------------------------------------

    def _remaining(self, loop: asyncio.AbstractEventLoop) -> float:
        if self._deadline is None:
            return math.inf
        return max(0.0, self._deadline - loop.time())

    def _finished(self, stop: asyncio.Event, loop: asyncio.AbstractEventLoop) -> bool:
        if self._closing.is_set():
            return self._remaining(loop) <= 0.0
        return stop.is_set()

    def _record_error(self, e: BaseException, *, lost: bool) -> None:
        msg = f"{type(e).__name__}: {e}" if str(e) else type(e).__name__
        previous = self.counters.last_error
        self.counters.last_error = msg
        self.counters.connected = False
        where = f"{self.cfg.host}:{self.cfg.port}"
        if lost:
            self.counters.connection_losses += 1
            log.warning("MQTT connection to %s lost (%s); reconnecting", where, msg)
            self._quiet_failures = False
        else:
            self.counters.connect_failures += 1
            # The first failure of a series, and any failure for a new reason, at WARNING;
            # the same failure every max_backoff_s while the broker is away at DEBUG.
            repeated = self._quiet_failures and msg == previous
            level = logging.DEBUG if repeated else logging.WARNING
            log.log(level, "MQTT connection to %s failed (%s); retrying", where, msg)
            self._quiet_failures = True

    async def _sleep_or_stop(
        self, delay: float, stop: asyncio.Event, loop: asyncio.AbstractEventLoop
    ) -> None:
        delay = min(delay, self._remaining(loop))
        if self._closing.is_set():
            # Final drain: keep retrying at this pace until the deadline, whatever `stop` says
            # (waiting on the events, both already set, would not wait at all).
            await asyncio.sleep(delay)
            return
        waiters = [asyncio.ensure_future(stop.wait()), asyncio.ensure_future(self._closing.wait())]
        try:
            await asyncio.wait(waiters, timeout=delay, return_when=asyncio.FIRST_COMPLETED)
        finally:
            for w in waiters:
                w.cancel()

    async def _make_client(self) -> aiomqtt.Client:
        cfg = self.cfg
        password = None
        if cfg.password_file is not None:
            password = await asyncio.to_thread(read_password, cfg.password_file)
        tls = await asyncio.to_thread(_tls_context, cfg)
        client = aiomqtt.Client(
            cfg.host,
            cfg.port,
            username=cfg.username,
            password=password,
            identifier=self.client_id,
            logger=self._client_log,  # type: ignore[arg-type]
            will=aiomqtt.Will(self.status_topic, STATUS_OFFLINE, qos=STATUS_QOS, retain=True),
            clean_session=True,
            timeout=self.connect_timeout_s,
            keepalive=cfg.keepalive_s,
            # 0: no limit in paho; the window is kept here (paho rescans every message it
            # holds at each acknowledgement while under its own limit: O(window) per PUBACK)
            max_inflight_messages=0,
            tls_context=tls,
        )
        # aiomqtt warns above this many pending calls; a full window is normal here.
        client.pending_calls_threshold = self.window + 2
        paho = client._client
        on_disconnect = paho.on_disconnect

        def closed_before_connack(c: Any, userdata: Any, flags: Any, rc: Any, props: Any = None) -> None:
            # An endpoint that accepts the TCP connection and closes it before answering
            # CONNECT: aiomqtt ignores a disconnection before CONNACK and would wait out its
            # whole timeout; fail the attempt now instead.
            on_disconnect(c, userdata, flags, rc, props)
            if not client._connected.done():
                client._connected.set_exception(
                    aiomqtt.MqttError("the connection was closed before the broker answered CONNECT")
                )

        paho.on_disconnect = closed_before_connack
        return client

    async def _session(self, stop: asyncio.Event) -> None:
        """One connection: online status, drain, and (when stopping) offline status."""
        loop = asyncio.get_running_loop()
        client = await self._make_client()
        sess = _Session()
        watcher: asyncio.Task[None] | None = None
        try:
            async with client:
                self.counters.connects += 1
                if self.counters.connects > 1:
                    self.counters.reconnects += 1
                self.counters.connected = True
                self._quiet_failures = False
                log.info(
                    "MQTT connected to %s:%s as %s", self.cfg.host, self.cfg.port, self.client_id
                )
                watcher = asyncio.ensure_future(self._watch_disconnect(client))
                try:
                    await self._publish_status(client, STATUS_ONLINE, self.publish_timeout_s)
                    _raise_if_cancelled()
                    await self._pump(client, sess, watcher, stop, loop)
                except asyncio.CancelledError:
                    # Cancelled from outside: still tell subscribers we are gone (a graceful
                    # DISCONNECT follows, which makes the broker discard the last will).
                    with contextlib.suppress(BaseException):
                        await self._publish_status(client, STATUS_OFFLINE, 0.5)
                    raise
                await self._publish_status(
                    client, STATUS_OFFLINE, max(0.5, min(2.0, self._remaining(loop)))
                )
                log.info("MQTT published offline status; disconnecting")
        finally:
            self.counters.connected = False
            if watcher is not None:
                watcher.cancel()
                await asyncio.gather(watcher, return_exceptions=True)

    async def _publish_status(self, client: aiomqtt.Client, payload: bytes, timeout: float) -> None:
        await client.publish(
            self.status_topic, payload, qos=STATUS_QOS, retain=True, timeout=timeout
        )

    @staticmethod
    async def _watch_disconnect(client: aiomqtt.Client) -> None:
        # Nothing is subscribed, so this only ends by raising MqttError on disconnection.
        async for _ in client.messages:
            pass

    async def _pump(
        self,
        client: aiomqtt.Client,
        sess: _Session,
        watcher: asyncio.Task[None],
        stop: asyncio.Event,
        loop: asyncio.AbstractEventLoop,
    ) -> None:
        """Keep up to ``window`` messages in flight; ack the completed prefix; until stopping.

        Spool items go to the paho client's ``publish`` directly (not through a coroutine and
        a task per message): its ``on_publish`` callback, which runs on this loop, marks them
        done. That is what lets a backlog of tens of thousands drain in about a second.
        """
        paho = client._client  # aiomqtt 2.x keeps the paho client here (module docstring)
        inflight = sess.inflight
        by_mid: dict[int, _Sent] = {}
        kick = self._kick
        aiomqtt_on_publish = paho.on_publish

        def on_publish(c: Any, userdata: Any, mid: int, reason: Any, props: Any = None) -> None:
            aiomqtt_on_publish(c, userdata, mid, reason, props)  # the status messages
            sent = by_mid.pop(mid, None)
            if sent is not None:
                sent.done = True
                if inflight and inflight[0] is sent:
                    kick()  # the head is done: there is something to acknowledge

        paho.on_publish = on_publish
        last_read = 0  # a fresh session re-sends everything not yet acknowledged
        self._drop_fed()
        self._unread = True
        unsent: collections.deque[Any] = collections.deque()  # read from the spool, not yet sent
        superseded_ids: set[int] = set()

        def _mark_superseded(queue: collections.deque[Any]) -> None:
            latest: dict[str, int] = {}
            for it in reversed(queue):
                if it.kind == "state" and it.retain:
                    if it.topic in latest:
                        superseded_ids.add(it.id)
                    else:
                        latest[it.topic] = it.id

        to_ack: list[int] = []
        # One future to wait on, completed by whichever happens first (_kick): the head's
        # acknowledgement, new items, a stop, the shutdown, the disconnection; a timer for the
        # head's deadline. Cheaper per turn than asyncio.wait() over a future for each.
        stop_waiter = asyncio.ensure_future(stop.wait())
        closing_waiter = asyncio.ensure_future(self._closing.wait())
        for w in (stop_waiter, closing_waiter, watcher):
            w.add_done_callback(kick)
        maybe_more = True  # the spool may hold items not yet read (skip needless reads)
        flushing: asyncio.Future[Any] | None = None  # acknowledgements being committed alone
        try:
            while True:
                _raise_if_cancelled()
                closing = self._closing.is_set()
                if stop.is_set() and not closing:
                    return  # plain stop: no further drain, un-acked items stay spooled
                if closing and self._remaining(loop) <= 0.0:
                    return
                if not inflight and not unsent and to_ack:
                    # Nothing outstanding: the acknowledgements go with the spool's next commit
                    # (no transaction, no thread hop of their own), or after ACK_FLUSH_S.
                    if self.spool.ack_soon(to_ack):
                        self.counters.acked += len(to_ack)
                        to_ack.clear()
                    else:
                        await self._ack(to_ack)
                # Acknowledgements no commit has taken for ACK_FLUSH_S (a quiet stream) are
                # committed alone, beside the pump: sending never waits for that commit.
                since = self.spool.acks_deferred_since
                ack_due = None if since is None else since + ACK_FLUSH_S
                if flushing is not None and not flushing.done():
                    ack_due = None  # its end wakes the pump (no timer meanwhile: no spinning)
                elif ack_due is not None and (
                    time.monotonic() >= ack_due or closing or self.spool.acks_deferred >= ACK_BATCH
                ):
                    flushing = asyncio.ensure_future(self._flush_acks())
                    flushing.add_done_callback(kick)
                    ack_due = None
                room = self.window - len(inflight)
                if room > 0 and len(unsent) < room:
                    self._wake.clear()
                    if maybe_more or self._unread:
                        self._drop_fed()  # newer than what is unread: read them in turn
                    else:
                        # Caught up: what was just committed follows on from what was read.
                        last_read = self._take_fed(last_read, unsent)
                    if maybe_more or self._unread:
                        self._unread = False
                        if not inflight and not unsent:
                            # Nothing outstanding: all that is in the spool is unsent. Reading
                            # from the start also copes with a spool that reuses ids.
                            last_read = 0
                        page = max(PAGE, room)
                        items = await asyncio.to_thread(self.spool.peek, page, last_read)
                        maybe_more = len(items) == page  # a full page: there may be more
                        if items:
                            last_read = items[-1].id
                            unsent.extend(items)
                            if len(unsent) >= BACKLOG:
                                _mark_superseded(unsent)
                now = loop.time()
                while unsent and len(inflight) < self.window:
                    it = unsent.popleft()
                    if it.id in superseded_ids:
                        # a later retained state of the same channel is already queued behind
                        # it: skipping this one changes nothing a subscriber can see afterwards
                        superseded_ids.discard(it.id)
                        inflight.append(_Sent(it, now, done=True))
                        self.counters.superseded += 1
                        continue
                    # In id order, so the PUBLISH packets go out in id order.
                    info = paho.publish(it.topic, it.payload, it.qos, it.retain)
                    if info.rc != 0:  # MQTT_ERR_SUCCESS
                        raise aiomqtt.MqttCodeError(info.rc, "Could not publish message")
                    sent = _Sent(it, now)
                    inflight.append(sent)
                    if info.is_published():
                        sent.done = True
                    else:
                        by_mid[info.mid] = sent
                    self.counters.published += 1
                if not inflight and not unsent and closing:
                    if flushing is not None:
                        await flushing
                    if to_ack or self.spool.acks_deferred:
                        await self._ack(to_ack)  # (the spool's ack takes the deferred ones too)
                    return  # drained
                woken = self._wake.is_set() and len(inflight) < self.window
                if not (inflight and inflight[0].done) and not woken and not watcher.done() and (
                    closing or not (stop.is_set() or self._closing.is_set())
                ):
                    timeout = None
                    if inflight:  # the head's acknowledgement is due by then
                        timeout = max(0.0, inflight[0].t0 + self.publish_timeout_s - loop.time())
                    if ack_due is not None:
                        left = max(0.0, ack_due - time.monotonic())
                        timeout = left if timeout is None else min(timeout, left)
                    if closing:
                        left = self._remaining(loop)
                        timeout = left if timeout is None else min(timeout, left)
                    fut = self._kick_fut = loop.create_future()
                    timer = loop.call_later(timeout, kick) if timeout is not None else None
                    try:
                        await fut
                    finally:
                        self._kick_fut = None
                        if timer is not None:
                            timer.cancel()
                if watcher.done():
                    watcher.result()  # raises the disconnection error
                    raise aiomqtt.MqttError("disconnected")
                while inflight and inflight[0].done:
                    to_ack.append(inflight.popleft().item.id)
                if len(to_ack) >= ACK_BATCH:
                    await self._ack(to_ack)
                if inflight and not inflight[0].done and (
                    loop.time() - inflight[0].t0 >= self.publish_timeout_s
                ):
                    raise aiomqtt.MqttError(
                        f"no acknowledgement from the broker within {self.publish_timeout_s:g} s"
                    )
        finally:
            paho.on_publish = aiomqtt_on_publish
            while inflight and inflight[0].done:
                to_ack.append(inflight.popleft().item.id)
            if to_ack:
                # The broker has these: record it even though the session is ending, so they
                # are not sent again (synchronously: this may run during a cancellation).
                try:
                    self.spool.ack(to_ack)
                    self.counters.acked += len(to_ack)
                except SpoolError as e:
                    log.warning("MQTT: acknowledgements could not be stored: %s", e)
                to_ack.clear()
            for w in (stop_waiter, closing_waiter, watcher):
                w.remove_done_callback(kick)
            for w in (stop_waiter, closing_waiter):
                w.cancel()

    async def _flush_acks(self) -> None:
        """Commit the acknowledgements left with the spool (in a worker thread)."""
        try:
            await asyncio.to_thread(self.spool.flush_acks)
        except SpoolError as e:  # e.g. closed meanwhile: they are committed at the next start
            log.debug("MQTT: acknowledgements not committed yet: %s", e)

    async def _ack(self, ids: list[int]) -> None:
        """Remove acknowledged items from the spool (in a worker thread); empties ``ids``."""
        batch = list(ids)
        ids.clear()
        await asyncio.to_thread(self.spool.ack, batch)
        self.counters.acked += len(batch)


__all__ = [
    "Message",
    "Publisher",
    "PublisherCounters",
    "STATUS_OFFLINE",
    "STATUS_ONLINE",
    "default_client_id",
    "read_password",
    "topic_for",
]
