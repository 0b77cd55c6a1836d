"""`streamcond tune`: noise, sweep, plateau and the suggested band — against the demo's ground
truth, Rice's closed form, and synthetic signals whose noise and steps are known."""

from __future__ import annotations

import json
import math
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest

from streamcond import tune
from streamcond.config import config_from_dict
from streamcond.replay import run_replay

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "replay_data" / "orchard_pump.csv"
CONFIG = ROOT / "config" / "orchard_pump.toml"
TRUTH = json.loads((ROOT / "replay_data" / "orchard_pump.truth.json").read_text())


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "streamcond", *args], cwd=ROOT, capture_output=True, text=True
    )


def rice_per_hour(width: float, sigma: float, nu0: float) -> float:
    """S. O. Rice, Bell System Technical Journal, 1944-45: up-crossings of the level h = width/2
    by Gaussian noise, ν0·exp(-h²/2σ²) per second."""
    h = width / 2.0
    return 3600.0 * nu0 * math.exp(-h * h / (2.0 * sigma * sigma))


def replay_with_band(cfg_dict: dict, recording: Path, name: str, center: float, width: float):
    """The real Pipeline over the recording, channel ``name`` with a fixed band and no dwell
    (same filter); its edge records."""
    d = json.loads(json.dumps(cfg_dict))
    for ch in d["channel"]:
        if ch["name"] == name:
            ch["band"] = {"center": center, "width": width}
            ch.pop("dwell", None)
    res = run_replay(config_from_dict(d), recording, keep_records=True)
    return [r for r in res.records if r["kind"] == "edge" and r["channel"] == name]


@pytest.fixture(scope="module")
def demo_cfg() -> dict:
    return tomllib.loads(CONFIG.read_text())


@pytest.fixture(scope="module")
def tank():
    return tune.run(str(CONFIG), str(DEMO), "tank_high")


@pytest.fixture(scope="module")
def pump():
    return tune.run(str(CONFIG), str(DEMO), "pump")


# --- the demo against its ground truth ------------------------------------------------------


def test_tank_high_suggestion_gives_exactly_the_real_mark_crossings(tank, demo_cfg):
    res, _ = tank
    s = res.suggestion
    assert s.meets_target and s.width is not None
    edges = replay_with_band(demo_cfg, DEMO, "tank_high", s.center, s.width)
    crossings = [c for c in TRUTH["level"]["crossings"] if c["mark"] == "high"]
    # one edge per crossing of the high mark, no chatter (truth: tools/make_demo.py's story)
    assert len(edges) == len(crossings) == 10
    h = s.width / 2.0
    # replay_data/README.md: the level moves through the marks at 0.15-0.35 mA/s, i.e.
    # 0.0375-0.0875 m/s at 4 mA per metre. The edge fires when the level is h past the mark
    # (at most h/slope later), give or take the noise (3σ̂ of it, another 3σ̂/slope).
    slope_min = 0.15 * 0.25
    late = (h + 3 * res.sigma) / slope_min
    for e, c in zip(edges, crossings):
        assert e["edge"] == c["direction"]
        assert -0.25 < e["t"] - c["t"] < late


def test_pump_suggestion_gives_exactly_the_real_starts_and_stops(pump, demo_cfg):
    res, _ = pump
    s = res.suggestion
    assert s.meets_target and s.width is not None
    edges = replay_with_band(demo_cfg, DEMO, "pump", s.center, s.width)
    truth = []
    for run in TRUTH["pump"]["runs"]:
        truth += [("rising", run["start"]), ("falling", run["stop"])]
    assert len(edges) == len(truth) == 10
    for e, (kind, t) in zip(edges, truth):
        assert e["edge"] == kind
        # the contactor instant; the current jumps to the inrush at once and the 5 Hz
        # lowpass's delay is compensated: well within 0.1 s
        assert abs(e["t"] - t) < 0.1


