"""`streamcond check --probe`: every check against real parts — a pseudo-terminal as the
device, a private broker on a free loopback port (with a password file and TLS where mosquitto
is installed), real directories — and the exit codes of the contract (0 all pass, 1 not, 2 bad
config)."""

from __future__ import annotations

import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from broker import broker_kinds, free_port, make_test_pki, private_broker
from daemon_rig import Pty

ROOT = Path(__file__).resolve().parent.parent


def probe(cfg: Path, *extra: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "streamcond", "check", "-c", str(cfg), "--probe",
         "--probe-seconds", "1.5", *extra],
        cwd=ROOT, capture_output=True, text=True, timeout=60,
    )


class Device:
    """Writes ``t_ms,a`` lines into a pty at ``rate`` lines per second (device clock in ms)."""

    def __init__(self, pty: Pty, rate: float = 200.0, garbage: bool = False) -> None:
        self.pty, self.rate, self.garbage = pty, rate, garbage
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self.run, daemon=True)

    def run(self) -> None:
        k, t0 = 0, time.monotonic()
        step = 1000.0 / self.rate
        while not self.stop.is_set():
            line = b"\x01\x02zz;;\n" if self.garbage else b"%d,%d\n" % (round(k * step), k % 2)
            try:
                self.pty.write(line)
            except OSError:
                return
            k += 1
            wait = t0 + k / self.rate - time.monotonic()
            if wait > 0:
                time.sleep(wait)

    def __enter__(self) -> "Device":
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.stop.set()
        self.thread.join(5)


def config(tmp_path: Path, port: Path, mqtt: str = "", spool: Path | None = None,
           rate: str = "", time_column: bool = True) -> Path:
    spool = spool or (tmp_path / "state" / "spool.sqlite")
    cols = '["t_ms", "a"]'
    tc = 'time_column = "t_ms"\ntime_scale = 0.001\n' if time_column else ""
    p = tmp_path / "station.toml"
    p.write_text(
        '[station]\nname = "probe-rig"\n'
        f'[source]\nkind = "serial"\nport = "{port}"\nformat = "csv"\ncolumns = {cols}\n{tc}{rate}'
        '[[channel]]\nname = "a"\nband = { low = 0.3, high = 0.7 }\n'
        f'[output]\nevents = ""\nstate_path = "{spool}"\n{mqtt}'
    )
    return p


def mqtt_section(host: str, port: int, spool: Path, **extra: str) -> str:
    lines = [f'[output.mqtt]\nhost = "{host}"\nport = {port}\nspool_path = "{spool}"']
    lines += [f'{k} = "{v}"' for k, v in extra.items()]
    return "\n".join(lines) + "\n"


def test_everything_passes_on_a_working_station(tmp_path):
    with private_broker(broker_kinds()[0], tmp_path / "broker") as b:
        pty = Pty(tmp_path / "ttyDEV")
        spool = tmp_path / "spool" / "q.sqlite"
        cfg = config(tmp_path, pty.path, mqtt_section(b.host, b.port, spool), spool)
        with Device(pty):
            r = probe(cfg)
        pty.unplug()
    assert r.returncode == 0, r.stdout + r.stderr
    out = r.stdout
    for what in ("serial port", "first lines", "sample rate", f"broker {b.host}:{b.port}",
                 "spool directory"):
        line = next(ln for ln in out.splitlines() if what in ln)
        assert line.strip().startswith("✓"), line
    assert "✗" not in out
    # 200 lines a second with a 5 ms device clock: the rate from the data is exactly 200 Hz
    assert "200 Hz by the device's clock" in out
    assert "columns t_ms, a" in out


def test_missing_port_closed_broker_and_unwritable_spool_fail_with_reasons(tmp_path):
    blocker = tmp_path / "afile"
    blocker.write_text("not a directory\n")
    spool = blocker / "spool.sqlite"
    closed = free_port()  # nobody listens there (a private port, never 1883)
    cfg = config(tmp_path, tmp_path / "ttyNONE", mqtt_section("127.0.0.1", closed, spool), spool)
    r = probe(cfg)
    assert r.returncode == 1 and "Traceback" not in r.stderr
    out = r.stdout
    assert "✗ serial port" in out and "does not exist" in out
    assert f"✗ broker 127.0.0.1:{closed}: cannot connect" in out
    assert "✗ spool directory" in out and "is a file, not a directory" in out
    assert "checks failed" in out


