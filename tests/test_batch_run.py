"""Processing: levels, dither, digests, manifest, reruns, block continuity, executors."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import quick_run, tree_digests, write_audio
from scipy import signal

import dspeq
from dspeq.batch import Settings, plan, quick_job, read_records, run_job
from dspeq.batch.audio import RF64_THRESHOLD, resolve_output
from dspeq.batch.run import auto_gain_db, process_task


def reference_output(path: Path, curve: str = "riaa") -> np.ndarray:
    """The de-emphasized input by scipy.signal.sosfilt on the same design (float64)."""
    x, rate = sf.read(str(path), always_2d=True)
    d = dspeq.design(curve, rate)
    return signal.sosfilt(np.array(d.sos), x, axis=0)


def test_auto_gain_rule():
    # largest 0.1 dB step at or below ceiling - peak, never above 0 dB
    assert auto_gain_db(1.0, -1.0) == -1.0
    assert auto_gain_db(10 ** (12.34 / 20), -1.0) == -13.4
    assert auto_gain_db(10 ** (-20 / 20), -1.0) == 0.0
    assert auto_gain_db(0.0, -1.0) == 0.0
    for peak in np.geomspace(0.9, 30, 50):
        g = auto_gain_db(peak, -0.5)
        assert peak * 10 ** (g / 20) <= 10 ** (-0.5 / 20) < peak * 10 ** ((g + 0.1) / 20) or g == 0


def test_peak_safe_output_matches_reference_and_stays_under_ceiling(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "loud.wav", level=0.9, seconds=0.5)          # riaa's bass boost pushes it over 0 dBFS
    summary, records = quick_run(inp, tmp_path / "out", ceiling_dbfs=-2.0)
    rec = records["loud.wav"]
    level = rec["level"]
    assert level["mode"] == "peak-safe" and level["gain_db"] < 0 and level["clipped_samples"] == 0
    assert level["filtered_peak_dbfs"] + level["gain_db"] <= -2.0
    assert level["filtered_peak_dbfs"] + level["gain_db"] > -2.0 - 0.1 - 1e-9
    y = sf.read(str(tmp_path / "out" / "loud.wav"), always_2d=True)[0]
    ref = reference_output(inp / "loud.wav") * 10 ** (level["gain_db"] / 20)
    lsb = 2.0 ** -23
    assert np.max(np.abs(y - ref)) <= 2 * lsb     # rounding (0.5 LSB) + TPDF dither (< 1 LSB) + float32 work
    assert np.max(np.abs(y)) <= 10 ** (-2.0 / 20) + lsb
    assert rec["dither"]["kind"] == "TPDF" and rec["dither"]["bits"] == 24


def test_fixed_gain_counts_clips_instead_of_hiding_them(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "loud.wav", level=0.9)
    summary, records = quick_run(inp, tmp_path / "out", gain_db=6.0)
    level = records["loud.wav"]["level"]
    y = sf.read(str(tmp_path / "out" / "loud.wav"), dtype="int32")[0] >> 8
    pinned = int(np.sum((y == 2**23 - 1) | (y == -(2**23))))
    ref = reference_output(inp / "loud.wav") * 10 ** (6 / 20)
    expected = int(np.sum(np.abs(ref) * 2**23 > 2**23 - 1))
    assert level["mode"] == "fixed" and level["clipped_samples"] == pinned > 0
    assert abs(pinned - expected) <= 0.01 * expected + 2     # dither decides samples at the edge
    assert summary.clipped_files == 1 and "clipped samples" in summary.text()


def test_float_output_has_no_dither_and_exact_samples(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "f.wav", subtype="FLOAT", level=0.9)
    _, records = quick_run(inp, tmp_path / "out")
    rec = records["f.wav"]
    assert rec["level"]["mode"] == "float" and rec["dither"] is None and rec["level"]["gain_db"] == 0
    y = sf.read(str(tmp_path / "out" / "f.wav"), dtype="float32", always_2d=True)[0]
    ref = reference_output(inp / "f.wav").astype(np.float32)
    assert np.max(np.abs(y - ref)) <= 1e-6
    assert rec["output_audio_md5"] == __import__("hashlib").md5(y.tobytes()).hexdigest()


def test_flac_sample_md5_equals_streaminfo_md5(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "a.flac", fmt="FLAC", subtype="PCM_24")
    write_audio(inp / "b.wav", subtype="PCM_16")
    _, records = quick_run(inp, tmp_path / "out", output_format="flac")
    for rel, out in (("a.flac", "a.flac"), ("b.wav", "b.flac")):
        raw = (tmp_path / "out" / out).read_bytes()
        # FLAC format: "fLaC", 4-byte block header, STREAMINFO with the MD5 in its last 16 bytes.
        assert raw[8 + 18:8 + 34].hex() == records[rel]["output_audio_md5"]
    assert records["b.wav"]["output_format"]["subtype"] == "int16"


def test_manifest_record_fields_and_digests(tmp_path, small_tree):
    from dspeq.batch.audio import sha256_file
    from dspeq.batch.manifest import RECORD_FIELDS

    before = tree_digests(small_tree)
    summary, records = quick_run(small_tree, tmp_path / "out", curve="nab-7.5ips", speed=2.0)
    assert summary.done == 3 and summary.failed == 0
    rec = records["sub/b.flac"]
    assert set(RECORD_FIELDS) - {"error"} <= set(rec)
    assert rec["input_sha256"] == sha256_file(small_tree / "sub" / "b.flac")[0]
    assert rec["output_sha256"] == sha256_file(tmp_path / "out" / "sub" / "b.flac")[0]
    tcs = rec["curve"]["time_constants_us"]                  # 50 / 3180 µs at twice the speed
    assert np.allclose(tcs["zeros"], [25.0]) and np.allclose(tcs["poles"], [1590.0])
    assert rec["curve"]["name"] == "nab-7.5ips@x2"
    assert np.array(rec["design"]["sos"]).shape[1] == 6 and rec["rate"] == 44100
    assert rec["deviation"]["max_abs_db"] < 0.01
    assert rec["frames"] == sf.info(str(small_tree / "sub" / "b.flac")).frames
    assert rec["coding_history_row"].startswith("A=PCM,F=44100,W=16,M=stereo,T=dspeq ")
    assert tree_digests(small_tree) == before


def test_same_seed_same_output_and_block_size_does_not_matter(tmp_path, small_tree):
    job = quick_job(small_tree, tmp_path / "o1", Settings(curve="riaa"))
    run_job(job, workers=1)
    job2 = quick_job(small_tree, tmp_path / "o2", Settings(curve="riaa"), block_frames=1000)
    run_job(job2, workers=1)
    d1 = tree_digests(tmp_path / "o1")
    md5 = {r["input_rel"]: r["output_audio_md5"] for r in read_records(job.manifest_path)}
    md5_2 = {r["input_rel"]: r["output_audio_md5"] for r in read_records(job2.manifest_path)}
    assert md5 == md5_2 and len(md5) == 3
    assert {k for k in d1 if k.endswith(".flac")} == {"sub/b.flac"}
    seeds = {r["dither"]["seed"] for r in read_records(job.manifest_path) if r["dither"]}
    assert len(seeds) == 2


def test_spool_on_disk_gives_the_same_output(tmp_path, small_tree):
    a = quick_job(small_tree, tmp_path / "mem", Settings(curve="riaa"))
    run_job(a, workers=1)
    b = quick_job(small_tree, tmp_path / "disk", Settings(curve="riaa"))
    b = b.__class__(**{**b.__dict__, "spool_mb": 0})
    run_job(b, workers=1)
    ra = {r["input_rel"]: r for r in read_records(a.manifest_path)}
    rb = {r["input_rel"]: r for r in read_records(b.manifest_path)}
    assert rb["a.wav"]["level"]["spooled_to_disk"] and not ra["a.wav"]["level"]["spooled_to_disk"]
    assert ra["a.wav"]["output_audio_md5"] == rb["a.wav"]["output_audio_md5"]
    assert not [p for p in (tmp_path / "disk").rglob(".*")]


def test_spool_writes_in_order_from_its_thread_and_reports_write_errors(tmp_path):
    from dspeq.batch.audio import Spool

    rng = np.random.default_rng(7)
    blocks = [rng.standard_normal((n, 2)).astype(np.float32) for n in (5, 4096, 1, 300)]
    spool = Spool(4402, 2, np.float32, 0, tmp_path / "x.spool")
    buf = np.empty((4096, 2), np.float32)
    for b in blocks:                       # the caller reuses one buffer, as the batch does
        buf[:len(b)] = b
        spool.append(buf[:len(b)])
    back = np.concatenate([b.copy() for b in spool.blocks(1000)])
    assert not (tmp_path / "x.spool").exists()     # removed once read, before the output's fsync
    spool.close()
    assert np.array_equal(back, np.concatenate(blocks))

    class Full:                            # a disk that fills up after the first write
        calls = 0

        def write(self, data):
            Full.calls += 1
            if Full.calls > 1:
                raise OSError(28, "No space left on device")

    from dspeq.batch.audio import _BackgroundWriter

    writer = _BackgroundWriter(Full())
    with pytest.raises(OSError, match="No space left"):
        for b in blocks * 50:
            writer.write(b)
        writer.finish()
    writer.stop()


@pytest.mark.parametrize("direct", [True, False])
def test_spool_chunks_round_trip_across_chunk_ends(tmp_path, monkeypatch, direct):
    # 3 channels of float64 (24-byte frames), blocks that straddle the 65536-frame chunks
    # and a last chunk that is not a multiple of the 4096-byte alignment of direct I/O.
    from dspeq.batch import audio

    if not direct:
        monkeypatch.setenv("DSPEQ_SPOOL_BUFFERED", "1")
    rng = np.random.default_rng(11)
    x = rng.standard_normal((2 * audio._SPOOL_CHUNK_FRAMES + 12345, 3))
    spool = audio.Spool(len(x), 3, np.float64, 0, tmp_path / "y.spool")
    assert spool.on_disk and (direct or not spool.direct)
    if direct and not spool.direct:
        spool.close()
        pytest.skip("this file system refuses O_DIRECT")
    for start in range(0, len(x), 40000):
        spool.append(x[start:start + 40000])
    sizes, back = [], []
    for b in spool.blocks(50000):
        sizes.append(len(b))
        back.append(b.copy())
    assert max(sizes) <= 50000 and np.array_equal(np.concatenate(back), x)
    assert not (tmp_path / "y.spool").exists()


def test_spool_reader_stops_when_the_second_pass_is_abandoned(tmp_path):
    import threading

    from dspeq.batch import audio

    x = np.ones((5 * audio._SPOOL_CHUNK_FRAMES, 2), np.float32)
    spool = audio.Spool(len(x), 2, np.float32, 0, tmp_path / "z.spool")
    spool.append(x)
    blocks = spool.blocks(1000)
    assert np.array_equal(next(blocks), x[:1000])
    blocks.close()                          # e.g. the encoder failed on the first block
    spool.close()
    assert not any(t.name == "dspeq-spool-read" for t in threading.enumerate())
    assert not (tmp_path / "z.spool").exists()


def test_unchanged_rerun_skips_and_changed_setting_reprocesses(tmp_path, small_tree):
    out = tmp_path / "out"
    s1, _ = quick_run(small_tree, out)
    first = tree_digests(out)
    s2, _ = quick_run(small_tree, out)
    assert (s1.done, s2.done, s2.skipped) == (3, 0, 3)
    assert tree_digests(out) == first                            # nothing rewritten
    s3, records = quick_run(small_tree, out, ceiling_dbfs=-6.0)
    assert (s3.done, s3.skipped) == (3, 0)
    assert records["a.wav"]["settings"]["ceiling_dbfs"] == -6.0
    write_audio(small_tree / "a.wav", seed=99)                   # a changed input
    s4, _ = quick_run(small_tree, out, ceiling_dbfs=-6.0)
    assert (s4.done, s4.skipped) == (1, 2)
    (out / "sub" / "b.flac").unlink()                            # a lost output
    s5, _ = quick_run(small_tree, out, ceiling_dbfs=-6.0)
    assert (s5.done, s5.skipped) == (1, 2)
    assert len(read_records(out / "dspeq-manifest.jsonl")) == 3 + 3 + 1 + 1


def test_wav_past_4_gib_becomes_rf64():
    class Big:                      # what resolve_output reads from a Source
        container, subtype, channels = "wav", "PCM_24", 2
        frames = RF64_THRESHOLD // 6 + 1
    spec = resolve_output("same", "same", Big())
    assert spec.container == "rf64" and spec.sf_format == "RF64" and "RF64" in spec.note
    Big.frames -= 2
    assert resolve_output("same", "same", Big()).container == "wav"
    Big.subtype = "FLOAT"
    assert resolve_output("flac", "same", Big()).subtype == "int24"   # FLAC holds no float


def test_rf64_output_is_readable_with_bext(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "a.wav")
    _, records = quick_run(inp, tmp_path / "out", output_format="rf64")
    out = tmp_path / "out" / "a.wav"
    assert sf.info(str(out)).format == "RF64"
    from dspeq.batch import bwf

    assert bwf.read_bext(out).rows[-1] == records["a.wav"]["coding_history_row"]


def test_process_task_returns_small_results(tmp_path, small_tree):
    p = plan(quick_job(small_tree, tmp_path / "out", Settings(curve="riaa")))
    res = process_task(p.tasks[0])
    assert res.status == "done" and res.record["status"] == "done", res.error
    import pickle

    assert len(pickle.dumps(res)) < 20_000
    assert not any(isinstance(v, np.ndarray) for v in res.__dict__.values())


@pytest.mark.slow
def test_two_local_worker_processes(tmp_path, small_tree):
    job = quick_job(small_tree, tmp_path / "out", Settings(curve="riaa"))
    summary = run_job(job, workers=2)
    ref_job = quick_job(small_tree, tmp_path / "ref", Settings(curve="riaa"))
    run_job(ref_job, workers=1)
    assert summary.done == 3
    by = lambda j: {r["input_rel"]: r["output_audio_md5"] for r in read_records(j.manifest_path)}  # noqa: E731
    assert by(job) == by(ref_job)


def test_workers_are_forked_only_from_a_single_threaded_process(monkeypatch):
    # Forking copies the parent's memory but none of its other threads: a lock one of
    # them holds would stay locked in the child. Common practice, no source.
    import multiprocessing
    import threading

    from dspeq.batch import run as batch_run

    monkeypatch.setattr(threading, "active_count", lambda: 1)
    ctx, forked = batch_run._pool_context()
    if "fork" in multiprocessing.get_all_start_methods():
        assert forked and ctx.get_start_method() == "fork"
    monkeypatch.setattr(threading, "active_count", lambda: 2)
    ctx, forked = batch_run._pool_context()
    assert not forked and ctx.get_start_method() in ("forkserver", "spawn")


def test_progress_bar_starts_no_thread():
    # tqdm's monitor thread would make the batch fall back from forking its workers.
    import io
    import threading

    from dspeq.batch import run as batch_run

    before = threading.active_count()
    with batch_run._bar_class()(total=2, file=io.StringIO()) as bar:
        bar.update(1)
        assert threading.active_count() == before


def test_warming_up_before_the_fork_is_best_effort(tmp_path, small_tree):
    from dspeq.batch import run as batch_run

    tasks = plan(quick_job(small_tree, tmp_path / "out", Settings(curve="riaa"))).tasks
    missing = dataclasses.replace(tasks[0], input_path=str(tmp_path / "gone.wav"))
    assert batch_run._warm(missing) is None  # the task itself reports the missing file
    batch_run._warm(tasks[0])
    assert process_task(tasks[0]).status == "done"


_WARM_SCRIPT = """
import sys
from dspeq import _kernels as K
from dspeq.batch import Settings, plan, quick_job, run
K._fast_here = tuple(int(c) for c in sys.argv[3].split(","))
task = plan(quick_job(sys.argv[1], sys.argv[2], Settings(curve="riaa", gain_db=0.0))).tasks[0]
run._warm(task)
for loops in (K._FAST_LOOPS, K._SOS_LOOPS):
    print(sorted((key, str(sig[0 if loops is K._FAST_LOOPS else 1].dtype))
                 for key, loop in loops.items()
                 if loop._compiled is not None for sig in loop._compiled.signatures))
