"""Throughput of the streaming filter core against scipy.signal.sosfilt.

Prints Markdown tables to stdout (``--markdown FILE`` also writes them):

1. Equalizer (exact, and fast: ``exact=False``) vs sosfilt, all streaming
   with carried state over the same data, for 60 s of noise at 96 kHz,
   float64 and float32, block sizes 256 / 4096 / 65536, 1, 2 and 8
   channels: median CPU time of N rounds in which the contenders run side
   by side, and the spread of the ratio.
2. Accuracy of the fast path: max relative error against sosfilt and against
   sosfilt in extended precision, over 10 minutes at 96 kHz (1 with --quick)
   for the default RIAA design and designs with poles at |z| = 0.9999.
3. The floor: the recursion's dependency chain, timed alone, and what limits
   the fast path; the fast mono loop's time taken apart (per-block work,
   memory, arithmetic).
4. Denormals: an impulse followed by 20 s of digital silence vs 20 s of
   noise, and the cost of the flush on normal audio.
5. Filter + TPDF quantizer: fused pass vs two passes vs numpy.
6. First-call compile time (empty cache) and cached start, in fresh processes.

The filter is the cascade of the default design of the RIAA playback curve
at 96 kHz (``dspeq.design("riaa", 96000)``, the "fit" method: 2 sections).

Usage::

    python benchmarks/bench_kernel.py            # full run (a few minutes)
    python benchmarks/bench_kernel.py --quick    # 10 s of audio, fewer rounds
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from scipy import signal

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from dspeq import _kernels  # noqa: E402
from dspeq.stream import Equalizer  # noqa: E402

__all__ = ["main", "default_sos", "side_by_side", "kernel_sections", "machine_line"]

FS = 96000


def default_sos(fs: int = FS) -> np.ndarray:
    """The cascade of dspeq's default RIAA playback design at ``fs``."""
    from dspeq import design

    return np.array(design("riaa", fs).sos, dtype=np.float64, order="C")  # a writable copy


def side_by_side(rounds: int, funcs: list[Callable[[], object]]) -> list[list[float]]:
    """CPU times of each function in ``rounds`` rounds, the functions interleaved.

    CPU time of this process (every contender runs single-threaded in it) is
    steadier than wall time on a shared machine; interleaving makes slow
    phases of the machine hit all contenders alike.
    """
    times: list[list[float]] = [[] for _ in funcs]
    for _ in range(rounds):
        for i, func in enumerate(funcs):
            start = time.process_time()
            func()
            times[i].append(time.process_time() - start)
    return times


def ratio_text(reference: list[float], ours: list[float]) -> str:
    """Median ratio of paired rounds, with its range: '5.6x (5.1-5.9)'."""
    ratios = sorted(r / o for r, o in zip(reference, ours, strict=True))
    return f"{statistics.median(ratios):.1f}x ({ratios[0]:.1f}–{ratios[-1]:.1f})"


def stream_equalizer(sos: np.ndarray, x: np.ndarray, block: int, exact: bool = True
                     ) -> Callable[[], None]:
    eq = Equalizer(sos, channels=x.shape[1], exact=exact)
    out = np.empty_like(x)

    def run() -> None:
        eq.reset()
        for i in range(0, len(x), block):
            eq.process(x[i : i + block], out=out[i : i + block])

    return run


def stream_sosfilt(sos: np.ndarray, x: np.ndarray, block: int) -> Callable[[], None]:
    zi0 = np.zeros((sos.shape[0], 2, x.shape[1]))
    out = np.empty_like(x)

    def run() -> None:
        zi = zi0
        for i in range(0, len(x), block):
            y, zi = signal.sosfilt(sos, x[i : i + block], axis=0, zi=zi)
            out[i : i + block] = y  # casts to float32 for float32 input

    return run


