"""Audition: the same excerpt through several curves, loudness-matched (ITU-R BS.1770)."""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest
from conftest import noise, write_audio
from scipy import signal

import dspeq
from dspeq.audition import FADE_S, HEADROOM_DB, PREROLL_S, audition, file_stem
from dspeq.cli.identify import parse_time, split_curves
from dspeq.design import DEFAULT_METHOD

pyloudnorm = pytest.importorskip("pyloudnorm")
sf = pytest.importorskip("soundfile")

FS = 48000
CURVES = ["riaa", "disc-500-16", "tc:318/3180,75", "disc:300,14"]
METHOD = "closed-form"          # fast to design; the default method is exercised once below


@pytest.fixture
def transfer(tmp_path):
    """4 s of low-passed stereo noise with a DC offset, as a 24-bit WAV."""
    x = noise(seconds=4.0, rate=FS, channels=2, level=0.3, seed=11) + 0.01
    return write_audio(tmp_path / "flat.wav", x, rate=FS)


def loudness(path) -> float:
    data, rate = sf.read(path, always_2d=True)
    return pyloudnorm.Meter(rate).integrated_loudness(data)


def test_renditions_are_loudness_matched(transfer, tmp_path):
    out = tmp_path / "out"
    sheet = audition(transfer, CURVES, out, start_s=1.5, length_s=2.0, method=METHOD)
    measured = [loudness(out / r.file) for r in sheet.renditions]
    assert max(measured) - min(measured) < 0.1                     # the requirement: within 0.1 LU
    assert measured == pytest.approx([sheet.target_lufs] * len(CURVES), abs=0.05)
    # the curves really differ in loudness before the gain (so the match is not trivial)
    assert np.ptp([r.loudness_lufs for r in sheet.renditions]) > 0.5
    for r in sheet.renditions:
        data, _ = sf.read(out / r.file, always_2d=True)
        assert 20 * np.log10(np.max(np.abs(data))) <= -HEADROOM_DB + 1e-6
        assert r.peak_dbfs == pytest.approx(20 * np.log10(np.max(np.abs(data))), abs=1e-4)
        assert data.shape == (2 * FS, 2)
    assert [r.file for r in sheet.renditions] == ["riaa.wav", "disc-500-16.wav", "tc_318_3180,75.wav",
                                                  "disc_300,14.wav"]
    saved = json.loads((out / "audition.json").read_text())
    assert [r["gain_db"] for r in saved["renditions"]] == [r.gain_db for r in sheet.renditions]
    assert "riaa.wav: curve riaa, gain" in (out / "audition.txt").read_text()


def test_rendition_is_the_equalizer_output(transfer, tmp_path):
    """The file equals sosfilt of the design over pre-roll + excerpt (DC removed), faded, times the gain."""
    sheet = audition(transfer, ["riaa"], tmp_path / "o", start_s=1.5, length_s=2.0, method=METHOD)
    x, _ = sf.read(transfer, always_2d=True)
    first, pre = int(1.5 * FS), int(PREROLL_S * FS)
    seg = x[first - pre:first + 2 * FS]
    y = signal.sosfilt(np.array(dspeq.design("riaa", FS, METHOD).sos), seg - seg.mean(axis=0), axis=0)[pre:]
    n = int(FADE_S * FS)
    ramp = 0.5 - 0.5 * np.cos(np.pi * (np.arange(n) + 0.5) / n)
    y[:n] *= ramp[:, None]
    y[-n:] *= ramp[::-1, None]
    y *= 10 ** (sheet.renditions[0].gain_db / 20)
    got, _ = sf.read(tmp_path / "o" / "riaa.wav", always_2d=True, dtype="float32")
    assert np.allclose(got, y.astype(np.float32), rtol=0, atol=2e-7)


def test_sequence_plays_the_excerpts_in_turn(transfer, tmp_path):
    out = tmp_path / "seq"
    sheet = audition(transfer, CURVES[:3], out, length_s=1.0, sequence=True, gap_s=1.0, method=METHOD)
    seq, _ = sf.read(out / "sequence.wav", always_2d=True)
    assert seq.shape[0] == 3 * FS + 2 * FS
    for r in sheet.renditions:
        single, _ = sf.read(out / r.file, always_2d=True)
        at = int(round(r.sequence_at_s * FS))
        assert np.array_equal(seq[at:at + FS], single)
    assert [r.sequence_at_s for r in sheet.renditions] == [0.0, 2.0, 4.0]
    assert not seq[FS:2 * FS].any() and not seq[3 * FS:4 * FS].any()


def test_integer_output_is_dithered_and_matched(transfer, tmp_path):
    out = tmp_path / "int"
    sheet = audition(transfer, CURVES[:2], out, length_s=2.0, bits=24, method=METHOD)
    assert sf.info(out / "riaa.wav").subtype == "PCM_24"
    measured = [loudness(out / r.file) for r in sheet.renditions]
    assert max(measured) - min(measured) < 0.1
    assert [r.dither_seed for r in sheet.renditions] == [1, 2]


