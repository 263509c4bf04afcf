"""The numba kernels: SOS filter loops, denormal flush, TPDF quantizer, peak.

Reference values come from scipy.signal.sosfilt and numpy; dither theory from
S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and Dither: A
Theoretical Survey", JAES 40(5), 1992.
"""

from __future__ import annotations

import doctest
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

from dspeq import _kernels as K

ROOT = Path(__file__).resolve().parent.parent

# A slow two-section cascade: RIAA playback (318/3180/75 us) with the IEC
# 7950 us high-pass, bilinear at 96 kHz. Its 3180 us pole decays by 1/e in
# ~305 samples, so an impulse needs ~216 000 samples to reach subnormals.
_RIAA_Z, _RIAA_P, _RIAA_K = signal.bilinear_zpk(
    [-1 / 318e-6, 0.0], [-1 / 3180e-6, -1 / 75e-6, -1 / 7950e-6], 1.0, 96000
)
RIAA_SOS = np.ascontiguousarray(signal.zpk2sos(_RIAA_Z, _RIAA_P, _RIAA_K))


def sosfilt_frames(sos, x, zi=None):
    """scipy.signal.sosfilt on a (frames, channels) block with our zi layout."""
    if zi is None:
        return signal.sosfilt(sos, x.T).T
    y, zf = signal.sosfilt(sos, x.T, zi=zi)
    return y.T, zf


def cascade(n_sections):
    """A stable elliptic band-pass of ``n_sections`` biquads (scipy design)."""
    return np.ascontiguousarray(
        signal.ellip(n_sections, 0.5, 60, [0.05, 0.4], btype="band", output="sos")[:n_sections]
    )


# ---------------------------------------------------------------- SOS filter


# Every loop width (1, 2, 4 lanes; 3 and 7 channels mix them), every unrolled
# length 1-4 and split cascades (5 = 4 + 1, 9 = 4 + 4 + 1), each compiled once.
@pytest.mark.parametrize(("n_sections", "channels"),
                         [(1, 1), (2, 2), (3, 2), (4, 3), (4, 7), (5, 8), (9, 1), (2, 1)])
def test_float64_bit_identical_to_sosfilt(n_sections, channels):
    rng = np.random.default_rng(n_sections * 10 + channels)
    sos = cascade(n_sections)
    x = rng.standard_normal((3000, channels))
    zi0 = rng.standard_normal((n_sections, channels, 2)) * 0.1
    zi = zi0.copy()
    y = K.sos_filter(sos, x, zi)
    ref, zf = sosfilt_frames(sos, x, zi0)
    assert np.array_equal(y, ref)
    assert np.array_equal(zi, zf)


@pytest.mark.parametrize(("n_sections", "channels"), [(1, 1), (2, 2), (5, 8)])
def test_float32_computed_in_float64_rounded_once(n_sections, channels):
    rng = np.random.default_rng(7)
    sos = cascade(n_sections)
    x = rng.standard_normal((2500, channels)).astype(np.float32)
    zi = np.zeros((n_sections, channels, 2))
    y = K.sos_filter(sos, x, zi)
    ref, zf = sosfilt_frames(sos, x.astype(np.float64), np.zeros_like(zi))
    assert y.dtype == np.float32
    assert np.array_equal(y, ref.astype(np.float32))
    assert np.array_equal(zi, zf)


def test_out_may_be_input():
    rng = np.random.default_rng(3)
    x = rng.standard_normal((500, 2))
    ref = sosfilt_frames(RIAA_SOS, x)
    K.sos_filter(RIAA_SOS, x, np.zeros((2, 2, 2)), out=x)
    assert np.array_equal(x, ref)


def test_filter_runner_is_made_once_per_shape_and_runs_the_same_loops():
    # Reference: scipy.signal.sosfilt, bit for bit (exact loops, every kind of plan:
    # one pass, several channel passes, a cascade longer than the unrolled loops).
    for n_sections, channels in [(2, 1), (2, 3), (5, 2)]:
        run = K.filter_runner(n_sections, channels, False)
        assert run is K.filter_runner(n_sections, channels, False)
        sos = cascade(n_sections)
        x = np.random.default_rng(channels).standard_normal((700, channels))
        zi, y = np.zeros((n_sections, channels, 2)), np.empty_like(x)
        finite, peak = run(sos, x, zi, y, None)
        assert finite and peak == np.abs(y).max()
        assert np.array_equal(y, sosfilt_frames(sos, x))
    # The fast runner gives filter_unchecked's result with the same tables.
    tables = K.fast_tables(RIAA_SOS)
    x = np.random.default_rng(5).standard_normal((1003, 1))
    got, want = np.empty_like(x), np.empty_like(x)
    K.filter_runner(2, 1, True, tables.decoupled)(RIAA_SOS, x, np.zeros((2, 1, 2)), got, tables)
    K.filter_unchecked(RIAA_SOS, x, np.zeros((2, 1, 2)), want, tables)
    assert np.array_equal(got, want) and not np.array_equal(got, sosfilt_frames(RIAA_SOS, x))


