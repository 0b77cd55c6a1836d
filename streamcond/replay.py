"""``streamcond replay``: a recording through the same parser and core as the live daemon.

This module is wiring: file blocks → :class:`LineParser` → (re-chunked) :class:`Pipeline` →
JSON-lines writer, plus pacing (``--speed``), progress and the golden-file comparison.
"""

from __future__ import annotations

import copy
import logging
import os
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
from .io.recording import DEFAULT_BLOCK_BYTES, no_data, read_blocks

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
    reader: str | None = None, share: bool = False,
) -> tuple[LineParser, Iterable[tuple[Any, int, int]], bool, bool]:
    """The parser and the block iterator for a recording or a capture (text, Parquet or Arrow
    IPC), whether the rows carry host receive times as their sample time (a capture read
    with a config that has no time column and no fixed rate), and whether the recording is a
    capture (its rows then end with the host receive time). ``reader`` picks the CSV block
    reader (``numpy`` or ``pyarrow``; default: the fastest installed). ``share``: a reader child
    may leave parts of CSV blocks to this process (:class:`streamcond.io.lineparse.Share`);
    only for a caller that gives the end-of-file verdict itself, as :func:`run_replays` does."""
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
        fn, args = read_columnar_blocks, (recording, parser, kind, capture)
    elif capture:
        # the rows always carry the recorded host time (a last column): the sample time when
        # the data has none, and the wall-clock stamp (``utc``) of the records either way
        fn, args = read_capture_blocks, (recording, parser, True, block_bytes)
    else:
        fn, args = read_blocks, (recording, parser, block_bytes)
    # the next block is read and parsed on the other core while this one is conditioned
    # (the parser is driven by that one reader alone, so the records are the same)
    how = prefetch.choose(parser.reader, kind, os.path.getsize(recording))
    if how == "process":  # the early reader when `replay` started one (start_early)
        # numpy's reader parses a CSV block in about twice the time the block's conditioning
        # takes: the child then leaves the last part of each block for this process to parse
        # (the share that evens the two sides out, measured as it goes)
        parser.sharing = (share and fn is read_blocks and parser.fmt == "csv"
                          and parser.reader == "numpy")
        blocks = prefetch.read_job_in_child(fn, args, parser, str(recording))
    elif how == "thread":
        # the thread drives a parser of its own; this one takes its state with each block
        own = copy.deepcopy(parser)
        blocks = prefetch.read_ahead(iter(fn(args[0], own, *args[2:])), sync=(own, parser))
    else:
        blocks = fn(*args)
    return parser, blocks, host_time, capture


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
    return run_replays([cfg], recording, [sink], chunk=chunk, speed=speed,
                       keep_records=keep_records, progress=progress, block_bytes=block_bytes,
                       sleep=sleep, clock=clock)[0]


def same_reading(a: Config, b: Config) -> bool:
    """Do two configs read a recording the same way (one read can serve both replays)? The
    same ``[source]`` and the same columns read (a NaN in a read column makes a line bad)."""
    return a.source == b.source and needed_columns(a) == needed_columns(b)


def run_replays(
    cfgs: list[Config],
    recording: str | Path,
    sinks: list[Callable[[dict[str, Any]], None] | None],
    *,
    chunk: int | None = None,
    speed: float | None = None,
    keep_records: bool = False,
    progress: Any = None,
    block_bytes: int = DEFAULT_BLOCK_BYTES,
    sleep: Callable[[float], None] = time.sleep,
    clock: Callable[[], float] = time.monotonic,
) -> list[ReplayResult]:
    """Replay ``recording`` once through one pipeline per config (configs that read it the same
    way, :func:`same_reading`): the file is read and parsed once, and each config's records
    go to its sink, exactly as in a replay of its own."""
    from .validate import validate

    if any(not same_reading(cfgs[0], c) for c in cfgs[1:]):
        raise ValueError("run_replays needs configs that read the recording the same way")
    for cfg in cfgs:
        validate(cfg, files=False)  # a replay opens no MQTT files
    parser, blocks, host_time, capture = open_recording(cfgs[0], recording, block_bytes,
                                                        share=True)
    try:
        # every capture's rows end with the host receive time (see open_recording)
        host_column = host_time or capture
        runs = [_Run(cfg, sink, keep_records, host_time, host_column)
                for cfg, sink in zip(cfgs, sinks)]
        _drive(runs, recording, parser, blocks, chunk=chunk, speed=speed, progress=progress,
               sleep=sleep, clock=clock)
        return [run.res for run in runs]
    finally:
        # a reader process or thread stops now, whatever ended the replay
        close = getattr(blocks, "close", None)
        if close is not None:
            close()


