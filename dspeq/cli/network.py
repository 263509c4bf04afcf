"""``dspeq network`` (network text → curve, tolerance spread) and ``dspeq realize`` (curve → network)."""

from __future__ import annotations

import argparse
import sys
from dataclasses import replace
from pathlib import Path

from ._common import add_curve_args, curve_from_args, print_table

__all__ = ["register", "cmd_network", "cmd_realize"]

#: Frequencies of the printed tables (Hz): the usual RIAA table points.
TABLE_HZ = (20.0, 50.0, 100.0, 200.0, 500.0, 1000.0, 2000.0, 5000.0, 10000.0, 15000.0, 20000.0)


def register(subparsers) -> None:
    """Add the ``network`` and ``realize`` sub-commands."""
    p = subparsers.add_parser(
        "network", help="curve of an RC network (playback stage) described in a text file",
        description="Exact curve of an analog RC network written in dspeq's network text "
                    "(see docs/networks.md): time constants, deviation from a standard curve, "
                    "component tolerance spread (seeded Monte Carlo) and, with --rate, a digital design.")
    p.add_argument("file", metavar="FILE", help="network text file ('-' reads standard input)")
    p.add_argument("--against", metavar="CURVE", help="standard curve to compare with, e.g. riaa")
    p.add_argument("--reference-hz", type=float, default=1000.0, metavar="HZ",
                   help="frequency where shapes are aligned (default 1000)")
    p.add_argument("--tolerance", metavar="PCT",
                   help="tolerance of every part that gives none in the file, e.g. 1%%")
    p.add_argument("--draws", type=int, default=2000, metavar="N", help="Monte Carlo draws (default 2000)")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0)")
    p.add_argument("--distribution", choices=("uniform", "normal"), default="uniform",
                   help="uniform within ±tolerance (default) or normal with tolerance = 3 sigma")
    p.add_argument("--absolute", action="store_true",
                   help="spread of the level itself, not of the shape aligned at --reference-hz")
    p.add_argument("--rate", type=float, default=None, metavar="HZ", help="also design it at this rate")
    p.add_argument("--method", default="fit", metavar="M", help="design method (default fit)")
    p.add_argument("--lf-limit", type=float, default=None, metavar="HZ",
                   help="frequency that replaces a pole at s = 0 in the design (default 3 Hz)")
    p.add_argument("--plot", metavar="PNG", help="write a figure (needs matplotlib: the plot extra)")
    p.set_defaults(func=cmd_network)

    r = subparsers.add_parser(
        "realize", help="RC network (component values) for a curve",
        description="Synthesize an RC stage whose ratio of impedances is CURVE (Foster forms), scale "
                    "it into practical component ranges, round to an E series (IEC 60063) and report "
                    "the deviation. Component values are a starting point for qualified builders.")
    add_curve_args(r)
    r.add_argument("--topology", choices=("inverting", "noninverting", "divider"), default="inverting",
                   help="stage type (default inverting: H = -Z_feedback/Z_input)")
    r.add_argument("--series", default="E24", metavar="E",
                   help="E series for resistors: E3…E192, or 'none' for exact values (default E24)")
    r.add_argument("--c-series", default="same", metavar="E",
                   help="E series for capacitors, or 'none' (default: the same as --series)")
    r.add_argument("--r-range", nargs=2, default=("1k", "10M"), metavar=("LO", "HI"),
                   help="resistor range in ohms (default 1k 10M; common practice, no source)")
    r.add_argument("--c-range", nargs=2, default=("100p", "100n"), metavar=("LO", "HI"),
                   help="capacitor range in farads (default 100p 100n; common practice, no source)")
    r.add_argument("--gain-db", type=float, default=None, metavar="DB",
                   help="stage level at the reference frequency (default: see docs/networks.md)")
    r.add_argument("--form", choices=("auto", "foster1", "foster2"), default="auto",
                   help="Foster form of the arms (default: try both)")
    r.add_argument("--output", metavar="FILE", help="write the network text to FILE")
    r.add_argument("--plot", metavar="PNG", help="write a figure (needs matplotlib: the plot extra)")
    r.set_defaults(func=cmd_realize)


# ---------------------------------------------------------------------------- network


def _read_network(path: str):
    from .._errors import CurveError, ExpressionError
    from ..network import parse_network

    text = sys.stdin.read() if path == "-" else Path(path).read_text(encoding="utf-8")
    try:
        net = parse_network(text)
    except ExpressionError as exc:
        raise CurveError(f"{path}: {exc}") from None
    return net if net.name != "network" or path == "-" else replace(net, name=Path(path).stem)


def _tolerance(text: str | None) -> float | None:
    from .._errors import CurveError
    from ..network import parse_tolerance

    if text is None:
        return None
    try:
        return parse_tolerance(text if text.strip().endswith("%") else f"{text}%")
    except CurveError:
        raise CurveError(f"--tolerance {text!r} must be a percentage between 0 and 100, e.g. 1%") from None


def _has_tolerance(net, args) -> bool:
    return args.tolerance is not None or bool(net.tolerance) or any(p.tolerance for p in net.parts)


