"""`streamcond tune` for commissioning: every channel in one run, pulse channels, the live port,
``--write`` into the config (comments kept), an unreliable noise estimate, and the picture's
plain-sentence failures — checked against the demo's ground truth, closed forms of synthetic
signals, a pseudo-terminal as the port and a TOML parser as the judge of the written file."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import threading
import time
import tomllib
from pathlib import Path

import numpy as np
import pytest

from streamcond import tune
from streamcond.config import load_config
from streamcond.replay import run_replay

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "replay_data" / "orchard_pump.csv"
CONFIG = ROOT / "config" / "orchard_pump.toml"
TRUTH = json.loads((ROOT / "replay_data" / "orchard_pump.truth.json").read_text())

sys.path.insert(0, str(Path(__file__).resolve().parent))
from daemon_rig import Pty  # noqa: E402


def run_cli(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "streamcond", *args], cwd=cwd, capture_output=True, text=True
    )


@pytest.fixture(scope="module")
def all_json():
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--json")
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


# --- every channel ------------------------------------------------------------------------------


def test_without_channel_every_channel_is_tuned_under_channels(all_json):
    # the contract of issue 15: {"channels": {name: today's single-channel object}}
    assert set(all_json) == {"channels"}
    chans = all_json["channels"]
    assert list(chans) == ["tank_high", "pump", "flow"]  # config order
    for name, doc in chans.items():
        assert doc["channel"] == name
        for key in ("noise_sigma", "zero_upcrossing_rate_hz", "suggested", "sweep", "reliable"):
            assert key in doc
    assert chans["tank_high"]["mode"] == "level" and chans["pump"]["mode"] == "level"
    # the same object as with --channel (one pass over the file gives the same numbers)
    one, _ = tune.run(str(CONFIG), str(DEMO), "tank_high")
    assert chans["tank_high"]["suggested"]["width"] == one.suggestion.width
    assert chans["tank_high"]["plateau"]["edges"] == 10


def test_with_channel_the_json_is_the_single_object():
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--channel", "pump", "--json")
    assert r.returncode == 0, r.stderr
    doc = json.loads(r.stdout)
    assert doc["channel"] == "pump" and "channels" not in doc


# --- pulse channels -----------------------------------------------------------------------------


def test_demo_flow_is_a_pulse_channel_with_the_true_pulse_count(all_json):
    doc = all_json["channels"]["flow"]
    assert doc["mode"] == "pulse"
    p = doc["pulse"]
    truth = TRUTH["flow"]
    # tools/make_demo.py's truth: every pulse of the paddle wheel, after the bounce
    assert p["pulses"] == truth["pulses"] == 1767
    # the two levels of the generator (3.24 V and 0.06 V), seen through a 3-sample median of
    # noise of 0.018 V: within a few hundredths of a volt
    assert p["levels"]["high"] == pytest.approx(truth["high_v"], abs=0.02)
    assert p["levels"]["low"] == pytest.approx(truth["low_v"], abs=0.02)
    # the band at 30 % / 70 % of the swing lies between the levels, far from both
    assert truth["low_v"] < p["threshold_low"] < p["threshold_high"] < truth["high_v"]
    assert p["margin_low_sigma"] > 10 and p["margin_high_sigma"] > 10
    # no Rice figures for a pulse train
    assert doc["sweep"] == [] and doc["rice_min_width"] is None
    assert doc["suggested"]["predicted_false_rate_per_hour"] is None
    # pulse rate = pulses / duration (180 s of recording at 250 Hz)
    assert p["pulse_rate_hz"] == pytest.approx(1767 / 180.0, rel=1e-3)


def _pulse_recording(tmp_path: Path, *, bounce: bool, seed: int = 3):
    """A 10 Hz, 50 % duty pulse train between 0.2 V and 4.8 V at 1 kHz for 20 s, white noise
    of 0.03 V; with ``bounce``, after 60 % of the edges one glitch of 1-3 samples of the old
    level starts 1 or 2 samples into the new one (a reed contact; make_demo's model)."""
    fs, f, secs = 1000.0, 10.0, 20.0
    n = int(fs * secs)
    rng = np.random.default_rng(seed)
    clean = ((np.arange(n) / fs * f) % 1.0 < 0.5).astype(np.int8)
    x = clean.copy()
    edges = np.flatnonzero(np.diff(clean)) + 1
    longest = 0
    if bounce:
        for e in edges:
            if rng.random() < 0.6:
                off, ln = int(rng.integers(1, 3)), int(rng.integers(1, 4))
                x[e + off : e + off + ln] = 1 - clean[e]
                longest = max(longest, ln)
    v = np.where(x == 1, 4.8, 0.2) + 0.03 * rng.standard_normal(n)
    csv = tmp_path / "pulses.csv"
    t_ms = np.arange(n)
    np.savetxt(csv, np.column_stack([t_ms, v]), delimiter=",", header="t_ms,p", comments="",
               fmt=["%d", "%.5f"])
    cfg = tmp_path / "p.toml"
    cfg.write_text(
        '[source]\nkind = "file"\nformat = "csv"\ntime_column = "t_ms"\ntime_scale = 0.001\n\n'
        "# the pulse input\n"
        '[[channel]]\nname = "p"\nunit = "V"\nband = { low = 2.0, high = 3.0 }   # a guess\n'
    )
    # rising edges of the clean train: the first sample is high (phase 0), so the pulses
    # after it start at every second edge
    rising = int(np.count_nonzero(np.diff(clean) == 1))
    return cfg, csv, rising, longest / fs


def test_bouncing_pulse_train_gets_a_dwell_longer_than_the_bounce(tmp_path):
    cfg, csv, rising, longest = _pulse_recording(tmp_path, bounce=True)
    res, data = tune.run(str(cfg), str(csv), "p")
    assert res.mode == "pulse"
    p = res.pulse
    assert p.bounce_runs > 0
    # the suggested dwell outlasts the longest glitch (3 samples = 3 ms here) and stays far
    # below the half-period (50 ms at 10 Hz)
    assert longest == 0.003
    assert p.dwell_s is not None and longest < p.dwell_s < 0.025
    # replayed through the real channel chain with that band and dwell: one rising edge per
    # real pulse (the initial level is a state, not an edge)
    d = tomllib.loads(cfg.read_text())
    d["channel"][0]["band"] = res.fixed_band
    d["channel"][0]["dwell"] = res.suggested_dwell
    from streamcond.config import config_from_dict

    out = run_replay(config_from_dict(d), csv, keep_records=True)
    ups = [r for r in out.records if r["kind"] == "edge" and r["edge"] == "rising"]
    assert len(ups) == rising == p.pulses
    # the pulse frequency of the generator: 10 Hz (periods measured between rising edges)
    assert p.frequency_median_hz == pytest.approx(10.0, rel=0.01)


def test_clean_pulse_train_needs_no_dwell_and_flag_forces_the_modes(tmp_path):
    cfg, csv, rising, _ = _pulse_recording(tmp_path, bounce=False)
    res, _ = tune.run(str(cfg), str(csv), "p")
    assert res.mode == "pulse" and res.pulse.bounce_runs == 0
    assert res.suggested_dwell is None and res.pulse.pulses == rising
    lvl, _ = tune.run(str(cfg), str(csv), "p", pulse=False)
    assert lvl.mode == "level"


def test_pump_with_five_starts_is_not_a_pulse_train(tmp_path):
    res, _ = tune.run(str(CONFIG), str(DEMO), "pump")
    assert res.mode == "level"
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--channel", "tank_high", "--pulse")
    # the tank level is no pulse train: forcing it is refused in a sentence, not a traceback
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "pulse channel" in r.stderr


# --- an unreliable noise estimate --------------------------------------------------------------


def test_unreliable_estimate_is_said_and_the_band_comes_from_the_plateau(monkeypatch):
    """The noise estimator of issue 8 may answer reliable = False with a reason; tune then says
    so and sizes the band from the plateau alone (its geometric middle), with no Rice figures."""
    import streamcond.core.noise as noise

    real = noise.estimate_noise

    class Unreliable:
        def __init__(self, est):
            self.sigma, self.nu0_hz = est.sigma, est.nu0_hz
            self.reliable, self.reason = False, "steps too dense for the noise's time scale"

    monkeypatch.setattr(noise, "estimate_noise", lambda x, fs: Unreliable(real(x, fs)))
    res, _ = tune.run(str(CONFIG), str(DEMO), "tank_high")
    assert res.reliable is False and res.reason.startswith("steps too dense")
    p = res.plateau
    s = res.suggestion
    assert p is not None and p.width_min <= s.width <= p.width_max
    # two significant digits of sqrt(w_min·w_max), rounded down (and still on the plateau)
    mid = (p.width_min * p.width_max) ** 0.5
    assert mid * 0.9 <= s.width <= mid
    assert s.predicted_false_rate_per_hour is None and np.isnan(res.rice_width)
    text = tune.format_report(res)
    assert "cannot separate the noise from the signal" in text and "Rice's formula asks" not in text
    doc = tune.to_json(res)
    assert doc["reliable"] is False and doc["reason"] == res.reason
    assert all(row["predicted_false_rate_per_hour"] is None for row in doc["sweep"])
    json.dumps(doc, allow_nan=False)  # no NaN reaches the JSON
    assert res.adaptive_band is None  # k·σ̂ needs a σ̂ to trust


def test_reliable_estimate_says_reliable_true(all_json):
    # the estimate of today's noise module carries no flag: read as reliable (getattr default)
    assert all_json["channels"]["tank_high"]["reliable"] in (True,)


# --- --write ------------------------------------------------------------------------------------


def test_write_edits_the_band_in_place_keeping_every_comment(tmp_path):
    cfg = tmp_path / "station.toml"
    shutil.copy(CONFIG, cfg)
    before = cfg.read_text()
    r = run_cli("tune", str(DEMO), "-c", str(cfg), "--write")
    assert r.returncode == 0, r.stderr
    after = cfg.read_text()
    # the diff is printed, in unified form
    assert f"--- {cfg} (before)" in r.stdout and f"+++ {cfg} (after)" in r.stdout
    tank_line = next(ln for ln in before.splitlines() if ln.startswith("band = { center = 2.4"))
    assert "-" + tank_line in r.stdout.splitlines()
    # every comment line and every comment after a value is still there, in order (the TOML
    # round trip of a style-preserving library keeps them)
    def comments(text):
        return [ln[ln.index("#"):] for ln in text.splitlines() if "#" in ln]

    assert comments(after) == comments(before)
    # only band lines changed; the config loads and holds the suggestions
    changed = [(a, b) for a, b in zip(before.splitlines(), after.splitlines()) if a != b]
    assert len(before.splitlines()) == len(after.splitlines())
    assert changed and all(a.startswith("band = ") and b.startswith("band = ") for a, b in changed)
    tank, _ = tune.run(str(CONFIG), str(DEMO), "tank_high")
    d = tomllib.loads(after)
    assert d["channel"][0]["band"] == {"center": 2.4, "width": tank.suggestion.width}
    assert set(d["channel"][1]["band"]) == {"low", "high"}  # the pump keeps its low/high style
    load_config(cfg)
    # the written config replays the demo's truth: 10 crossings of the high mark
    res = run_replay(load_config(cfg), DEMO, keep_records=True)
    edges = [x for x in res.records if x["kind"] == "edge" and x["channel"] == "tank_high"]
    assert len(edges) == len([c for c in TRUTH["level"]["crossings"] if c["mark"] == "high"])
    # a second run finds nothing to change
    r2 = run_cli("tune", str(DEMO), "-c", str(cfg), "--write")
    assert r2.returncode == 0 and "nothing changed" in r2.stdout and cfg.read_text() == after


def test_write_adds_a_dwell_after_the_band_for_a_bouncing_pulse_channel(tmp_path):
    cfg, csv, _, _ = _pulse_recording(tmp_path, bounce=True)
    r = run_cli("tune", str(csv), "-c", str(cfg), "--write", "--json")
    assert r.returncode == 0, r.stderr
    doc = json.loads(r.stdout)
    assert doc["written"]["changed"] == ["p"]
    text = cfg.read_text()
    lines = text.splitlines()
    i = next(k for k, ln in enumerate(lines) if ln.startswith("band = "))
    assert lines[i].endswith("# a guess") and lines[i + 1].startswith("dwell = { rise_s = ")
    assert "# the pulse input" in text
    d = tomllib.loads(text)["channel"][0]
    assert d["band"]["low"] < d["band"]["high"] and d["dwell"]["rise_s"] > 0.003


# --- the picture (issue 12 item 16) -------------------------------------------------------------


def test_plot_with_an_unsupported_extension_is_a_sentence_after_the_report(tmp_path):
    bad = tmp_path / "x.txt"
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--channel", "pump", "--plot", str(bad))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "Suggested: width" in r.stdout and "Picture:" not in r.stdout  # report printed first
    assert ".txt" in r.stderr and ".png" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert not bad.exists()


def test_plot_into_a_directory_is_a_sentence(tmp_path):
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--channel", "pump", "--plot", str(tmp_path))
    assert r.returncode == 2 and "is a directory" in r.stderr and "Suggested: width" in r.stdout


def test_plot_without_matplotlib_is_a_sentence(tmp_path):
    code = (
        "import sys; sys.modules['matplotlib'] = None\n"
        "from streamcond.cli import main\n"
        f"sys.exit(main(['tune', {str(DEMO)!r}, '-c', {str(CONFIG)!r}, '--channel', 'pump', "
        f"'--plot', {str(tmp_path / 'p.png')!r}]))\n"
    )
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "matplotlib" in r.stderr and "Suggested: width" in r.stdout


def test_plot_path_printed_is_the_path_written_one_picture_per_channel(tmp_path):
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--plot", str(tmp_path / "site"))
    assert r.returncode == 0, r.stderr
    printed = [ln.split("Picture: ", 1)[1] for ln in r.stdout.splitlines() if "Picture: " in ln]
    assert printed == [str(tmp_path / f"site-{n}.png") for n in ("tank_high", "pump", "flow")]
    for p in printed:
        assert Path(p).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083)


