"""Proof through the real signal path: measure a design by running signals through the Equalizer.

:func:`verify` feeds a unit impulse and an exponential sine sweep through the
same :class:`~dspeq.stream.Equalizer` path the batch processor uses (same
kernel: the fast loop, ``exact=False``; same block size and sample type),
measures the frequency response by FFT (impulse) and by spectral division
(sweep: Y = H·X holds exactly for the linear convolution when the FFT is long
enough to hold the whole output), and compares it with the design's analytic
response and with the analog curve.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ._errors import DesignError
from .check import DEFAULT_BAND, band_for_rate

__all__ = ["verify", "Verification", "Measurement", "VERIFY_BLOCK_FRAMES", "AGREEMENT_DB"]

#: Block size (frames) the batch processor streams with; verify uses the same.
VERIFY_BLOCK_FRAMES = 65536
#: Largest allowed difference (dB) between measured and analytic response.
AGREEMENT_DB = 0.001
_TAIL_RELATIVE = 1e-13


@dataclass(frozen=True)
class Measurement:
    """One measured response: signal kind, sample type and its comparison figures (dB)."""

    signal: str                  # "impulse" or "sweep"
    dtype: str                   # "float32" or "float64"
    max_vs_design_db: float      # max |measured − analytic design| over the band
    max_vs_curve_db: float       # max |measured − analog curve| over the band
    f_at_max_vs_curve: float
    analytic_vs_curve_db: float  # the same figure from the analytic design response, same bins

    @property
    def agrees(self) -> bool:
        """True when measured and analytic deviations agree within :data:`AGREEMENT_DB`."""
        return (self.max_vs_design_db <= AGREEMENT_DB
                and abs(self.max_vs_curve_db - self.analytic_vs_curve_db) <= AGREEMENT_DB)


@dataclass(frozen=True)
class Verification:
    """All measurements of one design, and whether they agree with the analysis."""

    curve: str
    fs: float
    method: str
    band: tuple[float, float]
    block_frames: int
    measurements: tuple[Measurement, ...]

    @property
    def ok(self) -> bool:
        """True when every measurement agrees with the analytic deviation."""
        return all(m.agrees for m in self.measurements)

    def to_dict(self) -> dict:
        """JSON-ready record (attach it to a job as evidence)."""
        return {"curve": self.curve, "rate": self.fs, "method": self.method, "band": list(self.band),
                "block_frames": self.block_frames, "agreement_db": AGREEMENT_DB, "ok": self.ok,
                "measurements": [m.__dict__ | {"agrees": m.agrees} for m in self.measurements]}


def _settle_frames(design) -> int:
    """Frames after which the slowest pole has decayed below ``_TAIL_RELATIVE``.

    For an oversampled design: the inner design's, at the outer rate, plus the FIR chain.
    """
    from .oversample import is_oversampled

    if is_oversampled(design):
        return _settle_frames(design.inner) // design.factor + 2 * design.latency

    r = float(np.max(np.abs(design.zpk[1]), initial=0.0))
    if r <= 0.0:
        return 16
    return int(math.ceil(math.log(_TAIL_RELATIVE) / math.log(r))) + 16


def _lead(design) -> int:
    """Zeros put before a test signal so that an oversampled run's pre-ringing is kept."""
    return int(getattr(design, "latency", 0))


def _run(design, x: np.ndarray, block_frames: int) -> np.ndarray:
    from .oversample import filter_aligned, is_oversampled
    from .stream import Equalizer

    if is_oversampled(design):
        return filter_aligned(design, x, block_frames)

    eq = Equalizer(design, channels=1, exact=False)   # the batch's mono loop (stereo's, on most CPUs)
    out = np.empty_like(x)
    for start in range(0, len(x), block_frames):
        out[start:start + block_frames] = eq.process(x[start:start + block_frames])
    return out