def test_lines_that_do_not_parse_fail(tmp_path):
    pty = Pty(tmp_path / "ttyDEV")
    cfg = config(tmp_path, pty.path)
    with Device(pty, garbage=True):
        r = probe(cfg)
    pty.unplug()
    assert r.returncode == 1
    assert "✗ first lines" in r.stdout and "none parses" in r.stdout


def test_silent_device_fails_with_the_baud_hint(tmp_path):
    pty = Pty(tmp_path / "ttyDEV")
    cfg = config(tmp_path, pty.path)
    r = probe(cfg)
    pty.unplug()
    assert r.returncode == 1
    assert "✗ first lines: no complete line arrived" in r.stdout and "baud" in r.stdout


def test_configured_rate_that_disagrees_with_the_lines_fails(tmp_path):
    pty = Pty(tmp_path / "ttyDEV")
    # no time column: the rate is the configured one; the device sends 200 lines a second
    cfg = config(tmp_path, pty.path, rate="sample_rate_hz = 1000.0\n", time_column=False)
    with Device(pty):
        r = probe(cfg)
    pty.unplug()
    assert r.returncode == 1
    line = next(ln for ln in r.stdout.splitlines() if "sample rate" in ln)
    assert line.strip().startswith("✗") and "sample_rate_hz = 1000" in line and "disagree" in line


def test_bad_config_is_exit_2(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text('[source]\nkind = "serial"\n[[channel]]\nname = "a"\nband = { low = 1, high = 0 }\n')
    r = probe(p)
    assert r.returncode == 2 and "Traceback" not in r.stderr


@pytest.mark.skipif(not (shutil.which("mosquitto") and shutil.which("mosquitto_passwd")),
                    reason="needs mosquitto and mosquitto_passwd for a password file")
def test_password_is_checked_and_never_printed(tmp_path):
    secret = "Orchard-Probe-9k3w-secret"
    good = tmp_path / "good.pw"
    good.write_text(secret + "\n")
    bad = tmp_path / "bad.pw"
    bad.write_text("wrong-" + secret + "\n")
    with private_broker("mosquitto", tmp_path / "broker", passwords={"pump2": secret}) as b:
        spool = tmp_path / "s" / "q.sqlite"
        results = {}
        for name, pw in (("good", good), ("bad", bad)):
            cfg = config(tmp_path, Path("socket://127.0.0.1:1"),
                         mqtt_section(b.host, b.port, spool, username="pump2",
                                      password_file=str(pw)), spool)
            results[name] = probe(cfg)
    for r in results.values():
        assert secret not in r.stdout + r.stderr
    good_out = results["good"].stdout
    assert f"✓ broker {b.host}:{b.port}: accepted the connection as user pump2" in good_out
    bad_out = results["bad"].stdout
    assert f"✗ broker {b.host}:{b.port}: cannot connect as user pump2" in bad_out
    assert results["bad"].returncode == 1


@pytest.mark.skipif(not shutil.which("mosquitto"), reason="needs mosquitto for a TLS listener")
def test_tls_files_are_loaded_and_used(tmp_path):
    pki = make_test_pki(tmp_path / "pki")
    with private_broker("mosquitto", tmp_path / "broker", tls=pki) as b:
        spool = tmp_path / "s" / "q.sqlite"
        ok = config(tmp_path, Path("socket://127.0.0.1:1"),
                    mqtt_section(b.host, b.tls_port, spool, ca_file=str(pki.ca),
                                 cert_file=str(pki.client_cert), key_file=str(pki.client_key)),
                    spool)
        r = probe(ok)
        assert "✓ TLS files" in r.stdout and f"✓ broker {b.host}:{b.tls_port}" in r.stdout
        assert "over TLS" in r.stdout
        missing = config(tmp_path, Path("socket://127.0.0.1:1"),
                         mqtt_section(b.host, b.tls_port, spool, ca_file=str(tmp_path / "no.crt")),
                         spool)
        r = probe(missing)
        assert r.returncode == 1 and "✗ TLS files" in r.stdout and "does not exist" in r.stdout
