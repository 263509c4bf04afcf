"""Speed restoration: a tape recorded with a pre-emphasis, transferred at twice its speed, comes back
at its recorded pitch and with its recorded spectrum balance (relabelled losslessly, or resampled)."""

from __future__ import annotations

import sys

import numpy as np
import pytest
import soundfile as sf
from conftest import write_audio
from scipy import optimize

import dspeq
from dspeq import JobError
from dspeq.batch import Settings, bwf, quick_job, read_records, run_job
from dspeq.cli import main

#: The tape's program: tones (Hz, as recorded) spaced by factors of 4, so a tone at twice its
#: frequency can never be mistaken for another one.  Invented test signal.
TONES_HZ = (100.0, 400.0, 1600.0, 6400.0)
TONE_AMPLITUDE = 0.08
RECORDED_RATE = 24000          # the rate the tape's program is heard at
SPEED = 2.0                    # transferred at twice its recorded speed (common practice, no source)
CURVE = "nab-7.5ips"           # a 7½ ips NAB tape: 3180 / 50 µs (NAB 1965, IASA TC-04 Table 1)
PITCH_TOLERANCE = 1e-4         # 0.01 % (the limit)
BALANCE_TOLERANCE_DB = 0.05


def tape_transfer(seconds: float = 1.0) -> np.ndarray:
    """The flat transfer at 2 × RECORDED_RATE of the tape played at twice its speed.

    Every tone sounds at twice its frequency, and carries the recording pre-emphasis, i.e. the
    inverse of the playback curve at the transfer speed, evaluated exactly (analog response at
    that frequency: amplitude divided by |H|, phase minus arg H).
    """
    rate = RECORDED_RATE * SPEED
    playback = dspeq.curve(CURVE, speed=SPEED)
    t = np.arange(int(seconds * rate)) / rate
    x = np.zeros_like(t)
    for f in TONES_HZ:
        h = complex(playback.response(f * SPEED))
        x += TONE_AMPLITUDE / abs(h) * np.sin(2 * np.pi * f * SPEED * t - np.angle(h))
    return x[:, None]


def dtft(y: np.ndarray, fs: float, f: float) -> complex:
    """Hann-windowed DTFT of a mono signal at frequency f (Hz), normalised to a sine's amplitude."""
    w = np.hanning(len(y))
    n = np.arange(len(y))
    return complex(2 * np.sum(w * y * np.exp(-2j * np.pi * f * n / fs)) / np.sum(w))


def tone(y: np.ndarray, fs: float, expected: float) -> tuple[float, float]:
    """(frequency, amplitude) of the strongest tone within a factor 1.5 of ``expected``.

    Coarse search on a zero-padded FFT, then the windowed DTFT's maximum is refined
    (bounded scalar search within one bin), which finds a clean tone's frequency to far
    better than 0.01 %.
    """
    n = 1 << int(np.ceil(np.log2(8 * len(y))))
    spec = np.abs(np.fft.rfft(y * np.hanning(len(y)), n))
    freqs = np.fft.rfftfreq(n, 1 / fs)
    band = (freqs > expected / 1.5) & (freqs < expected * 1.5)
    coarse = freqs[band][np.argmax(spec[band])]
    step = fs / len(y)
    best = optimize.minimize_scalar(lambda f: -abs(dtft(y, fs, f)), bounds=(coarse - step, coarse + step),
                                    method="bounded", options={"xatol": 1e-6})
    return float(best.x), abs(dtft(y, fs, best.x))


def measure(path) -> tuple[float, list[float], list[float]]:
    """(rate label, relative pitch errors, tone levels in dB) of an output file."""
    y, fs = sf.read(str(path))
    found = [tone(y, fs, f) for f in TONES_HZ]
    errors = [abs(f / f0 - 1) for (f, _), f0 in zip(found, TONES_HZ, strict=True)]
    levels = [20 * np.log10(a) for _, a in found]
    return fs, errors, levels


