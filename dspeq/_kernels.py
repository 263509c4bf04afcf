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

Speed
-----
The recursion is a dependency chain: each sample of a section needs the
previous one through a multiply and three additions, about 13 cycles on
current x86 cores, whatever the code around it. A single channel therefore
runs at that latency (about 2x :func:`scipy.signal.sosfilt`, whose C loop
adds its own overhead to the same chain; "Fast path" below trades
bit-identity for a way around it). Independent channels are where
the speed comes from: the generated loops hold every coefficient and state
in local variables and process up to :data:`GROUP_LANES` channels in the
same iteration, so their chains overlap, and they are compiled with LLVM's
SLP vectorizer on, which packs the channels of a group into SIMD registers
(lane-wise IEEE operations, so the results are unchanged). The one-channel
loop is compiled without it: there the vectorizer packs the statements of
different sections into one register, which chains the sections'
recursions together (measured: twice the time of the scalar loop). Indices are
unsigned so that no negative-index wraparound code sits in the loop. Frames
are processed in chunks of :data:`FLUSH_EVERY`, every group of a chunk
before the next chunk, which keeps the data in the L1/L2 cache for any
channel count. Every frame (or step of the fast loop) asks for the cache
lines :data:`PREFETCH_AHEAD` samples ahead in its input and output
(``llvm.prefetch``; a no-op in the pure-Python loops): the hardware
prefetcher alone left the loops waiting for memory on blocks out of the
cache on some machines.

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

The SOS loops are generated from a template (one per number of sections,
output stage and rounding); their code objects carry this file's name and
a name that spells out every generation parameter, so numba's cache keys
them to this file's content and discards them whenever it changes.

Denormal numbers
----------------
A recursive filter whose input falls to digital silence decays toward zero
and can get stuck at subnormal values, which many x86 processors handle
about 50x slower. Every :data:`FLUSH_EVERY` frames the loops set state
values whose magnitude is below :data:`FLUSH_BELOW` (1e-200, i.e.
-4000 dBFS) to exactly zero. Between flushes the recursion is untouched, so
on ordinary audio (whose states never come near 1e-200) the output stays
bit-identical to ``sosfilt``; on a decaying tail the output differs from
``sosfilt`` by less than 1e-190, far below -300 dBFS.

Fast path
---------
For one or two channels the exact loop cannot go faster than the chain,
so :func:`filter_unchecked` given :func:`fast_tables` runs another loop
(``Equalizer(..., exact=False)``): it takes :data:`FAST_STEP` frames at a
time and computes their outputs, and the state after them, straight from
the state before them with small matrices (the cascade's response to a
unit state and to an impulse at each frame of the step). The outputs of a
step do not depend on each other, so they fill a SIMD register; the only
loop-carried work is the state update, once per step. It is not
bit-identical to sosfilt: the same sums are rounded in another order, with
each product fused into its running sum (:func:`_fma`, IEEE 754's
fusedMultiplyAdd: one rounding instead of two, the same result on every
machine, slower but still exact where a CPU has no FMA instruction). The
exact loops have no fused operations (numba contracts nothing without
fastmath). The tables are computed in extended precision and held in
coordinates that stay well conditioned for poles near z = 1 (see
:func:`fast_tables`); with them the error against the recursion in
extended precision is smaller than sosfilt's own
(tests/test_fastpath.py). The state is flushed (see "Denormal numbers")
every FLUSH_EVERY frames. Mono on :data:`NARROW_FP_CPUS` runs a variant
with fewer operations (:func:`decoupled_tables`): substeps of four frames,
the state in coordinates where each section evolves on its own and is its
share of the first two outputs, so those outputs are sums and the state
update is a 2 x 2 block per section. Eight and more channels already fill the SIMD
lanes of the exact loops, so the fast loop serves mono and stereo only
(:data:`FAST_CHANNELS`), and stereo only where it pays: on a CPU whose
floating-point units are 128 bits wide (:data:`NARROW_FP_CPUS`) the exact
stereo loop measured faster, and stereo keeps it there
(:func:`fast_channels`).

Dither
------
TPDF dither (Lipshitz, Wannamaker & Vanderkooy, JAES 40(5), 1992) is the
sum of two independent uniform values. Here it is a pure function of the
sample's index ``k`` in the file (frame-major: ``k = frame * channels +
channel``) and a 64-bit seed, so blocks of any size, channel groups and
SIMD lanes all draw the same values, and the loop vectorizes:

