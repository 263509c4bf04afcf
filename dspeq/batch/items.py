"""Item lists: a collection's spreadsheet (CSV) drives the job.

Archives keep one row per carrier or file with what is known about it: the
file (a path or a pattern relative to the input folder), the curve, the
speed ratio of the transfer, the curve the transfer machine applied, and
free notes.  A job names such a CSV in its ``[items]`` table and says which
column holds what; see ``batch/README.md``.

* :func:`read_table` reads a CSV as a spreadsheet exports it: UTF-8 with or
  without a byte-order mark, ``,`` ``;`` or tab separators (detected from
  the header, or an Excel ``sep=`` first line, or set in the job), quoted
  fields (separators and line breaks inside quotes), blank lines.  Errors
  name the row (the file's line number, the header being row 1 in a plain
  export) and the column.
* :func:`load_items` turns the rows into :class:`ItemRow` values, checking
  every cell (an unknown curve name gets the closest catalog names).  A bad
  cell does not stop the job: the files its row matches are refused with
  that message, the rest of the batch goes on.
* :class:`Resolver` gives each planned file its settings: the first rule
  that matches it (or ``[defaults]``) updated with what its rows say, and
  collects the checks reported before anything is processed
  (:class:`ItemCheck`): rows that match no file, files that match no row
  and no rule, files matched twice with different settings (refused unless
  the job's ``wins`` says whether the item list or the rules win), rows
  with bad cells.
"""

from __future__ import annotations

import csv
import dataclasses
import difflib
import io
import math
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .._errors import DspeqError, JobError

__all__ = ["ItemRow", "ItemList", "ItemCheck", "Resolver", "load_items", "read_table", "parse_speed",
           "ITEM_KEYS", "WINS"]

#: Keys of the ``[items]`` table.
ITEM_KEYS = ("file", "separator", "path_column", "curve_column", "speed_column", "from_column",
             "notes_columns", "wins")
#: Values of ``wins``: who decides when a file gets different settings from two places.
WINS = ("neither", "items", "rules")
#: Column key → Settings field for the columns that carry settings.
_SETTING_COLUMNS = {"curve_column": "curve", "speed_column": "speed", "from_column": "from_curve"}
#: Job-file names of those settings (for messages).
_KEY_NAMES = {"curve": "curve", "speed": "speed", "from_curve": "from"}
_SEPARATORS = {",": ",", ";": ";", "tab": "\t", "\t": "\t"}
_NO_CURVE = ("none", "flat", "-")
_GLOB_CHARS = re.compile(r"[*?\[]")
_SEP_LINE = re.compile(r"\A\s*sep=(.)\s*\Z", re.IGNORECASE)


# ----------------------------------------------------------------------------- reading the CSV
def _decode(raw: bytes, where: str) -> str:
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        row = raw[:exc.start].count(b"\n") + 1
        raise JobError(f"{where} row {row}: not UTF-8 text (byte 0x{raw[exc.start]:02x}); "
                       "export the sheet as CSV in UTF-8") from None


def _count_outside_quotes(line: str, sep: str) -> int:
    count, quoted = 0, False
    for ch in line:
        if ch == '"':
            quoted = not quoted
        elif ch == sep and not quoted:
            count += 1
    return count


def _detect_separator(text: str) -> str:
    """The separator that splits the first non-blank line into the most fields (ties: ``,``)."""
    first = next((line for line in text.splitlines() if line.strip()), "")
    counts = {sep: _count_outside_quotes(first, sep) for sep in (",", ";", "\t")}
    best = max(counts, key=lambda s: (counts[s], s == ","))
    return best


