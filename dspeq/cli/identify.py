"""Sub-commands for unknown curves: ``identify`` (from line-up tones) and ``audition``."""

from __future__ import annotations

import argparse
import json
import math
import re
import sys

from ._common import CAUTION, print_table

__all__ = ["register", "cmd_identify", "cmd_audition", "parse_time", "split_curves"]

_TIME = re.compile(r"^(?:(?:(\d+):)?(\d+):)?(\d+(?:\.\d*)?|\.\d+)s?$")


def parse_time(text: str) -> float:
    """Seconds from ``90``, ``90.5``, ``90s``, ``1:30`` or ``1:02:03.5``."""
    m = _TIME.match(text.strip())
    if not m:
        raise argparse.ArgumentTypeError(f"time must be seconds or [h:]m:ss, got {text!r}")
    h, mi, sec = m.groups()
    return int(h or 0) * 3600 + int(mi or 0) * 60 + float(sec)


def split_curves(values: list[str]) -> list[str]:
    """Curve specs from ``--curves`` values: comma/semicolon lists, repeatable.

    A number (or ``inf``) after a comma continues the previous spec, so
    ``riaa,tc:318/3180,75,disc:500,16`` gives three curves.
    """
    out: list[str] = []
    for value in values:
        for part in value.split(";"):
            for token in (t.strip() for t in part.split(",")):
                if not token:
                    continue
                if out and re.fullmatch(r"[-+]?(\d+(\.\d*)?|\.\d+)([eE][-+]?\d+)?|inf", token, re.I):
                    out[-1] += f",{token}"
                else:
                    out.append(token)
    return out


