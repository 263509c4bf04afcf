"""The Equalizer's fast path (``exact=False``): accuracy against scipy.signal.sosfilt
and against the same recursion in extended precision, continuity, errors.

The fast path gives up bit-identity; its documented contract (dspeq.stream,
dspeq._kernels "Fast path") is that its error, measured against the recursion
run in np.longdouble, is no larger than sosfilt's own float64 error, so the two
differ by about that much: ~1e-14 of the output's peak for ordinary designs,
~1e-11 when poles sit at |z| = 0.9999.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import signal

from dspeq import _kernels as K
from dspeq import curves, design
from dspeq._errors import DspeqError
from dspeq.stream import Equalizer

FS = 192000
# RIAA playback (IEC 60098: 3180/318/75 us) with a 3 Hz high-pass instead of
# the 7950 us term, bilinear at 192 kHz: poles at |z| = 0.99990 (the 3 Hz
# limit) and 0.99836, two sections.
_Z, _P, _K = signal.bilinear_zpk(
    [-1 / 318e-6, 0.0], [-1 / 3180e-6, -1 / 75e-6, -2 * np.pi * 3.0], 1.0, FS)
SLOW_SOS = np.ascontiguousarray(signal.zpk2sos(_Z, _P, _K))
# Tape replay with no LF time constant (IEC 15 ips: 35 us, IASA TC-04 Table 1)
# limited at 3 Hz: (1 + s*35us) / (s + 2*pi*3), one section, pole at 0.99990.
_Z1, _P1, _K1 = signal.bilinear_zpk([-1 / 35e-6], [-2 * np.pi * 3.0], 1.0, FS)
TAPE_SOS = np.ascontiguousarray(signal.zpk2sos(_Z1, _P1, _K1))


def random_sos(rng, n_sections, max_radius=0.99):
    """Random stable biquads with poles up to ``max_radius`` and zeros near the circle."""
    rows = []
    for _ in range(n_sections):
        radius, angle = rng.uniform(0.0, max_radius), rng.uniform(0.0, np.pi)
        zr, za = rng.uniform(0.0, 1.2), rng.uniform(0.0, np.pi)
        b = np.array([1.0, -2 * zr * np.cos(za), zr**2]) * rng.uniform(0.1, 2.0)
        rows.append([*b, 1.0, -2 * radius * np.cos(angle), radius**2])
    return np.array(rows)


def extended(sos, x):
    """The same recursion (DF2T) in np.longdouble: scipy's sosfilt supports that dtype."""
    return signal.sosfilt(sos.astype(np.longdouble), np.asarray(x, np.longdouble), axis=0)


def run(eq, x, sizes):
    """Stream ``x`` through ``eq`` in blocks cycling through ``sizes``."""
    out, i, k = [], 0, 0
    while i < len(x):
        n = sizes[k % len(sizes)]
        out.append(eq.process(x[i:i + n]))
        i, k = i + n, k + 1
    return np.concatenate(out)


def run_pcm(x, sizes):
    """``x`` through a fast Equalizer's process_pcm (24 bits, gain 0.5), blocks cycling through ``sizes``."""
    eq = Equalizer(SLOW_SOS, x.shape[1], exact=False)
    state, out = K.seed_state(4), np.empty(x.shape, np.int32)
    i, k = 0, 0
    while i < len(x):
        n = min(sizes[k % len(sizes)], len(x) - i)
        eq.process_pcm(x[i:i + n], 0.5, 24, state, out[i:i + n])
        i, k = i + n, k + 1
    return out


def relative(a, b):
    return float(np.max(np.abs(np.asarray(a, np.float64) - np.asarray(b, np.float64)))
                 / np.max(np.abs(np.asarray(b, np.float64))))


needs_long_double = pytest.mark.skipif(
    np.finfo(np.longdouble).nmant < 60, reason="np.longdouble is plain float64 on this platform")


# ---------------------------------------------------------------- against sosfilt


