"""Analog curves: evaluation against published tables and formulas, and curve algebra."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import dspeq
from dspeq import Curve, CurveError
from dspeq.curves import rolloff_db_to_tc, tc_to_root

# RIAA playback, dB relative to 1 kHz: the usual handbook table computed from the IEC 60098 time
# constants 3180/318/75 µs (values as listed in shared/REFERENCES.md; from memory of IEC 60098 tables).
RIAA_TABLE = {20: 19.27, 50: 16.95, 100: 13.09, 200: 8.22, 500: 2.65, 1000: 0.0, 2000: -2.59,
              5000: -8.21, 10000: -13.73, 15000: -17.16, 20000: -19.62}


def test_riaa_matches_handbook_table_within_001_db():
    c = dspeq.curve("riaa")
    f = np.array(sorted(RIAA_TABLE))
    expected = np.array([RIAA_TABLE[x] for x in f])
    np.testing.assert_allclose(c.magnitude_db(f), expected, atol=0.01)


def _iec60094_flux_db(f, t1_us, t2_us):
    """Recorded flux level relative to 1 kHz, IEC 60094-1 clause 15 formula (as summarized in
    shared/REFERENCES.md): L(f) = 10·log10(1 + 1/(ωT1)²) − 10·log10(1 + (ωT2)²)."""
    def level(x):
        w = 2 * np.pi * x
        lf = 0.0 if t1_us is None else 10 * np.log10(1 + 1 / (w * t1_us * 1e-6) ** 2)
        return lf - 10 * np.log10(1 + (w * t2_us * 1e-6) ** 2)
    return level(np.asarray(f, float)) - level(1000.0)


TAPE = [("nab-7.5ips", 3180, 50), ("nab-15ips", 3180, 50), ("nab-3.75ips", 3180, 90),
        ("iec-7.5ips", None, 70), ("iec-15ips", None, 35), ("iec-30ips", None, 17.5),
        ("cassette-120us", 3180, 120), ("cassette-70us", 3180, 70)]


@pytest.mark.parametrize("name,t1,t2", TAPE)
def test_tape_playback_undoes_iec60094_flux_for_an_ideal_head(name, t1, t2):
    # Ideal (velocity) head: output ∝ ω·flux, so playback + flux + 20·log10(f/1k) must be flat
    # (IEC 60094-1 formula; time constants from IASA TC-04 §5.4.10 Table 1).
    f = np.geomspace(20, 20000, 200)
    c = dspeq.curve(name)
    total = c.magnitude_db(f) + _iec60094_flux_db(f, t1, t2) + 20 * np.log10(f / 1000)
    np.testing.assert_allclose(total, 0.0, atol=1e-9)


@pytest.mark.parametrize("db,tau_us", [(13.7, 75.4), (16.0, 99.2)])
def test_rolloff_conversion_matches_reference_values(db, tau_us):
    # τ = √(10^(X/10) − 1)/(2π·10 kHz); worked values −13.7 dB → 75.4 µs, −16 dB → 99.2 µs
    # (shared/REFERENCES.md, IASA TC-04 §5.3.6 roll-off convention).
    assert rolloff_db_to_tc(db) == pytest.approx(tau_us, abs=0.05)
    assert rolloff_db_to_tc(-db) == rolloff_db_to_tc(db)


def test_rolloff_pole_attenuates_exactly_x_db_at_10k():
    for x in (5.0, 8.5, 11.0, 13.7, 16.0):
        tau = rolloff_db_to_tc(x)
        c = Curve.from_time_constants([], [tau], reference_hz=1e-3)   # ≈ 0 dB at DC
        assert float(-c.magnitude_db(10_000.0)) == pytest.approx(x, abs=1e-9)
    assert rolloff_db_to_tc(0.0) is None


def test_time_constant_roots_and_infinite():
    assert tc_to_root(318.0) == pytest.approx(-1e6 / 318)
    assert tc_to_root(None) == 0.0 and tc_to_root(math.inf) == 0.0
    with pytest.raises(CurveError, match="-5"):
        tc_to_root(-5)


def test_right_half_plane_pole_is_refused():
    with pytest.raises(CurveError, match="right half-plane"):
        Curve([], [100.0], 1.0)
    rhp_zero = Curve([100.0], [-10.0], 1.0)
    with pytest.raises(CurveError):
        rhp_zero.inverse()


def test_integrator_kept_exact_and_limited_on_request():
    iec = dspeq.curve("iec-15ips")
    assert iec.n_integrators == 1 and iec.poles[0] == 0
    lim = iec.with_lf_limit(3.0)
    assert lim.n_integrators == 0
    assert lim.poles[0] == pytest.approx(-2 * math.pi * 3.0)


def test_group_delay_matches_numerical_derivative_of_phase():
    c = dspeq.curve("riaa")
    f = np.geomspace(20, 20000, 50)
    df = f * 1e-6
    num = -(np.radians(c.phase_deg(f + df)) - np.radians(c.phase_deg(f - df))) / (2 * np.pi * 2 * df)
    np.testing.assert_allclose(c.group_delay(f), num, rtol=1e-5)


def test_response_agrees_with_scipy_freqs():
    from scipy import signal
    c = dspeq.curve("riaa-iec")
    b, a = signal.zpk2tf(c.zeros, c.poles, c.gain)
    w = 2 * np.pi * np.geomspace(10, 30000, 40)
    _, h = signal.freqs(b, a, worN=w)
    np.testing.assert_allclose(c.response(w / (2 * np.pi)), h, rtol=1e-9)


def test_ratio_cancels_exactly_and_correction_example():
    assert dspeq.curve("riaa", from_curve="riaa").order == 0
    # An IEC 7.5 ips tape replayed through an NAB machine: the correction keeps the IEC integrator
    # and cancels NAB's 3180 µs pole with a zero.
    c = dspeq.curve("iec-7.5ips", from_curve="nab-7.5ips")
    zs, ps = c.time_constants()
    assert sorted(zs) == pytest.approx([70.0, 3180.0]) and sorted(ps) == [50.0, math.inf]


def test_speed_scales_corners():
    c = dspeq.curve("nab-7.5ips", speed=2)
    zs, ps = c.time_constants()
    assert zs == pytest.approx([25.0]) and ps == pytest.approx([1590.0])


def test_unknown_name_suggests():
    with pytest.raises(CurveError, match="did you mean.*nab-7.5ips"):
        dspeq.curve("nab-7.5ip")


def test_tc_and_disc_specs():
    assert dspeq.curve("tc:318/3180,75") == dspeq.curve("riaa")
    assert dspeq.curve("disc:500,16") == dspeq.curve("disc-500-16")
    assert dspeq.curve("tc:35/inf") == dspeq.curve("iec-15ips")
    for bad in ("tc:318", "tc:x/3", "disc:500", "tc:/"):
        with pytest.raises(CurveError):
            dspeq.curve(bad)


def test_expression_equals_time_constants():
    a = dspeq.curve("(1 + s*318u) / ((1 + s*3180u)(1 + s*75u))")
    assert a.is_close(dspeq.curve("riaa"), rtol=1e-12)


def test_normalization_reference():
    c = dspeq.curve("riaa", reference_hz=500)
    assert float(c.magnitude_db(500.0)) == pytest.approx(0.0, abs=1e-12)


_tc = st.floats(min_value=2.0, max_value=20000.0)


@settings(max_examples=60, deadline=None)
@given(zs=st.lists(_tc, max_size=3), ps=st.lists(st.one_of(_tc, st.none()), min_size=1, max_size=3),
       ratio=st.floats(min_value=0.1, max_value=10.0))
def test_algebra_properties(zs, ps, ratio):
    c = Curve.from_time_constants(zs, ps)
    f = np.geomspace(20, 20000, 30)
    np.testing.assert_allclose((c * c.inverse()).magnitude_db(f), 0.0, atol=1e-9)
    back = c.at_speed(ratio).at_speed(1 / ratio)
    np.testing.assert_allclose(back.magnitude_db(f), c.magnitude_db(f), atol=1e-8)
    assert back.order == c.order