@pytest.fixture(scope="module")
def transfers(tmp_path_factory):
    """One flat transfer, processed four ways; returns {name: (folder, record)}."""
    root = tmp_path_factory.mktemp("speed")
    inp = root / "in"
    write_audio(inp / "reel.wav", tape_transfer(), rate=int(RECORDED_RATE * SPEED), subtype="PCM_24")
    ways = {"plain": {}, "restored": {"restore_speed": True},
            "resampled": {"restore_speed": True, "output_rate_hz": 44100.0},
            "unscaled": {"speed_override": 1.0}}
    out = {}
    for name, extra in ways.items():
        speed = extra.pop("speed_override", SPEED)
        job = quick_job(inp, root / name, Settings(curve=CURVE, speed=speed, **extra))
        summary = run_job(job, workers=1, report=False)
        assert summary.done == 1, summary.failures
        out[name] = (root / name, read_records(job.manifest_path)[-1])
    return out


def test_restored_speed_has_the_recorded_pitch_and_balance(transfers):
    folder, rec = transfers["restored"]
    fs, errors, levels = measure(folder / "reel.wav")
    print(f"restored: rate {fs}, pitch errors {max(errors):.2e}, balance spread {np.ptp(levels):.4f} dB")
    assert fs == RECORDED_RATE
    assert max(errors) < PITCH_TOLERANCE
    assert np.ptp(levels) < BALANCE_TOLERANCE_DB          # flat again: the pre-emphasis is undone
    gain = rec["level"]["gain_db"]
    assert abs(np.mean(levels) - 20 * np.log10(TONE_AMPLITUDE) - gain) < BALANCE_TOLERANCE_DB
    rc = rec["rate_change"]
    assert (rc["input_rate"], rc["labelled_rate"], rc["output_rate"], rc["resampler"]) == \
        (48000.0, 24000.0, 24000.0, None)
    assert rc["output_frames"] == rec["frames"] and rc["output_duration_s"] == 2 * rec["duration_s"]


def test_resampled_output_keeps_pitch_and_balance(transfers):
    folder, rec = transfers["resampled"]
    fs, errors, levels = measure(folder / "reel.wav")
    print(f"resampled: rate {fs}, pitch errors {max(errors):.2e}, balance spread {np.ptp(levels):.4f} dB")
    assert fs == 44100 and max(errors) < PITCH_TOLERANCE and np.ptp(levels) < BALANCE_TOLERANCE_DB
    rc = rec["rate_change"]
    assert rc["resampler"].startswith("soxr ") and rc["resampler"].endswith(" VHQ")
    assert abs(rc["output_frames"] - rec["frames"] * 44100 / RECORDED_RATE) <= 1   # 48000 frames -> 2 s
    assert sf.info(str(folder / "reel.wav")).frames == rc["output_frames"]


def test_the_measure_sees_wrong_pitch_and_wrong_balance(transfers):
    # Not restored: every tone at twice its pitch.  The curve not scaled to the speed (speed 1):
    # the balance is off by several dB.
    fs, errors, _ = measure(transfers["plain"][0] / "reel.wav")
    assert fs == RECORDED_RATE * SPEED and min(errors) > 100 * PITCH_TOLERANCE
    y, _ = sf.read(str(transfers["plain"][0] / "reel.wav"))
    assert all(abs(tone(y, fs, 2 * f)[0] / (2 * f) - 1) < PITCH_TOLERANCE for f in TONES_HZ)
    y, fs = sf.read(str(transfers["unscaled"][0] / "reel.wav"))
    levels = [20 * np.log10(tone(y, fs, 2 * f)[1]) for f in TONES_HZ]
    assert np.ptp(levels) > 3.0


def test_relabelling_is_lossless(transfers):
    # Same samples as the output without restoration (same curve, gain, dither seed); only the rate differs.
    plain, _ = sf.read(str(transfers["plain"][0] / "reel.wav"), dtype="int32")
    restored, fs = sf.read(str(transfers["restored"][0] / "reel.wav"), dtype="int32")
    assert fs == RECORDED_RATE and np.array_equal(plain, restored)
    assert transfers["plain"][1]["output_audio_md5"] == transfers["restored"][1]["output_audio_md5"]


