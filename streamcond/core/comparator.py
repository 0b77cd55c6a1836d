"""The hysteresis comparator: a software Schmitt trigger as a numpy block kernel.

A sample above the upper threshold is *decisive high*, one below the lower threshold is
*decisive low*; a sample inside the band decides nothing and the level it finds is carried
forward. The output level therefore changes only at a decisive sample whose class differs from
the class of the last decisive sample before it.

Why this shape is fast: the level can only change where a run of decisive-high samples (or of
decisive-low samples) *starts*. Run starts are sparse — a few per threshold crossing, even with
heavy chatter a small fraction of the samples — so the kernel makes two comparisons and one
change scan over the block (numpy passes, the scan over 64-bit words holding eight samples'
class codes) and then works only on the sparse list of run starts: in time order, a run start
is an edge exactly when its class differs from the previous run start's class (or from the
carried level at the block start). Run starts of the same class as the current level are
harmless, which is why the first sample of a block can always be treated as a run start and no
"previous sample" flags need carrying.

The block is processed in cache-sized sub-blocks, so the scratch arrays stay in the CPU cache
and only the first comparison reads the samples from memory; that puts the kernel on a par with
a single numpy threshold-and-difference pass over the same samples (see ``streamcond bench``).

Everything here is pure: arrays in, arrays out, the only state is the current level (an int).
"""

from __future__ import annotations

import sys
from dataclasses import dataclass

import numpy as np

#: Level before the first decisive sample.
UNKNOWN = -1

#: Samples per internal sub-block. 256 Ki float64 (2 MiB) plus three 256 KiB boolean scratch arrays:
#: small enough to stay in the outer caches, large enough that the per-sub-block Python overhead
#: vanishes. Measured on this machine: 32 Ki → 0.8×, 256 Ki → 1.1×, 16 Mi → 0.6× the bare numpy pass.
#: Below this many samples the one-byte-per-sample scan is cheaper (less set-up); live blocks
#: of a few milliseconds are that small.
_SMALL = 4096
#: At most this many samples: the per-sample loop (numpy's per-call overhead dominates).
_TINY = 64
_SUB = 1 << 18  # must stay a multiple of 8 (the word scan addresses sub-blocks in words)


@dataclass(frozen=True)
class Transitions:
    """Where the comparator's level changed inside one block.

    ``index`` are sample indices into the block (int64, ascending), ``level`` the new level (0|1)
    at each. When the level was :data:`UNKNOWN` at the block start, the first entry is the
    *initial* level (a ``state``, not an edge) and ``initial`` is True.
    """

    index: np.ndarray
    level: np.ndarray
    initial: bool

    def __len__(self) -> int:
        return int(self.index.size)


_EMPTY_I = np.empty(0, dtype=np.int64)
_EMPTY_L = np.empty(0, dtype=np.int8)


