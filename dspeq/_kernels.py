"""Compiled inner loops of dspeq (the only module that uses numba).

Every loop is written as a plain Python function and compiled lazily, on
its first call, with ``numba.njit(nogil=True, cache=True)``: importing dspeq
compiles nothing, and the pure-Python originals stay available (as the
``py_func`` attribute of each kernel) so tests can compare the two.

Floating point is strict: no ``fastmath``, no reassociation, no FMA
contraction, so the float64 filter output is bit-identical to
:func:`scipy.signal.sosfilt`, which evaluates the same Direct Form II
transposed recursion in the same order::

    y      = b0 * x + z0
    z0     = (b1 * x - a1 * y) + z1
    z1     = b2 * x - a2 * y

Compile cache
-------------
``cache=True`` makes numba store machine code on disk. numba looks for a
writable place in this order: ``$NUMBA_CACHE_DIR``, ``__pycache__`` beside
this file, then the per-user cache directory (``~/.cache/numba``). When none
is writable (a read-only install run by a user without a home directory, as
on some cluster workers), numba refuses to create the kernel. dspeq then
sets ``NUMBA_CACHE_DIR`` to ``<tempdir>/dspeq-numba-cache-<uid>`` and tries
again; if even that fails it compiles without a disk cache. Set
``NUMBA_CACHE_DIR`` yourself to choose the place.

The SOS loops are generated from a template (one per number of sections and
channel layout); their code objects carry this file's name, so numba's cache
keys them to this file's content and discards them whenever it changes.

Denormal numbers
----------------
A recursive filter whose input falls to digital silence decays toward zero
and can get stuck at subnormal values, which x86 processors handle about 50x
slower. Every :data:`FLUSH_EVERY` frames the loops set state values whose
magnitude is below :data:`FLUSH_BELOW` (1e-200, i.e. -4000 dBFS) to exactly
zero. Between flushes the recursion is untouched, so on ordinary audio (whose
states never come near 1e-200) the output stays bit-identical to
``sosfilt``; on a decaying tail the output differs from ``sosfilt`` by less
than 1e-190, far below -300 dBFS.

Dither
------
:func:`quantize_tpdf` draws its dither from splitmix64 (S. Vigna's
64-bit mixing generator, public domain), whose whole state is one uint64 kept
by the caller, so blocks continue one sequence exactly. Each 64-bit draw is
split into two independent 32-bit uniforms in [-1/2, 1/2) LSB whose sum is
TPDF (Lipshitz, Wannamaker & Vanderkooy, JAES 40(5), 1992).
"""

from __future__ import annotations

import os
import stat
import tempfile
import threading
import types
from collections.abc import Callable

import numpy as np

__all__ = [
    "FLUSH_BELOW",
    "FLUSH_EVERY",
    "filter_unchecked",
    "MAX_UNROLLED_SECTIONS",
    "peak_abs",
    "quantize_tpdf",
    "seed_state",
    "sos_filter",
    "tpdf_dither",
]

#: Frames between two flushes of tiny filter state values.
FLUSH_EVERY = 1024
#: State values with a smaller magnitude are set to zero at each flush.
FLUSH_BELOW = 1e-200
#: Cascades up to this many sections run in one fused loop; longer ones are
#: split into consecutive runs of at most this many sections.
MAX_UNROLLED_SECTIONS = 4

# --------------------------------------------------------------------------
# Lazy, cached compilation
# --------------------------------------------------------------------------

_JIT_OPTIONS = {"nogil": True, "cache": True}
_COMPILE_LOCK = threading.RLock()


def _fallback_cache_dir() -> str:
    """Point numba's cache at a private directory under the temporary folder.

    The fixed name ``dspeq-numba-cache-<uid>`` is reused only if it is a real
    directory owned by this user and writable by nobody else (numba's cache
    holds machine code); otherwise a fresh private directory is made.
    """
    uid = os.getuid() if hasattr(os, "getuid") else None
    path = os.path.join(tempfile.gettempdir(), f"dspeq-numba-cache-{uid or 'user'}")
    try:
        os.makedirs(path, mode=0o700, exist_ok=True)
        info = os.lstat(path)
        trusted = stat.S_ISDIR(info.st_mode) and (
            uid is None or (info.st_uid == uid and not info.st_mode & 0o022)
        )
    except OSError:
        trusted = False
    if not trusted:
        path = tempfile.mkdtemp(prefix="dspeq-numba-cache-")
    from numba.core import config

    os.environ["NUMBA_CACHE_DIR"] = path
    config.reload_config()
    return path


