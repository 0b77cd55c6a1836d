"""A fuzzed recording for each line format, with the truth of every line known by construction:
valid rows (some with time going backwards, CRLF ends, spaces), blank lines (neither data nor
bad), a repeated header (skipped), and bad lines of every kind the wire can send."""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np

MAX_LINE = 4096
COLUMNS = ["t", "a", "b"]


@dataclass
class Fuzzed:
    data: bytes  # the fuzzed stream
    clean: bytes  # the same valid rows only, in the same order
    bad: int  # bad lines in ``data``
    valid: int


def config(fmt: str) -> str:
    cols = 'columns = ["t", "a", "b"]\n' if fmt == "csv" else ""
    return (
        f'[source]\nkind = "file"\nformat = "{fmt}"\n{cols}time_column = "t"\ntime_scale = 0.001\n'
        f"max_line_bytes = {MAX_LINE}\n"
        '[[channel]]\nname = "a"\nfilter = { kind = "lowpass", cutoff_hz = 40.0 }\n'
        "band = { low = -0.3, high = 0.3 }\n"
        '[[channel]]\nname = "b"\nband = { low = -0.2, high = 0.2 }\n'
        "[stats]\ninterval_s = 5.0\n[output]\nevents = \"\"\n"
    )


def _row(fmt: str, t: int, a: float, b: float, style: int) -> bytes:
    if fmt == "csv":
        forms = ["%d,%.5f,%.4f", "%d,%.6e,%.3f", "%d, %.5f ,%+.4f", "%d,%.5f,%.17g"]
        return (forms[style % 4] % (t, a, b)).encode()
    if fmt == "kv":
        forms = ["t=%d a=%.5f b=%.4f", "t=%d,a=%.6e,b=%.3f", "b=%.4f;a=%.5f;t=%d x=junk"]
        f = forms[style % 3]
        return (f % ((b, a, t) if style % 3 == 2 else (t, a, b))).encode()
    obj = {"t": t, "a": round(a, 5), "b": float(b)} if style % 2 else {"b": b, "a": a, "t": t}
    return json.dumps(obj).encode()


def _junk(fmt: str, rng: np.random.Generator, kind: int, t: int) -> bytes:
    if kind == 0:  # random bytes with a NUL, never a newline
        raw = bytes(rng.integers(0, 256, int(rng.integers(1, 60)), dtype=np.uint8))
        return raw.replace(b"\n", b"") + b"\x00"
    if kind == 1:  # invalid UTF-8 around a row
        return b"\xff\xfe" + _row(fmt, t, 0.1, 0.1, 0) + b"\xc3"
    if kind == 2:  # two rows joined by a bare CR (CR-only line ends)
        return _row(fmt, t, 0.1, 0.1, 0) + b"\r" + _row(fmt, t + 1, 0.1, 0.1, 0)
    if kind == 3:  # over-long
        return b"1," * (MAX_LINE // 2 + 10)
    if kind == 4:  # NaN / inf / 1e999 in a needed column
        v = [b"nan", b"inf", b"1e999", b"-1e999"][int(rng.integers(0, 4))]
        if fmt == "json":
            v = [b"NaN", b"Infinity", b"1e999", b"-Infinity"][int(rng.integers(0, 4))]
            return b'{"t":%d,"a":%s,"b":0}' % (t, v)
        return (b"%d,%s,0" if fmt == "csv" else b"t=%d a=%s b=0") % (t, v)
    if kind == 5:  # a 400-digit integer
        big = b"1" + b"0" * 400
        if fmt == "json":
            return b'{"t":%d,"a":%s,"b":0}' % (t, big)
        return (b"%d,%s,0" if fmt == "csv" else b"t=%d a=%s b=0") % (t, big)
    if kind == 6:  # deep nesting (still under the length limit)
        return b"[" * 1500 + b"]" * 1500
    if kind == 7:  # wrong field count / a needed name missing
        if fmt == "csv":
            return [b"%d,1" % t, b"%d,1,2,3" % t, b"%d,,1" % t][int(rng.integers(0, 3))]
        if fmt == "kv":
            return b"t=%d a=1" % t
        return b'{"t":%d,"a":1}' % t
    # kind 8: strictness of the format's own words
    if fmt == "csv":
        return [b"%d,1_0,2" % t, b"%d,0x10,2" % t, b"%d,1.2.3,2" % t][int(rng.integers(0, 3))]
    if fmt == "kv":
        return [b"t=%d a=1_0 b=1" % t, "t=%d a=\u0661 b=1".encode() % t,
                b"t=%d a=1 b=2 t=5" % t][int(rng.integers(0, 3))]
    return [b'{"t":%d,"a":true,"b":1}' % t, b'{"t":%d,"a":"0.9","b":1}' % t,
            b'{"t":%d,"t":1,"a":1,"b":1}' % t, b"[1,2,3]"][int(rng.integers(0, 4))]


def make(fmt: str, n_lines: int = 100_000, seed: int = 5, junk_share: float = 0.2) -> Fuzzed:
    rng = np.random.default_rng(seed)
    out: list[bytes] = []
    clean: list[bytes] = []
    header = b"t,a,b" if fmt == "csv" else None
    if header:
        out.append(header + b"\n")
        clean.append(header + b"\n")
    bad = valid = 0
    t = 0
    for i in range(n_lines):
        u = rng.random()
        if u < junk_share:
            out.append(_junk(fmt, rng, int(rng.integers(0, 9)), t) + b"\n")
            bad += 1
            continue
        if u < junk_share + 0.01:
            out.append(rng.choice([b"", b"   ", b"\t"]) + b"\n")  # blank: neither
            continue
        if header and u < junk_share + 0.012:
            out.append(header + b"\r\n")  # the device restarted and printed its header again
            continue
        t += 1 if rng.random() > 0.002 else -int(rng.integers(1, 50))  # sometimes backwards
        a = np.sin(2 * np.pi * 2.0 * t / 1000.0) + 0.05 * rng.standard_normal()
        b = np.sin(2 * np.pi * 0.7 * t / 1000.0) + 0.05 * rng.standard_normal()
        row = _row(fmt, t, float(a), float(b), int(rng.integers(0, 4)))
        end = b"\r\n" if rng.random() < 0.1 else b"\n"
        out.append(row + end)
        clean.append(row + b"\n")
        valid += 1
    return Fuzzed(b"".join(out), b"".join(clean), bad, valid)
