"""Running a batch: the per-file task, the executors, progress and the summary.

:func:`process_task` does everything for one file and returns a small
:class:`Result` (never arrays, never printing), so the same function runs
in-process, in local worker processes or on Dask workers:

1. SHA-256 of the original; skip if the manifest's last record of this file
   has the same digest and settings and its output is still there;
2. design the filter for the file's rate (a design warning — e.g. a rate
   too low for the curve — fails the file); with ``oversample`` the design
   runs at 2× or 4× the rate inside a :class:`~dspeq.oversample.OversampledEqualizer`
   whose FIR latency is removed exactly (:class:`~dspeq.oversample.AlignedStream`);
3. level: a fixed gain, 0 dB for float output, or (default for integer
   output) the peak-safe mode: a first pass filters the file once, keeps
   the filtered samples (:class:`~dspeq.batch.audio.Spool`) and measures
   their peak; the gain is the largest 0.1 dB step at or below
   ``ceiling − peak`` (never above 0 dB), applied in the second pass;
4. quantize with seeded TPDF dither, count clipped samples, write under a
   temporary name, add BWF ``bext`` / FLAC tags, rename when complete.

:func:`run_job` plans a job, runs the tasks with local processes (default)
or a Dask cluster, appends each result to the manifest as it arrives and
advances one progress bar over the total audio duration.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import os
import sys
import time
import warnings
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from .._errors import AudioFileError, DspeqError, JobError
from . import bwf, speed
from .audio import FileDigest, Quantizer, Sink, Source, Spool, remove_stale_temps, resolve_output, temp_path
from .job import Job, Plan, Task, plan, real_path, within
from .manifest import RECORD_VERSION, Manifest, settings_digest

__all__ = ["Result", "Summary", "process_task", "run_job", "run_tasks", "auto_gain_db", "GAIN_STEP_DB",
           "WORKER_ENV"]

#: The automatic gain is a whole number of these steps (documented, easy to undo).
GAIN_STEP_DB = 0.1
#: Environment for worker processes: one thread each (the pool gives the parallelism).
WORKER_ENV = {"NUMBA_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1",
              "MKL_NUM_THREADS": "1"}


@dataclass(frozen=True)
class Result:
    """What happened to one file.

    Attributes
    ----------
    status : str
        ``"done"``, ``"skipped"`` (unchanged since the manifest's record) or ``"failed"``.
    rel : str
        Input path relative to the input folder.
    output_path : str
        The (intended) output file.
    duration_s : float
        Audio duration of the input as planned (for progress).
    elapsed_s : float
        Wall time spent on the file.
    error : str or None
        Why it failed.
    clips : int
        Samples clamped at full scale.
    gain_db : float or None
        Gain applied.
    record : dict or None
        The manifest record (None when skipped).
    """

    status: str
    rel: str
    output_path: str
    duration_s: float
    elapsed_s: float
    error: str | None = None
    clips: int = 0
    gain_db: float | None = None
    record: dict | None = None


def auto_gain_db(peak: float, ceiling_dbfs: float, step_db: float = GAIN_STEP_DB) -> float:
    """The peak-safe gain: the largest multiple of ``step_db`` ≤ ceiling − peak (dB), at most 0.

    Examples
    --------
    >>> auto_gain_db(10 ** (6.04 / 20), -1.0)     # a +6.04 dBFS peak, ceiling -1 dBFS
    -7.1
    >>> auto_gain_db(0.5, -1.0)                   # already below the ceiling
    0.0
    """
    if not (peak > 0):
        return 0.0
    room = ceiling_dbfs - 20.0 * math.log10(peak)
    if room >= 0:
        return 0.0
    return round(math.floor(room / step_db) * step_db, 6)


def _db(x: float) -> float | None:
    return 20.0 * math.log10(x) if x > 0 and math.isfinite(x) else None


# ----------------------------------------------------------------------------- one file
def _error_text(exc: BaseException) -> str:
    if isinstance(exc, DspeqError):
        return str(exc)
    if isinstance(exc, OSError) and exc.strerror:
        name = exc.filename if exc.filename is not None else ""
        return f"{exc.strerror}: {str(name)!r}" if name else exc.strerror
    return f"{type(exc).__name__}: {exc}"


def _unchanged(task: Task, input_sha: str) -> bool:
    prior = task.prior
    if not prior:
        return False
    try:
        return (prior.get("input_sha256") == input_sha
                and prior.get("settings_digest") == settings_digest(task.settings.to_dict())
                and prior.get("output") == task.output_path
                and os.path.getsize(task.output_path) == prior.get("output_bytes"))
    except OSError:
        return False


def _prepare_output(task: Task) -> Path:
    """Create the output's folders inside the output root; refuse anything that escapes."""
    root = Path(task.output_root)
    final = Path(task.output_path)
    root.mkdir(parents=True, exist_ok=True)
    real_root = real_path(root)
    folder = root
    for part in final.parent.relative_to(root).parts:
        folder = folder / part
        if part in ("..", "") or not within(real_path(folder), real_root):
            raise JobError(f"output folder {str(folder)!r} resolves outside the output folder "
                           f"{str(root)!r}; refused")
        folder.mkdir(exist_ok=True)
    if final.is_symlink():
        raise JobError(f"output name {str(final)!r} is a symbolic link; refused")
    if final.exists() and not task.replace_ok:
        raise JobError(f"output {str(final)!r} already exists and no manifest record made it; "
                       "not overwritten")
    if real_path(final) == real_path(task.input_path):
        raise JobError(f"output {str(final)!r} is the input file; refused")
    remove_stale_temps(final)
    return final


_DEVIATIONS: dict[int, tuple[Any, dict]] = {}


def _design(settings, rate: float):
    """(curve, design, deviation summary) for a file's settings and rate; warnings are errors."""
    from ..check import check
    from ..design import design
    from ..spec import curve

    c = curve(settings.curve, speed=settings.speed, from_curve=settings.from_curve,
              reference_hz=settings.reference_hz)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        if settings.oversample > 1:
            from ..oversample import design_oversampled

            d = design_oversampled(c, rate, settings.oversample, settings.method,
                                   lf_limit_hz=settings.lf_limit_hz)
        else:
            d = design(c, rate, settings.method, lf_limit_hz=settings.lf_limit_hz)
    if caught:
        raise JobError(f"rate {rate:g} Hz does not suit curve {c.name!r}: {caught[0].message}")
    hit = _DEVIATIONS.get(id(d))
    if hit is None or hit[0] is not d:
        hit = (d, check(d).summary())
        _DEVIATIONS[id(d)] = hit
    return c, d, hit[1]


def _work_dtype(source: Source, spec) -> type:
    wide = spec.bits == 32 or spec.subtype == "float64" or source.subtype in ("PCM_32", "DOUBLE")
    return np.float64 if wide else np.float32


@dataclass
class _Render:
    """Mutable state of one file's rendering (kept out of the Result)."""

    task: Task
    source: Source
    spec: Any
    curve: Any
    design: Any
    dtype: type
    started: datetime
    filtered_peak: float = 0.0
    gain_db: float = 0.0
    mode: str = "fixed"
    history_in: str = ""
    time_reference: int = 0
    row: str = ""
    extra: dict = field(default_factory=dict)
    rate_change: Any = None
    counted: Any = None
    filter_loop: str = "exact"

    def filtered(self, eq, quant: Quantizer | None = None) -> Iterator[np.ndarray]:
        """The source, block by block, through the equalizer (output buffer reused).

        With ``quant``, the blocks are quantized in the same kernel pass (int32 PCM).
        Blocks are a whole number of the fast loop's steps (``block_frames``
        rounded down to a multiple of 8), so the output does not depend on
        the block size (see :class:`dspeq.stream.Equalizer`).
        """
        from .._kernels import FAST_STEP

        n = self.task.block_frames - self.task.block_frames % FAST_STEP
        out = np.empty((n, self.source.channels), dtype=self.dtype)
        start = 0
        for block in self.source.blocks(n, self.dtype):
            try:
                y = (quant.filtered(eq, block) if quant is not None
                     else eq.process(block, out=out[:len(block)]))
            except DspeqError as exc:
                raise AudioFileError(f"input holds samples that are not finite, in frames "
                                     f"{start}–{start + len(block) - 1} ({exc}): "
                                     f"{self.source.path!r}") from None
            start += len(block)
            if len(y):                   # an oversampled run holds its first frames back …
                yield y
        if hasattr(eq, "finish"):        # … and gives them at the end (dspeq.oversample.AlignedStream)
            yield eq.finish()


def _provenance(r: _Render) -> tuple[str, str, list[tuple[str, str]]]:
    """(CodingHistory text, description, FLAC tags) for the output."""
    s, spec = r.task.settings, r.spec
    dither = f"TPDF dither seed {r.task.seed}" if not spec.is_float else "float; no dither"
    text = f"dspeq {_version()}; de-emphasis {r.curve.name}; {_design_text(r.design)}"
    level = f"gain {r.gain_db:+.1f} dB; {dither}"
    bits = spec.bits or (64 if spec.subtype == "float64" else 32)
    rc = r.rate_change
    if rc is None:
        r.row = bwf.coding_history_row(r.source.rate, bits, r.source.channels, f"{text}; {level}")
    else:                           # two steps, two rows: de-emphasis at the transfer rate, then the rate
        r.row = (bwf.coding_history_row(r.source.rate, bits, r.source.channels, text)
                 + bwf.coding_history_row(rc.output_rate, bits, r.source.channels,
                                          f"dspeq {_version()}; {rc.describe()}; {level}"))
    prior = "".join(row + bwf.CRLF for row in bwf.history_rows(r.history_in))
    history = prior + r.row
    description = (f"Playback de-emphasis {r.curve.name} ({s.curve}) applied by dspeq to the flat "
                   f"transfer {Path(r.task.input_path).name}")[:256]
    tags = [("DESCRIPTION", description), ("CODINGHISTORY", history), ("COMMENT", history),
            ("SOFTWARE", f"dspeq {_version()}"), ("DATE", r.started.strftime("%Y-%m-%d"))]
    return history, description, tags


def _design_text(d) -> str:
    """How the filter ran, for CodingHistory: method and sections (and the oversampling)."""
    from ..oversample import is_oversampled

    if not is_oversampled(d):
        return f"{d.method} {d.sos.shape[0]} sections"
    return (f"{d.inner.method} {d.sections} sections at {d.inner.fs:g} Hz, oversampled x{d.factor} "
            f"(half-band FIR {'+'.join(str(len(h)) for h in d.taps)} taps, latency {d.latency} "
            "frames removed)")


def _version() -> str:
    from .. import __version__

    return __version__


def _write(r: _Render, blocks: Iterable[np.ndarray], final: Path, fuse_eq=None) -> dict[str, Any]:
    """Write ``blocks`` at the chosen gain; return the output part of the record.

    With ``fuse_eq`` (integer output), the source is filtered and quantized in
    one kernel pass instead (``blocks`` is not used).
    """
    history, description, tags = _provenance(r)
    gain = 10.0 ** (r.gain_db / 20.0)
    quant = None if r.spec.is_float else Quantizer(r.spec.bits, gain, r.task.seed)
    rate = r.rate_change.output_rate if r.rate_change else r.source.rate
    sink = Sink(final, r.spec, rate, r.source.channels, quant, gain, tags)
    try:
        if fuse_eq is not None:
            for pcm in r.filtered(fuse_eq, quant):
                sink.write_pcm(pcm)
        else:
            for y in blocks:
                sink.write(y)
        md5 = sink.audio_md5
        bext = bwf.Bext(description=description, originator="dspeq", originator_reference=md5,
                        origination_date=r.started.strftime("%Y-%m-%d"),
                        origination_time=r.started.strftime("%H:%M:%S"),
                        time_reference=r.time_reference, coding_history=history)
        sha, size = sink.commit(bext)
    except BaseException:
        sink.abort()
        raise
    peak = quant.peak if quant is not None else sink.peak
    return {"output_sha256": sha, "output_bytes": size, "output_audio_md5": md5,
            "output_peak_dbfs": _db(peak), "clips": quant.clips if quant is not None else 0}


def _stream(r: _Render, eq) -> Iterable[np.ndarray]:
    """The filtered blocks, resampled when the settings ask for another output rate."""
    rc = r.rate_change
    if rc is None or rc.resampler is None:
        return r.filtered(eq)
    r.counted = speed.Counted(speed.resample_blocks(r.filtered(eq), rc, r.source.channels, r.dtype))
    return r.counted


def _equalizer(design, channels: int):
    """The batch's Equalizer for a (not oversampled) design.

    Mono and stereo take the fast loop (exact=False): within rounding of
    sosfilt (1e-15 of the peak for RIAA at 96 kHz, far below the LSB of any
    output format), and no further from the exact recursion than sosfilt is.
    Stereo keeps the exact loop on CPUs where that is the faster
    (:func:`dspeq._kernels.fast_channels`).
    """
    from ..stream import Equalizer

    return Equalizer(design, channels=channels, exact=False)


def _render(r: _Render, final: Path) -> dict[str, Any]:
    from .. import _kernels
    from ..oversample import AlignedStream, OversampledEqualizer, is_oversampled

    s = r.task.settings
    over = is_oversampled(r.design)
    eq = (AlignedStream(OversampledEqualizer(r.design, channels=r.source.channels)) if over
          else _equalizer(r.design, r.source.channels))
    if not over:
        r.filter_loop = eq.loop
    if s.gain_db is not None or r.spec.is_float:
        r.mode = "fixed" if s.gain_db is not None else "float"
        r.gain_db = s.gain_db or 0.0
        fuse = (not r.spec.is_float and not over
                and (r.rate_change is None or r.rate_change.resampler is None))
        out = _write(r, _stream(r, eq), final, fuse_eq=eq if fuse else None)
        r.filtered_peak = 10 ** ((out["output_peak_dbfs"] or -math.inf) / 20) / 10 ** (r.gain_db / 20)
        return out
    r.mode = "peak-safe"
    frames = r.rate_change.frames_out(r.source.frames) if r.rate_change else r.source.frames
    spool = Spool(frames, r.source.channels, r.dtype, r.task.spool_bytes, temp_path(final, ".spool"))
    try:
        for y in _stream(r, eq):   # the filter loop measures the peak of what it wrote
            peak = _kernels.peak_abs(y) if r.counted is not None else eq.last_peak
            r.filtered_peak = max(r.filtered_peak, peak)
            spool.append(y)
        r.gain_db = auto_gain_db(r.filtered_peak, s.ceiling_dbfs)
        r.extra["spooled_to_disk"] = spool.on_disk
        return _write(r, spool.blocks(r.task.block_frames), final)
    finally:
        spool.close()


def _record(r: _Render, out: dict[str, Any], input_sha: str, input_bytes: int, t0: float,
            deviation: dict) -> dict[str, Any]:
    s, task = r.task.settings, r.task
    try:
        zs, ps = r.curve.time_constants()
        tcs = {"zeros": [("inf" if math.isinf(v) else v) for v in zs],
               "poles": [("inf" if math.isinf(v) else v) for v in ps]}
    except DspeqError:
        tcs = None
    level = {"mode": r.mode, "gain_db": r.gain_db, "ceiling_dbfs": s.ceiling_dbfs if r.mode == "peak-safe"
             else None, "filtered_peak_dbfs": _db(r.filtered_peak),
             "output_peak_dbfs": out["output_peak_dbfs"], "clipped_samples": out["clips"], **r.extra}
    return {
        "record": RECORD_VERSION, "status": "done", "error": None,
        "input": task.input_path, "input_rel": task.rel, "output": task.output_path,
        "output_rel": Path(task.output_path).relative_to(task.output_root).as_posix(),
        "input_sha256": input_sha, "input_bytes": input_bytes, "output_sha256": out["output_sha256"],
        "output_bytes": out["output_bytes"], "output_audio_md5": out["output_audio_md5"],
        "input_format": {"container": r.source.container, "subtype": r.source.subtype},
        "output_format": {"container": r.spec.container, "subtype": r.spec.subtype,
                          "note": r.spec.note or None},
        "rate": r.source.rate, "channels": r.source.channels, "frames": r.source.frames_read,
        "duration_s": r.source.frames_read / r.source.rate,
        "curve": {"spec": s.curve, "speed": s.speed, "from": s.from_curve, "name": r.curve.name,
                  "time_constants_us": tcs, "roots": r.curve.describe_roots(), "source": r.curve.source,
                  "reference_hz": r.curve.reference_hz},
        "design": {**r.design.to_dict(), "filter_loop": r.filter_loop}, "deviation": deviation,
        "level": level,
        "dither": None if r.spec.is_float else {"kind": "TPDF", "generator": "lowbias32-counter",
                                                  "seed": task.seed, "bits": r.spec.bits},
        "coding_history_row": r.row.rstrip("\r\n"), "rate_change": _rate_record(r), "item": task.item,
        "settings": s.to_dict(),
        "settings_digest": settings_digest(s.to_dict()), "tool": {"name": "dspeq", "version": _version()},
        "started": r.started.isoformat(timespec="seconds"), "elapsed_s": time.perf_counter() - t0,
    }


def _rate_record(r: _Render) -> dict | None:
    rc = r.rate_change
    if rc is None:
        return None
    return rc.to_dict(r.counted.frames if r.counted is not None else r.source.frames_read)


def _file_setup(task: Task, src: Source) -> tuple:
    """(curve, design, deviation summary, rate change, output spec) of one file."""
    curve, design, deviation = _design(task.settings, src.rate)
    rc = speed.rate_change(task.settings, src.rate)
    spec = resolve_output(task.settings.output_format, task.settings.subtype, speed.sized_like(src, rc))
    return curve, design, deviation, rc, spec


def _process(task: Task, digest: FileDigest, t0: float, started: datetime) -> dict:
    with Source(task.input_path) as src:
        curve, design, deviation, rc, spec = _file_setup(task, src)
        final = _prepare_output(task)
        r = _Render(task, src, spec, curve, design, _work_dtype(src, spec), started, rate_change=rc)
        r.history_in, r.time_reference = src.read_history()
        out = _render(r, final)
        return _record(r, out, *digest.result(), t0, deviation)


def _failure(task: Task, error: str, t0: float, started: datetime, input_sha: str | None) -> dict:
    return {"record": RECORD_VERSION, "status": "failed", "error": error, "input": task.input_path,
            "input_rel": task.rel, "output": task.output_path, "input_sha256": input_sha,
            "item": task.item, "settings": task.settings.to_dict(),
            "settings_digest": settings_digest(task.settings.to_dict()),
            "tool": {"name": "dspeq", "version": _version()},
            "started": started.isoformat(timespec="seconds"), "elapsed_s": time.perf_counter() - t0}


def process_task(task: Task) -> Result:
    """Process one file; never raises for a problem with the file, never prints.

    Returns
    -------
    Result
        ``done`` with its manifest record, ``skipped`` when unchanged, or
        ``failed`` with the reason (and a manifest record saying so).
    """
    t0, started = time.perf_counter(), datetime.now().astimezone()
    digest = None
    try:
        if task.error:
            raise JobError(task.error)
        digest = FileDigest(task.input_path)    # hashed in a thread while the file is decoded
        if task.prior is not None and _unchanged(task, digest.result()[0]):
            return Result("skipped", task.rel, task.output_path, task.duration_s,
                          time.perf_counter() - t0)
        rec = _process(task, digest, t0, started)
        return Result("done", task.rel, task.output_path, task.duration_s, time.perf_counter() - t0,
                      clips=rec["level"]["clipped_samples"], gain_db=rec["level"]["gain_db"], record=rec)
    except Exception as exc:  # noqa: BLE001 - every failure becomes a reported result
        error = _error_text(exc)
        input_sha = digest.hex_or_none() if digest is not None else None
        return Result("failed", task.rel, task.output_path, task.duration_s, time.perf_counter() - t0,
                      error=error, record=_failure(task, error, t0, started, input_sha))


# ----------------------------------------------------------------------------- executors
def _crashed(task: Task, exc: BaseException) -> Result:
    error = f"worker failed: {_error_text(exc)}"
    started = datetime.now().astimezone()
    return Result("failed", task.rel, task.output_path, task.duration_s, 0.0, error=error,
                  record=_failure(task, error, time.perf_counter(), started, None))


def _local(tasks: list[Task], workers: int) -> Iterator[Result]:
    """Results of ``tasks`` run in this process (1 worker) or in a pool of worker processes."""
    if workers <= 1 or len(tasks) <= 1:
        for task in tasks:
            yield process_task(task)
        return
    from concurrent.futures import ProcessPoolExecutor, as_completed

    for key, value in WORKER_ENV.items():
        os.environ.setdefault(key, value)
    ctx, forked = _pool_context()
    if forked:
        _warm(tasks[0])
        sys.stdout.flush()  # or the workers would write out a copy of what is buffered
        sys.stderr.flush()
    with ProcessPoolExecutor(max_workers=min(workers, len(tasks)), mp_context=ctx) as pool:
        futures = {pool.submit(process_task, t): t for t in tasks}
        for fut in as_completed(futures):
            try:
                yield fut.result()
            except Exception as exc:  # noqa: BLE001 - a crashed worker fails its file only
                yield _crashed(futures[fut], exc)


def _pool_context() -> tuple[Any, bool]:
    """(multiprocessing context, whether its workers are forked from this process).

    Forked from this process when it runs no other thread: the workers then
    start at once and inherit what :func:`_warm` made (the design, the
    loaded kernels). With threads running, a fork could copy a lock held by
    one of them, so the workers come from a fresh server process instead
    (``forkserver``) that imports the heavy modules once, or are spawned.
    """
    import multiprocessing
    import threading

    methods = multiprocessing.get_all_start_methods()
    if "fork" in methods and threading.active_count() == 1:
        return multiprocessing.get_context("fork"), True
    if "forkserver" in methods:
        ctx = multiprocessing.get_context("forkserver")
        # numba alone takes half a second to import; the design path itself needs no scipy.
        ctx.set_forkserver_preload(["dspeq.batch.run", "dspeq._fit", "numba", "soundfile"])
        return ctx, False
    return multiprocessing.get_context("spawn"), False


def _warm(task: Task) -> None:
    """Before forking the workers: the first file's design and the loops its run calls.

    Each worker would otherwise make the design and load the compiled loops
    from numba's disk cache itself (about half a second, every worker);
    made here once, the forked workers inherit them. Best effort: a file
    that cannot be opened or designed for fails in its own task.
    """
    from .. import _kernels
    from ..oversample import is_oversampled

    try:
        with Source(task.input_path) as src:
            _, design, _, _, spec = _file_setup(task, src)
            dtype, channels = _work_dtype(src, spec), src.channels
    except Exception:  # noqa: BLE001 - reported by the task itself
        return
    if is_oversampled(design):
        return
    x = np.zeros((_kernels.FLUSH_EVERY, channels), dtype)
    pcm = np.empty(x.shape, np.int32)
    eq = _equalizer(design, channels)                  # the loops _render will run
    y = eq.process(x)                                   # peak-safe: filter, then …
    _kernels.quantize_tpdf(y, 1.0, 24, _kernels.seed_state(0), pcm)  # … quantize
    _kernels.peak_abs(y)
    eq.process_pcm(x, 1.0, 24, _kernels.seed_state(0), pcm)        # fixed gain: one pass


def _dask(tasks: list[Task], scheduler: str, workers: int) -> Iterator[Result]:
    try:
        from distributed import Client, LocalCluster, as_completed
    except ImportError:
        raise JobError("the Dask scheduler needs dask[distributed]: "
                       "pip install 'dspeq[distributed]'") from None
    cluster = None
    if scheduler == "local":
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                               dashboard_address=None, env=dict(WORKER_ENV))
        client = Client(cluster)
    else:
        try:
            client = Client(scheduler, timeout="20s")
        except OSError as exc:
            raise JobError(f"cannot reach the Dask scheduler {scheduler!r}: {exc}") from None
    try:
        futures = {client.submit(process_task, t, pure=False): t for t in tasks}
        for fut in as_completed(futures):
            try:
                yield fut.result()
            except Exception as exc:  # noqa: BLE001 - a lost worker fails its file only
                yield _crashed(futures[fut], exc)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def run_tasks(tasks: list[Task], *, workers: int | None = None,
              scheduler: str | None = None) -> Iterator[Result]:
    """Run tasks and yield their Results as they complete.

    Parameters
    ----------
    workers : int, optional
        Local worker processes (default: one per core; 1 runs in this
        process), or the number of workers of a ``"local"`` Dask cluster.
    scheduler : str, optional
        A Dask scheduler address (``tcp://host:8786``), or ``"local"`` for a
        local Dask cluster; None uses local processes.
    """
    n = workers or os.cpu_count() or 1
    if scheduler:
        return _dask(tasks, scheduler, n)
    return _local(tasks, n)


