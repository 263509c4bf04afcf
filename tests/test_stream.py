"""Equalizer: block continuity against scipy.signal.sosfilt, validation, errors."""

from __future__ import annotations

import types

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from dspeq._errors import DesignError, DspeqError
from dspeq.stream import Equalizer, validate_sos

LOWPASS = np.array([[0.2, 0.2, 0.0, 1.0, -0.6, 0.0]])  # one pole at z = 0.6


def random_sos(rng, n_sections):
    """Random stable biquads: poles of radius <= 0.995, zeros anywhere near the circle."""
    rows = []
    for _ in range(n_sections):
        radius, angle = rng.uniform(0.0, 0.995), rng.uniform(0.0, np.pi)
        a = [1.0, -2 * radius * np.cos(angle), radius**2]
        zr, za = rng.uniform(0.0, 1.2), rng.uniform(0.0, np.pi)
        b = np.array([1.0, -2 * zr * np.cos(za), zr**2]) * rng.uniform(0.1, 2.0)
        rows.append([*b, *a])
    return np.array(rows)


def blocks_of(frames, sizes):
    """Split range(frames) by cycling through ``sizes``."""
    edges, i, k = [0], 0, 0
    while i < frames:
        i = min(frames, i + sizes[k % len(sizes)])
        edges.append(i)
        k += 1
    return list(zip(edges[:-1], edges[1:], strict=True))


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    # Lengths 1, 2 and a split one (5 = 4 + 1), every loop width (3 = 2 + 1):
    # each kernel compiles once, the block sizes and data vary.
    n_sections=st.sampled_from([1, 2, 5]),
    channels=st.sampled_from([1, 2, 3, 8]),
    sizes=st.lists(st.integers(0, 700), min_size=1, max_size=6).filter(any),
)
def test_blocks_with_carried_state_equal_one_sosfilt_call(seed, n_sections, channels, sizes):
    rng = np.random.default_rng(seed)
    sos = random_sos(rng, n_sections)
    x = rng.standard_normal((1500, channels))
    eq = Equalizer(sos, channels=channels)
    y = np.concatenate([eq.process(x[lo:hi]) for lo, hi in blocks_of(len(x), sizes)])
    ref, zf = signal.sosfilt(sos, x, axis=0, zi=np.zeros((n_sections, 2, channels)))
    assert np.array_equal(y, ref)  # bit-identical
    # Our state layout is sosfilt's zi for a (channels, frames) signal.
    assert np.array_equal(eq.state, zf.transpose(0, 2, 1))


def test_float32_in_float32_out_computed_in_float64():
    rng = np.random.default_rng(4)
    sos = random_sos(rng, 2)
    x = rng.standard_normal((3000, 2)).astype(np.float32)
    eq = Equalizer(sos, 2)
    y = np.concatenate([eq.process(x[:1111]), eq.process(x[1111:])])
    assert y.dtype == np.float32
    ref = signal.sosfilt(sos, x.astype(np.float64), axis=0).astype(np.float32)
    assert np.array_equal(y, ref)


def test_mono_1d_block_and_zero_latency():
    eq = Equalizer(LOWPASS)
    x = np.zeros(50)
    x[10] = 1.0
    y = eq.process(x)
    assert y.shape == (50,)
    assert not y[:10].any()  # nothing before the impulse
    assert y[10] == 0.2  # b0 at once: no delay
    assert np.array_equal(y, signal.sosfilt(LOWPASS, x))


def test_design_object_with_sos_attribute():
    design = types.SimpleNamespace(sos=LOWPASS.tolist())
    eq = Equalizer(design, channels=2)
    assert eq.sos.dtype == np.float64 and eq.sos.shape == (1, 6)
    assert eq.channels == 2
    assert not eq.sos.flags.writeable
    assert repr(eq) == "Equalizer(<1 sections>, channels=2)"


def test_state_is_a_copy_and_reset_clears_it():
    eq = Equalizer(LOWPASS, 2)
    x = np.ones((10, 2))
    first = eq.process(x)
    state = eq.state
    state[...] = 123.0
    assert not np.array_equal(eq.state, state)
    assert eq.state.shape == (1, 2, 2)
    eq.reset()
    assert not eq.state.any()
    assert np.array_equal(eq.process(x), first)


