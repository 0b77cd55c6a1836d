"""``streamcond compare``: which events would change on many recordings if config B replaced
config A (a fleet-wide what-if), and ``streamcond replay`` over many recordings.

Both run one task per recording through :mod:`streamcond.batch` (a local process pool or a
Dask cluster). The report lists, per recording and channel, the edges with A and with B, the
edges that moved beyond the tolerance, went missing or were added (A is the reference, as
the golden file is for ``replay --expect``), and the chatter with each config: the raw crossings
of the band centre a bare comparator would have reported, and their ratio to the edges.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence, TextIO

from .errors import InputError

if TYPE_CHECKING:  # the machinery (pydantic, numpy) is imported when a command runs
    from .batch import Comparison, Outcome

EXIT_OK, EXIT_DIFFERENT, EXIT_USAGE = 0, 1, 2

#: Columns of the table, the CSV and the per-channel JSON objects.
FIELDS = (
    "edges_a", "edges_b", "moved", "missing", "added", "max_moved_s",
    "raw_crossings_a", "raw_crossings_b", "suppression_a", "suppression_b",
)


@dataclass(frozen=True)
class Threshold:
    """How many changed edges (moved + missing + added) a channel may have before the
    comparison counts as changed: a count, or a percentage of the channel's edges with A."""

    value: float
    percent: bool = False

    @classmethod
    def parse(cls, s: str) -> "Threshold":
        text = s.strip()
        pct = text.endswith("%")
        try:
            v = float(text.rstrip("%"))
        except ValueError:
            raise argparse.ArgumentTypeError(f"{s!r} is neither a count nor a percentage like 2%") from None
        if not (v >= 0 and v != float("inf")):
            raise argparse.ArgumentTypeError("must be 0 or more")
        return cls(v, pct)

    def exceeded(self, ch: dict[str, Any]) -> bool:
        changed = ch["moved"] + ch["missing"] + ch["added"]
        limit = self.value * ch["edges_a"] / 100.0 if self.percent else self.value
        return changed > limit

    def __str__(self) -> str:
        if self.value == 0:
            return "any change"
        return f"more than {self.value:g}{'%' if self.percent else ''} changed edges"


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The ``compare`` subcommand's arguments (cli.py builds the parser)."""
    from .cli import _nonneg_float, _positive_int

    p.add_argument("config_a", metavar="CONFIG_A", help="the reference config (today's)")
    p.add_argument("config_b", metavar="CONFIG_B", help="the config to try")
    p.add_argument(
        "recordings", nargs="+", metavar="RECORDING",
        help="recordings: paths, globs ('month/*.csv', quoted; '**' reaches into folders) "
        "or @LIST (a file naming one path or glob a line)",
    )
    add_executor_arguments(p, _positive_int)
    p.add_argument(
        "--tolerance", type=_nonneg_float, default=1e-6, metavar="SECONDS",
        help="an edge within this time of its counterpart has not moved (default: 1e-6)",
    )
    p.add_argument(
        "--threshold", type=Threshold.parse, default=Threshold(0), metavar="N|P%",
        help="exit 1 when a channel of a recording has more than N changed edges (moved, "
        "missing or added), or more than P%% of its edges with CONFIG_A (default: 0, any change)",
    )
    p.add_argument("--json", action="store_true", help="machine-readable output on stdout")
    p.add_argument("--csv", metavar="PATH", help="also write the table as CSV (- for stdout)")
    p.add_argument("--force", action="store_true", help="replace an existing --csv file")
    p.add_argument("--no-progress", action="store_true", help="no progress line, even on a terminal")


def add_executor_arguments(p: argparse.ArgumentParser, positive_int: Any) -> None:
    p.add_argument(
        "--jobs", type=positive_int, metavar="N",
        help="replay N recordings at a time in local processes (default: one per CPU)",
    )
    p.add_argument(
        "--scheduler", metavar="ADDRESS",
        help="run the replays on a Dask cluster instead, e.g. tcp://10.0.0.5:8786 (needs "
        "streamcond[cluster]; every worker must see the recordings at the same paths)",
    )


