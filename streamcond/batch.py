"""Many recordings at once: one task per recording, run through a ``concurrent.futures``
executor — a local process pool, or a Dask cluster's executor when a scheduler is named.

Chunk invariance makes every recording independent of the others, so a recording is the unit
of work. Each task replays with the streaming block reader and keeps only what the answer
needs (edges and counts, never the records), so a worker's memory is bounded by the block size
and the edges, not by the length of the recording. Results come back in the order the
recordings were given, whichever executor ran them and whatever order they finished in.
"""

from __future__ import annotations

import concurrent.futures as cf
import glob
import os
import socket
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

from .config import Config
from .errors import InputError, StreamcondError
from .golden import Edge, diff_edges
from .io.recording import DEFAULT_BLOCK_BYTES

_GLOB_CHARS = set("*?[")


def is_many(args: Sequence[str]) -> bool:
    """Whether the RECORDING arguments name several recordings (or may: a glob, a list file)."""
    return len(args) > 1 or any(
        a.startswith("@") or (_GLOB_CHARS & set(a) and not os.path.isfile(a)) for a in args
    )


def expand_recordings(args: Sequence[str]) -> list[str]:
    """Recording paths from paths, globs (``month/*.csv``, ``**`` reaches into folders) and list
    files (``@list.txt``: one path or glob a line, relative to the list file; ``#`` comments).

    An existing file whose name looks like a glob is taken as it is. Duplicates are dropped;
    order is kept. Every argument that names nothing is one sentence of the error.
    """
    out: list[str] = []
    problems: list[str] = []

    def add(arg: str, base: Path | None, origin: str) -> None:
        path = str(base / arg) if base is not None and not os.path.isabs(arg) else arg
        if os.path.isfile(path):
            out.append(path)
        elif _GLOB_CHARS & set(arg):
            hits = sorted(p for p in glob.glob(path, recursive=True) if os.path.isfile(p))
            if not hits:
                problems.append(f"{origin}{arg!r} matches no file")
            out.extend(hits)
        elif os.path.isdir(path):
            problems.append(f"{origin}{arg!r} is a folder: name the files, e.g. {arg.rstrip('/')}/*.csv")
        else:
            problems.append(f"{origin}the recording {arg!r} does not exist")

    for arg in args:
        if arg.startswith("@"):
            lst = Path(arg[1:])
            try:
                text = lst.read_text(encoding="utf-8")
            except OSError as e:
                problems.append(f"The list file {str(lst)!r} cannot be read: {e.strerror}")
                continue
            entries = [(no, ln.split("#", 1)[0].strip()) for no, ln in enumerate(text.splitlines(), 1)]
            entries = [(no, e) for no, e in entries if e]
            if not entries:
                problems.append(f"The list file {str(lst)!r} names no recordings")
            for no, entry in entries:
                add(entry, lst.parent, f"{lst} line {no}: ")
        else:
            add(arg, None, "")
    if problems:
        raise InputError([p[0].upper() + p[1:] for p in problems])
    seen: dict[str, str] = {}  # normalised path -> the first spelling given
    for path in out:
        seen.setdefault(os.path.normpath(path), path)
    return list(seen.values())


# --------------------------------------------------------------------------- executors


@contextmanager
def open_executor(jobs: int | None = None, scheduler: str | None = None) -> Iterator[cf.Executor]:
    """A ``concurrent.futures`` executor: a pool of ``jobs`` local processes (default: one per
    CPU), or the executor of a ``dask.distributed`` client connected to ``scheduler``."""
    if scheduler:
        try:
            from dask.distributed import Client
        except ImportError:
            raise InputError(
                "--scheduler needs dask.distributed, which is not installed: "
                "pip install 'streamcond[cluster]'"
            ) from None
        _probe_scheduler(scheduler)
        try:
            client = Client(scheduler, timeout="10s", set_as_default=False)
        except Exception as e:  # OSError, TimeoutError, ValueError for a malformed address
            raise InputError(f"The scheduler {scheduler!r} cannot be reached: {e}") from None
        try:
            # pure=False: every task runs, even two with equal arguments
            yield client.get_executor(pure=False)
        finally:
            client.close()
        return
    # import the pipeline (numpy, scipy.signal) here, once: forked workers inherit it
    from . import replay  # noqa: F401
    from .core import pipeline  # noqa: F401

    pool = cf.ProcessPoolExecutor(max_workers=jobs or os.cpu_count() or 1)
    try:
        yield pool
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


#: The protocols of dask.distributed's network communication a remote scheduler can speak.
_SCHEMES = ("tcp", "tls", "ws", "wss", "ucx")


def _probe_scheduler(address: str) -> None:
    """Check the address, and that a TCP scheduler accepts connections, before making a
    client: a client that fails to connect leaves a half-made object whose clean-up waits and
    prints a traceback at exit."""
    from distributed.comm import parse_address, parse_host_port

    try:
        scheme, loc = parse_address(address, strict=True)
    except (ValueError, TypeError) as e:
        raise InputError(f"The scheduler address {address!r} cannot be used: {e} "
                         "(e.g. tcp://10.0.0.5:8786)") from None
    if scheme not in _SCHEMES:
        raise InputError(f"The scheduler address {address!r} cannot be used: the protocol must "
                         f"be one of {', '.join(_SCHEMES)} (e.g. tcp://10.0.0.5:8786)")
    if scheme not in ("tcp", "tls"):
        return
    try:
        host, port = parse_host_port(loc)
    except (ValueError, TypeError) as e:
        raise InputError(f"The scheduler address {address!r} cannot be used: {e}") from None
    try:
        socket.create_connection((host, port), timeout=10).close()
    except OSError as e:
        raise InputError(f"The scheduler {address!r} cannot be reached: {e.strerror or e}") from None


