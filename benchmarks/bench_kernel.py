"""Throughput of the streaming filter core against scipy.signal.sosfilt.

Prints Markdown tables to stdout:

1. Equalizer vs sosfilt (both streaming with carried state, same data, best
   CPU time of N interleaved runs) for 60 s of noise at 96 kHz, float64 and float32,
   block sizes 256 / 4096 / 65536, 1, 2 and 8 channels.
2. Denormals: an impulse followed by 20 s of digital silence vs 20 s of
   noise, and the cost of the flush on normal audio.
3. First-call compile time (fresh cache) and cached start.
4. quantize_tpdf and peak_abs against plain numpy, per sample.

The filter is a 2-section cascade: RIAA playback (318 / 3180 / 75 us) with
the IEC 60098 amendment's 7950 us high-pass, bilinear (no prewarp) at 96 kHz.

Usage::

    python benchmarks/bench_kernel.py            # full run (several minutes)
    python benchmarks/bench_kernel.py --quick    # 10 s of audio, fewer repeats
"""

from __future__ import annotations

import argparse
import os
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

__all__ = ["main", "riaa_sos"]

FS = 96000


def riaa_sos(fs: int = FS) -> np.ndarray:
    """RIAA playback with the 7950 us high-pass, bilinear at ``fs`` (2 sections)."""
    z, p, k = signal.bilinear_zpk(
        [-1 / 318e-6, 0.0], [-1 / 3180e-6, -1 / 75e-6, -1 / 7950e-6], 1.0, fs
    )
    return np.ascontiguousarray(signal.zpk2sos(z, p, k))


def best_of(runs: int, funcs: list[Callable[[], object]]) -> list[float]:
    """Best CPU time of each function over ``runs`` interleaved rounds.

    CPU time of this process (every contender runs single-threaded in it) is
    steadier than wall time on a shared machine.
    """
    best = [float("inf")] * len(funcs)
    for _ in range(runs):
        for i, func in enumerate(funcs):
            start = time.process_time()
            func()
            best[i] = min(best[i], time.process_time() - start)
    return best


def stream_equalizer(sos: np.ndarray, x: np.ndarray, block: int) -> Callable[[], None]:
    eq = Equalizer(sos, channels=x.shape[1])
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


def throughput_table(seconds: float, runs: int) -> list[str]:
    sos = riaa_sos()
    rows = [
        f"### Equalizer vs scipy.signal.sosfilt ({seconds:g} s at {FS} Hz, "
        f"{sos.shape[0]} sections, best of {runs})",
        "",
        "| dtype | channels | block | sosfilt x realtime | Equalizer x realtime "
        "| Equalizer Msample/s | speed-up |",
        "|---|---:|---:|---:|---:|---:|---:|",
    ]
    rng = np.random.default_rng(0)
    for dtype in (np.float64, np.float32):
        for channels in (1, 2, 8):
            x = (0.1 * rng.standard_normal((int(seconds * FS), channels))).astype(dtype)
            stream_equalizer(sos, x[:64], 64)()  # compile outside the timing
            for block in (256, 4096, 65536):
                t_ref, t_eq = best_of(
                    runs, [stream_sosfilt(sos, x, block), stream_equalizer(sos, x, block)]
                )
                rows.append(
                    f"| {np.dtype(dtype).name} | {channels} | {block} | {seconds / t_ref:.0f} "
                    f"| {seconds / t_eq:.0f} | {x.size / t_eq / 1e6:.0f} | {t_ref / t_eq:.1f}x |"
                )
            print(rows[-1], file=sys.stderr, flush=True)
    return rows


def _unflushed_loop(n_sections: int, layout: int) -> Callable:
    """The same generated loop with the flush pushed out of reach (for comparison)."""
    import numba

    name, source = _kernels._sos_loop_source(n_sections, layout)
    namespace = {"np": np, "FLUSH_EVERY": 1 << 62, "FLUSH_BELOW": _kernels.FLUSH_BELOW}
    exec(compile(source, "<unflushed>", "exec"), namespace)  # noqa: S102
    return numba.njit(nogil=True)(namespace[name])