def _sweep(fs: float, seconds: float, f1: float, f2: float) -> np.ndarray:
    """Exponential sine sweep from f1 to f2 Hz, with short raised-cosine fades."""
    n = int(seconds * fs)
    t = np.arange(n) / fs
    k = math.log(f2 / f1)
    x = np.sin(2 * math.pi * f1 * seconds / k * (np.exp(t * k / seconds) - 1.0))
    fade = min(n // 20, int(0.01 * fs))
    ramp = 0.5 - 0.5 * np.cos(np.pi * np.arange(fade) / fade)
    x[:fade] *= ramp
    x[n - fade:] *= ramp[::-1]
    return 0.5 * x


def _compare(design, freqs: np.ndarray, h_meas: np.ndarray, kind: str, dtype: str) -> Measurement:
    h_design = design.response(freqs)
    h_curve = design.target.response(freqs)
    vs_design = 20 * np.log10(np.abs(h_meas / h_design))
    vs_curve = 20 * np.log10(np.abs(h_meas / h_curve))
    analytic = 20 * np.log10(np.abs(h_design / h_curve))
    i = int(np.argmax(np.abs(vs_curve)))
    return Measurement(kind, dtype, float(np.max(np.abs(vs_design))), float(np.max(np.abs(vs_curve))),
                       float(freqs[i]), float(np.max(np.abs(analytic))))


def _measure_impulse(design, dtype, block_frames: int, band) -> Measurement:
    lead = _lead(design)
    n = 1 << int(math.ceil(math.log2(max(_settle_frames(design) + lead, 4 * design.fs / 20.0))))
    x = np.zeros(n, dtype=dtype)
    x[lead] = 1.0
    h = np.fft.rfft(_run(design, x, block_frames).astype(np.float64)) / np.fft.rfft(x.astype(np.float64))
    f = np.fft.rfftfreq(n, 1.0 / design.fs)
    sel = (f >= band[0]) & (f <= band[1])
    return _compare(design, f[sel], h[sel], "impulse", np.dtype(dtype).name)


def _measure_sweep(design, dtype, block_frames: int, band) -> Measurement:
    x = _sweep(design.fs, 4.0, band[0] / 2, min(band[1] * 1.1, 0.49 * design.fs))
    tail, lead = _settle_frames(design), _lead(design)
    n = 1 << int(math.ceil(math.log2(lead + len(x) + tail)))
    xin = np.zeros(n, dtype=dtype)
    xin[lead:lead + len(x)] = x
    y = _run(design, xin, block_frames).astype(np.float64)
    xs = np.fft.rfft(xin.astype(np.float64))
    ys = np.fft.rfft(y)
    f = np.fft.rfftfreq(n, 1.0 / design.fs)
    sel = (f >= band[0]) & (f <= band[1])
    # Check only the bins the sweep excites well (within 40 dB of its spectral peak).
    strong = np.abs(xs) >= 0.01 * np.max(np.abs(xs[sel]))
    sel &= strong
    return _compare(design, f[sel], ys[sel] / xs[sel], "sweep", np.dtype(dtype).name)


def verify(design, band: tuple[float, float] = DEFAULT_BAND, *, block_frames: int = VERIFY_BLOCK_FRAMES,
           dtypes: tuple = (np.float32, np.float64)) -> Verification:
    """Measure ``design`` through the real Equalizer path and compare with the analysis.

    Parameters
    ----------
    design : Design or OversampledDesign
        The design to prove (an oversampled one runs through
        :func:`dspeq.oversample.filter_aligned`, its latency removed; the
        test signals then start after as many zeros, to keep the pre-ringing).
    band : (float, float)
        Frequency band in Hz (upper edge limited to 0.95·Nyquist).
    block_frames : int
        Block size used to stream the test signals (the batch's by default).
    dtypes : tuple of dtype
        Sample types to run (float32 and float64 by default).

    Returns
    -------
    Verification
        ``ok`` is True when, for each signal and sample type, the measured
        response equals the analytic design response within 0.001 dB and so
        its deviation from the analog curve equals the analytic deviation.
    """
    if block_frames < 1:
        raise DesignError(f"block_frames must be a positive integer, got {block_frames!r}")
    b = band_for_rate(band, design.fs)
    ms = [m(design, dt, block_frames, b) for dt in dtypes for m in (_measure_impulse, _measure_sweep)]
    return Verification(design.curve.name, design.fs, design.method, b, block_frames, tuple(ms))
