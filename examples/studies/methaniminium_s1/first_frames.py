"""Write ``first_frames.npz``: the first recorded frames of trajectories 0 and 1 of both runs of this
study, which the slow test ``tests/study/test_methaniminium_study.py`` recomputes.

    python examples/studies/methaniminium_s1/first_frames.py RUNS_DIR

RUNS_DIR holds the two finished study folders ``sqc`` and ``ehrenfest``.
"""

from __future__ import annotations

import os
import sys

import numpy as np

from mapdyn.files import atomic_open
from mapdyn.study.checkpoint import TrajectoryStore
from mapdyn.study.folder import Study

FRAMES = 9  # steps 0..8: 2 fs at 0.25 fs
TRAJECTORIES = (0, 1)
KEYS = ("time_au", "positions_bohr", "energies_Eh", "populations", "total_energy_Eh")


def main(runs: str) -> None:
    out = {}
    for method in ("sqc", "ehrenfest"):
        study = Study(os.path.join(runs, method))
        for t in TRAJECTORIES:
            frames = TrajectoryStore(study.trajectory_folder(t)).read_frames()
            for key in KEYS:
                out[f"{method}/{t}/{key}"] = np.asarray(frames[key][:FRAMES])
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "first_frames.npz")
    with atomic_open(path, "wb") as fh:
        np.savez_compressed(fh, **out)
    print(f"wrote {path} ({len(out)} arrays)")


if __name__ == "__main__":
    main(sys.argv[1])
