"""Reading ahead: the recording is read and parsed on the other core while the replay
conditions the block before.

Two ways, the same records bit for bit (the parser is driven by one reader alone, in the same
order as without reading ahead; its items arrive in order, each once; an error arrives where
its block would have — after every block before it):

* :func:`read_in_child` — a forked child process runs the block iterator and sends each block
  (the parsed rows and the parser's counters) through a pipe. Any reader gains: numpy's
  ``loadtxt`` and the kv/JSON line parsers hold the GIL, so in a thread they could not overlap
  the conditioning. Used where ``fork`` is safe: POSIX, more than one usable core, and a
  process with no other Python thread and no pyarrow thread pool yet (a fork copies only the
  calling thread, so a lock another thread held would stay locked in the child).
* :func:`read_ahead` — a thread, one block ahead. pyarrow parses a CSV block, and reads a
  Parquet row group, with the GIL released, so a thread is enough for its readers.

The pipe's own buffer is the back-pressure: the child parses at most one block beyond the one
it is writing, so memory stays bounded by the block size.
"""

from __future__ import annotations

import os
import pickle
import queue
import signal
import struct
import sys
import threading
from collections.abc import Iterator
from typing import TypeVar

T = TypeVar("T")

#: Blocks read ahead of the consumer: one keeps the other core busy; more would only hold more
#: memory (each block is up to the recording's block size, 4 MiB by default, plus its rows).
DEPTH = 1

_END = object()


class _Failed:
    def __init__(self, exc: BaseException) -> None:
        self.exc = exc


def read_ahead(blocks: Iterator[T], depth: int = DEPTH) -> Iterator[T]:
    """Yield the items of ``blocks``, produced by a thread that stays ``depth`` items ahead.

    The thread starts now, so the first block is read while the caller gets ready. Closing the
    returned generator (or an exception in the consumer, or dropping it) stops the thread at its
    next item and closes ``blocks``.
    """
    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def put(item: object) -> bool:
        while not stop.is_set():
            try:
                q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def run() -> None:
        try:
            for item in blocks:
                if not put(item):
                    break
            else:
                put(_END)
        except BaseException as e:  # handed to the consumer, raised there in order
            put(_Failed(e))
        finally:
            close = getattr(blocks, "close", None)
            if close is not None:
                try:
                    close()
                except Exception:
                    pass

    worker = threading.Thread(target=run, name="streamcond-read-ahead", daemon=True)
    worker.start()

    def consume() -> Iterator[T]:
        try:
            yield None  # type: ignore[misc]  # primed below: the finally now always runs
            while True:
                item = q.get()
                if item is _END:
                    return
                if isinstance(item, _Failed):
                    raise item.exc
                yield item  # type: ignore[misc]
        finally:
            stop.set()
            worker.join()

    gen = consume()
    next(gen)
    return gen


#: The parser's state a consumer reads (the columns once the header came; the counts and the
#: examples of bad lines at the end), sent with every block from the child.
SYNCED = ("columns", "header_line", "lines", "bad", "before_header", "repeated_headers",
          "examples")
_LEN = struct.Struct("<Q")
#: ``STREAMCOND_READ_AHEAD``: ``off`` reads in the replay's own thread, ``thread`` never
#: forks, ``process`` always does (tests compare them).
ENV = "STREAMCOND_READ_AHEAD"


def can_fork() -> bool:
    """Is a reader child process safe and useful here? (See the module docstring.)"""
    if not hasattr(os, "fork") or sys.platform == "darwin":
        return False  # no fork, or (macOS) system libraries that are not fork-safe
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cores = os.cpu_count() or 1
    return cores > 1 and threading.active_count() == 1 and "pyarrow" not in sys.modules


def _send(fh, obj: object) -> None:
    data = pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL)
    fh.write(_LEN.pack(len(data)))
    fh.write(data)


def _recv(fh) -> object:
    head = fh.read(_LEN.size)
    if len(head) < _LEN.size:
        raise EOFError
    n = _LEN.unpack(head)[0]
    data = fh.read(n)
    if len(data) < n:
        raise EOFError
    return pickle.loads(data)


