"""Reading a recording file in bounded blocks.

Memory stays bounded by ``block_bytes`` (plus the parsed rows of one block), whatever the file
size: the file is read a block at a time and every block goes through the same
:class:`~streamcond.io.lineparse.LineParser` the serial source uses. A capture made by
``streamcond record`` is an ordinary recording whose first column is the host receive time.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

from ..errors import InputError
from .lineparse import LineParser, Parsed

DEFAULT_BLOCK_BYTES = 1 << 22


def read_blocks(
    path: str | Path, parser: LineParser, block_bytes: int = DEFAULT_BLOCK_BYTES
) -> Iterator[tuple[Parsed, int, int]]:
    """Yield ``(parsed rows, bytes read so far, file size)`` per block of the file."""
    p = Path(path)
    try:
        size = os.path.getsize(p)
        fh = open(p, "rb")
    except FileNotFoundError:
        raise InputError(f"The recording {str(p)!r} does not exist") from None
    except IsADirectoryError:
        raise InputError(f"The recording {str(p)!r} is a directory, not a file") from None
    except OSError as e:
        raise InputError(f"The recording {str(p)!r} cannot be read: {e.strerror}") from None
    done = 0
    with fh:
        while True:
            try:
                data = fh.read(block_bytes)
            except OSError as e:
                raise InputError(f"Reading {str(p)!r} failed: {e.strerror}") from None
            if not data:
                break
            done += len(data)
            yield parser.feed(data), done, size
    yield parser.flush(), done, size
