"""The preferred-number series against IEC 60063, and resistance text."""

from __future__ import annotations

import numpy as np
import pytest

from streamcond.circuit import eseries

# IEC 60063 tables (from memory).
IEC_E6 = [1.0, 1.5, 2.2, 3.3, 4.7, 6.8]
IEC_E12 = [1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2]
IEC_E24 = [1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0,
           3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6, 6.2, 6.8, 7.5, 8.2, 9.1]
IEC_E96 = [int(x) / 100 for x in """
100 102 105 107 110 113 115 118 121 124 127 130 133 137 140 143 147 150 154 158 162 165 169 174
178 182 187 191 196 200 205 210 215 221 226 232 237 243 249 255 261 267 274 280 287 294 301 309
316 324 332 340 348 357 365 374 383 392 402 412 422 432 442 453 464 475 487 499 511 523 536 549
562 576 590 604 619 634 649 665 681 698 715 732 750 768 787 806 825 845 866 887 909 931 953 976
""".split()]


def test_tables_are_iec_60063():
    # IEC 60063, from memory
    assert eseries.mantissas("E6").tolist() == IEC_E6
    assert eseries.mantissas("E12").tolist() == IEC_E12
    assert eseries.mantissas("E24").tolist() == IEC_E24


def test_e96_and_e48_generated_match_iec_60063():
    # IEC 60063 E96 table, from memory; E48 is every other E96 value (same standard)
    assert len(IEC_E96) == 96
    assert eseries.mantissas("E96").tolist() == IEC_E96
    assert eseries.mantissas("E48").tolist() == IEC_E96[::2]


def test_coarse_series_nest():
    # IEC 60063: each coarse series is every other value of the next finer one
    assert IEC_E12 == IEC_E24[::2]
    assert IEC_E6 == IEC_E12[::2]


def test_the_coarse_tables_differ_from_the_formula():
    # why E24 is a table: 10^(i/24) to two figures is 2.6, 2.9, ... where IEC has 2.7, 3.0, ...
    formula = np.round(10 ** (np.arange(24) / 24), 1)
    assert (formula != np.array(IEC_E24)).sum() == 8


def test_values_in_range():
    v = eseries.values("E12", 1e3, 1e6)
    assert v[0] == 1000.0 and v[-1] == 1e6
    assert v.size == 3 * 12 + 1
    assert 4700.0 in v and 82000.0 in v and 470000.0 in v
    assert np.all(np.diff(v) > 0)
    # neighbours are about one step apart: 10^(1/12) ≈ 1.21 (IEC values deviate a little)
    r = v[1:] / v[:-1]
    assert r.min() > 1.1 and r.max() < 1.3


@pytest.mark.parametrize("text, ohms", [
    ("4k7", 4700.0), ("4.7k", 4700.0), ("1M", 1e6), ("470", 470.0), ("1R5", 1.5),
    ("10 kΩ", 10e3), ("2M2", 2.2e6), ("100n", 100e-9),
])
def test_parse_value(text, ohms):
    # IEC 60062 letter-for-decimal-point marking (4k7 = 4.7 kΩ), from memory
    assert eseries.parse_value(text) == pytest.approx(ohms)


@pytest.mark.parametrize("text", ["", "k", "4.7k7", "-1k", "abc", "0"])
def test_parse_value_rejects(text):
    with pytest.raises(ValueError):
        eseries.parse_value(text)


def test_format():
    assert eseries.format_ohms(4700.0) == "4.7 kΩ"
    assert eseries.format_ohms(1e6) == "1 MΩ"
    assert eseries.format_farads(100e-9) == "100 nF"