def test_sensor_fault_samples_are_left_out_as_the_channel_leaves_them_out(demo_cfg, tmp_path):
    d = json.loads(json.dumps(demo_cfg))
    d["channel"][0]["fault"] = {"preset": "namur_ne43"}
    cfg = tmp_path / "fault.toml"
    cfg.write_text(_toml(d))
    res, data = tune.run(str(cfg), str(DEMO), "tank_high")
    # truth: the loop sits at the failure current (≈ 2.5 mA, at or below NAMUR NE 43's 3.6 mA,
    # from memory) from the first to the last fault sample, 4 ms apart
    f = TRUTH["fault"]
    assert res.fault_samples == round((f["t_end"] - f["t_start"]) / 0.004) + 1
    assert np.isnan(data.y).sum() == res.fault_samples
    s = res.suggestion
    assert s.meets_target and res.plateau is not None and res.plateau.edges == 10
    edges = replay_with_band(d, DEMO, "tank_high", s.center, s.width)
    crossings = [c for c in TRUTH["level"]["crossings"] if c["mark"] == "high"]
    assert [e["edge"] for e in edges] == [c["direction"] for c in crossings]


def _toml(d: dict) -> str:
    """A small TOML writer for the config dicts here (tables, arrays of tables, inline
    tables, strings, numbers, booleans, lists of strings)."""

    def val(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return json.dumps(v)
        if isinstance(v, dict):
            return "{ " + ", ".join(f"{k} = {val(x)}" for k, x in v.items()) + " }"
        if isinstance(v, list):
            return "[" + ", ".join(val(x) for x in v) + "]"
        return repr(v)

    out = []
    for key, table in d.items():
        for t in table if isinstance(table, list) else [table]:
            out.append(f"[[{key}]]" if isinstance(table, list) else f"[{key}]")
            subs = {}
            for k, v in t.items():
                if isinstance(v, dict) and k in ("mqtt",):
                    subs[k] = v
                else:
                    out.append(f"{k} = {val(v)}")
            for k, v in subs.items():
                out.append(f"[{key}.{k}]")
                out.extend(f"{kk} = {val(vv)}" for kk, vv in v.items())
    return "\n".join(out) + "\n"


def test_plateau_of_the_demo_is_the_real_transitions(tank, pump):
    for (res, _), n in ((tank, 10), (pump, 10)):
        p = res.plateau
        assert p is not None and p.edges == n
        s = res.suggestion
        assert p.width_min <= s.width <= p.width_max
        # the suggestion keeps the margin from both ends of the plateau
        assert s.margin_low_sigma >= tune.EDGE_MARGIN_SIGMA - 1e-9
        assert s.margin_high_sigma >= tune.EDGE_MARGIN_SIGMA - 1e-9


def test_edge_count_never_grows_with_the_width(tank, pump):
    # Nested bands: between two transitions of a wider band the narrower one must make one of
    # each kind, so the count of the bare band is non-increasing in the width (the staircase
    # the plateau is read from), up to the one edge that decides the initial level.
    for res, _ in (tank, pump):
        assert np.all(np.diff(res.edges) <= 1)
        assert res.edges[0] >= res.edges.max() - 1


# --- the JSON contract and Rice's closed form -------------------------------------------------


@pytest.fixture(scope="module")
def tank_json(tmp_path_factory):
    png = tmp_path_factory.mktemp("tune") / "tank.png"
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--channel", "tank_high", "--json",
                "--plot", str(png))
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout), png


