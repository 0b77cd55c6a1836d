"""The sweep of band widths and the plateau of the edge count (steps 3 and 4 of the method in
:mod:`streamcond.tune`): pure functions of the conditioned samples."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..config import AdaptiveBand, Channel, FixedBand
from .reading import ChannelData

#: points, continued with the same ratio (about 6.8 % per step) while the band still fits inside
#: the signal's excursions, at most SWEEP_MAX_POINTS points in all.
SWEEP_K_MIN: float = 0.25
SWEEP_K_BASE_MAX: float = 12.0
SWEEP_BASE_POINTS: int = 60
SWEEP_MAX_POINTS: int = 400
#: Fewest consecutive sweep points with the same count that make a plateau (a width ratio of
#: about 1.068³ ≈ 1.22).
MIN_PLATEAU_POINTS: int = 4
#: When the plateau reaches down to the narrowest width swept, the sweep goes on downward with
#: the same ratio for at most this many points, down to at most reach·DOWN_LIMIT.
DOWN_MAX_POINTS: int = 120
DOWN_LIMIT: float = 1e-5
#: The adaptive alternative is replayed on at most this many samples (its noise tracker is the


def band_center(channel: Channel) -> float:
    band = channel.band
    if isinstance(band, (FixedBand, AdaptiveBand)):
        return float(band.center)
    raise TypeError(f"unknown band {band!r}")  # pragma: no cover


def sweep_widths(sigma: float, reach: float) -> np.ndarray:
    """Log-spaced widths from SWEEP_K_MIN·σ to SWEEP_K_BASE_MAX·σ, continued to ``reach``.

    ``reach`` is the width beyond which no edge can fire (twice the smaller excursion of the
    signal past the centre); the grid keeps its ratio and goes one step past it.
    """
    ratio = (SWEEP_K_BASE_MAX / SWEEP_K_MIN) ** (1.0 / (SWEEP_BASE_POINTS - 1))
    n = SWEEP_BASE_POINTS
    top = SWEEP_K_BASE_MAX * sigma
    if reach > top:
        extra = math.ceil(math.log(reach / top) / math.log(ratio)) + 1
        n = min(SWEEP_MAX_POINTS, n + extra)
    return SWEEP_K_MIN * sigma * ratio ** np.arange(n, dtype=np.float64)


def _extend_down(
    data: ChannelData,
    center: float,
    widths: np.ndarray,
    edges: np.ndarray,
    edges_dwell: np.ndarray | None,
    reach: float,
    plateau_edges: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Sweep below the narrowest width until the count leaves the plateau (plus two points)."""
    ratio = float(widths[1] / widths[0])
    rise, fall = float(data.channel.dwell.rise_s), float(data.channel.dwell.fall_s)
    new_w: list[float] = []
    new_e: list[int] = []
    new_d: list[int] = []
    w = float(widths[0])
    after = -1
    for _ in range(DOWN_MAX_POINTS):
        w /= ratio
        if w < reach * DOWN_LIMIT:
            break
        e = count_edges(data.yg, center, w)
        new_w.append(w)
        new_e.append(e)
        if edges_dwell is not None:
            new_d.append(
                count_edges_dwell(data.tg, data.yg, center, w, rise, fall, data.segment_starts)
            )
        if after < 0 and e != plateau_edges:
            after = 2
        elif after > 0:
            after -= 1
        if after == 0:
            break
    if not new_w:
        return widths, edges, edges_dwell
    widths = np.concatenate((np.array(new_w[::-1]), widths))
    edges = np.concatenate((np.array(new_e[::-1], dtype=np.int64), edges))
    if edges_dwell is not None:
        edges_dwell = np.concatenate((np.array(new_d[::-1], dtype=np.int64), edges_dwell))
    return widths, edges, edges_dwell


def count_edges(y: np.ndarray, center: float, width: float) -> int:
    """Edges a bare band of ``width`` around ``center`` gives on ``y`` (the initial level is
    not an edge)."""
    from ..core.comparator import hysteresis

    tr, _ = hysteresis(y, center - width / 2.0, center + width / 2.0)
    return len(tr) - (1 if tr.initial else 0)


def count_edges_dwell(
    t: np.ndarray,
    y: np.ndarray,
    center: float,
    width: float,
    rise_s: float,
    fall_s: float,
    segment_starts: np.ndarray | None = None,
) -> int:
    """Edges with time qualification (the channel's dwell).

    ``segment_starts`` are the indices where a stretch after a sensor fault begins: as in the
    channel chain, the level is held across the fault, and a dwell candidate open when the
    fault began is void (no run is timed across a fault).
    """
    from ..core.comparator import DwellState, qualified_hysteresis

    lo, hi = center - width / 2.0, center + width / 2.0
    st = DwellState()
    bounds = [0, *(segment_starts.tolist() if segment_starts is not None else []), y.size]
    n = 0
    for a, b in zip(bounds[:-1], bounds[1:]):
        if a > 0:
            st.prev_t = st.prev_x = float("nan")
            st.pend_class = -1
        q = qualified_hysteresis(t[a:b], y[a:b], lo, hi, rise_s, fall_s, st)
        n += int(q.emit.size)
    return n


@dataclass(frozen=True)
class Plateau:
    """The run of sweep points ``[first, last]`` (inclusive) with the same edge count."""

    first: int
    last: int
    edges: int
    width_min: float
    width_max: float
    open_below: bool  # the run starts at the first sweep point (its end may lie lower)
    open_above: bool  # the run ends at the last sweep point

    @property
    def points(self) -> int:
        return self.last - self.first + 1


def find_plateau(widths: np.ndarray, edges: np.ndarray) -> Plateau | None:
    """The longest run of consecutive sweep points with the same non-zero edge count.

    Ties (equally long runs) go to the run with more edges, the one that keeps more of the
    transitions. None when no run reaches :data:`MIN_PLATEAU_POINTS`.
    """
    e = np.asarray(edges)
    if e.size == 0:
        return None
    change = np.flatnonzero(e[1:] != e[:-1]) + 1
    starts = np.concatenate(([0], change))
    ends = np.concatenate((change, [e.size])) - 1
    best: tuple[int, int, int] | None = None  # (length, edges, start index in runs)
    for j, (a, b) in enumerate(zip(starts.tolist(), ends.tolist())):
        cnt = int(e[a])
        if cnt == 0:
            continue
        key = (b - a + 1, cnt)
        if best is None or key > best[:2]:
            best = (key[0], key[1], j)
    if best is None or best[0] < MIN_PLATEAU_POINTS:
        return None
    a, b = int(starts[best[2]]), int(ends[best[2]])
    return Plateau(
        first=a,
        last=b,
        edges=int(e[a]),
        width_min=float(widths[a]),
        width_max=float(widths[b]),
        open_below=a == 0,
        open_above=b == e.size - 1,
    )

