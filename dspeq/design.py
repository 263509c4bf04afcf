"""Discretization: analog :class:`~dspeq.curves.Curve` → digital :class:`Design` (SOS).

Methods are registered functions ``f(curve, fs, **options) -> (z, p, k)`` working
on a curve whose integrators have already been replaced by the low-frequency
limit.  :func:`design` does the common work: parsing, validation, the
low-frequency limit, warnings, SOS conversion, stability checks and caching.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._errors import DesignError
from ._zpk import bilinear_zpk, sos2zpk, sos_response, zpk2sos
from .check import digital_group_delay
from .curves import Curve
from .spec import parse_curve

__all__ = ["Design", "design", "methods", "register_method", "DEFAULT_METHOD",
           "DEFAULT_LF_LIMIT_HZ", "MIN_RATE", "MAX_RATE", "CORNER_WARN_FRACTION"]

#: Low-frequency limit (Hz) that replaces each pole at s = 0 in a design.  3 Hz
#: keeps the error against an ideal integrator at 20 Hz to 0.1 dB
#: (10·log10(1 + (3/20)²)).  Its pole radius exceeds 0.9999 from about 188 kHz (0.999902 at
#: 192 kHz), where the fit clips it and compensates with a pole/zero pair.
DEFAULT_LF_LIMIT_HZ = 3.0
DEFAULT_METHOD = "fit"
MIN_RATE, MAX_RATE = 8_000.0, 384_000.0
#: A curve corner at or above this fraction of the rate draws a warning.
CORNER_WARN_FRACTION = 0.45

Zpk = tuple[np.ndarray, np.ndarray, float]


@dataclass(frozen=True)
class Method:
    """A registered discretization method."""

    name: str
    func: Callable[..., Zpk]
    summary: str
    options: dict[str, str] = field(default_factory=dict)


_METHODS: dict[str, Method] = {}


def register_method(name: str, summary: str, options: dict[str, str] | None = None):
    """Decorator: register ``func(curve, fs, **options) -> (z, p, k)`` as method ``name``."""
    def deco(func: Callable[..., Zpk]) -> Callable[..., Zpk]:
        _METHODS[name] = Method(name, func, summary, dict(options or {}))
        return func
    return deco


def methods() -> dict[str, Method]:
    """The registered methods by name (a copy)."""
    _load_optional_methods()
    return dict(_METHODS)


@dataclass(frozen=True, eq=False)
class Design:
    """A digital realization of a curve at one sample rate.

    Attributes
    ----------
    sos : ndarray, shape (n_sections, 6)
        Second-order sections, ``a0 == 1``, float64, read-only.
    fs : float
        Sample rate in Hz.
    method : str
        Name of the method that made it.
    curve : Curve
        The curve asked for (integrators kept exact).
    target : Curve
        The curve actually realized: ``curve`` with each pole at s = 0 moved
        to ``lf_limit_hz``.  Deviations are measured against it.
    options : dict
        Method options used, including ``lf_limit_hz``.
    """

    sos: np.ndarray
    fs: float
    method: str
    curve: Curve
    target: Curve
    options: dict[str, Any]

    @property
    def label(self) -> str:
        """Method name plus its non-default options, e.g. ``bilinear(prewarp_hz=1000)``."""
        extra = ", ".join(f"{k}={v:g}" if isinstance(v, float) else f"{k}={v}"
                          for k, v in self.options.items() if k != "lf_limit_hz")
        return f"{self.method}({extra})" if extra else self.method

    @property
    def zpk(self) -> Zpk:
        """Digital zeros, poles and gain of the cascade."""
        return sos2zpk(self.sos)

    @property
    def sections(self) -> int:
        """Number of second-order sections (biquads) the cascade runs."""
        return int(self.sos.shape[0])

    @property
    def order(self) -> int:
        """Filter order (2 × sections, less trivial first-order padding)."""
        z, p, _ = self.zpk
        return int(max(np.count_nonzero(z != 0), np.count_nonzero(p != 0)))

    def response(self, f: np.ndarray | float) -> np.ndarray:
        """Complex frequency response at ``f`` (Hz)."""
        return sos_response(self.sos, f, self.fs)

    def magnitude_db(self, f: np.ndarray | float) -> np.ndarray:
        """Magnitude of the digital response in dB at ``f`` (Hz)."""
        return 20.0 * np.log10(np.abs(self.response(f)))

    def group_delay_samples(self, f: np.ndarray | float) -> np.ndarray:
        """Group delay of the cascade in samples at ``f`` (Hz)."""
        return digital_group_delay(self.sos, np.asarray(f, dtype=float), self.fs)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready description (coefficients, rate, method, curve, options)."""
        return {"curve": self.curve.name, "curve_roots": self.curve.describe_roots(),
                "curve_source": self.curve.source, "method": self.method, "rate": self.fs,
                "options": {k: v for k, v in self.options.items()},
                "sos": self.sos.tolist()}


