"""The pytest plugin (``streamcond.pytest_plugin``): case files collected and run as tests, the
readable diff of a failing case, the opt-in golden update, pytest-xdist and JUnit XML.

The plugin runs in real pytest processes (``python -m pytest`` as a subprocess), loaded the way
users get it: through the package's ``pytest11`` entry point.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
import xml.etree.ElementTree as ET
from pathlib import Path

from streamcond.golden import load_edges

ROOT = Path(__file__).resolve().parent.parent
CASE = ROOT / "replay_data" / "orchard_pump.case.toml"
DEMO = ROOT / "replay_data" / "orchard_pump.csv"
CONFIG = ROOT / "config" / "orchard_pump.toml"
GOLDEN = ROOT / "replay_data" / "orchard_pump.golden.jsonl"


def pytest_run(cwd: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "pytest", "-p", "no:cacheprovider", *args],
        cwd=cwd, capture_output=True, text=True,
    )


def write_case(folder: Path, name: str, golden: str, **extra: str) -> Path:
    """A case with the demo recording and config (absolute paths) and a golden file named
    relative to the case file."""
    lines = [f"recording = {json.dumps(str(DEMO))}", f"config = {json.dumps(str(CONFIG))}",
             f"golden = {json.dumps(golden)}", "tolerance = 1e-6"]
    lines += [f"{k} = {v}" for k, v in extra.items()]
    path = folder / f"{name}.case.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def broken_golden(path: Path) -> None:
    """The committed golden with one pump edge removed and one tank edge moved by 0.25 s."""
    out, dropped, moved = [], False, False
    for line in GOLDEN.read_text().splitlines():
        rec = json.loads(line)
        if rec["kind"] == "edge" and rec["channel"] == "pump" and not dropped:
            dropped = True
            continue
        if rec["kind"] == "edge" and rec["channel"] == "tank_high" and not moved:
            moved = True
            rec["t"] += 0.25
        out.append(json.dumps(rec))
    path.write_text("\n".join(out) + "\n")


def test_the_project_suite_runs_the_demo_case_through_the_plugin(request):
    # the plugin is loaded here from the entry point, and replay_data/ is a test path
    assert request.config.pluginmanager.hasplugin("streamcond")
    ini = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["pytest"]["ini_options"]
    assert "replay_data" in ini["testpaths"]
    entry = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["entry-points"]
    assert entry["pytest11"]["streamcond"] == "streamcond.pytest_plugin"


def test_demo_case_is_collected_and_passes(tmp_path):
    # run from elsewhere: the case's paths are relative to the case file, not to the cwd
    r = pytest_run(tmp_path, str(ROOT / "replay_data"), "--collect-only", "-q")
    assert r.returncode == 0, r.stdout + r.stderr
    assert "orchard_pump.case.toml::orchard_pump" in r.stdout
    r = pytest_run(tmp_path, str(CASE), "-v")
    assert r.returncode == 0, r.stdout + r.stderr
    assert "orchard_pump.case.toml::orchard_pump PASSED" in r.stdout


def test_broken_golden_shows_the_readable_diff_and_is_not_rewritten(tmp_path):
    broken_golden(tmp_path / "golden.jsonl")
    before = (tmp_path / "golden.jsonl").read_bytes()
    write_case(tmp_path, "broken", "golden.jsonl")
    r = pytest_run(tmp_path, ".")
    out = r.stdout
    assert r.returncode == 1, out + r.stderr
    assert "1 failed" in out
    # the lines of `replay --expect`: one pump edge the golden lacks, one tank edge moved
    assert "channel pump: 9 edges expected, 10 produced; 0 moved, 0 missing, 1 unexpected" in out
    assert "channel tank_high: 10 edges expected, 10 produced; 1 moved" in out
    assert "moved to t=" in out and "(-0.250000 s)" in out
    assert "--streamcond-update-golden" in out
    # not a Python assertion dump
    for word in ("Traceback", "AssertionError", "def runtest", "raise CaseDiffers"):
        assert word not in out
    assert (tmp_path / "golden.jsonl").read_bytes() == before  # never rewritten by default


def test_update_option_rewrites_the_golden(tmp_path):
    broken_golden(tmp_path / "golden.jsonl")
    write_case(tmp_path, "broken", "golden.jsonl")
    write_case(tmp_path, "fresh", "new/fresh.jsonl")  # no golden yet
    (tmp_path / "new").mkdir()
    write_case(tmp_path, "empty", "empty.jsonl")  # an empty golden: an input error, unless updating
    (tmp_path / "empty.jsonl").write_text("")
    r = pytest_run(tmp_path, ".", "--streamcond-update-golden")
    assert r.returncode == 0, r.stdout + r.stderr
    assert "golden files rewritten" in r.stdout and "golden.jsonl (3553 edges)" in r.stdout
    assert "fresh.jsonl (3553 edges)" in r.stdout
    assert load_edges(tmp_path / "golden.jsonl") == load_edges(GOLDEN)
    assert load_edges(tmp_path / "new" / "fresh.jsonl") == load_edges(GOLDEN)
    assert load_edges(tmp_path / "empty.jsonl") == load_edges(GOLDEN)
    assert not list(tmp_path.glob("*.tmp"))
    r = pytest_run(tmp_path, ".")
    assert r.returncode == 0, r.stdout + r.stderr


def test_pinned_summary_figures_and_broken_case_files(tmp_path):
    (tmp_path / "golden.jsonl").write_bytes(GOLDEN.read_bytes())
    write_case(tmp_path, "counts", "golden.jsonl",
               summary="{ edges = { flow = 3534, pump = 10 }, bad_lines = 0 }")
    (tmp_path / "incomplete.case.toml").write_text('recording = "x.csv"\ntolerence = 0.1\n')
    (tmp_path / "garbled.case.toml").write_text("recording = \n")
    write_case(tmp_path, "unwritten", "nowhere.jsonl")
    r = pytest_run(tmp_path, ".", "-q")
    out = r.stdout
    assert r.returncode == 1 and "4 failed" in out, out + r.stderr
    assert "nowhere.jsonl' does not exist; `pytest --streamcond-update-golden` writes it" in out
    assert "summary: channel flow: 3534 edges expected, 3533 produced" in out
    assert "tolerence is not a known key of a case file" in out
    assert "config is required" in out and "golden is required" in out
    assert "garbled.case.toml' is not valid TOML" in out
    assert "Traceback" not in out


def test_xdist_and_junitxml(tmp_path):
    (tmp_path / "golden.jsonl").write_bytes(GOLDEN.read_bytes())
    broken_golden(tmp_path / "broken.jsonl")
    write_case(tmp_path, "good", "golden.jsonl")
    write_case(tmp_path, "also_good", "golden.jsonl")
    write_case(tmp_path, "broken", "broken.jsonl")
    r = pytest_run(tmp_path, ".", "-n", "2", "--junitxml", "report.xml")
    assert r.returncode == 1, r.stdout + r.stderr
    assert "2 workers [3 items]" in r.stdout
    assert "1 failed, 2 passed" in r.stdout
    suite = ET.parse(tmp_path / "report.xml").getroot().find("testsuite")
    assert suite.get("tests") == "3" and suite.get("failures") == "1"
    cases = {c.get("name"): c for c in suite.iter("testcase")}
    assert set(cases) == {"good", "also_good", "broken"}
    failure = cases["broken"].find("failure")
    assert failure is not None and cases["good"].find("failure") is None
    # the CI's report carries the same readable lines
    assert "channel pump: 9 edges expected, 10 produced" in failure.get("message")
    assert "moved to t=" in failure.text
