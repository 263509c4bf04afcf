"""Batch processing against a bare soundfile read + write of the same files.

Writes ``docs/performance.md`` (machine, versions, every figure and ratio),
with the tables of ``bench_kernel.py`` and ``bench_startup.py`` included.

Test material is generated in a temporary folder, never in the repository:
a 10-minute 96 kHz / 24-bit stereo FLAC "flat transfer" (filtered noise and a
tone around -20 dBFS), 8 copies of it, and a 60-minute one for the memory
figures. Everything is measured side by side in the same run, in rounds that
interleave the contenders (the machine may be shared); tables give medians
and ranges. Before each timed run, ``os.sync()`` writes out what earlier runs
left in the page cache, so no run pays for another's writes.

1. Wall time per file, in this process with design and kernels warm:
   bare read + write (int32 blocks of 65536 frames, FLAC 24-bit out) vs
   ``process_task`` with a fixed gain and in the default peak-safe mode.
2. The same through the command line (``dspeq batch ... --workers 1``), one
   fresh process per run: start-up, design and the report included.
3. What each step costs, timed inside one run of each mode.
4. 2 workers vs 1 on the 8 files (fresh processes, fixed gain).
5. Peak resident memory of a child process for 10 and 60 minutes, both modes.

Usage::

    python benchmarks/bench_batch.py            # everything (about 15 minutes)
    python benchmarks/bench_batch.py --quick    # 2-minute files, no 60-minute file
    python benchmarks/bench_batch.py --skip-kernel --skip-startup
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

__all__ = ["main", "make_transfer"]

FS = 96000
BLOCK = 65536
TARGETS = {"fixed": 1.10, "auto": 1.30}


# ----------------------------------------------------------------------------- material
def make_transfer(path: Path, minutes: float, seed: int = 1) -> Path:
    """A stereo 96 kHz / 24-bit FLAC: low-passed noise and a 440 Hz tone, about -20 dBFS."""
    import soundfile as sf
    from scipy import signal

    frames = int(minutes * 60 * FS)
    rng = np.random.default_rng(seed)
    sos = signal.butter(2, 8000, fs=FS, output="sos")
    zi = np.zeros((sos.shape[0], 2, 2))
    path.parent.mkdir(parents=True, exist_ok=True)
    with sf.SoundFile(path, "w", FS, 2, "PCM_24", format="FLAC") as f:
        for start in range(0, frames, 1 << 20):
            n = min(1 << 20, frames - start)
            x, zi = signal.sosfilt(sos, 0.15 * rng.standard_normal((n, 2)), axis=0, zi=zi)
            x += 0.05 * np.sin(2 * np.pi * 440 * (start + np.arange(n)) / FS)[:, None]
            f.write(x.astype(np.float32))
    return path


# ----------------------------------------------------------------------------- contenders
def bare(src: Path, dst: Path) -> None:
    """Read int32 blocks and write them to a 24-bit FLAC: the codec's cost and nothing else."""
    import soundfile as sf

    with sf.SoundFile(src) as s, sf.SoundFile(dst, "w", s.samplerate, s.channels, "PCM_24",
                                              format="FLAC") as o:
        buf = np.empty((BLOCK, s.channels), np.int32)
        while len(block := s.read(BLOCK, dtype="int32", out=buf)):
            o.write(block)


def dspeq_task(src_dir: Path, out_dir: Path, mode: str):
    """A fresh Task for the one file of ``src_dir`` (fixed 0 dB gain or peak-safe)."""
    from dspeq.batch.job import Settings, plan, quick_job

    shutil.rmtree(out_dir, ignore_errors=True)
    settings = Settings(curve="riaa", gain_db=0.0 if mode == "fixed" else None)
    return plan(quick_job(src_dir, out_dir, settings, workers=1)).tasks[0]


def run_dspeq(src_dir: Path, out_dir: Path, mode: str) -> None:
    from dspeq.batch.run import process_task

    result = process_task(dspeq_task(src_dir, out_dir, mode))
    if result.status != "done":
        raise RuntimeError(f"dspeq {mode} failed: {result.error}")


def settle() -> None:
    """Write out every file's pending data before a timed run (outside its timing).

    Without it, one contender's unwritten output (or the material just
    generated) is flushed during the next contender's run and slows its fsync.
    The previous round's output is removed before this, outside the timing
    too, for every contender alike (freeing a 200 MB file took 0.15-0.2 s on
    a KVM guest, inside the bare run's open as truncation, inside dspeq's as
    its output folder's removal).
    """
    os.sync()


