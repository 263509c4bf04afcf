"""Bad input and faults: each is reported with its reason and never stops the rest of the batch."""

from __future__ import annotations

import contextlib
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import ROOT, noise, quick_run, tree_digests, write_audio

from dspeq.cli import main


def good_and(tmp_path: Path, name: str, make) -> tuple[Path, Path]:
    """An input folder with one good file and one bad file made by ``make(path)``."""
    inp = tmp_path / "in"
    write_audio(inp / "good.wav", seed=5)
    make(inp / name)
    return inp, tmp_path / "out"


def assert_failed_alone(tmp_path, name, make, reason, **settings):
    inp, out = good_and(tmp_path, name, make)
    before = tree_digests(inp)
    summary, records = quick_run(inp, out, **settings)
    assert (summary.done, summary.failed) == (1, 1)
    rec = records[name]
    assert rec["status"] == "failed" and reason in rec["error"], rec["error"]
    assert not (out / name).exists()
    assert not [p for p in out.rglob("*") if p.name.endswith((".dspeq-part", ".spool"))]
    assert records["good.wav"]["status"] == "done" and (out / "good.wav").is_file()
    assert tree_digests(inp) == before                      # originals untouched
    return rec


def test_corrupt_header(tmp_path):
    def make(p):
        write_audio(p)
        raw = bytearray(p.read_bytes())
        raw[20:36] = bytes(range(16))                       # the fmt chunk's fields
        p.write_bytes(bytes(raw))
    assert_failed_alone(tmp_path, "bad_header.wav", make, "Malformed 'fmt ' chunk")


def test_damaged_flac(tmp_path):
    def make(p):
        write_audio(p, fmt="FLAC", subtype="PCM_16", seconds=1.0, level=0.5)
        raw = bytearray(p.read_bytes())
        raw[len(raw) // 2] ^= 0x10                          # one bit in a middle frame
        p.write_bytes(bytes(raw))
    assert_failed_alone(tmp_path, "damaged.flac", make, "decoder error after")


def test_truncated_wav(tmp_path):
    def make(p):
        write_audio(p, seconds=0.5)
        p.write_bytes(p.read_bytes()[:-3000])               # 3000 bytes = 500 stereo 24-bit frames
    rec = assert_failed_alone(tmp_path, "truncated.wav", make, "truncated")
    assert "declares 24000 frames but only 23500 are present" in rec["error"]


def test_truncated_flac(tmp_path):
    def make(p):
        write_audio(p, fmt="FLAC", subtype="PCM_16", seconds=1.0, level=0.5)
        p.write_bytes(p.read_bytes()[:-2000])
    assert_failed_alone(tmp_path, "cut.flac", make, "decoder error after")


def test_zero_length_file(tmp_path):
    assert_failed_alone(tmp_path, "empty.wav", lambda p: p.write_bytes(b""), "empty file (0 bytes)")


def test_non_audio_file_with_audio_extension(tmp_path):
    assert_failed_alone(tmp_path, "notes.flac", lambda p: p.write_text("track list\n" * 40),
                        "not readable as audio (Format not recognised")


def test_nan_in_float_wav(tmp_path):
    def make(p):
        x = noise(seconds=0.5).astype(np.float32)
        x[20000, 1] = np.nan
        write_audio(p, x, subtype="FLOAT")
    rec = assert_failed_alone(tmp_path, "nan.wav", make, "not finite")
    assert "first at (frame, channel) (20000, 1)" in rec["error"]


def test_rate_too_low_for_the_curve(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "good.wav", rate=44100)
    write_audio(inp / "phone.wav", rate=8000)                # 17.5 µs → 9.1 kHz, above 0.45 × 8 kHz
    write_audio(inp / "slow.wav", rate=4000)                 # below the lowest rate we design for
    summary, records = quick_run(inp, tmp_path / "out", curve="iec-30ips")
    assert (summary.done, summary.failed) == (1, 2)
    assert "rate 8000 Hz does not suit curve 'iec-30ips'" in records["phone.wav"]["error"]
    assert "sample rate 4000.0 Hz is outside" in records["slow.wav"]["error"]


def test_unicode_and_space_filled_names(tmp_path):
    inp = tmp_path / "in"
    names = ["Côté B — 1962 ñandú.wav", "  leading and trailing  .wav", "dir with  spaces/日本語 テープ.flac"]
    for i, n in enumerate(names):
        write_audio(inp / n, fmt="FLAC" if n.endswith("flac") else None,
                    subtype="PCM_16" if n.endswith("flac") else "PCM_24", seed=i)
    summary, records = quick_run(inp, tmp_path / "out")
    assert summary.done == 3 and summary.failed == 0
    for n in names:
        assert (tmp_path / "out" / n).is_file() and records[n]["output_rel"] == n
    assert sf.info(str(tmp_path / "out" / names[0])).frames == sf.info(str(inp / names[0])).frames


def test_symlink_loop_in_input_tree(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "a.wav")
    (inp / "again").symlink_to(inp, target_is_directory=True)
    (inp / "self.wav").symlink_to(inp / "self.wav")
    summary, records = quick_run(inp, tmp_path / "out")
    assert (summary.done, summary.failed) == (1, 1)
    assert "Too many levels of symbolic links" in records["self.wav"]["error"]
    assert not (tmp_path / "out" / "again").exists()


def test_output_never_escapes_through_a_symlinked_folder(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "sub" / "x.wav")
    write_audio(inp / "y.wav")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "sub").symlink_to(elsewhere, target_is_directory=True)
    summary, records = quick_run(inp, tmp_path / "out")
    assert (summary.done, summary.failed) == (1, 1)
    assert "resolves outside the output folder" in records["sub/x.wav"]["error"]
    assert list(elsewhere.iterdir()) == []


