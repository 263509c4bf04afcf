"""Tests of dspeq.expr: SI numbers, rational expressions in s, zeros/poles/gain."""

from __future__ import annotations

import builtins
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy import signal

from dspeq._errors import ExpressionError
from dspeq.expr import MAX_DEPTH, parse_rational, parse_si_number, parse_zpk

# RIAA playback time constants, IEC 60098 (per /work/shared/REFERENCES.md).
T_RIAA_1, T_RIAA_2, T_RIAA_3 = 3180e-6, 318e-6, 75e-6
RIAA = "(1 + s*318u) / ((1 + s*3180u)(1 + s*75u))"


def zpk_response(z, p, k, w):
    """H(jw) = k prod(jw - z) / prod(jw - p), via scipy."""
    return signal.freqs_zpk(z, p, k, worN=w)[1]


# ----------------------------------------------------------- SI numbers

# SI prefixes: BIPM SI Brochure, 9th ed. (2019), Table 7; "4k7"/"2u2" (prefix as decimal
# point) is IEC 60062 resistor/capacitor marking.  Each expected value is the Python
# literal of the same decimal number, so equality is exact (both correctly rounded).
SI_CASES = [
    ("22k", 22e3), ("10n", 10e-9), ("2u2", 2.2e-6), ("4k7", 4700.0), ("1.5M", 1.5e6),
    ("3180u", 3180e-6), ("75e-6", 75e-6), ("100p", 100e-12), ("0.1u", 0.1e-6),
    ("0.1\u00b5", 0.1e-6), ("0.1\u03bc", 0.1e-6), ("2m", 2e-3), ("1G", 1e9), ("3f", 3e-15),
    ("5T", 5e12), (".5k", 500.0), ("7", 7.0), ("1.E3", 1e3), (" -1.5k ", -1500.0),
    ("+2n", 2e-9), ("1M2", 1.2e6),
]  # fmt: skip


@pytest.mark.parametrize(("text", "expected"), SI_CASES)
def test_si_number(text, expected):
    assert parse_si_number(text) == expected


@pytest.mark.parametrize(
    ("text", "position"),
    [
        ("", 0),  # empty
        ("k", 0),  # prefix without digits
        ("22k ohm", 4),  # unit letters are not handled here
        ("1.2.3", 3),
        ("1e", 1),  # 'e' without exponent digits
        ("4k7k", 3),
        ("1e3k", 3),  # prefix after an exponent is not accepted
        ("2pi", 1),  # a name, not a number
        ("1e999", 0),  # overflows to inf
    ],
)
def test_si_number_errors(text, position):
    with pytest.raises(ExpressionError) as info:
        parse_si_number(text)
    assert info.value.position == position
    assert isinstance(info.value, ValueError)


def test_si_number_rejects_non_string():
    with pytest.raises(ExpressionError, match="expected a string"):
        parse_si_number(22000)


# ----------------------------------------------------- rational structure


def test_riaa_keeps_its_factors():
    num, den, k = parse_rational(RIAA)
    assert [f.tolist() for f in num] == [[T_RIAA_2, 1.0]]
    assert [f.tolist() for f in den] == [[T_RIAA_1, 1.0], [T_RIAA_3, 1.0]]
    assert k == 1.0


@pytest.mark.parametrize(
    ("text", "num", "den", "const"),
    [
        ("1/s", [], [[1, 0]], 1.0),
        ("(1+s*50e-6)/s", [[50e-6, 1]], [[1, 0]], 1.0),
        # s^2 + 2s + 1: a sum is expanded into one factor
        ("s^2 + 2*s + 1", [[1, 2, 1]], [], 1.0),
        # a power repeats the factor
        ("(s+1)**2/(s+2)", [[1, 1], [1, 1]], [[1, 2]], 1.0),
        ("1e3/(s + 2*pi*50)", [], [[1, 2 * math.pi * 50]], 1e3),
        ("-(1+s)", [[1, 1]], [], -1.0),
        ("2s", [[1, 0]], [], 2.0),
        ("3180u s", [[1, 0]], [], 3180e-6),
        # juxtaposition binds tighter than '/': 1/2s = 1/(2s)
        ("1/2s", [], [[1, 0]], 0.5),
        ("1/(1+s)(1+2s)", [], [[1, 1], [2, 1]], 1.0),
        # 2·pi·s with a space before s; 2pi is the name pi, not 2 pico
        ("2pi s", [[1, 0]], [], 2 * math.pi),
        # 318us = 318e-6 * s
        ("318us + 1", [[318e-6, 1]], [], 1.0),
        # 1/(s+1) + 1/(s+2) = ((s+2) + (s+1)) / ((s+1)(s+2)) = (2s+3)/((s+1)(s+2))
        ("1/(s+1) + 1/(s+2)", [[2, 3]], [[1, 1], [1, 2]], 1.0),
        # 1/s + 1/s = 2/s over the common denominator s (not 2s/s^2)
        ("1/s + 1/s", [], [[1, 0]], 2.0),
        # (s+1)/s - 1 = ((s+1) - s)/s = 1/s
        ("(s+1)/s - 1", [], [[1, 0]], 1.0),
        # 0.1s + 0.2s - 0.3s = 0 (the rounding residue 5.6e-17 s is dropped)
        ("0.1*s + 0.2*s - 0.3*s", [], [], 0.0),
        # 0·(1/s) is zero; zero has no factors
        ("0/s", [], [], 0.0),
        ("s^0", [], [], 1.0),
        # constants only: 2·3/4 - 1 = 0.5
        ("2*3/4 - 1", [], [], 0.5),
        # U+2212 minus sign and U+00B7 middle dot
        ("1 \u2212 s\u00b72", [[-2, 1]], [], 1.0),
        ("((((s))))", [[1, 0]], [], 1.0),
    ],
)
def test_rational_structure(text, num, den, const):
    n, d, k = parse_rational(text)
    assert [f.tolist() for f in n] == num
    assert [f.tolist() for f in d] == den
    assert k == const
    assert all(f.dtype == np.float64 and f[0] != 0 and len(f) >= 2 for f in n + d)