# ----------------------------------------------------------------------------- job
@dataclass
class Summary:
    """Counts and figures of a finished run."""

    done: int = 0
    skipped: int = 0
    failed: int = 0
    unmatched: int = 0
    clipped_files: int = 0
    audio_s: float = 0.0
    wall_s: float = 0.0
    failures: list[tuple[str, str]] = field(default_factory=list)
    report_path: str | None = None
    report_error: str | None = None

    def add(self, res: Result) -> None:
        setattr(self, res.status, getattr(self, res.status) + 1)
        if res.status == "done":
            self.audio_s += res.record["duration_s"] if res.record else 0.0
            self.clipped_files += res.clips > 0
        if res.status == "failed":
            self.failures.append((res.rel, res.error or "unknown error"))

    @property
    def realtime_factor(self) -> float:
        """Seconds of audio processed per second of wall time."""
        return self.audio_s / self.wall_s if self.wall_s > 0 else 0.0

    def text(self) -> str:
        line = (f"done {self.done}, skipped {self.skipped}, failed {self.failed}"
                + (f", no rule {self.unmatched}" if self.unmatched else "")
                + f"; {self.audio_s / 3600:.3f} h of audio in {self.wall_s:.1f} s "
                  f"({self.realtime_factor:.1f}x real time)")
        if self.clipped_files:
            line += f"; {self.clipped_files} file(s) with clipped samples (see the manifest)"
        return line


