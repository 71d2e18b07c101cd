"""Warnings raised inside workers, kept per trajectory (or chunk) next to its checkpoints.

A worker catches every :mod:`warnings` message its trajectory raises and appends it to
``warnings.json`` in the trajectory folder (``chunk_NNNN.warnings.json`` for batched model
chunks): one record per distinct (category, message) with the trajectory ``index``, the ``step``
at which it first appeared, the last ``step`` and a ``count``.  ``mapdyn status`` counts them and
the report's ``summary.md`` lists them; the runner logs each task's records when the task returns
(study log ``mapdyn.log``).  ``first_step`` is the step reached at the checkpoint where the warning
was collected (at most ``checkpoint_every`` steps after it was raised; the message may name the
exact step).
"""

from __future__ import annotations

import os
import re
from typing import Any, Iterable

from mapdyn.files import read_json, write_json

__all__ = ["WARNINGS_FILE", "record_warnings", "read_warnings", "study_warnings"]


#: File name of a trajectory's warning records.
WARNINGS_FILE = "warnings.json"
_NUMBER = re.compile(r"[-+]?\d+\.?\d*(?:[eE][-+]?\d+)?")


def read_warnings(path: str | os.PathLike) -> list[dict]:
    """Warning records of one file (empty when there is none or it is unreadable)."""
    try:
        data = read_json(path)
    except (OSError, ValueError):
        return []
    return list(data.get("warnings", [])) if isinstance(data, dict) else []


def record_warnings(path: str | os.PathLike, index: int, step: int, caught: Iterable[Any]) -> list[dict]:
    """Merge ``caught`` (``warnings.WarningMessage`` objects) into the records in ``path``.

    Records are keyed by (category, message with numbers blanked), the first message kept as the
    example; ``step`` is the trajectory step reached when they
    were caught.  Returns the records; writes (atomically) only when something new arrived.
    """
    caught = list(caught)
    if not caught:
        return read_warnings(path)
    records = read_warnings(path)
    by_key = {(r["category"], _NUMBER.sub("#", r["message"])): r for r in records}
    for w in caught:
        cat = getattr(w.category, "__name__", str(w.category))
        msg = str(w.message).strip()
        r = by_key.get((cat, _NUMBER.sub("#", msg)))
        if r is None:
            r = {"index": int(index), "category": cat, "message": msg, "first_step": int(step), "last_step": int(step),
                 "count": 0}
            by_key[(cat, _NUMBER.sub("#", msg))] = r
            records.append(r)
        r["count"] += 1
        r["last_step"] = int(step)
    write_json(path, {"warnings": records})
    return records


def study_warnings(study: Any) -> list[dict]:
    """All warning records of a study (trajectory folders, or chunk files of batched studies)."""
    out: list[dict] = []
    if study.batched:
        for c, _, _ in study.chunks():
            out.extend(read_warnings(study.path("chunks", f"chunk_{c:04d}.warnings.json")))
    else:
        for i in range(study.ntraj):
            out.extend(read_warnings(os.path.join(study.trajectory_folder(i), WARNINGS_FILE)))
    return out
