"""The offline batch processor: whole archives of flat transfers, unattended, with a record.

A job (a TOML file, or the command line's quick form) maps files of an input
folder to curves and settings; :func:`plan` turns it into tasks,
:func:`run_job` runs them in local worker processes or on a Dask cluster,
writes a mirrored output tree without touching the originals, and keeps a
JSON Lines manifest of what was done and an HTML report (``report.html``).
A collection's item list (CSV) may drive the settings per file.  See ``batch/README.md``.

Examples
--------
>>> from dspeq.batch import Settings, quick_job, plan, run_job   # doctest: +SKIP
>>> job = quick_job("transfers", "derived", Settings(curve="riaa"))  # doctest: +SKIP
>>> print(run_job(job).text())                                    # doctest: +SKIP
"""

from __future__ import annotations

from .items import ItemList, load_items
from .job import Job, Plan, Settings, Task, load_job, plan, quick_job
from .manifest import Manifest, read_records
from .report import render_report, write_report
from .run import Result, Summary, process_task, run_job, run_tasks

__all__ = ["Job", "Plan", "Settings", "Task", "load_job", "plan", "quick_job", "Manifest", "read_records",
           "Result", "Summary", "process_task", "run_job", "run_tasks", "ItemList", "load_items",
           "render_report", "write_report"]
