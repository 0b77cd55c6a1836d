"""The ``streamcond`` command line (DESIGN.md "Command line (contract)").

Only the standard library is imported at module level, so ``--help`` and ``check`` start fast;
each command imports what it needs (numpy, scipy.signal, matplotlib) when it runs.
Errors reach the user as plain sentences on stderr with exit code 2, never as a traceback.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from pathlib import Path
from typing import Sequence

from . import __version__
from .errors import InputError, StreamcondError

EXIT_OK = 0
EXIT_DIFFERENT = 1
EXIT_USAGE = 2
EXIT_INTERRUPTED = 130  # 128 + SIGINT, the shell's convention

DESCRIPTION = """\
Turn noisy sensor streams into clean, timed digital events: a software Schmitt trigger
(hysteresis) per channel, an optional prefilter, time qualification, and JSON-lines records.
The same pipeline conditions a live serial stream and replays recordings."""

EPILOG = """\
examples:
  streamcond demo --duration 20
  streamcond check -c config/orchard_pump.toml
  streamcond run -c /etc/streamcond/site.toml
  streamcond replay replay_data/orchard_pump.csv -c config/orchard_pump.toml --events -
  streamcond replay replay_data/orchard_pump.csv -c config/orchard_pump.toml \\
      --expect replay_data/orchard_pump.golden.jsonl   # add --update-golden to renew it
  streamcond tune replay_data/orchard_pump.csv -c config/orchard_pump.toml --channel tank_high
  streamcond check -c site.toml --probe
  streamcond tune -c site.toml --port-seconds 180 --write
  streamcond watch -c site.toml
  streamcond circuit --low 2.0 --high 2.1 --circuit single-supply --supply 3.3
  streamcond bench
  streamcond compare config/site.toml new-band.toml 'recordings/*.csv' --jobs 2

