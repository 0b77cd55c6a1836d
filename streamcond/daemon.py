"""``streamcond run``: the live daemon — wiring, not logic.

serial port ─► reader thread: LineFramer ─► LineParser ─► Pipeline   (streamcond.liveinput)
           ─► emitter thread: events file, spool (records + channel state)  (streamcond.emitter)
           ─► event loop: Publisher (spool → MQTT), signals, health, metrics, watchdog

* Everything that decides what an event is lives in the pure core (:mod:`streamcond.core`).
  The serial reader's thread frames, parses and conditions each read where it was read, so a
  quiet stretch costs no event-loop wake-up; rows are held back while no edge can be pending
  in them (the block scheduler of :mod:`streamcond.liveinput`). The records do not depend on
  the blocking (chunk invariance).
* Before a record is handed to MQTT it is committed to the SQLite spool, in the same
  transaction as the channels' ``seq`` and levels, so neither a broker outage nor a SIGKILL
  loses an edge or breaks the numbering. The commit happens in its own thread, never on the
  reader or on the event loop.
* Signals: SIGHUP reloads the config (a config that fails validation is rejected with one log
  line and the old one keeps running). A reload never stops the reading and conditioning of
  samples: a new MQTT connection is made in the background (the records wait in the spool),
  and a further SIGHUP meanwhile is applied at once. SIGTERM/SIGINT stop reading, flush the
  spool as far as the broker allows within ``STOP_FLUSH_S``, publish ``offline`` and exit 0.
* A vanished device is a ``fault`` record, a returned one a ``gap`` record; the daemon never
  exits for that.
* Health (:mod:`streamcond.health`): a retained record on ``<prefix>/health`` every
  ``health_interval_s``, optional Prometheus metrics (:mod:`streamcond.metrics`), "still
  disconnected" in the log at a steady pace while the broker is away, and the systemd watchdog
  fed only while every part of the pipeline makes progress.
"""

from __future__ import annotations

import asyncio
import logging
import math
import signal
import time
from pathlib import Path
from typing import Any

from .config import Config, load_config
from .emitter import Emitter
from .errors import ConfigError, InputError, StreamcondError
from .health import HealthRecorder, ProgressWatch, Snapshot, oldest_age_s, process_cpu_s, process_rss_bytes
from .liveinput import LiveInput
from .ratelimit import RateLimitedLog
from .io.eventlog import from_config as events_writer
from .sdnotify import Notifier
from .validate import validate

log = logging.getLogger("streamcond.daemon")

#: How long a clean stop may spend delivering the spool's backlog.
STOP_FLUSH_S = 5.0
#: How long a reload lets the old MQTT connection deliver before the new one starts (what is
#: not delivered stays in the spool and goes out on the new connection).
RELOAD_FLUSH_S = 1.0
#: The reader hands a read over at most this often while bytes keep coming (bounds the
#: per-read overhead at a kilohertz of lines; a line is never held longer than this).
COALESCE_S = 0.004
#: The serial read's timeout: how often a quiet reader turns to update its heartbeat (the
#: watchdog's sign of life, far inside health.STALL_S). A stop does not wait for it (the read
#: is cancelled), data does not wait for it (the read returns with the first byte).
READ_TIMEOUT_S = 1.0
#: Period of the housekeeping tick (held rows, health, watchdog, the disconnected log).
TICK_S = 1.0