def _db(x: float) -> str:
    return f"{round(x, 3) + 0.0:+.3f}"


def cmd_network(args: argparse.Namespace) -> int:
    """Print a network's curve, its deviation from a standard, its tolerance spread and a design."""
    import numpy as np

    from ..network import tolerance_spread

    tolerance = _tolerance(args.tolerance)          # bad input fails before any output
    net = _read_network(args.file)
    curve = net.curve(source=f"network file {args.file}")
    ref = float(args.reference_hz)
    print(f"network: {net.name}  ({len(net.parts)} parts, {len(net.stages)} stage(s))")
    for i, stage_text in enumerate(net.describe().split(" | then "), start=1):
        print(f"  stage {i}: {stage_text}")
    _print_roots(curve)
    level = float(curve.magnitude_db(ref))
    polarity = "inverted" if curve.gain < 0 else "kept"
    print(f"level: {level:+.2f} dB at {ref:g} Hz (polarity {polarity})")
    f = np.array(TABLE_HZ)
    rows = [[f"{x:g}", _db(v)] for x, v in zip(f, curve.magnitude_db(f) - level, strict=True)]
    header = ["Hz", "dB re ref"]
    against = None
    if args.against:
        from ..spec import curve as parse_spec

        against = parse_spec(args.against, reference_hz=ref)
        diff = (curve.magnitude_db(f) - level) - against.magnitude_db(f)
        rows = [row + [_db(a), _db(d)] for row, a, d in zip(rows, against.magnitude_db(f), diff, strict=True)]
        header += [against.name, "difference"]
    print_table(rows, header)
    if against is not None:
        grid = np.geomspace(20.0, 20_000.0, 2000)
        dev = (curve.magnitude_db(grid) - level) - against.magnitude_db(grid)
        at = int(np.argmax(np.abs(dev)))
        print(f"deviation from {against.name}: {abs(dev[at]):.3f} dB max at {grid[at]:.0f} Hz "
              f"(20 Hz - 20 kHz, shapes aligned at {ref:g} Hz)")
    if _has_tolerance(net, args):
        spread = tolerance_spread(net, np.array(TABLE_HZ), tolerance=tolerance,
                                  draws=args.draws, seed=args.seed, distribution=args.distribution,
                                  reference_hz=None if args.absolute else ref)
        _print_spread(spread)
    if args.rate is not None:
        _print_design(curve, args)
    if args.plot:
        _plot_network(args.plot, net, curve, against, args, ref)
        print(f"figure: {args.plot}")
    return 0


def _print_roots(curve) -> None:
    from .._errors import CurveError

    try:
        zs, ps = curve.time_constants()
    except CurveError:  # complex roots cannot occur for R and C; keep the generic form
        print(f"roots: {curve.describe_roots()}")
        return
    fmt = ", ".join
    print(f"time constants (µs): zeros {fmt(f'{z:.6g}' for z in zs) or '-'}; "
          f"poles {fmt(f'{p:.6g}' for p in ps) or '-'}   [{curve.tc_spec()}]")


def _print_spread(spread) -> None:
    lo, hi = spread.percentiles
    what = "level" if spread.reference_hz is None else f"shape (aligned at {spread.reference_hz:g} Hz)"
    tols = sorted({f"{t * 100:g}%" for t in spread.tolerances.values() if t > 0})
    print(f"\ntolerance spread of the {what}: {spread.draws} draws ({spread.distribution}, seed "
          f"{spread.seed}), tolerances {', '.join(tols)}")
    rows = []
    for i, f in enumerate(spread.freqs):
        corner = "-" if spread.corner_worst_db is None else f"{spread.corner_worst_db[i]:.3f}"
        rows.append([f"{f:g}", _db(spread.nominal_db[i]), _db(spread.low_db[i]), _db(spread.high_db[i]),
                     f"{spread.worst_db[i]:.3f}", corner])
    print_table(rows, ["Hz", "nominal dB", f"p{lo:g} dB", f"p{hi:g} dB", "worst draw", "worst corner"])
    print(f"worst-case deviation from nominal: {spread.max_worst_db:.3f} dB at {spread.f_at_worst:g} Hz")


def _print_design(curve, args) -> None:
    from ..check import check
    from ..design import DEFAULT_LF_LIMIT_HZ, design

    lf = DEFAULT_LF_LIMIT_HZ if args.lf_limit is None else args.lf_limit
    d = design(curve, args.rate, args.method, lf_limit_hz=lf)
    dev = check(d)
    print(f"\ndesign: {d.method} at {d.fs:g} Hz, {len(d.sos)} section(s); magnitude error "
          f"{dev.max_abs_db:.4g} dB max at {dev.f_at_max:.0f} Hz ({dev.band[0]:g}-{dev.band[1]:g} Hz)")
    for row in d.sos:
        print("  sos " + " ".join(f"{c:+.12e}" for c in row))


# ---------------------------------------------------------------------------- realize