def _check_executor_args(args: argparse.Namespace) -> None:
    if getattr(args, "scheduler", None) and getattr(args, "jobs", None):
        raise InputError(
            "--jobs sets the local pool and --scheduler a cluster: give one of them "
            "(the cluster's workers decide its parallelism)"
        )


def _progress(recordings: Sequence[str], disabled: bool) -> Any:
    """The progress line, advanced by each finished recording's size."""
    from .progress import Progress

    total = sum(os.path.getsize(r) for r in recordings)
    return Progress(total, enabled=False if disabled else None)


def _open_csv(target: str, inputs: Sequence[str], force: bool) -> TextIO:
    """The --csv file, refusing to write over an input or, without --force, any existing file."""
    if target == "-":
        return sys.stdout
    p = Path(target)
    if p.exists():
        if any(os.path.exists(i) and os.path.samefile(p, i) for i in inputs):
            raise InputError(f"--csv {target!r} is one of the inputs; name another file")
        if not force:
            raise InputError(f"--csv {target!r} exists; add --force to replace it")
    if not p.parent.is_dir():
        raise InputError(f"--csv {target!r}: the folder {str(p.parent)!r} does not exist")
    try:
        return open(p, "w", encoding="utf-8", newline="")
    except OSError as e:
        raise InputError(f"--csv {target!r} cannot be written: {e.strerror}") from None


# --------------------------------------------------------------------------- compare


def run(
    config_a: str,
    config_b: str,
    recordings: Sequence[str],
    *,
    tolerance: float = 1e-6,
    jobs: int | None = None,
    scheduler: str | None = None,
    progress: Any = None,
) -> list[Outcome]:
    """Compare every recording (already expanded) under both configs; outcomes in order."""
    from .batch import compare_recording, open_executor, run_tasks
    from .config import load_config

    cfg_a, cfg_b = load_config(config_a), load_config(config_b)
    with open_executor(jobs, scheduler) as ex:
        return run_tasks(ex, compare_recording, recordings, cfg_a, cfg_b, tolerance,
                         progress=progress)


def to_json(outcomes: Sequence[Outcome], threshold: Threshold) -> dict[str, Any]:
    recs = []
    errors = []
    for o in outcomes:
        if o.errors:
            errors.extend(o.errors)
            continue
        c: Comparison = o.result
        chans = {
            name: {**{k: ch[k] for k in FIELDS}, "changed": threshold.exceeded(ch)}
            for name, ch in c.channels.items()
        }
        recs.append({"recording": o.recording, "rows": c.rows, "bad_lines": c.bad_lines,
                     "channels": chans})
    doc: dict[str, Any] = {"recordings": recs}
    if errors:
        doc["errors"] = errors
    return doc


def _fmt(v: Any, key: str = "") -> str:
    if v is None:
        return "-"
    if key == "max_moved_s":
        return f"{v:.3f}" if v else "-"
    if isinstance(v, float):
        return f"{v:.2f}"
    return f"{v:,}"


def format_table(doc: dict[str, Any]) -> str:
    head = ("recording", "channel", "edges A", "edges B", "moved", "missing", "added",
            "max move s", "raw A", "raw B", "supp A", "supp B", "status")
    rows = []
    for r in doc["recordings"]:
        for name, ch in r["channels"].items():
            rows.append((r["recording"], name, *(_fmt(ch[k], k) for k in FIELDS),
                         "changed" if ch["changed"] else ""))
    widths = [max(len(str(x)) for x in col) for col in zip(head, *rows)] if rows else [len(h) for h in head]
    out = io.StringIO()
    for k, row in enumerate([head, *rows]):
        cells = [str(c).ljust(w) if i < 2 else str(c).rjust(w) for i, (c, w) in enumerate(zip(row, widths))]
        out.write("  ".join(cells).rstrip() + "\n")
        if k == 0:
            out.write("  ".join("-" * w for w in widths).rstrip() + "\n")
    return out.getvalue()