class _Run:
    """One config's pipeline, result and sink in a replay."""

    def __init__(self, cfg: Config, sink: Callable[[dict[str, Any]], None] | None,
                 keep_records: bool, host_time: bool, host_column: bool) -> None:
        self.cfg, self.sink, self.keep = cfg, sink, keep_records
        self.host_time, self.host_column = host_time, host_column
        self.pipe: Any = None
        self.res = ReplayResult()

    def start(self, columns: list[str]) -> None:
        # imported once the reader has started (open_recording): its first block is parsed
        # meanwhile
        from .core.pipeline import Pipeline

        check_columns(self.cfg, columns)
        cols = columns + [HOST_T] if self.host_column else columns
        self.pipe = Pipeline(self.cfg, cols, host_time=self.host_time)

    def emit(self, recs: list[dict[str, Any]]) -> None:
        sink, keep = self.sink, self.keep
        for r in recs:
            if sink is not None:
                sink(r)
            if keep:
                self.res.records.append(r)

    def interrupted(self) -> float:
        """Ctrl-C: the partial windows, then an ``interrupted`` record; returns its time."""
        pipe = self.pipe
        t_stop = pipe.last_t if pipe is not None else float("nan")
        if pipe is not None:
            try:
                self.emit(pipe.flush())
            except Exception as e:  # stopped mid-block: the closing record matters more
                log.debug("no partial windows after the interrupt: %s", e)
        stop = records.interrupted(t_stop)
        if pipe is not None and pipe.host_col is not None:
            records.with_utc(stop, pipe.last_host_t)
        self.emit([stop])
        return t_stop

    def finish(self, parser: LineParser, wall0: float) -> None:
        pipe, res = self.pipe, self.res
        self.emit(pipe.finish())
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
        self.emit([res.summary])


def _drive(
    runs: list[_Run], recording: str | Path, parser: LineParser, blocks: Iterable[Any], *,
    chunk: int | None, speed: float | None, progress: Any,
    sleep: Callable[[float], None], clock: Callable[[], float],
) -> None:
    """The replay loop: every block to every run, paced and reported by the first."""
    lead = runs[0]
    wall0 = time.monotonic()
    t_first: float | None = None
    pace0 = 0.0
    if speed is not None and chunk is None:
        chunk = 32  # pace in small steps so a live consumer sees a steady stream
    done_before = 0
    try:
        for parsed, done, size in blocks:
            if parsed.examples:
                for msg in parsed.examples:
                    log.warning("bad input skipped: %s", msg)
            if lead.pipe is None:
                if parser.columns is None:
                    continue
                for run in runs:
                    run.start(parser.columns)
            n_block = max(parsed.rows.shape[0], 1)
            in_block = 0
            for piece in _chunks(parsed.rows, chunk):
                in_block += piece.shape[0]
                for run in runs:
                    run.res.rows += piece.shape[0]
                    run.emit(run.pipe.process(piece))
                last_t = lead.pipe.last_t
                if speed is not None and np.isfinite(last_t):
                    if t_first is None:
                        t_first = last_t
                        pace0 = clock()
                    wait = (last_t - t_first) / speed - (clock() - pace0)
                    if wait > 0:
                        sleep(wait)
                if progress is not None:
                    # driven by sample time, after every piece; the bytes done inside a block
                    # are estimated from the rows done (the block is parsed as a whole)
                    est = done_before + (done - done_before) * in_block / n_block
                    progress.update(int(est), lead.res.rows, last_t)
            done_before = done
            if progress is not None:
                progress.update(done, lead.res.rows,
                                lead.pipe.last_t if lead.pipe is not None else None)
    except KeyboardInterrupt:
        t_stop = [run.interrupted() for run in runs][0]
        raise ReplayInterrupted(t_stop, lead.res.rows) from None
    if lead.pipe is None:
        if parser.columns is None:
            raise InputError(f"The recording {str(recording)!r} holds no data lines")
        for run in runs:
            run.start(parser.columns)
    if lead.res.rows == 0 and parser.bad == 0 and parser.absorbed:
        # the reader child left parts of the file to this process and could not tell
        raise no_data(Path(recording))
    if parser.bad > len(parser.examples):
        log.warning("%d bad lines skipped in all (the first %d are listed above)",
                    parser.bad, len(parser.examples))
    for run in runs:
        run.finish(parser, wall0)


class JsonlWriter(EventLog):
    """The events writer of earlier versions: replaces an existing file (kept for callers that
    have not moved to :class:`streamcond.io.eventlog.EventLog`, which checks the path)."""

    def __init__(self, target: str | None, flush_each: bool = False) -> None:
        super().__init__(target, flush_each=flush_each, mode="replace")
