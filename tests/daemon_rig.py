"""Real parts for the daemon tests: a pseudo-terminal as the serial device, a loopback TCP relay
that can cut the link to the broker, a signal writer, and the daemon as a subprocess."""

from __future__ import annotations

import contextlib
import json
import os
import select
import signal
import socket
import subprocess
import sys
import threading
import time
import tty
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent


class Pty:
    """A pseudo-terminal pair; the daemon opens ``path``, a symlink to the slave, so a test can
    "unplug" the device (close the pair) and "plug in" a new one at the same path."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.master = -1
        self.slave = -1
        self.plug()

    def plug(self) -> None:
        self.master, self.slave = os.openpty()
        tty.setraw(self.master)
        tty.setraw(self.slave)
        tmp = self.path.with_suffix(".tmp")
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        tmp.symlink_to(os.ttyname(self.slave))
        os.replace(tmp, self.path)

    def unplug(self) -> None:
        for fd in (self.master, self.slave):
            with contextlib.suppress(OSError):
                os.close(fd)
        self.master = self.slave = -1

    def write(self, data: bytes) -> None:
        view = memoryview(data)
        while view:
            _, w, _ = select.select([], [self.master], [], 1.0)
            if not w:
                continue
            n = os.write(self.master, view)
            view = view[n:]

    def drain_echo(self) -> None:
        """Discard anything the slave side wrote back (nothing, in raw mode; defensive)."""
        while select.select([self.master], [], [], 0)[0]:
            try:
                os.read(self.master, 65536)
            except OSError:
                return


class Relay:
    """A TCP relay on 127.0.0.1 between the daemon and the broker; ``cut()`` drops every
    connection and refuses new ones until ``resume()`` — a network outage on loopback."""

    def __init__(self, target_port: int) -> None:
        self.target = ("127.0.0.1", target_port)
        s = socket.socket()
        s.bind(("127.0.0.1", 0))
        self.port = s.getsockname()[1]
        s.close()
        self._conns: list[socket.socket] = []
        self._lock = threading.Lock()
        self._listener: socket.socket | None = None
        self._stop = threading.Event()
        self.resume()

    def resume(self) -> None:
        ls = socket.socket()
        ls.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        ls.bind(("127.0.0.1", self.port))
        ls.listen(8)
        ls.settimeout(0.2)
        self._listener = ls
        self._stop.clear()
        threading.Thread(target=self._accept, args=(ls,), daemon=True).start()

    def _accept(self, ls: socket.socket) -> None:
        while not self._stop.is_set():
            try:
                c, _ = ls.accept()
            except (socket.timeout, OSError):
                continue
            try:
                up = socket.create_connection(self.target, timeout=2)
            except OSError:
                c.close()
                continue
            # the connect timeout must not stay on the socket: an idle MQTT link is normal
            up.settimeout(None)
            c.settimeout(None)
            with self._lock:
                self._conns += [c, up]
            threading.Thread(target=self._serve, args=(c, up), daemon=True).start()

    def _serve(self, c: socket.socket, up: socket.socket) -> None:
        # Sockets are only *shut down* by the pumps (which wakes the other pump's recv) and
        # closed here once both pumps are done: closing a socket while another thread is
        # blocked in recv on it lets the fd number be reused by a new connection, whose bytes
        # that thread would then steal.
        pumps = [threading.Thread(target=self._pump, args=(a, b), daemon=True) for a, b in ((c, up), (up, c))]
        for t in pumps:
            t.start()
        for t in pumps:
            t.join()
        for s in (c, up):
            with contextlib.suppress(OSError):
                s.close()
        with self._lock:
            self._conns = [x for x in self._conns if x not in (c, up)]

    @staticmethod
    def _pump(a: socket.socket, b: socket.socket) -> None:
        try:
            while True:
                data = a.recv(65536)
                if not data:
                    break
                b.sendall(data)
        except OSError:
            pass
        finally:
            for s in (a, b):
                with contextlib.suppress(OSError):
                    s.shutdown(socket.SHUT_RDWR)

    def cut(self) -> None:
        self._stop.set()
        if self._listener is not None:
            self._listener.close()
            self._listener = None
        with self._lock:
            conns = list(self._conns)
        for s in conns:  # the serving threads close them
            with contextlib.suppress(OSError):
                s.shutdown(socket.SHUT_RDWR)
        time.sleep(0.2)  # let the accept thread see the stop

    def close(self) -> None:
        self.cut()


class SquareWave:
    """Writes CSV lines ``t_ms,a`` into the pty at a real rate; ``a`` toggles between 0 and 1
    every ``half_period_ms`` of the device's clock, so every toggle is one edge."""

    def __init__(self, pty: Pty, rate_hz: float = 200.0, half_period_ms: int = 100) -> None:
        self.pty = pty
        self.rate = rate_hz
        self.half = half_period_ms
        self.t_ms = 0
        self.step_ms = int(round(1000 / rate_hz))
        self.toggles = 0  # level changes written so far (after the first sample)
        self._last_level: int | None = None

    def level_at(self, t_ms: int) -> int:
        return (t_ms // self.half) % 2

    def run_for(self, seconds: float, extra: bytes = b"") -> None:
        """Write ``seconds`` of samples at the real rate (``extra`` bytes go in half-way)."""
        n = int(seconds * self.rate)
        t0 = time.monotonic()
        for i in range(n):
            lv = self.level_at(self.t_ms)
            if self._last_level is not None and lv != self._last_level:
                self.toggles += 1
            self._last_level = lv
            self.pty.write(b"%d,%d\n" % (self.t_ms, lv))
            self.t_ms += self.step_ms
            if extra and i == n // 2:
                self.pty.write(extra)
            wait = t0 + (i + 1) / self.rate - time.monotonic()
            if wait > 0:
                time.sleep(wait)


def write_config(path: Path, port: Path, mqtt_port: int | None, spool: Path, **over: Any) -> Path:
    band = over.get("band", "{ low = 0.3, high = 0.7 }")
    mqtt = (
        f'\n[output.mqtt]\nhost = "127.0.0.1"\nport = {mqtt_port}\nqos = 1\n'
        f'topic_prefix = "test/station"\nspool_path = "{spool}"\n' + over.get("mqtt_extra", "")
        if mqtt_port is not None else ""
    )
    path.write_text(
        '[station]\nname = "rig"\n'
        f'[source]\nkind = "serial"\nport = "{port}"\nformat = "csv"\n'
        'columns = ["t_ms", "a"]\ntime_column = "t_ms"\ntime_scale = 0.001\nmax_line_bytes = 256\n'
        f'[[channel]]\nname = "a"\nband = {band}\nmeasure = {{ pulses_per_unit = 10.0, quantity_unit = "L" }}\n'
        '[stats]\ninterval_s = 1.0\n'
        f'[output]\nevents = "{over.get("events", "")}"\nstate_path = "{spool}"\n' + mqtt
        + over.get("tail", "")
    )
    return path


class DaemonProcess:
    def __init__(self, config: Path, log: Path, prefix: list[str] | None = None,
                 env: dict[str, str] | None = None, root: Path | None = None) -> None:
        self.config = config
        self.root = root or ROOT  # the checkout whose streamcond runs (benchmarks: another one)
        self.log = log
        # STREAMCOND_TEST_DEBUG=1: the daemon logs at debug level, with times
        self.extra_args = ["-vv"] if os.environ.get("STREAMCOND_TEST_DEBUG") else []
        self.prefix = prefix or []  # e.g. ["-m", "cProfile", "-o", "out.prof"] (benchmarks)
        self.env = env or {}  # e.g. NOTIFY_SOCKET and WATCHDOG_USEC (a service manager's)
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> "DaemonProcess":
        self._fh = open(self.log, "ab")
        self._offset = self._fh.tell()  # wait_log looks only at what this start logged
        env = dict(os.environ, PYTHONUNBUFFERED="1")
        env.pop("NOTIFY_SOCKET", None)
        env.update(self.env)
        self.proc = subprocess.Popen(
            [sys.executable, *self.prefix, "-m", "streamcond", *self.extra_args, "run", "-c", str(self.config)],
            stdout=self._fh, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, cwd=self.root, env=env,
        )
        return self

    def signal(self, sig: int) -> None:
        assert self.proc is not None
        self.proc.send_signal(sig)

    def wait(self, timeout: float) -> int:
        assert self.proc is not None
        rc = self.proc.wait(timeout=timeout)
        self._fh.close()
        return rc

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(timeout=10)
        with contextlib.suppress(Exception):
            self._fh.close()

    def log_text(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""

    def current_log(self) -> str:
        """What the current process has logged so far."""
        if not self.log.exists():
            return ""
        with open(self.log, "rb") as fh:
            fh.seek(getattr(self, "_offset", 0))
            return fh.read().decode(errors="replace")

    def wait_log(self, text: str, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if text in self.current_log():
                return
            if self.proc is not None and self.proc.poll() is not None:
                break
            time.sleep(0.05)
        raise AssertionError(f"{text!r} not in the daemon log:\n{self.log_text()[-3000:]}")


def edge_lines(path: Path) -> int:
    """How many edge records an events file holds."""
    return sum(1 for ln in path.read_text().splitlines() if '"kind":"edge"' in ln)


def edges_of(messages: list[Any], topic: str = "test/station/a/edge") -> list[dict]:
    return [json.loads(m.payload) for m in messages if m.topic == topic]


def seq_report(edges: list[dict]) -> tuple[list[int], int]:
    """(distinct seqs in first-arrival order, duplicates)."""
    seen: list[int] = []
    dup = 0
    have: set[int] = set()
    for e in edges:
        if e["seq"] in have:
            dup += 1
        else:
            have.add(e["seq"])
            seen.append(e["seq"])
    return seen, dup
