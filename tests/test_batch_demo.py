"""The demo: batch/demo.toml on demo_audio/ gives back the program material the demo was made from."""

from __future__ import annotations

import importlib.util
import sys

import numpy as np
import pytest
import soundfile as sf
from conftest import ROOT, tree_digests
from scipy import optimize

from dspeq.batch import bwf, load_job, read_records, run_job

#: The demo's limit on the residual (issue: "residual ≤ −60 dB after the dither floor").
RESIDUAL_LIMIT_DB = -60.0


def load_make_demo():
    spec = importlib.util.spec_from_file_location("make_demo", ROOT / "demo_audio" / "make_demo.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules["make_demo"] = module
    spec.loader.exec_module(module)
    return module


def residual_db(y: np.ndarray, x: np.ndarray) -> tuple[float, float]:
    """(residual of y against x delayed by the best fractional delay, in dB re x; that delay).

    The digital design follows the analog curve's magnitude and phase up to a
    pure fractional delay (``dspeq.check`` reports it), so x is delayed by the
    delay that minimizes the residual (frequency domain, zero-padded, by Parseval).
    """
    n = 1 << int(np.ceil(np.log2(2 * len(x))))
    X, Y = np.fft.rfft(x, n, axis=0), np.fft.rfft(y, n, axis=0)
    w = np.fft.rfftfreq(n)[:, None]

    def err(d):
        return float(np.sum(np.abs(Y - X * np.exp(-2j * np.pi * w * d)) ** 2))

    best = optimize.minimize_scalar(err, bounds=(-2, 2), method="bounded", options={"xatol": 1e-5})
    return 10 * np.log10(best.fun / np.sum(np.abs(X) ** 2)), float(best.x)


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo_out")
    before = tree_digests(ROOT / "demo_audio")
    job = load_job(ROOT / "batch" / "demo.toml", output_root=out)
    summary = run_job(job, workers=1)
    assert tree_digests(ROOT / "demo_audio") == before
    return out, summary, {r["input_rel"]: r for r in read_records(job.manifest_path)}


def test_demo_runs_clean(demo_run):
    out, summary, records = demo_run
    assert (summary.done, summary.failed, summary.unmatched) == (3, 0, 0)
    assert all(r["level"]["clipped_samples"] == 0 for r in records.values())


def test_demo_restores_the_program_material(demo_run):
    md = load_make_demo()
    out, _, records = demo_run
    for c in md.CARRIERS:
        rec = records[c.rel]
        y = sf.read(str(out / rec["output_rel"]), always_2d=True)[0] / 10 ** (rec["level"]["gain_db"] / 20)
        _, scale = md.transfer(c)
        x = md.program(c) * scale
        res, delay = residual_db(y, x)
        lead = int(md.LEAD_S * c.rate)
        floor = 10 * np.log10(np.mean(y[64:lead - 64] ** 2) / np.mean(x[lead:-lead] ** 2))
        print(f"{c.rel}: residual {res:.1f} dB (delay {delay:+.3f} samples), noise floor {floor:.1f} dB")
        assert res <= RESIDUAL_LIMIT_DB, (c.rel, res)
        assert abs(delay - rec["deviation"]["delay_samples"]) < 0.05    # the design's own delay


def test_residual_detects_a_wrong_curve():
    # The measure is not blind: the 15 ips tape de-emphasized at its recorded speed (speed 1
    # instead of 2) leaves a large residual.
    from scipy import signal

    import dspeq

    md = load_make_demo()
    c = md.CARRIERS[1]
    flat, scale = md.transfer(c)
    wrong = signal.sosfilt(np.array(dspeq.design(c.curve, c.rate).sos), flat, axis=0)
    assert residual_db(wrong, md.program(c) * scale)[0] > -30


def test_demo_coding_history_keeps_the_transfer_rows(demo_run):
    out, _, records = demo_run
    rel = "tapes/hscr_1968_concert_iec_on_nab.wav"
    rows = bwf.read_bext(out / rel).rows
    original = bwf.read_bext(ROOT / "demo_audio" / rel).rows
    assert len(original) == 2 and rows[:2] == original
    assert rows[2] == records[rel]["coding_history_row"]
    fields = bwf.parse_coding_history(bwf.read_bext(out / rel).coding_history)[2]
    assert (fields["A"], fields["F"], fields["W"], fields["M"]) == ("PCM", "48000", "24", "mono")
    assert "iec-7.5ips from nab-7.5ips" in fields["T"]
    flac = dict(bwf.read_flac_tags(out / "discs/hscr_1962_side_a.flac"))
    disc = records["discs/hscr_1962_side_a.flac"]
    assert bwf.history_rows(flac["CODINGHISTORY"]) == [disc["coding_history_row"]]


def test_demo_files_are_small_and_reproducible(tmp_path):
    files = [p for p in (ROOT / "demo_audio").rglob("*") if p.suffix in (".wav", ".flac")]
    assert len(files) == 3 and sum(p.stat().st_size for p in files) <= 5 * 2**20
    md = load_make_demo()
    made = md.make(tmp_path)
    for p in made:
        rel = p.relative_to(tmp_path)
        assert p.read_bytes() == (ROOT / "demo_audio" / rel).read_bytes(), rel
