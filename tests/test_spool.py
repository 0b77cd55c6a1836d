"""The durable spool (streamcond/io/spool.py) against real SQLite files.

The reference for every check here is outside the spool: the records as they were put (order,
content), the SQLite file as an independent ``sqlite3`` connection reads it, and what a child
process reported as committed before it was killed with SIGKILL. No mocks, no timed
assertions: the overflow warning's rate limit runs on an injected clock.
"""

from __future__ import annotations

import json
import logging
import os
import random
import signal
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from streamcond.errors import StreamcondError
from streamcond.io.spool import SCHEMA_VERSION, WARN_INTERVAL_S, Spool, SpoolError

PREFIX = "streamcond/orchard-pump-2"


def item(kind: str, n: int, channel: str = "level") -> tuple[str, bytes, int, bool, str]:
    """A record of ``kind`` whose payload says which one it is (``n``)."""
    topic = f"{PREFIX}/{channel}/{kind}"
    payload = json.dumps({"kind": kind, "channel": channel, "n": n}).encode()
    return (topic, payload, 1 if kind == "edge" else 0, kind == "state", kind)


def contents(sp: Spool) -> list[tuple[str, int]]:
    """What the spool holds, oldest first, as (kind, n) pairs."""
    out = []
    for it in sp.peek(10**9):
        p = json.loads(it.payload)
        out.append((it.kind, p["n"]))
    return out


# -- order, acknowledgement, paging -------------------------------------------------------


def test_order_preserved_across_batches_and_round_trip_of_fields(tmp_path: Path) -> None:
    # Reference: the items as put; peek must give them back unchanged, in the same order.
    put = [item("edge", 1), item("stats", 2), item("state", 3)], [item("edge", 4)], [
        ("a/b", b"\x00\xff raw bytes", 2, True, "measure")
    ]
    with Spool(tmp_path / "s.sqlite") as sp:
        for batch in put:
            sp.put_many(batch)
        got = sp.peek(100)
        assert len(sp) == 5
    flat = [x for batch in put for x in batch]
    assert [(i.topic, i.payload, i.qos, i.retain, i.kind) for i in got] == flat
    ids = [i.id for i in got]
    assert ids == sorted(ids) and len(set(ids)) == len(ids)
    assert all(type(i.payload) is bytes and type(i.retain) is bool for i in got)


def test_ack_of_a_subset_keeps_the_rest_in_order(tmp_path: Path) -> None:
    with Spool(tmp_path / "s.sqlite") as sp:
        sp.put_many([item("edge", n) for n in range(10)])
        ids = [i.id for i in sp.peek(100)]
        sp.ack([ids[1], ids[4], ids[9], 10**12])  # an unknown id is ignored
        assert contents(sp) == [("edge", n) for n in (0, 2, 3, 5, 6, 7, 8)]
        assert len(sp) == 7
        sp.ack([ids[1]])  # acknowledging twice is harmless
        assert len(sp) == 7
        sp.ack([])
    with Spool(tmp_path / "s.sqlite") as sp:  # acknowledgements are stored
        assert contents(sp) == [("edge", n) for n in (0, 2, 3, 5, 6, 7, 8)]
        assert len(sp) == 7


def test_after_id_paging_covers_everything_once(tmp_path: Path) -> None:
    with Spool(tmp_path / "s.sqlite") as sp:
        sp.put_many([item("edge", n) for n in range(23)])
        everything = sp.peek(1000)
        pages, last = [], 0
        while page := sp.peek(5, after_id=last):
            assert len(page) <= 5
            pages.extend(page)
            last = page[-1].id
        assert pages == everything
        # Paging past items in flight while older ones are acknowledged behind the cursor.
        sp.ack(i.id for i in everything[:7])
        assert sp.peek(3, after_id=everything[10].id) == everything[11:14]
        assert sp.peek(3) == everything[7:10]
        assert sp.peek(0) == [] and sp.peek(-1) == []


