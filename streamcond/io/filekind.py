"""What a recording file is, from its first bytes (no numpy, no parser: the replay asks before
it has loaded anything else, :func:`streamcond.io.prefetch.start_early`)."""

from __future__ import annotations

#: Apache Parquet files begin (and end) with these four bytes (the Parquet format
#: specification, "File Format").
PARQUET_MAGIC = b"PAR1"
#: An Arrow IPC file begins with ``ARROW1`` (Arrow columnar format, "IPC File Format").
ARROW_MAGIC = b"ARROW1"
#: Bytes :func:`kind_of_head` needs.
HEAD_BYTES = 8


def kind_of_head(head: bytes) -> str:
    """``"parquet"``, ``"arrow"`` or ``"text"`` for a file that begins with ``head``."""
    if head[:4] == PARQUET_MAGIC:
        return "parquet"
    if head[:6] == ARROW_MAGIC:
        return "arrow"
    return "text"
