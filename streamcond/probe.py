"""``streamcond check --probe``: try everything the daemon will need, one line per check.

Validation (``check``) says the config is well formed; the probe says it will *work here*:

* the serial port exists and this user may open it (with the usual ``dialout`` hint);
* lines arrive within a few seconds and parse against ``columns`` or the header;
* the sample rate measured from them agrees with ``sample_rate_hz`` (or, with a time column,
  the device's clock agrees with the rate at which lines arrive);
* the broker accepts a connection with the configured user, password file and TLS files;
* the spool directory is writable and has free space (and the events file's directory).

Each check is a line starting with ✓ or ✗ and a plain reason; exit 0 only when every check
passes, 1 otherwise (2 stays for a config that does not validate). No secret is printed: the
password is read from its file and handed to the client, never shown, and any message that
might carry it is scrubbed.
"""

from __future__ import annotations

import argparse
import asyncio
import grp
import os
import pwd
import secrets
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .config import Config, load_config

#: How long the probe listens to the port by default.
PROBE_SECONDS: float = 3.0
#: The measured sample rate may differ from the configured one by this share (a device's
#: crystal is good to well under 0.1 %; line timing on a busy host jitters by far more, and 5 %
#: still catches a wrong rate setting, which is off by a factor). Common practice, no
#: published source.
RATE_TOLERANCE: float = 0.05
#: Lines may arrive this much slower or faster than the device's clock says (host buffering
#: and scheduling over a few seconds; a wrong time_scale is off by a factor of 1000).
ARRIVAL_TOLERANCE: float = 0.15
#: Free space the spool's file system must have.
MIN_FREE_MIB: float = 64.0
#: Connecting to the broker may take this long.
BROKER_TIMEOUT_S: float = 5.0

OK = "✓"
FAIL = "✗"
SKIP = "–"


@dataclass
class Check:
    status: str  # OK, FAIL or SKIP (not tried: nothing to try, or an earlier check failed)
    what: str
    detail: str

    @property
    def failed(self) -> bool:
        return self.status == FAIL

    def line(self) -> str:
        return f"{self.status} {self.what}: {self.detail}"


# --- the serial port ---------------------------------------------------------------------------


def port_access(port: str) -> Check:
    """Whether the device node exists and this user may open it for reading and writing."""
    what = f"serial port {port}"
    if "://" in port:
        return Check(SKIP, what, "a pyserial URL; it is tried by reading from it below")
    if not os.path.exists(port):
        hint = " (ls /dev/serial/by-id/ lists the devices plugged in)" if port.startswith("/dev/") else ""
        return Check(FAIL, what, f"does not exist — is the device plugged in?{hint}")
    if not os.access(port, os.R_OK | os.W_OK):
        try:
            group = grp.getgrgid(os.stat(port).st_gid).gr_name
        except (KeyError, OSError):
            group = "dialout"
        user = pwd.getpwuid(os.getuid()).pw_name
        return Check(
            FAIL, what,
            f"exists, but user {user} may not open it: it belongs to group {group}; add the "
            f"user to it (sudo usermod -aG {group} {user}) and log in again",
        )
    return Check(OK, what, "exists, and this user may read and write it")


def _parse(cfg: Config, lines: list[bytes], times: list[float]) -> tuple[Any, Check]:
    """Parse the lines as the daemon would; the parsed rows and the verdict."""
    import numpy as np

    from .errors import InputError
    from .replay import check_columns, make_parser

    parser = make_parser(cfg)
    what = "first lines"
    try:
        parsed = parser.feed_lines(lines, np.asarray(times, dtype=np.float64))
    except InputError as e:
        return None, Check(FAIL, what, f"{len(lines):,} lines arrived but cannot be read: "
                           + " ".join(e.messages))
    if parser.columns is None:
        return None, Check(
            FAIL, what,
            f"{len(lines):,} lines arrived but no header line naming the columns was among "
            f"them; set source.columns in the config",
        )
    try:
        check_columns(cfg, parser.columns)
    except InputError as e:
        return None, Check(FAIL, what, " ".join(e.messages))
    n = parsed.rows.shape[0]
    bad = parsed.bad
    if n == 0:
        ex = f" (for example: {parsed.examples[0]})" if parsed.examples else ""
        return None, Check(FAIL, what, f"{len(lines):,} lines arrived, none parses{ex}")
    cols = ", ".join(parser.columns)
    share = bad / max(n + bad, 1)
    detail = f"{n:,} lines parsed against the columns {cols}; {bad:,} bad"
    if share > 0.01:
        ex = f" (for example: {parsed.examples[0]})" if parsed.examples else ""
        return (parser, parsed), Check(FAIL, what, detail + f" — more than 1 % of them{ex}")
    return (parser, parsed), Check(OK, what, detail)


