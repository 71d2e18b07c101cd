"""A small ground-state PySCF backend (RHF or RKS) for geometry optimisation and Hessians.

It follows the backend contract of :mod:`mapdyn.backends.contract` with ``nstates = 1`` and adds
``analytic_hessian(positions_bohr)`` (PySCF ``mf.Hessian().kernel()``), which
:func:`mapdyn.initial.normal_modes.compute_hessian` uses when present.  Excited-state backends live in
``mapdyn.backends``.  Atomic units throughout (Bohr in, Eh and Eh/Bohr out).
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from mapdyn.backends.contract import BackendError, ElectronicResult
from mapdyn.backends.pyscf.common import pin_threads

__all__ = ["PySCFGroundState"]


class PySCFGroundState:
    """Closed-shell ground state: RHF (``xc=None``) or RKS (``xc`` a functional name).

    compute(positions_bohr, guess=None, need_gradients=True): energies (1,) Eh, gradients
    (1, N, 3) Eh/Bohr; ``guess`` is the AO density matrix (a valid SCF start at any nearby
    geometry because the AO basis keeps its shape).  PySCF runs on one thread.
    """

    nstates = 1

    def __init__(self, symbols: Sequence[str], basis: str, *, xc: str | None = None, charge: int = 0,
                 conv_tol: float = 1e-12, grid_level: int = 3, max_cycle: int = 100):
        pin_threads(1)
        self.symbols = list(symbols)
        self.basis = str(basis)
        self.xc = xc
        self.charge = int(charge)
        self.conv_tol = float(conv_tol)
        self.grid_level = int(grid_level)
        self.max_cycle = int(max_cycle)

    @property
    def level_of_theory(self) -> str:
        """e.g. 'RHF/sto-3g' or 'RKS-b3lyp/6-31g'."""
        method = "RHF" if self.xc is None else f"RKS-{self.xc.lower()}"
        return f"{method}/{self.basis.lower()}"

    def _mol(self, positions_bohr: np.ndarray):
        from pyscf import gto
        x = np.asarray(positions_bohr, dtype=float)
        if x.shape != (len(self.symbols), 3):
            raise ValueError(f"positions_bohr must have shape ({len(self.symbols)}, 3), got {x.shape}")
        return gto.M(atom=[(s, tuple(r)) for s, r in zip(self.symbols, x)], basis=self.basis,
                     charge=self.charge, spin=0, unit="Bohr", verbose=0)

    def _scf(self, positions_bohr: np.ndarray, guess: Any = None):
        from pyscf import dft, scf
        mol = self._mol(positions_bohr)
        if self.xc is None:
            mf = scf.RHF(mol)
        else:
            mf = dft.RKS(mol)
            mf.xc = self.xc
            mf.grids.level = self.grid_level
        mf.conv_tol = self.conv_tol
        mf.max_cycle = self.max_cycle
        dm0 = None
        if guess is not None and np.shape(guess) == (mol.nao, mol.nao):
            dm0 = np.asarray(guess)
        mf.kernel(dm0=dm0)
        if not mf.converged:
            mf = mf.newton()
            mf.kernel(dm0=dm0)
        if not mf.converged:
            raise BackendError(f"{self.level_of_theory} SCF did not converge",
                               [{"what": "DIIS then second-order SCF", "outcome": "not converged"}])
        return mf

    def compute(self, positions_bohr: np.ndarray, guess: Any = None,
                need_gradients: bool = True) -> ElectronicResult:
        mf = self._scf(positions_bohr, guess)
        grads = None
        if need_gradients:
            grads = np.asarray(mf.nuc_grad_method().kernel(), dtype=float)[None]
        return ElectronicResult(energies=np.array([float(mf.e_tot)]), gradients=grads,
                                guess=mf.make_rdm1(), converged=bool(mf.converged),
                                diagnostics={"scf_cycles": getattr(mf, "cycles", None)})

    def analytic_hessian(self, positions_bohr: np.ndarray, guess: Any = None) -> np.ndarray:
        """PySCF analytic Hessian, reshaped from (N, N, 3, 3) to (3N, 3N), Eh/Bohr²."""
        mf = self._scf(positions_bohr, guess)
        h = np.asarray(mf.Hessian().kernel(), dtype=float)
        n = h.shape[0]
        return h.transpose(0, 2, 1, 3).reshape(3 * n, 3 * n)