def _validate_rate(fs: float) -> float:
    try:
        rate = float(fs)
    except (TypeError, ValueError):
        raise DesignError(f"sample rate must be a number of Hz, got {fs!r}") from None
    if not (MIN_RATE <= rate <= MAX_RATE):
        raise DesignError(f"sample rate {fs!r} Hz is outside {MIN_RATE:g}–{MAX_RATE:g} Hz")
    return rate


def _warn_high_corners(curve: Curve, fs: float) -> None:
    limit = CORNER_WARN_FRACTION * fs
    for kind, roots in (("zero", curve.zeros), ("pole", curve.poles)):
        for r in roots:
            f = abs(r) / (2 * math.pi)
            if r.imag >= 0 and f >= limit:
                tau = f" ({1e6 / abs(r):.4g} µs)" if r.imag == 0 else ""
                warnings.warn(
                    f"curve {curve.name!r}: {kind} at {f:.1f} Hz{tau} is at or above "
                    f"{CORNER_WARN_FRACTION}·fs = {limit:.0f} Hz; the design cannot follow it there "
                    "(use a higher rate)", UserWarning, stacklevel=3)


def _check_stable(z: np.ndarray, p: np.ndarray, k: float, method: str) -> None:
    if not (np.all(np.isfinite(z)) and np.all(np.isfinite(p)) and math.isfinite(k)):
        raise DesignError(f"method {method!r} produced non-finite coefficients")
    worst = float(np.max(np.abs(p))) if len(p) else 0.0
    if worst >= 1.0:
        raise DesignError(f"method {method!r} produced an unstable design (pole radius {worst:.9f})")


_CACHE: dict[tuple, tuple[Design, list]] = {}
_CACHE_MAX = 512


def design(curve: Curve | str, fs: float, method: str = DEFAULT_METHOD, *,
           lf_limit_hz: float = DEFAULT_LF_LIMIT_HZ, **options: Any) -> Design:
    """Design a digital filter (SOS) that realizes ``curve`` at rate ``fs``.

    Parameters
    ----------
    curve : Curve or str
        A Curve or any curve spec accepted by :func:`dspeq.curve`.
    fs : float
        Sample rate in Hz (8 kHz – 384 kHz).
    method : str, optional
        ``"fit"`` (default), ``"bilinear"``, ``"matched-z"`` or ``"closed-form"``;
        see :func:`methods` for each method's options.
    lf_limit_hz : float, optional
        Each pole at s = 0 is replaced by a pole at this frequency (default 3 Hz).
    **options
        Options of the method.

    Returns
    -------
    Design
        Deterministic: the same inputs give the same coefficients (and the same
        object, from an in-memory cache).

    Examples
    --------
    >>> import dspeq
    >>> d = dspeq.design("riaa", 48000, method="bilinear")
    >>> d.sos.shape
    (1, 6)
    """
    c = parse_curve(curve)
    rate = _validate_rate(fs)
    if method not in _METHODS:
        _load_optional_methods()          # only when needed: the other methods skip importing the fit
    if method not in _METHODS:
        raise DesignError(f"unknown method {method!r}; choose from {', '.join(sorted(_METHODS))}")
    options = {k: tuple(v) if isinstance(v, list) else v for k, v in options.items()}
    key = (c.key(), rate, method, float(lf_limit_hz), tuple(sorted(options.items())))
    hit = _CACHE.get(key)
    if hit is None or hit[0].curve.name != c.name:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            d = _make_design(c, rate, method, float(lf_limit_hz), options)
        hit = (d, [(w.message, w.category) for w in caught])
        if len(_CACHE) >= _CACHE_MAX:
            _CACHE.clear()
        _CACHE[key] = hit
    for message, category in hit[1]:       # a cached design warns again, like a fresh one
        warnings.warn(message, category, stacklevel=2)
    return hit[0]


