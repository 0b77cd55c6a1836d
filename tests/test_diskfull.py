"""A full, failing or read-only disk degrades the daemon, never stops it (issue 9, item 3).

Real parts: a 512 KiB tmpfs mounted for the test (the machine must allow it: root and a kernel
that lets this process mount; otherwise the tests are skipped with the reason), real SQLite
files on it, a pseudo-terminal as the serial device, a private MQTT broker behind a loopback
relay that cuts the link, the daemon as a subprocess.

The references are outside the spool: the square wave's own toggle count (every toggle is one
edge, so the edges the broker receives must be ``seq`` 1..N or, when the spool bound dropped the
oldest, a contiguous run ending at N), the file system's own free-space figure (statvfs), and
the kernel's read-only mount flag.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import time
from pathlib import Path

import pytest

from broker import broker_kinds, collect, private_broker
from daemon_rig import DaemonProcess, Pty, Relay, SquareWave, edges_of, seq_report, write_config
from streamcond.io.spool import HEADROOM_BYTES, Spool, SpoolError


def _mount(where: Path, size: str = "512k", ro: bool = False) -> None:
    opts = f"size={size}" + (",remount,ro" if ro else "")
    args = ["mount", "-o", opts, str(where)] if ro else ["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(where)]
    r = subprocess.run(args, capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here ({r.stderr.strip() or r.returncode}); "
                    "the disk-full tests need root and a kernel that permits mounting")


@pytest.fixture
def small_disk(tmp_path: Path):
    d = tmp_path / "disk"
    d.mkdir()
    if os.geteuid() != 0:
        pytest.skip("mounting a tmpfs needs root")
    _mount(d)
    try:
        yield d
    finally:
        subprocess.run(["umount", "-l", str(d)], capture_output=True)


def free_bytes(d: Path) -> int:
    st = os.statvfs(d)  # the file system's own figure
    return st.f_bavail * st.f_frsize


def fill(d: Path, leave: int) -> Path:
    """A filler file that leaves about ``leave`` bytes free."""
    f = d / "filler"
    with open(f, "wb") as fh:
        fh.write(bytes(max(0, free_bytes(d) - leave)))
    return f


def item(n: int) -> tuple[str, bytes, int, bool, str]:
    return ("p/a/edge", json.dumps({"n": n, "pad": "x" * 150}).encode(), 1, False, "edge")


# -- the spool alone ---------------------------------------------------------------------------


def test_spool_on_a_full_disk_holds_in_memory_counts_losses_and_recovers(small_disk: Path, caplog) -> None:
    filler = fill(small_disk, 200 * 1024)
    sp = Spool(small_disk / "s.sqlite", memory_max_records=500)
    n = 0
    while sp.trouble is None and n < 20_000:
        sp.put_many([item(n), item(n + 1)], state={"a": {"seq": n + 2}})
        n += 2
    assert sp.trouble == "the disk is full", sp.counters()
    assert free_bytes(small_disk) < 2 * HEADROOM_BYTES
    stored = len(sp) - sp.in_memory  # the failed write's records are already held in memory
    held = sp.in_memory
    for _ in range(400):  # 800 more: 500 held in memory, the rest pushed out and counted
        sp.put_many([item(n), item(n + 1)], state={"a": {"seq": n + 2}})
        n += 2
    lost = held + 800 - 500
    assert sp.in_memory == 500 and sp.lost_to_disk == lost and sp.dropped == lost
    assert len(sp) == stored + 500
    # what is held in memory is still handed out, after the stored records, in order
    got = [json.loads(i.payload)["n"] for i in sp.peek(10**6)]
    assert got == sorted(got) and got[-1] == n - 1
    assert sp.load_state() == {"a": {"seq": n}}  # the newest state, even though not stored
    # the broker takes everything: acknowledgements work on the full disk (slices, headroom)
    while True:
        page = sp.peek(64)
        if not page:
            break
        sp.ack([i.id for i in page])
    assert len(sp) == 0
    # space returns: the next write stores the state, and the spool is durable again
    filler.unlink()
    sp._retry_at = 0.0  # (the retry interval is a second of the clock; do not wait it out)
    sp.put_many([item(n)], state={"a": {"seq": n + 1}})
    assert sp.trouble is None and sp.in_memory == 0
    sp.close()
    with Spool(small_disk / "s.sqlite") as again:
        assert [json.loads(i.payload)["n"] for i in again.peek(10)] == [n]
        assert again.load_state() == {"a": {"seq": n + 1}}
        assert again.dropped == lost
    assert any("cannot be written (the disk is full)" in r.getMessage() for r in caplog.records)


def test_the_wal_stays_bounded_so_max_records_is_what_fills(small_disk: Path) -> None:
    # 20,000 records through a spool bounded at 500 on a 512 KiB disk: the bound drops the
    # oldest, the disk never fills (SQLite's log is checkpointed, near a full disk at every
    # commit, so it never takes the headroom).
    sp = Spool(small_disk / "s.sqlite", max_records=500)
    lowest = free_bytes(small_disk)
    for n in range(0, 20_000, 4):
        sp.put_many([item(n + k) for k in range(4)], state={"a": {"seq": n + 4}})
        lowest = min(lowest, free_bytes(small_disk))
    assert sp.trouble is None and sp.disk_errors == 0
    assert len(sp) == 500 and sp.dropped == 19_500
    assert lowest >= HEADROOM_BYTES // 2, lowest  # (a commit's pages may dip into the headroom)
    sp.close()


def test_a_read_only_file_system_says_read_only(small_disk: Path) -> None:
    # e.g. an SD card the kernel remounted read-only after errors, found at start-up
    with Spool(small_disk / "s.sqlite") as sp:
        sp.put_many([item(0)])
    r = subprocess.run(["mount", "-o", "remount,ro", str(small_disk)], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    try:
        assert os.statvfs(small_disk).f_flag & os.ST_RDONLY  # the kernel's own flag
        for path in (small_disk / "s.sqlite", small_disk / "new.sqlite", small_disk / "d" / "x.sqlite"):
            with pytest.raises(SpoolError) as e:
                Spool(path)
            msg = str(e.value)
            assert "read-only" in msg and "permissions" not in msg and str(path.parent) in msg, msg
    finally:
        subprocess.run(["mount", "-o", "remount,rw", str(small_disk)], capture_output=True)


# -- the daemon ------------------------------------------------------------------------------


@pytest.fixture
def disk_rig(tmp_path: Path, small_disk: Path):
    with private_broker(broker_kinds()[0], tmp_path / "broker") as broker:
        pty = Pty(tmp_path / "ttyDF")
        relay = Relay(broker.port)
        col = collect(broker.host, broker.port, ["test/station/#"])
        daemon = None
        try:
            def make(extra: str = "") -> DaemonProcess:
                nonlocal daemon
                cfg = write_config(tmp_path / "df.toml", pty.path, relay.port,
                                   small_disk / "spool.sqlite")
                cfg.write_text(cfg.read_text() + extra)
                daemon = DaemonProcess(cfg, tmp_path / "daemon.log")
                return daemon
            yield make, pty, relay, col, small_disk
        finally:
            if daemon is not None:
                daemon.kill()
            col.close()
            relay.close()
            pty.unplug()


def _edges(col) -> list[int]:
    seqs, _ = seq_report(edges_of(col.snapshot()))
    return seqs


@pytest.mark.slow
def test_daemon_on_a_full_disk_keeps_running_and_sends_everything_once_space_returns(disk_rig) -> None:
    make, pty, relay, col, disk = disk_rig
    daemon = make()
    filler = fill(disk, 160 * 1024)
    relay.cut()  # the broker is away: everything goes to the spool
    daemon.start()
    daemon.wait_log("opened", 15)
    wave = SquareWave(pty, rate_hz=1000.0, half_period_ms=5)  # 200 edges/s
    wave.run_for(2.0)
    for _ in range(10):
        if "cannot be written (the disk is full)" in daemon.current_log():
            break
        wave.run_for(1.0)
    assert "cannot be written (the disk is full)" in daemon.current_log(), daemon.log_text()[-3000:]
    assert daemon.proc is not None and daemon.proc.poll() is None
    # the broker returns while the disk is still full: stored and held records are sent live
    relay.resume()
    wave.run_for(1.0)
    n = wave.toggles
    col.wait_for(lambda: len(_edges(col)) >= n, 30, f"{n} edges with the disk full")
    assert _edges(col)[:n] == list(range(1, n + 1))
    # space returns: the spool stores again by itself
    filler.unlink()
    wave.run_for(2.0)
    daemon.wait_log("is writable again", 10)
    n = wave.toggles
    col.wait_for(lambda: len(_edges(col)) >= n, 30, f"{n} edges")
    seqs = _edges(col)
    assert seqs[:n] == list(range(1, n + 1))
    daemon.signal(signal.SIGTERM)
    assert daemon.wait(20) == 0
    assert "Traceback" not in daemon.log_text()


@pytest.mark.slow
def test_daemon_spool_bound_fills_before_the_disk_and_drops_are_counted(disk_rig) -> None:
    make, pty, relay, col, disk = disk_rig
    daemon = make("spool_max_records = 300\n")
    relay.cut()
    daemon.start()
    daemon.wait_log("opened", 15)
    wave = SquareWave(pty, rate_hz=1000.0, half_period_ms=5)
    lowest = free_bytes(disk)
    for _ in range(6):
        wave.run_for(0.5)
        lowest = min(lowest, free_bytes(disk))
    log = daemon.current_log()
    assert "is full (300 records)" in log and "dropped" in log, log[-3000:]
    assert "cannot be written" not in log and lowest > HEADROOM_BYTES
    relay.resume()
    n = wave.toggles
    # The newest edges survive (the overflow policy drops states, stats first, then the oldest
    # edges): what arrives is a contiguous run of seq ending at the last toggle.
    col.wait_for(lambda: bool(_edges(col)) and max(_edges(col)) >= n, 30, "the last edge")
    time.sleep(0.5)
    seqs = sorted(set(_edges(col)))
    assert seqs == list(range(seqs[0], n + 1)) and seqs[0] > 1
    assert 100 <= len(seqs) <= 300
    daemon.signal(signal.SIGTERM)
    assert daemon.wait(20) == 0
