"""State record timing, restart state and config-reload adoption of a channel."""

from __future__ import annotations

import numpy as np

from streamcond.config import config_from_dict
from streamcond.core.pipeline import Pipeline

FS = 1000.0


def cfg(filter_: dict, band: dict | None = None) -> dict:
    return {
        "source": {"kind": "file", "time_column": "t"},
        "channel": [{"name": "x", "filter": filter_, "band": band or {"low": -0.5, "high": 0.5}}],
    }


def run(c: dict, t, x, state=None, pipe=None):
    p = pipe or Pipeline(config_from_dict(c), ["t", "x"])
    if state:
        p.restore(state)
    return p, p.process(np.column_stack([t, x]))


def test_an_edge_never_precedes_its_state():
    # Decided at 12.0 s, then a falling crossing 0.05 s later: with an ema of 0.125 s the
    # compensated edge time would lie before an uncompensated state time.
    t = np.arange(0, 14, 1 / FS)
    x = np.where(t < 12.0, 0.0, np.where(t < 12.05, 2.0, -2.0))
    _, recs = run(cfg({"kind": "ema", "tau_s": 0.125}), t, x)
    ch = [r for r in recs if r.get("channel") == "x" and r["kind"] in ("state", "edge")]
    assert ch[0]["kind"] == "state"
    assert all(a["t"] <= b["t"] for a, b in zip(ch, ch[1:]))


def test_restart_continues_seq_and_level():
    t = np.arange(0, 4, 1 / FS)
    x = np.sign(np.sin(2 * np.pi * 1.0 * t + 0.3))
    c = cfg({"kind": "none"})
    p1, r1 = run(c, t, x)
    seqs = [r["seq"] for r in r1 if r["kind"] == "edge"]
    snap = p1.snapshot()
    assert snap["x"] == {"seq": seqs[-1], "level": p1.channels[0].level}
    # the next run starts where the last one left off: no state record when the level agrees,
    # and edge numbering continues
    t2 = t + 10.0
    _, r2 = run(c, t2, x, state=snap)
    kinds = [r["kind"] for r in r2 if r.get("channel") == "x"]
    assert "state" not in kinds
    seq2 = [r["seq"] for r in r2 if r["kind"] == "edge"]
    assert seq2[0] == seqs[-1] + 1 and seq2 == list(range(seq2[0], seq2[0] + len(seq2)))


def test_reload_adopts_state_of_unchanged_channels():
    t = np.arange(0, 2, 1 / FS)
    x = np.sign(np.sin(2 * np.pi * 2.0 * t + 0.3))
    old, r_old = run(cfg({"kind": "median", "window": 5}), t, x)
    last_seq = [r["seq"] for r in r_old if r["kind"] == "edge"][-1]
    new = Pipeline(config_from_dict(cfg({"kind": "median", "window": 5}, {"low": -0.6, "high": 0.6})), ["t", "x"])
    new.adopt(old)
    assert new.channels is not None and new.channels[0].filter is old.channels[0].filter
    _, r_new = run(None, t + 2.0, x, pipe=new)
    seqs = [r["seq"] for r in r_new if r["kind"] == "edge"]
    assert seqs[0] == last_seq + 1
    assert not any(r["kind"] == "state" for r in r_new)
