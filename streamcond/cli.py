"""The ``streamcond`` command line (DESIGN.md "Command line (contract)").

Only the standard library is imported at module level, so ``--help`` and ``check`` start fast;
each command imports what it needs (numpy, scipy.signal, matplotlib) when it runs.
Errors reach the user as plain sentences on stderr with exit code 2, never as a traceback.
"""

from __future__ import annotations

import argparse
import logging
import sys
from typing import Sequence

from . import __version__

EXIT_OK = 0
EXIT_DIFFERENT = 1
EXIT_USAGE = 2

DESCRIPTION = """\
Turn noisy sensor streams into clean, timed digital events: a software Schmitt trigger
(hysteresis) per channel, an optional prefilter, time qualification, and JSON-lines records.
The same pipeline conditions a live serial stream and replays recordings."""

EPILOG = """\
examples:
  streamcond check -c config/orchard_pump.toml
  streamcond run -c /etc/streamcond/site.toml
  streamcond replay replay_data/orchard_pump.csv -c config/orchard_pump.toml --events -
  streamcond replay replay_data/orchard_pump.csv -c config/orchard_pump.toml \\
      --expect replay_data/orchard_pump.golden.jsonl
  streamcond tune replay_data/orchard_pump.csv -c config/orchard_pump.toml --channel tank_high
  streamcond bench

exit codes: 0 success, 1 --expect found differences, 2 bad usage, config or input."""


class _Formatter(argparse.RawDescriptionHelpFormatter):
    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=32)


def _positive_int(s: str) -> int:
    try:
        v = int(s)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{s!r} is not a whole number") from None
    if v < 1:
        raise argparse.ArgumentTypeError("must be 1 or more")
    return v


def _float_arg(allow_zero: bool):
    """An argparse type: a finite number above 0 (or at least 0)."""

    def parse(s: str) -> float:
        try:
            v = float(s)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{s!r} is not a number") from None
        ok = (v >= 0 if allow_zero else v > 0) and v != float("inf")
        if not ok:
            raise argparse.ArgumentTypeError(
                "must be 0 or a positive number" if allow_zero else "must be a positive number"
            )
        return v

    return parse


_positive_float = _float_arg(allow_zero=False)
_nonneg_float = _float_arg(allow_zero=True)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="streamcond", description=DESCRIPTION, epilog=EPILOG, formatter_class=_Formatter
    )
    p.add_argument("--version", action="version", version=f"streamcond {__version__}")
    p.add_argument(
        "-v", "--verbose", action="count", default=0, help="more log detail on stderr (-vv for debug)"
    )
    sub = p.add_subparsers(dest="command", metavar="COMMAND", title="commands")

    def cmd(name: str, help_: str, desc: str) -> argparse.ArgumentParser:
        return sub.add_parser(name, help=help_, description=desc, formatter_class=_Formatter)

    d = cmd(
        "run",
        "the daemon: condition a serial stream and publish the events",
        "Read the serial stream named in the config, condition it, write records to\n"
        "output.events and publish them to MQTT (output.mqtt) through a durable spool.\n"
        "SIGHUP reloads the config; SIGTERM or SIGINT stop cleanly.",
    )
    d.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")

    rec = cmd(
        "record",
        "capture raw serial lines for later replay",
        "Capture the raw serial lines with their host receive times; `streamcond replay CAPTURE`\n"
        "runs them through the same parser and core as the live daemon.",
    )
    rec.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    rec.add_argument("-o", "--output", required=True, metavar="CAPTURE", help="capture file to write")
    rec.add_argument("--duration", type=_positive_float, metavar="S",
                     help="stop after S seconds (default: until SIGINT/SIGTERM)")

    r = cmd(
        "replay",
        "run a recording through the conditioning pipeline",
        "Run a recording through the same parser and conditioning core as the live daemon and\n"
        "write the records (state, edges, gaps, and a closing summary) as JSON lines.",
    )
    r.add_argument("recording", metavar="RECORDING", help="recorded stream (CSV/kv/JSON lines)")
    r.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    r.add_argument(
        "--events",
        metavar="PATH",
        help="where to write the records: a file, or - for stdout (default: output.events; "
        "with --expect, nothing unless given)",
    )
    r.add_argument(
        "--chunk",
        type=_positive_int,
        metavar="N",
        help="feed the pipeline N rows at a time (results do not depend on N)",
    )
    r.add_argument(
        "--speed",
        type=_positive_float,
        metavar="X",
        help="pace by sample time: 1 = real time, 10 = ten times faster (for a live consumer)",
    )
    r.add_argument(
        "--expect",
        metavar="GOLDEN",
        help="compare the edges with a golden events file; exit 1 and show the differences",
    )
    r.add_argument(
        "--tolerance",
        type=_nonneg_float,
        default=1e-6,
        metavar="SECONDS",
        help="largest edge time difference that still matches, with --expect (default: 1e-6)",
    )
    r.add_argument(
        "--no-progress", action="store_true", help="no progress line, even on a terminal"
    )
    r.add_argument(
        "-q", "--quiet", action="store_true", help="no closing summary line on stderr"
    )

    t = cmd(
        "tune",
        "measure a channel's noise and suggest a band",
        "Read a recording through the same parser and prefilter as replay, measure the channel's\n"
        "noise (robust sigma and zero up-crossing rate), sweep band widths, find the plateau of\n"
        "widths over which the edge count is stable, and suggest a width that lies on it and meets\n"
        "a target false-edge rate (Rice's formula).",
    )
    t.add_argument("recording", metavar="RECORDING", help="recorded stream (CSV/kv/JSON lines)")
    t.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    t.add_argument("--channel", required=True, metavar="NAME", help="the channel to tune")
    t.add_argument("--json", action="store_true", help="machine-readable output")
    t.add_argument("--plot", metavar="PNG", help="write a picture: trace, band, edges, sweep")
    t.add_argument(
        "--target-rate",
        type=_positive_float,
        default=None,
        metavar="PER_HOUR",
        help="acceptable false edges per hour from noise alone, by Rice's formula for a signal "
        "resting at the band centre (an upper bound); default 1/24: one a day",
    )

    c = cmd(
        "check",
        "validate a config and print the resolved settings",
        "Validate a config file and print the settings as they will be used, defaults filled in.",
    )
    c.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    c.add_argument("--json", action="store_true", help="print the resolved settings as JSON")

    b = cmd(
        "bench",
        "measure throughput on this machine",
        "Measure, side by side in one run: the hysteresis kernel against a bare numpy comparator\n"
        "and a per-sample Python loop on the same 10 M samples, and the replay of a generated\n"
        "1 M-row, 4-channel CSV against numpy.loadtxt on the same file.",
    )
    b.add_argument("--json", action="store_true", help="machine-readable output")
    b.add_argument(
        "--samples", type=_positive_int, default=10_000_000, metavar="N",
        help="samples for the kernel comparison (default: 10,000,000)",
    )
    b.add_argument(
        "--rows", type=_positive_int, default=1_000_000, metavar="N",
        help="rows of the generated CSV for the replay comparison (default: 1,000,000)",
    )
    b.add_argument("--repeat", type=_positive_int, default=5, metavar="N",
                   help="best of N timings (default: 5)")
    return p


