"""Batch jobs: a TOML job file (or the quick command-line form) → validated Job → Tasks.

A job names an input folder, an output folder, default settings and ordered
rules (first match wins) that give each file its curve and settings; see
``batch/README.md`` for the format.  :func:`plan` walks the input tree and
turns the job into one :class:`Task` per audio file: small, picklable
records that :func:`dspeq.batch.run.process_task` can run in any process.

Safety rules enforced here: the output folder may be neither the input
folder nor inside it (nor contain it), a manifest may not be written inside
the input folder, patterns may not be absolute or contain ``..``, directory
symbolic links in the input tree are not followed, and two inputs that would
share one output name are both refused.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import os
import re
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path, PurePosixPath
from typing import Any

from .._errors import DspeqError, JobError
from ..design import DEFAULT_LF_LIMIT_HZ, DEFAULT_METHOD
from .audio import AUDIO_EXTENSIONS, OUTPUT_FORMATS, SUBTYPES, output_suffix

__all__ = [
    "Settings", "Rule", "Job", "Task", "Plan", "load_job", "quick_job", "plan", "compile_pattern",
    "DEFAULT_CEILING_DBFS", "DEFAULT_BLOCK_FRAMES", "DEFAULT_SPOOL_MB", "MANIFEST_NAME",
    "check_folders", "file_seed", "real_path", "within",
]

DEFAULT_CEILING_DBFS = -1.0
DEFAULT_BLOCK_FRAMES = 65536
#: First-pass samples of one file up to this size stay in memory (per worker).
DEFAULT_SPOOL_MB = 64
MANIFEST_NAME = "dspeq-manifest.jsonl"
GAIN_RANGE_DB = (-96.0, 48.0)
CEILING_RANGE_DBFS = (-60.0, 0.0)


@dataclass(frozen=True)
class Settings:
    """Everything that decides how one file is processed (defaults shared with the CLI).

    Attributes
    ----------
    curve : str or None
        Curve spec (catalog name, ``tc:…``, ``disc:…`` or expression in s).
    speed : float
        Transfer speed ÷ recorded speed.
    from_curve : str or None
        Playback curve the transfer machine already applied (job key ``from``).
    reference_hz : float or None
        Frequency where the curve is 0 dB (None: 1 kHz).
    method : str
        Design method.
    lf_limit_hz : float
        Low-frequency limit replacing an ideal integrator.
    gain_db : float or None
        Fixed gain in dB; None for automatic (peak-safe for integer output,
        0 dB for float output).  Job key ``gain_db``, ``"auto"`` for None.
    ceiling_dbfs : float
        Highest output peak the automatic gain allows.
    output_format : str
        ``same`` or one of wav, wavex, rf64, w64, flac, aiff.
    subtype : str
        ``same`` or one of int8, int16, int24, int32, float32, float64.
    dither_seed : int
        Base seed; each file's dither seed is derived from it and the file's
        relative path (see :func:`file_seed`) and recorded.
    restore_speed : bool
        Write the output at the recorded speed: its samples labelled with the
        rate fs / ``speed`` (no resampling; see :mod:`dspeq.batch.speed`).
    output_rate_hz : float or None
        Resample the output to this rate (after any speed restoration).
    oversample : int
        1 (off), 2 or 4: run the design at that multiple of the file's rate
        between two linear-phase FIR low-passes (:mod:`dspeq.oversample`),
        the FIR latency removed exactly.
    """

    curve: str | None = None
    speed: float = 1.0
    from_curve: str | None = None
    reference_hz: float | None = None
    method: str = DEFAULT_METHOD
    lf_limit_hz: float = DEFAULT_LF_LIMIT_HZ
    gain_db: float | None = None
    ceiling_dbfs: float = DEFAULT_CEILING_DBFS
    output_format: str = "same"
    subtype: str = "same"
    dither_seed: int = 0
    restore_speed: bool = False
    output_rate_hz: float | None = None
    oversample: int = 1

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (job-file key names; ``gain_db`` None → ``"auto"``).

        The rate and oversampling keys appear only when set, so the settings
        digests of jobs that do not use them are those of earlier versions.
        """
        d = dataclasses.asdict(self)
        d["from"] = d.pop("from_curve")
        d["gain_db"] = "auto" if self.gain_db is None else self.gain_db
        for key in _OPTIONAL_KEYS:
            if d[key] == _OPTIONAL_KEYS[key]:
                del d[key]
        return d

    def describe(self) -> str:
        """One line for plans and logs."""
        curve = self.curve or "?"
        if self.speed != 1.0:
            curve += f" at x{self.speed:g}"
        if self.from_curve:
            curve += f" from {self.from_curve}"
        level = (f"gain {self.gain_db:+g} dB" if self.gain_db is not None
                 else f"gain auto (ceiling {self.ceiling_dbfs:g} dBFS)")
        rate = ("; speed restored" if self.restore_speed else "") + (
            f"; resampled to {self.output_rate_hz:g} Hz" if self.output_rate_hz else "")
        method = self.method + (f" oversampled x{self.oversample}" if self.oversample > 1 else "")
        return f"{curve}; {method}; {level}; {self.output_format}/{self.subtype}{rate}"


