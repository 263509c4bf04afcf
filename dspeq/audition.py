"""Audition: one excerpt through several candidate curves, loudness-matched.

Comparing candidate curves by ear is only fair at equal loudness: a curve
with more bass boost otherwise sounds "better" for being louder.  For each
candidate :func:`audition` designs the digital filter at the file's rate,
runs the excerpt through a real :class:`~dspeq.stream.Equalizer` (after a
pre-roll of up to one second of the preceding audio so the filter has
settled), measures the result's integrated loudness per ITU-R BS.1770 (with
the optional ``pyloudnorm`` package) and applies one gain per curve so that
every rendition reaches the same loudness — the highest common loudness at
which no rendition's sample peak exceeds −1 dBFS, and never above −23 LUFS
(EBU R 128 programme loudness) unless asked.

Output: one file per curve named after it, optionally one file with all
excerpts in turn separated by silence, and a sheet (``audition.json``,
``audition.txt``) with each curve's gain, loudness and peak.  Files are
float32 WAV by default (no clipping, no dither needed) or 24-bit WAV with
seeded TPDF dither.

soundfile and pyloudnorm are imported inside the functions that use them.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ._errors import AudioFileError, DspeqError

__all__ = ["Rendition", "AuditionSheet", "audition", "integrated_loudness", "file_stem",
           "read_excerpt", "excerpt_range", "DEFAULT_LENGTH_S", "PREROLL_S", "FADE_S", "HEADROOM_DB",
           "MAX_TARGET_LUFS", "SHEET_NAME", "SEQUENCE_NAME"]

#: Excerpt length (s) when none is given.
DEFAULT_LENGTH_S = 20.0
#: Audio before the excerpt run through the filter and discarded (s).
PREROLL_S = 1.0
#: Raised-cosine fade at each end of every excerpt (s).
FADE_S = 0.01
#: Every rendition's sample peak stays at least this far below full scale (dB).
HEADROOM_DB = 1.0
#: Default ceiling of the common loudness: EBU R 128 programme loudness (LUFS).
MAX_TARGET_LUFS = -23.0
#: Sheet file names (without ending) and the sequence file name.
SHEET_NAME = "audition"
SEQUENCE_NAME = "sequence.wav"
# BS.1770 gating blocks are 400 ms long: shorter audio has no integrated loudness.
_MIN_LOUDNESS_S = 0.4
_SUBTYPES = {None: ("float32", "FLOAT"), 24: ("int24", "PCM_24"), 16: ("int16", "PCM_16")}


@dataclass(frozen=True)
class Rendition:
    """One candidate curve's rendering.

    Attributes
    ----------
    spec : str
        The curve as the user gave it.
    curve : str
        The curve applied (with speed and ``from`` correction), as dspeq names it.
    file : str
        File name inside the output folder.
    gain_db : float
        Gain applied after equalization.
    loudness_lufs : float
        Integrated loudness (BS.1770) of the equalized excerpt before the gain.
    output_lufs : float
        The same after the gain (the common target).
    peak_dbfs : float
        Sample peak after the gain.
    sequence_at_s : float or None
        Where the excerpt starts in the sequence file.
    dither_seed : int or None
        Seed of the TPDF dither (integer output only).
    sha256 : str
        Digest of the file written.
    """

    spec: str
    curve: str
    file: str
    gain_db: float
    loudness_lufs: float
    output_lufs: float
    peak_dbfs: float
    sequence_at_s: float | None = None
    dither_seed: int | None = None
    sha256: str = ""


@dataclass(frozen=True)
class AuditionSheet:
    """What :func:`audition` wrote, and how."""

    source: str
    start_s: float
    length_s: float
    rate: float
    channels: int
    target_lufs: float
    encoding: str
    method: str
    renditions: tuple[Rendition, ...]
    sequence_file: str | None = None
    gap_s: float = 1.0
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready fields."""
        d = asdict(self)
        d["renditions"] = [asdict(r) for r in self.renditions]
        d["notes"] = list(self.notes)
        return d

    def to_text(self) -> str:
        """A short plain-text sheet."""
        lines = [f"Audition of {self.source}", f"excerpt {self.start_s:.2f} s + {self.length_s:.2f} s, "
                 f"{self.rate:g} Hz, {self.channels} ch, {self.encoding}, design method {self.method}",
                 f"every file at {self.target_lufs:.1f} LUFS integrated (ITU-R BS.1770)", ""]
        for r in self.renditions:
            where = "" if r.sequence_at_s is None else f", in the sequence at {r.sequence_at_s:.2f} s"
            lines.append(f"{r.file}: curve {r.curve}, gain {r.gain_db:+.2f} dB, loudness "
                         f"{r.loudness_lufs:.2f} -> {r.output_lufs:.2f} LUFS, peak {r.peak_dbfs:.2f} dBFS"
                         + where)
        if self.sequence_file:
            lines += ["", f"sequence: {self.sequence_file} (excerpts in the order above, "
                      f"{self.gap_s:g} s of silence between them)"]
        lines += [""] + [f"note: {n}" for n in self.notes]
        return "\n".join(lines).rstrip() + "\n"


