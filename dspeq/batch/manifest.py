"""The batch manifest: one JSON object per line, appended as each file finishes.

Each record says what was done to one file (or why it failed); the field
list is documented in ``batch/README.md`` and in :data:`RECORD_FIELDS`.
A later run reads the manifest back to skip files whose input digest and
settings are unchanged.  A run killed while writing leaves at most one
incomplete last line, which :func:`read_records` ignores and the next
append starts after.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import warnings
from pathlib import Path
from typing import Any

__all__ = ["RECORD_VERSION", "RECORD_FIELDS", "Manifest", "read_records", "settings_digest", "to_json"]

#: Format version written in every record (``"record"`` field).
RECORD_VERSION = 1
#: Top-level fields of a record, in the order they are written.
RECORD_FIELDS = (
    "record", "status", "error", "input", "input_rel", "output", "output_rel", "input_sha256",
    "input_bytes", "output_sha256", "output_bytes", "output_audio_md5", "input_format",
    "output_format", "rate", "channels", "frames", "duration_s", "curve", "design", "deviation",
    "level", "dither", "coding_history_row", "rate_change", "item", "settings", "settings_digest",
    "tool", "started", "elapsed_s",
)


def settings_digest(settings: dict[str, Any]) -> str:
    """SHA-256 of the canonical JSON of a settings dict (key order does not matter)."""
    return hashlib.sha256(to_json(settings).encode()).hexdigest()


def _clean(value: Any) -> Any:
    """Non-finite floats become None (strict JSON has no NaN/Infinity)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    return value


def to_json(record: dict[str, Any]) -> str:
    """Compact, strict JSON (sorted keys for settings digests, record order otherwise)."""
    return json.dumps(_clean(record), ensure_ascii=False, allow_nan=False, sort_keys=True,
                      separators=(",", ":"))


def _ordered(record: dict[str, Any]) -> dict[str, Any]:
    head = {k: record[k] for k in RECORD_FIELDS if k in record}
    head.update({k: v for k, v in record.items() if k not in head})
    return head


def read_records(path: str | os.PathLike) -> list[dict[str, Any]]:
    """All complete records of a manifest, in file order ([] if it does not exist).

    A line that is not a JSON object (a run killed mid-write) is skipped with
    a warning.
    """
    try:
        with open(path, encoding="utf-8") as f:
            lines = f.readlines()
    except FileNotFoundError:
        return []
    records = []
    for n, line in enumerate(lines, 1):
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except json.JSONDecodeError:
            rec = None
        if not isinstance(rec, dict):
            warnings.warn(f"manifest {os.fspath(path)!r} line {n} is incomplete or not a record; "
                          "ignored", UserWarning, stacklevel=2)
            continue
        records.append(rec)
    return records


class Manifest:
    """Append-only access to a manifest file (one writer: the process that runs the job).

    Parameters
    ----------
    path : path-like
        The ``.jsonl`` file; created (with its folder) on first append.
    """

    def __init__(self, path: str | os.PathLike):
        self.path = Path(path)
        self._file = None

    def latest_done(self) -> dict[str, dict[str, Any]]:
        """The last successful record of each input, keyed by its relative path."""
        latest: dict[str, dict[str, Any]] = {}
        for rec in read_records(self.path):
            if rec.get("status") == "done" and isinstance(rec.get("input_rel"), str):
                latest[rec["input_rel"]] = rec
        return latest

    def known_outputs(self) -> set[str]:
        """Every output path a successful record names (files this tool may replace)."""
        return {rec["output"] for rec in read_records(self.path)
                if rec.get("status") == "done" and isinstance(rec.get("output"), str)}

    def open(self) -> Manifest:
        """Open for appending (raises OSError if the folder is not writable)."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._file = open(self.path, "a+b")  # noqa: SIM115 - closed in close()
        self._file.seek(0, os.SEEK_END)
        if self._file.tell() > 0:
            self._file.seek(-1, os.SEEK_END)
            if self._file.read(1) != b"\n":
                self._file.write(b"\n")     # end a line a killed run left incomplete
        return self

    def append(self, record: dict[str, Any]) -> None:
        """Write one record as one line and flush it to the operating system."""
        line = json.dumps(_clean(_ordered(record)), ensure_ascii=False, allow_nan=False,
                          separators=(",", ":"))
        self._file.write(line.encode("utf-8") + b"\n")
        self._file.flush()

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None

    def __enter__(self) -> Manifest:
        return self.open()

    def __exit__(self, *exc) -> None:
        self.close()