@pytest.mark.parametrize("n_sections", [1, 2, 3, 4])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize(("channels", "decoupled"), [(1, True), (1, False), (2, False)])
def test_mono_and_stereo_within_1e12_of_sosfilt(n_sections, dtype, channels, decoupled, monkeypatch):
    # mono on either loop: the decoupled one where the design allows it, or the eight-frame step
    monkeypatch.setattr(K, "_decoupled_here", decoupled)
    rng = np.random.default_rng(10 * n_sections + (dtype == np.float32) + 100 * channels)
    sos = random_sos(rng, n_sections)
    x = rng.standard_normal((20000, channels)).astype(dtype)
    # Random partition, with blocks shorter than the lane count and longer than a chunk.
    sizes = [int(s) for s in rng.integers(1, 3000, 12)] + [3, 5000]
    eq = Equalizer(sos, channels, exact=False)
    y = run(eq, x, sizes)
    ref, zf = signal.sosfilt(sos, x.astype(np.float64), axis=0,
                             zi=np.zeros((n_sections, 2, channels)))
    assert y.dtype == dtype
    if dtype == np.float64:
        assert relative(y, ref) <= 1e-12
        assert not np.array_equal(y, ref)  # it is the fast path (bit-identity would be exact=True)
    else:  # float32: the float64 result rounded once; within one float32 step of sosfilt's
        ref32 = ref.astype(np.float32)
        assert np.all(np.abs(y - ref32) <= np.spacing(np.abs(ref32)))
    # Each channel's final state is sosfilt's, within rounding.
    assert np.max(np.abs(eq.state - zf.transpose(0, 2, 1))) <= 1e-12 * np.max(np.abs(zf))


def test_stereo_channels_do_not_mix():
    # Stereo lanes interleave the two channels; each must see only its own input.
    rng = np.random.default_rng(12)
    sos = random_sos(rng, 2)
    x = np.zeros((9000, 2))
    x[:, 0] = rng.standard_normal(9000)
    y = Equalizer(sos, 2, exact=False).process(x)
    assert not y[:, 1].any()
    assert relative(y[:, 0], signal.sosfilt(sos, x[:, 0])) <= 1e-12


@pytest.mark.parametrize("channels", [3, 8])
def test_more_channels_stay_exact(channels):
    # The fast loop serves mono and stereo; other shapes take the exact loops.
    rng = np.random.default_rng(channels)
    sos = random_sos(rng, 2)
    x = rng.standard_normal((5000, channels))
    eq = Equalizer(sos, channels, exact=False)
    y = run(eq, x, [700, 1, 4096])
    ref, zf = signal.sosfilt(sos, x, axis=0, zi=np.zeros((2, 2, channels)))
    assert np.array_equal(y, ref)
    assert np.array_equal(eq.state, zf.transpose(0, 2, 1))


def test_fast_channels_by_cpu():
    # Stereo keeps the exact loops where the floating-point units are 128 bits
    # wide (AMD Zen 1, measured there: DEVELOPERS.md); mono takes the fast loop
    # everywhere.
    assert K.fast_channels("znver1") == (1,)
    for cpu in ("skylake-avx512", "icelake-server", "znver4", "generic"):
        assert K.fast_channels(cpu) == (1, 2)


def test_decoupled_mono_by_cpu():
    # The decoupled mono loop where it measured faster (two-lane units), the
    # eight-frame step elsewhere.
    assert K.decoupled_mono("znver1") is True
    assert K.decoupled_mono("skylake-avx512") is False
    riaa = np.array(design("riaa", 96000).sos)
    assert K.fast_tables(riaa, 1, decoupled=True).decoupled
    assert not K.fast_tables(riaa, 1, decoupled=False).decoupled


def test_target_cpu_follows_numba_cpu_name(monkeypatch):
    import llvmlite.binding

    monkeypatch.setenv("NUMBA_CPU_NAME", "znver1")
    assert K._target_cpu() == "znver1"
    monkeypatch.setenv("NUMBA_CPU_NAME", "host")
    assert K._target_cpu() == llvmlite.binding.get_host_cpu_name()


def test_stereo_on_a_narrow_cpu_is_the_exact_loop(monkeypatch):
    # exact=False on such a CPU: stereo output and state bit-identical to
    # sosfilt's, mono still the fast loop.
    monkeypatch.setattr(K, "_fast_here", K.fast_channels("znver1"))
    rng = np.random.default_rng(21)
    sos = random_sos(rng, 2)
    x = rng.standard_normal((5000, 2))
    eq = Equalizer(sos, 2, exact=False)
    y = run(eq, x, [700, 1, 4096])
    ref, zf = signal.sosfilt(sos, x, axis=0, zi=np.zeros((2, 2, 2)))
    assert np.array_equal(y, ref) and np.array_equal(eq.state, zf.transpose(0, 2, 1))
    mono = Equalizer(sos, 1, exact=False).process(x[:, 0])
    assert not np.array_equal(mono, ref[:, 0])
    assert relative(mono, ref[:, 0]) <= 1e-12