def read_table(path: str | os.PathLike, separator: str | None = None,
               where: str | None = None) -> tuple[list[str], list[tuple[int, list[str]]], str]:
    """Read a spreadsheet's CSV export.

    Parameters
    ----------
    path : path-like
        The CSV file.
    separator : str, optional
        ``","``, ``";"`` or ``"tab"``; by default an Excel ``sep=X`` first line,
        else the one that splits the header into the most fields.
    where : str, optional
        Name used in messages (default: the path).

    Returns
    -------
    header : list of str
        Column names, stripped.
    rows : list of (int, list of str)
        Row number (line of the file where the row starts) and its cells,
        stripped; blank rows are left out.
    separator : str
        The separator used.

    Raises
    ------
    JobError
        If the file is not UTF-8, has no header, or has broken quoting
        (with the row).
    """
    where = where or os.fspath(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise JobError(f"{where}: cannot read the item list ({exc.strerror})") from None
    text = _decode(raw, where)
    lines = text.split("\n", 1)
    hint = _SEP_LINE.match(lines[0].rstrip("\r"))
    if hint:                      # Excel's "sep=;" line: use it, keep the line numbering
        text = "\n" + (lines[1] if len(lines) > 1 else "")
    sep = _SEPARATORS.get(separator or (hint.group(1) if hint else _detect_separator(text)))
    if sep is None:
        raise JobError(f"{where}: separator {separator!r} is not one of ',', ';', 'tab'")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=sep, quotechar='"', strict=True)
    header, rows, start = None, [], 1
    try:
        for cells in reader:
            cells = [c.strip() for c in cells]
            if any(cells):
                if header is None:
                    header = cells
                else:
                    rows.append((start, cells))
            start = reader.line_num + 1
    except csv.Error as exc:
        raise JobError(f"{where} row {start}: {exc} (check the quotes in that row)") from None
    if header is None:
        raise JobError(f"{where}: the item list is empty (no header row)")
    return header, rows, "tab" if sep == "\t" else sep


def _column_index(header: list[str], name: str, key: str, where: str) -> int:
    """Index of the column called ``name`` (exact, else ignoring case and spaces)."""
    if name in header:
        if header.count(name) > 1:
            raise JobError(f"{where}: {key} {name!r} names {header.count(name)} columns of the header")
        return header.index(name)
    def folded(s: str) -> str:
        return " ".join(s.split()).casefold()
    loose = [i for i, h in enumerate(header) if folded(h) == folded(name)]
    if len(loose) == 1:
        return loose[0]
    close = difflib.get_close_matches(name, [h for h in header if h], n=2, cutoff=0.5)
    hint = f" (did you mean {', '.join(repr(c) for c in close)}?)" if close else ""
    raise JobError(f"{where}: {key} = {name!r}: no such column in the header{hint}; "
                   f"columns: {', '.join(repr(h) for h in header if h)}")


# ----------------------------------------------------------------------------- cells
def parse_speed(text: str) -> float:
    """A speed ratio as people write it: ``2``, ``2,0``, ``0.5``, ``15/7.5``, ``x2``, ``2x``.

    Raises
    ------
    ValueError
        If it is not a positive finite number between 0.001 and 1000.

    Examples
    --------
    >>> parse_speed("15/7.5"), parse_speed("2,5"), parse_speed("×2")
    (2.0, 2.5, 2.0)
    """
    t = text.strip().lower().replace("×", "x").replace(" ", "")
    t = t.removeprefix("x").removesuffix("x")
    if "," in t and "." not in t:
        t = t.replace(",", ".")
    num, _, den = t.partition("/")
    try:
        value = float(num) / (float(den) if den else 1.0)
    except (ValueError, ZeroDivisionError):
        raise ValueError(f"{text!r} is not a speed ratio (e.g. 2, 0.5 or 15/7.5)") from None
    if not (math.isfinite(value) and 1e-3 <= value <= 1e3):
        raise ValueError(f"speed ratio {text!r} is outside 0.001 … 1000")
    return value


def _check_curve(text: str) -> str:
    from ..spec import parse_curve

    parse_curve(text)
    return text


def _check_from(text: str) -> str | None:
    return None if text.lower() in _NO_CURVE else _check_curve(text)


_CELL_PARSERS = {"curve": _check_curve, "speed": parse_speed, "from_curve": _check_from}


def _row_path(cell: str, input_root: Path) -> str:
    """The cell as a pattern relative to the input folder (``\\`` → ``/``; absolute paths inside it)."""
    text = cell.replace("\\", "/").strip()
    while text.startswith("./"):
        text = text[2:]
    if text.startswith("/") or re.match(r"[A-Za-z]:/", text):
        root = input_root.as_posix().rstrip("/") + "/"
        if not text.lower().startswith(root.lower()):
            raise ValueError(f"{cell!r} is not inside the input folder {str(input_root)!r}")
        text = text[len(root):]
    return text