def _setup_logging(verbose: int, command: str | None = None) -> None:
    # the daemon logs its life cycle at INFO (journald collects stderr); the tools are quiet
    base = logging.INFO if command in ("run", "record") else logging.WARNING
    level = base - 10 * min(verbose, 2)
    fmt = "streamcond: %(levelname)s: %(message)s"
    if verbose >= 2:  # debugging: times in ms since start (journald stamps the normal lines)
        fmt = "streamcond: %(relativeCreated)9.1f %(levelname)s %(name)s: %(message)s"
    logging.basicConfig(level=level, format=fmt, stream=sys.stderr)


def _fail(messages: Sequence[str]) -> int:
    for m in messages:
        print(m, file=sys.stderr)
    return EXIT_USAGE


def main(argv: Sequence[str] | None = None) -> int:
    from .errors import StreamcondError

    parser = build_parser()
    args = parser.parse_args(argv)
    _setup_logging(args.verbose, args.command)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    try:
        if args.command == "replay":
            return _replay(args)
        if args.command == "run":
            from .daemon import run

            return run(args.config)
        if args.command == "record":
            from .record import main as record_main

            return record_main(args)
        if args.command == "check":
            return _check(args)
        if args.command == "tune":
            from .tune import main as tune_main

            return tune_main(args)
        if args.command == "bench":
            from .bench import main as bench_main

            return bench_main(args)
    except StreamcondError as e:
        return _fail(e.messages)
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # output piped into `head` and closed early: not an error of ours
        try:
            sys.stdout = None  # type: ignore[assignment]
        except Exception:
            pass
        return EXIT_OK
    parser.error(f"unknown command {args.command!r}")
    return EXIT_USAGE


def _replay(args: argparse.Namespace) -> int:
    from .config import load_config
    from .golden import compare, edges_of, load_edges
    from .progress import Progress
    from .replay import JsonlWriter, run_replay

    cfg = load_config(args.config)
    expected = load_edges(args.expect) if args.expect else None
    target = args.events if args.events is not None else (None if args.expect else cfg.output.events)
    import os

    try:
        size = os.path.getsize(args.recording)
    except OSError:
        size = 0
    progress = Progress(size, enabled=False if args.no_progress else None)
    writer = JsonlWriter(target, flush_each=args.speed is not None)
    try:
        res = run_replay(
            cfg,
            args.recording,
            writer,
            chunk=args.chunk,
            speed=args.speed,
            keep_records=expected is not None,
            progress=progress,
        )
    finally:
        progress.close()
        writer.close()
    if not args.quiet:
        print(summary_line(res.summary), file=sys.stderr)
    if expected is None:
        return EXIT_OK
    diff = compare(expected, edges_of(res.records), args.tolerance)
    if diff:
        print("replay differs from " + args.expect + ":", file=sys.stderr)
        for line in diff:
            print(line, file=sys.stderr)
        return EXIT_DIFFERENT
    n = sum(1 for r in res.records if r.get("kind") == "edge")
    print(f"replay matches {args.expect}: {n} edges agree within {args.tolerance:g} s.",
          file=sys.stderr)
    return EXIT_OK


def summary_line(s: dict) -> str:
    """The replay's summary record in one sentence for people."""
    edges = ", ".join(f"{k} {v:,}" for k, v in s.get("edges", {}).items())
    span = ""
    if s.get("t") is not None and s.get("sample_rate_hz"):
        span = f" (to t = {s['t']:.3f} s at {s['sample_rate_hz']:g} Hz)"
    return (
        f"replayed {s.get('rows', 0):,} rows{span} in {s.get('run_time_s', 0):.2f} s; "
        f"edges: {edges or 'none'}; {s.get('bad_lines', 0):,} bad lines, "
        f"{s.get('gaps', 0):,} gaps."
    )


def _check(args: argparse.Namespace) -> int:
    from .config import load_config
    from .describe import describe_config

    from .validate import validate

    cfg = load_config(args.config)
    validate(cfg)  # what only building the channels or opening the files shows
    print(describe_config(cfg, as_json=args.json))
    return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