def test_ids_are_never_reused_after_everything_was_acknowledged(tmp_path: Path) -> None:
    # SQLite documentation (https://www.sqlite.org/autoinc.html): AUTOINCREMENT prevents the
    # reuse of rowids of deleted rows; without it an emptied table starts again at 1.
    path = tmp_path / "s.sqlite"
    with Spool(path) as sp:
        sp.put_many([item("edge", n) for n in range(3)])
        first = sp.peek(10)
        sp.ack(i.id for i in first)
        assert len(sp) == 0
    with Spool(path) as sp:
        sp.put_many([item("edge", 3)])
        (again,) = sp.peek(10)
    assert again.id > max(i.id for i in first)


# -- state ----------------------------------------------------------------------------------


def test_put_many_returns_the_first_id_of_a_contiguous_run(tmp_path: Path) -> None:
    # Reference: the ids peek reports for the items, in the order they were put.
    with Spool(tmp_path / "s.sqlite") as sp:
        firsts = [sp.put_many([item("edge", k) for k in range(n)]) for n in (1, 3, 2)]
        assert sp.put_many([], state={"a": {"seq": 1}}) is None
        ids = [it.id for it in sp.peek(100)]
    assert ids == list(range(firsts[0], firsts[0] + 6))
    assert firsts == [ids[0], ids[1], ids[4]]


_DEFERRER = textwrap.dedent(
    """
    import sys
    from streamcond.io.spool import Spool

    sp = Spool(sys.argv[1])
    ids = [it.id for it in sp.peek(100)]
    assert sp.ack_soon(ids[:2])
    print(len(sp), [it.id for it in sp.peek(100)] == ids[2:], flush=True)
    if sys.argv[2] == "commit":
        sp.put_many([("p/level/edge", b"new", 1, False, "edge")])
    print("done", flush=True)
    sys.stdin.read()  # until killed
    """
)


@pytest.mark.parametrize("then", ["commit", "nothing"])
def test_deferred_acks_ride_on_the_next_commit_and_sigkill_only_resends(tmp_path: Path, then: str) -> None:
    # Reference: what the file holds after a SIGKILL, read by a fresh Spool. An acknowledgement
    # left for the next commit is gone with that commit; without one it is lost to the kill,
    # which brings the record back to be sent again (at least once, never a loss).
    path = tmp_path / "s.sqlite"
    with Spool(path) as sp:
        sp.put_many([item("edge", k) for k in range(4)])
    script = tmp_path / "deferrer.py"
    script.write_text(_DEFERRER)
    proc = subprocess.Popen([sys.executable, str(script), str(path), then], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True, cwd=Path(__file__).resolve().parents[1])
    try:
        assert proc.stdout.readline().split() == ["2", "True"]  # type: ignore[union-attr]
        assert proc.stdout.readline().strip() == "done"  # type: ignore[union-attr]
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    finally:
        proc.kill()
        proc.wait()
        proc.stdout.close()  # type: ignore[union-attr]
        proc.stdin.close()  # type: ignore[union-attr]
    with Spool(path) as sp:
        got = [json.loads(it.payload)["n"] if it.payload != b"new" else "new" for it in sp.peek(100)]
    assert got == ([2, 3, "new"] if then == "commit" else [0, 1, 2, 3])


def test_deferred_acks_flush_and_close(tmp_path: Path) -> None:
    # Reference: the file as a fresh Spool reads it after flush_acks and after close.
    path = tmp_path / "s.sqlite"
    with Spool(path) as sp:
        sp.put_many([item("edge", k) for k in range(5)])
        ids = [it.id for it in sp.peek(10)]
        assert sp.ack_soon([ids[0]]) and sp.acks_deferred == 1
        sp.flush_acks()
        assert sp.acks_deferred == 0 and len(sp) == 4
        assert sp.ack_soon(ids[1:3])
        assert len(sp) == 2
    with Spool(path) as sp:  # close committed the rest
        assert contents(sp) == [("edge", 3), ("edge", 4)]


