"""``streamcond run``: the live daemon — wiring, not logic.

serial port ─► LineFramer (lines + host times) ─► LineParser ─► Pipeline ─► records
records ─► JSON-lines file (optional) and, for MQTT, the durable spool ─► Publisher

* Everything that decides what an event is lives in the pure core (:mod:`streamcond.core`);
  this module only moves bytes and records between the edges, on one asyncio loop.
* Data that arrives while a block is being processed is taken as the next block, and blocks
  are at least ``MIN_BLOCK_S`` apart: low latency when the line is quiet, bounded per-block
  overhead when it is busy. The records do not depend on the blocking (chunk invariance).
* Before a record is handed to MQTT it is committed to the SQLite spool, in the same
  transaction as the channels' ``seq`` and levels, so neither a broker outage nor a SIGKILL
  loses an edge or breaks the numbering.
* Signals: SIGHUP reloads the config (a config that fails validation is rejected with one log
  line and the old one keeps running); SIGTERM/SIGINT stop reading, flush the spool as far as the
  broker allows within ``STOP_FLUSH_S``, publish ``offline`` and exit 0.
* A vanished device is a ``fault`` record, a returned one a ``gap`` record; the daemon never
  exits for that.
"""

from __future__ import annotations

import asyncio
import logging
import signal
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from . import records
from .config import Config, load_config
from .core.pipeline import Pipeline
from .errors import ConfigError, InputError, StreamcondError
from .io.lineparse import HOST_T, LineParser
from .io.eventlog import EventLog, from_config as events_writer
from .replay import check_columns, make_parser
from .sdnotify import Notifier
from .validate import validate

log = logging.getLogger("streamcond.daemon")

#: Shortest time between two processed blocks: bounds the per-block overhead (8 channels cost
#: about half a millisecond a block) when the line is busy, at the price of at most this much
#: added latency (measured: p99 line→MQTT latency 12 ms at 8 × 1 kHz; tests/bench/bench_daemon.py).
MIN_BLOCK_S = 0.008
#: How long a clean stop may spend delivering the spool's backlog.
STOP_FLUSH_S = 5.0
#: At most one summary line about bad input per this many seconds.
BAD_INPUT_LOG_S = 60.0


def store_path(cfg: Config) -> Path:
    """Where the spool and the channel state live (one SQLite file)."""
    if cfg.output.mqtt is not None:
        return Path(cfg.output.mqtt.spool_path)
    return Path(cfg.output.state_path)


class RateLimitedLog:
    """Bad input is logged with its first examples, then summarised at most once a minute."""

    def __init__(self, interval_s: float = BAD_INPUT_LOG_S, first: int = 5) -> None:
        self.interval = interval_s
        self.first = first
        self.logged = 0
        self.pending = 0
        self.last_example = ""
        self.last_time = -1e18

    def bad(self, count: int, examples: list[str], now: float) -> None:
        if count <= 0:
            return
        for ex in examples:
            if self.logged < self.first:
                log.warning("bad input skipped: %s", ex)
                self.logged += 1
                self.last_time = now
            else:
                self.last_example = ex
        shown = min(len(examples), max(0, self.first - (self.logged - len(examples))))
        self.pending += max(0, count - shown)
        if self.logged >= self.first and self.pending and now - self.last_time >= self.interval:
            log.warning("%d more bad input lines skipped%s", self.pending,
                        f" (latest: {self.last_example})" if self.last_example else "")
            self.pending = 0
            self.last_time = now


@dataclass
class Counters:
    blocks: int = 0
    rows: int = 0
    bad_lines: int = 0
    dropped_long: int = 0
    records: int = 0
    reloads: int = 0
    rejected_reloads: int = 0