def test_state_after_each_block_is_sosfilts_zf():
    rng = np.random.default_rng(3)
    sos = random_sos(rng, 3)
    x = rng.standard_normal(30000)
    eq = Equalizer(sos, exact=False)
    done = 0
    for n in (1, 7, 8, 9, 511, 512, 513, 4096, 10000):
        eq.process(x[done:done + n])
        done += n
        _, zf = signal.sosfilt(sos, x[:done], zi=np.zeros((3, 2)))
        assert np.max(np.abs(eq.state[:, 0, :] - zf)) <= 1e-12 * np.max(np.abs(zf))


def test_fast_then_exact_continue_one_signal():
    # The state is sosfilt's zi, so a fast run can hand over to an exact one.
    rng = np.random.default_rng(4)
    sos = random_sos(rng, 2)
    x = rng.standard_normal(12000)
    fast = Equalizer(sos, exact=False)
    first = fast.process(x[:5000])
    second, _ = signal.sosfilt(sos, x[5000:], zi=fast.state[:, 0, :])
    assert relative(np.concatenate([first, second]), signal.sosfilt(sos, x)) <= 1e-12


# ---------------------------------------------------------------- accuracy, slow poles


@needs_long_double
@pytest.mark.parametrize(("sos", "label"), [(SLOW_SOS, "riaa+3Hz"), (TAPE_SOS, "tape+3Hz")])
@pytest.mark.parametrize("channels", [1, 2])
def test_poles_at_09999_no_worse_than_sosfilt(sos, label, channels):
    # Poles at |z| = 0.9999 (time constant 10 000 samples): float64
    # recursions drift from the exact result by up to ~1e-11 of the peak
    # (two slow poles in one section). The fast path must stay within twice
    # sosfilt's own error of the extended-precision recursion (plus 1e-14),
    # and so within 1e-10 of sosfilt.
    poles = np.concatenate([np.roots(row[3:]) for row in sos])
    assert np.isclose(np.abs(poles).max(), np.exp(-2 * np.pi * 3 / FS), rtol=1e-6)
    rng = np.random.default_rng(5)
    n = 600_000  # 60 time constants (about 3 s at 192 kHz)
    x = 0.1 * rng.standard_normal(n) + 0.01 * np.cumsum(rng.standard_normal(n)) / np.sqrt(n)
    if channels == 2:  # the same signal in both channels, one of them reversed in sign
        x = np.stack([x, -x], axis=1)
    y = run(Equalizer(sos, channels, exact=False), x, [65536, 4096, 256, 1000])
    exact = extended(sos, x)
    ref = signal.sosfilt(sos, x, axis=0)
    own, ours = relative(ref, exact), relative(y, exact)
    if label == "riaa+3Hz":
        assert own > 1e-13  # the hazard is real: sosfilt itself drifts here
    assert ours <= 2 * own + 1e-14, (label, ours, own)
    # Measured: the step matrices, made in extended precision, leave less
    # rounding than a float64 trip through the sections at every sample.
    assert ours < own / 2, (label, ours, own)
    assert relative(y, ref) <= 1e-10


@needs_long_double
def test_ordinary_design_tracks_extended_precision():
    rng = np.random.default_rng(6)
    sos = random_sos(rng, 2, max_radius=0.95)
    x = rng.standard_normal(20000)
    y = Equalizer(sos, exact=False).process(x)
    assert relative(y, extended(sos, x)) <= 1e-14


@pytest.mark.parametrize("channels", [1, 2])
def test_tables_match_sosfilt_on_unit_inputs(channels):
    # Each table, mapped back from u = (z0, z0 + z1) to sosfilt's zi, is what
    # sosfilt gives over one step for a unit state or a unit impulse.
    sos, step = SLOW_SOS, K.FAST_STEP
    ht, ct, gt, dt = K.step_tables(sos, channels)
    back = np.kron(np.eye(2), [[1.0, 0.0], [-1.0, 1.0]])  # u -> (z0, z1) per section
    to_u = np.linalg.inv(back)
    for m in range(4):
        y, zf = signal.sosfilt(sos, np.zeros(step), zi=(back @ np.eye(4)[m]).reshape(2, 2))
        assert np.allclose(ct[m].reshape(step, channels), y[:, None], rtol=0, atol=1e-12)
        assert np.allclose(to_u @ zf.ravel(), dt[m] + np.eye(4)[m], rtol=0, atol=1e-12)
    for j in range(step):
        impulse = np.zeros(step)
        impulse[j] = 1.0
        y, zf = signal.sosfilt(sos, impulse, zi=np.zeros((2, 2)))
        assert np.allclose(ht[j].reshape(step, channels), y[:, None], rtol=0, atol=1e-15)
        assert not ht[j, :j * channels].any()  # no output before the impulse
        assert np.allclose(to_u @ zf.ravel(), gt[j], rtol=0, atol=1e-15)


