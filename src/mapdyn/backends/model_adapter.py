"""Any diabatic model of the core as an adiabatic electronic backend (docs/architecture.md#backend-contract,
docs/theory.md#adiabatic-representation, docs/theory.md#local-diabatization).

Atomic units: positions in Bohr, energies in Eh, gradients in Eh/Bohr, couplings in 1/Bohr.

Coordinate map.  The on-the-fly driver works with positions of shape (N, 3).  The model's D
coordinates are the first D entries of ``positions.ravel()`` (atom 0: x, y, z, then atom 1, …); the
remaining entries do not enter the Hamiltonian and get zero gradients and couplings.  For a
one-dimensional model (Tully models) the model coordinate is therefore the **x coordinate of atom
0**; ``atom_masses`` gives the matching per-atom masses.

Adiabatic data from the diabatic matrix H(R) (eigh: H U = U diag E, columns = states):

    ∇E_k = (Uᵀ ∇H U)_kk,     d_kl = (Uᵀ ∇H U)_kl / (E_l − E_k)   (k ≠ l)

(Hellmann–Feynman and its off-diagonal form, docs/theory.md#adiabatic-representation), and the raw overlap with the
previous step is S_kl = (U_prevᵀ U)_kl, matched and sign-aligned by
:func:`mapdyn.backends.contract.match_states`.  On the first call (no guess) the sign convention is the
model's own (:meth:`DiabaticModel.adiabatic`: largest component of each eigenvector positive), so
the driver's initial adiabatic basis is the one the diabatic engine uses for c_ad = Uᵀ c_dia.
"""

from __future__ import annotations

import dataclasses
import hashlib
import time
from typing import Any

import numpy as np

from mapdyn.backends.contract import (
    LOW_OVERLAP_THRESHOLD,
    ElectronicResult,
    match_states,
)
from mapdyn.core.model import DiabaticModel

__all__ = ["ModelAdapterBackend", "ModelGuess"]

#: |E_l − E_k| (Eh) below which the Hellmann–Feynman coupling is reported as zero (exact degeneracy).
DEGENERACY_TOL = 1e-14


@dataclasses.dataclass(frozen=True)
class ModelGuess:
    """What the next model-adapter call needs: the sign-aligned eigenvectors of this step.

    positions_bohr : (N, 3) geometry of the step, Bohr; eigenvectors : (F, F) columns = states.
    """

    positions_bohr: np.ndarray
    eigenvectors: np.ndarray