class Daemon:
    """One running instance: source, pipeline, outputs."""

    def __init__(self, config_path: str | Path, notifier: Notifier | None = None) -> None:
        self.config_path = Path(config_path)
        self.cfg = load_config(self.config_path)
        validate(self.cfg)
        if self.cfg.source.kind != "serial":
            raise ConfigError(
                "streamcond run reads a serial source (source.kind = \"serial\"); "
                "for a recording use `streamcond replay` (with --speed to pace it)"
            )
        self.notifier = notifier or Notifier()
        self.counters = Counters()
        self.badlog = RateLimitedLog()
        self.stop_event = asyncio.Event()
        self.reload_event = asyncio.Event()
        self.wake = asyncio.Event()
        self.pending: list[Any] = []  # source events not processed yet
        self.spool: Any = None
        self.publisher: Any = None
        self.publisher_task: asyncio.Task | None = None
        self.writer: EventLog | None = None
        self.source: Any = None
        self.source_task: asyncio.Task | None = None
        self.lost_at: float | None = None
        self._reset_parsing()

    # -- set-up -------------------------------------------------------------------------------
    def _reset_parsing(self) -> None:
        from .io.serialsource import LineFramer

        # resync: the first bytes after opening a port are usually the middle of a line
        self.framer = LineFramer(self.cfg.source.max_line_bytes, resync=True)
        self.parser: LineParser = make_parser(self.cfg)
        self.pipeline: Pipeline | None = None


    def _open_outputs(self) -> None:
        from .io.spool import Spool, spool_options

        path = store_path(self.cfg)
        mq = self.cfg.output.mqtt
        try:
            self.spool = Spool(path, **spool_options(mq)) if mq else Spool(path)
        except Exception as e:  # a corrupt or unwritable file: a plain sentence, exit 2
            raise InputError(f"The spool/state file {str(path)!r} cannot be used: {e}") from None
        self.saved_state = self.spool.load_state()
        self.writer = events_writer(self.cfg.output)

    def _start_publisher(self) -> None:
        if self.cfg.output.mqtt is None:
            self.publisher = None
            return
        from .io.mqtt import Publisher

        self.publisher = Publisher(self.cfg.output.mqtt, self.cfg.topic_prefix, self.spool)
        self.publisher_stop = asyncio.Event()
        self.publisher_task = asyncio.create_task(self.publisher.run(self.publisher_stop))

    def _start_source(self) -> None:
        from .io.serialsource import SerialSource

        # the reader hands data over at most as often as blocks are processed
        self.source = SerialSource(self.cfg.source, coalesce_s=MIN_BLOCK_S / 2)
        self.source_task = asyncio.create_task(self._read_source(self.source))

    async def _read_source(self, source: Any) -> None:
        async for ev in source.events():
            self.pending.append(ev)
            self.wake.set()

    # -- the main loop --------------------------------------------------------------------------
    async def run(self) -> int:
        loop = asyncio.get_running_loop()
        def request(ev: asyncio.Event) -> Any:
            def fn() -> None:
                ev.set()
                self.wake.set()  # the main loop waits on this one event only
            return fn

        for sig, fn in ((signal.SIGTERM, request(self.stop_event)),
                        (signal.SIGINT, request(self.stop_event)),
                        (signal.SIGHUP, request(self.reload_event))):
            try:
                loop.add_signal_handler(sig, fn)
            except (NotImplementedError, RuntimeError):  # pragma: no cover - not on this OS
                pass
        self._open_outputs()
        self._start_publisher()
        self._start_source()
        watchdog = asyncio.create_task(self._watchdog()) if self.notifier.watchdog_s else None
        self.notifier.ready(f"reading {self.cfg.source.port}")
        log.info("started: reading %s, %d channel(s)%s", self.cfg.source.port, len(self.cfg.channel),
                 f", publishing to {self.cfg.output.mqtt.host}:{self.cfg.output.mqtt.port}"
                 if self.cfg.output.mqtt else "")
        next_block = 0.0
        try:
            while not self.stop_event.is_set():
                if not self.reload_event.is_set():
                    await self.wake.wait()
                if self.reload_event.is_set():
                    self.reload_event.clear()
                    await self._reload()
                if self.stop_event.is_set():
                    break
                now = time.monotonic()
                if now < next_block:
                    await asyncio.sleep(next_block - now)
                self.wake.clear()
                await self._process_pending()
                next_block = time.monotonic() + MIN_BLOCK_S
        finally:
            await self._shutdown(watchdog)
        return 0

    async def _process_pending(self) -> None:
        from .io.serialsource import Back, Data, Lost

        events, self.pending = self.pending, []
        lines: list[bytes] = []
        times: list[np.ndarray] = []
        out: list[dict[str, Any]] = []

        def flush_lines() -> None:
            if lines:
                out.extend(self._condition(lines, np.concatenate(times)))
                lines.clear()
                times.clear()

        for ev in events:
            if isinstance(ev, Data):
                ls, ts, dropped = self.framer.feed(ev.data, ev.t_host)
                if dropped:
                    self.counters.dropped_long += dropped
                    self.badlog.bad(dropped, [f"over-long line (> {self.cfg.source.max_line_bytes} bytes) dropped"], time.monotonic())
                lines.extend(ls)
                times.append(ts)
            elif isinstance(ev, Lost):
                flush_lines()
                self.framer.reset()  # a half line from before the loss is not data
                self.lost_at = ev.t_host
                out.append(records.device_lost(self._sample_time(ev.t_host), ev.reason,
                                               self.cfg.source.port, ev.t_host))
                self.notifier.status(f"waiting for {self.cfg.source.port}")
            elif isinstance(ev, Back):
                flush_lines()
                self.framer.reset(t_start=ev.t_host, resync=True)
                t0 = self.lost_at if self.lost_at is not None else ev.t_host
                # in the stream's time base (sample time), like every record; utc from the host
                s0, s1 = self._sample_time(t0), self._sample_time(ev.t_host)
                if s0 is not None and s1 is not None:
                    out.append(records.with_utc(records.gap(s0, s1, "device_lost"), t0))
                self.lost_at = None
                self.notifier.status(f"reading {self.cfg.source.port}")
        flush_lines()
        if out:
            await self._emit(out)

    def _condition(self, lines: list[bytes], times: np.ndarray) -> list[dict[str, Any]]:
        try:
            parsed = self.parser.feed_lines(lines, times)
        except InputError as e:
            # e.g. a CSV stream joined mid-way without a header: keep looking for one
            self.badlog.bad(len(lines), [" ".join(e.messages)], time.monotonic())
            self.parser = make_parser(self.cfg)
            return []
        self.counters.bad_lines += parsed.bad
        self.badlog.bad(parsed.bad, parsed.examples, time.monotonic())
        if self.parser.columns is None or parsed.rows.shape[0] == 0:
            return []
        if self.pipeline is None:
            self.pipeline = self._new_pipeline(self.cfg)
            self.pipeline.restore(self.saved_state)
        self.counters.blocks += 1
        self.counters.rows += parsed.rows.shape[0]
        return self.pipeline.process(parsed.rows)

    def _sample_time(self, host_t: float) -> float | None:
        """A host clock reading in the stream's sample time (None before the first sample)."""
        if self.pipeline is None:
            return None
        return self.pipeline.host_to_sample_time(host_t)

    def _new_pipeline(self, cfg: Config) -> Pipeline:
        assert self.parser.columns is not None
        check_columns(cfg, self.parser.columns)
        return Pipeline(cfg, self.parser.columns + [HOST_T], host_time=cfg.source.host_time)

    async def _emit(self, recs: list[dict[str, Any]]) -> None:
        self.counters.records += len(recs)
        if self.writer is not None:
            for r in recs:
                self.writer(r)
        items: list[tuple[str, bytes, int, bool, str]] = []
        if self.publisher is not None:
            from .io.mqtt import topic_for

            mq = self.cfg.output.mqtt
            assert mq is not None
            for r in recs:
                items.extend(topic_for(r, self.cfg.topic_prefix, mq.qos))
        changed = any(r["kind"] in (records.EDGE, records.STATE) for r in recs)
        state = self.pipeline.snapshot() if (changed and self.pipeline is not None) else None
        if items or state:
            await asyncio.to_thread(self.spool.put_many, items, state)
            if self.publisher is not None and items:
                self.publisher.notify()

    # -- reload and stop ---------------------------------------------------------------------------
    async def _reload(self) -> None:
        try:
            new = load_config(self.config_path)
            validate(new, self.pipeline.sample_rate_hz if self.pipeline is not None else None)
            if new.source.kind != "serial":
                raise ConfigError("source.kind must stay \"serial\" for a running daemon")
            pipeline = None
            if self.pipeline is not None and self.parser.columns is not None and new.source == self.cfg.source:
                pipeline = self._new_pipeline(new)
                pipeline.adopt(self.pipeline)
        except StreamcondError as e:
            self.counters.rejected_reloads += 1
            log.error("config reload rejected, the old config keeps running: %s", " ".join(e.messages))
            return
        old = self.cfg
        self.cfg = new
        self.counters.reloads += 1
        if pipeline is not None:
            self.pipeline = pipeline
        if new.source != old.source:
            # a different port or line format: reopen and start parsing afresh (the channels'
            # numbering and levels are kept through the spool's state)
            if self.pipeline is not None:
                self.saved_state = self.pipeline.snapshot()
            await self._stop_source()
            self._reset_parsing()
            self._start_source()
        if (new.output.events, new.output.rotate) != (old.output.events, old.output.rotate):
            if self.writer is not None:
                self.writer.close()
            self.writer = events_writer(new.output)
        if new.output.mqtt != old.output.mqtt:
            await self._stop_publisher(flush=True)
            if (new.output.mqtt and old.output.mqtt and new.output.mqtt.spool_path != old.output.mqtt.spool_path) or (
                (new.output.mqtt is None) != (old.output.mqtt is None)
            ):
                log.warning("a new spool/state path takes effect at the next restart")
            self._start_publisher()
        log.info("config reloaded from %s", self.config_path)

    async def _stop_source(self) -> None:
        if self.source is not None:
            self.source.stop()
        if self.source_task is not None:
            try:
                await asyncio.wait_for(self.source_task, 2.0)
            except (asyncio.TimeoutError, asyncio.CancelledError):
                self.source_task.cancel()
            except Exception as e:  # pragma: no cover - reported, never fatal
                log.error("serial reader ended with an error: %s", e)
        self.source_task = None

    async def _stop_publisher(self, flush: bool) -> None:
        if self.publisher is None:
            return
        try:
            await self.publisher.shutdown(STOP_FLUSH_S if flush else 0.5)
        except Exception as e:  # pragma: no cover - never fatal on the way out
            log.warning("MQTT shutdown: %s", e)
        self.publisher_stop.set()
        if self.publisher_task is not None:
            try:
                await asyncio.wait_for(self.publisher_task, 2.0)
            except (asyncio.TimeoutError, asyncio.CancelledError):
                self.publisher_task.cancel()
            except Exception as e:  # pragma: no cover
                log.warning("MQTT publisher ended with an error: %s", e)
        self.publisher = None
        self.publisher_task = None

    async def _shutdown(self, watchdog: asyncio.Task | None) -> None:
        self.notifier.stopping()
        await self._stop_source()
        await self._process_pending()  # what had arrived before the stop
        if self.pipeline is not None:
            await self._emit(self.pipeline.flush())  # the last, partial stats window
        await self._stop_publisher(flush=True)
        if watchdog is not None:
            watchdog.cancel()
        if self.writer is not None:
            self.writer.close()
        if self.spool is not None:
            left = len(self.spool)
            self.spool.close()
            if left:
                log.warning("%d record(s) left in the spool; they are sent after the next start", left)
        c = self.counters
        log.info("stopped: %d rows, %d bad lines, %d over-long lines, %d records, %d reloads "
                 "(%d rejected)", c.rows, c.bad_lines, c.dropped_long, c.records, c.reloads,
                 c.rejected_reloads)

    async def _watchdog(self) -> None:
        assert self.notifier.watchdog_s
        while True:
            self.notifier.watchdog()
            await asyncio.sleep(self.notifier.watchdog_s / 2)


def run(config_path: str | Path) -> int:
    """Entry point of ``streamcond run`` (exit code)."""
    daemon = Daemon(config_path)
    return asyncio.run(daemon.run())
