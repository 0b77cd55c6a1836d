"""Bytes → rows: the line parser shared by file replay and the serial source.

Sans-I/O in the h11 style: :meth:`LineParser.feed` takes whatever bytes arrived and returns the
rows of the complete lines among them (a 2-D float64 array, one column per source column), the
partial last line is carried to the next call. Bad lines — non-numeric fields, a wrong field
count, NaN or infinite numbers, binary junk, over-long lines — are skipped and counted, never
fatal; the first few are kept with their line numbers and reasons for the log.

Formats (DESIGN.md ``source.format``):

* ``csv`` — comma-separated numbers, with a header line naming the columns or ``columns`` from
  the config. Parsed a block at a time with :func:`numpy.loadtxt` (C code, not a Python loop per
  field); only a block that numpy refuses (or whose row count does not match its line count)
  is taken apart line by line.
* ``kv`` — ``name=value`` pairs separated by spaces or commas.
* ``json`` — one JSON object per line.

For ``kv`` and ``json`` the columns are the ones the config needs (time column and channel
columns); a line lacking one of them is bad.
"""

from __future__ import annotations

import io
import json
import logging
import math
import re
import warnings
from dataclasses import dataclass, field
from typing import Iterable

import numpy as np

log = logging.getLogger(__name__)

#: Bytes that may appear in a numeric CSV block.
_CSV_BYTES = b"0123456789.-+eE, \t\r\n"
_KV_SPLIT = re.compile(r"[\s,;]+")
#: Name of the extra last column holding host receive times (see :meth:`LineParser.feed_lines`).
HOST_T = "_host_t"
#: Bad-line examples kept per parser for messages.
MAX_EXAMPLES = 5


@dataclass
class Parsed:
    """Rows parsed from one feed: ``rows`` is (n, ncols) float64."""

    rows: np.ndarray
    bad: int = 0
    examples: list[str] = field(default_factory=list)
    #: line number (1-based, over the whole stream) of each row
    lines: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=np.int64))


