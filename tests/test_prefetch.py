"""Reading ahead (streamcond.io.prefetch): the items of the block iterator arrive in order,
each once, an error where its block would have been, and an early stop ends the thread and
closes the source. The replay's records with read-ahead are the ones without it."""

from __future__ import annotations

import threading
import time

import pytest

from streamcond.io.prefetch import read_ahead


def _threads() -> list[str]:
    return [t.name for t in threading.enumerate() if t.name == "streamcond-read-ahead"]


def test_items_in_order_once_each():
    assert list(read_ahead(iter(range(1000)))) == list(range(1000))
    assert list(read_ahead(iter([]))) == []
    assert not _threads()


def test_the_source_runs_in_one_other_thread_and_stays_one_ahead():
    seen: list[tuple[int, str]] = []

    def source():
        for i in range(5):
            seen.append((i, threading.current_thread().name))
            yield i

    got = []
    for item in read_ahead(source()):
        time.sleep(0.05)  # the consumer is slow: the producer must not run far ahead
        got.append(item)
        produced = len(seen)
        # the item being consumed, one waiting in the queue and one being made at most
        assert produced <= item + 3
    assert got == list(range(5))
    assert {name for _, name in seen} == {"streamcond-read-ahead"}


def test_an_error_arrives_after_the_blocks_before_it():
    def source():
        yield 1
        yield 2
        raise ValueError("bad block 3")

    got = []
    with pytest.raises(ValueError, match="bad block 3"):
        for item in read_ahead(source()):
            got.append(item)
    assert got == [1, 2]
    assert not _threads()


def test_stopping_early_ends_the_thread_and_closes_the_source():
    closed = threading.Event()

    def source():
        try:
            for i in range(10**9):
                yield i
        finally:
            closed.set()

    gen = read_ahead(source())
    assert next(gen) == 0
    assert next(gen) == 1
    gen.close()
    assert closed.wait(5)
    assert not _threads()


def test_an_interrupt_in_the_consumer_stops_the_reader():
    closed = threading.Event()

    def source():
        try:
            yield from range(100)
        finally:
            closed.set()

    with pytest.raises(KeyboardInterrupt):
        for item in read_ahead(source()):
            if item == 3:
                raise KeyboardInterrupt
    assert closed.wait(5)
    assert not _threads()


def test_replay_records_are_the_same_with_and_without_read_ahead(tmp_path, monkeypatch):
    """The same recording and config, read with pyarrow's reader with read-ahead (the default)
    and with it switched off: the records are equal, field for field."""
    pytest.importorskip("pyarrow")
    from pathlib import Path

    from streamcond import replay as replay_mod
    from streamcond.config import load_config
    from streamcond.io import prefetch

    root = Path(__file__).resolve().parent.parent
    cfg = load_config(root / "config" / "orchard_pump.toml")
    rec = root / "replay_data" / "orchard_pump.csv"
    monkeypatch.setenv("STREAMCOND_CSV_READER", "pyarrow")

    def run():
        res = replay_mod.run_replay(cfg, rec, keep_records=True, block_bytes=1 << 16)
        for r in res.records:
            r.pop("run_time_s", None)
        return res.records

    with_ahead = run()
    monkeypatch.setattr(prefetch, "worth_it", lambda reader, kind: False)
    without = run()
    assert with_ahead == without and len(with_ahead) > 10
