"""The daemon never writes its events file over one of its own files, and a reload that names
an events file it cannot write is rejected while the running config goes on (DESIGN.md:
"No command writes over one of its inputs"; a reload never stops conditioning)."""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from daemon_rig import ROOT, DaemonProcess, Pty, SquareWave, edge_lines, write_config


def _run_briefly(cfg: Path) -> subprocess.CompletedProcess[str]:
    """The daemon must refuse at once; one that starts instead is stopped and the test fails."""
    try:
        return subprocess.run([sys.executable, "-m", "streamcond", "run", "-c", str(cfg)], cwd=ROOT,
                              capture_output=True, text=True, timeout=30)
    except subprocess.TimeoutExpired:
        pytest.fail("the daemon started instead of refusing the events path")


def _check(cfg: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "streamcond", "check", "-c", str(cfg)], cwd=ROOT,
                          capture_output=True, text=True, timeout=60)


@pytest.mark.parametrize("target,label", [("config", "config"), ("spool", "spool")])
def test_events_onto_the_config_or_the_spool_is_refused_at_start(tmp_path, target, label):
    pty = Pty(tmp_path / "ttyE")
    try:
        spool = tmp_path / "state.sqlite"
        cfg_path = tmp_path / "d.toml"
        events = cfg_path if target == "config" else spool
        cfg = write_config(cfg_path, pty.path, None, spool, events=str(events))
        text = cfg.read_text()
        r = _run_briefly(cfg)
        assert r.returncode == 2, r.stderr
        assert label in r.stderr and "refusing to write over" in r.stderr
        assert "Traceback" not in r.stderr
        assert cfg.read_text() == text  # the config is untouched
        # `check` says the same before the config is ever deployed
        c = _check(cfg)
        assert c.returncode == 2 and label in c.stderr and "refusing to write over" in c.stderr
        assert "Traceback" not in c.stderr
    finally:
        pty.unplug()


def test_events_rotating_into_the_config_is_refused_at_start(tmp_path):
    pty = Pty(tmp_path / "ttyE")
    try:
        cfg_path = tmp_path / "ev.jsonl.1"  # an odd name, but the user's file all the same
        cfg = write_config(cfg_path, pty.path, None, tmp_path / "s.sqlite",
                           events=str(tmp_path / "ev.jsonl"),
                           tail="[output.rotate]\nmax_bytes = 100000\nkeep = 2\n")
        text = cfg.read_text()
        r = _run_briefly(cfg)
        assert r.returncode == 2 and "rotates into" in r.stderr, r.stderr
        assert cfg.read_text() == text
        c = _check(cfg)
        assert c.returncode == 2 and "rotates into" in c.stderr, c.stderr
    finally:
        pty.unplug()


def test_reload_to_an_unwritable_events_file_is_rejected_and_the_daemon_goes_on(tmp_path):
    pty = Pty(tmp_path / "ttyE")
    events = tmp_path / "events.jsonl"
    cfg = write_config(tmp_path / "d.toml", pty.path, None, tmp_path / "s.sqlite", events=str(events))
    good = cfg.read_text()
    daemon = DaemonProcess(cfg, tmp_path / "daemon.log")

    try:
        wave = SquareWave(pty)
        daemon.start()
        daemon.wait_log("opened", 15)
        wave.run_for(1.0)
        for k, bad in enumerate((str(tmp_path / "no" / "such" / "dir.jsonl"), str(cfg)), 1):
            cfg.write_text(good.replace(str(events), bad))
            daemon.signal(signal.SIGHUP)
            deadline = time.monotonic() + 10
            while daemon.current_log().count("config reload rejected") < k:
                assert time.monotonic() < deadline, daemon.current_log()
                time.sleep(0.05)
        before = edge_lines(events)
        wave.run_for(1.0)
        # 200 samples/s toggling every 100 ms: ten edges a second, still into the old file
        assert daemon.proc is not None and daemon.proc.poll() is None
        assert edge_lines(events) >= before + 5
        log = daemon.current_log()
        assert log.count("config reload rejected") == 2 and "does not exist" in log
        assert "refusing to write over" in log and "Traceback" not in log
        daemon.signal(signal.SIGTERM)
        assert daemon.wait(20) == 0
        assert not (tmp_path / "no").exists()
    finally:
        daemon.kill()
        pty.unplug()