def test_out_argument_and_in_place():
    x = np.random.default_rng(0).standard_normal((64, 2))
    ref = Equalizer(LOWPASS, 2).process(x)
    out = np.empty_like(x)
    assert Equalizer(LOWPASS, 2).process(x, out=out) is out
    assert np.array_equal(out, ref)
    inplace = x.copy()
    Equalizer(LOWPASS, 2).process(inplace, out=inplace)
    assert np.array_equal(inplace, ref)
    with pytest.raises(DspeqError, match=r"out must be a writable C-contiguous float64 array"):
        Equalizer(LOWPASS, 2).process(x, out=np.empty((64, 2), np.float32))


def test_non_contiguous_block_and_empty_block():
    x = np.random.default_rng(1).standard_normal((100, 4))
    eq = Equalizer(LOWPASS, 2)
    assert np.array_equal(eq.process(x[:, ::2]), signal.sosfilt(LOWPASS, x[:, ::2], axis=0))
    assert eq.process(np.empty((0, 2))).shape == (0, 2)


@pytest.mark.parametrize(
    ("block", "message"),
    [
        (np.zeros((8, 2), np.int16), r"float32 or float64 audio in native byte order, "
                                     r"got dtype 'int16'"),
        (np.zeros((8, 2), ">f8" if np.little_endian else "<f8"), r"got dtype '[<>]f8'"),
        (np.zeros((8, 2), np.complex128), r"got dtype 'complex128'"),
        (np.zeros((8, 3)), r"block must have shape \(frames, 2\), got \(8, 3\)"),
        (np.zeros((8, 2, 1)), r"block must have shape \(frames, 2\), got \(8, 2, 1\)"),
        (np.zeros(8), r"1-D \(mono\) block needs a 1-channel Equalizer; this one has 2"),
        ([0.0, 1.0], r"block must be a numpy array, got list"),
    ],
)
def test_bad_blocks_raise_clear_errors(block, message):
    eq = Equalizer(LOWPASS, 2)
    with pytest.raises(DspeqError, match=message) as info:
        eq.process(block)
    assert isinstance(info.value, ValueError)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("in_place", [False, True])
def test_nonfinite_block_raises_and_keeps_state(bad, in_place):
    eq = Equalizer(LOWPASS, 2)
    eq.process(np.ones((30, 2)))
    before = eq.state
    x = np.ones((100, 2))
    x[42, 1] = bad
    x[77, 0] = bad
    kept = x.copy()
    with pytest.raises(DspeqError, match=r"2 NaN or infinite sample\(s\); first at \(frame, "
                       r"channel\) \(42, 1\)"):
        eq.process(x, out=x if in_place else None)
    assert np.array_equal(eq.state, before)
    if in_place:
        assert np.array_equal(x, kept, equal_nan=True)  # checked before overwriting


def test_overflow_raises_and_keeps_state():
    eq = Equalizer([[1e300, 0.0, 0.0, 1.0, 0.0, 0.0]])
    with pytest.raises(DspeqError, match="filter state overflowed float64"):
        eq.process(np.full(4, 1e10))
    assert not eq.state.any()


@pytest.mark.parametrize("channels", [0, -1, 1.5, True, "2"])
def test_bad_channel_count(channels):
    with pytest.raises(DspeqError, match="channels must be a positive integer"):
        Equalizer(LOWPASS, channels)