def test_filter_unchecked_reports_nonfinite_state_and_peak():
    for channels in (1, 2):
        x = np.random.default_rng(channels).standard_normal((2500, channels))
        zi = np.zeros((2, channels, 2))
        y = np.empty_like(x)
        finite, peak = K.filter_unchecked(RIAA_SOS, x, zi, y)
        assert finite is True and peak == np.abs(y).max()  # numpy reference
        y32 = np.empty(x.shape, np.float32)
        assert K.filter_unchecked(RIAA_SOS, x.astype(np.float32), zi, y32)[1] == np.abs(y32).max()
        x[50, channels - 1] = np.inf
        assert K.filter_unchecked(RIAA_SOS, x, zi, np.empty_like(x))[0] is False


def test_argument_checks():
    x = np.zeros((10, 2))
    with pytest.raises(ValueError, match="zi must be"):
        K.sos_filter(RIAA_SOS, x, np.zeros((2, 1, 2)))
    with pytest.raises(ValueError, match="x must be"):
        K.sos_filter(RIAA_SOS, x.astype(np.int32), np.zeros((2, 2, 2)))
    with pytest.raises(ValueError, match="out must be"):
        K.sos_filter(RIAA_SOS, x, np.zeros((2, 2, 2)), out=np.zeros((10, 2), np.float32))


@pytest.mark.parametrize(("lanes", "channels", "n_sections", "stage"),
                         [(1, 1, 1, "float"), (4, 8, 1, "float"), (2, 2, 2, "pcm")])
def test_pure_python_loops_equal_compiled(lanes, channels, n_sections, stage):
    rng = np.random.default_rng(channels + 5 * n_sections)
    sos = cascade(n_sections)
    # 1100 frames cross one flush boundary; tiny initial states get flushed.
    x = rng.standard_normal((1100, channels))
    x[:, 0] = 0.0
    zi0 = rng.choice([1e-250, 0.3], size=(n_sections, channels, 2))
    kernel = K._sos_loop(n_sections, lanes, stage, round32=False)
    results = []
    for func in (kernel.py_func, kernel.compiled):
        zi, y = zi0.copy(), np.empty(x.shape, np.int32 if stage == "pcm" else np.float64)
        with np.errstate(over="ignore"):  # uint arithmetic of the dither wraps on purpose
            finite, peak, clips = func(sos, x, y, zi, 0, channels, K._pcm_params(4.0, 16), K.seed_state(3))
        results.append((y, zi, bool(finite), float(peak), int(clips)))
    assert np.array_equal(results[0][0], results[1][0])
    assert np.array_equal(results[0][1], results[1][1])
    assert results[0][2:] == results[1][2:]
    assert results[0][2] is True and (results[0][4] > 0) == (stage == "pcm")


@pytest.mark.parametrize(("channels", "passes"), [
    (1, ((1, 0, 1),)), (2, ((2, 0, 2),)), (3, ((2, 0, 2), (1, 2, 3))), (4, ((4, 0, 4),)),
    (7, ((4, 0, 4), (2, 4, 6), (1, 6, 7))), (8, ((8, 0, 8),)), (15, ((8, 0, 8), (4, 8, 12),
    (2, 12, 14), (1, 14, 15))), (16, ((8, 0, 16),))])
def test_channel_passes(channels, passes):
    assert K.channel_passes(channels) == passes


def test_slp_switch_is_on_while_compiling_and_restored_after():
    import numba
    from numba.core import config

    before, seen = config.SLP_VECTORIZE, []

    def add_one(a):
        return a + 1.0

    dispatcher = numba.njit(add_one)
    plain = dispatcher.compile

    def spy(sig):
        seen.append(config.SLP_VECTORIZE)
        return plain(sig)

    dispatcher.compile = spy
    K._with_slp_vectorizer(dispatcher)
    assert dispatcher(1.0) == 2.0
    assert seen == [1] and config.SLP_VECTORIZE == before