def test_riaa_value_matches_direct_formula():
    # H(s) = (1 + s T2) / ((1 + s T1)(1 + s T3)) evaluated directly at a few s
    num, den, k = parse_rational(RIAA)
    s = 2j * np.pi * np.array([20.0, 1e3, 20e3])
    value = k * np.polyval(num[0], s) / (np.polyval(den[0], s) * np.polyval(den[1], s))
    expected = (1 + s * T_RIAA_2) / ((1 + s * T_RIAA_1) * (1 + s * T_RIAA_3))
    assert_allclose(value, expected, rtol=1e-14)


# -------------------------------------------------------------- zpk


def test_riaa_zpk_is_exact():
    z, p, k = parse_zpk(RIAA)
    # one zero at -1/T2, poles at -1/T1 and -1/T3, computed as -1/T per factor
    assert z.tolist() == [-1 / T_RIAA_2]
    assert sorted(p.real.tolist()) == sorted([-1 / T_RIAA_1, -1 / T_RIAA_3])
    assert np.all(p.imag == 0)
    # (1+sT2)/((1+sT1)(1+sT3)) = T2/(T1 T3) · (s + 1/T2)/((s + 1/T1)(s + 1/T3))
    assert k == pytest.approx(T_RIAA_2 / (T_RIAA_1 * T_RIAA_3), rel=1e-15)


def test_riaa_table_from_zpk():
    # RIAA playback dB re 1 kHz, handbook table (computed from IEC 60098 time constants),
    # as listed in /work/shared/REFERENCES.md; values given to 0.01 dB
    freqs = np.array([20, 50, 100, 200, 500, 2e3, 5e3, 10e3, 15e3, 20e3])
    table = [19.27, 16.95, 13.09, 8.22, 2.65, -2.59, -8.21, -13.73, -17.16, -19.62]
    z, p, k = parse_zpk(RIAA)
    h = zpk_response(z, p, k, 2 * np.pi * np.append(freqs, 1e3))
    db = 20 * np.log10(np.abs(h[:-1]) / np.abs(h[-1]))
    assert_allclose(db, table, atol=0.006)


def test_expanded_cubic_matches_numpy_roots():
    # (s+1)(s+2)(s+3) = s^3 + 6s^2 + 11s + 6, roots -1, -2, -3
    z, p, k = parse_zpk("s^3 + 6s^2 + 11s + 6")
    assert p.size == 0 and k == 1.0
    assert_allclose(np.sort(z.real), np.sort(np.roots([1, 6, 11, 6]).real), rtol=1e-12)
    assert_allclose(np.sort(z.real), [-3, -2, -1], rtol=1e-12)
    assert np.all(z.imag == 0)


def test_double_root_is_made_real():
    # s^2 + 6s + 9 = (s+3)^2; np.roots returns -3 ± ~4e-8j here on some builds
    # (a double root is ill-conditioned); the imaginary part is below 8·sqrt(eps)·|r|
    z, _, _ = parse_zpk("s^2 + 6*s + 9")
    assert np.all(z.imag == 0)
    assert_allclose(z.real, [-3, -3], rtol=1e-7)


