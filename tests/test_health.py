"""Health for operations, in-process with real parts: the watchdog's progress test against a
real spool writer thread that stalls, a real sd_notify datagram socket, the health record's
fields, and the metrics listen address."""

from __future__ import annotations

import socket
import time
from pathlib import Path

import pytest

from streamcond.emitter import Emitter
from streamcond.errors import ConfigError
from streamcond.health import HealthRecorder, ProgressWatch, Snapshot, oldest_age_s
from streamcond.io.spool import Spool
from streamcond.liveinput import Output
from streamcond.metrics import parse_listen
from streamcond.sdnotify import Notifier

#: The field set another tool's live view reads (issue 15, contract of <prefix>/health).
HEALTH_FIELDS = {
    "kind", "t", "uptime_s", "rows", "rows_per_s", "bad_lines", "long_lines", "edges",
    "spool_depth", "spool_oldest_age_s", "dropped", "reconnects", "broker_connected",
    "last_sample_age_s", "cpu_percent", "rss_mib",
}


def snap(uptime: float, rows: int, cpu: float) -> Snapshot:
    return Snapshot(t=12.5, uptime_s=uptime, rows=rows, bad_lines=1, long_lines=2,
                    edges={"a": 3}, spool_depth=4, spool_oldest_age_s=1.25, dropped=0,
                    reconnects=1, broker_connected=True, last_sample_age_s=0.01, cpu_s=cpu,
                    rss_bytes=50 * 2**20)


def test_health_record_has_exactly_the_contract_fields_and_interval_rates():
    h = HealthRecorder()
    h.record(snap(10.0, 1000, 1.0))
    rec = h.record(snap(40.0, 4000, 4.0))
    assert set(rec) == HEALTH_FIELDS
    assert rec["kind"] == "health"
    assert rec["rows_per_s"] == pytest.approx(3000 / 30.0)  # rows over the interval
    assert rec["cpu_percent"] == pytest.approx(3.0 / 30.0 * 100)  # CPU s per wall s, in %
    assert rec["rss_mib"] == 50.0 and rec["edges"] == {"a": 3}


def test_oldest_age_in_sample_time():
    assert oldest_age_s(b'{"kind":"edge","t":10.0}', 12.5) == pytest.approx(2.5)
    assert oldest_age_s(None, 12.5) is None
    assert oldest_age_s(b'{"kind":"gap"}', 12.5) is None


def test_metrics_listen_defaults_to_localhost():
    assert parse_listen("127.0.0.1:9108") == ("127.0.0.1", 9108)
    assert parse_listen("9108") == ("127.0.0.1", 9108)
    assert parse_listen(":9108") == ("127.0.0.1", 9108)
    with pytest.raises(ValueError):
        parse_listen("localhost:http")


def test_a_bad_metrics_listen_is_a_config_error_naming_the_key():
    from streamcond.config import config_from_dict

    with pytest.raises(ConfigError) as e:
        config_from_dict({"source": {"kind": "serial", "port": "/dev/null"},
                          "channel": [{"name": "a", "band": {"low": 0, "high": 1}}],
                          "metrics": {"listen": "127.0.0.1:99999"}})
    assert "metrics.listen" in " ".join(e.value.messages)


def test_watchdog_is_fed_only_while_the_spool_writer_makes_progress(tmp_path: Path):
    # A real notify socket (sd_notify(3): datagrams of KEY=value lines).
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(tmp_path / "notify"))
    sock.settimeout(0.05)
    notifier = Notifier({"NOTIFY_SOCKET": str(tmp_path / "notify"), "WATCHDOG_USEC": "200000"})
    spool = Spool(tmp_path / "spool.sqlite")
    em = Emitter(spool, None, ("test/p", 1), None)
    watch = ProgressWatch({"spool writer": em.stalled_for}, stall_s=0.3)

    def feed_for(seconds: float) -> int:
        """The daemon's rule: ping only when nothing is stalled; returns pings received."""
        n = 0
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            if not watch.stalled():
                notifier.watchdog()
            try:
                while True:
                    if sock.recv(256) == b"WATCHDOG=1":
                        n += 1
            except socket.timeout:
                pass
        return n

    edge = {"kind": "edge", "channel": "a", "t": 1.0, "edge": "rising", "level": 1, "value": 0.9, "seq": 1}
    assert feed_for(0.3) > 0
    with spool._lock:  # the spool's commit hangs (as a dying SD card's fsync would)
        em.put(Output([edge], {"a": {"seq": 1, "level": 1}}))
        time.sleep(0.4)
        assert watch.stalled() == ["spool writer"]
        assert feed_for(0.4) == 0  # stalled: no pings
    time.sleep(0.2)  # the commit goes through
    assert watch.stalled() == []
    assert feed_for(0.3) > 0
    assert len(spool) == 2  # the edge and the retained state it leaves
    em.close()
    spool.close()
    sock.close()
