"""The deep config check (streamcond/validate.py): what `check` accepted used to stop `replay`
and `run`; now `check`, replay's start, the daemon's start and its reload all refuse it, with one
sentence naming the key and exit code 2 — and a refused reload leaves the daemon running.

References outside the project: IEEE 754 binary64 (the largest finite double is about
1.8e308, so 60 s × 1e308 Hz is infinity, which no integer sample count can hold); the
Butterworth design of scipy.signal.butter for the filter that cannot be built.
"""

from __future__ import annotations

import math
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from streamcond.config import config_from_dict
from streamcond.errors import ConfigError
from streamcond.validate import MAX_WINDOW_SAMPLES, validate

ROOT = Path(__file__).resolve().parents[1]


def run_cli(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamcond", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


def recording(path: Path, n: int = 3000, rate_hz: float = 1000.0) -> Path:
    t = np.arange(n) / rate_hz
    a = np.sin(2 * np.pi * 2.0 * t)
    path.write_text("t,a\n" + "".join(f"{ti:.3f},{ai:.4f}\n" for ti, ai in zip(t, a)))
    return path


def write(path: Path, source: str, channel: str = "", mqtt: str = "") -> Path:
    path.write_text(
        f'[source]\npath = "r.csv"\n{source}\n'
        f'[[channel]]\nname = "a"\nband = {{ low = -0.5, high = 0.5 }}\n{channel}\n'
        '[output]\nevents = ""\n' + (f"[output.mqtt]\n{mqtt}\n" if mqtt else "")
    )
    return path


def assert_refused(r: subprocess.CompletedProcess, key: str) -> None:
    assert r.returncode == 2, (r.returncode, r.stderr)
    assert key in r.stderr, r.stderr
    assert "Traceback" not in r.stderr, r.stderr


LOWPASS_AT_DC = 'filter = { kind = "lowpass", cutoff_hz = 1e-12, order = 8 }'


def test_butterworth_reference_puts_the_poles_on_top_of_dc() -> None:
    # scipy.signal.butter (the reference design): at 1 kHz a 1e-12 Hz order-8 low-pass has
    # its poles within a few float64 ulps (eps 2.2e-16) of z = 1 — numerically a pole at DC,
    # which has no DC gain or group delay to compensate.
    from scipy.signal import butter

    _, p, _ = butter(8, 1e-12, fs=1000.0, output="zpk")
    assert 1.0 - np.max(np.abs(p)) < 1e-14


@pytest.mark.parametrize("command", ["check", "replay"])
def test_an_absurd_sample_rate_is_refused_naming_the_key(tmp_path: Path, command: str) -> None:
    # IEEE 754: 60 * 1e308 overflows to inf; this used to raise OverflowError in the channel.
    assert math.isinf(60.0 * 1e308)
    recording(tmp_path / "r.csv")
    cfg = write(tmp_path / "c.toml", 'time_column = "t"\nsample_rate_hz = 1e308')
    args = ["check", "-c", str(cfg)] if command == "check" else ["replay", "r.csv", "-c", str(cfg)]
    assert_refused(run_cli(*args, cwd=tmp_path), "source.sample_rate_hz")


@pytest.mark.parametrize("command", ["check", "replay"])
def test_a_filter_that_cannot_be_built_at_the_configured_rate(tmp_path: Path, command: str) -> None:
    recording(tmp_path / "r.csv")
    cfg = write(tmp_path / "c.toml", "sample_rate_hz = 1000", LOWPASS_AT_DC)
    args = ["check", "-c", str(cfg)] if command == "check" else ["replay", "r.csv", "-c", str(cfg)]
    r = run_cli(*args, cwd=tmp_path)
    assert_refused(r, "channel[0].filter")
    assert "1000 Hz" in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_at_the_measured_rate_replay_refuses_it_and_validate_does_too(tmp_path: Path) -> None:
    recording(tmp_path / "r.csv")
    cfg_path = write(tmp_path / "c.toml", 'time_column = "t"', LOWPASS_AT_DC)
    # no rate in the config: `check` cannot know it ...
    assert run_cli("check", "-c", str(cfg_path), cwd=tmp_path).returncode == 0
    # ... the replay measures 1 kHz and refuses in the same words
    r = run_cli("replay", "r.csv", "-c", str(cfg_path), cwd=tmp_path)
    assert_refused(r, "channel[0].filter")
    assert "measured sample rate" in r.stderr
    from streamcond.config import load_config

    with pytest.raises(ConfigError, match=r"channel\[0\]\.filter"):
        validate(load_config(cfg_path), measured_rate_hz=1000.0)


def test_a_noise_window_too_long_for_memory_names_its_key() -> None:
    cfg = config_from_dict({
        "source": {"sample_rate_hz": 1000.0},
        "channel": [{"name": "a", "band": {"mode": "adaptive", "center": 0.0, "window_s": 1e5}}],
    })
    with pytest.raises(ConfigError) as e:
        validate(cfg)
    (msg,) = e.value.messages
    assert msg.startswith("channel[0].band.window_s") and f"{MAX_WINDOW_SAMPLES:,}" in msg


def test_durations_are_bounded_in_the_config() -> None:
    with pytest.raises(ConfigError, match=r"stats\.interval_s must be at most"):
        config_from_dict({"source": {"sample_rate_hz": 10.0}, "stats": {"interval_s": 1e300},
                          "channel": [{"name": "a", "band": {"low": 0, "high": 1}}]})


def test_the_mqtt_files_must_be_readable(tmp_path: Path) -> None:
    recording(tmp_path / "r.csv")
    (tmp_path / "junk.pem").write_text("not a certificate\n")
    (tmp_path / "pw").write_text("secret\n")
    cases = {
        'password_file = "missing.txt"': "output.mqtt.password_file",
        'password_file = "."': "output.mqtt.password_file",
        'ca_file = "nope.pem"': "output.mqtt.ca_file",
        'ca_file = "junk.pem"': "output.mqtt.ca_file",
        'cert_file = "junk.pem"': "output.mqtt.cert_file",
        'password_file = "pw"\nkey_file = "pw"': "output.mqtt.key_file",
    }
    for setting, key in cases.items():
        cfg = write(tmp_path / "c.toml", "sample_rate_hz = 1000", "", setting)
        r = run_cli("check", "-c", str(cfg), cwd=tmp_path)
        assert_refused(r, key)
        assert "secret" not in r.stderr + r.stdout  # a password is never shown
    ok = write(tmp_path / "c.toml", "sample_rate_hz = 1000", "", 'password_file = "pw"')
    assert run_cli("check", "-c", str(ok), cwd=tmp_path).returncode == 0


def test_the_demo_config_passes() -> None:
    from streamcond.config import load_config

    validate(load_config(ROOT / "config" / "orchard_pump.toml"))


@pytest.mark.slow
def test_a_reload_that_cannot_start_keeps_the_daemon_running(tmp_path: Path) -> None:
    # The daemon measures 200 Hz from the time column; a reload to a filter that cannot be built
    # at that rate, and one to an absurd rate, are refused; edges keep coming; a good one applies.
    from daemon_rig import DaemonProcess, Pty, SquareWave, write_config

    pty = Pty(tmp_path / "ttyV")
    events = tmp_path / "events.jsonl"
    cfg = write_config(tmp_path / "v.toml", pty.path, None, tmp_path / "state.sqlite",
                       events=str(events))
    good = cfg.read_text()
    daemon = DaemonProcess(cfg, tmp_path / "daemon.log")
    wave = SquareWave(pty)
    try:
        daemon.start()
        daemon.wait_log("started", 15)
        wave.run_for(2.0)

        def edges() -> int:
            return events.read_text().count('"kind":"edge"') if events.exists() else 0

        before = edges()
        assert before > 0
        bad_filter = good.replace('name = "a"\n', 'name = "a"\n' + LOWPASS_AT_DC + "\n")
        bad_rate = good.replace('time_scale = 0.001\n', 'time_scale = 0.001\nsample_rate_hz = 1e308\n')
        for text, key in ((bad_filter, "channel[0].filter"), (bad_rate, "source.sample_rate_hz")):
            cfg.write_text(text)
            daemon.signal(signal.SIGHUP)
            daemon.wait_log(key, 10)
            wave.run_for(1.0)
        assert daemon.proc is not None and daemon.proc.poll() is None, daemon.log_text()[-2000:]
        assert edges() > before  # conditioning went on
        assert daemon.current_log().count("config reload rejected") == 2
        cfg.write_text(good)
        daemon.signal(signal.SIGHUP)
        daemon.wait_log("config reloaded", 10)
        daemon.signal(signal.SIGTERM)
        assert daemon.wait(20) == 0
    finally:
        daemon.kill()
        pty.unplug()
