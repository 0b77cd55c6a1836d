"""``streamcond demo``: the live daemon on an embedded default — no hardware, no broker to install.

What runs, all on this machine and on the loopback interface only:

* a **simulated device**: a pseudo-terminal whose device side is fed the demo recording
  (``replay_data/orchard_pump.csv``, the orchard pump station) line by line in real time (or
  ``--speed`` times faster), starting over with a continuing clock when it ends;
* an **embedded MQTT broker**: the pure-Python ``amqtt`` broker (the optional extra ``demo``)
  in a thread of this process, on a free port of 127.0.0.1;
* the **daemon** (``streamcond run``) as a subprocess, with the demo config pointed at the
  pseudo-terminal and the broker (spool and state in a temporary directory);
* the **live view** (``streamcond watch``) of what the daemon publishes.

It ends after ``--duration`` seconds or at Ctrl-C, stops the daemon cleanly (SIGTERM), and
prints where the events went and the daemon's closing line.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import logging
import os
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import tty
from pathlib import Path
from typing import Any

from .errors import InputError

ROOT = Path(__file__).resolve().parent.parent
RECORDING = ROOT / "replay_data" / "orchard_pump.csv"
CONFIG = ROOT / "config" / "orchard_pump.toml"
#: How long the daemon may take to start and to stop.
START_TIMEOUT_S: float = 20.0
STOP_TIMEOUT_S: float = 15.0


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Device:
    """The simulated device: a pseudo-terminal pair, the daemon opening ``path`` (a symlink to
    the slave side), a thread writing the recording's lines into the master side at the pace of
    their own clock (``t_ms``) divided by ``speed``."""

    def __init__(self, path: Path, recording: Path, speed: float = 1.0) -> None:
        self.path = path
        self.master, self.slave = os.openpty()
        tty.setraw(self.master)
        tty.setraw(self.slave)
        path.symlink_to(os.ttyname(self.slave))
        raw = recording.read_bytes().split(b"\n")
        self.header = raw[0].decode().strip().split(",")
        self.rows = [ln for ln in raw[1:] if ln.strip()]
        self.speed = speed
        self.lines_written = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="demo device", daemon=True)

    def start(self) -> "Device":
        self._thread.start()
        return self

    def _run(self) -> None:
        import select

        first = float(self.rows[0].split(b",", 1)[0])
        last = float(self.rows[-1].split(b",", 1)[0])
        step = (last - first) / max(len(self.rows) - 1, 1)
        loop_ms = last - first + step  # the clock goes on across a restart of the recording
        t0 = time.monotonic()
        k = 0
        while not self._stop.is_set():
            rnd, i = divmod(k, len(self.rows))
            t_str, rest = self.rows[i].split(b",", 1)
            t_ms = float(t_str) + rnd * loop_ms
            due = t0 + (t_ms - first) / 1000.0 / self.speed
            wait = due - time.monotonic()
            if wait > 0:
                self._stop.wait(min(wait, 0.5))
                if wait > 0.5:
                    continue
            line = b"%d,%s\n" % (round(t_ms), rest)
            try:
                _, w, _ = select.select([], [self.master], [], 0.5)
                if w:
                    os.write(self.master, line)
            except OSError:
                return
            self.lines_written += 1
            k += 1

    def close(self) -> None:
        self._stop.set()
        self._thread.join(2.0)
        for fd in (self.master, self.slave):
            with contextlib.suppress(OSError):
                os.close(fd)


class EmbeddedBroker:
    """The amqtt broker in a thread with its own event loop, on 127.0.0.1:``port``."""

    def __init__(self, port: int) -> None:
        self.port = port
        self._loop: asyncio.AbstractEventLoop | None = None
        self._ready = threading.Event()
        self._error: BaseException | None = None
        self._stop: asyncio.Event | None = None
        self._thread = threading.Thread(target=self._run, name="demo broker", daemon=True)

    def start(self, timeout: float = 10.0) -> "EmbeddedBroker":
        self._thread.start()
        if not self._ready.wait(timeout):
            raise InputError("The embedded MQTT broker did not start")
        if self._error is not None:
            raise InputError(f"The embedded MQTT broker did not start: {self._error}")
        return self

    def _run(self) -> None:
        try:
            from amqtt.broker import Broker
        except ImportError as e:
            self._error = e
            self._ready.set()
            return
        for name in ("amqtt", "transitions"):
            logging.getLogger(name).setLevel(logging.ERROR)
        config = {
            "listeners": {"default": {"type": "tcp", "bind": f"127.0.0.1:{self.port}"}},
            "plugins": {"amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": True}},
        }

        async def main() -> None:
            self._stop = asyncio.Event()
            self._loop = asyncio.get_running_loop()
            broker = Broker(config)
            try:
                await broker.start()
            except BaseException as e:  # reported by start()
                self._error = e
                self._ready.set()
                return
            self._ready.set()
            await self._stop.wait()
            with contextlib.suppress(Exception):
                await broker.shutdown()

        asyncio.run(main())

    def close(self) -> None:
        if self._loop is not None and self._stop is not None:
            with contextlib.suppress(RuntimeError):
                self._loop.call_soon_threadsafe(self._stop.set)
        self._thread.join(5.0)


def demo_config(work: Path, port_path: Path, broker_port: int, header: list[str]) -> Path:
    """The demo config, pointed at the simulated device and the embedded broker (tomlkit keeps
    its comments, so the file reads as the demo config does)."""
    import tomlkit

    doc = tomlkit.parse(CONFIG.read_text(encoding="utf-8"))
    src = doc["source"]
    src["kind"] = "serial"
    src["port"] = str(port_path)
    if "path" in src:
        del src["path"]
    # the device starts mid-stream, without its header line: name the columns
    src["columns"] = header
    out = doc.setdefault("output", tomlkit.table())
    out["events"] = str(work / "events.jsonl")
    out["state_path"] = str(work / "state.sqlite")
    mqtt = tomlkit.table()
    mqtt["host"] = "127.0.0.1"
    mqtt["port"] = broker_port
    mqtt["spool_path"] = str(work / "spool.sqlite")
    out["mqtt"] = mqtt
    path = work / "demo.toml"
    path.write_text(tomlkit.dumps(doc), encoding="utf-8")
    return path


def _wait_started(proc: subprocess.Popen, log: Path, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            tail = log.read_text(errors="replace")[-1500:] if log.exists() else ""
            raise InputError(f"The demo daemon stopped at once (exit {proc.returncode}): {tail}")
        if log.exists() and "started:" in log.read_text(errors="replace"):
            return
        time.sleep(0.05)
    raise InputError("The demo daemon did not start in time")


def main(args: argparse.Namespace) -> int:
    if not RECORDING.is_file() or not CONFIG.is_file():
        raise InputError(
            f"streamcond demo needs the demo recording and config of the source tree "
            f"({RECORDING} and {CONFIG}); run it from a checkout of the project"
        )
    try:
        import amqtt  # noqa: F401
    except ImportError:
        raise InputError(
            "streamcond demo needs the embedded broker amqtt: pip install 'streamcond[demo]'"
        ) from None
    from .config import load_config
    from .watch.command import watch

    speed = float(getattr(args, "speed", None) or 1.0)
    with tempfile.TemporaryDirectory(prefix="streamcond-demo-") as tmp:
        work = Path(tmp)
        device = Device(work / "ttyDEMO", RECORDING, speed)
        broker = EmbeddedBroker(free_port())
        daemon: subprocess.Popen[bytes] | None = None
        log = work / "daemon.log"
        logfh: Any = None
        try:
            broker.start()
            cfg_path = demo_config(work, device.path, broker.port, device.header)
            cfg = load_config(cfg_path)
            print(
                f"demo: the orchard pump station on a simulated device ({device.path}), the "
                f"daemon publishing to an embedded broker on 127.0.0.1:{broker.port}"
                + (f", the recording played {speed:g}× faster" if speed != 1.0 else "")
                + (f", for {args.duration:g} s" if args.duration else "; Ctrl-C ends it")
                + ".",
                file=sys.stderr, flush=True,
            )
            logfh = open(log, "ab")
            env = dict(os.environ)
            env.pop("NOTIFY_SOCKET", None)
            daemon = subprocess.Popen(
                [sys.executable, "-m", "streamcond", "run", "-c", str(cfg_path)],
                stdout=logfh, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env,
            )
            _wait_started(daemon, log, START_TIMEOUT_S)
            device.start()
            try:
                asyncio.run(watch(cfg, port=False, duration=args.duration,
                                  interval=getattr(args, "interval", None),
                                  force_plain=getattr(args, "plain", False)))
            except KeyboardInterrupt:
                pass
        finally:
            rc = None
            if daemon is not None and daemon.poll() is None:
                daemon.send_signal(signal.SIGTERM)
                try:
                    rc = daemon.wait(STOP_TIMEOUT_S)
                except subprocess.TimeoutExpired:
                    daemon.kill()
                    rc = daemon.wait(5)
            device.close()
            broker.close()
            if logfh is not None:
                logfh.close()
            closing = [ln for ln in (log.read_text(errors="replace").splitlines() if log.exists() else [])
                       if "stopped:" in ln]
            events = work / "events.jsonl"
            n = sum(1 for _ in open(events, "rb")) if events.exists() else 0
            print(
                f"demo ended: the device sent {device.lines_written:,} lines; the daemon wrote "
                f"{n:,} records"
                + (f" and exited with {rc}" if rc is not None else "")
                + (f" ({closing[-1].split('INFO: ', 1)[-1]})" if closing else "")
                + ".",
                file=sys.stderr,
            )
    return 0
