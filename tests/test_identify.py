"""Identify the recording curve from line-up tones: detection, fit, ranking, CLI.

Line-up tones are synthesized through the *exact* analog pre-emphasis: a
steady sine recorded at one level through R = 1/P and transferred flat has
the amplitude |R(f)| = 10^(-|P(f)|_dB / 20) (up to a common gain), which is
what the synthesis writes, plus per-tone level scatter and white noise.
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest

import dspeq
from dspeq.identify import (
    FrameFeatures,
    candidate_curves,
    find_tones,
    fit_curve,
    frame_features,
    frame_length,
    identify,
    parse_levels,
    rank_curves,
    tones_from_features,
)

FS = 48000
# ISO 266 preferred one-third-octave frequencies, 20 Hz - 20 kHz (the usual
# frequency-response section of a calibration tape; common practice, no source).
THIRD_OCTAVES = np.array([20, 25, 31.5, 40, 50, 63, 80, 100, 125, 160, 200, 250, 315, 400, 500, 630,
                          800, 1000, 1250, 1600, 2000, 2500, 3150, 4000, 5000, 6300, 8000, 10000,
                          12500, 16000, 20000], dtype=float)
# A stepped sequence in 1/12-octave steps, 20.9 Hz - 19 kHz (119 tones): dense
# enough that ±0.2 dB scatter leaves the time constants within 2 % (see
# test_reported_uncertainty_is_fair for the spread with fewer tones).
TWELFTHS = 1000.0 * 2.0 ** (np.arange(-67, 52) / 12.0)


def lineup(spec: str, freqs: np.ndarray, *, tone_s: float = 0.6, gap_s: float = 0.15,
           ref_dbfs: float = -24.0, scatter_db: float = 0.2, noise_db: float = -60.0, speed: float = 1.0,
           seed: int = 0, fs: int = FS) -> tuple[np.ndarray, np.ndarray]:
    """Tones recorded at one level through the recording curve of ``spec``, replayed flat.

    Returns (audio, true level of each tone in dBFS).  ``speed``: replay
    speed / recording speed (frequencies scale, levels do not).  The noise
    is white, ``noise_db`` below the 1 kHz reference level.
    """
    rng = np.random.default_rng(seed)
    levels = ref_dbfs - dspeq.curve(spec).magnitude_db(freqs) + rng.uniform(-scatter_db, scatter_db,
                                                                              freqs.size)
    t = np.arange(int(tone_s * fs)) / fs
    parts = [np.zeros(int(gap_s * fs))]
    for f, lv in zip(freqs * speed, levels, strict=True):
        parts += [10 ** (lv / 20) * np.sin(2 * np.pi * f * t + rng.uniform(0, 2 * np.pi)),
                  np.zeros(int(gap_s * fs))]
    x = np.concatenate(parts)
    return x + 10 ** ((ref_dbfs + noise_db) / 20) * rng.standard_normal(x.size), levels


def identify_audio(x: np.ndarray, **kw):
    tones = find_tones(x, FS)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return identify([t.freq_hz for t in tones], [t.level_db for t in tones], **kw), tones


# ---------------------------------------------------------------------------- fit recovery
# Tape time constants (HF, LF) in µs: IASA TC-04 §5.4.10 Table 1, IEC 60094, NAB 1965
# (as listed in the catalog); None = infinite LF time constant.
TAPE = [("nab-7.5ips", 50.0, 3180.0), ("cassette-120us", 120.0, 3180.0), ("nab-3.75ips", 90.0, 3180.0),
        ("cassette-70us", 70.0, 3180.0), ("iec1962-3.75ips", 140.0, 3180.0), ("iec-15ips", 35.0, None),
        ("iec-30ips", 17.5, None), ("ccir1950-7.5ips", 100.0, None)]


@pytest.mark.parametrize("seed, case", list(enumerate(TAPE)), ids=[c[0] for c in TAPE])
def test_tape_time_constants_recovered_within_2_percent(seed, case):
    name, hf_us, lf_us = case
    x, _ = lineup(name, TWELFTHS, seed=seed)
    result, tones = identify_audio(x, kind="tape")
    assert len(tones) == TWELFTHS.size
    params = {p.name: p for p in result.fit.parameters}
    assert params["hf"].value_us == pytest.approx(hf_us, rel=0.02)
    assert params["hf"].status == "determined"
    if lf_us is None:
        assert params["lf"].status == "absent" and math.isinf(params["lf"].value_us)
        assert result.fit.spec.endswith("/inf")
    else:
        assert params["lf"].value_us == pytest.approx(lf_us, rel=0.02)
        assert params["lf"].status == "determined"
    assert name in result.ranking[0].names


def test_reported_uncertainty_is_fair():
    """Over many scatter draws the true value lies within 2σ of the fit most of the time."""
    inside, errors = [], []
    for seed in range(40):
        rng = np.random.default_rng(100 + seed)
        levels = -20 - dspeq.curve("cassette-70us").magnitude_db(THIRD_OCTAVES) + rng.uniform(-.2, .2, 31)
        fit = fit_curve(THIRD_OCTAVES, levels, "tape")
        for p, true in zip(fit.parameters, (3180.0, 70.0), strict=True):
            inside.append(abs(p.value_us - true) <= 2 * p.sigma_us)
            errors.append(abs(p.value_us / true - 1))
    # For a Gaussian estimate ±2σ covers 95 %; allow for 40 draws and the linearization.
    assert np.mean(inside) >= 0.85
    assert np.median(errors) < 0.01


def test_disc_parameters_recovered_from_exact_levels():
    """Without scatter the disc fit returns the published time constants (RIAA: 3180/318/75 µs)."""
    levels = -30 - dspeq.curve("riaa").magnitude_db(THIRD_OCTAVES)
    fit = identify(THIRD_OCTAVES, levels, kind="disc").fit
    assert fit.spec == "tc:318/3180,75"
    assert fit.rms_db < 1e-3
    assert fit.gain_db == pytest.approx(-30, abs=1e-3)
    # a curve with no LF shelf and no roll-off (IASA's '629' row) is reported as such
    fit = identify(THIRD_OCTAVES, -30 - dspeq.curve("disc-629-0").magnitude_db(THIRD_OCTAVES),
                   kind="disc").fit
    assert [p.status for p in fit.parameters] == ["absent", "determined", "absent"]
    assert fit.spec == f"tc:{1e6 / (2 * math.pi * 629):.4g}/inf"


def test_fitted_curve_is_usable_as_a_curve_anywhere():
    x, _ = lineup("cassette-70us", THIRD_OCTAVES, seed=3)
    result, _ = identify_audio(x, kind="tape")
    parsed = dspeq.curve(result.fit.spec)
    assert parsed.time_constants() == result.fit.curve.time_constants()
    f = np.array([31.5, 1000.0, 10000.0])
    assert np.allclose(parsed.magnitude_db(f), result.fit.curve.magnitude_db(f))
    assert dspeq.design(result.fit.spec, 48000, "closed-form").sos.shape[1] == 6


def test_parameter_the_tones_cannot_determine_is_flagged():
    """No tone below 200 Hz: a 3180 µs LF time constant cannot be told from infinity."""
    f = THIRD_OCTAVES[THIRD_OCTAVES >= 200]
    scatter = np.random.default_rng(1).uniform(-0.2, 0.2, f.size)
    levels = -20 - dspeq.curve("nab-7.5ips").magnitude_db(f) + scatter
    with pytest.warns(UserWarning, match="LF time constant.*below about 100 Hz"):
        result = identify(f, levels, kind="tape")
    params = {p.name: p for p in result.fit.parameters}
    assert params["lf"].status == "undetermined" and math.isinf(params["lf"].high_us)
    assert params["hf"].status == "determined"


def test_too_few_tones_rank_but_do_not_fit():
    f, levels = np.array([1000.0, 10000.0]), np.array([-20.0, -10.0])
    with pytest.warns(UserWarning, match="need at least 3 tones"):
        result = identify(f, levels, kind="tape")
    assert result.fit is None and len(result.ranking) > 0


# ---------------------------------------------------------------------------- ranking
RANKED = ["riaa", "disc-500-16-lf100", "disc-300-14", "disc-250-5-lf40", "disc-629-0", "nab-7.5ips",
          "iec-15ips", "cassette-70us", "iec1962-3.75ips"]


@pytest.mark.parametrize("seed, name", list(enumerate(RANKED)), ids=RANKED)
def test_right_catalog_curve_ranks_first(seed, name):
    x, _ = lineup(name, THIRD_OCTAVES, seed=10 + seed)
    result, tones = identify_audio(x)
    assert len(tones) == THIRD_OCTAVES.size
    assert name in result.ranking[0].names
    assert result.ranking[0].rms_db < 0.2          # the ±0.2 dB uniform scatter has σ = 0.115 dB
    assert result.kind == dspeq.curve(name).kind


def test_speed_ratio_two_is_detected_when_offered():
    """A cassette (3180/120 µs) transferred at double speed: tones at twice their frequency."""
    freqs = THIRD_OCTAVES[THIRD_OCTAVES <= 10000]
    x, _ = lineup("cassette-120us", freqs, speed=2.0, seed=5)
    offered, _ = identify_audio(x, kind="tape", speeds=[2.0])
    assert "cassette-120us@x2" in offered.ranking[0].names
    assert offered.ranking[0].rms_db < 0.2
    plain, _ = identify_audio(x, kind="tape")
    assert plain.ranking[0].rms_db > 0.4          # no catalog curve fits at the recorded speed
    fit = {p.name: p.value_us for p in offered.fit.parameters}
    assert fit["lf"] == pytest.approx(3180 / 2, rel=0.05) and fit["hf"] == pytest.approx(60, rel=0.05)


def test_identical_shapes_share_one_rank():
    levels = -20 - dspeq.curve("iec-15ips").magnitude_db(THIRD_OCTAVES)
    ranking = rank_curves(THIRD_OCTAVES, levels, candidate_curves("tape", speeds=[2.0]))
    # IEC 15 ips and CCIR 30 ips are both (1 + s·35 µs)/s; IEC 7.5 ips (70 µs) played at
    # double speed has the same shape (IASA TC-04 Table 1 time constants).
    assert set(ranking[0].names) == {"iec-15ips", "ccir-30ips", "iec-7.5ips@x2"}
    assert ranking[0].rms_db < 1e-9
    assert ranking[1].rank == 2 and ranking[1].rms_db > 0.1
    names = [n for m in ranking for n in m.names]
    assert len(names) == len(set(names)) == len(candidate_curves("tape", speeds=[2.0]))


def test_applied_curve_is_removed_first():
    """IEC 7.5 ips tones transferred through a machine set to NAB 7.5 ips."""
    levels = (-20 - dspeq.curve("iec-7.5ips").magnitude_db(THIRD_OCTAVES)
              + dspeq.curve("nab-7.5ips").magnitude_db(THIRD_OCTAVES))
    result = identify(THIRD_OCTAVES, levels, kind="tape", applied="nab-7.5ips")
    assert result.ranking[0].names == ("iec-7.5ips",)
    assert result.fit.spec == "tc:70/inf"


# ---------------------------------------------------------------------------- tone detection
def test_tones_found_through_silence_clicks_and_drift():
    rng = np.random.default_rng(7)
    freqs = np.array([1000, 31.5, 63, 250, 1000, 4000, 10000, 16000, 20000])
    levels = rng.uniform(-40, -12, freqs.size)
    pieces, expected = [np.zeros(FS)], []
    for f, lv in zip(freqs, levels, strict=True):
        dur = rng.uniform(0.8, 2.0)
        t = np.arange(int(dur * FS)) / FS
        drift = 0.01 * (1 if rng.random() < 0.5 else -1)              # 1 % glide across the tone
        phase = 2 * np.pi * f * (t + drift * t ** 2 / (2 * dur))
        pieces += [10 ** (lv / 20) * np.sin(phase), np.zeros(int(rng.uniform(0.3, 2.5) * FS))]
        expected.append((f * (1 + drift / 2), lv, dur))
    x = np.concatenate(pieces) + 10 ** (-84 / 20) * rng.standard_normal(sum(map(len, pieces)))
    clicks = rng.integers(0, x.size - 8, 40)                          # 40 clicks, 1-8 samples
    for c in clicks:
        x[c:c + rng.integers(1, 9)] += rng.choice([-1, 1]) * rng.uniform(0.2, 0.9)
    tones = find_tones(x, FS)
    assert len(tones) == freqs.size
    for tone, (f, lv, dur) in zip(tones, expected, strict=True):
        assert tone.freq_hz == pytest.approx(f, rel=0.006)
        assert tone.level_db == pytest.approx(lv, abs=0.1)
        assert tone.duration_s == pytest.approx(dur, abs=0.2)
        assert tone.drift < 0.015


def test_level_and_frequency_of_a_steady_tone():
    """AES17: a full-scale sine reads 0 dBFS, so amplitude 0.05 reads 20·log10(0.05) dBFS."""
    t = np.arange(2 * FS) / FS
    x = np.column_stack([0.05 * np.sin(2 * np.pi * 997.0 * t), 0.025 * np.sin(2 * np.pi * 997.0 * t)])
    (tone,) = find_tones(x, FS)
    assert tone.freq_hz == pytest.approx(997.0, rel=1e-4)
    assert tone.channel_levels_db == pytest.approx((20 * math.log10(0.05), 20 * math.log10(0.025)),
                                                   abs=0.01)
    # both channels: power mean; one channel on request
    assert tone.level_db == pytest.approx(10 * math.log10((0.05 ** 2 + 0.025 ** 2) / 2), abs=0.01)
    (right,) = find_tones(x, FS, channel=1)
    assert right.level_db == pytest.approx(20 * math.log10(0.025), abs=0.01)


def test_noise_rumble_and_silence_are_not_tones():
    rng = np.random.default_rng(3)
    walk = np.cumsum(rng.standard_normal(5 * FS)) * 1e-3               # random walk: rumble-like
    white = 0.05 * rng.standard_normal(5 * FS)
    assert find_tones(np.concatenate([walk - walk.mean(), white, np.zeros(FS)]), FS) == []


def test_features_of_blocks_join_to_those_of_the_whole():
    x, _ = lineup("riaa", THIRD_OCTAVES[::4], tone_s=0.7, seed=2)
    n = frame_length(FS)
    hop = n // 2
    whole = frame_features(x, FS, n)
    size = 7 * hop + n - hop
    parts = [frame_features(x[s:s + size], FS, n) for s in range(0, x.size, size - (n - hop))]
    joined = FrameFeatures.concatenate(parts)
    assert np.array_equal(joined.freq_hz, whole.freq_hz, equal_nan=True)
    assert np.allclose(joined.band_power, whole.band_power, rtol=1e-12, atol=0)
    assert tones_from_features(joined, FS, n) == tones_from_features(whole, FS, n)


# ---------------------------------------------------------------------------- tables of levels
def test_levels_table_with_header_comments_and_separators():
    text = "# measured on a meter\nfrequency;level\n31.5; -3.2\n\n1000,0\n10000\t+1.5 extra\n"
    f, v = parse_levels(text)
    assert f.tolist() == [31.5, 1000.0, 10000.0] and v.tolist() == [-3.2, 0.0, 1.5]


@pytest.mark.parametrize("text, row, word", [
    ("hz,db\n100,-3\n1k,0\n", 3, "frequency '1k'"),
    ("100,-3\n1000,zero\n", 2, "level 'zero'"),
    ("100,-3\n-50,1\n", 2, "must be positive"),
    ("100,-3\n1000\n", 2, "expected 'frequency, level'"),
    ("100,-3\n1000,nan\n", 2, "level 'nan'"),
])
def test_bad_levels_row_is_named(text, row, word):
    with pytest.raises(dspeq.DspeqError, match=f"t.csv, row {row}: .*{word}"):
        parse_levels(text, "t.csv")


# ---------------------------------------------------------------------------- command line
def _run(capsys, *argv):
    from dspeq.cli import main

    status = main(list(argv))
    out, err = capsys.readouterr()
    return status, out, err


def test_cli_identify_audio_file_table_and_json(tmp_path, capsys):
    import soundfile as sf

    x, _ = lineup("nab-7.5ips", THIRD_OCTAVES, seed=4)
    path = tmp_path / "tones.wav"
    sf.write(path, np.column_stack([x, x]), FS, subtype="PCM_24")
    status, out, _ = _run(capsys, "identify", str(path))
    assert status == 0
    lines = out.splitlines()
    first = lines[lines.index(next(line for line in lines if line.startswith("rank"))) + 2]
    assert first.split()[:4] == ["1", "nab-15ips", "=", "nab-7.5ips"]
    assert "Fitted tape curve: tc:" in out
    status, out, _ = _run(capsys, "identify", str(path), "--format", "json", "--drop", "1")
    data = json.loads(out)
    assert status == 0 and len(data["detected"]) == THIRD_OCTAVES.size
    assert len(data["tones"]) == THIRD_OCTAVES.size - 1 and len(data["ranking"]) == 5
    assert data["ranking"][0]["names"] == ["nab-15ips", "nab-7.5ips"]
    dspeq.curve(data["fit"]["curve"])                   # the printed curve is a valid CURVE


def test_cli_identify_levels_table(tmp_path, capsys):
    levels = -10 - dspeq.curve("disc-500-16-lf100").magnitude_db(THIRD_OCTAVES)
    table = tmp_path / "levels.csv"
    table.write_text("frequency,level\n" + "".join(f"{f},{v:.3f}\n" for f, v in zip(THIRD_OCTAVES, levels,
                                                                                     strict=True)))
    status, out, _ = _run(capsys, "identify", "--levels", str(table), "--kind", "disc", "--format", "json")
    data = json.loads(out)
    assert status == 0 and data["ranking"][0]["names"] == ["disc-500-16-lf100"]
    assert data["fit"]["rms_db"] < 0.01


def test_cli_bad_inputs_say_so_plainly(tmp_path, capsys):
    import soundfile as sf

    quiet = tmp_path / "hiss.wav"
    sf.write(quiet, 0.01 * np.random.default_rng(0).standard_normal(3 * FS), FS)
    status, out, err = _run(capsys, "identify", str(quiet))
    assert status == 2 and out == ""
    assert err.startswith("dspeq: error: no steady tones found in") and err.count("\n") == 1
    table = tmp_path / "bad.csv"
    table.write_text("f,l\n100,-3\n1000,oops\n")
    status, _, err = _run(capsys, "identify", "--levels", str(table))
    assert status == 2 and "row 3: level 'oops'" in err and err.count("\n") == 1
    status, _, err = _run(capsys, "identify")
    assert status == 2 and "either FILE" in err
    status, _, err = _run(capsys, "identify", str(quiet), "--start", "10")
    assert status == 2 and "outside the file" in err


def test_tones_table_header_is_clean(tmp_path, capsys):
    """The tone table is printed before the ranking, numbered from 1."""
    import soundfile as sf

    x, _ = lineup("riaa", THIRD_OCTAVES[::3], seed=6)
    path = tmp_path / "t.flac"
    sf.write(path, x, FS, subtype="PCM_24")
    status, out, _ = _run(capsys, "identify", str(path), "--kind", "disc")
    lines = out.splitlines()
    assert status == 0 and lines[0].startswith("Steady tones in") and lines[3].split()[0] == "1"
    assert len([line for line in lines[3:] if line[:1].isdigit() and "dropped" not in line]) >= 11


def test_levels_follow_the_iec_flux_formula_through_an_ideal_head():
    """The model's meaning for tape, checked against the standard's formula, not against dspeq.curve.

    Recorded flux relative level L(f) = 10·log10(1 + 1/(ωT1)²) − 10·log10(1 + (ωT2)²)
    (IEC 60094-1 clause 15, as described by published summaries; REFERENCES.md);
    an ideal replay head adds 20·log10(f) (its output is proportional to dΦ/dt).
    """
    w = 2 * np.pi * THIRD_OCTAVES
    t1, t2 = 3180e-6, 50e-6                   # NAB 7.5 ips (IASA TC-04 Table 1)
    flux = 10 * np.log10(1 + 1 / (w * t1) ** 2) - 10 * np.log10(1 + (w * t2) ** 2)
    levels = flux + 20 * np.log10(THIRD_OCTAVES) - 60
    result = identify(THIRD_OCTAVES, levels, kind="tape")
    assert result.ranking[0].names == ("nab-15ips", "nab-7.5ips")
    assert result.ranking[0].rms_db < 1e-9
    assert result.fit.spec == "tc:50/3180"


def test_module_examples_run():
    import doctest

    import dspeq.identify

    assert doctest.testmod(dspeq.identify, optionflags=doctest.ELLIPSIS).failed == 0
