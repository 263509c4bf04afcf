"""The job report: a self-contained page that holds every manifest record, figures of the curves,
totals and the tool version; parsed with the standard library and rendered in headless Chromium."""

from __future__ import annotations

import base64
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from conftest import write_audio

import dspeq
from dspeq.batch import load_job, plan, read_records, run_job
from dspeq.batch import report as report_mod

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
#: matplotlib's first default line colour "C0" (#1f77b4), used by the designs in the figures.
C0_RGB = (31, 119, 180)

JOB = """[run]
input = "in"
output = "out"
[defaults]
ceiling_dbfs = {ceiling}
[[rule]]
files = "discs/*"
curve = "riaa"
[[rule]]
files = "tapes/*"
curve = "nab-7.5ips"
speed = 2
"""


class Page(HTMLParser):
    """Collects what the tests look at: tags, attributes, text, table rows, an open-tag stack check."""

    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.attrs: list[tuple[str, dict]] = []
        self.text: list[str] = []
        self.stack: list[str] = []
        self.rows: list[list[str]] = []        # text of each <tr>, cell by cell
        self.file_groups = 0

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        self.attrs.append((tag, a))
        if tag not in self.VOID:
            self.stack.append(tag)
        if tag == "tr":
            self.rows.append([])
        if tag in ("td", "th") and self.rows:
            self.rows[-1].append("")
        if tag == "tbody" and a.get("class") == "file":
            self.file_groups += 1

    def handle_startendtag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.append((tag, dict(attrs)))

    def handle_endtag(self, tag):
        assert self.stack and self.stack[-1] == tag, f"</{tag}> closes {self.stack[-1:]}"
        self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)
        if self.rows and self.rows[-1] and "td" in self.stack:
            self.rows[-1][-1] += data

    @property
    def all_text(self) -> str:
        return " ".join(self.text)


def parse(text: str) -> Page:
    ET.fromstring(text.split("\n", 1)[1])          # strict XML well-formedness (after the doctype line)
    page = Page()
    page.feed(text)
    page.close()
    assert page.stack == [], page.stack
    return page


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """Two runs of a job over two good files and a bad one; the second with a changed ceiling."""
    root = tmp_path_factory.mktemp("report")
    write_audio(root / "in" / "discs" / "side_a.flac", fmt="FLAC", subtype="PCM_16", rate=44100, seconds=0.3)
    write_audio(root / "in" / "tapes" / "reel_15ips.wav", rate=48000, seconds=0.3, channels=1)
    (root / "in" / "tapes" / "broken.wav").write_bytes(b"RIFF\0\0\0\0WAVEjunk")
    job_file = root / "job.toml"
    for ceiling in (-1.0, -3.0):
        job_file.write_text(JOB.format(ceiling=ceiling), encoding="utf-8")
        job = load_job(job_file)
        p = plan(job)
        summary = run_job(job, workers=1, the_plan=p)
        assert (summary.done, summary.failed) == (2, 1)
    return job, p, summary, read_records(job.manifest_path)


def test_report_is_written_and_parses(archive):
    job, _, summary, _ = archive
    path = job.output_root / "report.html"
    assert summary.report_path == str(path) and path.is_file()
    page = parse(path.read_text(encoding="utf-8"))
    assert "script" not in page.tags and "link" not in page.tags and "iframe" not in page.tags
    for tag, attrs in page.attrs:
        for name in ("src", "href"):
            value = attrs.get(name, "")
            assert not value or value.startswith("data:image/png;base64,"), (tag, value[:40])


def test_report_holds_every_manifest_record(archive):
    job, _, _, records = archive
    page = parse((job.output_root / "report.html").read_text(encoding="utf-8"))
    text = page.all_text
    assert len(records) == 6 and page.file_groups == 3        # latest record of each of the 3 files
    for rec in records:
        assert rec["input_rel"] in text
        assert rec["input_sha256"] in text                        # the failed file is hashed too
        if rec["status"] == "done":
            assert rec["output_sha256"] in text
        else:
            assert rec["error"] in text
    earlier = [r for r in page.rows if r and r[0] in {rec["started"] for rec in records}]
    assert len(earlier) == 3                                      # the first run's records
    latest = {r["input_rel"]: r for r in records}
    rows = {r[1].split()[0]: r for r in page.rows if len(r) == 10 and r[0].strip().isdigit()}
    for rel, rec in latest.items():
        cells = rows[rel]
        assert ("FAILED" in cells[9]) == (rec["status"] == "failed")
        if rec["status"] == "done":
            assert cells[3].startswith(rec["curve"]["name"])
            assert cells[6].replace("−", "-").startswith(f"{rec['level']['gain_db']:+.1f} dB")
            assert cells[8].strip() == str(rec["level"]["clipped_samples"])
    assert "×2" in rows["tapes/reel_15ips.wav"][4]