def test_decoupled_tables_match_sosfilt_on_unit_inputs():
    # Mapped back to sosfilt's zi (from_loop_state), each decoupled table is what
    # sosfilt gives over one substep for a unit state or a unit impulse.
    sos, frames = SLOW_SOS, K.DECOUPLED_SUBSTEP
    tables = K.decoupled_tables(sos)
    assert tables is not None and tables.decoupled
    ht, ct, gt, pq = tables.loop
    unit = np.eye(4)
    for m in range(4):
        zi = K.from_loop_state(unit[m].reshape(2, 1, 2), tables)[:, 0, :]
        y, zf = signal.sosfilt(sos, np.zeros(frames), zi=zi)
        # Each section's pair is its share of output 0 and of output 1 less output 0.
        assert np.allclose(y[:2], [m % 2 == 0, 1.0], rtol=0, atol=1e-12)
        assert np.allclose(y[2:], ct[m, 2:], rtol=0, atol=1e-12)
        after = K.to_loop_state(zf.reshape(2, 1, 2), tables).ravel()
        want = unit[m].copy()  # the transition: block-diagonal, PQ its blocks less the identity
        want[m] += pq[0, m]
        want[m ^ 1] += pq[1, m ^ 1]
        assert np.allclose(after, want, rtol=0, atol=1e-12)
    for j in range(frames):
        impulse = np.zeros(frames)
        impulse[j] = 1.0
        y, zf = signal.sosfilt(sos, impulse, zi=np.zeros((2, 2)))
        assert np.allclose(ht[j], y, rtol=0, atol=1e-15)
        assert np.allclose(K.to_loop_state(zf.reshape(2, 1, 2), tables).ravel(), gt[j], rtol=0, atol=1e-14)


def test_loop_state_round_trip():
    rng = np.random.default_rng(11)
    zi = rng.standard_normal((2, 1, 2))
    for tables in (K.fast_tables(SLOW_SOS, 1), K.fast_tables(SLOW_SOS, 2)):
        back = K.from_loop_state(K.to_loop_state(zi, tables), tables)
        assert np.allclose(back, zi, rtol=0, atol=1e-14)


def test_which_mono_loop():
    # The default RIAA design decouples (its sections' poles are far apart); a
    # cascade of two equal sections cannot (the Sylvester equation is singular),
    # nor can a basis whose rounding would lose a slow pole's decay: those take
    # the eight-frame step, and stereo always does.
    riaa = np.array(design("riaa", 96000).sos)
    assert K.fast_tables(riaa, 1).decoupled
    assert not K.fast_tables(riaa, 2).decoupled
    assert [Equalizer(riaa, c, exact=False).loop for c in (1, 2, 8)] == ["fast-decoupled", "fast", "exact"]
    assert Equalizer(riaa, 1).loop == "exact"
    twice = np.vstack([riaa[1], riaa[1]])
    assert K.decoupled_tables(twice) is None and not K.fast_tables(twice, 1).decoupled
    x = np.random.default_rng(12).standard_normal(5000)
    assert relative(Equalizer(twice, exact=False).process(x), signal.sosfilt(twice, x)) <= 1e-12
    # SLOW_SOS's second section (poles at 0.9999 and 0.9984): with each section's
    # state as its share of the first two outputs themselves, the float64
    # transition would lose its decays (relative error 3e-10, measured); as
    # output 0 and output 1 less output 0 it keeps them.
    y, u = K._unit_responses(SLOW_SOS, K.DECOUPLED_SUBSTEP)
    basis = K._decoupling_basis(u[:, :4], 2)
    section = slice(2, 4)
    exact = u[section, section] - np.eye(2)
    for shear, kept in ((np.eye(2), False), (np.array([[1.0, 0.0], [-1.0, 1.0]]), True)):
        m = shear.astype(np.longdouble) @ (y[:2, :4] @ basis)[:, section]
        assert K._decays_kept(exact, m @ exact @ K._inverse_2x2(m)) is kept
    assert K.decoupled_tables(SLOW_SOS) is not None


