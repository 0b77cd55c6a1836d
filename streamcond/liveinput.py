"""The live daemon's input side: serial events in, records out — framing, parsing, conditioning.

:class:`LiveInput` is pure in the sans-I/O sense (no port, no thread, no clock of its own: the
caller passes each read's bytes and host time) and is driven from the serial reader's thread, so
a line is framed, parsed and conditioned where it was read, without waking the event loop.

The block scheduler: conditioning costs per call far more than per sample, so rows are held back
while **no edge can be pending** in them (:meth:`Pipeline.may_emit`: every channel provably stays
at its level) and conditioned together once one might be, or once the oldest has waited
``max_hold_s``. Latency is unchanged for what matters (an edge is conditioned in the read that
brought it), and a quiet line costs a few calls a second. The records do not depend on the
blocking (chunk invariance), so holding back changes only when they are made, never what they
are; records that are not edges (stats, measures, gaps) may come up to ``max_hold_s`` later.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import records
from .config import Config
from .core.pipeline import Pipeline
from .errors import InputError
from .io.lineparse import HOST_T, LineParser
from .io.serialsource import Back, Data, LineFramer, Lost, SourceEvent
from .ratelimit import RateLimitedLog
from .replay import check_columns, needed_columns

log = logging.getLogger("streamcond.daemon")

#: Longest time rows wait for conditioning while no edge can be pending in them: bounds how late
#: a stats or measure record may come, and the staleness of the health record.
MAX_HOLD_S = 0.25
#: At most one summary line about bad input per this many seconds (after the first few lines).
BAD_INPUT_LOG_S = 60.0
BAD_INPUT_FIRST = 5
#: The only bytes of a CSV read the fast path takes (digits, sign, point, exponent, comma).
_FAST_CSV = b"0123456789.,eE+-"

#: One unit of work for the emitter: the records and, when they change a channel's numbering or
#: level, the channels' state to store in the same transaction.
@dataclass
class Output:
    records: list[dict[str, Any]]
    state: dict[str, dict[str, Any]] | None


@dataclass
class InputCounters:
    rows: int = 0
    blocks: int = 0  #: conditioning calls
    bad_lines: int = 0
    long_lines: int = 0
    records: int = 0
    last_t: float = float("nan")  #: sample time of the latest conditioned row
    last_rx: float = float("nan")  #: host time (epoch s) of the latest row read


def make_parser(cfg: Config) -> LineParser:
    """The live line parser: as replay's, but with numpy's CSV reader always — a live read is a
    few lines, where pyarrow's reader gains nothing and importing it costs some 25 MiB."""
    src = cfg.source
    return LineParser(src.format, columns=src.columns, needed=needed_columns(cfg),
                      max_line_bytes=src.max_line_bytes, reader="numpy")


