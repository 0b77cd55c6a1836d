"""`streamcond replay` end to end: the demo against its golden file and against the truth of
the scenario it was generated from."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import pytest

from streamcond.config import config_from_dict, load_config
from streamcond.golden import Edge, compare
from streamcond.progress import Progress
from streamcond.replay import run_replay

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "replay_data" / "orchard_pump.csv"
GOLDEN = ROOT / "replay_data" / "orchard_pump.golden.jsonl"
CONFIG = ROOT / "config" / "orchard_pump.toml"
TRUTH = json.loads((ROOT / "replay_data" / "orchard_pump.truth.json").read_text())


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "streamcond", *args], cwd=ROOT, capture_output=True, text=True
    )


@pytest.fixture(scope="module")
def demo_records():
    res = run_replay(load_config(CONFIG), DEMO, keep_records=True)
    return res.records


def test_demo_matches_golden_via_cli():
    r = run_cli("replay", str(DEMO), "-c", str(CONFIG), "--expect", str(GOLDEN))
    assert r.returncode == 0, r.stderr
    assert "replay matches" in r.stderr


def test_golden_difference_exits_1_with_readable_diff(tmp_path):
    lines = GOLDEN.read_text().splitlines()
    out = []
    dropped = moved = False
    for line in lines:
        rec = json.loads(line)
        if rec["kind"] == "edge" and rec["channel"] == "pump" and not dropped:
            dropped = True  # one edge removed from the golden file: "unexpected"
            continue
        if rec["kind"] == "edge" and rec["channel"] == "tank_high" and not moved:
            moved = True
            rec["t"] += 0.25  # one edge moved
        out.append(json.dumps(rec))
    golden = tmp_path / "golden.jsonl"
    golden.write_text("\n".join(out) + "\n")
    r = run_cli("replay", str(DEMO), "-c", str(CONFIG), "--expect", str(golden))
    assert r.returncode == 1
    assert "channel pump:" in r.stderr and "unexpected" in r.stderr
    assert "channel tank_high:" in r.stderr and "moved to" in r.stderr
    assert "Traceback" not in r.stderr


def test_chunking_does_not_change_the_records(tmp_path):
    outs = []
    for chunk in ("7", "1000", None):
        ev = tmp_path / f"ev{chunk}.jsonl"
        args = ["replay", str(DEMO), "-c", str(CONFIG), "--events", str(ev)]
        if chunk:
            args += ["--chunk", chunk]
        r = run_cli(*args)
        assert r.returncode == 0, r.stderr
        recs = ev.read_text().splitlines()
        assert json.loads(recs[-1])["kind"] == "summary"
        outs.append(recs[:-1])  # the summary carries the run time
    assert outs[0] == outs[1] == outs[2]


def test_summary(demo_records):
    s = demo_records[-1]
    assert s["kind"] == "summary"
    assert s["rows"] == TRUTH["rows"] and s["bad_lines"] == 0 and s["gaps"] == 0
    assert s["sample_rate_hz"] == pytest.approx(TRUTH["rate_hz"])
    assert s["edges"] == {
        ch: sum(1 for r in demo_records if r["kind"] == "edge" and r["channel"] == ch)
        for ch in ("tank_high", "pump", "flow")
    }


def _edges(records, ch):
    return [r for r in records if r["kind"] == "edge" and r["channel"] == ch]


def test_pump_edges_match_the_scenario(demo_records):
    # Truth from the generator: the contactor's switching instants. The lowpass (5 Hz) delay is
    # compensated; the inrush makes starts cross 4 A before the run-up completes, so edges may
    # lead the contactor by up to the run-up time and lag the stop by the current's decay.
    e = _edges(demo_records, "pump")
    runs = TRUTH["pump"]["runs"]
    assert [r["edge"] for r in e] == ["rising", "falling"] * len(runs)
    for run, on, off in zip(runs, e[::2], e[1::2]):
        assert abs(on["t"] - run["start"]) < 0.1
        assert abs(off["t"] - run["stop"]) < 0.1
    duty = sum(off["t"] - on["t"] for on, off in zip(e[::2], e[1::2])) / TRUTH["duration_s"]
    assert duty == pytest.approx(TRUTH["pump"]["duty"], abs=0.005)


def test_flow_pulses_counted_exactly(demo_records):
    e = _edges(demo_records, "flow")
    rising = sum(1 for r in e if r["edge"] == "rising")
    assert rising == TRUTH["flow"]["pulses"]


def test_tank_edges_follow_the_high_mark(demo_records):
    e = _edges(demo_records, "tank_high")
    marks = [c for c in TRUTH["level"]["crossings"] if c["mark"] == "high"]
    assert len(e) == len(marks)
    for edge, mark in zip(e, marks):
        assert edge["edge"] == mark["direction"]
        # Hysteresis fires past the mark: a rise at mark + h, a fall at mark − h (h = 4 cm), so
        # the edge follows the mark crossing by about h / slope; the demo's slopes at the marks
        # are 0.15–0.34 mA/s = 0.0375–0.085 m/s (generator truth), i.e. 0.5–1.1 s, and the
        # noise moves the last crossing by a few tenths of a second more.
        assert 0.0 < edge["t"] - mark["t"] < 2.0


def test_state_before_edges_and_seq_contiguous(demo_records):
    for ch in ("tank_high", "pump", "flow"):
        recs = [r for r in demo_records if r.get("channel") == ch]
        assert recs[0]["kind"] == "state"
        seqs = [r["seq"] for r in recs if r["kind"] == "edge"]
        assert seqs == list(range(1, len(seqs) + 1))


def test_bad_lines_and_gaps_in_a_recording(tmp_path):
    rec = tmp_path / "rec.csv"
    rows = ["t,a"]
    for i in range(100):
        rows.append(f"{i * 10},{(i // 10) % 2 * 10}")
        if i == 30:
            rows.append("garbage,,,")
        if i == 40:
            rows.append("\x00\x01\x02")
    rows.insert(60, "2000,5")  # out of order (a jump, then back)
    rec.write_text("\n".join(rows) + "\n")
    cfg = config_from_dict({
        "source": {"kind": "file", "time_column": "t", "time_scale": 0.001},
        "channel": [{"name": "a", "band": {"low": 2, "high": 8}}],
    })
    res = run_replay(cfg, rec, keep_records=True)
    s = res.summary
    assert s["bad_lines"] == 2
    gaps = [r for r in res.records if r["kind"] == "gap"]
    assert [g["reason"] for g in gaps] == ["jump", "time_reset"]
    assert s["edges"]["a"] == 9


@pytest.mark.parametrize(
    "args, fragment",
    [
        (["replay", "nope.csv", "-c", str(CONFIG)], "does not exist"),
        (["replay", str(DEMO), "-c", str(CONFIG), "--chunk", "0"], "must be 1 or more"),
        (["replay", str(DEMO), "-c", str(CONFIG), "--expect", "nope.jsonl"], "does not exist"),
    ],
)
def test_usage_and_input_errors_exit_2(args, fragment):
    r = run_cli(*args)
    assert r.returncode == 2 and fragment in r.stderr and "Traceback" not in r.stderr


def test_missing_column_is_named(tmp_path):
    rec = tmp_path / "r.csv"
    rec.write_text("t_ms,level_ma\n0,12\n4,12\n")
    r = run_cli("replay", str(rec), "-c", str(CONFIG), "--events", str(tmp_path / "out.jsonl"))
    assert r.returncode == 2
    assert "channel[1].column 'pump_a' is not a column of the recording" in r.stderr


def test_speed_paces_by_sample_time():
    now = [0.0]  # a clock that only the pacing's sleeps move: no real time involved

    def sleep(d: float) -> None:
        assert d > 0
        now[0] += d

    cfg = load_config(CONFIG)
    res = run_replay(cfg, DEMO, speed=20.0, sleep=sleep, clock=lambda: now[0])
    # 180 s of samples at 20x take 9 s; pacing is by sample time from the first paced block
    first_block_t = 31 * 0.004  # the first 32-row block ends at t = 0.124 s
    assert now[0] == pytest.approx((TRUTH["duration_s"] - 0.004 - first_block_t) / 20.0, abs=1e-9)
    assert res.summary["rows"] == TRUTH["rows"]


def test_progress_line_on_a_terminal():
    class Tty(io.StringIO):
        def isatty(self):
            return True

    s = Tty()
    p = Progress(10 << 20, stream=s, min_interval_s=0.0, show_after_s=0.0)
    p.update(5 << 20, 1000, 90.0)
    p.update(10 << 20, 2000, 180.0)
    p.close()
    assert "50.0%" in s.getvalue() and "100.0%" in s.getvalue() and "rows/s" in s.getvalue()
    quiet = io.StringIO()
    Progress(10 << 20, stream=quiet).update(1, 1)
    assert quiet.getvalue() == ""


def test_compare_pairs_moved_missing_and_unexpected():
    exp = [Edge("a", 1.0, 1), Edge("a", 2.0, 0), Edge("a", 3.0, 1)]
    got = [Edge("a", 1.0, 1), Edge("a", 2.5, 0), Edge("a", 9.0, 0)]
    lines = compare(exp, got, 1e-6)
    assert lines[0].startswith("channel a: 3 edges expected, 3 produced; 1 moved, 1 missing, 1 unexpected")
    assert compare(exp, exp, 0.0) == []


def test_plain_recording_without_time_is_refused(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[source]\nkind = "file"\n[[channel]]\nname = "level_ma"\nband = { low = 1, high = 2 }\n')
    r = run_cli("replay", str(DEMO), "-c", str(cfg), "--events", str(tmp_path / "out.jsonl"))
    assert r.returncode == 2 and "carries no sample time" in r.stderr


def test_capture_replays_with_host_times(tmp_path):
    # A capture made of the demo's lines with host times 4 ms apart and a 1000 s offset: a
    # config without time column uses the host times and gives the demo's edges shifted by
    # exactly that offset (the demo's own clock starts at 0 and ticks in 4 ms steps).
    import numpy as np

    from streamcond.io.capture import CaptureWriter

    raw = DEMO.read_bytes().splitlines()
    lines = [b",".join(line.split(b",")[1:]) for line in raw]  # drop the MCU's time column
    times = 1000.0 + np.r_[0.0, np.arange(len(lines) - 1) * 0.004]
    cap = tmp_path / "cap.txt"
    w = CaptureWriter(cap)
    w.write(lines, times)
    w.close()
    base = CONFIG.read_text()
    cfg = tmp_path / "c.toml"
    cfg.write_text(base.replace('time_column = "t_ms"', "").replace("time_scale = 0.001", ""))
    res = run_replay(load_config(cfg), cap, keep_records=True)
    ref = run_replay(load_config(CONFIG), DEMO, keep_records=True)
    e1 = [(r["channel"], r["level"], r["t"]) for r in res.records if r["kind"] == "edge"]
    e0 = [(r["channel"], r["level"], r["t"]) for r in ref.records if r["kind"] == "edge"]
    assert len(e1) == len(e0)
    assert all(a[:2] == b[:2] and abs(a[2] - 1000.0 - b[2]) < 1e-6 for a, b in zip(e1, e0))