def store_path(cfg: Config) -> Path:
    """Where the spool and the channel state live (one SQLite file)."""
    return cfg.output.store_path


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
        self.started = time.monotonic()
        self.stop_event = asyncio.Event()
        self.reload_event = asyncio.Event()
        self.reloads = 0
        self.rejected_reloads = 0
        self.spool: Any = None
        self.emitter: Emitter | None = None
        self.live: LiveInput | None = None
        self.publisher: Any = None
        self.publisher_task: asyncio.Task | None = None
        self._publisher_dirty = False
        self._switch_task: asyncio.Task | None = None
        self._reconnects_before = 0  # of publishers replaced by reloads
        self.source: Any = None
        self.source_task: asyncio.Task | None = None
        self.fatal: BaseException | None = None
        self.metrics: Any = None
        self.health = HealthRecorder()
        self._next_health = 0.0
        self._oldest_age: float | None = None
        self._was_connected = False
        self._disconnected_since: float | None = None
        # While the broker is away, the log gets "still disconnected, N queued" once per
        # health interval: the line stands in for the health record that cannot be sent.
        self._disconnected_log = RateLimitedLog(log, 30.0, first=0)

    # -- set-up -------------------------------------------------------------------------------
    def _open_outputs(self) -> None:
        from .io.spool import Spool, spool_options

        path = store_path(self.cfg)
        mq = self.cfg.output.mqtt
        try:
            self.spool = Spool(path, **spool_options(mq)) if mq else Spool(path)
        except Exception as e:  # a corrupt or unwritable file: a plain sentence, exit 2
            raise InputError(f"The spool/state file {str(path)!r} cannot be used: {e}") from None
        saved = self.spool.load_state()
        writer = events_writer(self.cfg.output, inputs=self._own_files(self.cfg))
        self.emitter = Emitter(self.spool, writer, self._mqtt_target(self.cfg), None)
        self.live = LiveInput(self.cfg, saved)

    def _own_files(self, cfg: Config) -> list[tuple[str, Path]]:
        """The files the events writer (and its rotation) must never write over."""
        return [("config", self.config_path), ("spool/state file", store_path(self.cfg)),
                ("spool/state file", store_path(cfg))]

    @staticmethod
    def _mqtt_target(cfg: Config) -> tuple[str, int] | None:
        return (cfg.topic_prefix, cfg.output.mqtt.qos) if cfg.output.mqtt is not None else None

    def _start_publisher(self) -> None:
        assert self.emitter is not None
        if self.cfg.output.mqtt is None:
            self.publisher = None
            self.emitter.wake = None
            return
        from .io.mqtt import Publisher

        loop = asyncio.get_running_loop()
        self.publisher = Publisher(self.cfg.output.mqtt, self.cfg.topic_prefix, self.spool)
        self.publisher_stop = asyncio.Event()
        self.publisher_task = asyncio.create_task(self.publisher.run(self.publisher_stop))
        offer = self.publisher.offer

        def wake(first_id: int | None, items: list) -> None:  # from the emitter thread
            try:
                loop.call_soon_threadsafe(offer, first_id, items)
            except RuntimeError:  # the loop has closed: nothing to wake
                pass

        self.emitter.wake = wake
        if len(self.spool):
            self.publisher.notify()

    def _start_source(self) -> None:
        from .io.serialsource import Lost, SerialSource

        loop = asyncio.get_running_loop()
        live, emitter, port = self.live, self.emitter, self.cfg.source.port
        assert live is not None and emitter is not None

        def sink(ev: Any) -> None:  # in the reader thread
            if self.fatal is not None:
                return
            try:
                emitter.put(live.feed(ev))
            except StreamcondError as e:  # e.g. settings impossible at the measured rate
                self.fatal = e
                loop.call_soon_threadsafe(self.stop_event.set)
                return
            if isinstance(ev, Lost):
                self.notifier.status(f"waiting for {port}")
            elif type(ev).__name__ == "Back":
                self.notifier.status(f"reading {port}")

        self.source = SerialSource(self.cfg.source, coalesce_s=COALESCE_S, read_timeout_s=READ_TIMEOUT_S,
                                   sink=sink)
        self.source_task = asyncio.create_task(self._read_source(self.source))

    async def _read_source(self, source: Any) -> None:
        try:
            async for _ in source.events():  # ends at stop; the sink gets the events
                pass
        except Exception as e:  # the reader thread failed: stop with its error
            self.fatal = e
            self.stop_event.set()

    # -- the main loop --------------------------------------------------------------------------
    async def run(self) -> int:
        loop = asyncio.get_running_loop()
        for sig, ev in ((signal.SIGTERM, self.stop_event), (signal.SIGINT, self.stop_event),
                        (signal.SIGHUP, self.reload_event)):
            try:
                loop.add_signal_handler(sig, ev.set)
            except (NotImplementedError, RuntimeError):  # pragma: no cover - not on this OS
                pass
        self._open_outputs()
        watch = ProgressWatch({
            "serial reader": lambda now: now - self.source.heartbeat if self.source else 0.0,
            "spool writer": lambda now: self.emitter.stalled_for(now) if self.emitter else 0.0,
        })
        try:
            self._start_metrics()
            self._start_publisher()
            self._start_source()
            self.notifier.ready(f"reading {self.cfg.source.port}")
            log.info("started: reading %s, %d channel(s)%s", self.cfg.source.port, len(self.cfg.channel),
                     f", publishing to {self.cfg.output.mqtt.host}:{self.cfg.output.mqtt.port}"
                     if self.cfg.output.mqtt else "")
            next_ping = 0.0
            tick = min(TICK_S, self.notifier.watchdog_s / 4) if self.notifier.watchdog_s else TICK_S
            while not self.stop_event.is_set():
                waits = [asyncio.ensure_future(self.stop_event.wait()),
                         asyncio.ensure_future(self.reload_event.wait())]
                await asyncio.wait(waits, timeout=tick, return_when=asyncio.FIRST_COMPLETED)
                for w in waits:
                    w.cancel()
                if self.stop_event.is_set():
                    break
                if self.reload_event.is_set():
                    self.reload_event.clear()
                    await self._reload()
                now = time.monotonic()
                self.emitter.put(self.live.flush_stale(time.time()))  # type: ignore[union-attr]
                await self._housekeeping(now)
                if self.notifier.watchdog_s and now >= next_ping:
                    stalled = watch.stalled()
                    if stalled:
                        log.error("no progress in the %s; the watchdog is not fed", " and the ".join(stalled))
                    else:
                        self.notifier.watchdog()
                        next_ping = now + self.notifier.watchdog_s / 2  # sd_notify(3): half
        finally:
            await self._shutdown()
        if self.fatal is not None:
            raise self.fatal
        return 0

    # -- health ----------------------------------------------------------------------------------
    def snapshot(self) -> Snapshot:
        """The counters now (any thread; no locks taken but the pipeline's briefly)."""
        live, pub = self.live, self.publisher
        c = live.counters if live is not None else None
        last_t = c.last_t if c is not None and math.isfinite(c.last_t) else None
        age = time.time() - c.last_rx if c is not None and math.isfinite(c.last_rx) else None
        return Snapshot(
            t=last_t,
            uptime_s=time.monotonic() - self.started,
            rows=c.rows if c else 0,
            bad_lines=c.bad_lines if c else 0,
            long_lines=c.long_lines if c else 0,
            edges=live.edges_by_channel() if live is not None else {},
            spool_depth=len(self.spool) if self.spool is not None else 0,
            spool_oldest_age_s=self._oldest_age,
            dropped=self.spool.dropped if self.spool is not None else 0,
            reconnects=self._reconnects_before + (pub.reconnects if pub is not None else 0),
            broker_connected=bool(pub is not None and pub.counters.connected),
            last_sample_age_s=age,
            cpu_s=process_cpu_s(),
            rss_bytes=process_rss_bytes(),
        )

    async def _refresh_oldest_age(self) -> None:
        if self.spool is None or not len(self.spool):
            self._oldest_age = None
            return
        try:
            items = await asyncio.to_thread(self.spool.peek, 1)
        except Exception:  # the spool reports its own troubles; health just does not know
            self._oldest_age = None
            return
        c = self.live.counters if self.live is not None else None
        t_now = None
        if c is not None and math.isfinite(c.last_t):
            t_now = c.last_t + (time.time() - c.last_rx if math.isfinite(c.last_rx) else 0.0)
        self._oldest_age = oldest_age_s(items[0].payload if items else None, t_now)

    async def _housekeeping(self, now: float) -> None:
        mq = self.cfg.output.mqtt
        pub = self.publisher
        if mq is None or pub is None:
            return
        connected = bool(pub.counters.connected)
        if not connected:
            if self._disconnected_since is None:
                self._disconnected_since = now
                self._disconnected_log.interval_s = mq.health_interval_s
                self._disconnected_log.start()  # the first line after a full interval
            self._disconnected_log.log(logging.WARNING, "MQTT broker %s:%d still disconnected, %d queued",
                                       mq.host, mq.port, len(self.spool))
        elif self._disconnected_since is not None:
            self._disconnected_since = None
            self._disconnected_log.reset()
        due = now >= self._next_health or (connected and not self._was_connected)
        self._was_connected = connected
        if due and connected:
            # Only while connected: a health record is "now", one stored during an outage
            # would be stale on arrival (and would take spool room from the edges).
            self._next_health = now + mq.health_interval_s
            await self._refresh_oldest_age()
            self._publish_health()

    def _publish_health(self) -> None:
        from .records import to_json

        rec = self.health.record(self.snapshot())
        mq = self.cfg.output.mqtt
        assert mq is not None and self.emitter is not None
        item = (f"{self.cfg.topic_prefix}/health", to_json(rec).encode(), mq.qos, True, "health")
        self.emitter.put_messages([item])

    def _start_metrics(self) -> None:
        if self.cfg.metrics.listen:
            from .metrics import MetricsServer

            def snap() -> Snapshot:
                return self.snapshot()

            self.metrics = MetricsServer(self.cfg.metrics.listen, snap)

    # -- reload and stop ---------------------------------------------------------------------------
    async def _reload(self) -> None:
        assert self.live is not None and self.emitter is not None
        try:
            new = load_config(self.config_path)
            running = self.live.pipeline if self.live is not None else None
            validate(new, running.sample_rate_hz if running is not None else None)
            if new.source.kind != "serial":
                raise ConfigError("source.kind must stay \"serial\" for a running daemon")
            if new.metrics != self.cfg.metrics:
                log.warning("a change of [metrics] takes effect at the next restart")
            # the new events file is opened (and so checked) before anything is switched over
            writer = events_writer(new.output, inputs=self._own_files(new)) if (
                (new.output.events, new.output.rotate) != (self.cfg.output.events, self.cfg.output.rotate)
            ) else None
            same_source = new.source == self.cfg.source
            if same_source:
                try:
                    pipeline = self.live.prepare(new)
                except StreamcondError:
                    if writer is not None:
                        writer.abort()
                    raise
                self.emitter.put(self.live.reconfigure(new, pipeline))
        except StreamcondError as e:
            self.rejected_reloads += 1
            log.error("config reload rejected, the old config keeps running: %s", " ".join(e.messages))
            return
        old, self.cfg = self.cfg, new
        self.reloads += 1
        if not same_source:
            # a different port or line format: reopen and start parsing afresh (the channels'
            # numbering and levels are kept through the snapshot)
            await self._stop_source()
            self.emitter.put(self.live.flush())
            self.live = LiveInput(new, self.live.snapshot())
            self._start_source()
        if writer is not None:
            self.emitter.swap_writer(writer)
        self.emitter.mqtt = self._mqtt_target(new)
        if new.output.mqtt != old.output.mqtt or new.topic_prefix != old.topic_prefix:
            if (new.output.mqtt and old.output.mqtt and new.output.mqtt.spool_path != old.output.mqtt.spool_path) or (
                (new.output.mqtt is None) != (old.output.mqtt is None)
            ):
                log.warning("a new spool/state path takes effect at the next restart")
            # In the background: conditioning goes on, a further SIGHUP is applied at once,
            # and the publisher converges to the newest config.
            self._publisher_dirty = True
            if self._switch_task is None or self._switch_task.done():
                self._switch_task = asyncio.create_task(self._switch_publisher())
        log.info("config reloaded from %s", self.config_path)

    async def _switch_publisher(self) -> None:
        while self._publisher_dirty:
            self._publisher_dirty = False
            await self._stop_publisher(flush_s=RELOAD_FLUSH_S)
            if self.stop_event.is_set():
                return
            self._start_publisher()

    async def _stop_source(self) -> None:
        if self.source is not None:
            await asyncio.to_thread(self.source.stop)
        if self.source_task is not None:
            try:
                await asyncio.wait_for(self.source_task, 2.0)
            except (asyncio.TimeoutError, asyncio.CancelledError):
                self.source_task.cancel()
        self.source_task = None

    async def _stop_publisher(self, flush_s: float) -> None:
        pub = self.publisher
        if pub is None:
            return
        if self.emitter is not None:
            self.emitter.wake = None
        self.publisher = None
        self._reconnects_before += pub.reconnects
        task = self.publisher_task
        try:
            await pub.shutdown(flush_s)
        except Exception as e:  # pragma: no cover - never fatal on the way out
            log.warning("MQTT shutdown: %s", e)
        self.publisher_stop.set()
        if task is not None:
            try:
                await asyncio.wait_for(task, 2.0)
            except (asyncio.TimeoutError, asyncio.CancelledError):
                task.cancel()
            except Exception as e:  # pragma: no cover
                log.warning("MQTT publisher ended with an error: %s", e)

    async def _shutdown(self) -> None:
        self.notifier.stopping()
        await self._stop_source()
        if self._switch_task is not None and not self._switch_task.done():
            try:
                await asyncio.wait_for(self._switch_task, RELOAD_FLUSH_S + 4.0)
            except (asyncio.TimeoutError, asyncio.CancelledError):
                self._switch_task.cancel()
        if self.emitter is not None:
            if self.live is not None and self.fatal is None:
                # what had arrived before the stop, and the last, partial stats window
                self.emitter.put(self.live.flush(final=True))
            await asyncio.to_thread(self.emitter.close)
        await self._stop_publisher(flush_s=STOP_FLUSH_S)
        if self.metrics is not None:
            self.metrics.close()
        if self.emitter is not None:
            self.emitter.close_writer()
        if self.spool is not None:
            left = len(self.spool)
            self.spool.close()
            if left:
                log.warning("%d record(s) left in the spool; they are sent after the next start", left)
        c = self.live.counters if self.live is not None else None
        if c is not None:
            log.info("stopped: %d rows, %d bad lines, %d over-long lines, %d records, %d reloads "
                     "(%d rejected)", c.rows, c.bad_lines, c.long_lines, c.records, self.reloads,
                     self.rejected_reloads)


def run(config_path: str | Path) -> int:
    """Entry point of ``streamcond run`` (exit code)."""
    daemon = Daemon(config_path)
    return asyncio.run(daemon.run())
