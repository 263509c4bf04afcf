"""The "fit" design method: accuracy targets (issue 4), stability, options, warnings.

Every figure is measured with :func:`dspeq.check` on the real design path
(:func:`dspeq.design`, default method), against the exact analog curve.
The targets are the project's (issue 4: <= 0.002 dB over 20 Hz-20 kHz at
44.1 kHz with at most two biquads, <= 0.0005 dB from 48 kHz; issue 2:
<= 0.01 dB for every catalog curve at 44.1 kHz), not values taken from the code.
"""

from __future__ import annotations

import doctest
import inspect
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize, signal

import dspeq
from dspeq import DesignError, _fit
from dspeq._fit import POLE_RADIUS_MAX, ZERO_RADIUS_MAX, default_tol_db, fit
from dspeq.design import Design, methods

NAMES = [c["name"] for c in dspeq.curves()]
RATES = [44100.0, 48000.0, 96000.0]
TARGET_DB = {44100.0: 0.002, 48000.0: 0.0005, 96000.0: 0.0005}


def quiet_design(spec, fs, **options):
    """dspeq.design with the corner warnings silenced (they are tested in test_design)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return dspeq.design(spec, fs, **options)


def analog_order(c: dspeq.Curve) -> int:
    return max(len(c.zeros), len(c.poles))


def phase_below_refit(dev: dspeq.Deviation, f_hz: float) -> float:
    """Largest phase error (deg) up to ``f_hz`` after removing the delay best fitted up to f_hz."""
    return dev.max_phase_below(f_hz, refit_delay=True)


# ------------------------------------------------------------------ accuracy targets
@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("speed", [1.0, 2.0])
@pytest.mark.parametrize("name", NAMES)
def test_catalog_meets_the_magnitude_target(name, speed, fs):
    c = dspeq.curve(name, speed=speed)
    d = quiet_design(c, fs)
    dev = dspeq.check(d)
    assert d.method == "fit"
    assert dev.max_abs_db <= TARGET_DB[fs], (name, speed, fs, dev.max_abs_db, dev.f_at_max)
    # Two biquads suffice for every curve of order <= 2 (issue 4); riaa-iec is of order 3
    # (its 7950 µs low-cut adds a pole) and may take a third.
    assert len(d.sos) <= max(2, math.ceil(analog_order(c) / 2) + 1)
    if fs == 44100.0:
        assert len(d.sos) <= 2 or analog_order(c) > 2


@pytest.mark.parametrize("fs", RATES)
@pytest.mark.parametrize("name", NAMES)
def test_poles_inside_bound_and_zeros_on_or_inside_the_unit_circle(name, fs):
    d = quiet_design(name, fs)
    z, p, _ = d.zpk
    assert np.max(np.abs(p)) <= POLE_RADIUS_MAX
    assert np.max(np.abs(z)) <= ZERO_RADIUS_MAX + 1e-9


def _scipy_levenberg_marquardt(fun, jac, x, max_nfev):
    """The solver the fit used before dspeq/_lsq.py: scipy's MINPACK Levenberg-Marquardt."""
    return optimize.least_squares(fun, x, jac=jac, method="lm", x_scale="jac", max_nfev=max_nfev)


@pytest.mark.slow
@pytest.mark.parametrize("fs", [44100.0, 48000.0])
def test_numpy_solver_fits_as_well_as_scipy_least_squares(fs, monkeypatch):
    # The fit's own Levenberg-Marquardt (numpy, no scipy import) against the same fit driven by
    # scipy.optimize.least_squares (the reference): as good within 5 %, or below a tenth of
    # tol_db, where the re-weighting stops on purpose; the sections the same or fewer.
    ours = {}
    for name in NAMES:
        c = dspeq.curve(name).with_lf_limit(3.0)
        ours[name] = quiet_design(c, fs)
    monkeypatch.setattr(_fit, "levenberg_marquardt", _scipy_levenberg_marquardt)
    for name in NAMES:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            z, p, k = fit(dspeq.curve(name).with_lf_limit(3.0), fs)
        mine = ours[name]
        ref = Design(signal.zpk2sos(z, p, k), fs, "fit", mine.curve, mine.target, {})
        dev, dev_ref = dspeq.check(mine).max_abs_db, dspeq.check(ref).max_abs_db
        assert dev <= max(1.05 * dev_ref, 0.1 * default_tol_db(fs)), (name, dev, dev_ref)
        assert len(mine.sos) <= len(ref.sos), name


