"""Tests of dspeq.network: the network text, exact curves, scaling, tolerance spread, CLI."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from dspeq._errors import CurveError, ExpressionError
from dspeq.cli import main
from dspeq.curves import Curve
from dspeq.expr import parse_si_number
from dspeq.network import (
    CORNER_LIMIT,
    format_value,
    network_curve,
    parse_network,
    parse_tolerance,
    tolerance_spread,
)

EXAMPLES = sorted((Path(__file__).resolve().parent.parent / "examples" / "networks").glob("*.rcnet"))
F = np.geomspace(10.0, 50_000.0, 61)

# Invented component values (no source needed): ohms and farads.
R1, R2, R3, C1, C2 = 10e3, 680e3, 56e3, 4.7e-9, 1.5e-9


def roots_close(actual, expected, rtol=1e-9):
    assert len(actual) == len(expected), (actual, expected)
    assert_allclose(np.sort_complex(np.asarray(actual, complex)),
                    np.sort_complex(np.asarray(expected, complex)), rtol=rtol, atol=0)


# ------------------------------------------------------------------ hand-derived networks


def test_inverting_single_section():
    # H = -Zf/Zi, Zi = R1, Zf = R2 || C1 = R2/(1 + s R2 C1)
    #   = -(R2/R1) / (1 + s R2 C1) = [-1/(R1 C1)] / (s + 1/(R2 C1))
    # -> no zero, one pole at -1/(R2 C1), gain k = -1/(R1 C1).
    c = Curve.from_network("R1 = 10k; R2 = 680k; C1 = 4n7; stage = inverting; "
                           "feedback = R2 | C1; input = R1")
    roots_close(c.zeros, [])
    roots_close(c.poles, [-1 / (R2 * C1)])
    assert c.gain == pytest.approx(-1 / (R1 * C1), rel=1e-12)


def test_inverting_two_sections():
    # Zf = R2/(1 + s T1) + R3/(1 + s T3), T1 = R2 C1, T3 = R3 C2; H = -Zf/R1
    #    = -[(R2 + R3) + s (R2 T3 + R3 T1)] / [R1 (1 + s T1)(1 + s T3)]
    # zero -(R2 + R3)/(R2 T3 + R3 T1); poles -1/T1, -1/T3;
    # gain (leading coefficients): -(R2 T3 + R3 T1) / (R1 T1 T3).
    t1, t3 = R2 * C1, R3 * C2
    c = network_curve("R1 = 10k\nR2 = 680k\nR3 = 56k\nC1 = 4n7\nC2 = 1n5\nstage = inverting\n"
                      "feedback = R2 | C1 + R3 | C2\ninput = R1\n")
    roots_close(c.zeros, [-(R2 + R3) / (R2 * t3 + R3 * t1)])
    roots_close(c.poles, [-1 / t1, -1 / t3])
    assert c.gain == pytest.approx(-(R2 * t3 + R3 * t1) / (R1 * t1 * t3), rel=1e-12)


def test_noninverting_shelf():
    # H = 1 + Zf/Zg, Zg = R1, Zf = R2 + R3/(1 + s T), T = R3 C1
    #   = [(R1 + R2)(1 + s T) + R3] / [R1 (1 + s T)]
    # zero -(R1 + R2 + R3)/((R1 + R2) T); pole -1/T; gain (R1 + R2)/R1.
    t = R3 * C1
    c = network_curve("R1 = 10k; R2 = 680k; R3 = 56k; C1 = 4n7; stage = noninverting; "
                      "feedback = R2 + R3 | C1; ground = R1")
    roots_close(c.zeros, [-(R1 + R2 + R3) / ((R1 + R2) * t)])
    roots_close(c.poles, [-1 / t])
    assert c.gain == pytest.approx((R1 + R2) / R1, rel=1e-12)


def test_divider_step():
    # H = Zsh/(Zse + Zsh), Zse = R1, Zsh = R2 + 1/(s C1)
    #   = (1 + s R2 C1) / (1 + s (R1 + R2) C1)
    # zero -1/(R2 C1); pole -1/((R1 + R2) C1); gain R2/(R1 + R2).
    c = network_curve("R1 = 10k; R2 = 680k; C1 = 4n7; stage = divider; series = R1; shunt = R2 + C1")
    roots_close(c.zeros, [-1 / (R2 * C1)])
    roots_close(c.poles, [-1 / ((R1 + R2) * C1)])
    assert c.gain == pytest.approx(R2 / (R1 + R2), rel=1e-12)


def test_series_capacitors_cancel_exactly():
    # Zi = 1/(s C1) + 1/(s C2) = 1/(s Ceq), Ceq = C1 C2/(C1 + C2); Zf = R1.
    # H = -R1 s Ceq: one zero at s = 0, no pole, gain -R1 Ceq.
    c = network_curve("R1 = 10k; C1 = 4n7; C2 = 1n5; stage = inverting; feedback = R1; input = C1 + C2")
    assert c.zeros.tolist() == [0j] and c.poles.size == 0
    assert c.gain == pytest.approx(-R1 * C1 * C2 / (C1 + C2), rel=1e-12)


def test_equal_sections_give_one_pole():
    # Two sections with the same time constant T = 100k·10n = 50k·20n = 1 ms:
    # Zf = (R2 + R3)/(1 + s T), so H = -((R2 + R3)/R1)/(1 + s T): one pole, no zero
    # (the common factor of the expanded polynomials cancels).
    c = network_curve("R1 = 10k; R2 = 100k; C1 = 10n; R3 = 50k; C2 = 20n; stage = inverting; "
                      "feedback = R2 | C1 + R3 | C2; input = R1")
    assert c.zeros.size == 0
    roots_close(c.poles, [-1e3], rtol=1e-7)
    assert c.gain == pytest.approx(-(150e3 / 10e3) * 1e3, rel=1e-7)


def test_cascade_multiplies_stages():
    # Stage 1 (inverting): -(R2/R1)/(1 + s R2 C1); stage 2 (divider R3, C2): 1/(1 + s R3 C2).
    text = ("R1 = 10k; R2 = 680k; C1 = 4n7; R3 = 56k; C2 = 1n5\n"
            "stage = inverting; feedback = R2 | C1; input = R1\n"
            "stage = divider; series = R3; shunt = C2")
    c = network_curve(text)
    roots_close(c.poles, [-1 / (R2 * C1), -1 / (R3 * C2)])
    assert c.gain == pytest.approx(-(1 / (R1 * C1)) / (R3 * C2), rel=1e-12)


def test_parallel_binds_tighter_than_series():
    a = network_curve("R1 = 1k; R2 = 2k; C1 = 1u; R9 = 1k; stage = inverting; feedback = R1 + R2 | C1; "
                      "input = R9")
    b = network_curve("R1 = 1k; R2 = 2k; C1 = 1u; R9 = 1k; stage = inverting; "
                      "feedback = R1 + (R2 || C1); input = R9")
    c = network_curve("R1 = 1k; R2 = 2k; C1 = 1u; R9 = 1k; stage = inverting; "
                      "feedback = (R1 + R2) | C1; input = R9")
    assert a.is_close(b)
    assert not a.is_close(c)


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_numeric_response_matches_exact_curve(path):
    net = parse_network(path.read_text(encoding="utf-8"))
    assert_allclose(net.response(F), net.curve().response(F), rtol=1e-9)


# ------------------------------------------------------------------ scaling, text


@pytest.mark.parametrize("k", [1e-3, 0.37, 7.3, 2e4])
@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_scaling_every_impedance_keeps_the_curve(path, k):
    net = parse_network(path.read_text(encoding="utf-8"))
    assert net.scaled(k).curve().is_close(net.curve(), rtol=1e-9)
    assert net.scaled(k).part(net.parts[0].name).value != net.parts[0].value


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_text_round_trip(path):
    net = parse_network(path.read_text(encoding="utf-8"))
    assert parse_network(net.to_text("header line")) == net


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=1e-14, max_value=1e11, allow_nan=False, allow_infinity=False))
def test_format_value_parses_back_exactly(v):
    assert parse_si_number(format_value(v)) == v


@pytest.mark.parametrize("value, text", [(4700.0, "4k7"), (2.2e-6, "2u2"), (1e6, "1M"), (470.0, "470"),
                                         (1.02e3, "1k02"), (100e-12, "100p"), (3.3e-9, "3n3")])
def test_format_value_uses_prefix_as_point(value, text):
    # IEC 60062 letter-and-digit code style (prefix letter in place of the decimal point).
    assert format_value(value) == text


def test_units_and_tolerances_are_read():
    net = parse_network("R1 = 22kohm ±1%; C1 = 10nF 5%; tolerance = 2%; R2 = 1k\n"
                        "stage = divider; series = R1 + R2; shunt = C1")
    assert net.part("R1").value == 22e3 and net.part("R1").tolerance == 0.01
    assert net.part("C1").value == 10e-9 and net.part("C1").tolerance == 0.05
    assert net.tolerances() == {"R1": 0.01, "R2": 0.02, "C1": 0.05}
    assert net.tolerances(0.001)["R2"] == 0.001          # an explicit default beats the file's
    assert parse_tolerance("+-0.5%") == 0.005


def test_unused_part_warns():
    with pytest.warns(UserWarning, match="R2 declared but not used"):
        net = parse_network("R1 = 1k; R2 = 2k; R3 = 3k; stage = inverting; feedback = R1; input = R3")
    assert [p.name for p in net.parts] == ["R1", "R3"]


# ------------------------------------------------------------------ errors


BAD = [
    ("R1 = 10x", "bad value '10x'", 1, 7),
    ("R1 = 1k\nstage = inverting\nfeedback = R1 +\ninput = R1", "end of line", 3, 15),
    ("R1 = 1k\nC1 = 1n\nstage = inverting\nfeedback = R1 $ C1\ninput = C1", "unexpected '$'", 4, 14),
    ("R1 = 1k\nstage = inverting\nfeedback = R2\ninput = R1", "unknown part 'R2'", 3, 11),
    ("X1 = 3", "unknown name 'X1'", 1, 0),
    ("R1 = 1k\nstage = divider\nfeedback = R1", "arms series and shunt", 3, 0),
    ("R1 = 1k 5", "percentage", 1, 8),
    ("R1 = 1k\nstage = inverting\nfeedback = R1\ninput = R1", "already used on line 3", 4, 8),
    ("R1 1k", "expected '='", 1, 2),
    ("R1 = 1k\nC1 = 1n\nstage = inverting\nfeedback = (R1 + C1\ninput = R1", "expected ')'", 4, 19),
    ("R1 = -1k", "must be positive", 1, 5),
    ("R1 = 1k\nstage = inverting\nfeedback = R1", "no input arm", 2, 0),
    ("R1 = 1k\nstage = sideways", "unknown stage 'sideways'", 2, 8),
    ("R1 = 1k\nR1 = 2k", "declared twice", 2, 0),
    ("R1 = 1k\nfeedback = R1", "before any 'stage", 2, 0),
    ("R1 = 1k", "no 'stage", None, None),
]


@pytest.mark.parametrize("text, fragment, line, col", BAD)
def test_bad_text_names_line_and_column(text, fragment, line, col):
    with pytest.raises(ExpressionError, match=None) as info:
        parse_network(text)
    message = str(info.value)
    assert fragment in message
    if line is not None:
        assert message.startswith(f"network line {line}:")
        assert info.value.position == col
        assert info.value.text == text.splitlines()[line - 1]


def test_not_a_string():
    with pytest.raises(ExpressionError, match="string"):
        parse_network(42)


# ------------------------------------------------------------------ tolerance


RESISTIVE = "R1 = 10k; R2 = 47k 1%; stage = inverting; feedback = R2; input = R1"


def test_spread_is_seeded():
    a = tolerance_spread(RESISTIVE, reference_hz=None, seed=3)
    b = tolerance_spread(RESISTIVE, reference_hz=None, seed=3)
    c = tolerance_spread(RESISTIVE, reference_hz=None, seed=4)
    assert np.array_equal(a.high_db, b.high_db) and not np.array_equal(a.high_db, c.high_db)


def test_spread_of_a_gain_resistor_is_analytic():
    # Only R2 varies: gain R2(1 + 0.01 u)/R1, u uniform on [-1, 1]; deviation 20 log10(1 + 0.01 u)
    # is monotone in u, so its p5/p95 are at u = ±0.9 (sampling error of a 5 % quantile with
    # 4000 draws: sqrt(0.05 · 0.95 / 4000) / 0.5 = 0.007 in u; allow 0.03).
    s = tolerance_spread(RESISTIVE, [1000.0], reference_hz=None, draws=4000, seed=1)
    u_high = (10 ** (s.high_db[0] / 20) - 1) / 0.01
    u_low = (10 ** (s.low_db[0] / 20) - 1) / 0.01
    assert u_high == pytest.approx(0.9, abs=0.03) and u_low == pytest.approx(-0.9, abs=0.03)
    # every corner is ±1 %: the worst corner is exactly 20 log10(0.99)
    assert s.corner_worst_db[0] == pytest.approx(-20 * math.log10(0.99), rel=1e-12)
    assert s.worst_db[0] <= s.corner_worst_db[0] + 1e-12


def test_shape_spread_of_a_resistive_stage_is_zero():
    s = tolerance_spread(RESISTIVE, tolerance=0.05)
    assert np.max(np.abs([s.low_db, s.high_db, s.worst_db])) < 1e-12


def test_spread_of_an_rc_lowpass_follows_the_capacitor():
    # Divider R1 / C1: |H|² = 1/(1 + (ωRC)²).  Only C1 varies (5 %), uniform: the deviation
    # decreases with u, so p95 is at u = -0.9 and p5 at u = +0.9 (±0.03, as above).
    text = "R1 = 10k; C1 = 10n 5%; stage = divider; series = R1; shunt = C1"
    f = 5000.0
    s = tolerance_spread(text, [f], reference_hz=None, draws=4000, seed=2)

    def dev(u):
        w = 2 * math.pi * f * 10e3 * 10e-9
        return -10 * math.log10(1 + (w * (1 + 0.05 * u)) ** 2) + 10 * math.log10(1 + w ** 2)

    assert dev(-0.87) <= s.high_db[0] <= dev(-0.93)
    assert dev(0.87) >= s.low_db[0] >= dev(0.93)


def test_normal_spread_is_narrower_than_uniform():
    u = tolerance_spread(RESISTIVE, [1000.0], reference_hz=None, seed=0)
    n = tolerance_spread(RESISTIVE, [1000.0], reference_hz=None, seed=0, distribution="normal")
    assert n.high_db[0] < u.high_db[0] and n.worst_db[0] <= -20 * math.log10(0.99) + 1e-12


def test_many_parts_skip_corners():
    names = [f"R{i}" for i in range(CORNER_LIMIT + 1)]
    text = "; ".join(f"{n} = 1k" for n in names) + "; R99 = 1k; stage = inverting; feedback = " \
        + " + ".join(names) + "; input = R99"
    s = tolerance_spread(text, [1000.0], tolerance=0.01, reference_hz=None, draws=200)
    assert s.corner_worst_db is None and s.max_worst_db > 0


@pytest.mark.parametrize("kwargs, fragment", [
    ({}, "no part"), ({"tolerance": 0.01, "draws": 10}, "draws"),
    ({"tolerance": 0.01, "distribution": "lognormal"}, "distribution"), ({"tolerance": 1.5}, "fraction"),
])
def test_spread_errors(kwargs, fragment):
    with pytest.raises(CurveError, match=fragment):
        tolerance_spread("R1 = 1k; R2 = 2k; stage = inverting; feedback = R2; input = R1", **kwargs)


# ------------------------------------------------------------------ command line


def test_cli_network_report(capsys):
    path = str(EXAMPLES[0])
    assert main(["network", path, "--against", "riaa", "--tolerance", "1%", "--draws", "1000",
                 "--rate", "48000", "--method", "matched-z"]) == 0
    out = capsys.readouterr().out
    for fragment in ("time constants (µs)", "deviation from riaa", "tolerance spread", "1000 draws",
                     "worst-case deviation", "design: matched-z at 48000 Hz", "sos "):
        assert fragment in out


def test_cli_network_bad_text_is_one_line(tmp_path, capsys):
    bad = tmp_path / "bad.rcnet"
    bad.write_text("R1 = 1k\nstage = inverting\nfeedback = R1 +\ninput = R1\n", encoding="utf-8")
    assert main(["network", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "network line 3" in err and "Traceback" not in err


def test_cli_network_plot(tmp_path):
    pytest.importorskip("matplotlib")
    png = tmp_path / "net.png"
    assert main(["network", str(EXAMPLES[0]), "--against", "riaa", "--draws", "1000", "--plot",
                 str(png)]) == 0
    assert png.stat().st_size > 1000
