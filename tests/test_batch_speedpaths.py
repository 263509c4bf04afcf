"""The batch's fast paths give the same results as the plain ones.

* fixed-gain integer output is filtered and quantized in one kernel pass;
  the peak-safe mode filters, spools and quantizes in separate steps: with
  the same gain and seed both must write the same samples;
* the sample MD5 of FLAC output is read from STREAMINFO (the encoder's
  own); it must equal the MD5 of the decoded samples in FLAC's convention
  (signed little-endian integers of the word length, interleaved);
* the input's SHA-256 is computed in a thread while the file is decoded.

References: hashlib (MD5, SHA-256), soundfile (decoding), FLAC format
specification, STREAMINFO block (MD5 of the unencoded audio data).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import write_audio

from dspeq.batch import Settings, audio, quick_job, read_records, run_job


def quick_run(inp: Path, out: Path, **settings):
    """The quick form in this process, without report.html; (Summary, records by input)."""
    job = quick_job(inp, out, Settings(curve="riaa", **settings))
    summary = run_job(job, workers=1, report=False)
    return summary, {r["input_rel"]: r for r in read_records(job.manifest_path)}


def _decoded_md5(path: Path, bits: int) -> str:
    """MD5 of the samples of ``path`` as signed little-endian ``bits``-bit integers (numpy only)."""
    y = sf.read(str(path), dtype="int32", always_2d=True)[0] >> (32 - bits)
    width = bits // 8
    raw = y.astype("<i4").view(np.uint8).reshape(-1, 4)[:, :width]
    return hashlib.md5(np.ascontiguousarray(raw).tobytes()).hexdigest()


def test_fixed_gain_one_pass_equals_peak_safe_steps(tmp_path):
    # Quiet enough that the peak-safe gain is 0 dB: both modes then quantize
    # the same filtered samples with the same seed (the file's path decides it).
    inp = tmp_path / "in"
    write_audio(inp / "a.flac", fmt="FLAC", subtype="PCM_24", level=0.05, seconds=0.6)
    write_audio(inp / "b.wav", subtype="PCM_16", level=0.05, seconds=0.3, channels=1)
    _, fixed = quick_run(inp, tmp_path / "fixed", gain_db=0.0)
    _, auto = quick_run(inp, tmp_path / "auto")
    for name in ("a.flac", "b.wav"):
        assert auto[name]["level"]["gain_db"] == 0.0 and auto[name]["level"]["mode"] == "peak-safe"
        assert fixed[name]["level"]["mode"] == "fixed"
        a = sf.read(str(tmp_path / "fixed" / name), dtype="int32")[0]
        b = sf.read(str(tmp_path / "auto" / name), dtype="int32")[0]
        assert np.array_equal(a, b)
        assert fixed[name]["output_audio_md5"] == auto[name]["output_audio_md5"]
        assert fixed[name]["level"]["output_peak_dbfs"] == auto[name]["level"]["output_peak_dbfs"]


@pytest.mark.parametrize(("subtype", "bits"), [("PCM_16", 16), ("PCM_24", 24)])
def test_flac_md5_from_streaminfo_equals_decoded_samples(tmp_path, subtype, bits):
    inp = tmp_path / "in"
    write_audio(inp / "a.flac", fmt="FLAC", subtype=subtype, seconds=0.4)
    _, records = quick_run(inp, tmp_path / "out")
    out = tmp_path / "out" / "a.flac"
    assert records["a.flac"]["output_audio_md5"] == _decoded_md5(out, bits)
    assert records["a.flac"]["output_sha256"] == hashlib.sha256(out.read_bytes()).hexdigest()


def test_wav_md5_of_packed_samples(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "a.wav", subtype="PCM_24", seconds=0.3)
    _, records = quick_run(inp, tmp_path / "out")
    assert records["a.wav"]["output_audio_md5"] == _decoded_md5(tmp_path / "out" / "a.wav", 24)


def test_flac_md5_falls_back_to_decoding_when_streaminfo_is_empty(tmp_path, monkeypatch):
    # An encoder that leaves the MD5 out (all zero bytes, as the format allows).
    monkeypatch.setattr(audio, "_streaminfo_md5", lambda path: None)
    spec = audio.OutputSpec("flac", "int16", "FLAC", "PCM_16", 16)
    sink = audio.Sink(tmp_path / "x.flac", spec, 48000, 2, audio.Quantizer(16, 1.0, 5))
    x = np.random.default_rng(1).uniform(-0.5, 0.5, (3000, 2))
    sink.write(x[:1000])
    sink.write(x[1000:])
    md5 = sink.audio_md5
    sink.commit(None)
    assert md5 == _decoded_md5(tmp_path / "x.flac", 16)


def test_streaminfo_md5_reader(tmp_path):
    path = tmp_path / "s.flac"
    y = (np.arange(-300, 300, dtype=np.int32).reshape(-1, 2) << 16).astype(np.int32)
    sf.write(str(path), y, 8000, subtype="PCM_16")
    assert audio._streaminfo_md5(path) == _decoded_md5(path, 16)
    (tmp_path / "w.wav").write_bytes(b"RIFF" + bytes(60))
    assert audio._streaminfo_md5(tmp_path / "w.wav") is None


def test_file_digest_in_a_thread(tmp_path):
    path = tmp_path / "f.bin"
    data = np.random.default_rng(0).integers(0, 256, 3 * 2**20 + 17, dtype=np.uint8).tobytes()
    path.write_bytes(data)
    digest = audio.FileDigest(path)
    assert digest.result() == (hashlib.sha256(data).hexdigest(), len(data))
    assert digest.hex_or_none() == hashlib.sha256(data).hexdigest()
    with pytest.raises(FileNotFoundError):
        audio.FileDigest(tmp_path / "missing.bin")      # raised at once, as sha256_file would


def test_failed_file_still_records_the_input_digest(tmp_path):
    inp = tmp_path / "in"
    inp.mkdir()
    junk = inp / "junk.wav"
    junk.write_bytes(b"not audio at all" * 100)
    summary, records = quick_run(inp, tmp_path / "out")
    rec = records["junk.wav"]
    assert summary.failed == 1 and rec["status"] == "failed"
    assert rec["input_sha256"] == hashlib.sha256(junk.read_bytes()).hexdigest()


def test_quantizer_filtered_equals_process_then_quantize():
    from dspeq import design
    from dspeq.stream import Equalizer

    d = design("riaa", 48000)
    x = (np.random.default_rng(4).standard_normal((5000, 2)) * 0.2).astype(np.float32)
    one, two = audio.Quantizer(24, 0.7, 3), audio.Quantizer(24, 0.7, 3)
    eq1, eq2 = Equalizer(d, 2), Equalizer(d, 2)
    for lo, hi in ((0, 1000), (1000, 1001), (1001, 5000)):
        a = one.filtered(eq1, x[lo:hi]).copy()
        b = two(eq2.process(x[lo:hi])).copy()
        assert np.array_equal(a, b)
    assert one.clips == two.clips and one.peak == two.peak > 0
