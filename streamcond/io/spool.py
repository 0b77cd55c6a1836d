"""The durable spool: records bound for MQTT, and the per-channel state they advance.

Every record the live daemon publishes is first appended here and deleted only after the
broker has acknowledged it, so nothing is lost across network outages, broker restarts or a
daemon killed with SIGKILL. The per-channel state (edge ``seq``, current levels, running
totals) lives in the same SQLite database and is written in the *same transaction* as the
records that advance it: after any crash the stored state is exactly the state after the last
stored batch, never newer (a ``seq`` with no record behind it, a gap for consumers) nor older
(a record whose ``seq`` would be issued again, a duplicate).

Storage choices (SQLite documentation, https://www.sqlite.org/pragma.html and
https://www.sqlite.org/wal.html):

- ``journal_mode=WAL``: a commit appends to one log file and needs one ``fsync``, instead of
  the rollback journal's several; readers and the writer do not block each other.
- Durability (``sync``): in WAL mode, ``synchronous=NORMAL`` survives an application crash —
  a commit is in the operating system's page cache once it returns, and SIGKILL does not take
  that away — but "a transaction committed ... might roll back following a power loss or
  system crash". ``sync="always"`` (the default) uses ``synchronous=FULL``: the WAL is synced
  at every commit, so a batch that :meth:`Spool.put_many` has returned is on the disk even if
  the pump-station board loses power a moment later, at the price of one ``fsync`` per batch
  (an SD card wears with every one). ``sync="interval"`` commits with NORMAL and syncs the WAL
  file at most every ``sync_interval_s`` (and only when something was committed since the last
  sync): a power cut can lose the batches of the last interval, a process crash loses nothing.
  Acknowledgements alone are always committed with NORMAL (see :meth:`Spool.ack`): losing one to
  a power cut only re-sends a record, which QoS 1 permits anyway and consumers catch by ``seq``.
- The WAL is bounded: checkpointed into the database every :data:`WAL_CHECKPOINT_PAGES` pages
  (1 MiB) and cut back to that size after each checkpoint, and checkpointed and truncated
  after every commit while the disk is nearly full (:data:`HEADROOM_BYTES`), so the records
  (``max_records``), not the log, are what fills the disk.
- ``locking_mode=EXCLUSIVE``: the file stays locked while the spool is open, so a second
  daemon pointed at the same spool is refused instead of sending the same records twice; as a
  side effect WAL needs no ``-shm`` shared-memory file. The price: other programs cannot read
  the spool while the daemon runs. The lock is the operating system's and dies with the process,
  so a daemon killed with SIGKILL does not leave it behind.
- ``AUTOINCREMENT`` ids: never reused, even after every row has been acknowledged and the
  file reopened, so ``id`` is the send order over the life of the file.

Overflow policy
---------------
The spool holds at most ``max_records`` records. When an append would exceed it, the oldest
records that are *not events* are dropped first — stats, measures, retained state, status:
a newer value of those supersedes the old ones anyway — and only when nothing but events is
left, the oldest events. Events are ``edge`` records and also ``gap`` and ``fault`` records
(:data:`PROTECTED_KINDS`), which, like edges, are one-off facts no later record repeats. The
newly appended records take part like any others: a stats record appended to a spool full of
edges is itself the oldest non-event and is dropped. Every dropped record is counted in
:attr:`Spool.dropped`, which is stored in the database and survives restarts, and a warning is
logged, at most once a minute per record kind (the count of drops since the last warning about
that kind is in the message; whatever is still unreported is logged at :meth:`Spool.close`).

A full or failing disk
----------------------
When a commit fails because the disk is full, the file system is read-only, or the disk
reports an I/O error, nothing stops: on a full disk the spool first checkpoints the WAL and
truncates it to nothing (the log is mostly old copies of the same few pages, so that usually
frees the space) and tries again; if the write still fails, the records are kept *in memory*
(at most ``memory_max_records``, with the same overflow policy) and :meth:`peek` hands them to
the publisher after the stored ones, so they are still sent live while the broker is there.
Every later :meth:`put_many` retries the disk at most every :data:`DISK_RETRY_S` seconds;
once a write succeeds, the records held in memory and the newest channel state are stored in
that transaction, and the spool is durable again. Records the memory bound pushes out are
counted in :attr:`Spool.dropped` and :attr:`Spool.lost_to_disk`. What was held in memory is
lost if the process dies before the disk recovers. Warnings are rate-limited: one when the
trouble starts, then at most one a minute while it lasts, one when it ends. Acknowledgements
that cannot be written are remembered and written with the next successful commit (their
records are not sent again meanwhile).

Thread safety
-------------
A :class:`Spool` may be shared between threads: every method holds an internal lock, so calls
are serialised (the daemon calls it from one thread anyway). It cannot be shared between
processes: the file is locked exclusively while it is open.
"""

from __future__ import annotations

import errno
import json
import logging
import os
import sqlite3
import threading
import time
from collections import deque
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from .. import records
from ..errors import StreamcondError
from ..ratelimit import RateLimitedLog

log = logging.getLogger(__name__)

SCHEMA_VERSION = 1
"""Version of the tables below; a file written by a newer version is refused, not guessed at."""

