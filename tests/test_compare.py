"""`streamcond compare` and the many-recordings machinery (streamcond.batch): counts against
closed forms on synthetic recordings, the report formats, exit codes, the replay of several
recordings, and identical results from the local process pool and a real Dask LocalCluster.

The recordings are made here from signals whose edges are known exactly:

* ``tri``: a triangle wave between 0 and 1, slope ±1 per second, period 2 s. A linear ramp
  x = v0 + s·t crosses a threshold u at t = (u − v0)/s (a closed form; linear interpolation
  between samples of a linear signal is exact), so the band 0.4/0.6 gives a rising edge at
  2k + 0.6 s and a falling edge at 2k + 1.6 s, and the band 0.45/0.65 moves them by +0.05 s and
  −0.05 s. The centre is crossed twice a period.
* ``pulse``: 0/1 pulses, alternately 50 ms and 5 ms long, one of each per 2 s; a 20 ms dwell
  keeps the long pulses (their edges keep their crossing instants) and removes the short ones.
"""

from __future__ import annotations

import csv
import json
import os
import random
import re
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from streamcond import compare as cmp
from streamcond.golden import Edge, compare as golden_compare, diff_edges

RATE = 1000.0
PERIOD = 2.0

CONFIG = """
[source]
kind = "file"
format = "csv"
time_column = "t"

[[channel]]
name = "tri"
band = {{ low = {tri_low}, high = {tri_high} }}

[[channel]]
name = "pulse"
band = {{ low = 0.3, high = 0.7 }}
dwell = {{ rise_s = {dwell}, fall_s = {dwell} }}

[stats]
interval_s = 10.0

[output]
events = "-"
"""


def make_recording(path: Path, periods: int) -> None:
    """``periods`` full periods plus 0.2 s (the triangle rises to 0.2 only, no pulse: no edge, no centre
    crossing in the last, partial stats window)."""
    n = int(round((periods * PERIOD + 0.2) * RATE))
    k = np.arange(n)
    t = k / RATE
    phase = np.mod(k, int(PERIOD * RATE)) / RATE
    tri = np.where(phase <= 1.0, phase, 2.0 - phase)
    pulse = (((phase >= 0.25) & (phase < 0.30)) | ((phase >= 1.25) & (phase < 1.255))).astype(float)
    with open(path, "w") as fh:
        fh.write("t,tri,pulse\n")
        np.savetxt(fh, np.column_stack([t, tri, pulse]), fmt=["%.3f", "%.6f", "%.0f"], delimiter=",")


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    d = tmp_path_factory.mktemp("fleet")
    (d / "month").mkdir()
    make_recording(d / "month" / "st1.csv", 10)
    make_recording(d / "month" / "st2.csv", 5)
    (d / "a.toml").write_text(CONFIG.format(tri_low=0.4, tri_high=0.6, dwell=0.0))
    (d / "b.toml").write_text(CONFIG.format(tri_low=0.45, tri_high=0.65, dwell=0.02))
    return d


def run_cli(cwd: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamcond", *args], cwd=cwd,
                          capture_output=True, text=True)


@pytest.fixture
def cli(fleet, monkeypatch, capsys):
    """The command line in this process (its pool's workers fork from here, with everything
    imported): ``cli(*args)`` → (exit code, stdout, stderr)."""
    from streamcond.cli import main

    monkeypatch.chdir(fleet)

    def run(*args: str) -> tuple[int, str, str]:
        try:
            code = main(list(args))
        except SystemExit as e:  # argparse's usage errors
            code = e.code
        out, err = capsys.readouterr()
        return code, out, err

    return run


def compare_json(cli, *extra: str, a: str = "a.toml", b: str = "b.toml") -> tuple[int, dict]:
    code, out, err = cli("compare", a, b, "month/*.csv", "--json", *extra)
    assert "Traceback" not in err
    return code, json.loads(out)


