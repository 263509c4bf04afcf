"""The job report: one self-contained HTML page an archive can file beside the outputs.

:func:`write_report` writes ``report.html`` in the output folder after each
run (:func:`dspeq.batch.run.run_job` calls it).  The page holds the job's
settings, the item list check, one table row for the latest record of each
file (input, output, curve, speed, gain, peak, clips, status, SHA-256
digests), every earlier manifest record in a second table, totals (hours of
audio, failures) and the tool's version, and one figure per distinct curve
used (the analog curve and the designs actually applied, drawn from the
coefficients in the manifest, with the error panels of
:func:`dspeq.plot.figure_designs`) as PNG embedded in the page.

No script, no external style sheet, font or image: the page is valid XML
as well as HTML (so it can be checked with a strict parser), readable on
screen and when printed (A4 landscape, table headers repeated, figures not
split).  matplotlib is imported only to draw the figures; without it the
page says that the figures are left out.
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
import platform
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from .._errors import DspeqError
from .audio import temp_path

__all__ = ["REPORT_NAME", "write_report", "render_report", "latest_records", "curve_figures"]

#: File name of the report in the output folder.
REPORT_NAME = "report.html"
_FIGURE_DPI = 90
_PNG_CACHE: dict[tuple, bytes] = {}
_PNG_CACHE_MAX = 64

_CSS = """
body { font: 14px/1.4 "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: #111;
       margin: 20px 28px; }
