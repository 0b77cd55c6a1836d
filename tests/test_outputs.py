"""Files a user must never lose (issue 12, items 1–5, 10, 13, 17): `replay` never writes over an
input, never replaces an existing file unless told, creates no directory behind the user's back,
fails on an unwritable path before any work; `--expect` never writes the golden file;
`--update-golden` is the explicit act; the events file rotates; Ctrl-C ends cleanly."""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from streamcond.io.eventlog import EventLog

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "replay_data" / "orchard_pump.csv"
GOLDEN = ROOT / "replay_data" / "orchard_pump.golden.jsonl"
CONFIG = ROOT / "config" / "orchard_pump.toml"


def run_cli(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "streamcond", *args], cwd=cwd, capture_output=True, text=True
    )


@pytest.fixture
def work(tmp_path: Path) -> Path:
    """A copy of the demo recording, config and golden file in a scratch folder."""
    for f in (DEMO, CONFIG, GOLDEN):
        shutil.copy(f, tmp_path / f.name)
    return tmp_path


def _replay(work: Path, *extra: str) -> subprocess.CompletedProcess:
    return run_cli("replay", "orchard_pump.csv", "-c", "orchard_pump.toml", *extra, cwd=work)


# -- 1: an output path that is an input ----------------------------------------------------------


@pytest.mark.parametrize("name, label", [
    ("orchard_pump.csv", "recording"),
    ("orchard_pump.toml", "config"),
    ("./sub/../orchard_pump.csv", "recording"),  # the same file by another spelling
])
def test_events_onto_an_input_is_refused_and_the_input_kept(work, name, label):
    (work / "sub").mkdir()
    before = {p.name: p.read_bytes() for p in work.iterdir() if p.is_file()}
    r = _replay(work, "--events", name, "--force")  # not even --force writes over an input
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert f"is the {label}" in r.stderr
    assert {p.name: p.read_bytes() for p in work.iterdir() if p.is_file()} == before


def test_events_onto_a_hard_link_of_the_recording_is_refused(work):
    os.link(work / "orchard_pump.csv", work / "alias.csv")
    r = _replay(work, "--events", "alias.csv", "--force")
    assert r.returncode == 2 and "is the recording" in r.stderr
    assert (work / "alias.csv").stat().st_size == DEMO.stat().st_size


# -- 2: the golden file being compared is never written ------------------------------------------


def test_expect_never_writes_the_golden_file(work):
    g = work / "orchard_pump.golden.jsonl"
    lines = g.read_text().splitlines()
    # drop one pump edge: the replay then differs from the golden file
    k = next(i for i, l in enumerate(lines) if '"kind":"edge","channel":"pump"' in l)
    g.write_text("\n".join(lines[:k] + lines[k + 1 :]) + "\n")
    broken = g.read_bytes()
    r = _replay(work, "--expect", g.name, "--events", g.name)
    assert r.returncode == 2 and "golden file being compared" in r.stderr
    r = _replay(work, "--expect", g.name)
    assert r.returncode == 1 and "channel pump" in r.stderr
    assert g.read_bytes() == broken  # the same command fails again: nothing was "fixed"
    assert _replay(work, "--expect", g.name).returncode == 1


def test_update_golden_is_the_explicit_act_and_says_what_changed(work):
    g = work / "orchard_pump.golden.jsonl"
    lines = g.read_text().splitlines()
    k = next(i for i, l in enumerate(lines) if '"kind":"edge","channel":"pump"' in l)
    g.write_text("\n".join(lines[:k] + lines[k + 1 :]) + "\n")
    r = _replay(work, "--expect", g.name, "--update-golden")
    assert r.returncode == 0, r.stderr
    assert "what changed" in r.stderr and "channel pump" in r.stderr and "unexpected" in r.stderr
    assert _replay(work, "--expect", g.name).returncode == 0
    r = _replay(work, "--expect", g.name, "--update-golden")
    assert r.returncode == 0 and "unchanged" in r.stderr
    new = work / "new.golden.jsonl"
    r = _replay(work, "--expect", new.name, "--update-golden")
    assert r.returncode == 0 and "wrote the new golden file" in r.stderr and new.exists()
    # the golden file of --update-golden is an output: never one of the other inputs
    r = _replay(work, "--expect", "orchard_pump.csv", "--update-golden")
    assert r.returncode == 2 and "is the recording" in r.stderr
    assert (work / "orchard_pump.csv").read_bytes() == DEMO.read_bytes()