def test_fma_rounds_once_in_pure_python_and_compiled():
    # (1 + 2^-30)(1 - 2^-30) - 1 = -2^-60 exactly: a*b alone rounds to 1.0, so a*b + c gives 0
    # while a fused multiply-add gives -2^-60 (IEEE 754-2008, fusedMultiplyAdd: one rounding).
    import numba

    fma = K._FMA.compiled

    @numba.njit
    def compiled(a, b, c):
        return fma(a, b, c)

    a, b = 1.0 + 2.0**-30, 1.0 - 2.0**-30
    assert a * b - 1.0 == 0.0
    assert K._fma(a, b, -1.0) == compiled(a, b, -1.0) == -(2.0**-60)
    rng = np.random.default_rng(7)
    scales = rng.choice([1e-300, 1e-3, 1, 1e3, 1e300], (300, 3))
    cases = [tuple(float(x) for x in v) for v in rng.standard_normal((300, 3)) * scales]
    cases += [(0.0, -1.0, 0.0), (-0.0, 1.0, -0.0), (1e308, 10.0, -1e308), (1e-310, 0.5, 0.0),
              (np.inf, 1.0, 1.0), (np.nan, 1.0, 0.0), (1e200, 1e200, -np.inf), (3.0, 1.0 / 3.0, -1.0),
              (1e200, 1e200, np.nan), (np.inf, 0.0, 1.0), (1e200, -1e200, 1.0)]
    for a, b, c in cases:
        ours, llvm = K._fma(a, b, c), compiled(a, b, c)
        assert ours == llvm or (np.isnan(ours) and np.isnan(llvm)), (a, b, c, ours, llvm)
        assert np.signbit(ours) == np.signbit(llvm) or np.isnan(ours), (a, b, c)


def test_prefetch_hints_change_nothing_even_past_the_end():
    # A prefetch is only a hint and never faults (common practice, no source): the loops
    # ask for lines up to PREFETCH_AHEAD samples past a block's last sample.
    import numba

    read, write = K._PREFETCH.compiled, K._PREFETCH_WRITE.compiled

    @numba.njit
    def hinted_sum(a, far):
        total = 0.0
        for i in range(a.size):
            read(a, np.uint64(i) + far)
            write(a, np.uint64(i) + far)
            total += a[i]
        return total

    a = np.arange(16.0)
    assert hinted_sum(a, np.uint64(1 << 20)) == a.sum() == 120.0
    assert np.array_equal(a, np.arange(16.0))
    assert K._prefetch(a, 10**9) is None and K._prefetch_write(a, 10**9) is None
    assert "_prefetch(xf, i + np.uint64(PREFETCH_AHEAD))" in K._sos_loop_source(2, 2, "pcm")
    assert f"_prefetch_write(of, i + np.uint64({K.PREFETCH_AHEAD}))" in K._fast_steps_source(2, 1)


# ---------------------------------------------------------------- fused filter + quantizer


@pytest.mark.parametrize(("n_sections", "channels", "dtype"),
                         [(2, 1, np.float32), (2, 2, np.float32), (2, 2, np.float64), (1, 8, np.float32),
                          (5, 3, np.float64)])
def test_fused_filter_quantize_equals_filter_then_quantize(n_sections, channels, dtype):
    sos = cascade(n_sections)
    x = (np.random.default_rng(channels).standard_normal((5000, channels)) * 0.4).astype(dtype)
    zi0 = np.zeros((n_sections, channels, 2))
    zi_ref = zi0.copy()
    y = K.sos_filter(sos, x, zi_ref)
    expected = np.empty(x.shape, np.int32)
    # Start 777 samples before the dither's 2**32-sample key change, so it is crossed.
    state = K.seed_state(3)
    state[1] = 2**32 - 777
    clips, peak = K.quantize_tpdf(y, 1.7, 24, state, expected)
    got = np.empty(x.shape, np.int32)
    fused_state = K.seed_state(3)
    fused_state[1] = 2**32 - 777
    zi = zi0.copy()
    finite, fused_clips, filter_peak = K.filter_quantize_unchecked(sos, x, zi, got, 1.7, 24, fused_state)
    assert finite and np.array_equal(got, expected)
    assert fused_clips == clips > 0 and filter_peak * 1.7 == peak
    assert np.array_equal(fused_state, state)
    assert np.array_equal(zi, zi_ref)


# ---------------------------------------------------------------- denormals


def test_flush_leaves_noise_bit_identical():
    # Low-level noise (-120 dBFS) over many flush periods: nothing is flushed.
    x = np.random.default_rng(11).standard_normal((50 * K.FLUSH_EVERY, 2)) * 1e-6
    assert np.array_equal(K.sos_filter(RIAA_SOS, x, np.zeros((2, 2, 2))), sosfilt_frames(RIAA_SOS, x))