class LiveInput:
    """Framer → parser → (block scheduler) → pipeline for one serial source.

    Thread-safe: :meth:`feed` runs in the reader thread, :meth:`reconfigure` and :meth:`flush`
    on the event loop; one lock orders them.
    """

    def __init__(self, cfg: Config, saved_state: dict[str, dict[str, Any]],
                 max_hold_s: float = MAX_HOLD_S) -> None:
        self.cfg = cfg
        self.saved_state = dict(saved_state)
        self.max_hold_s = float(max_hold_s)
        self.lock = threading.Lock()
        self.counters = InputCounters()
        self.badlog = RateLimitedLog(log, BAD_INPUT_LOG_S, first=BAD_INPUT_FIRST)
        # resync: the first bytes after opening a port are usually the middle of a line
        self.framer = LineFramer(cfg.source.max_line_bytes, resync=True)
        self.parser: LineParser = make_parser(cfg)
        self.pipeline: Pipeline | None = None
        self.lost_at: float | None = None
        self._held: list[np.ndarray] = []
        self._held_since = 0.0
        self._fast_ok = False

    # -- events from the reader thread ----------------------------------------------------------
    def feed(self, ev: SourceEvent) -> Output | None:
        """One source event; returns what to emit now (None: nothing yet)."""
        with self.lock:
            out: list[dict[str, Any]] = []
            if isinstance(ev, Data):
                self._data(ev.data, ev.t_host, out)
            elif isinstance(ev, Lost):
                self._condition_held(out)
                self.framer.reset()  # a half line from before the loss is not data
                self.lost_at = ev.t_host
                out.append(records.device_lost(self._sample_time(ev.t_host), ev.reason,
                                               self.cfg.source.port, ev.t_host))
            elif isinstance(ev, Back):
                self._condition_held(out)
                self.framer.reset(t_start=ev.t_host, resync=True)
                t0 = self.lost_at if self.lost_at is not None else ev.t_host
                # in the stream's time base (sample time), like every record; utc from the host
                s0, s1 = self._sample_time(t0), self._sample_time(ev.t_host)
                if s0 is not None and s1 is not None:
                    out.append(records.with_utc(records.gap(s0, s1, "device_lost"), t0))
                self.lost_at = None
            return self._output(out)

    def flush(self, final: bool = False) -> Output | None:
        """Condition everything held back (before a stop or a reload); with ``final`` (a clean
        stop) also the last, partial stats window of every channel."""
        with self.lock:
            out: list[dict[str, Any]] = []
            self._condition_held(out)
            if final and self.pipeline is not None:
                out.extend(self.pipeline.flush())
            return self._output(out)

    def _sample_time(self, host_t: float) -> float | None:
        """A host clock reading in the stream's sample time (None before the first sample)."""
        if self.pipeline is None:
            return None
        return self.pipeline.host_to_sample_time(host_t)

    def flush_stale(self, now: float) -> Output | None:
        """Condition held rows that have waited ``max_hold_s`` (``now``: host time, as the
        reads' times) although no newer data came to trigger it."""
        with self.lock:
            if not self._held or now - self._held_since < self.max_hold_s:
                return None
            out: list[dict[str, Any]] = []
            self._condition_held(out)
            return self._output(out)

    def _output(self, out: list[dict[str, Any]]) -> Output | None:
        if not out:
            return None
        self.counters.records += len(out)
        # the state of the channels whose numbering or level changed (the spool keeps the
        # stored state of the others as it is)
        changed = {r["channel"] for r in out if r["kind"] in (records.EDGE, records.STATE)}
        state = None
        if changed and self.pipeline is not None:
            snap = self.pipeline.snapshot()
            state = {ch: snap[ch] for ch in changed if ch in snap}
        return Output(out, state)

    def _data(self, data: bytes, t_host: float, out: list[dict[str, Any]]) -> None:
        c = self.counters
        lines, times, dropped = self.framer.feed(data, t_host)
        if dropped:
            c.long_lines += dropped
            self.badlog.log(logging.WARNING, "bad input skipped: %s", "over-long line "
                            f"(> {self.cfg.source.max_line_bytes} bytes) dropped", count=dropped)
        if not lines:
            return
        rows = self._fast_rows(lines, times) if self._fast_ok else None
        if rows is not None:
            self._take(rows, t_host, out)
            return
        try:
            parsed = self.parser.feed_lines(lines, times)
        except InputError as e:
            # e.g. a CSV stream joined mid-way without a header: keep looking for one
            c.bad_lines += len(lines)
            self.badlog.log(logging.WARNING, "bad input skipped: %s", " ".join(e.messages),
                            count=len(lines))
            self.parser = make_parser(self.cfg)
            self._fast_ok = False
            return
        if parsed.bad:
            c.bad_lines += parsed.bad
            for ex in parsed.examples:
                self.badlog.log(logging.WARNING, "bad input skipped: %s", ex)
            self.badlog.due(parsed.bad - len(parsed.examples))
        rows = parsed.rows
        if self.parser.columns is None or rows.shape[0] == 0:
            return
        # the header (if any) is behind us: clean reads may take the fast path from now on
        self._fast_ok = self.cfg.source.format == "csv"
        self._take(rows, t_host, out)

    def _fast_rows(self, lines: list[bytes], times: np.ndarray) -> np.ndarray | None:
        """The rows of a read whose every line is plainly numeric CSV with the right number
        of fields and only finite numbers — the rows the line parser would give for it — or
        None: then the parser decides, line by line, with its counting and messages.

        Why: the parser's general path costs about a tenth of a millisecond per call, which at
        a hundred reads a second is most of the daemon's work. For such lines Python's float
        conversion and numpy's loadtxt agree bit for bit (both round correctly; checked in
        tests/test_liveinput.py), so the rows are the same.
        """
        ncols = self.parser.ncols
        body = b",".join(lines)
        if body.translate(None, _FAST_CSV):
            return None
        k = ncols - 1
        for ln in lines:
            if ln.count(b",") != k:
                return None
        try:
            vals = np.array(body.split(b","), dtype=np.float64)
        except ValueError:
            return None
        if not np.isfinite(vals).all():
            return None
        self.parser.lines += len(lines)  # line numbers in later messages stay right
        return np.column_stack((vals.reshape(len(lines), ncols), times))

    def _take(self, rows: np.ndarray, t_host: float, out: list[dict[str, Any]]) -> None:
        c = self.counters
        c.rows += rows.shape[0]
        c.last_rx = float(rows[-1, -1])
        if self.pipeline is None:
            self.pipeline = self._new_pipeline(self.cfg)
            self.pipeline.restore(self.saved_state)
        if not self._held:
            self._held_since = t_host
        self._held.append(rows)
        if t_host - self._held_since >= self.max_hold_s or self.pipeline.may_emit(rows):
            self._condition_held(out)

    def _condition_held(self, out: list[dict[str, Any]]) -> None:
        if not self._held or self.pipeline is None:
            return
        rows = self._held[0] if len(self._held) == 1 else np.concatenate(self._held)
        self._held = []
        self.counters.blocks += 1
        out.extend(self.pipeline.process(rows))
        t = self.pipeline.last_t
        if t == t:  # not NaN
            self.counters.last_t = t

    def _new_pipeline(self, cfg: Config) -> Pipeline:
        assert self.parser.columns is not None
        check_columns(cfg, self.parser.columns)
        return Pipeline(cfg, self.parser.columns + [HOST_T], host_time=cfg.source.host_time)

    # -- reload ---------------------------------------------------------------------------------
    def prepare(self, new: Config) -> Pipeline | None:
        """A pipeline for ``new`` that continues from the running one (same source), or None
        when nothing runs yet; raises what makes ``new`` unusable, changing nothing."""
        with self.lock:
            if self.pipeline is None or self.parser.columns is None:
                return None
            pipeline = self._new_pipeline(new)
            return pipeline

    def reconfigure(self, new: Config, pipeline: Pipeline | None) -> Output | None:
        """Switch to ``new`` (same source): rows held so far are conditioned by the old
        pipeline, then ``pipeline`` (from :meth:`prepare`) adopts its state."""
        with self.lock:
            out: list[dict[str, Any]] = []
            self._condition_held(out)
            if pipeline is not None and self.pipeline is not None:
                pipeline.adopt(self.pipeline)  # may raise (ConfigError): nothing switched yet
                self.pipeline = pipeline
            self.cfg = new
            return self._output(out)

    def snapshot(self) -> dict[str, dict[str, Any]]:
        with self.lock:
            return self.pipeline.snapshot() if self.pipeline is not None else dict(self.saved_state)

    def edges_by_channel(self) -> dict[str, int]:
        with self.lock:
            if self.pipeline is None:
                return {ch.name: 0 for ch in self.cfg.channel}
            return self.pipeline.edges_by_channel()