PROTECTED_KINDS: frozenset[str] = frozenset({records.EDGE, records.GAP, records.FAULT})
"""Record kinds dropped only when nothing else is left to drop (the overflow policy)."""

WARN_INTERVAL_S = 60.0
"""At most one overflow (or disk-trouble) warning per record kind in this many seconds."""

WAL_CHECKPOINT_PAGES = 256
"""``PRAGMA wal_autocheckpoint``: copy the log into the database every this many pages (1 MiB at
SQLite's default 4 KiB page; storing an edge and acknowledging it writes about six pages).
SQLite's default is 1000 (4 MiB). Each checkpoint costs two fsyncs and writes the few hot pages
once (https://www.sqlite.org/wal.html), so a smaller log costs fsyncs on every system; on a
small disk the log is kept far smaller by the rule of :data:`HEADROOM_BYTES` instead."""

WAL_LIMIT_BYTES = WAL_CHECKPOINT_PAGES * 4096
"""``PRAGMA journal_size_limit``: after a checkpoint the log file is cut back to this size."""

HEADROOM_BYTES = 64 * 1024
"""Free space the spool leaves on its file system. A checkpoint must grow the database by the
log's new pages and an acknowledgement writes a few pages to the log; on a disk filled to the
last block neither can happen, the log can never be emptied and nothing can be deleted again.
So new records are held in memory (as on a full disk) while less than this is free, and below
twice this the log is checkpointed and truncated after every commit, so that it never holds
pages the database cannot take."""

ACK_SLICE = 256
"""Acknowledgements are deleted in transactions of at most this many ids."""

DISK_RETRY_S = 1.0
"""While the disk cannot be written, a new write is tried at most this often."""

MEMORY_MAX_RECORDS = 10_000
"""Default bound of the records held in memory while the disk cannot be written (a few MB)."""

SYNC_MODES = ("always", "interval")

_DISK_TROUBLE = ("SQLITE_FULL", "SQLITE_IOERR", "SQLITE_READONLY", "SQLITE_CORRUPT",
                 "SQLITE_CANTOPEN", "SQLITE_NOTADB")

_SCHEMA = """
CREATE TABLE schema_version (version INTEGER NOT NULL);
CREATE TABLE queue (
    id        INTEGER PRIMARY KEY AUTOINCREMENT,
    topic     TEXT    NOT NULL,
    payload   BLOB    NOT NULL,
    qos       INTEGER NOT NULL,
    retain    INTEGER NOT NULL,
    kind      TEXT    NOT NULL,
    protected INTEGER NOT NULL
);
-- finds the oldest droppable record without scanning past a long run of old edges
CREATE INDEX queue_by_protection ON queue (protected, id);
CREATE TABLE channel_state (channel TEXT PRIMARY KEY, data TEXT NOT NULL);
CREATE TABLE counters (name TEXT PRIMARY KEY, value INTEGER NOT NULL);
"""


class _LowSpace(sqlite3.OperationalError):
    """Not written because the file system is down to the spool's headroom."""

    sqlite_errorname = "SQLITE_FULL"


class SpoolError(StreamcondError):
    """The spool file cannot be used; the message names the path and what is wrong with it."""


@dataclass(frozen=True)
class SpoolItem:
    """One stored record, as :meth:`Spool.peek` returns it."""

    id: int
    """Monotonically increasing over the life of the file: the send order."""
    topic: str
    payload: bytes
    qos: int
    retain: bool
    kind: str
    """Record kind (``edge``, ``state``, ``stats``, ...); decides the overflow order."""


Item = tuple[str, bytes, int, bool, str]
"""``(topic, payload, qos, retain, kind)``, the shape :meth:`Spool.put_many` takes."""

_Row = tuple[int, str, bytes, int, int, str, int]
"""``(id, topic, payload, qos, retain, kind, protected)``: a row of the queue table."""


def _errname(e: BaseException) -> str:
    return getattr(e, "sqlite_errorname", "") or ""


def _disk_trouble(e: BaseException) -> bool:
    """An error of the file or the disk under it (full, read-only, I/O, corrupt), not of us."""
    return isinstance(e, sqlite3.Error) and _errname(e).startswith(_DISK_TROUBLE)


def _read_only(path: Path) -> bool:
    """Whether ``path`` (or its nearest existing parent) is on a read-only file system."""
    p = path
    while not p.exists() and p != p.parent:
        p = p.parent
    try:
        return bool(os.statvfs(p).f_flag & os.ST_RDONLY)
    except OSError:
        return False


