"""Outputs that say what is true (issue 12, items 6, 9, 11): every record through the constructors
of records.py, numbers rounded to what they mean, one time base for `t` with a UTC stamp where the
wall-clock time is known, and the last partial window flushed with the final totals."""

from __future__ import annotations

import asyncio
import json
import math
from datetime import datetime
from decimal import Decimal
from pathlib import Path

import numpy as np
import pytest

from streamcond import records
from streamcond.config import load_config
from streamcond.replay import run_replay

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "replay_data" / "orchard_pump.csv"
CONFIG = ROOT / "config" / "orchard_pump.toml"
TRUTH = json.loads((ROOT / "replay_data" / "orchard_pump.truth.json").read_text())


# -- 11: numbers ---------------------------------------------------------------------------------


def test_times_to_the_nanosecond_values_to_significant_digits():
    rec = records.fault_start("tank_high", 148.89600000000002, 2.5382000000000002, "x")
    rec["duration_s"] = 1.0000000004999
    line = records.to_json(rec)
    assert '"t":148.896,' in line and '"value":2.5382,' in line
    back = json.loads(line)
    # reference: decimal rounding half-even to 1e-9 s (Python's decimal module, IEEE 754 /
    # General Decimal Arithmetic), the nanosecond the README promises
    assert back["duration_s"] == float(Decimal(1.0000000004999).quantize(Decimal("1e-9")))
    s = records.to_json(records.state("pump", -0.044956561771883286, 0, 0.011000000000000008))
    assert json.loads(s) == {"kind": "state", "channel": "pump", "t": -0.044956562, "level": 0,
                             "value": 0.011}
    # significant digits: the %.10g of C printf, as a reference independent of our code
    v = 5.594652404537191
    assert json.loads(records.to_json(records.edge("p", 1.0, 1, v, 1)))["value"] == float("%.10g" % v)
    # nested times (period_s {min, mean, max}) are times; not-a-number is null
    m = records.measure("f", 0.0, t_end=10.0, period_s={"mean": 0.053406584123456}, rate=math.nan)
    back = json.loads(records.to_json(m))
    assert back["period_s"]["mean"] == 0.053406584 and back["rate"] is None


def test_no_record_is_an_inline_dict():
    # every kind is built by a constructor of records.py (rounding and utc in one place): no
    # dict display with a "kind" key anywhere else in the package (read with the ast module)
    import ast

    for path in (ROOT / "streamcond").rglob("*.py"):
        if path.name == "records.py":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Dict):
                keys = [k.value for k in node.keys if isinstance(k, ast.Constant)]
                assert "kind" not in keys, f"{path.name}:{node.lineno}"


# -- 6: the last window, and the totals ----------------------------------------------------------


@pytest.fixture(scope="module")
def demo():
    return run_replay(load_config(CONFIG), DEMO, keep_records=True)


def test_last_window_is_flushed_and_totals_match_the_scenario(demo):
    recs = demo.records
    last = [r for r in recs if r.get("partial")]
    assert {(r["kind"], r["channel"]) for r in last} == {
        ("stats", "tank_high"), ("stats", "pump"), ("stats", "flow"),
        ("measure", "pump"), ("measure", "flow"),
    }
    assert all(r["t"] == 170.0 and r["t_end"] == 180.0 for r in last)
    flow = [r for r in recs if r["kind"] == "measure" and r["channel"] == "flow"]
    # the generator's own count of the pulses it drew (replay_data/orchard_pump.truth.json)
    assert flow[-1]["total"] == TRUTH["flow"]["pulses"] == 1767
    assert flow[-2]["total"] < flow[-1]["total"]  # what the last window used to lose
    totals = demo.summary["totals"]
    assert totals["flow"]["total"] == TRUTH["flow"]["pulses"]
    assert totals["flow"]["total_units"] == pytest.approx(1767 / 7.5)  # K-factor 7.5 pulses/L
    assert totals["flow"]["edges"] == demo.summary["edges"]["flow"]
    assert recs[-1] is demo.summary


# -- 9: one time base, and utc -------------------------------------------------------------------


def test_utc_is_iso8601_of_the_host_time():
    t = 1764654207.25
    u = records.utc(t)
    assert u == "2025-12-02T05:43:27.250000Z"
    # reference: the standard library's ISO 8601 parser
    assert datetime.fromisoformat(u.replace("Z", "+00:00")).timestamp() == t


def _daemon_config(tmp_path: Path) -> Path:
    p = tmp_path / "d.toml"
    p.write_text(
        '[source]\nkind = "serial"\nport = "/dev/null"\nformat = "csv"\n'
        'columns = ["t_ms", "a"]\ntime_column = "t_ms"\ntime_scale = 0.001\n'
        '[[channel]]\nname = "a"\nband = { low = 0.3, high = 0.7 }\n'
        '[stats]\ninterval_s = 1.0\n'
        f'[output]\nevents = "{tmp_path / "ev.jsonl"}"\nstate_path = "{tmp_path / "st.sqlite"}"\n'
    )
    return p


