"""Core sub-commands: ``curves``, ``design``, ``check``, ``compare`` and ``verify``."""

from __future__ import annotations

import argparse
import json
import math
import sys

from ._common import (
    add_curve_args,
    add_design_args,
    curve_from_args,
    design_from_args,
    fail,
    oversample_factor,
    print_table,
)

__all__ = ["register"]


def register(sub: argparse._SubParsersAction) -> None:
    """Add the core commands to the ``dspeq`` parser."""
    p = sub.add_parser("curves", help="list the built-in playback curves",
                       description="List the built-in curves: name, kind, time constants, source.")
    p.add_argument("--format", choices=("table", "json"), default="table")
    p.add_argument("--kind", choices=("disc", "tape"), help="only curves of this kind")
    p.set_defaults(func=cmd_curves)

    p = sub.add_parser("design", help="print the digital coefficients (SOS) of a curve",
                       description="Design a curve at a sample rate and print its coefficients.")
    add_curve_args(p)
    add_design_args(p)
    p.add_argument("--format", choices=("json", "csv", "c"), default="json",
                   help="json (sos, rate, deviation), csv (one section per line) or c (C99 header; "
                        "not for --oversample)")
    p.add_argument("--name", help="identifier prefix for --format c")
    p.set_defaults(func=cmd_design)

    p = sub.add_parser("check", help="measure a design's deviation from the analog curve",
                       description="Deviation of a design from its analog curve; exit 1 when the "
                                   "largest magnitude error exceeds --tolerance.")
    add_curve_args(p)
    add_design_args(p)
    _add_band(p)
    p.add_argument("--tolerance", type=float, default=0.01, metavar="DB",
                   help="largest allowed magnitude error in dB (default 0.01)")
    p.add_argument("--format", choices=("table", "json"), default="table")
    p.add_argument("--plot", metavar="PNG", help="also draw curve, error and phase error to PNG")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("compare", help="every design method side by side",
                       description="Every discretization method for one curve and rate: largest "
                                   "error, where, phase error after delay removal, order.")
    add_curve_args(p)
    add_design_args(p, method=False)
    _add_band(p)
    p.add_argument("--format", choices=("table", "json"), default="table")
    p.add_argument("--plot", metavar="PNG", help="also draw all methods to PNG")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("verify", help="prove a design by measuring it through the real filter path",
                       description="Feed a unit impulse and a logarithmic sweep through the Equalizer "
                                   "(the batch's kernel, block size, float32 and float64), measure the "
                                   "response by FFT and compare it with the analytic design and the "
                                   "analog curve. Exit 1 unless they agree within 0.001 dB.")
    add_curve_args(p)
    add_design_args(p)
    _add_band(p)
    p.add_argument("--format", choices=("table", "json"), default="table")
    p.set_defaults(func=cmd_verify)


def _add_band(p: argparse.ArgumentParser) -> None:
    p.add_argument("--band", nargs=2, type=float, default=(20.0, 20000.0), metavar=("LO", "HI"),
                   help="frequency band in Hz (default 20 20000; upper edge limited to 0.95·Nyquist)")


def _tc_text(values) -> str:
    return ",".join("inf" if v is None or math.isinf(v) else f"{v:.4g}" for v in values) or "-"


def cmd_curves(args: argparse.Namespace) -> int:
    from ..spec import curves

    rows = [c for c in curves() if args.kind in (None, c["kind"])]
    if args.format == "json":
        json.dump(rows, sys.stdout, indent=2, default=str)
        print()
        return 0
    table = [[c["name"], c["kind"], _tc_text(c["zeros_us"]), _tc_text(c["poles_us"]),
              c["source"].split(";")[0]] for c in rows]
    print_table(table, ["name", "kind", "zeros µs", "poles µs", "source (full text: --format json)"])
    return 0


def _oversampled_csv(d) -> str:
    """CSV of an oversampled run: the inner sections, then the FIR taps of each x2 stage."""
    head = (f"# dspeq oversampled run x{d.factor}: audio at {d.fs:g} Hz, sections at {d.inner.fs:g} Hz, "
            f"latency {d.latency} frames; FIR rows: the same taps interpolate (times 2) and decimate")
    lines = [head, "part,rate_hz,index,b0,b1,b2,a0,a1,a2"]
    lines += [f"sos,{d.inner.fs:g},{i}," + ",".join(f"{v:.17g}" for v in row)
              for i, row in enumerate(d.inner.sos)]
    rate = d.fs
    for stage, taps in enumerate(d.taps, 1):
        rate *= 2
        lines += [f"fir{stage},{rate:g},{i},{v:.17g},,,,," for i, v in enumerate(taps)]
    return "\n".join(lines) + "\n"


def cmd_design(args: argparse.Namespace) -> int:
    from .. import export
    from .._errors import DesignError
    from ..oversample import is_oversampled

    d = design_from_args(args)
    over = is_oversampled(d)
    if args.format == "c" and over:
        raise DesignError("--format c cannot hold an oversampled run (FIR and sections at two rates); "
                          "use --format json or csv")
    if args.format == "csv":
        sys.stdout.write(_oversampled_csv(d) if over else export.design_to_csv(d))
    elif args.format == "c":
        sys.stdout.write(export.design_to_c(d, args.name))
    else:
        json.dump(export.design_to_json(d), sys.stdout, indent=2)
        print()
    return 0


def _db(x: float) -> str:
    """dB figure readable at any size: 5 decimals, or 2 significant digits below 0.001 dB."""
    return f"{x:.5f}" if x >= 1e-3 or x == 0 else f"{x:.1e}"


