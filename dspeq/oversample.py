"""Oversampled run: interpolate ×2 (or ×4), equalize at the higher rate, decimate back.

A minimum-phase IIR at 44.1 kHz has its phase fixed by its magnitude all the
way to Nyquist, so it cannot follow an analog curve's phase closely below
10 kHz (see docs/accuracy.md, "Known limits").  Run at twice the rate, the
same kind of design follows the curve's magnitude past 20 kHz and its phase
error below 10 kHz drops by an order of magnitude.  The price is a
linear-phase FIR low-pass on the way up and on the way down (an integer
latency, removed exactly by :func:`filter_aligned`) and the extra arithmetic.

:func:`design_oversampled` makes an :class:`OversampledDesign` (the inner
:class:`~dspeq.design.Design` at ``factor × fs`` plus the FIR taps);
:class:`OversampledEqualizer` streams audio through it, block by block, with
output that does not depend on how the signal is cut into blocks.

Each ×2 stage uses one half-band FIR (Kaiser window, odd length, every
second tap exactly zero but the centre): passband to min(20 kHz,
0.4535·fs), stopband from fs − passband edge, at least
:data:`MIN_ATTENUATION_DB` of attenuation, checked against
:func:`scipy.signal.freqz` when designed.

Examples
--------
>>> import dspeq
>>> od = dspeq.design_oversampled("riaa", 44100)
>>> od.fs, od.inner.fs, od.factor
(44100.0, 88200.0, 2)
>>> dspeq.check(od).max_abs_db < 0.002
True
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np

from ._errors import DesignError, DspeqError

__all__ = ["OversampledDesign", "OversampledEqualizer", "AlignedStream", "design_oversampled",
           "filter_aligned", "halfband_taps", "fir_figures", "is_oversampled",
           "FACTORS", "RUN_FACTORS", "is_factor", "MIN_ATTENUATION_DB", "PASSBAND_HZ",
           "PASSBAND_FRACTION"]

#: Oversampling factors offered (a cascade of ×2 stages).
FACTORS = (2, 4)
#: What a job file or ``--oversample`` accepts: 1 (off) or one of FACTORS.
RUN_FACTORS = (1, *FACTORS)
#: Required stopband attenuation (dB) of each FIR.
MIN_ATTENUATION_DB = 110.0
#: Attenuation the Kaiser window is designed for (a margin above the requirement).
_DESIGN_ATTENUATION_DB = 120.0
#: Passband edge: this many Hz, or this fraction of the outer rate if lower.
PASSBAND_HZ = 20_000.0
PASSBAND_FRACTION = 0.4535


# ----------------------------------------------------------------------------- FIR design
def _passband_hz(fs: float) -> float:
    return min(PASSBAND_HZ, PASSBAND_FRACTION * fs)


def _stopband_db(taps: np.ndarray, f_stop: float, rate: float) -> float:
    """Smallest attenuation (dB) of ``taps`` from ``f_stop`` to ``rate``/2 (scipy.signal.freqz)."""
    from scipy import signal

    _, h = signal.freqz(taps, worN=np.linspace(f_stop, rate / 2, 8192), fs=rate)
    return float(-20.0 * np.log10(np.max(np.abs(h))))


@lru_cache(maxsize=64)
def halfband_taps(rate_in: float, passband_hz: float) -> np.ndarray:
    """Half-band low-pass FIR for interpolating ``rate_in`` → 2·``rate_in`` (DC gain 1).

    Parameters
    ----------
    rate_in : float
        The lower of the two rates (Hz); the filter runs at ``2 * rate_in``.
    passband_hz : float
        Passband edge (Hz); the stopband starts at ``rate_in - passband_hz``.

    Returns
    -------
    ndarray of float64, read-only
        Odd length 4k + 3 (its centre tap sits at an odd index); the taps at
        even distance from the centre are exactly zero, the centre is 0.5.

    Raises
    ------
    DesignError
        If the passband edge does not lie below ``rate_in / 2``.
    """
    from scipy import signal

    f_stop = rate_in - passband_hz
    if not (0 < passband_hz < f_stop):
        raise DesignError(f"passband edge {passband_hz!r} Hz must lie below half of {rate_in!r} Hz")
    rate = 2.0 * rate_in
    n, beta = signal.kaiserord(_DESIGN_ATTENUATION_DB, (f_stop - passband_hz) / (rate / 2))
    n += (3 - n % 4) % 4
    while True:
        h = signal.firwin(n, rate_in / 2, window=("kaiser", beta), fs=rate)
        c = (n - 1) // 2
        h[c % 2::2] = 0.0           # the half-band zeros, exactly
        h[c] = 0.5
        if _stopband_db(h, f_stop, rate) >= MIN_ATTENUATION_DB + 3.0:
            break
        n += 4
    h.setflags(write=False)
    return h


@lru_cache(maxsize=64)
def _stage_taps(fs: float, factor: int) -> tuple[np.ndarray, ...]:
    """Taps of each ×2 stage (the first at fs → 2fs), each padded so latency stays whole."""
    edge = _passband_hz(fs)
    out, rate = [], fs
    for i in range(int(round(math.log2(factor)))):
        h = halfband_taps(rate, edge)
        # Up + down of stage i delay L − 1 samples at 2^(i+1)·fs: whole frames at fs need
        # (L − 1) divisible by 2^(i+1); zero taps added at both ends make it so.
        step = 2 ** (i + 1)
        pad = ((-(len(h) - 1)) % step) // 2
        if pad:
            h = np.pad(h, pad)
            h.setflags(write=False)
        out.append(h)
        rate *= 2
    return tuple(out)


def _amplitude(taps: np.ndarray, f: np.ndarray, rate: float) -> np.ndarray:
    """Zero-phase (real) amplitude of a symmetric odd-length FIR at ``f`` Hz."""
    c = (len(taps) - 1) // 2
    m = np.arange(1, c + 1)
    return taps[c] + 2.0 * np.cos(2 * np.pi * np.outer(f, m) / rate) @ taps[c + 1:]


def fir_figures(fs: float, factor: int = 2) -> dict[str, Any]:
    """Lengths, passband ripple and stopband attenuation of the FIRs for ``fs`` and ``factor``.

    Returns
    -------
    dict
        ``lengths`` (taps per stage), ``passband_hz``, ``stopband_hz`` (first
        stage), ``ripple_db`` (largest |dB| of the whole up + down FIR chain
        over 0 Hz – passband edge) and ``attenuation_db`` (smallest stopband
        attenuation of any stage), from :func:`scipy.signal.freqz`.
    """
    lengths, edge, ripple_db, attenuation_db = _fir_figures(float(fs), _check_factor(factor))
    return {"lengths": list(lengths), "passband_hz": edge, "stopband_hz": fs - edge,
            "ripple_db": ripple_db, "attenuation_db": attenuation_db}


@lru_cache(maxsize=64)
def _fir_figures(fs: float, factor: int) -> tuple[tuple[int, ...], float, float, float]:
    """(lengths, passband edge, ripple dB, attenuation dB) for :func:`fir_figures`, once per rate."""
    from scipy import signal

    stages = _stage_taps(fs, factor)
    edge = _passband_hz(fs)
    f = np.linspace(0.0, edge, 4000)
    chain = np.ones_like(f)
    att, rate = [], fs
    for h in stages:
        _, resp = signal.freqz(h, worN=f, fs=2 * rate)
        chain = chain * np.abs(resp) ** 2
        att.append(_stopband_db(h, rate - edge, 2 * rate))
        rate *= 2
    return (tuple(len(h) for h in stages), edge, float(np.max(np.abs(20 * np.log10(chain)))),
            min(att))


def is_factor(value: Any, allow_off: bool = False) -> bool:
    """Whether ``value`` is an int (not a bool) in FACTORS, or in RUN_FACTORS with ``allow_off``."""
    allowed = RUN_FACTORS if allow_off else FACTORS
    return not isinstance(value, bool) and isinstance(value, int | np.integer) and value in allowed


def _check_factor(factor: Any) -> int:
    if not is_factor(factor):
        raise DesignError(f"oversampling factor must be one of {', '.join(map(str, FACTORS))}, "
                          f"got {factor!r}")
    return int(factor)


# ----------------------------------------------------------------------------- the design
@dataclass(frozen=True, eq=False)
class OversampledDesign:
    """A design run at ``factor × fs`` between two linear-phase FIR filters.

    Attributes
    ----------
    inner : Design
        The IIR design at the inner rate ``factor × fs``.
    taps : tuple of ndarray
        FIR taps of each ×2 stage (DC gain 1), the first at ``2 × fs``; the
        same filter interpolates and decimates.
    fs : float
        Outer sample rate (Hz): the rate of the audio.
    factor : int
        Oversampling factor (2 or 4).
    """

    inner: Any
    taps: tuple[np.ndarray, ...]
    fs: float
    factor: int

    @property
    def latency(self) -> int:
        """Delay of the FIR chain in frames at ``fs`` (an integer by construction)."""
        return int(round(sum((len(h) - 1) / 2 ** i for i, h in enumerate(self.taps, 1))))

    @property
    def method(self) -> str:
        """The inner method with the factor, e.g. ``fit x2``."""
        return f"{self.inner.method} x{self.factor}"

    @property
    def label(self) -> str:
        """The inner design's label with the factor, e.g. ``fit(sections=2) x2``."""
        return f"{self.inner.label} x{self.factor}"

    @property
    def curve(self):
        """The curve asked for."""
        return self.inner.curve

    @property
    def target(self):
        """The curve realized (low-frequency limit applied); deviations are measured against it."""
        return self.inner.target

    @property
    def options(self) -> dict[str, Any]:
        """Options of the inner design."""
        return self.inner.options

    @property
    def order(self) -> int:
        """Order of the inner design."""
        return self.inner.order

    @property
    def sections(self) -> int:
        """Biquads of the inner design."""
        return self.inner.sections

    def fir_amplitude(self, f: np.ndarray | float) -> np.ndarray:
        """Real amplitude of the up + down FIR chain at ``f`` (Hz), delay removed."""
        f = np.atleast_1d(np.asarray(f, dtype=float))
        amp, rate = np.ones_like(f), self.fs
        for h in self.taps:
            amp = amp * _amplitude(h, f, 2 * rate) ** 2
            rate *= 2
        return amp

    def response(self, f: np.ndarray | float) -> np.ndarray:
        """Complex response of up-FIR · inner design · down-FIR at ``f`` (Hz), latency removed."""
        return self.fir_amplitude(f) * self.inner.response(f)

    def magnitude_db(self, f: np.ndarray | float) -> np.ndarray:
        """Magnitude of :meth:`response` in dB."""
        return 20.0 * np.log10(np.abs(self.response(f)))

    def group_delay_samples(self, f: np.ndarray | float) -> np.ndarray:
        """Group delay (frames at ``fs``) at ``f`` Hz, latency removed: the inner design's."""
        return self.inner.group_delay_samples(f) / self.factor

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready description: the inner design, the FIR taps, the rates and the latency."""
        inner = self.inner.to_dict()
        figures = fir_figures(self.fs, self.factor)
        return {"curve": inner["curve"], "curve_roots": inner["curve_roots"],
                "curve_source": inner["curve_source"], "method": self.method, "rate": self.fs,
                "options": inner["options"],
                "oversample": {"factor": self.factor, "inner_rate": self.inner.fs,
                               "latency_frames": self.latency, "fir": "half-band, Kaiser window",
                               "fir_lengths": figures["lengths"],
                               "passband_hz": figures["passband_hz"],
                               "stopband_hz": figures["stopband_hz"],
                               "fir_ripple_db": figures["ripple_db"],
                               "fir_attenuation_db": figures["attenuation_db"],
                               "fir_taps": [h.tolist() for h in self.taps]},
                "inner": inner}

    @classmethod
    def from_dict(cls, data: dict[str, Any], curve) -> OversampledDesign:
        """Rebuild from :meth:`to_dict` output and the curve it was made for (coefficients as recorded)."""
        from .design import DEFAULT_LF_LIMIT_HZ, Design

        inner, over = data["inner"], data["oversample"]
        options = dict(inner.get("options") or {})
        target = curve.with_lf_limit(options.get("lf_limit_hz", DEFAULT_LF_LIMIT_HZ))
        d = Design(np.array(inner["sos"], dtype=float), float(inner["rate"]), inner["method"], curve,
                   target, options)
        taps = tuple(np.array(h, dtype=float) for h in over["fir_taps"])
        return cls(d, taps, float(data["rate"]), int(over["factor"]))

    def __repr__(self) -> str:
        return (f"OversampledDesign({self.curve.name!r}, fs={self.fs:g}, factor={self.factor}, "
                f"{self.sections} inner sections, latency {self.latency})")


def design_oversampled(curve: Any, fs: float, factor: int = 2, method: str | None = None,
                       **options: Any) -> OversampledDesign:
    """Design ``curve`` at ``factor × fs`` for an oversampled run at ``fs``.

    Parameters
    ----------
    curve : Curve or str
        Anything :func:`dspeq.design` accepts.
    fs : float
        Outer sample rate (Hz), the rate of the audio.
    factor : {2, 4}, optional
        Oversampling factor (default 2).
    method : str, optional
        Inner design method (default: :func:`dspeq.design`'s).
    **options
        Passed to :func:`dspeq.design` (``lf_limit_hz``, method options).

    Returns
    -------
    OversampledDesign

    Raises
    ------
    DesignError
        For a bad factor, or an inner rate beyond what :func:`dspeq.design` accepts.

    Examples
    --------
    >>> from dspeq.oversample import design_oversampled
    >>> od = design_oversampled("riaa-iec", 44100, sections=2)
    >>> od.sections, od.latency
    (2, 85)
    """
    from .design import DEFAULT_METHOD, MAX_RATE, _validate_rate, design

    factor = _check_factor(factor)
    rate = _validate_rate(fs)
    if rate * factor > MAX_RATE:
        raise DesignError(f"oversampling x{factor} of {fs!r} Hz needs {rate * factor:g} Hz, above the "
                          f"highest design rate {MAX_RATE:g} Hz")
    inner = design(curve, rate * factor, method or DEFAULT_METHOD, **options)
    return OversampledDesign(inner, _stage_taps(rate, factor), rate, factor)


def is_oversampled(design: Any) -> bool:
    """True for an :class:`OversampledDesign`."""
    return isinstance(design, OversampledDesign)


# ----------------------------------------------------------------------------- streaming
#: Values (frames × channels) per step of the FIR sums: the working arrays stay in cache.
_CHUNK_VALUES = 32768


def _fir_terms(b: np.ndarray) -> list[tuple[int, int | None, float]]:
    """The nonzero terms of an FIR as (offset, partner offset or None, tap), in summing order.

    Output sample ``i`` of the branch is the sum over the terms of ``tap · (w[i + offset] +
    w[i + partner])`` (or ``tap · w[i + offset]``), where ``w`` is the branch's (delayed) input
    with ``len(b) − 1`` earlier frames in front.  A symmetric ``b`` is summed in pairs (half the
    multiplications).
    """
    k = len(b)
    if k > 1 and np.array_equal(b, b[::-1]):
        terms = [(k - 1 - j, j, float(b[j])) for j in range(k // 2)]
        terms += [(k // 2, None, float(b[k // 2]))] if k % 2 else []
    else:
        terms = [(k - 1 - j, None, float(b[j])) for j in range(k)]
    return [t for t in terms if t[2] != 0.0]


def _add_term(w: np.ndarray, s: int, e: int, term: tuple[int, int | None, float],
              out: np.ndarray) -> None:
    """``out = tap · (w[s+a:e+a] + w[s+p:e+p])`` (or ``tap · w[s+a:e+a]``) for ``term = (a, p, tap)``."""
    a, p, tap = term
    if p is None:
        np.multiply(w[s + a:e + a], tap, out=out)
    else:
        np.add(w[s + a:e + a], w[s + p:e + p], out=out)
        np.multiply(out, tap, out=out)


class _Branch:
    """One polyphase branch: a whole-sample delay then an FIR, summed term by term in a fixed order.

    The last ``delay + len(b) − 1`` input frames are carried between blocks; every output
    sample is computed by the same sequence of float64 operations (first term, then each
    further term added in turn), so the output does not depend on how the input is cut into
    blocks nor on the chunks the sums run in.
    """

    def __init__(self, taps: np.ndarray, channels: int, extra_delay: int = 0):
        nz = np.flatnonzero(taps)
        b = np.asarray(taps[nz[0]:nz[-1] + 1], dtype=float)
        self.terms = _fir_terms(b)
        self.hist = np.zeros((int(nz[0]) + extra_delay + len(b) - 1, channels))
        self.chunk = max(1, _CHUNK_VALUES // channels)

    def __call__(self, x: np.ndarray) -> np.ndarray:
        n = len(x)
        w = np.concatenate([self.hist, x])
        self.hist = w[n:].copy()
        y = np.empty(x.shape)
        tmp = np.empty((min(self.chunk, n), x.shape[1]))
        first, *rest = self.terms
        for s in range(0, n, self.chunk):
            e = min(s + self.chunk, n)
            acc, t = y[s:e], tmp[:e - s]
            _add_term(w, s, e, first, acc)
            for term in rest:
                _add_term(w, s, e, term, t)
                np.add(acc, t, out=acc)
        return y

    def state(self) -> np.ndarray:
        return self.hist.copy()

    def restore(self, state: np.ndarray) -> None:
        self.hist = state.copy()

    def reset(self) -> None:
        self.hist[...] = 0.0


class _Stage:
    """One ×2 stage: interpolation (two branches) and decimation (two branches, one-sample carry)."""

    def __init__(self, taps: np.ndarray, channels: int):
        self.up = (_Branch(2.0 * taps[0::2], channels), _Branch(2.0 * taps[1::2], channels))
        # z[n] = Σ h[2k]·v[2(n−k)] + Σ h[2k+1]·v[2(n−k)−1]: the odd samples arrive one sample late.
        self.down = (_Branch(taps[0::2], channels), _Branch(taps[1::2], channels, extra_delay=1))

    @property
    def branches(self) -> tuple[_Branch, ...]:
        return self.up + self.down

    def interpolate(self, x: np.ndarray) -> np.ndarray:
        y = np.empty((2 * len(x), x.shape[1]))
        frame = np.dtype((np.void, y.strides[0]))      # a whole frame as one record: a fast strided copy
        y.view(frame)[0::2] = self.up[0](x).view(frame)
        y.view(frame)[1::2] = self.up[1](x).view(frame)
        return y

    def decimate(self, v: np.ndarray) -> np.ndarray:
        return self.down[0](v[0::2]) + self.down[1](v[1::2])


class OversampledEqualizer:
    """Streaming oversampled equalizer: interpolate, filter at ``factor × fs``, decimate.

    Parameters
    ----------
    design : OversampledDesign
        From :func:`design_oversampled`.
    channels : int, optional
        Number of channels of every block (default 1).

    Attributes
    ----------
    latency : int
        Frames by which the output lags the input (the FIR chain's delay).
    channels : int
        Number of channels.

    Notes
    -----
    Interpolation runs each polyphase branch of the FIR on the input (no
    multiplications by stuffed zeros), the inner filtering is a
    :class:`dspeq.stream.Equalizer`, decimation filters the even and the
    odd inner samples with their branches (the odd ones carried one sample).
    Of the two branches of a half-band FIR one is its centre tap alone (a
    scaled delay); the other is symmetric and sums its taps in pairs.  Each
    branch carries its last input frames between blocks and computes every
    output sample by the same sequence of float64 operations (term after term,
    in a fixed order), so the output is the same, bit for bit, however the
    signal is cut into blocks.  The output has the dtype of the input.

    Examples
    --------
    >>> import numpy as np
    >>> from dspeq.oversample import OversampledEqualizer, design_oversampled
    >>> eq = OversampledEqualizer(design_oversampled("riaa", 48000), channels=2)
    >>> x = np.zeros((1000, 2), dtype=np.float32)
    >>> y = eq.process(x)
    >>> y.shape, y.dtype, eq.finish().shape
    ((1000, 2), dtype('float32'), (47, 2))
    """

    def __init__(self, design: OversampledDesign, channels: int = 1):
        from .stream import Equalizer

        if not is_oversampled(design):
            raise DspeqError(f"OversampledEqualizer needs an OversampledDesign, got {design!r}")
        self._inner = Equalizer(design.inner, channels)
        self._design = design
        self._stages = [_Stage(np.asarray(h, dtype=float), channels) for h in design.taps]
        self.latency = design.latency
        self.channels = self._inner.channels
        self._dtype = np.dtype(np.float64)

    @property
    def design(self) -> OversampledDesign:
        """The design it runs."""
        return self._design

    def reset(self) -> None:
        """Set all state to zero (as before the first block)."""
        self._inner.reset()
        for stage in self._stages:
            for branch in stage.branches:
                branch.reset()

    def process(self, block: np.ndarray) -> np.ndarray:
        """Filter one block, continuing from the previous one.

        Parameters
        ----------
        block : ndarray of float32 or float64
            Shape (frames, channels), or 1-D for a mono equalizer.

        Returns
        -------
        ndarray
            Same shape and dtype as ``block``: the equalized signal delayed by
            :attr:`latency` frames.

        Raises
        ------
        DspeqError
            As :meth:`dspeq.stream.Equalizer.process` (wrong dtype, shape or
            channel count, NaN or infinity); the state is then left as it was.
        """
        from .stream import Equalizer

        frames = self._inner._as_frames(block)       # Equalizer's validation and messages
        Equalizer._check_finite(frames)
        if not len(frames):
            return block.copy()
        saved = [b.state() for s in self._stages for b in s.branches]
        try:
            v = frames.astype(np.float64)
            for stage in self._stages:
                v = stage.interpolate(v)
            v = self._inner.process(v)
            for stage in reversed(self._stages):
                v = stage.decimate(v)
        except BaseException:           # the inner Equalizer keeps its own state on error
            for branch, state in zip((b for s in self._stages for b in s.branches), saved, strict=True):
                branch.restore(state)
            raise
        self._dtype = block.dtype
        return v.astype(block.dtype, copy=False).reshape(np.shape(block))

    def finish(self) -> np.ndarray:
        """The last :attr:`latency` frames of the output (zeros fed in), shape (latency, channels)."""
        return self.process(np.zeros((self.latency, self.channels), dtype=self._dtype))

    def __repr__(self) -> str:
        return (f"OversampledEqualizer(x{self._design.factor}, <{self._design.sections} inner sections>, "
                f"channels={self.channels}, latency={self.latency})")


class AlignedStream:
    """Output aligned with the input: the latency dropped at the start and flushed at the end.

    Parameters
    ----------
    eq : OversampledEqualizer
        A fresh (or reset) equalizer.

    Notes
    -----
    :meth:`process` returns fewer frames than it gets until :attr:`latency`
    frames have passed; :meth:`finish` returns the rest, so that the total
    output has exactly as many frames as the total input, and output frame
    ``n`` belongs to input frame ``n``.  Offline use only (it looks ahead).
    """

    def __init__(self, eq: OversampledEqualizer):
        self.eq = eq
        self._skip = eq.latency
        self.last_peak = 0.0

    def process(self, block: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Filter ``block``; return the aligned frames now available (``out`` is ignored)."""
        return self._drop(self.eq.process(block))

    def finish(self) -> np.ndarray:
        """The remaining aligned frames (as many as were held back)."""
        return self._drop(self.eq.finish())

    def _drop(self, y: np.ndarray) -> np.ndarray:
        from ._kernels import peak_abs

        cut = min(self._skip, len(y))
        self._skip -= cut
        y = y[cut:]
        self.last_peak = peak_abs(y) if len(y) else 0.0
        return y


def _aligned_blocks(stream: AlignedStream, blocks: Iterable[np.ndarray]) -> Iterator[np.ndarray]:
    for block in blocks:
        y = stream.process(block)
        if len(y):
            yield y
    yield stream.finish()


def filter_aligned(design: OversampledDesign, x: np.ndarray, block_frames: int = 65536) -> np.ndarray:
    """Filter a whole signal through an :class:`OversampledEqualizer`, latency removed exactly.

    Parameters
    ----------
    design : OversampledDesign
    x : ndarray of float32 or float64
        Shape (frames, channels), or 1-D (mono).
    block_frames : int, optional
        Block size of the streaming (the result does not depend on it).

    Returns
    -------
    ndarray
        Same shape and dtype as ``x``; frame ``n`` is the equalized input frame ``n``
        (the FIR chain's pre-ringing before frame 0 is not part of it).
    """
    frames = x[:, np.newaxis] if np.ndim(x) == 1 else x
    stream = AlignedStream(OversampledEqualizer(design, frames.shape[1]))
    blocks = (frames[i:i + block_frames] for i in range(0, len(frames), int(block_frames)))
    y = np.concatenate(list(_aligned_blocks(stream, blocks)))
    return y.reshape(np.shape(x))
