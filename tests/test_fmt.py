"""Tests of fitdyn.fmt: values rounded to their uncertainty."""

from __future__ import annotations

import math

import pytest

from fitdyn import fmt


@pytest.mark.parametrize(
    ("lo", "hi", "dec"),
    [
        (-0.2324, -0.1795, 3),  # width 0.0529 -> 0.053
        (280.0, 330.0, 0),  # width 50 -> 50
        (0.0, 1234.0, -2),  # width 1234 -> 1200
        (1.0, 1.00099, 5),  # width 0.00099 -> 0.00099
        (0.5, 0.5, None),  # no width
        (0.0, math.inf, None),  # unbounded
    ],
)
def test_two_significant_digits_of_the_width(lo, hi, dec):
    # common practice, no source: quote a value to the second significant digit of
    # its uncertainty
    assert fmt.decimals(lo, hi) == dec


def test_values_and_intervals_share_the_last_digit():
    assert fmt.value_interval(-0.20578, (-0.2324, -0.1795), "1/s") == (
        "-0.206 [-0.232, -0.179] 1/s"
    )
    assert fmt.value_interval(319.8, (280.0, 330.0)) == "320 [280, 330]"
    assert fmt.value_interval(319.8, (0.0, 1234.0)) == "300 [0, 1200]"
    # no interval: four significant digits
    assert fmt.value_interval(0.123456) == "0.1235"
    # a value that rounds to zero has no sign
    assert fmt.num(-0.00004, 4) == "0.0000"


def test_infinities_and_missing_values():
    assert fmt.num(math.inf) == "∞" and fmt.num(-math.inf) == "-∞"
    assert fmt.num(None) == "-" and fmt.num(float("nan")) == "-"
    assert fmt.interval((4.2, math.inf)) == "[4.2, ∞]"


def test_complex_parts_are_rounded_separately():
    z = complex(-0.20578, 1.99634)
    assert fmt.complex_value(z, (-0.2324, -0.1795), (1.970, 2.022)) == "-0.206 + 1.996i"
    assert fmt.complex_value(z.conjugate()) == "-0.2058 - 1.996i"
    assert fmt.complex_value(complex(-0.5, 0.0), (-0.6, -0.4)) == "-0.50"


def test_time_constant_unbounded_when_real_part_interval_contains_zero():
    # 1/|Re| with Re in [-0.004, 0.003]: the time constant can be arbitrarily long
    text = fmt.time_constant(319.8, (250.0, math.inf), (-0.004, 0.003), "s")
    assert text.startswith("∞ (unbounded: at least 250 s")
    assert "319" not in text
    assert fmt.time_constant(4.86, (4.31, 5.57), (-0.232, -0.180), "s") == "4.9 [4.3, 5.6] s"
    assert fmt.time_constant(math.inf) == "∞ (zero real part)"
    assert fmt.time_constant(2.0, unit="min") == "2 min"


def test_probabilities_never_round_to_certainty():
    assert fmt.prob(0.5) == "0.50" and fmt.prob(1.0) == "1.00" and fmt.prob(0.0) == "0.00"
    assert fmt.prob(0.001) == "< 0.01" and fmt.prob(0.9995) == "> 0.99"
    assert fmt.prob(None) == "-"


def test_units():
    assert fmt.rate_unit("s") == "1/s" and fmt.rate_unit(None) == ""
    assert fmt.with_unit("3", "K") == "3 K" and fmt.with_unit("3", None) == "3"