class Spool:
    """A durable FIFO of MQTT records plus the per-channel state they advance.

    See the module docstring for the storage choices, the overflow policy, the behaviour on
    a full or failing disk and thread safety.

    :param path: the SQLite file; parent directories are created.
    :param max_records: the most records held (overflow policy in the module docstring).
    :param clock: seconds, for rate-limiting warnings and disk retries (injectable for tests).
    :param lock_timeout_s: how long to wait for another process holding the file.
    :param sync: ``"always"`` (fsync at every commit) or ``"interval"`` (at most every
        ``sync_interval_s``); see the module docstring.
    :param memory_max_records: the most records held in memory while the disk cannot be written.
    :raises SpoolError: the file is not a spool, is newer, corrupt, locked or unreachable.
    """

    def __init__(
        self,
        path: str | Path,
        max_records: int = 1_000_000,
        *,
        clock: Callable[[], float] = time.monotonic,
        lock_timeout_s: float = 1.0,
        sync: Literal["always", "interval"] = "always",
        sync_interval_s: float = 1.0,
        memory_max_records: int = MEMORY_MAX_RECORDS,
    ) -> None:
        if isinstance(max_records, bool) or not isinstance(max_records, int) or max_records < 1:
            raise ValueError(f"max_records must be a whole number of at least 1, not {max_records!r}")
        if sync not in SYNC_MODES:
            raise ValueError(f"sync must be one of {SYNC_MODES}, not {sync!r}")
        if not (sync_interval_s > 0):
            raise ValueError("sync_interval_s must be greater than 0")
        self.path = Path(path)
        self.max_records = max_records
        self.sync = sync
        self.sync_interval_s = float(sync_interval_s)
        self.memory_max_records = max(1, min(int(memory_max_records), max_records))
        self._clock = clock
        self._lock = threading.Lock()
        # one overflow warning per record kind per WARN_INTERVAL_S, with the count since
        self._drop_log = RateLimitedLog(log, WARN_INTERVAL_S, clock=clock)
        self._conn: sqlite3.Connection | None = None
        # held in memory while the disk cannot be written (module docstring)
        self._mem: deque[_Row] = deque()
        self._mem_state: dict[str, str] = {}
        self._ack_pending: set[int] = set()
        # acknowledgements left for the next commit (ack_soon); their own small lock, never
        # held through I/O, so the event loop can add to them while a commit is syncing
        self._deferred: set[int] = set()
        self._deferred_at: float | None = None  # time.monotonic() of the oldest of them
        self._deferred_lock = threading.Lock()
        self._trouble: str | None = None  # what is wrong with the disk, in words
        self._retry_at = 0.0
        self._trouble_log = RateLimitedLog(log, WARN_INTERVAL_S, clock=clock)
        self.lost_to_disk = 0
        """Records dropped because the disk could not take them (included in ``dropped``)."""
        self.disk_errors = 0
        """Writes that failed because of the disk."""
        # interval sync
        self._unsynced = False
        self._last_sync = time.monotonic()
        self._sync_timer: threading.Timer | None = None
        if self.path.is_dir():
            raise SpoolError(f"The spool {str(self.path)!r} is a directory, not a file")
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            why = ("it is on a read-only file system" if e.errno == errno.EROFS
                   else e.strerror or str(e))
            raise SpoolError(
                f"The spool's directory {str(self.path.parent)!r} cannot be created: {why}"
            ) from None
        try:
            # isolation_level=None: transactions are begun and committed explicitly below.
            # check_same_thread=False: the internal lock serialises access instead.
            conn = sqlite3.connect(
                str(self.path),
                timeout=lock_timeout_s,
                isolation_level=None,
                check_same_thread=False,
            )
        except sqlite3.Error as e:
            raise self._error("opened", e) from None
        try:
            self._open(conn)
        except sqlite3.Error as e:
            conn.close()
            raise self._error("opened", e) from None
        except BaseException:
            conn.close()
            raise
        self._conn = conn

    # -- opening -------------------------------------------------------------------------

    def _open(self, conn: sqlite3.Connection) -> None:
        # Order matters: EXCLUSIVE before the first access lets WAL run without shared memory.
        conn.execute("PRAGMA locking_mode=EXCLUSIVE")
        mode = conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            where = ("it is on a read-only file system" if _read_only(self.path)
                     else "is it on a network or read-only file system?")
            raise SpoolError(
                f"The spool {str(self.path)!r} cannot use write-ahead logging "
                f"(journal mode stays {mode!r}); {where}"
            )
        conn.execute(f"PRAGMA synchronous={self._sync_pragma}")
        conn.execute(f"PRAGMA wal_autocheckpoint={WAL_CHECKPOINT_PAGES}")
        conn.execute(f"PRAGMA journal_size_limit={WAL_LIMIT_BYTES}")
        conn.execute("BEGIN IMMEDIATE")  # takes the write lock now: a second daemon fails here
        try:
            tables = {
                r[0]
                for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")
            }
            if not tables:
                for stmt in _SCHEMA.split(";"):
                    if stmt.strip():
                        conn.execute(stmt)
                conn.execute("INSERT INTO schema_version (version) VALUES (?)", (SCHEMA_VERSION,))
                conn.execute("INSERT INTO counters (name, value) VALUES ('dropped', 0)")
            elif "schema_version" not in tables:
                raise SpoolError(
                    f"The file {str(self.path)!r} is an SQLite database but not a streamcond "
                    "spool (it has no schema_version table); point spool_path elsewhere"
                )
            else:
                row = conn.execute("SELECT MAX(version) FROM schema_version").fetchone()
                version = row[0] if row else None
                if version != SCHEMA_VERSION:
                    newer = isinstance(version, int) and version > SCHEMA_VERSION
                    raise SpoolError(
                        f"The spool {str(self.path)!r} has schema version {version!r}, "
                        f"this streamcond reads version {SCHEMA_VERSION}"
                        + (" (it was written by a newer streamcond)" if newer else "")
                    )
            self._count = int(conn.execute("SELECT COUNT(*) FROM queue").fetchone()[0])
            self._dropped = int(
                conn.execute("SELECT value FROM counters WHERE name = 'dropped'").fetchone()[0]
            )
            self._stored_dropped = self._dropped
            # Ids are handed out here (not by SQLite) so that records held in memory while the
            # disk is full keep their place in the send order; AUTOINCREMENT's sequence still
            # records the highest id ever used, so ids are never reused.
            seq = conn.execute("SELECT seq FROM sqlite_sequence WHERE name = 'queue'").fetchone()
            top = conn.execute("SELECT MAX(id) FROM queue").fetchone()[0]
            self._next_id = max(int(seq[0]) if seq else 0, int(top or 0)) + 1
            # A smaller max_records than the file was filled with: the bound holds from now.
            drops = self._trim(conn)
            conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
        self._report_drops(drops)

    @property
    def _sync_pragma(self) -> str:
        return "FULL" if self.sync == "always" else "NORMAL"

    def _error(self, doing: str, e: sqlite3.Error) -> SpoolError:
        """A :class:`SpoolError` naming the path and, in words, what SQLite reported."""
        p = repr(str(self.path))
        name = _errname(e)
        if name.startswith(("SQLITE_IOERR", "SQLITE_READONLY", "SQLITE_CANTOPEN")) and _read_only(self.path):
            return SpoolError(f"The spool {p} could not be {doing}: it is on a read-only file system")
        if name == "SQLITE_NOTADB":
            return SpoolError(
                f"The spool {p} is not an SQLite database ({e}); move it aside or point "
                "spool_path elsewhere"
            )
        if name.startswith("SQLITE_CORRUPT"):
            return SpoolError(
                f"The spool {p} is corrupt ({e}); move it aside (for example to "
                f"{str(self.path) + '.corrupt'!r}) to start an empty spool: the records still "
                "in it are not sent and the channels' edge numbering starts again at 1"
            )
        if name.startswith("SQLITE_BUSY") or name.startswith("SQLITE_LOCKED"):
            return SpoolError(
                f"The spool {p} is in use by another process (is another streamcond running "
                "with the same spool_path?)"
            )
        if name == "SQLITE_FULL":
            return SpoolError(f"The spool {p} could not be {doing}: the disk is full")
        if name.startswith("SQLITE_READONLY") or name.startswith("SQLITE_CANTOPEN"):
            if _read_only(self.path):
                return SpoolError(
                    f"The spool {p} could not be {doing}: it is on a read-only file system"
                )
            return SpoolError(f"The spool {p} could not be {doing}: {e} (check permissions)")
        return SpoolError(f"The spool {p} could not be {doing}: {e}")

    def _trouble_words(self, e: sqlite3.Error) -> str:
        name = _errname(e)
        if name == "SQLITE_FULL":
            return "the disk is full"
        if name.startswith("SQLITE_READONLY") or _read_only(self.path):
            return "the file system is read-only"
        if name.startswith(("SQLITE_CORRUPT", "SQLITE_NOTADB")):
            return f"the file is corrupt ({e})"
        return f"the disk reports an error ({e})"

    # -- the write path ------------------------------------------------------------------

    def put_many(
        self,
        items: Sequence[Item],
        state: Mapping[str, dict] | None = None,
    ) -> int | None:
        """Append items ``(topic, payload, qos, retain, kind)`` in order and, in the SAME
        transaction, upsert per-channel state dicts (stored as JSON) — durable when it returns
        (with ``sync="interval"``: once the next interval's sync has run). Returns the id given
        to the first item (the others follow it one by one: ids are handed out contiguously),
        or None when there were no items.

        Acknowledgements left for it by :meth:`ack_soon` are committed in the same transaction.

        Each state dict replaces the stored dict of its channel whole; channels not named keep
        theirs. The items are checked before anything is written, so a bad item (payload not
        bytes, qos not 0/1/2, ...) raises ``TypeError``/``ValueError`` and stores nothing.
        Appending beyond ``max_records`` drops records by the overflow policy (module docstring).
        A disk that cannot take the write does not raise: the records are held in memory
        (module docstring, "A full or failing disk").
        """
        checked = [_row(i, it) for i, it in enumerate(items)]
        states = {} if state is None else dict(_state_row(ch, d) for ch, d in state.items())
        if not checked and not states:
            return None
        with self._lock:
            conn = self._live()
            first = self._next_id if checked else None
            rows: list[_Row] = [(self._next_id + k, *r) for k, r in enumerate(checked)]
            self._next_id += len(rows)
            if self._trouble is not None and self._clock() < self._retry_at:
                self._hold(rows, states)  # not yet time to try the disk again
                return first
            pending = list(self._mem) + rows
            merged = {**self._mem_state, **states}
            room = self._room(conn)
            if room is not None and room < HEADROOM_BYTES and pending:
                self._truncate_log(conn)  # the log's space may be all that is needed
                room = self._room(conn)
                if room is not None and room < HEADROOM_BYTES:
                    self._hold(rows, states, _LowSpace(f"less than {HEADROOM_BYTES // 1024} KiB free"))
                    return first
            try:
                drops = self._write(conn, pending, merged)
            except sqlite3.Error as e:
                if not _disk_trouble(e):
                    raise self._error("written", e) from None
                drops = None
                if _errname(e) == "SQLITE_FULL" and self._free_space(conn):
                    # the log held the space: try once more with it emptied
                    try:
                        drops = self._write(conn, pending, merged)
                    except sqlite3.Error as e2:
                        if not _disk_trouble(e2):
                            raise self._error("written", e2) from None
                        e = e2
                if drops is None:
                    self._hold(rows, states, e)
                    return first
            if self._trouble is not None:
                log.warning(
                    "spool %s is writable again: stored %d record(s) held in memory; "
                    "%d lost to the disk in all", self.path, len(self._mem), self.lost_to_disk,
                )
                self._trouble = None
            self._mem.clear()
            self._mem_state.clear()
            self._after_commit()
            room = self._room(conn)
            if room is not None and room < 2 * HEADROOM_BYTES:
                self._truncate_log(conn)
            self._report_drops(drops)
        return first

    def _write(self, conn: sqlite3.Connection, rows: list[_Row], states: Mapping[str, str]) -> dict[str, int]:
        """One transaction: pending acknowledgements, the rows, the states, the overflow trim.
        On failure nothing of it is kept (in the file or in the counters)."""
        count, dropped = self._count, self._dropped
        self._take_deferred()
        try:
            conn.execute("BEGIN IMMEDIATE")
            if self._ack_pending:
                gone = conn.executemany(
                    "DELETE FROM queue WHERE id BETWEEN ? AND ?", _runs(self._ack_pending)
                ).rowcount
                self._count -= max(0, gone)
            if rows:
                conn.executemany(
                    "INSERT INTO queue (id, topic, payload, qos, retain, kind, protected) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?)",
                    rows,
                )
                self._count += len(rows)
            if states:
                conn.executemany(
                    "INSERT OR REPLACE INTO channel_state (channel, data) VALUES (?, ?)",
                    list(states.items()),
                )
            drops = self._trim(conn)
            if self._dropped != self._stored_dropped:
                conn.execute("UPDATE counters SET value = ? WHERE name = 'dropped'", (self._dropped,))
            conn.execute("COMMIT")
        except BaseException:
            self._rollback(conn)
            self._count, self._dropped = count, dropped
            raise
        self._stored_dropped = self._dropped
        self._ack_pending.clear()
        return drops

    def _free_space(self, conn: sqlite3.Connection) -> bool:
        """On a full disk: copy the log into the database and truncate it to nothing; whether
        that worked (then a write is worth trying again)."""
        return self._truncate_log(conn)

    @staticmethod
    def _truncate_log(conn: sqlite3.Connection) -> bool:
        try:
            busy, _, _ = conn.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()
            return busy == 0
        except sqlite3.Error:
            return False

    def _room(self, conn: sqlite3.Connection) -> int | None:
        """Free bytes for the spool: on its file system, and the free pages inside the database
        that acknowledged records left (None when that cannot be told)."""
        try:
            st = os.statvfs(self.path.parent)
        except OSError:
            return None
        room = st.f_bavail * st.f_frsize
        if room < 2 * HEADROOM_BYTES:  # only worth the two queries when space is short
            try:
                free = conn.execute("PRAGMA freelist_count").fetchone()[0]
                page = conn.execute("PRAGMA page_size").fetchone()[0]
                room += int(free) * int(page)
            except sqlite3.Error:
                pass
        return room

    def _hold(self, rows: list[_Row], states: Mapping[str, str], e: sqlite3.Error | None = None) -> None:
        """Keep records in memory while the disk cannot take them (module docstring)."""
        now = self._clock()
        if e is not None:
            self.disk_errors += 1
            self._retry_at = now + DISK_RETRY_S
            words = self._trouble_words(e)
            if self._trouble is None:
                self._trouble = words
                self._trouble_log.start()  # "still ..." a full interval from now
                log.warning(
                    "spool %s cannot be written (%s): records are kept in memory (at most %d) "
                    "and sent live while the broker is reachable; trying the disk again every "
                    "%g s", self.path, words, self.memory_max_records, DISK_RETRY_S,
                )
            else:
                self._trouble = words
                self._trouble_log.log(
                    logging.WARNING,
                    "spool %s still cannot be written (%s): %d record(s) in memory, %d lost to "
                    "the disk so far", self.path, words, len(self._mem) + len(rows),
                    self.lost_to_disk,
                )
        self._mem.extend(rows)
        self._mem_state.update(states)
        drops = self._trim_memory()
        if drops:
            self.lost_to_disk += sum(drops.values())
            self._report_drops(drops)

    def _trim_memory(self) -> dict[str, int]:
        """The overflow policy on the records held in memory."""
        excess = len(self._mem) - self.memory_max_records
        if excess <= 0:
            return {}
        drops: dict[str, int] = {}
        keep: deque[_Row] = deque()
        for r in self._mem:  # oldest non-events first
            if excess > 0 and not r[6]:
                drops[r[5]] = drops.get(r[5], 0) + 1
                excess -= 1
            else:
                keep.append(r)
        while excess > 0 and keep:  # then the oldest events
            r = keep.popleft()
            drops[r[5]] = drops.get(r[5], 0) + 1
            excess -= 1
        self._mem = keep
        self._dropped += sum(drops.values())
        return drops

    def _after_commit(self) -> None:
        """With ``sync="interval"``: make sure a sync of the log follows within the interval."""
        if self.sync != "interval":
            return
        self._unsynced = True
        if self._sync_timer is None:
            delay = max(0.0, self._last_sync + self.sync_interval_s - time.monotonic())
            t = threading.Timer(delay, self._timed_sync)
            t.daemon = True
            self._sync_timer = t
            t.start()

    def _timed_sync(self) -> None:
        with self._lock:
            self._sync_timer = None
            if self._conn is None or not self._unsynced:
                return
            self._unsynced = False
            self._last_sync = time.monotonic()
            try:
                # An fsync of the log file makes every commit in it durable, like
                # synchronous=FULL would have at each commit (https://www.sqlite.org/wal.html).
                fd = os.open(str(self.path) + "-wal", os.O_RDONLY)
            except FileNotFoundError:
                return  # checkpointed and removed: the database file was synced by SQLite
            except OSError as e:
                log.warning("spool %s: the log cannot be synced: %s", self.path, e.strerror or e)
                return
        try:
            os.fsync(fd)  # outside the lock: writers need not wait for the disk
        except OSError as e:
            log.warning("spool %s: the log cannot be synced: %s", self.path, e.strerror or e)
        finally:
            os.close(fd)

    def _trim(self, conn: sqlite3.Connection) -> dict[str, int]:
        """Apply the overflow policy inside the open transaction; drops per kind."""
        excess = self._count - self.max_records
        if excess <= 0:
            return {}
        drops: dict[str, int] = {}
        # Unprotected first, oldest first; both queries walk the (protected, id) index.
        pick = "SELECT id, kind FROM queue WHERE protected = 0 ORDER BY id LIMIT ?"
        for kind, n in conn.execute(
            f"SELECT kind, COUNT(*) FROM ({pick}) GROUP BY kind", (excess,)
        ).fetchall():
            drops[kind] = drops.get(kind, 0) + int(n)
        removed = conn.execute(
            f"DELETE FROM queue WHERE id IN (SELECT id FROM ({pick}))", (excess,)
        ).rowcount
        rest = excess - removed
        if rest > 0:
            # Only protected records are left: the oldest of them go.
            pick = "SELECT id, kind FROM queue ORDER BY id LIMIT ?"
            for kind, n in conn.execute(
                f"SELECT kind, COUNT(*) FROM ({pick}) GROUP BY kind", (rest,)
            ).fetchall():
                drops[kind] = drops.get(kind, 0) + int(n)
            removed += conn.execute(
                f"DELETE FROM queue WHERE id IN (SELECT id FROM ({pick}))", (rest,)
            ).rowcount
        self._count -= removed
        self._dropped += removed
        conn.execute("UPDATE counters SET value = ? WHERE name = 'dropped'", (self._dropped,))
        return drops

    def _report_drops(self, drops: Mapping[str, int]) -> None:
        """Log committed drops, at most once per :data:`WARN_INTERVAL_S` per kind."""
        if not drops:
            return
        for kind, n in drops.items():
            due = self._drop_log.due(n, key=kind)
            if due:
                self._warn(kind, due)

    def _warn(self, kind: str, n: int) -> None:
        bound = self.max_records if self._trouble is None else self.memory_max_records
        where = "" if self._trouble is None else " held in memory: the disk cannot be written"
        log.warning(
            "spool %s is full (%d records%s): dropped %d %r record(s) since the last warning "
            "about them, oldest first; %d dropped in total",
            self.path,
            bound,
            where,
            n,
            kind,
            self._dropped,
        )

    # -- the read / acknowledge path -----------------------------------------------------

    def peek(self, limit: int, after_id: int = 0) -> list[SpoolItem]:
        """Up to ``limit`` stored items with ``id > after_id``, oldest (lowest id) first.

        Nothing is removed; pass the last id seen as ``after_id`` to page on while earlier
        items are still in flight. Records held in memory (a disk that cannot be written)
        come after the stored ones, in the same id order.
        """
        if limit <= 0:
            return []
        with self._lock:
            conn = self._live()
            with self._deferred_lock:
                skip = self._ack_pending | self._deferred if self._deferred else self._ack_pending
            try:
                rows = conn.execute(
                    "SELECT id, topic, payload, qos, retain, kind FROM queue "
                    "WHERE id > ? ORDER BY id LIMIT ?",
                    (int(after_id), int(limit) + len(skip)),
                ).fetchall()
            except sqlite3.Error as e:
                raise self._error("read", e) from None
            if skip:
                rows = [r for r in rows if r[0] not in skip]
            rows = rows[: int(limit)]
            if len(rows) < limit and self._mem:
                room = int(limit) - len(rows)
                for r in self._mem:
                    if r[0] > after_id:
                        rows.append(r[:6])
                        room -= 1
                        if room == 0:
                            break
        return [
            SpoolItem(id=r[0], topic=r[1], payload=bytes(r[2]), qos=r[3], retain=bool(r[4]), kind=r[5])
            for r in rows
        ]

    def ack(self, ids: Iterable[int]) -> None:
        """Delete acknowledged items; ids not (or no longer) stored are ignored.

        Committed with ``synchronous=NORMAL``: still atomic and crash-safe (SQLite: WAL with
        NORMAL "is always consistent"), but without its own fsync; the next :meth:`put_many`'s
        fsync makes it durable. A power cut before that can only bring acknowledged items
        back, to be sent again — a duplicate, never a loss. Batch acknowledgements where you can.
        A disk that cannot take the deletion does not raise: the ids are remembered, left out of
        :meth:`peek`, and deleted with the next successful commit.
        """
        keys = {int(i) for i in ids}
        with self._lock:
            conn = self._live()
            keys |= self._take_deferred(into_pending=False)
            if not keys:
                return
            if self._mem and max(keys) >= self._mem[0][0]:
                held = {r[0] for r in self._mem} & keys
                if held:
                    self._mem = deque(r for r in self._mem if r[0] not in held)
                    keys -= held
            keys -= self._ack_pending
            if not keys:
                return
            ordered = sorted(keys)
            removed = 0
            try:
                # in slices: one transaction's log must fit in what a full disk has left
                for a in range(0, len(ordered), ACK_SLICE):
                    params = [(k,) for k in ordered[a : a + ACK_SLICE]]
                    try:
                        removed += self._delete(conn, params)
                    except sqlite3.Error as e:
                        if not (_errname(e) == "SQLITE_FULL" and self._free_space(conn)):
                            raise
                        removed += self._delete(conn, params)
                    keys.difference_update(k for (k,) in params)
            except sqlite3.Error as e:
                self._count -= max(0, removed)
                if not _disk_trouble(e):
                    raise self._error("written", e) from None
                self.disk_errors += 1
                # Remember what is stored and acknowledged; it is deleted with the next commit.
                try:
                    marks = ",".join("?" * len(keys))
                    held = conn.execute(f"SELECT id FROM queue WHERE id IN ({marks})", list(keys)).fetchall()
                    self._ack_pending.update(r[0] for r in held)
                except sqlite3.Error:
                    self._ack_pending.update(keys)
                return
            self._count -= max(0, removed)

    def ack_soon(self, ids: Iterable[int]) -> bool:
        """Acknowledge items with the next commit instead of a transaction of their own.

        Never waits for the disk (its own small lock, not the one a commit holds through its
        fsync), so the event loop may call it. From the moment it returns the items are left
        out of :meth:`peek` and ``len()``; they are deleted in the next :meth:`put_many`'s
        transaction, or by :meth:`ack` (with no ids: :meth:`flush_acks`) or :meth:`close`,
        whichever comes first. Until then a SIGKILL or a power cut only brings them back, to be
        sent again — a duplicate, which QoS 1 permits and consumers catch by ``seq``, never a
        loss. False (nothing done; use :meth:`ack`) while records are held in memory because
        the disk cannot be written: those need the full bookkeeping of :meth:`ack`.
        """
        if self._mem or self._trouble is not None:
            return False
        with self._deferred_lock:
            if not self._deferred:
                self._deferred_at = time.monotonic()
            self._deferred.update(int(i) for i in ids)
        return True

    @property
    def acks_deferred(self) -> int:
        """Acknowledgements :meth:`ack_soon` has left for the next commit."""
        return len(self._deferred)

    @property
    def acks_deferred_since(self) -> float | None:
        """``time.monotonic()`` when the oldest acknowledgement still left for the next commit
        was left (None: none is)."""
        return self._deferred_at if self._deferred else None

    def flush_acks(self) -> None:
        """Commit the acknowledgements :meth:`ack_soon` left (a no-op when there are none)."""
        if self._deferred:
            self.ack(())

    def _take_deferred(self, into_pending: bool = True) -> set[int]:
        """The ids :meth:`ack_soon` left (under the main lock): into ``_ack_pending`` (for
        :meth:`_write`), or returned."""
        with self._deferred_lock:
            ids, self._deferred = self._deferred, set()
            self._deferred_at = None
        if into_pending:
            self._ack_pending |= ids
        return ids

    def _delete(self, conn: sqlite3.Connection, params: list[tuple[int]]) -> int:
        runs = _runs(k for (k,) in params)
        if self.sync == "always":
            conn.execute("PRAGMA synchronous=NORMAL")
        try:
            conn.execute("BEGIN IMMEDIATE")
            removed = conn.executemany("DELETE FROM queue WHERE id BETWEEN ? AND ?", runs).rowcount
            conn.execute("COMMIT")
            return removed
        except BaseException:
            self._rollback(conn)
            raise
        finally:
            if self.sync == "always":
                conn.execute("PRAGMA synchronous=FULL")

    def load_state(self) -> dict[str, dict]:
        """Channel → state dict, as stored by the last committed :meth:`put_many` (or, while
        the disk cannot be written, as last handed to it)."""
        with self._lock:
            conn = self._live()
            try:
                rows = conn.execute("SELECT channel, data FROM channel_state").fetchall()
            except sqlite3.Error as e:
                raise self._error("read", e) from None
            rows = dict(rows)
            rows.update(self._mem_state)
        return {ch: json.loads(data) for ch, data in rows.items()}

    def __len__(self) -> int:
        """Records stored or held in memory (not yet acknowledged, not dropped)."""
        return max(0, self._count - len(self._ack_pending) - len(self._deferred) + len(self._mem))

    @property
    def dropped(self) -> int:
        """Records dropped by the overflow policy over the life of the file (those dropped
        from memory while the disk could not be written included)."""
        return self._dropped

    @property
    def in_memory(self) -> int:
        """Records held in memory because the disk could not take them."""
        return len(self._mem)

    @property
    def trouble(self) -> str | None:
        """What keeps the disk from being written, in words; None when it is writable."""
        return self._trouble

    def counters(self) -> dict[str, Any]:
        """The spool's figures, for logs and health reports."""
        return {
            "stored": len(self),
            "in_memory": len(self._mem),
            "dropped": self._dropped,
            "lost_to_disk": self.lost_to_disk,
            "disk_errors": self.disk_errors,
            "disk_trouble": self._trouble,
        }

    # -- closing -------------------------------------------------------------------------

    def close(self) -> None:
        """Close the file (idempotent); logs drops still unreported by the rate limit.

        Records still held in memory get one more attempt at the disk; if that fails, how many
        are lost is logged."""
        with self._lock:
            conn, self._conn = self._conn, None
            if conn is None:
                return
            if self._sync_timer is not None:
                self._sync_timer.cancel()
                self._sync_timer = None
            self._take_deferred()
            if self._mem or self._mem_state or self._ack_pending:
                try:
                    self._write(conn, list(self._mem), self._mem_state)
                    self._mem.clear()
                    self._mem_state.clear()
                except sqlite3.Error as e:
                    if self._mem:
                        log.warning(
                            "spool %s: %d record(s) held in memory could not be stored (%s) "
                            "and are lost", self.path, len(self._mem), self._trouble_words(e),
                        )
            for kind, n in sorted(self._drop_log.drain().items()):
                self._warn(kind, n)
            try:
                conn.close()  # checkpoints the log into the database and removes it
            except sqlite3.Error as e:
                raise self._error("closed", e) from None

    def __enter__(self) -> Spool:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self._conn is None else f"{len(self)} records"
        return f"Spool({str(self.path)!r}, {state}, dropped={self._dropped})"

    # -- helpers -------------------------------------------------------------------------

    def _live(self) -> sqlite3.Connection:
        if self._conn is None:
            raise SpoolError(f"The spool {str(self.path)!r} is closed")
        return self._conn

    @staticmethod
    def _rollback(conn: sqlite3.Connection) -> None:
        if conn.in_transaction:
            try:
                conn.execute("ROLLBACK")
            except sqlite3.Error:
                # SQLite may already have rolled back (e.g. after SQLITE_FULL); nothing to undo.
                pass