def test_state_round_trip_and_upsert(tmp_path: Path) -> None:
    path = tmp_path / "s.sqlite"
    level = {
        "seq": 41,
        "level": 1,
        "t": 0.1 + 0.2,  # not a short decimal: the exact double must come back
        "totals": {"rises": 20, "on_s": 1234.5678901234567},
        "band": [10.0, 12.0],
        "note": "Pumpe läuft",
        "last": None,
    }
    with Spool(path) as sp:
        assert sp.load_state() == {}
        sp.put_many([item("edge", 1)], state={"level": level, "flow": {"seq": 7}})
        sp.put_many([], state={"flow": {"seq": 8}})  # replaces flow whole, level untouched
        assert sp.load_state() == {"level": level, "flow": {"seq": 8}}
    with Spool(path) as sp:
        got = sp.load_state()
    assert got == {"level": level, "flow": {"seq": 8}}
    assert got["level"]["t"] == 0.1 + 0.2 and type(got["level"]["seq"]) is int


def test_bad_items_store_nothing(tmp_path: Path) -> None:
    with Spool(tmp_path / "s.sqlite") as sp:
        sp.put_many([item("edge", 0)], state={"level": {"seq": 0}})
        bad_batches = [
            [item("edge", 1), ("t", "a str, not bytes", 1, False, "edge")],
            [item("edge", 1), ("t", b"x", 3, False, "edge")],  # MQTT QoS is 0, 1 or 2
            [item("edge", 1), ("t", b"x", 1, 1, "edge")],
            [item("edge", 1), ("t", b"x", 1, False)],
        ]
        for batch in bad_batches:
            with pytest.raises((TypeError, ValueError)):
                sp.put_many(batch, state={"level": {"seq": 1}})
        with pytest.raises(TypeError):
            sp.put_many([item("edge", 1)], state={"level": {"seq": object()}})
        assert contents(sp) == [("edge", 0)] and len(sp) == 1
        assert sp.load_state() == {"level": {"seq": 0}}


def test_a_failure_after_the_items_leaves_neither_items_nor_state(tmp_path: Path) -> None:
    # Atomicity, forced deterministically: a trigger (set up with an independent connection)
    # makes SQLite abort the state upsert after the items of the same call were inserted.
    path = tmp_path / "s.sqlite"
    with Spool(path) as sp:
        sp.put_many([item("edge", 1)], state={"level": {"seq": 1}})
    con = sqlite3.connect(path)
    con.execute(
        "CREATE TRIGGER refuse BEFORE INSERT ON channel_state WHEN NEW.channel = 'flow' "
        "BEGIN SELECT RAISE(ABORT, 'refused by test trigger'); END"
    )
    con.commit()
    con.close()
    with Spool(path, max_records=2) as sp:
        with pytest.raises(SpoolError, match="refused by test trigger"):
            sp.put_many([item("edge", 2), item("edge", 3)],
                        state={"level": {"seq": 3}, "flow": {"seq": 1}})
        assert contents(sp) == [("edge", 1)] and len(sp) == 1 and sp.dropped == 0
        assert sp.load_state() == {"level": {"seq": 1}}
    with Spool(path) as sp:
        assert contents(sp) == [("edge", 1)] and sp.dropped == 0


# -- durability across SIGKILL --------------------------------------------------------------

_WRITER = textwrap.dedent(
    """
    import json, sys
    from streamcond.io.spool import Spool

    sizes = [1, 3, 1, 40, 2, 700, 5, 1, 2500, 9]
    sp = Spool(sys.argv[1], sync=sys.argv[2], sync_interval_s=0.05)
    st = sp.load_state().get("level", {"batch": 0, "seq": 0})
    batch, seq = st["batch"], st["seq"]
    print("ready", batch, flush=True)
    while True:
        batch += 1
        n = sizes[batch % len(sizes)]
        items = []
        for i in range(n):
            seq += 1
            p = json.dumps({"batch": batch, "i": i, "n": n, "seq": seq}).encode()
            items.append(("streamcond/orchard-pump-2/level/edge", p, 1, False, "edge"))
        items.append(("streamcond/orchard-pump-2/level/stats",
                      json.dumps({"batch": batch, "stats": True}).encode(), 0, False, "stats"))
        sp.put_many(items, state={"level": {"batch": batch, "seq": seq},
                                  "flow": {"batch": batch}})
        print(batch, flush=True)
    """
)