@dataclass
class Outcome:
    """One task's answer, or the sentences saying why it has none."""

    recording: str
    result: Any = None
    errors: list[str] = field(default_factory=list)


def run_tasks(
    executor: cf.Executor,
    fn: Callable[..., Any],
    recordings: Sequence[str],
    *args: Any,
    progress: Any = None,
) -> list[Outcome]:
    """``fn(absolute_path, *args)`` for every recording, in the given order.

    A task that raises a :class:`StreamcondError` (an unreadable recording, a column the config
    needs and the recording lacks) gives an outcome with its sentences; so does a worker that
    died. ``progress`` (a :class:`streamcond.progress.Progress`) advances by each finished
    recording's size.
    """
    sizes = [_size(r) for r in recordings]
    futures = {
        executor.submit(fn, os.path.abspath(r), *args): i for i, r in enumerate(recordings)
    }
    out: list[Outcome | None] = [None] * len(recordings)
    done_bytes = rows = 0
    try:
        for fut in cf.as_completed(futures):
            i = futures[fut]
            rec = recordings[i]
            try:
                res = fut.result()
                out[i] = Outcome(rec, res)
                rows += getattr(res, "rows", 0)
            except StreamcondError as e:
                out[i] = Outcome(rec, errors=[f"{rec}: {m}" for m in e.messages])
            except Exception as e:  # a worker that died, a lost connection to the cluster
                out[i] = Outcome(rec, errors=[f"{rec}: the task failed ({type(e).__name__}: {e})."])
            done_bytes += sizes[i]
            if progress is not None:
                progress.update(done_bytes, rows)
    finally:
        for fut in futures:
            fut.cancel()
    return [o for o in out if o is not None]


def _size(path: str) -> int:
    try:
        return os.path.getsize(path)
    except OSError:
        return 0


# --------------------------------------------------------------------------- the tasks


@dataclass
class Tally:
    """What a task keeps of a replay: the edges, and the chatter counts of the stats records
    (never the records themselves, so memory does not grow with the recording)."""

    edges: list[Edge] = field(default_factory=list)
    raw_crossings: dict[str, int] = field(default_factory=dict)
    stats_edges: dict[str, int] = field(default_factory=dict)

    def __call__(self, rec: dict[str, Any]) -> None:
        kind = rec.get("kind")
        if kind == "edge":
            self.edges.append(Edge(rec["channel"], float(rec["t"]), int(rec["level"])))
        elif kind == "stats":
            ch = rec["channel"]
            self.raw_crossings[ch] = self.raw_crossings.get(ch, 0) + int(rec.get("raw_crossings") or 0)
            self.stats_edges[ch] = self.stats_edges.get(ch, 0) + int(rec.get("edges") or 0)

    def suppression(self, ch: str) -> float | None:
        """Raw centre crossings per edge over the stats windows (as the stats record's
        ``suppression_ratio``); None without edges."""
        n = self.stats_edges.get(ch, 0)
        return round(self.raw_crossings.get(ch, 0) / n, 6) if n else None


@dataclass
class Summary:
    """A replay's closing summary (without its run time, which differs between runs)."""

    summary: dict[str, Any]

    @property
    def rows(self) -> int:
        return int(self.summary.get("rows", 0))


def replay_summary(
    recording: str, cfg: Config, chunk: int | None = None, block_bytes: int = DEFAULT_BLOCK_BYTES
) -> Summary:
    """Task: replay one recording, keep only its summary record."""
    from .replay import run_replay

    res = run_replay(cfg, recording, None, chunk=chunk, block_bytes=block_bytes)
    return Summary(res.summary)


@dataclass
class Comparison:
    """Task answer: one recording replayed with config A and config B."""

    rows: int
    bad_lines: int
    channels: dict[str, dict[str, Any]]


def compare_recording(
    recording: str,
    cfg_a: Config,
    cfg_b: Config,
    tolerance: float,
    block_bytes: int = DEFAULT_BLOCK_BYTES,
) -> Comparison:
    """Task: replay one recording with both configs and compare their edges per channel.

    ``moved``, ``missing`` and ``added`` are the golden comparison's moved, missing and
    unexpected edges with A as the expected side (:func:`streamcond.golden.diff_edges`).
    """
    from .replay import run_replay, run_replays, same_reading

    ta, tb = Tally(), Tally()
    if same_reading(cfg_a, cfg_b):  # the usual case (another band, filter or dwell): one read
        ra = run_replays([cfg_a, cfg_b], recording, [ta, tb], block_bytes=block_bytes)[0]
    else:
        ra = run_replay(cfg_a, recording, ta, block_bytes=block_bytes)
        run_replay(cfg_b, recording, tb, block_bytes=block_bytes)
    diffs = {d.channel: d for d in diff_edges(ta.edges, tb.edges, tolerance)}
    names = list(dict.fromkeys([c.name for c in cfg_a.channel] + [c.name for c in cfg_b.channel]))
    channels: dict[str, dict[str, Any]] = {}
    for ch in names:
        d = diffs.get(ch)
        channels[ch] = {
            "edges_a": d.expected if d else 0,
            "edges_b": d.produced if d else 0,
            "moved": len(d.moved) if d else 0,
            "missing": len(d.missing) if d else 0,
            "added": len(d.unexpected) if d else 0,
            "max_moved_s": round(max((abs(y.t - x.t) for x, y in d.moved), default=0.0), 9) if d else 0.0,
            "raw_crossings_a": ta.raw_crossings.get(ch, 0),
            "raw_crossings_b": tb.raw_crossings.get(ch, 0),
            "suppression_a": ta.suppression(ch),
            "suppression_b": tb.suppression(ch),
        }
    return Comparison(ra.rows, ra.bad_lines, channels)
