"""Job files, rules, planning and the safety rules about folders (nothing is processed here)."""

from __future__ import annotations

import inspect
import os
from pathlib import Path

import pytest
from conftest import ROOT, tree_digests, write_audio

from dspeq import JobError
from dspeq.batch import job as jobmod
from dspeq.batch.job import Settings, compile_pattern, load_job, plan, quick_job
from dspeq.cli import build_parser, main


def write_job(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def test_pattern_semantics():
    # Our glob: no '/' → file name anywhere; '/' → whole relative path; '**/' any folders.
    rule = jobmod.Rule("*.FLAC", Settings(curve="riaa"), 1, compile_pattern("*.FLAC"))
    assert rule.matches("a/b/side.flac") and not rule.matches("a/side.wav")
    deep = jobmod.Rule("tapes/**/*.wav", Settings(curve="riaa"), 2, compile_pattern("tapes/**/*.wav"))
    assert deep.matches("tapes/x.wav") and deep.matches("tapes/1971/reel/x.wav")
    assert not deep.matches("discs/tapes/x.wav")
    one = compile_pattern("tapes/*.wav")
    assert one.match("tapes/x.wav") and not one.match("tapes/a/x.wav")
    assert compile_pattern("side_[ab].wav").match("side_b.wav")
    assert not compile_pattern("side_[!ab].wav").match("side_a.wav")
    for bad in ("../x/*.wav", "/abs/*.wav", "a/../b.wav", "a\\b.wav", " "):
        with pytest.raises(JobError):
            compile_pattern(bad)


def test_job_file_rules_first_match_wins(tmp_path):
    inp = tmp_path / "in"
    for rel in ("discs/s1.flac", "tapes/t_15ips.wav", "tapes/t.wav", "other/x.aiff", "notes.txt"):
        if rel.endswith(".txt"):
            (inp / rel).write_text("not audio")
        else:
            fmt = {"flac": "FLAC", "wav": "WAV", "aiff": "AIFF"}[rel.rsplit(".", 1)[1]]
            write_audio(inp / rel, fmt=fmt, subtype="PCM_16")
    job = load_job(write_job(tmp_path / "j.toml", """
[run]
input = "in"
output = "out"
[defaults]
dither_seed = 7
[[rule]]
files = "tapes/*_15ips.wav"
curve = "nab-7.5ips"
speed = 2
[[rule]]
files = "*.wav"
curve = "iec-7.5ips"
from = "nab-7.5ips"
gain_db = -6
output_format = "flac"
[[rule]]
files = "discs/**"
curve = "riaa"
"""))
    p = plan(job)
    by_rel = {t.rel: t for t in p.tasks}
    assert set(by_rel) == {"discs/s1.flac", "tapes/t_15ips.wav", "tapes/t.wav"}
    assert by_rel["tapes/t_15ips.wav"].settings.speed == 2.0 and by_rel["tapes/t_15ips.wav"].rule == 1
    t = by_rel["tapes/t.wav"]
    assert (t.settings.from_curve, t.settings.gain_db, t.rule) == ("nab-7.5ips", -6.0, 2)
    assert t.output_path == str(tmp_path / "out" / "tapes" / "t.flac")
    assert by_rel["discs/s1.flac"].settings.dither_seed == 7                # defaults inherited
    assert p.unmatched == ["other/x.aiff"]
    assert by_rel["tapes/t.wav"].seed != by_rel["discs/s1.flac"].seed     # per-file seeds
    assert job.manifest_path == tmp_path / "out" / "dspeq-manifest.jsonl"


@pytest.mark.parametrize("text, message", [
    ('[run]\ninput="in"\noutput="out"\n[[rule]]\nfiles="*"\ncurve="riaa"\nspeeed=2\n',
     "unknown key 'speeed'"),
    ('[run]\ninput="in"\noutput="out"\n[[rule]]\nfiles="*"\ncurve="riaax"\n', "unknown curve 'riaax'"),
    ('[run]\ninput="in"\noutput="out"\n[[rule]]\nfiles="*"\n', "no curve"),
    ('[run]\ninput="in"\noutput="out"\n[defaults]\ncurve="riaa"\ngain_db="loud"\n', "gain_db must be"),
    ('[run]\ninput="in"\noutput="out"\n[defaults]\ncurve="riaa"\nceiling_dbfs=3\n', "outside"),
    ('[run]\ninput="in"\noutput="out"\n[defaults]\ncurve="riaa"\noutput_format="mp3"\n', "not one of"),
    ('[run]\ninput="in"\noutput="out"\n[defaults]\ncurve="riaa"\nmethod="magic"\n', "unknown method"),
    ('[run]\ninput="in"\noutput="out"\n', "nothing would be processed"),
    ('[run]\ninput="in"\n', "output must be"),
    ('[run]\ninput="in"\noutput="out"\n[extra]\n', "unknown table"),
    ('[run\n', "not valid TOML"),
    ('[run]\ninput="in"\noutput="in/derived"\n[defaults]\ncurve="riaa"\n', "inside it"),
    ('[run]\ninput="in"\noutput="in"\n[defaults]\ncurve="riaa"\n', "is the input folder"),
    ('[run]\ninput="in/x"\noutput="in"\n[defaults]\ncurve="riaa"\n', "lies inside the output"),
    ('[run]\ninput="in"\noutput="out"\nmanifest="../in/m.jsonl"\n[defaults]\ncurve="riaa"\n', "manifest"),
])
def test_bad_job_files_name_the_problem(tmp_path, text, message):
    (tmp_path / "in" / "x").mkdir(parents=True)
    with pytest.raises(JobError, match=message):
        load_job(write_job(tmp_path / "bad.toml", text))


def test_output_inside_input_refused_through_symlink(tmp_path):
    inp = tmp_path / "in"
    inp.mkdir()
    (tmp_path / "link").symlink_to(inp)
    with pytest.raises(JobError, match="inside it"):
        quick_job(inp, tmp_path / "link" / "out", Settings(curve="riaa"))


def test_symlink_loop_and_hidden_files_in_input_tree(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "a.wav")
    (inp / "loop").symlink_to(inp, target_is_directory=True)     # a folder loop
    (inp / "self.wav").symlink_to(inp / "self.wav")              # a file link to itself
    write_audio(inp / ".hidden" / "h.wav")
    (inp / "._a.wav").write_bytes(b"\0" * 10)                    # a resource-fork sidecar
    p = plan(quick_job(inp, tmp_path / "out", Settings(curve="riaa")))
    assert sorted(t.rel for t in p.tasks) == ["a.wav", "self.wav"]
    assert any("loop: symbolic link to a folder, not followed" in n for n in p.notices)


def test_two_inputs_with_one_output_name_are_both_refused(tmp_path):
    inp = tmp_path / "in"
    write_audio(inp / "x.wav")
    write_audio(inp / "x.flac", fmt="FLAC", subtype="PCM_16")
    p = plan(quick_job(inp, tmp_path / "out", Settings(curve="riaa", output_format="flac")))
    assert len(p.tasks) == 2 and all("shared by" in t.error for t in p.tasks)


def test_cli_defaults_are_the_settings_defaults():
    # The quick form with no option gives exactly Settings' defaults; Settings' design defaults
    # are those of dspeq.design.
    from dspeq.cli.batch import settings_from_args
    from dspeq.design import design

    args = build_parser().parse_args(["batch", "in", "out", "--curve", "riaa"])
    assert settings_from_args(args) == Settings(curve="riaa")
    sig = inspect.signature(design).parameters
    assert Settings().method == sig["method"].default
    assert Settings().lf_limit_hz == sig["lf_limit_hz"].default


def test_dry_run_prints_plan_and_writes_nothing(tmp_path, capsys):
    before = tree_digests(ROOT / "demo_audio")
    code = main(["batch", str(ROOT / "batch" / "demo.toml"), "--dry-run",
                 "--output-dir", str(tmp_path / "o")])
    out, err = capsys.readouterr()
    assert code == 0 and "CAUTION" in err
    assert "discs/hscr_1962_side_a.flac -> discs/hscr_1962_side_a.flac  [rule 1] riaa" in out
    assert "nab-7.5ips at x2" in out and "iec-7.5ips from nab-7.5ips" in out
    assert "3 file(s)" in out
    assert not (tmp_path / "o").exists()
    assert tree_digests(ROOT / "demo_audio") == before


def test_cli_refuses_processing_options_with_a_job_file(capsys):
    code = main(["batch", str(ROOT / "batch" / "demo.toml"), "--gain", "-3", "--dry-run"])
    assert code == 2
    assert "set --gain in the job file" in capsys.readouterr().err


def test_template_job_file_is_valid(tmp_path):
    text = (ROOT / "batch" / "template.toml").read_text(encoding="utf-8")
    (tmp_path / "transfers").mkdir()
    job = load_job(write_job(tmp_path / "template.toml", text))
    assert job.rules and job.output_root.name == "derived"
    assert os.path.basename(job.manifest_path) == "dspeq-manifest.jsonl"
