"""Per-step cost, Z-vector residuals and outcomes of a finished TDA/TDDFT study folder.

    python examples/studies/ethylene_cis_seam/response_summary.py STUDY_FOLDER [OUT.csv]

Reads the recorded frames (frame diagnostic ``response_residual``: the largest relative Z-vector
residual of the step) and the run timings of every trajectory; prints a summary and, with OUT.csv,
writes one row per trajectory.  Times in seconds of one core, residuals dimensionless.
"""

from __future__ import annotations

import sys

import numpy as np

from mapdyn.backends.contract import ended_channel
from mapdyn.files import atomic_write_text
from mapdyn.study.checkpoint import TrajectoryStore
from mapdyn.study.folder import Study
from mapdyn.units import AU_TIME_IN_FS


def main(folder: str, out: str | None = None) -> None:
    study = Study(folder)
    status = {e.index: e for e in study.status().entries}
    rows, residuals, seconds, steps = [], [], 0.0, 0
    for i in range(study.ntraj):
        store = TrajectoryStore(study.trajectory_folder(i))
        point = store.restart_point()
        frames = store.read_frames(point.chunks) if point.chunks else {}
        if "response_residual" not in frames:   # nothing recorded yet
            continue
        meta = point.meta or {}
        timing = meta.get("timings", {})
        res = np.asarray(frames["response_residual"], dtype=float)
        residuals.append(res)
        seconds += float(timing.get("step_seconds", 0.0))
        steps += int(timing.get("steps", 0))
        entry = status[i]
        outcome = ended_channel(entry.reason) or entry.status
        t_end = float(frames["time_au"][-1]) * AU_TIME_IN_FS
        rows.append((i, outcome, int(meta.get("step", 0)), t_end, float(np.nanmax(res)) if res.size else float("nan"),
                     float(timing.get("step_seconds", 0.0)) / max(int(timing.get("steps", 0)), 1)))
    allres = np.concatenate(residuals) if residuals else np.zeros(0)
    print(f"trajectories {len(rows)}; steps {steps}; {seconds:.1f} s in steps = {seconds / max(steps, 1):.3f} s per step")
    print(f"Z-vector residual over {allres.size} steps: median {np.nanmedian(allres):.2e}, max {np.nanmax(allres):.2e}")
    for name in sorted({r[1] for r in rows}):
        sel = [r for r in rows if r[1] == name]
        print(f"outcome {name}: {len(sel)} (last frames {min(r[3] for r in sel):.2f}-{max(r[3] for r in sel):.2f} fs)")
    if out:
        text = "trajectory,outcome,steps,last_frame_fs,max_response_residual,seconds_per_step\n" + "".join(
            f"{r[0]},{r[1]},{r[2]},{r[3]:.3f},{r[4]:.3e},{r[5]:.4f}\n" for r in rows)
        atomic_write_text(out, text)


if __name__ == "__main__":
    if len(sys.argv) not in (2, 3):
        sys.exit(__doc__)
    main(*sys.argv[1:])