def _jit(py_func: Callable) -> Callable:
    """Compile ``py_func`` with numba, with the cache fallbacks described above."""
    import numba

    try:
        return numba.njit(**_JIT_OPTIONS)(py_func)
    except RuntimeError:  # numba: "cannot cache function ...: no locator available"
        pass
    try:
        _fallback_cache_dir()
        return numba.njit(**_JIT_OPTIONS)(py_func)
    except (RuntimeError, OSError):
        return numba.njit(nogil=True)(py_func)


class _Kernel:
    """A plain Python loop that is compiled with numba on its first call.

    Parameters
    ----------
    py_func : callable
        The loop, in pure Python (also usable as is, slowly).
    helpers : tuple of _Kernel
        Kernels that ``py_func`` calls through a module-level name; the
        compiled version calls their compiled versions instead.
    """

    def __init__(self, py_func: Callable, helpers: tuple[_Kernel, ...] = ()):
        self.py_func = py_func
        self.helpers = helpers
        self._compiled: Callable | None = None

    @property
    def compiled(self) -> Callable:
        """The numba dispatcher (compiling it for each new signature on use)."""
        if self._compiled is None:
            with _COMPILE_LOCK:
                if self._compiled is None:
                    self._compiled = _jit(self._with_compiled_helpers())
        return self._compiled

    def _with_compiled_helpers(self) -> Callable:
        if not self.helpers:
            return self.py_func
        names = dict(self.py_func.__globals__)
        names.update({h.py_func.__name__: h.compiled for h in self.helpers})
        func = self.py_func
        clone = types.FunctionType(func.__code__, names, func.__name__, func.__defaults__)
        clone.__qualname__ = func.__qualname__
        clone.__module__ = func.__module__
        return clone

    def __call__(self, *args):
        return self.compiled(*args)


# --------------------------------------------------------------------------
# SOS filter loops, generated per number of sections and channel layout
# --------------------------------------------------------------------------
#
# Layout "1" and "2": mono and stereo, every state value a local scalar.
# Layout "n": any channel count, one small local array of states per section
# and per delay, the channel loop innermost (numba vectorizes it).


def _coefficient_lines(n_sections: int) -> list[str]:
    lines = []
    for s in range(n_sections):
        lines.append(f"    b0_{s}, b1_{s}, b2_{s} = sos[{s}, 0], sos[{s}, 1], sos[{s}, 2]")
        lines.append(f"    a1_{s}, a2_{s} = sos[{s}, 4], sos[{s}, 5]")
    return lines


def _section_lines(n_sections: int, z0: str, z1: str, indent: str) -> list[str]:
    """One sample through every section, exactly as scipy's ``_sosfilt``.

    ``z0`` and ``z1`` name the two delays of section ``{s}`` (row ``{s2}``
    and ``{s2p1}`` in the array layout).
    """
    lines = []
    for s in range(n_sections):
        d0 = z0.format(s=s, s2=2 * s, s2p1=2 * s + 1)
        d1 = z1.format(s=s, s2=2 * s, s2p1=2 * s + 1)
        lines += [
            f"{indent}w = b0_{s} * v + {d0}",
            f"{indent}{d0} = b1_{s} * v - a1_{s} * w + {d1}",
            f"{indent}{d1} = b2_{s} * v - a2_{s} * w",
            f"{indent}v = w",
        ]
    return lines


def _flush_lines(names: list[str], indent: str) -> list[str]:
    lines = []
    for name in names:
        lines += [f"{indent}if abs({name}) < FLUSH_BELOW:", f"{indent}    {name} = 0.0"]
    return lines


