"""Reading ahead: the recording is read and parsed on the other core while the replay
conditions the block before.

Two ways, the same records bit for bit (the parser is driven by one reader alone, in the same
order as without reading ahead; its items arrive in order, each once; an error arrives where
its block would have — after every block before it):

* :func:`read_in_child` — a forked child process runs the block iterator and sends each block
  (the parsed rows and the parser's counters): the rows in shared memory
  (:mod:`streamcond.io.sharedslots`), the rest through a pipe. Any reader gains: numpy's
  ``loadtxt`` and the kv/JSON line parsers hold the GIL, so in a thread they could not overlap
  the conditioning. Used where ``fork`` is safe: POSIX, more than one usable core, and a
  process with no other Python thread and no pyarrow thread pool yet (a fork copies only the
  calling thread, so a lock another thread held would stay locked in the child).
* :func:`read_ahead` — a thread, one block ahead. pyarrow parses a CSV block, and reads a
  Parquet row group, with the GIL released, so a thread is enough for its readers.

The shared slots are the back-pressure: the child fills a slot only once the replay has taken
the block out of it, so memory stays bounded by the block size.

Where the child is the slower side (numpy's CSV reader parses a block in about twice the time
its conditioning takes), it leaves the last part of each block for the consumer to parse
(:class:`streamcond.io.lineparse.Share`, :meth:`~streamcond.io.lineparse.LineParser.absorb`): the
share that evens the two sides out (:class:`_Balance`), from the child's measured parse time and
the consumer's time per block, which the consumer writes into the shared memory.

``streamcond replay`` forks its reader child *early* (:func:`start_early`), before the config
is loaded: the child imports the CSV reader (pyarrow, about 30 ms) while the replay loads its
config (pydantic and the config models, about 60 ms) on the other core, and then waits for its
job, the block iterator and its parser, which :func:`read_job_in_child` sends once the config
has said how to read the file. A job that never comes (a bad config, another file) ends with
the replay, which stops the child.
"""

from __future__ import annotations

import os
import pickle
import queue
import signal
import struct
import sys
import threading
import time
from collections.abc import Iterator
from typing import TypeVar

from .sharedslots import SharedSlots

T = TypeVar("T")

#: Blocks read ahead of the consumer: one keeps the other core busy; more would only hold more
#: memory (each block is up to the recording's block size, 4 MiB by default, plus its rows).
DEPTH = 1

_END = object()


class _Failed:
    def __init__(self, exc: BaseException) -> None:
        self.exc = exc


