"""Item lists: a collection's CSV drives the job (reading quirks, matching, the check, manifest notes)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest
from conftest import ROOT, write_audio

from dspeq import JobError
from dspeq.batch import load_job, plan, read_records, run_job
from dspeq.batch.items import parse_speed, read_table
from dspeq.cli import main

HEADER = "File;Curve;Speed ratio;Replayed with;Carrier ID;Notes"


def write_csv(path: Path, text: str, bom: bool = True, crlf: bool = True) -> Path:
    """Write CSV text as a spreadsheet exports it (UTF-8 with BOM, CR LF) unless told otherwise."""
    data = text.replace("\n", "\r\n") if crlf else text
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + data.encode("utf-8"))
    return path


def make_job(tmp_path: Path, csv_text: str, rules: str = "", items_extra: str = "", defaults: str = "",
             files=("tapes/t1.wav", "tapes/t2.wav", "discs/d1.flac", "misc/m.wav")) -> Path:
    """A job with an input tree of tiny files, an item list and optional rules; returns the job file."""
    for rel in files:
        if not (tmp_path / "in" / rel).exists():
            write_audio(tmp_path / "in" / rel, seconds=0.05, fmt="FLAC" if rel.endswith(".flac") else None,
                        subtype="PCM_16" if rel.endswith(".flac") else "PCM_24")
    write_csv(tmp_path / "items.csv", csv_text)
    job = tmp_path / "job.toml"
    job.write_text(f"""[run]
input = "in"
output = "out"
[defaults]
{defaults}
[items]
file = "items.csv"
path_column = "File"
curve_column = "Curve"
speed_column = "Speed ratio"
from_column = "Replayed with"
notes_columns = ["Carrier ID", "Notes"]
{items_extra}
{rules}
""", encoding="utf-8")
    return job


# ----------------------------------------------------------------------------- reading
def test_csv_as_spreadsheets_export_it(tmp_path):
    # BOM, ';', CR LF, a quoted field holding the separator, a quote and a line break, blank lines.
    text = ('File;Curve;Notes\n'
            '\n'
            'a.wav;riaa;"side A; 1962"\n'
            ';;\n'
            'b.wav;nab-7.5ips;"two\nlines, and ""quotes"""\n'
            'c.wav;riaa;plain\n')
    header, rows, sep = read_table(write_csv(tmp_path / "x.csv", text))
    assert header == ["File", "Curve", "Notes"] and sep == ";"
    # row numbers are the file's lines where each row starts (blank lines counted, not returned)
    assert rows == [(3, ["a.wav", "riaa", "side A; 1962"]),
                    (5, ["b.wav", "nab-7.5ips", 'two\r\nlines, and "quotes"']),
                    (7, ["c.wav", "riaa", "plain"])]


@pytest.mark.parametrize("text, sep", [
    ("File,Curve\na.wav,riaa\n", ","),
    ("File\tCurve\na.wav\triaa\n", "tab"),
    ('"File";"Curve"\n"a.wav";"riaa"\n', ";"),
    ("sep=;\nFile;Curve\na.wav;riaa\n", ";"),          # Excel's separator line
    ('File,"Curve; or not"\na.wav,riaa\n', ","),       # a ';' inside quotes does not count
])
def test_separator_detection(tmp_path, text, sep):
    header, rows, found = read_table(write_csv(tmp_path / "x.csv", text, bom=False, crlf=False))
    assert found == sep and header[0] == "File" and rows[-1][1] == ["a.wav", "riaa"]


def test_csv_errors_name_the_row(tmp_path):
    latin1 = tmp_path / "latin1.csv"
    latin1.write_bytes("File;Notes\na.wav;ok\nb.wav;Côté\n".encode("latin-1"))
    with pytest.raises(JobError, match=r"row 3: not UTF-8 text \(byte 0xf4\)"):
        read_table(latin1)
    broken = write_csv(tmp_path / "broken.csv", 'File;Notes\na.wav;"open "quote" here\n', crlf=False)
    with pytest.raises(JobError, match=r"broken.csv row 2: .*quotes"):
        read_table(broken)
    with pytest.raises(JobError, match="empty"):
        read_table(write_csv(tmp_path / "empty.csv", "\n\n"))