def _scalar_layout_source(name: str, n_sections: int, channels: int) -> str:
    """Loop with every state in a local scalar (``channels`` fixed)."""
    states = [(s, c, k) for s in range(n_sections) for c in range(channels) for k in (0, 1)]
    lines = [f"def {name}(sos, x, y, zi):", *_coefficient_lines(n_sections)]
    lines += [f"    z{k}_{s}_{c} = zi[{s}, {c}, {k}]" for s, c, k in states]
    lines += [
        "    frames = x.shape[0]",
        "    for start in range(0, frames, FLUSH_EVERY):",
        "        for n in range(start, min(start + FLUSH_EVERY, frames)):",
    ]
    for c in range(channels):
        lines.append(f"            v = np.float64(x[n, {c}])")
        lines += _section_lines(n_sections, f"z0_{{s}}_{c}", f"z1_{{s}}_{c}", " " * 12)
        lines.append(f"            y[n, {c}] = v")
    lines += _flush_lines([f"z{k}_{s}_{c}" for s, c, k in states], " " * 8)
    lines += [f"    zi[{s}, {c}, {k}] = z{k}_{s}_{c}" for s, c, k in states]
    # 0 * z is 0 for finite z and NaN otherwise.
    lines.append("    return 0.0 * (" + " + ".join(f"z{k}_{s}_{c}" for s, c, k in states) + ") == 0.0")
    return "\n".join(lines) + "\n"


def _array_layout_source(name: str, n_sections: int) -> str:
    """Loop for any channel count, channel loop innermost.

    State row ``2 * s + k`` of the local array ``z`` holds delay ``k`` of
    section ``s`` for every channel.
    """
    lines = [f"def {name}(sos, x, y, zi):", *_coefficient_lines(n_sections)]
    lines += [
        "    frames, channels = x.shape",
        f"    z = np.empty(({2 * n_sections}, channels))",
        "    for c in range(channels):",
        f"        for r in range({2 * n_sections}):",
        "            z[r, c] = zi[r // 2, c, r % 2]",
        "    for start in range(0, frames, FLUSH_EVERY):",
        "        for n in range(start, min(start + FLUSH_EVERY, frames)):",
        "            for c in range(channels):",
        "                v = np.float64(x[n, c])",
        *_section_lines(n_sections, "z[{s2}, c]", "z[{s2p1}, c]", " " * 16),
        "                y[n, c] = v",
        "        for c in range(channels):",
        f"            for r in range({2 * n_sections}):",
        *_flush_lines(["z[r, c]"], " " * 16),
        "    finite = 0.0",
        "    for c in range(channels):",
        f"        for r in range({2 * n_sections}):",
        "            zi[r // 2, c, r % 2] = z[r, c]",
        "            finite += 0.0 * z[r, c]",
        "    return finite == 0.0",
    ]
    return "\n".join(lines) + "\n"


def _sos_loop_source(n_sections: int, layout: int) -> tuple[str, str]:
    """Name and source of the loop for ``n_sections`` and ``layout`` (1, 2 or 0 = any)."""
    if layout:
        name = f"_sos_loop_{n_sections}s_{layout}ch"
        return name, _scalar_layout_source(name, n_sections, layout)
    name = f"_sos_loop_{n_sections}s_nch"
    return name, _array_layout_source(name, n_sections)


_SOS_LOOPS: dict[tuple[int, int], _Kernel] = {}


def _sos_loop(n_sections: int, layout: int) -> _Kernel:
    """The (lazily compiled) loop for ``n_sections`` sections and a channel layout."""
    key = (n_sections, layout)
    if key in _SOS_LOOPS:
        return _SOS_LOOPS[key]
    with _COMPILE_LOCK:
        if key not in _SOS_LOOPS:
            _SOS_LOOPS[key] = _Kernel(_build_sos_loop(n_sections, layout))
    return _SOS_LOOPS[key]


def _build_sos_loop(n_sections: int, layout: int) -> Callable:
    """Generate and define the pure-Python loop for one cascade length and layout."""
    name, source = _sos_loop_source(n_sections, layout)
    namespace = {"np": np, "FLUSH_EVERY": FLUSH_EVERY, "FLUSH_BELOW": FLUSH_BELOW}
    # Compiled under this file's name so numba's disk cache follows this file.
    exec(compile(source, __file__, "exec"), namespace)  # noqa: S102 - generated here
    func = namespace[name]
    func.__module__ = __name__
    return func