def timed(func, *args) -> tuple[float, float]:
    """(wall, CPU of this process incl. its threads) of one call."""
    wall, cpu = time.perf_counter(), time.process_time()
    func(*args)
    return time.perf_counter() - wall, time.process_time() - cpu


def spread(values: list[float], digits: int = 2) -> str:
    return f"{statistics.median(values):.{digits}f} ({min(values):.{digits}f}–{max(values):.{digits}f})"


def warm_up(work: Path) -> None:
    """Both modes once on the short warm-up file: the design for 96 kHz, the kernels compiled or loaded."""
    for mode in ("fixed", "auto"):
        run_dspeq(work / "warm", work / f"out-warm-{mode}", mode)


def per_file_table(work: Path, rounds: int) -> list[str]:
    src_dir = work / "one"
    src = next(src_dir.iterdir())
    warm_up(work)
    results: dict[str, list[tuple[float, float]]] = {"bare": [], "fixed": [], "auto": []}
    for _ in range(rounds):
        (work / "bare.flac").unlink(missing_ok=True)   # outside the timing, as for dspeq's folder
        settle()
        results["bare"].append(timed(bare, src, work / "bare.flac"))
        for mode in ("fixed", "auto"):
            shutil.rmtree(work / f"out-{mode}", ignore_errors=True)
            settle()
            results[mode].append(timed(run_dspeq, src_dir, work / f"out-{mode}", mode))
        print("round", {k: round(v[-1][0], 2) for k, v in results.items()}, file=sys.stderr, flush=True)
    bare_wall = [w for w, _ in results["bare"]]
    rows = [
        f"### One file, {_minutes(src):g} min 96 kHz / 24-bit stereo FLAC in and out "
        f"(blocks of {BLOCK} frames, median of {rounds} interleaved rounds, range in brackets)",
        "",
        "In this process, with the design and the kernels already made (the steady state of a "
        "batch). CPU time includes the input-hashing thread.",
        "",
        "| run | wall (s) | CPU (s) | wall ratio to bare | target |",
        "|---|---:|---:|---:|---:|",
    ]
    for name, label in (("bare", "bare soundfile read + write"), ("fixed", "dspeq, fixed gain"),
                        ("auto", "dspeq, peak-safe (default)")):
        walls = [w for w, _ in results[name]]
        ratios = [w / b for w, b in zip(walls, bare_wall, strict=True)]
        target = f"≤ {TARGETS[name]:.2f}" if name in TARGETS else ""
        rows.append(f"| {label} | {spread(walls)} | {spread([c for _, c in results[name]])} "
                    f"| {spread(ratios)} | {target} |")
    return rows


def cli_table(work: Path, rounds: int) -> list[str]:
    src_dir = work / "one"
    src = next(src_dir.iterdir())
    code = "import sys; from dspeq.cli import main; sys.exit(main(sys.argv[1:]))"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    walls: dict[str, list[float]] = {"bare": [], "fixed": [], "auto": []}
    bare_code = (f"import sys; sys.path.insert(0, {str(ROOT / 'benchmarks')!r}); import bench_batch as b; "
                 "from pathlib import Path; b.bare(Path(sys.argv[1]), Path(sys.argv[2]))")
    for _ in range(rounds):
        (work / "bare.flac").unlink(missing_ok=True)
        settle()
        start = time.perf_counter()
        subprocess.run([sys.executable, "-c", bare_code, str(src), str(work / "bare.flac")], env=env,
                       check=True)
        walls["bare"].append(time.perf_counter() - start)
        for mode, gain in (("fixed", ["--gain", "0"]), ("auto", [])):
            out = work / f"cli-{mode}"
            shutil.rmtree(out, ignore_errors=True)
            settle()
            start = time.perf_counter()
            subprocess.run([sys.executable, "-c", code, "batch", str(src_dir), str(out), "--curve", "riaa",
                            *gain, "--workers", "1", "--no-progress"], env=env, check=True,
                           capture_output=True)
            walls[mode].append(time.perf_counter() - start)
    rows = [
        f"### The same through the command line (fresh process per run, median of {rounds})",
        "",
        "`dspeq batch ONE OUT --curve riaa [--gain 0] --workers 1`: includes interpreter "
        "start-up, imports, the design (the default `fit` method), loading the kernels from "
        "numba's cache, the manifest and `report.html`; the bare run is also a fresh process.",
        "",
        "| run | wall (s) | ratio to bare |",
        "|---|---:|---:|",
    ]
    for name in ("bare", "fixed", "auto"):
        ratios = [w / b for w, b in zip(walls[name], walls["bare"], strict=True)]
        rows.append(f"| {name} | {spread(walls[name])} | {spread(ratios)} |")
    return rows