def _check_spool_after_kill(path: Path, reported: int) -> int:
    """Every reported batch is stored whole and in order, with the matching state; last batch."""
    with Spool(path) as sp:
        items = sp.peek(10**9)
        state = sp.load_state()
    docs = [(it.kind, json.loads(it.payload)) for it in items]
    batches: list[int] = []
    seq = 0
    pos = 0
    while pos < len(docs):
        kind, first = docs[pos]
        assert kind == "edge" and first["i"] == 0, "a batch starts mid-way"
        assert first["batch"] == len(batches) + 1, "a batch is missing"
        n = first["n"]
        assert pos + n < len(docs), "a batch is stored only in part"
        for i in range(n):
            kind, p = docs[pos + i]
            seq += 1
            assert kind == "edge" and (p["batch"], p["i"], p["seq"]) == (first["batch"], i, seq)
        kind, p = docs[pos + n]  # the stats record closes its batch
        assert kind == "stats" and p["batch"] == first["batch"]
        batches.append(first["batch"])
        pos += n + 1
    last = batches[-1] if batches else 0
    # The kill may fall between a commit and the print reporting it: at most one more.
    assert reported <= last <= reported + 1
    # Same transaction: the state is that of the last stored batch, not newer, not older.
    assert state.get("level", {"batch": 0, "seq": 0}) == {"batch": last, "seq": seq}
    assert state.get("flow", {"batch": 0}) == {"batch": last}
    return last


@pytest.mark.parametrize("sync", ["always", "interval"])
def test_every_reported_batch_survives_sigkill_with_matching_state(tmp_path: Path, sync: str) -> None:
    # Both durability settings: a commit is in the operating system's page cache once it
    # returns, which SIGKILL does not take away (SQLite, https://www.sqlite.org/wal.html:
    # WAL with synchronous=NORMAL "is always consistent" and durable across an application
    # crash); only a power cut needs the fsync that "interval" defers.
    path = tmp_path / "state" / "spool.sqlite"
    script = tmp_path / "writer.py"
    script.write_text(_WRITER)
    last = 0
    # Four kill-and-resume rounds; the writer resumes from the stored state like the daemon.
    for kill_after in (12, 29, 7, 18):
        with open(tmp_path / "writer.err", "wb") as err:
            proc = subprocess.Popen(
                [sys.executable, str(script), str(path), sync],
                stdout=subprocess.PIPE,
                stderr=err,
                text=True,
                cwd=Path(__file__).resolve().parents[1],
            )
            try:
                first = proc.stdout.readline().split()  # type: ignore[union-attr]
                assert first == ["ready", str(last)], (tmp_path / "writer.err").read_text()
                reported = last
                for _ in range(kill_after):
                    line = proc.stdout.readline()  # type: ignore[union-attr]
                    assert line, (tmp_path / "writer.err").read_text()
                    reported = int(line)
                os.kill(proc.pid, signal.SIGKILL)
                proc.wait()
                # batches reported before the kill but not yet read from the pipe count too
                for line in proc.stdout.read().split():  # type: ignore[union-attr]
                    reported = int(line)
            finally:
                proc.kill()
                proc.wait()
                proc.stdout.close()  # type: ignore[union-attr]
        assert proc.returncode == -signal.SIGKILL
        last = _check_spool_after_kill(path, reported)
        assert last >= reported > 0


# -- overflow -------------------------------------------------------------------------------


class FakeClock:
    def __init__(self) -> None:
        self.t = 1000.0

    def __call__(self) -> float:
        return self.t


