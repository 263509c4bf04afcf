"""Start-up time of the ``dspeq`` command line, and what each command imports.

Each command runs in a fresh interpreter (as a user would start it), several
times; the table gives the median wall time and the heavy modules the
command loaded (numba, dask, matplotlib, soundfile, any scipy module). The
time of a bare ``python -c pass`` is the floor; the import times of
scipy.signal and scipy.optimize, which the design path no longer needs
(dspeq/_zpk.py, dspeq/_lsq.py), are measured on their own for comparison.
Target: ``--help``, ``curves`` and ``design`` within 0.5 s on an idle machine.

Usage::

    python benchmarks/bench_startup.py [--runs 7] [--markdown FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

__all__ = ["main", "startup_table"]

HEAVY = ("numba", "dask", "distributed", "matplotlib", "soundfile", "tqdm", "scipy", "scipy.signal",
         "scipy.optimize")

#: (label, arguments of ``dspeq``); None runs ``python -c pass``.
COMMANDS = [
    ("python -c pass (interpreter alone)", None),
    ("dspeq --help", ["--help"]),
    ("dspeq curves", ["curves"]),
    ("dspeq design riaa --rate 48000 (default: fit)", ["design", "riaa", "--rate", "48000"]),
    ("dspeq design riaa --rate 48000 --method bilinear",
     ["design", "riaa", "--rate", "48000", "--method", "bilinear"]),
    ("dspeq design riaa-iec --rate 44100 --format c (fit, 3 sections)",
     ["design", "riaa-iec", "--rate", "44100", "--format", "c"]),
    ("dspeq batch --help", ["batch", "--help"]),
]

_RUNNER = """
import atexit, contextlib, io, json, sys
def report():
    sys.__stderr__.write("MODULES " + json.dumps([m for m in {heavy!r} if m in sys.modules]) + "\\n")
atexit.register(report)
from dspeq.cli import main
with contextlib.redirect_stdout(io.StringIO()):
    code = main(sys.argv[1:])
sys.exit(code)
"""

_IMPORT = "import time; t = time.perf_counter(); import {module}; print(time.perf_counter() - t)"


def _run(args: list[str] | None, env: dict) -> tuple[float, list[str]]:
    code = "pass" if args is None else _RUNNER.format(heavy=HEAVY)
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", code, *(args or [])], cwd=ROOT, env=env,
                          capture_output=True, text=True)
    wall = time.perf_counter() - start
    modules: list[str] = []
    for line in done.stderr.splitlines():
        if line.startswith("MODULES "):
            modules = json.loads(line[8:])
    if done.returncode not in (0, None):
        raise RuntimeError(f"dspeq {' '.join(args or [])} failed: {done.stderr[-500:]}")
    return wall, modules


def startup_table(runs: int = 7) -> list[str]:
    """Markdown rows: median wall time per command, and import times of scipy modules."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    rows = [
        f"### Command start-up (fresh interpreter each time, median of {runs}, wall time)",
        "",
        "Target: `--help`, `curves` and `design` within 0.5 s on an idle machine.",
        "",
        "| command | median (s) | min–max (s) | heavy modules imported |",
        "|---|---:|---:|---|",
    ]
    for label, args in COMMANDS:
        walls, modules = [], []
        for _ in range(runs):
            wall, modules = _run(args, env)
            walls.append(wall)
        rows.append(f"| {label} | {statistics.median(walls):.2f} | {min(walls):.2f}–{max(walls):.2f} "
                    f"| {', '.join(modules) or 'none'} |")
        print(rows[-1], file=sys.stderr, flush=True)
    rows += ["", "| import alone (fresh interpreter) | median (s) |", "|---|---:|"]
    for module in ("numpy", "scipy.signal", "scipy.optimize", "dspeq", "dspeq.cli"):
        times = [float(subprocess.run([sys.executable, "-c", _IMPORT.format(module=module)], cwd=ROOT,
                                      env=env, capture_output=True, text=True, check=True).stdout)
                 for _ in range(max(3, runs // 2))]
        rows.append(f"| `import {module}` | {statistics.median(times):.2f} |")
    return rows


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7)
    parser.add_argument("--markdown", type=Path, help="also write the table to this file")
    args = parser.parse_args(argv)
    text = "\n".join(startup_table(args.runs)) + "\n"
    print(text)
    if args.markdown:
        args.markdown.write_text(text)


if __name__ == "__main__":
    main()