def expected_channels(periods: int, tolerance: float) -> dict:
    """The closed-form answer for a recording of ``periods`` periods (module docstring)."""
    moved = 2 * periods if tolerance < 0.05 else 0  # every tri edge moves by 0.05 s
    return {
        "tri": {"edges_a": 2 * periods, "edges_b": 2 * periods, "moved": moved, "missing": 0,
                "added": 0, "max_moved_s": 0.05 if moved else 0.0,
                "raw_crossings_a": 2 * periods, "raw_crossings_b": 2 * periods,
                "suppression_a": 1.0, "suppression_b": 1.0},
        "pulse": {"edges_a": 4 * periods, "edges_b": 2 * periods, "moved": 0,
                  "missing": 2 * periods, "added": 0, "max_moved_s": 0.0,
                  "raw_crossings_a": 4 * periods, "raw_crossings_b": 4 * periods,
                  "suppression_a": 1.0, "suppression_b": 2.0},
    }


def strip_changed(doc: dict) -> list:
    return [(r["recording"], {n: {k: v for k, v in ch.items() if k != "changed"}
                              for n, ch in r["channels"].items()}) for r in doc["recordings"]]


def test_counts_match_the_closed_forms(cli):
    code, doc = compare_json(cli, "--tolerance", "0.049")
    assert code == 1
    assert list(doc) == ["recordings"]
    assert [r["recording"] for r in doc["recordings"]] == ["month/st1.csv", "month/st2.csv"]
    assert strip_changed(doc) == [("month/st1.csv", expected_channels(10, 0.049)),
                                  ("month/st2.csv", expected_channels(5, 0.049))]
    st1 = doc["recordings"][0]
    assert st1["rows"] == 20200 and st1["bad_lines"] == 0
    # a tolerance above the 0.05 s shift: the triangle's edges match, only the pulses differ
    code, doc = compare_json(cli, "--tolerance", "0.051")
    assert strip_changed(doc)[0][1] == expected_channels(10, 0.051)


def test_swapped_configs_turn_missing_into_added(cli):
    _, doc = compare_json(cli, "--tolerance", "0.051", a="b.toml", b="a.toml")
    pulse = doc["recordings"][0]["channels"]["pulse"]
    assert (pulse["edges_a"], pulse["edges_b"], pulse["missing"], pulse["added"]) == (20, 40, 0, 20)


def test_same_config_changes_nothing(cli):
    code, out, err = cli("compare", "a.toml", "a.toml", "month/st1.csv")
    assert code == 0, err
    assert "nothing changed beyond the threshold (any change)" in out


def test_threshold_count_and_percentage(cli):
    # st1: pulse 20 of 40 edges missing, tri 20 of 20 moved (tolerance 0.01 s < 0.05 s)
    assert compare_json(cli, "--tolerance", "0.01", "--threshold", "20")[0] == 0
    assert compare_json(cli, "--tolerance", "0.01", "--threshold", "19")[0] == 1
    assert compare_json(cli, "--tolerance", "0.1", "--threshold", "50%")[0] == 0
    code, doc = compare_json(cli, "--tolerance", "0.1", "--threshold", "49%")
    assert code == 1
    assert doc["recordings"][0]["channels"]["pulse"]["changed"] is True
    assert doc["recordings"][0]["channels"]["tri"]["changed"] is False
    code, _, err = cli("compare", "a.toml", "b.toml", "month/st1.csv", "--threshold", "lots")
    assert code == 2 and "neither a count nor a percentage" in err