def _child(blocks: Iterator[T], parser: object, w: int) -> None:
    """The reader process: every item, then the end or the error; never returns."""
    code = 0
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
        from . import fastcsv

        fastcsv.THREADS = False  # one core parses, the other conditions
        with open(w, "wb") as fh:
            try:
                for item in blocks:
                    _send(fh, ("item", item, {k: getattr(parser, k) for k in SYNCED}))
                _send(fh, ("end", None, {k: getattr(parser, k) for k in SYNCED}))
            except BrokenPipeError:
                raise
            except BaseException as e:
                try:
                    _send(fh, ("error", e, None))
                except (pickle.PicklingError, TypeError, AttributeError):
                    _send(fh, ("error", RuntimeError(f"{type(e).__name__}: {e}"), None))
    except BrokenPipeError:
        pass  # the parent stopped reading (an early stop, an interrupt): nothing to say
    except BaseException:
        code = 1
    finally:
        os._exit(code)


#: The pipe's buffer, where the system allows it (Linux: up to /proc/sys/fs/pipe-max-size,
#: 1 MiB by default): a block of rows crosses in 4 writes instead of 64, with as few switches
#: between the two processes.
PIPE_BYTES = 1 << 20


def _widen(fd: int) -> None:
    try:
        import fcntl

        fcntl.fcntl(fd, fcntl.F_SETPIPE_SZ, PIPE_BYTES)
    except (ImportError, AttributeError, OSError):
        pass  # not Linux, or a lower limit: the default buffer works, a little slower


def read_in_child(blocks: Iterator[T], parser: object) -> Iterator[T]:
    """Yield the items of ``blocks``, produced by a child process forked now (so the first
    block is parsed while the caller gets ready); ``parser`` (the parser ``blocks`` drives) is
    kept up to date here with the child's (:data:`SYNCED`)."""
    r, w = os.pipe()
    _widen(w)
    sys.stdout.flush()
    sys.stderr.flush()
    pid = os.fork()
    if pid == 0:  # pragma: no cover - runs in the child, which leaves by os._exit
        os.close(r)
        _child(blocks, parser, w)
    os.close(w)
    gen = _from_child(open(r, "rb"), pid, parser)
    next(gen)
    return gen


def _from_child(fh, pid: int, parser: object) -> Iterator[T]:
    ended = False
    try:
        yield None  # type: ignore[misc]  # primed by read_in_child: the finally now always runs
        with fh:
            while True:
                try:
                    what, item, state = _recv(fh)
                except EOFError:
                    raise RuntimeError("the recording's reader process ended unexpectedly") from None
                if state is not None:
                    for k, v in state.items():
                        setattr(parser, k, v)
                if what == "end":
                    ended = True
                    return
                if what == "error":
                    ended = True
                    raise item  # type: ignore[misc]
                yield item  # type: ignore[misc]
    finally:
        fh.close()
        if not ended:
            try:
                os.kill(pid, signal.SIGTERM)
            except OSError:
                pass
        try:
            os.waitpid(pid, 0)
        except OSError:
            pass


#: Recordings smaller than this are read in the replay's own thread: one or two blocks leave
#: nothing to overlap, and a test suite replays thousands of small files.
MIN_BYTES = 1 << 20


def choose(reader: str, kind: str, size: int) -> str:
    """How to read ahead a recording of ``size`` bytes: ``"process"``, ``"thread"`` or
    ``"none"`` (see the module docstring). ``STREAMCOND_READ_AHEAD`` = ``off``, ``thread`` or
    ``process`` forces one (``process`` still needs ``fork``)."""
    want = os.environ.get(ENV, "")
    if want == "off":
        return "none"
    if want == "thread":
        return "thread"
    if want == "process" and hasattr(os, "fork"):
        return "process"
    if size < MIN_BYTES:
        return "none"
    if can_fork():
        return "process"
    return "thread" if worth_it(reader, kind) else "none"


def worth_it(reader: str, kind: str) -> bool:
    """Read ahead with pyarrow's readers (they release the GIL): a Parquet or Arrow file, or CSV
    with the ``pyarrow`` or ``auto`` (pyarrow installed) block reader."""
    return kind in ("parquet", "arrow") or reader in ("pyarrow", "auto")