# ----------------------------------------------------------------------------- rows
@dataclass(frozen=True)
class ItemRow:
    """One row of an item list.

    Attributes
    ----------
    row : int
        Row number (the file's line where the row starts).
    path : str
        The path or pattern, relative to the input folder (``/`` separators).
    values : dict
        Settings the row gives (``curve``, ``speed``, ``from_curve``), only
        for cells that are filled in.
    notes : dict
        Note columns → their (non-empty) cells.
    problem : str or None
        Why the row cannot be used (bad cell), naming row and column.
    """

    row: int
    path: str
    values: dict[str, Any]
    notes: dict[str, str]
    problem: str | None = None
    regex: re.Pattern | None = field(default=None, compare=False, repr=False)

    @property
    def is_pattern(self) -> bool:
        return bool(_GLOB_CHARS.search(self.path))

    def record(self) -> dict[str, Any]:
        """What the manifest keeps of this row."""
        return {"row": self.row, "path": self.path, "notes": dict(self.notes)}


@dataclass(frozen=True)
class ItemList:
    """A loaded item list: its rows, the column mapping and who wins a conflict."""

    path: Path
    name: str
    columns: dict[str, Any]
    wins: str
    separator: str
    rows: tuple[ItemRow, ...]
    _exact: dict[str, tuple[ItemRow, ...]] = field(default_factory=dict, compare=False, repr=False)
    _patterns: tuple[ItemRow, ...] = field(default=(), compare=False, repr=False)

    def __post_init__(self):
        exact: dict[str, list[ItemRow]] = {}
        for r in self.rows:
            if r.regex is not None and not r.is_pattern:
                exact.setdefault(r.path.lower(), []).append(r)
        object.__setattr__(self, "_exact", {k: tuple(v) for k, v in exact.items()})
        object.__setattr__(self, "_patterns", tuple(r for r in self.rows
                                                    if r.regex is not None and r.is_pattern))

    def rows_for(self, rel: str) -> list[ItemRow]:
        """The rows that match a file (relative POSIX path), in row order."""
        name = rel.rsplit("/", 1)[-1].lower()
        found = list(self._exact.get(rel.lower(), ())) + list(self._exact.get(name, ()))
        found += [r for r in self._patterns if _matches(r, rel)]
        return sorted({r.row: r for r in found}.values(), key=lambda r: r.row)

    def describe(self) -> dict[str, Any]:
        """The list's part of the job settings (for plans and reports)."""
        return {"file": self.name, "rows": len(self.rows), "separator": self.separator,
                **self.columns, "wins": self.wins}


def _matches(row: ItemRow, rel: str) -> bool:
    target = rel if "/" in row.path else rel.rsplit("/", 1)[-1]
    return row.regex.match(target) is not None


def _make_row(number: int, cells: list[str], idx: dict[str, Any], header: list[str], input_root: Path,
              where: str) -> ItemRow:
    from .job import compile_pattern

    def cell(i: int) -> str:
        return cells[i] if i < len(cells) else ""

    notes = {header[i]: cell(i) for i in idx["notes_columns"] if cell(i)}
    path_cell = cell(idx["path_column"])
    at = f"{where} row {number}"
    if len(cells) > len(header) and any(cells[len(header):]):
        return ItemRow(number, path_cell, {}, notes,
                       f"{at}: {len(cells)} cells but the header has {len(header)} columns")
    if not path_cell:
        return ItemRow(number, "", {}, notes,
                       f"{at}, column {header[idx['path_column']]!r}: no file path")
    try:
        path = _row_path(path_cell, input_root)
        regex = compile_pattern(path, at)
    except (ValueError, DspeqError) as exc:
        return ItemRow(number, path_cell, {}, notes,
                       f"{at}, column {header[idx['path_column']]!r}: {exc}")
    values, problem = {}, None
    for key, name in _SETTING_COLUMNS.items():
        if key not in idx or not cell(idx[key]):
            continue
        try:
            values[name] = _CELL_PARSERS[name](cell(idx[key]))
        except (ValueError, DspeqError) as exc:
            problem = problem or f"{at}, column {header[idx[key]]!r}: {exc}"
    return ItemRow(number, path, values, notes, problem, regex)