def test_json_has_the_design_keys(tank_json):
    doc, _ = tank_json
    # DESIGN.md "Machine-readable outputs (contract)"
    for key in ("noise_sigma", "zero_upcrossing_rate_hz", "suggested", "sweep"):
        assert key in doc
    assert set(doc["suggested"]) >= {"width", "center", "k", "predicted_false_rate_per_hour"}
    row_keys = {"width", "edges", "predicted_false_rate_per_hour"}
    assert all(set(row) >= row_keys for row in doc["sweep"])
    assert doc["plateau"]["edges"] == 10
    assert doc["target_rate_per_hour"] == pytest.approx(tune.DEFAULT_TARGET_RATE_PER_HOUR)
    assert doc["channel"] == "tank_high" and doc["unit"] == "m" and doc["samples"] == 45000
    assert doc["suggested"]["center"] == 2.4
    assert doc["suggested"]["k"] == pytest.approx(doc["suggested"]["width"] / doc["noise_sigma"])


def test_sweep_spans_well_under_1_to_well_over_6_sigma(tank_json):
    doc, _ = tank_json
    sigma = doc["noise_sigma"]
    widths = [row["width"] for row in doc["sweep"]]
    assert min(widths) < 1.0 * sigma and max(widths) > 6.0 * sigma
    assert all(b > a for a, b in zip(widths, widths[1:]))
    ratios = np.diff(np.log(widths))
    assert np.allclose(ratios, ratios[0])  # log-spaced
    assert len(widths) >= 60


def test_predicted_rates_follow_rice(tank_json):
    doc, _ = tank_json
    sigma, nu0 = doc["noise_sigma"], doc["zero_upcrossing_rate_hz"]
    for row in doc["sweep"]:
        assert row["predicted_false_rate_per_hour"] == pytest.approx(
            rice_per_hour(row["width"], sigma, nu0), rel=1e-12, abs=1e-300
        )
    s = doc["suggested"]
    assert s["predicted_false_rate_per_hour"] == pytest.approx(
        rice_per_hour(s["width"], sigma, nu0), rel=1e-12
    )
    # the suggestion meets the target: half-width h >= σ·sqrt(2·ln(ν0·3600/rate)) (Rice)
    h_min = sigma * math.sqrt(2.0 * math.log(nu0 * 3600.0 / doc["target_rate_per_hour"]))
    assert s["width"] / 2.0 >= h_min
    assert s["predicted_false_rate_per_hour"] <= doc["target_rate_per_hour"]


def test_rice_min_width_inverts_the_rate():
    sigma, nu0 = 0.3, 40.0
    for rate in (1e-3, 0.1, 10.0):
        w = tune.rice_min_width(sigma, nu0, rate)
        assert tune.rice_rate_per_hour(w, sigma, nu0) == pytest.approx(rate, rel=1e-12)
    # a target above 3600·ν0 is met by any band
    assert tune.rice_min_width(sigma, nu0, 3600.0 * nu0 * 2) == 0.0


# --- synthetic signals with known noise and steps ---------------------------------------------


FS = 250.0


def write_recording(tmp_path: Path, x: np.ndarray, band: dict, filt: dict | None = None):
    csv = tmp_path / "rec.csv"
    t_ms = np.arange(x.size) * (1000.0 / FS)
    np.savetxt(csv, np.column_stack([t_ms, x]), delimiter=",", header="t_ms,x", comments="",
               fmt=["%.0f", "%.6f"])
    band_toml = "{ " + ", ".join(f"{k} = {v!r}" for k, v in band.items()) + " }"
    filt_toml = "" if filt is None else (
        "filter = { " + ", ".join(f"{k} = {v!r}" if not isinstance(v, str) else f'{k} = "{v}"'
                                  for k, v in filt.items()) + " }\n"
    )
    toml = (
        '[source]\nkind = "file"\nformat = "csv"\ntime_column = "t_ms"\ntime_scale = 0.001\n\n'
        f'[[channel]]\nname = "x"\nunit = "V"\nband = {band_toml}\n{filt_toml}'
    )
    cfg = tmp_path / "c.toml"
    cfg.write_text(toml)
    return cfg, csv