def test_overflow_drops_oldest_non_events_then_oldest_edges(tmp_path: Path) -> None:
    # Reference: the policy as specified (module docstring of streamcond/io/spool.py).
    path = tmp_path / "s.sqlite"
    with Spool(path, max_records=5, clock=FakeClock()) as sp:
        sp.put_many([item("edge", 1), item("stats", 2), item("edge", 3), item("measure", 4),
                     item("state", 5)])
        assert len(sp) == 5 and sp.dropped == 0
        sp.put_many([item("edge", 6)])  # one over: the oldest non-edge (stats 2) goes
        assert contents(sp) == [("edge", 1), ("edge", 3), ("measure", 4), ("state", 5),
                                ("edge", 6)]
        # Three over: measure 4, state 5, then the new stats 9 itself (oldest non-edge left).
        sp.put_many([item("edge", 7), item("edge", 8), item("stats", 9)])
        assert contents(sp) == [("edge", n) for n in (1, 3, 6, 7, 8)]
        sp.put_many([item("edge", 10)])  # only edges left: the oldest edge goes
        assert contents(sp) == [("edge", n) for n in (3, 6, 7, 8, 10)]
        assert sp.dropped == 5 and len(sp) == 5
    with Spool(path, max_records=5) as sp:  # the counter is stored, not per process
        assert sp.dropped == 5 and len(sp) == 5
        assert contents(sp) == [("edge", n) for n in (3, 6, 7, 8, 10)]


def test_gap_and_fault_are_kept_like_edges(tmp_path: Path) -> None:
    with Spool(tmp_path / "s.sqlite", max_records=3) as sp:
        sp.put_many([item("fault", 1), item("gap", 2), item("stats", 3), item("edge", 4)])
        assert contents(sp) == [("fault", 1), ("gap", 2), ("edge", 4)]
        sp.put_many([item("edge", 5)])  # only events left: the oldest (the fault) goes
        assert contents(sp) == [("gap", 2), ("edge", 4), ("edge", 5)]
        assert sp.dropped == 2


def test_batch_larger_than_the_spool_keeps_its_newest_edges(tmp_path: Path) -> None:
    with Spool(tmp_path / "s.sqlite", max_records=3) as sp:
        sp.put_many([item("edge", n) for n in range(8)], state={"level": {"seq": 8}})
        assert contents(sp) == [("edge", 5), ("edge", 6), ("edge", 7)]
        assert sp.dropped == 5 and sp.load_state() == {"level": {"seq": 8}}


def test_reopening_with_a_smaller_bound_trims_at_once(tmp_path: Path) -> None:
    path = tmp_path / "s.sqlite"
    with Spool(path) as sp:
        sp.put_many([item("edge", 0), item("stats", 1), item("edge", 2), item("edge", 3)])
    with Spool(path, max_records=2) as sp:
        assert contents(sp) == [("edge", 2), ("edge", 3)] and sp.dropped == 2


def test_overflow_warning_is_rate_limited_per_kind(tmp_path: Path, caplog) -> None:
    clock = FakeClock()
    caplog.set_level(logging.WARNING, logger="streamcond.io.spool")

    def warnings() -> list[str]:
        out = [r.getMessage() for r in caplog.records if r.levelno == logging.WARNING]
        caplog.clear()
        return out

    sp = Spool(tmp_path / "s.sqlite", max_records=2, clock=clock)
    sp.put_many([item("edge", 0), item("edge", 1)])
    sp.put_many([item("stats", 2)])  # dropped at once (the only non-edge)
    (w,) = warnings()
    assert "'stats'" in w and "dropped 1 " in w and str(sp.path) in w
    for n in range(3, 6):
        clock.t += 10.0
        sp.put_many([item("stats", n)])
    assert warnings() == []  # within the minute: counted, not logged
    sp.put_many([item("edge", 6)])  # another kind has its own minute
    (w,) = warnings()
    assert "'edge'" in w
    clock.t += WARN_INTERVAL_S
    sp.put_many([item("stats", 7)])
    (w,) = warnings()
    assert "'stats'" in w and "dropped 4 " in w  # 3 held back + this one
    clock.t += 1.0
    sp.put_many([item("stats", 8)])
    assert warnings() == []
    sp.close()  # nothing dropped goes unreported
    (w,) = warnings()
    assert "'stats'" in w and "dropped 1 " in w
    assert sp.dropped == 7


# -- files: fresh, existing, wrong ----------------------------------------------------------


