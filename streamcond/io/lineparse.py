"""Bytes → rows: the line parser shared by file replay and the serial source.

Sans-I/O in the h11 style: :meth:`LineParser.feed` takes whatever bytes arrived and returns the
rows of the complete lines among them (a 2-D float64 array, one column per source column), the
partial last line is carried to the next call. Bad lines are skipped and counted, never fatal;
the first few are kept with their line numbers and reasons for the log.

The rules, the same on every path (README "Bad lines"):

* A line ends at LF; one CR just before the LF is dropped (CRLF). Any other CR is part of the
  line, so CR-only line ends make one long bad line.
* A line whose content (without LF and that CR) is longer than ``max_line_bytes`` is bad,
  whatever it holds and whatever its neighbours are; an unterminated one is counted once, as
  soon as it passes the limit, and the rest up to its newline is discarded.
* A line of only spaces and tabs is blank: not data, not bad.
* ``csv``: fields are separated by commas, spaces/tabs around a field are ignored. A field is
  a decimal number in ASCII: optional sign, digits with an optional point, optional exponent
  (``-1.5``, ``.5``, ``2.``, ``1e-3``); nothing else (no ``nan``, ``inf``, ``1_0``, hex,
  empty field). The number of fields must be the number of columns. The header line names the
  columns: ``columns`` from the config, or, without it, the first line that is text (UTF-8,
  printable, not all numbers). Number lines before that header are bad; a repeat of the header
  later (a board that resets) is skipped; a header naming other columns is a bad line.
* ``kv``: ``name=value`` pairs separated by spaces, commas or semicolons; the value follows the
  CSV number rule; a pair without ``=`` or a name given twice makes the line bad; a needed name
  missing makes it bad; other names are ignored.
* ``json``: one object per line; a needed member must be a JSON number (``true``, ``"0.9"`` or
  ``null`` are not); ``NaN``/``Infinity`` are refused, a number too large for a double
  (``1e999`` or a 400-digit integer) is bad, so are nesting past Python's recursion limit and
  a member name given twice.
* Every format: NaN or infinite values in a needed column make the line bad.

CSV speed: a block that passes a cheap screen (numeric bytes only, no bare CR, every line
within the limit — checked with whole-block byte operations) is handed to a C block reader
(:mod:`streamcond.io.fastcsv`: numpy's, or pyarrow's when installed); only a block that the
reader refuses, or that fails the screen, is taken apart line by line.
"""

from __future__ import annotations

import heapq
import json
import logging
import math
import re
from dataclasses import dataclass, field
from typing import Iterable

import numpy as np

from . import fastcsv, linetemplate

log = logging.getLogger(__name__)

#: Bytes that may appear in a numeric CSV block.
_CSV_BYTES = b"0123456789.-+eE, \t\r\n"
#: One CSV/kv number (bytes regex: ``\d`` is ASCII only).
_NUM_PAT = rb"[ \t]*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?[ \t]*"
_NUM = re.compile(_NUM_PAT)
_KV_SPLIT = re.compile(rb"[ \t,;]+")
#: Name of the extra last column holding host receive times (see :meth:`LineParser.feed_lines`).
HOST_T = "_host_t"
#: Bad-line examples kept per parser for messages.
MAX_EXAMPLES = 5
_BLANK = object()  # a line that is neither data nor bad
_DIGITS = frozenset(b"0123456789")


@dataclass
class Parsed:
    """Rows parsed from one feed: ``rows`` is (n, ncols) float64."""

    rows: np.ndarray
    bad: int = 0
    examples: list[str] = field(default_factory=list)
    #: line number (1-based, over the whole stream) of each row
    lines: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=np.int64))
    #: the block's last lines, left for the consumer to parse (see :class:`Share`)
    share: Share | None = None


