"""The batch with ``oversample``: aligned output, both level modes, the record, reruns, the CLI."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import quick_run, tree_digests, write_audio

from dspeq import JobError
from dspeq.batch import Settings, load_job
from dspeq.cli import main
from dspeq.oversample import design_oversampled, filter_aligned


def reference(path: Path, factor: int = 2) -> np.ndarray:
    """The input through the aligned oversampled equalizer, float64 (the path under test's core)."""
    x, rate = sf.read(str(path), always_2d=True)
    return filter_aligned(design_oversampled("riaa", rate, factor), x)


@pytest.fixture
def tiny(tmp_path: Path) -> Path:
    inp = tmp_path / "in"
    write_audio(inp / "a.wav", rate=44100, seconds=0.2, level=0.9, seed=4)
    write_audio(inp / "f.wav", rate=44100, seconds=0.2, subtype="DOUBLE", level=0.5, seed=5)
    return inp


def test_peak_safe_and_float_outputs_are_aligned(tiny, tmp_path):
    before = tree_digests(tiny)
    summary, records = quick_run(tiny, tmp_path / "out", oversample=2)
    assert tree_digests(tiny) == before                      # originals untouched (SHA-256)
    assert summary.done == 2 and summary.failed == 0
    rec = records["a.wav"]
    assert rec["level"]["mode"] == "peak-safe" and rec["settings"]["oversample"] == 2
    assert rec["design"]["oversample"]["factor"] == 2 and rec["design"]["inner"]["rate"] == 88200
    assert "oversampled x2" in rec["coding_history_row"] and rec["frames"] == int(0.2 * 44100)
    y = sf.read(str(tmp_path / "out" / "a.wav"), always_2d=True)[0]
    ref = reference(tiny / "a.wav") * 10 ** (rec["level"]["gain_db"] / 20)
    assert y.shape == ref.shape
    # 24-bit: rounding (0.5 LSB) + TPDF dither (< 1 LSB) + float32 work
    assert np.max(np.abs(y - ref)) <= 2 * 2.0 ** -23
    yf = sf.read(str(tmp_path / "out" / "f.wav"), always_2d=True)[0]
    np.testing.assert_allclose(yf, reference(tiny / "f.wav"), rtol=0, atol=1e-15)   # float64, 0 dB
    html = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    assert "(oversampled x2: sections at 88200 Hz" in html           # the figure caption


def test_fixed_gain_int16(tiny, tmp_path):
    _, records = quick_run(tiny, tmp_path / "out", oversample=4, gain_db=-24.0, subtype="int16",
                           output_format="flac")
    rec = records["a.wav"]
    assert rec["level"]["mode"] == "fixed" and rec["level"]["clipped_samples"] == 0
    assert rec["design"]["oversample"]["factor"] == 4
    y = sf.read(str(tmp_path / "out" / "a.flac"), always_2d=True)[0]
    ref = reference(tiny / "a.wav", 4) * 10 ** (-24 / 20)
    assert np.max(np.abs(y - ref)) <= 2 * 2.0 ** -15


def test_changing_oversample_reprocesses(tiny, tmp_path):
    out, manifest = tmp_path / "out", tmp_path / "m.jsonl"
    first, _ = quick_run(tiny, out, manifest=manifest)
    assert first.done == 2
    again, _ = quick_run(tiny, out, manifest=manifest)
    assert again.skipped == 2
    changed, records = quick_run(tiny, out, manifest=manifest, oversample=2)
    assert changed.done == 2 and records["a.wav"]["settings"]["oversample"] == 2
    # Without oversampling the settings carry no such key: earlier digests stay valid.
    assert "oversample" not in Settings(curve="riaa").to_dict()


def test_job_file_keys(tiny, tmp_path):
    job = tmp_path / "job.toml"
    job.write_text('[run]\ninput = "in"\noutput = "out"\n[defaults]\ncurve = "riaa"\noversample = 2\n'
                   '[[rule]]\nfiles = "f.wav"\noversample = 4\n', encoding="utf-8")
    j = load_job(job)
    assert j.defaults.oversample == 2 and j.rules[0].settings.oversample == 4
    assert "oversampled x4" in j.rules[0].settings.describe()
    for bad in ("3", '"2"', "2.0", "true"):
        job.write_text(f'[run]\ninput = "in"\noutput = "out"\n[defaults]\ncurve = "riaa"\n'
                       f"oversample = {bad}\n", encoding="utf-8")
        with pytest.raises(JobError, match="oversample must be one of 1, 2, 4"):
            load_job(job)


def test_cli_quick_form(tiny, tmp_path, capsys):
    code = main(["batch", str(tiny), str(tmp_path / "bad"), "--curve", "riaa", "--oversample", "3",
                 "--no-progress"])
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if line.startswith("dspeq: error")]
    assert code == 2 and len(lines) == 1 and "--oversample must be one of 1, 2, 4" in lines[0]
    assert "Traceback" not in err and not (tmp_path / "bad").exists()
    code = main(["batch", str(tiny), str(tmp_path / "out"), "--curve", "riaa", "--oversample", "2",
                 "--no-progress", "--workers", "1", "--dry-run"])
    out = capsys.readouterr().out
    assert code == 0 and "oversampled x2" in out
