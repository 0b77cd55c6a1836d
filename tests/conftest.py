"""Shared helpers for the conditioning-core tests.

Plain functions (not fixtures), so hypothesis-driven tests can call them freely; test modules
import them with ``from conftest import ...`` (pytest puts this directory on ``sys.path``).
"""

from __future__ import annotations

from typing import Any, Iterable, Sequence

import numpy as np

from streamcond import records
from streamcond.config import config_from_dict
from streamcond.core.pipeline import Pipeline


def config_dict(
    channels: Sequence[dict[str, Any]],
    *,
    columns: Sequence[str],
    time_column: str | None = "t",
    sample_rate_hz: float | None = None,
    time_scale: float = 1.0,
) -> dict[str, Any]:
    """A file-source config dict (the TOML layout of DESIGN.md) for the given channels."""
    source: dict[str, Any] = {"kind": "file", "format": "csv", "columns": list(columns)}
    if time_column is not None:
        source["time_column"] = time_column
        source["time_scale"] = time_scale
    if sample_rate_hz is not None:
        source["sample_rate_hz"] = sample_rate_hz
    return {
        "station": {"name": "orchard-pump-2"},
        "source": source,
        "channel": [dict(c) for c in channels],
    }


def block_bounds(n: int, sizes: Iterable[int] | None) -> list[tuple[int, int]]:
    """Split ``range(n)`` into consecutive blocks of the given sizes.

    ``None`` means one block; sizes that run past ``n`` are clipped, and whatever the sizes do
    not cover becomes one last block, so every row is fed exactly once.
    """
    if sizes is None:
        return [(0, n)]
    out: list[tuple[int, int]] = []
    a = 0
    for s in sizes:
        if a >= n:
            break
        b = min(n, a + int(s))
        out.append((a, b))
        a = b
    if a < n:
        out.append((a, n))
    return out


def run_pipeline(
    cfg: dict[str, Any],
    rows: np.ndarray,
    sizes: Iterable[int] | None = None,
    *,
    finish: bool = True,
) -> list[dict[str, Any]]:
    """Feed ``rows`` to a fresh :class:`Pipeline` in blocks of ``sizes``; all records, in order."""
    config = config_from_dict(cfg)
    pipe = Pipeline(config, list(cfg["source"]["columns"]))
    out: list[dict[str, Any]] = []
    for a, b in block_bounds(rows.shape[0], sizes):
        out.extend(pipe.process(rows[a:b]))
    if finish:
        out.extend(pipe.finish())
    return out


def emitted_at(
    cfg: dict[str, Any], rows: np.ndarray
) -> list[tuple[int, dict[str, Any]]]:
    """Feed one row at a time; each record paired with the row index whose call returned it."""
    config = config_from_dict(cfg)
    pipe = Pipeline(config, list(cfg["source"]["columns"]))
    out: list[tuple[int, dict[str, Any]]] = []
    for i in range(rows.shape[0]):
        out.extend((i, r) for r in pipe.process(rows[i : i + 1]))
    return out


def as_json(recs: Iterable[dict[str, Any]]) -> list[str]:
    """The records as JSON lines (shortest round-trip float repr: equal text ⇔ equal bits)."""
    return [records.to_json(r) for r in recs]


def of_kind(recs: Iterable[dict[str, Any]], kind: str, channel: str | None = None) -> list[dict]:
    return [
        r
        for r in recs
        if r["kind"] == kind and (channel is None or r.get("channel") == channel)
    ]
