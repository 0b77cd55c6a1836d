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
- ``synchronous=FULL``: in WAL mode, NORMAL survives an application crash but "a transaction
  committed ... might roll back following a power loss or system crash"; FULL syncs the WAL at
  every commit, so a batch that :meth:`Spool.put_many` has returned is on the disk even if the
  pump-station board loses power a moment later. That is the promise "durable when it returns".
  Acknowledgements alone are committed with NORMAL (see :meth:`Spool.ack`): losing one to a power
  cut only re-sends a record, which QoS 1 permits anyway and consumers catch by ``seq``.
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

Thread safety
-------------
A :class:`Spool` may be shared between threads: every method holds an internal lock, so calls
are serialised (the daemon calls it from one thread anyway). It cannot be shared between
processes: the file is locked exclusively while it is open.
"""

from __future__ import annotations

import json
import logging
import sqlite3
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .. import records
from ..errors import StreamcondError

log = logging.getLogger(__name__)

SCHEMA_VERSION = 1
"""Version of the tables below; a file written by a newer version is refused, not guessed at."""

PROTECTED_KINDS: frozenset[str] = frozenset({records.EDGE, records.GAP, records.FAULT})
"""Record kinds dropped only when nothing else is left to drop (the overflow policy)."""

WARN_INTERVAL_S = 60.0
"""At most one overflow warning per record kind in this many seconds of the clock."""

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


class Spool:
    """A durable FIFO of MQTT records plus the per-channel state they advance.

    See the module docstring for the storage choices, the overflow policy and thread safety.

    :param path: the SQLite file; parent directories are created.
    :param max_records: the most records held (overflow policy in the module docstring).
    :param clock: seconds, for rate-limiting overflow warnings only (injectable for tests).
    :param lock_timeout_s: how long to wait for another process holding the file.
    :raises SpoolError: the file is not a spool, is newer, corrupt, locked or unreachable.
    """

    def __init__(
        self,
        path: str | Path,
        max_records: int = 1_000_000,
        *,
        clock: Callable[[], float] = time.monotonic,
        lock_timeout_s: float = 1.0,
    ) -> None:
        if isinstance(max_records, bool) or not isinstance(max_records, int) or max_records < 1:
            raise ValueError(f"max_records must be a whole number of at least 1, not {max_records!r}")
        self.path = Path(path)
        self.max_records = max_records
        self._clock = clock
        self._lock = threading.Lock()
        self._last_warned: dict[str, float] = {}
        self._unreported: dict[str, int] = {}
        self._conn: sqlite3.Connection | None = None
        if self.path.is_dir():
            raise SpoolError(f"The spool {str(self.path)!r} is a directory, not a file")
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            raise SpoolError(
                f"The spool's directory {str(self.path.parent)!r} cannot be created: "
                f"{e.strerror or e}"
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
            raise SpoolError(
                f"The spool {str(self.path)!r} cannot use write-ahead logging "
                f"(journal mode stays {mode!r}); is it on a network or read-only file system?"
            )
        conn.execute("PRAGMA synchronous=FULL")
        # Keep the log from staying large on a small board after a burst of thousands.
        conn.execute("PRAGMA journal_size_limit=8388608")
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
            # A smaller max_records than the file was filled with: the bound holds from now.
            drops = self._trim(conn)
            conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
        self._report_drops(drops)

    def _error(self, doing: str, e: sqlite3.Error) -> SpoolError:
        """A :class:`SpoolError` naming the path and, in words, what SQLite reported."""
        p = repr(str(self.path))
        name = getattr(e, "sqlite_errorname", "") or ""
        if name == "SQLITE_NOTADB":
            return SpoolError(
                f"The spool {p} is not an SQLite database ({e}); move it aside or point "
                "spool_path elsewhere"
            )
        if name.startswith("SQLITE_CORRUPT"):
            return SpoolError(
                f"The spool {p} is corrupt ({e}); move it aside to start an empty spool "
                "(records still in it would not be sent)"
            )
        if name.startswith("SQLITE_BUSY") or name.startswith("SQLITE_LOCKED"):
            return SpoolError(
                f"The spool {p} is in use by another process (is another streamcond running "
                "with the same spool_path?)"
            )
        if name == "SQLITE_FULL":
            return SpoolError(f"The spool {p} could not be {doing}: the disk is full")
        if name.startswith("SQLITE_READONLY") or name.startswith("SQLITE_CANTOPEN"):
            return SpoolError(f"The spool {p} could not be {doing}: {e} (check permissions)")
        return SpoolError(f"The spool {p} could not be {doing}: {e}")

    # -- the write path ------------------------------------------------------------------

    def put_many(
        self,
        items: Sequence[Item],
        state: Mapping[str, dict] | None = None,
    ) -> None:
        """Append items ``(topic, payload, qos, retain, kind)`` in order and, in the SAME
        transaction, upsert per-channel state dicts (stored as JSON) — durable when it returns.

        Each state dict replaces the stored dict of its channel whole; channels not named keep
        theirs. The items are checked before anything is written, so a bad item (payload not
        bytes, qos not 0/1/2, ...) raises ``TypeError``/``ValueError`` and stores nothing.
        Appending beyond ``max_records`` drops records by the overflow policy (module docstring).
        """
        rows = [_row(i, it) for i, it in enumerate(items)]
        states = [] if state is None else [_state_row(ch, d) for ch, d in state.items()]
        if not rows and not states:
            return
        with self._lock:
            conn = self._live()
            count, dropped = self._count, self._dropped
            try:
                conn.execute("BEGIN IMMEDIATE")
                if rows:
                    conn.executemany(
                        "INSERT INTO queue (topic, payload, qos, retain, kind, protected) "
                        "VALUES (?, ?, ?, ?, ?, ?)",
                        rows,
                    )
                    self._count += len(rows)
                if states:
                    conn.executemany(
                        "INSERT OR REPLACE INTO channel_state (channel, data) VALUES (?, ?)",
                        states,
                    )
                drops = self._trim(conn)
                conn.execute("COMMIT")
            except BaseException as e:
                self._rollback(conn)
                self._count, self._dropped = count, dropped
                if isinstance(e, sqlite3.Error):
                    raise self._error("written", e) from None
                raise
            self._report_drops(drops)

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
        now = self._clock()
        for kind, n in drops.items():
            self._unreported[kind] = self._unreported.get(kind, 0) + n
            last = self._last_warned.get(kind)
            if last is None or now - last >= WARN_INTERVAL_S:
                self._last_warned[kind] = now
                self._warn(kind, self._unreported.pop(kind))

    def _warn(self, kind: str, n: int) -> None:
        log.warning(
            "spool %s is full (%d records): dropped %d %r record(s) since the last warning "
            "about them, oldest first; %d dropped in total",
            self.path,
            self.max_records,
            n,
            kind,
            self._dropped,
        )

    # -- the read / acknowledge path -----------------------------------------------------

    def peek(self, limit: int, after_id: int = 0) -> list[SpoolItem]:
        """Up to ``limit`` stored items with ``id > after_id``, oldest (lowest id) first.

        Nothing is removed; pass the last id seen as ``after_id`` to page on while earlier
        items are still in flight.
        """
        if limit <= 0:
            return []
        with self._lock:
            conn = self._live()
            try:
                rows = conn.execute(
                    "SELECT id, topic, payload, qos, retain, kind FROM queue "
                    "WHERE id > ? ORDER BY id LIMIT ?",
                    (int(after_id), int(limit)),
                ).fetchall()
            except sqlite3.Error as e:
                raise self._error("read", e) from None
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
        """
        keys = [(int(i),) for i in ids]
        if not keys:
            return
        with self._lock:
            conn = self._live()
            try:
                conn.execute("PRAGMA synchronous=NORMAL")
                try:
                    conn.execute("BEGIN IMMEDIATE")
                    removed = conn.executemany("DELETE FROM queue WHERE id = ?", keys).rowcount
                    conn.execute("COMMIT")
                except BaseException:
                    self._rollback(conn)
                    raise
                finally:
                    conn.execute("PRAGMA synchronous=FULL")
            except sqlite3.Error as e:
                raise self._error("written", e) from None
            self._count -= max(0, removed)

    def load_state(self) -> dict[str, dict]:
        """Channel → state dict, as stored by the last committed :meth:`put_many`."""
        with self._lock:
            conn = self._live()
            try:
                rows = conn.execute("SELECT channel, data FROM channel_state").fetchall()
            except sqlite3.Error as e:
                raise self._error("read", e) from None
        return {ch: json.loads(data) for ch, data in rows}

    def __len__(self) -> int:
        """Records stored (not yet acknowledged, not dropped)."""
        return self._count

    @property
    def dropped(self) -> int:
        """Records dropped by the overflow policy over the life of the file."""
        return self._dropped

    # -- closing -------------------------------------------------------------------------

    def close(self) -> None:
        """Close the file (idempotent); logs drops still unreported by the rate limit."""
        with self._lock:
            conn, self._conn = self._conn, None
            if conn is None:
                return
            for kind, n in sorted(self._unreported.items()):
                self._warn(kind, n)
            self._unreported.clear()
            try:
                conn.close()  # checkpoints the log into the database and removes it
            except sqlite3.Error as e:
                raise self._error("closed", e) from None

    def __enter__(self) -> Spool:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self._conn is None else f"{self._count} records"
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