def test_missing_column_suggests_the_header(tmp_path):
    job = make_job(tmp_path, "Filename;Curve;Speed ratio;Replayed with;Carrier ID;Notes\n")
    with pytest.raises(JobError, match=r"path_column = 'File': no such column.*did you mean 'Filename'"):
        load_job(job)


def test_columns_match_ignoring_case_and_spaces(tmp_path):
    job = make_job(tmp_path, "file;CURVE;Speed  Ratio;replayed with;carrier id;notes\n"
                             "t1.wav;riaa;1;;X1;\n")
    t = {t.rel: t for t in plan(load_job(job)).tasks}["tapes/t1.wav"]
    assert t.settings.curve == "riaa" and t.item["rows"][0]["notes"] == {"carrier id": "X1"}


def test_speed_ratios_as_people_write_them():
    assert [parse_speed(t) for t in ("2", "2,0", "0.5", "15/7.5", "x2", "2x", "×2", " 3.75/7.5 ")] == \
        [2.0, 2.0, 0.5, 2.0, 2.0, 2.0, 2.0, 0.5]
    for bad in ("fast", "2/0", "0", "1e9", ""):
        with pytest.raises(ValueError):
            parse_speed(bad)


# ----------------------------------------------------------------------------- matching and the check
def test_rows_match_files_and_the_check_reports_everything(tmp_path):
    csv_text = (HEADER + "\n"
                "tapes/t1.wav;nab-7.5ips;15/7.5;;T-1;first reel\n"        # an exact path
                "d1.flac;RIAA;;;D-1;\n"                                   # a bare name: any folder
                "tapes\\t2.wav;iec-7.5ips;1;nab-7.5ips;T-2;Windows path\n"
                "tapes/gone.wav;riaa;1;;T-9;not transferred\n"            # matches no file
                "misc/*.wav;riaa78;1;;M;\n"                               # unknown curve
                "other/x.wav;riaa;fast;;;\n")                             # bad speed, no file either
    job = load_job(make_job(tmp_path, csv_text))
    p = plan(job)
    tasks = {t.rel: t for t in p.tasks}
    t1, t2, d1, m = (tasks[r] for r in ("tapes/t1.wav", "tapes/t2.wav", "discs/d1.flac", "misc/m.wav"))
    assert (t1.settings.curve, t1.settings.speed, t1.error) == ("nab-7.5ips", 2.0, None)
    assert t1.item == {"list": "items.csv",
                       "rows": [{"row": 2, "path": "tapes/t1.wav",
                                 "notes": {"Carrier ID": "T-1", "Notes": "first reel"}}]}
    assert (d1.settings.curve, d1.item["rows"][0]["row"]) == ("RIAA", 3)
    assert (t2.settings.from_curve, t2.settings.speed) == ("nab-7.5ips", 1.0)
    assert m.error.startswith("items.csv row 6, column 'Curve': unknown curve 'riaa78' (did you mean riaa")
    check = p.items
    assert check.of("unused-row") == ["row 5 (tapes/gone.wav): matches no file"]
    bad = check.of("bad-row")
    assert any("row 6, column 'Curve': unknown curve 'riaa78'" in b and b.endswith("refused: misc/m.wav")
               for b in bad)
    assert any("row 7, column 'Speed ratio': 'fast' is not a speed ratio" in b for b in bad)
    assert check.of("conflict") == [] and check.of("no-row") == []
    assert check.matched_rows == {2, 3, 4, 6}
    assert "4 matched a file" in next(check.lines())


