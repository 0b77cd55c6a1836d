"""The ``watch`` command: a feed, the model, and a view refreshed until the time is up or
Ctrl-C."""

from __future__ import annotations

import argparse
import asyncio
import sys
import time
from typing import Any, TextIO

from ..config import Config, load_config
from ..errors import ConfigError
from .model import WatchModel
from .render import plain, rich_view

#: Refreshes per second on a terminal.
LIVE_REFRESH_HZ: float = 2.0
#: Seconds between two text blocks when the output is not a terminal.
PLAIN_INTERVAL_S: float = 2.0


def _clock() -> str:
    return time.strftime("%H:%M:%S")


async def watch(
    cfg: Config,
    *,
    port: bool,
    duration: float | None,
    interval: float | None = None,
    out: TextIO | None = None,
    force_plain: bool = False,
) -> int:
    """Run the view; returns the exit code (0)."""
    from .feeds import mqtt_feed, port_feed

    out = out or sys.stdout
    model = WatchModel(cfg, "port" if port else "mqtt")
    feed = asyncio.create_task(port_feed(cfg, model) if port else mqtt_feed(cfg, model))
    deadline = None if duration is None else time.monotonic() + duration
    terminal = (not force_plain) and out.isatty()

    def feed_failed() -> str | None:
        if feed.done() and not feed.cancelled() and feed.exception() is not None:
            e = feed.exception()
            msgs = getattr(e, "messages", None)
            return " ".join(msgs) if msgs else str(e)
        return None

    try:
        if terminal:
            from rich.console import Console
            from rich.live import Live

            console = Console(file=out)
            with Live(rich_view(model.snapshot(time.time()), _clock()), console=console,
                      refresh_per_second=LIVE_REFRESH_HZ, auto_refresh=False) as live:
                while deadline is None or time.monotonic() < deadline:
                    err = feed_failed()
                    if err:
                        model.notes.append(err)
                    live.update(rich_view(model.snapshot(time.time()), _clock()), refresh=True)
                    if err:
                        break
                    await asyncio.sleep(1.0 / LIVE_REFRESH_HZ)
        else:
            step = interval or PLAIN_INTERVAL_S
            while True:
                err = feed_failed()
                if err:
                    model.notes.append(err)
                out.write(plain(model.snapshot(time.time()), _clock()) + "\n")
                out.flush()
                if err:
                    break
                if deadline is not None and time.monotonic() >= deadline:
                    break
                wait = step if deadline is None else min(step, max(0.0, deadline - time.monotonic()))
                await asyncio.sleep(wait)
    finally:
        feed.cancel()
        try:
            await feed
        except BaseException:
            pass
    return 0


def main(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    if args.port:
        if cfg.source.kind != "serial" or not cfg.source.port:
            raise ConfigError('watch --port reads the serial port: set source.kind = "serial" '
                              "and source.port")
    elif cfg.output.mqtt is None:
        raise ConfigError(
            "watch reads what the daemon publishes, and the config has no [output.mqtt]; "
            "use watch --port to run the pipeline on the port here"
        )
    try:
        return asyncio.run(watch(cfg, port=args.port, duration=args.duration,
                                 interval=args.interval, force_plain=args.plain))
    except KeyboardInterrupt:
        return 0


__all__: list[Any] = ["main", "watch"]
