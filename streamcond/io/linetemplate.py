"""Line templates: the fast path for kv and JSON lines that repeat one layout.

A device prints the same names in the same order on every line, so after one line has been
parsed the careful way (:func:`streamcond.io.lineparse._kv_row` / ``_json_row``), its layout
becomes a single compiled regular expression: the names as they were, the separators or JSON
whitespace free, a number group for every column the config reads. A later line that the
expression matches in full is one the careful parser would accept with exactly the values of
those groups, so its row is taken from them (``float`` of each, as the careful parser does);
any other line — names in another order, a name missing or given twice, a value that is not a
number, anything unusual — goes to the careful parser, which decides and counts it as before.
Measured on the benchmark's 4 MiB blocks: about half the time a line (kv 1.5 s → 0.64 s, JSON
0.91 s → 0.47 s a block, this machine).

Why a match is always a line the careful parser accepts, with the same values:

* **kv** — the careful parser strips spaces and tabs, splits on runs of ``[ \\t,;]`` and takes
  each part as ``name=value`` (split at the first ``=``); a name twice, a part without ``=``,
  a read column missing or not a number (the CSV number rule) makes the line bad; other names
  are ignored whatever their value. The template matches optional separators, then exactly the
  template's parts in order, separated by at least one separator: the template's name
  (distinct, without ``=`` or separators), ``=``, then for a read column that number rule's
  core (no spaces: they separate) and for another name any bytes but separators. Every match
  thus splits into the same parts with the same names and values.
* **json** — the template is taken only from an object whose members are all numbers, with the
  names as ``json.dumps`` writes them; it matches ``{``, the members in order with their
  names, ``:`` and a JSON number (RFC 8259 grammar, ASCII digits, as the C scanner reads them),
  commas, and JSON whitespace around every token. A match is valid JSON with distinct names
  whose values the careful parser reads as ``float`` of the same text (``parse_int=float``).
"""

from __future__ import annotations

import json
import re
from typing import Callable

#: The CSV/kv number rule without its surrounding spaces (see lineparse's _NUM_PAT).
_KV_NUMBER = rb"([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)"
_KV_SEP = rb"[ \t,;]"
_KV_VALUE = rb"[^ \t,;]*"
#: RFC 8259 section 6, ASCII digits only.
_JSON_NUMBER = rb"(-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][+-]?[0-9]+)?)"
_JSON_WS = rb"[ \t\r\n]*"

#: A template: the compiled expression's fullmatch, and the group index of every read column
#: in column order.
Template = tuple[Callable[[bytes], "re.Match[bytes] | None"], tuple[int, ...]]

_CACHE: dict[tuple, Template | None] = {}
_CACHE_MAX = 64


def _cached(key: tuple, build: Callable[[], Template | None]) -> Template | None:
    """The layout's template (None: the layout has none), built once per layout."""
    if key in _CACHE:
        return _CACHE[key]
    hit = build()
    if len(_CACHE) < _CACHE_MAX:
        _CACHE[key] = hit
    return hit


def kv_template(line: bytes, columns: list[str]) -> Template | None:
    """The template of a kv line the careful parser accepted (stripped of spaces and tabs)."""
    names = [p.partition(b"=")[0] for p in re.split(_KV_SEP + b"+", line) if p]
    want = [c.encode() for c in columns]

    def build() -> Template | None:
        if len(set(names)) != len(names) or not set(want) <= set(names):
            return None
        parts, group = [], {}
        for name in names:
            if name in want:
                group[name] = len(group) + 1
                parts.append(re.escape(name) + b"=" + _KV_NUMBER)
            else:
                parts.append(re.escape(name) + b"=" + _KV_VALUE)
        rx = re.compile(_KV_SEP + b"*" + (_KV_SEP + b"+").join(parts) + _KV_SEP + b"*")
        return rx.fullmatch, tuple(group[w] for w in want)

    return _cached(("kv", tuple(names), tuple(want)), build)


def json_template(obj_pairs: list[tuple[str, object]], columns: list[str]) -> Template | None:
    """The template of a JSON line the careful parser accepted, from its members in order;
    None unless every member is a number (a float after ``parse_int=float``)."""
    if not all(type(v) is float for _, v in obj_pairs):
        return None
    names = [k for k, _ in obj_pairs]

    def build() -> Template | None:
        if len(set(names)) != len(names) or not set(columns) <= set(names):
            return None
        group = {n: i + 1 for i, n in enumerate(names)}
        members = [
            re.escape(json.dumps(n).encode("ascii")) + _JSON_WS + b":" + _JSON_WS + _JSON_NUMBER
            for n in names
        ]
        body = (_JSON_WS + b"," + _JSON_WS).join(members)
        rx = re.compile(_JSON_WS + rb"\{" + _JSON_WS + body + _JSON_WS + rb"\}" + _JSON_WS)
        return rx.fullmatch, tuple(group[c] for c in columns)

    return _cached(("json", tuple(names), tuple(columns)), build)