def throughput_table(sos: np.ndarray, seconds: float, rounds: int) -> list[str]:
    rows = [
        f"### Equalizer vs scipy.signal.sosfilt ({seconds:g} s of noise at {FS} Hz, "
        f"{sos.shape[0]} sections, median of {rounds} side-by-side rounds)",
        "",
        "All three stream the signal in blocks with carried state and write into one output "
        "array; the ratio is the median of the per-round ratios (range in brackets). "
        "Exact: `Equalizer(...)`, bit-identical to sosfilt. Fast: `Equalizer(..., exact=False)`, "
        "which differs for mono and stereo only (within rounding: next table); with 8 channels it "
        "runs the exact loops, and so it does for stereo on CPUs where those measured faster "
        f"(`_kernels.fast_channels`; stereo on this CPU: {_stereo_loop_here()}). Target: 5x.",
        "",
        "| dtype | channels | block | sosfilt ns/sample | exact ns/sample | exact speed-up "
        "| fast ns/sample | fast speed-up |",
        "|---|---:|---:|---:|---:|---:|---:|---:|",
    ]
    rng = np.random.default_rng(0)
    for dtype in (np.float64, np.float32):
        for channels in (1, 2, 8):
            x = (0.1 * rng.standard_normal((int(seconds * FS), channels))).astype(dtype)
            for exact in (True, False):
                stream_equalizer(sos, x[:600], 600, exact)()  # compile outside the timing
            for block in (256, 4096, 65536):
                t_ref, t_eq, t_fast = side_by_side(rounds, [
                    stream_sosfilt(sos, x, block), stream_equalizer(sos, x, block),
                    stream_equalizer(sos, x, block, exact=False)])
                ns = 1e9 / x.size
                med = statistics.median
                rows.append(
                    f"| {np.dtype(dtype).name} | {channels} | {block} | {med(t_ref) * ns:.1f} "
                    f"| {med(t_eq) * ns:.2f} | {ratio_text(t_ref, t_eq)} "
                    f"| {med(t_fast) * ns:.2f} | {ratio_text(t_ref, t_fast)} |"
                )
                print(rows[-1], file=sys.stderr, flush=True)
    return rows


def _streamed_errors(sos: np.ndarray, frames: int, block: int = 1 << 20) -> tuple[float, float, float]:
    """Max |difference| / max |reference| of fast vs sosfilt, fast vs extended, sosfilt vs extended.

    The signal (noise plus a slow random walk, mono) is made, filtered and
    compared block by block, so ten minutes need no big arrays; "extended"
    is scipy's sosfilt in np.longdouble (the same recursion, 64-bit mantissa
    on x86).
    """
    rng = np.random.default_rng(11)
    eq = Equalizer(sos, exact=False)
    zi = np.zeros((sos.shape[0], 2))
    zl = np.zeros((sos.shape[0], 2), np.longdouble)
    sos_l = sos.astype(np.longdouble)
    walk = 0.0
    worst = np.zeros(3)
    peaks = np.zeros(2)
    for start in range(0, frames, block):
        n = min(block, frames - start)
        steps = np.cumsum(rng.standard_normal(n)) * (0.01 / np.sqrt(frames)) + walk
        walk = steps[-1]
        x = 0.1 * rng.standard_normal(n) + steps
        fast = eq.process(x)
        ref, zi = signal.sosfilt(sos, x, zi=zi)
        ext, zl = signal.sosfilt(sos_l, x.astype(np.longdouble), zi=zl)
        worst = np.maximum(worst, [np.max(np.abs(fast - ref)), float(np.max(np.abs(fast - ext))),
                                   float(np.max(np.abs(ref - ext)))])
        peaks = np.maximum(peaks, [np.max(np.abs(ref)), float(np.max(np.abs(ext)))])
    return worst[0] / peaks[0], worst[1] / peaks[1], worst[2] / peaks[1]


