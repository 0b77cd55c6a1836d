"""Throughput of the durable spool on this machine (not run by pytest; prints figures).

    /work/venv/bin/python tests/bench/bench_spool.py [--dir DIR]

Every ``put_many`` is one transaction with an fsync (``synchronous=FULL``), so its rate is
bounded by how fast the disk under ``--dir`` makes a write durable, not by Python. Run it on
the disk the daemon's ``spool_path`` will live on; a tmpfs gives meaningless, flattering numbers.
"""

from __future__ import annotations

import argparse
import logging
import os
import platform
import sqlite3
import sys
import tempfile
import time
from pathlib import Path

from streamcond import records
from streamcond.io.spool import Spool

TOPIC = "streamcond/orchard-pump-2/level/edge"


def _items(n: int, start: int) -> list[tuple[str, bytes, int, bool, str]]:
    """``n`` edge records shaped like the daemon's (about 110 bytes of JSON each)."""
    return [
        (
            TOPIC,
            records.to_json(
                records.edge("level", 1000.0 + 0.125 * (start + i), (start + i) % 2,
                             11.0 + 0.001 * i, start + i + 1)
            ).encode(),
            1,
            False,
            "edge",
        )
        for i in range(n)
    ]


def bench_put(d: Path, batch: int, calls: int, max_records: int = 1_000_000) -> tuple[float, float]:
    """(records/s, calls/s) of ``put_many`` with ``batch`` records and a state update per call."""
    path = d / f"put_{batch}_{max_records}.sqlite"
    with Spool(path, max_records=max_records) as sp:
        if max_records < 1_000_000:  # fill first: measure the overflow path
            for k in range(0, max_records, 1000):
                sp.put_many(_items(min(1000, max_records - k), k))
        blocks = [_items(batch, k * batch) for k in range(calls)]
        t0 = time.perf_counter()
        for k, block in enumerate(blocks):
            sp.put_many(block, state={"level": {"seq": (k + 1) * batch, "level": k % 2}})
        dt = time.perf_counter() - t0
    os.remove(path)
    return batch * calls / dt, calls / dt


def bench_drain(d: Path, total: int, page: int) -> float:
    """Records/s of a publisher loop: ``peek(page)`` then ``ack`` of that page."""
    path = d / f"drain_{page}.sqlite"
    with Spool(path) as sp:
        for k in range(0, total, 1000):
            sp.put_many(_items(min(1000, total - k), k))
        t0 = time.perf_counter()
        n = 0
        while items := sp.peek(page):
            sp.ack(i.id for i in items)
            n += len(items)
        dt = time.perf_counter() - t0
        assert n == total and len(sp) == 0
    os.remove(path)
    return n / dt


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dir", type=Path, default=None, help="where the spool files go")
    args = ap.parse_args()
    # The overflow case drops records on purpose; its warnings are not figures.
    logging.getLogger("streamcond.io.spool").setLevel(logging.ERROR)
    with tempfile.TemporaryDirectory(dir=args.dir, prefix="bench_spool_") as tmp:
        d = Path(tmp)
        print(f"machine: {platform.platform()}, {os.cpu_count()} cpu(s), Python "
              f"{platform.python_version()}, SQLite {sqlite3.sqlite_version}")
        print(f"spool files in: {d}")
        for batch, calls in ((1, 300), (10, 300), (1000, 40)):
            rps, cps = bench_put(d, batch, calls)
            print(f"put_many batch {batch:>5}: {rps:>10,.0f} records/s  ({cps:,.0f} calls/s)")
        rps, cps = bench_put(d, 10, 200, max_records=20_000)
        print(f"put_many batch    10, spool full (dropping): {rps:,.0f} records/s "
              f"({cps:,.0f} calls/s)")
        for total, page in ((20_000, 100), (2_000, 1)):
            print(f"peek({page})+ack drain of {total:,}: {bench_drain(d, total, page):>10,.0f} records/s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