h1 { font-size: 22px; margin: 0 0 2px 0; }
h2 { font-size: 17px; border-bottom: 1px solid #888; margin: 26px 0 6px 0; padding-bottom: 2px; }
h3 { font-size: 14px; margin: 14px 0 4px 0; }
p.sub { color: #444; margin: 0 0 10px 0; }
table { border-collapse: collapse; margin: 6px 0 10px 0; }
table.wide { width: 100%; }
th, td { border: 1px solid #aaa; padding: 3px 6px; vertical-align: top; text-align: left; }
th { background: #e8e8e8; }
table.kv th { font-weight: normal; background: #f2f2f2; white-space: nowrap; }
td.num { text-align: right; white-space: nowrap; }
tbody.file { break-inside: avoid; page-break-inside: avoid; }
tr.digests td { border-top: none; background: #fafafa; }
.hash { font-family: "DejaVu Sans Mono", "Liberation Mono", monospace; font-size: 10px;
        word-break: break-all; }
.small { font-size: 11px; color: #333; }
.failed { color: #a00000; font-weight: bold; }
.done { color: #005a00; }
ul.findings li { margin: 2px 0; }
figure { margin: 12px 0 18px 0; break-inside: avoid; page-break-inside: avoid; }
figure img { max-width: 100%; height: auto; border: 1px solid #ccc; }
figcaption { font-size: 12px; max-width: 60em; }
@page { size: A4 landscape; margin: 12mm; }
@media print {
  body { margin: 0; font-size: 10px; }
  h2 { break-after: avoid; page-break-after: avoid; }
  tr { break-inside: avoid; page-break-inside: avoid; }
  thead { display: table-header-group; }
  figure img { max-height: 145mm; width: auto; }
}
"""


# ----------------------------------------------------------------------------- small helpers
def _e(value: Any) -> str:
    """Escaped text (XML-safe: only &amp; &lt; &gt; &quot; &#x27;)."""
    return html.escape("" if value is None else str(value), quote=True)


def _num(value: Any, fmt: str, unit: str = "") -> str:
    if not isinstance(value, int | float) or isinstance(value, bool) or not math.isfinite(value):
        return "–"
    return f"{value:{fmt}}{unit}".replace("-", "−")


def _kv(rows: Iterable[tuple[str, Any]]) -> str:
    body = "".join(f"<tr><th>{_e(k)}</th><td>{v}</td></tr>" for k, v in rows)
    return f'<table class="kv"><tbody>{body}</tbody></table>'


def _table(header: Sequence[str], rows: Iterable[Sequence[str]], cls: str = "wide") -> str:
    """A table; each row is a list of ``<td>`` cells, or a ready ``<tbody>`` group (a str)."""
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    groups = []
    for row in rows:
        groups.append(row if isinstance(row, str) else "<tbody><tr>" + "".join(row) + "</tr></tbody>")
    return f'<table class="{cls}"><thead><tr>{head}</tr></thead>{"".join(groups)}</table>'


def _td(text: str, cls: str = "") -> str:
    return f'<td class="{cls}">{text}</td>' if cls else f"<td>{text}</td>"


def latest_records(records: Sequence[dict]) -> tuple[list[dict], list[dict]]:
    """(last record of each input, sorted by path; every earlier record, in manifest order)."""
    last: dict[str, int] = {}
    for i, rec in enumerate(records):
        last[str(rec.get("input_rel", rec.get("input", i)))] = i
    keep = set(last.values())
    latest = sorted((records[i] for i in keep), key=lambda r: str(r.get("input_rel", "")))
    return latest, [r for i, r in enumerate(records) if i not in keep]


# ----------------------------------------------------------------------------- file tables
def _notes(rec: dict) -> str:
    item = rec.get("item")
    if not item:
        return ""
    parts = []
    for row in item.get("rows", []):
        notes = "; ".join(f"{k}: {v}" for k, v in row.get("notes", {}).items())
        parts.append(f"{item.get('list', 'items')} row {row.get('row')}" + (f" — {notes}" if notes else ""))
    return f'<div class="small">{_e(" | ".join(parts))}</div>'


def _speed(rec: dict) -> str:
    s = rec.get("settings") or {}
    text = _num(s.get("speed", 1.0), "g")
    text = f"×{text}"
    rc = rec.get("rate_change")
    if rc:
        lines = []
        if rc.get("restore_speed"):
            lines.append(f"restored: {rc['input_rate']:g} → {rc['labelled_rate']:.10g} Hz (relabelled)")
        if rc.get("resampler"):
            lines.append(f"resampled to {rc['output_rate']:g} Hz ({rc['resampler']})")
        lines.append(f"output {rc['output_duration_s']:.1f} s")
        text += "".join(f'<div class="small">{_e(line)}</div>' for line in lines)
    return text


def _curve(rec: dict) -> str:
    c = rec.get("curve")
    if c:
        extra = f'<div class="small">{_e(c.get("roots", ""))}</div>'
        return _e(c.get("name")) + extra
    s = rec.get("settings") or {}
    return _e(s.get("curve") or "–") + (f" from {_e(s['from'])}" if s.get("from") else "")


def _status(rec: dict) -> str:
    if rec.get("status") == "failed":
        return f'<span class="failed">FAILED</span><div class="small">{_e(rec.get("error"))}</div>'
    return f'<span class="done">{_e(rec.get("status"))}</span>'


def _digest_parts(rec: dict) -> list[str]:
    parts = [f"input {rec.get('input_sha256') or '–'}"]
    if rec.get("output_sha256"):
        parts.append(f"output {rec['output_sha256']}")
    return parts


def _digests(rec: dict) -> str:
    return '<td class="hash">' + "<br/>".join(_e(p) for p in _digest_parts(rec)) + "</td>"


def _output(rec: dict) -> str:
    out = rec.get("output_rel") or _relative(rec.get("output"), rec.get("input"), rec.get("input_rel"))
    fmt = rec.get("output_format")
    if not fmt or rec.get("status") != "done":
        return _e(out)
    rate = (rec.get("rate_change") or {}).get("output_rate", rec.get("rate"))
    return _e(out) + f'<div class="small">{_e(fmt.get("container"))}/{_e(fmt.get("subtype"))}, ' \
                     f'{_num(rate, "g", " Hz")}, {_e(rec.get("channels"))} ch</div>'


def _relative(output: str | None, input_path: str | None, input_rel: str | None) -> str:
    """A failed record's output path relative to the output folder (it mirrors the input's)."""
    if not output:
        return "–"
    depth = len(Path(input_rel).parts) if input_rel and input_path else 1
    return Path(*Path(output).parts[-depth:]).as_posix()


def _file_row(n: int, rec: dict) -> str:
    """One file: a row of figures and, below it, a row with its SHA-256 digests."""
    level = rec.get("level") or {}
    gain = _num(level.get("gain_db"), "+.1f", " dB")
    if level.get("mode"):
        gain += f'<div class="small">{_e(level["mode"])}</div>'
    cells = [_td(str(n), "num"), _td(_e(rec.get("input_rel")) + _notes(rec)), _td(_output(rec)),
             _td(_curve(rec)), _td(_speed(rec)), _td(_num(rec.get("duration_s"), ".1f", " s"), "num"),
             _td(gain, "num"), _td(_num(level.get("output_peak_dbfs"), ".2f", " dBFS"), "num"),
             _td(_num(level.get("clipped_samples"), "d"), "num"), _td(_status(rec))]
    digests = " · ".join(_e(p) for p in _digest_parts(rec))
    return (f'<tbody class="file"><tr>{"".join(cells)}</tr><tr class="digests"><td></td>'
            f'<td colspan="{len(_FILE_HEADER) - 1}" class="hash">SHA-256 {digests}</td></tr></tbody>')


_FILE_HEADER = ("#", "input", "output", "curve", "speed", "duration", "gain", "peak", "clips", "status")


def _earlier_row(rec: dict) -> list[str]:
    return [_td(_e(rec.get("started"))), _td(_e(rec.get("input_rel"))), _td(_status(rec)),
            _td(_curve(rec)), _digests(rec), _td(_e((rec.get("settings_digest") or "")[:16]), "hash")]


# ----------------------------------------------------------------------------- figures
def _curve_key(rec: dict) -> tuple:
    c, s = rec["curve"], rec.get("settings") or {}
    lf = (rec.get("design") or {}).get("options", {}).get("lf_limit_hz")
    return (c.get("spec"), c.get("speed"), c.get("from"), s.get("reference_hz"), lf)


def _designs(recs: list[dict]) -> list:
    """Design objects rebuilt from the coefficients the records say were applied (one per rate/method)."""
    import numpy as np

    from ..design import Design
    from ..spec import curve

    first = recs[0]
    c = curve(first["curve"]["spec"], speed=first["curve"]["speed"], from_curve=first["curve"]["from"],
              reference_hz=(first.get("settings") or {}).get("reference_hz"))
    seen, out = set(), []
    for rec in recs:
        d = rec["design"]
        key = (d["rate"], d["method"], str(d.get("sos") or d.get("inner", {}).get("sos")))
        if key in seen:
            continue
        seen.add(key)
        if "oversample" in d:            # an oversampled run: inner sections and FIR taps as recorded
            from ..oversample import OversampledDesign

            out.append(OversampledDesign.from_dict(d, c))
            continue
        options = dict(d.get("options") or {})
        target = c.with_lf_limit(options.get("lf_limit_hz", 3.0))
        label = f"{d['method']} at {d['rate']:g} Hz"
        out.append(Design(np.array(d["sos"], dtype=float), float(d["rate"]), label, c, target, options))
    return sorted(out, key=lambda d: d.fs)


def _png(designs: list, title: str) -> bytes:
    key = (title, tuple((d.fs, d.method, getattr(d, "inner", d).sos.tobytes()) for d in designs))
    hit = _PNG_CACHE.get(key)
    if hit is not None:
        return hit
    from ..plot import figure_designs

    buf = io.BytesIO()
    figure_designs(designs, title=title).savefig(buf, format="png", dpi=_FIGURE_DPI)
    if len(_PNG_CACHE) >= _PNG_CACHE_MAX:
        _PNG_CACHE.clear()
    _PNG_CACHE[key] = buf.getvalue()
    return _PNG_CACHE[key]


def _caption(recs: list[dict], designs: list) -> str:
    c = recs[0]["curve"]
    devs = {}
    for rec in recs:
        dv = rec.get("deviation") or {}
        devs.setdefault(rec["design"]["rate"], dv)
    errs = "; ".join(f"{rate:g} Hz: max {_num(dv.get('max_abs_db'), '.3g', ' dB')}, "
                     f"phase {_num(dv.get('max_phase_deg_to_10k'), '.2g', '°')} to 10 kHz"
                     for rate, dv in sorted(devs.items()))
    return (f"<b>{_e(c.get('name'))}</b> ({_e(c.get('roots'))}); source: {_e(c.get('source'))}. "
            f"Used for {len(recs)} file(s). Designs applied (from the manifest's coefficients): "
            f"{_e(', '.join(map(_applied, designs)))}. Deviation 20 Hz – 20 kHz: {_e(errs)}.")


def _applied(d) -> str:
    """A design's name in a caption; an oversampled run says so, with its inner rate and latency."""
    from ..oversample import is_oversampled

    if not is_oversampled(d):
        return d.method
    return (f"{d.method} at {d.fs:g} Hz (oversampled x{d.factor}: sections at {d.inner.fs:g} Hz, "
            f"FIR latency {d.latency} frames removed)")


def curve_figures(records: Sequence[dict], figures: bool = True) -> tuple[list[str], str]:
    """(one ``<figure>`` per distinct curve of the done records, a note about figures left out)."""
    groups: dict[tuple, list[dict]] = {}
    for rec in records:
        if rec.get("status") == "done" and rec.get("curve") and rec.get("design"):
            groups.setdefault(_curve_key(rec), []).append(rec)
    if not groups:
        return [], "No file was processed, so there is no curve to draw."
    if not figures:
        return [], "Figures were not requested."
    out, missed = [], []
    for recs in groups.values():
        name = recs[0]["curve"]["name"]
        try:
            designs = _designs(recs)
            data = _png(designs, f"{name} — analog curve and the designs applied")
        except DspeqError as exc:        # matplotlib missing (or a record that no longer parses)
            if "matplotlib" in str(exc):
                return [], f"Figures are not included: {exc}."
            missed.append(f"no figure for {name}: {exc}")
            continue
        src = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
        out.append(f'<figure><img src="{src}" alt="{_e(name)}: magnitude, magnitude error and phase error"/>'
                   f"<figcaption>{_caption(recs, designs)}</figcaption></figure>")
    return out, "; ".join(missed)


# ----------------------------------------------------------------------------- sections
def _settings_text(d: dict) -> str:
    def value(v: Any) -> str:
        if isinstance(v, bool):
            return "true" if v else "false"
        return f"{v:g}" if isinstance(v, float) else str(v)
    return "; ".join(f"{k} = {value(v)}" for k, v in d.items() if v is not None)


def _job_section(job) -> str:
    rows = [("job", _e(job.source)), ("input folder", _e(job.input_root)),
            ("output folder", _e(job.output_root)), ("manifest", _e(job.manifest_path)),
            ("[defaults]", _e(_settings_text(job.defaults.to_dict())))]
    out = [_kv(rows)]
    if job.rules:
        rules = [[_td(str(r.index), "num"), _td(_e(r.pattern)),
                  _td(_e(_settings_text({k: v for k, v in r.settings.to_dict().items()
                                         if k in _rule_keys(r)})))] for r in job.rules]
        out.append("<h3>Rules (the first that matches a file gives its settings)</h3>"
                   + _table(("rule", "files", "settings it sets"), rules))
    if job.items is not None:
        out.append("<h3>Item list</h3>" + _kv((k, _e(", ".join(v) if isinstance(v, list) else v))
                                              for k, v in job.items.describe().items()))
    return "".join(out)


def _rule_keys(rule) -> set[str]:
    return {"from" if k == "from_curve" else k for k in rule.keys}


def _checks_section(the_plan) -> str:
    if the_plan is None:
        return "<p>No plan was given to the report.</p>"
    lines = []
    if the_plan.items is not None:
        lines += list(the_plan.items.lines())
    lines += [f"{rel}: no rule matches; not processed" for rel in the_plan.unmatched
              if the_plan.items is None]
    lines += [f"note: {n}" for n in the_plan.notices]
    if not lines:
        return "<p>Nothing to report: every file matched, no notices.</p>"
    return '<ul class="findings">' + "".join(f"<li>{_e(line)}</li>" for line in lines) + "</ul>"


def _versions(records: Sequence[dict]) -> str:
    import numpy
    import scipy
    import soundfile

    from .. import __version__

    parts = [f"dspeq {__version__}", f"Python {platform.python_version()}", f"numpy {numpy.__version__}",
             f"scipy {scipy.__version__}", f"soundfile {soundfile.__version__} "
             f"({soundfile.__libsndfile_version__ and 'libsndfile ' + soundfile.__libsndfile_version__})"]
    used = {(r.get("tool") or {}).get("version") for r in records} - {None}
    if used - {__version__}:
        parts.append(f"records made by dspeq {', '.join(sorted(used))}")
    return "; ".join(parts)


def _totals(latest: list[dict]) -> list[tuple[str, str]]:
    done = [r for r in latest if r.get("status") == "done"]
    failed = [r for r in latest if r.get("status") == "failed"]
    seconds = sum(r.get("duration_s") or 0.0 for r in done)
    rows = [("files", f"{len(latest)}: {len(done)} done, "
                      f"<span class=\"{'failed' if failed else ''}\">{len(failed)} failed</span>"),
            ("hours of audio (done files, transfer time)", f"{seconds / 3600:.3f} h ({seconds:.1f} s)")]
    restored = [r for r in done if r.get("rate_change")]
    if restored:
        out_s = sum(r["rate_change"]["output_duration_s"] for r in restored)
        rows.append(("files with a rate change", f"{len(restored)}; their output lasts {out_s:.1f} s"))
    clipped = sum(1 for r in done if (r.get("level") or {}).get("clipped_samples"))
    rows.append(("files with clipped samples", str(clipped)))
    return rows


def render_report(job, records: Sequence[dict], the_plan=None, *, figures: bool = True) -> str:
    """The report page as a string (see the module docstring).

    The page depends only on the job, the records and the plan (no clock, no
    wall times): a rerun that changes nothing leaves it as it was.

    Parameters
    ----------
    job : Job
        The job that was run.
    records : sequence of dict
        The manifest's records (:func:`dspeq.batch.read_records`).
    the_plan : Plan, optional
        The run's plan (item list check, notices).
    figures : bool
        Draw the curve figures (needs matplotlib).
    """
    latest, earlier = latest_records(records)
    figs, fig_note = curve_figures(latest, figures)
    parts = [
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"/>',
        '<meta name="viewport" content="width=device-width, initial-scale=1"/>',
        f"<title>dspeq job report — {_e(Path(str(job.source)).name)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>Job report: {_e(Path(str(job.source)).name)}</h1>",
        f'<p class="sub">Records from {_e(_span(records))}; page made by {_e(_versions(records))}'
        " on " + _e(platform.node() or "this machine") + ".</p>",
        "<h2>Totals</h2>", _kv(_totals(latest)),
        "<h2>Job settings</h2>", _job_section(job),
        "<h2>Checks before processing</h2>", _checks_section(the_plan),
        f"<h2>Files ({len(latest)}; the latest record of each)</h2>",
        _table(_FILE_HEADER, (_file_row(i, r) for i, r in enumerate(latest, 1))),
    ]
    if earlier:
        parts += [f"<h2>Earlier records ({len(earlier)})</h2>",
                  _table(("started", "input", "status", "curve", "SHA-256 digests", "settings digest"),
                         (_earlier_row(r) for r in earlier))]
    parts += ["<h2>Curves</h2>"]
    if fig_note:
        parts.append(f"<p>{_e(fig_note)}</p>")
    parts += figs
    parts += [f'<p class="small">Manifest: {_e(job.manifest_path)} ({len(records)} record(s)). '
              "Each record there holds the full settings, coefficients and deviation of its file.</p>",
              "</body></html>\n"]
    return "\n".join(parts)


def _span(records: Sequence[dict]) -> str:
    times = sorted(str(r["started"]) for r in records if r.get("started"))
    return f"{times[0]} to {times[-1]}" if times else "no run yet"


def write_report(job, the_plan=None, *, path: str | os.PathLike | None = None,
                 figures: bool = True) -> Path:
    """Write the report of ``job`` from its manifest (default ``<output>/report.html``); return its path.

    Written to a temporary name in the same folder and renamed, so a
    reader never sees half a page; an existing report with the same
    content is left untouched.

    Raises
    ------
    OSError
        If the output folder cannot be written.
    """
    from .manifest import read_records

    out = Path(path) if path is not None else job.output_root / REPORT_NAME
    text = render_report(job, read_records(job.manifest_path), the_plan, figures=figures)
    out.parent.mkdir(parents=True, exist_ok=True)
    try:
        if out.read_text(encoding="utf-8") == text:
            return out
    except (OSError, UnicodeDecodeError):
        pass
    tmp = temp_path(out)
    try:
        with open(tmp, "x", encoding="utf-8") as f:
            f.write(text)
        os.replace(tmp, out)
    except BaseException:
        if tmp.exists():
            tmp.unlink()
        raise
    return out