def test_schema_created_on_a_fresh_path(tmp_path: Path) -> None:
    path = tmp_path / "state" / "deeper" / "spool.sqlite"
    with Spool(path) as sp:
        assert len(sp) == 0 and sp.dropped == 0 and sp.load_state() == {}
    # Read back with an independent connection. SQLite documentation
    # (https://www.sqlite.org/wal.html): the WAL journal mode is persistent, stored in the file.
    con = sqlite3.connect(path)
    try:
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert con.execute("SELECT version FROM schema_version").fetchall() == [(SCHEMA_VERSION,)]
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        assert {"schema_version", "queue", "channel_state", "counters"} <= tables
    finally:
        con.close()


def test_an_empty_file_becomes_a_spool(tmp_path: Path) -> None:
    # SQLite file format (https://www.sqlite.org/fileformat2.html): a zero-length file is an
    # empty database, so e.g. a `touch`ed path is fine.
    path = tmp_path / "spool.sqlite"
    path.touch()
    with Spool(path) as sp:
        sp.put_many([item("edge", 1)])
    with Spool(path) as sp:
        assert contents(sp) == [("edge", 1)]


def test_opening_an_existing_spool_continues_it(tmp_path: Path) -> None:
    path = tmp_path / "spool.sqlite"
    with Spool(path) as sp:
        sp.put_many([item("edge", 1), item("stats", 2)], state={"level": {"seq": 1}})
        before = sp.peek(10)
    with Spool(path) as sp:
        assert sp.peek(10) == before
        sp.put_many([item("edge", 3)], state={"level": {"seq": 2}})
        assert contents(sp) == [("edge", 1), ("stats", 2), ("edge", 3)]
        assert sp.peek(10)[-1].id > before[-1].id
        assert sp.load_state() == {"level": {"seq": 2}}


def test_a_non_sqlite_file_is_refused_naming_the_path(tmp_path: Path) -> None:
    path = tmp_path / "spool.sqlite"
    original = b"t,level,amps\n0.000,10.9,3.1\n" * 40  # someone's recording, not a database
    path.write_bytes(original)
    with pytest.raises(SpoolError) as exc:
        Spool(path)
    msg = str(exc.value)
    assert str(path) in msg and "not an SQLite database" in msg
    assert isinstance(exc.value, StreamcondError)  # the daemon turns it into exit code 2
    assert path.read_bytes() == original  # and the file is left as it was


def test_a_corrupt_spool_is_refused_naming_the_path(tmp_path: Path) -> None:
    path = tmp_path / "spool.sqlite"
    with Spool(path) as sp:
        sp.put_many([item("edge", n) for n in range(2000)])
    data = bytearray(path.read_bytes())
    page = 4096  # SQLite's default page size (https://www.sqlite.org/pragma.html#pragma_page_size)
    assert len(data) > 8 * page
    junk = random.Random(0).randbytes(len(data))
    data[2 * page :] = junk[2 * page :]  # keep the header and schema page, ruin the rest
    path.write_bytes(bytes(data))
    with pytest.raises(SpoolError) as exc:
        Spool(path)
    assert str(path) in str(exc.value) and "corrupt" in str(exc.value)


def test_a_foreign_or_newer_database_is_refused(tmp_path: Path) -> None:
    foreign = tmp_path / "log.sqlite"
    con = sqlite3.connect(foreign)
    con.execute("CREATE TABLE pump_runs (t REAL, minutes REAL)")
    con.commit()
    con.close()
    with pytest.raises(SpoolError, match="not a streamcond spool") as exc:
        Spool(foreign)
    assert str(foreign) in str(exc.value)

    newer = tmp_path / "spool.sqlite"
    Spool(newer).close()
    con = sqlite3.connect(newer)
    con.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION + 1,))
    con.commit()
    con.close()
    with pytest.raises(SpoolError, match="newer streamcond") as exc:
        Spool(newer)
    assert str(newer) in str(exc.value)


def test_a_directory_at_the_path_is_refused(tmp_path: Path) -> None:
    with pytest.raises(SpoolError, match="is a directory") as exc:
        Spool(tmp_path)
    assert str(tmp_path) in str(exc.value)


