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


def _cli_replay(tmp_path, rec, cfg, mode, reader="numpy", share=""):
    out = tmp_path / f"{rec.stem}.{mode}.{reader}.jsonl"
    env = {**os.environ, "STREAMCOND_READ_AHEAD": mode, "STREAMCOND_CSV_READER": reader,
           "STREAMCOND_SHARE": share}
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
    # and a child that leaves half of every block (after the first) to the replay
    runs["shared"] = _cli_replay(tmp_path, rec, cfg, "process", share="0.5")
    code, err, body, summary = runs["off"]
    assert code == 0, err
    assert summary[0]["bad_lines"] == fz.bad and summary[0]["rows"] == fz.valid
    for m in ("thread", "process", "shared"):
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


# -- the shared slots and the early reader ---------------------------------------------------------


@needs_fork
def test_arrays_cross_in_shared_slots_whole_writable_and_in_order(monkeypatch):
    """Items whose arrays go through the shared slots (contiguous), through the pipe (too large
    for a slot, or not contiguous) and none at all arrive equal, in order, writable, and the
    child that finished first (a slow consumer) loses none of them."""
    from streamcond.io import sharedslots

    monkeypatch.setattr(sharedslots, "SLOT_BYTES", 1 << 20)  # the fork keeps the setting
    rng = np.random.default_rng(3)
    sent = []
    for i in range(12):
        kind = i % 4
        if kind == 0:
            item = (rng.standard_normal((20_000, 5)), i)  # 800 kB: a slot
        elif kind == 1:
            item = (rng.standard_normal((40_000, 5)), i)  # 1.6 MB: larger than a slot
        elif kind == 2:
            item = (rng.standard_normal((1000, 6))[:, ::2], i)  # not contiguous
        else:
            item = ("no array", i)
        sent.append(item)

    got = []
    for k, item in enumerate(read_in_child(iter(sent), _Counter())):
        if k < 3:
            time.sleep(0.2)  # the child runs ahead and, at the end, leaves before we read
        got.append(item)
    assert len(got) == len(sent)
    for (a, i), (b, j) in zip(sent, got):
        assert i == j
        if isinstance(a, np.ndarray):
            np.testing.assert_array_equal(a, b)
            b += 1.0  # the consumer owns its copy
        else:
            assert a == b


def _big_csv(path: Path, rows: int = 80_000) -> None:
    t = np.arange(rows) * 1.0
    x = np.sin(t / 50.0)
    path.write_text("t_ms,a\n" + "\n".join(f"{a:.0f},{b:.6f}" for a, b in zip(t, x)) + "\n")


@needs_fork
def test_the_early_reader_reads_what_a_reader_in_process_reads(tmp_path, monkeypatch):
    from streamcond.io import prefetch
    from streamcond.io.lineparse import LineParser
    from streamcond.io.recording import read_blocks

    monkeypatch.setenv("STREAMCOND_CSV_READER", "numpy")
    monkeypatch.setenv(prefetch.ENV, "process")  # a test process may hold threads or pyarrow
    rec = tmp_path / "big.csv"
    _big_csv(rec)
    assert rec.stat().st_size >= prefetch.MIN_BYTES
    own = LineParser("csv", needed=["t_ms", "a"])
    expected = [p.rows for p, _, _ in read_blocks(rec, own, 1 << 18)]

    before = _children()
    assert prefetch.start_early(str(rec))
    assert len(_children() - before) == 1  # waiting for its job
    parser = LineParser("csv", needed=["t_ms", "a"])
    got = [p.rows for p, _, _ in prefetch.read_job_in_child(
        read_blocks, (rec, parser, 1 << 18), parser, str(rec))]
    assert len(got) == len(expected) > 3
    for a, b in zip(expected, got):
        np.testing.assert_array_equal(a, b)
    assert parser.lines == own.lines and parser.columns == ["t_ms", "a"]
    assert _children() == before


@needs_fork
def test_an_early_reader_without_its_job_is_stopped(tmp_path, monkeypatch):
    """Started for one file and asked for another (or never asked): the child is stopped and
    reaped, and the other file is read by a child forked then."""
    from streamcond.io import prefetch
    from streamcond.io.lineparse import LineParser
    from streamcond.io.recording import read_blocks

    monkeypatch.setenv("STREAMCOND_CSV_READER", "numpy")
    monkeypatch.setenv(prefetch.ENV, "process")
    one, other = tmp_path / "one.csv", tmp_path / "other.csv"
    _big_csv(one)
    _big_csv(other, 70_000)
    before = _children()
    assert prefetch.start_early(str(one))
    parser = LineParser("csv", needed=["t_ms", "a"])
    rows = sum(p.rows.shape[0] for p, _, _ in prefetch.read_job_in_child(
        read_blocks, (other, parser, 1 << 18), parser, str(other)))
    assert rows == 70_000 and _children() == before
    assert prefetch.start_early(str(one))
    prefetch._discard_early()  # what the exit does when no job came
    assert _children() == before


