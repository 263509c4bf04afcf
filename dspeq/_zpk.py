"""Zeros/poles/gain and second-order sections in numpy alone (the design path imports no scipy).

Small equivalents of the :mod:`scipy.signal` conversions the design path
needs; importing :mod:`scipy.signal` costs 1.5–2 s of start-up, these cost
nothing.  Each follows scipy's definition and conventions (``fs`` in Hz, SOS
rows ``[b0, b1, b2, 1, a1, a2]``), and tests/test_zpk.py checks each against
its scipy counterpart:

* :func:`zpk2sos` — :func:`scipy.signal.zpk2sos` with ``pairing="nearest"``
  (the same sections in the same order);
* :func:`sos2zpk` — :func:`scipy.signal.sos2zpk` (two zeros and two poles per
  section, padding at the origin);
* :func:`bilinear_zpk` — :func:`scipy.signal.bilinear_zpk`;
* :func:`sos_response` — the complex response of :func:`scipy.signal.sosfreqz`
  at frequencies in Hz.
"""

from __future__ import annotations

import numpy as np

__all__ = ["zpk2sos", "sos2zpk", "bilinear_zpk", "sos_response"]

#: Relative tolerance for "real" and for matching conjugates (scipy's default, 100·eps).
_TOL = 100 * np.finfo(float).eps