def test_files_without_row_or_rule_are_listed(tmp_path):
    job = load_job(make_job(tmp_path, HEADER + "\ntapes/*.wav;nab-7.5ips;1;;;\n",
                            rules='[[rule]]\nfiles = "discs/*"\ncurve = "riaa"\n'))
    p = plan(job)
    assert sorted(t.rel for t in p.tasks) == ["discs/d1.flac", "tapes/t1.wav", "tapes/t2.wav"]
    assert p.unmatched == ["misc/m.wav"]
    assert p.items.of("no-row") == ["misc/m.wav: matches no item row and no rule; not processed"]
    # with a default curve, such a file is processed with it (and still listed)
    job2 = load_job(make_job(tmp_path, HEADER + "\ntapes/*.wav;nab-7.5ips;1;;;\n", defaults='curve = "riaa"'))
    p2 = plan(job2)
    assert {t.rel: t.settings.curve for t in p2.tasks}["misc/m.wav"] == "riaa"
    assert "processed with [defaults] (riaa)" in p2.items.of("no-row")[1]


CONFLICTING = (HEADER + "\n"
               "tapes/*.wav;nab-7.5ips;2;;;all tapes\n"
               "tapes/t1.wav;iec-7.5ips;;;;this reel is IEC\n"      # row vs row: curve differs
               "d1.flac;disc:500,16;;;;\n")                         # row vs rule: curve differs
RULES = '[[rule]]\nfiles = "*.flac"\ncurve = "riaa"\n[[rule]]\nfiles = "tapes/t2.wav"\nspeed = 2\n'


def test_files_matched_twice_with_different_settings_are_refused(tmp_path):
    p = plan(load_job(make_job(tmp_path, CONFLICTING, rules=RULES)))
    tasks = {t.rel: t for t in p.tasks}
    assert "rows 2 and 3 give curve 'nab-7.5ips' and 'iec-7.5ips'" in tasks["tapes/t1.wav"].error
    assert "row 4 gives curve 'disc:500,16', rule 1 (files = '*.flac') gives 'riaa'" in \
        tasks["discs/d1.flac"].error
    # t2: the row's speed 2 and rule 2's speed 2 agree; the rule sets nothing else
    assert tasks["tapes/t2.wav"].error is None and tasks["tapes/t2.wav"].settings.curve == "nab-7.5ips"
    assert len(p.items.of("conflict")) == 2
    assert all('set wins = "items" or "rules"' in c for c in p.items.of("conflict"))


@pytest.mark.parametrize("wins, t1_curve, d1_curve", [("items", "nab-7.5ips", "disc:500,16"),
                                                      ("rules", "nab-7.5ips", "riaa")])
def test_the_job_says_which_wins(tmp_path, wins, t1_curve, d1_curve):
    p = plan(load_job(make_job(tmp_path, CONFLICTING, rules=RULES, items_extra=f'wins = "{wins}"')))
    tasks = {t.rel: t for t in p.tasks}
    assert all(t.error is None for t in p.tasks)
    # among rows the first matching row counts; between a row and a rule, `wins` decides
    assert tasks["tapes/t1.wav"].settings.curve == t1_curve
    assert tasks["discs/d1.flac"].settings.curve == d1_curve
    assert len(p.items.of("resolved")) == 2 and not p.items.of("conflict")


def test_equal_curves_under_other_names_are_no_conflict(tmp_path):
    # "ccir-15ips" is an alias of "iec-15ips" (catalog); "tc:318/3180,75" is RIAA by its time constants.
    csv_text = HEADER + "\ntapes/t1.wav;ccir-15ips;;;;\nd1.flac;tc:318/3180,75;;;;\n"
    rules = '[[rule]]\nfiles = "*.flac"\ncurve = "riaa"\n[[rule]]\nfiles = "tapes/*"\ncurve = "iec-15ips"\n'
    p = plan(load_job(make_job(tmp_path, csv_text, rules=rules)))
    assert all(t.error is None for t in p.tasks) and not p.items.of("conflict")