def test_no_early_reader_where_none_would_run(tmp_path, monkeypatch):
    from streamcond.io import prefetch

    small = tmp_path / "small.csv"
    small.write_text("t_ms,a\n0,1\n")
    pq = tmp_path / "x.parquet"
    pq.write_bytes(b"PAR1" + bytes(prefetch.MIN_BYTES))
    monkeypatch.delenv(prefetch.ENV, raising=False)
    assert not prefetch.start_early(str(small))  # too small to gain
    monkeypatch.setenv(prefetch.ENV, "process")  # even where forced:
    assert not prefetch.start_early(str(pq))  # columnar: read by its own reader
    assert not prefetch.start_early(str(tmp_path))  # a directory
    assert not prefetch.start_early(str(tmp_path / "missing.csv"))
    big = tmp_path / "big.csv"
    _big_csv(big)
    for mode in ("off", "thread"):
        monkeypatch.setenv(prefetch.ENV, mode)
        assert not prefetch.start_early(str(big))


@needs_fork
def test_a_bad_config_stops_the_early_reader(tmp_path):
    """`replay` of a large recording with a config that does not load: exit 2, one sentence,
    and no reader process left behind."""
    rec = tmp_path / "leftover-probe.csv"
    _big_csv(rec)
    cfg = tmp_path / "bad.toml"
    cfg.write_text('[source]\nkind = "file"\nsample_rate_hz = -5\n')
    r = subprocess.run(
        [sys.executable, "-m", "streamcond", "replay", str(rec), "-c", str(cfg), "--events",
         str(tmp_path / "e.jsonl"), "--no-progress"],
        capture_output=True, text=True, timeout=60,
        env={**os.environ, "STREAMCOND_READ_AHEAD": "process"},
    )
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "sample_rate_hz" in r.stderr
    time.sleep(0.2)
    left = [p for p in Path("/proc").iterdir() if p.name.isdigit() and _cmdline(p, str(rec))]
    assert not left


def _cmdline(proc: Path, needle: str) -> bool:
    try:
        return needle in (proc / "cmdline").read_bytes().decode(errors="replace")
    except OSError:
        return False


# -- a block shared with the consumer ------------------------------------------------------------


def _parse_all(path: Path, sharing: bool, block_bytes: int):
    """Every item of a CSV read (rows, line numbers, bad count and examples of each) and the
    parser's state at the end; ``sharing``: read in a child that leaves part of each block to
    this process."""
    from fuzz_lines import MAX_LINE

    from streamcond.io.lineparse import LineParser
    from streamcond.io.prefetch import SYNCED
    from streamcond.io.recording import read_blocks

    parser = LineParser("csv", needed=["t", "a", "b"], max_line_bytes=MAX_LINE, reader="numpy")
    blocks = read_blocks(path, parser, block_bytes)
    if sharing:
        parser.sharing = True
        blocks = read_in_child(blocks, parser)
    items = [(p.rows.tolist(), p.lines.tolist(), p.bad, list(p.examples)) for p, _, _ in blocks]
    return items, {k: getattr(parser, k) for k in SYNCED}, parser._absorbed is not None


@needs_fork
@pytest.mark.parametrize("share", ["0.5", "0.9", "0.13"])
@pytest.mark.parametrize("junk", [0.2, 0.0004])
def test_the_part_a_reader_child_leaves_is_parsed_as_one_parser_would(share, junk, tmp_path,
                                                                      monkeypatch):
    """The reader child leaves the last part of each CSV block to the consumer (numpy's reader
    is the slower side): every item must carry the rows, line numbers, bad-line count and
    messages one parser reading the whole file gives, and the parser's counts at the end must
    be its counts — with bad lines of every kind and repeated headers in the left parts, and
    (few bad lines) the limit of five messages reached inside a left part or a child's part."""
    from fuzz_lines import make

    from streamcond.io.prefetch import SHARE_ENV

    fz = make("csv", 20_000, seed=11, junk_share=junk)
    path = tmp_path / "dirty.csv"
    path.write_bytes(fz.data)
    want_items, want_state, _ = _parse_all(path, False, 16_384)
    assert want_state["bad"] == fz.bad and want_state["repeated_headers"] > 0
    monkeypatch.setenv(SHARE_ENV, share)
    got_items, got_state, shared = _parse_all(path, True, 16_384)
    assert shared  # parts were left to this process
    assert got_state == want_state
    assert got_items == want_items