def test_table_csv_and_list_file(cli, fleet, tmp_path):
    lst = fleet / "list.txt"
    lst.write_text("# the stations of March\nmonth/st2.csv\n./month/st1.csv  # again below\nmonth/*.csv\n")
    target = tmp_path / "what-if.csv"
    code, out, err = cli("compare", "a.toml", "b.toml", "@list.txt", "--csv", str(target),
                         "--tolerance", "0.01")
    assert code == 1, err
    lines = out.splitlines()
    assert lines[0].split()[:7] == ["recording", "channel", "edges", "A", "edges", "B", "moved"]
    assert re.search(r"month/st2.csv\s+pulse\s+20\s+10\s+0\s+10\s+0\s+-\s+20\s+20\s+1.00\s+2.00\s+changed",
                     out)
    assert lines[-1] == ("2 recording(s) compared: 4 channel(s) in 2 recording(s) changed beyond "
                         "the threshold (any change).")
    with open(target, newline="") as fh:
        rows = list(csv.DictReader(fh))
    # the list's order, without the duplicates the glob brings back
    assert [(r["recording"], r["channel"]) for r in rows] == [
        ("month/st2.csv", "tri"), ("month/st2.csv", "pulse"),
        ("month/st1.csv", "tri"), ("month/st1.csv", "pulse")]
    assert rows[3]["missing"] == "20" and rows[3]["suppression_b"] == "2.0" and rows[3]["changed"] == "1"
    # an existing output is replaced only when asked, an input never
    code, _, err = cli("compare", "a.toml", "b.toml", "month/st1.csv", "--csv", str(target))
    assert code == 2 and "exists; add --force" in err
    assert cli("compare", "a.toml", "b.toml", "month/st1.csv", "--csv", str(target), "--force")[0] == 1
    code, _, err = cli("compare", "a.toml", "b.toml", "month/st1.csv", "--csv", "a.toml", "--force")
    assert code == 2 and "is one of the inputs" in err
    assert "[source]" in (fleet / "a.toml").read_text()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_bad_input_exits_2_with_sentences(cli, fleet, tmp_path):
    def check(*args: str, says: str) -> None:
        code, out, err = cli("compare", *args)
        assert code == 2, (args, out, err)
        assert says in err and "Traceback" not in err, err

    check("a.toml", "b.toml", "month/nope.csv", says="The recording 'month/nope.csv' does not exist")
    check("a.toml", "b.toml", "month/*.parquet", says="'month/*.parquet' matches no file")
    check("a.toml", "b.toml", "month", says="is a folder")
    check("a.toml", "b.toml", "@missing.txt", says="The list file 'missing.txt' cannot be read")
    check("a.toml", "nope.toml", "month/st1.csv", says="The config file 'nope.toml' does not exist")
    nobody = f"tcp://127.0.0.1:{_free_port()}"
    check("a.toml", "b.toml", "month/st1.csv", "--jobs", "2", "--scheduler", nobody,
          says="give one of them")
    check("a.toml", "b.toml", "month/st1.csv", "--scheduler", "nonsense://x",
          says="the protocol must be one of tcp")
    check("a.toml", "b.toml", "month/st1.csv", "--scheduler", "127.0.0.1:8786",
          says="cannot be used")
    # one recording the config cannot read: the others are still reported (a real process,
    # to see that nothing but sentences reaches stderr)
    (tmp_path / "other.csv").write_text("t,x\n0,1\n0.001,2\n")
    r = run_cli(fleet, "compare", "a.toml", "b.toml", "month/st2.csv", str(tmp_path / "other.csv"),
                "--json", "--scheduler", nobody)
    assert r.returncode == 2 and "cannot be reached" in r.stderr and "Traceback" not in r.stderr
    r = run_cli(fleet, "compare", "a.toml", "b.toml", "month/st2.csv", str(tmp_path / "other.csv"),
                "--json")
    assert r.returncode == 2
    doc = json.loads(r.stdout)
    assert [x["recording"] for x in doc["recordings"]] == ["month/st2.csv"]
    assert "channel[0].column 'tri' is not a column of the recording" in doc["errors"][0]
    assert "other.csv" in r.stderr and "Traceback" not in r.stderr


def test_replay_of_several_recordings(fleet):
    r = run_cli(fleet, "replay", "month/st1.csv", "month/st2.csv", "-c", "a.toml", "--jobs", "2")
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert len(lines) == 2
    assert lines[0].startswith("month/st1.csv: replayed 20,200 rows") and "tri 20, pulse 40" in lines[0]
    assert lines[1].startswith("month/st2.csv: replayed 10,200 rows") and "tri 10, pulse 20" in lines[1]
    r = run_cli(fleet, "replay", "month/*.csv", "-c", "a.toml", "--events", "-")
    assert r.returncode == 2 and "--events takes a single recording" in r.stderr
    # one recording is still the ordinary replay (events to stdout)
    r = run_cli(fleet, "replay", "month/st2.csv", "-c", "a.toml", "-q")
    assert r.returncode == 0 and json.loads(r.stdout.splitlines()[-1])["kind"] == "summary"


def test_block_size_does_not_change_the_answer(fleet):
    # each task reads its recording in bounded blocks; tiny blocks give the same answer
    from streamcond.batch import compare_recording
    from streamcond.config import load_config

    a, b = load_config(fleet / "a.toml"), load_config(fleet / "b.toml")
    rec = str(fleet / "month" / "st1.csv")
    big = compare_recording(rec, a, b, 0.01)
    small = compare_recording(rec, a, b, 0.01, block_bytes=4096)
    assert big == small and big.channels == expected_channels(10, 0.01)