def test_flush_removes_subnormals_from_impulse_tail():
    # RIAA playback alone (318/3180/75 us) at 48 kHz: one biquad whose
    # 3180 us pole decays by 1/e in ~153 samples; sosfilt's output turns
    # subnormal after ~106 000 samples and stays there.
    z, p, k = signal.bilinear_zpk([-1 / 318e-6], [-1 / 3180e-6, -1 / 75e-6], 1.0, 48000)
    sos = np.ascontiguousarray(signal.zpk2sos(z, p, k))
    x = np.zeros((300_000, 1))
    x[0, 0] = 1.0
    zi = np.zeros((1, 1, 2))
    y = K.sos_filter(sos, x, zi)
    ref = sosfilt_frames(sos, x)
    tiny = np.finfo(np.float64).smallest_normal
    # The hazard is real: plain recursion produces subnormal output ...
    assert np.count_nonzero((ref != 0) & (np.abs(ref) < tiny)) > 100_000
    # ... the flushed loop none, and the tail ends at exactly zero.
    assert np.count_nonzero((y != 0) & (np.abs(y) < tiny)) == 0
    assert not zi.any()
    # The change is far below -300 dBFS (1e-15).
    assert np.max(np.abs(y - ref)) < 1e-15
    assert np.array_equal(y[:50_000], ref[:50_000])


# ---------------------------------------------------------------- dither


def test_dither_is_triangular_with_zero_mean():
    n = 1 << 20
    d = K.tpdf_dither(n, K.seed_state(2024))
    assert d.min() >= -1.0 and d.max() < 1.0
    # TPDF: density 1 - |d| on (-1, 1); mean 0, variance 2 * (1/12) = 1/6.
    sigma = np.sqrt(1 / 6)
    assert abs(d.mean()) < 5 * sigma / np.sqrt(n)
    assert d.var() == pytest.approx(1 / 6, rel=0.01)
    edges = np.linspace(-1.0, 1.0, 41)
    counts, _ = np.histogram(d, edges)
    cdf = np.where(edges < 0, (1 + edges) ** 2 / 2, 1 - (1 - edges) ** 2 / 2)
    expected = np.diff(cdf) * n
    # Binomial counts: every bin within 5 standard deviations.
    assert np.all(np.abs(counts - expected) < 5 * np.sqrt(expected) + 1)


def test_two_uniforms_are_independent():
    # The two halves of each draw must not be correlated: the sum of two
    # uniforms has variance 1/6 only if their covariance is zero, and the
    # fourth moment of a triangle on (-1, 1) is 1/15 (vs 1/12 for u + u).
    d = K.tpdf_dither(1 << 20, K.seed_state(5))
    assert np.mean(d**4) == pytest.approx(1 / 15, rel=0.01)


def test_seed_determinism_and_continuation():
    a = K.tpdf_dither(1000, K.seed_state(1))
    assert np.array_equal(a, K.tpdf_dither(1000, K.seed_state(1)))
    assert not np.array_equal(a, K.tpdf_dither(1000, K.seed_state(2)))
    state = K.seed_state(1)
    b = np.concatenate([K.tpdf_dither(n, state) for n in (1, 10, 989)])
    assert np.array_equal(a, b)
    assert state[1] == 1000 and state[0] == K.seed_state(1)[0]


def test_dither_continues_across_the_key_change():
    # Every 2**32 samples the generator takes a new key; a block that spans
    # the change equals the two halves drawn separately.
    start = K.seed_state(9)
    start[1] = 2**32 - 300
    whole = K.tpdf_dither(600, start.copy())
    state = start.copy()
    halves = np.concatenate([K.tpdf_dither(300, state), K.tpdf_dither(300, state)])
    assert np.array_equal(whole, halves) and state[1] == 2**32 + 300
    # Without the key change, sample 2**32 + j would repeat sample j.
    assert not np.array_equal(whole[300:], K.tpdf_dither(300, K.seed_state(9)))



def _documented_dither(seed: int, k0: int, n: int) -> np.ndarray:
    """The generator as the module docstring states it, in numpy uint64 arithmetic."""
    mask32, mask64 = np.uint64(0xFFFFFFFF), (1 << 64) - 1

    def splitmix64(z: int) -> int:
        z &= mask64
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & mask64
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & mask64
        return z ^ (z >> 31)

    k = np.arange(k0, k0 + n, dtype=np.uint64)
    out = np.empty(n)
    for e in np.unique(k >> np.uint64(32)):
        z = splitmix64(seed + (int(e) + 1) * 0x9E3779B97F4A7C15)
        a, b = np.uint64(z & 0xFFFFFFFF), np.uint64(z >> 32)
        sel = (k >> np.uint64(32)) == e
        x = ((k[sel] & mask32) + a) & mask32
        x ^= x >> np.uint64(16)
        x = (x * np.uint64(0x7FEB352D)) & mask32
        x ^= b
        x ^= x >> np.uint64(15)
        x = (x * np.uint64(0x846CA68B)) & mask32
        x ^= x >> np.uint64(16)
        u1, u2 = x >> np.uint64(16), x & np.uint64(0xFFFF)
        out[sel] = ((u1 + u2).astype(np.float64) - 65535.0) / 65536.0
    return out