def read_ahead(blocks: Iterator[T], depth: int = DEPTH,
               sync: tuple[object, object] | None = None) -> Iterator[T]:
    """Yield the items of ``blocks``, produced by a thread that stays ``depth`` items ahead.

    The thread starts now, so the first block is read while the caller gets ready. Closing the
    returned generator (or an exception in the consumer, or dropping it) stops the thread at its
    next item and closes ``blocks``. ``sync = (source, target)``: ``blocks`` drives the parser
    ``source`` in the thread, and ``target`` takes its state (:data:`SYNCED`) as of each item
    when the consumer gets that item — as from a reader child — never while the thread is a
    block further on.
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

    def state() -> dict | None:
        if sync is None:
            return None
        return {k: (list(v) if isinstance(v, list) else v)
                for k in SYNCED for v in (getattr(sync[0], k),)}

    def run() -> None:
        try:
            for item in blocks:
                if not put((item, state())):
                    break
            else:
                put((_END, state()))
        except BaseException as e:  # handed to the consumer, raised there in order
            put((_Failed(e), state()))
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
                item, st = q.get()
                if st is not None:
                    for k, v in st.items():
                        setattr(sync[1], k, v)  # type: ignore[index]
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
    fh.flush()  # a message is a few hundred bytes: it must not wait in the buffer


def _recv(fh) -> object:
    head = fh.read(_LEN.size)
    if len(head) < _LEN.size:
        raise EOFError
    n = _LEN.unpack(head)[0]
    data = fh.read(n)
    if len(data) < n:
        raise EOFError
    return pickle.loads(data)


def _child(blocks: Iterator[T], parser: object, w: int, slots: SharedSlots) -> None:
    """The reader process: every item, then the end or the error; never returns."""
    code = 0
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
        slots.in_child()
        from . import fastcsv

        fastcsv.THREADS = False  # one core parses, the other conditions
        balance = None
        if getattr(parser, "sharing", False):
            balance = parser.share_of = _Balance(slots)  # type: ignore[attr-defined]
        with open(w, "wb") as fh:
            try:
                for item in _timed(blocks, balance):
                    _send(fh, ("item", *slots.pack(item), {k: getattr(parser, k) for k in SYNCED}))
                _send(fh, ("end", None, -1, [], {k: getattr(parser, k) for k in SYNCED}))
            except BrokenPipeError:
                raise
            except BaseException as e:
                try:
                    _send(fh, ("error", e, -1, [], None))
                except (pickle.PicklingError, TypeError, AttributeError):
                    _send(fh, ("error", RuntimeError(f"{type(e).__name__}: {e}"), -1, [], None))
    except BrokenPipeError:
        pass  # the parent stopped reading (an early stop, an interrupt): nothing to say
    except BaseException:
        code = 1
    finally:
        os._exit(code)


#: The pipe's buffer, where the system allows it (Linux: up to /proc/sys/fs/pipe-max-size,
#: 1 MiB by default): an item too large for a slot crosses in few writes.
PIPE_BYTES = 1 << 20


def _widen(fd: int) -> None:
    try:
        import fcntl

        fcntl.fcntl(fd, fcntl.F_SETPIPE_SZ, PIPE_BYTES)
    except (ImportError, AttributeError, OSError):
        pass  # not Linux, or a lower limit: the default buffer works, a little slower


def _fork(run, close_in_child: tuple[int, ...], close_here: tuple[int, ...],
          slots: SharedSlots) -> int:
    """Fork a reader child that runs ``run`` (which leaves by ``os._exit``); each side closes
    the pipe ends that belong to the other. Returns the child's pid."""
    sys.stdout.flush()  # or the child would print what this process had buffered, again
    sys.stderr.flush()
    pid = os.fork()
    if pid == 0:  # pragma: no cover - runs in the child, which leaves by os._exit
        for fd in close_in_child:
            os.close(fd)
        run()
    for fd in close_here:
        os.close(fd)
    slots.in_consumer()
    return pid


def read_in_child(blocks: Iterator[T], parser: object) -> Iterator[T]:
    """Yield the items of ``blocks``, produced by a child process forked now (so the first
    block is parsed while the caller gets ready); ``parser`` (the parser ``blocks`` drives) is
    kept up to date here with the child's (:data:`SYNCED`)."""
    slots = SharedSlots()
    r, w = os.pipe()
    _widen(w)
    pid = _fork(lambda: _child(blocks, parser, w, slots), close_in_child=(r,),
                close_here=(w,), slots=slots)
    gen = _from_child(open(r, "rb"), pid, parser, slots)
    next(gen)
    return gen


def _from_child(fh, pid: int, parser: object, slots: SharedSlots) -> Iterator[T]:
    ended = False
    absorb = getattr(parser, "absorb", None)
    done = 0
    try:
        yield None  # type: ignore[misc]  # primed by read_in_child: the finally now always runs
        with fh:
            while True:
                try:
                    what, data, slot, sizes, state = _recv(fh)
                except EOFError:
                    raise RuntimeError("the recording's reader process ended unexpectedly") from None
                item = slots.unpack(data, slot, sizes) if what == "item" else None
                if state is not None:
                    if absorb is not None:
                        absorb(item, state)  # parses what the child left, if anything
                    else:
                        for k, v in state.items():
                            setattr(parser, k, v)
                if what == "end":
                    ended = True
                    return
                if what == "error":
                    ended = True
                    raise data  # type: ignore[misc]
                t0 = time.perf_counter()
                yield item  # type: ignore[misc]
                if isinstance(item, tuple) and len(item) == 3 and isinstance(item[1], int):
                    # a text block, (parsed, bytes read so far, size): the consumer's time on
                    # it per byte of the file, for the child's balance — from the second on
                    # (the first carries the consumer's start: its pipeline is built then)
                    nbytes, first, done = item[1] - done, done == 0, item[1]
                    if nbytes > 0 and not first:
                        slots.report_cost((time.perf_counter() - t0) / nbytes)
    finally:
        fh.close()
        _reap(pid, stop=not ended)
        slots.close()


