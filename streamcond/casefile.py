"""Regression case files (``*.case.toml``, DESIGN.md "Files (contract)").

A case names a recording, a config, a golden events file and a time tolerance, with paths
relative to the case file, and optionally summary figures the replay must reproduce::

    recording = "orchard_pump.csv"
    config = "../config/orchard_pump.toml"
    golden = "orchard_pump.golden.jsonl"
    tolerance = 1e-6                     # seconds (default 1e-6, as `replay --expect`)

    [summary]                            # optional: figures of the replay's summary record
    edges = { tank_high = 10, pump = 10 }
    bad_lines = 0

The pytest plugin (:mod:`streamcond.pytest_plugin`) turns each case file into a test.
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import InputError

CASE_SUFFIX = ".case.toml"

#: The tolerance when a case names none: the default of ``replay --tolerance``.
DEFAULT_TOLERANCE = 1e-6

#: Summary figures a case may pin (keys of the replay's summary record).
SUMMARY_KEYS = ("edges", "bad_lines", "rows", "gaps")


@dataclass(frozen=True)
class Case:
    path: Path
    recording: Path
    config: Path
    golden: Path
    tolerance: float = DEFAULT_TOLERANCE
    summary: dict[str, Any] = field(default_factory=dict)

    @property
    def name(self) -> str:
        return self.path.name.removesuffix(CASE_SUFFIX)


def _count(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and v >= 0


def load_case(path: str | Path) -> Case:
    """Read and check a case file; every problem becomes one sentence naming the key."""
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"The case file {str(p)!r} does not exist") from None
    except (OSError, UnicodeDecodeError) as e:
        raise InputError(f"The case file {str(p)!r} cannot be read: {e}") from None
    except tomllib.TOMLDecodeError as e:
        raise InputError(f"The case file {str(p)!r} is not valid TOML: {e}") from None

    problems: list[str] = []
    known = {"recording", "config", "golden", "tolerance", "summary"}
    for key in data:
        if key not in known:
            problems.append(f"{key} is not a known key of a case file (known: {', '.join(sorted(known))})")
    paths: dict[str, Path] = {}
    for key in ("recording", "config", "golden"):
        v = data.get(key)
        if v is None:
            problems.append(f"{key} is required (a path relative to the case file)")
        elif not isinstance(v, str) or not v:
            problems.append(f"{key} must be a path (a string)")
        else:
            paths[key] = Path(os.path.normpath(p.parent / v))
    tol = data.get("tolerance", DEFAULT_TOLERANCE)
    if isinstance(tol, bool) or not isinstance(tol, (int, float)) or not math.isfinite(tol) or tol < 0:
        problems.append("tolerance must be 0 or a positive number of seconds")
    summary = data.get("summary", {})
    if not isinstance(summary, dict):
        problems.append("summary must be a table")
        summary = {}
    for key, v in summary.items():
        if key not in SUMMARY_KEYS:
            problems.append(f"summary.{key} is not a summary figure a case can pin "
                            f"(known: {', '.join(SUMMARY_KEYS)})")
        elif key == "edges":
            if not isinstance(v, dict) or not all(_count(n) for n in v.values()):
                problems.append("summary.edges must be a table of channel = edge count")
        elif not _count(v):
            problems.append(f"summary.{key} must be a whole number, 0 or more")
    if problems:
        raise InputError([f"{p}: {m}" for m in problems])
    for key, q in paths.items():
        if key != "golden" and not q.is_file():  # a missing golden is written by an update run
            problems.append(f"{p}: {key} {str(q)!r} does not exist")
    if problems:
        raise InputError(problems)
    return Case(p, paths["recording"], paths["config"], paths["golden"], float(tol), dict(summary))


def check_summary(case: Case, summary: dict[str, Any]) -> list[str]:
    """Readable lines for every pinned summary figure the replay did not reproduce."""
    lines: list[str] = []
    for key, want in case.summary.items():
        got = summary.get(key)
        if key == "edges":
            got = got or {}
            for ch, n in want.items():
                if ch not in got:
                    lines.append(f"summary: channel {ch} has no edge count (the config has no such channel)")
                elif got[ch] != n:
                    lines.append(f"summary: channel {ch}: {n} edges expected, {got[ch]} produced")
        elif got != want:
            lines.append(f"summary: {key} {want} expected, {got} produced")
    return lines
