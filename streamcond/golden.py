"""Comparing a replay's edges with a golden events file (the regression-test workflow).

Edges are matched per channel, in time order: two edges match when they have the same level
and their times differ by at most the tolerance. What is left over is reported as *missing*
(in the golden file, not produced) or *unexpected* (produced, not in the golden file); a
missing and an unexpected edge of the same level close together are shown as one *moved* edge.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
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


def load_edges(path: str | Path) -> list[Edge]:
    """Edge records of a JSON-lines events file (other record kinds are ignored)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"The golden file {str(p)!r} does not exist") from None
    except (OSError, UnicodeDecodeError) as e:
        raise InputError(f"The golden file {str(p)!r} cannot be read: {e}") from None
    out: list[Edge] = []
    for no, line in enumerate(text.splitlines(), 1):
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except json.JSONDecodeError:
            raise InputError(f"{str(p)!r} line {no} is not JSON") from None
        if isinstance(rec, dict) and rec.get("kind") == "edge":
            try:
                out.append(Edge(str(rec["channel"]), float(rec["t"]), int(rec["level"])))
            except (KeyError, TypeError, ValueError):
                raise InputError(f"{str(p)!r} line {no} is an edge without channel, t or level") from None
    return out


def edges_of(records: Iterable[dict[str, Any]]) -> list[Edge]:
    return [
        Edge(r["channel"], float(r["t"]), int(r["level"])) for r in records if r.get("kind") == "edge"
    ]


def compare(expected: list[Edge], got: list[Edge], tolerance: float) -> list[str]:
    """Readable difference lines; empty when the edges agree."""
    lines: list[str] = []
    channels = list(dict.fromkeys([e.channel for e in expected] + [e.channel for e in got]))
    for ch in channels:
        a = sorted((e for e in expected if e.channel == ch), key=lambda e: e.t)
        b = sorted((e for e in got if e.channel == ch), key=lambda e: e.t)
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
        if not missing and not extra:
            continue
        diffs: list[tuple[float, str]] = []
        used: set[int] = set()
        for m in missing:
            # pair with the nearest unexpected edge of the same level: a moved edge
            best = None
            for k, x in enumerate(extra):
                if k in used or x.level != m.level:
                    continue
                if best is None or abs(x.t - m.t) < abs(extra[best].t - m.t):
                    best = k
            if best is not None and abs(extra[best].t - m.t) <= max(1.0, 1000 * tolerance):
                used.add(best)
                x = extra[best]
                diffs.append(
                    (m.t, f"  ~ {_word(m.level)} at t={m.t:.6f} moved to t={x.t:.6f} "
                          f"({x.t - m.t:+.6f} s)")
                )
            else:
                diffs.append((m.t, f"  - {_word(m.level)} at t={m.t:.6f} missing"))
        for k, x in enumerate(extra):
            if k not in used:
                diffs.append((x.t, f"  + {_word(x.level)} at t={x.t:.6f} unexpected"))
        moved = len(used)
        lines.append(
            f"channel {ch}: {len(a)} edges expected, {len(b)} produced; {moved} moved, "
            f"{len(missing) - moved} missing, {len(extra) - moved} unexpected "
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
