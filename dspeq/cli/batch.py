"""The ``batch`` sub-command: process a whole folder of flat transfers unattended.

``dspeq batch JOB.toml`` runs a job file; ``dspeq batch INPUT_DIR OUTPUT_DIR
--curve NAME`` is the quick form (one curve for every audio file).  Exit
status: 0 when every file was done or skipped, 1 when any file failed, 2 for
a bad job or command line.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ._common import CAUTION, add_curve_args, fail

__all__ = ["register", "register_summary", "cmd_batch", "settings_from_args", "COMMAND"]

#: The sub-command this module adds.
COMMAND = "batch"
_SUMMARY = "de-emphasize a folder of transfers (job file or quick form)"

_PROCESSING = ("curve", "from_curve", "reference_hz", "method", "lf_limit", "gain", "ceiling",
               "output_format", "subtype", "seed", "manifest", "restore_speed", "output_rate", "oversample")


def register_summary(sub: argparse._SubParsersAction) -> None:
    """Add only the name and summary of ``batch`` (when another command runs: no batch import)."""
    sub.add_parser(COMMAND, help=_SUMMARY)


def register(sub: argparse._SubParsersAction) -> None:
    """Add the ``batch`` command to the ``dspeq`` parser."""
    from ..batch.audio import OUTPUT_FORMATS, SUBTYPES
    from ..batch.job import DEFAULT_CEILING_DBFS, Settings

    d = Settings()
    p = sub.add_parser(
        COMMAND, help=_SUMMARY,
        description="Process every audio file of an input folder into a mirrored output folder, "
                    "never touching the originals, with a JSON Lines manifest of what was done. "
                    "Either JOB.toml (see batch/README.md) or INPUT_DIR OUTPUT_DIR --curve CURVE.",
        epilog=CAUTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("paths", nargs="+", metavar="JOB.toml | INPUT_DIR OUTPUT_DIR",
                   help="a job file, or the input and output folders")
    p.add_argument("--curve", metavar="CURVE", help="quick form: the curve for every file "
                   "(catalog name, tc:ZEROS/POLES, disc:TURNOVER,ROLLOFF[,SHELF] or an expression in s)")
    add_curve_args(p, positional=False)
    p.add_argument("--method", default=None, metavar="M", help=f"design method (default {d.method})")
    p.add_argument("--lf-limit", type=float, default=None, metavar="HZ",
                   help=f"frequency replacing an ideal integrator (default {d.lf_limit_hz:g})")
    p.add_argument("--oversample", default=None, metavar="N",
                   help="run the design at N times each file's rate between two linear-phase FIR "
                        "low-passes, their latency removed: 1 (off, default), 2 or 4")
    p.add_argument("--gain", default=None, metavar="DB",
                   help="fixed gain in dB, or 'auto' (default): integer output gets the largest "
                        "0.1 dB step that keeps the peak under --ceiling (a first pass measures it); "
                        "float output gets 0 dB")
    p.add_argument("--ceiling", type=float, default=None, metavar="DBFS",
                   help=f"highest output peak for the automatic gain (default {DEFAULT_CEILING_DBFS:g})")
    p.add_argument("--output-format", default=None, choices=("same", *OUTPUT_FORMATS),
                   help="output container (default same as the input; WAV over 4 GiB becomes RF64)")
    p.add_argument("--subtype", default=None, choices=("same", *SUBTYPES),
                   help="output encoding (default same as the input)")
    p.add_argument("--seed", type=int, default=None, metavar="N",
                   help=f"base dither seed (default {d.dither_seed}); each file's seed is derived "
                        "from it and the file's path, and recorded")
    p.add_argument("--restore-speed", action="store_true", default=None,
                   help="write the output at the recorded speed: the samples unchanged, labelled with "
                        "the rate fs / R of --speed R (lossless; fs / R must be a whole number of Hz)")
    p.add_argument("--output-rate", type=float, default=None, metavar="HZ",
                   help="resample the output to HZ (after --restore-speed), with soxr "
                        "(pip install 'dspeq[resample]')")
    p.add_argument("--manifest", metavar="PATH",
                   help="quick form: manifest file (default OUTPUT_DIR/dspeq-manifest.jsonl)")
    p.add_argument("--output-dir", metavar="DIR", help="job file: write to DIR instead of the job's output")
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="worker processes (default: the job's, else one per core)")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="run the files on a Dask distributed cluster (e.g. tcp://host:8786)")
    where.add_argument("--cluster", choices=("local",),
                       help="'local': start a Dask cluster on this machine (--workers processes)")
    p.add_argument("--dry-run", action="store_true", help="print the plan and exit; nothing is written")
    bar = p.add_mutually_exclusive_group()
    bar.add_argument("--progress", dest="progress", action="store_true", default=None,
                     help="show the progress bar (default when stderr is a terminal)")
    bar.add_argument("--no-progress", dest="progress", action="store_false")
    p.set_defaults(func=cmd_batch)


def _gain(text: str | None) -> float | None:
    from .._errors import JobError

    if text is None or text.strip().lower() == "auto":
        return None
    try:
        return float(text)
    except ValueError:
        raise JobError(f"--gain must be a number of dB or 'auto', got {text!r}") from None


def settings_from_args(args: argparse.Namespace):
    """The quick form's Settings: options given, else the shared defaults."""
    import dataclasses

    from ..batch.job import Settings
    from ._common import oversample_factor

    given = {"curve": args.curve, "speed": args.speed, "from_curve": args.from_curve,
             "reference_hz": args.reference_hz, "method": args.method, "lf_limit_hz": args.lf_limit,
             "gain_db": _gain(args.gain), "ceiling_dbfs": args.ceiling,
             "output_format": args.output_format, "subtype": args.subtype, "dither_seed": args.seed,
             "restore_speed": args.restore_speed, "output_rate_hz": args.output_rate,
             "oversample": None if args.oversample is None else oversample_factor(args.oversample)}
    return dataclasses.replace(Settings(), **{k: v for k, v in given.items() if v is not None})