@needs_long_double
@pytest.mark.parametrize("rate", [44100, 96000, 192000])
def test_catalog_designs_mono_fast_no_worse_than_sosfilt(rate):
    # Every curve's default design, mono, whichever fast loop it takes: the
    # contract of test_poles_at_09999_no_worse_than_sosfilt. At 192 kHz the
    # designs without an LF time constant have poles at 0.9999, where sosfilt
    # drifts by up to 4e-11 of the peak in these 20000 samples (measured) and
    # the fast loops by 2e-13.
    x = np.random.default_rng(rate).standard_normal(20000)
    taken = set()
    for entry in curves():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # zeros above the band at 44.1 kHz, by design
            sos = np.array(design(entry["name"], rate).sos)
        taken.add(K.fast_tables(sos, 1).decoupled)
        y = Equalizer(sos, exact=False).process(x)
        ref, exact = signal.sosfilt(sos, x), extended(sos, x)
        own = relative(ref, exact)
        assert relative(y, exact) <= 2 * own + 1e-14, entry["name"]
        assert relative(y, ref) <= max(1e-12, 2 * own), entry["name"]
    assert True in taken


# ---------------------------------------------------------------- errors, flush, quantizer


@pytest.mark.parametrize("in_place", [False, True])
def test_nonfinite_block_raises_and_keeps_state(in_place):
    eq = Equalizer(SLOW_SOS, exact=False)
    eq.process(np.ones(3000))
    before = eq.state
    x = np.ones(5000)
    x[4321] = np.nan
    message = r"1 NaN or infinite sample\(s\); first at \(frame, channel\) \(4321, 0\)"
    with pytest.raises(DspeqError, match=message):
        eq.process(x, out=x if in_place else None)
    assert np.array_equal(eq.state, before)


def test_flush_keeps_tails_out_of_subnormals():
    # RIAA playback alone at 48 kHz: an impulse decays into subnormals after
    # ~106 000 samples in sosfilt (see tests/test_kernels.py); the fast loop
    # flushes like the exact one.
    z, p, k = signal.bilinear_zpk([-1 / 318e-6], [-1 / 3180e-6, -1 / 75e-6], 1.0, 48000)
    sos = np.ascontiguousarray(signal.zpk2sos(z, p, k))
    x = np.zeros(300_000)
    x[0] = 1.0
    eq = Equalizer(sos, exact=False)
    y = run(eq, x, [65536])
    ref = signal.sosfilt(sos, x)
    tiny = np.finfo(np.float64).smallest_normal
    assert np.count_nonzero((ref != 0) & (np.abs(ref) < tiny)) > 100_000
    assert np.count_nonzero((y != 0) & (np.abs(y) < tiny)) == 0
    assert not eq.state.any()
    assert np.max(np.abs(y - ref)) < 1e-15


@pytest.mark.parametrize("channels, dtype", [(1, np.float32), (2, np.float32), (2, np.float64)])
@pytest.mark.parametrize("first_sample", [0, 2**32 - 5001])
def test_process_pcm_equals_process_then_quantize(channels, dtype, first_sample):
    # The fast loop quantizes chunk by chunk; the same samples as process()
    # then quantize_tpdf, over chunk ends, leftover frames, and (second case)
    # the dither's key change at sample 2**32 inside a block.
    x = (0.3 * np.random.default_rng(7).standard_normal((9000, channels))).astype(dtype)
    a, b = Equalizer(SLOW_SOS, channels, exact=False), Equalizer(SLOW_SOS, channels, exact=False)
    sa, sb = K.seed_state(2), K.seed_state(2)
    sa[1] = sb[1] = first_sample
    for lo, hi in ((0, 5), (5, 4000), (4000, 9000)):
        got = np.empty((hi - lo, channels), np.int32)
        clips, peak = a.process_pcm(x[lo:hi], 0.05, 24, sa, got)
        y = b.process(x[lo:hi])
        want = np.empty_like(got)
        assert (clips, peak) == K.quantize_tpdf(y, 0.05, 24, sb, want)
        assert np.array_equal(got, want)
        assert a.last_peak == np.abs(y).max()  # numpy reference
    assert np.array_equal(a.state, b.state) and np.array_equal(sa, sb)


