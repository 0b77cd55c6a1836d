"""Shared memory between a reader child process and its consumer (see
:mod:`streamcond.io.prefetch`): an item's arrays cross in a shared slot instead of the pipe.

Pickle protocol 5 hands an item's contiguous buffers (numpy arrays) out of band (PEP 574):
they are written into one of :data:`SLOTS` slots of an anonymous shared mapping, which a fork
keeps shared, and the consumer copies them out once, into memory of its own, before it hands
the slot back with one byte on a pipe. Measured before: a 4 MiB block of rows took 3.1 ms
through the pipe (pickled, written, read, unpickled), the larger part of it in the consumer.
The pipe still carries the rest of the item (a few hundred bytes), and a whole item when it
has no array or one larger than a slot.
"""

from __future__ import annotations

import os
import pickle
import struct

#: Two slots: the child fills one while the consumer works on the block from the other.
SLOTS = 2
#: A slot holds a block's rows: 4 MiB of text makes at most about 5 MiB of float64 rows and
#: line numbers at the benchmark's line length; shorter lines that make more go by the pipe.
SLOT_BYTES = 8 << 20
_COST = struct.Struct("<d")


class SharedSlots:
    """The shared slots and the pipe on which the consumer hands a slot back (one byte each)."""

    def __init__(self) -> None:
        import mmap

        # anonymous and shared (a fork keeps it); after the slots, one float64: the consumer's
        # time per byte of a block (see report_cost)
        self.mm = mmap.mmap(-1, SLOTS * SLOT_BYTES + _COST.size)
        self.view = memoryview(self.mm)
        self.free_r, self.free_w = os.pipe()
        self.next = 0
        self.busy = 0  # slots filled and not yet handed back (child side)

    def in_child(self) -> None:
        """After the fork, in the child: it only reads the hand-backs."""
        self._close_fd("free_w")

    def in_consumer(self) -> None:
        """After the fork, in the consumer: it only writes the hand-backs."""
        self._close_fd("free_r")

    def _close_fd(self, name: str) -> None:
        fd = getattr(self, name)
        if fd >= 0:
            try:
                os.close(fd)
            except OSError:
                pass
            setattr(self, name, -1)

    # -- child ------------------------------------------------------------------------------
    def pack(self, obj: object) -> tuple[bytes, int, list[int]]:
        """``obj`` as (pickle, slot, buffer sizes); slot -1: no arrays, or too large for one."""
        bufs: list[pickle.PickleBuffer] = []
        data = pickle.dumps(obj, protocol=5, buffer_callback=bufs.append)
        if not bufs:
            return data, -1, []
        try:
            raws = [b.raw() for b in bufs]
        except BufferError:  # not contiguous: whole through the pipe
            raws = None
        if raws is None or sum(r.nbytes for r in raws) > SLOT_BYTES:
            return pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL), -1, []
        if self.busy == SLOTS:
            if not os.read(self.free_r, 1):
                raise BrokenPipeError  # the consumer is gone
            self.busy -= 1
        slot, self.next = self.next, (self.next + 1) % SLOTS
        self.busy += 1
        at = slot * SLOT_BYTES
        sizes = []
        for r in raws:
            self.view[at : at + r.nbytes] = r.cast("B")
            at += r.nbytes
            sizes.append(r.nbytes)
        return data, slot, sizes

    # -- consumer ---------------------------------------------------------------------------
    def unpack(self, data: bytes, slot: int, sizes: list[int]) -> object:
        if slot < 0:
            return pickle.loads(data)
        at = slot * SLOT_BYTES
        bufs = []
        for n in sizes:
            bufs.append(bytearray(self.view[at : at + n]))  # a writable copy of its own
            at += n
        try:
            os.write(self.free_w, b"\x01")  # the slot may be filled again
        except BrokenPipeError:
            pass  # the child has sent everything and left
        return pickle.loads(data, buffers=bufs)

    # -- both: the consumer's time per block, for the child's balance (a figure, not a lock:
    # a stale read only shifts the next block's share a little)
    def report_cost(self, seconds: float) -> None:
        """Consumer: the time it took over the last block (per byte of it)."""
        old = self.cost()
        new = seconds if old is None else 0.5 * seconds + 0.5 * old
        _COST.pack_into(self.mm, SLOTS * SLOT_BYTES, new)

    def cost(self) -> float | None:
        """The consumer's time per byte of a block (smoothed), None before the first."""
        v = _COST.unpack_from(self.mm, SLOTS * SLOT_BYTES)[0]
        return v if v > 0 else None

    def close(self) -> None:
        self._close_fd("free_r")
        self._close_fd("free_w")
        self.view.release()
        self.mm.close()
