"""Design time of the default method ("fit") per curve and rate, against the 100 ms budget.

Each design is timed cold: the in-memory design cache is cleared before every
call, so the optimizer runs in full (best of ``--repeat`` runs, to take out
the noise of a shared machine; the median over the curves is printed too).
The first design of a fresh process also pays for importing the optimizer
(dspeq._fit, numpy only); that one-off cost is reported on its own.

Usage::

    python benchmarks/bench_design.py              # catalog × speed 1, 2 × 5 rates
    python benchmarks/bench_design.py --repeat 1   # quicker, noisier
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import dspeq  # noqa: E402
from dspeq.design import _CACHE  # noqa: E402

__all__ = ["main", "cold_design_time", "first_call_time", "measure_all", "rate_lines"]

RATES = (44100.0, 48000.0, 88200.0, 96000.0, 192000.0)
BUDGET_S = 0.100


def cold_design_time(curve: dspeq.Curve, fs: float, repeat: int) -> tuple[float, int]:
    """Best wall time (s) of ``dspeq.design(curve, fs)`` with an empty cache, and its sections."""
    best = float("inf")
    for _ in range(repeat):
        _CACHE.clear()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            start = time.perf_counter()
            d = dspeq.design(curve, fs)
            best = min(best, time.perf_counter() - start)
    return best, len(d.sos)


def first_call_time() -> float:
    """Wall time of the first design in a fresh interpreter (imports dspeq._fit)."""
    code = ("import time, dspeq; t = time.perf_counter(); dspeq.design('riaa', 44100); "
            "print(time.perf_counter() - t)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=ROOT)
    return float(out.stdout.strip())


def measure_all(repeat: int, row=None) -> tuple[dict[float, list[float]], list[tuple]]:
    """Cold design time of every catalog curve (speed ×1, ×2) at every rate in RATES.

    Returns ({fs: [seconds, ...]}, [(name, speed, fs, seconds) over the budget]); ``row(name,
    speed, cells)`` is called per curve and speed with the formatted cells, if given.
    """
    dspeq.design("riaa", 44100)                                   # warm the imports
    times: dict[float, list[float]] = {fs: [] for fs in RATES}
    over = []
    for entry in dspeq.curves():
        for speed in (1.0, 2.0):
            c = dspeq.curve(entry["name"], speed=speed)
            cells = []
            for fs in RATES:
                t, n = cold_design_time(c, fs, repeat)
                times[fs].append(t)
                cells.append(f"{t * 1e3:.0f} ms ({n})" + (" **over**" if t > BUDGET_S else ""))
                if t > BUDGET_S:
                    over.append((entry["name"], speed, fs, t))
            if row is not None:
                row(entry["name"], speed, cells)
    return times, over


def rate_lines(times: dict[float, list[float]]) -> list[str]:
    """One line per rate: median and largest design time."""
    return [f"{fs / 1000:g} kHz: median {np.median(t) * 1e3:.0f} ms, max {np.max(t) * 1e3:.0f} ms"
            for fs, t in times.items()]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3, help="runs per design; the best is kept")
    args = ap.parse_args(argv)
    print(f"first design in a fresh process (imports dspeq._fit): {first_call_time() * 1e3:.0f} ms")
    print(f"\ncold design time, best of {args.repeat}; budget {BUDGET_S * 1e3:.0f} ms\n")
    print("| curve | speed | " + " | ".join(f"{fs / 1000:g} kHz" for fs in RATES) + " |")
    print("|---|---|" + "---|" * len(RATES))
    times, over = measure_all(args.repeat, lambda name, speed, cells: print(
        f"| {name} | ×{speed:g} | " + " | ".join(cells) + " |"))
    print("\n(sections in parentheses)\n")
    print("\n".join(rate_lines(times)))
    print(f"\n{len(over)} of {sum(len(v) for v in times.values())} designs over the budget"
          + "".join(f"\n  {n} ×{s:g} at {fs / 1000:g} kHz: {t * 1e3:.0f} ms" for n, s, fs, t in over))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
