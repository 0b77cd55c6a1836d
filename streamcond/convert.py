"""``streamcond convert``: a text recording or a capture → Parquet (a float64 column per source
column, zstd-compressed row groups), read back by ``replay``, ``tune`` and ``compare``.

The rows written are exactly the rows the line parser keeps (the same parser as replay), so a
replay of the Parquet gives the same records as a replay of the text; the source's bad-line
count rides in the file's metadata for the replay summary. A capture is written with its host
receive times as column ``_host_t``. Memory stays bounded: one parsed block and one row group
at a time.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError


def convert(cfg: Any, recording: str | Path, out: str | Path, *, force: bool = False) -> dict:
    """Convert; returns ``{"rows", "bad_lines", "in_bytes", "out_bytes", "ratio"}``."""
    from .io.columnar import DataParquetWriter
    from .io.lineparse import HOST_T
    from .replay import check_columns, open_recording

    src, dst = Path(recording), Path(out)
    if dst.exists():
        if _same(src, dst):
            raise InputError(f"The output {str(dst)!r} is the recording itself")
        if not force:
            raise InputError(f"The output {str(dst)!r} exists; add --force to replace it")
    if not dst.parent.is_dir():
        raise InputError(f"The folder {str(dst.parent)!r} of the output does not exist")
    # a capture's rows carry the host time as a last column
    parser, blocks, _host_time, host_column = open_recording(cfg, src)
    tmp = dst.with_name(dst.name + ".part")
    writer: DataParquetWriter | None = None
    try:
        for parsed, _done, _size in blocks:
            if parser.columns is None:
                continue
            if writer is None:
                check_columns(cfg, parser.columns)
                cols = list(parser.columns) + ([HOST_T] if host_column else [])
                writer = DataParquetWriter(tmp, cols)
            writer.write(np.asarray(parsed.rows, np.float64))
        if writer is None:
            raise InputError(f"The recording {str(src)!r} holds no data lines")
        writer.close(bad_lines=parser.bad)
        os.replace(tmp, dst)
    finally:
        if tmp.exists():
            tmp.unlink()
    in_b, out_b = src.stat().st_size, dst.stat().st_size
    return {"rows": writer.rows, "bad_lines": parser.bad, "in_bytes": in_b, "out_bytes": out_b,
            "ratio": in_b / max(out_b, 1)}


def _same(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def main(args: Any) -> int:
    from .config import load_config

    cfg = load_config(args.config)
    r = convert(cfg, args.recording, args.output, force=args.force)
    print(
        f"converted {r['rows']:,} rows ({r['bad_lines']:,} bad lines skipped) to {args.output}: "
        f"{r['in_bytes'] / 2**20:.2f} MiB → {r['out_bytes'] / 2**20:.2f} MiB, "
        f"{r['ratio']:.1f}× smaller.",
        file=sys.stderr,
    )
    return 0