def accuracy_table(minutes: float) -> list[str]:
    from dspeq import design

    frames = int(minutes * 60 * FS)
    rows = [
        f"### Fast path accuracy (mono, {frames} samples = {minutes:g} min at {FS} Hz, blocks of 2^20)",
        "",
        "Max |difference| over the whole signal / max |output|. \"extended\" is the same "
        "recursion in extended precision (scipy's sosfilt on np.longdouble). Near z = 1 the "
        "float64 recursion itself drifts (sosfilt's own column): there no float64 method can "
        "be within 1e-12 of sosfilt, and the contract is that the fast path is no worse than "
        "sosfilt against the extended result (tests/test_fastpath.py).",
        "",
        "| design | sections | largest pole radius | fast vs sosfilt | fast vs extended "
        "| sosfilt vs extended |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for name, rate in (("riaa", 96000), ("riaa-iec", 192000), ("iec-15ips", 192000),
                       ("disc-500-16", 192000)):
        sos = np.array(design(name, rate).sos, dtype=np.float64, order="C")
        radius = max(float(np.abs(np.roots(row[3:])).max()) for row in sos)
        errors = _streamed_errors(sos, frames)
        rows.append(f"| {name} at {rate} Hz | {sos.shape[0]} | {radius:.6f} | "
                    + " | ".join(f"{e:.1e}" for e in errors) + " |")
        print(rows[-1], file=sys.stderr, flush=True)
    return rows


def _chain_floor(n: int) -> float:
    """ns per sample of the bare recursion of one section (mono, nothing else in the loop)."""
    import numba

    @numba.njit(nogil=True)
    def chain(x, y, c):
        z0 = z1 = 0.0
        for i in range(x.shape[0]):
            v = x[i]
            w = c[0] * v + z0
            z0 = c[1] * v - c[3] * w + z1
            z1 = c[2] * v - c[4] * w
            y[i] = w
        return z0

    x = np.random.default_rng(3).standard_normal(n)
    y = np.empty_like(x)
    c = np.array([0.5, 0.1, 0.05, -1.8, 0.81])
    chain(x[:8], y[:8], c)
    return min(side_by_side(5, [lambda: chain(x, y, c)])[0]) / n * 1e9


def floor_table(sos: np.ndarray) -> list[str]:
    floor = _chain_floor(4 * FS)
    x = 0.1 * np.random.default_rng(4).standard_normal((4 * FS, 1))
    exact, fast = side_by_side(5, [stream_equalizer(sos, x, 65536),
                                   stream_equalizer(sos, x, 65536, exact=False)])
    mono, fast = min(exact) / x.size * 1e9, min(fast) / x.size * 1e9
    return [
        "### What limits a single channel",
        "",
        "Every sample of a section waits for the previous one through one multiply and "
        "three additions (`z0 = (b1*x - a1*y) + z1`, then `y = b0*x + z0`); bit-identity "
        "with sosfilt forbids reordering them. That chain, timed alone for one section:",
        "",
        "| loop | ns/sample |",
        "|---|---:|",
        f"| bare recursion of 1 section, mono (the latency floor) | {floor:.2f} |",
        f"| Equalizer, mono, {sos.shape[0]} sections, blocks of 65536 | {mono:.2f} |",
        f"| Equalizer(exact=False), mono, {sos.shape[0]} sections, blocks of 65536 | {fast:.2f} |",
        "",
        "The sections of a cascade overlap (section 2 of sample n runs while section 1 of "
        "sample n+1 does), so a single channel runs at about the floor whatever the number of "
        "sections, and sosfilt's C loop pays the same chain plus its own overhead: mono and "
        "stereo cannot reach 5x at large blocks without giving up bit-identity. (The one-lane "
        "loop is compiled without LLVM's SLP vectorizer, which would pack the sections' "
        "statements into one register and so chain the sections together: twice the floor.) "
        "Eight independent channels fill the SIMD lanes, which is where they gain.",
        "",
        "The fast path (mono and stereo, `exact=False`) breaks the chain: it computes eight "
        "frames at a time straight from the state before them, with small matrices made in "
        "extended precision (the cascade's response to each unit state and to an impulse at "
        "each frame of the step). The eight outputs do not depend on each other, so they fill "
        "one 512-bit register (or two 256-bit ones) per channel, and the only loop-carried work"
        " is the state update, a small matrix-vector product once per eight frames. Stereo "
        "keeps the step that LLVM's SLP vectorizer packs from scalar code; mono's step is "
        "written as LLVM vector code (`_mono_steps_intrinsic`). On CPUs whose floating-point "
        "units are 128 bits wide (`NARROW_FP_CPUS`: this one, if its name is `znver1`) mono "
        "runs the decoupled loop instead (`_kernels.decoupled_tables`): substeps of four frames "
        "in state coordinates where each section evolves on its own (a 2 x 2 block, two "
        "products per pair of values) and is its share of the substep's first two outputs (no "
        "products for those at all), every value a pair of float64 lanes: 44 fused "
        "multiply-adds per eight frames of a 2-section cascade against 64, and 102 "
        "instructions. Designs whose coordinates would cost accuracy (sections with the same "
        "poles, or a basis that would round a slow pole's decay) keep the eight-frame step. "
        "The state chain and the outputs share the same floating-point units, and a channel "
        "runs at about the same speed in the cache and out of it: the arithmetic, not memory, "
        "is the limit (DEVELOPERS.md), once the loop asks for its cache lines ahead "
        "(PREFETCH_AHEAD). How fast the CPU does that arithmetic sets the figure (the last row "
        "above; on an Intel Xeon guest whose LLVM tuning prefers 256-bit registers, mono "
        "float64 0.96-1.10 ns/sample in the eight-frame vector code, float32 1.11-1.20).",
    ]


