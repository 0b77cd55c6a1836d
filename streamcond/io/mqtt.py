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
order. The publisher writes PUBLISH packets in spool-id order (the publish coroutines are
started as tasks in that order, and asyncio runs ready callbacks first-in first-out, so each
reaches the underlying client's synchronous ``publish`` in order) and acknowledges in the
spool only the *contiguous* prefix of completed messages. After a connection loss everything
not acknowledged is sent again from the oldest un-acknowledged item, on a fresh session:
delivery is at least once, so consumers drop duplicates by ``seq`` (edges) or ``t``.

aiomqtt facts this relies on (aiomqtt 2.x, read from its ``Client.publish``): ``await
client.publish(..., qos=1)`` returns only when the underlying paho client reports the
message published, i.e. after the PUBACK (after the PUBCOMP for QoS 2, after the socket
write for QoS 0); it waits at most ``timeout`` seconds (default: the client's ``timeout``)
and raises :class:`aiomqtt.MqttError` on timeout. A publish pending when the connection
drops is *not* failed by aiomqtt; the loss is seen through ``client.messages``, whose
iteration raises :class:`aiomqtt.MqttError` on disconnection, so the publisher watches that.
The paho client's own in-flight limit (``max_inflight_messages``, default 20) is set to the
window so paho does not hold messages back on its own.

The event loop: spool calls (``peek``, ``ack``) run in a worker thread
(:func:`asyncio.to_thread`). They are short — a range read of at most ``window`` rows, one
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
from dataclasses import dataclass, field
from typing import Any

import aiomqtt

from ..config import Mqtt
from .. import records
from ..records import to_json
from .spool import Spool, SpoolError

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
            "last_error": self.last_error,
            "connected": self.connected,
        }


@dataclass
class _InFlight:
    item: Any
    task: asyncio.Task[None]


@dataclass
class _Session:
    inflight: collections.deque[_InFlight] = field(default_factory=collections.deque)


class Publisher:
    """Drains a :class:`~streamcond.io.spool.Spool` to an MQTT broker (see module docstring).

    ``run(stop)`` connects, reconnects with exponential backoff (``min_backoff_s`` doubling up
    to ``max_backoff_s``, so a backlog starts draining within about ``max_backoff_s`` of the
    broker coming back) and publishes until ``stop`` is set. ``notify()`` wakes it after new
    items were put into the spool. ``shutdown(timeout_s)`` drains what the broker accepts
    within the timeout, publishes the retained ``offline`` status and disconnects cleanly.
    """

    def __init__(
        self,
        cfg: Mqtt,
        prefix: str,
        spool: Spool,
        *,
        window: int = 64,
        connect_timeout_s: float = 5.0,
        publish_timeout_s: float | None = None,
        min_backoff_s: float = 0.1,
        max_backoff_s: float = 2.0,
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
        self._closing = asyncio.Event()  # shutdown() asked for the final drain
        self._deadline: float | None = None
        self._run_task: asyncio.Task[Any] | None = None
        self._run_done = asyncio.Event()
        self._quiet_failures = False  # log repeated connect failures at DEBUG only

    # -- public API ---------------------------------------------------------------------------

    def notify(self) -> None:
        """New items are in the spool (call after each ``put_many``); cheap, never blocks."""
        self._wake.set()

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
            logger=logging.getLogger(__name__ + ".client"),
            will=aiomqtt.Will(self.status_topic, STATUS_OFFLINE, qos=STATUS_QOS, retain=True),
            clean_session=True,
            timeout=self.connect_timeout_s,
            keepalive=cfg.keepalive_s,
            max_inflight_messages=self.window,
            tls_context=tls,
        )
        # aiomqtt warns above this many pending calls; a full window is normal here.
        client.pending_calls_threshold = self.window + 2
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
            for f in sess.inflight:
                f.task.cancel()
            if watcher is not None:
                watcher.cancel()
            await asyncio.gather(
                *(f.task for f in sess.inflight),
                *((watcher,) if watcher is not None else ()),
                return_exceptions=True,
            )

    async def _publish_status(self, client: aiomqtt.Client, payload: bytes, timeout: float) -> None:
        await client.publish(
            self.status_topic, payload, qos=STATUS_QOS, retain=True, timeout=timeout
        )

    @staticmethod
    async def _watch_disconnect(client: aiomqtt.Client) -> None:
        # Nothing is subscribed, so this only ends by raising MqttError on disconnection.
        async for _ in client.messages:
            pass

    async def _publish_item(self, client: aiomqtt.Client, item: Any) -> None:
        await client.publish(
            item.topic,
            item.payload,
            qos=item.qos,
            retain=item.retain,
            timeout=self.publish_timeout_s,
        )

    async def _pump(
        self,
        client: aiomqtt.Client,
        sess: _Session,
        watcher: asyncio.Task[None],
        stop: asyncio.Event,
        loop: asyncio.AbstractEventLoop,
    ) -> None:
        """Keep up to ``window`` messages in flight; ack the completed prefix; until stopping."""
        inflight = sess.inflight
        last_sent = 0  # a fresh session re-sends everything not yet acknowledged
        stop_waiter = asyncio.ensure_future(stop.wait())
        closing_waiter = asyncio.ensure_future(self._closing.wait())
        wake_waiter: asyncio.Future[Any] | None = None
        maybe_more = True  # the spool may hold items not yet read (skip needless reads)
        try:
            while True:
                _raise_if_cancelled()
                closing = self._closing.is_set()
                if stop.is_set() and not closing:
                    return  # plain stop: no further drain, un-acked items stay spooled
                if closing and self._remaining(loop) <= 0.0:
                    return
                if not inflight:
                    # Nothing outstanding: all that is in the spool is unsent. Reading from the
                    # start also copes with a spool that reuses ids once it has emptied.
                    last_sent = 0
                room = self.window - len(inflight)
                if room > 0 and (maybe_more or self._wake.is_set()):
                    self._wake.clear()
                    items = await asyncio.to_thread(self.spool.peek, room, last_sent)
                    maybe_more = len(items) == room  # a full page: there may be more behind it
                    for it in items:
                        # Created in id order, so the PUBLISH packets go out in id order.
                        task = loop.create_task(self._publish_item(client, it))
                        inflight.append(_InFlight(it, task))
                        self.counters.published += 1
                        last_sent = it.id
                if not inflight and closing:
                    return  # drained
                waits: list[asyncio.Future[Any]] = [watcher]
                if not closing:  # (once closing, both are done and would make this spin)
                    waits += [stop_waiter, closing_waiter]
                waits.extend(f.task for f in inflight)
                if len(inflight) < self.window:
                    if wake_waiter is None or wake_waiter.done():
                        wake_waiter = asyncio.ensure_future(self._wake.wait())
                    waits.append(wake_waiter)
                timeout = self._remaining(loop) if closing else None
                await asyncio.wait(waits, timeout=timeout, return_when=asyncio.FIRST_COMPLETED)
                if watcher.done():
                    watcher.result()  # raises the disconnection error
                    raise aiomqtt.MqttError("disconnected")
                done_ids: list[int] = []
                while inflight and inflight[0].task.done():
                    f = inflight.popleft()
                    f.task.result()  # a failed publish ends the session; the item is re-sent
                    done_ids.append(f.item.id)
                if done_ids:
                    await asyncio.to_thread(self.spool.ack, done_ids)
                    self.counters.acked += len(done_ids)
                else:
                    # A later message may have failed while the head is still waiting: no
                    # point waiting out the head's timeout on a connection that is broken.
                    for f in inflight:
                        if f.task.done() and not f.task.cancelled() and f.task.exception():
                            f.task.result()
        finally:
            for w in (stop_waiter, closing_waiter, wake_waiter):
                if w is not None:
                    w.cancel()


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
