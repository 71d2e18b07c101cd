"""Drive mapping dynamics with your own Python function as the electronic backend.

Scenario (made up for this example, atomic units): a diatomic whose bond length r feels two
diabatic curves, a bound Morse curve and a repulsive curve that cuts through it,

    V_b(r) = D (1 − exp(−a (r − r_e)))²,   V_r(r) = c + A exp(−b (r − r_0)),   V_br = v (constant),

so a molecule put on the upper adiabatic state near r_e is pushed outward, reaches the crossing
and either dissociates on the repulsive curve or stays bound on the Morse curve.  The element
symbols (C, O) only fix the masses; the curves are not those of any real molecule.

The callback returns adiabatic energies, Cartesian gradients (chain rule through r) and the 2×2
eigenvectors as ``state_vectors``; the backend forms the overlaps between steps and aligns the
phases.  Without coupling vectors the driver uses the velocity-projected coupling, which is exact
here because, with zero total linear and angular momentum, the motion is along the bond.  Each
trajectory is also run with coupling vectors supplied, to show the two routes agree.

Run:  python examples/callback_backend.py
"""

from __future__ import annotations

import warnings

import ase
import numpy as np
from ase import units

from mapdyn.backends.callback import CallbackBackend
from mapdyn.core.options import MethodOptions
from mapdyn.core.sampling import trajectory_generator
from mapdyn.driver.dynamics import MappingDynamics

D, A_MORSE, R_E = 0.10, 1.0, 2.5          # Eh, 1/Bohr, Bohr
C_REP, A_REP, B_REP, R_0 = 0.03, 0.25, 1.2, 2.0
V_COUPLING = 0.004                          # Eh


def diabatic(r: float):
    """H(r) (2×2, Eh) and dH/dr (Eh/Bohr)."""
    ex = np.exp(-A_MORSE * (r - R_E))
    vb, dvb = D * (1 - ex) ** 2, 2 * D * A_MORSE * ex * (1 - ex)
    er = A_REP * np.exp(-B_REP * (r - R_0))
    vr, dvr = C_REP + er, -B_REP * er
    return np.array([[vb, V_COUPLING], [V_COUPLING, vr]]), np.array([[dvb, 0.0], [0.0, dvr]])


def make_electronic_function(with_couplings: bool):
    def electronic(positions_bohr: np.ndarray, need_gradients: bool = True) -> dict:
        bond = positions_bohr[1] - positions_bohr[0]
        r = float(np.linalg.norm(bond))
        u = bond / r                                   # dr/dR_B = u, dr/dR_A = −u
        H, dH = diabatic(r)
        E, U = np.linalg.eigh(H)
        out = {"energies": E, "state_vectors": U}
        if need_gradients:
            G = U.T @ dH @ U                           # <k|dH/dr|l>
            dr = np.stack([-u, u])                     # (2 atoms, 3)
            out["gradients"] = np.diag(G)[:, None, None] * dr[None]
            if with_couplings:
                d = np.zeros((2, 2, 2, 3))
                d[0, 1] = G[0, 1] / (E[1] - E[0]) * dr    # Hellmann–Feynman off-diagonal form
                d[1, 0] = -d[0, 1]
                out["couplings"] = d
        return out

    return electronic


def initial_molecule(seed: int, index: int):
    """Bond length and relative momentum from the harmonic ground-state Wigner function; then the
    same generator goes to the driver for the mapping variables (draw order: nuclei, then electrons)."""
    rng = trajectory_generator(seed, index)
    atoms = ase.Atoms("CO", positions=[[0, 0, 0], [0, 0, R_E * units.Bohr]])
    m = atoms.get_masses() * units._amu / units._me
    mu = m[0] * m[1] / m.sum()
    omega = np.sqrt(2 * D * A_MORSE ** 2 / mu)        # harmonic frequency of the Morse curve
    r = R_E + rng.standard_normal() / np.sqrt(2 * mu * omega)
    p_rel = rng.standard_normal() * np.sqrt(mu * omega / 2)
    atoms.positions[1, 2] = r * units.Bohr
    p_au = np.array([[0, 0, -p_rel], [0, 0, p_rel]])
    atoms.set_momenta(p_au / (units._amu / units._me * units.AUT / units.Bohr))
    return atoms, rng


def run_one(index: int, with_couplings: bool, steps: int = 600):
    atoms, rng = initial_molecule(seed=2024, index=index)
    backend = CallbackBackend(make_electronic_function(with_couplings), nstates=2, natoms=2)
    dyn = MappingDynamics(atoms, backend, 0.25 * units.fs, 1, MethodOptions(window="triangle"), rng=rng,
                          zero_linear_momentum=True, zero_angular_momentum=True, record_interval=100)
    dyn.run(steps)
    return dyn


def main() -> None:
    warnings.simplefilter("ignore", UserWarning)   # the projected-coupling notice; it is in the metadata
    for index in (0, 1):
        for with_couplings in (False, True):
            dyn = run_one(index, with_couplings)
            frames = dyn.frames
            label = "coupling vectors" if with_couplings else "overlaps only   "
            print(f"trajectory {index}, {label}: t = {frames[-1]['time_au'] * units.AUT / units.fs:5.1f} fs, "
                  f"r = {np.linalg.norm(np.diff(frames[-1]['positions_bohr'], axis=0)):6.3f} Bohr, "
                  f"window = {frames[-1]['window']}, actions = {np.round(frames[-1]['actions'], 4)}, "
                  f"max |drift| = {max(abs(f['drift_Eh']) for f in frames):.1e} Eh")
        print("  bond length (Bohr) every 25 fs:",
              " ".join(f"{np.linalg.norm(np.diff(f['positions_bohr'], axis=0)):.2f}" for f in frames))


if __name__ == "__main__":
    main()
