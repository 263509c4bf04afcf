"""Make the demo "flat transfers" of a fictional archive (invented data, for the demo and tests).

Scenario: the Harbour Street Community Radio archive (fictional) has handed
three carriers to a transfer studio, which digitized them flat:

* ``discs/hscr_1962_side_a.flac`` — a 1962 disc side (RIAA), stereo,
  44.1 kHz / 16-bit FLAC, from a phono stage set flat;
* ``tapes/hscr_1971_interview_15ips.wav`` — a 7½ ips NAB tape transferred
  at 15 ips (twice its recorded speed) from the raw head, mono 48 kHz / 24-bit;
* ``tapes/hscr_1968_concert_iec_on_nab.wav`` — an IEC (CCIR) 7½ ips tape
  replayed on a machine set to NAB, mono 48 kHz / 16-bit, with a BWF
  ``bext`` chunk whose CodingHistory describes that transfer.

Each file is synthetic program material (tones with harmonics, a little
pink-ish noise, a speech-like passage) passed through the exact analog
*recording* curve — the inverse of the curve dspeq must apply, evaluated in
the frequency domain from the curve's poles and zeros — then quantized with
TPDF dither (numpy's generator, seeded).  The curve is the one dspeq's
design realizes: integrators are limited at the default low-frequency limit
(3 Hz), as in :func:`dspeq.design`.  De-emphasizing a file must therefore
give back :func:`program` (tests: ``tests/test_batch_demo.py``).

Run ``python demo_audio/make_demo.py`` to regenerate the files (deterministic).
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import signal

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

import dspeq  # noqa: E402
from dspeq.batch import bwf  # noqa: E402
from dspeq.design import DEFAULT_LF_LIMIT_HZ  # noqa: E402

__all__ = ["Carrier", "CARRIERS", "program", "playback_curve", "transfer", "make", "LEAD_S"]

#: Silence before and after the program in every file (s).
LEAD_S = 0.5


@dataclass(frozen=True)
class Carrier:
    """One demo file: where it goes, its format, the curve it needs, its program."""

    rel: str
    rate: int
    channels: int
    subtype: str
    curve: str
    speed: float
    from_curve: str | None
    seconds: float
    seed: int
    peak_dbfs: float
    history: str = ""


CARRIERS = (
    Carrier("discs/hscr_1962_side_a.flac", 44100, 2, "PCM_16", "riaa", 1.0, None, 7.0, 1962, -3.0),
    Carrier("tapes/hscr_1971_interview_15ips.wav", 48000, 1, "PCM_24", "nab-7.5ips", 2.0, None, 7.0,
            1971, -2.0),
    Carrier("tapes/hscr_1968_concert_iec_on_nab.wav", 48000, 1, "PCM_16", "iec-7.5ips", 1.0,
            "nab-7.5ips", 7.0, 1968, -3.0,
            history=("A=ANALOGUE,M=mono,T=reel HSCR-T-0412; IEC 7.5 ips full-track; replayed on a "
                     "deck set to NAB (fictional)\r\n"
                     "A=PCM,F=48000,W=16,M=mono,T=transfer studio A/D (fictional); flat; 2024-05-02\r\n")),
)


def playback_curve(c: Carrier) -> dspeq.Curve:
    """The curve dspeq must apply, as its design realizes it (integrators limited at 3 Hz)."""
    return dspeq.curve(c.curve, speed=c.speed, from_curve=c.from_curve).with_lf_limit(DEFAULT_LF_LIMIT_HZ)


def _notes(rng: np.random.Generator, t: np.ndarray, rate: int) -> np.ndarray:
    """A few notes with decaying harmonics, each 2.5 s long with soft edges."""
    out = np.zeros_like(t)
    length = int(2.5 * rate)
    tt = np.arange(length) / rate
    env = np.minimum(tt / 0.02, 1.0) * np.exp(-tt / 0.4) * np.minimum((tt[::-1]) / 0.1, 1.0)
    for start in range(0, len(t), int(0.45 * rate)):
        f0 = 110.0 * 2 ** (rng.integers(0, 25) / 12)
        w = 2 * np.pi * f0 * tt
        note = np.zeros(length)
        for k in range(1, 9):
            if k * f0 < 0.4 * rate:
                note += np.sin(k * w + rng.uniform(0, 2 * np.pi)) / k ** 1.6
        stop = min(len(t), start + length)
        out[start:stop] += (env * note)[:stop - start]
    return out


def _voice(rng: np.random.Generator, n: int, rate: int) -> np.ndarray:
    """Speech-like noise: formant resonances, syllable-rate envelope."""
    x = rng.standard_normal(n)
    y = np.zeros(n)
    for f, bw in ((500, 80), (1500, 120), (2500, 160)):
        sos = signal.butter(2, [f - bw, f + bw], "bandpass", fs=rate, output="sos")
        y += signal.sosfilt(sos, x)
    t = np.arange(n) / rate
    return y * (0.5 + 0.5 * np.sin(2 * np.pi * 4.0 * t)) ** 2


def program(c: Carrier) -> np.ndarray:
    """The original program material of a carrier (frames × channels, float64, lead silence included)."""
    rng = np.random.default_rng(c.seed)
    n = int(round(c.seconds * c.rate))
    t = np.arange(n) / c.rate
    chans = []
    for _ in range(c.channels):
        x = _notes(rng, t, c.rate) + 0.3 * _voice(rng, n, c.rate)
        noise = signal.sosfilt(signal.butter(1, 800, fs=c.rate, output="sos"), rng.standard_normal(n))
        chans.append(x + 0.05 * noise)
    x = np.stack(chans, axis=1)
    band = signal.butter(4, [40, 12000], "bandpass", fs=c.rate, output="sos")
    x = signal.sosfiltfilt(band, x, axis=0)
    fade = np.minimum(1.0, np.minimum(t, t[::-1]) / 0.05)[:, None]
    lead = np.zeros((int(LEAD_S * c.rate), c.channels))
    return np.concatenate([lead, x * fade, lead])


def apply_curve(x: np.ndarray, rate: int, curve: dspeq.Curve) -> np.ndarray:
    """Filter ``x`` by the exact analog response of ``curve`` (frequency domain, no wrap-around)."""
    n = len(x)
    size = 1 << int(np.ceil(np.log2(2 * n)))
    f = np.fft.rfftfreq(size, 1.0 / rate)
    h = curve.response(f)
    spec = np.fft.rfft(x, size, axis=0) * h[:, None]
    return np.fft.irfft(spec, size, axis=0)[:n]


def transfer(c: Carrier) -> tuple[np.ndarray, float]:
    """(flat transfer before quantization, scale applied to the program)."""
    pre = apply_curve(program(c), c.rate, playback_curve(c).inverse())
    scale = 10 ** (c.peak_dbfs / 20) / np.max(np.abs(pre))
    return pre * scale, scale


def _quantize(x: np.ndarray, bits: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    full = 2.0 ** (bits - 1)
    d = rng.uniform(-0.5, 0.5, x.shape) + rng.uniform(-0.5, 0.5, x.shape)
    q = np.clip(np.rint(x * full + d), -full, full - 1)
    return (q.astype(np.int32) << (32 - bits)).astype(np.int32)


def make(folder: Path = HERE) -> list[Path]:
    """Write every carrier's flat transfer under ``folder``; return the paths."""
    import soundfile as sf

    paths = []
    for c in CARRIERS:
        path = folder / c.rel
        path.parent.mkdir(parents=True, exist_ok=True)
        x, _ = transfer(c)
        bits = {"PCM_16": 16, "PCM_24": 24}[c.subtype]
        sf.write(path, _quantize(x, bits, c.seed), c.rate, subtype=c.subtype)
        if c.history:
            bwf.append_bext(path, bwf.Bext(
                description="Flat transfer, Harbour Street Community Radio (fictional demo archive)",
                originator="transfer studio (fictional)", originator_reference="HSCR-T-0412",
                origination_date="2024-05-02", origination_time="10:15:00", coding_history=c.history))
        paths.append(path)
    return paths


if __name__ == "__main__":
    for p in make():
        print(f"{p.relative_to(HERE)}  {p.stat().st_size} bytes")