def hysteresis(
    x: np.ndarray,
    low: float | np.ndarray,
    high: float | np.ndarray,
    level: int = UNKNOWN,
) -> tuple[Transitions, int]:
    """Run the comparator over one block.

    ``x`` is a 1-D float64 array; ``low``/``high`` are scalars or arrays broadcastable to ``x``
    (a time-varying band) with ``low < high``. ``level`` is the level carried in from the previous
    block (``UNKNOWN``, 0 or 1). NaN samples are never decisive. Returns the transitions and the
    level to carry into the next block.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.size == 0:
        return Transitions(_EMPTY_I, _EMPTY_L, False), level
    if x.size <= _TINY:
        # a live block of a few samples: a plain loop beats a dozen numpy calls' overhead
        # (the same rule as the kernel; the tests hold both to the per-sample reference)
        start = level
        idx, lev, level = hysteresis_reference(x, low, high, level)
        return (
            Transitions(np.asarray(idx, np.int64), np.asarray(lev, np.int8), start == UNKNOWN and bool(idx)),
            level,
        )
    if sys.byteorder == "little" and x.size >= _SMALL:
        pos, typ = _run_starts_words(x, low, high)
    else:  # small blocks, or a big-endian machine (the word trick assumes little-endian)
        pos, typ = _run_starts_bytes(x, low, high)
    if pos.size == 0:
        return Transitions(_EMPTY_I, _EMPTY_L, False), level
    # A run start changes the level iff its class differs from the previous one's (the carried
    # level for the first). UNKNOWN (-1) differs from both classes, so the first run start of a
    # fresh comparator is kept too: it is the initial level.
    prev = np.empty_like(typ)
    prev[0] = level
    prev[1:] = typ[:-1]
    keep = typ != prev
    idx = pos[keep]
    lev = typ[keep]
    new_level = int(lev[-1]) if lev.size else level
    return Transitions(idx, lev, level == UNKNOWN and lev.size > 0), new_level


def _slices(x: np.ndarray, low, high):
    """Sub-blocks of ``x`` with their thresholds (scalars or matching slices)."""
    n = x.size
    scalar = np.ndim(low) == 0 and np.ndim(high) == 0
    if not scalar:
        low = np.broadcast_to(np.asarray(low, dtype=np.float64), x.shape)
        high = np.broadcast_to(np.asarray(high, dtype=np.float64), x.shape)
    for a in range(0, n, _SUB):
        b = min(a + _SUB, n)
        if scalar:
            yield a, x[a:b], low, high
        else:
            yield a, x[a:b], low[a:b], high[a:b]


def _run_starts_words(x: np.ndarray, low, high) -> tuple[np.ndarray, np.ndarray]:
    """Run starts of decisive samples, found eight samples at a time.

    Each sample gets a one-byte class code (1 decisive high, 2 decisive low, 0 in the band),
    written straight into the bytes of a uint64 word array from the two comparison masks. A word
    XORed with itself shifted by one byte (plus the carry byte from the previous word) is
    non-zero exactly where some sample's class differs from its predecessor's, so the scan for
    changes runs over n/8 words instead of n samples; only the few changed words are opened up.
    Bytes of a word are samples in increasing order on a little-endian machine.
    """
    n = x.size
    sub8 = (min(_SUB, n) + 7) & ~7
    w = sub8 // 8
    up = np.zeros(sub8, dtype=bool)
    dn = np.zeros(sub8, dtype=bool)
    # Class codes live at byte offset 8 of ``cbuf``; byte 7 stays 0 ("in the band" before each
    # sub-block), so a decisive first sample always counts as a run start — harmless when it
    # merely continues a run of the current level. Viewing the same bytes from offset 7 as
    # words gives every sample's predecessor, byte-aligned with it, at no cost.
    cbuf = np.zeros(sub8 + 16, dtype=np.uint8)
    code = cbuf[8 : 8 + sub8].view(np.uint64)
    nz = np.empty(w, dtype=bool)
    words: list[np.ndarray] = []
    diffs: list[np.ndarray] = []
    codes: list[np.ndarray] = []
    for a, xs, lo, hi in _slices(x, low, high):
        m = xs.size
        m8 = (m + 7) & ~7
        np.greater(xs, hi, out=up[:m])
        np.less(xs, lo, out=dn[:m])
        if m8 != m:
            up[m:m8] = False  # padding is "in the band": it starts no run
            dn[m:m8] = False
        k = m8 // 8
        c = code[:k]
        prev = cbuf[7 : 7 + m8].view(np.uint64)
        np.left_shift(dn[:m8].view(np.uint64), 1, out=c)
        np.bitwise_or(c, up[:m8].view(np.uint64), out=c)
        wi = np.flatnonzero(np.not_equal(c, prev, out=nz[:k]))
        if wi.size:
            cw = c[wi]
            words.append(wi + (a >> 3))
            diffs.append(cw ^ prev[wi])
            codes.append(cw)
    if not words:
        return _EMPTY_I, _EMPTY_L
    wi = np.concatenate(words)
    cb = np.concatenate(codes).view(np.uint8)
    # a run start: the class changed and the new class is decisive (entering the band
    # decides nothing)
    start = np.concatenate(diffs).view(np.uint8) != 0
    start &= cb != 0
    j = np.flatnonzero(start)
    pos = (wi[j >> 3] << 3) + (j & 7)
    return pos, (cb[j] == 1).view(np.int8)


def _run_starts_bytes(x: np.ndarray, low, high) -> tuple[np.ndarray, np.ndarray]:
    """The same as :func:`_run_starts_words`, one byte per sample (any byte order)."""
    sub = min(_SUB, x.size)
    up = np.empty(sub, dtype=bool)
    dn = np.empty(sub, dtype=bool)
    code = np.zeros(sub + 1, dtype=np.int8)  # code[0]: "in band" before each sub-block
    change = np.empty(sub, dtype=bool)
    pos_parts: list[np.ndarray] = []
    typ_parts: list[np.ndarray] = []
    for a, xs, lo, hi in _slices(x, low, high):
        m = xs.size
        u = np.greater(xs, hi, out=up[:m])
        d = np.less(xs, lo, out=dn[:m])
        c = code[1 : m + 1]
        np.subtract(u.view(np.int8), d.view(np.int8), out=c)
        at = np.flatnonzero(np.not_equal(c, code[:m], out=change[:m]))
        cls = c[at]
        dec = cls != 0
        if dec.any():
            pos_parts.append(at[dec] + a)
            typ_parts.append((cls[dec] > 0).view(np.int8))
    if not pos_parts:
        return _EMPTY_I, _EMPTY_L
    return np.concatenate(pos_parts), np.concatenate(typ_parts)


def hysteresis_reference(x, low, high, level: int = UNKNOWN) -> tuple[list[int], list[int], int]:
    """The straightforward per-sample loop doing the same hysteresis (for tests and the bench).

    Deliberately plain Python over ``x.tolist()``: it is the yardstick the vectorised kernel is
    measured against, and an independent statement of the rule.
    """
    idx: list[int] = []
    lev: list[int] = []
    xs = x.tolist()
    if np.ndim(low) == 0 and np.ndim(high) == 0:
        lo = float(low)
        hi = float(high)
        for i, v in enumerate(xs):
            if v > hi:
                if level != 1:
                    level = 1
                    idx.append(i)
                    lev.append(1)
            elif v < lo:
                if level != 0:
                    level = 0
                    idx.append(i)
                    lev.append(0)
        return idx, lev, level
    los = np.broadcast_to(low, x.shape).tolist()
    his = np.broadcast_to(high, x.shape).tolist()
    for i, v in enumerate(xs):
        if v > his[i]:
            if level != 1:
                level = 1
                idx.append(i)
                lev.append(1)
        elif v < los[i]:
            if level != 0:
                level = 0
                idx.append(i)
                lev.append(0)
    return idx, lev, level


# --- crossing instants ------------------------------------------------------------------------


def crossing_times(
    t: np.ndarray,
    x: np.ndarray,
    idx: np.ndarray,
    level: np.ndarray,
    low: float | np.ndarray,
    high: float | np.ndarray,
    prev_t: float,
    prev_x: float,
) -> np.ndarray:
    """Interpolated instants at which ``x`` crossed the threshold that fired each transition.

    For a transition to level 1 at sample ``i`` the firing threshold is ``high`` (``low`` for
    level 0); the instant is found by linear interpolation between samples ``i-1`` and ``i``,
    which straddle it: t = t[i-1] + (thr - x[i-1]) / (x[i] - x[i-1]) · (t[i] - t[i-1]).
    Sample ``-1`` is the last sample of the previous block (``prev_t``/``prev_x``, NaN before the
    first block, in which case the sample time itself is used).
    """
    idx = np.asarray(idx, dtype=np.int64)
    if idx.size == 0:
        return np.empty(0, dtype=np.float64)
    hi = high if np.ndim(high) == 0 else np.asarray(high)[idx]
    lo = low if np.ndim(low) == 0 else np.asarray(low)[idx]
    thr = np.where(level == 1, hi, lo)
    t1 = t[idx]
    x1 = x[idx]
    first = idx == 0
    im1 = np.where(first, 0, idx - 1)
    t0 = np.where(first, prev_t, t[im1])
    x0 = np.where(first, prev_x, x[im1])
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = (thr - x0) / (x1 - x0)
    # The band may have moved between the two samples (adaptive band): keep the instant
    # inside the sample interval.
    frac = np.clip(frac, 0.0, 1.0)
    tc = t0 + frac * (t1 - t0)
    return np.where(np.isfinite(tc), tc, t1)


# --- dwell (time qualification) ---------------------------------------------------------------


@dataclass
class DwellState:
    """State carried between blocks by :func:`qualified_hysteresis`.

    ``level`` is the comparator level; ``pend_*`` describe a run of samples past a threshold
    that was still open, and not yet confirmed, at the end of the last block.
    """

    level: int = UNKNOWN
    pend_class: int = -1
    pend_tc: float = float("nan")
    pend_value: float = float("nan")
    prev_t: float = float("nan")
    prev_x: float = float("nan")


@dataclass(frozen=True)
class QualifiedEdges:
    """Confirmed level changes in one block.

    ``emit`` is the sample index (into the block) at which each change was confirmed, ``t`` the
    crossing instant that started the confirmed run, ``value`` the first sample past the
    threshold (the value that fired it), ``level`` the new level. ``initial`` (index, level,
    t, value) is set when this block decided the first level of a fresh comparator.
    """

    emit: np.ndarray
    t: np.ndarray
    value: np.ndarray
    level: np.ndarray
    initial: tuple[int, int, float, float] | None


def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Starts and (exclusive) ends of the runs of True in ``mask``; an open last run ends at n."""
    n = mask.size
    starts = np.flatnonzero(mask[1:] > mask[:-1]) + 1
    ends = np.flatnonzero(mask[:-1] > mask[1:]) + 1
    if n and mask[0]:
        starts = np.concatenate((np.zeros(1, dtype=np.int64), starts))
    if n and mask[-1]:
        ends = np.concatenate((ends, np.array([n], dtype=np.int64)))
    return starts, ends


