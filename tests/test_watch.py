"""`streamcond watch`: the model against made-up clocks and records, the view in a real
terminal under tmux (refreshed in place), and the view of a real daemon over a private broker
in plain text."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import uuid
from pathlib import Path

import numpy as np
import paho.mqtt.client as paho
import pytest

from broker import broker_kinds, private_broker
from daemon_rig import DaemonProcess, Pty, SquareWave, write_config
from streamcond.config import config_from_dict
from streamcond.watch.model import BLOCKS, WatchModel, sparkline
from streamcond.watch.render import plain

ROOT = Path(__file__).resolve().parent.parent


def small_cfg(**band):
    return config_from_dict({
        "station": {"name": "w"},
        "source": {"kind": "file", "columns": ["t", "a", "b"], "time_column": "t"},
        "channel": [
            {"name": "a", "unit": "V", "band": band or {"low": 1.0, "high": 2.0}},
            {"name": "b", "band": {"mode": "adaptive", "center": 0.0}},
        ],
    })


# --- the model ----------------------------------------------------------------------------------


def test_edges_in_the_last_minute_and_the_chatter_criterion():
    m = WatchModel(small_cfg(), "mqtt")
    now = 1000.0
    # rising edges 70 s, 50 s, 30 s and 10 s ago (and falling ones between)
    for age in (70, 60, 50, 40, 30, 20, 10):
        lvl = 1 if age % 20 == 10 else 0
        m.on_record({"kind": "edge", "channel": "a", "t": 0.0, "level": lvl, "value": 1.5},
                    now - age)
    rows = {r.name: r for r in m.snapshot(now).rows}
    # within the last 60 s: the edges 60, 50, ..., 10 s ago (inclusive of 60)
    assert rows["a"].edges_minute == 6
    # 3 activations within 60 s (50, 30, 10 s ago): chattering by the ISA-18.2 practice of
    # three activations a minute (from memory), the [stats] defaults
    assert rows["a"].chatter
    later = {r.name: r for r in m.snapshot(now + 45).rows}
    assert later["a"].edges_minute == 1 and not later["a"].chatter  # only the one 55 s ago
    assert rows["a"].level == "HIGH"


def test_a_channel_fault_shows_until_its_end_record_even_as_values_come():
    # port mode: the pipeline's fault record comes, then that read's values (NaN at the fault
    # samples); the fault shows until the record of its end, not only until the next values
    m = WatchModel(small_cfg(), "port")
    m.on_record({"kind": "fault", "channel": "a", "t": 1.0, "state": "start", "value": 1e308,
                 "reason": "raw value 1e+308 lies beyond ±1e+150"}, 1.0)
    m.on_values("a", np.array([1.2, np.nan]), 1.0)
    assert "1e+150" in {r.name: r for r in m.snapshot(1.5).rows}["a"].fault
    m.on_record({"kind": "fault", "channel": "a", "t": 2.0, "state": "end", "value": 1.1,
                 "duration_s": 1.0}, 2.0)
    m.on_values("a", np.array([1.1]), 2.0)
    assert {r.name: r for r in m.snapshot(2.5).rows}["a"].fault is None


def test_stats_give_band_sigma_margin_and_the_adaptive_band_waits_for_them():
    m = WatchModel(small_cfg(), "mqtt")
    rows = {r.name: r for r in m.snapshot(0.0).rows}
    assert rows["a"].band == "1 – 2" and rows["b"].band.startswith("adaptive")
    m.on_record({"kind": "stats", "channel": "b", "t": 0.0, "band_low": -0.3, "band_high": 0.3,
                 "noise_sigma": 0.05, "margin_sigma": 6.0, "chattering": False}, 1.0)
    b = {r.name: r for r in m.snapshot(2.0).rows}["b"]
    assert b.band == "-0.3 – 0.3" and b.sigma == "0.05" and b.margin == "6"
    m.on_record({"kind": "stats", "channel": "b", "t": 10.0, "band_low": -0.3, "band_high": 0.3,
                 "noise_sigma": 0.05, "margin_sigma": 6.0, "chattering": True,
                 "reliable": False}, 3.0)
    b = {r.name: r for r in m.snapshot(4.0).rows}["b"]
    assert b.chatter and "unreliable" in b.margin


def test_sparkline_heights_and_zones_against_the_band():
    # a ramp from 0 to 3 through a band 1..2: the lowest block at 0, the highest at 3, and the
    # zones below / inside / above the band where the ramp is
    v = np.linspace(0.0, 3.0, 24)
    chars, zones = sparkline(v, 1.0, 2.0, width=24)
    assert chars[0] == BLOCKS[0] and chars[-1] == BLOCKS[-1]
    expect = "".join("v" if x < 1.0 else ("^" if x > 2.0 else "-") for x in v)
    assert zones == expect
    # the band widens the range: a flat trace inside it sits mid-height
    chars, zones = sparkline(np.full(10, 1.5), 1.0, 2.0, width=10)
    assert set(chars) == {BLOCKS[4]} and set(zones) == {"-"}


def test_health_record_fills_source_broker_and_spool():
    m = WatchModel(config_from_dict({
        "source": {"kind": "file", "columns": ["t", "a"], "time_column": "t"},
        "channel": [{"name": "a", "band": {"low": 1.0, "high": 2.0}}],
        "output": {"mqtt": {"host": "127.0.0.1", "port": 18830}},
    }), "mqtt")
    m.connected = True
    m.on_status("online", 0.0)
    m.on_health({"kind": "health", "t": 12.0, "uptime_s": 3600.0, "rows": 1000, "rows_per_s": 250.0,
                 "bad_lines": 3, "long_lines": 1, "edges": {"a": 4}, "spool_depth": 17,
                 "spool_oldest_age_s": 4.5, "dropped": 0, "reconnects": 2,
                 "broker_connected": True, "last_sample_age_s": 0.01, "cpu_percent": 3.5,
                 "rss_mib": 61.0}, 100.0)
    s = m.snapshot(101.0)
    assert "250 rows/s" in s.source and "3 bad lines" in s.source and "1.0 s ago" in s.source
    assert "17 queued" in s.spool and "oldest 4.5 s" in s.spool
    assert "daemon online" in s.broker and "2 reconnects" in s.broker
    text = plain(s)
    assert "source: 250 rows/s" in text


# --- a real terminal ----------------------------------------------------------------------------


@pytest.mark.skipif(shutil.which("tmux") is None, reason="needs tmux for a real terminal")
def test_port_view_in_a_real_terminal_is_refreshed_in_place(tmp_path):
    pty = Pty(tmp_path / "ttyDEV")
    cfg = write_config(tmp_path / "c.toml", pty.path, None, tmp_path / "state.sqlite")
    sock = f"streamcond-test-{uuid.uuid4().hex[:8]}"
    tmux = ["tmux", "-u", "-L", sock, "-f", "/dev/null"]
    # the terminal's own size and a UTF-8 locale, whatever the test runner's environment says
    cmd = (f"cd {ROOT} && env -u COLUMNS -u LINES LANG=C.UTF-8 {sys.executable} -m streamcond "
           f"watch -c {cfg} --port --duration 12")
    subprocess.run(tmux + ["new-session", "-d", "-x", "160", "-y", "40", cmd], check=True)
    wave = SquareWave(pty, rate_hz=200.0, half_period_ms=100)
    try:
        wave.run_for(4.0)
        first = subprocess.run(tmux + ["capture-pane", "-p"], capture_output=True,
                               text=True, check=True).stdout
        wave.run_for(2.0)
        second = subprocess.run(tmux + ["capture-pane", "-p"], capture_output=True,
                                text=True, check=True).stdout
    finally:
        subprocess.run(tmux + ["kill-server"], capture_output=True)
        pty.unplug()
    for screen in (first, second):
        # one view on the screen, drawn over itself (not a scroll of blocks)
        assert screen.count("streamcond watch — station rig") == 1, screen
        row = next(ln for ln in screen.splitlines() if "│ a " in ln or ln.lstrip("│ ").startswith("a "))
        assert "0.3 – 0.7" in row, screen
        assert ("HIGH" in row) or (" low " in row)
        assert "rows/s" in screen and "bad lines" in screen
    # the view moved on: the clock in the title and the rows count changed in place
    assert first != second
    # the square wave toggles every 100 ms of its clock, i.e. every 20 rows at 200 Hz: the
    # edges of the last minute are the rows seen / 20, give or take the first and the last
    # (however late the view started reading)
    import re

    rows = int(re.search(r"([\d,]+) rows,", second).group(1).replace(",", ""))
    row2 = next(ln for ln in second.splitlines() if "0.3 – 0.7" in ln)
    cells = [c.strip() for c in row2.split("│") if c.strip()]
    edges = int(cells[6])  # channel, value, band, level, σ̂, margin, edges/min
    assert rows > 200 and abs(edges - rows / 20.0) <= 3, (rows, edges, row2)


# --- the daemon's topics, plain text ------------------------------------------------------------


def test_mqtt_view_of_a_running_daemon(tmp_path):
    with private_broker(broker_kinds()[0], tmp_path / "broker") as b:
        pty = Pty(tmp_path / "ttyDEV")
        cfg = write_config(tmp_path / "c.toml", pty.path, b.port, tmp_path / "spool.sqlite")
        d = DaemonProcess(cfg, tmp_path / "daemon.log").start()
        try:
            d.wait_log("started", 20)
            # the retained health record of the contract (issue 15), published as the daemon
            # does; a daemon that publishes its own overwrites it with the same fields
            health = {"kind": "health", "t": 1.0, "uptime_s": 5.0, "rows": 200, "rows_per_s": 200.0,
                      "bad_lines": 0, "long_lines": 0, "edges": {"a": 2}, "spool_depth": 0,
                      "spool_oldest_age_s": None, "dropped": 0, "reconnects": 0,
                      "broker_connected": True, "last_sample_age_s": 0.01}
            pub = paho.Client(paho.CallbackAPIVersion.VERSION2)
            pub.connect(b.host, b.port)
            pub.loop_start()
            pub.publish("test/station/health", json.dumps(health), qos=1, retain=True).wait_for_publish(5)
            pub.loop_stop()
            pub.disconnect()
            watch = subprocess.Popen(
                [sys.executable, "-m", "streamcond", "watch", "-c", str(cfg), "--duration", "7",
                 "--interval", "1"],
                cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
            )
            wave = SquareWave(pty, rate_hz=200.0, half_period_ms=100)
            wave.run_for(6.0)
            out, err = watch.communicate(timeout=30)
        finally:
            d.signal(15)
            d.wait(20)
            pty.unplug()
    assert watch.returncode == 0, err
    assert "Traceback" not in err
    blocks = [blk for blk in out.split("\n\n") if blk.strip()]
    last = blocks[-1]
    assert "watch connected to 127.0.0.1" in last and "daemon online" in last
    assert "rows/s" in last and "queued" in last
    row = next(ln for ln in last.splitlines() if ln.strip().startswith("a "))
    cells = row.split()
    assert "0.3" in row and "0.7" in row
    assert cells[cells.index("–") + 2] in ("HIGH", "low")  # the level after the band
    # edges arrived over MQTT while the view ran (a toggle every 100 ms)
    assert any(int(c) >= 10 for c in cells if c.isdigit())