def test_complex_pair_is_exactly_conjugate():
    # s^2 + s + 1: roots -1/2 ± j·sqrt(3)/2
    z, _, _ = parse_zpk("s^2 + s + 1")
    assert z[0] == np.conj(z[1])
    assert_allclose(sorted(z.imag), [-math.sqrt(3) / 2, math.sqrt(3) / 2], rtol=1e-14)
    assert_allclose(z.real, [-0.5, -0.5], rtol=1e-14)


def test_repeated_factor_keeps_exact_roots():
    # (s+1)^3 as a power of a factor: three exact roots at -1, unlike np.roots of
    # the expanded s^3 + 3s^2 + 3s + 1 (errors ~eps^(1/3))
    z, p, k = parse_zpk("(s+1)^3/s")
    assert z.tolist() == [-1, -1, -1]
    assert p.tolist() == [0]
    assert k == 1.0


# Worked by hand: (b, a) of each expression in numpy's highest-power-first order.
FREQS_CASES = [
    (RIAA, [T_RIAA_2, 1], np.polymul([T_RIAA_1, 1], [T_RIAA_3, 1])),
    ("(1+s*50e-6)/s", [50e-6, 1], [1, 0]),  # NAB 15 ips with T1 = ∞ form: (1+sT2)/s
    ("(s+1)**2/(s+2)", [1, 2, 1], [1, 2]),
    ("1e3/(s + 2*pi*50)", [1e3], [1, 2 * math.pi * 50]),
    ("1/(s+1) + 1/(s+2)", [2, 3], [1, 3, 2]),  # (2s+3)/(s^2+3s+2)
    ("s/(s^2 + 2*0.1*1000 s + 1000^2)", [1, 0], [1, 200, 1e6]),
    ("-(1+s)/(2 + s)^2", [-1, -1], [1, 4, 4]),
    ("(1 + 3180u s)/(1 + 50u s)", [3180e-6, 1], [50e-6, 1]),  # NAB 3180/50 µs shape
]


@pytest.mark.parametrize(("text", "b", "a"), FREQS_CASES)
def test_response_matches_scipy_freqs(text, b, a):
    w = np.logspace(0, 5.5, 40)
    z, p, k = parse_zpk(text)
    _, expected = signal.freqs(b, a, worN=w)
    assert_allclose(zpk_response(z, p, k, w), expected, rtol=1e-9)


def test_juxtaposed_and_explicit_products_agree():
    a = parse_zpk("(1+s*318u)(1+s*3180u)/(s(1+s*75u))")
    b = parse_zpk("(1+s*318u)*(1+s*3180u)/(s*(1+s*75u))")
    for x, y in zip(a, b, strict=True):
        assert np.array_equal(x, y)


def test_exactly_max_depth_is_accepted():
    text = "(" * MAX_DEPTH + "s" + ")" * MAX_DEPTH
    z, p, k = parse_zpk(text)
    assert z.tolist() == [0] and p.size == 0 and k == 1.0


# ------------------------------------------------------------- errors


@pytest.mark.parametrize(
    ("text", "position", "words"),
    [
        ("", 0, "empty"),
        ("   ", 0, "empty"),
        ("1+", 2, "end"),
        ("(1+s", 0, "unbalanced '('"),
        ("1+s)", 3, "unbalanced ')'"),
        ("((1+s)", 0, "unbalanced '('"),
        ("s^-1", 2, "exponent"),
        ("s^2.5", 2, "exponent"),
        ("s**1k", 3, "exponent"),
        ("s^17", 2, "exponent above"),
        ("s^(2)", 2, "exponent"),
        ("s^2^2", 3, "chained"),
        ("1/(s-s)", 1, "division by zero"),
        ("1/0", 1, "division by zero"),
        ("2j", 1, "unknown name 'j'"),
        ("1 + $", 4, "unexpected character '$'"),
        ("__import__('os')", 0, "unexpected character '_'"),
        ("exp(s)", 0, "unknown name 'exp'"),
        ("1 000", 2, "number after a factor"),
        ("s2", 1, "number after a factor"),
        ("()", 1, "unexpected ')'"),
        ("1e300*1e300", 5, "range"),
        ("1e200^2", 5, "range"),
        ("1/1e-320", 1, "range"),
        ("((s+1)^16)^16", 10, "degree"),
        pytest.param("(" * (MAX_DEPTH + 1) + "1" + ")" * (MAX_DEPTH + 1), MAX_DEPTH, "nesting", id="parens"),
        pytest.param("-" * 1999 + "1", MAX_DEPTH, "nesting", id="signs"),
    ],
)
def test_error_positions(text, position, words):
    with pytest.raises(ExpressionError) as info:
        parse_rational(text)
    error = info.value
    assert error.position == position
    assert words in str(error)
    assert f"at position {position + 1}: {text!r}" in str(error)


