"""The ``circuit`` command's arguments and its run (the glue between argparse and the design).

Only the standard library is imported at module level: ``streamcond --help`` builds this
parser, and must start fast.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any, TextIO

HELP = "size a hardware comparator (resistors) for a band"

DESCRIPTION = """\
Turn a band into the resistors of a hardware comparator with hysteresis (an op-amp or
comparator with positive feedback). Two ways in: the thresholds wanted at the comparator's
input, in volts (--low, --high); or a recording, a config and a channel, whose band (as
`tune` suggests it, or the configured one with --configured) is converted to volts at the
input through the channel's gain and offset and --volts-per-raw, and whose measured noise
(σ̂, ν0) then checks the margin of the worst-case band (Rice's formula).

The values come from a standard series (IEC 60063), searched for the combination closest to
the request; the report gives the thresholds and hysteresis those parts give, their worst case
over resistor, supply and reference tolerance, output swing and comparator input offset (the
corners of the tolerance box, and a Monte Carlo of 100,000 draws), and an input RC filter
matching the channel's ema or first-order lowpass prefilter.

circuits (V+ is the comparator's non-inverting input, V- its inverting one):

  inverting        V_in ─────────────────── V-
                   V_ref ──[r_ref]──────┬── V+      out: low above the upper threshold
                   out ──[r_feedback]───┘
      the signal on the inverting input, feedback from the output to V+, a divider leg
      to a reference (ground with a split supply; --ref otherwise). Thresholds:
      V_ref·Rf/(Rf+Rref) + V_out·Rref/(Rf+Rref), V_out = the output's low and high level.

  non-inverting    V_in ──[r_in]────────┬── V+      out: high above the upper threshold
                   out ──[r_feedback]───┘
                   V_ref ────────────────── V-
      the signal through r_in into V+, feedback from the output, the inverting input at
      the reference (--ref). Thresholds: V_ref·(1 + Rin/Rf) − V_out·Rin/Rf.

  single-supply    V_in ─────────────────── V-
                   supply ──[r_top]─────┬── V+      out: low above the upper threshold
                   ground ──[r_bottom]──┤
                   out ──[r_feedback]───┘
      three resistors: the divider from the supply makes the reference, so both
      thresholds can be placed; for 3.3 V and 5 V boards with a rail-to-rail comparator.
      With --ref, r_top returns to that reference instead of the supply.

output stage: push-pull (--output push-pull) swings to the rails (--swing rail) or short of
each by a loss (--swing 1.5, or a range --swing 1.5:2, about right for older bipolar op-amps);
open-drain / open-collector (--output open-drain) pulls up through --pullup to the positive
supply, and the pull-up, in series with r_feedback while the output is high, enters the
thresholds.

caution: for low-voltage signals only. Anything derived from mains needs an isolated, rated
front end; defer to local codes and licensed practice. A comparator sized here is not a
safety-rated function.

examples:
  streamcond circuit --low 2.0 --high 2.1 --circuit single-supply --supply 3.3
  streamcond circuit --low -0.5 --high 0.5 --circuit inverting --supply ±9 --swing 1.5:2
  streamcond circuit replay_data/orchard_pump.csv -c config/orchard_pump.toml \\
      --channel tank_high --volts-per-raw 0.15 --circuit single-supply --supply 3.3 --json"""


def _number(s: str) -> float:
    from .eseries import parse_value

    try:
        return float(s)
    except ValueError:
        pass
    try:
        return parse_value(s.removesuffix("V").removesuffix("A").removesuffix("s"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{s!r} is not a number") from None


def _finite(s: str) -> float:
    try:
        v = float(s)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{s!r} is not a number of volts") from None
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"{s!r} is not a finite number of volts")
    return v


def _positive(s: str) -> float:
    v = _number(s)
    if not (v > 0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError("must be a positive number")
    return v


def _nonneg(s: str) -> float:
    v = _number(s)
    if not (v >= 0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError("must be 0 or a positive number")
    return v


def _percent(s: str) -> float:
    """``1``, ``1%`` or ``0.5 %`` → a fraction (the number is always in per cent)."""
    t = s.strip().removesuffix("%").strip()
    try:
        v = float(t)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{s!r} is not a percentage like 1 or 0.5%") from None
    if not (0 <= v < 100):
        raise argparse.ArgumentTypeError("must be a percentage from 0 to below 100")
    return v / 100.0


def _ohms(s: str) -> float:
    from .eseries import parse_value

    try:
        return parse_value(s)
    except ValueError as e:
        raise argparse.ArgumentTypeError(str(e)) from None


def parse_supply(s: str) -> tuple[float, float]:
    """``5`` → (5, 0); ``±9``, ``+-9`` or ``+/-9`` → (9, −9)."""
    t = s.strip().replace(" ", "").removesuffix("V")
    split = False
    for prefix in ("±", "+-", "+/-"):
        if t.startswith(prefix):
            t, split = t[len(prefix):], True
            break
    try:
        v = float(t)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{s!r} is not a supply like 5, 3.3 or ±9 (+-9)") from None
    if not (v > 0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError("the supply must be a positive voltage")
    return (v, -v) if split else (v, 0.0)


def parse_swing(s: str) -> tuple[float, float]:
    """``rail`` → (0, 0); ``1.5`` → (1.5, 1.5); ``1.5:2`` → (1.5, 2): volts lost per rail."""
    t = s.strip().lower()
    if t in ("rail", "rail-to-rail", "rro"):
        return 0.0, 0.0
    parts = t.split(":")
    try:
        vals = [float(p.removesuffix("v")) for p in parts]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{s!r} is not a swing like rail, 1.5 or 1.5:2 (volts lost per rail)") from None
    if len(vals) == 1:
        vals = vals * 2
    if len(vals) != 2 or not all(math.isfinite(v) and v >= 0 for v in vals) or vals[0] > vals[1]:
        raise argparse.ArgumentTypeError(
            "the swing is rail, a loss per rail (1.5) or a range, the smaller first (1.5:2)")
    return vals[0], vals[1]


def parse_range(s: str) -> tuple[float, float]:
    """``1k:1M`` → (1000, 1e6)."""
    parts = s.split(":")
    if len(parts) != 2:
        raise argparse.ArgumentTypeError(f"{s!r} is not a range like 1k:1M")
    a, b = _ohms(parts[0]), _ohms(parts[1])
    if not a < b:
        raise argparse.ArgumentTypeError("the range's smaller end comes first, like 1k:1M")
    return a, b


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The ``circuit`` subcommand's options."""
    g = p.add_argument_group("the band")
    g.add_argument("recording", nargs="?", metavar="RECORDING",
                   help="a recording: its channel's band and noise (with -c and --channel)")
    g.add_argument("--low", type=_finite, metavar="V",
                   help="lower threshold wanted at the comparator input, volts")
    g.add_argument("--high", type=_finite, metavar="V",
                   help="upper threshold wanted at the comparator input, volts")
    g.add_argument("-c", "--config", metavar="CONFIG", help="TOML config file (with RECORDING)")
    g.add_argument("--channel", metavar="NAME", help="the channel (with RECORDING)")
    g.add_argument("--configured", action="store_true",
                   help="use the channel's configured band, not the one tune suggests")
    g.add_argument("--volts-per-raw", type=float, default=1.0, metavar="X",
                   help="volts at the comparator input per raw unit of the recording "
                        "(default 1: the raw value is volts; 0.15 for mA across 150 Ω)")
    g.add_argument("--target-rate", type=_positive, metavar="PER_HOUR",
                   help="acceptable false edges per hour from noise alone at worst case "
                        "(default: tune's, one a day)")

    c = p.add_argument_group("the circuit")
    c.add_argument("--circuit", required=True,
                   choices=("inverting", "non-inverting", "single-supply"),
                   help="the network (see above)")
    c.add_argument("--supply", required=True, type=parse_supply, metavar="S",
                   help="single (5, 3.3) or split (±9, also written +-9) supply, volts")
    c.add_argument("--supply-tolerance", type=_percent, default=None, metavar="PCT",
                   help="each rail's tolerance, per cent (default 2)")
    c.add_argument("--ref", type=_finite, metavar="V",
                   help="reference voltage (default: ground; single-supply: the supply, "
                        "where r_top returns)")
    c.add_argument("--ref-tolerance", type=_percent, default=None, metavar="PCT",
                   help="tolerance of a --ref, per cent (default 1)")
    c.add_argument("--output", choices=("push-pull", "open-drain"), default="push-pull",
                   help="output stage (default push-pull; open-drain also means open-collector)")
    c.add_argument("--swing", type=parse_swing, default=(0.0, 0.0), metavar="LOSS",
                   help="output loss per rail: rail (default), volts (1.5), or a range (1.5:2)")
    c.add_argument("--pullup", type=_ohms, default=None, metavar="OHMS",
                   help="pull-up of an open-drain output, to the positive supply (default 10k)")
    c.add_argument("--offset-voltage", type=_nonneg, default=None, metavar="V",
                   help="comparator input offset at most, volts (default 0.005)")

    r = p.add_argument_group("the parts")
    r.add_argument("--series", type=str.upper, choices=("E12", "E24", "E48", "E96"),
                   default="E24", help="resistor series, IEC 60063 (default E24)")
    r.add_argument("--tolerance", type=_percent, default=None, metavar="PCT",
                   help="resistor tolerance, per cent (default the series': E12 10, E24 5, "
                        "E48 2, E96 1)")
    r.add_argument("--range", type=parse_range, default=None, metavar="MIN:MAX",
                   help="resistances allowed (default 1k:1M)")
    r.add_argument("--max-current", type=_positive, default=None, metavar="A",
                   help="largest current allowed in the network's resistors, amps (1m = 1 mA)")
    r.add_argument("--rc-tau", type=_positive, default=None, metavar="S",
                   help="an input RC filter of this time constant (default: matching the "
                        "channel's ema or first-order lowpass)")
    r.add_argument("--cap-series", type=str.upper, choices=("E6", "E12"), default="E12",
                   help="capacitor series of the input RC (default E12)")

    o = p.add_argument_group("output")
    o.add_argument("--json", action="store_true", help="machine-readable output")
    o.add_argument("--plot", metavar="FILE",
                   help="write a picture: the schematic and the transfer characteristic "
                        "(PNG, SVG or PDF by the suffix)")
    o.add_argument("--force", action="store_true", help="replace the --plot FILE if it exists")


def main(args: argparse.Namespace, out: TextIO | None = None) -> int:
    """``streamcond circuit``: 0, or a StreamcondError (exit 2)."""
    from ..errors import InputError
    from . import design as dz

    out = out or sys.stdout
    have_band = args.low is not None or args.high is not None
    problems: list[str] = []
    if args.recording is not None and have_band:
        problems.append("Give either --low and --high, or a RECORDING with -c and --channel, "
                        "not both")
    elif args.recording is None:
        if args.low is None or args.high is None:
            problems.append("Give the thresholds (--low V --high V), or a RECORDING with -c "
                            "CONFIG and --channel NAME")
        for opt, val in (("-c", args.config), ("--channel", args.channel),
                         ("--configured", args.configured or None)):
            if val is not None:
                problems.append(f"{opt} goes with a RECORDING")
    else:
        if args.config is None or args.channel is None:
            problems.append("A RECORDING needs -c CONFIG and --channel NAME")
    if args.pullup is not None and args.output != "open-drain":
        problems.append("--pullup goes with --output open-drain")
    if args.ref_tolerance is not None and args.ref is None:
        problems.append("--ref-tolerance goes with --ref")
    if args.force and not args.plot:
        problems.append("--force goes with --plot")
    if problems:
        raise InputError(problems)

    evidence = None
    if args.recording is not None:
        from .evidence import from_recording

        evidence = from_recording(args.config, args.recording, args.channel, args.configured,
                                  args.volts_per_raw, args.target_rate)
        low, high = evidence.band_volts
    else:
        low, high = args.low, args.high
    v_pos, v_neg = args.supply
    spec = dz.Spec(
        circuit=args.circuit,
        want_low=low,
        want_high=high,
        v_pos=v_pos,
        v_neg=v_neg,
        ref=args.ref,
        output=args.output,
        loss=args.swing,
        r_pullup=(args.pullup or dz.DEFAULT_PULLUP) if args.output == "open-drain" else None,
        series=args.series,
        tolerance=args.tolerance,
        r_range=args.range or dz.DEFAULT_RANGE,
        max_current=args.max_current,
        v_os=dz.DEFAULT_OFFSET_V if args.offset_voltage is None else args.offset_voltage,
        supply_tolerance=(dz.DEFAULT_SUPPLY_TOLERANCE if args.supply_tolerance is None
                          else args.supply_tolerance),
        ref_tolerance=(dz.DEFAULT_REF_TOLERANCE if args.ref_tolerance is None
                       else args.ref_tolerance),
        rc_tau=args.rc_tau,
        cap_series=args.cap_series,
        evidence=evidence,
        target_rate_per_hour=args.target_rate,
    )
    if args.plot:  # before the work: a picture that cannot be written is said at once
        from ..io.eventlog import check_output

        check_output(args.plot, mode="replace" if args.force else "new",
                     inputs=[("recording", args.recording), ("config", args.config)],
                     what="picture", force_hint="--force to replace it")
    d = dz.design(spec)
    if args.plot:
        from .plot import plot

        plot(d, args.plot)
    from .report import format_text, to_json

    if args.json:
        doc: dict[str, Any] = to_json(d)
        if args.plot:
            doc["plot"] = str(args.plot)
        out.write(json.dumps(doc, indent=2, allow_nan=False) + "\n")
    else:
        out.write(format_text(d, args.plot))
    return 0
