"""Comparing a replay's edges with a golden events file (the regression-test workflow).

Edges are matched per channel, in time order: two edges match when they have the same level
and their times differ by at most the tolerance. What is left over is reported as *missing*
(in the golden file, not produced) or *unexpected* (produced, not in the golden file); a
missing and an unexpected edge of the same level close together are shown as one *moved* edge.
"""

from __future__ import annotations

import bisect
import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

from .errors import InputError

#: How many difference lines a report shows before it summarises the rest.
MAX_LINES = 20


@dataclass(frozen=True)
class Edge:
    channel: str
    t: float
    level: int


def load_records(path: str | Path) -> list[dict[str, Any]]:
    """Every record of a JSON-lines events file; an empty file is an input error (comparing
    with nothing would report every produced edge as unexpected)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"The golden file {str(p)!r} does not exist") from None
    except (OSError, UnicodeDecodeError) as e:
        raise InputError(f"The golden file {str(p)!r} cannot be read: {e}") from None
    out: list[dict[str, Any]] = []
    for no, line in enumerate(text.splitlines(), 1):
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except json.JSONDecodeError:
            raise InputError(f"{str(p)!r} line {no} is not JSON") from None
        if not isinstance(rec, dict):
            raise InputError(f"{str(p)!r} line {no} is not a record (a JSON object)")
        if rec.get("kind") == "edge":
            try:
                str(rec["channel"]), float(rec["t"]), int(rec["level"])
            except (KeyError, TypeError, ValueError):
                raise InputError(f"{str(p)!r} line {no} is an edge without channel, t or level") from None
        out.append(rec)
    if not out:
        raise InputError(
            f"The golden file {str(p)!r} is empty; make one with --update-golden"
        )
    return out


def load_edges(path: str | Path) -> list[Edge]:
    """Edge records of a JSON-lines events file (other record kinds are ignored)."""
    return edges_of(load_records(path))


def edges_of(records: Iterable[dict[str, Any]]) -> list[Edge]:
    return [
        Edge(r["channel"], float(r["t"]), int(r["level"])) for r in records if r.get("kind") == "edge"
    ]


@dataclass
class ChannelDiff:
    """How one channel's produced edges differ from the expected ones."""

    channel: str
    expected: int
    produced: int
    moved: list[tuple[Edge, Edge]] = field(default_factory=list)  # (expected, produced)
    missing: list[Edge] = field(default_factory=list)
    unexpected: list[Edge] = field(default_factory=list)

    @property
    def changed(self) -> int:
        return len(self.moved) + len(self.missing) + len(self.unexpected)


def diff_edges(expected: list[Edge], got: list[Edge], tolerance: float) -> list[ChannelDiff]:
    """Per channel (every channel of either side, in order of appearance): the edges that
    match within ``tolerance``, and what is left over as moved, missing and unexpected.

    The work is linear in the number of edges (plus sorting), so that comparing long
    recordings whose every edge moved stays cheap.
    """
    out: list[ChannelDiff] = []
    channels = list(dict.fromkeys([e.channel for e in expected] + [e.channel for e in got]))
    for ch in channels:
        a = sorted((e for e in expected if e.channel == ch), key=lambda e: e.t)
        b = sorted((e for e in got if e.channel == ch), key=lambda e: e.t)
        d = ChannelDiff(ch, len(a), len(b))
        missing: list[Edge] = []
        extra: list[Edge] = []
        i = j = 0
        while i < len(a) and j < len(b):
            if a[i].level == b[j].level and abs(a[i].t - b[j].t) <= tolerance:
                i += 1
                j += 1
            elif a[i].t <= b[j].t:
                missing.append(a[i])
                i += 1
            else:
                extra.append(b[j])
                j += 1
        missing += a[i:]
        extra += b[j:]
        window = max(1.0, 1000 * tolerance)
        pairs = _pair_moved(missing, extra, window)
        d.moved = [(missing[i], extra[k]) for i, k in pairs.items()]
        d.missing = [m for i, m in enumerate(missing) if i not in pairs]
        used = set(pairs.values())
        d.unexpected = [x for k, x in enumerate(extra) if k not in used]
        out.append(d)
    return out


def _pair_moved(missing: list[Edge], extra: list[Edge], window: float) -> dict[int, int]:
    """Pair each missing edge, in time order, with the nearest still unpaired unexpected edge of
    the same level (the earlier one on a tie) when it lies within ``window``: a moved edge.

    ``extra`` is in time order. Paired edges are skipped with a "next free" pointer per
    direction (path-halving union-find), so each lookup is near constant time.
    """
    pairs: dict[int, int] = {}  # index in missing -> index in extra
    for level in (0, 1):
        idx = [k for k, x in enumerate(extra) if x.level == level]
        if not idx:
            continue
        ts = [extra[k].t for k in idx]
        n = len(idx)
        right = list(range(n + 1))  # right[p]: first free position >= p (n = none)
        left = list(range(n + 1))  # left[p + 1] - 1: last free position <= p (-1 = none)

        def find(parent: list[int], p: int) -> int:
            while parent[p] != p:
                parent[p] = parent[parent[p]]
                p = parent[p]
            return p

        for i, m in enumerate(missing):
            if m.level != level:
                continue
            p = bisect.bisect_left(ts, m.t)
            r = find(right, p) if p < n else n
            lf = find(left, p) - 1  # positions < p: left is indexed by position + 1
            best = None
            if lf >= 0:
                best = lf
            if r < n and (best is None or abs(ts[r] - m.t) < abs(ts[best] - m.t)):
                best = r
            if best is None or abs(ts[best] - m.t) > window:
                continue
            pairs[i] = idx[best]
            right[best] = best + 1
            left[best + 1] = best
    return pairs


