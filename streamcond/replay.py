"""``streamcond replay``: a recording through the same parser and core as the live daemon.

This module is wiring: file blocks → :class:`LineParser` → (re-chunked) :class:`Pipeline` →
JSON-lines writer, plus pacing (``--speed``), progress and the golden-file comparison.
"""

from __future__ import annotations

import logging
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np

from . import records
from .config import Config
from .errors import InputError
from .io import prefetch
from .io.capture import is_capture, read_capture_blocks
from .io.eventlog import EventLog
from .io.lineparse import HOST_T, LineParser
from .io.recording import DEFAULT_BLOCK_BYTES, read_blocks

log = logging.getLogger(__name__)


def needed_columns(cfg: Config) -> list[str]:
    cols = [cfg.source.time_column] if cfg.source.time_column else []
    cols += [ch.source_column for ch in cfg.channel]
    return list(dict.fromkeys(cols))


def make_parser(cfg: Config) -> LineParser:
    src = cfg.source
    return LineParser(
        src.format, columns=src.columns, needed=needed_columns(cfg), max_line_bytes=src.max_line_bytes
    )


def check_columns(cfg: Config, columns: list[str]) -> None:
    """Every column the config reads must be in the recording."""
    problems = []
    if cfg.source.time_column and cfg.source.time_column not in columns:
        problems.append(
            f"source.time_column {cfg.source.time_column!r} is not a column of the recording "
            f"(it has: {', '.join(columns)})"
        )
    for i, ch in enumerate(cfg.channel):
        if ch.source_column not in columns:
            problems.append(
                f"channel[{i}].column {ch.source_column!r} is not a column of the recording "
                f"(it has: {', '.join(columns)})"
            )
    if problems:
        raise InputError(problems)


def open_recording(
    cfg: Config, recording: str | Path, block_bytes: int = DEFAULT_BLOCK_BYTES,
    reader: str | None = None,
) -> tuple[LineParser, Iterable[tuple[Any, int, int]], bool]:
    """The parser and the block iterator for a recording or a capture (text, Parquet or Arrow
    IPC), and whether the rows carry host receive times as their sample time (a capture read
    with a config that has no time column and no fixed rate). ``reader`` picks the CSV block
    reader (``numpy`` or ``pyarrow``; default: the fastest installed)."""
    from .io.recording import kind_of

    src = cfg.source
    parser = LineParser(src.format, columns=src.columns, needed=needed_columns(cfg),
                        max_line_bytes=src.max_line_bytes, reader=reader)
    kind = kind_of(recording)
    if kind != "text":
        from .io.columnar import has_host_time, is_columnar_capture, read_columnar_blocks

        capture = is_columnar_capture(recording, kind) or has_host_time(recording, kind)
    else:
        capture = is_capture(recording)
    if src.host_time and not capture:
        raise InputError(
            f"The recording {str(recording)!r} carries no sample time: set source.time_column "
            "or source.sample_rate_hz, or use a capture made by `streamcond record`"
        )
    host_time = capture and src.host_time
    if kind != "text":
        # a columnar capture, like a text one, always carries the host time as a last column
        blocks = read_columnar_blocks(recording, parser, kind, capture)
    elif capture:
        # the rows always carry the recorded host time (a last column): the sample time when
        # the data has none, and the wall-clock stamp (``utc``) of the records either way
        blocks = read_capture_blocks(recording, parser, True, block_bytes)
    else:
        blocks = read_blocks(recording, parser, block_bytes)
    # the next block is read and parsed on the other core while this one is conditioned
    # (the parser is driven by that one reader alone, so the records are the same)
    how = prefetch.choose(parser.reader, kind, os.path.getsize(recording))
    if how == "process":
        blocks = prefetch.read_in_child(iter(blocks), parser)
    elif how == "thread":
        blocks = prefetch.read_ahead(iter(blocks))
    return parser, blocks, host_time


class ReplayInterrupted(Exception):
    """Ctrl-C during a replay: the records up to ``t`` were written, ending with an
    ``interrupted`` record."""

    def __init__(self, t: float, rows: int) -> None:
        super().__init__(f"interrupted at t = {t:.3f} s")
        self.t = t
        self.rows = rows


@dataclass
class ReplayResult:
    rows: int = 0
    bad_lines: int = 0
    examples: list[str] = field(default_factory=list)
    records: list[dict[str, Any]] = field(default_factory=list)  # kept when asked (for --expect)
    summary: dict[str, Any] = field(default_factory=dict)


def _chunks(rows: np.ndarray, chunk: int | None) -> Iterable[np.ndarray]:
    if not chunk or rows.shape[0] <= chunk:
        yield rows
        return
    for a in range(0, rows.shape[0], chunk):
        yield rows[a : a + chunk]


