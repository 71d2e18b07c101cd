"""``mapdyn show``: one trajectory of a study folder at a glance, or a contact sheet of all of them.

Files go to ``<folder>/report/show/`` (or the folder given), written atomically, so ``show`` can
run while the study is still running: it reads what the checkpoints hold now.
"""

from __future__ import annotations

import os
from typing import Any

from mapdyn.analysis.transfers import DEFAULT_MIN_DWELL_FS
from mapdyn.study.analysis_settings import settings_from_table
from mapdyn.study.folder import REPORT, Study, StudyError
from mapdyn.units import AU_TIME_IN_FS

__all__ = ["SHOW_FOLDER", "show_trajectory", "show_ensemble"]

#: Sub-folder of the report folder that ``show`` writes into.
SHOW_FOLDER = "show"


def _settings(study: Study) -> tuple[list, float, float]:
    """(observables, min_dwell a.u., energy tolerance Eh) from the study's [analysis] table."""
    table = {k: v for k, v in (study.config.analysis or {}).items() if k != "fragments"}
    kw = settings_from_table(table)
    drift = study.config.dynamics.drift_threshold_hartree
    tol = kw.get("energy_tolerance", drift or 1e-3)
    return list(kw.get("observables", [])), float(kw.get("min_dwell", DEFAULT_MIN_DWELL_FS / AU_TIME_IN_FS)), float(tol)


def _output(study: Study, output: str | None) -> str:
    return os.path.abspath(output) if output else study.path(REPORT, SHOW_FOLDER)


def show_trajectory(folder: Any, index: int, output: str | None = None) -> tuple[list[str], list[str]]:
    """Figure and CSV of trajectory ``index`` (study index); returns (paths written, lines to print)."""
    from mapdyn.analysis.trajectory_view import trajectory_notes, trajectory_view, write_trajectory_view
    from mapdyn.study.analyze import load_trajectory_set

    study = folder if isinstance(folder, Study) else Study(folder)
    if not 0 <= int(index) < study.ntraj:
        raise StudyError(f"--trajectory {index}: the study has trajectories 0..{study.ntraj - 1}")
    observables, dwell, tol = _settings(study)
    tset = load_trajectory_set(study, only=[int(index)])
    extra = []
    if not study.batched:
        entry = next((e for e in study.status(verify=False).entries if e.index == int(index)), None)
        if entry is not None and entry.drift:
            d = entry.drift
            extra.append(f"drift threshold crossed during the run: ΔE = {d.get('drift_Eh', float('nan')):.3g} Eh "
                         f"> {d.get('threshold_Eh', float('nan')):.3g} Eh at step {d.get('step')}")
    view = trajectory_view(tset, 0, observables, dwell)
    lines = trajectory_notes(tset, 0, view, tol, extra)
    png, csv = write_trajectory_view(view, _output(study, output), drift_tolerance=tol)
    return [png, csv], lines


def show_ensemble(folder: Any, output: str | None = None) -> tuple[list[str], list[str]]:
    """Contact sheet pages and their CSV; returns (paths written, lines to print)."""
    import numpy as np

    from mapdyn.analysis.trajectory_view import MAX_SHEETS, PANELS_PER_SHEET, write_contact_sheet
    from mapdyn.study.analyze import load_trajectory_set

    study = folder if isinstance(folder, Study) else Study(folder)
    _, dwell, tol = _settings(study)
    tset = load_trajectory_set(study)
    pages, csv = write_contact_sheet(tset, _output(study, output), min_dwell=dwell, energy_tolerance=tol)
    from mapdyn.analysis.report import read_csv

    ov = read_csv(csv)
    flagged = [int(i) for i, f in zip(ov["trajectory"], ov["flagged"]) if f]
    counts = tset.status_counts()
    lines = [f"{tset.ntraj} trajectories with frames (" + ", ".join(f"{k} {v}" for k, v in counts.items() if v) + ")",
             f"trajectories by number of transfers (min_dwell {dwell * AU_TIME_IN_FS:.3g} fs): "
             + ", ".join(f"{int(c)} with {int(k)}" for k, c in zip(*np.unique(ov["transfers"], return_counts=True))),
             "flagged: " + (", ".join(map(str, flagged)) if flagged else "none")
             + "; inspect one with: mapdyn show " + study.folder + " --trajectory N"]
    if tset.ntraj > PANELS_PER_SHEET * MAX_SHEETS:
        lines.append(f"the sheets show the first {PANELS_PER_SHEET * MAX_SHEETS} trajectories; the CSV lists all")
    return pages + [csv], lines