def denormal_table(runs: int) -> list[str]:
    sos = riaa_sos()
    frames, channels = 20 * FS, 2
    noise = 0.1 * np.random.default_rng(1).standard_normal((frames, channels))
    impulse = np.zeros_like(noise)
    impulse[0] = 1.0
    t_noise, t_tail, s_noise, s_tail = best_of(
        runs,
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

    def call(loop: Callable, x: np.ndarray) -> Callable[[], object]:
        return lambda: loop(sos, x, y, np.zeros((sos.shape[0], channels, 2)))

    call(plain, noise[:8])()
    k_plain, k_flush, k_plain_tail = best_of(
        runs, [call(plain, noise), call(flushed, noise), call(plain, impulse)]
    )
    subnormal = []
    for loop in (plain, flushed):
        call(loop, impulse)()
        subnormal.append(np.count_nonzero((y != 0) & (np.abs(y) < np.finfo(np.float64).tiny)))
    return [
        f"### Denormals (stereo, 20 s at {FS} Hz, blocks of 4096, best of {runs})",
        "",
        "| case | impulse + 20 s silence (s) | 20 s noise (s) | ratio |",
        "|---|---:|---:|---:|",
        f"| Equalizer (flush every {_kernels.FLUSH_EVERY} frames below "
        f"{_kernels.FLUSH_BELOW:g}) | {t_tail:.3f} | {t_noise:.3f} | {t_tail / t_noise:.2f} |",
        f"| scipy.signal.sosfilt | {s_tail:.3f} | {s_noise:.3f} | {s_tail / s_noise:.2f} |",
        f"| same loop without flush (one call) | {k_plain_tail:.3f} | {k_plain:.3f} "
        f"| {k_plain_tail / k_plain:.2f} |",
        "",
        f"Flush cost on noise (one call, whole 20 s): {k_flush:.3f} s with flush vs "
        f"{k_plain:.3f} s without ({100 * (k_flush / k_plain - 1):+.1f} %). "
        f"Subnormal output samples in the impulse tail: {subnormal[0]} without the flush, "
        f"{subnormal[1]} with it.",
    ]


_COMPILE_SCRIPT = """
import time
t0 = time.perf_counter()
import numpy as np
from dspeq.stream import Equalizer
import numba
t1 = time.perf_counter()
eq = Equalizer({sos}, channels=2)
x = np.zeros((256, 2))
t2 = time.perf_counter(); eq.process(x); t3 = time.perf_counter(); eq.process(x)
t4 = time.perf_counter()
print(t1 - t0, t3 - t2, t4 - t3)
"""


def compile_table() -> list[str]:
    script = _COMPILE_SCRIPT.format(sos=riaa_sos().tolist())
    rows = [
        "### First call (2-section cascade, stereo float64, separate process)",
        "",
        "| cache | import dspeq.stream + numba (s) | first process() (s) | second (s) |",
        "|---|---:|---:|---:|",
    ]
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        for label in ("empty (compiles)", "warm (loads from disk)"):
            out = subprocess.run(
                [sys.executable, "-c", script], cwd=ROOT, env=env, check=True,
                capture_output=True, text=True,
            ).stdout.split()
            rows.append(f"| {label} | {float(out[0]):.2f} | {float(out[1]):.3f} "
                        f"| {float(out[2]) * 1e6:.0f} us |")
    return rows


def numpy_quantize(y: np.ndarray, rng: np.random.Generator, out: np.ndarray) -> tuple[int, float]:
    """What quantize_tpdf replaces: numpy dither, rounding, clip count, peak."""
    scale = 2.0**15
    v = y * scale
    peak = float(np.abs(v).max()) / scale
    v += rng.random(y.shape)
    v += rng.random(y.shape)
    v -= 1.0
    np.rint(v, out=v)
    clips = int(np.count_nonzero((v > 32767) | (v < -32768)))
    np.clip(v, -32768, 32767, out=v)
    np.left_shift(v.astype(np.int32), 16, out=out)
    return clips, peak


def quantize_table(runs: int) -> list[str]:
    y = np.random.default_rng(2).uniform(-1, 1, (65536, 2))
    out = np.empty(y.shape, np.int32)
    state, rng = _kernels.seed_state(1), np.random.default_rng(3)
    _kernels.quantize_tpdf(y[:4], 1.0, 16, state, out[:4])
    _kernels.peak_abs(y[:4])
    reps = 20
    t_k, t_np, t_pk, t_pnp = best_of(
        runs,
        [
            lambda: [_kernels.quantize_tpdf(y, 1.0, 16, state, out) for _ in range(reps)],
            lambda: [numpy_quantize(y, rng, out) for _ in range(reps)],
            lambda: [_kernels.peak_abs(y) for _ in range(reps)],
            lambda: [float(np.abs(y).max()) for _ in range(reps)],
        ],
    )
    per = 1e9 / (reps * y.size)
    return [
        "### Quantization and peak (65536 x 2 float64 blocks, 16 bit, per sample)",
        "",
        "| operation | dspeq kernel (ns) | numpy (ns) | speed-up |",
        "|---|---:|---:|---:|",
        f"| TPDF dither + round + clip count + peak + left-justify | {t_k * per:.2f} "
        f"| {t_np * per:.2f} | {t_np / t_k:.1f}x |",
        f"| peak_abs vs np.abs(x).max() | {t_pk * per:.2f} | {t_pnp * per:.2f} "
        f"| {t_pnp / t_pk:.1f}x |",
    ]


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="10 s of audio, 2 runs each")
    args = parser.parse_args(argv)
    seconds, runs = (10.0, 2) if args.quick else (60.0, 3)
    sections = [
        throughput_table(seconds, runs),
        denormal_table(runs),
        compile_table(),
        quantize_table(runs + 2),
    ]
    print(f"CPU: {_cpu_name()}; numpy {np.__version__}; python {sys.version.split()[0]}\n")
    for rows in sections:
        print("\n".join(rows) + "\n")


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