def sos_filter(
    sos: np.ndarray, x: np.ndarray, zi: np.ndarray, out: np.ndarray | None = None
) -> np.ndarray:
    """Filter ``x`` through a cascade of biquads, updating ``zi`` in place.

    The low-level loop behind :class:`dspeq.stream.Equalizer`; it checks
    shapes and dtypes but not the coefficients (see
    :func:`dspeq.stream.validate_sos`).

    Parameters
    ----------
    sos : ndarray of float64, shape (n_sections, 6)
        Second-order sections with ``a0 == 1``, C-contiguous.
    x : ndarray of float32 or float64, shape (frames, channels)
        Input block, C-contiguous.
    zi : ndarray of float64, shape (n_sections, channels, 2)
        Filter state, laid out as :func:`scipy.signal.sosfilt`'s ``zi`` for
        ``x.T`` (filtering along the last axis); overwritten with the final
        state.
    out : ndarray, optional
        Where to write the output: same shape and dtype as ``x``,
        C-contiguous. It may be ``x`` itself.

    Returns
    -------
    ndarray
        The output, of ``x``'s dtype. Computation is in float64 throughout;
        float32 output is the float64 result rounded once.

    Examples
    --------
    >>> import numpy as np
    >>> from scipy.signal import sosfilt
    >>> sos = np.array([[0.5, 0.5, 0.0, 1.0, -0.2, 0.0]])
    >>> x = np.random.default_rng(1).standard_normal((100, 2))
    >>> zi = np.zeros((1, 2, 2))
    >>> y = sos_filter(sos, x, zi)
    >>> bool(np.array_equal(y, sosfilt(sos, x, axis=0)))
    True
    """
    _check_filter_args(sos, x, zi)
    if out is None:
        out = np.empty_like(x)
    elif out.shape != x.shape or out.dtype != x.dtype or not out.flags.c_contiguous:
        raise ValueError(
            f"out must be a C-contiguous {x.dtype} array of shape {x.shape}, "
            f"got {out.dtype} {out.shape}"
        )
    filter_unchecked(sos, x, zi, out)
    return out


def filter_unchecked(sos: np.ndarray, x: np.ndarray, zi: np.ndarray, out: np.ndarray) -> bool:
    """:func:`sos_filter` without argument checks; True if the final state is finite.

    A NaN or infinity anywhere in ``x`` leaves NaN in the state for good, so
    a False return means the block held one (or the filter overflowed).
    """
    n_sections, channels = sos.shape[0], x.shape[1]
    layout = channels if channels <= 2 else 0
    if n_sections <= MAX_UNROLLED_SECTIONS:
        return _sos_loop(n_sections, layout)(sos, x, out, zi)
    finite = True
    source = x
    for first in range(0, n_sections, MAX_UNROLLED_SECTIONS):
        last = min(first + MAX_UNROLLED_SECTIONS, n_sections)
        # Intermediate runs stay in float64 so a split cascade is exact.
        target = out if last == n_sections else _float64_buffer(x, out)
        loop = _sos_loop(last - first, layout)
        finite &= loop(sos[first:last], source, target, zi[first:last])
        source = target
    return finite


def _float64_buffer(x: np.ndarray, out: np.ndarray) -> np.ndarray:
    return out if out.dtype == np.float64 else np.empty(x.shape, np.float64)


def _check_filter_args(sos: np.ndarray, x: np.ndarray, zi: np.ndarray) -> None:
    if sos.dtype != np.float64 or sos.ndim != 2 or sos.shape[1] != 6:
        raise ValueError(f"sos must be float64 of shape (n, 6), got {sos.dtype} {sos.shape}")
    if x.ndim != 2 or x.dtype.char not in "fd" or not x.flags.c_contiguous:
        raise ValueError(
            f"x must be a C-contiguous float32/float64 (frames, channels) array, "
            f"got {x.dtype} {x.shape}"
        )
    expected = (sos.shape[0], x.shape[1], 2)
    if zi.dtype != np.float64 or zi.shape != expected or not zi.flags.c_contiguous:
        raise ValueError(f"zi must be C-contiguous float64 of shape {expected}, got {zi.shape}")


