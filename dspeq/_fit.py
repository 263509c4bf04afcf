"""The optimizer behind the ``"fit"`` design method.

A digital filter of ``n`` second-order sections is fitted to the analog
curve's log magnitude over the audio band, minimax, with its poles and zeros
as the unknowns:

* start from the matched-z mapping ``z = exp(s/fs)`` of the curve's roots,
  padded with roots at the origin (which change nothing but the phase); zeros
  of the curve at s = 0 stay fixed at z = 1;
* every real root is a first-order factor ``1 + a1·z⁻¹`` with
  ``a1 = ρ·sin(u)``; complex pairs and the padding roots are second-order
  factors ``1 + a1·z⁻¹ + a2·z⁻²`` over the whole stability triangle scaled to
  the radius ρ (Jury's conditions ``|a2| ≤ ρ²``, ``|a1| ≤ ρ + a2/ρ``):
  ``a2 = ρ²·sin(v)``, ``a1 = ρ·(1 + sin v)·sin(u)``, so real and complex
  pairs are one smooth family.  The sine keeps every pole at ``|z| ≤ ρ``
  (just inside ``POLE_RADIUS_MAX``) and every zero at ``|z| ≤ 1`` without
  bounds in the solver, and, unlike tanh, it does not trap a root that touches
  the bound (the gradient comes back on the other side of the fold);
* Levenberg–Marquardt (:func:`dspeq._lsq.levenberg_marquardt`, MINPACK's
  trust-region form in numpy, analytic Jacobian) on the dB error over a
  log-spaced grid (denser near the top edge), then rounds of Lawson's
  iteratively re-weighted least squares, which move the weight toward the
  largest errors and so toward the minimax (equiripple) solution, and, when
  those stall, a few rounds weighted by the squared envelope of the error
  (Rice and Usow's variant), which go further;
* optionally a phase term: the phase error after removing the best-fit pure
  delay (the same least-squares delay over the whole band as
  :func:`dspeq.check`), at frequencies up to ``PHASE_LIMIT_HZ``, weighted by
  ``phase_weight``.

The number of sections grows from the smallest that holds the curve's roots
until ``tol_db`` is met (or ``max_sections`` is reached, with a warning); each
larger fit starts from the previous one plus a section that changes nothing,
with the previous weights, so it can only improve.  No random starts: the same
inputs give the same coefficients.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ._errors import DesignError
from ._lsq import levenberg_marquardt
from .check import DEFAULT_BAND, band_for_rate
from .curves import Curve
from .design import register_method

__all__ = ["fit", "POLE_RADIUS_MAX", "ZERO_RADIUS_MAX", "default_tol_db", "PHASE_LIMIT_HZ",
           "DEFAULT_PHASE_WEIGHT", "DEFAULT_MAX_SECTIONS"]

#: Largest pole radius a fit may use (margin from the unit circle).
POLE_RADIUS_MAX = 0.9999
#: Zeros may reach the unit circle (a zero at z = 1 realizes a zero of the curve at s = 0).
ZERO_RADIUS_MAX = 1.0
#: The phase term covers frequencies up to this limit (Hz).
PHASE_LIMIT_HZ = 10_000.0
#: Weight of one degree of phase error against one dB of magnitude error.
DEFAULT_PHASE_WEIGHT = 0.0
DEFAULT_MAX_SECTIONS = 4

_DB = 20.0 / math.log(10.0)
_N_LOG, _N_TOP = 160, 64         # log-spaced grid points, plus linear ones in the top two octaves
_IRLS_ROUNDS = 12
_POLISH_ROUNDS = 3              # rounds of the envelope-weighted polish (see _minimax)
_NFEV_FIRST, _NFEV_ROUND = 40, 25
_NFEV_POLISH = 10                # residual evaluations per polish round
_MIN_WEIGHT = 1e-3
_SEED_SPREAD = 1.5               # seed pole at 1.5 × the clipped pole's |s| (see _clip_seeds)
_HOPELESS_ROUND, _HOPELESS = 2, 4.0   # still this many times tol after this round: more sections
_GOOD_ENOUGH = 0.1              # stop re-weighting once the error is this fraction of tol
_EDGE = 1.0 - 1e-6               # keep starting points off the parametrization's edge
# The radius the optimizer may use for poles: a relative 1e-6 inside POLE_RADIUS_MAX, so that
# rounding in the SOS conversion (up to ~1e-8 for two close poles) cannot cross the bound.
_POLE_RHO = POLE_RADIUS_MAX * (1.0 - 1e-6)


def default_tol_db(fs: float) -> float:
    """Default magnitude tolerance (dB): 0.0005 from 48 kHz up, 0.002 below.

    Below 48 kHz the band's upper edge (20 kHz) lies within 10 % of Nyquist,
    where every rational digital filter of low order bends away from an analog
    curve that keeps falling; 0.002 dB is what two sections reach there.
    """
    return 0.0005 if fs >= 48_000.0 else 0.002


# ----------------------------------------------------------------------------- layout
def _matched_roots(curve: Curve, fs: float) -> tuple[np.ndarray, np.ndarray, int]:
    """Matched-z zeros and poles (moved into range) and the count of zeros at z = 1.

    A right-half-plane zero is reflected into the unit circle (same magnitude,
    minimum phase).  A pole beyond the radius bound (e.g. a 3 Hz low-frequency
    limit at 192 kHz) is clipped; see :func:`_clip_seeds`.
    """
    at_dc = curve.zeros == 0
    z = np.exp(curve.zeros[~at_dc] / fs)
    outside = np.abs(z) > 1.0
    z[outside] = 1.0 / np.conj(z[outside])
    p = np.exp(curve.poles / fs)
    return z, p, int(np.count_nonzero(at_dc))


def _clip_seeds(p: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Clip real poles beyond the bound, with a pole/zero pair per clipped pole that makes up for it.

    In the s-plane a pole moved from −a to −a′ (a′ > a) errs by −10·log10(1 + (a′/ω)²)
    + 10·log10(1 + (a/ω)²) ≈ −(a′² − a²)/ω² (in 10·log10 units) far above it; a
    further pole at −b with a zero at −√(b² + a′² − a²) cancels that term.  With
    b = 1.5·a′ the remainder is (a′² − a²)(b² − a²)/ω⁴, small at 20 Hz up to 192 kHz
    (a 3 Hz limit clipped to 3.06 Hz); the optimizer then refines the pair.
    Returns (clipped poles, seed zeros, seed poles) in the z-plane.
    """
    edge = _POLE_RHO * _EDGE
    big = np.abs(p) > edge
    if not np.any(big):
        return p, np.zeros(0), np.zeros(0)
    a = -np.log(np.abs(p[big]))                 # |s|/fs of the poles asked for
    a_clip = -math.log(edge)
    b = _SEED_SPREAD * a_clip
    seeds_p = np.exp(-np.full(len(a), b))
    seeds_z = np.exp(-np.sqrt(b * b + a_clip * a_clip - a * a))
    p = p.copy()
    p[big] = p[big] / np.abs(p[big]) * edge
    return p, seeds_z, seeds_p