@dataclass
class Share:
    """The last lines of a block, left unparsed by a reader process for its consumer, which
    would otherwise wait for it (:meth:`LineParser.absorb`). ``body`` is whole lines, the first
    of them line ``first_line``; the reader has counted them (every path counts a block's
    lines by its line ends), and nothing else about them."""

    body: np.ndarray  # uint8: crosses in a shared slot, not through the pipe
    first_line: int


@dataclass
class _Absorbed:
    """What a consumer's parser found in the parts a reader child left it (see absorb)."""

    seen: int  # examples of the child's taken so far
    bad: int = 0
    repeated_headers: int = 0


class _BadLine(Exception):
    pass


def _refuse_constant(name: str) -> float:
    raise _BadLine(f"{name} is not a number here")


def _unique_pairs(pairs: list[tuple[str, object]]) -> dict:
    out = dict(pairs)
    if len(out) != len(pairs):
        seen: set[str] = set()
        for k, _ in pairs:
            if k in seen:
                raise _BadLine(f"{k!r} given twice")
            seen.add(k)
    return out


_JSON = json.JSONDecoder(
    # a JSON integer goes straight to a double: a 400-digit one becomes inf (bad), never an
    # OverflowError, and the int() digit limit of Python 3.11 never applies
    parse_int=float,
    parse_constant=_refuse_constant,
    object_pairs_hook=_unique_pairs,
)


#: The members of a JSON line in order, numbers as the careful parser reads them (for
#: :func:`streamcond.io.linetemplate.json_template`).
_JSON_PAIRS = json.JSONDecoder(parse_int=float, object_pairs_hook=list)
#: Accepted kv/JSON lines not looked at for a template after a layout without one.
_RELEARN_AFTER = 1000