def _summary_rows(dev) -> list[list[str]]:
    s = dev.summary()
    return [["band", f"{s['band_lo_hz']:g}–{s['band_hi_hz']:g} Hz"],
            ["max |error|", f"{_db(s['max_abs_db'])} dB at {s['f_at_max_hz']:.0f} Hz"],
            ["RMS error", f"{_db(s['rms_db'])} dB"],
            ["delay removed", f"{s['delay_samples']:.4f} samples"],
            ["phase error", f"{s['max_phase_deg_to_10k']:.3f}° to 10 kHz, {s['max_phase_deg']:.3f}° in band"],
            ["group delay error", f"{s['max_group_delay_error_us']:.3f} µs"]]


def _oversample_record(d) -> dict:
    """The ``oversample`` entry of a JSON result (factor 1 when off)."""
    from ..oversample import is_oversampled

    if not is_oversampled(d):
        return {"factor": 1}
    return {"factor": d.factor, "inner_rate": d.inner.fs, "latency_frames": d.latency,
            "fir_lengths": [len(h) for h in d.taps]}


def _heading(d) -> str:
    """First line of the text outputs: curve, rate, method, sections, oversampling."""
    from ..oversample import is_oversampled

    text = f"{d.curve.name} at {d.fs:g} Hz, method {d.method}, {d.sections} section(s)"
    if is_oversampled(d):
        text += (f" at {d.inner.fs:g} Hz (oversampled x{d.factor}: FIR of "
                 f"{'+'.join(str(len(h)) for h in d.taps)} taps, latency {d.latency} frames)")
    return text


def cmd_check(args: argparse.Namespace) -> int:
    from ..check import check

    d = design_from_args(args)
    dev = check(d, tuple(args.band))
    if args.format == "json":
        json.dump({"curve": d.curve.name, "rate": d.fs, "method": d.method, "sections": d.sections,
                   "oversample": _oversample_record(d),
                   "tolerance_db": args.tolerance, "ok": dev.ok(args.tolerance), **dev.summary()},
                  sys.stdout, indent=2)
        print()
    else:
        print(_heading(d))
        print_table(_summary_rows(dev), ["measure", "value"])
    if args.plot:
        from ..plot import plot_designs

        plot_designs([d], args.plot, band=tuple(args.band))
        print(f"plot written to {args.plot}", file=sys.stderr)
    if not dev.ok(args.tolerance):
        return fail(f"largest error {dev.max_abs_db:.4g} dB exceeds the tolerance {args.tolerance:g} dB", 1)
    return 0


def cmd_compare(args: argparse.Namespace) -> int:
    import warnings

    from ..check import check
    from ..design import methods

    designs, rows, records = [], [], []
    curve = curve_from_args(args)
    factor = oversample_factor(args.oversample)
    names = sorted(methods(), key=lambda m: m != "fit")      # the default method first
    variants = [(name, name, {}, 1) for name in names]
    variants.insert(names.index("bilinear") + 1, ("bilinear@1k", "bilinear", {"prewarp_hz": 1000.0}, 1))
    if factor > 1:
        variants.insert(1, (f"fit x{factor}", "fit", {}, factor))
    for name, method, options, over in variants:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            d = design_from_args(args, method=method, oversample=over, **options)
        dev = check(d, tuple(args.band))
        designs.append(d)
        rec = {"method": name, "sections": d.sections, "order": d.order,
               "oversample": _oversample_record(d), **dev.summary(),
               "warnings": [str(w.message) for w in caught]}
        records.append(rec)
        rows.append([name, str(d.order), _db(dev.max_abs_db), f"{dev.f_at_max:.0f}",
                     f"{dev.max_phase_below(10_000.0):.3f}", f"{dev.max_phase_deg:.3f}",
                     f"{dev.delay_samples:.3f}"])
    if args.format == "json":
        json.dump({"curve": curve.name, "rate": args.rate, "methods": records}, sys.stdout, indent=2)
        print()
    else:
        print(f"{curve.name} ({curve.describe_roots()}) at {args.rate:g} Hz, "
              f"band {args.band[0]:g}–{args.band[1]:g} Hz")
        print_table(rows, ["method", "order", "max |dB|", "at Hz", "phase° ≤10k", "phase° band",
                           "delay smp"])
        for rec in records:
            for w in rec["warnings"]:
                print(f"note ({rec['method']}): {w}", file=sys.stderr)
    if args.plot:
        from ..plot import plot_designs

        plot_designs(designs, args.plot, band=tuple(args.band))
        print(f"plot written to {args.plot}", file=sys.stderr)
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    from ..check import check
    from ..verify import AGREEMENT_DB, verify

    d = design_from_args(args)
    v = verify(d, tuple(args.band))
    analytic = check(d, tuple(args.band)).max_abs_db
    if args.format == "json":
        json.dump({**v.to_dict(), "oversample": _oversample_record(d), "analytic_max_abs_db": analytic},
                  sys.stdout, indent=2)
        print()
    else:
        print(f"{_heading(d)}; "
              f"streamed in blocks of {v.block_frames} frames; analytic max error {analytic:.5f} dB")
        rows = [[m.signal, m.dtype, f"{m.max_vs_design_db:.2e}", f"{m.max_vs_curve_db:.5f}",
                 f"{m.f_at_max_vs_curve:.0f}", f"{m.analytic_vs_curve_db:.5f}",
                 "yes" if m.agrees else "NO"] for m in v.measurements]
        print_table(rows, ["signal", "type", "|meas-design| dB", "|meas-curve| dB", "at Hz",
                           "analytic dB", f"agrees (≤{AGREEMENT_DB:g} dB)"])
    if not v.ok:
        return fail("measured response does not agree with the analytic design", 1)
    return 0