def register(sub: argparse._SubParsersAction) -> None:
    """Add ``identify`` and ``audition`` to the ``dspeq`` parser."""
    p = sub.add_parser(
        "identify", help="which curve? evidence from line-up tones",
        description="Find steady line-up tones in a flat transfer (or read measured levels from a "
                    "table), fit the free time constants of a tape or disc curve to their levels, and "
                    "rank every catalog curve by RMS level error after the best common gain. The tones "
                    "must have been recorded at one level; the transfer must be flat (raw replay head "
                    "for tape) or made through the curve given with --from.",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("file", nargs="?", metavar="FILE", help="audio file holding the tones")
    p.add_argument("--levels", metavar="CSV",
                   help="instead of FILE: a table of 'frequency Hz, level dB' rows")
    p.add_argument("--start", type=parse_time, default=0.0, metavar="T",
                   help="where to start looking (seconds or [h:]m:ss; default 0)")
    p.add_argument("--length", type=parse_time, default=None, metavar="T",
                   help="how much to look at (default: to the end of the file)")
    p.add_argument("--kind", choices=("tape", "disc"),
                   help="rank only this kind and fit its family (default: all; the best match's kind)")
    p.add_argument("--speed", action="append", default=[], metavar="R[,R...]",
                   help="also try every catalog curve at these speed ratios (transfer / recorded speed)")
    p.add_argument("--from", dest="from_curve", metavar="CURVE",
                   help="playback curve the transfer machine already applied")
    p.add_argument("--channel", type=int, default=None, metavar="N",
                   help="use channel N (1-based) only (default: power mean of all channels)")
    p.add_argument("--drop", default="", metavar="N[,N...]",
                   help="leave out these tones (numbers from the list), e.g. a reference tone "
                        "recorded at another level")
    p.add_argument("--min-duration", type=float, default=0.5, metavar="S",
                   help="shortest steady tone in seconds (default 0.5)")
    p.add_argument("--top", type=int, default=5, metavar="N", help="catalog matches to show (default 5)")
    p.add_argument("--format", choices=("table", "json"), default="table")
    p.set_defaults(func=cmd_identify)

    p = sub.add_parser(
        "audition", help="render an excerpt through candidate curves, loudness-matched",
        description="Render the same excerpt through each candidate curve (real equalizer path), "
                    "matched in integrated loudness (ITU-R BS.1770; needs the optional package "
                    "pyloudnorm), one file per curve in OUT_DIR plus audition.json / audition.txt.",
        epilog=CAUTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("file", metavar="FILE")
    p.add_argument("out_dir", metavar="OUT_DIR")
    p.add_argument("--curves", action="append", required=True, metavar="CURVE[,CURVE...]",
                   help="candidate curves, comma-separated or repeated (e.g. riaa,disc-500-16)")
    p.add_argument("--start", type=parse_time, default=0.0, metavar="T", help="excerpt start (default 0)")
    p.add_argument("--length", type=parse_time, default=None, metavar="T",
                   help="excerpt length (default 20 s)")
    p.add_argument("--speed", type=float, default=1.0, metavar="R",
                   help="transfer speed / recorded speed, applied to every candidate (default 1)")
    p.add_argument("--from", dest="from_curve", metavar="CURVE",
                   help="playback curve the transfer machine already applied")
    p.add_argument("--method", default=None, metavar="M", help="design method (default: dspeq's default)")
    p.add_argument("--target", type=float, default=None, metavar="LUFS",
                   help="common loudness (default: the highest up to -23 LUFS with peaks <= -1 dBFS)")
    p.add_argument("--bits", type=int, choices=(16, 24), default=None,
                   help="integer WAV with TPDF dither (default: float32 WAV)")
    p.add_argument("--sequence", action="store_true",
                   help="also write sequence.wav: the excerpts in turn, with silence between them")
    p.add_argument("--gap", type=float, default=1.0, metavar="S", help="silence between excerpts (default 1)")
    p.add_argument("--overwrite", action="store_true", help="replace files already in OUT_DIR")
    p.add_argument("--format", choices=("table", "json"), default="table")
    p.set_defaults(func=cmd_audition)


# ============================================================================ identify
def _numbers(values: list[str], what: str) -> list[float]:
    from .._errors import DspeqError

    out = []
    for token in (t.strip() for v in values for t in v.split(",")):
        try:
            out.append(float(token))
        except ValueError:
            raise DspeqError(f"{what} {token!r} is not a number") from None
    return out


def _file_tones(args: argparse.Namespace):
    """(tones, description) of the steady tones in the file."""
    import soundfile as sf

    from .._errors import AudioFileError, DspeqError
    from ..audition import excerpt_range
    from ..identify import FrameFeatures, frame_features, frame_length, tones_from_features

    rate, channels, first, stop = excerpt_range(args.file, args.start, args.length)
    if args.channel is not None and not 1 <= args.channel <= channels:
        raise DspeqError(f"--channel {args.channel!r}: the file has {channels} channel(s)")
    n = frame_length(rate)
    hop = n // 2
    parts = []
    try:
        for block in sf.blocks(args.file, blocksize=256 * hop + n - hop, overlap=n - hop, start=first,
                               stop=stop, dtype="float64", always_2d=True):
            parts.append(frame_features(block, rate, n))
    except (sf.LibsndfileError, RuntimeError) as exc:
        raise AudioFileError(f"cannot read {args.file!r}: {exc}") from None
    tones = tones_from_features(FrameFeatures.concatenate(parts), rate, n, min_duration=args.min_duration,
                                channel=None if args.channel is None else args.channel - 1,
                                offset_s=first / rate)
    where = (f"{args.file} ({first / rate:.2f}-{stop / rate:.2f} s, {rate:g} Hz, {channels} ch"
             + ("" if args.channel is None else f", channel {args.channel}") + ")")
    if not tones:
        raise DspeqError(f"no steady tones found in {where}: a tone must hold one frequency (within 3 %) "
                         f"for at least {args.min_duration:g} s above -80 dBFS. Is this the line-up "
                         "section? Try --start/--length, or measure the levels and use --levels")
    return tones, where


def _drop(count: int, text: str) -> set[int]:
    from .._errors import DspeqError

    drop = {int(v) for v in _numbers([text], "--drop tone number")} if text.strip() else set()
    bad = sorted(i for i in drop if not 1 <= i <= count)
    if bad:
        raise DspeqError(f"--drop: no tone number {bad[0]!r} (there are {count})")
    return drop


def cmd_identify(args: argparse.Namespace) -> int:
    from pathlib import Path

    from .._errors import DspeqError
    from ..identify import identify, parse_levels

    if (args.file is None) == (args.levels is None):
        raise DspeqError("give either FILE (audio with line-up tones) or --levels CSV, not both or neither")
    detected = None
    if args.levels is not None:
        try:
            text = Path(args.levels).read_text(encoding="utf-8-sig")
        except UnicodeDecodeError:
            raise DspeqError(f"{args.levels!r} is not a text table (UTF-8)") from None
        freqs, levels = parse_levels(text, source=args.levels)
        where = args.levels
        keep = [i for i in range(len(freqs)) if i + 1 not in _drop(len(freqs), args.drop)]
        freqs, levels = freqs[keep], levels[keep]
    else:
        detected, where = _file_tones(args)
        dropped = _drop(len(detected), args.drop)
        use = [t for i, t in enumerate(detected, start=1) if i not in dropped]
        freqs, levels = [t.freq_hz for t in use], [t.level_db for t in use]
        if len(use) < 2:
            raise DspeqError(f"found {len(use)} usable steady tone(s) in {where}; at least 2 are needed "
                             "to compare curves")
    result = identify(freqs, levels, kind=args.kind, speeds=_numbers(args.speed, "speed ratio"),
                      applied=args.from_curve)
    if args.format == "json":
        out = {"source": where, **result.to_dict(top=args.top)}
        if detected is not None:
            out["detected"] = [dict(t.to_dict(), number=i) for i, t in enumerate(detected, start=1)]
        json.dump(out, sys.stdout, indent=2)
        print()
        return 0
    if detected is not None:
        _print_tones(detected, where, args.drop)
    _print_ranking(result, args.top)
    _print_fit(result)
    return 0


def _print_tones(tones, where: str, drop: str) -> None:
    dropped = _drop(len(tones), drop)
    print(f"Steady tones in {where}:")
    rows = [[str(i), f"{t.freq_hz:.1f}", f"{t.level_db:.2f}", f"{t.start_s:.2f}", f"{t.duration_s:.2f}",
             "dropped" if i in dropped else ""] for i, t in enumerate(tones, start=1)]
    print_table(rows, ["#", "Hz", "dBFS", "start s", "length s", ""])
    print()


def _print_ranking(result, top: int) -> None:
    print("Catalog curves, best first (RMS level error after the best common gain):")
    rows = [[str(m.rank), " = ".join(m.names), f"{m.rms_db:.3f}", f"{m.max_abs_db:.3f}", f"{m.gain_db:.2f}"]
            for m in result.ranking[:top]]
    print_table(rows, ["rank", "curve (equal shapes together)", "RMS dB", "max dB", "level at 1 kHz dB"])
    print()


def _print_fit(result) -> None:
    fit = result.fit
    if fit is None:
        print(f"No {result.kind} curve fitted (see the warning).")
        return
    print(f"Fitted {fit.kind} curve: {fit.spec}   (RMS error {fit.rms_db:.3f} dB)")
    rows = [[p.label, _us(p.value_us), "" if not math.isfinite(p.sigma_us) else _us(p.sigma_us),
             f"{_us(p.low_us)} .. {_us(p.high_us)}", p.status] for p in fit.parameters]
    print_table(rows, ["parameter", "value", "± σ", "plausible range (±2σ)", "status"])
    print(f"\nUse it wherever a CURVE is accepted, e.g.  dspeq design '{fit.spec}' --rate 96000")


def _us(v: float) -> str:
    return "inf" if math.isinf(v) else f"{v:.4g} µs"


# ============================================================================ audition
def cmd_audition(args: argparse.Namespace) -> int:
    from ..audition import DEFAULT_LENGTH_S, audition

    print(CAUTION, file=sys.stderr)
    sheet = audition(args.file, split_curves(args.curves), args.out_dir, start_s=args.start,
                     length_s=DEFAULT_LENGTH_S if args.length is None else args.length, speed=args.speed,
                     from_curve=args.from_curve, method=args.method, target_lufs=args.target,
                     bits=args.bits, sequence=args.sequence, gap_s=args.gap, overwrite=args.overwrite)
    if args.format == "json":
        json.dump(sheet.to_dict(), sys.stdout, indent=2)
        print()
    else:
        sys.stdout.write(sheet.to_text())
        print(f"written to {args.out_dir}")
    return 0
