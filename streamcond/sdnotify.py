"""systemd service notifications, written to ``$NOTIFY_SOCKET`` directly (no dependency).

The protocol is a datagram of ``KEY=value`` lines on the AF_UNIX socket named by the
environment variable ``NOTIFY_SOCKET`` (a leading ``@`` means the abstract namespace); see
systemd's sd_notify(3). Without that variable (not run by systemd) every call is a no-op.
The watchdog interval comes from ``WATCHDOG_USEC``; pinging at half of it is the documented
recommendation.
"""

from __future__ import annotations

import logging
import os
import socket

log = logging.getLogger(__name__)


class Notifier:
    def __init__(self, environ: dict[str, str] | None = None) -> None:
        env = os.environ if environ is None else environ
        addr = env.get("NOTIFY_SOCKET", "")
        if addr.startswith("@"):
            addr = "\0" + addr[1:]
        self.address = addr or None
        usec = env.get("WATCHDOG_USEC")
        pid = env.get("WATCHDOG_PID")
        self.watchdog_s: float | None = None
        if usec and (pid is None or pid == str(os.getpid())):
            try:
                self.watchdog_s = int(usec) / 1e6
            except ValueError:
                self.watchdog_s = None

    @property
    def enabled(self) -> bool:
        return self.address is not None

    def send(self, **fields: str) -> None:
        if self.address is None:
            return
        msg = "\n".join(f"{k}={v}" for k, v in fields.items()).encode()
        try:
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as s:
                s.connect(self.address)
                s.sendall(msg)
        except OSError as e:  # never fatal: the service manager may be restarting
            log.debug("sd_notify failed: %s", e)

    def ready(self, status: str = "") -> None:
        self.send(READY="1", STATUS=status) if status else self.send(READY="1")

    def status(self, status: str) -> None:
        self.send(STATUS=status)

    def watchdog(self) -> None:
        self.send(WATCHDOG="1")

    def stopping(self) -> None:
        self.send(STOPPING="1")
