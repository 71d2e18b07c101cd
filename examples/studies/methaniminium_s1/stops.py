"""Where and when each trajectory of the two runs of this study stopped: ``stops.csv``.

    python examples/studies/methaniminium_s1/stops.py RUNS_DIR

RUNS_DIR holds the two study folders ``sqc`` and ``ehrenfest``.  Per trajectory: status, the
time of its last frame (fs), the occupied state there (SQC: triangle window, -1 = none;
Ehrenfest: the state with population > 1/2), the C-N distance (Å), the two H-C-N-H torsions and
the H-H-N-C dihedral (deg), the S1-S0 gap (eV), the largest total-energy deviation (mEh) and the
stop reason of failed trajectories.
"""

from __future__ import annotations

import csv
import io
import os
import sys

import numpy as np
from ase import Atoms

from mapdyn.files import atomic_open
from mapdyn.study.checkpoint import TrajectoryStore
from mapdyn.study.folder import Study
from mapdyn.units import AU_TIME_IN_FS, BOHR_IN_ANGSTROM, HARTREE_IN_EV

FIELDS = ("method", "trajectory", "status", "last_time_fs", "state", "cn_angstrom", "torsion_2015_deg",
          "torsion_3014_deg", "dihedral_5410_deg", "gap_ev", "max_energy_deviation_meh", "reason")


def _state(frames: dict, method: str) -> int:
    if method == "sqc":
        return int(frames["window"][-1])
    pops = frames["populations"][-1]
    return int(np.argmax(pops)) if pops.max() > 0.5 else -1


def rows(runs: str):
    for method in ("sqc", "ehrenfest"):
        study = Study(os.path.join(runs, method))
        for entry in study.status().entries:
            frames = TrajectoryStore(study.trajectory_folder(entry.index)).read_frames()
            if not frames:
                continue
            atoms = Atoms("CNH4", positions=frames["positions_bohr"][-1] * BOHR_IN_ANGSTROM)
            e = frames["energies_Eh"][-1]
            total = frames["total_energy_Eh"]
            yield {"method": method, "trajectory": entry.index, "status": entry.status,
                   "last_time_fs": round(float(frames["time_au"][-1]) * AU_TIME_IN_FS, 3),
                   "state": _state(frames, method),
                   "cn_angstrom": round(atoms.get_distance(0, 1), 3),
                   "torsion_2015_deg": round(atoms.get_dihedral(2, 0, 1, 5), 1),
                   "torsion_3014_deg": round(atoms.get_dihedral(3, 0, 1, 4), 1),
                   "dihedral_5410_deg": round(atoms.get_dihedral(5, 4, 1, 0), 1),
                   "gap_ev": round(float(e[1] - e[0]) * HARTREE_IN_EV, 3),
                   "max_energy_deviation_meh": round(float(np.max(np.abs(total - total[0]))) * 1e3, 3),
                   "reason": entry.reason}


def main(runs: str) -> None:
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=FIELDS, lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows(runs))
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "stops.csv")
    with atomic_open(path, "w") as fh:
        fh.write(buf.getvalue())
    print(f"wrote {path}")


if __name__ == "__main__":
    main(sys.argv[1])