@pytest.mark.parametrize("channels, dtype", [(1, np.float64), (2, np.float32), (2, np.float64)])
def test_blocks_of_whole_steps_give_the_output_of_one_call(channels, dtype):
    # The fast loop keeps its state in u coordinates between blocks, so blocks
    # of any multiple of FAST_STEP frames give one call's output bit for bit,
    # filtered and quantized; a block of another length ends in the exact loop.
    x = (0.3 * np.random.default_rng(9).standard_normal((24_003, channels))).astype(dtype)
    one = Equalizer(SLOW_SOS, channels, exact=False).process(x)
    eq = Equalizer(SLOW_SOS, channels, exact=False)
    assert np.array_equal(run(eq, x, [8, 4096, 1000, 65536]), one)
    assert np.array_equal(run_pcm(x, [x.shape[0]]), run_pcm(x, [1000, 8, 4096]))
    # As a check on the claim: blocks that do not start on whole steps change later output.
    odd = run(Equalizer(SLOW_SOS, channels, exact=False), x, [1001])
    assert not np.array_equal(odd, one) and np.max(np.abs(odd - one)) <= 1e-6 * np.max(np.abs(one))


def _python_and_compiled_agree(frames: int, channels: int, n_sections: int = 2,
                               dtype: type = np.float64, decoupled: bool = False) -> int:
    """Run the pure-Python and compiled fast loops on ``frames`` frames; frames they did."""
    rng = np.random.default_rng(8)
    sos = random_sos(rng, n_sections)
    if decoupled:  # poles apart from section to section, so that the sections decouple
        k = np.arange(n_sections)
        radius, angle = 0.9 - 0.25 * k, 0.4 + 0.7 * k
        sos[:, 4:] = np.stack([-2 * radius * np.cos(angle), radius**2], axis=1)
    tables = K.decoupled_tables(sos) if decoupled else K.FastTables(K.step_tables(sos, channels))
    assert tables is not None
    x = rng.standard_normal((frames, channels)).astype(dtype)
    results = []
    kernel = K._fast_loop(n_sections, channels, decoupled=decoupled)
    for func in (kernel.py_func, kernel.compiled):
        zi, y = np.full((n_sections, channels, 2), 0.1), np.empty_like(x)
        finite, peak, done = func(x, y, zi, *tables.loop)
        results.append((y[:done], zi, bool(finite), float(peak), int(done)))
    assert np.array_equal(results[0][0], results[1][0]) and np.array_equal(results[0][1], results[1][1])
    assert results[0][2:] == results[1][2:]
    return results[0][4]


@pytest.mark.parametrize(("channels", "decoupled"), [(1, False), (1, True), (2, False)])
def test_pure_python_fast_loop_equals_compiled(channels, decoupled):
    assert _python_and_compiled_agree(1100, channels, decoupled=decoupled) == 1100 - 1100 % K.FAST_STEP


@pytest.mark.parametrize("decoupled", [False, True])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("n_sections", range(1, K.MAX_UNROLLED_SECTIONS + 1))
def test_mono_vector_loop_equals_its_scalar_source(n_sections, dtype, decoupled):
    # The compiled mono steps are written as LLVM vector code (_mono_steps_intrinsic,
    # _decoupled_steps_intrinsic); the pure-Python loop is the scalar source they
    # must match bit for bit.
    assert _python_and_compiled_agree(203, 1, n_sections, dtype, decoupled) == 200


@pytest.mark.parametrize(("channels", "decoupled"), [(1, False), (1, True), (2, False)])
def test_pure_python_fast_loop_equals_compiled_over_whole_chunks(channels, decoupled):
    # two whole chunks between flushes, a short one, 3 frames left over
    frames = 2 * K.FLUSH_EVERY + 100 * K.FAST_STEP + 3
    assert _python_and_compiled_agree(frames, channels, decoupled=decoupled) == frames - 3


def test_flag_attribute_and_repr():
    assert Equalizer(SLOW_SOS).exact is True
    eq = Equalizer(SLOW_SOS, exact=False)
    assert eq.exact is False and repr(eq) == "Equalizer(<2 sections>, channels=1, exact=False)"
    with pytest.raises(DspeqError, match="exact must be True or False, got 'no'"):
        Equalizer(SLOW_SOS, exact="no")