def test_coding_history_records_both_steps(transfers):
    folder, rec = transfers["resampled"]
    rows = bwf.parse_coding_history(bwf.read_bext(folder / "reel.wav").coding_history)
    assert len(rows) == 2
    assert (rows[0]["F"], rows[1]["F"]) == ("48000", "44100")
    assert "de-emphasis nab-7.5ips@x2" in rows[0]["T"] and "gain" not in rows[0]["T"]
    assert "speed restored: transfer at x2 relabelled 48000 -> 24000 Hz" in rows[1]["T"]
    assert "resampled 24000 -> 44100 Hz (soxr" in rows[1]["T"] and "TPDF dither seed" in rows[1]["T"]
    assert rec["coding_history_row"] == "\r\n".join(bwf.history_rows(bwf.read_bext(folder / "reel.wav")
                                                                      .coding_history))
    assert rec["settings"]["restore_speed"] is True and rec["settings"]["output_rate_hz"] == 44100.0


def test_resampling_does_not_depend_on_the_block_size(tmp_path, transfers):
    inp = transfers["plain"][0].parent / "in"
    s = Settings(curve=CURVE, speed=SPEED, restore_speed=True, output_rate_hz=44100.0)
    job = quick_job(inp, tmp_path / "small_blocks", s, block_frames=1000)
    run_job(job, workers=1, report=False)
    assert read_records(job.manifest_path)[-1]["output_audio_md5"] == \
        transfers["resampled"][1]["output_audio_md5"]


def test_fractional_label_rate_is_refused_unless_resampled(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "a.wav", seconds=0.1, rate=48000)
    job = quick_job(inp, tmp_path / "o1", Settings(curve="riaa", speed=1.3, restore_speed=True))
    summary = run_job(job, workers=1, report=False)
    assert summary.failed == 1
    assert "48000 Hz / speed 1.3 = 36923.076923 Hz is not a whole number" in summary.failures[0][1]
    job = quick_job(inp, tmp_path / "o2", Settings(curve="riaa", speed=1.3, restore_speed=True,
                                                   output_rate_hz=44100.0))
    assert run_job(job, workers=1, report=False).done == 1
    assert sf.info(str(tmp_path / "o2" / "a.wav")).samplerate == 44100


def test_missing_soxr_is_a_clear_error(monkeypatch, tmp_path):
    monkeypatch.setitem(sys.modules, "soxr", None)          # import soxr now raises ImportError
    (tmp_path / "in").mkdir()
    with pytest.raises(JobError, match=r"needs the soxr package: pip install 'dspeq\[resample\]'"):
        quick_job(tmp_path / "in", tmp_path / "out", Settings(curve="riaa", output_rate_hz=44100.0))


def test_settings_digest_of_jobs_without_rate_keys_is_unchanged():
    # Jobs that do not use the new keys keep the digests their manifests already hold.
    d = Settings(curve="riaa").to_dict()
    assert "restore_speed" not in d and "output_rate_hz" not in d
    assert Settings(curve="riaa", restore_speed=True).to_dict()["restore_speed"] is True


def test_cli_options(tmp_path, capsys):
    inp = tmp_path / "in"
    write_audio(inp / "a.wav", seconds=0.1, rate=48000)
    code = main(["batch", str(inp), str(tmp_path / "out"), "--curve", "nab-7.5ips", "--speed", "2",
                 "--restore-speed", "--output-rate", "44100", "--workers", "1", "--no-progress"])
    assert code == 0 and sf.info(str(tmp_path / "out" / "a.wav")).samplerate == 44100
    job = tmp_path / "j.toml"
    job.write_text('[run]\ninput = "in"\noutput = "o"\n[defaults]\ncurve = "riaa"\n')
    assert main(["batch", str(job), "--restore-speed", "--dry-run"]) == 2
    assert "set --restore-speed in the job file" in capsys.readouterr().err
    job.write_text('[run]\ninput = "in"\noutput = "o"\n[defaults]\ncurve = "riaa"\noutput_rate_hz = 100\n')
    assert main(["batch", str(job), "--dry-run"]) == 2
    assert "output_rate_hz = 100 is outside 8000" in capsys.readouterr().err