# --------------------------------------------------------------------------
# Dither generator and quantizer
# --------------------------------------------------------------------------

_U64 = np.uint64
_GOLDEN = _U64(0x9E3779B97F4A7C15)
_MIX1 = _U64(0xBF58476D1CE4E5B9)
_MIX2 = _U64(0x94D049BB133111EB)
_SHIFT27, _SHIFT30, _SHIFT31, _SHIFT32 = _U64(27), _U64(30), _U64(31), _U64(32)
_LOW32 = _U64(0xFFFFFFFF)
_TWO_POW_M32 = 2.0**-32


def _tpdf_draw(s):
    """Advance splitmix64 state ``s``; return (new state, TPDF value in LSB).

    The value is the sum of two uniforms in [-1/2, 1/2) made from the high
    and low 32 bits of one 64-bit output. (Pure Python: uint64 arithmetic
    wraps, and numpy may warn about overflow.)
    """
    s = s + _GOLDEN
    z = (s ^ (s >> _SHIFT30)) * _MIX1
    z = (z ^ (z >> _SHIFT27)) * _MIX2
    z = z ^ (z >> _SHIFT31)
    high = np.float64(z >> _SHIFT32) * _TWO_POW_M32 - 0.5
    low = np.float64(z & _LOW32) * _TWO_POW_M32 - 0.5
    return s, high + low


def _tpdf_fill(state, out):
    s = state[0]
    for i in range(out.shape[0]):
        s, out[i] = _tpdf_draw(s)
    state[0] = s


def _quantize_loop(y, scale, bits, state, out):
    """Scale, dither, round, clamp and left-justify; see :func:`quantize_tpdf`."""
    top = np.float64(2 ** (bits - 1))
    hi, lo = top - 1.0, -top
    shift = 32 - bits
    dither = bits < 32
    s = state[0]
    clips = 0
    nans = 0
    peak = 0.0
    for n in range(y.shape[0]):
        for c in range(y.shape[1]):
            v = np.float64(y[n, c]) * scale
            if abs(v) > peak:
                peak = abs(v)
            if dither:
                s, d = _tpdf_draw(s)
                v += d
            q = np.rint(v)
            if q > hi:
                q = hi
                clips += 1
            elif q < lo:
                q = lo
                clips += 1
            elif q != q:
                q = 0.0
                nans += 1
            out[n, c] = np.int32(np.int64(q) << shift)
    state[0] = s
    peak = peak / top
    if nans:
        peak = np.nan
    return clips, peak


_TPDF_DRAW = _Kernel(_tpdf_draw)
_TPDF_FILL = _Kernel(_tpdf_fill, helpers=(_TPDF_DRAW,))
_QUANTIZE = _Kernel(_quantize_loop, helpers=(_TPDF_DRAW,))
_BITS = (8, 16, 24, 32)


def seed_state(seed: int) -> np.ndarray:
    """Make a dither generator state from an integer seed.

    Parameters
    ----------
    seed : int
        Any integer; it is taken modulo 2**64.

    Returns
    -------
    ndarray of uint64, shape (1,)
        Pass it to :func:`quantize_tpdf` (or :func:`tpdf_dither`) block after
        block; it is advanced in place.
    """
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer):
        raise TypeError(f"seed must be an integer, got {seed!r}")
    return np.array([int(seed) % 2**64], dtype=np.uint64)


def _check_state(state: np.ndarray) -> None:
    if not (isinstance(state, np.ndarray) and state.dtype == np.uint64 and state.shape == (1,)):
        raise ValueError(f"state must be a uint64 array of shape (1,) from seed_state, got {state!r}")


def tpdf_dither(n: int, state: np.ndarray) -> np.ndarray:
    """Draw ``n`` TPDF dither values (in LSB, within (-1, 1)) and advance ``state``.

    The same sequence :func:`quantize_tpdf` adds, sample by sample in
    frame-major order.
    """
    _check_state(state)
    out = np.empty(int(n), dtype=np.float64)
    _TPDF_FILL(state, out)
    return out