def _with_history(tasks: list[Task], manifest: Manifest) -> list[Task]:
    latest = manifest.latest_done()
    known = manifest.known_outputs()
    return [dataclasses.replace(t, prior=_prior(latest.get(t.rel)), replace_ok=t.output_path in known)
            for t in tasks]


def _prior(rec: dict | None) -> dict | None:
    if rec is None:
        return None
    keys = ("input_sha256", "settings_digest", "output", "output_bytes")
    return {k: rec.get(k) for k in keys}


@functools.cache
def _bar_class():
    """tqdm without its monitor thread: the bar is updated once per file anyway, and a
    thread running in this process would rule out forking the workers from it."""
    from tqdm import tqdm

    return type("_Bar", (tqdm,), {"monitor_interval": 0})


def run_job(job: Job, *, workers: int | None = None, scheduler: str | None = None,
            progress: bool = False, on_result: Callable[[Result], None] | None = None,
            the_plan: Plan | None = None, report: bool = True) -> Summary:
    """Plan and run a job; append every result to the manifest as it arrives.

    Parameters
    ----------
    job : Job
    workers, scheduler
        See :func:`run_tasks` (``workers`` defaults to the job's, then to the
        number of cores).
    progress : bool
        Show a tqdm bar (on stderr) over the total audio duration.
    on_result : callable, optional
        Called with each Result (e.g. to print failures).
    the_plan : Plan, optional
        An already computed plan of ``job``.
    report : bool
        Write ``report.html`` in the output folder at the end
        (:func:`dspeq.batch.report.write_report`); if it cannot be written,
        ``Summary.report_error`` says why.

    Raises
    ------
    OSError
        If the output folder or manifest cannot be written.
    """
    t0 = time.perf_counter()
    p = the_plan or plan(job)
    summary = Summary(unmatched=len(p.unmatched))
    job.output_root.mkdir(parents=True, exist_ok=True)
    manifest = Manifest(job.manifest_path)
    tasks = _with_history(p.tasks, manifest)
    with manifest, _bar_class()(total=round(p.total_duration_s, 1), unit="s", disable=not progress,
                                desc="audio", dynamic_ncols=True, leave=True) as bar:
        for res in run_tasks(tasks, workers=workers or job.workers, scheduler=scheduler):
            if res.record is not None:
                manifest.append(res.record)
            summary.add(res)
            bar.update(round(res.duration_s, 1))
            bar.set_postfix_str(f"{res.status}: {res.rel}", refresh=False)
            if on_result is not None:
                on_result(res)
    summary.wall_s = time.perf_counter() - t0
    if report:
        from .report import write_report

        try:
            summary.report_path = str(write_report(job, p))
        except OSError as exc:      # e.g. a read-only output folder: every file has failed already
            summary.report_error = _error_text(exc)
    return summary
