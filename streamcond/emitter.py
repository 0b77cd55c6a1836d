"""The live daemon's output side: records → events file and the durable spool, in one thread.

The serial reader's thread conditions the samples (:mod:`streamcond.liveinput`) and hands each
non-empty result here through a queue; this thread writes the JSON-lines file, maps records to
MQTT messages and commits them with the channels' state in one spool transaction, then hands
them, with the ids the spool gave them, to the publisher on the event loop (which sends them
without reading them back). A block that produced nothing costs nothing here — no hand-over, no
commit — and a slow commit (an fsync on an SD card) delays neither the reading of the port nor
the event loop.

Whatever is waiting when the thread wakes is committed together: after a slow commit, the
backlog goes in one transaction, and of the *retained* messages (state, measure) of one topic in
it only the newest is kept — a retained message only says "the current value", which the newest
says (MQTT 3.1.1 §3.3.1.3: the server keeps one retained message per topic, replacing it).
Every edge is still sent, each followed by the state it left unless a newer state of its channel
follows in the same commit.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable
from typing import Any

from .io.mqtt import Message, topic_for
from .liveinput import Output
from .ratelimit import RateLimitedLog

log = logging.getLogger("streamcond.daemon")

_STOP = object()
#: At most one line per this many seconds about failing spool commits.
ERROR_LOG_S = 60.0


def coalesce_retained(items: list[Message]) -> list[Message]:
    """Drop each retained message followed by a newer retained message on the same topic."""
    last: dict[str, int] = {}
    for i, it in enumerate(items):
        if it[3]:
            last[it[0]] = i
    if len(last) == sum(1 for it in items if it[3]):
        return items
    return [it for i, it in enumerate(items) if not it[3] or last[it[0]] == i]


class Emitter:
    """Commits :class:`~streamcond.liveinput.Output` batches to the spool in its own thread.

    ``writer`` (the events file, or None) and ``mqtt`` (``(prefix, qos)`` or None) and ``wake``
    (called after each commit that stored messages, with the id of the first and the messages,
    as the publisher's ``offer`` takes them) may be swapped by a reload at any time.
    """

    def __init__(self, spool: Any, writer: Any, mqtt: tuple[str, int] | None,
                 wake: Callable[[int | None, list[Message]], None] | None) -> None:
        self.spool = spool
        self.writer = writer
        self.mqtt = mqtt
        self.wake = wake
        self._q: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._errors = RateLimitedLog(log, ERROR_LOG_S)
        self.errors = 0  #: batches that could not be committed
        self.commits = 0
        self.messages = 0  #: MQTT messages stored
        #: ``time.monotonic()`` when the batch being committed was queued (None: idle)
        self.busy_since: float | None = None
        self.heartbeat = time.monotonic()
        self._pending = 0  # batches queued and not committed yet
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._run, name="emitter", daemon=True)
        self._thread.start()

    def put(self, out: Output | None) -> None:
        """Queue a batch (any thread); None is ignored."""
        if out is None:
            return
        self._enqueue(out)

    def put_messages(self, items: list[Message]) -> None:
        """Queue ready-made MQTT messages (e.g. the health record) for the spool."""
        self._enqueue(("messages", items))

    def swap_writer(self, writer: Any) -> None:
        """Use ``writer`` for the events file from the next batch on; the old one is closed
        by the emitter thread once what was queued before has been written."""
        self._enqueue(("writer", writer))

    def close_writer(self) -> None:
        """After :meth:`close`: close the events file."""
        if self.writer is not None:
            self.writer.close()
            self.writer = None

    def _enqueue(self, item: Any) -> None:
        with self._lock:
            self._pending += 1
            if self.busy_since is None:
                self.busy_since = time.monotonic()
        self._q.put(item)

    def stalled_for(self, now: float) -> float:
        """How long a queued batch has waited for its commit (0 when idle)."""
        b = self.busy_since
        return 0.0 if b is None else max(0.0, now - b)

    def close(self, timeout: float = 10.0) -> None:
        """Commit what is queued, then end the thread."""
        self._q.put(_STOP)
        self._thread.join(timeout)
        if self._thread.is_alive():
            log.error("the spool writer did not finish within %.0f s", timeout)

    def _run(self) -> None:
        from .io.serialsource import _name_os_thread

        _name_os_thread("emitter")
        stop = False
        while not stop:
            batch = [self._q.get()]
            while True:  # everything waiting goes into one commit
                try:
                    batch.append(self._q.get_nowait())
                except queue.Empty:
                    break
            if _STOP in batch:
                stop = True
                batch = [b for b in batch if b is not _STOP]
            n = len(batch)
            run: list[Any] = []
            for item in batch:  # in order; a writer swap splits the commit
                if isinstance(item, tuple) and item[0] == "writer":
                    self._commit(run)
                    run = []
                    old, self.writer = self.writer, item[1]
                    if old is not None:
                        old.close()
                else:
                    run.append(item)
            self._commit(run)
            self.heartbeat = time.monotonic()
            with self._lock:
                self._pending -= n
                self.busy_since = None if self._pending == 0 else time.monotonic()

    def _commit(self, batch: list[Any]) -> None:
        if not batch:
            return
        outs = [b for b in batch if isinstance(b, Output)]
        recs = [r for out in outs for r in out.records]
        state = None
        for out in outs:
            if out.state is not None:
                state = out.state
        writer = self.writer
        if writer is not None:
            try:
                for r in recs:
                    writer(r)
            except (OSError, ValueError) as e:
                self._errors.log(logging.ERROR, "the events file could not be written: %s", e,
                                 key="events")
        items: list[Message] = []
        mqtt = self.mqtt
        if mqtt is not None:
            prefix, qos = mqtt
            for r in recs:
                try:
                    items.extend(topic_for(r, prefix, qos))
                except ValueError as e:  # a record the topic map does not know: never fatal
                    self._errors.log(logging.ERROR, "record not published: %s", e, key="topic")
        for b in batch:
            if isinstance(b, tuple) and b[0] == "messages":
                items.extend(b[1])
        items = coalesce_retained(items)
        if not items and state is None:
            return
        try:
            first = self.spool.put_many(items, state)
        except Exception as e:  # a full or failing disk: counted and logged, the stream goes on
            self.errors += 1
            self._errors.log(logging.ERROR, "records could not be stored in the spool: %s", e,
                             key="spool")
            return
        self.commits += 1
        self.messages += len(items)
        wake = self.wake
        if items and wake is not None:
            wake(first, items)
