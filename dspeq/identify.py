"""Which curve was this recorded with?  Evidence from line-up tones.

A line-up tone recorded at one constant level through a recording curve R and
transferred *flat* (the signal :func:`dspeq.curve` is meant to be applied to)
comes out at the level

    L(f) = -|P(f)|_dB + g,        P = 1/R the playback curve,

with a gain ``g`` common to all tones.  For tape this is the transfer from a
raw (unequalized, ideal) replay head: the catalog's tape curves are replay
responses for such a head, so the recorded pre-emphasis seen in the transfer
is their inverse.  For discs it is the transfer from a velocity-sensitive
pickup with a flat preamplifier.  When the transfer machine already applied a
curve U (``applied=``), the tones read ``U_dB - P_dB + g`` and U is removed
first — the same meaning as ``dspeq.curve(spec, from_curve=U)``.

This module

* finds steady tones in audio (:func:`find_tones`; frequency by interpolated
  FFT peak, level in dBFS, duration),
* fits the free time constants of a tape or disc curve to measured levels by
  least squares, with uncertainties (:func:`fit_curve`),
* ranks catalog curves (optionally at other speeds) by RMS level error after
  the best common gain (:func:`rank_curves`),
* and does all of it in one call (:func:`identify`).

Levels are in dBFS as AES17 defines them: a full-scale sine reads 0 dBFS.
It imports numpy and scipy only.
"""

from __future__ import annotations

import math
import re
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize, signal

from ._errors import DspeqError
from .catalog import CATALOG
from .curves import Curve
from .spec import parse_curve

__all__ = [
    "Tone", "FrameFeatures", "frame_length", "frame_features", "tones_from_features", "find_tones",
    "parse_levels", "Parameter", "Fit", "Match", "Identification", "fit_curve", "rank_curves",
    "candidate_curves", "identify", "KINDS", "LEVEL_TOLERANCE_DB",
]

#: Curve families whose free time constants :func:`fit_curve` can fit.
KINDS = ("tape", "disc")

#: Level error (dB) assumed at least for tone readings when deciding whether a
#: parameter is determined: replayed tones rarely repeat better than about a
#: quarter dB (tape contact, azimuth, meter).  Common practice, no source.
LEVEL_TOLERANCE_DB = 0.25

# Half-width (bins) of the band that holds a tone's energy in a Hann-windowed
# frame: the main lobe is ±2 bins; ±4 keeps the leakage outside below 1e-4.
_BAND_BINS = 4
# Seconds of audio per analysis frame (rounded to a power of two of samples).
_FRAME_SECONDS = 0.17
# How many frames are transformed at once (bounds memory).
_FRAMES_PER_BATCH = 32
# The fit's parameters are scaled to order one: corner frequencies in units
# of 100 Hz, time constants in units of 100 µs (both enter squared).
_F_UNIT = 100.0
_TAU_UNIT = 100e-6
_DB = 10.0 / math.log(10.0)
# A parameter whose plausible range reaches "absent" and stays beyond these
# limits is reported as absent: an LF corner below 20 Hz (τ > 7958 µs, beyond
# every standard's 3180 µs) or an HF time constant below 5 µs (corner > 32 kHz).
_NONE_CORNER_HZ = 20.0
_NONE_TAU_US = 5.0
# A determined parameter's plausible (±2σ) range spans at most this ratio.
_DETERMINED_RATIO = 1.5
# Best-match RMS errors above this (dB) draw a warning that nothing fits well;
# runners-up within _CLOSE_MATCH_DB of the best one are "not told apart".
_POOR_MATCH_DB = 0.75
_CLOSE_MATCH_DB = 0.1
# Shapes closer than this everywhere (dB) are the same curve for the ranking.
_SAME_SHAPE_DB = 1e-6