def square_wave(half_step_sigmas: float, sigma: float, seconds: float, period: float, seed: int):
    """Two levels c ± half_step around c = 5, switching every period/2, plus white noise."""
    n = int(seconds * FS)
    t = np.arange(n) / FS
    high = (np.floor(t / (period / 2)) % 2) == 1
    level = 5.0 + np.where(high, 1.0, -1.0) * half_step_sigmas * sigma
    x = level + sigma * np.random.default_rng(seed).standard_normal(n)
    steps = int(np.count_nonzero(high[1:] != high[:-1]))
    return x, steps


def test_square_wave_plateau_holds_every_width_between_a_few_sigma_and_step_less_a_few(tmp_path):
    sigma = 0.1
    x, steps = square_wave(10.0, sigma, 60.0, 2.0, seed=11)  # levels 20σ apart
    assert steps == 59  # a level change every second for 60 s, the first level is the state
    cfg, csv = write_recording(tmp_path, x, {"center": 5.0, "width": 0.5})
    res, _ = tune.run(str(cfg), str(csv), "x")
    p = res.plateau
    assert p is not None and p.edges == steps
    # Any band inside the two levels, less a few σ of noise on each side, sees every step
    # and nothing else (white noise beyond 3σ/sample over 60 s is rare but not absent; the
    # edges of the plateau are measured where the count changes).
    assert p.width_min <= 3 * sigma and p.width_max >= (20 - 3) * sigma
    # the noise estimate of white noise under a square wave: σ itself (within 5 %)
    assert res.sigma == pytest.approx(sigma, rel=0.05)
    # white noise sampled at fs crosses its mean upward fs/4 times per second: P(x_k < 0 <
    # x_{k+1}) = 1/4 for independent samples (Sheppard's orthant probability with ρ = 0)
    assert res.nu0_hz == pytest.approx(FS / 4, rel=0.1)
    s = res.suggestion
    assert s.meets_target and p.width_min <= s.width <= p.width_max


def test_slow_crossings_chatter_below_the_plateau_and_the_suggestion_replays_clean(tmp_path):
    """A triangle between c ± 20σ with a 20 s period: it crawls through the centre at 4σ per
    second (0.016σ per sample), so a narrow band chatters at every crossing."""
    sigma = 0.05
    n = int(120 * FS)
    t = np.arange(n) / FS
    tri = 2.0 * np.abs(((t / 20.0) % 1.0) - 0.5)  # 1 at t = 0, 0 at 10 s: 0.5 at 5, 15, ...
    x = 5.0 + 20 * sigma * (1.0 - 2.0 * tri) + sigma * np.random.default_rng(5).standard_normal(n)
    crossings = np.arange(5.0, 120.0, 10.0)  # closed form: the triangle's centre crossings
    cfg, csv = write_recording(tmp_path, x, {"center": 5.0, "width": 0.2})
    res, _ = tune.run(str(cfg), str(csv), "x")
    p = res.plateau
    assert p is not None and p.edges == crossings.size == 12
    assert not p.open_below and res.edges.max() > 3 * crossings.size  # chatter seen below
    s = res.suggestion
    assert s.meets_target
    edges = replay_with_band(tomllib.loads(cfg.read_text()), csv, "x", s.center, s.width)
    assert len(edges) == crossings.size
    # each edge within (h + 3σ)/slope of its crossing (slope 4σ/s), in order, alternating
    h = s.width / 2.0
    for e, tc, kind in zip(edges, crossings, ["rising", "falling"] * 6):
        assert e["edge"] == kind
        assert 0.0 < e["t"] - tc < (h + 3 * sigma) / (4 * sigma)