def test_too_long_is_rejected_without_position():
    text = "1+" * 1000 + "s"  # 2001 characters
    with pytest.raises(ExpressionError, match="too long") as info:
        parse_zpk(text)
    assert info.value.position == -1
    assert len(str(info.value)) < 200


def test_non_string_is_rejected():
    with pytest.raises(ExpressionError, match="expected a string"):
        parse_zpk(None)


@pytest.mark.parametrize(
    "text",
    [
        "__import__('os').system('echo pwned')",
        "exec('1')",
        "eval('s')",
        "().__class__.__bases__",
        "lambda: 1",
        "1; import os",
        "s.real",
        "open('x')",
        "[s]",
        "{1: s}",
        "'s'",
        "s if 1 else 2",
        "1 % 2",
        "s == s",
        "2 s @ s",
    ],
)
def test_code_is_rejected(text):
    with pytest.raises(ExpressionError):
        parse_zpk(text)


def test_parser_never_calls_eval_exec_or_compile(monkeypatch):
    def forbidden(*args, **kwargs):
        raise AssertionError("code evaluation called")

    for name in ("eval", "exec", "compile"):
        monkeypatch.setattr(builtins, name, forbidden)
    for text, _, _ in FREQS_CASES:
        parse_zpk(text)
    for text, _ in SI_CASES:
        parse_si_number(text)


# --------------------------------------------------------- properties

_GRAMMAR_ALPHABET = "0123456789.+-*/^()spi kmuµnMGfeE\u2212"


def check_result_or_expression_error(text):
    """parse_zpk either raises ExpressionError or returns finite zeros/poles/gain."""
    try:
        z, p, k = parse_zpk(text)
    except ExpressionError:
        return
    assert z.dtype == complex and p.dtype == complex
    assert np.all(np.isfinite(z)) and np.all(np.isfinite(p)) and math.isfinite(k)


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=60))
def test_random_text_never_raises_other_errors(text):
    check_result_or_expression_error(text)


@settings(max_examples=200, deadline=None)
@given(st.text(alphabet=_GRAMMAR_ALPHABET, max_size=40))
def test_random_grammar_text_never_raises_other_errors(text):
    check_result_or_expression_error(text)


def _numbers():
    plain = st.floats(1e-6, 1e6, allow_nan=False).map(repr)
    si = st.tuples(st.integers(0, 999), st.sampled_from("pnumkMG")).map(lambda t: f"{t[0]}{t[1]}")
    return st.one_of(plain, si, st.sampled_from(["0", "pi", "1", "2"]))


_LEAVES = st.one_of(_numbers(), st.just("s"))
_EXPRESSIONS = st.recursive(
    _LEAVES,
    lambda inner: st.one_of(
        st.tuples(inner, st.sampled_from(["+", "-", "*", "/"]), inner).map(
            lambda t: f"({t[0]}){t[1]}({t[2]})"
        ),
        st.tuples(inner, st.integers(0, 4)).map(lambda t: f"({t[0]})^{t[1]}"),
        st.tuples(inner, inner).map(lambda t: f"({t[0]})({t[1]})"),
        inner.map(lambda e: f"-({e})"),
    ),
    max_leaves=12,
)


@settings(max_examples=200, deadline=None)
@given(_EXPRESSIONS)
def test_random_valid_expressions_are_finite_or_expression_error(text):
    check_result_or_expression_error(text)


# A factor a + b·s with small integers; a product/quotient of such factors has
# exact roots -a/b and gain const · prod(b_num) / prod(b_den) (hand algebra:
# a + b s = b (s + a/b)).
_FACTORS = st.lists(
    st.tuples(st.integers(1, 99), st.integers(1, 99), st.integers(1, 3), st.booleans()),
    min_size=1,
    max_size=6,
)


@settings(max_examples=100, deadline=None)
@given(_FACTORS, st.integers(1, 9))
def test_factored_input_gives_exact_roots(factors, const):
    num = [f"({a} + {b}s)^{e}" for a, b, e, upper in factors if upper]
    den = [f"({a} + {b}s)^{e}" for a, b, e, upper in factors if not upper]
    text = f"{const}{''.join(num)}" + (f"/({''.join(den)})" if den else "")
    z, p, k = parse_zpk(text)
    expected_zeros = sorted(-a / b for a, b, e, upper in factors if upper for _ in range(e))
    expected_poles = sorted(-a / b for a, b, e, upper in factors if not upper for _ in range(e))
    assert sorted(z.real.tolist()) == expected_zeros and np.all(z.imag == 0)
    assert sorted(p.real.tolist()) == expected_poles and np.all(p.imag == 0)
    gain = Fraction(const)
    for _a, b, e, upper in factors:
        gain = gain * b**e if upper else gain / b**e
    assert k == pytest.approx(float(gain), rel=1e-13)
