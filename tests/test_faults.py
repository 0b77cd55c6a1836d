"""Sensor faults: samples at or beyond the fault limits are not levels."""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pytest

from streamcond import records
from streamcond.config import config_from_dict, load_config
from streamcond.core.pipeline import Pipeline
from streamcond.replay import run_replay

ROOT = Path(__file__).resolve().parent.parent
TRUTH = json.loads((ROOT / "replay_data" / "orchard_pump.truth.json").read_text())


def cfg(**ch) -> dict:
    base = {"name": "lvl", "column": "x", "band": {"low": 11.0, "high": 13.0}, "fault": {"preset": "namur_ne43"}}
    base.update(ch)
    return {"source": {"kind": "file", "time_column": "t", "sample_rate_hz": 100.0}, "channel": [base]}


def run(c: dict, t, x, chunk=None, finish=False) -> list[dict]:
    p = Pipeline(config_from_dict(c), ["t", "x"])
    rows = np.column_stack([t, x])
    step = chunk or len(rows)
    out: list[dict] = []
    for a in range(0, len(rows), step):
        out += p.process(rows[a : a + step])
    return out + p.finish() if finish else out


@pytest.mark.parametrize(
    "ma, fault",
    # NAMUR NE 43 (from memory): 3.8–20.5 mA measurement; <= 3.6 mA or >= 21.0 mA failure
    [(3.5, True), (21.5, True), (3.6, True), (21.0, True), (3.9, False), (20.4, False), (12.0, False)],
)
def test_ne43_classification(ma, fault):
    t = np.arange(0, 2.0, 0.01)
    x = np.full(t.size, 12.0)
    x[100:150] = ma
    recs = run(cfg(), t, x)
    faults = [r for r in recs if r["kind"] == "fault"]
    assert bool(faults) == fault
    if fault:
        assert [f["state"] for f in faults] == ["start", "end"]
        assert faults[0]["t"] == pytest.approx(1.0) and faults[1]["duration_s"] == pytest.approx(0.5)


def test_level_held_and_no_edges_during_fault():
    # high (14 mA), then a broken wire (2 mA) for 1 s, then high again: a fault, no edges;
    # without the fault limits the same data gives a falling and a rising edge
    t = np.arange(0, 3.0, 0.01)
    x = np.where((t >= 1.0) & (t < 2.0), 2.0, 14.0)
    with_fault = run(cfg(), t, x)
    assert [r["kind"] for r in with_fault if r["kind"] != "stats"] == ["state", "fault", "fault"]
    c = cfg()
    del c["channel"][0]["fault"]
    without = run(c, t, x)
    assert sum(r["kind"] == "edge" for r in without) == 2


def test_fault_records_do_not_depend_on_chunking():
    rng = np.random.default_rng(2)
    t = np.arange(0, 30.0, 0.01)
    x = 12 + 2 * np.sign(np.sin(2 * np.pi * 0.2 * t)) + 0.1 * rng.standard_normal(t.size)
    x[700:900] = 2.5
    x[1500:1510] = 22.0
    c = cfg(filter={"kind": "median", "window": 5})
    whole = run(c, t, x)
    for chunk in (1, 13, 256):
        assert run(c, t, x, chunk) == whole
    stats = [r for r in whole if r["kind"] == "stats"]
    assert sum(s["fault_s"] for s in stats) == pytest.approx((200 + 10) * 0.01)


def test_demo_fault_episode(tmp_path):
    # the demo config gives the tank level the NE 43 preset
    cfg = load_config(ROOT / "config" / "orchard_pump.toml")
    assert cfg.channel[0].fault is not None and cfg.channel[0].fault.preset == "namur_ne43"
    res = run_replay(cfg, ROOT / "replay_data" / "orchard_pump.csv", keep_records=True)
    faults = [r for r in res.records if r["kind"] == "fault" and r["channel"] == "tank_high"]
    truth = TRUTH["fault"]
    assert [f["state"] for f in faults] == ["start", "end"]
    assert faults[0]["t"] == pytest.approx(truth["t_start"], abs=0.01)
    assert faults[1]["t"] == pytest.approx(truth["t_end"], abs=0.01)


