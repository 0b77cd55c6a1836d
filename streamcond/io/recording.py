"""Reading a recording file in bounded blocks.

Memory stays bounded by ``block_bytes`` (plus the parsed rows of one block), whatever the file
size: the file is read a block at a time and every block goes through the same
:class:`~streamcond.io.lineparse.LineParser` the serial source uses. A capture made by
``streamcond record`` is an ordinary recording whose first column is the host receive time;
Parquet and Arrow IPC recordings are read by :mod:`streamcond.io.columnar`.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

from ..errors import InputError
from .filekind import HEAD_BYTES, kind_of_head
from .lineparse import LineParser, Parsed

DEFAULT_BLOCK_BYTES = 1 << 22
#: The first block is at most this large, so that conditioning starts after a short parse
#: while a reader process or thread reads on (the records do not depend on block sizes).
FIRST_BLOCK_BYTES = 1 << 18
#: How much of a file's start is looked at to tell text from binary.
SNIFF_BYTES = 1 << 16


def _open(p: Path):
    try:
        size = os.path.getsize(p)
        fh = open(p, "rb")
    except FileNotFoundError:
        raise InputError(f"The recording {str(p)!r} does not exist") from None
    except IsADirectoryError:
        raise InputError(f"The recording {str(p)!r} is a directory, not a file") from None
    except OSError as e:
        raise InputError(f"The recording {str(p)!r} cannot be read: {e.strerror}") from None
    return size, fh


def kind_of(path: str | Path) -> str:
    """``"parquet"``, ``"arrow"`` or ``"text"``, from the file's first bytes."""
    size, fh = _open(Path(path))
    with fh:
        return kind_of_head(fh.read(HEAD_BYTES))


def looks_binary(head: bytes) -> bool:
    """Binary, not text: NUL bytes or other C0 control bytes (not tab, LF, CR, FF, VT) make
    more than 5 % of the file's start. Random or compressed bytes have about 11 % of them
    (28 of 256 values); text none (threshold: common practice, no published source — the
    same idea as a NUL test in the first block, with room for a few junk lines)."""
    if not head:
        return False
    ctrl = head.translate(None, bytes(range(32, 256)) + b"\t\n\r\x0b\x0c")
    return len(ctrl) > 0.05 * len(head)


def no_data(path: str | Path) -> InputError:
    return InputError(f"The recording {str(path)!r} holds no data lines")


def read_blocks(
    path: str | Path, parser: LineParser, block_bytes: int = DEFAULT_BLOCK_BYTES,
    feeder=None,
) -> Iterator[tuple[Parsed, int, int]]:
    """Yield ``(parsed rows, bytes read so far, file size)`` per block of the file.

    A file that is binary, empty, or holds only a header (no data and no bad lines) is an
    :class:`InputError` — empty and header-only files are treated alike; so is a CSV without
    ``columns`` in which no header line ever came. ``feeder`` (default: the parser) takes the
    bytes, for framings such as the capture's.
    """
    feeder = feeder if feeder is not None else parser
    p = Path(path)
    size, fh = _open(p)
    done = 0
    rows = 0
    with fh:
        want = min(block_bytes, FIRST_BLOCK_BYTES)
        while True:
            try:
                data = fh.read(want)
                want = block_bytes
            except OSError as e:
                raise InputError(f"Reading {str(p)!r} failed: {e.strerror}") from None
            if not data:
                break
            if done == 0:
                if kind_of_head(data) != "text":
                    raise InputError(f"The recording {str(p)!r} is a columnar file; "
                                     "this reader takes text lines")
                if looks_binary(data[:SNIFF_BYTES]):
                    raise InputError(f"The recording {str(p)!r} is not a text recording "
                                     "(CSV, kv or JSON lines, or a capture of `streamcond record`)")
            done += len(data)
            parsed = feeder.feed(data)
            rows += parsed.rows.shape[0]
            yield parsed, done, size
    parsed = feeder.flush()
    rows += parsed.rows.shape[0]
    check_end(p, parser, rows)
    yield parsed, done, size


def check_end(path: Path, parser: LineParser, rows: int) -> None:
    """The end-of-file verdicts shared by the text and capture readers."""
    if parser.fmt == "csv" and parser.columns is None and parser.before_header:
        raise InputError(
            f"The recording {str(path)!r} has no header line naming its columns; "
            "set source.columns in the config"
        )
    if rows == 0 and parser.bad == 0 and not parser.left:
        # (lines left to a consumer may hold rows this process never saw: the consumer's
        # verdict, see streamcond.replay)
        raise no_data(path)
