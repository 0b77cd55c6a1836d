"""``tune --port-seconds N``: N seconds of the config's serial port, as a capture to tune from.

The lines are read with the daemon's own serial source and line framer and written as a
capture (:mod:`streamcond.io.capture`: host receive time + raw line), which ``tune`` then reads
exactly as it reads a capture made by ``streamcond record`` — so tuning from the port and
replaying a capture give the same numbers for the same lines.
"""

from __future__ import annotations

import asyncio
import os
import sys
import time
from pathlib import Path

from ..config import Config
from ..errors import ConfigError, InputError


def port_problem(port: str) -> str | None:
    """A plain sentence when ``port`` (a device path) is missing or not readable, else None.
    pyserial URLs (``socket://``, ``rfc2217://``, ``loop://``) are not checked here."""
    if "://" in port:
        return None
    if not os.path.exists(port):
        return f"The serial port {port!r} does not exist (is the device plugged in?)"
    if not os.access(port, os.R_OK | os.W_OK):
        return (
            f"The serial port {port!r} exists but this user may not open it; add the user to "
            f"the group that owns it (usually dialout: sudo usermod -aG dialout $USER, then "
            f"log in again)"
        )
    return None


async def read_lines(cfg: Config, seconds: float) -> tuple[list[bytes], list[float], int]:
    """Lines (with host receive times) read from the config's port for ``seconds``, and the
    count of over-long lines dropped."""
    import numpy as np

    from ..io.serialsource import Back, Data, LineFramer, Lost, SerialSource

    framer = LineFramer(cfg.source.max_line_bytes, resync=True)
    source = SerialSource(cfg.source)
    lines: list[bytes] = []
    times: list[float] = []
    dropped = 0

    async def pump() -> None:
        nonlocal dropped
        async for ev in source.events():
            if isinstance(ev, Data):
                ls, ts, d = framer.feed(ev.data, ev.t_host)
                dropped += d
                lines.extend(ls)
                times.extend(np.asarray(ts).tolist())
            elif isinstance(ev, (Lost, Back)):
                framer.reset()

    task = asyncio.create_task(pump())
    try:
        await asyncio.sleep(seconds)
    finally:
        source.stop()
        try:
            await asyncio.wait_for(task, 2.0)
        except (asyncio.TimeoutError, asyncio.CancelledError):
            task.cancel()
    return lines, times, dropped


def capture_port(cfg: Config, seconds: float, path: Path, progress: bool = True) -> Path:
    """Read the port for ``seconds`` into the capture file ``path``; raises a plain sentence
    when the port cannot be used or nothing arrived."""
    import numpy as np

    from ..io.capture import CaptureWriter

    src = cfg.source
    if src.kind != "serial" or not src.port:
        raise ConfigError(
            'tune --port-seconds reads the serial port: set source.kind = "serial" and '
            "source.port in the config (or give a RECORDING instead)"
        )
    problem = port_problem(src.port)
    if problem:
        raise InputError(problem)
    if progress:
        print(f"reading {src.port} for {seconds:g} s …", file=sys.stderr, flush=True)
    t0 = time.monotonic()
    lines, times, dropped = asyncio.run(read_lines(cfg, seconds))
    if not lines:
        raise InputError(
            f"No complete line arrived from {src.port!r} in {seconds:g} s: check the wiring, "
            f"the baud rate (source.baud = {src.baud}) and that the device is sending"
        )
    w = CaptureWriter(path)
    w.write(lines, np.asarray(times, dtype=np.float64))
    w.close()
    if progress:
        extra = f"; {dropped} over-long lines dropped" if dropped else ""
        print(f"read {len(lines):,} lines in {time.monotonic() - t0:.1f} s{extra}.",
              file=sys.stderr, flush=True)
    return path