@pytest.fixture(scope="module")
def cluster():
    from dask.distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0", protocol="tcp") as c:
        assert c.scheduler_address.startswith("tcp://127.0.0.1:")
        yield c


def test_local_pool_and_local_cluster_give_identical_results(fleet, cluster):
    recs = [str(fleet / "month" / "st1.csv"), str(fleet / "month" / "st2.csv")] * 3
    local = cmp.run(str(fleet / "a.toml"), str(fleet / "b.toml"), recs, tolerance=0.01, jobs=2)
    dist = cmp.run(str(fleet / "a.toml"), str(fleet / "b.toml"), recs, tolerance=0.01,
                   scheduler=cluster.scheduler_address)
    assert [o.result for o in local] == [o.result for o in dist]
    assert local[0].result.channels == expected_channels(10, 0.01)
    # the command line, through the cluster: the same JSON as the local pool, byte for byte
    args = ("compare", "a.toml", "b.toml", "month/*.csv", "--json", "--tolerance", "0.01")
    r_local = run_cli(fleet, *args, "--jobs", "1")
    r_dist = run_cli(fleet, *args, "--scheduler", cluster.scheduler_address)
    assert r_dist.returncode == r_local.returncode == 1, r_dist.stderr
    assert r_dist.stdout == r_local.stdout
    r = run_cli(fleet, "replay", "month/*.csv", "-c", "a.toml", "--scheduler", cluster.scheduler_address)
    assert r.returncode == 0, r.stderr
    assert "tri 20, pulse 40" in r.stdout.splitlines()[0]


def _pair_reference(expected: list[Edge], got: list[Edge], tol: float) -> list[tuple]:
    """The plain statement of the golden comparison's rule (the quadratic loop it replaced):
    match in time order within the tolerance; pair each missing edge with the nearest unpaired
    unexpected edge of its level (the first on a tie) within max(1 s, 1000 · tolerance)."""
    out = []
    for ch in dict.fromkeys([e.channel for e in expected] + [e.channel for e in got]):
        a = sorted((e for e in expected if e.channel == ch), key=lambda e: e.t)
        b = sorted((e for e in got if e.channel == ch), key=lambda e: e.t)
        missing, extra, i, j = [], [], 0, 0
        while i < len(a) and j < len(b):
            if a[i].level == b[j].level and abs(a[i].t - b[j].t) <= tol:
                i, j = i + 1, j + 1
            elif a[i].t <= b[j].t:
                missing.append(a[i]); i += 1
            else:
                extra.append(b[j]); j += 1
        missing += a[i:]
        extra += b[j:]
        used, moved = set(), []
        for m in missing:
            best = None
            for k, x in enumerate(extra):
                if k not in used and x.level == m.level and (
                        best is None or abs(x.t - m.t) < abs(extra[best].t - m.t)):
                    best = k
            if best is not None and abs(extra[best].t - m.t) <= max(1.0, 1000 * tol):
                used.add(best)
                moved.append((m, extra[best]))
        out.append((ch, sorted(moved, key=lambda p: p[0].t),
                     len(missing) - len(moved), len(extra) - len(moved)))
    return out


def test_linear_time_pairing_agrees_with_the_plain_rule():
    rng = random.Random(11)
    for _ in range(400):
        exp, got = [], []
        for ch in ("a", "b"):
            for k, t in enumerate(sorted(rng.uniform(0, 20) for _ in range(rng.randint(0, 14)))):
                e = Edge(ch, round(t, 3), k % 2)
                u = rng.random()
                if u < 0.6:
                    exp.append(e); got.append(e)
                elif u < 0.75:
                    exp.append(e)
                elif u < 0.85:
                    got.append(e)
                else:
                    exp.append(e); got.append(Edge(ch, round(t + rng.uniform(-2, 2), 3), k % 2))
        tol = rng.choice([1e-6, 0.01, 0.5])
        mine = [(d.channel, sorted(d.moved, key=lambda p: p[0].t), len(d.missing), len(d.unexpected))
                for d in diff_edges(exp, got, tol)]
        assert mine == _pair_reference(exp, got, tol)
        assert bool(golden_compare(exp, got, tol)) == any(m[1] or m[2] or m[3] for m in mine)