def _make_design(c: Curve, rate: float, method: str, lf_limit_hz: float, options: dict) -> Design:
    target = c.with_lf_limit(lf_limit_hz)
    _warn_high_corners(target, rate)
    try:
        z, p, k = _METHODS[method].func(target, rate, **options)
    except TypeError as exc:
        raise DesignError(f"method {method!r}: {exc}") from None
    z, p = np.asarray(z, dtype=complex), np.asarray(p, dtype=complex)
    _check_stable(z, p, float(k), method)
    sos = np.ascontiguousarray(zpk2sos(z, p, float(k)), dtype=np.float64)
    sos.setflags(write=False)
    return Design(sos, rate, method, c, target, {"lf_limit_hz": lf_limit_hz, **options})


# ----------------------------------------------------------------------------- methods
def _gain_at(z: np.ndarray, p: np.ndarray, f_hz: float, fs: float) -> complex:
    e = np.exp(2j * np.pi * f_hz / fs)
    return complex(np.prod(e - z) / np.prod(e - p))


def _match_gain(curve: Curve, z: np.ndarray, p: np.ndarray, fs: float) -> float:
    """Gain k such that |H(e^{jw})| equals the analog magnitude at the curve's reference."""
    ref = min(curve.reference_hz, 0.4 * fs)
    return abs(complex(curve.response(ref))) / abs(_gain_at(z, p, ref, fs))


@register_method("bilinear", "bilinear transform s = K(z−1)/(z+1), K = 2fs or prewarped; "
                 "exact in shape but the frequency axis is warped (a falling curve gets a zero at "
                 "Nyquist: large error near fs/2)",
                 {"prewarp_hz": "frequency (Hz) where the response is made exact (default: none, "
                                "K = 2fs, as scipy.signal.bilinear_zpk)"})
def _bilinear(curve: Curve, fs: float, prewarp_hz: float | None = None) -> Zpk:
    fs_eff = fs
    if prewarp_hz is not None:
        w0 = 2 * math.pi * float(prewarp_hz)
        if not (0 < prewarp_hz < fs / 2):
            raise DesignError(f"prewarp frequency {prewarp_hz!r} Hz must lie between 0 and fs/2")
        fs_eff = w0 / (2.0 * math.tan(w0 / (2.0 * fs)))
    return bilinear_zpk(curve.zeros, curve.poles, curve.gain, fs_eff)


@register_method("matched-z", "matched-z transform z = exp(sT) for every pole and zero, gain matched "
                 "at the curve's reference frequency; no zeros added, so the HF response drifts "
                 "and an excess pole adds one sample of delay")
def _matched_z(curve: Curve, fs: float) -> Zpk:
    z = np.exp(curve.zeros / fs)
    p = np.exp(curve.poles / fs)
    return z, p, _match_gain(curve, z, p, fs)


def _first_order_factors(curve: Curve) -> list[tuple[complex | None, complex | None]]:
    """Pair real zeros with real poles into first-order factors, highest corners together.

    Pairing the highest zero with the highest pole turns the high-frequency part of a
    curve into a shelf (finite gain at Nyquist), which a first-order section follows far
    better than a lone pole; the low corners are matched well by any pairing.
    """
    zs = sorted([r.real for r in curve.zeros if r.imag == 0], key=abs, reverse=True)
    ps = sorted([r.real for r in curve.poles if r.imag == 0], key=abs, reverse=True)
    n = max(len(zs), len(ps))
    zs += [None] * (n - len(zs))
    ps += [None] * (n - len(ps))
    return list(zip(zs, ps, strict=True))