# -- 3: an existing events file ------------------------------------------------------------------


def test_existing_events_file_needs_force_or_append(work):
    out = work / "out.jsonl"
    r = _replay(work, "--events", out.name)
    assert r.returncode == 0 and "records written to out.jsonl (a new file)" in r.stderr
    first = out.read_text()
    n = len(first.splitlines())
    r = _replay(work, "--events", out.name)
    assert r.returncode == 2 and "already exists" in r.stderr and "--force" in r.stderr
    assert out.read_text() == first
    assert _replay(work, "--events", out.name, "--append").returncode == 0
    assert len(out.read_text().splitlines()) == 2 * n
    assert _replay(work, "--events", out.name, "--force").returncode == 0
    assert len(out.read_text().splitlines()) == n
    assert run_cli("replay", "x", "-c", "y", "--force", "--append").returncode == 2


def test_a_failed_replay_leaves_no_empty_events_file(work):
    (work / "bad.csv").write_text("t_ms,level_ma\n0,4\n")  # pump_a and flow_v are missing
    r = run_cli("replay", "bad.csv", "-c", "orchard_pump.toml", "--events", "out.jsonl", cwd=work)
    assert r.returncode == 2 and "is not a column" in r.stderr
    assert not (work / "out.jsonl").exists()  # so the corrected command is not refused


# -- 4: directories and unwritable paths ---------------------------------------------------------


def test_missing_directory_is_not_created(work):
    r = _replay(work, "--events", "nonexistent/dir/out.jsonl")
    assert r.returncode == 2 and "does not exist" in r.stderr and "nonexistent/dir" in r.stderr
    assert not (work / "nonexistent").exists()


def test_unwritable_path_fails_before_any_work(work):
    # /proc takes no new files, even for root: the open fails, before the replay starts
    r = _replay(work, "--events", "/proc/streamcond-test-out.jsonl")
    assert r.returncode == 2 and "cannot be written" in r.stderr
    assert "replayed" not in r.stderr  # no work was done
    r = _replay(work, "--events", str(work))
    assert r.returncode == 2 and "is a directory" in r.stderr


def test_dev_null_needs_no_force(work):
    r = _replay(work, "--events", "/dev/null")
    assert r.returncode == 0, r.stderr


def test_stdout_still_works(work):
    r = _replay(work, "--events", "-")
    assert r.returncode == 0
    assert json.loads(r.stdout.splitlines()[-1])["kind"] == "summary"


# -- 10: an empty golden file; comparing faults, gaps and totals ---------------------------------


@pytest.mark.parametrize("text", ["", "\n\n"])
def test_empty_golden_is_an_input_error(work, text):
    (work / "empty.jsonl").write_text(text)
    r = _replay(work, "--expect", "empty.jsonl")
    assert r.returncode == 2 and "is empty" in r.stderr and "unexpected" not in r.stderr


def test_compare_all_reports_faults_and_totals(work):
    g = work / "orchard_pump.golden.jsonl"
    recs = [json.loads(l) for l in g.read_text().splitlines()]
    faults = [r for r in recs if r["kind"] == "fault"]
    assert faults, "the demo has a transmitter fault"
    recs.remove(faults[0])
    recs[-1]["totals"]["flow"]["total"] += 1
    g.write_text("".join(json.dumps(r) + "\n" for r in recs))
    assert _replay(work, "--expect", g.name).returncode == 0  # the edges still agree
    r = _replay(work, "--expect", g.name, "--compare-all")
    assert r.returncode == 1
    assert "faults and gaps" in r.stderr and "fault tank_high start" in r.stderr
    assert "totals of channel flow" in r.stderr
    assert _replay(work, "--expect", GOLDEN.name + ".x", "--compare-all").returncode == 2
    shutil.copy(GOLDEN, g)
    r = _replay(work, "--expect", g.name, "--compare-all")
    assert r.returncode == 0 and "faults, gaps and totals agree" in r.stderr


