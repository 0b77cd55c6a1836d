"""kv and JSON line templates (streamcond.io.linetemplate) change nothing but the speed: on any
mix of lines — the same layout repeated, names reordered, missing or given twice, separators and
whitespace of every kind, numbers valid and not by the rules — the parser with templates gives
the rows (bit for bit), bad-line count and messages of the careful parser alone. The reference is
the careful parser itself, whose rules the README states and test_lineparse checks against the
JSON standard (RFC 8259) and the CSV number rule."""

from __future__ import annotations

import json

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from streamcond.io import linetemplate
from streamcond.io.lineparse import LineParser

COLS = ["t", "a", "b"]

KV_VALUES = ["1", "-2.5", ".5", "3.", "1e5", "+7", "1E-3", "0", "-0", "1e999", "12345678901234567890",
             "", "abc", "1_0", "nan", "inf", "0x10", "1.2.3", "=3", "1e", "--1", "٣"]
JSON_VALUES = ["1", "-0", "1.5e3", "0.1", "12345678901234567890", "1E+2", "-1.25e-7", "1e999",
               "01", ".5", "+1", "1.", "NaN", "Infinity", "true", '"1"', "null", "[1]", "1e"]
SEPS = [" ", ",", ";", "\t", " ,", ";;", ", ", " \t "]
WS = ["", " ", "\t", "  ", "\r"]


@st.composite
def kv_line(draw):
    names = list(COLS) + draw(st.lists(st.sampled_from(["z", "x_1", "a.b", "é"]), max_size=2))
    if draw(st.booleans()):
        names = draw(st.permutations(names))
    if draw(st.integers(0, 9)) == 0:
        names.pop(draw(st.integers(0, len(names) - 1)))  # a name missing
    if draw(st.integers(0, 9)) == 0:
        names.append(draw(st.sampled_from(names or ["t"])))  # a name twice
    stable = draw(st.booleans())  # most lines of a device look alike
    parts = []
    for n in names:
        v = "1.5" if stable and n in COLS else draw(st.sampled_from(KV_VALUES))
        if n not in COLS and draw(st.booleans()):
            v = draw(st.sampled_from(["foo", "a=b", "", "1"]))
        parts.append(f"{n}={v}" if draw(st.integers(0, 19)) else n)  # now and then no '='
    sep = " " if stable else draw(st.sampled_from(SEPS))
    lead = "" if stable else draw(st.sampled_from(["", " ", ",", ";", "\t"]))
    trail = "" if stable else draw(st.sampled_from(["", " ", ",", ";", "\r"]))
    return (lead + sep.join(parts) + trail).encode("utf-8")


@st.composite
def json_line(draw):
    names = list(COLS) + draw(st.lists(st.sampled_from(["z", "n2", "é"]), max_size=2))
    if draw(st.booleans()):
        names = draw(st.permutations(names))
    if draw(st.integers(0, 9)) == 0:
        names.pop(draw(st.integers(0, len(names) - 1)))
    if draw(st.integers(0, 9)) == 0:
        names.append(draw(st.sampled_from(names or ["t"])))
    stable = draw(st.booleans())
    members = []
    for n in names:
        v = "2.5" if stable else draw(st.sampled_from(JSON_VALUES))
        if n not in COLS and draw(st.booleans()):
            v = draw(st.sampled_from(['"s"', "{}", '{"a":1}', "[1,2]", "true"]))
        key = json.dumps(n) if draw(st.integers(0, 9)) else '"\\u0061"' if n == "a" else json.dumps(n)
        w1, w2 = ("", "") if stable else (draw(st.sampled_from(WS)), draw(st.sampled_from(WS)))
        members.append(f"{key}{w1}:{w2}{v}")
    body = "{" + ",".join(members) + "}"
    if not stable and draw(st.integers(0, 9)) == 0:
        body = draw(st.sampled_from(["[1,2]", "{", '{"t":1,}', "\ufeff" + body, body + " x"]))
    return body.encode("utf-8")


def _parse(fmt: str, lines: list[bytes], templates: bool, monkeypatch):
    p = LineParser(fmt, needed=COLS)
    if not templates:
        monkeypatch.setattr(p, "_learn", lambda *a: None)
    out = p.feed(b"\n".join(lines) + b"\n")
    return out.rows.tobytes(), out.rows.shape, out.bad, out.examples, out.lines.tolist()


def _check(fmt, lines, monkeypatch):
    # a run of the first line's layout first, so that a template is learned and then met by
    # every variation after it
    lines = [lines[0]] * 3 + lines
    assert _parse(fmt, lines, True, monkeypatch) == _parse(fmt, lines, False, monkeypatch)


@settings(max_examples=300, deadline=None)
@given(st.lists(kv_line(), min_size=1, max_size=40))
def test_kv_templates_change_nothing(lines):
    import pytest

    with pytest.MonkeyPatch.context() as mp:
        _check("kv", lines, mp)


@settings(max_examples=300, deadline=None)
@given(st.lists(json_line(), min_size=1, max_size=40))
def test_json_templates_change_nothing(lines):
    import pytest

    with pytest.MonkeyPatch.context() as mp:
        _check("json", lines, mp)


def test_a_template_is_learned_and_used():
    """The repeated layout goes through the template (its rows are the careful parser's),
    a layout with a string member has none, and the values are float() of the text."""
    p = LineParser("kv", needed=COLS)
    out = p.feed(b"t=1 a=0.1 b=-2e-3 z=foo\n" * 3 + b"b=5 a=6 t=7\n")
    assert p._template is not None
    assert out.rows.tolist() == [[1.0, 0.1, -0.002]] * 3 + [[7.0, 6.0, 5.0]]
    fm, idx = linetemplate.kv_template(b"t=1 a=0.1 b=-2e-3 z=foo", COLS)
    assert fm(b"t=9,a=8;;b=7 z=x=y") is not None and fm(b"a=8 t=9 b=7 z=x") is None
    assert linetemplate.json_template([("t", 1.0), ("s", "x")], COLS) is None
    j = LineParser("json", needed=COLS)
    out = j.feed(b'{"t": 1, "a": 0.30000000000000004, "b": 12345678901234567890}\n' * 2)
    assert j._template is not None
    # reference: the standard library's json module, as the careful parser reads numbers
    ref = json.loads('{"t": 1, "a": 0.30000000000000004, "b": 12345678901234567890}',
                     parse_int=float)
    assert out.rows.tolist() == [[ref["t"], ref["a"], ref["b"]]] * 2
    assert np.isfinite(out.rows).all()