@pytest.mark.parametrize(
    ("sos", "message"),
    [
        (np.zeros((2, 5)), r"shape \(n_sections, 6\), got shape \(2, 5\)"),
        (np.zeros((0, 6)), r"got shape \(0, 6\)"),
        (np.zeros(6), r"got shape \(6,\)"),
        ([[1, 0, 0, 1, float("nan"), 0]], r"SOS section 0 coefficient 4 is nan"),
        ([[1, 0, 0, 1, 0, 0], [1, np.inf, 0, 1, 0, 0]], r"section 1 coefficient 1 is inf"),
        ([[1, 0, 0, 2.0, 0, 0]], r"SOS section 0 has a0 = 2.0; every section must have a0 == 1"),
        ([[1, 0, 0, 1, -1.0, 0]], r"section 0 is not stable: a1 = -1.0, a2 = 0.0"),
        ([[1, 0, 0, 1, 0, 1.0]], r"section 0 is not stable: a1 = 0.0, a2 = 1.0"),
        ([[1j, 0, 0, 1, 0, 0]], r"SOS must be a real \(n_sections, 6\) array"),
        ("riaa", r"SOS must be a real"),
    ],
)
def test_validate_sos_messages(sos, message):
    with pytest.raises(DesignError, match=message):
        validate_sos(sos)
    with pytest.raises(DesignError, match=message):
        Equalizer(sos)


def test_validate_sos_accepts_scipy_designs_unchanged():
    sos = signal.butter(6, [0.01, 0.2], btype="band", output="sos")
    checked = validate_sos(sos)
    assert np.array_equal(checked, sos)
    assert checked is not sos and checked.flags.c_contiguous


def test_long_cascade_is_split_exactly():
    sos = signal.ellip(9, 0.5, 60, 0.2, output="sos")  # 5 sections: 4 + 1 fused runs
    x = np.random.default_rng(2).standard_normal((2000, 3))
    eq = Equalizer(sos, 3)
    y = np.concatenate([eq.process(x[:999]), eq.process(x[999:])])
    assert np.array_equal(y, signal.sosfilt(sos, x, axis=0))


# ---------------------------------------------------------------- filter + quantize in one pass


@pytest.mark.parametrize("channels, dtype", [(2, np.float32), (1, np.float32), (2, np.float64),
                                             (8, np.float32), (3, np.float64)])
def test_process_pcm_equals_process_then_quantize(channels, dtype):
    from dspeq import _kernels

    sos = signal.butter(4, 0.1, output="sos")
    x = (np.random.default_rng(5).standard_normal((3000, channels)) * 0.5).astype(dtype)
    a, b = Equalizer(sos, channels), Equalizer(sos, channels)
    sa, sb = _kernels.seed_state(11), _kernels.seed_state(11)
    for lo, hi in ((0, 700), (700, 3000)):
        got = np.empty((hi - lo, channels), np.int32)
        clips, peak = a.process_pcm(x[lo:hi], 1.5, 16, sa, got)
        y = b.process(x[lo:hi])
        want = np.empty_like(got)
        assert (clips, peak) == _kernels.quantize_tpdf(y, 1.5, 16, sb, want)
        assert np.array_equal(got, want)
        assert a.last_peak == np.abs(y).max() == b.last_peak  # numpy reference
    assert np.array_equal(a.state, b.state) and np.array_equal(sa, sb)


def test_process_pcm_errors_leave_both_states():
    from dspeq import _kernels

    eq = Equalizer(LOWPASS, 2)
    eq.process_pcm(np.ones((10, 2)), 1.0, 24, _kernels.seed_state(0), np.empty((10, 2), np.int32))
    before, state = eq.state, _kernels.seed_state(1)
    x = np.ones((50, 2))
    x[20, 1] = np.nan
    with pytest.raises(DspeqError, match=r"1 NaN or infinite sample\(s\); first at .* \(20, 1\)"):
        eq.process_pcm(x, 1.0, 24, state, np.empty((50, 2), np.int32))
    assert np.array_equal(eq.state, before) and state[1] == 0
    good = np.ones((50, 2))
    with pytest.raises(DspeqError, match="bits must be one of"):
        eq.process_pcm(good, 1.0, 12, state, np.empty((50, 2), np.int32))
    with pytest.raises(DspeqError, match="out must be a writable C-contiguous int32"):
        eq.process_pcm(good, 1.0, 16, state, np.empty((50, 2), np.int16))
    with pytest.raises(DspeqError, match="state must be a uint64 array"):
        eq.process_pcm(good, 1.0, 16, np.zeros(1, np.uint64), np.empty((50, 2), np.int32))
