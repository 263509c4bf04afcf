"""Digital designs: agreement with scipy, SOS conventions, stability, warnings, deviation."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import signal

import dspeq
from dspeq import DesignError
from dspeq.check import check
from dspeq.design import Design, design, register_method

SIMPLE = ("bilinear", "matched-z", "closed-form")


@pytest.mark.parametrize("fs", [44100.0, 96000.0])
def test_bilinear_agrees_with_scipy_bilinear_zpk(fs):
    c = dspeq.curve("riaa")
    d = design(c, fs, method="bilinear")
    z, p, k = signal.bilinear_zpk(c.zeros, c.poles, c.gain, fs)   # reference: scipy
    ref = signal.zpk2sos(z, p, k)
    np.testing.assert_allclose(d.sos, ref, rtol=1e-12, atol=1e-15)


def test_bilinear_prewarp_is_exact_at_the_prewarp_frequency():
    c = dspeq.curve("cassette-70us")
    f0 = 10_000.0
    d = design(c, 44100, method="bilinear", prewarp_hz=f0)
    assert abs(d.response(f0)[0]) == pytest.approx(abs(c.response(f0)), rel=1e-10)
    plain = design(c, 44100, method="bilinear")
    assert abs(plain.response(f0)[0]) != pytest.approx(abs(c.response(f0)), rel=1e-6)


def test_matched_z_maps_roots_by_exp_st():
    c = dspeq.curve("nab-7.5ips")
    fs = 48000.0
    d = design(c, fs, method="matched-z")
    z, p, _ = d.zpk
    assert np.exp(c.zeros[0] / fs) == pytest.approx(z[np.argmin(abs(z - np.exp(c.zeros[0] / fs)))])
    assert np.exp(c.poles[0] / fs) == pytest.approx(p[np.argmin(abs(p - np.exp(c.poles[0] / fs)))])
    # gain matched at the 1 kHz reference
    assert float(d.magnitude_db(1000.0)[0]) == pytest.approx(0.0, abs=1e-9)


@pytest.mark.parametrize("method", SIMPLE)
@pytest.mark.parametrize("name", ["riaa", "riaa-iec", "iec-15ips", "disc-500-16", "cassette-120us"])
def test_sos_conventions(method, name):
    d = design(name, 48000, method=method)
    assert d.sos.dtype == np.float64 and d.sos.ndim == 2 and d.sos.shape[1] == 6
    np.testing.assert_array_equal(d.sos[:, 3], 1.0)
    assert np.all(np.abs(d.zpk[1]) < 1.0)
    assert not d.sos.flags.writeable


def test_closed_form_exact_at_dc_and_nyquist_per_section():
    # Each first-order section is matched at DC and Nyquist; for a single shelf the whole design is.
    c = dspeq.curve("nab-7.5ips").with_lf_limit(3.0)
    fs = 44100.0
    d = design("nab-7.5ips", fs, method="closed-form")
    # The final gain is re-matched at 1 kHz, so compare the *shape*: ratio DC/Nyquist.
    hd = np.abs(signal.sosfreqz(d.sos, worN=[0.0, fs / 2], fs=fs)[1])
    ha = np.abs(c.response([0.0, fs / 2]))
    assert hd[0] / hd[1] == pytest.approx(ha[0] / ha[1], rel=1e-9)


def test_integrators_replaced_by_lf_limit():
    d = design("iec-15ips", 48000, method="matched-z", lf_limit_hz=5.0)
    assert d.curve.n_integrators == 1 and d.target.n_integrators == 0
    assert np.exp(-2 * np.pi * 5.0 / 48000) == pytest.approx(np.max(np.abs(d.zpk[1])))
    assert d.options["lf_limit_hz"] == 5.0


def test_rate_out_of_range_and_unknown_method():
    with pytest.raises(DesignError, match="7999"):
        design("riaa", 7999)
    with pytest.raises(DesignError, match="nope"):
        design("riaa", 48000, method="nope")


def test_high_corner_warns_with_its_frequency():
    with pytest.warns(UserWarning, match=r"zero at 5004\d\.\d Hz \(3\.18 µs\)"):
        design("riaa-3.18us", 44100, method="matched-z")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        design("riaa-3.18us", 192000, method="matched-z")


def test_unstable_method_is_refused():
    @register_method("test-unstable", "a deliberately unstable method for this test")
    def _bad(curve, fs):
        return np.array([0.5]), np.array([1.01]), 1.0
    try:
        with pytest.raises(DesignError, match="unstable"):
            design("riaa", 48000, method="test-unstable")
    finally:
        from dspeq.design import _METHODS
        _METHODS.pop("test-unstable")


def test_design_is_deterministic_and_cached():
    a = design("riaa", 96000, method="closed-form")
    b = design("riaa", 96000, method="closed-form")
    assert a is b
    assert isinstance(a, Design)


def test_deviation_removes_pure_delay():
    # A pure one-sample delay against a flat curve: magnitude error 0, delay 1 sample, phase error 0.
    flat = dspeq.Curve([], [], 1.0, name="flat")
    d = Design(np.array([[0.0, 1.0, 0.0, 1.0, 0.0, 0.0]]), 48000.0, "test", flat, flat, {})
    dev = check(d)
    assert dev.max_abs_db == pytest.approx(0.0, abs=1e-12)
    assert dev.delay_samples == pytest.approx(1.0, abs=1e-9)
    assert dev.max_phase_deg == pytest.approx(0.0, abs=1e-7)
    assert dev.max_group_delay_us == pytest.approx(0.0, abs=1e-6)


def test_deviation_summary_and_tolerance():
    d = design("riaa", 44100, method="bilinear")
    dev = check(d)
    # bilinear maps ∞ to Nyquist: the largest error is at the top of the band (common practice).
    assert dev.f_at_max == pytest.approx(20000.0)
    assert dev.max_abs_db > 10
    assert not dev.ok(1.0)
    with pytest.raises(DesignError, match="exceeds"):
        dev.require(1.0)
    assert set(dev.summary()) >= {"max_abs_db", "rms_db", "f_at_max_hz", "delay_samples"}


def test_band_upper_edge_limited_at_low_rates():
    dev = check(design("nab-3.75ips", 8000, method="matched-z"))
    assert dev.band[1] == pytest.approx(0.95 * 4000)


def test_group_delay_agrees_with_scipy_group_delay():
    d = design("riaa", 48000, method="matched-z")
    f = np.geomspace(20, 20000, 25)
    from dspeq.check import digital_group_delay
    b, a = signal.sos2tf(d.sos)
    _, ref = signal.group_delay((b, a), w=f, fs=48000)   # reference: scipy.signal.group_delay
    np.testing.assert_allclose(digital_group_delay(d.sos, f, 48000), ref, rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("method", ["fit", *SIMPLE])
def test_response_and_zpk_agree_with_scipy(method):
    # Design.response / Design.zpk are numpy code (dspeq/_zpk.py): scipy.signal is the reference.
    f = np.geomspace(5.0, 23_000.0, 300)
    for name in ("riaa", "riaa-iec", "nab-7.5ips", "disc-500-16"):
        d = design(name, 48000, method=method)
        _, h = signal.sosfreqz(d.sos, worN=f, fs=48000)            # reference: scipy
        np.testing.assert_allclose(d.response(f), h, rtol=1e-9)
        z, p, k = signal.sos2zpk(d.sos)                            # reference: scipy
        np.testing.assert_allclose(np.sort_complex(d.zpk[0]), np.sort_complex(z), atol=1e-9)
        np.testing.assert_allclose(np.sort_complex(d.zpk[1]), np.sort_complex(p), atol=1e-9)
        assert d.zpk[2] == pytest.approx(k, rel=1e-12)
        np.testing.assert_allclose(d.sos, signal.zpk2sos(*d.zpk), rtol=1e-9, atol=1e-12)