def compare(expected: list[Edge], got: list[Edge], tolerance: float) -> list[str]:
    """Readable difference lines; empty when the edges agree."""
    lines: list[str] = []
    for d in diff_edges(expected, got, tolerance):
        if not d.changed:
            continue
        diffs: list[tuple[float, str]] = []
        for m, x in d.moved:
            diffs.append(
                (m.t, f"  ~ {_word(m.level)} at t={m.t:.6f} moved to t={x.t:.6f} "
                      f"({x.t - m.t:+.6f} s)")
            )
        for m in d.missing:
            diffs.append((m.t, f"  - {_word(m.level)} at t={m.t:.6f} missing"))
        for x in d.unexpected:
            diffs.append((x.t, f"  + {_word(x.level)} at t={x.t:.6f} unexpected"))
        lines.append(
            f"channel {d.channel}: {d.expected} edges expected, {d.produced} produced; "
            f"{len(d.moved)} moved, {len(d.missing)} missing, {len(d.unexpected)} unexpected "
            f"(tolerance {tolerance:g} s)"
        )
        diffs.sort(key=lambda d: d[0])
        for _, text in diffs[:MAX_LINES]:
            lines.append(text)
        if len(diffs) > MAX_LINES:
            lines.append(f"  ... and {len(diffs) - MAX_LINES} more")
    return lines


def _word(level: int) -> str:
    return "rising " if level else "falling"


# -- the other records (``--compare-all``) -------------------------------------------------------


def _faults_and_gaps(recs: Iterable[dict[str, Any]]) -> list[tuple[str, str, float, float | None]]:
    out = []
    for r in recs:
        k = r.get("kind")
        if k == "fault":
            label = f"fault {r.get('channel') or '(source)'} {r.get('state') or r.get('reason', '')}"
            out.append((label.strip(), "fault", _f(r.get("t")), None))
        elif k == "gap":
            out.append((f"gap {r.get('reason', '')}", "gap", _f(r.get("t")), _f(r.get("t_end"))))
    return out


def _f(x: Any) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        return float("nan")


def _close(a: float, b: float, tol: float) -> bool:
    return (a != a and b != b) or abs(a - b) <= tol


def _totals(recs: Iterable[dict[str, Any]]) -> dict[str, Any] | None:
    for r in recs:
        if r.get("kind") == "summary":
            return r.get("totals") or {ch: {"edges": n} for ch, n in (r.get("edges") or {}).items()}
    return None


def compare_other(
    expected: list[dict[str, Any]], got: list[dict[str, Any]], tolerance: float
) -> list[str]:
    """Faults and gaps (label, time and end within ``tolerance``, in order) and the summary's
    final totals per channel (exactly; ``total_units`` to 1e-9 relative)."""
    lines: list[str] = []
    a, b = _faults_and_gaps(expected), _faults_and_gaps(got)
    for i in range(max(len(a), len(b))):
        x = a[i] if i < len(a) else None
        y = b[i] if i < len(b) else None
        if x is None:
            lines.append(f"  + {y[0]} at t={y[2]:.6f} unexpected")  # type: ignore[index]
        elif y is None:
            lines.append(f"  - {x[0]} at t={x[2]:.6f} missing")
        elif x[0] != y[0] or not _close(x[2], y[2], tolerance) or not _close(
            _f(x[3]), _f(y[3]), tolerance
        ):
            lines.append(f"  ~ {x[0]} at t={x[2]:.6f} is now {y[0]} at t={y[2]:.6f}")
    if lines:
        lines.insert(0, f"faults and gaps: {len(a)} expected, {len(b)} produced")
    ta, tb = _totals(expected), _totals(got)
    if ta is not None and tb is not None:
        for ch in dict.fromkeys(list(ta) + list(tb)):
            x, y = ta.get(ch), tb.get(ch)
            if x == y:
                continue
            if isinstance(x, dict) and isinstance(y, dict) and set(x) == set(y) and all(
                x[k] == y[k] or (isinstance(x[k], float) and isinstance(y[k], (int, float))
                                 and math.isclose(x[k], y[k], rel_tol=1e-9))
                for k in x
            ):
                continue
            lines.append(f"totals of channel {ch}: expected {x}, produced {y}")
    elif ta is not None:
        lines.append("totals: the golden file has a summary, the replay none")
    return lines


def write_golden(path: str | Path, recs: Iterable[dict[str, Any]]) -> None:
    """Write a golden file (``--update-golden``): to a temporary file beside it, then renamed
    over it, so an interrupted update leaves the old file whole."""
    from .records import to_json

    p = Path(path)
    tmp = p.with_name(p.name + ".tmp")
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            for r in recs:
                fh.write(to_json(r) + "\n")
        os.replace(tmp, p)
    except OSError as e:
        raise InputError(f"The golden file {str(p)!r} cannot be written: {e.strerror}") from None
