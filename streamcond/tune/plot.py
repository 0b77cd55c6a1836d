"""``tune --plot``: the picture — trace with the band and its edges, a zoom on the worst chatter,
the sweep. A view of :class:`~streamcond.tune.analysis.TuneResult`."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..errors import InputError
from .analysis import EDGE_MARGIN_SIGMA, TuneResult
from .numbers import inline_table
from .reading import ChannelData
from .report import _g


def supported_extensions() -> set[str]:
    """The file extensions the plotting library can write here (without the dot)."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    return set(FigureCanvasAgg(Figure()).get_supported_filetypes())


def save(fig, path: str | Path) -> None:
    """Write the figure and close it; a path that cannot be written is one sentence."""
    import matplotlib.pyplot as plt

    try:
        fig.savefig(path)
    except OSError as e:
        raise InputError(f"The picture {str(path)!r} cannot be written: {e.strerror}") from None
    finally:
        plt.close(fig)


def readable_log_axis(axis) -> None:
    """Log-axis ticks a person can read between decades: 1, 2 and 5 times each power of ten,
    labelled as plain numbers (0.02, 0.05, 0.1, ...), the other eighths unlabelled."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda x, _pos: f"{x:.3g}"))
    axis.set_minor_locator(LogLocator(base=10.0, subs=(3.0, 4.0, 6.0, 7.0, 8.0, 9.0)))
    axis.set_minor_formatter(NullFormatter())


def show_band(ax, lo: float, hi: float, label_side: bool = True) -> None:
    """The band as a shaded strip with its two thresholds; on a trace whose range dwarfs the
    band (a 0.08 m band on a 3 m level), a strip a few points high drawn over the centre keeps
    it visible, and the thresholds are written at the right-hand edge."""
    ax.axhspan(lo, hi, color="C2", alpha=0.3, lw=0, zorder=1)
    ax.axhline(hi, color="darkgreen", lw=1.0, zorder=2)
    ax.axhline(lo, color="darkgreen", lw=1.0, zorder=2)
    y0, y1 = ax.get_ylim()
    if (hi - lo) < 0.02 * (y1 - y0):
        ax.axhline((lo + hi) / 2.0, color="C2", lw=5.0, alpha=0.45, zorder=1,
                   solid_capstyle="butt")
    if label_side:
        ax.annotate(f"band {_g(lo, 5)} – {_g(hi, 5)}", xy=(1.0, hi), xycoords=("axes fraction", "data"),
                    xytext=(-4, 4), textcoords="offset points", ha="right", va="bottom",
                    fontsize=8, color="darkgreen",
                    bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="none", alpha=0.8))


def worst_chatter(t: np.ndarray, v: np.ndarray, center: float) -> tuple[float, float, int]:
    """The stretch where a bare comparator at ``center`` flips most: (t0, t1, flips).

    Flips of ``v > center`` are counted in every window of 1 % of the recording (at least 20
    samples) starting at a flip; the densest window's flips, padded on both sides, are returned.
    """
    flips = np.flatnonzero(np.diff(v > center)) + 1
    dur = float(t[-1] - t[0])
    span = max(0.01 * dur, 20.0 * dur / max(t.size - 1, 1))
    if flips.size == 0:
        mid = float(t[t.size // 2])
        return mid - 2 * span, mid + 2 * span, 0
    tf = t[flips]
    j_end = np.searchsorted(tf, tf + span, side="right")
    cnt = j_end - np.arange(tf.size)
    i = int(np.argmax(cnt))
    a, b = float(tf[i]), float(tf[j_end[i] - 1])
    pad = max(0.75 * (b - a), span)
    return max(a - pad, float(t[0])), min(b + pad, float(t[-1])), int(cnt[i])


def plot(res: TuneResult, data: ChannelData, path: str | Path) -> None:
    """Trace with the suggested band and its edges, a zoom on the worst chatter, the sweep
    (a pulse channel gets its own picture: :func:`streamcond.tune.pulse.plot_pulse`)."""
    if res.mode == "pulse":
        from .pulse import plot_pulse

        plot_pulse(res, data, path)
        return
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    ulab = f" ({res.unit})" if res.unit else ""
    s = res.suggestion
    c = res.center
    lo = hi = None
    if s.width is not None:
        lo, hi = c - s.width / 2.0, c + s.width / 2.0
    t = data.t
    ty = t - data.delay_s  # the filtered trace, shifted back by the delay the edge times drop

    fig = plt.figure(figsize=(11.5, 12.0), dpi=100, layout="constrained")
    gs = fig.add_gridspec(3, 1, height_ratios=[1.0, 1.0, 1.35])
    ax1 = fig.add_subplot(gs[0])
    ax2 = fig.add_subplot(gs[1])
    ax3 = fig.add_subplot(gs[2])
    title = f"streamcond tune — channel {res.channel}"
    sub = (
        rf"noise $\hat\sigma$ = {_g(res.sigma)}{' ' + res.unit if res.unit else ''}, "
        rf"zero up-crossing rate $\nu_0$ = {_g(res.nu0_hz)} Hz; prefilter {res.filter_text}; "
        f"{res.samples:,} samples at {res.sample_rate_hz:g} Hz"
    )
    if res.fixed_band is not None and not res.reliable:
        sub += (
            f"\nsuggested from the plateau alone (the noise estimate is not reliable here): "
            f"band = {inline_table(res.fixed_band)}"
        )
    elif res.fixed_band is not None:
        verdict = "meets" if s.meets_target else "does NOT meet"
        sub += (
            f"\nsuggested: band = {inline_table(res.fixed_band)} — {verdict} the target of "
            f"{res.target_rate_per_hour:.3g} false edges per hour"
        )
    else:
        sub += "\nno band suggested: the edge count never settles (see the report)"
    fig.suptitle(title + "\n" + sub, fontsize=12)

    # 1. the whole trace
    step = max(1, t.size // 200_000)  # enough points for the eye, not for the file size
    vl = data.vl  # fault samples are gaps: they are no level (and may be any number)
    ax1.plot(t[::step], vl[::step], color="0.75", lw=0.6, label="scaled input")
    ax1.plot(ty[::step], data.y[::step], color="C0", lw=0.8, label="conditioned")
    edges = res.fixed_edge_records

    def mark_edges(ax, t0: float | None = None, t1: float | None = None) -> None:
        if lo is None:
            return
        show_band(ax, lo, hi)
        er = [r for r in edges if (t0 is None or t0 <= r["t"] <= t1)]
        # the threshold the conditioned signal crossed (before invert: rising input → upper)
        inv = data.channel.invert
        up = [r["t"] for r in er if (r["level"] == 1) != inv]
        dn = [r["t"] for r in er if (r["level"] == 1) == inv]
        ax.plot(up, [hi] * len(up), "^", color="C2", mec="k", mew=0.6, ms=8, zorder=5)
        ax.plot(dn, [lo] * len(dn), "v", color="C3", mec="k", mew=0.6, ms=8, zorder=5)

    mark_edges(ax1)
    ax1.axhline(c, color="k", lw=0.7, ls="--")
    ax1.set_xlim(float(t[0]), float(t[-1]))
    ax1.set_xlabel("sample time (s)")
    ax1.set_ylabel(f"{res.channel}{ulab}")
    ax1.grid(alpha=0.3)
    n_up = sum(1 for r in edges if r["level"] == 1)
    n_dn = len(edges) - n_up
    handles = [
        Line2D([], [], color="0.75", lw=1.2, label="scaled input"),
        Line2D([], [], color="C0", lw=1.2, label="conditioned"),
        Line2D([], [], color="k", lw=0.8, ls="--", label=f"centre {_g(c, 6)}"),
    ]
    if lo is not None:
        handles += [
            Patch(color="C2", alpha=0.3, label=f"suggested band, width {_g(s.width, 6)}"),
            Line2D([], [], ls="", marker="^", color="C2", mec="k", label=f"rising edges ({n_up})"),
            Line2D([], [], ls="", marker="v", color="C3", mec="k", label=f"falling edges ({n_dn})"),
        ]
    ax1.legend(handles=handles, loc="best", fontsize=8, ncol=2, framealpha=0.9)
    dw = " (with the channel's dwell)" if any(res.dwell) else ""
    ax1.set_title(f"Whole recording: the edges the suggested band gives{dw}", fontsize=10)

    # 2. zoom on the worst chatter of a bare comparator at the centre
    tg, vg = data.tg, data.vg
    z0, z1, _densest = worst_chatter(tg, vg, c)
    sel = (t >= z0) & (t <= z1)
    sely = (ty >= z0) & (ty <= z1)
    ax2.plot(t[sel], vl[sel], color="0.6", lw=0.8, marker=".", ms=2, label="scaled input")
    ax2.plot(ty[sely], data.y[sely], color="C0", lw=1.2, label="conditioned")
    selg = (tg >= z0) & (tg <= z1)
    vz, tz = vg[selg], tg[selg]
    fl = np.flatnonzero(np.diff(vz > c)) + 1
    if fl.size:
        ax2.plot(tz[fl], np.full(fl.size, c), "|", color="C3", ms=14, mew=1.2, zorder=4)
    ax2.axhline(c, color="k", lw=0.7, ls="--")
    mark_edges(ax2, z0, z1)
    vals = np.concatenate([vz, data.y[sely]]) if sely.any() else vz
    vals = vals[np.isfinite(vals)]
    ylo, yhi = (float(vals.min()), float(vals.max())) if vals.size else (c - 1.0, c + 1.0)
    if lo is not None:
        ylo, yhi = min(ylo, lo), max(yhi, hi)
    pad = 0.08 * (yhi - ylo or 1.0)
    ax2.set_ylim(ylo - pad, yhi + pad)
    ax2.set_xlim(z0, z1)
    ax2.set_xlabel("sample time (s)")
    ax2.set_ylabel(f"{res.channel}{ulab}")
    ax2.grid(alpha=0.3)
    nz = sum(1 for r in edges if z0 <= r["t"] <= z1)
    nflip = int(fl.size)  # the flips shown, in the same stretch as the edges counted
    gives = f"the suggested band gives {nz} edge{'s' if nz != 1 else ''}"
    if nflip > max(2, 1.2 * nz):
        ztitle = (
            f"Zoom on the worst chatter: a bare comparator at the centre flips {nflip} times "
            f"here (red ticks); {gives}"
        )
    else:
        ztitle = (
            f"Zoom on the busiest stretch: a bare comparator at the centre flips "
            f"{'once' if nflip == 1 else f'{nflip} times'} here (red ticks; no chatter); {gives}"
        )
    ax2.set_title(ztitle, fontsize=10)
    handles2 = [
        Line2D([], [], color="0.6", marker=".", lw=0.8, label="scaled input"),
        Line2D([], [], color="C0", lw=1.2, label="conditioned"),
        Line2D([], [], color="C3", ls="", marker="|", ms=10, mew=1.2,
               label="bare comparator flips"),
    ]
    if lo is not None:
        handles2.append(Patch(color="C2", alpha=0.3, label="suggested band"))
    ax2.legend(handles=handles2, loc="upper left", fontsize=8, framealpha=0.9)

    # 3. the sweep
    w = res.widths
    ax3.plot(w, res.edges, "o-", color="C0", ms=3, lw=1.2, label="edges, band alone")
    if res.edges_dwell is not None:
        ax3.plot(w, res.edges_dwell, "s--", color="C4", ms=2.5, lw=0.9,
                 label=f"edges with the dwell ({res.dwell[0]:g} s / {res.dwell[1]:g} s)")
    ax3.set_xscale("log")
    emax = int(max(res.edges.max(), 1))
    p = res.plateau
    if p is not None and emax > 20 * max(p.edges, 1):
        ax3.set_yscale("symlog", linthresh=max(1, p.edges))
    ax3.set_ylim(bottom=0)
    if p is not None:
        ax3.axvspan(p.width_min, p.width_max, color="C2", alpha=0.15, lw=0,
                    label=f"plateau: {p.edges} edges")
        if res.safe_min is not None and res.safe_max is not None and res.safe_max > res.safe_min:
            ax3.axvspan(res.safe_min, res.safe_max, ymax=0.04, color="C2", alpha=0.7, lw=0,
                        label=rf"safe part ({EDGE_MARGIN_SIGMA:g}$\hat\sigma$ inside each end)")
    # The suggestion is often the target's narrowest width rounded up, so the two lines lie
    # close together: different colour, style and width, and a labelled marker at different
    # heights, so that each can be told apart even when they touch.
    if s.width is not None:
        kk = f" (k = {s.k:.2f})" if s.k is not None else ""
        ax3.axvline(s.width, color="C2", lw=3.0, alpha=0.8, ls="-", zorder=3,
                    label=f"suggested {_g(s.width, 6)}{kk}")
        ax3.plot([s.width], [0.93], marker="v", ms=10, color="C2", mec="k",
                 transform=ax3.get_xaxis_transform(), zorder=6, clip_on=False)
        ax3.annotate("suggested", xy=(s.width, 0.93), xycoords=("data", "axes fraction"),
                     xytext=(8, -4), textcoords="offset points", fontsize=8, color="darkgreen")
    if math.isfinite(res.rice_width) and res.rice_width > 0:
        ax3.axvline(res.rice_width, color="C1", lw=1.4, ls=(0, (5, 2, 1, 2)), zorder=4,
                    label=f"narrowest for the target ({_g(res.rice_width)})")
        ax3.plot([res.rice_width], [0.78], marker="D", ms=7, color="C1", mec="k",
                 transform=ax3.get_xaxis_transform(), zorder=6, clip_on=False)
        ax3.annotate("narrowest for the target", xy=(res.rice_width, 0.78),
                     xycoords=("data", "axes fraction"), xytext=(-8, -4),
                     textcoords="offset points", ha="right", fontsize=8, color="C1")
    if res.configured_width is not None and w[0] <= res.configured_width <= w[-1]:
        ax3.axvline(res.configured_width, color="0.4", lw=1.0, ls="--",
                    label=f"configured now ({_g(res.configured_width)})")
    ax3.set_xlabel(f"band width{ulab}  (log scale)")
    ax3.set_ylabel("edges on this recording")
    ax3.grid(alpha=0.3, which="both")
    readable_log_axis(ax3.xaxis)
    h2: list = []
    l2: list = []
    if res.reliable and res.sigma > 0:
        sig = res.sigma
        sec = ax3.secondary_xaxis("top", functions=(lambda x: x / sig, lambda k: k * sig))
        sec.set_xlabel(r"k = width / $\hat\sigma$")
        readable_log_axis(sec.xaxis)
        ax3r = ax3.twinx()
        ax3r.plot(w, res.rates, color="C1", lw=1.2, label="predicted false edges/h (Rice)")
        ax3r.axhline(res.target_rate_per_hour, color="C1", lw=0.9, ls="--",
                     label=f"target {res.target_rate_per_hour:.3g}/h")
        ax3r.set_yscale("log")
        rmax = float(np.nanmax(res.rates))
        ax3r.set_ylim(max(min(res.target_rate_per_hour / 1e3, rmax / 1e6), 1e-12), rmax * 3)
        ax3r.set_ylabel("predicted false edges per hour (Rice)", color="C1")
        ax3r.tick_params(axis="y", colors="C1")
        h2, l2 = ax3r.get_legend_handles_labels()
    h1, l1 = ax3.get_legend_handles_labels()
    ax3.legend(h1 + h2, l1 + l2, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=4,
               fontsize=8, frameon=False)
    ax3.set_title("Sweep: edge count vs band width (the real transitions form the plateau)",
                  fontsize=10)
    save(fig, path)