class ModelAdapterBackend:
    """Adiabatic backend built on a :class:`DiabaticModel`.

    Parameters
    ----------
    model : the diabatic model (F states, D coordinates, masses in electron masses).
    natoms : number of atoms N of the (N, 3) positions; default the fewest atoms holding D numbers.
    with_couplings : False withholds the NAC vectors (``couplings=None``), so the driver must use
        overlaps only (the TDA/TDDFT-like path).
    scramble_signs : None, or an integer seed: the raw eigenvector signs are then flipped at random
        (a deterministic function of the seed and the positions, so ``compute`` stays pure) to test
        the phase tracking.
    low_overlap_threshold : min |S| below which a step is flagged as low-overlap.
    """

    def __init__(self, model: DiabaticModel, natoms: int | None = None, with_couplings: bool = True,
                 scramble_signs: int | None = None, low_overlap_threshold: float = LOW_OVERLAP_THRESHOLD):
        if not isinstance(model, DiabaticModel):
            raise ValueError(f"model must be a DiabaticModel, got {type(model).__name__}")
        self.model = model
        self.nstates = int(model.nstates)
        self.ndof = int(model.ndof)
        need = -(-self.ndof // 3)
        if natoms is None:
            natoms = need
        if isinstance(natoms, bool) or not isinstance(natoms, (int, np.integer)) or natoms < need:
            raise ValueError(f"natoms={natoms!r} is not allowed; need an integer >= {need} to hold {self.ndof} model coordinates")
        self.natoms = int(natoms)
        self.with_couplings = bool(with_couplings)
        self.scramble_signs = None if scramble_signs is None else int(scramble_signs)
        self.low_overlap_threshold = float(low_overlap_threshold)

    # ------------------------------------------------------------------ coordinate map
    def model_coordinates(self, positions_bohr: np.ndarray) -> np.ndarray:
        """Model coordinates R (1, D) in Bohr: the first D entries of ``positions_bohr.ravel()``."""
        pos = np.asarray(positions_bohr, dtype=float)
        if pos.shape != (self.natoms, 3) or not np.all(np.isfinite(pos)):
            raise ValueError(f"positions_bohr must be a finite ({self.natoms}, 3) array, got shape {pos.shape}")
        return pos.reshape(-1)[: self.ndof].reshape(1, self.ndof).copy()

    def positions_from_model(self, R: np.ndarray) -> np.ndarray:
        """(N, 3) positions in Bohr holding model coordinates R (D,) (other entries zero)."""
        out = np.zeros(self.natoms * 3)
        out[: self.ndof] = np.asarray(R, dtype=float).reshape(-1)
        return out.reshape(self.natoms, 3)

    def _to_cartesian(self, v: np.ndarray) -> np.ndarray:
        """(..., D) model-coordinate vectors → (..., N, 3), zero outside the model coordinates."""
        out = np.zeros(v.shape[:-1] + (self.natoms * 3,))
        out[..., : self.ndof] = v
        return out.reshape(v.shape[:-1] + (self.natoms, 3))

    def atom_masses(self) -> np.ndarray:
        """Per-atom masses (N,) in electron masses matching the coordinate map.

        Model coordinates on one atom must share one mass; atoms without a model coordinate get the
        mass of the last model coordinate (their motion does not couple to the model).
        """
        m = np.asarray(self.model.masses, dtype=float).reshape(-1)
        out = np.full(self.natoms, m[-1])
        for a in range(self.natoms):
            block = m[3 * a: min(3 * a + 3, self.ndof)]
            if block.size:
                if np.any(block != block[0]):
                    raise ValueError(f"model masses {block.tolist()} on atom {a} differ; the coordinate map needs one mass per atom")
                out[a] = block[0]
        return out

    def make_atoms(self, R: np.ndarray, P: np.ndarray | None = None, symbol: str = "H"):
        """An ase.Atoms for the driver holding model positions R (D,) in Bohr and momenta P (D,) in a.u.

        Masses from :meth:`atom_masses` (converted to amu), positions to Å and momenta to ASE units
        with ``ase.units``; coordinates outside the model are zero.
        """
        from ase import Atoms, units

        amu = units._amu / units._me
        atoms = Atoms(symbol * self.natoms if len(symbol) == 1 else [symbol] * self.natoms,
                      positions=self.positions_from_model(R) * units.Bohr,
                      masses=self.atom_masses() / amu)
        if P is not None:
            atoms.set_momenta(self.positions_from_model(P) / (amu * units.AUT / units.Bohr))
        return atoms

    # ------------------------------------------------------------------ contract
    def _raw_signs(self, positions_bohr: np.ndarray) -> np.ndarray:
        digest = hashlib.sha256(np.ascontiguousarray(positions_bohr, dtype=float).tobytes()
                                + str(self.scramble_signs).encode()).digest()
        rng = np.random.default_rng(int.from_bytes(digest[:8], "little"))
        return np.where(rng.random(self.nstates) < 0.5, -1.0, 1.0)

    def compute(self, positions_bohr: np.ndarray, guess: ModelGuess | None = None,
                need_gradients: bool = True) -> ElectronicResult:
        """Energies (Eh), gradients (Eh/Bohr), NACs (1/Bohr) and aligned overlaps at ``positions_bohr`` (N, 3).

        Pure function of (positions_bohr, guess, need_gradients).
        """
        t0 = time.perf_counter()
        pos = np.asarray(positions_bohr, dtype=float)
        R = self.model_coordinates(pos)
        if guess is not None and not isinstance(guess, ModelGuess):
            raise ValueError(f"guess must be a ModelGuess from a previous call or None, got {type(guess).__name__}")
        if guess is not None and guess.eigenvectors.shape != (self.nstates, self.nstates):
            raise ValueError(f"guess eigenvectors have shape {guess.eigenvectors.shape}, expected ({self.nstates}, {self.nstates})")
        diagnostics: dict[str, Any] = {}
        overlap = None
        if guess is None:
            E, U = self.model.adiabatic(R)
            E, U = E[0], U[0]
            if self.scramble_signs is not None:
                U = U * self._raw_signs(pos)[None, :]
        else:
            E, U = np.linalg.eigh(self.model.hamiltonian(R)[0])
            if self.scramble_signs is not None:
                U = U * self._raw_signs(pos)[None, :]
            match = match_states(guess.eigenvectors.T @ U, self.low_overlap_threshold)
            U = U * match.signs[None, :]
            overlap = match.overlap
            diagnostics.update(match.as_diagnostics())
        gradients = couplings = None
        if need_gradients:
            G = self.model.hamiltonian_gradient(R)[0]  # (D, F, F)
            Gad = np.einsum("ka,dkl,lb->abd", U, G, U)  # (F, F, D): <k|dH/dR_d|l>
            f = self.nstates
            idx = np.arange(f)
            gradients = self._to_cartesian(Gad[idx, idx, :])
            if self.with_couplings:
                gap = E[None, :] - E[:, None]  # E_l − E_k
                safe = np.where(np.abs(gap) > DEGENERACY_TOL, gap, np.inf)
                d = Gad / safe[:, :, None]
                d[idx, idx, :] = 0.0
                d = 0.5 * (d - np.swapaxes(d, 0, 1))  # exact antisymmetry
                couplings = self._to_cartesian(d)
                if np.any(~np.isfinite(safe[~np.eye(f, dtype=bool)])):
                    diagnostics["degenerate"] = True
        diagnostics["timings"] = {"total": time.perf_counter() - t0}
        return ElectronicResult(
            energies=np.asarray(E, dtype=float).copy(),
            gradients=gradients,
            couplings=couplings,
            overlap_prev=overlap,
            guess=ModelGuess(pos.copy(), U.copy()),
            converged=True,
            diagnostics=diagnostics,
        )