def test_progress_reaches_the_end_and_odd_file_names(fleet, tmp_path):
    import io

    from streamcond.batch import compare_recording, is_many, open_executor, run_tasks
    from streamcond.config import load_config
    from streamcond.progress import Progress

    odd = tmp_path / "st[1].csv"  # a real file whose name looks like a glob is one recording
    odd.write_bytes((fleet / "month" / "st2.csv").read_bytes())
    assert not is_many([str(odd)]) and is_many([str(tmp_path / "st*.csv")]) and is_many(["@x"])
    recs = [str(fleet / "month" / "st1.csv"), str(odd)]
    stream = io.StringIO()
    progress = Progress(sum(os.path.getsize(r) for r in recs), stream=stream, enabled=True,
                        min_interval_s=0.0, show_after_s=0.0)
    a, b = load_config(fleet / "a.toml"), load_config(fleet / "b.toml")
    with open_executor(jobs=2) as ex:
        out = run_tasks(ex, compare_recording, recs, a, b, 0.01, progress=progress)
    assert [o.recording for o in out] == recs and not any(o.errors for o in out)
    assert re.match(r"\[#+\] 100.0%", stream.getvalue().rstrip().split("\r")[-1])


def test_readme_what_if_example_is_what_the_commands_print(tmp_path, monkeypatch, capsys):
    # the README's example, run as written: three more takes of the demo (tools/make_demo.py),
    # the config edited by its sed line, then compare; the table must be the one shown
    root = Path(__file__).resolve().parent.parent
    readme = (root / "README.md").read_text(encoding="utf-8")
    section = readme.split("## What if: `streamcond compare`")[1].split("\n## ")[0]
    script, shown = re.findall(r"```sh\n(.*?)```\n\n```\n(.*?)```", section, re.S)[0]
    for sub in ("replay_data", "config", "tools"):
        (tmp_path / sub).symlink_to(root / sub)
    setup = script.split("streamcond compare")[0]
    r = subprocess.run(["bash", "-c", setup.replace("python ", f"{sys.executable} ")],
                       cwd=tmp_path, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    argv = script.split("streamcond compare")[1].replace("\\\n", " ").split()
    argv = [a.strip("'") for a in argv if a != "--csv" and a != "what-if.csv"]
    from streamcond.cli import main

    monkeypatch.chdir(tmp_path)
    assert main(["compare", *argv]) == 1
    assert capsys.readouterr().out == shown


def test_one_read_serves_both_configs_with_the_same_records(tmp_path):
    """compare reads a recording once when both configs read it the same way: the records of
    each config are then exactly those of a replay of its own (the demo, with the station's
    config and a variant with wider bands; reference: two separate replays)."""
    import tomllib

    from streamcond.config import config_from_dict, load_config
    from streamcond.replay import run_replay, run_replays, same_reading

    root = Path(__file__).resolve().parent.parent
    demo = root / "replay_data" / "orchard_pump.csv"
    a = load_config(root / "config" / "orchard_pump.toml")
    raw = tomllib.loads((root / "config" / "orchard_pump.toml").read_text())
    for ch in raw["channel"]:
        band = ch.get("band", {})
        if "low" in band and "high" in band:
            band["low"], band["high"] = band["low"] - 0.05, band["high"] + 0.05
        elif "width" in band:
            band["width"] *= 1.5
    b = config_from_dict(raw)
    assert same_reading(a, b)

    def strip(recs):
        return [{k: v for k, v in r.items() if k != "run_time_s"} for r in recs]

    ra, rb = run_replays([a, b], demo, [None, None], keep_records=True)
    assert strip(ra.records) == strip(run_replay(a, demo, keep_records=True).records)
    assert strip(rb.records) == strip(run_replay(b, demo, keep_records=True).records)
    assert strip(ra.records) != strip(rb.records)  # the variant does change something
    other = config_from_dict({**raw, "source": {**raw["source"], "gap_after_periods": 7.0}})
    assert not same_reading(a, other)
    with pytest.raises(ValueError):
        run_replays([a, other], demo, [None, None])
