"""Slow check: identical trajectories on the fly (PySCF SA-CASSCF every step) vs the diabatic KCl model.

For trajectories i = 0 … N−1 of the ensemble of make_diatomic_comparison.py (same seed, same
per-trajectory random streams) we take the sampled bond length r, radial momentum p_r and the
mapping variables in the adiabatic basis, and run them (a) through the diabatic model with the
batched engine (mapdyn.core.propagators.run_diabatic) and (b) through the on-the-fly ASE driver
(mapdyn.driver.dynamics.MappingDynamics) with the SA-2 CASSCF(2,2)/6-31G backend at every step
(atoms K at −(m_Cl/M) r ê, Cl at +(m_K/M) r ê, momenta ∓p_r ê: zero total linear and angular
momentum).  The relative phase of the two adiabatic states is matched between the two runs through
the sign of the bond coupling d_r at t = 0 (the model's basis follows DiabaticModel.adiabatic).
Reported per trajectory: max |Δr| (Bohr), max |Δp_r| (a.u.), max |Δe_k| (actions), the final SQC
window in both runs, the energy drift of the on-the-fly run.

Cost: about one SA-CASSCF gradient+NAC step (4–6 s on one core) per time step per trajectory; the
default (5 trajectories × 400 steps of 20 a.u. ≈ 8000 a.u. ≈ 190 fs, which covers the first
passage through the crossing near 16 Bohr) is a few core-hours.  Run with --ntraj 1 --nsteps 20
for a smoke test.

Usage: OMP_NUM_THREADS=1 python tests/reference/diatomic_on_the_fly.py [--study DIR] [--ntraj 5]
       [--nsteps 400] [--dt 20] [--seed S] [--window triangle]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np
from ase import Atoms, units

from mapdyn.core.options import MethodOptions
from mapdyn.core.propagators import run_diabatic
from mapdyn.core.sampling import gaussian_wavepacket_ensemble
from mapdyn.core.windows import window_assignment
from mapdyn.validation.diatomic import (
    KCL_SCAN,
    DiatomicGrid,
    DiatomicModel,
    atomic_masses_amu,
    load_packaged_grid,
    photoexcitation_scenario,
)

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))


def model_adiabatic_coupling_sign(model: DiatomicModel, r: float, h: float = 1e-4) -> float:
    """Sign of d_12 in the basis of model.adiabatic (finite difference of its eigenvectors)."""
    _, U = model.adiabatic(np.array([[r - h], [r], [r + h]]))
    return float(np.sign(U[1, :, 0] @ (U[2, :, 1] - U[0, :, 1]) / (2 * h)))


def atomic_write_text(path: str, text: str) -> None:
    tmp = path + ".tmp"
    with open(tmp, "w") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def main(argv=None) -> int:
    from mapdyn.backends.pyscf.casscf import CASSCFBackend
    from mapdyn.driver.dynamics import MappingDynamics

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--study", default=os.path.join(ROOT, "study_diatomic_kcl"))
    ap.add_argument("--ntraj", type=int, default=5)
    ap.add_argument("--nsteps", type=int, default=400)
    ap.add_argument("--dt", type=float, default=20.0, help="time step in a.u.")
    ap.add_argument("--seed", type=int, default=20261202)
    ap.add_argument("--window", default="triangle", choices=["square", "triangle"])
    args = ap.parse_args(argv)
    os.makedirs(args.study, exist_ok=True)
    path = os.path.join(args.study, "diatomic_grid.npz")
    grid = DiatomicGrid.load(path) if os.path.exists(path) else load_packaged_grid()
    model = DiatomicModel(grid)
    sc = photoexcitation_scenario(model)
    opt = MethodOptions("sqc", args.window, "symmetrized")
    symbols = list(KCL_SCAN["symbols"])
    mA, mB = atomic_masses_amu(symbols)
    M = mA + mB
    mu = float(model.masses[0])

    # (b) the same trajectories through the diabatic model, with the on-the-fly time step
    ens = gaussian_wavepacket_ensemble(model, args.ntraj, args.seed, sc.position, sc.momentum, sc.position_width,
                                       sc.initial_state, opt, basis="adiabatic")
    init = ens.copy()
    run = run_diabatic(model, ens, opt, args.dt, args.nsteps, record_every=1, record_nuclei=True)

    backend = CASSCFBackend(symbols, basis=KCL_SCAN["basis"], ncas=KCL_SCAN["ncas"], nelecas=KCL_SCAN["nelecas"],
                            nstates=2, cas_orbitals=KCL_SCAN["cas_orbitals"])
    rows, store = [], {}
    for j in range(args.ntraj):
        r0, pr0 = float(init.R[j, 0]), float(init.P[j, 0])
        _, U = model.adiabatic(init.R[j:j + 1])
        z_ad = U[0].T @ (init.x[j] + 1j * init.p[j])
        e_hat = np.array([0.0, 0.0, 1.0])
        pos = np.array([-(mB / M) * r0 * e_hat, (mA / M) * r0 * e_hat])
        atoms = Atoms(symbols, positions=pos * units.Bohr)
        atoms.set_masses([mA, mB])
        mom_au = np.array([-pr0 * e_hat, pr0 * e_hat])
        atoms.set_momenta(mom_au / (units._amu / units._me * units.AUT / units.Bohr))
        # relative phase of the two states: match the sign of d_r at t = 0
        probe = backend.compute(pos)
        d = probe.couplings[0, 1]
        d_r = float(e_hat @ ((mA / M) * d[1] - (mB / M) * d[0]))
        if np.sign(d_r) != model_adiabatic_coupling_sign(model, r0):
            z_ad[1] = -z_ad[1]
        t0 = time.perf_counter()
        dyn = MappingDynamics(atoms, backend, args.dt * units.AUT, initial_state=sc.initial_state, options=opt,
                              mapping_variables=(z_ad.real.copy(), z_ad.imag.copy()),
                              zero_linear_momentum=True, zero_angular_momentum=True, drift_threshold=1e-3)
        dyn.run(args.nsteps)
        wall = time.perf_counter() - t0
        fr = dyn.frames
        R = np.array([f["positions_bohr"] for f in fr])
        P = np.array([f["momenta_au"] for f in fr])
        r_otf = np.linalg.norm(R[:, 1] - R[:, 0], axis=1)
        ehat_t = (R[:, 1] - R[:, 0]) / r_otf[:, None]
        amu = units._amu / units._me
        pr_otf = mu * np.einsum("tk,tk->t", P[:, 1] / (mB * amu) - P[:, 0] / (mA * amu), ehat_t)
        e_otf = np.array([f["actions"] for f in fr])
        n = min(len(fr), run.times.size)
        dr = np.abs(r_otf[:n] - run.R[:n, j, 0]).max()
        dp = np.abs(pr_otf[:n] - run.P[:n, j, 0]).max()
        de = np.abs(e_otf[:n] - run.actions_adiabatic[:n, j]).max()
        w_model = int(window_assignment(run.actions_adiabatic[n - 1, j][None], opt)[0])
        w_otf = int(fr[n - 1]["window"])
        drift = float(np.max(np.abs([f["drift_Eh"] for f in fr])))
        rows.append((j, r0, pr0, n - 1, dr, dp, de, w_model, w_otf, drift, wall))
        store[f"traj{j}"] = np.stack([run.times[:n], run.R[:n, j, 0], r_otf[:n], run.P[:n, j, 0], pr_otf[:n],
                                      run.actions_adiabatic[:n, j, 1], e_otf[:n, 1]], axis=1)
        print(f"trajectory {j}: steps {n - 1}, max|Δr| {dr:.2e} Bohr, max|Δp_r| {dp:.2e}, max|Δe| {de:.2e}, "
              f"window model/otf {w_model}/{w_otf}, drift {drift:.1e} Eh, {wall:.0f} s", flush=True)
    lines = [f"On-the-fly (SA-2 CASSCF(2,2)/6-31G every step) vs diabatic KCl model, {opt.describe()}, "
             f"dt = {args.dt} a.u., seed {args.seed}; window −1 = none.", "",
             "| traj | r0 (Bohr) | p_r0 (a.u.) | steps | max abs Δr (Bohr) | max abs Δp_r (a.u.) | max abs Δe | "
             "window model | window on-the-fly | energy drift (Eh) | wall (s) |",
             "|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for row in rows:
        j, r0, pr0, n, dr, dp, de, wm, wo, drift, wall = row
        lines.append(f"| {j} | {r0:.4f} | {pr0:+.3f} | {n} | {dr:.2e} | {dp:.2e} | {de:.2e} | {wm} | {wo} | "
                     f"{drift:.1e} | {wall:.0f} |")
    text = "\n".join(lines) + "\n"
    atomic_write_text(os.path.join(args.study, "on_the_fly_table.md"), text)
    tmp = os.path.join(args.study, "on_the_fly.npz.tmp")
    with open(tmp, "wb") as fh:
        np.savez_compressed(fh, columns=np.array(json.dumps(["t", "r_model", "r_otf", "pr_model", "pr_otf",
                                                             "e2_model", "e2_otf"])), **store)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, os.path.join(args.study, "on_the_fly.npz"))
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