# ----------------------------------------------------------------------------- steps
class Clock:
    """Wall time summed per step label."""

    def __init__(self) -> None:
        self.spent: dict[str, float] = {}

    def __call__(self, label: str, func, *args):
        start = time.perf_counter()
        value = func(*args)
        self.spent[label] = self.spent.get(label, 0.0) + time.perf_counter() - start
        return value


def _timed_blocks(clock: Clock, label: str, blocks):
    iterator = iter(blocks)
    while True:
        block = clock(label, next, iterator, None)
        if block is None:
            return
        yield block


def _int32_blocks(source):
    """The int32 blocks :func:`bare` reads, one reused buffer."""
    buf = np.empty((BLOCK, source.channels), np.int32)
    while len(block := source.read(BLOCK, dtype="int32", out=buf)):
        yield block


def _bare_steps(clock: Clock, src: Path, out: Path) -> None:
    """:func:`bare`, each step timed (the close finishes the encoding and syncs)."""
    import soundfile as sf

    with sf.SoundFile(src) as s:
        o = sf.SoundFile(out, "w", s.samplerate, s.channels, "PCM_24", format="FLAC")
        for block in _timed_blocks(clock, "decode (libsndfile)", _int32_blocks(s)):
            clock("encode (libsndfile)", o.write, block)
        clock("finish encoding and fsync (soundfile close)", o.close)


def _dspeq_steps(clock: Clock, src: Path, out: Path, mode: str, spool_path: Path) -> int:
    """The steps of process_task in ``mode``, each timed; returns the samples processed."""
    from dspeq import design
    from dspeq.batch import audio
    from dspeq.batch.run import _equalizer

    eq = _equalizer(design("riaa", FS), 2)     # as process_task makes it
    quant = audio.Quantizer(24, 1.0, 1)
    spec = audio.OutputSpec("flac", "int24", "FLAC", "PCM_24", 24)
    clock("SHA-256 of the input", audio.sha256_file, src)
    with audio.Source(src) as source:
        sink = audio.Sink(out, spec, FS, 2, quant)
        blocks = _timed_blocks(clock, "decode (libsndfile)", source.blocks(BLOCK, np.float32))
        if mode == "fixed":
            for block in blocks:
                pcm = clock("filter + dither + quantize (one kernel pass)", quant.filtered, eq, block)
                clock("encode (libsndfile)", sink.write_pcm, pcm)
        else:
            spool = audio.Spool(source.frames, 2, np.float32, 64 << 20, spool_path)
            y = np.empty((BLOCK, 2), np.float32)
            for block in blocks:
                filtered = clock("filter (+ peak)", eq.process, block, y[:len(block)])
                clock("spool write (copy to its writer thread)", spool.append, filtered)
            for block in _timed_blocks(clock, "spool read (after the last writes)", spool.blocks(BLOCK)):
                pcm = clock("dither + quantize", quant, block)
                clock("encode (libsndfile)", sink.write_pcm, pcm)
            spool.close()
        clock("finish encoding (last frames, STREAMINFO)", getattr, sink, "audio_md5")
        clock("fsync of the output, its SHA-256 beside it (commit)", sink.commit, None)
    return source.frames_read * 2