* ``e = k >> 32``; ``z = splitmix64(seed + (e + 1) * 0x9E3779B97F4A7C15)``
  (S. Vigna's 64-bit mixer, public domain); ``a`` and ``b`` are the low and
  high 32 bits of ``z`` (a fresh key every 2**32 samples);
* ``x = (k + a) mod 2**32`` goes through C. Wellons' "lowbias32" integer
  hash (public domain; nullprogram.com, 2018) with ``b`` mixed in after
  the first multiplication::

      x ^= x >> 16; x *= 0x7FEB352D; x ^= b; x ^= x >> 15; x *= 0x846CA68B; x ^= x >> 16

* the two 16-bit halves ``u1, u2`` of ``x`` are the uniforms:
  ``d = (u1 + u2 - 65535) / 65536`` LSB, a triangular density on
  (-1, 1) LSB in steps of 2**-16 LSB, exactly zero-mean.

A 32-bit hash vectorizes with 32-bit SIMD multiplies, where a 64-bit
generator per sample cost more than the whole filter.
"""

from __future__ import annotations

import math
import os
import stat
import struct
import tempfile
import threading
import types
from collections.abc import Callable
from typing import Any, NamedTuple

import numpy as np

__all__ = [
    "FLUSH_BELOW",
    "FLUSH_EVERY",
    "GROUP_LANES",
    "MAX_UNROLLED_SECTIONS",
    "PCM_BITS",
    "PREFETCH_AHEAD",
    "QUANTIZE_PIECE",
    "channel_passes",
    "check_state",
    "filter_quantize_unchecked",
    "FAST_CHANNELS",
    "FAST_STEP",
    "FAST_TABLE_FLOOR",
    "DECOUPLED_MAX_CONDITION",
    "DECOUPLED_SUBSTEP",
    "FastTables",
    "decoupled_mono",
    "decoupled_tables",
    "step_tables",
    "to_loop_state",
    "from_loop_state",
    "NARROW_FP_CPUS",
    "fast_channels",
    "fast_tables",
    "filter_runner",
    "filter_unchecked",
    "from_u_state",
    "pcm_bytes",
    "pcm_runner",
    "peak_abs",
    "quantize_tpdf",
    "seed_state",
    "sos_filter",
    "to_u_state",
    "tpdf_dither",
    "uses_fast_loop",
]

#: Frames between two flushes of tiny filter state values (also the chunk
#: length of the loops).
FLUSH_EVERY = 1024
#: State values with a smaller magnitude are set to zero at each flush.
FLUSH_BELOW = 1e-200
#: Cascades up to this many sections run in one fused loop; longer ones are
#: split into consecutive runs of at most this many sections.
MAX_UNROLLED_SECTIONS = 4
#: Channel group widths of the generated loops (see :func:`channel_passes`).
GROUP_LANES = (8, 4, 2, 1)
#: How far ahead (in samples of the block) the loops ask for the cache lines
#: of their input and output, once per frame (exact loops) or per 8 samples
#: (fast loop). Without it, out of the cache they waited for memory: on an
#: Intel Xeon (KVM), 60 s at 96 kHz in blocks of 65536, fast mono float64 2.7
#: -> 1.6 ns/sample, fast stereo float32 1.9 -> 1.2, exact stereo float64 2.7
#: -> 1.8, exact 8 channels float32 1.2 -> 1.0; no change in the cache, nor
#: from 512 to 2048 samples ahead.
PREFETCH_AHEAD = 512

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


def _with_slp_vectorizer(dispatcher) -> None:
    """Make ``dispatcher`` compile its signatures with LLVM's SLP vectorizer on.

    numba reads ``config.SLP_VECTORIZE`` (environment ``NUMBA_SLP_VECTORIZE``,
    off by default) when it builds the optimization passes of a compilation.
    It is switched on only while this dispatcher compiles, under numba's
    global compiler lock, so other numba code in the process is unaffected.
    The vectorizer packs identical scalar operations of neighbouring
    channels into SIMD instructions; it does not reorder floating-point
    arithmetic, so results are bit-for-bit those of the scalar code.
    """
    from numba.core import config
    from numba.core.compiler_lock import global_compiler_lock

    plain = dispatcher.compile

    def compile_vectorized(sig):
        with global_compiler_lock:
            before = getattr(config, "SLP_VECTORIZE", 0)
            config.SLP_VECTORIZE = 1
            try:
                return plain(sig)
            finally:
                config.SLP_VECTORIZE = before

    dispatcher.compile = compile_vectorized


class _Kernel:
    """A plain Python loop that is compiled with numba on its first call.

    Parameters
    ----------
    py_func : callable
        The loop, in pure Python (also usable as is, slowly).
    helpers : tuple of _Kernel
        Kernels that ``py_func`` calls through a module-level name; the
        compiled version calls their compiled versions instead.
    slp : bool
        Compile with the SLP vectorizer (see :func:`_with_slp_vectorizer`).
    """

    def __init__(self, py_func: Callable, helpers: tuple[_Kernel, ...] = (), slp: bool = False):
        self.py_func = py_func
        self.helpers = helpers
        self.slp = slp
        self._compiled: Callable | None = None

    @property
    def compiled(self) -> Callable:
        """The numba dispatcher (compiling it for each new signature on use)."""
        if self._compiled is None:
            with _COMPILE_LOCK:
                if self._compiled is None:
                    dispatcher = _jit(self._with_compiled_helpers())
                    if self.slp:
                        _with_slp_vectorizer(dispatcher)
                    self._compiled = dispatcher
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


def _prefetch(a, i):
    """Hint that ``a[i]`` will be read soon: nothing in pure Python, ``llvm.prefetch`` compiled."""


def _prefetch_write(a, i):
    """Hint that ``a[i]`` will be written soon: nothing in pure Python, ``llvm.prefetch`` compiled."""


def _fma(a, b, c):
    """``a * b + c`` rounded once, as IEEE 754's fusedMultiplyAdd (``llvm.fma`` compiled).

    The pure-Python version computes the exact value with fractions and
    rounds it once (int / int true division is correctly rounded); Python
    3.11 has no ``math.fma``.
    """
    if not (math.isfinite(a) and math.isfinite(b)):
        return a * b + c
    if not math.isfinite(c):  # the exact product is finite even where a * b overflows
        return c
    from fractions import Fraction

    exact = Fraction(a) * Fraction(b) + Fraction(c)
    if exact == 0:  # then a * b == -c exactly: the float sum has IEEE's sign of zero
        return a * b + c
    try:
        return float(exact)
    except OverflowError:
        return math.inf if exact > 0 else -math.inf


def _emit_prefetch(builder, data, index, write: bool) -> None:
    """Emit ``llvm.prefetch`` of ``data[index]`` (a pointer and an index value), kept in all cache levels."""
    from llvmlite import ir

    byte_ptr, i32 = ir.IntType(8).as_pointer(), ir.IntType(32)
    fnty = ir.FunctionType(ir.VoidType(), [byte_ptr, i32, i32, i32])
    fn = builder.module.declare_intrinsic("llvm.prefetch", [byte_ptr], fnty)
    address = builder.bitcast(builder.gep(data, [index]), byte_ptr)
    builder.call(fn, [address, i32(int(write)), i32(3), i32(1)])


def _prefetch_intrinsic(write: bool):
    """The numba intrinsic ``(array, index) -> None`` behind :func:`_prefetch` and :func:`_prefetch_write`.

    It only computes the address of ``a[i]`` (no bounds check: a prefetch
    past the end of the array does not fault) and asks for its cache line,
    for reading or writing, to be kept in all cache levels.
    """
    from numba import types as nbtypes
    from numba.extending import intrinsic

    @intrinsic
    def prefetch(typingctx, a, i):
        def codegen(context, builder, signature, args):
            data = context.make_array(signature.args[0])(context, builder, args[0]).data
            _emit_prefetch(builder, data, args[1], write)
            return context.get_dummy_value()
        return nbtypes.void(a, i), codegen
    return prefetch


def _fma_intrinsic():
    """The numba intrinsic behind :func:`_fma`: ``llvm.fma.f64`` (one instruction where the CPU has FMA)."""
    from llvmlite import ir
    from numba import types as nbtypes
    from numba.extending import intrinsic

    @intrinsic
    def fma(typingctx, a, b, c):
        def codegen(context, builder, signature, args):
            d = ir.DoubleType()
            fn = builder.module.declare_intrinsic("llvm.fma", [d], ir.FunctionType(d, [d, d, d]))
            return builder.call(fn, args)
        return nbtypes.float64(nbtypes.float64, nbtypes.float64, nbtypes.float64), codegen
    return fma


def _lrint_shl(x, shift):
    """``int32(rint(x)) << shift`` for ``x`` within int32 (``llvm.lrint`` compiled: one conversion).

    Rounds in the current rounding mode, as ``np.rint`` (ties to even by
    default). Where ``x`` is NaN or outside int32 the result is unspecified
    (0 here); callers overwrite it.
    """
    if not -2.0**31 <= x < 2.0**31:
        return np.int32(0)
    return np.int32(np.int32(np.rint(x)) << np.int32(shift))


def _lrint_shl_intrinsic():
    """The numba intrinsic behind :func:`_lrint_shl`: ``llvm.lrint.i32.f64``, then ``shl``.

    Vectorized, the two become one rounding conversion and one integer
    shift (``vcvtpd2dq``, ``vpslld`` on x86) where ``np.rint``, a clamp and
    a truncating conversion took five instructions.
    """
    from llvmlite import ir
    from numba import types as nbtypes
    from numba.core import cgutils
    from numba.extending import intrinsic

    @intrinsic
    def lrint_shl(typingctx, x, shift):
        def codegen(context, builder, signature, args):
            i32 = ir.IntType(32)
            fn = cgutils.get_or_insert_function(builder.module, ir.FunctionType(i32, [ir.DoubleType()]),
                                                "llvm.lrint.i32.f64")
            amount = context.cast(builder, args[1], signature.args[1], nbtypes.int32)
            return builder.shl(builder.call(fn, [args[0]]), amount)
        return nbtypes.int32(nbtypes.float64, shift), codegen
    return lrint_shl


class _Intrinsic:
    """An LLVM intrinsic with :class:`_Kernel`'s interface for generated loops.

    ``py_func`` runs in the pure-Python loops, ``compiled`` (made on first
    use by ``make``, which imports numba) in the compiled ones.
    """

    def __init__(self, py_func: Callable, make: Callable[[], Callable]):
        self.py_func = py_func
        self._make = make
        self._compiled = None

    @property
    def compiled(self):
        if self._compiled is None:
            self._compiled = self._make()
        return self._compiled


_PREFETCH = _Intrinsic(_prefetch, lambda: _prefetch_intrinsic(write=False))
_PREFETCH_WRITE = _Intrinsic(_prefetch_write, lambda: _prefetch_intrinsic(write=True))
_FMA = _Intrinsic(_fma, _fma_intrinsic)
_LRINT_SHL = _Intrinsic(_lrint_shl, _lrint_shl_intrinsic)


# --------------------------------------------------------------------------
# Dither: counter-based TPDF (see the module docstring)
# --------------------------------------------------------------------------

_U64, _U32 = np.uint64, np.uint32
_GOLDEN = _U64(0x9E3779B97F4A7C15)
_MIX1 = _U64(0xBF58476D1CE4E5B9)
_MIX2 = _U64(0x94D049BB133111EB)
_SHIFT27, _SHIFT30, _SHIFT31, _SHIFT32 = _U64(27), _U64(30), _U64(31), _U64(32)
_ONE64 = _U64(1)
_LOW32 = _U64(0xFFFFFFFF)
_EPOCH = 2**32
# lowbias32 (C. Wellons, hash-prospector, public domain).
_HASH1, _HASH2 = _U32(0x7FEB352D), _U32(0x846CA68B)
_S15, _S16 = _U32(15), _U32(16)
_LOW16 = _U32(0xFFFF)
_STEP = 2.0**-16
_HALF_SPAN_LSB = 65535 * _STEP
_TPDF_CENTRE = _U32(65535)
#: Samples per piece of :func:`_quantize_run`: the dither sums of a piece
#: are made in a loop of their own, then the piece is quantized.
QUANTIZE_PIECE = 1024


def _epoch_keys(seed, epoch):
    """The two 32-bit keys (a, b) of the dither for samples ``epoch * 2**32 ...``.

    One splitmix64 output (pure Python: uint64 arithmetic wraps, numpy may
    warn about overflow).
    """
    z = seed + (epoch + _ONE64) * _GOLDEN
    z = (z ^ (z >> _SHIFT30)) * _MIX1
    z = (z ^ (z >> _SHIFT27)) * _MIX2
    z = z ^ (z >> _SHIFT31)
    return _U32(z & _LOW32), _U32(z >> _SHIFT32)


def _tpdf_sum(x, b):
    """``u1 + u2`` (0 .. 131070, uint32) from the keyed counter ``x`` (uint32) and key ``b``."""
    x = _U32(x ^ _U32(x >> _S16))
    x = _U32(x * _HASH1)
    x = _U32(x ^ b)
    x = _U32(x ^ _U32(x >> _S15))
    x = _U32(x * _HASH2)
    x = _U32(x ^ _U32(x >> _S16))
    return _U32(_U32(x >> _S16) + _U32(x & _LOW16))


def _tpdf_value(s):
    """TPDF value in LSB of the sum ``s`` of :func:`_tpdf_sum`: ``(s - 65535) / 65536``.

    Computed as ``s * 2**-16 - 65535 * 2**-16``: both terms and their
    difference are exact in float64, and the uint32 converts straight to
    float64 (no widening to int64 first).
    """
    return np.float64(s) * _STEP - _HALF_SPAN_LSB


def _tpdf_at(x, b):
    """TPDF value in LSB from the keyed counter ``x`` (uint32) and key ``b``."""
    return _tpdf_value(_tpdf_sum(x, b))


def _span_split(seed, k, n):
    """Split samples ``k .. k+n-1`` where the dither key changes (every 2**32 samples).

    Returns (m, c0, b0, c1, b1): the first ``m`` samples use counter offset
    ``c0`` (low 32 bits of ``k`` plus key ``a``) and key ``b0``, the rest
    ``c1``, ``b1`` (counted from sample ``k + m``).
    """
    epoch = k >> _SHIFT32
    a0, b0 = _epoch_keys(seed, epoch)
    a1, b1 = _epoch_keys(seed, epoch + _ONE64)
    m = min(n, np.int64(_EPOCH) - np.int64(k & _LOW32))
    return m, _U32(_U32(k & _LOW32) + a0), b0, a1, b1


def _tpdf_fill(seed, k, out):
    """``out[j]`` = dither of sample ``k + j``."""
    m, c0, b0, c1, b1 = _span_split(seed, k, out.shape[0])
    _tpdf_run(c0, b0, out[:m])
    _tpdf_run(c1, b1, out[m:])


def _tpdf_run(c, b, out):
    for j in range(out.shape[0]):
        out[j] = _tpdf_at(_U32(_U32(j) + c), b)


def _quantize_span(v, scale, lo, hi, lsb, dither, seed, k, out, sums):
    """Quantize ``v * scale`` (+ dither of samples ``k ...``) into ``out``; see quantize_tpdf.

    Returns (clipped samples, NaN samples).
    """
    m, c0, b0, c1, b1 = _span_split(seed, k, v.shape[0])
    clips0, nans0 = _quantize_run(v[:m], scale, lo, hi, lsb, dither, c0, b0, out[:m], sums)
    clips1, nans1 = _quantize_run(v[m:], scale, lo, hi, lsb, dither, c1, b1, out[m:], sums)
    return clips0 + clips1, nans0 + nans1


def _tpdf_offsets(c, b, s):
    """``s[j]`` = :func:`_tpdf_sum` of counter ``c + j`` minus 65535 (int32): integer work only.

    The dither of that sample in units of 2**-16 LSB, signed, so that it
    converts to float64 in one instruction (uint32 has none before AVX-512).
    """
    for j in range(s.shape[0]):
        s[j] = np.int32(_U32(_tpdf_sum(_U32(_U32(j) + c), b) - _TPDF_CENTRE))


def _quantize_run(v, scale, lo, hi, lsb, dither, c, b, out, sums):
    """The quantizer for one dither key (counter ``c`` for ``v[0]``), piece by piece.

    Each piece of :data:`QUANTIZE_PIECE` samples first gets its dither in a
    loop of its own (:func:`_tpdf_offsets`: integer work only, so LLVM
    vectorizes it twice as wide as the float64 loop) into ``sums`` (int32,
    at least QUANTIZE_PIECE long: the caller's, so that no piece
    allocates). Then :func:`_quantize_inside` quantizes the piece on the
    assumption that nothing clips and nothing is NaN, and counts the
    samples for which that does not hold; only a piece with such samples
    goes again through :func:`_quantize_exact`, which clamps, counts clips
    and writes NaN as 0. Both compute the same value before rounding, so a
    piece comes out the same either way.

    Returns (clipped samples, NaN samples).
    """
    n = v.shape[0]
    clips = 0
    nans = 0
    shift = math.frexp(lsb)[1] - 1
    step = _STEP * dither
    for i in range(0, n, QUANTIZE_PIECE):
        m = min(QUANTIZE_PIECE, n - i)
        _tpdf_offsets(_U32(c + _U32(i)), b, sums[:m])
        if _quantize_inside(v[i:i + m], scale, lo, hi, shift, step, sums, out[i:i + m]):
            piece_clips, piece_nans = _quantize_exact(v[i:i + m], scale, lo, hi, lsb, step, sums,
                                                      out[i:i + m])
            clips += piece_clips
            nans += piece_nans
    return clips, nans


def _quantize_inside(v, scale, lo, hi, shift, step, s, out):
    """Quantize ``v`` with the dither ``s`` where every value lies in ``[lo, hi]``; count those that do not.

    ``x = v * scale + s * step`` rounds with :func:`_lrint_shl` (one
    conversion in the current rounding mode, as ``np.rint``), which for
    ``x`` in ``[lo, hi]`` (integers) gives a value in ``[lo, hi]`` in any
    rounding mode, so no clamp is needed. The count (NaN is outside) is
    how many samples must go through :func:`_quantize_exact` instead; what
    this loop wrote for them is then overwritten.
    """
    inside = 0
    for j in range(v.shape[0]):
        x = np.float64(v[j]) * scale + np.float64(s[j]) * step
        inside += (x >= lo) & (x <= hi)
        out[j] = _lrint_shl(x, shift)
    return v.shape[0] - inside


def _quantize_exact(v, scale, lo, hi, lsb, step, s, out):
    """Quantize ``v`` with the dither ``s``: rounded, clamped, NaN written as 0; branch-free.

    Returns (clipped samples, NaN samples).
    """
    clips = 0
    nans = 0
    for j in range(v.shape[0]):
        r = np.rint(np.float64(v[j]) * scale + np.float64(s[j]) * step)
        nan = r != r
        q = min(max(r, lo), hi)
        clips += (q != r) & (r == r)
        nans += nan
        out[j] = np.int32(0.0 if nan else q * lsb)
    return clips, nans


_EPOCH_KEYS = _Kernel(_epoch_keys)
_TPDF_SUM = _Kernel(_tpdf_sum)
_TPDF_VALUE = _Kernel(_tpdf_value)
_TPDF_AT = _Kernel(_tpdf_at, helpers=(_TPDF_SUM, _TPDF_VALUE))
_TPDF_OFFSETS = _Kernel(_tpdf_offsets, helpers=(_TPDF_SUM,))
_QUANTIZE_INSIDE = _Kernel(_quantize_inside, helpers=(_LRINT_SHL,))
_QUANTIZE_EXACT = _Kernel(_quantize_exact)
_SPAN_SPLIT = _Kernel(_span_split, helpers=(_EPOCH_KEYS,))
_TPDF_RUN = _Kernel(_tpdf_run, helpers=(_TPDF_AT,))
_TPDF_FILL = _Kernel(_tpdf_fill, helpers=(_SPAN_SPLIT, _TPDF_RUN))
_QUANTIZE_RUN = _Kernel(_quantize_run, helpers=(_TPDF_OFFSETS, _QUANTIZE_INSIDE, _QUANTIZE_EXACT))
_QUANTIZE = _Kernel(_quantize_span, helpers=(_SPAN_SPLIT, _QUANTIZE_RUN))
#: Word lengths the quantizer writes.
PCM_BITS = (8, 16, 24, 32)


def _pcm_params(gain: float, bits: int) -> np.ndarray:
    """[scale, lo, hi, lsb, dither] of the quantizer for ``bits``-bit output."""
    if bits not in PCM_BITS:
        raise ValueError(f"bits must be one of {PCM_BITS}, got {bits!r}")
    top = 2.0 ** (bits - 1)
    return np.array([float(gain) * top, -top, top - 1.0, 2.0 ** (32 - bits),
                     1.0 if bits < 32 else 0.0])


# --------------------------------------------------------------------------
# SOS filter loops, generated per number of sections, lanes and output stage
# --------------------------------------------------------------------------
#
# One loop per (sections, lanes, stage, rounding) serves the channels
# [c0, c1) in groups of ``lanes``: frames in chunks of FLUSH_EVERY, in each
# chunk every group in turn, the states and coefficients of a group in
# local scalars. Stage "float" stores the output in ``out`` (float32 or
# float64); stage "pcm" (one pass over all channels) stores each chunk's
# output in a small buffer and, while it is still in the cache, runs
# _quantize_run over it into ``out`` (int32). (Quantizing each sample
# inside the recursion's loop, where its work might fill the cycles the
# recursion leaves idle, measured slower: 3.2 against 3.0 ns per stereo
# sample on AMD Zen 4, where _quantize_run's vectorized loop costs about
# 0.75.) Both track the largest |output| per lane.


def _lanes_state(zi, c0, c1):
    """The states of channels [c0, c1) of ``zi`` as ``zl[2 * s + k, c]`` (lanes side by side).

    The loops keep the states in this layout between chunks: with the
    ``zi`` layout (channels two values apart) the SLP vectorizer packed no
    statements of a two-lane loop (measured: 1.92 against 1.69 ns/sample).
    """
    zl = np.empty((2 * zi.shape[0], zi.shape[1]))
    for s in range(zi.shape[0]):
        for k in range(2):
            for c in range(c0, c1):
                zl[2 * s + k, c] = zi[s, c, k]
    return zl


def _store_state(zl, zi, c0, c1):
    """Write the states of channels [c0, c1) back from ``zl`` (see _lanes_state) into ``zi``."""
    for s in range(zi.shape[0]):
        for k in range(2):
            for c in range(c0, c1):
                zi[s, c, k] = zl[2 * s + k, c]


def _coefficient_lines(n_sections: int) -> list[str]:
    lines = []
    for s in range(n_sections):
        lines.append(f"    b0_{s}, b1_{s}, b2_{s} = sos[{s}, 0], sos[{s}, 1], sos[{s}, 2]")
        lines.append(f"    a1_{s}, a2_{s} = sos[{s}, 4], sos[{s}, 5]")
    return lines


def _section_lines(n_sections: int, lanes: int, indent: str) -> list[str]:
    """One frame through every section, exactly as scipy's ``_sosfilt``.

    The same statement for every lane follows each other (what the SLP
    vectorizer packs); ``v{c}`` carries lane ``c`` from section to section.
    """
    lines = []
    for s in range(n_sections):
        for template in (
            "w{c} = b0_{s} * v{c} + z0_{s}_{c}",
            "z0_{s}_{c} = b1_{s} * v{c} - a1_{s} * w{c} + z1_{s}_{c}",
            "z1_{s}_{c} = b2_{s} * v{c} - a2_{s} * w{c}",
            "v{c} = w{c}",
        ):
            lines += [indent + template.format(s=s, c=c) for c in range(lanes)]
    return lines


def _group_lines(n_sections: int, lanes: int, stage: str, round32: bool) -> list[str]:
    """One chunk of frames for each group of ``lanes`` channels in [c0, c1)."""
    states = [(s, c, k) for s in range(n_sections) for c in range(lanes) for k in (0, 1)]
    lines = [f"        while g + {lanes} <= c1:"]
    lines += [f"            z{k}_{s}_{c} = zl[{2 * s + k}, g + U{c}]" for s, c, k in states]
    lines += ["            i = np.uint64(start * channels + g)", "            for _ in range(nb):"]
    ind = " " * 16
    lines += [f"{ind}_prefetch(xf, i + np.uint64(PREFETCH_AHEAD))",
              f"{ind}_prefetch_write(of, i + np.uint64(PREFETCH_AHEAD))"]
    lines += [f"{ind}v{c} = np.float64(xf[i + U{c}])" for c in range(lanes)]
    lines += _section_lines(n_sections, lanes, ind)
    # A select, not max(): numba's max() handles NaN with extra branches.
    lines += [f"{ind}a{c} = abs(v{c})" for c in range(lanes)]
    lines += [f"{ind}pk{c} = a{c} if a{c} > pk{c} else pk{c}" for c in range(lanes)]
    if stage == "float":
        lines += [f"{ind}of[i + U{c}] = v{c}" for c in range(lanes)]
    else:  # the chunk's filter output, as the "float" stage would store it, for _quantize_run
        value = "np.float64(np.float32(v{c}))" if round32 else "v{c}"
        lines += [f"{ind}bf[i - base + U{c}] = " + value.format(c=c) for c in range(lanes)]
    lines.append(f"{ind}i += uch")
    lines += [f"            zl[{2 * s + k}, g + U{c}] = z{k}_{s}_{c}" for s, c, k in states]
    # The flush works on the stored states (a loop compiles faster than one
    # statement per state); the next chunk loads them again.
    lines += ["            for r in range(zl.shape[0]):",
              f"                for c in range(g, g + {lanes}):",
              "                    if abs(zl[r, c]) < FLUSH_BELOW:",
              "                        zl[r, c] = 0.0",
              f"            g += {lanes}"]
    return lines


def channel_passes(channels: int) -> tuple[tuple[int, int, int], ...]:
    """How the loops cover ``channels`` channels: (lanes, first, stop) per pass.

    Mono and stereo are one pass; otherwise groups of 8, then a group of 4,
    a pair and a single channel for what is left: 8 -> (8, 0, 8);
    12 -> (8, 0, 8), (4, 8, 12); 7 -> (4, 0, 4), (2, 4, 6), (1, 6, 7).
    Eight lanes (two 256-bit registers) hide the recursion's latency better
    than four (measured: about 15 % faster for 8 channels).
    """
    if channels in (1, 2):
        return ((channels, 0, channels),)
    passes, first = [], 0
    for lanes in GROUP_LANES:
        stop = first + (channels - first) // lanes * lanes
        if stop > first:
            passes.append((lanes, first, stop))
            first = stop
    return tuple(passes)


def _sos_loop_name(n_sections: int, lanes: int, stage: str, round32: bool) -> str:
    return f"_sos_loop_{n_sections}s_{lanes}lanes_{stage}{'_r32' if round32 else ''}"


def _sos_loop_source(n_sections: int, lanes: int, stage: str, round32: bool = False) -> str:
    """Source of ``_sos_loop_name(...)(sos, x, out, zi, c0, c1, pcm, keys)``.

    Returns ``(finite, peak, clips)``: whether the final states of channels
    [c0, c1) are finite, their largest |output| (before rounding to float32
    and before the gain), and for stage "pcm" the number of clipped samples.
    ``pcm`` is :func:`_pcm_params`'s array, ``keys`` the block's dither keys
    from :func:`_block_keys` (both unused by stage "float").
    """
    lines = [f"def {_sos_loop_name(n_sections, lanes, stage, round32)}"
             "(sos, x, out, zi, c0, c1, pcm, keys):",
             *_coefficient_lines(n_sections),
             "    frames, channels = x.shape",
             "    xf = x.reshape(-1)",
             "    of = out.reshape(-1)",
             "    uch = np.uint64(channels)",
             "    clips = 0",
             "    scale, lo, hi, lsb, dither = pcm[0], pcm[1], pcm[2], pcm[3], pcm[4]",
             "    counter, key = keys[0], keys[1]",
             *[f"    pk{c} = 0.0" for c in range(lanes)],
             "    zl = _lanes_state(zi, c0, c1)",
             *(["    bf = np.empty(FLUSH_EVERY * channels)",
                "    sums = np.empty(QUANTIZE_PIECE, dtype=np.int32)"] if stage == "pcm" else []),
             "    for start in range(0, frames, FLUSH_EVERY):",
             "        nb = min(start + FLUSH_EVERY, frames) - start",
             "        base = np.uint64(start * channels)",
             "        g = c0",
             *_group_lines(n_sections, lanes, stage, round32)]
    if stage == "pcm":  # the chunk, still in the cache, through the quantizer's vectorized loop
        lines += ["        n = nb * channels",
                  "        clips += _quantize_run(bf[:n], scale, lo, hi, lsb, dither, "
                  "_U32(_U32(base) + counter), key, of[base:base + n], sums)[0]"]
    lines += ["    _store_state(zl, zi, c0, c1)",
              "    peak = 0.0", *[f"    peak = pk{c} if pk{c} > peak else peak" for c in range(lanes)],
              "    finite = 0.0",
              "    for c in range(c0, c1):",
              "        for s in range(zi.shape[0]):",
              "            finite += 0.0 * (zi[s, c, 0] + zi[s, c, 1])",
              "    return finite == 0.0, peak, clips"]
    return "\n".join(lines) + "\n"


_LANES_STATE = _Kernel(_lanes_state)
_STORE_STATE = _Kernel(_store_state)
_SOS_LOOPS: dict[tuple[int, int, str, bool], _Kernel] = {}
# Unsigned constants for lane offsets and state indices (up to a stereo fast step, 16).
_LANE_CONSTANTS = {f"U{c}": np.uint64(c) for c in range(17)}


def _sos_loop(n_sections: int, lanes: int, stage: str = "float", round32: bool = False) -> _Kernel:
    """The (lazily compiled) loop for a cascade length, group width and output stage."""
    key = (n_sections, lanes, stage, round32)
    if key in _SOS_LOOPS:
        return _SOS_LOOPS[key]
    with _COMPILE_LOCK:
        if key not in _SOS_LOOPS:
            # One lane: the SLP vectorizer would pack the sections' statements
            # into one register, which chains the sections' recursions
            # together (measured: twice the time of the scalar loop).
            helpers = (_QUANTIZE_RUN, _LANES_STATE, _STORE_STATE, _PREFETCH, _PREFETCH_WRITE)
            _SOS_LOOPS[key] = _Kernel(_build_sos_loop(*key), helpers=helpers, slp=lanes > 1)
    return _SOS_LOOPS[key]


_PLANS: dict[tuple[int, int, str, bool], tuple] = {}


def _plan(n_sections: int, channels: int, stage: str, round32: bool) -> tuple:
    """((dispatcher, c0, c1), ...): the compiled passes for one call, memoized."""
    key = (n_sections, channels, stage, round32)
    try:
        return _PLANS[key]
    except KeyError:
        _PLANS[key] = tuple((_sos_loop(n_sections, lanes, stage, round32).compiled, c0, c1)
                            for lanes, c0, c1 in channel_passes(channels))
        return _PLANS[key]


def _build_sos_loop(n_sections: int, lanes: int, stage: str, round32: bool) -> Callable:
    """Generate and define the pure-Python loop for one cascade length, width and stage."""
    source = _sos_loop_source(n_sections, lanes, stage, round32)
    return _define(source, _sos_loop_name(n_sections, lanes, stage, round32))


def _define(source: str, name: str, names: dict | None = None) -> Callable:
    """Define the generated function ``name`` from ``source`` (``names``: more globals it calls)."""
    namespace = {"np": np, "FLUSH_EVERY": FLUSH_EVERY, "FLUSH_BELOW": FLUSH_BELOW, "_U32": _U32,
                 "FAST_STEP": FAST_STEP, "PREFETCH_AHEAD": PREFETCH_AHEAD,
                 "QUANTIZE_PIECE": QUANTIZE_PIECE,
                 "_prefetch": _prefetch, "_prefetch_write": _prefetch_write, "_fma": _fma,
                 "_quantize_run": _quantize_run, "_quantize_span": _quantize_span,
                 "_lanes_state": _lanes_state, "_store_state": _store_state,
                 **_LANE_CONSTANTS, **(names or {})}
    # Compiled under this file's name so numba's disk cache follows this file.
    exec(compile(source, __file__, "exec"), namespace)  # noqa: S102 - generated here
    func = namespace[name]
    func.__module__ = __name__
    return func


# --------------------------------------------------------------------------
# Fast path: eight frames per step from the state (not bit-identical)
# --------------------------------------------------------------------------
#
# The cascade is a linear system whose state u has two values per section
# (in the coordinates u = (z0, z0 + z1) of fast_tables). Over a step of
# FAST_STEP = 8 frames with input x_0 .. x_7 (one channel):
#
#   y_k = sum_m C[k, m] u_m + sum_{j <= k} h[k - j] x_j     (the step's outputs)
#   u'  = (u + sum_j G[j] x_j) + D u                         (the state after it)
#
# with h the impulse response, C the outputs of a unit state, G[j] the state
# an impulse at j leaves, and D + I the transition over the step. The eight
# outputs depend on the step's start state only, not on each other, so they
# are computed as one 512-bit vector per channel (for stereo the SLP
# vectorizer packs them from the generated scalar step, the coefficient
# tables laid out so that each term is one vector load; for mono the step
# is written as LLVM vector code, _mono_steps_intrinsic); the
# only loop-carried work left is the state update, one small matrix-vector
# product per eight frames instead of eight trips through every section.
# The result differs from sosfilt's only by rounding, and with the tables
# made in extended precision it is closer to the exact recursion than
# sosfilt's (tests/test_fastpath.py). Frames left over (fewer than
# FAST_STEP) run the exact loop.
#
# The decoupled mono loop (decoupled_tables, _decoupled_steps_source) does
# the same over substeps of DECOUPLED_SUBSTEP = 4 frames in other state
# coordinates w = R u: there the transition is block-diagonal (each section
# on its own: D is 2 x 2 per section, two products per pair of values), and
# each section's pair is its share of the substep's output 0 and of output 1
# less output 0, so outputs 0-1 need no products at all. On a CPU with
# 128-bit units that is 44 fused multiply-adds per eight frames against 64.

#: Frames per step of the fast loop.
FAST_STEP = 8
#: Channel counts the fast loop serves (where it pays: :func:`fast_channels`).
FAST_CHANNELS = (1, 2)
#: LLVM names of CPUs whose floating-point units are 128 bits wide (each
#: 256-bit operation runs as two halves): AMD Zen and Zen+. There the exact
#: stereo loop, whose two channels fill a 128-bit register, measured faster
#: than the fast one (2.85 against 3.56 ns/sample, float32 blocks of 65536,
#: and 4.69 against 5.60 quantized to 24 bits; DEVELOPERS.md).
NARROW_FP_CPUS = frozenset({"znver1"})
#: Table entries smaller than this are set to zero, so that a product with
#: a state above FLUSH_BELOW is never subnormal.
FAST_TABLE_FLOOR = 1e-100
#: Frames per substep of the decoupled mono loop (two substeps per FAST_STEP).
DECOUPLED_SUBSTEP = 4
#: Largest condition number of the decoupled loop's change of coordinates
#: (and magnitude of its decoupling basis) it is used with; the error it
#: adds grows with it (about 1e-16 times it, relative to the output's peak).
DECOUPLED_MAX_CONDITION = 300.0
#: Largest error, relative to the largest, of the decays per substep that the
#: decoupled loop's rounded transition may have (see :func:`decoupled_tables`).
DECOUPLED_DECAY_TOLERANCE = 1e-14


def _tree(terms: list[str]) -> str:
    """``terms`` summed pairwise (a balanced tree: a short dependency chain)."""
    while len(terms) > 1:
        terms = [f"({a} + {b})" for a, b in zip(terms[::2], terms[1::2], strict=False)] + (
            [terms[-1]] if len(terms) % 2 else [])
    return terms[0]


def _chain(products: list, mul: Callable, fma: Callable):
    """The sum of the ``products`` (a, b) as one chain of fma: the decoupled loop's input sums."""
    (a, b), *rest = products
    total = mul(a, b)
    for a, b in rest:
        total = fma(a, b, total)
    return total


def _fused_chains(products: list, mul: Callable, fma: Callable, add: Callable):
    """The sum of the ``products`` (a, b) as two interleaved chains of fma, then added.

    The one order of the fast loop's sums, for its scalar source
    (:func:`_fma_sum`) and its vector IR (:func:`_mono_steps_intrinsic`):
    ``mul(a, b)`` starts a chain, ``fma(a, b, c)`` extends it, ``add(c0, c1)``
    joins the two.
    """
    chains = [_chain(terms, mul, fma) for terms in (products[0::2], products[1::2]) if terms]
    return chains[0] if len(chains) == 1 else add(chains[0], chains[1])


def _fma_sum(products: list[tuple[str, str]]) -> str:
    """Source of the sum of the ``products`` (a, b), as :func:`_fused_chains` orders it.

    Each product is rounded once with the running sum instead of twice; two
    chains keep the dependency chain of the sums short.
    """
    return _fused_chains(products, lambda a, b: f"{a} * {b}", lambda a, b, c: f"_fma({a}, {b}, {c})",
                         lambda c0, c1: _tree([c0, c1]))


def _fast_step_lines(n_state: int, channels: int, ind: str) -> list[str]:
    """One step of FAST_STEP frames: load, outputs, state update, peaks, stores.

    Outputs are written frame-major (``y{k}_{c}`` in the order of ``out``),
    states channel-major, so that the vectorizer packs each into whole
    registers.
    """
    frames, chans = range(FAST_STEP), range(channels)
    outputs = [(k, c) for k in frames for c in chans]
    # One hint per 8 samples ahead (a 64-byte line of float64) in the input and the output.
    ahead = [f"np.uint64({PREFETCH_AHEAD + 8 * m})" for m in range(FAST_STEP * channels // 8)]
    lines = [f"{ind}{hint}({a}, i + {d})" for d in ahead for hint, a in (("_prefetch", "xf"),
                                                                            ("_prefetch_write", "of"))]
    lines += [f"{ind}x{j}_{c} = np.float64(xf[i + U{j * channels + c}])" for j, c in outputs]
    # The state after the step before the step's outputs: the loop-carried
    # chain starts first (measured 6-12 % faster on a CPU with 128-bit units).
    for c in chans:
        for m in range(n_state):
            from_input = _fma_sum([(f"GT[{j}, {m}]", f"x{j}_{c}") for j in frames])
            from_state = _fma_sum([(f"DT[{q}, {m}]", f"u{q}_{c}") for q in range(n_state)])
            lines.append(f"{ind}t{m}_{c} = (u{m}_{c} + {from_input}) + {from_state}")
    for k, c in outputs:
        col = k * channels + c
        from_state = _fma_sum([(f"CT[{m}, {col}]", f"u{m}_{c}") for m in range(n_state)])
        # The first half of the step needs only the first half of its input
        # (HT is 0 above the diagonal): one register's terms fewer.
        reach = FAST_STEP if 2 * k >= FAST_STEP else FAST_STEP // 2
        from_input = _fma_sum([(f"HT[{j}, {col}]", f"x{j}_{c}") for j in range(reach)])
        lines.append(f"{ind}y{k}_{c} = {from_state} + {from_input}")
    lines += [f"{ind}u{m}_{c} = t{m}_{c}" for c in chans for m in range(n_state)]
    lines += [f"{ind}a{k}_{c} = abs(y{k}_{c})" for k, c in outputs]
    lines += [f"{ind}pk{k}_{c} = a{k}_{c} if a{k}_{c} > pk{k}_{c} else pk{k}_{c}" for k, c in outputs]
    lines += [f"{ind}of[i + U{k * channels + c}] = y{k}_{c}" for k, c in outputs]
    lines.append(f"{ind}i += U{FAST_STEP * channels}")
    return lines


def _fast_loop_name(n_sections: int, channels: int, part: str = "loop") -> str:
    return f"_fast_{part}_{n_sections}s_{channels}ch_{FAST_STEP}step"


def _fast_steps_source(n_sections: int, channels: int) -> str:
    """Source of ``_fast_loop_name(n, channels, "steps")(x, out, start, n, us, HT, CT, GT, DT)`` -> peak.

    ``n`` steps from frame ``start``; ``us`` (2 * n_sections, channels), the
    state in u, is read before and written after them. A function of its
    own, with the state in and out of a small array around the loop: so
    the SLP vectorizer packs the states of both channels into one register
    (inside a longer function with the flush around it, it packed them in
    pairs).
    """
    n_state, chans = 2 * n_sections, range(channels)
    states = [(m, c) for c in chans for m in range(n_state)]
    peaks = [(k, c) for k in range(FAST_STEP) for c in chans]
    lines = [f"def {_fast_loop_name(n_sections, channels, 'steps')}(x, out, start, n, us, HT, CT, GT, DT):",
             "    xf = x.reshape(-1)",
             "    of = out.reshape(-1)",
             *[f"    u{m}_{c} = us[{m}, {c}]" for m, c in states],
             *[f"    pk{k}_{c} = 0.0" for k, c in peaks],
             f"    i = np.uint64(start * {channels})",
             "    for _ in range(n):",
             *_fast_step_lines(n_state, channels, " " * 8),
             *[f"    us[{m}, {c}] = u{m}_{c}" for m, c in states],
             "    peak = 0.0",
             *[f"    peak = pk{k}_{c} if pk{k}_{c} > peak else peak" for k, c in peaks],
             "    return peak"]
    return "\n".join(lines) + "\n"


def _fast_driver_source(name: str, steps: str, pcm: bool) -> str:
    """Source of the fast loop's driver ``name``, which calls the steps function ``steps``.

    ``(x, out, zu, HT, CT, GT, DT)`` -> (finite, peak, done); with ``pcm``
    ``(x, out, zu, HT, CT, GT, DT, pcm, seed, k)`` -> (finite, peak, clips, done),
    where ``out`` is int32 and each chunk of FLUSH_EVERY frames goes through
    a small buffer of ``x``'s dtype (the values the float driver would
    store) into :func:`_quantize_span` while it is in the cache (``pcm`` as
    for the exact loops, see :func:`_sos_loop_source`; ``seed`` and ``k``
    the dither state, which the caller advances). ``zu
    is the state in u coordinates (:func:`to_u_state`), read and written
    as is, so that consecutive calls continue exactly where one call would.
    """
    chunk_out, target = ("bf", "x[done * FAST_STEP:]") if pcm else ("out", "x")
    first = "0" if pcm else "done * FAST_STEP"
    lines = [f"def {name}(x, out, zu, HT, CT, GT, DT{', pcm, seed, k' if pcm else ''}):",
             "    steps = x.shape[0] // FAST_STEP",
             "    us = np.empty((2 * zu.shape[0], zu.shape[1]))",
             "    for s in range(zu.shape[0]):",
             "        for c in range(zu.shape[1]):",
             "            us[2 * s, c] = zu[s, c, 0]",
             "            us[2 * s + 1, c] = zu[s, c, 1]",
             "    peak = 0.0",
             "    clips = 0",
             "    done = 0"]
    if pcm:
        lines += ["    of = out.reshape(-1)",
                  "    bf = np.empty((FLUSH_EVERY, x.shape[1]), dtype=x.dtype)",
                  "    bv = bf.reshape(-1)",
                  "    sums = np.empty(QUANTIZE_PIECE, dtype=np.int32)",
                  "    scale, lo, hi, lsb, dither = pcm[0], pcm[1], pcm[2], pcm[3], pcm[4]"]
    lines += ["    while done < steps:",
              "        n = min(steps - done, FLUSH_EVERY // FAST_STEP)",
              f"        p = {steps}({target}, {chunk_out}, {first}, n, us, HT, CT, GT, DT)",
              "        peak = p if p > peak else peak",
              "        for m in range(us.shape[0]):",
              "            for c in range(us.shape[1]):",
              "                if abs(us[m, c]) < FLUSH_BELOW:",
              "                    us[m, c] = 0.0"]
    if pcm:
        lines += ["        base = done * FAST_STEP * x.shape[1]",
                  "        m = n * FAST_STEP * x.shape[1]",
                  "        clips += _quantize_span(bv[:m], scale, lo, hi, lsb, dither, seed, "
                  "k + np.uint64(base), of[base:base + m], sums)[0]"]
    lines += ["        done += n",
              "    finite = 0.0",
              "    for s in range(zu.shape[0]):",
              "        for c in range(zu.shape[1]):",
              "            zu[s, c, 0] = us[2 * s, c]",
              "            zu[s, c, 1] = us[2 * s + 1, c]",
              "            finite += 0.0 * (us[2 * s, c] + us[2 * s + 1, c])",
              f"    return finite == 0.0, peak, {'clips, ' if pcm else ''}steps * FAST_STEP"]
    return "\n".join(lines) + "\n"


def _decoupled_sums(n_state: int, mul: Callable, fma: Callable, add: Callable, splat: Callable,
                    swap: Callable, carry: Callable, w: list, x: list, tables: dict) -> tuple[list, list]:
    """One substep of the decoupled mono loop, on scalars (source text) or LLVM vectors alike.

    ``w`` the state's pairs, ``x`` the substep's inputs (both as the caller
    represents them: one entry per pair / per frame, where ``splat(w, m)``
    is state value ``m`` in every lane, ``swap`` exchanges a pair's values and
    ``carry(v)`` is ``v`` plus, in lane 1, lane 0), and ``tables[name](row, pair)`` the
    table row entries that a pair of lanes multiplies. Returns the state after
    the substep (per pair) and the two output pairs (frames 0-1 and 2-3), in
    the one order both the scalar source and the vector code evaluate them:

    * the input's share of each state pair and of the outputs, each one chain
      of fused multiply-adds over the frames (first the state's);
    * the state after: ``(w + input's share) + (PQ[1] * swap(w) + PQ[0] * w)``;
    * outputs 0-1: ``carry`` of the sum of the sections' pairs (each pair is
      its section's share of output 0 and of output 1 less output 0), plus
      the input's share; outputs 2-3: the state's share
      (:func:`_fused_chains` over the state values), plus the input's.
    """
    pairs, frames = n_state // 2, DECOUPLED_SUBSTEP
    gx = [_chain([(tables["GT"](j, p), x[j]) for j in range(frames)], mul, fma) for p in range(pairs)]
    hx = [_chain([(tables["HT"](j, h), x[j]) for j in range(2 * h + 2)], mul, fma) for h in (0, 1)]
    after = [add(add(w[p], gx[p]), fma(tables["PQ"](1, p), swap(w[p]), mul(tables["PQ"](0, p), w[p])))
             for p in range(pairs)]
    first = w[0]
    for p in range(1, pairs):
        first = add(first, w[p])
    second = _fused_chains([(tables["CT"](m, 1), splat(w, m)) for m in range(n_state)], mul, fma, add)
    return after, [add(carry(first), hx[0]), add(second, hx[1])]


def _add_text(a: str, b: str) -> str:
    return f"({a} + {b})"


def _carry_text(lane: int, n_sections: int) -> Callable[[str], str]:
    """The scalar source's ``carry`` for one lane (see :func:`_decoupled_sums`)."""
    if lane == 0:
        return lambda v: v
    lane0 = "w0"
    for p in range(1, n_sections):
        lane0 = _add_text(lane0, f"w{2 * p}")
    return lambda v: _add_text(v, lane0)


def _decoupled_name(n_sections: int) -> str:
    return f"_decoupled_steps_{n_sections}s"


def _decoupled_steps_source(n_sections: int) -> str:
    """Source of the decoupled mono steps, in scalars: ``(x, out, start, n, us, HT, CT, GT, PQ)`` -> peak.

    The signature and results of :func:`_fast_steps_source` for one channel
    (``n`` steps of FAST_STEP frames, each two substeps of
    DECOUPLED_SUBSTEP), with :func:`decoupled_tables`'s tables and the state
    ``us`` in their coordinates. Each lane ``l`` of the vector code
    (:func:`_decoupled_steps_intrinsic`) is one scalar here: state values
    ``2 p + l``, outputs ``l`` and ``2 + l`` of each substep.
    """
    n_state = 2 * n_sections
    ind = " " * 8
    lines = [f"def {_decoupled_name(n_sections)}(x, out, start, n, us, HT, CT, GT, PQ):",
             "    xf = x.reshape(-1)",
             "    of = out.reshape(-1)",
             *[f"    w{m} = us[{m}, 0]" for m in range(n_state)],
             *[f"    pk{k} = 0.0" for k in range(DECOUPLED_SUBSTEP)],
             "    i = np.uint64(start)",
             "    for _ in range(n):",
             f"{ind}_prefetch(xf, i + np.uint64(PREFETCH_AHEAD))",
             f"{ind}_prefetch_write(of, i + np.uint64(PREFETCH_AHEAD))"]
    for _ in range(FAST_STEP // DECOUPLED_SUBSTEP):
        lines += _decoupled_substep_lines(n_sections, ind)
    lines += [*[f"    us[{m}, 0] = w{m}" for m in range(n_state)],
              "    peak = 0.0",
              *[f"    peak = pk{k} if pk{k} > peak else peak" for k in range(DECOUPLED_SUBSTEP)],
              "    return peak"]
    return "\n".join(lines) + "\n"


def _decoupled_substep_lines(n_sections: int, ind: str) -> list[str]:
    """One substep of :func:`_decoupled_steps_source`: loads, both lanes' sums, peaks, stores."""
    n_state, frames = 2 * n_sections, DECOUPLED_SUBSTEP
    lines = [f"{ind}x{j} = np.float64(xf[i + U{j}])" for j in range(frames)]
    for lane in (0, 1):
        tables = {name: (lambda r, p, name=name, lane=lane: f"{name}[{r}, {2 * p + lane}]")
                  for name in ("GT", "HT", "CT", "PQ")}
        after, (first, second) = _decoupled_sums(
            n_state, lambda a, b: f"{a} * {b}", lambda a, b, c: f"_fma({a}, {b}, {c})", _add_text,
            lambda w, m: f"w{m}", lambda v: f"w{int(v[1:]) ^ 1}", _carry_text(lane, n_sections),
            [f"w{2 * p + lane}" for p in range(n_sections)], [f"x{j}" for j in range(frames)], tables)
        lines += [f"{ind}t{2 * p + lane} = {e}" for p, e in enumerate(after)]
        lines += [f"{ind}y{lane} = {first}", f"{ind}y{2 + lane} = {second}"]
    lines += [f"{ind}of[i + U{k}] = y{k}" for k in range(frames)]
    # the peaks of the outputs as stored (rounded to float32 for float32 output)
    lines += [f"{ind}a{k} = abs(np.float64(of[i + U{k}]))" for k in range(frames)]
    lines += [f"{ind}pk{k} = a{k} if a{k} > pk{k} else pk{k}" for k in range(frames)]
    lines += [f"{ind}w{m} = t{m}" for m in range(n_state)]
    return lines + [f"{ind}i += U{frames}"]


def _vector_sum(builder, fma, products):
    """:func:`_fma_sum` on LLVM vectors, in the same order (:func:`_fused_chains`)."""
    return _fused_chains(products, builder.fmul, lambda a, b, c: builder.call(fma, [a, b, c]), builder.fadd)


def _steps_intrinsic(emit: Callable, name: str):
    """A numba intrinsic ``(x, out, start, n, us, T0, T1, T2, T3) -> peak`` whose loop ``emit`` writes.

    ``emit(builder, x, out, us, tables, start, n, xt, ot)`` gets the arrays
    as numba's array structures (``tables`` the four), ``start`` and ``n``
    as LLVM values and the LLVM types of ``x``'s and ``out``'s elements, and
    returns the peak. The intrinsic accepts C-contiguous arrays only (the
    loops do their own pointer arithmetic).
    """
    from numba import types as nbtypes
    from numba.extending import intrinsic

    def steps(typingctx, x, out, start, n, us, t0, t1, t2, t3):
        arrays = (x, out, us, t0, t1, t2, t3)
        if not all(isinstance(a, nbtypes.Array) and a.layout == "C" for a in arrays):
            return None

        def codegen(context, builder, signature, args):
            x_a, out_a, _, _, us_a, *tables = [
                context.make_array(t)(context, builder, v) if isinstance(t, nbtypes.Array) else v
                for t, v in zip(signature.args, args, strict=True)]
            xt, ot = (context.get_value_type(t.dtype) for t in signature.args[:2])
            return emit(builder, x_a, out_a, us_a, tables, args[2], args[3], xt, ot)
        return nbtypes.float64(x, out, start, n, us, t0, t1, t2, t3), codegen
    steps.__name__ = steps.__qualname__ = name
    return intrinsic(steps)


def _larger(builder, a, b):
    """``a`` where ``a > b``, else ``b`` (NaN ``a`` included): the peak, as the scalar sources take it."""
    return builder.select(builder.fcmp_ordered(">", a, b), a, b)


def _loop_blocks(builder, name: str) -> tuple:
    """A loop's blocks ``(entry, head, body, done)``: the builder branches to ``head`` and is placed there."""
    entry = builder.block
    head, body, done = (builder.append_basic_block(f"{name}.{part}") for part in ("head", "body", "done"))
    builder.branch(head)
    builder.position_at_end(head)
    return entry, head, body, done


def _vector_intrinsic(module, name: str, vector, n_args: int):
    """``llvm.<name>.v<N>f64`` or ``.v<N>f32`` (llvmlite's declare_intrinsic names scalar types only)."""
    from llvmlite import ir

    full = f"llvm.{name}.v{vector.count}f{64 if isinstance(vector.element, ir.DoubleType) else 32}"
    if full in module.globals:
        return module.globals[full]
    return ir.Function(module, ir.FunctionType(vector, [vector] * n_args), name=full)


def _decoupled_steps_intrinsic(n_sections: int):
    """The decoupled mono loop's steps in LLVM vector IR: :func:`_decoupled_steps_source`, two lanes wide.

    Every value is a pair of float64 lanes (one 128-bit register): each
    section's state, each input splatted, each pair of outputs; the sums
    are :func:`_decoupled_sums`, the same operations in the same order as
    the scalar source, so the results are the same bit for bit
    (tests/test_fastpath.py). A float32 input is loaded splatted and widened
    in one conversion (``vbroadcastss``, ``vcvtps2pd``), a float64 one by a
    broadcast load. Measured on the first-generation EPYC, blocks of 16384
    in the cache: float64 2.50 -> 2.0 ns/sample against the eight-frame step,
    float32 2.80 -> 2.2 (DEVELOPERS.md).
    """
    from llvmlite import ir

    n_state, frames = 2 * n_sections, DECOUPLED_SUBSTEP
    d, i64, i32 = ir.DoubleType(), ir.IntType(64), ir.IntType(32)
    v2 = ir.VectorType(d, 2)

    def lanes(builder, v, which):
        return builder.shuffle_vector(v, ir.Constant(v.type, None), ir.Constant(ir.VectorType(i32, 2), which))

    def codegen(builder, x_a, out_a, us_a, tables, start_v, n_v, xt, ot):
        fma = _vector_intrinsic(builder.module, "fma", v2, 3)
        v4 = ir.VectorType(ot, 4)  # four outputs as stored
        # the peak of each output of a substep (lanes 0-3 in order): float64 in two
        # registers, float32 in one (half the operations)
        peak_types = [v2, v2] if ot == d else [v4]

        def row(array, n_cols):
            def load(r, pair):
                pointer = builder.gep(array.data, [i64(r * n_cols + 2 * pair)])
                return builder.load(builder.bitcast(pointer, v2.as_pointer()), align=8)
            return load

        table_rows = {"HT": row(tables[0], frames), "CT": row(tables[1], frames),
                      "GT": row(tables[2], n_state), "PQ": row(tables[3], n_state)}

        def splat_input(index):
            value = builder.load(builder.gep(x_a.data, [index]))
            if xt == d:
                return lanes(builder, builder.insert_element(v2(None), value, i32(0)), [0, 0])
            narrow = ir.VectorType(xt, 2)
            pair = builder.insert_element(ir.Constant(narrow, None), value, i32(0))
            return builder.fpext(lanes(builder, pair, [0, 0]), v2)

        def carry(v):  # lane 0 plus -0.0 (itself, bit for bit), lane 1 plus lane 0
            order = ir.Constant(ir.VectorType(i32, 2), [2, 0])
            shifted = builder.shuffle_vector(v, v2([-0.0, -0.0]), order)
            return builder.fadd(v, shifted)

        def substep(i, w, peak):
            x_s = [splat_input(builder.add(i, i64(j))) for j in range(frames)]
            after, (first, second) = _decoupled_sums(
                n_state, builder.fmul, lambda a, b, c: builder.call(fma, [a, b, c]), builder.fadd,
                lambda w, m: lanes(builder, w[m // 2], [m % 2, m % 2]),
                lambda v: lanes(builder, v, [1, 0]), carry, w, x_s, table_rows)
            y = builder.shuffle_vector(first, second, ir.Constant(ir.VectorType(i32, 4), [0, 1, 2, 3]))
            if ot != d:
                y = builder.fptrunc(y, v4)
            builder.store(y, builder.bitcast(builder.gep(out_a.data, [i]), v4.as_pointer()),
                          align=8 if ot == d else 4)
            parts = [first, second] if ot == d else [y]
            module = builder.module
            magnitudes = [builder.call(_vector_intrinsic(module, "fabs", p.type, 1), [p]) for p in parts]
            return after, [_larger(builder, m, q) for m, q in zip(magnitudes, peak, strict=True)]

        w0 = []
        for p in range(n_sections):
            v = ir.Constant(v2, None)
            for lane in (0, 1):
                value = builder.load(builder.gep(us_a.data, [i64(2 * p + lane)]))
                v = builder.insert_element(v, value, i32(lane))
            w0.append(v)
        entry, head, body, done = _loop_blocks(builder, "decoupled")
        i, k = builder.phi(i64), builder.phi(i64)
        pk = [builder.phi(t) for t in peak_types]
        w = [builder.phi(v2) for _ in range(n_sections)]
        i.add_incoming(start_v, entry)
        k.add_incoming(i64(0), entry)
        for phi in pk:
            phi.add_incoming(ir.Constant(phi.type, None), entry)
        for phi, v in zip(w, w0, strict=True):
            phi.add_incoming(v, entry)
        builder.cbranch(builder.icmp_signed("<", k, n_v), body, done)
        builder.position_at_end(body)
        ahead = builder.add(i, i64(PREFETCH_AHEAD))
        for array, write in ((x_a, False), (out_a, True)):
            _emit_prefetch(builder, array.data, ahead, write)
        state, peak = list(w), pk
        for sub in range(FAST_STEP // frames):
            state, peak = substep(builder.add(i, i64(sub * frames)), state, peak)
        i.add_incoming(builder.add(i, i64(FAST_STEP)), body)
        k.add_incoming(builder.add(k, i64(1)), body)
        for phi, v in zip(pk + w, peak + state, strict=True):
            phi.add_incoming(v, body)
        builder.branch(head)
        builder.position_at_end(done)
        for p in range(n_sections):
            for lane in (0, 1):
                builder.store(builder.extract_element(w[p], i32(lane)),
                              builder.gep(us_a.data, [i64(2 * p + lane)]))
        result = ir.Constant(d, 0.0)
        for part in pk:
            for lane in range(part.type.count):
                value = builder.extract_element(part, i32(lane))
                result = _larger(builder, value if ot == d else builder.fpext(value, d), result)
        return result
    return _steps_intrinsic(codegen, "decoupled_steps")


def _mono_steps_intrinsic(n_sections: int):
    """The mono fast steps written in LLVM vector IR: the generated steps' arithmetic, in their order.

    The eight-frame step for mono: on CPUs outside :data:`NARROW_FP_CPUS`,
    and for designs that do not decouple (:func:`decoupled_tables`).
    The same signature and results as ``_fast_steps_source(n_sections, 1)``'s
    function, whose scalar code the SLP vectorizer packs only in part for one
    channel (shuffles between half registers, table strides reloaded from the
    stack). Here each output vector, the state vector and the table rows are
    whole LLVM vectors: per step one load of the eight inputs (float64:
    broadcast loads; float32: one conversion, then broadcast loads from a
    stack buffer), the state's splats by shuffles, and every sum is the scalar
    code's chain of fused multiply-adds, so the results are the same bit for
    bit (tests/test_fastpath.py). The state's table rows are loaded once,
    before the loop; the input's rows in the loop, next to their one use, with
    the input's sums made first (on the first-generation EPYC, float64: 45
    memory operands per step instead of 51 and no spill stores, 3.10 -> 2.81
    ns/sample; float32 3.37 -> 3.11; best of six interleaved runs each).
    Each half of the eight outputs is a vector of its own, so that the
    first half sums only the first half of the input, as the scalar code does
    (``HT[j, k]`` is zero for ``k < j``): on a CPU with 128-bit units that
    leaves out a ninth of the step's fused multiply-adds (measured on the
    first-generation EPYC: float64 3.05 -> 2.86 ns/sample, float32 3.67 ->
    3.21). The two halves share one peak vector (a register fewer in a loop
    that spills).
    """
    from llvmlite import ir
    from numba.core import cgutils

    n_state, width, half = 2 * n_sections, FAST_STEP, FAST_STEP // 2
    d, i64, i32 = ir.DoubleType(), ir.IntType(64), ir.IntType(32)

    def splat(builder, v, lane, lanes):
        return builder.shuffle_vector(v, ir.Constant(v.type, None), ir.Constant(
            ir.VectorType(i32, lanes), [lane] * lanes))

    def converted_splats(builder, xv, buf):
        """Splats of the converted float32 inputs, as broadcast loads from a stack buffer.

        Stored, then read back past an empty inline asm that takes the
        buffer's address and clobbers memory, so that LLVM cannot forward
        the stored vector into shuffles (measured: 1.34-1.41 -> 1.11-1.20
        ns/sample for float32; broadcast loads use the load ports, not the
        shuffle unit that the state's splats also need).
        """
        builder.store(xv, buf)
        barrier = ir.InlineAsm(ir.FunctionType(ir.VoidType(), [buf.type]), "", "r,~{memory}",
                               side_effect=True)
        builder.call(barrier, [buf])
        lanes = builder.bitcast(buf, d.as_pointer())
        one = ir.Constant(ir.VectorType(d, 1), None)
        loads = [builder.load(builder.gep(lanes, [i64(j)])) for j in range(width)]
        return [splat(builder, builder.insert_element(one, v, i32(0)), 0, width) for v in loads]

    def rows(builder, array, n_rows, n_cols, first=0, lanes=None):
        """Rows of a C-contiguous (n_rows, n_cols) float64 table as vectors.

        Each of ``lanes`` columns (default all) from column ``first`` on.
        """
        lanes = n_cols if lanes is None else lanes
        vector = ir.VectorType(d, lanes).as_pointer()
        return [builder.load(builder.bitcast(builder.gep(array.data, [i64(r * n_cols + first)]), vector),
                             align=8) for r in range(n_rows)]

    def codegen(builder, x_a, out_a, us_a, tables, start_v, n_v, xt, ot):
        vw, vs, vh = ir.VectorType(d, width), ir.VectorType(d, n_state), ir.VectorType(d, half)
        module = builder.module
        fma_s = _vector_intrinsic(module, "fma", vs, 3)
        fma_h = _vector_intrinsic(module, "fma", vh, 3)
        fabs = _vector_intrinsic(module, "fabs", vh, 1)
        # the state's table rows, loaded once before the loop
        ct = [rows(builder, tables[1], n_state, width, first, half) for first in (0, half)]
        dt = rows(builder, tables[3], n_state, n_state)
        u0 = ir.Constant(vs, None)
        for m in range(n_state):
            u0 = builder.insert_element(u0, builder.load(builder.gep(us_a.data, [i64(m)])), i32(m))
        # in the function's entry block: the driver calls this once per chunk
        buf = cgutils.alloca_once(builder, vw)
        entry, head, body, done = _loop_blocks(builder, "mono")
        i = builder.phi(i64)
        k = builder.phi(i64)
        u = builder.phi(vs)
        pk = builder.phi(vh)
        i.add_incoming(start_v, entry)
        k.add_incoming(ir.Constant(i64, 0), entry)
        u.add_incoming(u0, entry)
        pk.add_incoming(ir.Constant(vh, None), entry)
        builder.cbranch(builder.icmp_signed("<", k, n_v), body, done)
        builder.position_at_end(body)
        ahead = builder.add(i, i64(PREFETCH_AHEAD))
        for array, write in ((x_a, False), (out_a, True)):
            _emit_prefetch(builder, array.data, ahead, write)
        inputs = builder.bitcast(builder.gep(x_a.data, [i]), ir.VectorType(xt, width).as_pointer())
        xv = builder.load(inputs, align=8 if xt == d else 4)
        if xt == d:  # splats straight from the input (broadcast loads)
            xw = [splat(builder, xv, j, width) for j in range(width)]
        else:
            xw = converted_splats(builder, builder.fpext(xv, vw), buf)
        def narrow(v, lanes):
            return builder.shuffle_vector(v, ir.Constant(vw, None), ir.Constant(
                ir.VectorType(i32, lanes), list(range(lanes))))
        xs, xh = [narrow(v, n_state) for v in xw], [narrow(v, half) for v in xw]
        def vsum(fma, rows_, splats):
            return _vector_sum(builder, fma, list(zip(rows_, splats, strict=True)))
        # the input's shares of the state and of each half of the outputs first, their
        # table rows loaded here (each half of the outputs a vector: the first half sums
        # only the first half of the input)
        from_input = vsum(fma_s, rows(builder, tables[2], width, n_state), xs)
        ht = [rows(builder, tables[0], half, width, 0, half),
              rows(builder, tables[0], width, width, half, half)]
        hx = [vsum(fma_h, ht[h], xh[:len(ht[h])]) for h in (0, 1)]
        uh = [splat(builder, u, m, half) for m in range(n_state)]
        ustate = [splat(builder, u, m, n_state) for m in range(n_state)]
        # then the state after the step, then the outputs, as in the scalar source
        t = builder.fadd(builder.fadd(u, from_input), vsum(fma_s, dt, ustate))
        y_lo, y_hi = (builder.fadd(vsum(fma_h, ct[h], uh), hx[h]) for h in (0, 1))
        y = builder.shuffle_vector(y_lo, y_hi, ir.Constant(ir.VectorType(i32, width), list(range(width))))
        # one peak vector for both halves: a register fewer in a loop that spills
        halves = _larger(builder, builder.call(fabs, [y_lo]), builder.call(fabs, [y_hi]))
        pk_next = _larger(builder, halves, pk)
        yo = y if ot == d else builder.fptrunc(y, ir.VectorType(ot, width))
        builder.store(yo, builder.bitcast(builder.gep(out_a.data, [i]), yo.type.as_pointer()),
                      align=8 if ot == d else 4)
        i.add_incoming(builder.add(i, i64(width)), body)
        k.add_incoming(builder.add(k, i64(1)), body)
        u.add_incoming(t, body)
        pk.add_incoming(pk_next, body)
        builder.branch(head)
        builder.position_at_end(done)
        for m in range(n_state):
            builder.store(builder.extract_element(u, i32(m)), builder.gep(us_a.data, [i64(m)]))
        peak = ir.Constant(d, 0.0)
        for lane in range(half):
            peak = _larger(builder, builder.extract_element(pk, i32(lane)), peak)
        return peak
    return _steps_intrinsic(codegen, "mono_steps")


_FAST_LOOPS: dict[tuple[int, int, bool, bool], _Kernel] = {}


def _fast_loop(n_sections: int, channels: int = 1, pcm: bool = False, decoupled: bool = False) -> _Kernel:
    """The (lazily compiled) fast loop for a cascade (1 .. MAX_UNROLLED_SECTIONS), 1 or 2 channels.

    ``(x, out, zs, *tables)`` -> (finite, peak, done): ``tables`` is the
    ``loop`` of :func:`fast_tables` for this cascade and channel count,
    ``zs`` the state in the loop's coordinates (:func:`to_loop_state`);
    ``done`` is the number of frames filtered (whole steps), the frames left
    over are the caller's. The state is flushed (see "Denormal numbers")
    every FLUSH_EVERY frames. With ``pcm``, the loop that also quantizes
    (see :func:`_fast_driver_source`); with ``decoupled``, the decoupled
    mono loop (:func:`decoupled_tables`), else the eight-frame step.
    """
    key = (n_sections, channels, bool(decoupled), bool(pcm))
    if key in _FAST_LOOPS:  # without the lock: this is on every block's path
        return _FAST_LOOPS[key]
    key = key[:3]
    with _COMPILE_LOCK:
        if key + (False,) not in _FAST_LOOPS:
            if decoupled:
                name = _decoupled_name(n_sections)
                scalar = _define(_decoupled_steps_source(n_sections), name)
                steps = _Intrinsic(scalar, lambda: _decoupled_steps_intrinsic(n_sections))
            else:
                name = _fast_loop_name(n_sections, channels, "steps")
                scalar = _define(_fast_steps_source(n_sections, channels), name)
                if channels == 1:
                    steps = _Intrinsic(scalar, lambda: _mono_steps_intrinsic(n_sections))
                else:
                    steps = _Kernel(scalar, helpers=(_PREFETCH, _PREFETCH_WRITE, _FMA), slp=True)
            for quantizes in (False, True):
                driver = f"{name}_{'pcm' if quantizes else 'loop'}"
                source = _fast_driver_source(driver, name, quantizes)
                helpers = (steps, _QUANTIZE) if quantizes else (steps,)
                _FAST_LOOPS[key + (quantizes,)] = _Kernel(
                    _define(source, driver, {name: steps.py_func}), helpers=helpers)
    return _FAST_LOOPS[key + (bool(pcm),)]


def step_tables(sos: np.ndarray, channels: int = 1) -> tuple[np.ndarray, ...]:
    """The tables of the eight-frame fast loop for a cascade and channel count: ``(HT, CT, GT, DT)``.

    Parameters
    ----------
    sos : ndarray of float64, shape (n_sections, 6)
    channels : int
        1 or 2: the output tables repeat each column once per channel, so
        that the loop loads every term of a frame's channels as one vector.

    Returns
    -------
    HT : ndarray, shape (FAST_STEP, FAST_STEP * channels)
        ``HT[j, k * channels + c]``: output ``k`` of a step after a unit
        impulse at frame ``j`` of it, from zero state (0 for ``k < j``).
    CT : ndarray, shape (2 * n_sections, FAST_STEP * channels)
        ``CT[m, k * channels + c]``: output ``k`` from the unit state ``m``.
    GT : ndarray, shape (FAST_STEP, 2 * n_sections)
        ``GT[j, m]``: state ``m`` after the step from an impulse at frame ``j``.
    DT : ndarray, shape (2 * n_sections, 2 * n_sections)
        ``DT[q, m]``: state ``m`` after the step from the unit state ``q``,
        minus the identity.

    Notes
    -----
    States are in the coordinates ``u = (z0, z0 + z1)`` of each section
    (``z0, z1 = zi[s, c]``), and the transition is stored as its difference
    from the identity. Both matter for poles near z = 1 (a low-frequency
    limit of a few Hz): there the ``zi`` coordinates of a state nearly
    cancel (``z1 ~ -z0``), so a transition in them, rounded to float64, would
    perturb the decay of the slow mode by several units in the last place
    at every step; in ``u`` it is the identity plus a small part, and
    ``u + D u`` keeps the small part exactly. The tables come from running
    the recursion itself on unit inputs in extended precision
    (``np.longdouble``: a 64-bit mantissa on x86, plain float64 elsewhere),
    changed to ``u`` and rounded once. Entries below
    :data:`FAST_TABLE_FLOOR` are set to zero.
    """
    n_state = 2 * sos.shape[0]
    y, u = _unit_responses(sos, FAST_STEP)
    tables = (np.repeat(y[:, n_state:].T, channels, axis=1),
              np.repeat(y[:, :n_state].T, channels, axis=1),
              u[:, n_state:].T,
              (u[:, :n_state] - np.eye(n_state, dtype=np.longdouble)).T)
    return _rounded_tables(tables)


def _rounded_tables(tables) -> tuple[np.ndarray, ...]:
    """Extended-precision tables rounded once to float64, entries below FAST_TABLE_FLOOR set to zero."""
    out = tuple(np.ascontiguousarray(t, dtype=np.float64) for t in tables)
    for table in out:
        table[np.abs(table) < FAST_TABLE_FLOOR] = 0.0
    return out


def _unit_responses(sos: np.ndarray, steps: int) -> tuple[np.ndarray, np.ndarray]:
    """The cascade over ``steps`` frames, in ``np.longdouble``, from each unit state and each unit impulse.

    Returns ``(y, u)``: ``y`` (steps, n_state + steps) the outputs, ``u``
    (n_state, n_state + steps) the states after the frames, in u
    coordinates; columns are the unit states (in u), then an impulse at
    each frame (from zero state).
    """
    n_sections = sos.shape[0]
    n_state = 2 * n_sections
    to_u = np.kron(np.eye(n_sections), [[1, 0], [1, 1]]).astype(np.longdouble)
    z = np.zeros((n_state, n_state + steps), np.longdouble)
    z[:, :n_state] = np.kron(np.eye(n_sections), [[1, 0], [-1, 1]])  # u -> zi
    y = np.zeros((steps, n_state + steps), np.longdouble)
    for step in range(steps):
        v = np.zeros(n_state + steps, np.longdouble)
        v[n_state + step] = 1.0
        for s, (b0, b1, b2, _, a1, a2) in enumerate(sos.astype(np.longdouble)):
            w = b0 * v + z[2 * s]
            z[2 * s] = b1 * v - a1 * w + z[2 * s + 1]
            z[2 * s + 1] = b2 * v - a2 * w
            v = w
        y[step] = v
    return y, to_u @ z


class FastTables(NamedTuple):
    """What the fast loop needs for one cascade and channel count (:func:`fast_tables`).

    Attributes
    ----------
    loop : tuple of ndarray
        The loop's four tables: :func:`step_tables`'s, or for a decoupled
        mono cascade :func:`decoupled_tables`'s.
    decoupled : bool
        Which loop they are for: the decoupled mono loop, or the eight-frame
        step.
    to_loop, from_loop : ndarray or None
        For the decoupled loop, the (n_state, n_state) matrices from u
        coordinates (:func:`to_u_state`) to the loop's and back; None where
        the loop keeps its state in u.
    """

    loop: tuple[np.ndarray, ...]
    decoupled: bool = False
    to_loop: np.ndarray | None = None
    from_loop: np.ndarray | None = None


def fast_tables(sos: np.ndarray, channels: int = 1, decoupled: bool | None = None) -> FastTables:
    """The fast loop's tables for a cascade and channel count, and the loop they are for.

    Mono takes the decoupled loop (:func:`decoupled_tables`) where its
    coordinates are well conditioned and ``decoupled`` is True (default:
    :func:`decoupled_mono`, on CPUs where it measured faster); everything
    else, the eight-frame step (:func:`step_tables`).
    """
    if channels == 1 and (decoupled_mono() if decoupled is None else decoupled):
        tables = decoupled_tables(sos)
        if tables is not None:
            return tables
    return FastTables(step_tables(sos, channels))


def decoupled_tables(sos: np.ndarray) -> FastTables | None:
    """Tables of the decoupled mono loop, or None where its coordinates would cost accuracy.

    The loop (:func:`_decoupled_steps_source`) takes
    :data:`DECOUPLED_SUBSTEP` frames at a time like the eight-frame step,
    in other state coordinates ``w = R u`` (``R`` is ``to_loop``):

    * decoupled: the transition over the substep is block-diagonal, each
      section's own 2 x 2 block. The cascade's transition is block
      lower-triangular in u (each section is driven by the ones before it);
      a unit lower block-triangular change of basis ``T`` removes the
      coupling (a Sylvester equation per pair of sections, solvable where
      their poles differ) and leaves the diagonal blocks, each section's
      own transition, unchanged.
    * observed: each section's two values are its share of the substep's
      first two outputs, so those outputs are sums of the state (no
      products) and the transition's blocks are ``M_s (A_s - I) M_s^-1``,
      with ``M_s`` the section's 2 x 2 map from its decoupled state to those
      outputs.

    Returns
    -------
    FastTables or None
        ``loop`` is ``(HT, CT, GT, PQ)``: ``HT[j, k]`` output ``k`` of the
        substep after an impulse at frame ``j`` (zero state), ``CT[m, k]``
        output ``k`` from the unit state ``m`` (columns 0 and 1 are 1 for
        each section's own value and are not read), ``GT[j, m]`` state ``m``
        after an impulse at ``j``, and ``PQ[0, m]``, ``PQ[1, m]`` the
        transition minus the identity: ``w'_m = w_m + PQ[0, m] w_m + PQ[1,
        m] w_(m xor 1)`` plus the input's share. None where ``T`` or an
        ``M_s`` is singular or their condition number exceeds
        :data:`DECOUPLED_MAX_CONDITION`.
    """
    n_sections = sos.shape[0]
    n_state, steps = 2 * n_sections, DECOUPLED_SUBSTEP
    y, u = _unit_responses(sos, steps)
    transition = u[:, :n_state]
    T = _decoupling_basis(transition, n_sections)
    if T is None:
        return None
    # each section's share of output 0, and of output 1 less output 0
    outputs = np.array([[1, 0], [-1, 1]], np.longdouble) @ y[:2, :n_state] @ T
    M = np.zeros((n_state, n_state), np.longdouble)
    M_inv = np.zeros_like(M)
    for s in range(n_sections):
        block = slice(2 * s, 2 * s + 2)
        M[block, block] = outputs[:, block]
        M_inv[block, block] = _inverse_2x2(outputs[:, block])
    to_loop = M @ _unit_lower_inverse(T, n_sections)
    from_loop = T @ M_inv
    condition = np.linalg.cond(to_loop.astype(np.float64))
    if not np.isfinite(condition) or condition > DECOUPLED_MAX_CONDITION:
        return None
    delta = np.zeros_like(M)
    for s in range(n_sections):
        block = slice(2 * s, 2 * s + 2)
        delta[block, block] = M[block, block] @ (transition[block, block] - np.eye(2)) @ M_inv[block, block]
    if not all(_decays_kept(transition[b, b] - np.eye(2), delta[b, b])
               for b in (slice(2 * s, 2 * s + 2) for s in range(n_sections))):
        return None
    rows = np.arange(n_state)
    pq = np.stack([delta[rows, rows], delta[rows, rows ^ 1]])
    loop = _rounded_tables((y[:, n_state:].T, (y[:, :n_state] @ from_loop).T,
                            (to_loop @ u[:, n_state:]).T, pq))
    return FastTables(loop, True, to_loop.astype(np.float64), from_loop.astype(np.float64))


def _decoupling_basis(transition: np.ndarray, n_sections: int) -> np.ndarray | None:
    """Unit lower block-triangular ``T`` (2 x 2 blocks) with ``T^-1 A T`` block-diagonal, or None.

    ``A`` (``transition``) is block lower-triangular. Block ``(i, j)`` of
    ``T`` below the diagonal solves ``A_ii X - X A_jj = -sum_{j <= k < i}
    A_ik T_kj`` (column by column of blocks), in float64 and then refined
    twice in extended precision. None where a system is singular or ``T``
    exceeds :data:`DECOUPLED_MAX_CONDITION` in magnitude.
    """
    T = np.eye(2 * n_sections, dtype=np.longdouble)

    def block(a, i, j):
        return a[2 * i:2 * i + 2, 2 * j:2 * j + 2]

    for j in range(n_sections):
        for i in range(j + 1, n_sections):
            rhs = -sum(block(transition, i, k) @ block(T, k, j) for k in range(j, i))
            a, b = block(transition, i, i), block(transition, j, j)
            # vec(A X - X B) = (I kron A - B^T kron I) vec(X), vec by columns
            system = (np.kron(np.eye(2), a) - np.kron(b.T, np.eye(2))).astype(np.float64)
            x = np.zeros((2, 2), np.longdouble)
            for _ in range(3):
                residual = rhs - (a @ x - x @ b)
                try:
                    step = np.linalg.solve(system, residual.astype(np.float64).ravel(order="F"))
                except np.linalg.LinAlgError:
                    return None
                x = x + step.reshape(2, 2, order="F").astype(np.longdouble)
            if not np.all(np.isfinite(x)) or np.max(np.abs(x)) > DECOUPLED_MAX_CONDITION:
                return None
            T[2 * i:2 * i + 2, 2 * j:2 * j + 2] = x
    return T


def _unit_lower_inverse(T: np.ndarray, n_sections: int) -> np.ndarray:
    """The inverse of a unit lower block-triangular ``T``: ``I - N + N^2 - ...`` (``N = T - I``)."""
    nil = T - np.eye(T.shape[0], dtype=T.dtype)
    inverse, term = np.eye(T.shape[0], dtype=T.dtype), np.eye(T.shape[0], dtype=T.dtype)
    for _ in range(1, n_sections):
        term = -term @ nil
        inverse = inverse + term
    return inverse


def _decays_kept(exact: np.ndarray, changed: np.ndarray) -> bool:
    """Whether ``changed``, rounded to float64, keeps the eigenvalues of ``exact`` (2 x 2, both A - I).

    Within :data:`DECOUPLED_DECAY_TOLERANCE` of each, relative: the
    eigenvalues of a transition minus the identity are a section's decay
    (and turn) per substep, which for a pole near z = 1 a basis with
    large entries would round away (the float64 tables of such a basis are
    checked here, in extended precision).
    """
    want = np.sort_complex(_eigenvalues_2x2(exact))
    got = np.sort_complex(_eigenvalues_2x2(changed.astype(np.float64).astype(np.longdouble)))
    scale = np.abs(want).max()
    return bool(scale > 0 and np.all(np.abs(got - want) <= DECOUPLED_DECAY_TOLERANCE * scale))


def _eigenvalues_2x2(m: np.ndarray) -> np.ndarray:
    """The two eigenvalues of a real 2 x 2 matrix, in its precision (complex)."""
    half_trace = (m[0, 0] + m[1, 1]) / 2
    disc = (m[0, 0] - m[1, 1]) ** 2 / 4 + m[0, 1] * m[1, 0]
    root = np.sqrt(np.abs(disc))
    if disc >= 0:
        return np.array([half_trace - root, half_trace + root], dtype=np.clongdouble)
    return np.array([half_trace - 1j * root, half_trace + 1j * root], dtype=np.clongdouble)


def _inverse_2x2(m: np.ndarray) -> np.ndarray:
    """The inverse of a 2 x 2 matrix in its own precision (inf where singular)."""
    det = m[0, 0] * m[1, 1] - m[0, 1] * m[1, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.array([[m[1, 1], -m[0, 1]], [-m[1, 0], m[0, 0]]], dtype=m.dtype) / det


_NO_PCM = np.zeros(5)
_NO_KEYS = np.zeros(2, dtype=np.uint32)


def _block_keys(seed: np.uint64, k: np.uint64) -> np.ndarray:
    """[counter offset, key b] of the dither for samples from ``k`` on (until the next 2**32)."""
    _, counter, key, _, _ = _SPAN_SPLIT(seed, k, 0)
    return np.array([counter, key], dtype=np.uint32)


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


def filter_unchecked(
    sos: np.ndarray, x: np.ndarray, zi: np.ndarray, out: np.ndarray,
    tables: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[bool, float]:
    """:func:`sos_filter` without argument checks.

    With ``tables`` (from :func:`fast_tables` for this ``sos``), a mono or
    stereo block of a cascade of at most :data:`MAX_UNROLLED_SECTIONS` sections
    runs the fast loop (see "Fast path" in the module docstring): not
    bit-identical to :func:`scipy.signal.sosfilt`, within rounding of it.
    Other blocks take the exact loops whatever ``tables`` is.

    Returns
    -------
    finite : bool
        Whether the final state is finite. A NaN or infinity anywhere in
        ``x`` leaves NaN in the state for good, so False means the block
        held one (or the filter overflowed).
    peak : float
        Largest magnitude of the output, as stored in ``out``.
    """
    if tables is None or not uses_fast_loop(sos.shape[0], x.shape[1]):
        return filter_runner(sos.shape[0], x.shape[1], False)(sos, x, zi, out, None)
    run = filter_runner(sos.shape[0], x.shape[1], True, tables.decoupled)
    return _through_loop_state(zi, tables, lambda zs: run(sos, x, zs, out, tables))


def _through_loop_state(zi: np.ndarray, tables: FastTables, call: Callable) -> Any:
    """``call(zs)`` on the state ``zi`` in the fast loop's coordinates, written back into ``zi`` after."""
    zs = to_loop_state(zi, tables)
    result = call(zs)
    zi[...] = from_loop_state(zs, tables)
    return result


def to_loop_state(zi: np.ndarray, tables: FastTables) -> np.ndarray:
    """A ``zi`` state in the coordinates of the fast loop that ``tables`` are for.

    u coordinates (:func:`to_u_state`), changed by ``tables.to_loop`` where
    it is given. The fast runners keep their state in these coordinates from
    block to block; :func:`from_loop_state` gives ``zi`` back (within
    rounding).
    """
    return _changed(to_u_state(zi), tables.to_loop)


def from_loop_state(zs: np.ndarray, tables: FastTables) -> np.ndarray:
    """The ``zi`` state of a state in the fast loop's coordinates (see :func:`to_loop_state`)."""
    return from_u_state(_changed(zs, tables.from_loop))


def _changed(state: np.ndarray, matrix: np.ndarray | None) -> np.ndarray:
    """``matrix`` applied to each channel's state vector (values ``2 s + l`` of ``state[s, c, l]``)."""
    if matrix is None:
        return state
    n_sections, channels, _ = state.shape
    vectors = state.transpose(0, 2, 1).reshape(2 * n_sections, channels)
    return np.ascontiguousarray((matrix @ vectors).reshape(n_sections, 2, channels).transpose(0, 2, 1))


def to_u_state(zi: np.ndarray) -> np.ndarray:
    """A ``zi`` state (n_sections, channels, 2) in the fast loop's coordinates ``(z0, z0 + z1)``.

    The fast runners (:func:`filter_runner` with ``fast``) read and write
    their state in these coordinates, so a stream of blocks keeps it
    exactly from one block to the next; :func:`from_u_state` gives ``zi``
    back (within rounding: ``(z0 + z1) - z0`` need not be ``z1``).
    """
    zu = np.array(zi, dtype=np.float64)
    zu[..., 1] += zu[..., 0]
    return zu


def from_u_state(zu: np.ndarray) -> np.ndarray:
    """The ``zi`` state of a state in u coordinates (see :func:`to_u_state`)."""
    zi = np.array(zu, dtype=np.float64)
    zi[..., 1] -= zi[..., 0]
    return zi


_RUNNERS: dict[tuple[int, int, bool, bool], Callable] = {}


def filter_runner(n_sections: int, channels: int, fast: bool, decoupled: bool = False) -> Callable:
    """:func:`filter_unchecked` for one shape, with its loops looked up once.

    Returns ``run(sos, x, state, out, tables) -> (finite, peak)``, the same
    as ``filter_unchecked`` for a cascade of ``n_sections`` and blocks of
    ``channels`` (``tables`` given exactly when ``fast``), except that where
    the fast loop runs (``fast`` and :func:`uses_fast_loop`) ``state`` is in
    u coordinates (:func:`to_u_state`): kept in them from block to block, the
    output of a stream does not depend on where its blocks start, as long
    as they start on whole steps of :data:`FAST_STEP` frames (``decoupled``:
    the decoupled mono loop and its coordinates, :func:`to_loop_state`, for
    tables whose ``decoupled`` is True). A caller that
    filters block after block (:class:`dspeq.stream.Equalizer`) keeps it and
    saves the lookups on every block: on this machine, Python calls cost
    about 0.2 us each, a block of 4096 mono frames about 12 us.
    """
    fast = bool(fast) and uses_fast_loop(n_sections, channels)
    key = (n_sections, channels, fast, fast and bool(decoupled))
    if key not in _RUNNERS:
        _RUNNERS[key] = _make_runner(*key)
    return _RUNNERS[key]


def _make_runner(n: int, channels: int, fast: bool, decoupled: bool) -> Callable:
    if fast:
        loop = _fast_loop(n, channels, decoupled=decoupled).compiled

        def run_fast(sos, x, zs, out, tables):
            finite, peak, done = loop(x, out, zs, *tables.loop)
            if done < x.shape[0]:  # fewer than FAST_STEP frames left: the exact loop
                ok, rest = _exact_rest(sos, x[done:], zs, out[done:], tables)
                finite, peak = finite and ok, max(peak, rest)
            return finite, _stored_peak(peak, out.dtype)
        return run_fast
    if n > MAX_UNROLLED_SECTIONS:  # rare: runs of 4 sections, in float64, then one cast
        def run_long(sos, x, zi, out, tables):
            out[...] = _long_cascade(sos, x, zi)
            return _finite_state(zi), float(peak_abs(out))
        return run_long
    plan = _plan(n, channels, "float", False)
    if len(plan) == 1:  # mono, stereo, multiples of 4 channels: straight to the loop
        (loop, c0, c1), = plan

        def run_one(sos, x, zi, out, tables):
            finite, peak, _ = loop(sos, x, out, zi, c0, c1, _NO_PCM, _NO_KEYS)
            return finite, _stored_peak(peak, out.dtype)
        return run_one

    def run_passes(sos, x, zi, out, tables):
        finite, peak = _passes(plan, sos, x, out, zi)
        return finite, _stored_peak(peak, out.dtype)
    return run_passes


def _exact_rest(sos: np.ndarray, x: np.ndarray, zs: np.ndarray, out: np.ndarray,
                tables: FastTables) -> tuple[bool, float]:
    """The exact loop on the frames a fast loop left over, its state ``zs`` in the loop's coordinates."""
    zi = from_loop_state(zs, tables)
    result = filter_unchecked(sos, x, zi, out)
    zs[...] = to_loop_state(zi, tables)
    return result


def filter_quantize_unchecked(
    sos: np.ndarray, x: np.ndarray, zi: np.ndarray, out: np.ndarray,
    gain: float, bits: int, state: np.ndarray,
    tables: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[bool, int, float]:
    """Filter ``x`` and quantize the result into ``out`` in one pass.

    Equal, sample for sample, to :func:`sos_filter` into an array of
    ``x``'s dtype followed by :func:`quantize_tpdf` with the same ``gain``,
    ``bits`` and ``state``, without the intermediate array: the filter
    output of each chunk of :data:`FLUSH_EVERY` frames stays in a small
    buffer in the cache and is quantized right away, in the exact loops and
    in the fast one (``tables`` as for :func:`filter_unchecked`). Channel
    counts that need several passes (see :func:`channel_passes`) take the
    two steps.

    Returns
    -------
    finite : bool
        As :func:`filter_unchecked` (when False, ``out`` is undefined).
    clips : int
        Samples clamped at full scale.
    peak : float
        Largest magnitude of the filter output (as rounded to ``x``'s dtype),
        before the gain: the quantizer's peak is ``peak * abs(gain)``.
    """
    if tables is None or not uses_fast_loop(sos.shape[0], x.shape[1]):
        return pcm_runner(sos.shape[0], x.shape[1], False)(sos, x, zi, out, gain, bits, state, None)
    run = pcm_runner(sos.shape[0], x.shape[1], True, tables.decoupled)
    return _through_loop_state(zi, tables, lambda zs: run(sos, x, zs, out, gain, bits, state, tables))


_PCM_RUNNERS: dict[tuple[int, int, bool, bool], Callable] = {}


def pcm_runner(n_sections: int, channels: int, fast: bool, decoupled: bool = False) -> Callable:
    """:func:`filter_quantize_unchecked` for one shape, as :func:`filter_runner` is for filtering.

    Returns ``run(sos, x, state, out, gain, bits, dither_state, tables) ->
    (finite, clips, peak)``, where ``state`` is in the coordinates of
    ``filter_runner(n_sections, channels, fast, decoupled)``: ``zi``, or the
    fast loop's (:func:`to_loop_state`) where it runs.
    """
    fast = bool(fast) and uses_fast_loop(n_sections, channels)
    key = (n_sections, channels, fast, fast and bool(decoupled))
    if key not in _PCM_RUNNERS:
        _PCM_RUNNERS[key] = _make_pcm_runner(*key)
    return _PCM_RUNNERS[key]


def _make_pcm_runner(n: int, channels: int, fast: bool, decoupled: bool) -> Callable:
    filter_block = filter_runner(n, channels, fast, decoupled)
    fast_loop = _fast_loop(n, channels, pcm=True, decoupled=decoupled).compiled if fast else None

    def two_steps(sos, x, state, out, gain, bits, dither, tables):
        """Through a whole-block array: the filter, then :func:`quantize_tpdf`."""
        y = np.empty_like(x)
        finite, peak = filter_block(sos, x, state, y, tables)
        if not finite:
            return finite, 0, peak
        return finite, quantize_tpdf(y, gain, bits, dither, out)[0], peak

    def fast_pass(sos, x, state, out, gain, bits, dither, tables):
        # The quantizer takes each chunk's dither keys itself (_quantize_span):
        # no split at the key change, so the filter's steps stay on the block's grid.
        finite, peak, clips, done = fast_loop(x, out, state, *tables.loop, _pcm_params(gain, bits),
                                              dither[0], dither[1])
        dither[1] += np.uint64(done * channels)
        if done < x.shape[0]:  # fewer than FAST_STEP frames left
            ok, more, rest = two_steps(sos, x[done:], state, out[done:], gain, bits, dither, tables)
            finite, clips, peak = finite and ok, clips + more, max(peak, rest)
        return finite, clips, _stored_peak(peak, x.dtype)

    def one_pass(sos, x, state, out, gain, bits, dither, tables):
        passes = () if n > MAX_UNROLLED_SECTIONS else _plan(n, channels, "pcm", x.dtype == np.float32)
        if len(passes) != 1:
            return two_steps(sos, x, state, out, gain, bits, dither, tables)
        loop, c0, c1 = passes[0]
        finite, peak, clips = loop(sos, x, out, state, c0, c1, _pcm_params(gain, bits),
                                   _block_keys(dither[0], dither[1]))
        dither[1] += np.uint64(x.size)
        return finite, clips, _stored_peak(peak, x.dtype)

    def run(sos, x, state, out, gain, bits, dither, tables):
        # The block's dither keys hold until sample 2**32 * (k // 2**32 + 1); a
        # block that reaches past it is split there (the frame across it in two steps).
        cut = (_EPOCH - int(dither[1]) % _EPOCH) // channels
        if cut >= x.shape[0]:
            return one_pass(sos, x, state, out, gain, bits, dither, tables)
        finite, clips, peak = True, 0, 0.0
        for start, stop, part in ((0, cut, one_pass), (cut, cut + 1, two_steps),
                                  (cut + 1, x.shape[0], one_pass)):
            ok, c, p = part(sos, x[start:stop], state, out[start:stop], gain, bits, dither, tables)
            finite, clips, peak = finite and ok, clips + c, max(peak, p)
        return finite, clips, peak
    return fast_pass if fast else run


_FLOAT32 = struct.Struct("f")


def _stored_peak(peak: float, dtype: np.dtype) -> float:
    """A loop's float64 peak as the output stores it (rounded once more for float32 output).

    The rounding goes through ``struct``'s float32 (a C cast, round to
    nearest), which is about 0.3 us against 0.9 for ``np.float32(peak)``:
    this is on every block's path. A value that rounds beyond float32's
    range is stored as infinity, where ``struct`` raises instead.
    """
    if dtype.char != "f":
        return peak
    try:
        return _FLOAT32.unpack(_FLOAT32.pack(peak))[0]
    except OverflowError:
        return math.inf


_fast_here: tuple[int, ...] | None = None


def fast_channels(cpu: str | None = None) -> tuple[int, ...]:
    """Channel counts that take the fast loop on the CPU named ``cpu``.

    Parameters
    ----------
    cpu : str, optional
        LLVM's name for the CPU (``"znver1"``, ``"skylake-avx512"``, ...).
        Default: the one numba compiles for, ``NUMBA_CPU_NAME`` if set, else
        this machine's (worked out once per process).

    Returns
    -------
    tuple of int
        :data:`FAST_CHANNELS`, without stereo on :data:`NARROW_FP_CPUS`.
    """
    global _fast_here
    if cpu is None:
        if _fast_here is None:
            _fast_here = fast_channels(_target_cpu())
        return _fast_here
    return (1,) if cpu in NARROW_FP_CPUS else FAST_CHANNELS


_decoupled_here: bool | None = None


def decoupled_mono(cpu: str | None = None) -> bool:
    """Whether mono takes the decoupled loop (where a design allows it) on the CPU named ``cpu``.

    On :data:`NARROW_FP_CPUS`, where every vector operation is two lanes of
    float64 and the decoupled loop's fewer operations win (DEVELOPERS.md:
    2.5 -> 2.0 ns/sample float64 on the first-generation EPYC). Where the
    units are wider, the eight-frame step fills four lanes per operation
    and has not been measured against it. ``cpu`` as for
    :func:`fast_channels` (default: the CPU numba compiles for).
    """
    global _decoupled_here
    if cpu is None:
        if _decoupled_here is None:
            _decoupled_here = decoupled_mono(_target_cpu())
        return _decoupled_here
    return cpu in NARROW_FP_CPUS


def _target_cpu() -> str:
    """The CPU numba compiles for: ``NUMBA_CPU_NAME``, else the host's (llvmlite)."""
    name = os.environ.get("NUMBA_CPU_NAME", "").strip()
    if name and name != "host":
        return name
    import llvmlite.binding

    return llvmlite.binding.get_host_cpu_name()


def uses_fast_loop(n_sections: int, channels: int) -> bool:
    """Whether :func:`filter_unchecked` given tables runs the fast loop for this shape.

    Mono and stereo (:func:`fast_channels`): their few independent chains
    cannot fill the SIMD lanes of the exact loops. Other channel counts keep
    the bit-identical exact loops (eight and more fill the lanes there, about
    15x sosfilt), and so does stereo on :data:`NARROW_FP_CPUS`.
    """
    return n_sections <= MAX_UNROLLED_SECTIONS and channels in fast_channels()


def _passes(plan: tuple, sos: np.ndarray, x: np.ndarray, out: np.ndarray, zi: np.ndarray
            ) -> tuple[bool, float]:
    """Run the float passes of ``plan``; (all states finite, largest |output| in float64)."""
    finite, peak = True, 0.0
    for loop, c0, c1 in plan:
        ok, p, _ = loop(sos, x, out, zi, c0, c1, _NO_PCM, _NO_KEYS)
        finite, peak = finite and ok, max(peak, p)
    return finite, peak


def _long_cascade(sos: np.ndarray, x: np.ndarray, zi: np.ndarray) -> np.ndarray:
    """A cascade of more than MAX_UNROLLED_SECTIONS, run after run, in float64.

    The intermediate results stay in float64, so the split cascade is exact.
    """
    y = np.array(x, dtype=np.float64)
    for first in range(0, sos.shape[0], MAX_UNROLLED_SECTIONS):
        last = min(first + MAX_UNROLLED_SECTIONS, sos.shape[0])
        _passes(_plan(last - first, x.shape[1], "float", False), sos[first:last], y, y, zi[first:last])
    return y


def _finite_state(zi: np.ndarray) -> bool:
    return bool(np.isfinite(zi).all())


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
# Dither generator and quantizer: public wrappers
# --------------------------------------------------------------------------


def seed_state(seed: int) -> np.ndarray:
    """Make a dither generator state from an integer seed.

    Parameters
    ----------
    seed : int
        Any integer; it is taken modulo 2**64.

    Returns
    -------
    ndarray of uint64, shape (2,)
        ``[seed, samples drawn so far]``. Pass it to :func:`quantize_tpdf`
        (or :func:`tpdf_dither`) block after block; the count is advanced in
        place.
    """
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer):
        raise TypeError(f"seed must be an integer, got {seed!r}")
    return np.array([int(seed) % 2**64, 0], dtype=np.uint64)


def check_state(state: np.ndarray) -> None:
    """Raise ValueError unless ``state`` is a dither state made by :func:`seed_state`."""
    if not (isinstance(state, np.ndarray) and state.dtype == np.uint64 and state.shape == (2,)):
        raise ValueError(f"state must be a uint64 array of shape (2,) from seed_state, got {state!r}")


def tpdf_dither(n: int, state: np.ndarray) -> np.ndarray:
    """Draw ``n`` TPDF dither values (in LSB, within (-1, 1)) and advance ``state``.

    The same sequence :func:`quantize_tpdf` adds, sample by sample in
    frame-major order.
    """
    check_state(state)
    out = np.empty(int(n), dtype=np.float64)
    _TPDF_FILL(state[0], state[1], out)
    state[1] += np.uint64(out.size)
    return out


def quantize_tpdf(
    y: np.ndarray, gain: float, bits: int, state: np.ndarray, out: np.ndarray
) -> tuple[int, float]:
    """Quantize float audio to left-justified integers with TPDF dither.

    Each sample ``v = y * gain * 2**(bits - 1)`` gets TPDF dither (two
    independent uniform values in [-1/2, 1/2] LSB summed; see the module
    docstring for the generator), is rounded to the nearest integer (ties to
    even), clamped to ``[-2**(bits-1), 2**(bits-1) - 1]`` and stored as
    ``q << (32 - bits)``, the left-justified int32 form that libsndfile (and
    soundfile) expect for 8/16/24-bit PCM given int32 data.

    For ``bits=32`` no dither is added (the sample count still advances): it
    would be 2**-31 of full scale, far below the noise of any analog
    transfer, and a float64 input carries only 53 bits anyway.

    Parameters
    ----------
    y : ndarray of float32 or float64, shape (frames, channels)
        Audio with full scale at +-1.0.
    gain : float
        Linear gain applied before quantization.
    bits : {8, 16, 24, 32}
        Target word length.
    state : ndarray of uint64, shape (2,)
        Dither generator state from :func:`seed_state`; advanced in place so
        consecutive blocks continue one sequence (one value per sample, in
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
    params = _pcm_params(gain, bits)
    check_state(state)
    if y.ndim != 2 or y.dtype not in (np.float32, np.float64):
        raise ValueError(f"y must be a float32/float64 (frames, channels) array, got {y.dtype}")
    if out.dtype != np.int32 or out.shape != y.shape:
        raise ValueError(f"out must be int32 of shape {y.shape}, got {out.dtype} {out.shape}")
    flat = out.reshape(-1) if out.flags.c_contiguous else np.empty(out.size, np.int32)
    sums = np.empty(QUANTIZE_PIECE, dtype=np.int32)
    clips, nans = _QUANTIZE(y.reshape(-1), *params, state[0], state[1], flat, sums)
    if not out.flags.c_contiguous:
        out[...] = flat.reshape(out.shape)
    state[1] += np.uint64(y.size)
    peak = np.nan if nans else peak_abs(y) * abs(float(gain))
    return int(clips), float(peak)


def _pcm24_loop(x, out):
    """``out`` = the three upper bytes of each int32 of ``x``, little-endian."""
    for i in range(x.shape[0]):
        v = x[i]
        out[3 * i] = np.uint8((v >> 8) & 0xFF)
        out[3 * i + 1] = np.uint8((v >> 16) & 0xFF)
        out[3 * i + 2] = np.uint8((v >> 24) & 0xFF)


_PCM24 = _Kernel(_pcm24_loop)


def pcm_bytes(x: np.ndarray, bits: int) -> np.ndarray:
    """The samples of left-justified int32 PCM as signed little-endian ``bits``-bit bytes.

    What FLAC's STREAMINFO MD5 covers: interleaved samples, each as a
    signed integer of the word length, little-endian.

    Parameters
    ----------
    x : ndarray of int32
        Samples as :func:`quantize_tpdf` writes them (``q << (32 - bits)``).
    bits : {8, 16, 24, 32}

    Returns
    -------
    ndarray of uint8, shape (x.size * bits // 8,)

    Examples
    --------
    >>> pcm_bytes(np.array([[-2 << 8, 0x123456 << 8]], np.int32), 24).tolist()
    [254, 255, 255, 86, 52, 18]
    """
    if bits not in PCM_BITS or x.dtype != np.int32:
        raise ValueError(f"pcm_bytes needs int32 samples and bits in {PCM_BITS}, got {x.dtype}, {bits!r}")
    flat = np.ascontiguousarray(x).reshape(-1)
    if bits == 24:
        out = np.empty(flat.size * 3, np.uint8)
        _PCM24(flat, out)
        return out
    narrow = {8: np.int8, 16: np.dtype("<i2"), 32: np.dtype("<i4")}[bits]
    return (flat >> (32 - bits)).astype(narrow).view(np.uint8)


# --------------------------------------------------------------------------
# Peak
# --------------------------------------------------------------------------


def _peak_bits(u, magnitude):
    """Largest ``u & magnitude`` of the integer view ``u`` of a float array.

    Cleared of the sign bit, the bit patterns of IEEE floats sort as their
    magnitudes do and every NaN sorts above infinity, so one integer maximum
    is the peak and keeps a NaN; an integer maximum vectorizes, a float one
    that must keep NaN does not under strict float semantics.
    """
    m = magnitude ^ magnitude  # zero of u's type
    for j in range(u.shape[0]):
        a = u[j] & magnitude
        m = a if a > m else m
    return m


_PEAK = _Kernel(_peak_bits)
#: Integer view and sign-clearing mask of each float type, for _peak_bits.
_MAGNITUDE = {np.dtype(np.float32): np.int32(0x7FFFFFFF),
              np.dtype(np.float64): np.int64(0x7FFFFFFFFFFFFFFF)}


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
    flat = x.ravel(order="K")
    mask = _MAGNITUDE[flat.dtype]
    bits = _PEAK(flat.view(mask.dtype), mask)
    return float(np.asarray(bits, dtype=mask.dtype).view(flat.dtype))