# ============================================================================ pieces
def integrated_loudness(y: np.ndarray, fs: float) -> float:
    """Integrated loudness (LUFS) of ``y`` (frames × channels) per ITU-R BS.1770.

    Uses the optional ``pyloudnorm`` package (``pip install 'dspeq[loudness]'``).

    Raises
    ------
    DspeqError
        If pyloudnorm is missing or the audio is shorter than 0.4 s.
    """
    try:
        import pyloudnorm
    except ImportError:
        raise DspeqError("loudness matching needs the optional package 'pyloudnorm': "
                         "pip install 'dspeq[loudness]'") from None
    if len(y) < _MIN_LOUDNESS_S * fs:
        raise DspeqError(f"an excerpt of {len(y) / fs:.3f} s is too short to measure loudness "
                         f"(ITU-R BS.1770 needs at least {_MIN_LOUDNESS_S} s)")
    return float(pyloudnorm.Meter(int(round(fs))).integrated_loudness(y))


_UNSAFE = re.compile(r"[^A-Za-z0-9._,+@-]+")


def file_stem(spec: str) -> str:
    """A file name (without ending) for a curve spec: unsafe characters become ``_``.

    Examples
    --------
    >>> file_stem("riaa"), file_stem("tc:318/3180,75"), file_stem("(1+s*318u)/(1+s*3180u)")
    ('riaa', 'tc_318_3180,75', '1+s_318u_1+s_3180u')
    """
    stem = _UNSAFE.sub("_", spec.strip()).strip("._")[:80]
    return stem or "curve"


def excerpt_range(path: str | Path, start_s: float, length_s: float | None) -> tuple[float, int, int, int]:
    """Open ``path`` (checked as the batch processor checks its inputs) and place an excerpt.

    Returns ``(rate, channels, first, stop)``: the excerpt is frames
    ``first`` up to (not including) ``stop``; ``length_s=None`` runs to the end.

    Raises
    ------
    AudioFileError
        Unreadable, empty or truncated file, or a start outside it.
    """
    from .batch.audio import Source

    with Source(path) as src:
        rate, channels, frames = src.rate, src.channels, src.frames
    first = int(round(start_s * rate))
    if not 0 <= first < frames:
        raise AudioFileError(f"start {start_s!r} s is outside the file ({frames / rate:.3f} s long): "
                             f"{str(path)!r}")
    if length_s is not None and not length_s > 0:
        raise AudioFileError(f"excerpt length must be positive, got {length_s!r} s")
    stop = frames if length_s is None else min(frames, first + int(round(length_s * rate)))
    return rate, channels, first, stop


def read_excerpt(path: str | Path, start_s: float, length_s: float | None,
                 preroll_s: float = 0.0) -> tuple[np.ndarray, float, int]:
    """Read part of an audio file as float64 (frames × channels).

    Returns ``(audio, rate, preroll_frames)``: ``audio`` starts up to
    ``preroll_s`` before ``start_s`` (as much as the file has) and ends at
    ``start_s + length_s`` or at the end of the file.

    Raises
    ------
    AudioFileError
        Unreadable file, or an excerpt outside it.
    """
    import soundfile as sf

    rate, _, first, stop = excerpt_range(path, start_s, length_s)
    pre = min(first, int(round(preroll_s * rate)))
    try:
        data, _ = sf.read(str(path), start=first - pre, stop=stop, dtype="float64", always_2d=True)
    except (sf.LibsndfileError, RuntimeError) as exc:
        raise AudioFileError(f"cannot read {str(path)!r}: {exc}") from None
    return data, rate, pre