def test_dither_is_the_documented_generator():
    # The module docstring's formulas, recomputed independently: over the key
    # change at 2**32 and over several of the quantizer's pieces (QUANTIZE_PIECE).
    state = K.seed_state(31)
    seed = int(state[0])
    state[1] = 2**32 - 2500
    expected = _documented_dither(seed, 2**32 - 2500, 5000)
    assert np.array_equal(K.tpdf_dither(5000, state.copy()), expected)
    # The quantizer adds the same values: 16-bit output of y = 0 is round(d).
    out = np.empty((2500, 2), np.int32)
    K.quantize_tpdf(np.zeros((2500, 2)), 1.0, 16, state, out)
    assert np.array_equal(out.reshape(-1) >> 16, np.rint(expected).astype(np.int32))
    assert np.count_nonzero(out) > 100   # |d| > 1/2 happens (1/4 of the time)

def test_dither_values_are_uncorrelated():
    # Neighbouring samples (consecutive frames, or channels of one frame)
    # and the same index under two seeds: correlation within 5 standard
    # errors of zero (1 / sqrt(n)).
    n = 1 << 20
    d = K.tpdf_dither(n, K.seed_state(77))
    e = K.tpdf_dither(n, K.seed_state(78))
    bound = 5 / np.sqrt(n)
    for a, b in ((d[1:], d[:-1]), (d[2:], d[:-2]), (d, e)):
        assert abs(np.corrcoef(a, b)[0, 1]) < bound
    # The halves of one 32-bit hash are independent: the difference of the
    # two uniforms (d = u1 + u2) would otherwise change the variance.
    assert np.var(d) == pytest.approx(1 / 6, rel=0.01)


def test_seed_state_checks():
    assert K.seed_state(-1)[0] == np.uint64(2**64 - 1)
    assert K.seed_state(np.int64(3))[0] == 3
    for bad in (1.5, True, "1"):
        with pytest.raises(TypeError):
            K.seed_state(bad)
    with pytest.raises(ValueError, match="state must be"):
        K.tpdf_dither(3, np.zeros(1, np.int64))


def _numpy_quantize(y, gain, bits, seed):
    """Independent numpy version of quantize_tpdf (dither from tpdf_dither; none at 32 bits)."""
    v = y.astype(np.float64) * gain * 2.0 ** (bits - 1)
    if bits < 32:
        v = v + K.tpdf_dither(v.size, K.seed_state(seed)).reshape(v.shape)
    lo, hi = -(2.0 ** (bits - 1)), 2.0 ** (bits - 1) - 1
    rounded = np.rint(v)
    clips = np.count_nonzero((rounded < lo) | (rounded > hi))
    q = np.clip(rounded, lo, hi)
    return (q.astype(np.int64) << (32 - bits)).astype(np.int32), clips


@pytest.mark.parametrize("bits", [8, 16, 24, 32])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("amplitude", [1.2, 0.5])
def test_quantize_matches_numpy_reference(bits, dtype, amplitude):
    # 1.2: every piece of QUANTIZE_PIECE samples clips (the clamping loop);
    # 0.5: none does (the loop that assumes so).
    y = (np.random.default_rng(bits).uniform(-amplitude, amplitude, (3000, 2))).astype(dtype)
    out = np.empty(y.shape, np.int32)
    state = K.seed_state(99)
    clips, peak = K.quantize_tpdf(y, 0.9, bits, state, out)
    expected, expected_clips = _numpy_quantize(y, 0.9, bits, 99)
    assert np.array_equal(out, expected)
    assert clips == expected_clips
    assert (clips > 0) == (amplitude > 1)
    assert peak == np.max(np.abs(y.astype(np.float64) * 0.9))
    assert state[1] == y.size


def test_quantize_continuation_equals_one_call():
    y = np.random.default_rng(4).uniform(-1, 1, (5000, 2))
    whole = np.empty(y.shape, np.int32)
    K.quantize_tpdf(y, 1.0, 16, K.seed_state(8), whole)
    parts = np.empty(y.shape, np.int32)
    state = K.seed_state(8)
    for lo, hi in [(0, 1), (1, 1000), (1000, 1000), (1000, 5000)]:
        K.quantize_tpdf(y[lo:hi], 1.0, 16, state, parts[lo:hi])
    assert np.array_equal(whole, parts)
    again = np.empty(y.shape, np.int32)
    K.quantize_tpdf(y, 1.0, 16, K.seed_state(8), again)
    assert np.array_equal(whole, again)