def sample_rate(cfg: Config, parser: Any, parsed: Any, times: list[float]) -> Check:
    """The measured sample rate against the configured one (see the module docstring)."""
    import numpy as np

    src = cfg.source
    what = "sample rate"
    rows = parsed.rows
    host = np.asarray(times, dtype=np.float64)
    span = float(host[-1] - host[0]) if host.size > 1 else 0.0
    arrival = (host.size - 1) / span if span > 0 else float("nan")
    if src.time_column:
        ti = parser.columns.index(src.time_column)
        tt = rows[:, ti] * src.time_scale
        steps = np.diff(tt)
        steps = steps[steps > 0]
        if steps.size < 2:
            return Check(FAIL, what, f"the time column {src.time_column!r} does not increase")
        fs = 1.0 / float(np.median(steps))
        if src.sample_rate_hz is not None:
            ok = abs(fs / src.sample_rate_hz - 1.0) <= RATE_TOLERANCE
            return Check(
                OK if ok else FAIL, what,
                f"{fs:.4g} Hz by the device's clock ({src.time_column}), configured "
                f"sample_rate_hz = {src.sample_rate_hz:g}"
                + ("" if ok else " — they disagree; check source.time_scale and sample_rate_hz"),
            )
        ok = not np.isfinite(arrival) or abs(arrival / fs - 1.0) <= ARRIVAL_TOLERANCE
        return Check(
            OK if ok else FAIL, what,
            f"{fs:.4g} Hz by the device's clock ({src.time_column} × {src.time_scale:g}); "
            f"lines arrive at {arrival:.4g} per second"
            + ("" if ok else " — they disagree: check source.time_scale (0.001 for ms)"),
        )
    if not np.isfinite(arrival):
        return Check(FAIL, what, "too few lines to measure the rate")
    if src.sample_rate_hz is not None:
        ok = abs(arrival / src.sample_rate_hz - 1.0) <= ARRIVAL_TOLERANCE
        return Check(
            OK if ok else FAIL, what,
            f"lines arrive at {arrival:.4g} per second, configured sample_rate_hz = "
            f"{src.sample_rate_hz:g}" + ("" if ok else " — they disagree"),
        )
    return Check(OK, what, f"lines arrive at {arrival:.4g} per second (sample time: host "
                 f"receive time, as configured)")


async def _read(cfg: Config, seconds: float) -> tuple[list[bytes], list[float]]:
    from .tune.live import read_lines

    lines, times, _dropped = await read_lines(cfg, seconds)
    return lines, times


def serial_checks(cfg: Config, seconds: float) -> list[Check]:
    src = cfg.source
    assert src.port
    out = [port_access(src.port)]
    if out[0].failed:
        out.append(Check(SKIP, "first lines", "not tried (the port cannot be opened)"))
        out.append(Check(SKIP, "sample rate", "not measured"))
        return out
    lines, times = asyncio.run(_read(cfg, seconds))
    if not lines:
        out.append(Check(
            FAIL, "first lines",
            f"no complete line arrived in {seconds:g} s: check the wiring, the baud rate "
            f"(source.baud = {src.baud}, {src.bytesize}{src.parity}{src.stopbits:g}) and that "
            f"the device is sending",
        ))
        out.append(Check(SKIP, "sample rate", "not measured"))
        return out
    got, chk = _parse(cfg, lines, times)
    out.append(chk)
    if got is None:
        out.append(Check(SKIP, "sample rate", "not measured"))
    else:
        out.append(sample_rate(cfg, got[0], got[1], times))
    return out


