"""The numpy replacements of the design path against their scipy counterparts (the reference library).

dspeq/_zpk.py stands in for scipy.signal.zpk2sos / sos2zpk / bilinear_zpk / sosfreqz, and
dspeq/_lsq.py for scipy.optimize.least_squares(method="lm"), so that designing imports no
scipy; scipy stays a dependency and is the reference here.
"""

from __future__ import annotations

import doctest
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize, signal

import dspeq
from dspeq import _lsq, _zpk
from dspeq._lsq import levenberg_marquardt

ROOT = Path(__file__).resolve().parent.parent
NAMES = [c["name"] for c in dspeq.curves()]


def random_roots(rng: np.random.Generator, n: int, radius: float) -> np.ndarray:
    """n roots inside |z| < radius: real ones and conjugate pairs, some repeated or at 0 / ±1."""
    out: list[complex] = []
    while len(out) < n:
        u = rng.random()
        if u < 0.35 and n - len(out) >= 2:
            r = radius * rng.random() * np.exp(1j * rng.uniform(0.01, np.pi - 0.01))
            out += [r, np.conj(r)]
        elif u < 0.45:
            out.append(rng.choice([0.0, 1.0, -1.0]) * min(radius, 1.0))
        elif u < 0.5 and out:
            out.append(out[-1] if np.imag(out[-1]) == 0 else 0.5)
        else:
            out.append(rng.uniform(-radius, radius))
    return np.array(out, dtype=complex)


def sorted_roots(r: np.ndarray) -> np.ndarray:
    return np.sort_complex(np.round(np.asarray(r, dtype=complex), 9))


# ------------------------------------------------------------------ zpk2sos
@pytest.mark.parametrize("seed", range(4))
def test_zpk2sos_equals_scipy_on_random_systems(seed):
    rng = np.random.default_rng(seed)
    for _ in range(150):
        z = random_roots(rng, int(rng.integers(0, 9)), 1.0)
        p = random_roots(rng, int(rng.integers(0, 9)), 0.9999)
        k = float(rng.uniform(-5, 5))
        ref = signal.zpk2sos(z, p, k)                     # reference: scipy, pairing="nearest"
        np.testing.assert_allclose(_zpk.zpk2sos(z, p, k), ref, rtol=1e-12, atol=1e-14,
                                   err_msg=f"z={z!r} p={p!r} k={k!r}")


@pytest.mark.parametrize("method", ["fit", "bilinear", "matched-z", "closed-form"])
@pytest.mark.parametrize("fs", [44100.0, 96000.0])
def test_zpk2sos_equals_scipy_on_catalog_designs(method, fs):
    for name in NAMES:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")                # corner warnings: tested in test_design
            d = dspeq.design(name, fs, method=method)
        z, p, k = signal.sos2zpk(d.sos)                    # reference: scipy
        np.testing.assert_allclose(_zpk.zpk2sos(z, p, k), signal.zpk2sos(z, p, k),
                                   rtol=1e-12, atol=1e-14, err_msg=name)


def test_zpk2sos_empty_and_gain_only():
    np.testing.assert_array_equal(_zpk.zpk2sos([], [], 2.5), signal.zpk2sos([], [], 2.5))
    with pytest.raises(ValueError, match="conjugate"):
        _zpk.zpk2sos([0.5 + 0.5j], [0.1], 1.0)


# ------------------------------------------------------------------ sos2zpk, response
@pytest.mark.parametrize("seed", range(4))
def test_sos2zpk_and_response_equal_scipy(seed):
    rng = np.random.default_rng(100 + seed)
    f = np.concatenate([[0.0], np.geomspace(1.0, 23_999.0, 200), [24_000.0]])
    for _ in range(100):
        z = random_roots(rng, int(rng.integers(1, 7)), 1.0)
        p = random_roots(rng, int(rng.integers(1, 7)), 0.999)
        sos = signal.zpk2sos(z, p, float(rng.uniform(0.1, 3)))
        zr, pr, kr = signal.sos2zpk(sos)                   # reference: scipy
        zz, pp, kk = _zpk.sos2zpk(sos)
        np.testing.assert_allclose(sorted_roots(zz), sorted_roots(zr), atol=1e-7)
        np.testing.assert_allclose(sorted_roots(pp), sorted_roots(pr), atol=1e-7)
        assert kk == pytest.approx(kr, rel=1e-12)
        _, h = signal.sosfreqz(sos, worN=f, fs=48000.0)    # reference: scipy
        # poles at |z| = 0.999 amplify rounding in 1 + a1·z⁻¹ + a2·z⁻² by ~1e5: rtol 1e-9
        np.testing.assert_allclose(_zpk.sos_response(sos, f, 48000.0), h, rtol=1e-9, atol=1e-12)


def test_sos2zpk_first_order_sections_pad_with_origin_roots():
    sos = np.array([[2.0, 1.0, 0.0, 1.0, -0.5, 0.0], [1.0, 0.0, 0.0, 1.0, 0.0, 0.0]])
    z, p, k = _zpk.sos2zpk(sos)
    zr, pr, kr = signal.sos2zpk(sos)                       # reference: scipy
    assert len(z) == len(zr) == 4 and len(p) == len(pr) == 4
    np.testing.assert_allclose(sorted_roots(z), sorted_roots(zr))
    assert k == kr == 2.0


# ------------------------------------------------------------------ bilinear
@pytest.mark.parametrize("fs", [8000.0, 44100.0, 48000.0, 192000.0])
def test_bilinear_zpk_equals_scipy_on_the_catalog(fs):
    for name in NAMES:
        c = dspeq.curve(name).with_lf_limit(3.0)
        ref = signal.bilinear_zpk(c.zeros, c.poles, c.gain, fs)   # reference: scipy
        got = _zpk.bilinear_zpk(c.zeros, c.poles, c.gain, fs)
        for a, b in zip(got[:2], ref[:2], strict=True):
            np.testing.assert_allclose(a, b, rtol=1e-13, atol=1e-15, err_msg=name)
        assert got[2] == pytest.approx(ref[2], rel=1e-13)