def test_report_totals_settings_and_version(archive):
    job, _, _, records = archive
    page = parse((job.output_root / "report.html").read_text(encoding="utf-8"))
    text = page.all_text
    done = [r for r in {r["input_rel"]: r for r in records}.values() if r["status"] == "done"]
    hours = sum(r["duration_s"] for r in done) / 3600
    assert f"{hours:.3f} h" in text and "2 done" in text and "1 failed" in text
    assert f"dspeq {dspeq.__version__}" in text
    assert "discs/*" in text and "tapes/*" in text and "ceiling_dbfs = -3" in text


def test_one_figure_per_distinct_curve(archive):
    job, _, _, _ = archive
    page = parse((job.output_root / "report.html").read_text(encoding="utf-8"))
    images = [a["src"] for t, a in page.attrs if t == "img"]
    assert page.tags.count("figure") == 2 and len(images) == 2
    for src in images:
        assert base64.b64decode(src.split(",", 1)[1])[:8] == PNG_SIGNATURE
    captions = [t for t in page.text if t.strip()]
    for name, roots in (("riaa", "(318 / 3180,75 µs)"), ("nab-7.5ips@x2", "(25 / 1590 µs)")):
        assert any(a == name and b.startswith(f" {roots}; source:")  # a caption: bold name, roots, source
                   for a, b in zip(captions, captions[1:], strict=False))


def test_report_depends_only_on_job_and_records(archive, monkeypatch):
    job, p, _, records = archive
    # Figures drawn afresh give the same page as the one the run wrote: no clock, no wall time.
    monkeypatch.setattr(report_mod, "_PNG_CACHE", {})
    assert report_mod.render_report(job, records, p) == (job.output_root / "report.html").read_text("utf-8")


def test_report_without_matplotlib_says_so(archive, monkeypatch):
    job, p, _, records = archive
    monkeypatch.setattr(report_mod, "_PNG_CACHE", {})
    for name in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setitem(sys.modules, "matplotlib", None)          # import matplotlib now fails
    text = report_mod.render_report(job, records, p)
    page = parse(text)
    assert "img" not in page.tags and page.file_groups == 3
    assert "Figures are not included: plotting needs matplotlib" in page.all_text


CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run", "--hide-scrollbars"]


def chromium(args: list[str], profile: Path) -> subprocess.CompletedProcess:
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        pytest.skip("chromium is not installed (Debian package 'chromium'; .ci/run installs it)")
    return subprocess.run([exe, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args],
                          capture_output=True, timeout=120)


@pytest.mark.slow
def test_report_renders_in_headless_chromium(archive, tmp_path):
    image = pytest.importorskip("PIL.Image")
    job, _, _, _ = archive
    url = (job.output_root / "report.html").as_uri()
    shot = tmp_path / "report.png"
    done = chromium(["--window-size=1400,4200", f"--screenshot={shot}", url], tmp_path / "profile")
    assert done.returncode == 0 and shot.is_file(), done.stderr[-2000:]
    img = image.open(shot).convert("RGB")
    assert img.size == (1400, 4200)
    rgb = np.asarray(img, dtype=int)
    ink = float(np.mean(rgb.min(axis=2) < 200))
    blue = int(np.sum(np.all(np.abs(rgb - np.array(C0_RGB)) <= 12, axis=2)))
    rows = float(np.mean((rgb.min(axis=2) < 200).any(axis=1)))
    print(f"rendered: {ink:.1%} of the pixels and {rows:.0%} of the pixel rows inked, "
          f"{blue} pixels of the figures' design colour")
    assert ink > 0.01 and rows > 0.5   # text, tables and figures down the page, not a blank page
    assert blue > 500                  # the embedded PNG figures were decoded and drawn
    pdf = tmp_path / "report.pdf"
    done = chromium(["--no-pdf-header-footer", f"--print-to-pdf={pdf}", url], tmp_path / "profile2")
    data = pdf.read_bytes()
    import re

    pages = len(re.findall(rb"/Type\s*/Page(?!s)", data))
    print(f"printed: {pages} A4 landscape pages, {len(data)} bytes")
    assert data.startswith(b"%PDF") and pages >= 3   # settings and files, then the figures