def quantize_tpdf(
    y: np.ndarray, gain: float, bits: int, state: np.ndarray, out: np.ndarray
) -> tuple[int, float]:
    """Quantize float audio to left-justified integers with TPDF dither.

    Each sample ``v = y * gain * 2**(bits - 1)`` gets TPDF dither (two
    independent uniform values in [-1/2, 1/2) LSB summed), is rounded to the
    nearest integer (ties to even), clamped to ``[-2**(bits-1), 2**(bits-1) - 1]``
    and stored as ``q << (32 - bits)``, the left-justified int32 form that
    libsndfile (and soundfile) expect for 8/16/24-bit PCM given int32 data.

    For ``bits=32`` no dither is added: it would be 2**-31 of full scale,
    far below the noise of any analog transfer, and a float64 input carries
    only 53 bits anyway.

    Parameters
    ----------
    y : ndarray of float32 or float64, shape (frames, channels)
        Audio with full scale at +-1.0.
    gain : float
        Linear gain applied before quantization.
    bits : {8, 16, 24, 32}
        Target word length.
    state : ndarray of uint64, shape (1,)
        Dither generator state from :func:`seed_state`; advanced in place so
        consecutive blocks continue one sequence (one draw per sample, in
        frame-major order).
    out : ndarray of int32, shape (frames, channels)
        Receives the quantized samples.

    Returns
    -------
    clips : int
        Number of samples that had to be clamped.
    peak : float
        Largest ``abs(y * gain)`` before dither, in full-scale units; NaN if
        ``y`` holds NaN (those samples are written as 0).

    Examples
    --------
    >>> import numpy as np
    >>> y = np.array([[0.5, -0.25], [1.5, 0.0]])
    >>> out = np.empty(y.shape, np.int32)
    >>> quantize_tpdf(y, 1.0, 16, seed_state(7), out)
    (1, 1.5)
    >>> out[1, 0] == 32767 << 16  # clamped, left-justified
    np.True_
    """
    if bits not in _BITS:
        raise ValueError(f"bits must be one of {_BITS}, got {bits!r}")
    _check_state(state)
    if y.ndim != 2 or y.dtype not in (np.float32, np.float64):
        raise ValueError(f"y must be a float32/float64 (frames, channels) array, got {y.dtype}")
    if out.dtype != np.int32 or out.shape != y.shape:
        raise ValueError(f"out must be int32 of shape {y.shape}, got {out.dtype} {out.shape}")
    scale = float(gain) * 2.0 ** (bits - 1)
    clips, peak = _QUANTIZE(y, scale, int(bits), state, out)
    return int(clips), float(peak)


# --------------------------------------------------------------------------
# Peak
# --------------------------------------------------------------------------


def _peak_loop(x):
    """Largest magnitude of a 1-D array (NaN if any), four lanes at a time."""
    m = np.zeros(4)
    n = x.shape[0]
    stop = n - n % 4
    for i in range(0, stop, 4):
        for lane in range(4):
            m[lane] = _sticky_max(m[lane], abs(np.float64(x[i + lane])))
    for i in range(stop, n):
        m[0] = _sticky_max(m[0], abs(np.float64(x[i])))
    return _sticky_max(_sticky_max(m[0], m[1]), _sticky_max(m[2], m[3]))


def _sticky_max(m, a):
    """``max(m, a)`` that, once given a NaN, keeps returning NaN."""
    return a if (a > m or a != a) else m


_STICKY_MAX = _Kernel(_sticky_max)


_PEAK = _Kernel(_peak_loop, helpers=(_STICKY_MAX,))


def peak_abs(x: np.ndarray) -> float:
    """Largest absolute value of a float array (0.0 if empty, NaN if any NaN).

    Parameters
    ----------
    x : ndarray of float32 or float64
        Any shape; a non-contiguous array is copied first.

    Returns
    -------
    float
    """
    x = np.asarray(x)
    if x.dtype not in (np.float32, np.float64):
        raise ValueError(f"peak_abs needs float32 or float64, got {x.dtype}")
    if x.size == 0:
        return 0.0
    return float(_PEAK(x.ravel(order="K")))
