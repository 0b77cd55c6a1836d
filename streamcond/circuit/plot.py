"""``--plot``: the schematic with the chosen values (schemdraw) beside the transfer
characteristic — output against input, the hysteresis loop — with the nominal, Monte Carlo
and worst-case thresholds. Both libraries are in the ``plot`` extra."""

from __future__ import annotations

import textwrap
from pathlib import Path

from ..errors import InputError
from .design import Design
from .eseries import format_ohms
from .report import mv_text


def _libraries():
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        import schemdraw
        import schemdraw.elements as elm
    except ImportError:
        raise InputError(
            "The picture needs matplotlib and schemdraw, which are not installed; install "
            "them with: pip install 'streamcond[plot]'"
        ) from None
    return plt, schemdraw, elm


def _label(d: Design, name: str) -> str:
    return f"{name}\n{format_ohms(d.choice.resistors[name])}"


def _reference(elm, d: Design):  # noqa: ANN001, ANN202
    """The symbol a leg returns to: ground, or a labelled reference voltage."""
    s = d.spec
    if s.ref is None:
        return elm.Ground()
    return elm.Dot(open=True).label(f"V_ref {s.ref:g} V", loc="left")


def draw_schematic(ax, d: Design) -> None:  # noqa: ANN001
    """The network on ``ax`` (+ input on top, − below)."""
    _plt, schemdraw, elm = _libraries()
    s = d.spec
    dw = schemdraw.Drawing(canvas=ax, show=False)
    dw.config(fontsize=10, unit=2.2)
    op = dw.add(elm.Opamp(leads=True).flip().anchor("center"))
    # the + node, a little left of the + input
    dw.add(elm.Line().at(op.in2).left(0.6))
    p = dw.add(elm.Dot())
    # the − input
    dw.add(elm.Line().at(op.in1).left(0.6))
    if s.circuit == "non-inverting":
        dw.add(elm.Line().down(0.8))
        dw.add(_reference(elm, d) if s.ref is None else
               elm.Dot().label(f"V_ref {s.ref:g} V", loc="bottom"))
    else:
        dw.add(elm.Line().down(1.2))
        dw.add(elm.Dot(open=True).label("V_in", loc="bottom"))
    # feedback: from the output up, over, down to the + node
    dw.add(elm.Line().at(op.out).right(0.6))
    o = dw.add(elm.Dot())
    dw.add(elm.Line().right(1.0))
    dw.add(elm.Dot(open=True).label("out", loc="right"))
    dw.add(elm.Line().at(p.center).up(2.0))
    dw.add(elm.Resistor().right().tox(o.center).label(_label(d, "r_feedback")))
    dw.add(elm.Line().down().toy(o.center))
    if s.open_drain:
        dw.add(elm.Line().at(o.center).right(0.5))
        dw.add(elm.Resistor().up(2.2).label(_label(d, "r_pullup"), loc="bottom"))
        dw.add(elm.Vdd().label(f"{s.v_pos:g} V"))
    # the leg(s) on the + node
    dw.add(elm.Line().at(p.center).left(0.8))
    q = dw.add(elm.Dot())
    if s.circuit == "inverting":
        dw.add(elm.Resistor().left().label(_label(d, "r_ref")))
        dw.add(elm.Line().down(0.6))
        dw.add(_reference(elm, d))
    elif s.circuit == "non-inverting":
        dw.add(elm.Resistor().left().label(_label(d, "r_in")))
        dw.add(elm.Dot(open=True).label("V_in", loc="left"))
    else:
        dw.add(elm.Resistor().left().label(_label(d, "r_top")))
        dw.add(elm.Vdd().label("supply" if s.ref is None else f"V_ref {s.ref:g} V"))
        dw.add(elm.Resistor().at(q.center).down().label(_label(d, "r_bottom"), loc="top"))
        dw.add(elm.Ground())
    dw.draw(show=False)
    ax.set_axis_off()
    ax.set_aspect("equal")