def steps_table(work: Path) -> list[str]:
    """Each step of bare and both modes, timed inside one single-threaded run that mirrors each."""
    src = next((work / "one").iterdir())
    warm_up(work)
    rows = [
        f"### Where the time goes ({_minutes(src):g} min file, one run each, wall seconds)",
        "",
        "The steps of the bare run and of `process_task`, run one after the other in one thread "
        "and timed each (in the real run the input's SHA-256 runs in a thread beside the "
        "decoding). The spool's file writes run in its own thread here as in the real run: its "
        "row is the copy handed to that thread, and the read row includes waiting for the last "
        "writes. The sample MD5 of FLAC output is the one the encoder computes anyway (read from "
        "STREAMINFO), so it costs nothing. The encoder's row differs between the bare run and "
        "dspeq's with the content it encodes (the filtered, dithered signal against the "
        "transfer itself).",
        "",
        "| step | bare (s) | fixed gain (s) | peak-safe (s) | per sample (ns), fixed |",
        "|---|---:|---:|---:|---:|",
    ]
    spent: dict[str, dict[str, float]] = {}
    for mode in ("bare", "fixed", "auto"):
        settle()
        clock = Clock()
        out = work / f"steps-{mode}.flac"
        if mode == "bare":
            _bare_steps(clock, src, out)
        else:
            samples = _dspeq_steps(clock, src, out, mode, work / "steps.spool")
        spent[mode] = clock.spent
        out.unlink()
    labels = list(dict.fromkeys([*spent["fixed"], *spent["auto"], *spent["bare"]]))

    def cell(mode: str, label: str) -> str:
        value = spent[mode].get(label)
        return "" if value is None else f"{value:.2f}"

    for label in labels:
        f = spent["fixed"].get(label)
        rows.append(f"| {label} | {cell('bare', label)} | {cell('fixed', label)} | {cell('auto', label)} "
                    f"| {'' if f is None else f'{f / samples * 1e9:.1f}'} |")
    total = {mode: sum(spent[mode].values()) for mode in spent}
    rows.append(f"| **total** | {total['bare']:.2f} | {total['fixed']:.2f} | {total['auto']:.2f} "
                f"| {total['fixed'] / samples * 1e9:.1f} |")
    return rows


# ----------------------------------------------------------------------------- scaling
_SCALING = """
import sys, time, json
from dspeq.batch.job import Settings, plan, quick_job
from dspeq.batch.run import run_tasks
tasks = plan(quick_job(sys.argv[1], sys.argv[2], Settings(curve="riaa", gain_db=0.0))).tasks
t = time.perf_counter()
results = list(run_tasks(tasks, workers=int(sys.argv[3])))
wall = time.perf_counter() - t
assert all(r.status == "done" for r in results), [r.error for r in results]
print(json.dumps({"wall": wall, "audio_s": sum(r.record["duration_s"] for r in results),
                  "files_s": sum(r.elapsed_s for r in results)}))
"""


