"""``--oversample`` on design, check, compare and verify, as a user runs them."""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pytest

from dspeq.cli import main
from dspeq.oversample import design_oversampled


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_design_json_carries_the_oversampled_run(capsys):
    code, out, _ = run(capsys, "design", "riaa", "--rate", "44100", "--oversample", "2")
    assert code == 0
    data = json.loads(out)
    od = design_oversampled("riaa", 44100)
    assert data["rate"] == 44100 and data["method"] == "fit x2"
    assert data["oversample"]["latency_frames"] == od.latency
    assert data["inner"]["rate"] == 88200
    np.testing.assert_array_equal(data["oversample"]["fir_taps"][0], od.taps[0])
    assert data["deviation"]["max_abs_db"] < 0.002


def test_design_csv_has_sections_and_taps(capsys):
    code, out, _ = run(capsys, "design", "nab-7.5ips", "--rate", "48000", "--oversample", "2",
                       "--format", "csv")
    assert code == 0
    lines = out.splitlines()
    assert lines[0].startswith("# dspeq oversampled run x2")
    rows = list(csv.DictReader(io.StringIO("\n".join(lines[1:]))))
    od = design_oversampled("nab-7.5ips", 48000)
    sos = [[float(r[k]) for k in ("b0", "b1", "b2", "a0", "a1", "a2")] for r in rows if r["part"] == "sos"]
    taps = [float(r["b0"]) for r in rows if r["part"] == "fir1"]
    np.testing.assert_array_equal(sos, od.inner.sos)
    np.testing.assert_array_equal(taps, od.taps[0])


def test_check_text_and_json(capsys):
    code, out, _ = run(capsys, "check", "riaa", "--rate", "44100", "--oversample", "2")
    assert code == 0 and "oversampled x2" in out and "88200 Hz" in out
    code, out, _ = run(capsys, "check", "riaa", "--rate", "44100", "--oversample", "2", "--format", "json")
    data = json.loads(out)
    assert data["oversample"]["factor"] == 2 and data["sections"] <= 2
    assert data["max_phase_deg_to_10k"] <= 0.5          # issue 4 target
    code, out, _ = run(capsys, "check", "riaa", "--rate", "44100", "--format", "json")
    assert json.loads(out)["oversample"] == {"factor": 1}


def test_compare_shows_the_oversampled_row_and_plots(capsys, tmp_path):
    png = tmp_path / "c.png"
    code, out, err = run(capsys, "compare", "riaa", "--rate", "44100", "--oversample", "2",
                         "--format", "json", "--plot", str(png))
    assert code == 0 and png.stat().st_size > 10_000 and "plot written" in err
    rows = {r["method"]: r for r in json.loads(out)["methods"]}
    assert rows["fit x2"]["oversample"]["factor"] == 2 and rows["fit"]["oversample"]["factor"] == 1
    assert rows["fit x2"]["max_phase_deg_to_10k"] < rows["fit"]["max_phase_deg_to_10k"]
    code, out, _ = run(capsys, "compare", "riaa", "--rate", "44100")
    assert "fit x2" not in out


def test_verify_oversampled(capsys):
    code, out, _ = run(capsys, "verify", "nab-7.5ips", "--rate", "48000", "--oversample", "2",
                       "--format", "json")
    data = json.loads(out)
    assert code == 0 and data["ok"] and data["oversample"]["factor"] == 2


@pytest.mark.parametrize("argv,needle", [
    (["check", "riaa", "--rate", "44100", "--oversample", "3"], "--oversample must be one of 1, 2, 4"),
    (["check", "riaa", "--rate", "44100", "--oversample", "two"], "got 'two'"),
    (["compare", "riaa", "--rate", "44100", "--oversample", "0"], "got '0'"),
    (["verify", "riaa", "--rate", "192000", "--oversample", "4"], "above the highest design rate"),
    (["design", "riaa", "--rate", "44100", "--oversample", "2", "--format", "c"], "--format c"),
])
def test_bad_oversample_is_one_line_exit_2(capsys, argv, needle):
    code, out, err = run(capsys, *argv)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and needle in err and "Traceback" not in err


def test_off_by_default_in_cli_and_batch():
    from dspeq.batch.job import Settings
    from dspeq.cli import build_parser
    from dspeq.cli._common import oversample_factor

    sub = next(a for a in build_parser()._actions if a.dest == "command").choices
    for name in ("design", "check", "compare", "verify"):
        default = next(a.default for a in sub[name]._actions if a.dest == "oversample")
        assert oversample_factor(default) == Settings().oversample == 1