def test_a_second_opener_is_refused_while_the_first_is_open(tmp_path: Path) -> None:
    path = tmp_path / "spool.sqlite"
    with Spool(path) as sp:
        sp.put_many([item("edge", 1)])
        with pytest.raises(SpoolError, match="in use by another process") as exc:
            Spool(path, lock_timeout_s=0)
        assert str(path) in str(exc.value)
        sp.put_many([item("edge", 2)])  # the first one is unaffected
    with Spool(path, lock_timeout_s=0) as sp:  # released on close
        assert contents(sp) == [("edge", 1), ("edge", 2)]


def test_a_closed_spool_says_so(tmp_path: Path) -> None:
    sp = Spool(tmp_path / "s.sqlite")
    sp.close()
    sp.close()  # idempotent
    with pytest.raises(SpoolError, match="closed"):
        sp.put_many([item("edge", 1)])
    with pytest.raises(SpoolError, match="closed"):
        sp.peek(1)


def test_max_records_must_be_positive(tmp_path: Path) -> None:
    with pytest.raises(ValueError):
        Spool(tmp_path / "s.sqlite", max_records=0)
    assert not (tmp_path / "s.sqlite").exists()


# -- durability settings ----------------------------------------------------------------------


def _fsyncs(script: str, tmp_path: Path) -> int | None:
    """fsync/fdatasync calls of a child running ``script``, counted by strace (None: no strace)."""
    import shutil

    if shutil.which("strace") is None:
        return None
    out = tmp_path / "strace.txt"
    r = subprocess.run(
        ["strace", "-f", "-c", "-e", "trace=fsync,fdatasync", "-o", str(out),
         sys.executable, "-c", script],
        cwd=Path(__file__).resolve().parents[1], capture_output=True, text=True, timeout=120,
    )
    if r.returncode != 0 and "ptrace" in (r.stderr + out.read_text() if out.exists() else r.stderr):
        return None  # tracing not permitted in this container
    assert r.returncode == 0, r.stderr
    calls = 0
    for line in out.read_text().splitlines():
        parts = line.split()
        if parts and parts[-1] in ("fsync", "fdatasync"):
            calls += int(parts[3])  # % time, seconds, usecs/call, calls, [errors,] syscall
    return calls


def test_interval_sync_makes_far_fewer_fsyncs_than_always(tmp_path: Path) -> None:
    # The count of fsync system calls, seen by the kernel's tracer (strace), not by the spool:
    # "always" syncs the log at every commit (SQLite synchronous=FULL), "interval" at most
    # every interval plus the checkpoints' own two.
    script = textwrap.dedent(
        f"""
        import time
        from streamcond.io.spool import Spool
        sp = Spool({str(tmp_path / "SYNC.sqlite")!r}, sync="SYNC", sync_interval_s=0.2)
        for n in range(200):
            sp.put_many([("p/a/edge", b'{{"n": %d}}' % n, 1, False, "edge")], state={{"a": {{"n": n}}}})
            time.sleep(0.002)
        time.sleep(0.3)
        sp.close()
        """
    )
    always = _fsyncs(script.replace("SYNC", "always"), tmp_path)
    if always is None:
        pytest.skip("strace is not installed or may not trace here")
    interval = _fsyncs(script.replace("SYNC", "interval"), tmp_path)
    assert interval is not None
    assert always >= 200  # one per commit at least
    assert interval < always / 4, (interval, always)


def test_interval_sync_syncs_within_the_interval(tmp_path: Path) -> None:
    sp = Spool(tmp_path / "s.sqlite", sync="interval", sync_interval_s=0.05)
    try:
        sp.put_many([item("edge", 1)])
        assert sp._unsynced and sp._sync_timer is not None
        sp._sync_timer.join(5)
        assert not sp._unsynced  # the timer ran the sync
        sp.put_many([item("edge", 2)])
        assert contents(sp) == [("edge", 1), ("edge", 2)]
    finally:
        sp.close()
    with pytest.raises(ValueError):
        Spool(tmp_path / "t.sqlite", sync="sometimes")  # type: ignore[arg-type]