def _items_table(table: Any, where: str) -> dict[str, Any]:
    if not isinstance(table, dict):
        raise JobError(f"{where}: [items] must be a table")
    unknown = set(table) - set(ITEM_KEYS)
    if unknown:
        raise JobError(f"{where} [items]: unknown key(s) {', '.join(sorted(unknown))}; "
                       f"allowed: {', '.join(ITEM_KEYS)}")
    for key in ("file", "path_column"):
        if not isinstance(table.get(key), str) or not table[key].strip():
            raise JobError(f"{where} [items]: {key} must be a non-empty string, got {table.get(key)!r}")
    wins = table.get("wins", "neither")
    if wins not in WINS:
        raise JobError(f"{where} [items]: wins = {wins!r} is not one of {', '.join(WINS)}")
    notes = table.get("notes_columns", [])
    if isinstance(notes, str):
        notes = [notes]
    if not isinstance(notes, list) or not all(isinstance(n, str) and n.strip() for n in notes):
        raise JobError(f"{where} [items]: notes_columns must be a list of column names, got {notes!r}")
    for key in _SETTING_COLUMNS:
        if key in table and (not isinstance(table[key], str) or not table[key].strip()):
            raise JobError(f"{where} [items]: {key} must be a column name, got {table[key]!r}")
    return {**table, "notes_columns": notes, "wins": wins}


def load_items(table: Any, base: Path, input_root: Path, where: str) -> ItemList:
    """Read the item list an ``[items]`` table names (file relative to the job file's folder).

    Raises
    ------
    JobError
        For a bad ``[items]`` table, an unreadable CSV or a mapped column the
        header does not have.  Bad cells do not raise: they become the
        row's :attr:`ItemRow.problem`.
    """
    t = _items_table(table, where)
    path = (base / t["file"]).absolute()
    name = t["file"]
    header, raw_rows, sep = read_table(path, t.get("separator"), name)
    idx: dict[str, Any] = {"path_column": _column_index(header, t["path_column"], "path_column", name)}
    for key in _SETTING_COLUMNS:
        if key in t:
            idx[key] = _column_index(header, t[key], key, name)
    idx["notes_columns"] = [_column_index(header, n, "notes_columns", name) for n in t["notes_columns"]]
    rows = tuple(_make_row(n, cells, idx, header, input_root, name) for n, cells in raw_rows)
    columns = {k: t[k] for k in ("path_column", *_SETTING_COLUMNS, "notes_columns") if k in t}
    return ItemList(path, name, columns, t["wins"], sep, rows)


# ----------------------------------------------------------------------------- checks
@dataclass
class ItemCheck:
    """What the item list check found, in order (``kind``, message).

    Kinds: ``unused-row`` (a row matches no file), ``no-row`` (a file matches
    no row and no rule), ``conflict`` (refused), ``resolved`` (a conflict the
    job's ``wins`` decided), ``bad-row`` (a bad cell; its files are
    refused), ``no-curve`` (nothing gives the file a curve).
    """

    items: ItemList
    findings: list[tuple[str, str]] = field(default_factory=list)
    matched_rows: set[int] = field(default_factory=set)

    def add(self, kind: str, message: str) -> None:
        self.findings.append((kind, message))

    def of(self, kind: str) -> list[str]:
        return [m for k, m in self.findings if k == kind]

    @property
    def problems(self) -> int:
        """Findings that refuse a file or leave a row unused (everything but ``resolved``)."""
        return sum(k != "resolved" for k, _ in self.findings)

    def lines(self) -> Iterator[str]:
        """The check as text lines, a summary first."""
        n = len(self.items.rows)
        yield (f"item list {self.items.name}: {n} row(s), {len(self.matched_rows)} matched a file; "
               f"{self.problems} finding(s) to check")
        for kind, message in self.findings:
            yield f"{kind}: {message}"