def spool_options(mq: Any) -> dict[str, Any]:
    """:class:`Spool` keyword arguments from an ``[output.mqtt]`` config."""
    return {
        "max_records": mq.spool_max_records,
        "sync": mq.spool_sync,
        "sync_interval_s": mq.spool_sync_interval_ms / 1000.0,
    }


def _runs(ids: Iterable[int]) -> list[tuple[int, int]]:
    """Consecutive ids as ``(first, last)`` runs: a drained backlog is one range delete."""
    runs: list[tuple[int, int]] = []
    for k in sorted(ids):
        if runs and k == runs[-1][1] + 1:
            runs[-1] = (runs[-1][0], k)
        else:
            runs.append((k, k))
    return runs


def _row(index: int, item: Any) -> tuple[str, bytes, int, int, str, int]:
    """Check one ``(topic, payload, qos, retain, kind)`` item; the row to insert."""
    try:
        topic, payload, qos, retain, kind = item
    except (TypeError, ValueError):
        raise TypeError(
            f"item {index} must be (topic, payload, qos, retain, kind), not {item!r:.80}"
        ) from None
    if not isinstance(topic, str) or not topic:
        raise TypeError(f"item {index}: topic must be a non-empty str, not {topic!r:.80}")
    if isinstance(payload, (bytearray, memoryview)):
        payload = bytes(payload)
    elif not isinstance(payload, bytes):
        # A str here is almost always a forgotten .encode(); storing it would change its type.
        raise TypeError(f"item {index}: payload must be bytes, not {type(payload).__name__}")
    if qos not in (0, 1, 2) or isinstance(qos, bool):
        raise ValueError(f"item {index}: qos must be 0, 1 or 2 (MQTT), not {qos!r}")
    if not isinstance(retain, bool):
        raise TypeError(f"item {index}: retain must be True or False, not {retain!r}")
    if not isinstance(kind, str) or not kind:
        raise TypeError(f"item {index}: kind must be a non-empty str, not {kind!r:.80}")
    return (topic, payload, int(qos), int(retain), kind, int(kind in PROTECTED_KINDS))


def _state_row(channel: Any, data: Any) -> tuple[str, str]:
    if not isinstance(channel, str) or not channel:
        raise TypeError(f"state keys must be channel names (str), not {channel!r:.80}")
    if not isinstance(data, dict):
        raise TypeError(f"state[{channel!r}] must be a dict, not {type(data).__name__}")
    try:
        # Python's JSON round-trips floats exactly (shortest repr) and keeps NaN/inf.
        return (channel, json.dumps(data, separators=(",", ":")))
    except (TypeError, ValueError) as e:
        raise TypeError(f"state[{channel!r}] cannot be stored as JSON: {e}") from None