def _unflushed_loop(n_sections: int, lanes: int) -> Callable:
    """The same generated loop with the flush made a no-op (for comparison)."""
    import numba

    source = _kernels._sos_loop_source(n_sections, lanes, "float")
    namespace = {"np": np, "FLUSH_EVERY": _kernels.FLUSH_EVERY, "FLUSH_BELOW": 0.0,
                 "_U32": np.uint32, "_quantize_run": None, "_lanes_state": _kernels._LANES_STATE.compiled,
                 "_store_state": _kernels._STORE_STATE.compiled, **_kernels._LANE_CONSTANTS,
                 "PREFETCH_AHEAD": _kernels.PREFETCH_AHEAD, "_prefetch": _kernels._PREFETCH.compiled,
                 "_prefetch_write": _kernels._PREFETCH_WRITE.compiled}
    exec(compile(source, "<unflushed>", "exec"), namespace)  # noqa: S102
    loop = numba.njit(nogil=True)(namespace[_kernels._sos_loop_name(n_sections, lanes, "float", False)])
    if lanes > 1:  # compiled exactly as the real one (see _kernels._sos_loop)
        _kernels._with_slp_vectorizer(loop)
    return loop


def _fast_mono_split(sos: np.ndarray, dtype: type) -> list[float]:
    """ns/sample of the fast mono loop, peeled: see :func:`fast_mono_table`."""
    n, block, small = 20 * FS, 65536, 16384
    x = (0.1 * np.random.default_rng(5).standard_normal((n, 1))).astype(dtype)
    y = np.empty_like(x)
    tables = _kernels.fast_tables(sos, 1)
    loop = _kernels._fast_loop(sos.shape[0], 1, decoupled=tables.decoupled).compiled
    zs = _kernels.to_loop_state(np.zeros((sos.shape[0], 1, 2)), tables)
    x_small, y_small = x[:small].copy(), y[:small]

    def direct() -> None:
        for i in range(0, n, block):
            loop(x[i : i + block], y[i : i + block], zs, *tables.loop)

    def in_cache() -> None:
        for _ in range(n // small):
            loop(x_small, y_small, zs, *tables.loop)

    def copy() -> None:
        for i in range(0, n, block):
            np.multiply(x[i : i + block], 1.5, out=y[i : i + block])

    runs = [stream_equalizer(sos, x, block, exact=False), direct, in_cache, copy]
    frames = [n, n, n // small * small, n]  # what each run filters or copies
    for run in runs:
        run()  # compiled and in the cache before the timing
    return [min(t) / f * 1e9 for t, f in zip(side_by_side(5, runs), frames, strict=True)]


def fast_mono_table(sos: np.ndarray) -> list[str]:
    """Where the fast mono loop's time goes: per-block work, memory, arithmetic."""
    split = {dtype: _fast_mono_split(sos, dtype) for dtype in (np.float64, np.float32)}
    labels = [
        "Equalizer(exact=False).process, blocks of 65536 (as in the first table)",
        "the compiled fast loop called directly on the same blocks",
        "the compiled fast loop on one block of 16384 frames, again and again (in the cache)",
        "numpy `multiply(x, 1.5, out=y)` on the same blocks (the memory traffic alone)",
    ]
    rows = [
        f"### Where the fast mono loop's time goes (20 s at {FS} Hz, {sos.shape[0]} sections, "
        "best of 5 side-by-side rounds, ns/sample)",
        "",
        "The first row less the second is the Equalizer's own work per block (checks, the "
        "state's copy, the call); the second against the third shows whether memory holds the "
        "loop back (the same work, out of the cache and in it); the last row is what reading "
        "the input and writing the output cost by themselves.",
        "",
        "| run | float64 | float32 |",
        "|---|---:|---:|",
    ]
    rows += [f"| {label} | {split[np.float64][i]:.2f} | {split[np.float32][i]:.2f} |"
             for i, label in enumerate(labels)]
    return rows


def denormal_table(sos: np.ndarray, rounds: int) -> list[str]:
    frames, channels = 20 * FS, 2
    noise = 0.1 * np.random.default_rng(1).standard_normal((frames, channels))
    impulse = np.zeros_like(noise)
    impulse[0] = 1.0
    t_noise, t_tail, s_noise, s_tail = side_by_side(
        rounds,
        [
            stream_equalizer(sos, noise, 4096),
            stream_equalizer(sos, impulse, 4096),
            stream_sosfilt(sos, noise, 4096),
            stream_sosfilt(sos, impulse, 4096),
        ],
    )
    plain = _unflushed_loop(sos.shape[0], channels)
    flushed = _kernels._sos_loop(sos.shape[0], channels).compiled
    y = np.empty_like(noise)

    def call(loop: Callable, x: np.ndarray, repeat: int = 1) -> Callable[[], object]:
        zi = np.zeros((sos.shape[0], channels, 2))
        return lambda: [loop(sos, x, y, zi * 0.0, 0, channels, _kernels._NO_PCM, _kernels._NO_KEYS)
                        for _ in range(repeat)]

    call(plain, noise[:8])()
    k_plain, k_flush, k_plain_tail = side_by_side(
        rounds, [call(plain, noise, 5), call(flushed, noise, 5), call(plain, impulse, 5)]
    )
    subnormal = []
    for loop in (plain, flushed):
        call(loop, impulse)()
        subnormal.append(np.count_nonzero((y != 0) & (np.abs(y) < np.finfo(np.float64).tiny)))
    med = statistics.median
    return [
        f"### Denormals (stereo, 20 s at {FS} Hz, blocks of 4096, median of {rounds})",
        "",
        "Target: impulse + silence within 1.5x of noise; the flush may change the output "
        "only below -300 dBFS and cost at most 10 % on normal audio.",
        "",
        "| case | impulse + 20 s silence (s) | 20 s noise (s) | ratio |",
        "|---|---:|---:|---:|",
        f"| Equalizer (flush every {_kernels.FLUSH_EVERY} frames below "
        f"{_kernels.FLUSH_BELOW:g}) | {med(t_tail):.3f} | {med(t_noise):.3f} "
        f"| {med(t_tail) / med(t_noise):.2f} |",
        f"| scipy.signal.sosfilt | {med(s_tail):.3f} | {med(s_noise):.3f} "
        f"| {med(s_tail) / med(s_noise):.2f} |",
        f"| same loop without flush (5 calls) | {med(k_plain_tail):.3f} | {med(k_plain):.3f} "
        f"| {med(k_plain_tail) / med(k_plain):.2f} |",
        "",
        f"Flush cost on noise (5 calls over the whole 20 s): {med(k_flush):.3f} s with flush vs "
        f"{med(k_plain):.3f} s without ({100 * (med(k_flush) / med(k_plain) - 1):+.1f} %). "
        f"Subnormal output samples in the impulse tail: {subnormal[0]} without the flush, "
        f"{subnormal[1]} with it. On CPUs that handle subnormals at full speed (this one, "
        "if both ratios are near 1) the flush is insurance for those that do not.",
    ]


def numpy_quantize(y: np.ndarray, rng: np.random.Generator, out: np.ndarray) -> tuple[int, float]:
    """What the kernel replaces: numpy dither, rounding, clip count, peak (24 bit)."""
    scale = 2.0**23
    v = y * scale
    peak = float(np.abs(v).max()) / scale
    v += rng.random(y.shape)
    v += rng.random(y.shape)
    v -= 1.0
    np.rint(v, out=v)
    clips = int(np.count_nonzero((v > 2**23 - 1) | (v < -(2**23))))
    np.clip(v, -(2**23), 2**23 - 1, out=v)
    np.left_shift(v.astype(np.int32), 8, out=out)
    return clips, peak


def quantize_table(sos: np.ndarray, rounds: int) -> list[str]:
    frames, channels = 10 * FS, 2
    x = (0.1 * np.random.default_rng(2).standard_normal((frames, channels))).astype(np.float32)
    y = np.empty_like(x)
    out = np.empty(x.shape, np.int32)
    rng = np.random.default_rng(3)
    block = 65536
    tables = _kernels.fast_tables(sos, channels)

    def blocks(step: Callable[[slice, np.ndarray, np.ndarray], object]) -> Callable[[], None]:
        def run() -> None:
            zi, state = np.zeros((sos.shape[0], channels, 2)), _kernels.seed_state(1)
            for i in range(0, frames, block):
                step(slice(i, i + block), zi, state)
        return run

    contenders = {
        "filter only (Equalizer loop)": lambda s, zi, st: _kernels.filter_unchecked(sos, x[s], zi, y[s]),
        "filter, then quantize_tpdf": lambda s, zi, st: (
            _kernels.filter_unchecked(sos, x[s], zi, y[s]),
            _kernels.quantize_tpdf(y[s], 1.0, 24, st, out[s])),
        "fused filter + quantize (one pass)": lambda s, zi, st: _kernels.filter_quantize_unchecked(
            sos, x[s], zi, out[s], 1.0, 24, st),
        "fast filter only (the fast stereo loop)": _fast_loop_everywhere(
            lambda s, zi, st: _kernels.filter_unchecked(sos, x[s], zi, y[s], tables)),
        "fast fused filter + quantize (the fast stereo loop)": _fast_loop_everywhere(
            lambda s, zi, st: _kernels.filter_quantize_unchecked(sos, x[s], zi, out[s], 1.0, 24,
                                                                 st, tables)),
        "quantize_tpdf alone": lambda s, zi, st: _kernels.quantize_tpdf(y[s], 1.0, 24, st, out[s]),
        "filter, then numpy dither + quantize": lambda s, zi, st: (
            _kernels.filter_unchecked(sos, x[s], zi, y[s]), numpy_quantize(y[s], rng, out[s])),
        "peak_abs alone": lambda s, zi, st: _kernels.peak_abs(y[s]),
    }
    funcs = [blocks(step) for step in contenders.values()]
    for f in funcs:
        f()
    times = side_by_side(rounds, funcs)
    per = 1e9 / x.size
    rows = [
        "### Filter + TPDF quantizer (stereo float32 in, 24-bit out, blocks of 65536, per sample)",
        "",
        "| pass | ns/sample |",
        "|---|---:|",
    ]
    rows += [f"| {name} | {statistics.median(t) * per:.2f} |" for name, t in zip(contenders, times,
                                                                              strict=True)]
    return rows + ["", f"The batch runs the {_stereo_loop_here()} fused pass for stereo on this CPU "
                   "(`_kernels.fast_channels`: the exact loops where they measured faster)."]


def _stereo_loop_here() -> str:
    """Which loop ``exact=False`` runs for stereo on this CPU, with the CPU's LLVM name."""
    loop = "fast" if 2 in _kernels.fast_channels() else "exact"
    return f"{loop} (`{_kernels._target_cpu()}`)"


def _fast_loop_everywhere(step: Callable) -> Callable:
    """``step`` run with the fast loop for mono and stereo, whatever this CPU's choice."""
    def run(*args):
        here = _kernels._fast_here
        _kernels._fast_here = _kernels.FAST_CHANNELS
        try:
            return step(*args)
        finally:
            _kernels._fast_here = here
    return run


_COMPILE_SCRIPT = """
import time, sys
t0 = time.perf_counter()
import numpy as np
from dspeq.stream import Equalizer
from dspeq import _kernels
assert "numba" not in sys.modules, "importing dspeq.stream imported numba"
t1 = time.perf_counter()
eq = Equalizer({sos}, channels=2)
x = np.zeros((256, 2))
t2 = time.perf_counter(); eq.process(x); t3 = time.perf_counter()
eq.process(x.astype(np.float32)); t4 = time.perf_counter()
out = np.empty((256, 2), np.int32)
eq.process_pcm(x.astype(np.float32), 1.0, 24, _kernels.seed_state(1), out); t5 = time.perf_counter()
eq.process(x); t6 = time.perf_counter()
print(t1 - t0, t3 - t2, t4 - t3, t5 - t4, t6 - t5)
"""


def compile_table(sos: np.ndarray) -> list[str]:
    script = _COMPILE_SCRIPT.format(sos=sos.tolist())
    rows = [
        "### First call (stereo, separate processes)",
        "",
        "`import dspeq.stream` imports neither numba nor compiles anything; each loop "
        "compiles on its first call and is then loaded from numba's disk cache "
        "(`NUMBA_CACHE_DIR`, else `__pycache__`, else the user cache, else a private "
        "folder under the temporary directory: read-only installs work, see "
        "`tests/test_kernels.py::test_cache_falls_back_to_temporary_directory`).",
        "",
        "| cache | import (s) | 1st process() float64 (s) | 1st float32 (s) "
        "| 1st process_pcm() float32 (s) | later call (us) |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache, PYTHONPATH=str(ROOT))
        for label in ("empty (compiles)", "warm (loads from disk)"):
            out = subprocess.run(
                [sys.executable, "-c", script], cwd=ROOT, env=env, check=True,
                capture_output=True, text=True,
            ).stdout.split()
            t = [float(v) for v in out]
            rows.append(f"| {label} | {t[0]:.2f} | {t[1]:.2f} | {t[2]:.2f} | {t[3]:.2f} "
                        f"| {t[4] * 1e6:.0f} |")
    return rows


def kernel_sections(quick: bool = False) -> list[list[str]]:
    """Every table of this benchmark (what bench_batch puts into docs/performance.md)."""
    seconds, rounds, minutes = (10.0, 3, 1.0) if quick else (60.0, 5, 10.0)
    sos = default_sos()
    return [
        throughput_table(sos, seconds, rounds),
        accuracy_table(minutes),
        floor_table(sos),
        fast_mono_table(sos),
        denormal_table(sos, rounds),
        quantize_table(sos, rounds),
        compile_table(sos),
    ]


def machine_line() -> str:
    import numba
    import scipy

    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    return (f"CPU: {_cpu_name()} ({os.cpu_count()} cores); load average at start {load:.2f}; "
            f"python {sys.version.split()[0]}, numpy {np.__version__}, scipy {scipy.__version__}, "
            f"numba {numba.__version__}")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help="10 s of audio, 3 rounds each; 1 minute for the accuracy table")
    parser.add_argument("--markdown", type=Path, help="also write the tables to this file")
    args = parser.parse_args(argv)
    head = machine_line()
    text = "\n\n".join([head, *("\n".join(rows) for rows in kernel_sections(args.quick))]) + "\n"
    print(text)
    if args.markdown:
        args.markdown.write_text(text)


def _cpu_name() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return "unknown"


if __name__ == "__main__":
    main()
