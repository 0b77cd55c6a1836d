"""``streamcond tune``: the command — where the data comes from, which channels, which views.

Order of work, so that a failure late in the run never hides what was already found: read every
channel asked for (one pass over the recording, or one capture of the live port), analyse each,
write the pictures, print the report (or the JSON), then ``--write`` the config. A picture that
cannot be written (no matplotlib, an extension it cannot write, a directory) is one sentence on
stderr and exit 2 — after the report, which is printed either way.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TextIO

from ..config import Config, load_config
from ..errors import InputError, StreamcondError
from .analysis import TuneResult, analyse
from .jsonview import json_default, to_json
from .reading import ChannelData, pick_channel, read_channels
from .report import format_report

#: Between two channels' reports.
RULE = "─" * 78

log = logging.getLogger(__name__)


def run(
    config_path: str,
    recording: str,
    channel: str,
    target_rate_per_hour: float | None = None,
    pulse: bool | None = None,
) -> tuple[TuneResult, ChannelData]:
    """Load, read and analyse one channel (no output): the library entry point."""
    return run_all(config_path, recording, [channel], target_rate_per_hour, pulse)[0]


def run_all(
    config_path: str,
    recording: str,
    channels: list[str] | None = None,
    target_rate_per_hour: float | None = None,
    pulse: bool | None = None,
) -> list[tuple[TuneResult, ChannelData]]:
    """Every channel named (all of the config's when None), read in one pass and analysed."""
    cfg = load_config(config_path)
    return _analyse_all(cfg, config_path, recording, channels, target_rate_per_hour, pulse)


def _analyse_all(
    cfg: Config,
    config_path: str,
    recording: str | Path,
    channels: list[str] | None,
    target: float | None,
    pulse: bool | None,
) -> list[tuple[TuneResult, ChannelData]]:
    chosen = (
        [pick_channel(cfg, n, repr(str(config_path))) for n in channels]
        if channels
        else list(cfg.channel)
    )
    datas = read_channels(cfg, recording, chosen)
    return [(analyse(d, target, pulse=pulse), d) for d in datas]


@dataclass
class _Picture:
    channel: str
    path: Path
    written: bool = False


def picture_paths(plot: str, names: list[str]) -> list[_Picture]:
    """Where each channel's picture goes: ``plot`` itself for one channel, else ``plot`` with
    ``-<channel>`` before its extension. No extension: ``.png`` is added (and shown), so the
    path printed is the path written."""
    p = Path(plot)
    if p.suffix == "":
        p = p.with_suffix(".png")
    if len(names) == 1:
        return [_Picture(names[0], p)]
    return [_Picture(n, p.with_name(f"{p.stem}-{n}{p.suffix}")) for n in names]


def check_picture_target(plot: str, pictures: list[_Picture], inputs: list[Path]) -> None:
    """Raise one plain sentence when the pictures cannot be written (before any is drawn)."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise InputError(
            "tune --plot needs the plotting library matplotlib, which is not installed: "
            "pip install 'streamcond[plot]' (the report above is complete without it)"
        ) from None
    if Path(plot).is_dir():
        raise InputError(
            f"The picture path {plot!r} is a directory; give a file name, such as "
            f"{str(Path(plot) / 'tune.png')!r}"
        )
    from .plot import supported_extensions

    exts = supported_extensions()
    for pic in pictures:
        ext = pic.path.suffix.lower().lstrip(".")
        if ext not in exts:
            raise InputError(
                f"The picture {str(pic.path)!r} has an extension the plotting library cannot "
                f"write (.{ext}); use one of " + ", ".join("." + e for e in sorted(exts))
            )
        if pic.path.is_dir():
            raise InputError(f"The picture path {str(pic.path)!r} is a directory")
        parent = pic.path.parent
        if not parent.is_dir():
            raise InputError(
                f"The picture {str(pic.path)!r} cannot be written: the folder {str(parent)!r} "
                f"does not exist"
            )
        resolved = pic.path.resolve()
        for inp in inputs:
            if resolved == inp.resolve():
                raise InputError(
                    f"The picture {str(pic.path)!r} is one of tune's inputs; it is never "
                    f"written over"
                )


def main(args: argparse.Namespace, out: TextIO | None = None) -> int:
    """``streamcond tune``: exit code 0 (errors are raised as StreamcondError, exit 2)."""
    out = out or sys.stdout
    cfg = load_config(args.config)
    port_seconds = getattr(args, "port_seconds", None)
    recording = getattr(args, "recording", None)
    if (recording is None) == (port_seconds is None):
        raise InputError(
            "tune reads either a RECORDING or the live port (--port-seconds N), one of the two"
        )
    names = [args.channel] if args.channel else None
    pulse = getattr(args, "pulse", None)
    with tempfile.TemporaryDirectory(prefix="streamcond-tune-") as tmp:
        if port_seconds is not None:
            from .live import capture_port

            recording = capture_port(cfg, float(port_seconds), Path(tmp) / "port.capture")
        results = _analyse_all(cfg, args.config, recording, names, args.target_rate, pulse)
    inputs = [Path(args.config)] + ([Path(args.recording)] if args.recording else [])
    pictures: list[_Picture] = []
    plot_error: StreamcondError | None = None
    if args.plot:
        pictures = picture_paths(args.plot, [r.channel for r, _ in results])
        try:
            check_picture_target(args.plot, pictures, inputs)
            from .plot import plot

            for pic, (res, data) in zip(pictures, results):
                try:
                    plot(res, data, pic.path)
                except StreamcondError:
                    raise
                except Exception as e:  # the plotting library's own failure: one sentence
                    log.debug("drawing %s failed", pic.path, exc_info=True)
                    raise InputError(
                        f"The picture {str(pic.path)!r} could not be drawn "
                        f"({type(e).__name__}: {e}); the report is complete without it"
                    ) from None
                pic.written = True
        except StreamcondError as e:
            plot_error = e
    written = {p.channel: str(p.path) for p in pictures if p.written}
    edit = None
    if getattr(args, "write", False) and plot_error is None:
        from .write import write_config

        edit = write_config(args.config, [r for r, _ in results])
    if args.json:
        docs: dict[str, Any] = {}
        for res, _ in results:
            doc = to_json(res)
            if res.channel in written:
                doc["plot"] = written[res.channel]
            docs[res.channel] = doc
        top: dict[str, Any] = docs[args.channel] if args.channel else {"channels": docs}
        if edit is not None:
            top["written"] = {"path": str(args.config), "changed": edit.changed, "diff": edit.diff}
        out.write(json.dumps(top, indent=2, allow_nan=False, default=json_default) + "\n")
    else:
        texts = [format_report(res, written.get(res.channel)) for res, _ in results]
        out.write(("\n" + RULE + "\n\n").join(texts))
        if edit is not None:
            out.write("\n" + RULE + "\n\n" + edit.summary() + "\n")
    out.flush()
    if plot_error is not None:
        raise plot_error
    return 0