@pytest.mark.parametrize("name", ["iec-30ips", "disc-500-16", "disc-300-14", "riaa-iec"])
def test_192k_low_frequency_limit_beyond_the_pole_bound(name):
    # At 192 kHz the default 3 Hz limit maps to |z| = exp(-2π·3/192000) = 0.999902 > 0.9999:
    # the fit must stay inside the bound and still meet the 0.0005 dB target.
    assert math.exp(-2 * math.pi * 3.0 / 192000.0) > POLE_RADIUS_MAX
    d = quiet_design(name, 192000.0)
    assert np.max(np.abs(d.zpk[1])) <= POLE_RADIUS_MAX
    assert dspeq.check(d).max_abs_db <= 0.0005


@pytest.mark.parametrize("spec, kwargs", [
    ("iec-7.5ips", {"from_curve": "nab-7.5ips"}),          # IEC tape played on an NAB machine
    ("nab-7.5ips", {"speed": 2, "from_curve": "nab-15ips"}),
    ("nab-15ips", {"from_curve": "iec-15ips"}),            # a zero at s = 0 (z = 1, kept exact)
    ("disc-500-16", {"from_curve": "riaa"}),
    ("riaa-iec", {"speed": 2, "from_curve": "riaa"}),
    ("tc:50,3180/inf,75,25", {}),
    ("tc:10/100", {}),
    ("1/(1 + s*100u + s^2*1e-8)", {}),                     # a complex pole pair
    ("-(1+s*318u)/((1+s*3180u)(1+s*75u))", {}),            # negative gain: phase must follow
])
def test_corrections_and_custom_curves_meet_issue_2_at_44k(spec, kwargs):
    d = quiet_design(dspeq.curve(spec, **kwargs), 44100.0)
    dev = dspeq.check(d)
    assert dev.max_abs_db <= 0.01
    assert np.max(np.abs(d.zpk[1])) <= POLE_RADIUS_MAX
    assert dev.max_phase_below(10_000.0) < 5.0        # no sign flip or wrapped phase


def test_phase_error_at_high_rates():
    # Phase after delay removal (as dspeq.check measures it) to 20 kHz at 96 kHz.
    for name in ("riaa", "disc-500-16-lf100", "iec-30ips", "cassette-70us"):
        assert dspeq.check(quiet_design(name, 96000.0)).max_phase_deg <= 0.75


def test_phase_at_44k_is_close_to_the_minimum_phase_limit():
    # A minimum-phase design whose magnitude follows RIAA up to Nyquist has ~0.53 deg of phase
    # error to 10 kHz after the best delay up to 10 kHz (computed in benchmarks/accuracy_table.py
    # by the folded cepstrum); the fit should be within 0.05 deg of that and far from matched-z.
    d = quiet_design("riaa", 44100.0)
    assert phase_below_refit(dspeq.check(d), 10_000.0) <= 0.58


def test_phase_at_44k_with_the_whole_band_delay():
    # Issue 4 asks for 0.5 deg to 10 kHz at 44.1 kHz; with the delay fitted over the whole
    # 20 Hz-20 kHz band a minimum-phase design meeting the magnitude target reaches ~1.54 deg
    # (the minimum-phase limit is ~1.52 deg, docs/accuracy.md). This pins what is achieved.
    assert dspeq.check(quiet_design("riaa", 44100.0)).max_phase_below(10_000.0) <= 1.6