def _asin(v: float) -> float:
    return math.asin(min(max(v, -_EDGE), _EDGE))


def _side_factors(roots: np.ndarray, degree: int, rho: float) -> list[list[float]]:
    """Starting parameters of one side's factors: ``[u]`` per real root, ``[u, v]`` per pair.

    Real roots get a first-order factor each, ``a1 = ρ·sin(u)`` (root −a1):
    well conditioned even next to z = 1, where two real roots in one
    triangle-parametrized quadratic would sit in a degenerate corner.  Complex
    pairs, and the padding roots (at the origin, free to become real or complex),
    get the triangle parametrization ``a2 = ρ²·sin(v)``, ``a1 = ρ(1 + sin v)·sin(u)``.
    """
    out = [[_asin(-r.real / rho)] for r in roots if r.imag == 0]
    for r in (r for r in roots if r.imag > 0):
        b2 = min(max(abs(r) ** 2 / rho ** 2, -_EDGE), _EDGE)
        out.append([_asin(-2.0 * r.real / rho / (1.0 + b2)), math.asin(b2)])
    pad = degree - len(roots)
    out += [[0.0, 0.0]] * (pad // 2) + [[0.0]] * (pad % 2)
    return out


@dataclass(frozen=True)
class _Layout:
    """Which parameters form which factor: index arrays into x, radius and sign per factor."""

    iu: np.ndarray       # parameter index of u (every factor)
    iv: np.ndarray       # parameter index of v (quadratic factors; -1 for first-order ones)
    rho: np.ndarray      # radius bound per factor
    sign: np.ndarray     # +1 numerator, -1 denominator
    n_params: int

    @classmethod
    def build(cls, zero_factors: list[list[float]], pole_factors: list[list[float]]
              ) -> tuple[_Layout, np.ndarray]:
        """The layout and the parameter vector (gain first) of the given factors."""
        iu, iv, rho, sign, x = [], [], [], [], [0.0]
        for factors, r, s in ((zero_factors, ZERO_RADIUS_MAX, 1.0),
                              (pole_factors, _POLE_RHO, -1.0)):
            for params in factors:
                iu.append(len(x))
                iv.append(len(x) + 1 if len(params) == 2 else -1)
                rho.append(r)
                sign.append(s)
                x += params
        return cls(np.array(iu), np.array(iv), np.array(rho), np.array(sign), len(x)), np.array(x)


# ----------------------------------------------------------------------------- problem
class _Problem:
    """Residuals and Jacobian of the log-magnitude (and phase) error on a fixed grid."""

    def __init__(self, curve: Curve, fs: float, band: tuple[float, float], n_fixed_dc: int):
        lo, hi = band_for_rate(band, fs)
        f_log = np.geomspace(lo, hi, _N_LOG)
        f_top = np.linspace(max(lo, hi / 4.0), hi, _N_TOP)
        self.f = np.unique(np.concatenate([f_log, f_top]))
        self.on_log = np.isin(self.f, f_log)
        w = 2.0 * math.pi * self.f / fs
        self.w_log = w[self.on_log]
        self.e1 = np.exp(-1j * w)
        self.powers = np.stack([np.ones_like(self.e1), self.e1, self.e1 ** 2])
        self.target_db = curve.magnitude_db(self.f)
        self.target_ph = np.radians(curve.phase_deg(self.f[self.on_log]))
        dc = (1.0 - self.e1) ** n_fixed_dc
        self.fixed_db = _DB * np.log(np.abs(dc))
        self.fixed_ph = np.angle(dc[self.on_log])
        self.phase_sel = self.f[self.on_log] <= PHASE_LIMIT_HZ
        self._layout: _Layout | None = None
        self._memo: tuple[bytes, dict] | None = None

    @property
    def layout(self) -> _Layout:
        """The factor layout in use (setting it clears the cache)."""
        return self._layout

    @layout.setter
    def layout(self, lay: _Layout) -> None:
        self._layout = lay
        self.sign1 = lay.sign[:, None]
        self._memo = None

    def align_phase(self, x: np.ndarray) -> float:
        """Shift the phase target by the multiple of π it differs by at the lowest frequency.

        Returns the sign the gain needs (−1 when that multiple is odd: the curve's
        gain is negative, or it has right-half-plane zeros).
        """
        n = round(-float(self.phase(x)[0][0]) / math.pi)
        self.target_ph = self.target_ph + n * math.pi
        self._memo = None
        return -1.0 if n % 2 else 1.0

    def _sines(self, x: np.ndarray) -> list[tuple[float, float, float, float, float]]:
        """Per factor: ρ, sin u, cos u, sin v, cos v (v = 0 for first-order factors).

        A plain loop: for a handful of factors it is several times faster than array code.
        """
        lay = self.layout
        xs = x.tolist()
        out = []
        for iu, iv, r in zip(lay.iu.tolist(), lay.iv.tolist(), lay.rho.tolist(), strict=True):
            v = xs[iv] if iv >= 0 else 0.0
            out.append((r, math.sin(xs[iu]), math.cos(xs[iu]), math.sin(v), math.cos(v)))
        return out

    def coefficients(self, x: np.ndarray) -> np.ndarray:
        """Coefficients (1, a1, a2) of every factor: a1 = ρ(1 + sin v)·sin u, a2 = ρ²·sin v.

        A first-order factor has no v (sin v = 0): a1 = ρ·sin u, a2 = 0.
        """
        return np.array([(1.0, r * (1.0 + sv) * su, r * r * sv) for r, su, _, sv, _ in self._sines(x)])

    def derivatives(self, x: np.ndarray) -> np.ndarray:
        """d(a1, a2)/dx of every factor as a (2·factors, params) array (a1 rows, then a2 rows)."""
        lay = self.layout
        nf = len(lay.iu)
        deriv = np.zeros((2 * nf, lay.n_params))
        for i, ((r, su, cu, sv, cv), iu, iv) in enumerate(zip(self._sines(x), lay.iu.tolist(),
                                                              lay.iv.tolist(), strict=True)):
            deriv[i, iu] = r * (1.0 + sv) * cu
            if iv >= 0:
                deriv[i, iv] = r * su * cv
                deriv[nf + i, iv] = r * r * cv
        return deriv

    def _state(self, x: np.ndarray) -> dict:
        """Per-x cache: factor values q = 1 + a1·e⁻ʲʷ + a2·e⁻²ʲʷ (derivatives added on demand)."""
        key = x.tobytes()
        if self._memo is None or self._memo[0] != key:
            self._memo = (key, {"q": self.coefficients(x) @ self.powers})
        return self._memo[1]

    def _deriv(self, x: np.ndarray) -> np.ndarray:
        st = self._state(x)
        if "deriv" not in st:
            st["deriv"] = self.derivatives(x)
        return st["deriv"]

    def magnitude(self, x: np.ndarray) -> np.ndarray:
        """Magnitude error (dB) on the grid."""
        st = self._state(x)
        if "mag" not in st:
            q = st["q"]
            st["mag"] = (x[0] + (0.5 * _DB) * (self.layout.sign @ np.log(q.real ** 2 + q.imag ** 2))
                         + self.fixed_db - self.target_db)
        return st["mag"]

    def _dlog(self, x: np.ndarray) -> np.ndarray:
        """d log H / d(a1, a2) per factor, signed: (2·factors, freqs), complex."""
        st = self._state(x)
        if "dlog" not in st:
            g1 = self.sign1 * (self.e1 / st["q"])            # d log q / d a1 = e⁻ʲʷ / q
            st["dlog"] = np.concatenate([g1, g1 * self.e1])  # d log q / d a2 = e⁻²ʲʷ / q
        return st["dlog"]

    def jacobian(self, x: np.ndarray) -> np.ndarray:
        """Jacobian of the dB error by x."""
        jm = _DB * (self._dlog(x).real.T @ self._deriv(x))
        jm[:, 0] = 1.0
        return jm

    def phase(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(phase error in rad, its Jacobian) on the log grid, before delay removal."""
        st = self._state(x)
        ph = self.layout.sign @ np.angle(st["q"][:, self.on_log]) + self.fixed_ph - self.target_ph
        return ph, self._dlog(x)[:, self.on_log].imag.T @ self._deriv(x)

    def remove_delay(self, v: np.ndarray) -> np.ndarray:
        """Subtract the least-squares pure delay (the fit in :func:`dspeq.check`) from phase data."""
        w = self.w_log
        if v.ndim == 1:
            return v - w * (w @ v) / (w @ w)
        return v - np.outer(w, w @ v) / (w @ w)


# ----------------------------------------------------------------------------- solving
@dataclass
class _Result:
    x: np.ndarray
    layout: _Layout
    sections: int
    weights: np.ndarray   # the re-weighting reached (carried over to the next section count)
    seeds: int            # compensation seeds placed (see _clip_seeds)
    max_db: float
    objective: float      # max_db, plus phase_weight × the largest phase error when weighted


def _residuals(prob: _Problem, weights: np.ndarray, phase_weight: float):
    """fun(x) and jac(x) for the least-squares solver at the given magnitude weights."""
    sw = np.sqrt(weights)
    pw = math.degrees(phase_weight) * prob.phase_sel

    def fun(x):
        mag = prob.magnitude(x)
        if not phase_weight:
            return sw * mag
        return np.concatenate([sw * mag, pw * prob.remove_delay(prob.phase(x)[0])])

    def jac(x):
        jm = prob.jacobian(x)
        if not phase_weight:
            return sw[:, None] * jm
        return np.vstack([sw[:, None] * jm, pw[:, None] * prob.remove_delay(prob.phase(x)[1])])
    return fun, jac


def _score(prob: _Problem, x: np.ndarray, phase_weight: float) -> tuple[float, float]:
    """(largest dB error, objective): the objective adds phase_weight × largest phase error (deg)."""
    mag = float(np.max(np.abs(prob.magnitude(x))))
    if not phase_weight:
        return mag, mag
    phase = prob.remove_delay(prob.phase(x)[0])[prob.phase_sel]
    return mag, mag + phase_weight * math.degrees(float(np.max(np.abs(phase), initial=0.0)))


def _reweight(weights: np.ndarray, err: np.ndarray, envelope: bool) -> np.ndarray:
    """Next weights: × |error| (Lawson), or × (envelope of |error| / its peak)² (faster, for polishing)."""
    weights = weights * ((_envelope(err) / np.max(err)) ** 2 if envelope else err)
    return np.maximum(weights / np.mean(weights), _MIN_WEIGHT)


def _irls(prob: _Problem, x: np.ndarray, weights: np.ndarray, run: dict, envelope: bool
          ) -> tuple[_Result, bool]:
    """Rounds of re-weighted least squares; returns the best iterate and whether it gave up early.

    ``run`` holds seeds, sections, tol_db, phase_weight, rounds and ``give_up`` (stop
    after a few rounds when the error is still far above ``tol_db``).
    """
    best: _Result | None = None
    stale = 0
    for rnd in range(run["rounds"]):
        fun, jac = _residuals(prob, weights, run["phase_weight"])
        x = levenberg_marquardt(fun, jac, x, max_nfev=run["nfev"][min(rnd, 1)]).x
        cand = _Result(x, prob.layout, run["sections"], weights, run["seeds"],
                       *_score(prob, x, run["phase_weight"]))
        stale = stale + 1 if best is not None and cand.objective >= 0.98 * best.objective else 0
        if best is None or cand.objective < best.objective:
            best = cand
        if (run["give_up"] and rnd == _HOPELESS_ROUND
                and best.max_db > _HOPELESS * run["tol_db"]):
            return best, True
        if best.max_db <= _GOOD_ENOUGH * run["tol_db"] or stale >= 3:
            break
        weights = _reweight(weights, np.abs(prob.magnitude(x)), envelope)
    return best, False


def _minimax(prob: _Problem, x: np.ndarray, weights: np.ndarray, seeds: int, sections: int,
             tol_db: float, phase_weight: float, last: bool) -> _Result:
    """Re-weighted least squares toward the minimax error; returns the best iterate.

    Lawson's rounds first: each solves the weighted least-squares problem
    from the previous solution, then multiplies each frequency's weight by its
    absolute error.  They stop when the error is far below ``tol_db``, when it
    stalls, or (unless ``last``) when it is still far above ``tol_db`` after a
    few rounds.  A stalled run is then polished from its best iterate by
    rounds that weight by the squared envelope of the error (after Rice and
    Usow), which reach further toward the equiripple optimum; the better of
    the two is kept.
    """
    run = {"seeds": seeds, "sections": sections, "tol_db": tol_db,
           "phase_weight": phase_weight, "rounds": _IRLS_ROUNDS, "give_up": not last,
           "nfev": (_NFEV_FIRST, _NFEV_ROUND)}
    best, gave_up = _irls(prob, x, weights, run, envelope=False)
    if gave_up or best.max_db <= _GOOD_ENOUGH * tol_db or (best.max_db > tol_db and not last):
        return best           # good enough already, or one more section will be tried anyway
    run.update(rounds=_POLISH_ROUNDS, give_up=False, nfev=(_NFEV_POLISH, _NFEV_POLISH))
    start = _reweight(best.weights, np.abs(prob.magnitude(best.x)), envelope=True)
    polished, _ = _irls(prob, best.x, start, run, envelope=True)
    return polished if polished.objective < best.objective else best


def _envelope(err: np.ndarray) -> np.ndarray:
    """Piecewise-linear envelope through the local maxima of ``err`` (Rice and Usow's update).

    Multiplying the weights by the envelope rather than by the error itself
    (Lawson's original rule) moves weight toward every ripple peak at once and
    reaches the equiripple solution in fewer rounds.
    """
    inner = (err[1:-1] >= err[:-2]) & (err[1:-1] >= err[2:])
    peaks = np.concatenate([[0], np.flatnonzero(inner) + 1, [len(err) - 1]])
    return np.interp(np.arange(len(err)), peaks, err[peaks])


def _seed_room(z: np.ndarray, seeded: tuple[np.ndarray, ...], n_dc: int, sections: int) -> int:
    """How many compensation seeds fit beside the matched roots in ``sections`` sections."""
    p, _, seed_p = seeded
    return max(0, min(2 * sections - n_dc - len(z), 2 * sections - len(p), len(seed_p)))


def _clip_error_db(p: np.ndarray, clipped: np.ndarray, f_lo: float, fs: float) -> float:
    """Half the dB error at ``f_lo`` of the clipped poles alone (what minimax could make of it)."""
    w = 2.0 * math.pi * f_lo / fs
    moved = p != clipped
    a, b = -np.log(np.abs(p[moved])), -np.log(np.abs(clipped[moved]))
    return float(np.sum(5.0 * np.log10((1 + (b / w) ** 2) / (1 + (a / w) ** 2))))


def _start(prob: _Problem, z: np.ndarray, seeded: tuple[np.ndarray, ...], n_dc: int,
           sections: int) -> tuple[np.ndarray, int]:
    """Set the layout for ``sections``; return the matched-z start and the seeds it holds."""
    p, seed_z, seed_p = seeded
    room = _seed_room(z, seeded, n_dc, sections)
    z = np.concatenate([z, seed_z[:room]])
    p = np.concatenate([p, seed_p[:room]])
    prob.layout, x = _Layout.build(_side_factors(z, 2 * sections - n_dc, ZERO_RADIUS_MAX),
                                   _side_factors(p, 2 * sections, _POLE_RHO))
    x[0] = -float(np.mean(prob.magnitude(x)))            # gain: zero mean dB error
    return x, room


def _extend(prob: _Problem, res: _Result, seeded: tuple[np.ndarray, ...]) -> tuple[np.ndarray, int]:
    """Set the layout to ``res``'s plus one section; return the start and the seeds it holds.

    The new section's roots are the next unused compensation seeds (see
    :func:`_clip_seeds`), else two zeros and two poles at the origin (which
    change nothing but a z⁻²/z⁻²), so the fit starts from ``res``'s response.
    """
    sides: dict[float, list[list[float]]] = {1.0: [], -1.0: []}
    lay = res.layout
    for iu, iv, s in zip(lay.iu.tolist(), lay.iv.tolist(), lay.sign.tolist(), strict=True):
        sides[s].append([res.x[iu]] + ([res.x[iv]] if iv >= 0 else []))
    _, seed_z, seed_p = seeded
    used = min(len(seed_p) - res.seeds, 2)
    for side, seeds, rho in ((1.0, seed_z, ZERO_RADIUS_MAX), (-1.0, seed_p, _POLE_RHO)):
        sides[side] += _side_factors(seeds[res.seeds:res.seeds + used], 2, rho)
    prob.layout, x = _Layout.build(sides[1.0], sides[-1.0])
    x[0] = res.x[0]
    return x, res.seeds + used


def _to_zpk(prob: _Problem, res: _Result, n_dc: int, sign: float) -> tuple:
    prob.layout = res.layout
    coef = prob.coefficients(res.x)
    zeros: list[complex] = [1.0] * n_dc
    poles: list[complex] = []
    for (_, c1, c2), s in zip(coef, res.layout.sign, strict=True):
        roots = np.roots([1.0, c1, c2]) if c2 != 0.0 else np.array([-c1])
        (zeros if s > 0 else poles).extend(roots.tolist())
    return np.array(zeros, dtype=complex), np.array(poles, dtype=complex), sign * 10 ** (res.x[0] / 20)


def _min_sections(z: np.ndarray, p: np.ndarray, n_dc: int) -> int:
    return max(1, math.ceil(max(len(z) + n_dc, len(p)) / 2))


def _candidates(sections: int | None, max_sections: int, needed: int, curve: Curve) -> range:
    if sections is None:
        if int(max_sections) < 1:
            raise DesignError(f"max_sections must be at least 1, got {max_sections!r}")
        return range(needed, max(needed, int(max_sections)) + 1)
    if int(sections) != sections or not (needed <= sections <= 32):
        raise DesignError(f"sections={sections!r} is not possible for curve {curve.name!r}: "
                          f"it needs a whole number from {needed} to 32")
    return range(int(sections), int(sections) + 1)


@register_method(
    "fit",
    "minimax fit of the log magnitude over the band by pole/zero optimization from a matched-z "
    "start (least squares + re-weighting), minimum phase, poles |z| <= 0.9999, fewest sections "
    "meeting tol_db; catalog curves 20 Hz-20 kHz: <= 0.002 dB at 44.1 kHz (two sections, three "
    "for riaa-iec), <= 0.0005 dB from 48 to 192 kHz; phase after delay removal ~1.5 deg to "
    "10 kHz at 44.1 kHz, ~0.13 deg at 96 kHz (docs/accuracy.md)",
    {"band": "(low, high) Hz fitted and measured; default (20, 20000), the top limited to "
             "0.95*Nyquist",
     "tol_db": "magnitude tolerance in dB that decides the number of sections; default 0.002 "
               "below 48 kHz, 0.0005 from 48 kHz",
     "sections": "force this number of second-order sections (default: fewest meeting tol_db)",
     "max_sections": f"largest number of sections tried (default {DEFAULT_MAX_SECTIONS})",
     "phase_weight": "weight of 1 degree of phase error (after delay removal, below 10 kHz) "
                     f"against 1 dB of magnitude error (default {DEFAULT_PHASE_WEIGHT:g})"})
def fit(curve: Curve, fs: float, *, band: tuple[float, float] = DEFAULT_BAND,
        tol_db: float | None = None, sections: int | None = None,
        max_sections: int = DEFAULT_MAX_SECTIONS,
        phase_weight: float = DEFAULT_PHASE_WEIGHT) -> tuple[np.ndarray, np.ndarray, float]:
    """Fit a minimum-phase digital filter to ``curve`` at rate ``fs``.

    Parameters
    ----------
    curve : Curve
        The analog target, with no poles at s = 0 (:func:`dspeq.design` has
        already moved them to the low-frequency limit).
    fs : float
        Sample rate (Hz).
    band : (float, float), optional
        Band (Hz) of the fit; the upper edge is limited to 0.95 × Nyquist.
    tol_db : float, optional
        Largest magnitude error (dB) accepted before trying one more section;
        default :func:`default_tol_db`.
    sections : int, optional
        Use exactly this many second-order sections.
    max_sections : int, optional
        Largest number of sections tried when ``sections`` is not given.
    phase_weight : float, optional
        Weight of one degree of phase error (after removing the best-fit
        delay, below 10 kHz) against one dB of magnitude error; 0 fits the
        magnitude alone.

    Returns
    -------
    z, p : ndarray
        Digital zeros and poles (|p| < 0.9999, |z| <= 1).
    k : float
        Gain.

    Warns
    -----
    UserWarning
        When no number of sections meets ``tol_db`` (the best design is
        returned), and for a curve with right-half-plane zeros (whose phase a
        minimum-phase fit cannot follow).  The warnings point at the caller
        (:func:`dspeq.design` repeats them at its own caller).

    Examples
    --------
    >>> import dspeq
    >>> d = dspeq.design("riaa", 48000)          # "fit" is the default method
    >>> dspeq.check(d).max_abs_db < 0.0005
    True
    """
    fs = float(fs)
    tol = default_tol_db(fs) if tol_db is None else float(tol_db)
    if not (tol > 0 and math.isfinite(tol)):
        raise DesignError(f"tol_db must be a positive number of dB, got {tol_db!r}")
    if curve.n_integrators:
        raise DesignError(f"curve {curve.name!r} has poles at s = 0; give it a low-frequency limit")
    if np.any(curve.zeros.real > 0):
        warnings.warn(f"curve {curve.name!r} has right-half-plane zeros: the fit realizes its "
                      "magnitude with a minimum-phase filter, so the phase will differ "
                      "(method='bilinear' keeps such zeros)", UserWarning, stacklevel=2)
    z0, p0, n_dc = _matched_roots(curve, fs)
    tries = _candidates(sections, max_sections, _min_sections(z0, p0, n_dc), curve)
    seeded = _clip_seeds(p0)
    prob = _Problem(curve, fs, band, n_dc)
    short = _clip_error_db(p0, seeded[0], prob.f[0], fs) > tol
    best = prev = None
    for n in tries:
        if short and n != tries[-1] and _seed_room(z0, seeded, n_dc, n) < len(seeded[2]):
            continue                 # a clipped pole without its compensation cannot meet tol
        if prev is None:
            x, seeds = _start(prob, z0, seeded, n_dc, n)
            sign = prob.align_phase(x)
            weights = np.ones(len(prob.f))
        else:
            x, seeds = _extend(prob, prev, seeded)
            weights = prev.weights
        prev = _minimax(prob, x, weights, seeds, n, tol, float(phase_weight), last=n == tries[-1])
        if best is None or prev.objective < best.objective:
            best = prev
        if best.max_db <= tol:
            break
    if best.max_db > tol:
        _warn_unmet(curve, fs, best, tol, prob)
    return _to_zpk(prob, best, n_dc, sign)


def _warn_unmet(curve: Curve, fs: float, best: _Result, tol: float, prob: _Problem) -> None:
    warnings.warn(
        f"fit of {curve.name!r} at {fs:g} Hz reached {best.max_db:.4g} dB over "
        f"{prob.f[0]:g}-{prob.f[-1]:g} Hz with {best.sections} section(s), above tol_db={tol:g}; "
        "use a higher sample rate or allow more sections (sections=/max_sections=)",
        UserWarning, stacklevel=3)      # fit's caller; dspeq.design re-issues it at its own caller