@needs_fork
@pytest.mark.parametrize("share", ["0.3", "0.5", "0.7"])
def test_what_a_left_part_holds_is_judged_as_one_parser_would(share, tmp_path, monkeypatch):
    """Crafted files in 64-byte blocks (the first holds the header alone, so the second is
    shared): an infinite value before a bad line of another kind (one parser lists them in
    the order of the lines), a file whose only row or only bad line lies in the left part (no
    "holds no data lines" from the child, which did not see it), and one that truly holds no
    data (only blank lines after the header: the replay's verdict, the same sentence)."""
    from streamcond.errors import InputError
    from streamcond.io.prefetch import SHARE_ENV

    head = b"t,a,b" + b" " * 58 + b"\n"  # 64 bytes
    files = {
        "order": head + b"1e999,0,0\n" + b"2,2,2\n" * 3 + b"x\n" + b"3,3,3\n" * 3,
        "one_row": head + b"\n1,2,3\n",
        "one_bad": head + b"\njunk\n",
    }
    monkeypatch.setenv(SHARE_ENV, share)
    for name, data in files.items():
        path = tmp_path / f"{name}.csv"
        path.write_bytes(data)
        want = _parse_all(path, False, 64)
        got = _parse_all(path, True, 64)
        assert got[2], name  # a part was left to this process
        assert got[:2] == want[:2], name
    from conftest import config_dict

    from streamcond.config import config_from_dict
    from streamcond.replay import run_replay

    empty = tmp_path / "empty.csv"
    empty.write_bytes(head + b"\n" * 200)
    cfg = config_from_dict(config_dict([{"name": "a", "band": {"low": -1.0, "high": 1.0}}],
                                       columns=["t", "a", "b"]))
    monkeypatch.setenv("STREAMCOND_CSV_READER", "numpy")
    for mode in ("off", "process"):
        monkeypatch.setenv("STREAMCOND_READ_AHEAD", mode)
        with pytest.raises(InputError, match="holds no data lines"):
            run_replay(cfg, empty, block_bytes=64)


def test_a_reader_thread_ahead_of_the_header_does_not_start_the_pipeline_early(tmp_path,
                                                                              monkeypatch):
    """Read ahead in a thread, a CSV whose columns come from its header, 30-byte blocks: the
    thread finds the header while the replay still holds earlier items without columns; those
    must not reach the pipeline (it raised "rows must be (n, 3)")."""
    from fuzz_lines import config

    from streamcond.config import load_config
    from streamcond.replay import run_replay

    cfg_path = tmp_path / "c.toml"
    cfg_path.write_text(config("csv").replace('columns = ["t", "a", "b"]\n', ""))
    cfg = load_config(cfg_path)
    rec = tmp_path / "late.csv"
    rec.write_bytes(b"t,a,b" + b" " * 58 + b"\n" + b"\n" * 50 + b"1,2,3\n")
    monkeypatch.setenv("STREAMCOND_READ_AHEAD", "off")
    want = run_replay(cfg, rec, block_bytes=30, keep_records=True).records
    monkeypatch.setenv("STREAMCOND_READ_AHEAD", "thread")
    for _ in range(10):  # the race needed no luck: 30 of 30 runs failed before
        got = run_replay(cfg, rec, block_bytes=30, keep_records=True).records
        assert [r for r in got if r["kind"] != "summary"] == [
            r for r in want if r["kind"] != "summary"]


@needs_fork
def test_convert_reads_without_a_share_and_keeps_the_no_data_verdict(tmp_path):
    """Only the replay gives the end-of-file verdict itself; convert and tune read without a
    share, so a file of blank lines is "holds no data lines" through a reader child too."""
    from fuzz_lines import config

    cfg = tmp_path / "c.toml"
    cfg.write_text(config("csv"))
    blank = tmp_path / "blank.csv"
    blank.write_bytes(b"t,a,b\n" + b"\n" * 400_000)
    env = {**os.environ, "STREAMCOND_READ_AHEAD": "process", "STREAMCOND_CSV_READER": "numpy",
           "STREAMCOND_SHARE": "0.5"}
    for args in (["convert", "-c", str(cfg), str(blank), "-o", str(tmp_path / "x.parquet")],
                 ["replay", str(blank), "-c", str(cfg), "--events", str(tmp_path / "e.jsonl")]):
        r = subprocess.run([sys.executable, "-m", "streamcond", *args], capture_output=True,
                           text=True, env=env, timeout=120)
        assert r.returncode == 2 and "holds no data lines" in r.stderr, (args[0], r.stderr)