def test_phase_weight_trades_magnitude_for_phase():
    base = dspeq.check(quiet_design("riaa", 44100.0, sections=3))
    weighted = dspeq.check(quiet_design("riaa", 44100.0, sections=3, phase_weight=0.1))
    assert weighted.max_phase_below(10_000.0) < 0.8 * base.max_phase_below(10_000.0)
    assert weighted.max_abs_db > base.max_abs_db


# ------------------------------------------------------------------ options and warnings
def test_tol_db_and_sections_choose_the_order():
    loose = quiet_design("riaa", 48000.0, tol_db=0.5)
    assert len(loose.sos) == 1
    assert 0.01 < dspeq.check(loose).max_abs_db <= 0.5
    tight = quiet_design("riaa", 48000.0, tol_db=1e-5)
    assert len(tight.sos) > len(quiet_design("riaa", 48000.0).sos)
    forced = quiet_design("riaa", 48000.0, sections=3)
    assert len(forced.sos) == 3
    assert dspeq.check(forced).max_abs_db <= dspeq.check(quiet_design("riaa", 48000.0)).max_abs_db


def test_default_tolerance_follows_the_rate():
    assert default_tol_db(44100.0) == 0.002
    assert default_tol_db(48000.0) == default_tol_db(192000.0) == 0.0005


def test_unreachable_tolerance_warns_at_the_callers_line_and_returns_the_best():
    c = dspeq.curve("riaa-iec")          # order 3: two sections reach only ~0.01 dB at 44.1 kHz
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        d = dspeq.design(c, 44100.0, max_sections=2)
    msgs = [w for w in caught if "fit of" in str(w.message)]
    assert len(msgs) == 1
    text = str(msgs[0].message)
    assert "dB" in text and "sections" in text and "rate" in text
    assert Path(msgs[0].filename) == Path(__file__)
    reached = float(text.split("reached ")[1].split(" dB")[0])
    assert reached == pytest.approx(dspeq.check(d).max_abs_db, rel=0.05)
    assert len(d.sos) == 2


def test_unreachable_tolerance_warns_at_the_callers_line_when_called_directly():
    c = dspeq.curve("riaa").with_lf_limit(3.0)
    with pytest.warns(UserWarning, match="reached") as caught:
        fit(c, 44100.0, tol_db=1e-6, max_sections=1)
    assert Path(caught[0].filename) == Path(__file__)


def test_sections_fewer_than_the_curve_needs_is_an_error():
    with pytest.raises(DesignError, match="sections=1"):
        dspeq.design("riaa-iec", 48000.0, sections=1)
    with pytest.raises(DesignError, match="tol_db"):
        dspeq.design("riaa", 48000.0, tol_db=-1.0)


def test_right_half_plane_zero_warns_about_phase():
    with pytest.warns(UserWarning, match="right-half-plane"):
        d = dspeq.design("(1 - s*100u)/(1 + s*100u)", 48000.0)
    assert dspeq.check(d).max_abs_db <= 0.0005    # the magnitude (flat) is still realized


def test_deterministic_coefficients():
    c = dspeq.curve("disc-500-16", speed=2).with_lf_limit(3.0)
    a = fit(c, 44100.0)
    b = fit(c, 44100.0)
    for x, y in zip(a, b, strict=True):
        np.testing.assert_array_equal(x, y)
    sos_a, sos_b = signal.zpk2sos(*a), signal.zpk2sos(*b)
    assert sos_a.tobytes() == sos_b.tobytes()


def test_registered_options_match_the_signature():
    m = methods()["fit"]
    params = inspect.signature(m.func).parameters
    keywords = {n for n, p in params.items() if p.kind is inspect.Parameter.KEYWORD_ONLY}
    assert set(m.options) == keywords
    assert "dB" in m.summary


def test_module_examples_run():
    result = doctest.testmod(_fit, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0