def file_checks(cfg: Config) -> list[Check]:
    path = cfg.source.path
    what = "recording"
    if not path:
        return [Check(SKIP, what, "source.kind is \"file\" and no source.path is set "
                      "(replay and tune take the recording on the command line)")]
    p = Path(path)
    if not p.is_file():
        return [Check(FAIL, what, f"{path} does not exist")]
    if not os.access(p, os.R_OK):
        return [Check(FAIL, what, f"{path} is not readable by this user")]
    with open(p, "rb") as fh:
        head = fh.read(64 * 1024)
    lines = head.split(b"\n")[:-1][:500]
    got, chk = _parse(cfg, lines, [float(i) for i in range(len(lines))])
    out = [Check(OK, what, f"{path} exists and is readable"), chk]
    return out


# --- the broker --------------------------------------------------------------------------------


def _scrub(text: str, secret: str | None) -> str:
    if secret:
        text = text.replace(secret, "***")
    return text


def tls_files(cfg: Config) -> Check | None:
    mq = cfg.output.mqtt
    assert mq is not None
    files = [(k, getattr(mq, k)) for k in ("ca_file", "cert_file", "key_file") if getattr(mq, k)]
    if not files:
        return None
    for key, path in files:
        if not os.path.isfile(path):
            return Check(FAIL, "TLS files", f"output.mqtt.{key} {path} does not exist")
        if not os.access(path, os.R_OK):
            return Check(FAIL, "TLS files", f"output.mqtt.{key} {path} is not readable by this user")
    from .io.mqtt import _tls_context

    try:
        _tls_context(mq)
    except Exception as e:  # ssl.SSLError, ValueError: the files do not load
        return Check(FAIL, "TLS files", f"they do not load as certificates and key: {e}")
    return Check(OK, "TLS files", ", ".join(f"{k} {p}" for k, p in files) + " load")


def observer_client(mq: Any, password: str | None, tls: Any, tag: str) -> Any:
    """An MQTT client for a tool that only looks (the probe, the live view): the config's
    broker, user and TLS, and a client id of its own — the daemon's id would make the broker
    drop a running daemon (MQTT 3.1.1 §3.1.4: a second connection with the same id takes
    over)."""
    import aiomqtt

    return aiomqtt.Client(
        mq.host, mq.port, username=mq.username, password=password,
        identifier=f"streamcond-{tag}-" + secrets.token_hex(3), tls_context=tls,
        timeout=BROKER_TIMEOUT_S, keepalive=max(5, mq.keepalive_s),
    )


def observer_credentials(mq: Any) -> tuple[str | None, Any]:
    """The password (read from its file) and the TLS context for :func:`observer_client`;
    raises OSError/ValueError/ssl.SSLError naming files only."""
    from .io.mqtt import _tls_context, read_password

    password = read_password(mq.password_file) if mq.password_file else None
    return password, _tls_context(mq)


async def _connect(cfg: Config, password: str | None, tls: Any) -> None:
    mq = cfg.output.mqtt
    assert mq is not None
    async with observer_client(mq, password, tls, "probe"):
        pass


