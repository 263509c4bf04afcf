"""Proof through the real path: measured (impulse, sweep; float32, float64) equals analytic."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import dspeq
from dspeq.check import check
from dspeq.verify import AGREEMENT_DB, verify


@pytest.mark.parametrize("name,fs,method", [("riaa", 44100, "fit"), ("riaa-iec", 48000, "fit"),
                                            ("riaa", 44100, "matched-z"),
                                            ("iec-15ips", 48000, "closed-form"),
                                            ("nab-7.5ips", 96000, "bilinear")])
def test_measured_agrees_with_analytic(name, fs, method):
    d = dspeq.design(name, fs, method=method)
    v = verify(d, block_frames=4096)
    assert v.ok, v.to_dict()
    assert {(m.signal, m.dtype) for m in v.measurements} == {
        ("impulse", "float32"), ("sweep", "float32"), ("impulse", "float64"), ("sweep", "float64")}
    # The measured deviation from the analog curve reproduces check()'s figure (log grid vs FFT bins:
    # the same maximum within the agreement bound plus the grid's sampling of a smooth error).
    for m in v.measurements:
        assert m.max_vs_curve_db == pytest.approx(check(d).max_abs_db, abs=0.01 + AGREEMENT_DB)


def test_verify_catches_a_faulty_signal_path(monkeypatch):
    from dspeq import stream

    original = stream.Equalizer.process

    def off_by_001_db(self, block, out=None):
        return original(self, block, out) * np.asarray(10 ** (0.002 / 20), dtype=block.dtype)

    monkeypatch.setattr(stream.Equalizer, "process", off_by_001_db)
    v = verify(dspeq.design("riaa", 48000, method="matched-z"), dtypes=(np.float64,))
    assert not v.ok


def test_ratio_that_cancels_is_an_identity_filter():
    d = dspeq.design(dspeq.curve("riaa", from_curve="riaa"), 48000, method="matched-z")
    x = np.random.default_rng(1).standard_normal(1000)
    np.testing.assert_allclose(dspeq.Equalizer(d).process(x), x, rtol=1e-12)


def test_only_integrators_get_the_lf_limit():
    d = dspeq.design("1/s^2", 48000, method="matched-z", lf_limit_hz=4.0)
    assert d.target.n_integrators == 0 and d.curve.n_integrators == 2
    assert np.max(np.abs(d.zpk[1])) == pytest.approx(np.exp(-2 * np.pi * 4.0 / 48000))
    assert verify(d, dtypes=(np.float64,)).ok


def test_corner_above_nyquist_warns():
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        dspeq.design("riaa-3.18us", 44100, method="matched-z")
    assert any("3.18 µs" in str(w.message) and "0.45·fs" in str(w.message) for w in caught)
