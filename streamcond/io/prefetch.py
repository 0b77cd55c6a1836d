"""Reading ahead: a block iterator run in a thread, one block ahead of its consumer.

pyarrow parses a CSV block, and reads a Parquet row group, with the GIL released, so while the
replay conditions block k on the main thread the next block can be read and parsed on the other
core. The iterator runs entirely in its own thread (the parser's state — line numbers, the
partial last line, bad-line counts — is touched by that thread alone, in the same order as
without it), and its items arrive in order, each exactly once, so the records are the same bit
for bit. An exception raised while reading arrives where its block would have: after every block
before it.

numpy's reader holds the GIL while it parses, so a thread would only add switching; the callers
read ahead only with pyarrow's readers (:func:`worth_it`).
"""

from __future__ import annotations

import queue
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

    Closing the returned generator (or an exception in the consumer) stops the thread at its
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
    try:
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


def worth_it(reader: str, kind: str) -> bool:
    """Read ahead with pyarrow's readers (they release the GIL): a Parquet or Arrow file, or CSV
    with the ``pyarrow`` or ``auto`` (pyarrow installed) block reader."""
    return kind in ("parquet", "arrow") or reader in ("pyarrow", "auto")