def _same(field_name: str, a: Any, b: Any) -> bool:
    """Do two values of a setting mean the same (curves compared by their transfer function)?"""
    if a == b:
        return True
    if field_name in ("curve", "from_curve") and a is not None and b is not None:
        from ..spec import parse_curve

        try:
            return parse_curve(a).key() == parse_curve(b).key()
        except DspeqError:
            return False
    return False


class Resolver:
    """Settles each file's settings from the item list and the rules (see module docstring)."""

    def __init__(self, job):
        self.job = job
        self.items: ItemList = job.items
        self.check = ItemCheck(self.items)

    def _merge_rows(self, rel: str, rows: list[ItemRow]) -> tuple[dict, dict, list[str]]:
        """(values, row of each value, conflicts between rows)."""
        values: dict[str, Any] = {}
        origin: dict[str, int] = {}
        conflicts = []
        for r in rows:
            for key, value in r.values.items():
                if key not in values:
                    values[key], origin[key] = value, r.row
                elif not _same(key, values[key], value):
                    conflicts.append(f"rows {origin[key]} and {r.row} give {_KEY_NAMES[key]} "
                                     f"{values[key]!r} and {value!r}")
        return values, origin, conflicts

    def _against_rule(self, values: dict, origin: dict, rule) -> list[str]:
        out = []
        for key, value in values.items():
            if key in rule.keys and not _same(key, getattr(rule.settings, key), value):
                out.append(f"row {origin[key]} gives {_KEY_NAMES[key]} {value!r}, rule {rule.index} "
                           f"(files = {rule.pattern!r}) gives {getattr(rule.settings, key)!r}")
        return out

    def settle(self, rel: str) -> tuple[Any, int | None, dict | None, str | None]:
        """(settings or None, rule number, manifest item record, refusal) for one file."""
        rule = self.job.rule_for(rel)
        rows = self.items.rows_for(rel)
        base = rule.settings if rule else self.job.defaults
        index = rule.index if rule else None
        if not rows:
            if rule is None:
                how = (f"processed with [defaults] ({self.job.defaults.curve})" if self.job.defaults.curve
                       else "not processed")
                self.check.add("no-row", f"{rel}: matches no item row and no rule; {how}")
            return (base if base.curve else None), index, None, None
        self.check.matched_rows.update(r.row for r in rows)
        item = {"list": self.items.name, "rows": [r.record() for r in rows]}
        bad = [r.problem for r in rows if r.problem]
        if bad:
            self.check.add("bad-row", f"{bad[0]}; refused: {rel}")
            return base, index, item, bad[0]
        values, origin, conflicts = self._merge_rows(rel, rows)
        with_rule = self._against_rule(values, origin, rule) if rule else []
        if conflicts or with_rule:
            text = f"{rel}: matched twice with different settings: {'; '.join(conflicts + with_rule)}"
            if self.items.wins == "neither":
                self.check.add("conflict", f"{text}; refused (set wins = \"items\" or \"rules\" in [items])")
                return base, index, item, f"{text}; say which wins ([items] wins)"
            self.check.add("resolved", f"{text}; the {self.items.wins} win (first row among rows)")
            if self.items.wins == "rules":
                values = {k: v for k, v in values.items() if k not in rule.keys} if rule else values
        return self._finish(rel, rows, base, values, index, item)

    def _finish(self, rel, rows, base, values, index, item):
        from .job import validate_settings

        settings = dataclasses.replace(base, **values)
        if settings.curve is None:
            self.check.add("no-curve", f"{rel}: row {rows[0].row} matches it but no row, rule or "
                                       "[defaults] gives a curve; not processed")
            return None, index, item, None
        where = f"{self.items.name} row {rows[0].row}"
        try:
            return validate_settings(settings, where), index, item, None
        except JobError as exc:
            self.check.add("bad-row", f"{exc}; refused: {rel}")
            return base, index, item, str(exc)

    def finish(self) -> ItemCheck:
        """The check, with the rows that matched no file added."""
        for r in self.items.rows:
            if r.row not in self.check.matched_rows:
                if r.problem:
                    self.check.add("bad-row", r.problem + ("; matches no file" if r.regex else ""))
                else:
                    self.check.add("unused-row", f"row {r.row} ({r.path}): matches no file")
        return self.check

