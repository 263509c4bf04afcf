"""The core commands as a user runs them: output, exit status, one-line errors."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import dspeq
from dspeq.cli import main

ROOT = Path(__file__).resolve().parents[1]


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_curves_table_and_json(capsys):
    code, out, _ = run(capsys, "curves")
    assert code == 0 and "riaa" in out and "nab-7.5ips" in out and "IASA" in out
    code, out, _ = run(capsys, "curves", "--format", "json", "--kind", "tape")
    rows = json.loads(out)
    assert {r["kind"] for r in rows} == {"tape"} and any(r["name"] == "cassette-70us" for r in rows)


def test_design_json_has_sos_rate_and_deviation(capsys):
    code, out, _ = run(capsys, "design", "riaa", "--rate", "48000", "--method", "matched-z")
    assert code == 0
    data = json.loads(out)
    np.testing.assert_allclose(data["sos"], dspeq.design("riaa", 48000, method="matched-z").sos)
    assert data["rate"] == 48000 and "max_abs_db" in data["deviation"]


def test_design_csv(capsys):
    code, out, _ = run(capsys, "design", "tc:50/3180", "--rate", "44100", "--method", "bilinear",
                       "--format", "csv")
    lines = out.strip().splitlines()
    assert code == 0 and lines[0] == "b0,b1,b2,a0,a1,a2" and len(lines) == 2
    np.testing.assert_allclose([float(v) for v in lines[1].split(",")],
                               dspeq.design("nab-7.5ips", 44100, method="bilinear").sos[0])


@pytest.mark.parametrize("argv,needle", [
    (["check", "riax", "--rate", "44100"], "unknown curve 'riax'"),
    (["check", "riaa", "--rate", "1000"], "sample rate"),
    (["design", "(1+s", "--rate", "48000"], "position"),
    (["check", "riaa", "--rate", "48000", "--method", "nope"], "unknown method"),
    (["check", "riaa", "--rate", "48000", "--speed", "-1"], "speed ratio"),
])
def test_bad_input_is_one_line_exit_2(capsys, argv, needle):
    code, out, err = run(capsys, *argv)
    assert code == 2
    assert needle in err and err.count("\n") == 1 and "Traceback" not in err


def test_check_exit_status_follows_tolerance(capsys):
    code, out, err = run(capsys, "check", "riaa", "--rate", "44100", "--method", "bilinear")
    assert code == 1 and "exceeds the tolerance" in err and "max |error|" in out
    code, out, _ = run(capsys, "check", "riaa", "--rate", "96000", "--method", "matched-z",
                       "--tolerance", "1", "--format", "json")
    assert code == 0 and json.loads(out)["ok"] is True


def test_compare_lists_every_method(capsys):
    code, out, _ = run(capsys, "compare", "riaa", "--rate", "44100")
    assert code == 0
    for m in dspeq.methods():
        assert m in out


def test_console_script_help_runs():
    exe = shutil.which("dspeq")
    cmd = [exe] if exe else [sys.executable, "-m", "dspeq"]
    res = subprocess.run(cmd + ["--help"], capture_output=True, text=True, check=False, cwd=ROOT)
    assert res.returncode == 0 and "CAUTION" in res.stdout


def test_other_commands_do_not_import_the_batch_processor():
    # `dspeq design` must not pay for importing dspeq.batch (issue 5, start-up);
    # `dspeq batch --help` still describes every batch option.
    code = ("import sys, contextlib, io\n"
            "from dspeq.cli import main\n"
            "with contextlib.redirect_stdout(io.StringIO()):\n"
            "    main(['design', 'riaa', '--rate', '48000'])\n"
            "print(sorted(m for m in sys.modules if m.startswith('dspeq.batch')))\n")
    root = Path(__file__).resolve().parents[1]
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=root, check=True)
    assert out.stdout.strip() == "[]"
    help_text = subprocess.run([sys.executable, "-m", "dspeq", "batch", "--help"], capture_output=True,
                               text=True, cwd=root, check=True).stdout
    assert "--oversample" in help_text and "--ceiling" in help_text