def cmd_realize(args: argparse.Namespace) -> int:
    """Synthesize, scale, round and report a network for a curve."""
    from ..expr import parse_si_number
    from ..realize import BUILD_CAUTION, realize

    def series(text):
        return None if text.lower() in ("none", "exact") else text

    target = curve_from_args(args)
    ref = 1000.0 if args.reference_hz is None else args.reference_hz
    result = realize(target, topology=args.topology, series=series(args.series),
                     c_series=series(args.c_series),
                     r_range=tuple(parse_si_number(x) for x in args.r_range),
                     c_range=tuple(parse_si_number(x) for x in args.c_range),
                     gain_db=args.gain_db, reference_hz=ref, form=args.form)
    _print_parts(result)
    print()
    print(result.text, end="")
    print(f"\nshape deviation from {result.target.name}: {result.max_deviation_db:.3f} dB max at "
          f"{result.f_at_max:.0f} Hz ({result.freqs[0]:g}-{result.freqs[-1]:g} Hz); "
          f"level error {result.level_error_db:+.3f} dB at {ref:g} Hz")
    for msg in result.out_of_range:
        print(f"out of range: {msg}")
    for note in result.notes:
        print(f"note: {note}")
    if args.output:
        Path(args.output).write_text(result.text, encoding="utf-8")
        print(f"network text written to {args.output}")
    if args.plot:
        _plot_realization(args.plot, result)
        print(f"figure: {args.plot}")
    print()
    print(BUILD_CAUTION)
    return 0


def _print_parts(result) -> None:
    from ..network import format_value

    rows = []
    for exact, final in zip(result.exact.parts, result.network.parts, strict=True):
        unit = "\u03a9" if final.kind == "R" else "F"
        change = f"{(final.value / exact.value - 1) * 100:+.2f}%"
        ok = "yes" if result.in_range(final) else "NO"
        exact_text = format_value(float(f"{exact.value:.5g}")) + unit
        rows.append([final.name, exact_text, format_value(final.value), change, ok])
    series = " / ".join(s or "exact" for s in result.series)
    print(f"curve {result.target.name!r} realized as: {result.topology} stage; values in {series} "
          f"(impedance factor {result.scale:.4g})")
    print_table(rows, ["part", "exact", "chosen", "change", "in range"])


# ---------------------------------------------------------------------------- plots


def _two_panels():
    """A pyplot-free figure with two panels sharing the frequency axis."""
    from ..plot import new_figure

    fig = new_figure((8, 6))
    return (fig, *fig.subplots(2, 1, sharex=True))


def _plot_network(path: str, net, curve, against, args, ref: float) -> None:
    import numpy as np

    from ..network import tolerance_spread

    f = np.geomspace(20.0, 20_000.0, 200)
    nominal = curve.magnitude_db(f) - float(curve.magnitude_db(ref))
    fig, top, bottom = _two_panels()
    top.semilogx(f, nominal, label=f"{net.name} (0 dB at {ref:g} Hz)")
    if against is not None:
        top.semilogx(f, against.magnitude_db(f), "--", label=against.name)
        bottom.semilogx(f, nominal - against.magnitude_db(f), "k", lw=1, label=f"minus {against.name}")
    if _has_tolerance(net, args):
        spread = tolerance_spread(net, f, tolerance=_tolerance(args.tolerance), draws=args.draws,
                                  seed=args.seed, distribution=args.distribution, reference_hz=ref)
        bottom.fill_between(f, spread.low_db, spread.high_db, alpha=0.4,
                            label=f"p{spread.percentiles[0]:g}-p{spread.percentiles[1]:g} over tolerances")
        bottom.semilogx(f, spread.worst_db, ":", color="C3", label="worst draw (±)")
        bottom.semilogx(f, -spread.worst_db, ":", color="C3")
    top.set(ylabel="dB", title=f"network {net.name}")
    bottom.set(xlabel="frequency (Hz)", ylabel="deviation (dB)")
    for ax in (top, bottom):
        ax.grid(True, which="both", alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend()
    fig.savefig(path, dpi=120, bbox_inches="tight")


def _plot_realization(path: str, result) -> None:
    import numpy as np

    fig, top, bottom = _two_panels()
    ref = result.reference_hz
    target = result.target.magnitude_db(result.freqs) - float(result.target.magnitude_db(ref))
    top.semilogx(result.freqs, target, label=f"{result.target.name} (target)")
    top.semilogx(result.freqs, target + result.deviation_db, "--", label="rounded network")
    top.set(ylabel="dB", title=f"{result.topology} stage for {result.target.name}")
    top.legend()
    bottom.semilogx(result.freqs, result.deviation_db)
    bottom.axhline(0.0, color="0.5", lw=0.8)
    bottom.set(xlabel="frequency (Hz)", ylabel="deviation (dB)")
    for ax in (top, bottom):
        ax.grid(True, which="both", alpha=0.3)
    bottom.set_ylim(np.array([-1, 1]) * max(0.05, 1.2 * result.max_deviation_db))
    fig.savefig(path, dpi=120, bbox_inches="tight")
