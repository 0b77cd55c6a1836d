"""Every reader gives the same records (issue 14): numpy's and pyarrow's CSV block readers, Parquet
and Arrow IPC, in one block or many; and the recording checks of issue 12 (binary, empty,
header-only) and `record -o` safety."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from streamcond.config import load_config
from streamcond.errors import InputError
from streamcond.replay import run_replay

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "replay_data" / "orchard_pump.csv"
CFG = ROOT / "config" / "orchard_pump.toml"


def _recs(cfg, path, monkeypatch, reader="numpy", block=1 << 22):
    monkeypatch.setenv("STREAMCOND_CSV_READER", reader)
    res = run_replay(cfg, path, keep_records=True, block_bytes=block)
    return [r for r in res.records if r["kind"] != "summary"], res


def test_demo_gives_the_same_records_from_every_reader(tmp_path, monkeypatch):
    import pyarrow as pa
    import pyarrow.parquet as pq

    from streamcond.convert import convert

    cfg = load_config(CFG)
    ref, ref_res = _recs(cfg, DEMO, monkeypatch)
    assert sum(r["kind"] == "edge" for r in ref) == 3553  # the golden file's count
    for reader, block in [("pyarrow", 1 << 22), ("numpy", 1 << 12), ("pyarrow", 1 << 12)]:
        recs, res = _recs(cfg, DEMO, monkeypatch, reader, block)
        assert recs == ref, (reader, block)
        assert res.bad_lines == ref_res.bad_lines and res.rows == ref_res.rows
    parquet = tmp_path / "demo.parquet"
    r = convert(cfg, DEMO, parquet)
    assert r["rows"] == 45000 and r["ratio"] > 2  # measured 2.8x (zstd, float64 columns)
    assert pq.ParquetFile(parquet).metadata.num_row_groups == 1
    recs, res = _recs(cfg, parquet, monkeypatch)
    assert recs == ref and res.rows == ref_res.rows
    # Arrow IPC (file format), several record batches
    tbl = pq.read_table(parquet)
    ipc = tmp_path / "demo.arrow"
    with pa.ipc.new_file(str(ipc), tbl.schema) as w:
        for b in tbl.to_batches(max_chunksize=7000):
            w.write_batch(b)
    recs, _ = _recs(cfg, ipc, monkeypatch)
    assert recs == ref


def test_parquet_nulls_and_nan_are_bad_lines(tmp_path, monkeypatch):
    import pyarrow as pa
    import pyarrow.parquet as pq

    cfg = load_config(CFG)
    text = DEMO.read_text().splitlines()
    names = text[0].split(",")
    data = np.array([[float(x) for x in line.split(",")] for line in text[1:]])
    cols = {n: pa.array(data[:, i]) for i, n in enumerate(names)}
    a = data[:, 1].copy()
    a[100] = np.nan
    mask = np.zeros(len(a), bool)
    mask[200] = True
    cols[names[1]] = pa.array(a, mask=mask)
    path = tmp_path / "holes.parquet"
    pq.write_table(pa.table(cols), path, row_group_size=10_000)
    _, res = _recs(cfg, path, monkeypatch)
    assert res.bad_lines == 2 and res.rows == 45000 - 2


def test_binary_empty_and_header_only_recordings(tmp_path):
    cfg = load_config(CFG)
    binary = tmp_path / "x.csv"
    binary.write_bytes(bytes(np.random.default_rng(1).integers(0, 256, 5000, dtype=np.uint8)))
    with pytest.raises(InputError, match="not a text recording"):
        run_replay(cfg, binary)
    empty, header = tmp_path / "e.csv", tmp_path / "h.csv"
    empty.write_bytes(b"")
    header.write_text(DEMO.read_text().splitlines()[0] + "\n")
    msgs = []
    for p in (empty, header):
        with pytest.raises(InputError) as e:
            run_replay(cfg, p)
        msgs.append(str(e.value).replace(str(p), "P"))
    assert msgs[0] == msgs[1] and "holds no data lines" in msgs[0]


def test_no_header_and_no_columns_is_one_sentence(tmp_path):
    cfg = load_config(CFG)
    p = tmp_path / "nohead.csv"
    p.write_text("".join(DEMO.read_text().splitlines(keepends=True)[1:200]))
    with pytest.raises(InputError, match="no header line naming its columns; set source.columns"):
        run_replay(cfg, p)


def _cli(*args, cwd=ROOT):
    return subprocess.run([sys.executable, "-m", "streamcond", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=60)


def test_record_refuses_existing_output_and_missing_port(tmp_path):
    cfg = tmp_path / "s.toml"
    cfg.write_text('[source]\nkind = "serial"\nport = "/dev/nonexistent-streamcond"\n'
                   'time_column = "t"\n[[channel]]\nname = "a"\nband = { low = 0, high = 1 }\n')
    r = _cli("record", "-c", str(cfg), "-o", str(tmp_path / "cap.txt"), "--duration", "1")
    assert r.returncode == 2 and "does not exist" in r.stderr and "Traceback" not in r.stderr
    existing = tmp_path / "old.txt"
    existing.write_text("# streamcond capture v1\n1.0\t0,1\n")
    cfg.write_text(cfg.read_text().replace("/dev/nonexistent-streamcond", "loop://"))
    r = _cli("record", "-c", str(cfg), "-o", str(existing), "--duration", "0.5")
    assert r.returncode == 2 and "--force" in r.stderr
    assert existing.read_text().count("\n") == 2  # untouched
    r = _cli("convert", str(DEMO), "-c", str(CFG), "-o", str(DEMO))
    assert r.returncode == 2 and "recording itself" in r.stderr


def test_record_loop_port_appends_and_says_when_nothing_came(tmp_path):
    cfg = tmp_path / "s.toml"
    cfg.write_text('[source]\nkind = "serial"\nport = "loop://"\n'
                   'time_column = "t"\n[[channel]]\nname = "a"\nband = { low = 0, high = 1 }\n')
    existing = tmp_path / "old.txt"
    existing.write_text("# streamcond capture v1\n1.0\t0,1\n")
    r = _cli("record", "-c", str(cfg), "-o", str(existing), "--duration", "0.5", "--append")
    assert r.returncode == 1 and "Nothing was received" in r.stderr
    assert existing.read_text() == "# streamcond capture v1\n1.0\t0,1\n"  # appended nothing
    r = _cli("record", "-c", str(cfg), "-o", str(tmp_path / "c.parquet"), "--duration", "0.5",
             "--append")
    assert r.returncode == 2 and "text captures only" in r.stderr


def test_tune_reads_parquet_as_it_reads_the_text(tmp_path):
    from streamcond.convert import convert
    from streamcond.tune import pick_channel, read_channel

    cfg = load_config(CFG)
    pq = tmp_path / "demo.parquet"
    convert(cfg, DEMO, pq)
    for ch in cfg.channel:
        a = read_channel(cfg, DEMO, pick_channel(cfg, ch.name))
        b = read_channel(cfg, pq, pick_channel(cfg, ch.name))
        for k, v in vars(a).items():
            if isinstance(v, np.ndarray):
                np.testing.assert_array_equal(v, getattr(b, k), err_msg=k)
            else:
                assert v == getattr(b, k), k


def test_record_to_parquet_replays_like_a_text_capture(tmp_path):
    import threading

    from daemon_rig import Pty

    pty = Pty(tmp_path / "ttyREC")
    cfg = tmp_path / "s.toml"
    cfg.write_text(f'[source]\nkind = "serial"\nport = "{pty.path}"\ncolumns = ["t", "a"]\n'
                   'time_column = "t"\ntime_scale = 0.001\n'
                   '[[channel]]\nname = "a"\nband = { low = -0.5, high = 0.5 }\n'
                   '[output]\nevents = ""\n')
    lines = b"".join(b"%d,%.3f\n" % (k, np.sin(k / 50.0)) for k in range(3000))
    outs = {}
    try:
        for name in ("cap.txt", "cap.parquet"):
            proc = subprocess.Popen(
                [sys.executable, "-m", "streamcond", "-v", "record", "-c", str(cfg), "-o",
                 str(tmp_path / name), "--duration", "6"], cwd=ROOT,
                stderr=subprocess.PIPE, text=True)
            # write only once the port is open (its INFO line; a fixed sleep was too short on a
            # loaded machine); record resyncs to the first newline
            head = []
            while not head or "opened" not in head[-1]:
                line = proc.stderr.readline()
                assert line, "".join(head)
                head.append(line)
            w = threading.Thread(target=pty.write, args=(b"\n" + lines,))
            w.start()
            w.join()
            _, err = proc.communicate(timeout=30)
            assert proc.returncode == 0, "".join(head) + err
            outs[name] = "".join(head) + err
    finally:
        pty.unplug()
    fcfg = load_config(cfg)
    a = run_replay(fcfg, tmp_path / "cap.txt", keep_records=True)
    b = run_replay(fcfg, tmp_path / "cap.parquet", keep_records=True)
    assert a.rows == b.rows == 3000
    # two captures of the same lines at different moments: all but the wall-clock stamp agree
    def strip(recs):
        return [{k: v for k, v in r.items() if k != "utc"} for r in recs if r["kind"] != "summary"]

    assert strip(a.records) == strip(b.records) and len(strip(a.records)) >= 10
    assert all("utc" in r for r in b.records if r["kind"] == "edge")


def test_compare_reads_parquet_as_it_reads_the_text(tmp_path):
    import json

    from streamcond.convert import convert

    pq = tmp_path / "demo.parquet"
    convert(load_config(CFG), DEMO, pq)
    r = _cli("compare", str(CFG), str(CFG), str(DEMO), str(pq), "--json", "--jobs", "1")
    assert r.returncode == 0, r.stderr
    recs = json.loads(r.stdout)["recordings"]
    assert len(recs) == 2 and recs[0]["channels"] == recs[1]["channels"]
    assert recs[0]["channels"]["flow"]["edges_a"] == 3533  # the demo summary: flow 3,533 edges


def test_small_blocks_never_import_pyarrow():
    # the live daemon parses a few lines every few ms: pyarrow would cost it ~60-90 MiB of
    # resident memory for no gain (the auto reader takes it for blocks of 256 KiB and more)
    code = ("import sys; from streamcond.io.lineparse import LineParser; "
            "p = LineParser('csv', columns=['t', 'a']); p.feed(b'0,1\\n1,2\\n' * 1000); "
            "print('pyarrow' in sys.modules); p.feed(b'0,1\\n' * 100000); "
            "print('pyarrow' in sys.modules)")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                       env={**__import__("os").environ, "STREAMCOND_CSV_READER": ""})
    assert r.stdout.split() == ["False", "True"], r.stderr
