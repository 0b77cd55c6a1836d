"""The line parser: bad rows are skipped and counted, never fatal; results do not depend on
how the bytes were split into reads."""

from __future__ import annotations

import json

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from streamcond.io.lineparse import LineParser


def feed_all(parser: LineParser, data: bytes, cuts: list[int] | None = None):
    cuts = sorted(set(cuts or []))
    pieces = [data[a:b] for a, b in zip([0] + cuts, cuts + [len(data)])]
    rows, bad = [], 0
    for piece in pieces:
        p = parser.feed(piece)
        rows.append(p.rows)
        bad += p.bad
    p = parser.flush()
    rows.append(p.rows)
    bad += p.bad
    rows = [r for r in rows if r.size] or [np.empty((0, parser.ncols))]
    return np.concatenate(rows), bad


GOOD = b"t,a,b\n0,1.5,2\n1,-1e-3,+4\n2,3,4.25\n"


def test_header_and_rows():
    p = LineParser("csv", needed=["t", "a"])
    rows, bad = feed_all(p, GOOD)
    assert p.columns == ["t", "a", "b"]
    assert bad == 0
    np.testing.assert_array_equal(rows, [[0, 1.5, 2], [1, -1e-3, 4], [2, 3, 4.25]])


def test_bad_rows_skipped_and_counted():
    data = (
        b"t,a,b\n"
        b"0,1,2\n"
        b"1,x,2\n"  # non-numeric field
        b"2,1\n"  # wrong field count
        b"3,1,2,9\n"  # wrong field count
        b"nan,1,2\n"  # NaN time (letters: not numeric)
        b"5,1e999,2\n"  # overflows to infinity
        b"\x00\xff\xfe garbage \x80\n"  # binary junk
        b"6,,2\n"  # empty field
        b"7,1.2.3,2\n"  # malformed number
        b"\n"  # blank lines are not data and not errors
        b"8,1,2\n"
    )
    p = LineParser("csv", needed=["t", "a", "b"])
    rows, bad = feed_all(p, data)
    assert bad == 8
    np.testing.assert_array_equal(rows[:, 0], [0, 8])
    assert len(p.examples) == 5 and all(e.startswith("line ") for e in p.examples)


def test_no_header_needs_columns():
    # without columns, number lines before a header are bad lines (the reader of a file turns
    # "no header at all" into an input error, see test_replay)
    p = LineParser("csv")
    rows, bad = feed_all(p, b"0,1,2\n1,2,3\n")
    assert rows.shape[0] == 0 and bad == 2 and p.columns is None and p.before_header == 2
    p = LineParser("csv", columns=["t", "a", "b"])
    rows, bad = feed_all(p, b"0,1,2\n1,2,3\n")
    assert rows.shape == (2, 3) and bad == 0
    # a header that repeats the configured names is skipped
    p = LineParser("csv", columns=["t", "a", "b"])
    rows, _ = feed_all(p, b"t,a,b\n0,1,2\n")
    assert rows.shape == (1, 3)


def test_crlf_and_missing_final_newline():
    p = LineParser("csv")
    rows, bad = feed_all(p, b"t,a\r\n0,1\r\n1,2")
    assert bad == 0
    np.testing.assert_array_equal(rows, [[0, 1], [1, 2]])


def test_over_long_line_dropped():
    p = LineParser("csv", max_line_bytes=32)
    data = b"t,a\n0,1\n" + b"1" * 100 + b",2\n2,3\n"
    rows, bad = feed_all(p, data, cuts=[10, 20, 50])
    assert bad == 1
    np.testing.assert_array_equal(rows, [[0, 1], [2, 3]])


def test_kv_and_json():
    p = LineParser("kv", needed=["t", "a"])
    rows, bad = feed_all(p, b"t=0 a=1.5 b=7\nt=1,a=2\nt=2 b=3\nt=3 a=zz\ngarbage\n")
    assert bad == 3
    np.testing.assert_array_equal(rows, [[0, 1.5], [1, 2]])
    p = LineParser("json", needed=["t", "a"])
    lines = [json.dumps({"t": 0, "a": 1}), "{not json", json.dumps([1, 2]), json.dumps({"t": 1})]
    rows, bad = feed_all(p, ("\n".join(lines) + "\n").encode())
    assert bad == 3
    np.testing.assert_array_equal(rows, [[0, 1]])