def _cplxreal(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split ``z`` into complex pairs (one per pair, positive imaginary part) and reals.

    Reals are sorted by value; pairs by real part, then |imag|; each pair is the
    mean of its two members (scipy.signal's private ``_cplxreal``, default tolerance).
    """
    z = np.atleast_1d(np.asarray(z, dtype=complex))
    if z.size == 0:
        return z, z.real
    z = z[np.lexsort((abs(z.imag), z.real))]
    real = abs(z.imag) <= _TOL * abs(z)
    zr = z[real].real
    z = z[~real]
    zp, zn = z[z.imag > 0], z[z.imag < 0]
    if len(zp) != len(zn):
        raise ValueError(f"roots {z!r} contain a complex value with no matching conjugate")
    same_real = np.diff(zp.real) <= _TOL * abs(zp[:-1])
    edges = np.diff(np.concatenate(([0], same_real.astype(int), [0])))
    for start, stop in zip(np.flatnonzero(edges > 0), np.flatnonzero(edges < 0) + 1, strict=True):
        for chunk in (zp[start:stop], zn[start:stop]):
            chunk[...] = chunk[np.argsort(abs(chunk.imag), kind="stable")]
    if np.any(abs(zp - zn.conj()) > _TOL * abs(zn)):
        raise ValueError(f"roots {z!r} contain a complex value with no matching conjugate")
    return (zp + zn.conj()) / 2, zr


def _is_real(v: complex) -> bool:
    return complex(v).imag == 0


def _take(roots: np.ndarray, idx: int) -> tuple[complex, np.ndarray]:
    return roots[idx], np.delete(roots, idx)


def _nearest(roots: np.ndarray, to: complex, which: str) -> int:
    """Index of the root nearest ``to`` among ``"any"``, ``"real"`` or ``"complex"`` ones."""
    order = np.argsort(np.abs(roots - to), kind="stable")
    if which == "any":
        return int(order[0])
    real = roots[order].imag == 0
    return int(order[np.flatnonzero(real if which == "real" else ~real)[0]])


def _section(zeros: list[complex], poles: list[complex]) -> np.ndarray:
    """One SOS row from up to two zeros and two poles (coefficients right-aligned, like scipy)."""
    row = np.zeros(6)
    b, a = np.atleast_1d(np.poly(zeros)).real, np.atleast_1d(np.poly(poles)).real
    row[3 - len(b):3] = b
    row[6 - len(a):6] = a
    return row


def _worst(p: np.ndarray) -> int:
    """Index of the pole closest to the unit circle."""
    return int(np.argmin(np.abs(1 - np.abs(p))))


def _pair_step(z: np.ndarray, p: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Take the pole nearest the unit circle and its zeros into one section (scipy's "nearest")."""
    p1, p = _take(p, _worst(p))
    n_real_p = int(np.count_nonzero(p.imag == 0))
    if _is_real(p1) and n_real_p == 0:                   # the last real pole: first-order section
        z1, z = _take(z, _nearest(z, p1, "real"))
        return _section([z1, 0], [p1, 0]), z, p
    if (len(p) + 1 == len(z) and not _is_real(p1) and n_real_p == 1
            and np.count_nonzero(z.imag == 0) == 1):    # keep the last real zero for the real pole
        z1, z = _take(z, _nearest(z, p1, "complex"))
        return _section([z1, z1.conjugate()], [p1, p1.conjugate()]), z, p
    if _is_real(p1):
        real = np.flatnonzero(p.imag == 0)
        p2, p = _take(p, int(real[_worst(p[real])]))
    else:
        p2 = p1.conjugate()
    if len(z) == 0:
        return _section([], [p1, p2]), z, p
    z1, z = _take(z, _nearest(z, p1, "any"))
    if not _is_real(z1):
        return _section([z1, z1.conjugate()], [p1, p2]), z, p
    if len(z) == 0:
        return _section([z1], [p1, p2]), z, p
    z2, z = _take(z, _nearest(z, p1, "real"))
    return _section([z1, z2], [p1, p2]), z, p


def zpk2sos(z: np.ndarray, p: np.ndarray, k: float) -> np.ndarray:
    """Second-order sections of a digital filter given by zeros, poles and gain.

    Equivalent to :func:`scipy.signal.zpk2sos` with ``pairing="nearest"``: pad
    with roots at the origin to equal, even counts; then, starting from the
    pole closest to the unit circle, pair each pole (and its conjugate or the
    next real pole) with the nearest zeros; the section with the poles closest
    to the unit circle comes last and the gain goes into the first.

    Parameters
    ----------
    z, p : array_like
        Zeros and poles (complex ones in conjugate pairs).
    k : float
        Gain (real).

    Returns
    -------
    ndarray, shape (n_sections, 6)

    Examples
    --------
    >>> zpk2sos([-1.0], [0.5], 2.0)
    array([[ 2. ,  2. ,  0. ,  1. , -0.5,  0. ]])
    """
    z = np.atleast_1d(np.asarray(z, dtype=complex))
    p = np.atleast_1d(np.asarray(p, dtype=complex))
    if np.iscomplexobj(k) and np.imag(k) != 0:
        raise ValueError(f"gain k must be real, got {k!r}")
    k = float(np.real(k))
    if len(z) == len(p) == 0:
        return np.array([[k, 0.0, 0.0, 1.0, 0.0, 0.0]])
    n = max(len(z), len(p))
    n += n % 2
    z = np.concatenate([z, np.zeros(n - len(z))])
    p = np.concatenate([p, np.zeros(n - len(p))])
    z = np.concatenate(_cplxreal(z)).astype(complex)
    p = np.concatenate(_cplxreal(p)).astype(complex)
    sos = np.zeros((n // 2, 6))
    for i in range(n // 2 - 1, -1, -1):
        sos[i], z, p = _pair_step(z, p)
    sos[0, :3] *= k
    return sos


def sos2zpk(sos: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Zeros, poles and gain of a cascade of second-order sections.

    Like :func:`scipy.signal.sos2zpk`: two zeros and two poles per section (a
    first-order section contributes a root at the origin), the gain the product
    of the sections' leading numerator coefficients over their ``a0``.

    Examples
    --------
    >>> z, p, k = sos2zpk([[2.0, 1.0, 0.0, 1.0, -0.5, 0.0]])
    >>> z.real.tolist(), p.real.tolist(), k
    ([-0.5, 0.0], [0.5, 0.0], 2.0)
    """
    sos = np.atleast_2d(np.asarray(sos, dtype=float))
    z = np.zeros(2 * len(sos), dtype=complex)
    p = np.zeros(2 * len(sos), dtype=complex)
    k = 1.0
    for i, row in enumerate(sos):
        b, a = np.trim_zeros(row[:3], "f"), np.trim_zeros(row[3:], "f")
        zi, pi = np.roots(b), np.roots(a)
        z[2 * i:2 * i + len(zi)] = zi
        p[2 * i:2 * i + len(pi)] = pi
        k *= (float(b[0]) if len(b) else 0.0) / float(a[0])
    return z, p, k


def bilinear_zpk(z: np.ndarray, p: np.ndarray, k: float, fs: float
                 ) -> tuple[np.ndarray, np.ndarray, float]:
    """Bilinear transform ``s = 2·fs·(z − 1)/(z + 1)`` of analog zeros, poles and gain.

    As :func:`scipy.signal.bilinear_zpk`: zeros at infinity go to Nyquist (z = −1),
    the gain keeps the response at DC.  No prewarping (pass a modified ``fs``).

    Examples
    --------
    >>> z, p, k = bilinear_zpk([], [-1000.0], 1000.0, 48000.0)
    >>> z.real.tolist(), round(float(p[0].real), 6), round(k, 6)
    ([-1.0], 0.979381, 0.010309)
    """
    z = np.atleast_1d(np.asarray(z))
    p = np.atleast_1d(np.asarray(p))
    if len(z) > len(p):
        raise ValueError(f"improper transfer function: {len(z)} zeros and {len(p)} poles")
    fs2 = 2.0 * float(fs)
    z_z = np.concatenate([(fs2 + z) / (fs2 - z), -np.ones(len(p) - len(z))])
    p_z = (fs2 + p) / (fs2 - p)
    return z_z, p_z, float(k * np.real(np.prod(fs2 - z) / np.prod(fs2 - p)))


def sos_response(sos: np.ndarray, f: np.ndarray, fs: float) -> np.ndarray:
    """Complex frequency response of a cascade at frequencies ``f`` (Hz).

    The value :func:`scipy.signal.sosfreqz` returns for ``worN=f, fs=fs``:
    the product over the sections of ``B(e^{−jω}) / A(e^{−jω})``, ω = 2π·f/fs.

    Examples
    --------
    >>> h = sos_response([[1.0, 1.0, 0.0, 1.0, 0.0, 0.0]], [0.0, 12000.0], 48000.0)
    >>> np.round(h, 12).tolist()
    [(2+0j), (1-1j)]
    """
    sos = np.atleast_2d(np.asarray(sos, dtype=float))
    zm1 = np.exp(-2j * np.pi * np.atleast_1d(np.asarray(f, dtype=float)) / float(fs))
    powers = np.stack([np.ones_like(zm1), zm1, zm1 * zm1])
    return np.prod((sos[:, :3] @ powers) / (sos[:, 3:] @ powers), axis=0)