def _render(x: np.ndarray, pre: int, curve, fs: float, method: str) -> np.ndarray:
    """Equalize ``x`` through a fresh Equalizer; drop the pre-roll; fade the ends."""
    from .design import design
    from .stream import Equalizer

    eq = Equalizer(design(curve, fs, method), channels=x.shape[1])
    y = eq.process(x)[pre:]
    n = min(int(round(FADE_S * fs)), len(y) // 2)
    if n:
        ramp = 0.5 - 0.5 * np.cos(np.pi * (np.arange(n) + 0.5) / n)
        y[:n] *= ramp[:, None]
        y[len(y) - n:] *= ramp[::-1, None]
    return y


def _common_target(loudness: list[float], peaks_db: list[float], target: float | None,
                   notes: list[str]) -> float:
    """The loudness every rendition gets: asked (or −23 LUFS), lowered to keep peaks ≤ −1 dBFS."""
    safe = min(lu - HEADROOM_DB - pk for lu, pk in zip(loudness, peaks_db, strict=True))
    wanted = MAX_TARGET_LUFS if target is None else float(target)
    if safe < wanted:
        if target is not None:
            notes.append(f"target lowered from {wanted:.1f} to {safe:.1f} LUFS so that no sample peak "
                         f"exceeds {-HEADROOM_DB:g} dBFS")
        return safe
    return wanted


# ============================================================================ the whole job
def audition(path: str | Path, specs: Sequence[str], out_dir: str | Path, *, start_s: float = 0.0,
             length_s: float | None = DEFAULT_LENGTH_S, speed: float = 1.0, from_curve: str | None = None,
             method: str | None = None, target_lufs: float | None = None, bits: int | None = None,
             sequence: bool = False, gap_s: float = 1.0, overwrite: bool = False) -> AuditionSheet:
    """Render one excerpt through each candidate curve, loudness-matched.

    Parameters
    ----------
    path : path-like
        The flat transfer.
    specs : sequence of str
        Candidate curves (anything :func:`dspeq.curve` accepts).
    out_dir : path-like
        Folder for the files and the sheet (created if needed).
    start_s, length_s : float
        The excerpt (``length_s=None``: to the end of the file).
    speed, from_curve
        As in :func:`dspeq.curve`, applied to every candidate.
    method : str, optional
        Design method (default: :data:`dspeq.design.DEFAULT_METHOD`).
    target_lufs : float, optional
        Common loudness; default the highest up to −23 LUFS that keeps every
        sample peak at or below −1 dBFS (a higher asked target is lowered so).
    bits : {None, 16, 24}
        None writes float32 WAV; 16 or 24 write integer WAV with seeded TPDF dither.
    sequence : bool
        Also write ``sequence.wav``: the excerpts in turn, ``gap_s`` of silence between.
    overwrite : bool
        Replace existing files of the same names (default: refuse).

    Returns
    -------
    AuditionSheet
        Also written as ``audition.json`` and ``audition.txt`` in ``out_dir``.
    """
    from .design import DEFAULT_METHOD
    from .spec import curve

    if bits not in _SUBTYPES:
        raise DspeqError(f"bits must be None (float32), 16 or 24, got {bits!r}")
    if not specs:
        raise DspeqError("give at least one curve to audition")
    if not (gap_s >= 0 and math.isfinite(gap_s)):
        raise DspeqError(f"gap must be a non-negative number of seconds, got {gap_s!r}")
    method = method or DEFAULT_METHOD
    curves = [curve(s, speed=speed, from_curve=from_curve) for s in specs]
    out = Path(out_dir)
    names = _file_names(specs)
    _refuse_existing(out, [*names, SEQUENCE_NAME if sequence else None, SHEET_NAME + ".json",
                           SHEET_NAME + ".txt"], overwrite)
    x, fs, pre = read_excerpt(path, start_s, length_s, PREROLL_S)
    x = x - x.mean(axis=0)     # a DC offset would be amplified by the bass boost
    loud, peaks, notes = [], [], ["the excerpt's DC offset was removed before equalization"]
    for s, c in zip(specs, curves, strict=True):
        y = _render(x, pre, c, fs, method)
        lu = integrated_loudness(y, fs)
        if not math.isfinite(lu):
            raise DspeqError(f"the excerpt through {s!r} is too quiet to measure its loudness "
                             "(below the BS.1770 absolute gate, -70 LUFS); choose another excerpt")
        loud.append(lu)
        peaks.append(20 * math.log10(float(np.max(np.abs(y)))))
    target = _common_target(loud, peaks, target_lufs, notes)
    out.mkdir(parents=True, exist_ok=True)
    renditions = _write_all(out, names, specs, curves, x, pre, fs, method, loud, peaks, target, bits,
                            gap_s if sequence else None)
    sheet = AuditionSheet(str(path), float(start_s), (len(x) - pre) / fs, fs, x.shape[1], target,
                          _SUBTYPES[bits][0], method, tuple(renditions),
                          SEQUENCE_NAME if sequence else None, gap_s, tuple(notes))
    (out / f"{SHEET_NAME}.json").write_text(json.dumps(sheet.to_dict(), indent=2) + "\n", encoding="utf-8")
    (out / f"{SHEET_NAME}.txt").write_text(sheet.to_text(), encoding="utf-8")
    return sheet


def _file_names(specs: Sequence[str]) -> list[str]:
    names: list[str] = []
    for s in specs:
        stem, k = file_stem(s), 1
        while f"{stem}{'' if k == 1 else f'-{k}'}.wav".lower() in (n.lower() for n in names):
            k += 1
        names.append(f"{stem}{'' if k == 1 else f'-{k}'}.wav")
    return names


def _refuse_existing(out: Path, names: list[str | None], overwrite: bool) -> None:
    if overwrite:
        return
    taken = [n for n in names if n and (out / n).exists()]
    if taken:
        raise DspeqError(f"{str(out / taken[0])!r} already exists ({len(taken)} file(s) in the way); "
                         "choose another folder or allow overwriting")


def _sink(path: Path, fs: float, channels: int, bits: int | None, seed: int):
    from .batch.audio import OutputSpec, Quantizer, Sink

    sub, sf_sub = _SUBTYPES[bits]
    spec = OutputSpec("wav", sub, "WAV", sf_sub, bits)
    return Sink(path, spec, fs, channels, None if bits is None else Quantizer(bits, 1.0, seed))


def _write_file(sink, y: np.ndarray) -> str:
    """Write one whole file through ``sink``; return its SHA-256 (the temporary goes on failure)."""
    try:
        sink.write(y)
        return sink.commit(None)[0]
    except BaseException:
        sink.abort()
        raise


def _write_all(out, names, specs, curves, x, pre, fs, method, loud, peaks, target, bits, gap_s):
    """Second pass: render again, apply each gain, write files (and the sequence)."""
    seq = None if gap_s is None else _sink(out / SEQUENCE_NAME, fs, x.shape[1], bits, 0)
    silence = np.zeros((int(round((gap_s or 0.0) * fs)), x.shape[1]))
    pos, result = 0, []
    try:
        for i, (name, s, c) in enumerate(zip(names, specs, curves, strict=True)):
            gain_db = target - loud[i]
            y = _render(x, pre, c, fs, method) * 10 ** (gain_db / 20)
            digest = _write_file(_sink(out / name, fs, x.shape[1], bits, i + 1), y)
            start = pos + (len(silence) if i else 0)
            result.append(Rendition(s, c.name, name, gain_db, loud[i], target, peaks[i] + gain_db,
                                    None if seq is None else start / fs, None if bits is None else i + 1,
                                    digest))
            if seq is not None:
                seq.write(np.concatenate([silence, y]) if i else y)
            pos = start + len(y)
        if seq is not None:
            seq.commit(None)
    except BaseException:
        if seq is not None:
            seq.abort()
        raise
    return result