exit codes: 0 success, 1 --expect or compare found differences or a check --probe failed,
2 bad usage, config or input, 130 interrupted (Ctrl-C)."""


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
    p.add_argument(
        "-q", "--quiet", action="count", default=0,
        help="less on stderr: only errors (replay: no closing summary line)",
    )
    # the same two flags after the command (`streamcond replay ... -v`); their own dests, so a
    # subcommand's default never overwrites what was given before the command
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-v", "--verbose", dest="verbose_sub", action="count",
                        default=argparse.SUPPRESS,
                        help="more log detail on stderr (-vv for debug); also before the command")
    common.add_argument("-q", "--quiet", dest="quiet_sub", action="count",
                        default=argparse.SUPPRESS,
                        help="only errors on stderr (replay: no closing summary line)")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", title="commands")

    def cmd(name: str, help_: str, desc: str) -> argparse.ArgumentParser:
        return sub.add_parser(name, help=help_, description=desc, formatter_class=_Formatter,
                              parents=[common])

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
    rec_mode = rec.add_mutually_exclusive_group()
    rec_mode.add_argument("--force", action="store_true",
                          help="replace CAPTURE if it exists (default: refuse)")
    rec_mode.add_argument("--append", action="store_true",
                          help="add to an existing text capture instead of refusing")

    cv = cmd(
        "convert",
        "turn a CSV/kv/JSON recording or a capture into Parquet",
        "Read a recording through the same parser as replay and write the rows it keeps as\n"
        "Parquet (a column per source column, compressed row groups); replay, tune and compare\n"
        "read it back and give the same records. Needs pyarrow (streamcond[parquet]).",
    )
    cv.add_argument("recording", metavar="RECORDING", help="recorded stream or capture")
    cv.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    cv.add_argument("-o", "--output", required=True, metavar="PARQUET", help="Parquet file to write")
    cv.add_argument("--force", action="store_true", help="replace PARQUET if it exists")

    r = cmd(
        "replay",
        "run a recording through the conditioning pipeline",
        "Run a recording through the same parser and conditioning core as the live daemon and\n"
        "write the records (state, edges, gaps, and a closing summary) as JSON lines.",
    )
    r.add_argument("recording", metavar="RECORDING", nargs="*",
                   help="recorded stream (CSV/kv/JSON lines, or a capture); default: source.path; "
                   "several, a glob or @LIST: one summary line each")
    r.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    r.add_argument(
        "--events",
        metavar="PATH",
        help="where to write the records: a new file, or - for stdout (default: output.events; "
        "with --expect, nothing unless given); never one of the inputs",
    )
    w = r.add_mutually_exclusive_group()
    w.add_argument("--force", action="store_true",
                   help="replace an existing events file")
    w.add_argument("--append", action="store_true",
                   help="add the records to an existing events file")
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
        "--compare-all",
        action="store_true",
        help="with --expect: compare faults, gaps and the summary's final totals too",
    )
    r.add_argument(
        "--update-golden",
        action="store_true",
        help="with --expect: write this replay's records as the new golden file and print what "
        "changed (the golden file is never written otherwise)",
    )
    r.add_argument(
        "--no-progress", action="store_true", help="no progress line, even on a terminal"
    )
    from .compare import add_executor_arguments

    add_executor_arguments(r, _positive_int)  # for several recordings

    t = cmd(
        "tune",
        "measure each channel's noise and suggest a band",
        "Read a recording (or the live port, --port-seconds) through the same parser and\n"
        "prefilter as replay, and for each channel: measure the noise (robust sigma and zero\n"
        "up-crossing rate), sweep band widths, find the plateau of widths over which the edge\n"
        "count is stable, and suggest a width that lies on it and meets a target false-edge rate\n"
        "(Rice's formula). A pulse channel (a signal jumping between two levels, e.g. a paddle\n"
        "wheel) gets a band between its levels, a dwell sized from the measured bounce, and its\n"
        "pulse rate. --write puts the suggestion into the config.",
    )
    t.add_argument("recording", metavar="RECORDING", nargs="?",
                   help="recorded stream (CSV/kv/JSON lines, or a capture of `record`)")
    t.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    t.add_argument("--channel", metavar="NAME", help="the channel to tune (default: every channel)")
    t.add_argument("--port-seconds", type=_positive_float, metavar="N",
                   help="instead of a recording, read the config's serial port for N seconds "
                   "(stop the daemon first: two readers would share the port's lines)")
    t.add_argument("--pulse", action=argparse.BooleanOptionalAction, default=None,
                   help="tune as a pulse channel (--no-pulse: as a level channel); default: "
                   "decided from the signal")
    t.add_argument("--json", action="store_true",
                   help="machine-readable output (every channel: {\"channels\": {name: ...}})")
    t.add_argument("--plot", metavar="PNG",
                   help="write a picture per channel (PNG-channel.png when several)")
    t.add_argument("--write", action="store_true",
                   help="put the suggested band (and dwell) into CONFIG in place, keeping its "
                   "comments and layout, and print the change as a diff")
    t.add_argument(
        "--target-rate",
        type=_positive_float,
        default=None,
        metavar="PER_HOUR",
        help="acceptable false edges per hour from noise alone, by Rice's formula for a signal "
        "resting at the band centre (an upper bound); default 1/24: one a day",
    )

    cmp = cmd(
        "compare",
        "which events would change on many recordings with another config",
        "Replay every recording with CONFIG_A and with CONFIG_B and report, per recording and\n"
        "channel, the edges with each, the edges that moved beyond the tolerance, went missing\n"
        "or were added (A is the reference; the largest move in seconds), and the chatter with\n"
        "each config (raw crossings of the band centre, and their ratio to the edges, over the\n"
        "stats windows). One task per recording, in local processes (--jobs) or on a Dask\n"
        "cluster (--scheduler).\n\n"
        "exit codes: 0 nothing changed beyond --threshold, 1 something did, 2 bad input.",
    )
    from .compare import add_arguments as add_compare_arguments

    add_compare_arguments(cmp)

    c = cmd(
        "check",
        "validate a config and print the resolved settings",
        "Validate a config file and print the settings as they will be used, defaults filled in.",
    )
    c.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    c.add_argument("--json", action="store_true", help="print the resolved settings as JSON")
    c.add_argument("--probe", action="store_true",
                   help="try everything the daemon needs (port, first lines, sample rate, broker, "
                   "TLS files, spool directory): a line each; exit 0 only when all pass, else 1")
    c.add_argument("--probe-seconds", type=_positive_float, default=None, metavar="S",
                   help="how long --probe listens to the port (default: 3)")

    dm = cmd(
        "demo",
        "the daemon live on a simulated device and an embedded broker, with the live view",
        "A simulated device (a pseudo-terminal fed the demo recording in real time), an embedded\n"
        "MQTT broker on a free loopback port (amqtt: pip install 'streamcond[demo]'), the daemon\n"
        "on them, and the live view of what it publishes — serial in, clean events on MQTT, with\n"
        "no hardware and no broker installed. Ends after --duration or at Ctrl-C.",
    )
    dm.add_argument("--duration", type=_positive_float, metavar="S",
                    help="stop after S seconds (default: until Ctrl-C)")
    dm.add_argument("--speed", type=_positive_float, metavar="X",
                    help="play the recording X times faster than real time (default: 1)")
    dm.add_argument("--plain", action="store_true", help="plain text view even on a terminal")
    dm.add_argument("--interval", type=_positive_float, metavar="S",
                    help="seconds between text blocks in plain mode (default: 2)")

    w = cmd(
        "watch",
        "live view of a station: each channel's value, band, level, noise and edges",
        "A live view for commissioning. Per channel: value, band, level, noise sigma and the\n"
        "margin in sigmas, edges in the last minute, age of the value, chatter flag and a small\n"
        "trace against the band; for the station: source rate, bad lines, spool depth and the\n"
        "broker state. Reads what the daemon publishes over MQTT (its edge, state and stats\n"
        "topics and the retained health record); with --port, when no daemon is running, reads\n"
        "the serial port and runs the pipeline itself. Refreshed in place on a terminal, plain\n"
        "text otherwise. Ctrl-C ends it.",
    )
    w.add_argument("-c", "--config", required=True, metavar="CONFIG", help="TOML config file")
    w.add_argument("--port", action="store_true",
                   help="read the config's serial port and run the pipeline here (only when no "
                   "daemon has the port open)")
    w.add_argument("--duration", type=_positive_float, metavar="S",
                   help="stop after S seconds (default: until Ctrl-C)")
    w.add_argument("--plain", action="store_true",
                   help="plain text blocks even on a terminal (the default for a pipe or file)")
    w.add_argument("--interval", type=_positive_float, metavar="S",
                   help="seconds between text blocks in plain mode (default: 2)")

    from .circuit.cli import DESCRIPTION as CIRCUIT_DESCRIPTION, HELP as CIRCUIT_HELP
    from .circuit.cli import add_arguments as circuit_arguments

    circuit_arguments(cmd("circuit", CIRCUIT_HELP, CIRCUIT_DESCRIPTION))

    b = cmd(
        "bench",
        "measure throughput on this machine",
        "Measure, side by side in one run: the hysteresis kernel against a bare numpy comparator\n"
        "and a per-sample Python loop on the same 10 M samples, and the replay of a generated\n"
        "1 M-row, 4-channel CSV against numpy.loadtxt on the same file, and, when installed,\n"
        "against pandas' and pyarrow's CSV readers and of a Parquet copy against reading it.",
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
    level = base - 10 * min(verbose, 2) if verbose >= 0 else logging.ERROR
    fmt = "streamcond: %(levelname)s: %(message)s"
    if verbose >= 2:  # debugging: times in ms since start (journald stamps the normal lines)
        fmt = "streamcond: %(relativeCreated)9.1f %(levelname)s %(name)s: %(message)s"
    logging.basicConfig(level=level, format=fmt, stream=sys.stderr)


def _fail(messages: Sequence[str]) -> int:
    for m in messages:
        print(m, file=sys.stderr)
    return EXIT_USAGE


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    args.verbose += getattr(args, "verbose_sub", 0)
    args.quiet += getattr(args, "quiet_sub", 0)
    _setup_logging(args.verbose - args.quiet, args.command)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    try:
        if args.command == "replay":
            return _replay(args)
        if args.command == "compare":
            from .compare import main as compare_main

            return compare_main(args)
        if args.command == "run":
            from .daemon import run

            return run(args.config)
        if args.command == "record":
            from .record import main as record_main

            return record_main(args)
        if args.command == "convert":
            from .convert import main as convert_main

            return convert_main(args)
        if args.command == "check":
            return _check(args)
        if args.command == "tune":
            from .tune import main as tune_main

            return tune_main(args)
        if args.command == "demo":
            from .demo import main as demo_main

            return demo_main(args)
        if args.command == "watch":
            from .watch import main as watch_main

            return watch_main(args)
        if args.command == "circuit":
            from .circuit.cli import main as circuit_main

            return circuit_main(args)
        if args.command == "bench":
            from .bench import main as bench_main

            return bench_main(args)
    except StreamcondError as e:
        return _fail(e.messages)
    except KeyboardInterrupt:
        return EXIT_INTERRUPTED
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
    if len(args.recording or ()) == 1 and not args.recording[0].startswith("@"):
        # the reader process starts now: its imports run on the other core while the config
        # loads here (a bad config or another file stops it unused)
        from .io.prefetch import start_early

        start_early(args.recording[0])
    from .config import load_config
    from .batch import is_many
    from .golden import compare, compare_other, edges_of, load_records, write_golden
    from .io.eventlog import EventLog, check_output
    from .progress import Progress
    from .replay import ReplayInterrupted, run_replay

    if (args.update_golden or args.compare_all) and not args.expect:
        flag = "--update-golden" if args.update_golden else "--compare-all"
        raise InputError(f"{flag} needs --expect GOLDEN")
    if is_many(args.recording):  # several recordings: one summary line each (compare.py)
        from .compare import replay_many

        return replay_many(args)
    args.recording = args.recording[0] if args.recording else None
    cfg = load_config(args.config)
    if args.recording is None:
        if not cfg.source.path:
            raise InputError("Give a RECORDING, or set source.path in the config")
        args.recording = cfg.source.path  # relative to the current directory, like RECORDING
    rec = Path(args.recording)
    if not rec.exists():  # before any output is opened
        raise InputError(f"The recording {args.recording!r} does not exist")
    if rec.is_dir():
        raise InputError(f"The recording {args.recording!r} is a directory, not a file")
    inputs = [("recording", args.recording), ("config", args.config)]
    if args.expect:
        inputs.append(("golden file being compared", args.expect))
    expected = None
    if args.expect and args.update_golden:
        # the golden file is an output of this run: it may be new, but not one of the others
        check_output(args.expect, mode="replace", inputs=inputs[:2], what="golden file")
        expected = load_records(args.expect) if Path(args.expect).exists() else []
    elif args.expect:
        expected = load_records(args.expect)
    target = args.events if args.events is not None else (None if args.expect else cfg.output.events)
    mode = "append" if args.append else ("replace" if args.force else "new")
    rot = cfg.output.rotate if args.events is None else None
    # opened now: an unwritable or refused path is reported before any work starts
    writer = EventLog(
        target, flush_each=args.speed is not None, mode=mode, inputs=inputs,
        max_bytes=rot.max_bytes if rot else None, max_age_s=rot.max_age_s if rot else None,
        keep=rot.keep if rot else 5,
    )
    try:
        size = os.path.getsize(args.recording)
    except OSError:
        size = 0
    # no progress line between records printed on the same terminal
    on_screen = target == "-" and sys.stdout.isatty()
    progress = Progress(size, enabled=False if (args.no_progress or on_screen) else None)
    ok = False
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
        ok = True
    except ReplayInterrupted as e:
        ok = True
        progress.close()
        writer.close()
        where = f" (the events file {target!r} ends with an \"interrupted\" record)" if (
            target and target != "-") else ""
        print(f"interrupted at t = {e.t:.3f} s after {e.rows:,} rows{where}.", file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        progress.close()
        if ok:
            writer.close()
        else:
            writer.abort()
    if not args.quiet:
        print(summary_line(res.summary), file=sys.stderr)
        if writer.path is not None:  # say what was written where
            print(f"{writer.written:,} records written to {target} ({writer.how}"
                  + (f", {writer.rotations} rotation(s)" if writer.rotations else "") + ").",
                  file=sys.stderr)
    if expected is None:
        return EXIT_OK
    diff = compare(edges_of(expected), edges_of(res.records), args.tolerance)
    if args.compare_all or args.update_golden:
        diff += compare_other(expected, res.records, args.tolerance)
    if args.update_golden:
        write_golden(args.expect, res.records)
        n = sum(1 for r in res.records if r.get("kind") == "edge")
        if not expected:
            print(f"wrote the new golden file {args.expect} ({n} edges).", file=sys.stderr)
        elif diff:
            print(f"updated {args.expect}; what changed:", file=sys.stderr)
            for line in diff:
                print(line, file=sys.stderr)
        else:
            print(f"updated {args.expect}: the edges, faults, gaps and totals are unchanged "
                  f"({n} edges).", file=sys.stderr)
        return EXIT_OK
    if diff:
        print("replay differs from " + args.expect + ":", file=sys.stderr)
        for line in diff:
            print(line, file=sys.stderr)
        return EXIT_DIFFERENT
    n = sum(1 for r in res.records if r.get("kind") == "edge")
    what = "edges, faults, gaps and totals" if args.compare_all else "edges"
    print(f"replay matches {args.expect}: {n} {what} agree within {args.tolerance:g} s.",
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
    if getattr(args, "probe", False):
        from .probe import main as probe_main

        return probe_main(args)
    from .config import load_config
    from .describe import describe_config
    from .validate import validate

    cfg = load_config(args.config)
    validate(cfg)  # what only building the channels or opening the files shows
    from .io.eventlog import check_inputs

    # the events file the daemon would refuse to open: the config, the spool, or a rotated name
    check_inputs(cfg.output, [("config", args.config), ("spool/state file", cfg.output.store_path)])
    print(describe_config(cfg, as_json=args.json))
    return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
