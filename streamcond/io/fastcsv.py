"""Block parsers for numeric CSV: numpy's C reader (default install) and pyarrow's (the
``fast`` extra, used automatically when installed).

Both are only ever handed a block that has passed the screen in
:mod:`streamcond.io.lineparse` (numeric bytes only, no bare CR, every line within the length
limit); their answer is taken only when it has exactly one row per line, the right number of
columns and no empty field. Anything else — a refusal, a missing row, a null — sends the block
to the careful per-line parser, so the rows kept and the bad lines counted are the same
whichever reader ran. Both convert a decimal field to the correctly rounded double, as
:func:`float` does (numpy through ``PyOS_string_to_double``; Arrow through its
``fast_float`` port, an exact Eisel–Lemire parser — D. Lemire, "Number Parsing at a Gigabyte
per Second", Software: Practice and Experience 51(8), 2021), so the values agree bit for bit.

Measured on the benchmark's 4 MiB blocks (1 M rows, 4 channels, this machine, best of 5):
``numpy.loadtxt`` 65 ms a block, ``pyarrow.csv.read_csv`` 32 ms, ``pandas.read_csv`` 42 ms (not
used: its default float conversion is not always correctly rounded, and the exact one is
deprecated). A vectorised SWAR digit parser written in numpy (eight digits per uint64, three
multiply-adds) was tried first and measured at 44 ms per MiB against loadtxt's 10 ms — about
forty numpy passes over the fields cost more than one C pass — so it was dropped. Other
single C-level conversions of a validated block were measured against loadtxt on the same
4 MiB block (loaded machine, loadtxt 91 ms): ``np.fromstring(block.translate(LF -> ","),
sep=",")`` 172 ms, ``json.loads`` of the block as one array 238 ms (+ 22 ms to numpy),
``pydantic_core.from_json`` 129 ms, ``bytes.split`` + ``astype(float64)`` 340 ms; the
delimiter/field-count validation alone (LF and comma positions) costs 17 ms. None beats
loadtxt's single pass, so loadtxt stays the default-install reader.
"""

from __future__ import annotations

import io
import os
import warnings

import numpy as np

#: ``STREAMCOND_CSV_READER=numpy`` forces the default reader (tests and benchmarks compare).
ENV = "STREAMCOND_CSV_READER"


#: Whether pyarrow may use its thread pool. Off in a replay's reader process
#: (:mod:`streamcond.io.prefetch`): there the parse is off the critical path, and the pool's
#: threads would take the core the conditioning runs on.
THREADS = True


def _arrow():
    try:
        import pyarrow as pa
        import pyarrow.csv as pacsv
    except ImportError:
        return None
    return pa, pacsv


def _have_arrow() -> bool:
    """pyarrow installed? Asked without importing it (the daemon never needs it)."""
    import importlib.util

    return importlib.util.find_spec("pyarrow") is not None


def available() -> list[str]:
    """The block readers installed here, the default first."""
    return ["numpy", "pyarrow"] if _have_arrow() else ["numpy"]


#: Blocks at least this large go to pyarrow under "auto". Smaller ones (the live daemon's few
#: lines every few ms) stay with numpy: no pyarrow import (about 90 MiB of resident memory
#: measured with a replay: 239 MiB against 145 MiB) where it cannot pay off.
AUTO_MIN_BYTES = 1 << 18


def choose(name: str | None = None) -> str:
    """``name``, else $STREAMCOND_CSV_READER, else ``auto``: pyarrow for large blocks when
    installed, numpy otherwise. The readers agree bit for bit, so a per-block choice is safe."""
    want = name or os.environ.get(ENV) or "auto"
    if want == "auto":
        return "auto" if _have_arrow() else "numpy"
    if want not in ("numpy", "pyarrow"):
        raise ValueError(f"unknown CSV reader {want!r} (numpy or pyarrow)")
    if want == "pyarrow" and not _have_arrow():  # found, not imported: a reader child may use it
        raise ValueError("the pyarrow CSV reader is not installed (pip install 'streamcond[fast]')")
    return want


def arrow_to_numpy(arr, dtype=np.float64) -> np.ndarray:
    """A pyarrow Array/ChunkedArray of fixed-width values without nulls as a numpy array, read
    from its data buffers. (``to_numpy()`` imports pandas when pandas is installed: measured
    0.2 s on the first call, a tenth of a whole replay; the buffers take 1 ms.)"""
    chunks = arr.chunks if hasattr(arr, "chunks") else [arr]
    size = np.dtype(dtype).itemsize
    parts = [
        np.frombuffer(c.buffers()[1], dtype, count=len(c), offset=c.offset * size)
        for c in chunks if len(c)
    ]
    if not parts:
        return np.empty(0, dtype)
    return parts[0] if len(parts) == 1 else np.concatenate(parts)


def loadtxt_block(block: bytes, ncols: int) -> np.ndarray | None:
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


class ArrowBlockReader:
    """pyarrow's multi-threaded CSV reader on one block; None when it refuses the block or
    reads an empty field (a null)."""

    def __init__(self, ncols: int) -> None:
        mods = _arrow()
        assert mods is not None
        self.pa, self.pacsv = mods
        names = [f"c{i}" for i in range(ncols)]
        self.ncols = ncols
        self.read_opts = self.pacsv.ReadOptions(column_names=names, block_size=1 << 22,
                                                use_threads=THREADS)
        self.parse_opts = self.pacsv.ParseOptions(delimiter=",", quote_char=False,
                                                  ignore_empty_lines=True)
        self.conv_opts = self.pacsv.ConvertOptions(
            column_types={n: self.pa.float64() for n in names}, strings_can_be_null=False,
            quoted_strings_can_be_null=False,
        )

    def __call__(self, block: bytes, ncols: int) -> np.ndarray | None:
        try:
            tbl = self.pacsv.read_csv(
                self.pa.py_buffer(block), read_options=self.read_opts,
                parse_options=self.parse_opts, convert_options=self.conv_opts,
            )
        except (self.pa.ArrowInvalid, self.pa.ArrowException, ValueError):
            return None
        if tbl.num_columns != ncols:
            return None
        out = np.empty((tbl.num_rows, ncols), np.float64)
        for i, col in enumerate(tbl.columns):
            if col.null_count:
                return None
            out[:, i] = arrow_to_numpy(col)
        return out


def block_reader(name: str, ncols: int):
    """A callable ``(block, ncols) -> rows | None`` for the named reader."""
    if name == "pyarrow":
        return ArrowBlockReader(ncols)
    if name == "auto":
        arrow: list[ArrowBlockReader] = []

        def auto(block: bytes, n: int) -> np.ndarray | None:
            if len(block) < AUTO_MIN_BYTES:
                return loadtxt_block(block, n)
            if not arrow:
                arrow.append(ArrowBlockReader(ncols))
            return arrow[0](block, n)

        return auto
    return loadtxt_block