class _Balance:
    """In the reader child: the share of each block to leave to the consumer, so that both
    sides take as long per block. With p the child's parse time of a block and c the
    consumer's time on it (conditioning and writing), leaving a fraction f costs the child
    (1 - f)·p and the consumer f·p + c: equal at f = (p - c) / 2p, none when the consumer is the
    slower side. Both are measured per byte of the file (blocks differ in size: the first is
    small), p here on the bytes parsed, c by the consumer (shared memory), and smoothed over
    blocks, as the machine's speed moves."""

    #: Weight of the newest measurement in the running figures (an exponential average).
    ALPHA = 0.5
    #: The share before the consumer's first figure: the balance measured on the benchmark
    #: file (4 channels, a lowpass each: about a third), right within a block or two elsewhere.
    FIRST_GUESS = 1.0 / 3.0
    #: Never more than this share: the consumer parses with the same reader, so beyond half
    #: it would become the slower side whatever c is.
    MAX_SHARE = 0.5

    def __init__(self, slots: SharedSlots) -> None:
        self.slots = slots
        self.per_byte: float | None = None  # the child's parse time per byte

    def __call__(self, body_bytes: int) -> float:
        """The share of a block of ``body_bytes`` to leave (called before it is parsed)."""
        forced = os.environ.get(SHARE_ENV, "")
        if forced:
            try:
                return float(forced)
            except ValueError:
                return 0.0
        c_byte = self.slots.cost()
        if self.per_byte is None:
            return 0.0
        if c_byte is None:  # the consumer has not measured a block yet (its first is its start)
            return self.FIRST_GUESS
        p, c = self.per_byte * body_bytes, c_byte * body_bytes
        return min(self.MAX_SHARE, max(0.0, (p - c) / (2.0 * p))) if p > 0 else 0.0

    def parsed(self, nbytes: int, seconds: float) -> None:
        """The child parsed ``nbytes`` in ``seconds``."""
        if nbytes <= 0:
            return
        rate = seconds / nbytes
        a = self.ALPHA
        self.per_byte = rate if self.per_byte is None else a * rate + (1 - a) * self.per_byte


def _timed(blocks: Iterator[T], balance: _Balance | None) -> Iterator[T]:
    """``blocks``, telling ``balance`` how long the child took to read and parse each one (of
    text blocks, ``(parsed, bytes read so far, size)``: the bytes it parsed are those read
    minus the part it left)."""
    if balance is None:
        yield from blocks
        return
    it = iter(blocks)
    done0 = 0
    while True:
        t0 = time.perf_counter()
        try:
            item = next(it)
        except StopIteration:
            return
        dt = time.perf_counter() - t0
        parsed, done = item[0], item[1]  # type: ignore[index]
        left = parsed.share.body.nbytes if parsed.share is not None else 0
        balance.parsed(done - done0 - left, dt)
        done0 = done
        yield item


#: ``STREAMCOND_SHARE=0.3``: leave that share of every block to the consumer (tests; ``0``:
#: never), instead of the measured balance.
SHARE_ENV = "STREAMCOND_SHARE"


def _reap(pid: int, stop: bool) -> None:
    """Wait for a reader child to end; with ``stop``, end it first (it may be blocked
    writing, or waiting for a job)."""
    if stop:
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