def qualified_hysteresis(
    t: np.ndarray,
    x: np.ndarray,
    low: float | np.ndarray,
    high: float | np.ndarray,
    rise_s: float,
    fall_s: float,
    st: DwellState,
) -> QualifiedEdges:
    """Hysteresis with time qualification (an on/off delay), updating ``st`` in place.

    A run of samples above ``high`` confirms a rising change once the signal has stayed above
    ``high`` for ``rise_s`` seconds of sample time counted from the interpolated crossing
    instant (the first sample with t ≥ t_cross + rise_s that is still in the run); a return to
    or below ``high`` before that cancels the candidate, and the next run starts afresh. Falling
    changes likewise with ``low`` and ``fall_s``. The confirmed edge keeps the crossing instant
    as its time. This is the on-delay/off-delay of alarm practice (ISA-18.2, from memory)
    applied to each threshold of the band.

    The first decisive sample of a fresh comparator sets its initial level without
    qualification (DESIGN.md: "state ... set by its first decisive sample").
    """
    x = np.asarray(x, dtype=np.float64)
    t = np.asarray(t, dtype=np.float64)
    n = x.size
    empty = QualifiedEdges(
        np.empty(0, np.int64), np.empty(0), np.empty(0), np.empty(0, np.int8), None
    )
    if n == 0:
        return empty
    up = x > high
    dn = x < low
    initial = None
    if st.level == UNKNOWN:
        dec = np.flatnonzero(up | dn)
        if dec.size == 0:
            st.prev_t, st.prev_x = float(t[-1]), float(x[-1])
            return empty
        p = int(dec[0])
        lev0 = 1 if up[p] else 0
        initial = (p, lev0, float(t[p]), float(x[p]))
        st.level = lev0
    emits: list[np.ndarray] = []
    tcs: list[np.ndarray] = []
    vals: list[np.ndarray] = []
    classes: list[np.ndarray] = []
    pend: tuple[int, float, float] | None = None
    for cls, mask, thr, dwell in ((1, up, high, rise_s), (0, dn, low, fall_s)):
        s, e = _runs(mask)
        if s.size == 0:
            continue
        lev_arr = np.full(s.size, cls, dtype=np.int8)
        tc = crossing_times(t, x, s, lev_arr, low, high, st.prev_t, st.prev_x)
        v = x[s]
        if s[0] == 0 and st.pend_class == cls:
            # this run continues the run left open by the previous block
            tc[0] = st.pend_tc
            v[0] = st.pend_value
        if dwell > 0:
            j = np.searchsorted(t, tc + dwell, side="left")
            j = np.maximum(j, s)
        else:
            j = s.copy()
        ok = j < e
        if e[-1] == n and not ok[-1]:
            pend = (cls, float(tc[-1]), float(v[-1]))
        emits.append(j[ok])
        tcs.append(tc[ok])
        vals.append(v[ok])
        classes.append(lev_arr[ok])
    if pend is not None:
        st.pend_class, st.pend_tc, st.pend_value = pend
    else:
        st.pend_class, st.pend_tc, st.pend_value = -1, float("nan"), float("nan")
    st.prev_t, st.prev_x = float(t[-1]), float(x[-1])
    if not emits:
        return QualifiedEdges(empty.emit, empty.t, empty.value, empty.level, initial)
    emit = np.concatenate(emits)
    order = np.argsort(emit, kind="stable")
    emit = emit[order]
    tc = np.concatenate(tcs)[order]
    val = np.concatenate(vals)[order]
    cl = np.concatenate(classes)[order]
    if initial is not None:
        # runs confirmed before the initial decision cannot exist (the initial sample is the
        # first decisive one), but the initial run itself may be listed: it is not an edge.
        keep0 = emit >= initial[0]
        emit, tc, val, cl = emit[keep0], tc[keep0], val[keep0], cl[keep0]
    if cl.size == 0:
        return QualifiedEdges(emit, tc, val, cl, initial)
    prev = np.empty_like(cl)
    prev[0] = st.level
    prev[1:] = cl[:-1]
    keep = cl != prev
    emit, tc, val, cl = emit[keep], tc[keep], val[keep], cl[keep]
    if cl.size:
        st.level = int(cl[-1])
    return QualifiedEdges(emit, tc, val, cl, initial)