def test_existing_file_not_made_by_us_is_not_overwritten(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "x.wav")
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "x.wav").write_bytes(b"someone else's file")
    summary, records = quick_run(inp, tmp_path / "out")
    assert summary.failed == 1 and "no manifest record made it" in records["x.wav"]["error"]
    assert (tmp_path / "out" / "x.wav").read_bytes() == b"someone else's file"


def test_output_inside_input_refused_by_cli(tmp_path, capsys):
    inp = tmp_path / "in"
    write_audio(inp / "x.wav")
    for out in (inp, inp / "derived"):
        assert main(["batch", str(inp), str(out), "--curve", "riaa", "--no-progress"]) == 2
        err = capsys.readouterr().err
        assert "is the input folder or inside it" in err
    assert sorted(p.name for p in inp.iterdir()) == ["x.wav"]


@contextlib.contextmanager
def read_only(folder: Path):
    """Make ``folder`` read-only, also for root (a read-only bind mount)."""
    folder.mkdir(parents=True, exist_ok=True)
    if os.geteuid() != 0:
        folder.chmod(0o555)
        try:
            yield
        finally:
            folder.chmod(0o755)
        return
    if shutil.which("mount") is None:
        pytest.skip("running as root without mount(8): cannot make a read-only folder")
    done = subprocess.run(["mount", "--bind", str(folder), str(folder)], capture_output=True)
    if done.returncode != 0:
        pytest.skip(f"running as root and bind mounts are not allowed: {done.stderr!r}")
    try:
        subprocess.run(["mount", "-o", "remount,bind,ro", str(folder)], check=True)
        yield
    finally:
        subprocess.run(["umount", str(folder)], check=True)


def test_read_only_output_folder(tmp_path, capsys):
    inp = tmp_path / "in"
    write_audio(inp / "x.wav")
    write_audio(inp / "y.wav", seed=3)
    out = tmp_path / "out"
    with read_only(out):
        # The manifest elsewhere: every file fails with the reason, exit status 1.
        code = main(["batch", str(inp), str(out), "--curve", "riaa", "--no-progress", "--workers", "1",
                     "--manifest", str(tmp_path / "m.jsonl")])
        _, err = capsys.readouterr()
        assert code == 1
        assert err.count("FAILED") == 2 and ("Read-only file system" in err or "Permission denied" in err)
        # The manifest inside the read-only folder: one line on stderr, exit status 2.
        code = main(["batch", str(inp), str(out), "--curve", "riaa", "--no-progress", "--workers", "1"])
        _, err = capsys.readouterr()
        assert code == 2 and "cannot write the output folder or manifest" in err
        assert list(out.iterdir()) == []


def _kill_when_first_record(cmd: list[str], manifest: Path) -> None:
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        for _ in range(1200):
            if manifest.exists() and manifest.read_bytes().count(b"\n") >= 1:
                break
            if proc.poll() is not None:
                break
            import time

            time.sleep(0.05)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, 9)
        proc.wait()


@pytest.mark.slow
def test_kill_minus_9_mid_run_then_rerun(tmp_path):
    inp = tmp_path / "in"
    for i in range(6):
        write_audio(inp / f"reel_{i}.wav", seconds=12.0, seed=i)
    out = tmp_path / "out"
    manifest = out / "dspeq-manifest.jsonl"
    cmd = [sys.executable, "-m", "dspeq", "batch", str(inp), str(out), "--curve", "nab-15ips",
           "--workers", "1", "--no-progress"]
    before = tree_digests(inp)
    _kill_when_first_record(cmd, manifest)
    from dspeq.batch import read_records

    done = {r["output_rel"]: r for r in read_records(manifest) if r["status"] == "done"}
    assert 1 <= len(done) < 6, "the kill should land before the run completes"
    finals = [p for p in out.iterdir() if p.suffix == ".wav" and not p.name.startswith(".")]
    assert sorted(p.name for p in finals) == sorted(done)     # nothing partial under a final name
    for p in finals:
        from dspeq.batch.audio import sha256_file

        assert sha256_file(p)[0] == done[p.name]["output_sha256"]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    rerun = subprocess.run(cmd, capture_output=True, text=True, env=env)
    assert rerun.returncode == 0, rerun.stderr
    assert f"done {6 - len(done)}, skipped {len(done)}, failed 0" in rerun.stdout
    assert not [p for p in out.iterdir() if ".dspeq-part" in p.name]
    assert len([p for p in out.iterdir() if p.suffix == ".wav"]) == 6
    assert tree_digests(inp) == before