class LineParser:
    """Splits a byte stream into lines and parses them into numeric rows."""

    def __init__(
        self,
        fmt: str = "csv",
        columns: list[str] | None = None,
        needed: Iterable[str] = (),
        max_line_bytes: int | None = None,
        reader: str | None = None,
    ) -> None:
        if fmt not in ("csv", "kv", "json"):
            raise ValueError(f"unknown line format {fmt!r}")
        self.fmt = fmt
        self.needed = list(dict.fromkeys(needed))
        self.max_line = max_line_bytes
        self.reader = fastcsv.choose(reader) if fmt == "csv" else "python"
        self._given_columns = list(columns) if columns else None
        if fmt == "csv":
            self.columns: list[str] | None = self._given_columns
        else:
            self.columns = self.needed or self._given_columns
        self._block_reader = None
        self._line_re: re.Pattern[bytes] | None = None  # a whole numeric CSV line of ncols
        self._template: linetemplate.Template | None = None  # kv/json: the last line's layout
        self._learn_wait = 0
        self._tail = b""
        self._skip_tail = False  # inside an over-long line: drop until its end
        self.lines = 0  # lines seen (for line numbers in messages)
        self.bad = 0
        #: number lines seen while no header had named the columns (csv without ``columns``)
        self.before_header = 0
        #: header lines skipped after the first (a device that restarts and prints it again)
        self.repeated_headers = 0
        self.examples: list[str] = []
        self._pending: list[tuple[int, str]] = []  # (line, why) until settle
        self.header_line: str | None = None
        #: Reading in a child process for a consumer that would wait for it (the replay sets
        #: it where the numpy reader is slower than the conditioning): the child may leave the
        #: last part of a CSV block to the consumer. ``share_of`` (set in the child) gives the
        #: fraction of each block to leave, from the measured costs of both sides.
        self.sharing = False
        self.share_of = None
        self.left = 0  # child side: lines left to the consumer
        self._absorbed: _Absorbed | None = None  # consumer side, once a share came

    # -- public -----------------------------------------------------------------------------
    def feed(self, data: bytes) -> Parsed:
        """Parse the complete lines in ``self._tail + data``."""
        if self._skip_tail:
            # the rest of an over-long line (already counted): discard up to its newline
            nl = data.find(b"\n")
            if nl < 0:
                return self._empty()
            data = data[nl + 1 :]
            self._skip_tail = False
        tail = self._tail  # never holds a newline: the rest after the last one
        cut = data.rfind(b"\n")
        if cut < 0:
            self._tail = tail + data
            return self.settle(self._check_tail())
        if tail or cut + 1 < len(data):
            # one copy of the block (tail + data[:cut + 1] would make two)
            body = b"".join((tail, memoryview(data)[: cut + 1]))
        else:
            body = data
        self._tail = data[cut + 1 :]
        share = self._share_point(body)
        if share is None:
            out = self._parse_block(body)
        else:
            out = self._parse_block(body[:share])
            rest = np.frombuffer(body, np.uint8, offset=share)
            out.share = Share(rest, self.lines + 1)
            n_left = body.count(b"\n", share)
            self.lines += n_left
            self.left += n_left
        extra = self._check_tail()
        out.bad += extra.bad
        return self.settle(out)

    def feed_lines(self, lines: list[bytes], times: np.ndarray) -> Parsed:
        """Parse complete lines (already split and length-checked, e.g. by the serial framer)
        and append each row's host receive time from ``times`` as a last column."""
        first = self.lines + 1
        if not lines:
            return self._with_times(self._empty(), times, first)
        body = b"\n".join(lines) + b"\n"
        parsed = self.settle(self._parse_block(body))
        return self._with_times(parsed, np.asarray(times, np.float64), first)

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
        if self._skip_tail or not tail.strip(b" \t\r"):
            self._skip_tail = False
            return self._empty()
        return self.settle(self._parse_block(tail + b"\n"))

    @property
    def ncols(self) -> int:
        return len(self.columns) if self.columns else 0

    # -- internals --------------------------------------------------------------------------
    def _empty(self) -> Parsed:
        return Parsed(np.empty((0, self.ncols)))

    def _note_bad(self, parsed: Parsed, lineno: int, why: str) -> None:
        parsed.bad += 1
        self.bad += 1
        self._pend(lineno, why)

    def _pend(self, lineno: int, why: str) -> None:
        """A bad line's message, kept until :meth:`settle` while fewer than MAX_EXAMPLES are
        kept (the paths of a block find their bad lines in different orders)."""
        if len(self.examples) < MAX_EXAMPLES:
            self._pending.append((lineno, why))
            if len(self._pending) > 8 * MAX_EXAMPLES:  # only the first ones can be kept
                self._pending = heapq.nsmallest(MAX_EXAMPLES, self._pending)

    def settle(self, parsed: Parsed) -> Parsed:
        """The messages of what was just parsed into ``parsed``: in the order of the lines, the
        first of them up to MAX_EXAMPLES in all — whichever path found them first, and however
        the stream was cut into blocks."""
        if not self._pending:
            parsed.examples = []
            return parsed
        self._pending.sort()
        room = MAX_EXAMPLES - len(self.examples)
        msgs = [f"line {n}: {why}" for n, why in self._pending[: max(room, 0)]]
        self._pending = []
        self.examples += msgs
        parsed.examples = msgs
        return parsed

    def _too_long(self, n: int) -> bool:
        return self.max_line is not None and n > self.max_line

    @property
    def absorbed(self) -> bool:
        """Consumer side: did a reader child leave this parser parts of the stream?"""
        return self._absorbed is not None

    def _share_point(self, body: bytes) -> int | None:
        """Where the part of ``body`` left to the consumer starts (after a line end), or None:
        only in a reader child asked to share (:attr:`share_of`), for CSV once the header has
        come (a header line in the left part could then only be a repeat or a bad line,
        which the consumer counts), and never beside an over-long unterminated tail (its
        message must follow the block's)."""
        if self.share_of is None or self.fmt != "csv" or self.header_line is None:
            return None
        if self._tail_too_long():
            return None
        f = self.share_of(len(body))
        if not f > 0:
            return None
        nl = body.rfind(b"\n", 0, len(body) - int(len(body) * min(f, 1.0)))
        return nl + 1 if 0 <= nl < len(body) - 1 else None

    def absorb(self, item: object, state: dict) -> None:
        """Consumer side of a reader child: take the child's parser state after ``item``, and
        parse the part of the block the child left (:class:`Share`), so that the rows, the
        counts and the examples are those of one parser reading the whole stream. The child
        does not know what the left parts held, so from the first one on, their bad lines and
        repeated headers are added to its counts here, and the examples are merged in the
        order of the lines (the child's of this item, then the left part's), up to
        :data:`MAX_EXAMPLES`."""
        parsed = item[0] if isinstance(item, tuple) and item and isinstance(item[0], Parsed) else None
        share = parsed.share if parsed is not None else None
        ab = self._absorbed
        if share is None and ab is None:
            for k, v in state.items():
                setattr(self, k, v)
            return
        if ab is None:  # the first share: the counts so far are the child's own
            ab = self._absorbed = _Absorbed(seen=len(self.examples))
        keep = self._take_corrected(state, ab)
        if parsed is not None:
            parsed.examples = keep
        if share is not None:
            assert parsed is not None
            self._parse_share(parsed, share, ab)

    def _take_corrected(self, state: dict, ab: _Absorbed) -> list[str]:
        """The child's state plus what the left parts held; returns the child's examples of
        this item that are within the limit, after those kept before."""
        new = state["examples"][ab.seen :]
        ab.seen = len(state["examples"])
        keep = new[: MAX_EXAMPLES - len(self.examples)]
        for k, v in state.items():
            if k != "examples":
                setattr(self, k, v)
        self.examples = self.examples + keep
        self.bad = state["bad"] + ab.bad
        self.repeated_headers = state["repeated_headers"] + ab.repeated_headers
        return list(keep)

    def _parse_share(self, parsed: Parsed, share: Share, ab: _Absorbed) -> None:
        """Parse a left part as this parser would have at its first line, into ``parsed``."""
        lines_after, bad0, rep0 = self.lines, self.bad, self.repeated_headers
        self.lines = share.first_line - 1
        part = self.settle(self._parse_block(bytes(share.body)))
        self.lines = lines_after
        ab.bad += self.bad - bad0
        ab.repeated_headers += self.repeated_headers - rep0
        parsed.share = None
        if part.rows.shape[0]:
            parsed.rows = np.concatenate((parsed.rows.reshape(-1, part.rows.shape[1]), part.rows))
            parsed.lines = np.concatenate((parsed.lines, part.lines))
        parsed.bad += part.bad
        parsed.examples += part.examples

    def _tail_too_long(self) -> bool:
        t = self._tail
        return self.max_line is not None and len(t) > self.max_line and not (
            len(t) == self.max_line + 1 and t.endswith(b"\r")
        )

    def _check_tail(self) -> Parsed:
        """An unterminated line longer than the limit is dropped (and counted) right away.
        A last byte CR may still be the CR of a CRLF, which does not count."""
        if self._tail_too_long():
            p = self._empty()
            self.lines += 1
            self._note_bad(p, self.lines, f"longer than {self.max_line} bytes, dropped")
            self._tail = b""
            self._skip_tail = True
            return p
        return self._empty()

    def _parse_block(self, body: bytes) -> Parsed:
        if self.fmt != "csv":
            return self._parse_records(body)
        out = self._empty()
        if self.columns is None:
            body = self._until_header(body, out)
            if not body:
                out.rows = np.empty((0, self.ncols))  # the header may have set the columns
                return out
        res = self._parse_csv(body)
        res.bad += out.bad
        return res

    # -- csv ---------------------------------------------------------------------------------
    def _header_names(self, content: bytes) -> list[str] | None:
        """The column names if ``content`` is a header line (text, not all numbers)."""
        try:
            text = content.decode("utf-8").strip().lstrip("\ufeff").strip()
        except UnicodeDecodeError:
            return None
        if not text or not text.isprintable():
            return None
        names = [c.strip() for c in text.split(",")]
        if any(not n or _NUM.fullmatch(n.encode()) for n in names):
            return None  # a header names every column; a number is not a name
        return names

    def _until_header(self, body: bytes, out: Parsed) -> bytes:
        """No columns yet: look for the header line; number lines before it are bad."""
        pos = 0
        while pos < len(body):
            nl = body.index(b"\n", pos)
            raw, pos = body[pos:nl], nl + 1
            self.lines += 1
            content = raw[:-1] if raw.endswith(b"\r") else raw
            if self._too_long(len(content)):
                self._note_bad(out, self.lines, f"longer than {self.max_line} bytes, dropped")
                continue
            if not content.strip(b" \t"):
                continue
            names = self._header_names(content)
            if names is None:
                self.before_header += 1
                self._note_bad(out, self.lines, "data before the header line naming the "
                               "columns (or set source.columns)")
                continue
            self.columns = names
            self.header_line = ",".join(names)
            return body[pos:]
        return b""

    def _screen(self, body: bytes) -> int | None:
        """May the whole block go to a C block reader? Numeric bytes only, CR only in CRLF,
        every line within the limit (vectorised: line lengths from the LF positions). Returns
        the number of lines, or None for the careful path."""
        if body.translate(None, _CSV_BYTES):
            return None
        ncr = body.count(b"\r") if b"\r" in body else 0
        if ncr and ncr != body.count(b"\r\n"):
            return None
        if self.max_line is not None and len(body) > self.max_line:
            nl = np.flatnonzero(np.frombuffer(body, np.uint8) == 10)
            lens = np.diff(nl, prepend=-1) - 1
            if ncr:
                lens -= np.frombuffer(body, np.uint8)[np.maximum(nl - 1, 0)] == 13
            if lens.size and int(lens.max()) > self.max_line:
                return None
            return int(nl.size)  # the LF positions count the lines: no second pass
        return body.count(b"\n")

    def _read_block(self, block: bytes) -> np.ndarray | None:
        if self._block_reader is None:
            self._block_reader = fastcsv.block_reader(self.reader, self.ncols)
        return self._block_reader(block, self.ncols)

    def _parse_csv(self, body: bytes) -> Parsed:
        first_line = self.lines + 1
        nlines = self._screen(body)
        if nlines is not None:
            # the reader skips blank lines; any difference in the row count sends the block
            # to the careful path below, which sorts the lines out
            rows = self._read_block(body)
            if rows is not None and rows.shape[0] == nlines:
                self.lines += nlines
                return self._finite_rows(rows, np.arange(first_line, first_line + nlines))
        return self._parse_csv_lines(body.split(b"\n")[:-1], first_line)

    def _parse_csv_lines(self, lines: list[bytes], first_line: int) -> Parsed:
        """The careful path: a line that is ``ncols`` numbers by the rule (one regular
        expression) is parsed together with the others by the block reader; every other line is
        judged by :meth:`_csv_line`. (Halving a refused block with the C reader until the bad
        lines are isolated was measured 5x slower on the fuzzed file: a reader call per step.)"""
        out = self._empty()
        ncols = self.ncols
        if self._line_re is None:
            self._line_re = re.compile(_NUM_PAT + (b"," + _NUM_PAT) * (ncols - 1))
        whole = self._line_re.fullmatch
        good: list[bytes] = []
        good_no: list[int] = []
        single: list[list[float]] = []
        single_no: list[int] = []
        for k, raw in enumerate(lines):
            no = first_line + k
            content = raw[:-1] if raw.endswith(b"\r") else raw
            if not self._too_long(len(content)) and whole(content):
                good.append(content)
                good_no.append(no)
                continue
            row = self._csv_line(content, no, out)
            if row is not None:
                single.append(row)
                single_no.append(no)
        self.lines = first_line + len(lines) - 1
        parts_r: list[np.ndarray] = []
        parts_n: list[np.ndarray] = []
        if good:
            r, n = self._parse_good(good, good_no, out)
            parts_r.append(r)
            parts_n.append(n)
        if single:
            parts_r.append(np.asarray(single, np.float64).reshape(-1, ncols))
            parts_n.append(np.asarray(single_no, np.int64))
        if not parts_r:
            return out
        rows = np.concatenate(parts_r) if len(parts_r) > 1 else parts_r[0]
        nums = np.concatenate(parts_n) if len(parts_n) > 1 else parts_n[0]
        if len(parts_r) > 1:
            order = np.argsort(nums, kind="stable")
            rows, nums = rows[order], nums[order]
        res = self._finite_rows(rows, nums)
        res.bad += out.bad
        return res

    def _parse_good(
        self, lines: list[bytes], numbers: list[int], out: Parsed
    ) -> tuple[np.ndarray, np.ndarray]:
        """Parse screened lines; a failing group is halved until the bad lines are isolated,
        and a single failing line is judged by :meth:`_csv_line`."""
        ncols = self.ncols
        rows = self._read_block(b"\n".join(lines) + b"\n")
        if rows is not None and rows.shape[0] == len(lines):
            return rows, np.asarray(numbers, np.int64)
        if len(lines) == 1:
            row = self._csv_line(lines[0], numbers[0], out)
            if row is None:
                return np.empty((0, ncols)), np.empty(0, np.int64)
            return np.asarray([row], np.float64), np.asarray(numbers, np.int64)
        h = len(lines) // 2
        r1, n1 = self._parse_good(lines[:h], numbers[:h], out)
        r2, n2 = self._parse_good(lines[h:], numbers[h:], out)
        return np.concatenate((r1, r2)), np.concatenate((n1, n2))

    def _csv_line(self, content: bytes, no: int, out: Parsed) -> list[float] | None:
        """One CSV line by the rules in the module docstring (the reference every faster path
        must agree with). Returns the row, or None for a blank, header or bad line."""
        if self._too_long(len(content)):
            self._note_bad(out, no, f"longer than {self.max_line} bytes, dropped")
            return None
        if not content.strip(b" \t"):
            return None
        fields = content.split(b",")
        if all(_NUM.fullmatch(f) for f in fields):
            if len(fields) != self.ncols:
                self._note_bad(out, no, f"{len(fields)} fields, expected {self.ncols}")
                return None
            return [float(f) for f in fields]
        names = self._header_names(content)
        if names is not None:
            if names == self.columns:
                if self.header_line is None:
                    self.header_line = ",".join(names)
                else:
                    self.repeated_headers += 1
                return None
            if self.header_line is None and self._given_columns is None:
                pass  # unreachable: without columns the header was taken by _until_header
            self._note_bad(out, no, "a header line naming other columns")
            return None
        self._note_bad(out, no, "not numeric (or binary junk)")
        return None

    def _finite_rows(self, rows: np.ndarray, numbers: np.ndarray) -> Parsed:
        """Rows with a NaN or infinite number in a needed column are bad."""
        assert self.columns is not None
        numbers = np.asarray(numbers, dtype=np.int64)
        if np.isfinite(rows).all():
            # the common case, in one pass without copies (measured 0.16 ms a 4 MiB block,
            # against 1.0 ms for the needed columns' copy and the per-row test below)
            return Parsed(rows, lines=numbers)
        cols = [self.columns.index(c) for c in self.needed if c in self.columns]
        sub = rows[:, cols] if cols else rows
        fin = np.isfinite(sub).all(axis=1)
        if fin.all():
            return Parsed(rows, lines=numbers)
        out = Parsed(rows[fin], lines=numbers[fin])
        for no in numbers[~fin][:MAX_EXAMPLES].tolist():
            self._pend(no, "NaN or infinite number")
        nbad = int((~fin).sum())
        out.bad += nbad
        self.bad += nbad
        return out

    # -- kv and json ------------------------------------------------------------------------
    def _parse_records(self, body: bytes) -> Parsed:
        """``kv`` and ``json`` lines: a Python parse per line, through the last line's template
        where it matches (:mod:`streamcond.io.linetemplate`)."""
        cols = self.columns or []
        out = self._empty()
        rows: list[list[float]] = []
        numbers: list[int] = []
        kv = self.fmt == "kv"
        tmpl = self._template
        for raw in body.split(b"\n")[:-1]:
            self.lines += 1
            content = raw[:-1] if raw.endswith(b"\r") else raw
            if self._too_long(len(content)):
                self._note_bad(out, self.lines, f"longer than {self.max_line} bytes, dropped")
                continue
            s = content.strip(b" \t")
            if not s:
                continue
            if tmpl is not None:
                # the layout of an earlier line (streamcond.io.linetemplate): the same values
                # the careful parser would take, at half its cost
                m = tmpl[0](s)
                if m is not None:
                    g = m.groups()
                    row = [float(g[i - 1]) for i in tmpl[1]]
                    if all(math.isfinite(v) for v in row):
                        rows.append(row)
                        numbers.append(self.lines)
                        continue
            try:
                row = _kv_row(s, cols) if kv else _json_row(s, cols)
            except _BadLine as e:
                self._note_bad(out, self.lines, str(e))
                continue
            tmpl = self._learn(s, cols, kv) or tmpl
            if not all(math.isfinite(v) for v in row):
                self._note_bad(out, self.lines, "NaN or infinite number")
                continue
            rows.append(row)
            numbers.append(self.lines)
        self._template = tmpl
        arr = np.array(rows, dtype=np.float64).reshape(len(rows), len(cols))
        return Parsed(arr, out.bad, lines=np.asarray(numbers, dtype=np.int64))

    def _learn(self, s: bytes, cols: list[str], kv: bool) -> linetemplate.Template | None:
        """The template of a line the careful parser accepted and the template (if any)
        missed; after a layout without one (a JSON member that is not a number), the next
        :data:`_RELEARN_AFTER` accepted lines are not looked at."""
        if self._learn_wait:
            self._learn_wait -= 1
            return None
        if kv:
            found = linetemplate.kv_template(s, cols)
        else:
            found = linetemplate.json_template(_JSON_PAIRS.decode(s.decode("utf-8")), cols)
        if found is None:
            self._learn_wait = _RELEARN_AFTER
        return found


