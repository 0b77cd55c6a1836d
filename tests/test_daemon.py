"""The live daemon end to end, with real parts: a pseudo-terminal as the serial device, a private
MQTT broker on a free loopback port, a loopback relay to cut the network, real SQLite files, and
the daemon as a separate process receiving real signals."""

from __future__ import annotations

import json
import signal
import time
from pathlib import Path

import pytest

from broker import broker_kinds, collect, private_broker, retained_snapshot
from daemon_rig import DaemonProcess, Pty, Relay, SquareWave, edge_lines, edges_of, seq_report, write_config

pytestmark = pytest.mark.slow


@pytest.fixture
def broker(tmp_path: Path):
    # one broker kind is enough here (the MQTT tests cover both); mosquitto when installed
    with private_broker(broker_kinds()[0], tmp_path / "broker") as b:
        yield b


@pytest.fixture
def rig(tmp_path: Path, broker):
    pty = Pty(tmp_path / "ttyRIG")
    relay = Relay(broker.port)
    cfg = write_config(tmp_path / "rig.toml", pty.path, relay.port, tmp_path / "state" / "spool.sqlite")
    daemon = DaemonProcess(cfg, tmp_path / "daemon.log")
    col = collect(broker.host, broker.port, ["test/station/#"])
    yield pty, relay, daemon, col
    daemon.kill()
    col.close()
    relay.close()
    pty.unplug()


def wait_edges(col, n: int, timeout: float = 20.0) -> list[dict]:
    col.wait_for(lambda: len({e["seq"] for e in edges_of(col.snapshot())}) >= n, timeout,
                 f"{n} distinct edges")
    return edges_of(col.snapshot())


def assert_contiguous(edges: list[dict], n: int) -> None:
    seqs, _dup = seq_report(edges)
    assert seqs == list(range(1, n + 1)), seqs[:50]
    by_seq = {e["seq"]: e for e in edges}
    levels = [by_seq[s]["level"] for s in range(1, n + 1)]
    assert all(a != b for a, b in zip(levels, levels[1:])), "edges must alternate"


def test_edges_survive_a_network_outage(rig):
    pty, relay, daemon, col = rig
    wave = SquareWave(pty)
    daemon.start()
    daemon.wait_log("opened", 15)
    col.wait_for(lambda: any(m.topic == "test/station/status" and m.payload == b"online"
                             for m in col.snapshot()), 15, "status online")
    wave.run_for(1.5)
    relay.cut()  # the broker is unreachable for several seconds while edges keep coming
    wave.run_for(3.0)
    relay.resume()
    wave.run_for(1.5)
    edges = wait_edges(col, wave.toggles)
    assert_contiguous(edges, wave.toggles)
    # the retained state follows the last edge (it is published right after the edge)
    last = max(edges, key=lambda e: e["seq"])
    col.wait_for(
        lambda: any(json.loads(m.payload).get("seq") == last["seq"] for m in col.on("test/station/a/state")),
        10, "the state after the last edge",
    )
    state = [json.loads(m.payload) for m in col.on("test/station/a/state")]
    assert state[-1]["level"] == last["level"] and state[-1]["seq"] == last["seq"]
    # the measures arrive too (retained): 5 Hz pulses (a toggle every 100 ms) at K = 10 /L
    col.wait_for(lambda: bool(col.on("test/station/a/measure")), 10, "a measure record")
    m = [json.loads(x.payload) for x in col.on("test/station/a/measure")]
    full = [r for r in m if r.get("periods", 0) >= 4]
    assert full and all(abs(r["frequency_hz"] - 5.0) < 0.05 for r in full)
    assert all(r["rate_unit"] == "L/min" and r["total_units"] == r["total"] / 10.0 for r in m)
    daemon.signal(signal.SIGTERM)
    assert daemon.wait(20) == 0
    col.wait_for(lambda: col.on("test/station/status")[-1].payload == b"offline", 10, "offline")


def test_sigkill_and_restart_keep_seq_contiguous(rig, broker):
    pty, relay, daemon, col = rig
    wave = SquareWave(pty)
    daemon.start()
    daemon.wait_log("opened", 15)
    wave.run_for(2.0)
    wait_edges(col, wave.toggles)
    daemon.kill()  # SIGKILL: no chance to flush anything
    before = wave.toggles
    daemon.start()
    daemon.wait_log("opened", 15)
    time.sleep(0.5)
    wave.run_for(2.0)
    edges = wait_edges(col, wave.toggles)
    seqs, _ = seq_report(edges)
    assert seqs[:before] == list(range(1, before + 1))
    assert_contiguous(edges, max(seqs))
    assert max(seqs) >= wave.toggles - 1
    # The retained state a late subscriber gets is the one the last edge left (the edge and
    # its state are stored in one commit; acknowledgements may ride on later commits, which a
    # SIGKILL can only turn into re-sends). Reference: the edges as the broker delivered them.
    last = max(edges, key=lambda e: e["seq"])
    col.wait_for(lambda: any(json.loads(m.payload).get("seq") == last["seq"]
                             for m in col.on(f"test/station/{last['channel']}/state")), 10, "last state")
    got = retained_snapshot(broker.host, broker.port, f"test/station/{last['channel']}/state")
    states = [json.loads(m.payload) for m in got if m.retain]
    assert states and states[-1]["seq"] == last["seq"] and states[-1]["level"] == last["level"]