def run_replay(
    cfg: Config,
    recording: str | Path,
    sink: Callable[[dict[str, Any]], None] | None = None,
    *,
    chunk: int | None = None,
    speed: float | None = None,
    keep_records: bool = False,
    progress: Any = None,
    block_bytes: int = DEFAULT_BLOCK_BYTES,
    sleep: Callable[[float], None] = time.sleep,
    clock: Callable[[], float] = time.monotonic,
) -> ReplayResult:
    """Replay ``recording`` through the pipeline, handing every record to ``sink``.

    ``chunk`` feeds the pipeline that many rows at a time (any value gives the same records);
    ``speed`` paces the replay by sample time (1.0 = real time, 10 = ten times faster).
    """
    from .validate import validate

    validate(cfg, files=False)  # a replay opens no MQTT files
    parser, blocks, host_time = open_recording(cfg, recording, block_bytes)
    try:
        return _replay(cfg, recording, parser, blocks, host_time, sink, chunk=chunk,
                       speed=speed, keep_records=keep_records, progress=progress,
                       sleep=sleep, clock=clock)
    finally:
        # a reader process or thread stops now, whatever ended the replay
        close = getattr(blocks, "close", None)
        if close is not None:
            close()


def _replay(
    cfg: Config, recording: str | Path, parser: LineParser, blocks: Iterable[Any],
    host_time: bool, sink: Callable[[dict[str, Any]], None] | None, *, chunk: int | None,
    speed: float | None, keep_records: bool, progress: Any,
    sleep: Callable[[float], None], clock: Callable[[], float],
) -> ReplayResult:
    # imported after the reader has started: its first block is parsed meanwhile
    from .core.pipeline import Pipeline
    # rows with the host receive time as a last column: a text capture always (see
    # open_recording), any other capture when that time is the sample time
    with_host_column = host_time or is_capture(recording)

    def new_pipeline(columns: list[str]) -> Pipeline:
        check_columns(cfg, columns)
        return Pipeline(cfg, columns + [HOST_T] if with_host_column else columns, host_time=host_time)

    pipe: Pipeline | None = None
    res = ReplayResult()
    wall0 = time.monotonic()
    t_first: float | None = None
    pace0 = 0.0
    if speed is not None and chunk is None:
        chunk = 32  # pace in small steps so a live consumer sees a steady stream

    def emit(recs: list[dict[str, Any]]) -> None:
        for r in recs:
            if sink is not None:
                sink(r)
            if keep_records:
                res.records.append(r)

    done_before = 0
    try:
        for parsed, done, size in blocks:
            if parsed.examples:
                for msg in parsed.examples:
                    log.warning("bad input skipped: %s", msg)
            if pipe is None:
                if parser.columns is None:
                    continue
                pipe = new_pipeline(parser.columns)
            n_block = max(parsed.rows.shape[0], 1)
            in_block = 0
            for piece in _chunks(parsed.rows, chunk):
                res.rows += piece.shape[0]
                in_block += piece.shape[0]
                emit(pipe.process(piece))
                if speed is not None and np.isfinite(pipe.last_t):
                    if t_first is None:
                        t_first = pipe.last_t
                        pace0 = clock()
                    wait = (pipe.last_t - t_first) / speed - (clock() - pace0)
                    if wait > 0:
                        sleep(wait)
                if progress is not None:
                    # driven by sample time, after every piece; the bytes done inside a block
                    # are estimated from the rows done (the block is parsed as a whole)
                    est = done_before + (done - done_before) * in_block / n_block
                    progress.update(int(est), res.rows, pipe.last_t)
            done_before = done
            if progress is not None:
                progress.update(done, res.rows, pipe.last_t if pipe is not None else None)
    except KeyboardInterrupt:
        t_stop = pipe.last_t if pipe is not None else float("nan")
        if pipe is not None:
            try:
                emit(pipe.flush())
            except Exception as e:  # stopped mid-block: the closing record matters more
                log.debug("no partial windows after the interrupt: %s", e)
        stop = records.interrupted(t_stop)
        if pipe is not None and pipe.host_col is not None:
            records.with_utc(stop, pipe.last_host_t)
        emit([stop])
        raise ReplayInterrupted(t_stop, res.rows) from None
    if pipe is None:
        if parser.columns is None:
            raise InputError(f"The recording {str(recording)!r} holds no data lines")
        pipe = new_pipeline(parser.columns)
    emit(pipe.finish())
    if parser.bad > len(parser.examples):
        log.warning("%d bad lines skipped in all (the first %d are listed above)",
                    parser.bad, len(parser.examples))
    res.bad_lines = parser.bad  # the parser counts every bad line it skipped
    res.examples = list(parser.examples)
    res.summary = records.summary(
        pipe.last_t,
        rows=res.rows,
        samples=pipe.samples,
        bad_lines=res.bad_lines,
        bad_line_examples=res.examples,
        gaps=pipe.gaps,
        dropped=pipe.timebase.dropped,
        sample_rate_hz=pipe.sample_rate_hz,
        edges=pipe.edges_by_channel(),
        totals=pipe.totals(),
        run_time_s=round(time.monotonic() - wall0, 6),
    )
    if pipe.host_col is not None:
        records.with_utc(res.summary, pipe.last_host_t)
    emit([res.summary])
    return res


class JsonlWriter(EventLog):
    """The events writer of earlier versions: replaces an existing file (kept for callers that
    have not moved to :class:`streamcond.io.eventlog.EventLog`, which checks the path)."""

    def __init__(self, target: str | None, flush_each: bool = False) -> None:
        super().__init__(target, flush_each=flush_each, mode="replace")