def _factor_gain(zero: float | None, pole: float | None, w: float) -> float:
    """|(1 − jw/zero)/(1 − jw/pole)| of one first-order factor (a zero at 0 is the factor jw)."""
    num = 1.0 if zero is None else (w if zero == 0 else abs(complex(1, -w / zero)))
    den = 1.0 if pole is None else abs(complex(1, -w / pole))
    return num / den


def _matched_first_order(zero: float | None, pole: float | None, fs: float) -> Zpk:
    """One first-order factor (1 − s/zero)/(1 − s/pole) with its magnitude matched exactly.

    A digital first-order section has |H(e^{jω})|² = (β0 + β1·cos ω)/(α0 + α1·cos ω) with
    β0 = b0² + b1², β1 = 2·b0·b1, α0 = 1 + a1², α1 = 2·a1.  Requiring the analog magnitude
    at DC, at Nyquist and at the pole's corner (capped at 0.45·fs) gives a linear system in
    (β0, β1, α1) for α0 = 1; a1, b0, b1 then follow in closed form with the zero and pole
    inside the unit circle (minimum phase).  This is the magnitude-matching idea of
    M. Vicanek, "Matched One-Pole Digital Shelving Filters" (2019); the three-point
    formulation here is our own derivation.  A factor without a pole is matched at DC and
    Nyquist only (FIR, a1 = 0).
    """
    nyq = math.pi * fs
    g0, gn = _factor_gain(zero, pole, 0.0), _factor_gain(zero, pole, nyq)
    a1 = 0.0
    if pole is not None:
        wc = min(abs(pole), 0.9 * nyq)
        gc = _factor_gain(zero, pole, wc)
        c = math.cos(wc / fs)
        m = np.array([[1.0, 1.0, -g0 ** 2], [1.0, -1.0, gn ** 2], [1.0, c, -gc ** 2 * c]])
        beta0, beta1, alpha1 = np.linalg.solve(m, [g0 ** 2, gn ** 2, gc ** 2])
        r = float(np.clip(alpha1, -1.0, 1.0))
        a1 = 0.0 if r == 0 else (1.0 - math.sqrt(1.0 - r * r)) / r
        scale = 1.0 + a1 * a1
        g0 = math.sqrt(max(beta0 + beta1, 0.0) * scale)
        gn = math.sqrt(max(beta0 - beta1, 0.0) * scale)
    b0 = 0.5 * (g0 + gn)
    b1 = 0.5 * (g0 - gn)
    z = np.array([-b1 / b0])
    p = np.array([-a1])
    return z, p, b0


@register_method("closed-form", "closed-form magnitude-matched first-order sections (after Vicanek "
                 "2019): each real pole/zero pair exact at DC, Nyquist and the pole's corner; "
                 "complex pairs fall back to matched-z; gain then set at the reference frequency")
def _closed_form(curve: Curve, fs: float) -> Zpk:
    zs: list[complex] = []
    ps: list[complex] = []
    k = 1.0
    for zero, pole in _first_order_factors(curve):
        z1, p1, k1 = _matched_first_order(zero, pole, fs)
        zs += list(z1)
        ps += list(p1)
        k *= k1
    cz = [r for r in curve.zeros if r.imag != 0]
    cp = [r for r in curve.poles if r.imag != 0]
    zs += list(np.exp(np.asarray(cz) / fs))
    ps += list(np.exp(np.asarray(cp) / fs))
    z, p = np.asarray(zs, dtype=complex), np.asarray(ps, dtype=complex)
    return z, p, _match_gain(curve, z, p, fs)


def _load_optional_methods() -> None:
    """Register methods that live in other modules (the optimizer behind ``fit``)."""
    if "fit" not in _METHODS:
        from . import _fit  # noqa: F401  (registers "fit" on import)