def test_device_unplugged_and_back(rig):
    pty, relay, daemon, col = rig
    wave = SquareWave(pty)
    daemon.start()
    daemon.wait_log("opened", 15)
    wave.run_for(1.0)
    pty.unplug()
    col.wait_for(lambda: bool(col.on("test/station/fault")), 15, "a fault record")
    fault = json.loads(col.on("test/station/fault")[-1].payload)
    assert fault["reason"] == "device_lost"
    time.sleep(1.0)
    pty.plug()
    col.wait_for(lambda: bool(col.on("test/station/gap")), 15, "a gap record")
    gap = json.loads(col.on("test/station/gap")[-1].payload)
    assert gap["t_end"] >= gap["t"] and gap["reason"] == "device_lost"
    n_before = len({e["seq"] for e in edges_of(col.snapshot())})
    wave.run_for(1.5)
    col.wait_for(lambda: len({e["seq"] for e in edges_of(col.snapshot())}) > n_before + 5, 15,
                 "edges after the device came back")
    assert daemon.proc is not None and daemon.proc.poll() is None


def test_garbage_and_over_long_lines_are_skipped(rig):
    pty, relay, daemon, col = rig
    wave = SquareWave(pty)
    daemon.start()
    daemon.wait_log("opened", 15)
    junk = b"\x00\xff\xfe\x80garbage,,\n" + b"9" * 5000 + b"\n" + b"1,2,3,4\n"
    wave.run_for(3.0, extra=junk)
    edges = wait_edges(col, wave.toggles)
    assert_contiguous(edges, wave.toggles)
    log = daemon.log_text()
    assert "bad input skipped" in log and "Traceback" not in log


def test_sighup_rejects_a_broken_config_and_applies_a_good_one(rig, tmp_path):
    pty, relay, daemon, col = rig
    wave = SquareWave(pty)
    daemon.start()
    daemon.wait_log("opened", 15)
    wave.run_for(1.0)
    good = daemon.config.read_text()
    daemon.config.write_text(good.replace("band = { low = 0.3, high = 0.7 }", "band = { low = 0.9, high = 0.1 }"))
    daemon.signal(signal.SIGHUP)
    daemon.wait_log("config reload rejected", 10)
    wave.run_for(1.0)
    daemon.config.write_text(good.replace("low = 0.3, high = 0.7", "low = 0.2, high = 0.8"))
    daemon.signal(signal.SIGHUP)
    daemon.wait_log("config reloaded", 10)
    wave.run_for(1.0)
    edges = wait_edges(col, wave.toggles)
    assert_contiguous(edges, wave.toggles)
    log = daemon.log_text()
    assert log.count("config reload rejected") == 1 and "channel[0].band.low" in log


def test_sigterm_with_a_backlog_then_restart_delivers_it(rig):
    pty, relay, daemon, col = rig
    wave = SquareWave(pty)
    daemon.start()
    daemon.wait_log("opened", 15)
    wave.run_for(1.0)
    relay.cut()
    wave.run_for(2.0)  # these edges wait in the spool
    daemon.signal(signal.SIGTERM)
    assert daemon.wait(30) == 0  # the flush gives up after a few seconds; the stop is clean
    assert "left in the spool" in daemon.log_text()
    relay.resume()
    daemon.start()
    daemon.wait_log("opened", 15)
    edges = wait_edges(col, wave.toggles)
    assert_contiguous(edges, wave.toggles)


# --- health, metrics, watchdog, reloads that must not stop the samples ----------------------------

HEALTH_FIELDS = {
    "kind", "t", "uptime_s", "rows", "rows_per_s", "bad_lines", "long_lines", "edges",
    "spool_depth", "spool_oldest_age_s", "dropped", "reconnects", "broker_connected",
    "last_sample_age_s", "cpu_percent", "rss_mib",
}