def test_only_pieces_with_overs_or_nan_are_clamped():
    # One over in the second piece, one NaN in the fourth, the rest well inside.
    y = np.random.default_rng(5).uniform(-0.5, 0.5, (3 * K.QUANTIZE_PIECE, 2))
    y.reshape(-1)[K.QUANTIZE_PIECE + 7] = 1.5
    y.reshape(-1)[3 * K.QUANTIZE_PIECE + 1] = np.nan
    out = np.empty(y.shape, np.int32)
    clips, peak = K.quantize_tpdf(y, 1.0, 24, K.seed_state(4), out)
    expected, _ = _numpy_quantize(np.nan_to_num(y), 1.0, 24, 4)
    flat, nan_at = out.reshape(-1), 3 * K.QUANTIZE_PIECE + 1
    assert clips == 1 and np.isnan(peak) and flat[nan_at] == 0
    assert np.array_equal(np.delete(flat, nan_at), np.delete(expected.reshape(-1), nan_at))
    assert flat[K.QUANTIZE_PIECE + 7] == (2**23 - 1) << 8


@pytest.mark.parametrize("func", ["py_func", "compiled"])
def test_clip_threshold_is_the_rounded_value(func):
    # Without dither (as at 32 bits), values between the top code and half an
    # LSB above it round to the top code: not clips; half an LSB above rounds
    # (ties to even) to 32768: a clip. At the bottom, -32768.5 rounds to -32768.
    scale, lo, hi, lsb, _ = K._pcm_params(1.0, 16)
    v = np.array([32767.0, 32767.4, 32767.5, 32769.0, -32768.0, -32768.5, -32768.6, 5.5]) / scale
    out = np.empty(v.size, np.int32)
    run = getattr(K._QUANTIZE_RUN, func)
    with np.errstate(over="ignore"):  # uint arithmetic wraps on purpose
        clips, nans = run(v, scale, lo, hi, lsb, 0.0, np.uint32(0), np.uint32(0), out,
                          np.empty(K.QUANTIZE_PIECE, np.int32))
    assert (int(clips), int(nans)) == (3, 0)
    assert list(out >> 16) == [32767, 32767, 32767, 32767, -32768, -32768, -32768, 6]


