"""Deviation of a digital design from its analog curve.

:func:`check` returns a :class:`Deviation` — data, not printing: magnitude
error (dB), phase error (degrees) after removing the best-fit pure delay, and
group-delay error, on a log-spaced grid, with summaries.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ._errors import DesignError

__all__ = ["Deviation", "check", "DEFAULT_BAND", "NYQUIST_FRACTION", "band_for_rate",
           "digital_group_delay"]

DEFAULT_BAND = (20.0, 20_000.0)
#: The upper band edge is limited to this fraction of Nyquist (for low rates).
NYQUIST_FRACTION = 0.95
_GRID_POINTS = 2000


def band_for_rate(band: tuple[float, float], fs: float) -> tuple[float, float]:
    """``band`` with its upper edge limited to ``NYQUIST_FRACTION`` × fs/2."""
    lo, hi = float(band[0]), float(band[1])
    if not (0 < lo < hi):
        raise DesignError(f"band must be (low, high) Hz with 0 < low < high, got {band!r}")
    hi = min(hi, NYQUIST_FRACTION * fs / 2)
    if hi <= lo:
        raise DesignError(f"band {band!r} lies above {NYQUIST_FRACTION}·Nyquist at fs = {fs:g} Hz")
    return lo, hi


def digital_group_delay(sos: np.ndarray, f: np.ndarray, fs: float) -> np.ndarray:
    """Exact group delay (samples) of an SOS cascade at ``f`` (Hz).

    For a polynomial P(z⁻¹) = Σ cₙ·z⁻ⁿ the group delay is Re(Σ n·cₙ·e^{−jωn} / Σ cₙ·e^{−jωn});
    a section contributes that of its numerator minus that of its denominator.
    (Computed from the coefficients, not the roots, so a pure delay b = [0, 1, 0] counts.)
    """
    w = 2 * np.pi * np.asarray(f, dtype=float) / fs
    powers = np.exp(-1j * np.outer(w, np.arange(3)))          # (n_freqs, 3)
    n = np.arange(3)
    tau = np.zeros(w.shape)
    for row in np.asarray(sos, dtype=float):
        for coeffs, sign in ((row[:3], 1.0), (row[3:], -1.0)):
            tau = tau + sign * np.real((powers @ (n * coeffs)) / (powers @ coeffs))
    return tau


@dataclass(frozen=True)
class Deviation:
    """How far a design is from its analog target, over a band.

    Attributes
    ----------
    freqs : ndarray
        Log-spaced frequencies (Hz).
    magnitude_error_db : ndarray
        Digital minus analog magnitude, dB.
    phase_error_deg : ndarray
        Digital minus analog phase after removing ``delay_samples``, degrees.
    group_delay_error_s : ndarray
        Digital minus analog group delay less ``delay_samples``, seconds.
    delay_samples : float
        Best-fit pure delay removed from the phase (least squares).
    fs : float
        Sample rate (Hz).
    band : tuple of float
        The band actually measured.
    """

    freqs: np.ndarray
    magnitude_error_db: np.ndarray
    phase_error_deg: np.ndarray
    group_delay_error_s: np.ndarray
    delay_samples: float
    fs: float
    band: tuple[float, float]

    @property
    def max_abs_db(self) -> float:
        """Largest absolute magnitude error (dB)."""
        return float(np.max(np.abs(self.magnitude_error_db)))

    @property
    def rms_db(self) -> float:
        """RMS magnitude error (dB) over the log grid."""
        return float(np.sqrt(np.mean(self.magnitude_error_db ** 2)))

    @property
    def f_at_max(self) -> float:
        """Frequency (Hz) of the largest magnitude error."""
        return float(self.freqs[int(np.argmax(np.abs(self.magnitude_error_db)))])

    @property
    def max_phase_deg(self) -> float:
        """Largest absolute phase error (degrees) after delay removal."""
        return float(np.max(np.abs(self.phase_error_deg)))

    def max_phase_below(self, f_hz: float, *, refit_delay: bool = False) -> float:
        """Largest absolute phase error (degrees) at frequencies ≤ ``f_hz``.

        With ``refit_delay`` the pure delay is fitted again over those frequencies only
        (instead of the whole band), which is how a phase error "to 10 kHz" is often quoted.
        """
        sel = self.freqs <= f_hz
        if not np.any(sel):
            return 0.0
        pe = self.phase_error_deg[sel]
        if refit_delay:
            w = 2 * math.pi * self.freqs[sel] / self.fs
            pe = pe - w * float(np.dot(w, pe) / np.dot(w, w))
        return float(np.max(np.abs(pe)))

    @property
    def max_group_delay_us(self) -> float:
        """Largest absolute group-delay error (µs) after delay removal."""
        return float(np.max(np.abs(self.group_delay_error_s)) * 1e6)

    def ok(self, tol_db: float) -> bool:
        """True when the largest magnitude error is within ``tol_db``."""
        return self.max_abs_db <= float(tol_db)

    def require(self, tol_db: float) -> Deviation:
        """Return self, or raise :class:`DesignError` when over ``tol_db``."""
        if not self.ok(tol_db):
            raise DesignError(f"magnitude error {self.max_abs_db:.4g} dB at {self.f_at_max:.0f} Hz "
                              f"exceeds the tolerance {tol_db:g} dB")
        return self

    def summary(self) -> dict[str, float]:
        """The summary figures as a plain dict (JSON-ready)."""
        return {"band_lo_hz": self.band[0], "band_hi_hz": self.band[1],
                "max_abs_db": self.max_abs_db, "rms_db": self.rms_db, "f_at_max_hz": self.f_at_max,
                "max_phase_deg": self.max_phase_deg,
                "max_phase_deg_to_10k": self.max_phase_below(10_000.0),
                "max_phase_deg_to_10k_delay_to_10k": self.max_phase_below(10_000.0, refit_delay=True),
                "delay_samples": self.delay_samples,
                "max_group_delay_error_us": self.max_group_delay_us}


def check(design, band: tuple[float, float] = DEFAULT_BAND, *, points: int = _GRID_POINTS) -> Deviation:
    """Measure a design against its analog target curve over ``band``.

    Parameters
    ----------
    design : Design or OversampledDesign
        From :func:`dspeq.design` (or :func:`dspeq.design_oversampled`: then the
        whole up-FIR · design · down-FIR chain at the outer rate, its integer
        latency removed); compared with ``design.target`` (the curve with its
        low-frequency limit applied).
    band : (float, float), optional
        Frequency band in Hz (default 20 Hz – 20 kHz); the upper edge is limited
        to 0.95 × Nyquist.
    points : int, optional
        Number of log-spaced grid points.

    Returns
    -------
    Deviation

    Examples
    --------
    >>> import dspeq
    >>> dev = dspeq.check(dspeq.design("riaa", 96000, method="matched-z"))
    >>> dev.max_abs_db < 1.0
    True
    """
    lo, hi = band_for_rate(band, design.fs)
    f = np.geomspace(lo, hi, int(points))
    hd = design.response(f)
    ha = design.target.response(f)
    ratio = hd / ha
    mag = 20.0 * np.log10(np.abs(ratio))
    ph = np.unwrap(np.angle(ratio))
    ph = ph - 2 * math.pi * round(float(ph[0]) / (2 * math.pi))
    # Best-fit pure delay τ (samples): ph ≈ −ωτ, least squares over the grid.
    w = 2 * math.pi * f / design.fs
    tau = float(np.dot(w, -ph) / np.dot(w, w))
    phase_err = np.degrees(ph + w * tau)
    gd = design.group_delay_samples(f) - tau
    gd_err = gd / design.fs - design.target.group_delay(f)
    return Deviation(f, mag, phase_err, gd_err, float(tau), float(design.fs), (lo, hi))