# -- 5: rotation of the events file --------------------------------------------------------------


def test_events_file_rotates_by_size_and_keeps_a_count(tmp_path):
    p = tmp_path / "ev.jsonl"
    rec = {"kind": "edge", "channel": "a", "t": 1.0, "edge": "rising", "level": 1, "value": 2.0,
           "seq": 100}  # seq 100..199: every line the same length
    size = len(json.dumps(rec, separators=(",", ":"))) + 1
    w = EventLog(str(p), mode="new", max_bytes=10 * size, keep=3)
    for i in range(100):
        w({**rec, "seq": 100 + i})
    w.close()
    files = sorted(tmp_path.iterdir())
    assert [f.name for f in files] == ["ev.jsonl", "ev.jsonl.1", "ev.jsonl.2", "ev.jsonl.3"]
    assert all(f.stat().st_size <= 10 * size for f in files)
    seqs = {f.name: [json.loads(l)["seq"] for l in f.read_text().splitlines()] for f in files}
    # newest in the live file, then .1, .2, .3; nothing split, the oldest dropped
    assert seqs["ev.jsonl"] == list(range(190, 200))
    assert seqs["ev.jsonl.1"] == list(range(180, 190))
    assert seqs["ev.jsonl.3"] == list(range(160, 170))
    assert w.rotations == 9


def test_events_file_rotates_by_age(tmp_path):
    now = [0.0]
    p = tmp_path / "ev.jsonl"
    w = EventLog(str(p), mode="new", max_age_s=60.0, keep=2, clock=lambda: now[0])
    for i in range(5):
        w({"kind": "gap", "t": float(i)})
        now[0] += 45.0  # a record every 45 s: a new file after 60 s
    w.close()
    assert sorted(f.name for f in tmp_path.iterdir()) == ["ev.jsonl", "ev.jsonl.1", "ev.jsonl.2"]


def test_rotation_config_keys(tmp_path):
    from streamcond.config import config_from_dict
    from streamcond.errors import ConfigError
    from streamcond.io.eventlog import from_config

    base = {"source": {"kind": "file", "sample_rate_hz": 10.0},
            "channel": [{"name": "a", "band": {"low": 0, "high": 1}}]}
    out = {"events": str(tmp_path / "d.jsonl"), "rotate": {"max_bytes": 4096, "keep": 2}}
    cfg = config_from_dict({**base, "output": out})
    w = from_config(cfg.output)
    assert w is not None and w.max_bytes == 4096 and w.keep == 2
    w.close()
    # the daemon appends across restarts
    (tmp_path / "d.jsonl").write_text('{"kind":"gap","t":0}\n')
    w = from_config(cfg.output)
    w({"kind": "gap", "t": 1.0})
    w.close()
    assert len((tmp_path / "d.jsonl").read_text().splitlines()) == 2
    with pytest.raises(ConfigError, match="output.rotate needs max_bytes or max_age_s"):
        config_from_dict({**base, "output": {"rotate": {"keep": 3}}})


# -- 13: Ctrl-C in a replay ----------------------------------------------------------------------


def test_ctrl_c_says_where_exits_130_and_ends_the_events_file(work):
    out = work / "out.jsonl"
    p = subprocess.Popen(
        [sys.executable, "-m", "streamcond", "replay", "orchard_pump.csv", "-c", "orchard_pump.toml",
         "--events", out.name, "--speed", "20"],
        cwd=work, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and (not out.exists() or out.stat().st_size < 2000):
        time.sleep(0.05)  # --speed flushes every record: wait until the replay is under way
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=30)
    assert p.returncode == 130, err
    assert "interrupted at t = " in err and "Traceback" not in err
    last = json.loads(out.read_text().splitlines()[-1])
    assert last["kind"] == "interrupted" and 0 < last["t"] < 179.996
    assert float(err.split("interrupted at t = ")[1].split()[0]) == pytest.approx(last["t"], abs=1e-3)


# -- 17: -v / -q after the command ---------------------------------------------------------------


