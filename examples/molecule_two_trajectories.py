"""Demo (a scenario of our own): two SQC trajectories of LiH started on S1, SA-CASSCF on the fly.

Pipeline: RHF/STO-3G ground-state optimisation and analytic Hessian → 0 K Wigner sample per
trajectory (trajectory i draws from its own stream: nuclear coordinates, momenta, then the mapping
actions and angles) → SA2-CAS(2,2)/STO-3G dynamics, triangle windows, 0.25 fs steps for 10 fs.
Prints the S1 window population and the energy drift; writes each geometry track as extxyz.
Takes about a minute on one core.

    OMP_NUM_THREADS=1 python examples/molecule_two_trajectories.py [--steps 40] [--out DIR]
"""

import argparse
import os

import numpy as np
from ase import Atoms, units

from mapdyn.backends.pyscf.casscf import CASSCFBackend
from mapdyn.backends.pyscf.ground_state import PySCFGroundState
from mapdyn.core.options import MethodOptions
from mapdyn.core.sampling import trajectory_generator
from mapdyn.driver.dynamics import MappingDynamics
from mapdyn.initial.geometry import optimize_ground_state
from mapdyn.initial.normal_modes import compute_hessian, normal_modes
from mapdyn.initial.wigner import draw_wigner

BOHR = units.Bohr  # Å per Bohr


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=40, help="time steps of 0.25 fs (default 40)")
    ap.add_argument("--out", default="lih_two_trajectories", help="output folder")
    args = ap.parse_args()
    os.makedirs(args.out, exist_ok=True)

    symbols = ["Li", "H"]
    start = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 3.0]])  # Bohr
    ground = PySCFGroundState(symbols, "sto-3g")
    opt = optimize_ground_state(ground, symbols, start, ground.level_of_theory)
    hess = compute_hessian(ground, opt.positions_bohr, ground.level_of_theory)
    modes = normal_modes(hess.hessian, symbols, opt.positions_bohr, level_of_theory=ground.level_of_theory)
    print(f"optimised R(Li–H) = {np.linalg.norm(np.diff(opt.positions_bohr, axis=0)):.4f} Bohr; "
          f"harmonic frequency {modes.frequencies_cm[0]:.1f} cm^-1 ({ground.level_of_theory})")

    backend = CASSCFBackend(symbols, basis="sto-3g", ncas=2, nelecas=2, nstates=2)
    options = MethodOptions("sqc", "triangle")
    for index in range(2):
        rng = trajectory_generator(seed=11, index=index)
        sample = draw_wigner(modes, rng)
        atoms = Atoms("".join(symbols), positions=sample.positions_bohr * BOHR)
        # momenta: electron mass · Bohr/(ħ/Eh) → ASE units (amu·Å/ASE time) via the velocity in Å/fs
        atoms.set_velocities(sample.velocities * BOHR / (units._aut * 1e15) / units.fs)
        dyn = MappingDynamics(atoms, backend, 0.25 * units.fs, initial_state=1, options=options, rng=rng,
                              drift_threshold=1e-3,
                              geometry_file=os.path.join(args.out, f"traj_{index:03d}.extxyz"))
        dyn.run(args.steps)
        e = np.array([f["total_energy_Eh"] for f in dyn.frames])
        s1 = [f["populations"][1] for f in dyn.frames]
        print(f"trajectory {index}: {len(dyn.frames) - 1} steps, S1 window indicator start/end "
              f"{s1[0]:.0f}/{s1[-1]:.0f}, max |E(t) − E(0)| = {np.max(np.abs(e - e[0])):.2e} Eh")
    print("(simulation results, atomic units unless stated)")


if __name__ == "__main__":
    main()