# --- the live port ------------------------------------------------------------------------------


def test_port_seconds_tunes_from_a_pseudo_terminal(tmp_path):
    """A device writing ``t_ms,a`` at 250 Hz: a square wave (0/1, toggling every 100 ms of its
    clock) with white noise of 0.05; tune reads 3 s of the port."""
    port = tmp_path / "ttyDEV"
    pty = Pty(port)
    cfg = tmp_path / "live.toml"
    cfg.write_text(
        f'[source]\nkind = "serial"\nport = "{port}"\nformat = "csv"\n'
        'columns = ["t_ms", "a"]\ntime_column = "t_ms"\ntime_scale = 0.001\n'
        '[[channel]]\nname = "a"\nband = { low = 0.3, high = 0.7 }\n'
    )
    stop = threading.Event()
    rng = np.random.default_rng(1)

    def feed():
        k = 0
        t0 = time.monotonic()
        while not stop.is_set():
            lv = (k * 4 // 100) % 2
            pty.write(b"%d,%.4f\n" % (k * 4, lv + 0.05 * rng.standard_normal()))
            k += 1
            wait = t0 + k / 250.0 - time.monotonic()
            if wait > 0:
                time.sleep(wait)

    th = threading.Thread(target=feed, daemon=True)
    th.start()
    try:
        r = run_cli("tune", "-c", str(cfg), "--port-seconds", "3", "--channel", "a", "--json",
                    "--no-pulse")
    finally:
        stop.set()
        th.join(5)
        pty.unplug()
    assert r.returncode == 0, r.stderr
    doc = json.loads(r.stdout)
    assert "reading" in r.stderr and "lines in" in r.stderr
    # sample rate from the device's clock (4 ms steps): exactly 250 Hz
    assert doc["sample_rate_hz"] == pytest.approx(250.0, rel=1e-9)
    assert 0.8 * 750 <= doc["samples"] <= 1.2 * 750
    # one real transition per 100 ms of the device's clock: about 30 in 3 s
    assert abs(doc["plateau"]["edges"] - doc["samples"] / 25.0) <= 3


def test_port_seconds_without_a_device_is_a_sentence(tmp_path):
    cfg = tmp_path / "live.toml"
    cfg.write_text(
        f'[source]\nkind = "serial"\nport = "{tmp_path / "nothing"}"\nformat = "csv"\n'
        'columns = ["t_ms", "a"]\ntime_column = "t_ms"\n'
        '[[channel]]\nname = "a"\nband = { low = 0.3, high = 0.7 }\n'
    )
    r = run_cli("tune", "-c", str(cfg), "--port-seconds", "1")
    assert r.returncode == 2 and "does not exist" in r.stderr and "Traceback" not in r.stderr
    r = run_cli("tune", str(DEMO), "-c", str(cfg), "--port-seconds", "1")
    assert r.returncode == 2 and "one of the two" in r.stderr


def test_write_keeps_a_band_sub_table_its_comments_and_the_last_newline(tmp_path):
    from streamcond.tune.write import write_config

    cfg = tmp_path / "sub.toml"
    cfg.write_text(
        '[source]\nkind = "file"\nformat = "csv"\ntime_column = "t_ms"\ntime_scale = 0.001\n\n'
        "# the pump\n[[channel]]\nname = \"pump\"\ncolumn = \"pump_a\"\n"
        'filter = { kind = "lowpass", cutoff_hz = 5.0, order = 2 }\n\n'
        "[channel.band]   # a sub-table band\nlow = 2.0  # low threshold\nhigh = 4.0\n"
    )
    res, _ = tune.run(str(cfg), str(DEMO), "pump")
    edit = write_config(str(cfg), [res])
    text = cfg.read_text()
    assert edit.changed == ["pump"] and text.endswith("\n")
    assert "[channel.band]   # a sub-table band" in text and "  # low threshold" in text
    band = tomllib.loads(text)["channel"][0]["band"]
    # the suggestion, centre 3 A and its width, written as the file had it: low and high
    assert band["low"] == pytest.approx(3.0 - res.suggestion.width / 2, abs=1e-9)
    assert band["high"] == pytest.approx(3.0 + res.suggestion.width / 2, abs=1e-9)


def test_log_axis_ticks_are_readable_between_decades():
    matplotlib = pytest.importorskip("matplotlib")
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from streamcond.tune.plot import readable_log_axis

    fig, ax = plt.subplots()
    ax.set_xscale("log")
    ax.set_xlim(0.01, 1.0)
    readable_log_axis(ax.xaxis)
    fig.canvas.draw()
    labels = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
    plt.close(fig)
    # the 1-2-5 steps of chart scales (common practice, no published source) as plain
    # numbers, not only the decades as powers of ten
    for want in ("0.01", "0.02", "0.05", "0.1", "0.2", "0.5", "1"):
        assert want in labels, labels
