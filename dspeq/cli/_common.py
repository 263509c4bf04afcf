"""Helpers shared by the sub-commands: curve options, error reporting, cautions."""

from __future__ import annotations

import argparse
import sys
import warnings
from typing import Any

__all__ = ["CAUTION", "add_curve_args", "curve_from_args", "run_command", "fail", "add_design_args",
           "design_from_args", "print_table", "oversample_factor"]

CAUTION = (
    "CAUTION: playback curves boost bass by up to about 20 dB (more for raw-head tape transfers).\n"
    "Lower your monitoring level before listening to a result: sudden low-frequency energy can\n"
    "damage speakers and hearing. Keep the flat transfer as the master; every processed file is a\n"
    "documented derivative of it.")


def fail(message: str, status: int = 2) -> int:
    """Print one line on stderr and return ``status``."""
    print(f"dspeq: error: {message}", file=sys.stderr)
    return status


def run_command(args: argparse.Namespace) -> int:
    """Run ``args.func(args)``; a user's bad input becomes one line on stderr and exit 2."""
    from .._errors import DspeqError

    def show_warning(message, category, filename, lineno, file=None, line=None):
        print(f"dspeq: warning: {message}", file=sys.stderr)

    warnings.showwarning = show_warning
    try:
        return int(args.func(args) or 0)
    except DspeqError as exc:
        return fail(str(exc))
    except (FileNotFoundError, PermissionError, IsADirectoryError, NotADirectoryError) as exc:
        return fail(f"{exc.strerror}: {exc.filename!r}")
    except KeyboardInterrupt:
        return fail("interrupted", 130)
    except BrokenPipeError:
        # The reader (e.g. `| head`) went away: stop quietly, as other command-line tools do.
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 141


def add_curve_args(parser: argparse.ArgumentParser, positional: bool = True) -> None:
    """CURVE plus ``--speed``, ``--from`` and ``--reference-hz``."""
    if positional:
        parser.add_argument("curve", metavar="CURVE",
                            help="catalog name (see `dspeq curves`), 'tc:ZEROS/POLES' in µs "
                                 "(e.g. tc:318/3180,75), 'disc:TURNOVER,ROLLOFF[,SHELF]', or an "
                                 "expression in s (e.g. '(1+s*318u)/((1+s*3180u)(1+s*75u))')")
    parser.add_argument("--speed", type=float, default=1.0, metavar="R",
                        help="transfer speed / recorded speed (2 = a 7.5 ips tape played at 15 ips); "
                             "every corner frequency of CURVE is multiplied by R (default 1)")
    parser.add_argument("--from", dest="from_curve", metavar="CURVE",
                        help="playback curve the transfer machine already applied; the result is "
                             "the correction CURVE / FROM")
    parser.add_argument("--reference-hz", type=float, default=None, metavar="HZ",
                        help="frequency where the curve is 0 dB (default 1000)")


def curve_from_args(args: argparse.Namespace):
    """The Curve described by CURVE, ``--speed``, ``--from`` and ``--reference-hz``."""
    from ..spec import curve

    return curve(args.curve, speed=args.speed, from_curve=args.from_curve,
                 reference_hz=args.reference_hz)


def add_design_args(parser: argparse.ArgumentParser, method: bool = True) -> None:
    """``--rate``, ``--method`` and ``--lf-limit``."""
    parser.add_argument("--rate", type=float, required=True, metavar="HZ", help="sample rate in Hz")
    if method:
        parser.add_argument("--method", default="fit", metavar="M",
                            help="fit (default), bilinear, matched-z or closed-form")
    parser.add_argument("--lf-limit", type=float, default=None, metavar="HZ",
                        help="frequency that replaces a pole at s = 0 (default 3 Hz)")
    parser.add_argument("--oversample", default="1", metavar="N",
                        help="run the design at N times the rate between two linear-phase FIR "
                             "low-passes: 1 (off, default), 2 or 4; closer phase at 44.1/48 kHz")


def oversample_factor(text: Any) -> int:
    """The ``--oversample`` value as an int: 1 (off) or one of the offered factors."""
    from .._errors import DesignError
    from ..oversample import RUN_FACTORS, is_factor

    try:
        factor = int(str(text).strip())
    except ValueError:
        factor = None
    if not is_factor(factor, allow_off=True):
        raise DesignError(f"--oversample must be one of {', '.join(map(str, RUN_FACTORS))}, got {text!r}")
    return factor


def design_from_args(args: argparse.Namespace, method: str | None = None, oversample: int | None = None,
                     **options: Any):
    """The Design (or OversampledDesign) for the parsed curve/rate/method/oversample arguments."""
    from ..design import DEFAULT_LF_LIMIT_HZ, design
    from ..oversample import design_oversampled

    lf = DEFAULT_LF_LIMIT_HZ if args.lf_limit is None else args.lf_limit
    factor = oversample_factor(args.oversample) if oversample is None else oversample
    if factor > 1:
        return design_oversampled(curve_from_args(args), args.rate, factor, method or args.method,
                                  lf_limit_hz=lf, **options)
    return design(curve_from_args(args), args.rate, method or args.method, lf_limit_hz=lf, **options)


def print_table(rows: list[list[str]], header: list[str], file=None) -> None:
    """Print a plain left-aligned text table."""
    out = file or sys.stdout
    widths = [max(len(str(x)) for x in col) for col in zip(header, *rows, strict=True)]
    for row in [header, ["-" * w for w in widths], *rows]:
        print("  ".join(str(x).ljust(w) for x, w in zip(row, widths, strict=True)).rstrip(), file=out)