def write_csv(doc: dict[str, Any], fh: TextIO) -> None:
    w = csv.writer(fh)
    w.writerow(["recording", "channel", *FIELDS, "changed"])
    for r in doc["recordings"]:
        for name, ch in r["channels"].items():
            w.writerow([r["recording"], name, *("" if ch[k] is None else ch[k] for k in FIELDS),
                        int(ch["changed"])])


def verdict(doc: dict[str, Any], threshold: Threshold) -> str:
    n = len(doc["recordings"])
    changed = [(r["recording"], name) for r in doc["recordings"]
               for name, ch in r["channels"].items() if ch["changed"]]
    recs = len(dict.fromkeys(r for r, _ in changed))
    if not changed:
        return f"{n} recording(s) compared: nothing changed beyond the threshold ({threshold})."
    return (f"{n} recording(s) compared: {len(changed)} channel(s) in {recs} recording(s) "
            f"changed beyond the threshold ({threshold}).")


def main(args: argparse.Namespace, out: TextIO | None = None) -> int:
    """``streamcond compare``: 0 nothing changed beyond the threshold, 1 something did, 2 bad
    input (also when some recordings could not be replayed: the others are still reported)."""
    from .batch import expand_recordings

    out = out or sys.stdout
    _check_executor_args(args)
    recordings = expand_recordings(args.recordings)
    csv_fh = _open_csv(args.csv, [args.config_a, args.config_b, *recordings], args.force) if args.csv else None
    progress = _progress(recordings, args.no_progress)
    try:
        outcomes = run(args.config_a, args.config_b, recordings, tolerance=args.tolerance,
                       jobs=args.jobs, scheduler=args.scheduler, progress=progress)
    finally:
        progress.close()
    doc = to_json(outcomes, args.threshold)
    if args.json:
        out.write(json.dumps(doc, indent=2, allow_nan=False) + "\n")
    else:
        out.write(format_table(doc))
        out.write(verdict(doc, args.threshold) + "\n")
    if csv_fh is not None:
        try:
            write_csv(doc, csv_fh)
        finally:
            if csv_fh is not sys.stdout:
                csv_fh.close()
    for e in doc.get("errors", []):
        print(e, file=sys.stderr)
    if doc.get("errors"):
        return EXIT_USAGE
    changed = any(ch["changed"] for r in doc["recordings"] for ch in r["channels"].values())
    return EXIT_DIFFERENT if changed else EXIT_OK


# --------------------------------------------------------------------------- replay of many


def replay_many(args: argparse.Namespace, out: TextIO | None = None) -> int:
    """``streamcond replay`` given several recordings: one summary line each, in the order
    given; exit 2 when any recording could not be replayed (the others are still reported)."""
    from .batch import expand_recordings, open_executor, replay_summary, run_tasks
    from .cli import summary_line
    from .config import load_config

    out = out or sys.stdout
    for opt in ("events", "expect", "speed"):
        if getattr(args, opt, None) is not None:
            raise InputError(
                f"--{opt} takes a single recording; for many recordings, replay prints one "
                "summary line each (regression cases of many recordings: the pytest plugin)"
            )
    _check_executor_args(args)
    cfg = load_config(args.config)
    recordings = expand_recordings(args.recording)
    progress = _progress(recordings, args.no_progress)
    try:
        with open_executor(args.jobs, args.scheduler) as ex:
            outcomes = run_tasks(ex, replay_summary, recordings, cfg, args.chunk, progress=progress)
    finally:
        progress.close()
    errors = []
    for o in outcomes:
        if o.errors:
            errors.extend(o.errors)
        else:
            out.write(f"{o.recording}: {summary_line(o.result.summary)}\n")
    for e in errors:
        print(e, file=sys.stderr)
    return EXIT_USAGE if errors else EXIT_OK