def test_live_records_one_time_base_utc_and_last_window(tmp_path):
    from streamcond.daemon import Daemon
    from streamcond.io.serialsource import Back, Data, Lost

    d = Daemon(_daemon_config(tmp_path))
    d._open_outputs()
    host0 = 1764654207.0
    # device clock t_ms starts at 5000 ms; 100 Hz, a square wave of 0.5 s half-period
    ms = np.arange(0, 2500, 10)
    # one read per line, each received 2 ms after its sample time (host0 ↔ device 5.0 s)
    data = [Data(b"\n", host0 - 0.1)] + [
        Data(b"%d,%d\n" % (5000 + m, (m // 500) % 2), host0 + m / 1000 + 0.002) for m in ms
    ]
    for ev in data + [Lost(host0 + 3.0, "gone"), Back(host0 + 4.0)]:
        d.emitter.put(d.live.feed(ev))  # what the serial reader's thread does with each read
    asyncio.run(d._shutdown())
    recs = [json.loads(l) for l in (tmp_path / "ev.jsonl").read_text().splitlines()]
    lost = next(r for r in recs if r.get("reason") == "device_lost" and r["kind"] == "fault")
    # `t` is sample time (the device's clock, ~7.49 s), not host epoch seconds
    last_t = 5.0 + 2.49
    assert lost["t"] == pytest.approx(last_t + (3.0 - 2.492), abs=1e-6)
    assert lost["utc"] == records.utc(host0 + 3.0)
    gap = next(r for r in recs if r["kind"] == "gap")
    assert gap["t"] == pytest.approx(lost["t"]) and gap["t_end"] == pytest.approx(lost["t"] + 1.0)
    edges = [r for r in recs if r["kind"] == "edge"]
    assert len(edges) == 4 and all("utc" in r for r in edges)
    for e in edges:
        # the wall-clock time of t: the host receive time of the line, shifted by t minus that
        # line's sample time; every line arrived 2 ms after its sample time
        want = host0 + 0.002 + (e["t"] - 5.0)
        got = datetime.fromisoformat(e["utc"].replace("Z", "+00:00")).timestamp()
        assert got == pytest.approx(want, abs=2e-6)
    # the clean stop flushed the last, partial stats window (7.0–7.5 s)
    part = [r for r in recs if r["kind"] == "stats" and r.get("partial")]
    assert len(part) == 1 and part[0]["t"] == 7.0 and part[0]["t_end"] == pytest.approx(7.5)
    assert part[0]["samples"] == 50


def test_live_and_replay_write_the_same_bytes(tmp_path):
    # the same rows through the replay path (a capture with host times) and the daemon's writer
    from streamcond.io.eventlog import EventLog
    from streamcond.core.pipeline import Pipeline
    from streamcond.io.lineparse import HOST_T

    cfg = load_config(_daemon_config(tmp_path))
    rows = np.column_stack([np.arange(0, 3000, 10.0), (np.arange(300) // 37) % 2,
                            1764654207.0 + np.arange(300) * 0.01])
    outs = []
    for chunks in ([300], [1] * 300):
        p = Pipeline(cfg, ["t_ms", "a", HOST_T])
        path = tmp_path / f"o{len(chunks)}.jsonl"
        w = EventLog(str(path), mode="new")
        a = 0
        for n in chunks:
            for r in p.process(rows[a : a + n]):
                w(r)
            a += n
        for r in p.finish():
            w(r)
        w.close()
        outs.append(path.read_bytes())
    assert outs[0] == outs[1] and b'"utc":"2025-12-02T05:43:' in outs[0]


def test_fast_json_writer_is_the_encoders_text():
    """to_json writes flat fields itself; its text must be exactly the standard library
    encoder's (``json.dumps`` with compact separators, ASCII escapes, NaN refused) on the
    rounded record, for every kind of value a record can hold."""
    from hypothesis import given, settings, strategies as st

    scalar = st.one_of(
        st.floats(allow_nan=True, allow_infinity=True), st.integers(-2**70, 2**70),
        st.booleans(), st.none(), st.text(max_size=12),
    )
    value = st.one_of(scalar, st.lists(scalar, max_size=3),
                      st.dictionaries(st.sampled_from(["mean", "min_s", "x"]), scalar, max_size=3))
    keys = st.sampled_from(["kind", "channel", "t", "t_end", "value", "dwell_s", "n", "reason",
                            "ok", "ünïcode", "with \"quote\"", "x_s"])

    @settings(max_examples=400, deadline=None)
    @given(st.dictionaries(keys, value, max_size=8))
    def check(rec):
        expect = json.dumps(records.rounded(rec), separators=(",", ":"), allow_nan=False)
        assert records.to_json(rec) == expect

    check()