def test_target_beyond_the_plateau_is_said_plainly(tmp_path):
    """Levels only ±5σ from the centre and a target of one false edge in a million hours:
    Rice asks for h ≥ σ·sqrt(2·ln(3600·ν0/1e-6)) ≈ 7.2σ, more than the steps allow."""
    sigma = 0.1
    x, steps = square_wave(5.0, sigma, 60.0, 2.0, seed=2)
    cfg, csv = write_recording(tmp_path, x, {"center": 5.0, "width": 0.5})
    res, data = tune.run(str(cfg), str(csv), "x", target_rate_per_hour=1e-6)
    p = res.plateau
    assert p is not None and p.edges == steps
    s = res.suggestion
    assert not s.meets_target
    assert s.predicted_false_rate_per_hour > 1e-6
    assert p.width_min <= s.width <= p.width_max  # still the best the plateau allows
    text = " ".join(res.advice)
    assert "No width meets both" in text and "prefilter" in text and "dwell" in text
    report = tune.format_report(res)
    assert "does NOT meet the target" in report


# --- the command line -------------------------------------------------------------------------


def test_cli_plot_is_written(tank_json):
    doc, png = tank_json
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000  # PNG signature (RFC 2083)
    assert doc["plot"] == str(png)


def test_cli_table_ends_with_the_config_lines(pump):
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--channel", "pump", "--target-rate", "0.01")
    assert r.returncode == 0, r.stderr
    out = r.stdout
    assert "◀ plateau" in out and "Suggested: width" in out
    lines = [ln.strip() for ln in out.splitlines()]
    fixed = [ln for ln in lines if ln.startswith("band = { center = 3")]
    adaptive = [ln for ln in lines if ln.startswith('band = { mode = "adaptive"')]
    assert len(fixed) == 1 and len(adaptive) == 1
    # the printed lines are valid TOML that the config model accepts
    for ln in fixed + adaptive:
        band = tomllib.loads(ln)["band"]
        d = tomllib.loads(CONFIG.read_text())
        d["channel"][1]["band"] = band
        config_from_dict(d)
    width = tomllib.loads(fixed[0])["band"]["width"]
    # the target given on the command line is the one met: h >= σ·sqrt(2·ln(3600·ν0/R)) (Rice)
    res, _ = pump
    h_min = res.sigma * math.sqrt(2.0 * math.log(3600.0 * res.nu0_hz / 0.01))
    assert width / 2.0 >= h_min > res.suggestion.width / 2.0  # stricter than the default
    assert "0.01 false edges per hour" in out


def test_cli_unknown_channel_exits_2_naming_the_channels():
    r = run_cli("tune", str(DEMO), "-c", str(CONFIG), "--channel", "tank_low")
    assert r.returncode == 2
    assert "tank_low" in r.stderr
    for name in ("tank_high", "pump", "flow"):
        assert name in r.stderr
    assert "Traceback" not in r.stderr


def test_tune_leaves_out_levels_no_sensor_measures_in_report_and_picture(tmp_path):
    # 1e308 and a pair ±1.7e308 are finite doubles (IEEE 754 binary64: the largest is about
    # 1.798e308) that a parser passes: as in the channel they are faults, left out of the
    # analysis and drawn as gaps (the pair once broke the plotting library's axis scaling with
    # a traceback, and no report came out).
    t = np.arange(0, 60, 0.01)
    x = 0.8 * np.sign(np.sin(2 * np.pi * t / 10.0)) + 0.05 * np.random.default_rng(3).standard_normal(t.size)
    x[1234] = 1e308
    x[3000], x[3001] = -1.7e308, 1.7e308
    rec = tmp_path / "glitch.csv"
    rec.write_text("t,x\n" + "".join(f"{a:.2f},{b!r}\n" for a, b in zip(t, x.tolist())))
    cfg = tmp_path / "c.toml"
    cfg.write_text('[source]\nkind = "file"\ntime_column = "t"\n'
                   '[[channel]]\nname = "x"\nband = { low = -0.4, high = 0.4 }\n')
    png = tmp_path / "glitch.png"
    r = run_cli("tune", str(rec), "-c", str(cfg), "--plot", str(png))
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr and "Warning" not in r.stderr
    assert "3 samples are sensor faults" in r.stdout
    assert png.stat().st_size > 10_000
