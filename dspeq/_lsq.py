"""Levenberg–Marquardt least squares in numpy (the fit's solver; no scipy on the design path).

:func:`levenberg_marquardt` minimizes ``‖fun(x)‖²`` given the residuals and
their Jacobian.  It follows the trust-region form of the method as MINPACK's
``lmder`` implements it (J. J. Moré, "The Levenberg–Marquardt algorithm:
implementation and theory", Lecture Notes in Mathematics 630, 1978), which is
what :func:`scipy.optimize.least_squares` runs for ``method="lm",
x_scale="jac"``: variables scaled by the running maximum of the Jacobian's
column norms, a trust radius updated from the ratio of actual to predicted
reduction, and the Levenberg parameter found so that the scaled step has the
trust radius' length.  The linear algebra differs: one SVD of the scaled
Jacobian per iterate gives the step for every Levenberg parameter, so the
parameter search needs no further factorization.  The problems here are small
(tens of parameters, hundreds of residuals).  tests/test_lsq.py compares the
result with scipy's on standard test problems.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

__all__ = ["levenberg_marquardt", "LMResult"]

_EPS = np.finfo(float).eps
_FACTOR = 100.0          # initial trust radius: FACTOR × ‖D·x0‖ (MINPACK's default)
_PAR_ITER = 10           # iterations of the Levenberg-parameter search (as MINPACK's lmpar)


@dataclass(frozen=True)
class LMResult:
    """Outcome of :func:`levenberg_marquardt`."""

    x: np.ndarray
    cost: float          # ½‖fun(x)‖²
    nfev: int            # residual evaluations (Jacobian evaluations not counted)
    status: str          # "ftol", "xtol", "gtol", "max_nfev" or "eps"


class _Scaled:
    """Spectral form of the scaled problem at one iterate: J·D⁻¹ = U·S·Vᵀ, kept as S², V, S·Uᵀf.

    The scaled step for a Levenberg parameter ``par`` is y = −V·(S·Uᵀf)/(S² + par), so its
    length and the Newton correction of ``par`` need no product with V.
    """

    def __init__(self, jac: np.ndarray, diag: np.ndarray, f: np.ndarray):
        u, s, vt = np.linalg.svd(jac / diag, full_matrices=False)
        self.s2, self.v, self.sc = s * s, vt.T, s * (u.T @ f)
        self.sc2 = self.sc * self.sc
        keep = self.s2 > 0.0          # as MINPACK: only an exactly singular direction is dropped
        self.rank_full = bool(np.all(keep))
        self.inv0 = np.divide(1.0, self.s2, out=np.zeros_like(self.s2), where=keep)

    def _inverse(self, par: float) -> np.ndarray:
        return 1.0 / (self.s2 + par) if par > 0.0 else self.inv0

    def step(self, par: float) -> np.ndarray:
        """Scaled step y = D·p minimizing ‖J·p + f‖² + par·‖D·p‖² (pseudo-inverse at par = 0)."""
        return -(self.v @ (self.sc * self._inverse(par)))

    def length(self, par: float) -> tuple[float, float]:
        """‖y(par)‖ and Σ (S·Uᵀf)²/(S² + par)³ (the derivative term of Moré's Newton step)."""
        inv = self._inverse(par)
        r = self.sc2 * inv * inv
        return math.sqrt(float(r.sum())), float((r * inv).sum())


def _newton(y_norm: float, q: float, delta: float) -> float:
    """Moré's Newton correction of par toward ‖y(par)‖ = delta (Newton on 1/‖y‖)."""
    return (y_norm - delta) / delta * y_norm ** 2 / q if q > 0 else 0.0


def _norm(v: np.ndarray) -> float:
    return math.sqrt(float(v @ v))


def _levenberg_parameter(sc: _Scaled, delta: float, par: float, gnorm: float
                         ) -> tuple[float, np.ndarray]:
    """Levenberg parameter with ‖y‖ within 10 % of ``delta`` (or 0 if Gauss–Newton fits); y."""
    y_norm, q = sc.length(0.0)
    if y_norm - delta <= 0.1 * delta:
        return 0.0, sc.step(0.0)
    parl = _newton(y_norm, q, delta) if sc.rank_full else 0.0
    paru = gnorm / delta
    if paru == 0.0:
        paru = np.finfo(float).tiny / min(delta, 0.1)
    par = min(max(par, parl), paru)
    if par == 0.0:
        par = gnorm / y_norm
    fp = y_norm - delta
    for _ in range(_PAR_ITER):
        if par == 0.0:
            par = max(np.finfo(float).tiny, 0.001 * paru)
        y_norm, q = sc.length(par)
        fp, previous = y_norm - delta, fp
        if abs(fp) <= 0.1 * delta or (parl == 0.0 and fp <= previous < 0.0):
            break
        if fp > 0:
            parl = max(parl, par)
        else:
            paru = min(paru, par)
        par = max(parl, par + _newton(y_norm, q, delta))
    return par, sc.step(par)


def _update_radius(delta: float, par: float, ratio: float, actred: float, dirder: float,
                   pnorm: float, far_worse: bool) -> tuple[float, float]:
    """MINPACK's trust-radius and Levenberg-parameter update after a trial step."""
    if ratio <= 0.25:
        temp = 0.5 if actred >= 0 else 0.5 * dirder / (dirder + 0.5 * actred)
        if far_worse or temp < 0.1:
            temp = 0.1
        return temp * min(delta, pnorm / 0.1), par / temp
    if par == 0.0 or ratio >= 0.75:
        return pnorm / 0.5, 0.5 * par
    return delta, par


def levenberg_marquardt(fun: Callable[[np.ndarray], np.ndarray],
                        jac: Callable[[np.ndarray], np.ndarray], x0: np.ndarray, *,
                        max_nfev: int = 100, ftol: float = 1e-8, xtol: float = 1e-8,
                        gtol: float = 1e-8) -> LMResult:
    """Minimize ``½‖fun(x)‖²`` by Levenberg–Marquardt with the Jacobian ``jac(x)``.

    Parameters
    ----------
    fun : callable
        ``fun(x) -> (m,)`` residuals.
    jac : callable
        ``jac(x) -> (m, n)`` Jacobian of the residuals.
    x0 : ndarray, shape (n,)
        Starting point.
    max_nfev : int, optional
        Largest number of residual evaluations.
    ftol, xtol, gtol : float, optional
        Stop when the relative reduction of the sum of squares (actual and
        predicted) is at most ``ftol``, when the trust radius is at most
        ``xtol`` × ‖D·x‖, or when the residuals are orthogonal to every
        Jacobian column to within ``gtol`` — the tests and defaults of
        :func:`scipy.optimize.least_squares` (``method="lm"``).

    Returns
    -------
    LMResult

    Examples
    --------
    >>> import numpy as np
    >>> t = np.linspace(0.0, 1.0, 20)
    >>> y = 2.0 * np.exp(-1.5 * t)
    >>> res = levenberg_marquardt(lambda x: x[0] * np.exp(x[1] * t) - y,
    ...                           lambda x: np.stack([np.exp(x[1] * t),
    ...                                               x[0] * t * np.exp(x[1] * t)], axis=1),
    ...                           np.array([1.0, 0.0]))
    >>> np.round(res.x, 6).tolist()
    [2.0, -1.5]
    """
    x = np.array(x0, dtype=float)
    f = np.asarray(fun(x), dtype=float)
    st = {"nfev": 1, "fnorm": _norm(f), "par": 0.0, "first": True, "diag": None, "delta": None}
    while True:
        j = np.asarray(jac(x), dtype=float)
        colnorm = np.sqrt((j * j).sum(axis=0))
        if st["diag"] is None:
            st["diag"] = np.where(colnorm > 0, colnorm, 1.0)
            st["delta"] = _FACTOR * _norm(st["diag"] * x) or _FACTOR
        g = j.T @ f
        gnorm = _cosine(g, colnorm, st["fnorm"])
        if gnorm <= gtol:
            return LMResult(x, 0.5 * st["fnorm"] ** 2, st["nfev"], "gtol")
        st["diag"] = np.maximum(st["diag"], colnorm)
        sc = _Scaled(j, st["diag"], f)
        g_scaled = _norm(g / st["diag"])
        while True:                      # trial steps until one reduces the sum of squares
            x1, f1, trial = _trial(fun, j, x, sc, g_scaled, st)
            if trial["accepted"]:
                x, f = x1, f1
            status = _status(trial, st["delta"], _norm(st["diag"] * x), st["nfev"], max_nfev,
                             ftol, xtol, gnorm)
            if status:
                return LMResult(x, 0.5 * st["fnorm"] ** 2, st["nfev"], status)
            if trial["accepted"]:
                break


def _cosine(g: np.ndarray, colnorm: np.ndarray, fnorm: float) -> float:
    """Largest |cosine| between the residuals and a (non-zero) column of J: MINPACK's gnorm."""
    if not fnorm:
        return 0.0
    if colnorm.all():
        return float(np.max(np.abs(g) / colnorm)) / fnorm
    ok = colnorm > 0
    return float(np.max(np.abs(g[ok]) / colnorm[ok], initial=0.0)) / fnorm


def _trial(fun: Callable[[np.ndarray], np.ndarray], j: np.ndarray, x: np.ndarray, sc: _Scaled,
           g_scaled: float, st: dict) -> tuple[np.ndarray, np.ndarray, dict]:
    """One trial step within the trust radius; updates the radius, par, nfev and fnorm in ``st``."""
    diag, fnorm = st["diag"], st["fnorm"]
    par, y = _levenberg_parameter(sc, st["delta"], st["par"], g_scaled)
    p = y / diag
    pnorm = _norm(y)
    if st["first"]:
        st["delta"] = min(st["delta"], pnorm)
    f1 = np.asarray(fun(x + p), dtype=float)
    st["nfev"] += 1
    fnorm1 = _norm(f1)
    actred = 1.0 - (fnorm1 / fnorm) ** 2 if 0.1 * fnorm1 < fnorm else -1.0
    t1 = _norm(j @ p) / fnorm if fnorm else 0.0
    t2 = math.sqrt(par) * pnorm / fnorm if fnorm else 0.0
    prered, dirder = t1 * t1 + 2.0 * t2 * t2, -(t1 * t1 + t2 * t2)
    ratio = actred / prered if prered != 0 else 0.0
    st["delta"], st["par"] = _update_radius(st["delta"], par, ratio, actred, dirder, pnorm,
                                            0.1 * fnorm1 >= fnorm)
    accepted = ratio >= 1e-4
    if accepted:
        st["fnorm"], st["first"] = fnorm1, False
    return x + p, f1, {"accepted": accepted, "actred": actred, "prered": prered, "ratio": ratio}


def _status(trial: dict, delta: float, xnorm: float, nfev: int, max_nfev: int, ftol: float,
            xtol: float, gnorm: float) -> str:
    """MINPACK's convergence and termination tests after a trial step ("" to go on)."""
    actred, prered = trial["actred"], trial["prered"]
    small = 0.5 * trial["ratio"] <= 1.0
    if abs(actred) <= ftol and prered <= ftol and small:
        return "ftol"
    if delta <= xtol * xnorm:
        return "xtol"
    if nfev >= max_nfev:
        return "max_nfev"
    if (abs(actred) <= _EPS and prered <= _EPS and small) or delta <= _EPS * xnorm or gnorm <= _EPS:
        return "eps"
    return ""