# ============================================================================ tones in audio
@dataclass(frozen=True)
class Tone:
    """One steady tone found in audio.

    Attributes
    ----------
    freq_hz : float
        Median of the frames' interpolated FFT-peak frequencies.
    level_db : float
        Level in dBFS (AES17: a full-scale sine reads 0 dBFS), power mean of
        the channels used.
    channel_levels_db : tuple of float
        Level of each channel in dBFS.
    start_s, duration_s : float
        Where the tone starts (seconds from the start of the analysed audio)
        and how long it lasts, to about half a frame.
    drift : float
        (max − min) / median of the frame frequencies.
    """

    freq_hz: float
    level_db: float
    channel_levels_db: tuple[float, ...]
    start_s: float
    duration_s: float
    drift: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready fields."""
        return {"freq_hz": self.freq_hz, "level_dbfs": self.level_db,
                "channel_levels_dbfs": list(self.channel_levels_db), "start_s": self.start_s,
                "duration_s": self.duration_s, "drift": self.drift}


@dataclass
class FrameFeatures:
    """Per-frame measurements of audio (see :func:`frame_features`).

    Attributes
    ----------
    freq_hz : ndarray, shape (n,)
        Interpolated frequency of the strongest spectral peak (NaN in silence).
    tonality : ndarray, shape (n,)
        Share of the frame's energy within ±4 bins of that peak (0..1).
    band_power : ndarray, shape (n, channels)
        Mean-square value of each channel within that band (a sine of
        amplitude A gives A²/2).
    """

    freq_hz: np.ndarray
    tonality: np.ndarray
    band_power: np.ndarray

    @classmethod
    def concatenate(cls, parts: Sequence[FrameFeatures]) -> FrameFeatures:
        """Join the features of consecutive pieces of one signal."""
        if not parts:
            return cls(np.empty(0), np.empty(0), np.empty((0, 1)))
        return cls(np.concatenate([p.freq_hz for p in parts]),
                   np.concatenate([p.tonality for p in parts]),
                   np.concatenate([p.band_power for p in parts]))


def frame_length(fs: float) -> int:
    """Analysis frame length (samples) at rate ``fs``: about 0.17 s, a power of two.

    Frames overlap by half; a file read in blocks must overlap by
    ``frame_length(fs) // 2`` samples and start each block a multiple of the
    hop after the previous one (see :func:`frame_features`).
    """
    rate = float(fs)
    if not (rate > 0 and math.isfinite(rate)):
        raise DspeqError(f"sample rate must be a positive number of Hz, got {fs!r}")
    return int(2 ** max(8, round(math.log2(_FRAME_SECONDS * rate))))


def frame_features(x: np.ndarray, fs: float, frame: int | None = None) -> FrameFeatures:
    """Measure every complete frame of ``x`` (hop = frame // 2).

    Parameters
    ----------
    x : ndarray, shape (frames,) or (frames, channels)
        Audio, full scale ±1.
    fs : float
        Sample rate in Hz.
    frame : int, optional
        Frame length (default :func:`frame_length`).

    Returns
    -------
    FrameFeatures
        One row per frame starting at 0, hop, 2·hop, … that fits in ``x``.
        Blocks of a long file that overlap by ``frame - hop`` samples give
        features that concatenate to those of the whole file.
    """
    n = frame_length(fs) if frame is None else int(frame)
    data = np.asarray(x, dtype=np.float64)
    data = data[:, None] if data.ndim == 1 else data
    if data.ndim != 2:
        raise DspeqError(f"audio must be (frames,) or (frames, channels), got shape {data.shape!r}")
    hop = n // 2
    count = 0 if len(data) < n else (len(data) - n) // hop + 1
    parts = []
    for first in range(0, count, _FRAMES_PER_BATCH):
        last = min(count, first + _FRAMES_PER_BATCH)
        chunk = data[first * hop:(last - 1) * hop + n]
        frames = np.lib.stride_tricks.sliding_window_view(chunk, n, axis=0)[::hop]
        parts.append(_measure_frames(frames, float(fs)))
    if not parts:
        return FrameFeatures(np.empty(0), np.empty(0), np.empty((0, data.shape[1])))
    return FrameFeatures.concatenate(parts)


def _measure_frames(frames: np.ndarray, fs: float) -> FrameFeatures:
    """Features of frames shaped (k, channels, n)."""
    n = frames.shape[-1]
    w = signal.get_window("hann", n)
    # Subtract the window-weighted mean: removes a DC offset and its leakage.
    dc = (frames @ w) / w.sum()
    spec = np.fft.rfft((frames - dc[..., None]) * w, axis=-1)
    power = spec.real ** 2 + spec.imag ** 2                # (k, ch, bins)
    power[..., 0] = 0.0
    total = power.sum(axis=1)                                # summed over channels
    k = np.argmax(total[:, 1:-1], axis=1) + 1
    rows = np.arange(len(k))
    offsets = np.arange(-_BAND_BINS, _BAND_BINS + 1)
    idx = np.clip(k[:, None] + offsets, 1, power.shape[-1] - 1)
    band = np.take_along_axis(power, np.broadcast_to(idx[:, None, :], (*power.shape[:2], idx.shape[1])),
                              axis=-1).sum(axis=-1)          # (k, ch)
    energy = total.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        tonality = np.where(energy > 0, band.sum(axis=1) / energy, 0.0)
        a, b, c = (np.log(total[rows, k + d] + 1e-300) for d in (-1, 0, 1))
        denom = a - 2 * b + c
        delta = np.where(denom < 0, 0.5 * (a - c) / denom, 0.0)
    freq = np.where(energy > 0, (k + np.clip(delta, -0.5, 0.5)) * fs / n, np.nan)
    # Parseval, one-sided: mean square within the band = 2·Σ|X|² / (n·Σw²).
    band_power = 2.0 * band / (n * float(np.sum(w * w)))
    return FrameFeatures(freq, tonality, band_power)


def tones_from_features(features: FrameFeatures, fs: float, frame: int | None = None, *,
                        min_duration: float = 0.5, min_level_db: float = -80.0, min_freq_hz: float = 16.0,
                        min_tonality: float = 0.5, max_step: float = 0.02, max_drift: float = 0.03,
                        max_gap_s: float = 0.3, channel: int | None = None,
                        offset_s: float = 0.0) -> list[Tone]:
    """Group frames into steady tones.

    A frame belongs to a tone when most of its energy lies in one narrow peak
    (``min_tonality``) above ``min_level_db`` and ``min_freq_hz`` (below it
    lie rumble and the random-walk spectrum of noise); consecutive such frames form one
    tone while their frequency changes by less than ``max_step`` (relative)
    from frame to frame.  Pieces of one tone split by a short disturbance (a
    click, a dropout up to ``max_gap_s``) are joined again.  Tones shorter than
    ``min_duration`` seconds, or whose frequency wanders by more than
    ``max_drift`` (a sweep), are left out.

    Parameters
    ----------
    features : FrameFeatures
        From :func:`frame_features`.
    fs : float
        Sample rate in Hz.
    frame : int, optional
        The frame length used (default :func:`frame_length`).
    channel : int, optional
        Use this channel's level only (default: power mean of all channels).
    offset_s : float, optional
        Added to every start time (the position of the analysed audio in its file).

    Returns
    -------
    list of Tone
        In order of time.
    """
    n = frame_length(fs) if frame is None else int(frame)
    hop_s = (n // 2) / float(fs)
    bp = features.band_power
    if channel is not None and not (0 <= channel < bp.shape[1]):
        raise DspeqError(f"channel {channel!r} does not exist; the audio has {bp.shape[1]} channel(s)")
    used = bp if channel is None else bp[:, [channel]]
    with np.errstate(divide="ignore"):
        level = 10 * np.log10(2 * used.mean(axis=1))
    with np.errstate(invalid="ignore"):
        good = ((features.tonality >= min_tonality) & (level >= min_level_db)
                & (features.freq_hz >= min_freq_hz))
    runs = _runs(features.freq_hz, good, max_step)
    runs = _join_runs(runs, features.freq_hz, max_step, int(round(max_gap_s / hop_s)) + 1)
    tones = []
    for i0, i1 in runs:
        if (i1 - i0 + 1) * hop_s < min_duration:
            continue
        core = _interior(i0, i1)
        freqs = features.freq_hz[core]
        fmed = float(np.median(freqs))
        drift = float((freqs.max() - freqs.min()) / fmed)
        if drift > max_drift:
            continue
        ch_db = 10 * np.log10(2 * np.median(bp[core], axis=0))
        lvl = 10 * math.log10(2 * float(np.median(used[core], axis=0).mean()))
        tones.append(Tone(fmed, lvl, tuple(float(v) for v in ch_db),
                          float(offset_s + (i0 + 0.5) * hop_s), (i1 - i0 + 1) * hop_s, drift))
    return tones


def _runs(freq: np.ndarray, good: np.ndarray, max_step: float) -> list[list[int]]:
    """Consecutive good frames whose frequency steps stay below ``max_step``."""
    runs: list[list[int]] = []
    for i in np.flatnonzero(good):
        if runs and runs[-1][1] == i - 1 and abs(freq[i] / freq[i - 1] - 1) <= max_step:
            runs[-1][1] = int(i)
        else:
            runs.append([int(i), int(i)])
    return runs


def _join_runs(runs: list[list[int]], freq: np.ndarray, max_step: float, max_gap: int) -> list[list[int]]:
    """Join runs of one frequency separated by at most ``max_gap`` frames."""
    out: list[list[int]] = []
    for run in runs:
        if out:
            prev = out[-1]
            same = abs(np.median(freq[run[0]:run[1] + 1]) / np.median(freq[prev[0]:prev[1] + 1]) - 1)
            if run[0] - prev[1] <= max_gap and same <= max_step:
                prev[1] = run[1]
                continue
        out.append(list(run))
    return out


def _interior(i0: int, i1: int) -> np.ndarray:
    """Frames of a run that lie wholly inside the tone (edges dropped when possible)."""
    trim = 2 if i1 - i0 >= 4 else (1 if i1 - i0 >= 2 else 0)
    return np.arange(i0 + trim, i1 - trim + 1)


def find_tones(x: np.ndarray, fs: float, **options: Any) -> list[Tone]:
    """Steady tones in an audio array.

    Parameters
    ----------
    x : ndarray, shape (frames,) or (frames, channels)
        Audio, full scale ±1.
    fs : float
        Sample rate in Hz.
    **options
        Passed to :func:`tones_from_features` (``min_duration``,
        ``min_level_db``, ``channel`` …).

    Returns
    -------
    list of Tone

    Examples
    --------
    >>> import numpy as np
    >>> fs = 48000
    >>> t = np.arange(fs) / fs
    >>> x = np.concatenate([0.1 * np.sin(2 * np.pi * 1000 * t), np.zeros(fs // 2),
    ...                     0.01 * np.sin(2 * np.pi * 100 * t)])
    >>> [(round(t.freq_hz), round(t.level_db, 1)) for t in find_tones(x, fs)]
    [(1000, -20.0), (100, -40.0)]
    """
    n = frame_length(fs)
    return tones_from_features(frame_features(x, fs, n), fs, n, **options)


# ============================================================================ tables of levels
_SPLIT = re.compile(r"[,;\t]|\s+")


def parse_levels(text: str, source: str = "levels") -> tuple[np.ndarray, np.ndarray]:
    """Read a table of (frequency Hz, level dB) rows.

    Fields are separated by commas, semicolons, tabs or spaces; further
    columns are ignored; empty lines and lines starting with ``#`` are
    skipped; the first row may be a header.

    Raises
    ------
    DspeqError
        Naming the row (1-based line number) and the bad field.
    """
    freqs: list[float] = []
    levels: list[float] = []
    seen_data = False
    for lineno, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        fields = [f for f in _SPLIT.split(line) if f]
        if not seen_data and not _is_number(fields[0]):
            seen_data = True        # a header row
            continue
        seen_data = True
        if len(fields) < 2:
            raise DspeqError(f"{source}, row {lineno}: expected 'frequency, level', got {raw.strip()!r}")
        f = _number(fields[0], "frequency", source, lineno)
        v = _number(fields[1], "level", source, lineno)
        if f <= 0:
            raise DspeqError(f"{source}, row {lineno}: frequency {fields[0]!r} must be positive (Hz)")
        freqs.append(f)
        levels.append(v)
    if not freqs:
        raise DspeqError(f"{source}: no rows of 'frequency, level' found")
    return np.asarray(freqs), np.asarray(levels)


def _is_number(text: str) -> bool:
    try:
        return math.isfinite(float(text))
    except ValueError:
        return False


def _number(text: str, what: str, source: str, lineno: int) -> float:
    if not _is_number(text):
        raise DspeqError(f"{source}, row {lineno}: {what} {text!r} is not a finite number")
    return float(text)


# ============================================================================ the model
@dataclass(frozen=True)
class _Param:
    """One free time constant of a curve family.

    ``role`` is +1 for a pole of the playback curve P (a zero of the
    recording curve) and -1 for a zero of P.  ``form`` "corner": the
    parameter is (f_c / 100 Hz)², 0 meaning an infinite time constant;
    "tau": (τ / 100 µs)², 0 meaning no such factor.
    """

    name: str
    label: str
    role: int
    form: str
    lower: float
    upper: float
    hint: str


_MODELS: dict[str, tuple[_Param, ...]] = {
    # Tape replay P = (1 + s·T_hf) / (1 + s·T_lf).  Searched within 0–300 Hz
    # for the LF corner and 0–400 µs for T_hf (beyond any standard).
    "tape": (
        _Param("lf", "LF time constant", +1, "corner", 0.0, 9.0,
               "tones below about 100 Hz (ideally 31.5–63 Hz) determine it"),
        _Param("hf", "HF time constant", -1, "tau", 0.0, 16.0,
               "tones above about 5 kHz determine it"),
    ),
    # Disc playback P = (1 + s·T_turnover) / ((1 + s·T_shelf)(1 + s·T_rolloff)).
    # Shelf corner 0–200 Hz, turnover 80–1600 Hz (100–2000 µs), roll-off 0–300 µs.
    "disc": (
        _Param("shelf", "LF shelf time constant", +1, "corner", 0.0, 4.0,
               "tones below about 100 Hz determine it"),
        _Param("turnover", "turnover time constant", -1, "tau", 1.0, 400.0,
               "tones from about 50 Hz to 2 kHz, with some below 100 Hz to tell it from the shelf, "
               "determine it"),
        _Param("rolloff", "HF roll-off time constant", +1, "tau", 0.0, 9.0,
               "tones above about 5 kHz determine it"),
    ),
}


def _terms(params: Sequence[_Param], x: np.ndarray, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Model levels without gain, shape (n,), and their derivatives, shape (n, p)."""
    level = np.zeros(len(f))
    jac = np.empty((len(f), len(params)))
    fc2 = (f / _F_UNIT) ** 2
    wt2 = (2 * np.pi * f * _TAU_UNIT) ** 2
    for j, (p, xj) in enumerate(zip(params, x, strict=True)):
        if p.form == "corner":     # 20·log10|1 + jf/f_c| up to a constant: 10·log10(f² + f_c²)
            level += p.role * _DB * np.log(fc2 + xj)
            jac[:, j] = p.role * _DB / (fc2 + xj)
        else:                      # 10·log10(1 + (ωτ)²)
            level += p.role * _DB * np.log1p(wt2 * xj)
            jac[:, j] = p.role * _DB * wt2 / (1 + wt2 * xj)
    return level, jac


def _tau_us(p: _Param, x: float) -> float:
    """Time constant (µs) of scaled parameter value ``x`` (inf / 0 for absent)."""
    if p.form == "corner":
        return math.inf if x <= 0 else 1e6 / (2 * math.pi * _F_UNIT * math.sqrt(x))
    return 1e6 * _TAU_UNIT * math.sqrt(max(x, 0.0))


def _x_of(p: _Param, tau_us: float | None) -> float:
    """Scaled parameter value of a time constant (µs), clipped into the search range."""
    if tau_us is None or math.isinf(tau_us):
        x = 0.0
    elif p.form == "corner":
        x = (1e6 / (2 * math.pi * tau_us * _F_UNIT)) ** 2
    else:
        x = (tau_us * 1e-6 / _TAU_UNIT) ** 2
    return min(max(x, p.lower), p.upper)


# ============================================================================ results
@dataclass(frozen=True)
class Parameter:
    """One fitted time constant.

    Attributes
    ----------
    name, label : str
        Short name (``lf``, ``hf``, ``shelf``, ``turnover``, ``rolloff``) and text.
    value_us : float
        Best value in µs; ``inf`` for an absent LF time constant, 0 for an
        absent HF one.
    sigma_us : float
        Standard uncertainty from the fit's residuals (delta method); NaN when
        the tones leave no residual degree of freedom, inf at an absent value.
    low_us, high_us : float
        Plausible range: ±2σ, with the level error taken as at least
        :data:`LEVEL_TOLERANCE_DB`.
    status : str
        ``"determined"`` (range within a factor 1.5), ``"absent"`` (the tones
        show no such time constant) or ``"undetermined"`` (the tones cannot
        pin it down; ``note`` says which tones would).
    note : str
        Advice for an undetermined parameter.
    """

    name: str
    label: str
    value_us: float
    sigma_us: float
    low_us: float
    high_us: float
    status: str
    note: str = ""

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready fields (infinite values as the string ``"inf"``)."""
        def num(v: float) -> float | str | None:
            return None if math.isnan(v) else ("inf" if math.isinf(v) else float(v))
        return {"name": self.name, "label": self.label, "value_us": num(self.value_us),
                "sigma_us": num(self.sigma_us), "low_us": num(self.low_us), "high_us": num(self.high_us),
                "status": self.status, "note": self.note}


@dataclass(frozen=True)
class Fit:
    """Least-squares fit of a curve family to tone levels.

    Attributes
    ----------
    kind : str
        ``"tape"`` or ``"disc"``.
    parameters : tuple of Parameter
    spec : str
        The fitted playback curve as ``tc:ZEROS/POLES`` text (4 significant
        digits), usable wherever a CURVE is accepted.
    curve : Curve
        The same, parsed.
    gain_db : float
        Level the tones would read at 1 kHz (the common gain).
    rms_db : float
        RMS of the residuals.
    residuals_db : ndarray
        Measured minus fitted level per tone.
    """

    kind: str
    parameters: tuple[Parameter, ...]
    spec: str
    curve: Curve
    gain_db: float
    rms_db: float
    residuals_db: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready fields."""
        return {"kind": self.kind, "curve": self.spec, "gain_db": self.gain_db, "rms_db": self.rms_db,
                "parameters": [p.to_dict() for p in self.parameters],
                "residuals_db": [float(r) for r in self.residuals_db]}


@dataclass(frozen=True)
class Match:
    """A catalog curve (or several with identical shape) scored against the tones.

    Attributes
    ----------
    rank : int
        1 for the best; curves of identical shape share one Match.
    names : tuple of str
        Every candidate with this shape (equal time constants under several
        names, and speed variants that coincide, e.g. ``iec-7.5ips@x2`` =
        ``iec-15ips``).  Catalog aliases are not listed separately.
    kind : str
        Catalog kind of the first name.
    curve : Curve
        The first candidate's curve.
    rms_db : float
        RMS level error after the best common gain.
    max_abs_db : float
        Largest absolute error after that gain.
    gain_db : float
        The best common gain (level the tones would read at 1 kHz).
    """

    rank: int
    names: tuple[str, ...]
    kind: str
    curve: Curve
    rms_db: float
    max_abs_db: float
    gain_db: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready fields."""
        return {"rank": self.rank, "names": list(self.names), "kind": self.kind,
                "curve": self.curve.tc_spec() if _all_real(self.curve) else self.curve.name,
                "rms_db": self.rms_db, "max_abs_db": self.max_abs_db, "gain_db": self.gain_db}


@dataclass(frozen=True)
class Identification:
    """Everything :func:`identify` found.

    Attributes
    ----------
    freqs_hz, levels_db : ndarray
        The tones used (levels after removing an ``applied`` curve).
    kind : str
        Curve family fitted.
    fit : Fit or None
        None when there are too few tones to fit this family.
    ranking : tuple of Match
        Best first.
    warnings : tuple of str
        Everything the user should know (also issued as :class:`UserWarning`).
    """

    freqs_hz: np.ndarray
    levels_db: np.ndarray
    kind: str
    fit: Fit | None
    ranking: tuple[Match, ...]
    warnings: tuple[str, ...] = field(default=())

    def to_dict(self, top: int | None = None) -> dict[str, Any]:
        """JSON-ready fields; ``top`` limits the ranking."""
        return {"kind": self.kind,
                "tones": [{"freq_hz": float(f), "level_db": float(v)}
                          for f, v in zip(self.freqs_hz, self.levels_db, strict=True)],
                "fit": None if self.fit is None else self.fit.to_dict(),
                "ranking": [m.to_dict() for m in self.ranking[:top]],
                "warnings": list(self.warnings)}


def _all_real(c: Curve) -> bool:
    return bool(np.all(c.zeros.imag == 0) and np.all(c.poles.imag == 0))


# ============================================================================ fitting
def _check_tones(freqs: Iterable[float], levels: Iterable[float]) -> tuple[np.ndarray, np.ndarray]:
    f = np.asarray(list(freqs), dtype=float).ravel()
    v = np.asarray(list(levels), dtype=float).ravel()
    if f.shape != v.shape:
        raise DspeqError(f"got {f.size} frequencies but {v.size} levels")
    bad = ~(np.isfinite(f) & (f > 0) & np.isfinite(v))
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise DspeqError(f"tone {i + 1}: frequency {f[i]!r} Hz / level {v[i]!r} dB is not usable")
    if f.size < 2:
        raise DspeqError(f"need at least 2 tones to compare curves, got {f.size}")
    return f, v


def _solve(params: tuple[_Param, ...], f: np.ndarray, v: np.ndarray, x0: np.ndarray,
           free: np.ndarray) -> tuple[np.ndarray, float]:
    """Least squares over the free parameters (and the gain); returns (x, gain)."""
    def residual(q):
        x = x0.copy()
        x[free] = q[:-1]
        model, _ = _terms(params, x, f)
        return model + q[-1] - v

    def jacobian(q):
        x = x0.copy()
        x[free] = q[:-1]
        _, jac = _terms(params, x, f)
        return np.column_stack([jac[:, free], np.ones(len(f))])

    lo = [p.lower for p, m in zip(params, free, strict=True) if m] + [-np.inf]
    hi = [p.upper for p, m in zip(params, free, strict=True) if m] + [np.inf]
    q0 = np.append(x0[free], 0.0)
    q0[-1] = float(np.mean(v - residual(q0)))
    sol = optimize.least_squares(residual, q0, jac=jacobian, bounds=(lo, hi), x_scale="jac",
                                 xtol=1e-12, ftol=1e-12, gtol=1e-12, max_nfev=500)
    x = x0.copy()
    x[free] = sol.x[:-1]
    return x, float(sol.x[-1])


def _covariance(params: tuple[_Param, ...], f: np.ndarray, x: np.ndarray, free: np.ndarray,
                scale: float) -> np.ndarray:
    """Covariance of the free parameters for residual standard deviation ``scale``."""
    _, jac = _terms(params, x, f)
    j = np.column_stack([jac[:, free], np.ones(len(f))])
    return scale ** 2 * np.linalg.pinv(j.T @ j)[:-1, :-1]


def _describe(p: _Param, x: float, sd: float, sd_floor: float) -> Parameter:
    """Parameter report from its value and standard deviations (plain and floored)."""
    value = _tau_us(p, x)
    step = 1e-6 * max(abs(x), 1e-9)
    slope = abs(_tau_us(p, x + step) - value) / step if x > 0 else math.inf
    sigma = slope * sd if math.isfinite(sd) else math.nan
    lo_x, hi_x = max(x - 2 * sd_floor, 0.0), x + 2 * sd_floor
    ends = sorted((_tau_us(p, lo_x), _tau_us(p, hi_x)))
    status, note = "determined", ""
    if lo_x <= 0.0:
        absent_tight = (_F_UNIT * math.sqrt(hi_x) < _NONE_CORNER_HZ if p.form == "corner"
                        else _tau_us(p, hi_x) < _NONE_TAU_US)
        status = "absent" if absent_tight else "undetermined"
    elif ends[1] / ends[0] > _DETERMINED_RATIO:
        status = "undetermined"
    if status == "undetermined":
        note = (f"the tones only place the {p.label} between {_fmt_us(ends[0])} and "
                f"{_fmt_us(ends[1])}; {p.hint}")
    edge = x >= p.upper * (1 - 1e-6) or 0 < p.lower * (1 + 1e-6) >= x
    if edge:
        status = "undetermined"
        note = (f"the {p.label} ran into the edge of the range searched ({_fmt_us(value)}): the tones "
                "do not fit this curve family; check the kind of curve and the tones")
    return Parameter(p.name, p.label, value, sigma, ends[0], ends[1], status, note)


def _fmt_us(v: float) -> str:
    return "infinity" if math.isinf(v) else f"{v:.4g} µs"


def _fit_spec(kind: str, values: dict[str, float]) -> str:
    """tc: text of a fitted curve (4 significant digits; absent factors left out)."""
    def fmt(v: float) -> str:
        return "inf" if math.isinf(v) else f"{v:.4g}"
    if kind == "tape":
        zeros = [values["hf"]] if values["hf"] > 0 else []
        poles = [values["lf"]]
    else:
        zeros = [values["turnover"]]
        poles = [values["shelf"]] + ([values["rolloff"]] if values["rolloff"] > 0 else [])
    return f"tc:{','.join(map(fmt, zeros))}/{','.join(map(fmt, poles))}"


def fit_curve(freqs_hz: Iterable[float], levels_db: Iterable[float], kind: str = "tape",
              start: Sequence[Curve] = ()) -> Fit:
    """Fit the free time constants of a tape or disc curve to tone levels.

    The model is ``L(f) = -|P(f)|_dB + g`` (see the module docstring) with
    P = (1 + sT_hf)/(1 + sT_lf) for tape and
    P = (1 + sT_turnover)/((1 + sT_shelf)(1 + sT_rolloff)) for discs.  Each
    time constant enters as a squared corner frequency (LF) or squared time
    constant (HF), so "absent" (T_lf = ∞, no roll-off) is an ordinary
    boundary value of the search.  Uncertainties come from the Jacobian at the
    solution scaled by the residuals' standard deviation; parameters whose
    plausible range shows them absent are then fixed there and the rest
    refitted.

    Parameters
    ----------
    freqs_hz, levels_db : sequence of float
        Tone frequencies (Hz) and measured levels (dB, any common offset).
    kind : {"tape", "disc"}
    start : sequence of Curve, optional
        Starting points (e.g. the best catalog matches); each curve whose
        real time constants fit the family is tried, plus a default.

    Returns
    -------
    Fit

    Raises
    ------
    DspeqError
        For an unknown kind, or fewer tones than parameters + 1.
    """
    if kind not in _MODELS:
        raise DspeqError(f"curve kind must be one of {', '.join(KINDS)}, got {kind!r}")
    f, v = _check_tones(freqs_hz, levels_db)
    params = _MODELS[kind]
    if f.size < len(params) + 1:
        raise DspeqError(f"need at least {len(params) + 1} tones to fit the {len(params)} time constants "
                         f"of a {kind} curve (and the level), got {f.size}")
    free = np.ones(len(params), dtype=bool)
    x, g = _best_start(params, f, v, start, free)
    x, g, reports = _refine(params, f, v, x, g)
    return _make_fit(kind, params, f, v, x, g, reports)


# Default starting time constants (µs): NAB-like tape, a mid-1950s disc.
_DEFAULTS = {2: (3180.0, 50.0), 3: (3180.0, 400.0, 75.0)}


def _best_start(params, f, v, start, free) -> tuple[np.ndarray, float]:
    """Solve from each usable starting curve and the default; keep the lowest cost."""
    default = np.array([_x_of(p, t) for p, t in zip(params, _DEFAULTS[len(params)], strict=True)])
    starts = [x for x in (_x_from_curve(params, c) for c in start) if x is not None] + [default]
    best = None
    for x0 in starts:
        x, g = _solve(params, f, v, x0, free)
        cost = float(np.sum((_terms(params, x, f)[0] + g - v) ** 2))
        if best is None or cost < best[0] - 1e-12:
            best = (cost, x, g)
    return best[1], best[2]


def _x_from_curve(params: tuple[_Param, ...], c: Curve) -> np.ndarray | None:
    """Starting point from a candidate curve of matching structure, else None."""
    if not _all_real(c):
        return None
    zeros, poles = c.time_constants()
    if len(params) == 2 and len(zeros) <= 1 and len(poles) == 1:
        taus = [poles[0], zeros[0] if zeros else 0.0]
    elif len(params) == 3 and len(zeros) == 1 and len(poles) in (1, 2):
        taus = [poles[0], zeros[0], poles[1] if len(poles) == 2 else 0.0]
    else:
        return None
    return np.array([_x_of(p, t) for p, t in zip(params, taus, strict=True)])


def _refine(params, f, v, x, g):
    """Judge each parameter; fix those shown absent and refit the rest."""
    free = np.ones(len(params), dtype=bool)
    dof = f.size - len(params) - 1
    rms = math.sqrt(float(np.sum((_terms(params, x, f)[0] + g - v) ** 2)) / dof) if dof > 0 else math.nan
    floor = max(rms, LEVEL_TOLERANCE_DB) if math.isfinite(rms) else LEVEL_TOLERANCE_DB
    sd = np.sqrt(np.abs(np.diag(_covariance(params, f, x, free, rms if math.isfinite(rms) else 1.0))))
    if not math.isfinite(rms):
        sd[:] = math.nan
    sd_floor = np.sqrt(np.abs(np.diag(_covariance(params, f, x, free, floor))))
    reports = [_describe(p, xi, s, sf) for p, xi, s, sf in zip(params, x, sd, sd_floor, strict=True)]
    absent = np.array([r.status == "absent" for r in reports])
    if absent.any() and not absent.all():
        x = np.where(absent, 0.0, x)
        x, g = _solve(params, f, v, x, ~absent)
        reports = [_describe(p, x[i], sd[i], sd_floor[i]) if not absent[i] else
                   Parameter(r.name, r.label, _tau_us(p, 0.0), r.sigma_us, r.low_us, r.high_us, "absent")
                   for i, (p, r) in enumerate(zip(params, reports, strict=True))]
    return x, g, reports


def _make_fit(kind, params, f, v, x, g, reports) -> Fit:
    values = {p.name: r.value_us for p, r in zip(params, reports, strict=True)}
    spec = _fit_spec(kind, values)
    curve = parse_curve(spec).renamed(spec, kind=kind, source="fitted to line-up tones")
    gain = float(np.mean(v + curve.magnitude_db(f)))
    resid = v - (gain - curve.magnitude_db(f))
    return Fit(kind, tuple(reports), spec, curve, gain, float(np.sqrt(np.mean(resid ** 2))), resid)


# ============================================================================ ranking
def candidate_curves(kind: str | None = None, speeds: Iterable[float] = (1.0,)) -> list[tuple[str, Curve]]:
    """(label, curve) for every catalog curve of ``kind`` at every speed ratio.

    Speed 1 is always included; a speed ratio r gives ``name@xr``, the curve
    as :func:`dspeq.curve` applies it with ``speed=r``.
    """
    if kind is not None and kind not in KINDS:
        raise DspeqError(f"curve kind must be one of {', '.join(KINDS)}, got {kind!r}")
    ratios = [1.0] + [float(r) for r in speeds if float(r) != 1.0]
    out = []
    for r in dict.fromkeys(ratios):
        for entry in CATALOG.values():
            if kind is None or entry.kind == kind:
                c = entry.curve().at_speed(r)
                out.append((c.name, c))
    return out


def rank_curves(freqs_hz: Iterable[float], levels_db: Iterable[float],
                candidates: Sequence[tuple[str, Curve]]) -> list[Match]:
    """Score candidate playback curves by RMS level error after the best common gain.

    Candidates whose shapes agree within 1e-6 dB from 10 Hz to 30 kHz are one
    Match (they cannot be told apart by any tones).  Returns best first.
    """
    f, v = _check_tones(freqs_hz, levels_db)
    grid = np.geomspace(10.0, 30_000.0, 97)
    groups: list[tuple[list[str], Curve, np.ndarray]] = []
    for name, c in candidates:
        shape = -c.magnitude_db(grid)
        shape = shape - shape.mean()
        for names, _, other in groups:
            if np.max(np.abs(other - shape)) < _SAME_SHAPE_DB:
                names.append(name)
                break
        else:
            groups.append(([name], c, shape))
    scored = []
    for names, c, _ in groups:
        err = v + c.magnitude_db(f)
        gain = float(np.mean(err))
        dev = err - gain
        scored.append((float(np.sqrt(np.mean(dev ** 2))), float(np.max(np.abs(dev))), gain, names, c))
    scored.sort(key=lambda s: s[0])
    return [Match(i + 1, tuple(names), c.kind, c, rms, mx, gain)
            for i, (rms, mx, gain, names, c) in enumerate(scored)]


# ============================================================================ all together
def identify(freqs_hz: Iterable[float], levels_db: Iterable[float], *, kind: str | None = None,
             speeds: Iterable[float] = (1.0,), applied: str | Curve | None = None) -> Identification:
    """Rank catalog curves and fit a curve to line-up tone levels.

    Parameters
    ----------
    freqs_hz, levels_db : sequence of float
        Tone frequencies (Hz) and their levels (dB) in the flat transfer.
    kind : {"tape", "disc"}, optional
        Restrict the ranking to this kind and fit this family.  By default
        every catalog curve is ranked and the family of the best one is fitted.
    speeds : sequence of float, optional
        Further speed ratios (transfer / recorded speed) at which to try every
        catalog curve.
    applied : str or Curve, optional
        A playback curve the transfer already went through (as ``from_curve``
        in :func:`dspeq.curve`); its response is removed from the levels first.

    Returns
    -------
    Identification

    Examples
    --------
    >>> import numpy as np, dspeq
    >>> f = np.array([31.5, 63, 125, 250, 500, 1000, 2000, 4000, 8000, 12500, 16000])
    >>> levels = -20 - dspeq.curve("nab-7.5ips").magnitude_db(f)
    >>> result = identify(f, levels, kind="tape")
    >>> result.ranking[0].names
    ('nab-15ips', 'nab-7.5ips')
    >>> result.fit.spec
    'tc:50/3180'
    """
    f, v = _check_tones(freqs_hz, levels_db)
    if applied is not None:
        v = v - parse_curve(applied).magnitude_db(f)
    ranking = rank_curves(f, v, candidate_curves(kind, speeds))
    family = kind or (ranking[0].kind if ranking[0].kind in KINDS else "tape")
    notes: list[str] = []
    fit = None
    try:
        fit = fit_curve(f, v, family, [m.curve for m in ranking if m.kind == family][:3])
    except DspeqError as exc:
        notes.append(f"no fit: {exc}")
    if fit is not None:
        notes += [p.note for p in fit.parameters if p.status == "undetermined"]
    best = ranking[0]
    if best.rms_db > _POOR_MATCH_DB:
        notes.append(f"no catalog curve fits these tones well (best: {' = '.join(best.names)}, "
                     f"{best.rms_db:.2f} dB RMS): were all tones recorded at one level, and is the "
                     "transfer flat? The curve may also be missing from the catalog (see the fit)")
    elif len(ranking) > 1 and ranking[1].rms_db - best.rms_db < _CLOSE_MATCH_DB:
        notes.append(f"{' = '.join(best.names)} ({best.rms_db:.3f} dB RMS) and "
                     f"{' = '.join(ranking[1].names)} ({ranking[1].rms_db:.3f} dB) differ by less than "
                     f"{_CLOSE_MATCH_DB} dB RMS on these tones: they do not tell them apart")
    for note in notes:
        warnings.warn(note, UserWarning, stacklevel=2)
    return Identification(f, v, family, fit, tuple(ranking), tuple(notes))