class LineParser:
    """Splits a byte stream into lines and parses them into numeric rows."""

    def __init__(
        self,
        fmt: str = "csv",
        columns: list[str] | None = None,
        needed: Iterable[str] = (),
        max_line_bytes: int | None = None,
    ) -> None:
        if fmt not in ("csv", "kv", "json"):
            raise ValueError(f"unknown line format {fmt!r}")
        self.fmt = fmt
        self.needed = list(dict.fromkeys(needed))
        self.max_line = max_line_bytes
        self._given_columns = list(columns) if columns else None
        if fmt == "csv":
            self.columns: list[str] | None = self._given_columns
            self._header_pending = True
        else:
            self.columns = self.needed or self._given_columns
            self._header_pending = False
        self._tail = b""
        self._skip_tail = False  # inside an over-long line: drop until its end
        self.lines = 0  # lines seen (for line numbers in messages)
        self.bad = 0
        self.examples: list[str] = []
        self.header_line: str | None = None

    # -- public -----------------------------------------------------------------------------
    def feed(self, data: bytes) -> Parsed:
        """Parse the complete lines in ``self._tail + data``."""
        buf = self._tail + data if self._tail else data
        cut = buf.rfind(b"\n")
        if cut < 0:
            self._tail = buf
            return self._check_tail()
        body, self._tail = buf[: cut + 1], buf[cut + 1 :]
        if self._skip_tail:
            # the rest of an over-long line ends here
            nl = body.find(b"\n")
            body = body[nl + 1 :]
            self._skip_tail = False
        out = self._parse_block(body)
        extra = self._check_tail()
        if extra.bad:
            out.bad += extra.bad
            out.examples += extra.examples
        return out

    def feed_lines(self, lines: list[bytes], times: np.ndarray) -> Parsed:
        """Parse complete lines (already split and length-checked, e.g. by the serial framer)
        and append each row's host receive time from ``times`` as a last column."""
        first = self.lines + 1
        if not lines:
            return self._with_times(self._empty(), times, first)
        body = b"\n".join(lines) + b"\n"
        return self._with_times(self._parse_block(body), np.asarray(times, np.float64), first)

    def _with_times(self, p: Parsed, times: np.ndarray, first: int) -> Parsed:
        t = times[p.lines - first] if p.lines.size else np.empty(0)
        rows = p.rows if p.rows.size or self.columns is None else p.rows.reshape(-1, self.ncols)
        if rows.shape[0] == 0:
            rows = np.empty((0, self.ncols))
        p.rows = np.column_stack((rows, t)) if rows.shape[0] else np.empty((0, self.ncols + 1))
        return p

    def flush(self) -> Parsed:
        """End of stream: parse a last line that had no newline."""
        tail, self._tail = self._tail, b""
        if self._skip_tail or not tail.strip():
            self._skip_tail = False
            return self._empty()
        return self._parse_block(tail + b"\n")

    @property
    def ncols(self) -> int:
        return len(self.columns) if self.columns else 0

    # -- internals --------------------------------------------------------------------------
    def _empty(self) -> Parsed:
        return Parsed(np.empty((0, self.ncols)))

    def _note_bad(self, parsed: Parsed, lineno: int, why: str) -> None:
        parsed.bad += 1
        self.bad += 1
        if len(self.examples) < MAX_EXAMPLES:
            msg = f"line {lineno}: {why}"
            self.examples.append(msg)
            parsed.examples.append(msg)

    def _check_tail(self) -> Parsed:
        """An unterminated line longer than the limit is dropped (and counted) right away."""
        if self.max_line is not None and len(self._tail) > self.max_line:
            p = self._empty()
            self.lines += 1
            self._note_bad(p, self.lines, f"longer than {self.max_line} bytes, dropped")
            self._tail = b""
            self._skip_tail = True
            return p
        return self._empty()

    def _take_header(self, body: bytes) -> bytes:
        """Consume the header line (csv) from the front of ``body``; returns the rest."""
        while self._header_pending and body:
            nl = body.find(b"\n")
            line, body = body[:nl], body[nl + 1 :]
            self.lines += 1
            text = line.decode("utf-8", "replace").strip().lstrip("\ufeff")
            if not text:
                continue
            names = [c.strip() for c in text.split(",")]
            looks_numeric = all(_is_number(c) for c in names)
            self._header_pending = False
            if self.columns is None:
                if looks_numeric:
                    from ..errors import InputError

                    raise InputError(
                        "The recording has no header line naming its columns; "
                        "set source.columns in the config"
                    )
                self.columns = names
                self.header_line = text
            elif names == self.columns:
                self.header_line = text
            else:
                # no header in the data: this line is data
                body = line + b"\n" + body
                self.lines -= 1
        return body

    def _parse_block(self, body: bytes) -> Parsed:
        if self.fmt == "csv":
            body = self._take_header(body)
            if not body:
                return self._empty()
            return self._parse_csv(body)
        return self._parse_records(body)

    def _parse_csv(self, body: bytes) -> Parsed:
        ncols = self.ncols
        nlines = body.count(b"\n")
        first_line = self.lines + 1
        long_ok = self.max_line is None or nlines * (self.max_line + 1) >= len(body)
        if long_ok:
            # numpy's parser refuses a block with any malformed line (a non-number, a wrong
            # field count) and skips blank lines; either way the row count tells, and the
            # careful path below sorts the lines out.
            rows = _loadtxt(body, ncols)
            if rows is not None and rows.shape[0] == nlines:
                self.lines += nlines
                return self._finite_rows(rows, np.arange(first_line, first_line + nlines))
        return self._parse_csv_lines(body.split(b"\n")[:-1], first_line)

    def _parse_csv_lines(self, lines: list[bytes], first_line: int) -> Parsed:
        """The careful path: screen every line, then parse the good ones together."""
        out = self._empty()
        ncols = self.ncols
        good: list[bytes] = []
        good_no: list[int] = []
        for k, line in enumerate(lines):
            no = first_line + k
            s = line.strip()
            if not s:
                continue
            if self.max_line is not None and len(line) > self.max_line:
                self._note_bad(out, no, f"longer than {self.max_line} bytes, dropped")
            elif s.translate(None, _CSV_BYTES):
                self._note_bad(out, no, "not numeric (or binary junk)")
            elif s.count(b",") != ncols - 1:
                self._note_bad(out, no, f"{s.count(b',') + 1} fields, expected {ncols}")
            else:
                good.append(s)
                good_no.append(no)
        self.lines = first_line + len(lines) - 1
        if not good:
            return out
        rows, ok_no = self._parse_good(good, good_no, out)
        res = self._finite_rows(rows, ok_no)
        res.bad += out.bad
        res.examples = out.examples + res.examples
        return res

    def _parse_good(
        self, lines: list[bytes], numbers: list[int], out: Parsed
    ) -> tuple[np.ndarray, np.ndarray]:
        """Parse screened lines; a failing group is halved until the bad lines are isolated."""
        ncols = self.ncols
        rows = _loadtxt(b"\n".join(lines) + b"\n", ncols)
        if rows is not None and rows.shape[0] == len(lines):
            return rows, np.asarray(numbers)
        if len(lines) == 1:
            self._note_bad(out, numbers[0], "a field is not a number")
            return np.empty((0, ncols)), np.empty(0, np.int64)
        h = len(lines) // 2
        r1, n1 = self._parse_good(lines[:h], numbers[:h], out)
        r2, n2 = self._parse_good(lines[h:], numbers[h:], out)
        return np.concatenate((r1, r2)), np.concatenate((n1, n2))

    def _finite_rows(self, rows: np.ndarray, numbers: np.ndarray) -> Parsed:
        """Rows with a NaN or infinite number in a needed column are bad."""
        cols = [self.columns.index(c) for c in self.needed if c in self.columns]
        sub = rows[:, cols] if cols else rows
        fin = np.isfinite(sub).all(axis=1)
        numbers = np.asarray(numbers, dtype=np.int64)
        if fin.all():
            return Parsed(rows, lines=numbers)
        out = Parsed(rows[fin], lines=numbers[fin])
        for no in numbers[~fin][: MAX_EXAMPLES + 1].tolist():
            if len(self.examples) < MAX_EXAMPLES:
                msg = f"line {no}: NaN or infinite number"
                self.examples.append(msg)
                out.examples.append(msg)
        nbad = int((~fin).sum())
        out.bad += nbad
        self.bad += nbad
        return out

    def _parse_records(self, body: bytes) -> Parsed:
        """``kv`` and ``json`` lines: a Python parse per line (these come at serial rates)."""
        cols = self.columns or []
        out = self._empty()
        rows: list[list[float]] = []
        numbers: list[int] = []
        for line in body.split(b"\n")[:-1]:
            self.lines += 1
            s = line.strip()
            if not s:
                continue
            if self.max_line is not None and len(line) > self.max_line:
                self._note_bad(out, self.lines, f"longer than {self.max_line} bytes, dropped")
                continue
            try:
                text = s.decode("utf-8")
                rec = _kv(text) if self.fmt == "kv" else _json_obj(text)
                row = [float(rec[c]) for c in cols]
            except KeyError as e:
                self._note_bad(out, self.lines, f"no value for {e.args[0]!r}")
                continue
            except (ValueError, TypeError, UnicodeDecodeError):
                self._note_bad(out, self.lines, "not parseable")
                continue
            if not all(math.isfinite(v) for v in row):
                self._note_bad(out, self.lines, "NaN or infinite number")
                continue
            rows.append(row)
            numbers.append(self.lines)
        arr = np.array(rows, dtype=np.float64).reshape(len(rows), len(cols))
        return Parsed(arr, out.bad, out.examples, np.asarray(numbers, dtype=np.int64))


def _loadtxt(block: bytes, ncols: int) -> np.ndarray | None:
    """numpy's C parser on a block of lines; None when any line does not parse."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rows = np.loadtxt(
                io.BytesIO(block), delimiter=",", dtype=np.float64, ndmin=2, comments=None
            )
    except ValueError:
        return None
    if rows.shape[1] != ncols:
        return None
    return rows


def _is_number(s: str) -> bool:
    try:
        float(s)
    except ValueError:
        return False
    return True


def _kv(text: str) -> dict[str, str]:
    out: dict[str, str] = {}
    for part in _KV_SPLIT.split(text):
        if not part:
            continue
        k, sep, v = part.partition("=")
        if not sep:
            raise ValueError(part)
        out[k.strip()] = v.strip()
    return out


def _json_obj(text: str) -> dict:
    obj = json.loads(text)
    if not isinstance(obj, dict):
        raise ValueError("not an object")
    return obj