def scaling_table(work: Path, rounds: int) -> list[str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    walls: dict[int, list[float]] = {1: [], 2: []}
    files: dict[int, list[float]] = {1: [], 2: []}  # sums of the files' own wall times
    audio_s = 0.0
    for _ in range(rounds):
        for workers in (1, 2):
            out = work / f"scale-{workers}"
            shutil.rmtree(out, ignore_errors=True)
            settle()
            done = subprocess.run([sys.executable, "-c", _SCALING, str(work / "eight"), str(out),
                                   str(workers)], env=env, check=True, capture_output=True, text=True)
            figures = json.loads(done.stdout.strip().splitlines()[-1])
            walls[workers].append(figures["wall"])
            files[workers].append(figures["files_s"])
            audio_s = figures["audio_s"]
            shutil.rmtree(out, ignore_errors=True)
        print("scaling", {k: round(v[-1], 1) for k, v in walls.items()}, file=sys.stderr, flush=True)
    speedups = [one / two for one, two in zip(walls[1], walls[2], strict=True)]
    return [
        f"### Two workers on {os.cpu_count()} cores ({len(list((work / 'eight').iterdir()))} files, "
        f"{audio_s / 60:.0f} min of audio, fixed gain, median of {rounds})",
        "",
        "`run_tasks(tasks, workers=N)` in a fresh process; with 2 workers the process makes the "
        "first file's design and loads the kernels, then forks the workers (they inherit both). "
        "Target: ≥ 1.8x.",
        "",
        "| workers | wall (s) | audio x realtime |",
        "|---:|---:|---:|",
        f"| 1 | {spread(walls[1], 1)} | {audio_s / statistics.median(walls[1]):.0f} |",
        f"| 2 | {spread(walls[2], 1)} | {audio_s / statistics.median(walls[2]):.0f} |",
        "",
        f"Throughput of 2 workers / 1 worker: {spread(speedups)}.",
        "",
        "Where the rest goes: the files' own wall times (from the start of `process_task` to its "
        "end, summed over the files) against the run's wall time; with 1 worker the first file "
        "includes loading the kernels, forked workers inherit them. With 1 worker the run is the "
        "files one after the other; "
        "with 2 the difference between the run and half the sum is the pool's start-up (the first "
        "file's design and loading the kernels in the batch's process, then forking the workers "
        "from it) and the uneven end.",
        "",
        "| workers | sum of the files' wall times (s) | per file, relative to 1 worker "
        "| run − sum / workers (s) |",
        "|---:|---:|---:|---:|",
        *[f"| {n} | {statistics.median(files[n]):.1f} "
          f"| {statistics.median(files[n]) / statistics.median(files[1]):.3f} "
          f"| {statistics.median(walls[n]) - statistics.median(files[n]) / n:.1f} |" for n in (1, 2)],
    ]


# ----------------------------------------------------------------------------- memory
_RSS = """
import resource, sys
sys.path.insert(0, {bench!r})
import bench_batch as b
from pathlib import Path
b.run_dspeq(Path(sys.argv[1]), Path(sys.argv[2]), sys.argv[3])
print(b.peak_rss_kib())
"""


def peak_rss_kib() -> int:
    """Peak resident memory of this process's own address space, in KiB.

    Linux's VmHWM; ``ru_maxrss`` is not used where VmHWM exists because Linux
    carries the parent's high-water mark over into a child at exec (a child
    of a large benchmark process would report the parent's size).
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        pass
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss


def memory_table(work: Path, sets: list[tuple[str, Path]]) -> list[str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    rows = [
        "### Peak resident memory (VmHWM of a child process that processes one file)",
        "",
        "The child imports dspeq, makes the design and processes the file; the peak-safe mode "
        "keeps the filtered samples in a raw temporary file beside the output once they pass "
        "the 64 MB memory budget. Target: ≤ 300 MB, independent of the file's length.",
        "",
        "| file | fixed gain (MB) | peak-safe (MB) |",
        "|---|---:|---:|",
    ]
    script = _RSS.format(bench=str(ROOT / "benchmarks"))
    for label, src_dir in sets:
        peaks = []
        for mode in ("fixed", "auto"):
            out = work / f"rss-{mode}"
            shutil.rmtree(out, ignore_errors=True)
            done = subprocess.run([sys.executable, "-c", script, str(src_dir), str(out), mode], env=env,
                                  check=True, capture_output=True, text=True)
            peaks.append(int(done.stdout.strip().splitlines()[-1]) / 1024)
            shutil.rmtree(out, ignore_errors=True)
        rows.append(f"| {label} | {peaks[0]:.0f} | {peaks[1]:.0f} |")
        print(rows[-1], file=sys.stderr, flush=True)
    return rows


def _minutes(path: Path) -> float:
    import soundfile as sf

    return round(sf.info(str(path)).duration / 60, 1)


# ----------------------------------------------------------------------------- report
def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="2-minute files, fewer rounds, no 60 min")
    parser.add_argument("--skip-kernel", action="store_true", help="leave out bench_kernel's tables")
    parser.add_argument("--skip-startup", action="store_true", help="leave out bench_startup's table")
    parser.add_argument("--output", type=Path, default=ROOT / "docs" / "performance.md")
    args = parser.parse_args(argv)
    import bench_kernel
    import bench_startup

    # The per-file and scaling rows decide targets within a few per cent of the line, so
    # they get more rounds than the command-line rows (the bare run alone moves by ~10 %).
    minutes, rounds = (2.0, 2) if args.quick else (10.0, 3)
    file_rounds, scaling_rounds = (rounds, 1) if args.quick else (5, 3)
    head = bench_kernel.machine_line()
    sections: list[list[str]] = []
    with tempfile.TemporaryDirectory(prefix="dspeq-bench-") as tmp:
        work = Path(tmp)
        one = make_transfer(work / "one" / "transfer.flac", minutes)
        make_transfer(work / "warm" / "warm.flac", 0.05, seed=2)
        eight = work / "eight"
        eight.mkdir()
        for i in range(8):
            shutil.copyfile(one, eight / f"t{i}.flac")
        sections.append(per_file_table(work, file_rounds))
        sections.append(steps_table(work))
        sections.append(cli_table(work, rounds))
        sections.append(scaling_table(work, scaling_rounds))
        sets = [(f"{minutes:g} min", work / "one")]
        if not args.quick:
            make_transfer(work / "long" / "long.flac", 60.0, seed=3)
            sets.append(("60 min", work / "long"))
        sections.append(memory_table(work, sets))
    if not args.skip_startup:
        sections.append(bench_startup.startup_table(5 if args.quick else 9))
    if not args.skip_kernel:
        sections += bench_kernel.kernel_sections(args.quick)
    text = _document(head, sections, args)
    args.output.write_text(text)
    print(text)


NOTES = """### Reading these figures

* **Filter kernel.** The recursion of a biquad is a chain of one multiply and three additions
  per sample that bit-identity with `sosfilt` forbids reordering (see "What limits a single
  channel"). The exact mono loop therefore runs at that latency, about 2x sosfilt's C
  loop at large blocks, however it is written, and stereo at about 4.5-5x; eight channels fill
  the SIMD lanes, and at small blocks sosfilt's per-call overhead dominates. The fast path
  (`exact=False`, mono and stereo) breaks the chain, computing eight frames per step from the
  state before them (mono on CPUs with 128-bit units: the decoupled loop, four frames per
  substep with fewer operations); it is bound by that arithmetic, so its speed-up depends on
  the CPU's vector units (and on how fast sosfilt's scalar loop runs there). The
  8-channel figures also depend on memory bandwidth (60 s of 8-channel float64 is 370 MB in
  and out). This machine is shared: medians move by 10-30 % from run to run.
* **Fixed gain.** What remains above the codec is essentially the one kernel pass (filter,
  TPDF dither, rounding, clip count and peak; its cost per sample is in the steps table). For
  mono and stereo the batch runs the fast loop (`exact=False`: eight frames per step, within
  rounding of sosfilt and no further than sosfilt from the exact recursion), which quantizes
  each 1024-frame chunk while it is in the cache; its blocks are whole steps, so the output
  still does not depend on the block size. Stereo keeps the exact loops (bit-identical to
  sosfilt, also quantized chunk by chunk) on CPUs where they measured faster: AMD Zen 1, whose
  floating-point units are 128 bits wide (`_kernels.fast_channels`; the record's design says
  `filter_loop`). The hashes add little wall
  time: the input's SHA-256 runs in a thread while the file is decoded, the FLAC sample MD5
  is the encoder's own (STREAMINFO), and the output's SHA-256 (it has to read the file again
  once the encoder has rewritten its header) runs in a thread while the finished file is
  synced to disk — one fsync after the tags are written, where the
  bare run's soundfile close syncs before. Both runs pay one fsync. The CPU time of the threads
  still counts when all cores are busy (several workers). The kernel pass and the output's
  SHA-256 are fixed costs per sample, so they weigh more in the ratio where the codec is fast
  (the bare row over the file's samples gives the codec's cost per sample on this machine).
* **Peak-safe.** The first pass keeps the filtered samples (float32, in memory up to the
  64 MB budget, else in a raw temporary file that the page cache usually keeps, written by a
  thread beside the decoding and removed once read, before the output is synced), so the
  input is decoded once; the second pass reads them back and quantizes.
* **Two workers.** A single worker also keeps the second core busy with its hashing threads
  (input SHA-256 beside the decoding, output SHA-256 beside the fsync); two workers cannot
  borrow a core. The workers are forked from the batch's own process once it has made the
  first file's design and loaded the kernels it runs from numba's cache (about half a second,
  paid once instead of in every worker); a process that already runs other threads forks them
  from a fresh server process instead, which imports dspeq, numba and soundfile first. What
  keeps the ratio under 2 is the hashing threads, that half second and the uneven end; it falls
  with short files.
* **Command line.** A fresh `dspeq batch` process also pays fixed costs that a long batch
  amortizes: the imports, the default `fit` design (numpy only since the design path no longer
  imports scipy), importing numba and loading the kernels from its cache, and matplotlib for
  the figures of `report.html`.
"""


def _document(head: str, sections: list[list[str]], args) -> str:
    command = "python benchmarks/bench_batch.py" + (" --quick" if args.quick else "")
    intro = [
        "# Performance",
        "",
        f"Generated by `{command}` on {time.strftime('%Y-%m-%d %H:%M')}; do not edit by hand "
        "(see DEVELOPERS.md, Benchmarks). Ratios are measured side by side in the same run; "
        "figures are medians with their range in brackets, and depend on how busy the machine "
        "was (the load average is given).",
        "",
        head,
    ]
    body = "\n\n".join("\n".join(rows) for rows in sections)
    return "\n".join(intro) + "\n\n" + body + "\n\n" + NOTES


if __name__ == "__main__":
    main()