"""


@pytest.mark.parametrize("fast_here", ["1,2", "1"])
def test_warming_up_loads_the_loops_the_batch_runs(tmp_path, small_tree, fast_here):
    # In a fresh interpreter: the forked workers inherit what _warm loaded, so it
    # must be the loops process_task calls. For a stereo 24-bit file, float32:
    # the fast loop, both the filter alone and the fused quantizer; on a CPU
    # where stereo keeps the exact loops (fast_here "1"), those two instead.
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", _WARM_SCRIPT, str(small_tree), str(tmp_path / "out"),
                           fast_here], capture_output=True, text=True, check=True)
    n = dspeq.design("riaa", 48000).sos.shape[0]
    fast, exact = done.stdout.split("\n")[:2]
    if fast_here == "1,2":
        # keys (sections, channels, decoupled, quantizes): stereo takes the eight-frame step
        assert fast == str([((n, 2, False, False), "float32"), ((n, 2, False, True), "float32")])
    else:
        assert fast == "[]"
        assert exact == str([((n, 2, "float", False), "float32"), ((n, 2, "pcm", True), "float32")])


@pytest.mark.slow
def test_dask_local_cluster_of_two_workers(tmp_path, small_tree):
    distributed = pytest.importorskip("distributed")
    job = quick_job(small_tree, tmp_path / "out", Settings(curve="riaa"))
    ref_job = quick_job(small_tree, tmp_path / "ref", Settings(curve="riaa"))
    run_job(ref_job, workers=1)
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1,
                                  dashboard_address=None) as cluster:
        summary = run_job(job, scheduler=cluster.scheduler_address)
        assert len(cluster.workers) == 2
    assert (summary.done, summary.failed) == (3, 0)
    by = lambda j: {r["input_rel"]: r["output_audio_md5"] for r in read_records(j.manifest_path)}  # noqa: E731
    assert by(job) == by(ref_job)
    assert math.isclose(summary.audio_s, sum(r["duration_s"] for r in read_records(job.manifest_path)))
