"""Streaming equalizer: a cascade of biquads with state carried between blocks.

The recursion is :func:`scipy.signal.sosfilt`'s (Direct Form II transposed)
and the float64 output is bit-identical to it; the loop itself lives in
:mod:`dspeq._kernels`. ``Equalizer(..., exact=False)`` trades bit-identity for
speed on mono and stereo signals (see :class:`Equalizer`).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from . import _kernels
from ._errors import DesignError, DspeqError

__all__ = ["Equalizer", "validate_sos"]

_F32, _F64 = np.dtype(np.float32), np.dtype(np.float64)
_FLOATS = (_F32, _F64)
# np.may_share_memory without its __array_function__ dispatch (half its cost
# on a small block); the public function where numpy has no such attribute.
_may_share_memory = getattr(np.may_share_memory, "_implementation", np.may_share_memory)


def validate_sos(sos: Any) -> np.ndarray:
    """Check a second-order-section array and return it as float64.

    Parameters
    ----------
    sos : array_like, shape (n_sections, 6)
        Rows ``[b0, b1, b2, a0, a1, a2]``, as :func:`scipy.signal.sosfilt`.

    Returns
    -------
    ndarray of float64, shape (n_sections, 6)
        A new C-contiguous array.

    Raises
    ------
    DesignError
        If the array is not real and of shape (n, 6) with n >= 1, holds a
        non-finite value, has ``a0 != 1`` in a section, or has a section
        whose poles are not strictly inside the unit circle.

    Examples
    --------
    >>> from dspeq.stream import validate_sos
    >>> validate_sos([[1.0, 0.0, 0.0, 1.0, -0.5, 0.0]]).shape
    (1, 6)
    >>> validate_sos([[1.0, 0.0, 0.0, 2.0, -0.5, 0.0]])
    Traceback (most recent call last):
    ...
    dspeq._errors.DesignError: SOS section 0 has a0 = 2.0; every section must have a0 == 1
    """
    try:
        arr = np.asarray(sos)
    except (TypeError, ValueError) as exc:  # ragged nested sequences
        raise DesignError(f"SOS must be a real (n_sections, 6) array, got {sos!r}") from exc
    if arr.dtype.kind not in "iuf":
        raise DesignError(f"SOS must be a real (n_sections, 6) array, got {sos!r}")
    arr = np.array(arr, dtype=np.float64, order="C")
    if arr.ndim != 2 or arr.shape[1] != 6 or arr.shape[0] < 1:
        raise DesignError(f"SOS must have shape (n_sections, 6), got shape {arr.shape!r}")
    bad = np.argwhere(~np.isfinite(arr))
    if bad.size:
        row, col = (int(i) for i in bad[0])
        raise DesignError(f"SOS section {row} coefficient {col} is {float(arr[row, col])!r}")
    for row, (a0, a1, a2) in enumerate(arr[:, 3:]):
        if a0 != 1.0:
            raise DesignError(
                f"SOS section {row} has a0 = {float(a0)!r}; every section must have a0 == 1"
            )
        # Poles of 1 + a1 z^-1 + a2 z^-2 are inside |z| < 1 exactly when
        # |a2| < 1 and |a1| < 1 + a2 (the stability triangle).
        if not (abs(a2) < 1.0 and abs(a1) < 1.0 + a2):
            raise DesignError(
                f"SOS section {row} is not stable: a1 = {float(a1)!r}, a2 = {float(a2)!r} "
                "put a pole on or outside the unit circle"
            )
    return arr


class Equalizer:
    """Stateful cascade of biquads for block-by-block processing.

    Parameters
    ----------
    design : Design or array_like
        Anything with an ``.sos`` attribute (a :class:`dspeq.Design`), or a
        second-order-section array of shape (n_sections, 6) with ``a0 == 1``.
    channels : int, optional
        Number of channels of every block (default 1).
    exact : bool, optional
        True (the default): the output is bit-identical to
        :func:`scipy.signal.sosfilt`. False: mono and stereo cascades of up
        to four sections run a faster loop (below) whose output differs
        from sosfilt's by rounding only; other shapes are exact either way,
        and so is stereo on CPUs where the exact loop is the faster one
        (:func:`dspeq._kernels.fast_channels`: AMD Zen 1).

    Attributes
    ----------
    sos : ndarray of float64, shape (n_sections, 6)
        The coefficients (read-only).
    channels : int
        Number of channels.
    state : ndarray of float64, shape (n_sections, channels, 2)
        A copy of the filter state, in the ``zi`` layout that
        :func:`scipy.signal.sosfilt` uses for a ``(channels, frames)`` signal
        filtered along its last axis.
    exact : bool
        Whether the output was asked to be bit-identical to sosfilt's
        (with False, shapes the fast loop does not serve still are).
    loop : str
        The loop that filters: ``"exact"``, ``"fast"`` or ``"fast-decoupled"``.

    Notes
    -----
    Output has zero latency: sample ``n`` of the output depends on input
    samples ``0..n`` only. With ``exact=True``, processing a signal in blocks
    of any sizes gives exactly the output of one :func:`scipy.signal.sosfilt`
    call over the whole signal (bit for bit in float64), except that filter states smaller than
    1e-200 are flushed to zero (see :mod:`dspeq._kernels`), which changes
    decaying tails by less than -300 dBFS and keeps them fast.

    One or two channels are bound by the recursion's dependency chain:
    every sample waits for the previous one, and bit-identity forbids
    reordering the arithmetic. With ``exact=False`` a mono or stereo block is
    computed eight frames at a time straight from the state before them
    (small matrices made in extended precision), so the eight outputs fill
    SIMD registers and only the state update is loop-carried
    (:mod:`dspeq._kernels`, "Fast path"); on CPUs with 128-bit
    floating-point units a mono block takes a variant with fewer operations
    where the design allows it (:attr:`loop` ``"fast-decoupled"``).
    ``benchmarks/bench_kernel.py`` measures the modes against sosfilt
    (``docs/performance.md``). The fast
    loop keeps its state between blocks in its own coordinates, so blocks
    whose lengths are multiples of :data:`dspeq._kernels.FAST_STEP` (8)
    frames give, bit for bit, the output of one call over the whole signal,
    whatever their sizes (a block of another length ends with a few frames
    of the exact loop, which may change later output within rounding);
    :attr:`state` is the ``zi`` of the signal so far, within rounding.
    Accuracy, measured against the same recursion in extended precision
    (``tests/test_fastpath.py``, ``docs/performance.md``): the fast path's
    error is no larger than sosfilt's own, and where poles sit near z = 1
    much smaller (about 1e-15 of the output's peak for a RIAA cascade at
    96 kHz, against sosfilt's 3e-14; about 1e-12 for a 3 Hz low-frequency
    limit at 192 kHz, poles at |z| = 0.9999, against sosfilt's 1e-10), so the two
    differ by at most the sum of both. Exact is the default: results that
    must be reproducible bit for bit (checksums, regression files) stay so
    unless a caller asks for speed.

    Examples
    --------
    >>> import numpy as np
    >>> from scipy.signal import sosfilt
    >>> from dspeq.stream import Equalizer
    >>> sos = np.array([[0.2, 0.2, 0.0, 1.0, -0.6, 0.0]])  # one-pole low-pass
    >>> eq = Equalizer(sos, channels=2)
    >>> x = np.random.default_rng(0).standard_normal((1000, 2))
    >>> y = np.concatenate([eq.process(x[:300]), eq.process(x[300:])])
    >>> bool(np.array_equal(y, sosfilt(sos, x, axis=0)))
    True
    >>> eq.state.shape
    (1, 2, 2)
    >>> eq.reset()
    >>> eq.process(np.ones(4, dtype=np.float32))
    Traceback (most recent call last):
    ...
    dspeq._errors.DspeqError: a 1-D (mono) block needs a 1-channel Equalizer; this one has 2 channels
    """

    def __init__(self, design: Any, channels: int = 1, exact: bool = True):
        # The kernels get the writable array (numba compiles read-only arrays
        # separately); users get a read-only view.
        self._coefficients = validate_sos(getattr(design, "sos", design))
        self._sos = self._coefficients.view()
        self._sos.flags.writeable = False
        if isinstance(channels, bool) or not isinstance(channels, int | np.integer):
            raise DspeqError(f"channels must be a positive integer, got {channels!r}")
        if channels < 1:
            raise DspeqError(f"channels must be a positive integer, got {channels!r}")
        self._channels = int(channels)
        if not isinstance(exact, bool | np.bool_):
            raise DspeqError(f"exact must be True or False, got {exact!r}")
        self._exact = bool(exact)
        fast = not exact and _kernels.uses_fast_loop(self._sos.shape[0], self._channels)
        self._tables = _kernels.fast_tables(self._coefficients, self._channels) if fast else None
        decoupled = fast and self._tables.decoupled
        self._filter = _kernels.filter_runner(self._sos.shape[0], self._channels, fast, decoupled)
        self._filter_pcm = _kernels.pcm_runner(self._sos.shape[0], self._channels, fast, decoupled)
        # The runners' state: zi, or for the fast loop its own coordinates (kept
        # in them between blocks; see dspeq._kernels.to_loop_state).
        self._zi = np.zeros((self._sos.shape[0], self._channels, 2))
        self._peak = 0.0

    @property
    def sos(self) -> np.ndarray:
        """Coefficients, shape (n_sections, 6), read-only."""
        return self._sos

    @property
    def channels(self) -> int:
        """Number of channels of every block."""
        return self._channels

    @property
    def exact(self) -> bool:
        """Whether bit-identity with :func:`scipy.signal.sosfilt` was asked for (``exact=True``)."""
        return self._exact

    @property
    def loop(self) -> str:
        """Which loop filters: ``"exact"`` (bit-identical to sosfilt), ``"fast"`` or ``"fast-decoupled"``.

        ``"fast"`` is the eight-frame step, ``"fast-decoupled"`` its mono
        variant for CPUs with 128-bit floating-point units
        (:func:`dspeq._kernels.decoupled_tables`); both are within rounding
        of sosfilt. With ``exact=False``, shapes the fast loops do not serve
        say ``"exact"``.
        """
        if self._tables is None:
            return "exact"
        return "fast-decoupled" if self._tables.decoupled else "fast"

    @property
    def state(self) -> np.ndarray:
        """Copy of the filter state, shape (n_sections, channels, 2)."""
        return self._zi.copy() if self._tables is None else _kernels.from_loop_state(self._zi, self._tables)

    def reset(self) -> None:
        """Set the filter state to zero (as before the first block)."""
        self._zi[...] = 0.0

    @property
    def last_peak(self) -> float:
        """Largest magnitude of the output of the last successful block (0.0 before any).

        For :meth:`process_pcm` it is the filter output's, before the gain.
        Measured by the filter loop itself, so it costs nothing extra.
        """
        return self._peak

    def process(self, block: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Filter one block, continuing from the previous one.

        Parameters
        ----------
        block : ndarray of float32 or float64
            Shape (frames, channels), or 1-D for a mono Equalizer.
        out : ndarray, optional
            Array of the same shape and dtype as ``block`` (C-contiguous) to
            receive the output; it may be ``block`` itself.

        Returns
        -------
        ndarray
            The filtered block, of the same shape and dtype as ``block``
            (``out`` if given).

        Raises
        ------
        DspeqError
            If the block is not float32/float64, has the wrong shape or
            channel count, or holds NaN or infinity. On error the state is
            left as it was (the content of ``out`` is then undefined).
        """
        frames = self._as_frames(block)
        target = self._output_for(block, frames, out)
        if target is not None and _may_share_memory(frames, target):
            self._check_finite(frames)  # the input is about to be overwritten
        result = np.empty_like(frames) if target is None else target
        zi = self._zi.copy()
        finite, peak = self._filter(self._coefficients, frames, zi, result, self._tables)
        self._commit(frames, zi, finite, peak)
        return result.reshape(np.shape(block)) if out is None else out

    def process_pcm(
        self, block: np.ndarray, gain: float, bits: int, dither_state: np.ndarray, out: np.ndarray
    ) -> tuple[int, float]:
        """Filter one block and quantize it to integer PCM in the same pass.

        The samples equal ``quantize_tpdf(self.process(block), gain, bits,
        dither_state, out)`` (:func:`dspeq._kernels.quantize_tpdf`) exactly,
        but the filter output never goes to memory as a whole block: each
        chunk is quantized while it is still in the cache.

        Parameters
        ----------
        block : ndarray of float32 or float64
            As for :meth:`process`.
        gain : float
            Linear gain before quantization.
        bits : {8, 16, 24, 32}
            Output word length.
        dither_state : ndarray of uint64, shape (2,)
            From :func:`dspeq._kernels.seed_state`; advanced in place.
        out : ndarray of int32
            C-contiguous, shape (frames, channels): left-justified samples.

        Returns
        -------
        clips : int
            Samples clamped at full scale.
        peak : float
            Largest ``abs(y * gain)`` before dither, in full-scale units.

        Raises
        ------
        DspeqError
            As :meth:`process`, or for a bad ``bits`` or ``out``; on error the
            filter and dither states are left as they were.
        """
        frames = self._as_frames(block)
        if bits not in _kernels.PCM_BITS:
            raise DspeqError(f"bits must be one of {_kernels.PCM_BITS}, got {bits!r}")
        try:
            _kernels.check_state(dither_state)
        except ValueError as exc:
            raise DspeqError(str(exc)) from None
        if not (isinstance(out, np.ndarray) and out.dtype == np.int32 and out.flags.c_contiguous
                and out.flags.writeable and out.size == frames.size):
            raise DspeqError(f"out must be a writable C-contiguous int32 array of {frames.shape[0]} "
                             f"frames x {self._channels} channels, got {_describe(out)}")
        drawn = int(dither_state[1])
        zi = self._zi.copy()
        finite, clips, peak = self._filter_pcm(
            self._coefficients, frames, zi, out.reshape(frames.shape), gain, bits, dither_state,
            self._tables)
        if not finite:
            dither_state[1] = drawn
        self._commit(frames, zi, finite, peak)
        return clips, peak * abs(float(gain))

    def _commit(self, frames: np.ndarray, zi: np.ndarray, finite: bool, peak: float) -> None:
        """Keep the new state ``zi`` of a finished block, or raise if it is not finite."""
        if not finite:
            self._check_finite(frames)
            raise DspeqError(
                f"filter state overflowed float64 on a finite block of shape "
                f"{frames.shape!r}; the coefficients or the input level are out of range"
            )
        self._zi = zi
        self._peak = peak

    def _as_frames(self, block: np.ndarray) -> np.ndarray:
        """Validate ``block`` and view it as a C-contiguous (frames, channels) array."""
        if not isinstance(block, np.ndarray):
            raise DspeqError(f"block must be a numpy array, got {type(block).__name__}")
        dtype = block.dtype
        if dtype is not _F64 and dtype is not _F32 and dtype not in _FLOATS:
            raise DspeqError(
                f"block must be float32 or float64 audio in native byte order, "
                f"got dtype {str(block.dtype)!r}; "
                "convert integer PCM to float first (full scale = 1.0)"
            )
        if block.ndim == 2 and block.shape[1] == self._channels and block.flags.c_contiguous:
            return block  # the common case, checked first
        if block.ndim == 1:
            if self._channels != 1:
                raise DspeqError(
                    "a 1-D (mono) block needs a 1-channel Equalizer; "
                    f"this one has {self._channels} channels"
                )
            block = block[:, np.newaxis]
        elif block.ndim != 2 or block.shape[1] != self._channels:
            raise DspeqError(
                f"block must have shape (frames, {self._channels}), got {block.shape!r}"
            )
        return np.ascontiguousarray(block)

    def _output_for(
        self, block: np.ndarray, frames: np.ndarray, out: np.ndarray | None
    ) -> np.ndarray | None:
        if out is None:
            return None
        if (
            not isinstance(out, np.ndarray)
            or out.shape != block.shape
            or out.dtype != block.dtype
            or not (flags := out.flags).c_contiguous
            or not flags.writeable
        ):
            raise DspeqError(
                f"out must be a writable C-contiguous {block.dtype.name} array of shape "
                f"{block.shape!r}, got {_describe(out)}"
            )
        return out if out.ndim == 2 else out.reshape(frames.shape)

    @staticmethod
    def _check_finite(frames: np.ndarray) -> None:
        if np.isfinite(_kernels.peak_abs(frames)):
            return
        bad = ~np.isfinite(frames)
        first = tuple(int(i) for i in np.argwhere(bad)[0])
        raise DspeqError(
            f"block holds {int(bad.sum())} NaN or infinite sample(s); "
            f"first at (frame, channel) {first!r}: {float(frames[first])!r}"
        )

    def __repr__(self) -> str:
        fast = "" if self._exact else ", exact=False"
        return f"Equalizer(<{self._sos.shape[0]} sections>, channels={self._channels}{fast})"


def _describe(value: Any) -> str:
    if isinstance(value, np.ndarray):
        return f"{value.dtype.name} array of shape {value.shape!r}"
    return repr(value)
