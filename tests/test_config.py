"""Config validation: one plain sentence per problem naming the key, exit code 2, no traceback."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from streamcond.config import FixedBand, config_from_dict, load_config
from streamcond.errors import ConfigError

ROOT = Path(__file__).resolve().parent.parent

BASE = {
    "source": {"kind": "file", "time_column": "t"},
    "channel": [{"name": "level", "band": {"low": 10.0, "high": 12.0}}],
}


def errors_of(data) -> list[str]:
    with pytest.raises(ConfigError) as e:
        config_from_dict(data)
    return e.value.messages


def with_channel(**kw):
    ch = dict(BASE["channel"][0])
    ch.update(kw)
    return {**BASE, "channel": [ch]}


def test_the_demo_config_is_valid():
    cfg = load_config(ROOT / "config" / "orchard_pump.toml")
    assert [c.name for c in cfg.channel] == ["tank_high", "pump", "flow"]
    assert cfg.topic_prefix == "streamcond/orchard-pump-2"


def test_center_width_resolves_to_low_high():
    cfg = config_from_dict(with_channel(band={"center": 11.0, "width": 2.0}))
    band = cfg.channel[0].band
    assert isinstance(band, FixedBand)
    assert (band.low, band.high) == (10.0, 12.0)


@pytest.mark.parametrize(
    "data, expected",
    [
        (with_channel(band={"low": 12.0, "high": 10.0}),
         "channel[0].band.low (12) must be below channel[0].band.high (10)."),
        (with_channel(band={"center": 1.0}), "channel[0].band needs both center and width"),
        (with_channel(band={"low": 1.0, "high": 2.0, "center": 1.5, "width": 1.0}),
         "channel[0].band takes either low and high, or center and width"),
        (with_channel(filter={"kind": "median", "window": 0}),
         "channel[0].filter.window must be at least 1."),
        (with_channel(filter={"kind": "wavelet"}), "channel[0].filter.kind must be one of"),
        (with_channel(dwell={"rise_s": -1}), "channel[0].dwell.rise_s must be at least 0"),
        (with_channel(name="tank level"), "channel[0].name may only contain"),
        (with_channel(colour="red"), "channel[0].colour is not a known setting"),
        (with_channel(band={"mode": "adaptive"}), "channel[0].band.center is required."),
        ({**BASE, "source": {"kind": "serial"}}, "source.port is required"),
        ({**BASE, "channel": []}, "channel must have at least 1 item"),
        ({**BASE, "channel": BASE["channel"] * 2}, "channel names must be unique; repeated: level"),
        ({**BASE, "stats": {"interval_s": 0}}, "stats.interval_s must be greater than 0"),
        ({**BASE, "source": {"kind": "file", "sample_rate_hz": 100},
          "channel": [{"name": "a", "band": {"low": 0, "high": 1},
                       "filter": {"kind": "lowpass", "cutoff_hz": 60}}]},
         "channel[0].filter.cutoff_hz must be below half of source.sample_rate_hz (50 Hz)"),
    ],
)
def test_one_sentence_per_problem_naming_the_key(data, expected):
    msgs = errors_of(data)
    assert len(msgs) == 1, msgs
    assert msgs[0].startswith(expected), msgs


def test_several_problems_are_all_reported():
    data = {
        "station": {"name": "a b"},
        "source": {"kind": "file", "time_colum": "t"},
        "channel": [
            {"name": "x", "band": {"low": 2, "high": 1}},
            {"name": "y", "band": {"low": 0, "high": 1}, "gain": "big"},
        ],
    }
    msgs = errors_of(data)
    assert any(m.startswith("station.name") for m in msgs)
    assert any(m.startswith("source.time_colum is not a known setting") for m in msgs)
    assert any(m.startswith("channel[0].band.low") for m in msgs)
    assert any(m.startswith("channel[1].gain must be a number") for m in msgs)


def run_cli(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "streamcond", *args], cwd=cwd, capture_output=True, text=True
    )


def test_bad_config_exit_2_without_traceback(tmp_path):
    cfg = tmp_path / "bad.toml"
    cfg.write_text(
        '[source]\nkind = "file"\ntime_column = "t"\n'
        '[[channel]]\nname = "a"\nband = { low = 5, high = 1 }\n'
        '[[channel]]\nname = "b"\nband = { low = 0, high = 1 }\nfilter = { kind = "ema" }\n'
    )
    r = run_cli("check", "-c", str(cfg))
    assert r.returncode == 2
    assert "Traceback" not in r.stderr
    lines = r.stderr.strip().splitlines()
    assert lines == [
        "In channel 'a' (line 4): channel[0].band.low (5) must be below channel[0].band.high (1).",
        "In channel 'b' (line 7): channel[1].filter.tau_s is required.",
    ]


@pytest.mark.parametrize(
    "text, fragment",
    [
        ("[source\nkind=1", "is not valid TOML"),
        (None, "does not exist"),
    ],
)
def test_unreadable_config_exit_2(tmp_path, text, fragment):
    cfg = tmp_path / "c.toml"
    if text is not None:
        cfg.write_text(text)
    r = run_cli("check", "-c", str(cfg))
    assert r.returncode == 2 and fragment in r.stderr and "Traceback" not in r.stderr


def test_check_prints_resolved_settings():
    r = run_cli("check", "-c", "config/orchard_pump.toml")
    assert r.returncode == 0, r.stderr
    assert "low = 2.3575" in r.stdout and "high = 2.4425" in r.stdout
    assert "delay 4 samples" in r.stdout  # median of 9: (N-1)/2, a comment (derived)
    r = run_cli("check", "-c", "config/orchard_pump.toml", "--json")
    import json

    d = json.loads(r.stdout)
    assert d["channel"][0]["band"]["width"] == pytest.approx(0.085)
    assert d["channel"][0]["filter"]["delay_samples"] == 4.0


def test_check_and_help_do_not_import_heavy_modules():
    code = (
        "import sys, streamcond.cli as c\n"
        "c.main(['check', '-c', 'config/orchard_pump.toml'])\n"
        "heavy = [m for m in ('scipy.signal', 'matplotlib', 'numpy', 'aiomqtt') if m in sys.modules]\n"
        "print('HEAVY', heavy)\n"
    )
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert "HEAVY []" in r.stdout, r.stdout + r.stderr
    r = run_cli("--help")
    assert r.returncode == 0 and "replay" in r.stdout and "check" in r.stdout


def test_settings_impossible_at_the_measured_rate_exit_2(tmp_path):
    # the demo runs at 250 Hz (from its time column): a 200 Hz lowpass and a 0.1 s adaptive
    # window (25 samples) can only be refused once the rate is known
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        '[source]\nkind = "file"\ntime_column = "t_ms"\ntime_scale = 0.001\n'
        '[[channel]]\nname = "a"\ncolumn = "level_ma"\n'
        'band = { mode = "adaptive", center = 12, window_s = 0.1 }\n'
    )
    r = run_cli("replay", "replay_data/orchard_pump.csv", "-c", str(cfg), "--events", str(tmp_path / "out.jsonl"))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert r.stderr.startswith("channel[0].band.window_s (0.1 s) holds 25 samples at 250 Hz")
    cfg.write_text(
        '[source]\nkind = "file"\ntime_column = "t_ms"\ntime_scale = 0.001\n'
        '[[channel]]\nname = "b"\ncolumn = "pump_a"\nband = { low = 1, high = 2 }\n'
        'filter = { kind = "lowpass", cutoff_hz = 200 }\n'
    )
    r = run_cli("replay", "replay_data/orchard_pump.csv", "-c", str(cfg), "--events", str(tmp_path / "out.jsonl"))
    assert r.returncode == 2 and r.stderr.startswith("channel[0].filter:") and "Nyquist" in r.stderr


# -- issue 12, item 12: `check` prints TOML that loads back, with the real values ---------------


@pytest.mark.parametrize("config", ["config/orchard_pump.toml", "config/serial_example.toml"])
def test_check_output_loads_back_as_the_same_config(tmp_path, config):
    r = run_cli("check", "-c", config)
    assert r.returncode == 0, r.stderr
    out = tmp_path / "resolved.toml"
    out.write_text(r.stdout)
    again = run_cli("check", "-c", str(out))
    assert again.returncode == 0, again.stderr  # it used to give 5 errors
    assert again.stdout == r.stdout  # a fixed point: the same settings, printed the same
    a, b = load_config(ROOT / config), load_config(out)
    assert [c.band for c in a.channel] == [c.band for c in b.channel] or all(
        x.band.low == pytest.approx(y.band.low) and x.band.high == pytest.approx(y.band.high)
        for x, y in zip(a.channel, b.channel)
    )
    assert a.source == b.source and a.stats == b.stats


def test_check_shows_the_derived_mqtt_client_id():
    from streamcond.io.mqtt import default_client_id

    cfg = load_config(ROOT / "config" / "serial_example.toml")
    assert cfg.output.mqtt is not None and cfg.output.mqtt.client_id is None
    r = run_cli("check", "-c", "config/serial_example.toml")
    # the id the daemon's publisher derives (io/mqtt.py), not "(not set)"
    assert f'# client_id = "{default_client_id(cfg.topic_prefix)}"' in r.stdout
    assert f'# topic_prefix = "{cfg.topic_prefix}"' in r.stdout
    d = __import__("json").loads(run_cli("check", "-c", "config/serial_example.toml", "--json").stdout)
    assert d["output"]["mqtt"]["client_id"] == default_client_id(cfg.topic_prefix)


# -- issue 12, item 15: typos, a byte order mark, channels by name ------------------------------


def test_typo_names_the_key_and_suggests_the_nearest(tmp_path):
    msgs = errors_of(with_channel(band={"center": 2.4, "widht": 0.08}))
    assert msgs == ["channel[0].band.widht is not a known setting; did you mean 'width'?"]
    msgs = errors_of({**BASE, "source": {"kind": "file", "time_colum": "t"}})
    assert msgs == ["source.time_colum is not a known setting; did you mean 'time_column'?"]
    msgs = errors_of(with_channel(measure={"pulses_per_rew": 2}))
    assert msgs == ["channel[0].measure.pulses_per_rew is not a known setting; did you mean 'pulses_per_rev'?"]
    msgs = errors_of(with_channel(filter={"kind": "median", "windw": 3}))
    assert "channel[0].filter.windw is not a known setting; did you mean 'window'?" in msgs
    assert errors_of(with_channel(zzz=1)) == ["channel[0].zzz is not a known setting."]  # none near


def test_utf8_byte_order_mark_is_named(tmp_path):
    cfg = tmp_path / "bom.toml"
    cfg.write_bytes(b"\xef\xbb\xbf" + (ROOT / "config" / "orchard_pump.toml").read_bytes())
    r = run_cli("check", "-c", str(cfg))
    assert r.returncode == 2 and "byte order mark" in r.stderr and "Traceback" not in r.stderr


def test_channels_named_by_name_and_line(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        '[source]\nkind = "file"\nsample_rate_hz = 100.0\n\n'
        '[[channel]]\nname = "tank_high"\nband = { low = 0, high = 1 }\n\n'
        '[[channel]]\nname = "pump"\nband = { low = 4, high = 2 }\n'
    )
    r = run_cli("check", "-c", str(cfg))
    assert r.returncode == 2
    assert r.stderr.strip() == (
        "In channel 'pump' (line 9): channel[1].band.low (4) must be below channel[1].band.high (2)."
    )


def test_check_round_trip_of_every_kind_of_table(tmp_path):
    src = tmp_path / "full.toml"
    src.write_text(
        '[source]\nkind = "file"\nsample_rate_hz = 100.0\ncolumns = ["a", "b"]\n'
        '[[channel]]\nname = "a"\nfilter = { kind = "ema", tau_s = 0.05 }\n'
        'band = { mode = "adaptive", center = 1.0, initial_width = 0.3 }\n'
        'measure = { pulses_per_rev = 2, rate_per = "s" }\nfault = { at_or_below = -5 }\n'
        '[[channel]]\nname = "b"\nband = { center = 0.1, width = 0.2 }\n'
        '[output]\nevents = "x.jsonl"\nrotate = { max_age_s = 3600 }\n[output.mqtt]\nclient_id = "me"\n'
    )
    first = run_cli("check", "-c", str(src))
    assert first.returncode == 0, first.stderr
    out = tmp_path / "resolved.toml"
    out.write_text(first.stdout)
    again = run_cli("check", "-c", str(out))
    assert again.returncode == 0, again.stderr
    assert again.stdout == first.stdout
    assert load_config(src) == load_config(out)  # the same config, every field
    # EMA delay (1−α)/α samples, α = 1 − exp(−Δt/τ): the first-order IIR's DC group delay
    import math

    a = 1 - math.exp(-0.01 / 0.05)
    assert f"delay {(1 - a) / a:.12g} samples" in first.stdout