def _job(args: argparse.Namespace):
    from .._errors import JobError
    from ..batch.job import load_job, quick_job

    if len(args.paths) == 1:
        given = [name for name in _PROCESSING if getattr(args, name, None) is not None]
        if args.speed != 1.0:
            given.append("speed")
        if given:
            raise JobError(f"with a job file, set {', '.join('--' + g.replace('_', '-') for g in given)} "
                           "in the job file instead")
        return load_job(args.paths[0], output_root=args.output_dir)
    if len(args.paths) != 2:
        raise JobError(f"expected JOB.toml or INPUT_DIR OUTPUT_DIR, got {len(args.paths)} paths")
    if args.output_dir:
        raise JobError("--output-dir is for job files; give OUTPUT_DIR instead")
    if Path(args.paths[0]).is_file():
        raise JobError(f"{args.paths[0]!r} is a file; the quick form needs INPUT_DIR OUTPUT_DIR")
    return quick_job(args.paths[0], args.paths[1], settings_from_args(args), manifest=args.manifest)


def _item_origin(t) -> str:
    if not t.item:
        return ""
    return f"; {t.item['list']} row {', '.join(str(r['row']) for r in t.item['rows'])}"


def _print_checks(p, file=None) -> None:
    if p.items is not None:
        for line in p.items.lines():
            print(f"  items: {line}", file=file or sys.stdout)


def _print_plan(p) -> None:
    job = p.job
    print(f"job:      {job.source}\ninput:    {job.input_root}\noutput:   {job.output_root}\n"
          f"manifest: {job.manifest_path}")
    for t in p.tasks:
        rel_out = Path(t.output_path).relative_to(job.output_root).as_posix()
        origin = f"rule {t.rule}" if t.rule else ("items" if t.item else "defaults")
        state = f"  REFUSED: {t.error}" if t.error else ""
        print(f"  {t.rel} -> {rel_out}  [{origin}] {t.settings.describe()}; "
              f"{t.duration_s:.1f} s{_item_origin(t)}{state}")
    for rel in p.unmatched:
        if p.items is None:
            print(f"  {rel}: no rule matches; not processed")
    _print_checks(p)
    for note in p.notices:
        print(f"  note: {note}")
    print(f"{len(p.tasks)} file(s), {p.total_duration_s / 3600:.3f} h of audio; "
          f"{len(p.unmatched)} without a rule")


def _reporter(show_each: bool):
    from tqdm import tqdm

    def report(res) -> None:
        if res.status == "failed":
            tqdm.write(f"FAILED {res.rel}: {res.error}", file=sys.stderr)
        elif show_each:
            extra = f" gain {res.gain_db:+.1f} dB" if res.gain_db is not None else ""
            extra += f", {res.clips} clipped samples" if res.clips else ""
            tqdm.write(f"{res.status} {res.rel}{extra}", file=sys.stdout)
    return report


def cmd_batch(args: argparse.Namespace) -> int:
    """Run (or, with --dry-run, plan) a batch; 1 if any file failed."""
    from ..batch.job import plan
    from ..batch.run import run_job

    print(CAUTION, file=sys.stderr)
    job = _job(args)
    the_plan = plan(job)
    if args.dry_run:
        _print_plan(the_plan)
        return 0
    _print_checks(the_plan, sys.stderr)          # the item list check, before anything is processed
    progress = sys.stderr.isatty() if args.progress is None else args.progress
    scheduler = args.scheduler or args.cluster
    try:
        summary = run_job(job, workers=args.workers, scheduler=scheduler, progress=progress,
                          on_result=_reporter(show_each=not progress), the_plan=the_plan)
    except OSError as exc:
        return fail(f"cannot write the output folder or manifest ({exc.strerror or exc}): "
                    f"{str(exc.filename or job.manifest_path)!r}")
    for note in the_plan.notices:
        print(f"note: {note}", file=sys.stderr)
    print(summary.text())
    if summary.report_path:
        print(f"report: {summary.report_path}")
    if summary.report_error:
        print(f"dspeq: error: the report could not be written ({summary.report_error})", file=sys.stderr)
    return 1 if summary.failed or summary.report_error else 0
