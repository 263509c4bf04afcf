"""Shared helpers for the batch tests: tiny audio files, tree digests, quick runs."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(autouse=True)
def _fast_loop_for_mono_and_stereo(monkeypatch):
    """Every test runs the fast loop for mono and stereo, whatever this CPU is.

    On a CPU of ``dspeq._kernels.NARROW_FP_CPUS`` stereo would otherwise take
    the exact loops and the fast stereo loop would go untested there; mono
    takes the decoupled loop wherever a design allows it (elsewhere it would
    take the eight-frame step, which tests/test_fastpath.py runs too). That
    file checks the per-CPU choices themselves.
    """
    from dspeq import _kernels

    monkeypatch.setattr(_kernels, "_fast_here", _kernels.FAST_CHANNELS)
    monkeypatch.setattr(_kernels, "_decoupled_here", True)


def noise(seconds: float = 0.25, rate: int = 48000, channels: int = 2, level: float = 0.1,
          seed: int = 0) -> np.ndarray:
    """Low-passed noise (frames × channels) with peaks well inside full scale."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((int(seconds * rate), channels))
    x = np.cumsum(x, axis=0) * 0.02          # a random walk: mostly low frequencies
    x -= np.mean(x, axis=0)
    return level * x / np.max(np.abs(x))


def write_audio(path: Path, data: np.ndarray | None = None, rate: int = 48000,
                subtype: str = "PCM_24", fmt: str | None = None, **noise_args) -> Path:
    """Write ``data`` (or fresh noise) with soundfile; create folders."""
    import soundfile as sf

    path.parent.mkdir(parents=True, exist_ok=True)
    if data is None:
        data = noise(rate=rate, **noise_args)
    sf.write(str(path), data, rate, subtype=subtype, format=fmt)
    return path


def tree_digests(root: Path) -> dict[str, str]:
    """SHA-256 of every regular file under ``root`` (symbolic links not followed)."""
    out = {}
    for folder, _, files in os.walk(root):
        for name in files:
            p = Path(folder) / name
            if p.is_symlink():
                continue
            out[p.relative_to(root).as_posix()] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def quick_run(inp: Path, out: Path, curve: str = "riaa", manifest: Path | None = None, **settings):
    """Run the quick form in this process (one worker); return (Summary, records by input)."""
    from dspeq.batch import Settings, quick_job, read_records, run_job

    job = quick_job(inp, out, Settings(curve=curve, **settings), manifest=manifest)
    summary = run_job(job, workers=1)
    records = {r["input_rel"]: r for r in read_records(job.manifest_path)}
    return summary, records


@pytest.fixture
def small_tree(tmp_path: Path) -> Path:
    """An input folder with a WAV, a FLAC in a sub-folder and a float WAV."""
    inp = tmp_path / "in"
    write_audio(inp / "a.wav", seed=1)
    write_audio(inp / "sub" / "b.flac", rate=44100, subtype="PCM_16", seed=2)
    write_audio(inp / "sub" / "c.wav", subtype="FLOAT", seed=3)
    return inp