def _kv_row(s: bytes, cols: list[str]) -> list[float]:
    rec: dict[bytes, bytes] = {}
    for part in _KV_SPLIT.split(s):
        if not part:
            continue
        k, sep, v = part.partition(b"=")
        if not sep or not k:
            raise _BadLine(f"{part[:40]!r} is not name=value")
        if k in rec:
            raise _BadLine(f"{k.decode('utf-8', 'replace')!r} given twice")
        rec[k] = v
    row = []
    for c in cols:
        v = rec.get(c.encode())
        if v is None:
            raise _BadLine(f"no value for {c!r}")
        if not _NUM.fullmatch(v):
            raise _BadLine(f"{c!r} is not a number")
        row.append(float(v))
    return row


def _json_row(s: bytes, cols: list[str]) -> list[float]:
    try:
        text = s.decode("utf-8")
    except UnicodeDecodeError:
        raise _BadLine("not UTF-8") from None
    try:
        obj = _JSON.decode(text)
    except _BadLine:
        raise
    except RecursionError:
        raise _BadLine("nested too deeply") from None
    except (ValueError, OverflowError):
        raise _BadLine("not JSON") from None
    if not isinstance(obj, dict):
        raise _BadLine("not a JSON object")
    row = []
    for c in cols:
        if c not in obj:
            raise _BadLine(f"no value for {c!r}")
        v = obj[c]
        if type(v) is not float:  # parse_int made every JSON integer a float; bool is not
            raise _BadLine(f"{c!r} is not a number")
        row.append(v)
    return row
