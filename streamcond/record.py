"""``streamcond record``: capture the raw serial lines with host receive times.

The capture (:mod:`streamcond.io.capture`) replays through the same parser and core as the
live daemon, so ``streamcond replay CAPTURE -c CONFIG`` gives the events a live run would have
published. Uses the same serial source and line framer as ``run``; a vanished device is waited
for (and noted in the log), never fatal.
"""

from __future__ import annotations

import asyncio
import logging
import os
import signal
import sys
import time
from pathlib import Path

from .config import load_config
from .errors import ConfigError, InputError
from .io.capture import CaptureWriter, is_capture

log = logging.getLogger("streamcond.record")


def open_writer(out: str, force: bool = False, append: bool = False):
    """The capture writer for ``-o``: Parquet by the ``.parquet`` suffix, else text. An existing
    file is refused unless ``force`` (replace) or ``append`` (text captures only)."""
    p = Path(out)
    parquet = p.suffix.lower() == ".parquet"
    if p.is_dir():
        raise InputError(f"The capture file {out!r} is a directory")
    if append and parquet:
        raise InputError("--append works with text captures only; a Parquet file cannot grow")
    if p.exists() and not (force or append):
        raise InputError(f"The capture file {out!r} exists; add --force to replace it or "
                         "--append to add to it")
    if not p.parent.is_dir():
        raise InputError(f"The folder {str(p.parent)!r} of the capture file does not exist")
    if parquet:
        from .io.columnar import CaptureParquetWriter

        return CaptureParquetWriter(p)
    if append and p.exists() and p.stat().st_size and not is_capture(p):
        raise InputError(f"The file {out!r} is not a capture of `streamcond record`; "
                         "--append adds only to captures")
    return CaptureWriter(p, append=append)


def _port_problem(port: str) -> str | None:
    """A device path that does not exist (pyserial URLs such as socket:// are left to it)."""
    if "://" in port or os.path.exists(port):
        return None
    return f"The serial port {port!r} does not exist (source.port); is the device plugged in?"


async def _record(cfg_path: str, out: str, duration: float | None, force: bool = False,
                  append: bool = False) -> int:
    from .io.serialsource import Back, Data, LineFramer, Lost, SerialSource

    cfg = load_config(cfg_path)
    if cfg.source.kind != "serial" or not cfg.source.port:
        raise ConfigError('streamcond record reads a serial source: set source.kind = "serial" and source.port')
    problem = _port_problem(cfg.source.port)
    if problem:
        raise InputError(problem)
    writer = open_writer(out, force=force, append=append)
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
    if writer.lines == 0:
        print(f"Nothing was received from {cfg.source.port}: check the port, the baud rate "
              "and that the device is sending.", file=sys.stderr)
        return 1
    return 0


def main(args) -> int:
    return asyncio.run(_record(args.config, args.output, args.duration,
                               force=getattr(args, "force", False),
                               append=getattr(args, "append", False)))