def test_clip_count_exact_and_left_justified():
    y = np.full((1000, 2), 0.25)
    y[10:17, 0] = 1.5  # 7 positive overs
    y[500:503, 1] = -3.0  # 3 negative overs
    for bits in (8, 16, 24):
        out = np.empty(y.shape, np.int32)
        clips, peak = K.quantize_tpdf(y, 1.0, bits, K.seed_state(0), out)
        assert clips == 10
        assert peak == 3.0
        top = 2 ** (bits - 1)
        assert np.all(out[10:17, 0] == (top - 1) << (32 - bits))
        assert np.all(out[500:503, 1] == -top << (32 - bits))
        assert np.all(out & ((1 << (32 - bits)) - 1) == 0)  # low bits empty
        # 0.25 * 2**(bits-1) plus dither in (-1, 1) LSB rounds to one of 3 codes.
        codes = np.unique(out[20:400] >> (32 - bits))
        assert set(codes) <= {top // 4 - 1, top // 4, top // 4 + 1}


@pytest.mark.parametrize(("bits", "subtype", "read_dtype", "shift"),
                         [(16, "PCM_16", "int16", 16), (24, "PCM_24", "int32", 0)])
def test_left_justified_ints_are_what_soundfile_writes(tmp_path, bits, subtype, read_dtype, shift):
    soundfile = pytest.importorskip("soundfile")
    y = np.random.default_rng(1).uniform(-0.9, 0.9, (2000, 2))
    out = np.empty(y.shape, np.int32)
    K.quantize_tpdf(y, 1.0, bits, K.seed_state(3), out)
    path = tmp_path / "q.wav"
    soundfile.write(path, out, 48000, subtype=subtype)
    back, _ = soundfile.read(path, dtype=read_dtype)
    assert np.array_equal(back, out >> shift)


def test_tpdf_noise_floor_of_full_scale_sine_at_16_bits():
    # Derivation (Lipshitz et al. 1992): rounding adds error of variance
    # LSB^2/12; TPDF dither (two independent uniforms of variance LSB^2/12
    # each) adds 2 * LSB^2/12. With TPDF the total error is independent of
    # the signal, so its power is 3 * LSB^2/12 = LSB^2/4, i.e. RMS = LSB/2.
    # At 16 bits with full scale +-1, LSB = 2**-15, so RMS = 2**-16:
    # 20*log10(2**-16) = -96.33 dB re full-scale DC (1.0), which is
    # -93.32 dB re the RMS of a full-scale sine (6.02*16 + 1.76 - 4.77 dB).
    fs, n = 48000, 1 << 18
    amplitude = 32765 / 32768  # -0.0008 dBFS: peak + dither stays below clipping
    x = amplitude * np.sin(2 * np.pi * 997 * np.arange(n) / fs)
    out = np.empty((n, 1), np.int32)
    clips, _ = K.quantize_tpdf(x[:, None], 1.0, 16, K.seed_state(12), out)
    assert clips == 0
    error = (out[:, 0] >> 16) / 32768.0 - x
    level_db = 10 * np.log10(np.mean(error**2))
    assert level_db == pytest.approx(-96.33, abs=0.5)
    # TPDF makes the error power independent of the signal value.
    lsb_power = (error * 32768) ** 2
    for lo, hi in [(-1, -0.5), (-0.1, 0.1), (0.5, 1)]:
        part = lsb_power[(x >= lo) & (x < hi)]
        assert part.mean() == pytest.approx(0.25, rel=0.05)


def test_quantize_nan_and_argument_checks():
    y = np.array([[0.5], [np.nan], [-0.5]])
    out = np.empty((3, 1), np.int32)
    clips, peak = K.quantize_tpdf(y, 1.0, 16, K.seed_state(0), out)
    assert np.isnan(peak) and out[1, 0] == 0 and clips == 0
    with pytest.raises(ValueError, match="bits must be one of"):
        K.quantize_tpdf(y, 1.0, 12, K.seed_state(0), out)
    with pytest.raises(ValueError, match="out must be int32"):
        K.quantize_tpdf(y, 1.0, 16, K.seed_state(0), out.astype(np.int16))


def test_pure_python_quantizer_equals_compiled():
    # Pieces with no over (the loop that assumes so) and a last one with an
    # over and a NaN (the clamping loop).
    y = np.random.default_rng(6).uniform(-0.9, 0.9, 2 * K.QUANTIZE_PIECE + 80)
    y[-7], y[-5] = np.nan, 1.1
    results = []
    for func in (K._QUANTIZE.py_func, K._QUANTIZE.compiled):
        out = np.empty(y.shape, np.int32)
        with np.errstate(over="ignore"):  # uint arithmetic wraps on purpose
            # 40 samples before the key change at 2**32: both keys are used.
            clips, nans = func(y, *K._pcm_params(1.0, 16), np.uint64(77), np.uint64(2**32 - 40), out,
                               np.empty(K.QUANTIZE_PIECE, np.int32))
        results.append((out, int(clips), int(nans)))
    assert np.array_equal(results[0][0], results[1][0])
    assert results[0][1:] == results[1][1:] and results[0][1] > 0 and results[0][2] == 1


# ---------------------------------------------------------------- peak


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("n", [0, 1, 3, 4, 5, 1001])
def test_peak_abs_matches_numpy(dtype, n):
    x = np.random.default_rng(n).standard_normal((n, 2)).astype(dtype)
    assert K.peak_abs(x) == (np.abs(x).max() if n else 0.0)
    assert K.peak_abs(x[::2, 1]) == (np.abs(x[::2, 1]).max() if n else 0.0)
    mask = K._MAGNITUDE[x.dtype]
    flat = x.ravel()
    assert K._PEAK.py_func(flat.view(mask.dtype), mask) == K._PEAK(flat.view(mask.dtype), mask)


def test_peak_abs_nan_and_inf():
    x = np.zeros(9)
    x[4] = -np.inf
    assert K.peak_abs(x) == np.inf
    x[7] = np.nan
    assert np.isnan(K.peak_abs(x))
    x[2] = -0.0
    assert K.peak_abs(x[:4]) == 0.0 and not np.signbit(K.peak_abs(x[:4]))
    x32 = x.astype(np.float32)
    assert np.isnan(K.peak_abs(x32)) and K.peak_abs(x32[:5]) == np.inf
    # the smallest subnormal and the largest finite value keep their exact magnitude
    for dtype in (np.float32, np.float64):
        info = np.finfo(dtype)
        y = np.array([info.smallest_subnormal, -info.smallest_subnormal, 0.0], dtype)
        assert K.peak_abs(y) == info.smallest_subnormal
        assert K.peak_abs(np.array([-info.max, 1.0], dtype)) == info.max
    with pytest.raises(ValueError, match="float32 or float64"):
        K.peak_abs(np.zeros(3, np.int16))


def test_stored_peak_rounds_as_numpy_float32():
    """The peak of float32 output is numpy's float32 rounding of the float64 peak (numpy reference)."""
    f32, f64 = np.dtype(np.float32), np.dtype(np.float64)
    info = np.finfo(np.float32)
    ulp_above_max = 2.0**104  # the spacing of float32 numbers just below its largest finite value
    edges = [0.0, -0.0, 1.0 + 2.0**-24, 1.0 + 3 * 2.0**-24, float(info.smallest_subnormal) / 2,
             float(info.smallest_subnormal) * 0.75, float(info.max), float(info.max) + ulp_above_max / 2,
             float(info.max) + ulp_above_max / 4, 1e39, np.inf, np.nan, 5e-324]
    values = edges + list(np.random.default_rng(7).lognormal(0.0, 30.0, 2000))
    with np.errstate(over="ignore"):
        for v in values:
            got, want = K._stored_peak(float(v), f32), float(np.float32(v))
            assert got == want or (np.isnan(got) and np.isnan(want)), v
            assert K._stored_peak(float(v), f64) == v or np.isnan(v)  # float64 output: unchanged


# ---------------------------------------------------------------- import, cache


def test_examples_in_docstrings_run():
    result = doctest.testmod(K, optionflags=doctest.ELLIPSIS)
    assert result.attempted >= 10 and result.failed == 0


def test_import_compiles_nothing():
    code = (
        "import sys; import dspeq._kernels, dspeq.stream; "
        "print('numba' in sys.modules)"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True
    )
    assert result.stdout.strip() == "False"


@pytest.mark.slow
def test_cache_falls_back_to_temporary_directory(tmp_path):
    # A copy of the module in a folder where numba can write no __pycache__
    # (a file stands in its way) and a user cache path that cannot exist:
    # the kernel must still compile, caching under $TMPDIR.
    pkg = tmp_path / "pkg"
    pkg.mkdir()
    (pkg / "kernels_copy.py").write_text((ROOT / "dspeq" / "_kernels.py").read_text())
    (pkg / "__pycache__").write_text("not a directory")
    temp = tmp_path / "tmp"
    temp.mkdir()
    env = {k: v for k, v in os.environ.items() if not k.startswith("NUMBA_")}
    env.update(XDG_CACHE_HOME="/dev/null/cache", HOME="/dev/null/home", TMPDIR=str(temp))
    code = (
        "import numpy as np, kernels_copy as k, os; "
        "print(k.peak_abs(np.arange(5.0))); print(os.environ['NUMBA_CACHE_DIR'])"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], cwd=pkg, env=env, capture_output=True, text=True
    )
    assert result.returncode == 0, result.stderr
    peak, cache_dir = result.stdout.split()
    assert float(peak) == 4.0
    assert Path(cache_dir).parent == temp
    assert any(Path(cache_dir).rglob("*.nbi"))


