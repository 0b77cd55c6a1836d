"""Reading ahead (streamcond.io.prefetch): the items of the block iterator arrive in order,
each once, an error where its block would have been, and an early stop ends the thread and
closes the source. The replay's records with read-ahead are the ones without it."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from streamcond.io.prefetch import read_ahead, read_in_child


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


# -- the reader process --------------------------------------------------------------------------


def _children() -> set[int]:
    """This process's child pids (Linux /proc)."""
    out: set[int] = set()
    for task in Path("/proc/self/task").iterdir():
        text = (task / "children").read_text().split()
        out |= {int(x) for x in text}
    return out


needs_fork = pytest.mark.skipif(not hasattr(os, "fork") or not Path("/proc/self/task").exists(),
                                reason="the reader process needs fork and /proc")


class _Counter:
    """A stand-in parser: the state the child sends along with every block."""

    def __init__(self) -> None:
        self.columns = None
        self.header_line = None
        self.lines = self.bad = self.before_header = self.repeated_headers = 0
        self.examples: list[str] = []


@needs_fork
def test_child_blocks_arrive_in_order_with_the_parsers_state():
    parser = _Counter()

    def source():
        parser.columns = ["t", "a"]
        for i in range(50):
            parser.lines += 10
            if i % 7 == 0:
                parser.bad += 1
                parser.examples.append(f"line {i}")
            yield np.full(1000, i, dtype=np.float64), os.getpid()

    before = _children()
    seen = []
    for k, (arr, pid) in enumerate(read_in_child(source(), parser)):
        assert pid != os.getpid()  # made in the child
        assert (arr == k).all()
        assert parser.lines == 10 * (k + 1)  # the state right after this block, as in-process
        seen.append(k)
    assert seen == list(range(50))
    assert parser.columns == ["t", "a"] and parser.bad == 8 and len(parser.examples) == 8
    assert _children() == before  # the child is gone and reaped


@needs_fork
def test_child_error_arrives_in_place_and_whole():
    from streamcond.errors import InputError

    def source():
        yield 1
        raise InputError(["The recording 'x' is odd", "and says so twice"])

    got = []
    with pytest.raises(InputError) as ei:
        for item in read_in_child(source(), _Counter()):
            got.append(item)
    assert got == [1]
    assert ei.value.messages == ["The recording 'x' is odd.", "and says so twice."]


@needs_fork
def test_stopping_the_child_early_leaves_no_process():
    def source():
        i = 0
        while True:
            yield np.zeros(1 << 16)  # larger than the pipe's buffer: the child blocks writing
            i += 1

    before = _children()
    gen = read_in_child(source(), _Counter())
    next(gen)
    next(gen)
    gen.close()
    assert _children() == before
    # a reader that is dropped without being read (the replay failed before its first block)
    import gc

    gen = read_in_child(source(), _Counter())
    del gen
    gc.collect()
    assert _children() == before
    gen = read_ahead(source())
    del gen
    gc.collect()
    assert not _threads()


MODES = ["off", "thread", "process"]


def _cli_replay(tmp_path, rec, cfg, mode, reader="numpy"):
    out = tmp_path / f"{rec.stem}.{mode}.{reader}.jsonl"
    env = {**os.environ, "STREAMCOND_READ_AHEAD": mode, "STREAMCOND_CSV_READER": reader}
    r = subprocess.run(
        [sys.executable, "-m", "streamcond", "replay", str(rec), "-c", str(cfg), "--events",
         str(out), "--force", "--no-progress"],
        capture_output=True, text=True, env=env, timeout=300,
    )
    lines = out.read_text().splitlines() if out.exists() else []
    summary = [json.loads(x) for x in lines if '"kind":"summary"' in x]
    for s in summary:
        s.pop("run_time_s")
    body = [x for x in lines if '"kind":"summary"' not in x]
    return r.returncode, r.stderr.replace(f".{mode}.", "."), body, summary


@needs_fork
@pytest.mark.parametrize("fmt", ["csv", "kv", "json"])
def test_fuzzed_files_give_the_same_bytes_in_every_mode(fmt, tmp_path):
    """The fuzzed recording of the reliability tests (bad lines of every kind, CRLF, blanks,
    a repeated header), replayed by the command in a fresh process with reading ahead off, in a
    thread and in a child process: the same events file byte for byte, the same bad-line count
    and the same messages."""
    from fuzz_lines import config, make

    fz = make(fmt, 30_000, seed=5)
    rec = tmp_path / f"dirty.{fmt}"
    rec.write_bytes(fz.data)
    cfg = tmp_path / "c.toml"
    cfg.write_text(config(fmt))
    runs = {m: _cli_replay(tmp_path, rec, cfg, m) for m in MODES}
    code, err, body, summary = runs["off"]
    assert code == 0, err
    assert summary[0]["bad_lines"] == fz.bad and summary[0]["rows"] == fz.valid
    for m in ("thread", "process"):
        assert runs[m][0] == code, m
        assert runs[m][2] == body, m
        assert runs[m][3] == summary, m
        # the warnings name the same lines (the closing line carries the run time)
        assert [x for x in runs[m][1].splitlines() if "bad input" in x] == [
            x for x in err.splitlines() if "bad input" in x], m


@needs_fork
def test_a_refused_recording_says_the_same_in_every_mode(tmp_path):
    cfg = Path(__file__).resolve().parent.parent / "config" / "orchard_pump.toml"
    junk = tmp_path / "junk.csv"
    junk.write_bytes(bytes(range(256)) * 64)
    nohead = tmp_path / "nohead.csv"
    nohead.write_text("")
    for rec in (junk, nohead):
        got = {m: _cli_replay(tmp_path, rec, cfg, m)[:2] for m in MODES}
        assert got["off"][0] == 2 and "Traceback" not in got["off"][1]
        assert got["thread"] == got["off"] == got["process"], rec.name