#: Settings keys left out of :meth:`Settings.to_dict` at these (default) values.
_OPTIONAL_KEYS = {"restore_speed": False, "output_rate_hz": None, "oversample": 1}


#: Job-file key → Settings field.
_KEY_TO_FIELD = {f.name: f.name for f in fields(Settings)} | {"from": "from_curve"}
del _KEY_TO_FIELD["from_curve"]


def _number(value: Any, key: str, where: str, lo: float | None = None, hi: float | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise JobError(f"{where}: {key} must be a number, got {value!r}")
    if (lo is not None and value < lo) or (hi is not None and value > hi):
        raise JobError(f"{where}: {key} = {value!r} is outside {lo:g} … {hi:g}")
    return float(value)


def _text(value: Any, key: str, where: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise JobError(f"{where}: {key} must be a non-empty string, got {value!r}")
    return value.strip()


def _choice(value: Any, key: str, where: str, choices) -> str:
    text = _text(value, key, where).lower()
    allowed = ["same", *choices]
    if text not in allowed:
        raise JobError(f"{where}: {key} = {value!r} is not one of {', '.join(allowed)}")
    return text


def _gain(value: Any, key: str, where: str) -> float | None:
    if isinstance(value, str) and value.strip().lower() == "auto":
        return None
    return _number(value, key, where, *GAIN_RANGE_DB)


def _flag(value: Any, key: str, where: str) -> bool:
    if not isinstance(value, bool):
        raise JobError(f"{where}: {key} must be true or false, got {value!r}")
    return value


def _rate(value: Any, key: str, where: str) -> float | None:
    from ..design import MAX_RATE, MIN_RATE

    if isinstance(value, str) and value.strip().lower() == "same":
        return None
    return _number(value, key, where, MIN_RATE, MAX_RATE)


def _oversample(value: Any, key: str, where: str) -> int:
    from ..oversample import RUN_FACTORS, is_factor

    if not is_factor(value, allow_off=True):
        raise JobError(f"{where}: {key} must be one of {', '.join(map(str, RUN_FACTORS))} (1 = off), "
                       f"got {value!r}")
    return int(value)


def _seed(value: Any, key: str, where: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise JobError(f"{where}: {key} must be a non-negative integer, got {value!r}")
    return int(value)


_CHECKS = {
    "curve": _text, "from": _text, "method": _text,
    "speed": lambda v, k, w: _number(v, k, w, 1e-3, 1e3),
    "reference_hz": lambda v, k, w: _number(v, k, w, 1.0, 1e5),
    "lf_limit_hz": lambda v, k, w: _number(v, k, w, 0.01, 1000.0),
    "gain_db": _gain,
    "ceiling_dbfs": lambda v, k, w: _number(v, k, w, *CEILING_RANGE_DBFS),
    "output_format": lambda v, k, w: _choice(v, k, w, OUTPUT_FORMATS),
    "subtype": lambda v, k, w: _choice(v, k, w, SUBTYPES),
    "dither_seed": _seed,
    "restore_speed": _flag,
    "output_rate_hz": _rate,
    "oversample": _oversample,
}


def settings_from_table(table: dict[str, Any], base: Settings, where: str) -> Settings:
    """``base`` updated with the settings keys of a job-file table (validated)."""
    changes = {}
    for key, value in table.items():
        if key not in _CHECKS:
            raise JobError(f"{where}: unknown key {key!r}; settings keys are "
                           f"{', '.join(sorted(_CHECKS))}")
        changes[_KEY_TO_FIELD[key]] = _CHECKS[key](value, key, where)
    return validate_settings(dataclasses.replace(base, **changes), where)


def validate_settings(s: Settings, where: str) -> Settings:
    """Check that the curve parses and the method exists; return ``s``."""
    from ..design import methods
    from ..spec import curve

    if s.method not in methods():
        raise JobError(f"{where}: unknown method {s.method!r}; choose from {', '.join(sorted(methods()))}")
    if s.curve is not None:
        try:
            curve(s.curve, speed=s.speed, from_curve=s.from_curve, reference_hz=s.reference_hz)
        except DspeqError as exc:
            raise JobError(f"{where}: {exc}") from None
    if s.output_format == "flac" and s.subtype in ("int32", "float32", "float64"):
        raise JobError(f"{where}: FLAC holds only 8/16/24-bit integers, not {s.subtype!r}")
    if s.output_rate_hz is not None:
        from .speed import require_soxr

        try:
            require_soxr()
        except JobError as exc:
            raise JobError(f"{where}: {exc}") from None
    return s


# ----------------------------------------------------------------------------- rules
def compile_pattern(pattern: str, where: str = "pattern") -> re.Pattern:
    """Our glob → regex (case-insensitive).

    ``*`` any run of characters within one folder name, ``?`` one character,
    ``[…]`` a character class, ``**/`` any number of folders.  A pattern
    with no ``/`` is matched against the file name alone; one with ``/``
    against the whole path relative to the input folder.
    """
    text = pattern.strip()
    if not text or text.startswith("/") or "\\" in text or ".." in PurePosixPath(text).parts:
        raise JobError(f"{where}: pattern {pattern!r} must be a relative path pattern "
                       "without '..', '\\' or a leading '/'")
    out, i = [], 0
    while i < len(text):
        if text.startswith("**/", i):
            out.append("(?:.*/)?")
            i += 3
        elif text.startswith("**", i):
            out.append(".*")
            i += 2
        elif text[i] == "*":
            out.append("[^/]*")
            i += 1
        elif text[i] == "?":
            out.append("[^/]")
            i += 1
        elif text[i] == "[" and (end := text.find("]", i + 2)) > 0:
            body = text[i + 1:end]
            out.append("[" + ("^" + body[1:] if body.startswith("!") else body).replace("\\", "\\\\") + "]")
            i = end + 1
        else:
            out.append(re.escape(text[i]))
            i += 1
    return re.compile("".join(out) + r"\Z", re.IGNORECASE)


@dataclass(frozen=True)
class Rule:
    """One ``[[rule]]``: a pattern and the settings it gives the files it matches."""

    pattern: str
    settings: Settings
    index: int
    regex: re.Pattern = field(compare=False, repr=False)
    #: Settings fields the rule's table sets itself (not inherited from [defaults]).
    keys: frozenset[str] = frozenset()

    def matches(self, rel: str) -> bool:
        target = rel if "/" in self.pattern else rel.rsplit("/", 1)[-1]
        return self.regex.match(target) is not None


@dataclass(frozen=True)
class Job:
    """A validated job.

    Attributes
    ----------
    input_root, output_root : Path
        Absolute folders.
    manifest_path : Path
        The JSON Lines manifest (default ``<output_root>/dspeq-manifest.jsonl``).
    defaults : Settings
        Settings of files no rule matches (processed only if it has a curve).
    rules : tuple of Rule
        In order; the first match wins.
    workers : int or None
        Local worker processes (None: one per core).
    block_frames : int
        Frames per processing block.
    spool_mb : float
        Per-worker memory budget for first-pass samples.
    source : str
        The job file, or ``"command line"``.
    items : ItemList or None
        The item list of the ``[items]`` table (:mod:`dspeq.batch.items`).
    """

    input_root: Path
    output_root: Path
    manifest_path: Path
    defaults: Settings
    rules: tuple[Rule, ...] = ()
    workers: int | None = None
    block_frames: int = DEFAULT_BLOCK_FRAMES
    spool_mb: float = DEFAULT_SPOOL_MB
    source: str = "command line"
    items: Any = None

    def rule_for(self, rel: str) -> Rule | None:
        """The first rule that matches a relative path, or None."""
        return next((rule for rule in self.rules if rule.matches(rel)), None)

    def settings_for(self, rel: str) -> tuple[Settings | None, int | None]:
        """(settings, 1-based rule number or None for the defaults) for a relative path."""
        rule = self.rule_for(rel)
        if rule is not None:
            return rule.settings, rule.index
        return (self.defaults, None) if self.defaults.curve else (None, None)


def real_path(path: str | os.PathLike) -> Path:
    """The path with every symbolic link resolved."""
    return Path(os.path.realpath(path))


def within(child: Path, parent: Path) -> bool:
    """True when ``child`` is ``parent`` or below it (compare resolved paths)."""
    return child == parent or parent in child.parents


def check_folders(input_root: Path, output_root: Path, manifest_path: Path) -> None:
    """Refuse overlapping input/output folders and a manifest inside the input folder."""
    if not input_root.is_dir():
        raise JobError(f"input folder {str(input_root)!r} does not exist or is not a folder")
    src, dst = real_path(input_root), real_path(output_root)
    if within(dst, src):
        raise JobError(f"output folder {str(output_root)!r} is the input folder or inside it; "
                       "choose an output folder outside the originals")
    if within(src, dst):
        raise JobError(f"input folder {str(input_root)!r} lies inside the output folder "
                       f"{str(output_root)!r}; outputs could land on originals")
    if within(real_path(manifest_path), src):
        raise JobError(f"manifest {str(manifest_path)!r} would be written inside the input folder")


_JOB_KEYS = {"input", "output", "manifest", "workers", "block_frames", "spool_mb"}
_TOP_KEYS = {"run", "defaults", "rule", "items"}


def _run_table(data: dict, base: Path, where: str) -> dict[str, Any]:
    run = data.get("run")
    if not isinstance(run, dict):
        raise JobError(f"{where}: a [run] table with input and output folders is required")
    unknown = set(run) - _JOB_KEYS
    if unknown:
        raise JobError(f"{where}: unknown key(s) {', '.join(sorted(unknown))} in [run]; "
                       f"allowed: {', '.join(sorted(_JOB_KEYS))}")
    out: dict[str, Any] = {}
    for key in ("input", "output"):
        out[key] = (base / _text(run.get(key), key, f"{where} [run]")).absolute()
    if "manifest" in run:
        out["manifest"] = out["output"] / _text(run["manifest"], "manifest", f"{where} [run]")
    if "workers" in run:
        out["workers"] = int(_number(run["workers"], "workers", f"{where} [run]", 1, 1024))
    if "block_frames" in run:
        out["block_frames"] = int(_number(run["block_frames"], "block_frames", f"{where} [run]", 256, 2**22))
    if "spool_mb" in run:
        out["spool_mb"] = _number(run["spool_mb"], "spool_mb", f"{where} [run]", 0, 65536)
    return out


def load_job(path: str | os.PathLike, *, output_root: str | os.PathLike | None = None) -> Job:
    """Read and validate a TOML job file.

    Parameters
    ----------
    path : path-like
        The job file; folders in it are relative to its own folder.
    output_root : path-like, optional
        Replaces the job's output folder (the manifest then follows it
        unless the job names one).

    Raises
    ------
    JobError
        With the file name and the offending key or value.
    """
    path = Path(path)
    where = str(path)
    try:
        with open(path, "rb") as f:
            data = tomllib.load(f)
    except tomllib.TOMLDecodeError as exc:
        raise JobError(f"{where}: not valid TOML ({exc})") from None
    unknown = set(data) - _TOP_KEYS
    if unknown:
        raise JobError(f"{where}: unknown table(s) {', '.join(sorted(unknown))}; "
                       f"allowed: {', '.join(sorted(_TOP_KEYS))}")
    run = _run_table(data, path.parent.absolute(), where)
    if output_root is not None:
        run["output"] = Path(output_root).absolute()
        if "manifest" in run:
            run["manifest"] = run["output"] / data["run"]["manifest"]
    defaults = settings_from_table(_table(data, "defaults", where), Settings(), f"{where} [defaults]")
    items = None
    if "items" in data:
        from .items import load_items

        items = load_items(data["items"], path.parent.absolute(), run["input"], where)
    rules = []
    raw_rules = data.get("rule", [])
    if not isinstance(raw_rules, list):
        raise JobError(f"{where}: 'rule' must be an array of tables ([[rule]])")
    for i, table in enumerate(raw_rules, 1):
        rules.append(_rule(table, defaults, i, f"{where} rule {i}", items is not None))
    return _finish_job(run, defaults, tuple(rules), where, items)


def _table(data: dict, name: str, where: str) -> dict:
    table = data.get(name, {})
    if not isinstance(table, dict):
        raise JobError(f"{where}: [{name}] must be a table")
    return table


def _rule(table: Any, defaults: Settings, index: int, where: str, has_items: bool = False) -> Rule:
    if not isinstance(table, dict):
        raise JobError(f"{where}: must be a table")
    table = dict(table)
    pattern = _text(table.pop("files", None), "files", where)
    settings = settings_from_table(table, defaults, f"{where} (files = {pattern!r})")
    if settings.curve is None and not has_items:
        raise JobError(f"{where} (files = {pattern!r}): no curve (set curve here or in [defaults])")
    keys = frozenset(_KEY_TO_FIELD[k] for k in table)
    return Rule(pattern, settings, index, compile_pattern(pattern, where), keys)


def _finish_job(run: dict[str, Any], defaults: Settings, rules: tuple[Rule, ...], where: str,
                items: Any = None) -> Job:
    manifest = run.get("manifest", run["output"] / MANIFEST_NAME)
    check_folders(run["input"], run["output"], manifest)
    if not rules and defaults.curve is None and items is None:
        raise JobError(f"{where}: no rule and no default curve: nothing would be processed")
    return Job(run["input"], run["output"], manifest, defaults, rules,
               workers=run.get("workers"), block_frames=run.get("block_frames", DEFAULT_BLOCK_FRAMES),
               spool_mb=run.get("spool_mb", DEFAULT_SPOOL_MB), source=where, items=items)


def quick_job(input_root: str | os.PathLike, output_root: str | os.PathLike, settings: Settings, *,
              manifest: str | os.PathLike | None = None, workers: int | None = None,
              block_frames: int = DEFAULT_BLOCK_FRAMES) -> Job:
    """A job of one rule for every audio file (the command line's quick form)."""
    settings = validate_settings(settings, "command line")
    if settings.curve is None:
        raise JobError("command line: --curve is required with INPUT_DIR OUTPUT_DIR")
    run = {"input": Path(input_root).absolute(), "output": Path(output_root).absolute(),
           "workers": workers, "block_frames": block_frames}
    if manifest is not None:
        run["manifest"] = Path(manifest).absolute()
    return _finish_job(run, settings, (), "command line")


# ----------------------------------------------------------------------------- planning
@dataclass(frozen=True)
class Task:
    """One file to process: paths, settings and what the manifest knows of it.

    Small and picklable: it travels to worker processes and Dask workers.
    """

    input_path: str
    rel: str
    output_path: str
    output_root: str
    settings: Settings
    seed: int
    rule: int | None = None
    duration_s: float = 0.0
    block_frames: int = DEFAULT_BLOCK_FRAMES
    spool_bytes: int = DEFAULT_SPOOL_MB * 2**20
    prior: dict | None = None
    replace_ok: bool = False
    error: str | None = None
    #: The item list rows that gave this file settings or notes (manifest ``item``).
    item: dict | None = None


@dataclass
class Plan:
    """What a job will do: tasks, files no rule matched, notices from the scan, the item list check."""

    job: Job
    tasks: list[Task]
    unmatched: list[str]
    notices: list[str]
    items: Any = None

    @property
    def total_duration_s(self) -> float:
        return sum(t.duration_s for t in self.tasks)


def file_seed(base_seed: int, rel: str) -> int:
    """The dither seed of one file: 64 bits of SHA-256(base seed, relative path)."""
    digest = hashlib.sha256(f"{int(base_seed)}\0{rel}".encode()).digest()
    return int.from_bytes(digest[:8], "little")


def _scan(root: Path) -> tuple[list[tuple[str, Path]], list[str]]:
    """Audio files under ``root`` as (relative POSIX path, path), sorted; plus notices."""
    found, notices = [], []
    for folder, dirs, files in os.walk(root, followlinks=False, onerror=lambda e: notices.append(
            f"cannot list {e.filename!r}: {e.strerror}")):
        here = Path(folder)
        for d in sorted(dirs):
            if (here / d).is_symlink():
                notices.append(f"{(here / d).relative_to(root).as_posix()}: symbolic link to a "
                               "folder, not followed")
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for name in sorted(files):
            if name.startswith(".") or Path(name).suffix.lower() not in AUDIO_EXTENSIONS:
                continue
            path = here / name
            found.append((path.relative_to(root).as_posix(), path))
    return found, notices


def _duration(path: Path) -> float:
    import soundfile as sf

    try:
        info = sf.info(str(path))
        return info.frames / info.samplerate if info.samplerate else 0.0
    except Exception:  # noqa: BLE001 - any unreadable file is reported by its task later
        return 0.0


def plan(job: Job) -> Plan:
    """Walk the input folder and make one Task per audio file matched by a rule."""
    files, notices = _scan(job.input_root)
    tasks, unmatched = [], []
    resolver = None
    if job.items is not None:
        from .items import Resolver

        resolver = Resolver(job)
    for rel, path in files:
        settings, rule, item, error = (resolver.settle(rel) if resolver
                                       else (*job.settings_for(rel), None, None))
        if settings is None:
            unmatched.append(rel)
            continue
        out_rel = str(PurePosixPath(rel).with_suffix(output_suffix(settings.output_format, path)))
        tasks.append(Task(str(path), rel, str(job.output_root / out_rel), str(job.output_root),
                          settings, file_seed(settings.dither_seed, rel), rule, _duration(path),
                          job.block_frames, int(job.spool_mb * 2**20), error=error, item=item))
    for rule in job.rules:
        if not any(t.rule == rule.index for t in tasks):
            notices.append(f"rule {rule.index} (files = {rule.pattern!r}) matches no file")
    return Plan(job, _refuse_collisions(tasks), unmatched, notices,
                resolver.finish() if resolver else None)


def _refuse_collisions(tasks: list[Task]) -> list[Task]:
    by_output: dict[str, list[int]] = {}
    for i, t in enumerate(tasks):
        by_output.setdefault(os.path.normcase(t.output_path), []).append(i)
    tasks = list(tasks)
    for indices in by_output.values():
        if len(indices) > 1:
            names = ", ".join(repr(tasks[i].rel) for i in indices)
            for i in indices:
                tasks[i] = dataclasses.replace(
                    tasks[i], error=f"output name {tasks[i].output_path!r} is shared by {names}; "
                                    "none of them is written")
    return tasks