def test_verbosity_flags_after_the_command(work):
    r = _replay(work, "--events", "-", "-q")
    assert r.returncode == 0 and "replayed" not in r.stderr
    r = run_cli("-q", "replay", "orchard_pump.csv", "-c", "orchard_pump.toml", "--events", "-",
                cwd=work)
    assert r.returncode == 0 and "replayed" not in r.stderr
    r = run_cli("check", "-c", "orchard_pump.toml", "-v", cwd=work)
    assert r.returncode == 0, r.stderr
    from streamcond.cli import build_parser

    a = build_parser().parse_args(["-v", "check", "-c", "x", "-vv"])
    assert a.verbose + a.verbose_sub == 3


# -- 13: progress driven by sample time ----------------------------------------------------------


class _Recorder:
    def __init__(self) -> None:
        self.calls: list[tuple[int, int, float | None]] = []

    def update(self, done: int, rows: int, t: float | None = None) -> None:
        self.calls.append((done, rows, t))


@pytest.mark.parametrize("speed", [None, 1000.0])
def test_progress_moves_with_sample_time(speed):
    from streamcond.config import load_config
    from streamcond.replay import run_replay

    rec = _Recorder()
    # the demo (45,000 rows, 1.3 MB) is a single read block: progress used to move once, at
    # the end; now after every piece fed to the pipeline, also when paced by --speed
    now = [0.0]
    run_replay(load_config(CONFIG), DEMO, chunk=1000, speed=speed, progress=rec,
               sleep=lambda s: now.__setitem__(0, now[0] + s), clock=lambda: now[0])
    ts = [t for _, _, t in rec.calls]
    assert len(rec.calls) >= 45
    assert ts == sorted(ts) and ts[0] < 5.0 and ts[-1] == pytest.approx(179.996)
    done = [d for d, _, _ in rec.calls]
    assert done == sorted(done) and done[-1] == DEMO.stat().st_size
    assert done[len(done) // 2] < 0.7 * done[-1]  # inside the block, bytes follow the rows


def test_progress_line_in_a_real_terminal(tmp_path):
    # a real terminal (tmux, on a private socket) shows the line on a small file under --speed
    if shutil.which("tmux") is None:  # pragma: no cover - tmux is in the test image
        pytest.fail("tmux is needed for this test")
    sock = f"streamcond-test-{os.getpid()}"
    out = tmp_path / "screen.txt"
    cmd = (f"cd {ROOT} && {sys.executable} -m streamcond replay {DEMO} -c {CONFIG} --events "
           f"{tmp_path / 'ev.jsonl'} --speed 30; sleep 30")
    subprocess.run(["tmux", "-L", sock, "new-session", "-d", "-x", "150", "-y", "10", cmd],
                   check=True)
    try:
        seen = ""
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline and "t = " not in seen:
            time.sleep(0.3)
            seen = subprocess.run(["tmux", "-L", sock, "capture-pane", "-p"],
                                  capture_output=True, text=True).stdout
        assert "t = " in seen and "rows/s" in seen, seen
        t1 = float(seen.split("t = ")[-1].split()[0].replace(",", ""))
        time.sleep(1.0)
        seen = subprocess.run(["tmux", "-L", sock, "capture-pane", "-p"],
                              capture_output=True, text=True).stdout
        t2 = float(seen.split("t = ")[-1].split()[0].replace(",", ""))
        assert t2 > t1  # it moves with the paced sample time
        out.write_text(seen)
    finally:
        subprocess.run(["tmux", "-L", sock, "kill-server"], capture_output=True)


# -- 9: utc in a replay of a capture -------------------------------------------------------------


def test_capture_replay_carries_utc(work):
    import numpy as np

    from streamcond.io.capture import CaptureWriter

    raw = DEMO.read_bytes().splitlines()[:2501]  # header + 10 s
    lines = [b",".join(line.split(b",")[1:]) for line in raw]
    t0 = 1764654207.0
    w = CaptureWriter(work / "cap.txt")
    w.write(lines, t0 + np.r_[0.0, np.arange(len(lines) - 1) * 0.004])
    w.close()
    cfg = work / "host.toml"
    cfg.write_text(CONFIG.read_text().replace('time_column = "t_ms"', "").replace("time_scale = 0.001", ""))
    r = run_cli("replay", "cap.txt", "-c", cfg.name, "--events", "-", cwd=work)
    assert r.returncode == 0, r.stderr
    recs = [json.loads(l) for l in r.stdout.splitlines()]
    assert recs and all("utc" in x for x in recs if x["kind"] in ("edge", "state", "stats"))
    from datetime import datetime

    for x in recs:
        if "utc" in x and x["kind"] == "edge":
            # host time is sample time here: utc is t itself, as a date (ISO 8601 parser)
            got = datetime.fromisoformat(x["utc"].replace("Z", "+00:00")).timestamp()
            assert got == pytest.approx(x["t"], abs=1e-6)


def test_capture_with_a_time_column_carries_utc_from_its_host_times(work):
    # a capture of the demo's own lines (device clock t_ms) received 0.3 s after each sample:
    # sample time stays the device's, utc is the host clock of the same instant
    import numpy as np

    from streamcond.io.capture import CaptureWriter

    raw = DEMO.read_bytes().splitlines()[:2501]
    t0 = 1764654207.0
    w = CaptureWriter(work / "cap.txt")
    w.write(raw, t0 + 0.3 + np.r_[0.0, np.arange(len(raw) - 1) * 0.004])
    w.close()
    r = run_cli("replay", "cap.txt", "-c", "orchard_pump.toml", "--events", "-", cwd=work)
    assert r.returncode == 0, r.stderr
    recs = [json.loads(l) for l in r.stdout.splitlines()]
    edges = [x for x in recs if x["kind"] == "edge"]
    assert edges and all(x["t"] < 11.0 for x in edges)  # the device's time base
    from datetime import datetime

    for x in edges:
        got = datetime.fromisoformat(x["utc"].replace("Z", "+00:00")).timestamp()
        assert got == pytest.approx(t0 + 0.3 + x["t"], abs=2e-6)


def test_parquet_capture_with_host_times_carries_utc(tmp_path):
    import tomllib

    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    from streamcond.config import config_from_dict
    from streamcond.replay import run_replay

    d = tomllib.loads(CONFIG.read_text())
    del d["source"]["time_column"], d["source"]["time_scale"]  # sample time = host time
    x = np.loadtxt(DEMO, delimiter=",", skiprows=1, max_rows=2500)
    t0 = 1764654207.0
    p = tmp_path / "cap.parquet"
    pq.write_table(pa.table({"level_ma": x[:, 1], "pump_a": x[:, 2], "flow_v": x[:, 3],
                             "_host_t": t0 + np.arange(len(x)) * 0.004}), p)
    res = run_replay(config_from_dict(d), p, keep_records=True)
    from datetime import datetime

    edges = [r for r in res.records if r["kind"] == "edge"]
    assert edges
    for e in edges:
        got = datetime.fromisoformat(e["utc"].replace("Z", "+00:00")).timestamp()
        assert got == pytest.approx(e["t"], abs=2e-6)  # host time is the sample time here


def test_rotation_never_renames_onto_an_input(tmp_path):
    # rotation renames ev.jsonl to ev.jsonl.1 ... ev.jsonl.keep and deletes the oldest: a config
    # (or spool) that happens to carry one of those names must be refused before anything runs
    from streamcond.errors import InputError

    cfg = tmp_path / "ev.jsonl.2"
    cfg.write_text("# a config\n")
    with pytest.raises(InputError, match=r"rotates into .*ev\.jsonl\.2.*which is the config"):
        EventLog(str(tmp_path / "ev.jsonl"), mode="append", max_bytes=100, keep=3,
                 inputs=[("config", cfg)])
    assert cfg.read_text() == "# a config\n" and not (tmp_path / "ev.jsonl").exists()
    # keep = 1 never reaches .2, and without rotation nothing is renamed at all
    EventLog(str(tmp_path / "ev.jsonl"), mode="append", max_bytes=100, keep=1,
             inputs=[("config", cfg)]).close()
    EventLog(str(tmp_path / "ev.jsonl"), mode="append", inputs=[("config", cfg)]).close()
