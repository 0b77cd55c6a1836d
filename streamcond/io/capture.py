"""Raw serial captures: every line as received, with its host receive time.

``streamcond record`` writes them; ``streamcond replay`` recognises them by their first line and
feeds the raw lines through the same parser as the live daemon, with the recorded host times —
so a replay of a capture gives the events the live run published.

Format (text, one line per received line)::

    # streamcond capture v1
    1764612345.123456<TAB><the raw line, bytes as received, without the newline>

Times are seconds (host clock, as used by the live run), six decimals.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import BinaryIO

import numpy as np

from ..errors import InputError
from .lineparse import LineParser, Parsed

MAGIC = b"# streamcond capture v1"


def is_capture(path: str | Path) -> bool:
    """A capture: text with the capture's first line, or a Parquet/Arrow file written by
    ``record -o x.parquet`` or converted from a capture (it has the host time column)."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(len(MAGIC))
    except OSError:
        return False
    if head == MAGIC:
        return True
    from .filekind import kind_of_head

    kind = kind_of_head(head)
    if kind != "text":
        from ..errors import InputError
        from .columnar import has_host_time, is_columnar_capture

        try:
            return is_columnar_capture(path, kind) or has_host_time(path, kind)
        except InputError:
            return False
    return False


class CaptureWriter:
    """Appends received lines with their host times to a capture file."""

    def __init__(self, path: str | Path, append: bool = False) -> None:
        p = Path(path)
        fresh = not (append and p.exists() and p.stat().st_size)
        try:
            self.fh: BinaryIO = open(p, "ab" if append else "wb")
        except OSError as e:
            raise InputError(f"The capture file {str(p)!r} cannot be written: {e.strerror}") from None
        if fresh:
            self.fh.write(MAGIC + b"\n")
        self.lines = 0

    def write(self, lines: list[bytes], times: np.ndarray) -> None:
        self.fh.write(
            b"".join(b"%.6f\t%s\n" % (t, line) for t, line in zip(times.tolist(), lines))
        )
        self.lines += len(lines)

    def flush(self) -> None:
        self.fh.flush()

    def close(self) -> None:
        self.fh.flush()
        try:
            os.fsync(self.fh.fileno())
        except OSError:
            pass
        self.fh.close()


def split_capture(body: bytes) -> tuple[list[bytes], np.ndarray, int]:
    """Complete capture lines → (raw lines, host times, malformed count)."""
    lines: list[bytes] = []
    times: list[float] = []
    bad = 0
    for rec in body.split(b"\n"):
        if not rec or rec.startswith(b"#"):
            continue
        ts, sep, line = rec.partition(b"\t")
        try:
            t = float(ts)
        except ValueError:
            bad += 1
            continue
        if not sep or t != t:
            bad += 1
            continue
        lines.append(line)
        times.append(t)
    return lines, np.asarray(times, dtype=np.float64), bad


def read_capture_blocks(
    path: str | Path, parser: LineParser, host_time: bool, block_bytes: int = 1 << 22
) -> Iterator[tuple[Parsed, int, int]]:
    """Like :func:`streamcond.io.recording.read_blocks`, for a capture file.

    With ``host_time`` the rows carry the recorded host time as an extra last column; without
    it the lines are parsed as if they had been read from the device (time from the data).
    """
    from .recording import read_blocks

    class _Splitter:
        """Adapts the parser to the capture's "time<TAB>line" framing."""

        def __init__(self) -> None:
            self.tail = b""
            self.bad = 0

        def feed(self, data: bytes) -> Parsed:
            buf = self.tail + data
            cut = buf.rfind(b"\n")
            if cut < 0:
                self.tail = buf
                return parser.feed_lines([], np.empty(0)) if host_time else parser.feed(b"")
            body, self.tail = buf[: cut + 1], buf[cut + 1 :]
            return self._parse(body)

        def flush(self) -> Parsed:
            body, self.tail = self.tail, b""
            p = self._parse(body + b"\n") if body.strip() else (
                parser.feed_lines([], np.empty(0)) if host_time else parser.flush()
            )
            return p

        def _parse(self, body: bytes) -> Parsed:
            lines, times, bad = split_capture(body)
            if host_time:
                p = parser.feed_lines(lines, times)
            else:
                p = parser.feed(b"".join(line + b"\n" for line in lines))
            if bad:
                p.bad += bad
                parser.bad += bad
            return p

    yield from read_blocks(path, parser, block_bytes, feeder=_Splitter())