def test_default_design_method(transfer, tmp_path):
    sheet = audition(transfer, ["riaa", "nab-7.5ips"], tmp_path / "d", length_s=1.0)
    assert sheet.method == DEFAULT_METHOD
    measured = [loudness(tmp_path / "d" / r.file) for r in sheet.renditions]
    assert max(measured) - min(measured) < 0.1


def test_asked_target_is_lowered_to_keep_peaks_below_the_ceiling(transfer, tmp_path):
    sheet = audition(transfer, CURVES[:2], tmp_path / "t", length_s=2.0, target_lufs=-3.0, method=METHOD)
    assert sheet.target_lufs < -3.0
    assert max(r.peak_dbfs for r in sheet.renditions) == pytest.approx(-HEADROOM_DB, abs=1e-9)
    assert any("target lowered" in n for n in sheet.notes)


def test_existing_files_are_not_overwritten_unless_asked(transfer, tmp_path):
    out = tmp_path / "o"
    audition(transfer, ["riaa"], out, length_s=1.0, method=METHOD)
    before = (out / "riaa.wav").read_bytes()
    with pytest.raises(dspeq.DspeqError, match="already exists"):
        audition(transfer, ["riaa"], out, length_s=1.0, start_s=2.0, method=METHOD)
    assert (out / "riaa.wav").read_bytes() == before
    audition(transfer, ["riaa"], out, length_s=1.0, start_s=2.0, method=METHOD, overwrite=True)
    assert (out / "riaa.wav").read_bytes() != before
    assert sorted(p.name for p in out.iterdir()) == ["audition.json", "audition.txt", "riaa.wav"]


def test_bad_requests_say_so(transfer, tmp_path, monkeypatch):
    with pytest.raises(dspeq.AudioFileError, match="outside the file"):
        audition(transfer, ["riaa"], tmp_path / "a", start_s=9.0, method=METHOD)
    with pytest.raises(dspeq.DspeqError, match="too short to measure loudness"):
        audition(transfer, ["riaa"], tmp_path / "b", length_s=0.2, method=METHOD)
    with pytest.raises(dspeq.CurveError, match="unknown curve 'riaaa'"):
        audition(transfer, ["riaaa"], tmp_path / "c", method=METHOD)
    monkeypatch.setitem(sys.modules, "pyloudnorm", None)            # as if not installed
    with pytest.raises(dspeq.DspeqError, match=r"pip install 'dspeq\[loudness\]'"):
        audition(transfer, ["riaa"], tmp_path / "d", length_s=1.0, method=METHOD)
    assert not (tmp_path / "d").exists()
    silent = write_audio(tmp_path / "silent.wav", np.zeros((FS, 2)), rate=FS)
    monkeypatch.delitem(sys.modules, "pyloudnorm")
    with pytest.raises(dspeq.DspeqError, match="too quiet"):
        audition(silent, ["riaa"], tmp_path / "e", method=METHOD)


def test_cli_audition(transfer, tmp_path, capsys):
    from dspeq.cli import main

    out = tmp_path / "cli"
    status = main(["audition", str(transfer), "--curves", "riaa,tc:318/3180,75", "--curves", "disc:500,16",
                   "--start", "0:01", "--length", "1.5", "--sequence", "--method", METHOD, str(out),
                   "--format", "json"])
    stdout, stderr = capsys.readouterr()
    assert status == 0
    assert stderr.startswith("CAUTION")
    data = json.loads(stdout)
    assert [r["spec"] for r in data["renditions"]] == ["riaa", "tc:318/3180,75", "disc:500,16"]
    assert data["sequence_file"] == "sequence.wav" and (out / "sequence.wav").exists()
    status = main(["audition", str(transfer), str(tmp_path / "x"), "--curves", "nope"])
    _, stderr = capsys.readouterr()
    assert status == 2 and stderr.splitlines()[-1].startswith("dspeq: error: unknown curve 'nope'")


def test_curve_lists_and_times():
    assert split_curves(["riaa,tc:318/3180,75,disc:500,16,100", "nab-7.5ips;tc:35/inf"]) == [
        "riaa", "tc:318/3180,75", "disc:500,16,100", "nab-7.5ips", "tc:35/inf"]
    assert [parse_time(t) for t in ("90", "90.5s", "1:30", "1:02:03.5", ".5")] == [90, 90.5, 90, 3723.5, 0.5]
    with pytest.raises(Exception, match="time must be"):
        parse_time("1m30")
    assert file_stem("../../etc/passwd") == "etc_passwd"


def test_module_examples_run():
    import doctest

    import dspeq.audition

    assert doctest.testmod(dspeq.audition).failed == 0
