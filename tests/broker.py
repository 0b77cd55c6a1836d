"""Private MQTT brokers, a message collector and a TCP gate for the MQTT tests.

``mqtt_broker`` (a pytest fixture) starts a broker of our own on a free loopback port
(127.0.0.1 only; never the machine's broker on 1883): the ``mosquitto`` binary when it is on
the PATH, and the pure-Python ``amqtt`` broker (a test dependency) — the fixture runs each
test on both, or on the one named by ``STREAMCOND_TEST_BROKER=mosquitto|amqtt``. Both run as
subprocesses so ``stop()`` really takes the broker away (sockets closed by the kernel) and
``start()`` brings it back on the same port.

``Collector`` subscribes from a paho client in its own thread, independent of the event loop
of the code under test, and reconnects and re-subscribes by itself after a broker restart.

``TcpGate`` is a small loopback TCP forwarder placed between the publisher and the broker: it
can refuse new connections for a while (so the collector is re-subscribed before the
publisher reconnects after a broker restart — without it, messages sent in between would be
lost to the collector, a race of the test, not of the publisher) and it can sever the
publisher's connection without an MQTT DISCONNECT, as a crash or a pulled cable does.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import pwd
import shutil
import socket
import subprocess
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator

import paho.mqtt.client as paho
import pytest

LOOPBACK = "127.0.0.1"
ENV_BROKER = "STREAMCOND_TEST_BROKER"


def free_port() -> int:
    """A TCP port free on 127.0.0.1 right now (the OS picks it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


def hold_port(port: int) -> socket.socket:
    """Bind ``127.0.0.1:port`` without listening: connections to it are refused.

    While a server is away its port stays reserved this way, so no other program takes it and
    the kernel never picks it as a client's own source port — on loopback a client retrying
    a port nobody listens on can otherwise end up connected to itself (TCP simultaneous open).
    """
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    s.bind((LOOPBACK, port))
    return s


def _wait_listening(port: int, proc: subprocess.Popen[bytes], log: Path, timeout: float = 15.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(
                f"broker exited with {proc.returncode}: {log.read_text(errors='replace')[-2000:]}"
            )
        try:
            with socket.create_connection((LOOPBACK, port), timeout=0.5):
                return
        except OSError:
            time.sleep(0.05)
    raise RuntimeError(f"broker not listening on {LOOPBACK}:{port} after {timeout} s")


@dataclass(frozen=True)
class Pki:
    """A throw-away certificate authority with a server certificate for 127.0.0.1 and a client
    certificate, made with the ``openssl`` command line tool."""

    ca: Path
    server_cert: Path
    server_key: Path
    client_cert: Path
    client_key: Path


def make_test_pki(d: Path) -> Pki:
    exe = shutil.which("openssl")
    if exe is None:
        pytest.skip("needs the openssl command line tool to make test certificates")
    d.mkdir(parents=True, exist_ok=True)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]

    def run(*args: str) -> None:
        subprocess.run([exe, *args], check=True, capture_output=True, cwd=d)

    run("req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.crt", "-days", "2",
        "-subj", "/CN=orchard-pump test CA",
        "-addext", "basicConstraints=critical,CA:TRUE",
        "-addext", "keyUsage=critical,keyCertSign,cRLSign")
    for name, ext in (
        ("server", "subjectAltName=IP:127.0.0.1\nextendedKeyUsage=serverAuth\n"),
        ("client", "extendedKeyUsage=clientAuth\n"),
    ):
        run("req", *ec, "-keyout", f"{name}.key", "-out", f"{name}.csr", "-subj", f"/CN={name}")
        (d / f"{name}.ext").write_text(ext)
        run("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
            "-CAcreateserial", "-out", f"{name}.crt", "-days", "2", "-extfile", f"{name}.ext")
    return Pki(d / "ca.crt", d / "server.crt", d / "server.key", d / "client.crt", d / "client.key")


class PrivateBroker:
    """A broker subprocess on ``host:port``; ``stop()``/``start()`` keep the port."""

    kind = "?"

    def __init__(
        self,
        workdir: Path,
        *,
        passwords: dict[str, str] | None = None,
        tls: Pki | None = None,
    ) -> None:
        self.host = LOOPBACK
        self.port = free_port()
        self.tls = tls
        #: A second listener speaking TLS (client certificate required), when ``tls`` is given.
        self.tls_port = free_port() if tls is not None else None
        self.workdir = workdir
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.passwords = passwords
        self.log_path = workdir / f"{self.kind}.log"
        self._proc: subprocess.Popen[bytes] | None = None
        self._hold: socket.socket | None = None
        self._prepare()

    def _prepare(self) -> None:  # pragma: no cover - overridden
        raise NotImplementedError

    def _command(self) -> list[str]:  # pragma: no cover - overridden
        raise NotImplementedError

    @property
    def running(self) -> bool:
        return self._proc is not None and self._proc.poll() is None

    def start(self) -> None:
        if self.running:
            return
        if self._hold is not None:
            self._hold.close()
            self._hold = None
        with open(self.log_path, "ab") as logf:
            self._proc = subprocess.Popen(
                self._command(), stdout=logf, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                cwd=self.workdir,
            )
        _wait_listening(self.port, self._proc, self.log_path)

    def stop(self) -> None:
        proc, self._proc = self._proc, None
        if proc is None or proc.poll() is not None:
            return
        proc.terminate()
        try:
            proc.wait(timeout=5)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=5)
        with contextlib.suppress(OSError):
            self._hold = hold_port(self.port)

    def close(self) -> None:
        """Stop for good and release the port."""
        self.stop()
        if self._hold is not None:
            self._hold.close()
            self._hold = None

    def log_text(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""


class MosquittoBroker(PrivateBroker):
    kind = "mosquitto"

    def _prepare(self) -> None:
        lines = [
            f"listener {self.port} {LOOPBACK}",
            "persistence false",
            "log_dest stdout",
            "log_type error",
            "log_type warning",
            "log_type notice",
            # Stay the current user: as root mosquitto would switch to user "mosquitto", who
            # cannot read files in pytest's private temporary directory.
            f"user {pwd.getpwuid(os.getuid()).pw_name}",
        ]
        if self.passwords:
            tool = shutil.which("mosquitto_passwd")
            if tool is None:
                pytest.skip("mosquitto_passwd is not installed")
            pw = self.workdir / "passwd"
            for i, (user, secret) in enumerate(self.passwords.items()):
                args = [tool, "-b"] + (["-c"] if i == 0 else []) + [str(pw), user, secret]
                subprocess.run(args, check=True, capture_output=True)
            os.chmod(pw, 0o600)
            lines += ["allow_anonymous false", f"password_file {pw}"]
        else:
            lines.append("allow_anonymous true")
        if self.tls is not None:
            lines += [
                f"listener {self.tls_port} {LOOPBACK}",
                f"cafile {self.tls.ca}",
                f"certfile {self.tls.server_cert}",
                f"keyfile {self.tls.server_key}",
                "require_certificate true",
            ]
        self.conf = self.workdir / "mosquitto.conf"
        self.conf.write_text("\n".join(lines) + "\n")

    def _command(self) -> list[str]:
        exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
        return [exe, "-c", str(self.conf)]


class AmqttBroker(PrivateBroker):
    kind = "amqtt"

    def _prepare(self) -> None:
        if self.passwords or self.tls:
            pytest.skip("password and TLS tests use mosquitto")
        self.conf = self.workdir / "amqtt.yaml"
        self.conf.write_text(
            "listeners:\n"
            "  default:\n"
            "    type: tcp\n"
            f"    bind: {LOOPBACK}:{self.port}\n"
            "plugins:\n"
            "  amqtt.plugins.authentication.AnonymousAuthPlugin:\n"
            "    allow_anonymous: true\n"
        )

    def _command(self) -> list[str]:
        return [sys.executable, "-m", "amqtt.scripts.broker_script", "-c", str(self.conf)]


BROKERS: dict[str, type[PrivateBroker]] = {"mosquitto": MosquittoBroker, "amqtt": AmqttBroker}


def broker_kinds() -> list[str]:
    """The broker kinds to test with: the env var's choice, else every one available."""
    chosen = os.environ.get(ENV_BROKER)
    if chosen:
        if chosen not in BROKERS:
            raise RuntimeError(f"{ENV_BROKER} must be one of {sorted(BROKERS)}, not {chosen!r}")
        return [chosen]
    kinds = []
    if shutil.which("mosquitto") or os.path.exists("/usr/sbin/mosquitto"):
        kinds.append("mosquitto")
    kinds.append("amqtt")
    return kinds


@contextlib.contextmanager
def private_broker(kind: str, workdir: Path, **kw: Any) -> Iterator[PrivateBroker]:
    b = BROKERS[kind](workdir, **kw)
    try:
        b.start()
        yield b
    finally:
        b.close()


@pytest.fixture(params=broker_kinds())
def mqtt_broker(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[PrivateBroker]:
    """A private broker on a free 127.0.0.1 port, stopped at the end whatever happens."""
    with private_broker(request.param, tmp_path / "broker") as b:
        yield b


# --- collecting messages -------------------------------------------------------------------------


@dataclass(frozen=True)
class Received:
    topic: str
    payload: bytes
    qos: int
    retain: bool


class Collector:
    """Subscribes to ``topics`` from a paho client in its own thread and keeps what arrives.

    Subscribes at QoS 2, so each message arrives at the QoS it was published with (MQTT
    3.1.1 §3.8.4: delivered QoS = min(published, granted)). Reconnects and re-subscribes by
    itself; ``subscriptions`` counts completed SUBACKs so a test can wait for the re-subscribe.
    """

    def __init__(
        self,
        host: str,
        port: int,
        topics: list[str],
        *,
        client_id: str = "",
        username: str | None = None,
        password: str | None = None,
    ) -> None:
        self.host, self.port, self.topics = host, port, list(topics)
        self.messages: list[Received] = []
        self.subscriptions = 0
        self._cond = threading.Condition()
        self._started = False
        self._c = paho.Client(
            paho.CallbackAPIVersion.VERSION2, client_id=client_id, clean_session=True
        )
        self._c.reconnect_delay_set(min_delay=1, max_delay=1)
        if username is not None:
            self._c.username_pw_set(username, password)
        self._c.on_connect = self._on_connect
        self._c.on_subscribe = self._on_subscribe
        self._c.on_message = self._on_message

    def _on_connect(self, client: paho.Client, userdata: Any, flags: Any, rc: Any, props: Any = None) -> None:
        if not rc.is_failure:
            client.subscribe([(t, 2) for t in self.topics])

    def _on_subscribe(self, client: paho.Client, userdata: Any, mid: int, rcs: Any, props: Any = None) -> None:
        with self._cond:
            self.subscriptions += 1
            self._cond.notify_all()

    def _on_message(self, client: paho.Client, userdata: Any, msg: paho.MQTTMessage) -> None:
        with self._cond:
            self.messages.append(Received(msg.topic, bytes(msg.payload), msg.qos, bool(msg.retain)))
            self._cond.notify_all()

    def start(self, timeout: float = 10.0) -> "Collector":
        if self._started:
            return self
        self._started = True
        self._c.connect_async(self.host, self.port, keepalive=10)
        self._c.loop_start()
        self.wait_for(lambda: self.subscriptions >= 1, timeout, "first subscription")
        return self

    def close(self) -> None:
        with contextlib.suppress(Exception):
            self._c.disconnect()
        self._c.loop_stop()

    def __enter__(self) -> "Collector":
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def snapshot(self) -> list[Received]:
        with self._cond:
            return list(self.messages)

    def on(self, topic: str) -> list[Received]:
        return [m for m in self.snapshot() if m.topic == topic]

    def wait_for(self, pred: Callable[[], bool], timeout: float, what: str = "condition") -> None:
        """Block until ``pred()`` holds (checked under the lock at each arrival)."""
        deadline = time.monotonic() + timeout
        with self._cond:
            while not pred():
                left = deadline - time.monotonic()
                if left <= 0:
                    raise AssertionError(
                        f"timed out after {timeout} s waiting for {what}; "
                        f"{len(self.messages)} messages so far"
                    )
                self._cond.wait(min(left, 0.2))

    async def await_for(self, pred: Callable[[], bool], timeout: float, what: str = "condition") -> None:
        """``wait_for`` from a coroutine, without blocking the event loop."""
        await asyncio.to_thread(self.wait_for, pred, timeout, what)


def collect(host: str, port: int, topics: list[str], timeout: float = 10.0) -> Collector:
    """A started :class:`Collector` (use it as a context manager to close it)."""
    return Collector(host, port, topics).start(timeout)


def retained_snapshot(host: str, port: int, topic: str, timeout: float = 10.0) -> list[Received]:
    """What a late subscriber gets at subscribe time: the retained messages under ``topic``."""
    with Collector(host, port, [topic]) as c:
        # The broker sends retained messages before or right after the SUBACK; a short quiet
        # period after the first subscription is enough to have them all (one per topic).
        time.sleep(0.3)
        return c.snapshot()


# --- TCP gate ---------------------------------------------------------------------------------------


class TcpGate:
    """A loopback TCP forwarder ``127.0.0.1:port -> target`` that can refuse or sever connections.

    Runs on the caller's event loop. ``close()`` stops accepting (new connections are
    refused) and keeps established ones; ``await open()`` listens again on the same port;
    ``sever()`` aborts every forwarded connection at once, without any MQTT DISCONNECT.
    """

    def __init__(self, target_host: str, target_port: int) -> None:
        self.target = (target_host, target_port)
        self.host = LOOPBACK
        self.port = free_port()
        self._server: asyncio.base_events.Server | None = None
        self._hold: socket.socket | None = None
        self._pairs: set[tuple[asyncio.StreamWriter, asyncio.StreamWriter]] = set()
        self._tasks: set[asyncio.Task[None]] = set()
        self.accepted = 0

    async def open(self) -> None:
        if self._server is None:
            if self._hold is not None:
                self._hold.close()
                self._hold = None
            self._server = await asyncio.start_server(
                self._handle, self.host, self.port, reuse_address=True
            )

    def close(self) -> None:
        """Refuse new connections (the port stays reserved, see :func:`hold_port`)."""
        if self._server is not None:
            self._server.close()
            self._server = None
            self._hold = hold_port(self.port)

    def sever(self) -> None:
        for a, b in list(self._pairs):
            a.transport.abort()
            b.transport.abort()
        self._pairs.clear()

    async def aclose(self) -> None:
        self.close()
        self.sever()
        if self._hold is not None:
            self._hold.close()
            self._hold = None
        for t in list(self._tasks):
            t.cancel()
        await asyncio.gather(*self._tasks, return_exceptions=True)

    async def __aenter__(self) -> "TcpGate":
        await self.open()
        return self

    async def __aexit__(self, *exc: Any) -> None:
        await self.aclose()

    async def _handle(self, r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        self.accepted += 1
        try:
            ur, uw = await asyncio.open_connection(*self.target)
        except OSError:
            w.transport.abort()
            return
        pair = (w, uw)
        self._pairs.add(pair)

        async def pipe(src: asyncio.StreamReader, dst: asyncio.StreamWriter) -> None:
            try:
                while data := await src.read(65536):
                    dst.write(data)
                    await dst.drain()
            except (OSError, asyncio.CancelledError):
                pass
            finally:
                # One side ended: end both, as a lost connection does.
                w.transport.abort()
                uw.transport.abort()
                self._pairs.discard(pair)

        for t in (asyncio.ensure_future(pipe(r, uw)), asyncio.ensure_future(pipe(ur, w))):
            self._tasks.add(t)
            t.add_done_callback(self._tasks.discard)
