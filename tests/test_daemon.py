"""The live daemon end to end, with real parts: a pseudo-terminal as the serial device, a private
MQTT broker on a free loopback port, a loopback relay to cut the network, real SQLite files, and
the daemon as a separate process receiving real signals."""

from __future__ import annotations

import json
import signal
import time
from pathlib import Path

import pytest

from broker import broker_kinds, collect, private_broker
from daemon_rig import DaemonProcess, Pty, Relay, SquareWave, edges_of, seq_report, write_config

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


def test_sigkill_and_restart_keep_seq_contiguous(rig):
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
