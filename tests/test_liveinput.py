"""The live daemon's input side (streamcond.liveinput) and reloads of the pipeline, in-process:
the block scheduler holds rows back only while no edge can be pending, and never changes a
record; a reload with an identical config changes no record at all.

The reference for every check is the same samples through one uninterrupted :class:`Pipeline`
in one block — the chunk-invariance law of DESIGN.md — so the expected records come from the
core's own definition, not from the code under test."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from conftest import as_json, config_dict, of_kind
from streamcond.config import config_from_dict, load_config
from streamcond.core.pipeline import Pipeline
from streamcond.io.serialsource import Data
from streamcond.liveinput import LiveInput

ROOT = Path(__file__).resolve().parent.parent
FS = 100.0


def live_config(extra_channel: dict | None = None) -> dict:
    chans = [{"name": f"c{i}", "band": {"low": 0.3, "high": 0.7}} for i in range(4)]
    chans.append({"name": "ad", "column": "c0",
                  "band": {"mode": "adaptive", "center": 0.5, "k": 6.0, "window_s": 2.0,
                           "min_width": 0.2, "max_width": 0.6}})
    if extra_channel:
        chans.append(extra_channel)
    d = config_dict(chans, columns=["t", "c0", "c1", "c2", "c3"], time_scale=1.0)
    d["source"].update(kind="serial", port="/dev/null")
    d["stats"] = {"interval_s": 1.0}
    return d


def square_rows(n: int, seed: int = 7) -> np.ndarray:
    """Staggered square waves (period 1 s) with Gaussian noise well inside the band."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    cols = [t]
    for c in range(4):
        sq = ((np.floor(t * 2 + c * 0.25)) % 2).astype(float)
        cols.append(np.round(sq + rng.normal(0, 0.03, n), 4))
    return np.column_stack(cols)


def lines_of(rows: np.ndarray) -> list[bytes]:
    return [(",".join(repr(float(v)) for v in r) + "\n").encode() for r in rows]


def feed_lines(cfg_d: dict, rows: np.ndarray, max_hold_s: float) -> tuple[list[tuple[int, dict]], LiveInput]:
    """Each line as one read (host time = sample time); records tagged with the read that
    returned them."""
    live = LiveInput(config_from_dict(cfg_d), {}, max_hold_s=max_hold_s)
    live.framer.reset()  # the test's first read starts at a line boundary
    out: list[tuple[int, dict]] = []
    for i, ln in enumerate(lines_of(rows)):
        o = live.feed(Data(ln, float(rows[i, 0])))
        if o is not None:
            out.extend((i, r) for r in o.records)
    o = live.flush()
    if o is not None:
        out.extend((len(rows), r) for r in o.records)
    return out, live


def reference(cfg_d: dict, rows: np.ndarray) -> list[dict]:
    cfg = config_from_dict(cfg_d)
    pipe = Pipeline(cfg, ["t", "c0", "c1", "c2", "c3", "_host_t"])
    return pipe.process(np.column_stack((rows, rows[:, 0])))


def test_holding_rows_changes_no_record_and_delays_no_edge():
    rows = square_rows(1500)
    cfg = live_config()
    held, live_h = feed_lines(cfg, rows, max_hold_s=0.25)
    eager, live_e = feed_lines(cfg, rows, max_hold_s=0.0)
    ref = reference(cfg, rows)
    assert as_json(r for _, r in held) == as_json(ref)
    assert as_json(r for _, r in eager) == as_json(ref)
    # every edge (and state) comes out of the very read that brought its sample
    def firsts(tagged):
        return [(i, r["channel"], r["seq"]) for i, r in tagged if r["kind"] == "edge"]
    assert firsts(held) == firsts(eager)
    assert len(of_kind(ref, "edge")) > 100
    # and most reads cost no conditioning call: the hold did its job
    assert live_e.counters.blocks == len(rows)
    assert live_h.counters.blocks < len(rows) / 2


def test_a_prefiltered_channel_is_never_held():
    # a filter's memory reaches back into rows already conditioned: no proof, no hold
    rows = square_rows(300)
    cfg = live_config({"name": "m", "column": "c1", "filter": {"kind": "median", "window": 5},
                       "band": {"low": 0.3, "high": 0.7}})
    held, live = feed_lines(cfg, rows, max_hold_s=10.0)
    assert as_json(r for _, r in held) == as_json(reference(cfg, rows))
    assert live.counters.blocks == len(rows)


def demo_rows() -> tuple[list[str], np.ndarray]:
    path = ROOT / "replay_data" / "orchard_pump.csv"
    header = path.open().readline().strip().split(",")
    return header, np.loadtxt(path, delimiter=",", skiprows=1)


def test_reload_with_an_identical_config_changes_no_record():
    # issue: after a SIGHUP with an identical config the next stats window counted 1,350
    # samples instead of 2,500 and noise_sigma stayed null; a reload must be invisible.
    cfg_path = ROOT / "config" / "orchard_pump.toml"
    columns, rows = demo_rows()
    whole = Pipeline(load_config(cfg_path), columns)
    ref = whole.process(rows)
    half = rows.shape[0] // 2 + 1234  # mid-window on purpose
    first = Pipeline(load_config(cfg_path), columns)
    out = first.process(rows[:half])
    second = Pipeline(load_config(cfg_path), columns)  # the reloaded, identical config
    second.adopt(first)
    out += second.process(rows[half:])
    assert as_json(out) == as_json(ref)
    stats = of_kind(out, "stats")
    assert stats and all(s["noise_sigma"] is not None for s in stats[len(stats) // 2:])


def test_reload_keeps_unchanged_channels_when_another_changes():
    cfg_path = ROOT / "config" / "orchard_pump.toml"
    columns, rows = demo_rows()
    base = load_config(cfg_path)
    ref = Pipeline(base, columns).process(rows)
    half = rows.shape[0] // 2 + 777
    first = Pipeline(base, columns)
    out = first.process(rows[:half])
    d = base.model_dump()
    d["channel"][2]["band"] = {"low": 1.1, "high": 2.2}  # only the last channel changes
    changed = config_from_dict(d)
    second = Pipeline(changed, columns)
    second.adopt(first)
    out += second.process(rows[half:])
    names = [c.name for c in base.channel[:2]]
    for name in names:  # the untouched channels: every record as without the reload
        assert as_json(r for r in out if r.get("channel") == name) == as_json(
            r for r in ref if r.get("channel") == name)


def test_deferred_quiet_channels_give_the_records_of_one_block():
    # Pipeline defers the samples of channels that provably emit nothing (no edge possible,
    # no stats window end, no noise estimate due); the law still holds bit for bit.
    rows = square_rows(3000, seed=3)
    d = live_config({"name": "neg", "column": "c2", "gain": -2.0, "offset": 1.5,
                     "band": {"low": -0.2, "high": 0.2}})
    d["source"]["kind"] = "file"
    cfg = config_from_dict(d)
    cols = ["t", "c0", "c1", "c2", "c3"]
    whole = Pipeline(cfg, cols)
    ref = whole.process(rows) + whole.finish()
    rng = np.random.default_rng(11)
    pipe = Pipeline(cfg, cols)
    out: list[dict] = []
    deferred = 0
    a = 0
    while a < rows.shape[0]:
        b = min(rows.shape[0], a + int(rng.integers(1, 8)))
        out += pipe.process(rows[a:b])
        deferred += sum(1 for p in pipe._pending if p)
        a = b
    out += pipe.finish()
    assert as_json(out) == as_json(ref)
    assert deferred > rows.shape[0]  # most channels waited in most blocks
