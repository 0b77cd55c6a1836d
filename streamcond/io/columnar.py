"""Columnar recordings: Parquet and Arrow IPC, read in row-group batches (pyarrow, the
``parquet`` extra).

Two layouts, told apart by the schema's metadata:

* **data** — a float column per source column (names as in the config: the time column and
  the channel columns), as written by ``streamcond convert``; a capture converted this way
  also has the host receive time as column ``_host_t``. A row with an empty (null) value or
  a NaN/infinite number in a needed column is a bad line, as in text.
* **capture** — ``record -o capture.parquet``: columns ``t_host`` (float64, host seconds) and
  ``line`` (the raw bytes as received); replayed through the same line parser as a text
  capture.

Memory: one batch (``batch_rows``) of the needed columns at a time, whatever the file size.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from . import fastcsv
from .lineparse import HOST_T, LineParser, Parsed

#: schema metadata key and the values of the two layouts
META_KEY = b"streamcond"
CAPTURE = b"capture v1"
DATA = b"data v1"
META_BAD = b"streamcond.bad_lines"
BATCH_ROWS = 1 << 17  # 128 Ki rows: about the rows of one 4 MiB text block


def _pyarrow():
    try:
        import pyarrow as pa
        import pyarrow.ipc  # noqa: F401
        import pyarrow.parquet as pq
    except ImportError:
        raise InputError(
            "Reading or writing Parquet/Arrow files needs pyarrow: pip install 'streamcond[parquet]'"
        ) from None
    return pa, pq


class _Source:
    """Schema and batches of a Parquet or Arrow IPC file, and its byte size."""

    def __init__(self, path: Path, kind: str) -> None:
        pa, pq = _pyarrow()
        self.size = path.stat().st_size
        try:
            if kind == "parquet":
                self._pf = pq.ParquetFile(path)
                self.schema = self._pf.schema_arrow
                self.rows = self._pf.metadata.num_rows
            else:
                self._ipc = pa.ipc.open_file(pa.memory_map(str(path), "r"))
                self.schema = self._ipc.schema
                self.rows = sum(self._ipc.get_batch(i).num_rows
                                for i in range(self._ipc.num_record_batches))
        except (pa.ArrowException, OSError) as e:
            raise InputError(f"The recording {str(path)!r} cannot be read as {kind}: {e}") from None
        self.kind = kind

    @property
    def meta(self) -> dict[bytes, bytes]:
        out = dict(self.schema.metadata or {})
        if self.kind == "parquet":
            out.update(self._pf.metadata.metadata or {})
        return out

    def batches(self, columns: list[str]) -> Iterator[Any]:
        if self.kind == "parquet":
            yield from self._pf.iter_batches(batch_size=BATCH_ROWS, columns=columns,
                                             use_threads=fastcsv.THREADS)
        else:
            for i in range(self._ipc.num_record_batches):
                yield self._ipc.get_batch(i).select(columns)


def is_columnar_capture(path: str | Path, kind: str) -> bool:
    return _Source(Path(path), kind).meta.get(META_KEY) == CAPTURE


def has_host_time(path: str | Path, kind: str) -> bool:
    return HOST_T in _Source(Path(path), kind).schema.names


def read_columnar_blocks(
    path: str | Path, parser: LineParser, kind: str, host_time: bool
) -> Iterator[tuple[Parsed, int, int]]:
    """Like :func:`streamcond.io.recording.read_blocks` for a Parquet/Arrow IPC file.
    ``host_time``: the rows carry the host receive time as a last column (captures)."""
    import pyarrow as pa
    import pyarrow.compute as pac

    from .fastcsv import arrow_to_numpy

    p = Path(path)
    src = _Source(p, kind)
    if src.meta.get(META_KEY) == CAPTURE:
        yield from _capture_blocks(p, src, parser, host_time)
        return
    names = [n for n in src.schema.names if n != HOST_T]
    present = [n for n in names if n in parser.needed]
    # only the columns the config reads (in file order); all names when one is missing, so
    # the replay's message can list what the file has
    parser.columns = present if len(present) == len(parser.needed) else names
    read = list(parser.columns) + ([HOST_T] if host_time else [])
    if host_time and HOST_T not in src.schema.names:
        raise InputError(f"The recording {str(p)!r} has no host time column {HOST_T!r}")
    prior = src.meta.get(META_BAD)
    if prior:  # bad lines of the text this file was converted from
        parser.bad += int(prior)
    done_rows = 0
    total = 0
    for batch in src.batches(read):
        n = batch.num_rows
        rows = np.empty((n, len(read)), np.float64)
        valid = np.ones(n, bool)
        for i, col in enumerate(batch.columns):
            try:
                arr = col if col.type == pa.float64() else col.cast(pa.float64())
            except (pa.ArrowException, TypeError, ValueError):
                raise InputError(
                    f"The recording {str(p)!r}: column {read[i]!r} is not numeric"
                ) from None
            if arr.null_count:
                nulls = arrow_to_numpy(pac.indices_nonzero(arr.is_null()), np.uint64)
                valid[nulls.astype(np.int64)] = False
                arr = arr.fill_null(0.0)
            rows[:, i] = arrow_to_numpy(arr)
        numbers = np.arange(done_rows + 1, done_rows + n + 1)
        out = Parsed(np.empty((0, len(read))))
        if not valid.all():
            for no in numbers[~valid].tolist():
                parser._note_bad(out, no, "an empty value")
            rows, numbers = rows[valid], numbers[valid]
        res = parser._finite_rows(rows, numbers) if parser.columns else Parsed(rows)
        res.bad += out.bad
        parser.settle(res)
        parser.lines = done_rows = done_rows + n
        total += res.rows.shape[0]
        yield res, int(src.size * done_rows / max(src.rows, 1)), src.size
    if total == 0 and parser.bad == 0:
        raise InputError(f"The recording {str(p)!r} holds no data lines")


def _capture_blocks(p: Path, src: _Source, parser: LineParser, host_time: bool):
    import pyarrow as pa

    from .fastcsv import arrow_to_numpy
    from .recording import check_end

    done_rows = 0
    rows = 0
    for batch in src.batches(["t_host", "line"]):
        tcol = batch.column(0)
        if tcol.null_count:
            tcol = tcol.fill_null(float("nan"))
        times = arrow_to_numpy(tcol.cast(pa.float64())).copy()
        lines = [b if b is not None else b"" for b in batch.column(1).to_pylist()]
        keep = np.isfinite(times)
        if not keep.all():
            parser.bad += int((~keep).sum())
            lines = [ln for ln, k in zip(lines, keep.tolist()) if k]
            times = times[keep]
        if host_time:
            res = parser.feed_lines(lines, times)
        else:
            res = parser.feed(b"".join(ln + b"\n" for ln in lines))
        done_rows += batch.num_rows
        rows += res.rows.shape[0]
        yield res, int(src.size * done_rows / max(src.rows, 1)), src.size
    last = parser.feed_lines([], np.empty(0)) if host_time else parser.flush()
    rows += last.rows.shape[0]
    check_end(p, parser, rows)
    yield last, src.size, src.size


class CaptureParquetWriter:
    """``record -o capture.parquet``: the capture's lines and host times in row groups.

    A Parquet file is readable only once closed (its footer is written last): a capture cut
    by a power loss is lost, so long unattended captures are better written as text.
    """

    ROW_GROUP = 1 << 16

    def __init__(self, path: str | Path) -> None:
        pa, pq = _pyarrow()
        self.pa = pa
        self.schema = pa.schema([("t_host", pa.float64()), ("line", pa.binary())],
                                metadata={META_KEY: CAPTURE})
        try:
            self.writer = pq.ParquetWriter(str(path), self.schema, compression="zstd")
        except (OSError, pa.ArrowException) as e:
            raise InputError(f"The capture file {str(path)!r} cannot be written: {e}") from None
        self._lines: list[bytes] = []
        self._times: list[float] = []
        self.lines = 0

    def write(self, lines: list[bytes], times: np.ndarray) -> None:
        self._lines.extend(lines)
        self._times.extend(times.tolist())
        self.lines += len(lines)
        if len(self._lines) >= self.ROW_GROUP:
            self._write()

    def flush(self) -> None:
        """Called about once a second by ``record``: write a row group once it is worth one."""
        if len(self._lines) >= self.ROW_GROUP // 16:
            self._write()

    def _write(self) -> None:
        if not self._lines:
            return
        tbl = self.pa.table({"t_host": self.pa.array(self._times, self.pa.float64()),
                             "line": self.pa.array(self._lines, self.pa.binary())},
                            schema=self.schema)
        self.writer.write_table(tbl)
        self._lines, self._times = [], []

    def close(self) -> None:
        self._write()
        self.writer.close()


class DataParquetWriter:
    """``convert``: a float64 column per source column, row groups of ``row_group`` rows."""

    def __init__(self, path: str | Path, columns: list[str], row_group: int = 1 << 17,
                 compression: str = "zstd") -> None:
        pa, pq = _pyarrow()
        self.pa = pa
        self.columns = list(columns)
        self.schema = pa.schema([(c, pa.float64()) for c in columns], metadata={META_KEY: DATA})
        self.path = str(path)
        self.writer = pq.ParquetWriter(self.path, self.schema, compression=compression)
        self.row_group = row_group
        self._parts: list[np.ndarray] = []
        self._n = 0
        self.rows = 0

    def write(self, rows: np.ndarray) -> None:
        if rows.shape[0]:
            self._parts.append(rows)
            self._n += rows.shape[0]
            self.rows += rows.shape[0]
        while self._n >= self.row_group:
            self._emit(self.row_group)

    def _emit(self, n: int) -> None:
        allr = np.concatenate(self._parts) if len(self._parts) > 1 else self._parts[0]
        head, rest = allr[:n], allr[n:]
        self._parts = [rest] if rest.shape[0] else []
        self._n = rest.shape[0]
        self.writer.write_table(self.pa.table(
            {c: head[:, i] for i, c in enumerate(self.columns)}, schema=self.schema))

    def close(self, bad_lines: int = 0) -> None:
        if self._n:
            self._emit(self._n)
        if bad_lines:
            # the bad-line count of the source rides in the footer, so a replay of the Parquet
            # reports the same summary as a replay of the text
            self.writer.add_key_value_metadata({META_BAD.decode(): str(bad_lines)})
        self.writer.close()