def test_rules_without_curve_need_an_item_list(tmp_path):
    job = tmp_path / "j.toml"
    (tmp_path / "in").mkdir()
    job.write_text('[run]\ninput = "in"\noutput = "out"\n[[rule]]\nfiles = "*"\nsubtype = "int24"\n')
    with pytest.raises(JobError, match="no curve"):
        load_job(job)


def test_items_table_errors(tmp_path):
    job = make_job(tmp_path, HEADER + "\n", items_extra='wins = "both"')
    with pytest.raises(JobError, match=r"wins = 'both' is not one of neither, items, rules"):
        load_job(job)
    job.write_text(job.read_text().replace('wins = "both"', 'colour = "red"'))
    with pytest.raises(JobError, match=r"\[items\]: unknown key\(s\) colour"):
        load_job(job)


# ----------------------------------------------------------------------------- processing
def test_notes_go_into_the_manifest_and_refused_files_fail_with_the_reason(tmp_path):
    csv_text = (HEADER + "\n"
                "tapes/t1.wav;nab-7.5ips;2;;T-1;\"reel box says 7,5 ips; leader OK\"\n"
                "tapes/t2.wav;nab-7.5ipz;;;T-2;\n")
    job = load_job(make_job(tmp_path, csv_text, files=("tapes/t1.wav", "tapes/t2.wav")))
    summary = run_job(job, workers=1, report=False)
    recs = {r["input_rel"]: r for r in read_records(job.manifest_path)}
    assert (summary.done, summary.failed) == (1, 1)
    done = recs["tapes/t1.wav"]
    notes = done["item"]["rows"][0]["notes"]
    assert notes == {"Carrier ID": "T-1", "Notes": "reel box says 7,5 ips; leader OK"}
    assert done["curve"]["name"] == "nab-7.5ips@x2" and done["settings"]["speed"] == 2.0
    failed = recs["tapes/t2.wav"]
    assert failed["status"] == "failed" and failed["item"]["rows"][0]["row"] == 3
    assert "row 3, column 'Curve': unknown curve 'nab-7.5ipz' (did you mean nab-7.5ips" in failed["error"]


def test_cli_reports_the_check_before_processing(tmp_path, capsys):
    job = make_job(tmp_path, HEADER + "\ntapes/t1.wav;riaa;;;;\ntapes/none.wav;riaa;;;;\n",
                   files=("tapes/t1.wav",))
    assert main(["batch", str(job), "--dry-run"]) == 0
    out = capsys.readouterr().out
    assert "tapes/t1.wav -> tapes/t1.wav  [items] riaa" in out and "items.csv row 2" in out
    assert "items: unused-row: row 3 (tapes/none.wav): matches no file" in out
    assert not (tmp_path / "out").exists()
    assert main(["batch", str(job), "--workers", "1", "--no-progress"]) == 0
    out, err = capsys.readouterr()
    assert "items: unused-row: row 3" in err and "done tapes/t1.wav" in out


def test_demo_item_list_matches_the_demo_carriers():
    # The demo's CSV must say what demo_audio/make_demo.py made each file with.
    spec = importlib.util.spec_from_file_location("make_demo", ROOT / "demo_audio" / "make_demo.py")
    md = importlib.util.module_from_spec(spec)
    sys.modules["make_demo"] = md
    spec.loader.exec_module(md)
    p = plan(load_job(ROOT / "batch" / "demo.toml", output_root=Path("/nonexistent/demo_out")))
    tasks = {t.rel: t for t in p.tasks}
    for c in md.CARRIERS:
        s = tasks[c.rel].settings
        assert (s.curve, s.speed, s.from_curve) == (c.curve, c.speed, c.from_curve), c.rel
        assert tasks[c.rel].item["rows"][0]["notes"]["Carrier ID"].startswith("HSCR-")
    assert [k for k, _ in p.items.findings] == ["unused-row"]      # the reel not transferred yet