def broker_checks(cfg: Config) -> list[Check]:
    mq = cfg.output.mqtt
    if mq is None:
        return [Check(SKIP, "broker", "none configured (no [output.mqtt])")]
    out: list[Check] = []
    what = f"broker {mq.host}:{mq.port}"
    password = None
    if mq.password_file:
        from .io.mqtt import read_password

        try:
            password = read_password(mq.password_file)
        except (OSError, ValueError) as e:  # the message names the path only
            out.append(Check(FAIL, "password file", str(e)))
            out.append(Check(SKIP, what, "not tried (no password)"))
            return out
        out.append(Check(OK, "password file", f"{mq.password_file} is readable"))
    tls_chk = tls_files(cfg)
    tls = None
    if tls_chk is not None:
        out.append(tls_chk)
        if tls_chk.failed:
            out.append(Check(SKIP, what, "not tried (the TLS files do not load)"))
            return out
        from .io.mqtt import _tls_context

        tls = _tls_context(mq)
    how = []
    if mq.username:
        how.append(f"as user {mq.username}")
    if tls is not None:
        how.append("over TLS")
    t0 = time.monotonic()
    try:
        asyncio.run(asyncio.wait_for(_connect(cfg, password, tls), BROKER_TIMEOUT_S + 1.0))
    except Exception as e:  # aiomqtt.MqttError, OSError, TimeoutError: all reported the same way
        msg = _scrub(str(e) or type(e).__name__, password)
        if isinstance(e, (asyncio.TimeoutError, TimeoutError)):
            msg = f"no answer within {BROKER_TIMEOUT_S:g} s"
        out.append(Check(FAIL, what, f"cannot connect{(' ' + ' '.join(how)) if how else ''}: "
                         f"{msg}"))
        return out
    ms = (time.monotonic() - t0) * 1000.0
    out.append(Check(OK, what, "accepted the connection" + (f" {' '.join(how)}" if how else "")
                     + f" in {ms:.0f} ms"))
    return out


# --- files -------------------------------------------------------------------------------------


def _writable_dir(path: Path) -> tuple[bool, str, Path | None]:
    """Whether ``path`` (a directory, possibly not there yet) can hold files: (ok, why, the
    nearest existing directory)."""
    d = path
    while not d.exists():
        if d.parent == d:
            return False, "no part of it exists", None
        d = d.parent
    if not d.is_dir():
        return False, f"{d} is a file, not a directory", None
    try:
        with tempfile.NamedTemporaryFile(dir=d, prefix=".streamcond-probe-"):
            pass
    except OSError as e:
        return False, f"{d} is not writable by this user ({e.strerror})", d
    return True, ("" if d == path else f"will be created inside {d}"), d


def store_check(cfg: Config) -> Check:
    from .daemon import store_path

    spool = store_path(cfg)
    what = "spool directory" if cfg.output.mqtt is not None else "state directory"
    ok, why, existing = _writable_dir(spool.parent)
    if not ok:
        return Check(FAIL, what, f"{spool.parent}: {why}")
    free = shutil.disk_usage(existing).free / 2**20
    note = f" ({why})" if why else ""
    if free < MIN_FREE_MIB:
        return Check(FAIL, what, f"{spool.parent}{note} is writable but only {free:.0f} MiB are "
                     f"free; the spool needs room to hold records while the broker is away")
    return Check(OK, what, f"{spool.parent}{note} is writable, {free:,.0f} MiB free")


def events_check(cfg: Config) -> Check | None:
    ev = cfg.output.events
    if ev in ("", "-"):
        return None
    p = Path(ev)
    ok, why, _ = _writable_dir(p.parent if str(p.parent) else Path("."))
    if not ok:
        return Check(FAIL, "events file", f"{ev}: {why}")
    return Check(OK, "events file", f"{ev} can be written")


# --- the command -------------------------------------------------------------------------------


def probe(cfg: Config, seconds: float = PROBE_SECONDS) -> list[Check]:
    """Every check, in the order the daemon needs them."""
    src = cfg.source
    checks = serial_checks(cfg, seconds) if src.kind == "serial" else file_checks(cfg)
    checks += broker_checks(cfg)
    checks.append(store_check(cfg))
    ev = events_check(cfg)
    if ev is not None:
        checks.append(ev)
    return checks


def main(args: argparse.Namespace) -> int:
    """``streamcond check --probe``: 0 when every check passes, 1 otherwise."""
    cfg = load_config(args.config)
    seconds = getattr(args, "probe_seconds", None) or PROBE_SECONDS
    print(f"probing {args.config} (station {cfg.station.name}):", flush=True)
    checks = probe(cfg, seconds)
    for c in checks:
        print("  " + c.line(), flush=True)
    failed = sum(1 for c in checks if c.failed)
    passed = sum(1 for c in checks if c.status == OK)
    if failed:
        print(f"{failed} of {failed + passed} checks failed.")
        return 1
    print(f"all {passed} checks passed.")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main(argparse.Namespace(config=sys.argv[1])))