def test_bilinear_zpk_equals_scipy_on_random_systems():
    rng = np.random.default_rng(7)
    for _ in range(200):
        p = -np.abs(random_roots(rng, int(rng.integers(1, 6)), 1e5).real) - 1.0
        z = random_roots(rng, int(rng.integers(0, len(p) + 1)), 1e5)
        ref = signal.bilinear_zpk(z, p, 3.0, 48000.0)            # reference: scipy
        got = _zpk.bilinear_zpk(z, p, 3.0, 48000.0)
        np.testing.assert_allclose(got[0], ref[0], rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(got[1], ref[1], rtol=1e-12, atol=1e-14)
        assert got[2] == pytest.approx(ref[2], rel=1e-12)
    with pytest.raises(ValueError, match="improper"):
        _zpk.bilinear_zpk([-1.0, -2.0], [-3.0], 1.0, 48000.0)


# ------------------------------------------------------------------ Levenberg-Marquardt
def _problems():
    """Standard least-squares test problems: (fun, jac, x0)."""
    t = np.linspace(0.0, 3.0, 40)
    rng = np.random.default_rng(3)
    y = 2.0 * np.exp(-1.3 * t) + 0.7 * np.exp(-4.1 * t) + 1e-3 * rng.standard_normal(len(t))

    def two_exp(x):
        return x[0] * np.exp(-x[1] * t) + x[2] * np.exp(-x[3] * t) - y

    def two_exp_jac(x):
        e1, e3 = np.exp(-x[1] * t), np.exp(-x[3] * t)
        return np.stack([e1, -x[0] * t * e1, e3, -x[2] * t * e3], axis=1)

    def rosenbrock(x):                    # Rosenbrock's function as residuals; minimum 0 at (1, 1)
        return np.array([10.0 * (x[1] - x[0] ** 2), 1.0 - x[0]])

    def rosenbrock_jac(x):
        return np.array([[-20.0 * x[0], 10.0], [-1.0, 0.0]])

    def powell(x):                        # Powell's singular function: Jacobian singular at the minimum
        return np.array([x[0] + 10 * x[1], np.sqrt(5) * (x[2] - x[3]), (x[1] - 2 * x[2]) ** 2,
                         np.sqrt(10) * (x[0] - x[3]) ** 2])

    def powell_jac(x):
        a, b = 2 * (x[1] - 2 * x[2]), 2 * np.sqrt(10) * (x[0] - x[3])
        return np.array([[1, 10, 0, 0], [0, 0, np.sqrt(5), -np.sqrt(5)], [0, a, -2 * a, 0],
                         [b, 0, 0, -b]], dtype=float)

    return [(two_exp, two_exp_jac, np.array([1.0, 1.0, 1.0, 5.0])),
            (rosenbrock, rosenbrock_jac, np.array([-1.2, 1.0])),
            (rosenbrock, rosenbrock_jac, np.array([3.0, -2.0])),
            (powell, powell_jac, np.array([3.0, -1.0, 0.0, 1.0]))]


@pytest.mark.parametrize("case", range(4))
def test_levenberg_marquardt_reaches_scipy_least_squares(case):
    fun, jac, x0 = _problems()[case]
    ref = optimize.least_squares(fun, x0, jac=jac, method="lm", x_scale="jac")  # reference: scipy
    got = levenberg_marquardt(fun, jac, x0, max_nfev=100 * len(x0))
    assert got.cost <= ref.cost * (1 + 1e-6) + 1e-20
    assert got.nfev <= 2 * ref.nfev       # Powell's singular Jacobian: same zero, more steps
    np.testing.assert_allclose(got.x, ref.x, rtol=1e-4, atol=1e-4)


def test_levenberg_marquardt_respects_max_nfev():
    fun, jac, x0 = _problems()[1]
    res = levenberg_marquardt(fun, jac, x0, max_nfev=3)
    assert res.nfev == 3 and res.status == "max_nfev"
    assert res.cost < 0.5 * float(fun(x0) @ fun(x0))      # never returns a worse point


def test_module_examples_run():
    for module in (_zpk, _lsq):
        result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
        assert result.attempted > 0 and result.failed == 0


# ------------------------------------------------------------------ no scipy on the design path
_NO_SCIPY = """
import contextlib, io, sys, warnings
import dspeq
from dspeq.cli import main
warnings.simplefilter("ignore")
for method in ("fit", "bilinear", "matched-z", "closed-form"):
    for fmt in ("json", "csv", "c"):
        with contextlib.redirect_stdout(io.StringIO()):
            assert main(["design", "riaa", "--rate", "48000", "--method", method,
                         "--format", fmt]) == 0
d = dspeq.design("riaa", 44100)
dev = dspeq.check(d)
d = dspeq.design("riaa-iec", 44100, method="bilinear", prewarp_hz=10000)
print(d.zpk[2], d.order, dev.max_abs_db, dspeq.check(d).max_abs_db)
print(sorted(m for m in sys.modules if m == "scipy" or m.startswith("scipy.")))
"""


def test_design_check_and_every_output_format_import_no_scipy():
    # `dspeq design` (every method and format), dspeq.design and dspeq.check must not import scipy:
    # importing scipy.signal alone takes longer than the 0.5 s start-up budget (issue 5).
    out = subprocess.run([sys.executable, "-c", _NO_SCIPY], capture_output=True, text=True,
                         cwd=ROOT)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().splitlines()[-1] == "[]", out.stdout