def test_a_scaled_value_beyond_any_number_is_a_fault_not_a_crash():
    # 1e308 is a finite double (IEEE 754: the largest is about 1.798e308), so a parser passes
    # it; times a gain of 10 it overflows to inf, which no filter, noise estimate or comparator
    # can take. It is a sensor fault like one beyond the limits: a fault record, the level held,
    # the stream goes on — in any blocks (with no prefilter the channel may be conditioned
    # later in small blocks, which must not carry the overflow past its record).
    t = np.arange(0, 12.0, 0.01)
    x = np.sign(np.sin(2 * np.pi * 0.5 * t)) * 0.8
    x[650] = 1e308  # mid-plateau (t = 6.5 s)
    assert math.isinf(1e308 * 10.0)
    # channel b (a prefilter: never deferred) records in place beside it, so a deferred
    # fault record of a would come out of order
    c = {"source": {"kind": "file", "time_column": "t", "sample_rate_hz": 100.0},
         "channel": [{"name": "a", "column": "x", "gain": 10.0, "band": {"low": -1.0, "high": 1.0}},
                     {"name": "b", "column": "y", "band": {"low": -0.5, "high": 0.5},
                      "filter": {"kind": "moving_average", "window": 2}}],
         "stats": {"interval_s": 1.0, "noise_window_s": 1.0, "noise_refresh_s": 1.0}}
    y = np.sign(np.sin(2 * np.pi * 0.9 * t + 0.3))

    def run2(x: np.ndarray, chunk: int | None = None) -> list[dict]:
        p = Pipeline(config_from_dict(c), ["t", "x", "y"])
        rows = np.column_stack([t, x, y])
        step = chunk or len(rows)
        out: list[dict] = []
        for a in range(0, len(rows), step):
            out += p.process(rows[a : a + step])
        return out + p.finish()

    whole = run2(x)
    faults = [r for r in whole if r["kind"] == "fault"]
    assert [(f["channel"], f["state"]) for f in faults] == [("a", "start"), ("a", "end")]
    assert faults[0]["t"] == pytest.approx(6.5) and faults[1]["duration_s"] == pytest.approx(0.01)
    assert "beyond any number" in faults[0]["reason"]
    # the fault changes no level: the same edges as without the reading
    clean = x.copy()
    clean[650] = clean[649]
    edges = [r for r in whole if r["kind"] == "edge" and r["channel"] == "a"]
    assert edges == [r for r in run2(clean) if r["kind"] == "edge" and r["channel"] == "a"]
    assert len(edges) > 10
    for chunk in (1, 7, 250):
        assert run2(x, chunk) == whole


def _json(recs: list[dict]) -> list[str]:
    # compared as written: a fault record's value of NaN is null, and NaN != NaN in a dict
    return [records.to_json(r) for r in recs]


def test_a_level_no_sensor_measures_is_a_fault_and_the_filter_lives_on():
    # 1e308 and ±1.7e308 are finite doubles (IEEE 754 binary64: the largest is about
    # 1.798e308), so a parser passes them. Without a gain they used to reach the channel: an
    # IIR lowpass rang for seconds after one (and the pair overflows its state to ±inf, then
    # inf - inf = NaN), a moving average summed to inf, which stopped the replay with a
    # traceback from the noise tracker. A level beyond ±1e150 is a fault, like NaN: a record,
    # the level held, the filter never sees it.
    t = np.arange(0, 12.0, 0.01)
    rng = np.random.default_rng(4)
    clean = np.sign(np.sin(2 * np.pi * 0.5 * t)) * 0.8 + 0.01 * rng.standard_normal(t.size)
    x = clean.copy()
    x[650] = 1e308  # mid-plateau (t = 6.5 s)
    x[820], x[821] = -1.7e308, 1.7e308  # t = 8.2 s
    x[300:303] = np.nan  # t = 3.0 s
    filters = [{"kind": "lowpass", "cutoff_hz": 5.0, "order": 2},
               {"kind": "moving_average", "window": 4}, {"kind": "ema", "tau_s": 0.05},
               {"kind": "none"}]
    c = {"source": {"kind": "file", "time_column": "t", "sample_rate_hz": 100.0},
         "channel": [{"name": f"c{i}", "column": "x", "band": {"low": -0.4, "high": 0.4},
                      "filter": f} for i, f in enumerate(filters)]
         + [{"name": "ad", "column": "x", "band": {"mode": "adaptive", "center": 0.0,
                                                   "window_s": 2.0, "initial_width": 0.5}}],
         "stats": {"interval_s": 1.0, "noise_window_s": 1.0, "noise_refresh_s": 1.0}}

    def go(x: np.ndarray, chunk: int | None = None) -> list[dict]:
        return run(c, t, x, chunk, finish=True)

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no overflow warning on the way either
        whole = go(x)
        for chunk in (1, 7, 250):
            assert _json(go(x, chunk)) == _json(whole)
    names = [ch["name"] for ch in c["channel"]]
    for name in names:
        faults = [r for r in whole if r["kind"] == "fault" and r["channel"] == name]
        assert [(f["state"], round(f["t"], 6)) for f in faults] == [
            ("start", 3.0), ("end", 3.03), ("start", 6.5), ("end", 6.51),
            ("start", 8.2), ("end", 8.22)]
        assert "not a number" in faults[0]["reason"] and "1e+150" in faults[2]["reason"]
    # the faults change no level: every channel's edges are those of the clean signal, within
    # the few samples a filter skipped (a fault leaves its state as it was)
    ref = go(clean)
    for name in names:
        got = [(r["edge"], r["t"]) for r in whole if r["kind"] == "edge" and r["channel"] == name]
        want = [(r["edge"], r["t"]) for r in ref if r["kind"] == "edge" and r["channel"] == name]
        assert len(got) == len(want) == 11, name
        for (e1, t1), (e2, t2) in zip(got, want):
            assert e1 == e2 and t1 == pytest.approx(t2, abs=0.05), name