def test_fallback_cache_dir_refuses_a_planted_path(tmp_path, monkeypatch):
    # Someone else's directory (here: a symlink) at the fixed name must not
    # be trusted with machine code; a fresh private directory is used instead.
    monkeypatch.setattr(K.tempfile, "tempdir", str(tmp_path))
    monkeypatch.delenv("NUMBA_CACHE_DIR", raising=False)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (tmp_path / f"dspeq-numba-cache-{os.getuid()}").symlink_to(elsewhere)
    path = Path(K._fallback_cache_dir())
    assert path.parent == tmp_path and path.is_dir() and not path.is_symlink()
    assert path.name.startswith("dspeq-numba-cache-") and path != elsewhere
    assert path.stat().st_mode & 0o077 == 0
    assert os.environ["NUMBA_CACHE_DIR"] == str(path)


# ---------------------------------------------------------------- sample bytes


@pytest.mark.parametrize("bits", [8, 16, 24, 32])
def test_pcm_bytes_are_signed_little_endian_words(bits):
    # FLAC format, STREAMINFO: the MD5 covers the samples as signed
    # little-endian integers of the word length, interleaved.
    q = np.random.default_rng(bits).integers(-(2 ** (bits - 1)), 2 ** (bits - 1), (500, 2))
    q[0] = [-(2 ** (bits - 1)), 2 ** (bits - 1) - 1]
    x = (q << (32 - bits)).astype(np.int32)
    expected = b"".join(int(v).to_bytes(bits // 8, "little", signed=True) for v in q.ravel())
    assert K.pcm_bytes(x, bits).tobytes() == expected
    with pytest.raises(ValueError, match="pcm_bytes needs int32"):
        K.pcm_bytes(x.astype(np.int64), bits)
