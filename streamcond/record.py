"""``streamcond record``: capture the raw serial lines with host receive times.

The capture (:mod:`streamcond.io.capture`) replays through the same parser and core as the
live daemon, so ``streamcond replay CAPTURE -c CONFIG`` gives the events a live run would have
published. Uses the same serial source and line framer as ``run``; a vanished device is waited
for (and noted in the log), never fatal.
"""

from __future__ import annotations

import asyncio
import logging
import signal
import sys
import time

from .config import load_config
from .errors import ConfigError
from .io.capture import CaptureWriter

log = logging.getLogger("streamcond.record")


async def _record(cfg_path: str, out: str, duration: float | None) -> int:
    from .io.serialsource import Back, Data, LineFramer, Lost, SerialSource

    cfg = load_config(cfg_path)
    if cfg.source.kind != "serial" or not cfg.source.port:
        raise ConfigError('streamcond record reads a serial source: set source.kind = "serial" and source.port')
    writer = CaptureWriter(out)
    framer = LineFramer(cfg.source.max_line_bytes, resync=True)
    source = SerialSource(cfg.source)
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            loop.add_signal_handler(sig, stop.set)
        except (NotImplementedError, RuntimeError):  # pragma: no cover
            pass
    if duration is not None:
        loop.call_later(duration, stop.set)
    dropped = 0
    started = time.monotonic()

    async def pump() -> None:
        nonlocal dropped
        last_flush = time.monotonic()
        async for ev in source.events():
            if isinstance(ev, Data):
                lines, times, d = framer.feed(ev.data, ev.t_host)
                dropped += d
                writer.write(lines, times)
                if time.monotonic() - last_flush > 1.0:
                    writer.flush()
                    last_flush = time.monotonic()
            elif isinstance(ev, Lost):
                framer.reset()
                log.warning("device lost (%s); waiting for it to come back", ev.reason)
            elif isinstance(ev, Back):
                framer.reset(t_start=ev.t_host, resync=True)
                log.warning("device back")

    task = asyncio.create_task(pump())
    await stop.wait()
    source.stop()
    try:
        await asyncio.wait_for(task, 2.0)
    except (asyncio.TimeoutError, asyncio.CancelledError):
        task.cancel()
    writer.close()
    print(
        f"captured {writer.lines:,} lines in {time.monotonic() - started:.1f} s to {out}"
        + (f"; {dropped} over-long lines dropped" if dropped else "") + ".",
        file=sys.stderr,
    )
    return 0


def main(args) -> int:
    return asyncio.run(_record(args.config, args.output, args.duration))