def draw_transfer(ax, d: Design) -> None:  # noqa: ANN001
    """Output against input: the loop with the nominal thresholds, worst case shaded."""
    ch, sp = d.choice, d.spread
    lo, hi = ch.low, ch.high
    span = max(hi - lo, sp.widest[1] - sp.widest[0])
    x0, x1 = min(sp.low[0], lo) - 0.6 * span, max(sp.high[1], hi) + 0.6 * span
    v_lo, v_hi = d.output_low, d.output_high
    # before the upper threshold the output is high for an inverted circuit, low otherwise
    a, b = (v_hi, v_lo) if d.inverted else (v_lo, v_hi)
    ax.plot([x0, hi, hi, x1], [a, a, b, b], color="C0", lw=2.0, label="input rising")
    ax.plot([x1, lo, lo, x0], [b, b, a, a], color="C3", lw=2.0, ls="--", label="input falling")
    ax.annotate("", xy=(hi, (a + b) / 2 + 0.1 * (b - a)), xytext=(hi, (a + b) / 2 - 0.1 * (b - a)),
                arrowprops=dict(arrowstyle="->", color="C0"))
    ax.annotate("", xy=(lo, (a + b) / 2 - 0.1 * (b - a)), xytext=(lo, (a + b) / 2 + 0.1 * (b - a)),
                arrowprops=dict(arrowstyle="->", color="C3"))
    ax.axvspan(*sp.low, color="C3", alpha=0.12, label="worst case (corners)")
    ax.axvspan(*sp.high, color="C0", alpha=0.12)
    for q in (*sp.mc_low, *sp.mc_high):
        ax.axvline(q, color="0.4", lw=0.8, ls=":")
    ax.plot([], [], color="0.4", lw=0.8, ls=":", label="Monte Carlo 0.1 % / 99.9 %")
    ax.axvline(d.spec.want_low, color="k", lw=0.8, ls="-.", alpha=0.6)
    ax.axvline(d.spec.want_high, color="k", lw=0.8, ls="-.", alpha=0.6, label="asked")
    m = d.margin
    if m is not None:
        ax.axvline(m.center, color="C2", lw=1.0, ls="--",
                   label=f"band centre; noise $\\hat\\sigma$ = {mv_text(m.sigma)}")
        ax.axvspan(m.center - m.sigma, m.center + m.sigma, color="C2", alpha=0.10)
    ax.set_xlim(x0, x1)
    pad = 0.08 * (v_hi - v_lo)
    ax.set_ylim(v_lo - pad, v_hi + pad)
    ax.set_xlabel("input (V)")
    ax.set_ylabel("output (V)")
    ax.set_title(f"transfer characteristic: thresholds {lo:.4f} V and {hi:.4f} V, "
                 f"hysteresis {mv_text(hi - lo)}", fontsize=10)
    ax.legend(loc="center right" if d.inverted else "center left", fontsize=8)
    ax.grid(alpha=0.3)


def plot(d: Design, path: str | Path) -> None:
    """Write the picture (PNG, SVG or PDF by the file's suffix)."""
    plt, _schemdraw, _elm = _libraries()
    from .report import verdict

    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(14.0, 6.0), dpi=100,
                                   gridspec_kw={"width_ratios": [1.1, 1.0]})
    try:
        draw_schematic(ax1, d)
        draw_transfer(ax2, d)
        s = d.spec
        head = (f"streamcond circuit — {s.circuit}, {s.output}, {s.series} "
                f"±{s.resistor_tolerance * 100:g} %")
        text = textwrap.fill(verdict(d), 150).replace("σ̂", r"$\hat\sigma$")
        fig.suptitle(head + "\n" + text, fontsize=10)
        fig.tight_layout()
        fig.savefig(path)
    except OSError as e:
        raise InputError(f"The picture {str(path)!r} cannot be written: {e.strerror}") from None
    finally:
        plt.close(fig)
