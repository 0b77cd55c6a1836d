"""The two views of a :class:`~streamcond.watch.model.Snapshot`: a ``rich`` table refreshed in
place on a terminal, and plain text blocks (no colours, no cursor movement) for a pipe or a
log file."""

from __future__ import annotations

from typing import Any

from .model import Snapshot

COLUMNS = ["channel", "value", "band", "level", "σ̂", "margin σ̂", "edges/min", "age",
           "chatter", "trace vs band"]

_ZONE_STYLE = {"^": "green", "-": "yellow", "v": "cyan", " ": ""}


def _columns(s: Snapshot) -> list[str]:
    return [s.value_label if c == "value" else c for c in COLUMNS]


def plain(s: Snapshot, clock: str = "") -> str:
    """A text block: header lines and one aligned line per channel."""
    head = [f"{s.title}{('  ' + clock) if clock else ''}",
            f"  source: {s.source}",
            f"  broker: {s.broker}",
            f"  spool:  {s.spool}"]
    cells = [_columns(s)]
    for r in s.rows:
        chatter = "CHATTER" if r.chatter else ("pulses" if r.counting else "no")
        # the trace's zones as letters: ^ above the band, - inside, v below
        cells.append([r.name, r.value, r.band, r.level, r.sigma, r.margin, str(r.edges_minute),
                      r.age, chatter, r.zones.rstrip() or "—"])
    widths = [max(len(row[i]) for row in cells) for i in range(len(COLUMNS))]
    lines = ["  " + "  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip() for row in cells]
    for r in s.rows:
        if r.fault:
            lines.append(f"  {r.name}: sensor fault ({r.fault})")
    for n in s.notes:
        lines.append(f"  note: {n}")
    return "\n".join(head + lines) + "\n"


def rich_view(s: Snapshot, clock: str = "") -> Any:
    """A ``rich`` renderable: a header panel over the channel table."""
    from rich.console import Group
    from rich.panel import Panel
    from rich.table import Table
    from rich.text import Text

    header = Text()
    header.append("source  ", style="bold")
    header.append(s.source + "\n")
    header.append("broker  ", style="bold")
    header.append(s.broker + "\n")
    header.append("spool   ", style="bold")
    header.append(s.spool)
    for n in s.notes:
        header.append("\nnote    ", style="bold")
        header.append(n, style="magenta")
    table = Table(expand=False, header_style="bold")
    for c in _columns(s):
        table.add_column(c, justify="right" if c in ("value", "edge value", "σ̂", "margin σ̂", "edges/min", "age") else "left",
                         no_wrap=True)
    for r in s.rows:
        trace = Text()
        for ch, z in zip(r.trace, r.zones):
            trace.append(ch, style=_ZONE_STYLE.get(z, ""))
        level = Text(r.level, style="bold green" if r.level == "HIGH" else ("dim" if r.level == "?" else ""))
        chatter = (Text("CHATTER", style="bold red") if r.chatter
                   else Text("pulses" if r.counting else "no", style="dim"))
        name = Text(r.name, style="bold")
        if r.fault:
            name.append(f" ({r.fault})", style="red")
        table.add_row(name, r.value, r.band, level, r.sigma, r.margin, str(r.edges_minute),
                      r.age, chatter, trace)
    title = s.title + (f"  {clock}" if clock else "")
    legend = Text("trace: green above the band, yellow inside, cyan below", style="dim")
    return Group(Panel(header, title=title, title_align="left"), table, legend)