# -- the early reader: forked before the replay has loaded its config -------------------------
class _Early:
    """A reader child waiting for its job: its pid, the job pipe, the rows pipe, the slots, and
    the file it was started for (device, inode, size, modification time)."""

    def __init__(self, pid: int, job_w: int, rows_r: int, slots: SharedSlots,
                 key: tuple[int, ...]) -> None:
        self.pid, self.job_w, self.rows_r, self.slots, self.key = pid, job_w, rows_r, slots, key

    def discard(self) -> None:
        """No job after all: the child is stopped (it has read nothing and holds nothing)."""
        for fd in (self.job_w, self.rows_r):
            if fd >= 0:
                try:
                    os.close(fd)
                except OSError:
                    pass
        _reap(self.pid, stop=True)
        self.slots.close()


_early: _Early | None = None


def _file_key(path: str) -> tuple[int, ...] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def start_early(path: str) -> bool:
    """Fork the reader child for the text recording ``path`` now, where :func:`choose` would
    fork one for it (a plain file of at least :data:`MIN_BYTES`, fork safe here, or
    ``STREAMCOND_READ_AHEAD=process``). It imports what reading needs and waits for
    :func:`read_job_in_child`. Returns whether it started."""
    global _early
    from .filekind import HEAD_BYTES, kind_of_head

    key = _file_key(path)
    if _early is not None or key is None or not os.path.isfile(path):
        return False
    try:
        with open(path, "rb") as fh:
            head = fh.read(HEAD_BYTES)
    except OSError:
        return False
    # the reader does not matter to choose() here: every reader is given a child where it forks
    if kind_of_head(head) != "text" or choose("numpy", "text", key[2]) != "process":
        return False
    # the reading modules (numpy among them) are imported before the fork, so that the two
    # processes share them: imported in each, they cost more CPU than the overlap saved
    # (measured: 1.06x the wall time of a replay)
    from . import capture, recording  # noqa: F401

    slots = SharedSlots()
    job_r, job_w = os.pipe()
    rows_r, rows_w = os.pipe()
    _widen(rows_w)
    pid = _fork(lambda: _early_child(job_r, rows_w, slots), close_in_child=(job_w, rows_r),
                close_here=(job_r, rows_w), slots=slots)
    _early = _Early(pid, job_w, rows_r, slots, key)
    import atexit

    atexit.register(_discard_early)
    return True


def _discard_early() -> None:
    global _early
    if _early is not None:
        early, _early = _early, None
        early.discard()


def _early_child(job_r: int, rows_w: int, slots: SharedSlots) -> None:  # pragma: no cover - child
    """Import the CSV reader, then run the job that comes (or leave when none does)."""
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
        from . import fastcsv

        try:
            wanted = fastcsv.choose(None)
        except ValueError:
            wanted = "numpy"  # the replay reports the setting; here it only skips an import
        if wanted in ("auto", "pyarrow"):
            fastcsv._arrow()  # about 30 ms, while the replay loads its config on the other core
        with open(job_r, "rb") as fh:
            fn, args = _recv(fh)
    except BaseException:
        os._exit(0)  # no job: the replay closed the pipe (a bad config, another file)
    _child(iter(fn(*args)), args[1], rows_w, slots)


def read_job_in_child(fn, args: tuple, parser: object, path: str) -> Iterator[T]:
    """:func:`read_in_child` of ``fn(*args)`` (``parser``, which is kept up to date, is
    ``args[1]``), run by the early child started for ``path`` if there is one (``fn`` and
    ``args`` go to it pickled), else by a child forked now."""
    global _early
    early, _early = _early, None
    if early is not None and early.key != _file_key(str(path)):
        early.discard()  # started for another file, or the file changed since
        early = None
    if early is not None:
        fh = open(early.job_w, "wb")
        early.job_w = -1  # fh owns it now
        try:
            with fh:
                _send(fh, (fn, args))
        except (OSError, pickle.PicklingError, TypeError, AttributeError):
            early.discard()  # gone, or a job it cannot take: a child forked now reads
            early = None
    if early is None:
        return read_in_child(iter(fn(*args)), parser)
    gen = _from_child(open(early.rows_r, "rb"), early.pid, parser, early.slots)
    next(gen)
    return gen