def test_health_record_metrics_scrape_and_disconnected_log(tmp_path, broker):
    import urllib.request

    from broker import free_port

    pty = Pty(tmp_path / "ttyH")
    relay = Relay(broker.port)
    mport = free_port()
    cfg = write_config(tmp_path / "h.toml", pty.path, relay.port, tmp_path / "state" / "spool.sqlite",
                       mqtt_extra="health_interval_s = 1.0\n",
                       tail=f'[metrics]\nlisten = "127.0.0.1:{mport}"\n')
    daemon = DaemonProcess(cfg, tmp_path / "daemon.log")
    col = collect(broker.host, broker.port, ["test/station/#"])
    try:
        wave = SquareWave(pty)
        daemon.start()
        daemon.wait_log("opened", 15)
        wave.run_for(1.0, extra=b"\x00junk,,\n")
        wave.run_for(1.5)
        n = wait_edges(col, wave.toggles)
        col.wait_for(lambda: any(json.loads(m.payload)["edges"].get("a", 0) >= wave.toggles
                                 for m in col.on("test/station/health")), 10, "a health record with all edges")
        rec = [json.loads(m.payload) for m in col.on("test/station/health")][-1]
        assert set(rec) == HEALTH_FIELDS and rec["kind"] == "health"
        assert rec["broker_connected"] is True and rec["bad_lines"] >= 1
        assert rec["rows"] >= 400 and rec["edges"]["a"] == len({e["seq"] for e in n})
        assert 0 < rec["rss_mib"] < 1000 and rec["last_sample_age_s"] is not None
        from broker import retained_snapshot
        kept = retained_snapshot(broker.host, broker.port, "test/station/health")
        assert kept and kept[-1].retain  # a late subscriber gets the latest record
        # a real HTTP scrape of the Prometheus endpoint: same counters
        text = urllib.request.urlopen(f"http://127.0.0.1:{mport}/metrics", timeout=5).read().decode()
        values = {}
        for line in text.splitlines():
            if line.startswith("streamcond_"):
                name, v = line.rsplit(" ", 1)
                values[name] = float(v)
        assert values['streamcond_edges_total{channel="a"}'] == wave.toggles
        assert values["streamcond_rows_total"] >= rec["rows"]
        assert values["streamcond_broker_connected"] == 1.0
        assert "# TYPE streamcond_rows_total counter" in text
        # broker away: "still disconnected, N queued" once per health interval, not per attempt
        relay.cut()
        wave.run_for(3.5)
        time.sleep(0.5)
        log = daemon.current_log()
        lines = [ln for ln in log.splitlines() if "still disconnected" in ln]
        assert 2 <= len(lines) <= 5, lines
        assert "queued" in lines[-1]
        relay.resume()
        edges = wait_edges(col, wave.toggles)
        assert_contiguous(edges, wave.toggles)
        daemon.signal(signal.SIGTERM)
        assert daemon.wait(20) == 0
    finally:
        daemon.kill()
        col.close()
        relay.close()
        pty.unplug()


def test_reload_to_an_unreachable_broker_and_back_never_stops_the_samples(tmp_path, broker):
    from broker import free_port

    pty = Pty(tmp_path / "ttyR")
    events = tmp_path / "events.jsonl"
    cfg = write_config(tmp_path / "r.toml", pty.path, broker.port, tmp_path / "state" / "spool.sqlite",
                       events=str(events))
    good = cfg.read_text()
    daemon = DaemonProcess(cfg, tmp_path / "daemon.log")
    col = collect(broker.host, broker.port, ["test/station/#"])

    try:
        wave = SquareWave(pty)
        daemon.start()
        daemon.wait_log("opened", 15)
        wave.run_for(1.0)
        dead = free_port()  # nothing listens there
        cfg.write_text(good.replace(f"port = {broker.port}", f"port = {dead}"))
        daemon.signal(signal.SIGHUP)
        before = edge_lines(events)
        wave.run_for(1.0)
        # a second SIGHUP in that window acts at once (a band change)
        cfg.write_text(good.replace(f"port = {broker.port}", f"port = {dead}")
                       .replace("low = 0.3, high = 0.7", "low = 0.25, high = 0.75"))
        daemon.signal(signal.SIGHUP)
        wave.run_for(1.0)
        assert daemon.current_log().count("config reloaded") == 2
        # conditioning went on all along: edges reached the events file while MQTT was away
        assert edge_lines(events) >= before + 15
        cfg.write_text(good)
        daemon.signal(signal.SIGHUP)
        wave.run_for(1.0)
        edges = wait_edges(col, wave.toggles)
        assert_contiguous(edges, wave.toggles)
        assert daemon.current_log().count("config reloaded") == 3
        daemon.signal(signal.SIGTERM)
        assert daemon.wait(20) == 0
    finally:
        daemon.kill()
        col.close()
        pty.unplug()


def test_watchdog_pings_while_samples_flow(tmp_path, broker):
    import socket as so

    pty = Pty(tmp_path / "ttyW")
    sock = so.socket(so.AF_UNIX, so.SOCK_DGRAM)
    sock.bind(str(tmp_path / "notify"))
    sock.settimeout(0.2)
    cfg = write_config(tmp_path / "w.toml", pty.path, broker.port, tmp_path / "state" / "spool.sqlite")
    daemon = DaemonProcess(cfg, tmp_path / "daemon.log",
                           env={"NOTIFY_SOCKET": str(tmp_path / "notify"), "WATCHDOG_USEC": "1000000"})
    got: list[bytes] = []
    try:
        daemon.start()
        daemon.wait_log("opened", 15)
        SquareWave(pty).run_for(2.0)
        end = time.monotonic() + 1.0
        while time.monotonic() < end:
            try:
                got.append(sock.recv(512))
            except so.timeout:
                pass
        assert any(b"READY=1" in g for g in got)
        # WATCHDOG_USEC 1 s: a ping at least every half of it (sd_notify(3)), while progressing
        assert sum(g == b"WATCHDOG=1" for g in got) >= 3
        daemon.signal(signal.SIGTERM)
        assert daemon.wait(20) == 0
    finally:
        daemon.kill()
        sock.close()
        pty.unplug()