@settings(deadline=None, max_examples=60)
@given(
    st.lists(st.integers(min_value=0, max_value=2000), max_size=12),
    st.lists(st.sampled_from([b"", b"x,1,2\n", b"1,2\n", b"\xff\xfe\n", b"nan,1,2\n",
                              b"1e999,1,2\n"]), max_size=6),
)
def test_any_split_of_the_bytes_gives_the_same_rows(cuts, junk):
    rng = np.random.default_rng(3)
    body = [b"t,a,b\n"]
    for i in range(150):
        body.append(f"{i},{rng.standard_normal():.6f},{rng.integers(0, 9)}\n".encode())
        if junk and i % 17 == 5:
            body.append(junk[i % len(junk)])
    data = b"".join(body)
    pw, ps = LineParser("csv", needed=["t", "a", "b"]), LineParser("csv", needed=["t", "a", "b"])
    whole, bad_whole = feed_all(pw, data)
    split, bad_split = feed_all(ps, data, [c % (len(data) + 1) for c in cuts])
    np.testing.assert_array_equal(whole, split)
    assert bad_whole == bad_split
    assert whole.shape[0] == 150
    # the messages too: the first bad lines in the order of the lines, however the bytes came
    # (an infinite value, 1e999, is found after the block's other bad lines)
    assert ps.examples == pw.examples
    numbers = [int(m.split(":")[0].split()[1]) for m in pw.examples]
    assert numbers == sorted(numbers)


# --- issue 9: strictness, limits and headers, each decided deliberately ----------------------


def test_json_huge_int_and_deep_nesting_are_bad_lines_not_crashes():
    p = LineParser("json", needed=["t", "a"])
    lines = [
        b'{"t":2,"a":1' + b"0" * 400 + b"}",  # 10^400: no double holds it (IEEE 754 max ~1.8e308)
        b"[" * 2000 + b"]" * 2000,  # deeper than Python's recursion limit (1000)
        b'{"t":3,"a":1}',
    ]
    rows, bad = feed_all(p, b"\n".join(lines) + b"\n")
    assert bad == 2
    np.testing.assert_array_equal(rows, [[3, 1]])


def test_json_only_numbers_are_numbers():
    # RFC 8259 section 6: a number is digits, fraction, exponent; true/"0.9"/null are other
    # types. NaN/Infinity are not JSON at all (Python's json accepts them unless told not to).
    p = LineParser("json", needed=["t", "a"])
    lines = [b'{"t":1,"a":true}', b'{"t":1,"a":"0.9"}', b'{"t":1,"a":null}', b'{"t":1,"a":NaN}',
             b'{"t":1,"a":Infinity}', b'{"t":1,"a":1e999}', b'{"t":1,"t":5,"a":1}',
             b'{"t":1,"a":0.25,"x":true}']
    rows, bad = feed_all(p, b"\n".join(lines) + b"\n")
    assert bad == 7
    np.testing.assert_array_equal(rows, [[1, 0.25]])


def test_kv_numbers_are_ascii_decimals_and_names_unique():
    p = LineParser("kv", needed=["t", "a"])
    data = "t=1 a=1_0\nt=1 a=\u0661\u0662\nt=1 a=2 t=9\nt=1 a=nan\nt=2;a=+.5\n".encode()
    rows, bad = feed_all(p, data)
    assert bad == 4  # float() would take 1_0 as 10 and Arabic-Indic digits as 12 (PEP 515)
    np.testing.assert_array_equal(rows, [[2, 0.5]])


def test_max_line_bytes_holds_in_a_clean_block():
    long_row = b"1," + b"0" * 300 + b"\n"  # a 303-byte row of numbers, nothing else wrong
    data = b"t,a\n" + b"0,1\n" * 1000 + long_row + b"2,3\n" * 1000
    for reader in ("numpy", "pyarrow"):
        rows, bad = feed_all(LineParser("csv", max_line_bytes=256, reader=reader), data)
        assert bad == 1 and rows.shape[0] == 2000


def test_a_line_longer_than_the_read_block_is_counted_once():
    data = b"t,a\n" + b"0,1\n" * 500 + b"7" * (3 << 20) + b"\n" + b"2,3\n" * 500
    p = LineParser("csv", max_line_bytes=4096)
    step = 1 << 20
    rows, bad = feed_all(p, data, cuts=list(range(step, len(data), step)))
    assert bad == 1 and rows.shape[0] == 1000
    assert p.examples == ["line 502: longer than 4096 bytes, dropped"]  # header is line 1


def test_a_header_that_comes_mid_stream_is_taken_up():
    # no `columns`: a board that starts mid-way, then resets and prints its header
    data = b"5,1,2\n6,1,2\nt,a,b\n0,1,2\n1,2,3\nt,a,b\n2,3,4\nt,x,y\n3,4,5\n"
    p = LineParser("csv", needed=["t", "a"])
    rows, bad = feed_all(p, data, cuts=[7, 20])
    assert p.columns == ["t", "a", "b"]
    assert bad == 3  # two lines before the header, one header naming other columns
    assert p.repeated_headers == 1
    np.testing.assert_array_equal(rows[:, 0], [0, 1, 2, 3])


def test_cr_only_line_ends_make_one_bad_line():
    p = LineParser("csv", columns=["t", "a"])
    rows, bad = feed_all(p, b"0,1\r1,2\r\n2,3\r\n")
    assert bad == 1
    np.testing.assert_array_equal(rows, [[2, 3]])
