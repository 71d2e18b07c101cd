"""The diabatic model interface shared by the batched engine, the exact solver and the adapter.

A model has ``nstates`` (F), ``ndof`` (D) and ``masses`` (D,) in electron masses, and returns
for positions R of shape (n, D) in Bohr:

* ``hamiltonian(R)`` → (n, F, F) real symmetric diabatic matrix H_kl(R) in Eh;
* ``hamiltonian_gradient(R)`` → (n, D, F, F) ∂H_kl/∂R_a in Eh/Bohr;
* ``contract_gradient(R, rho)`` → (n, D) Σ_kl ρ_kl ∂H_kl/∂R_a (override for speed).
"""

from __future__ import annotations

import numpy as np

__all__ = ["DiabaticModel", "as_positions"]


def as_positions(R, ndof: int) -> np.ndarray:
    """Positions as a float (n, D) array; a (D,) vector or a scalar for D = 1 becomes one row."""
    R = np.asarray(R, dtype=float)
    if R.ndim == 0:
        R = R.reshape(1, 1)
    elif R.ndim == 1:
        R = R.reshape(-1, 1) if ndof == 1 else R.reshape(1, -1)
    if R.ndim != 2 or R.shape[1] != ndof:
        raise ValueError(f"positions must have shape (n, {ndof}), got {np.shape(R)}")
    if not np.all(np.isfinite(R)):
        raise ValueError("positions contain non-finite values")
    return R


class DiabaticModel:
    """Base class: subclasses set ``nstates``, ``ndof``, ``masses`` and implement the two methods."""

    nstates: int
    ndof: int
    masses: np.ndarray
    name: str = "model"

    def hamiltonian(self, R: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def hamiltonian_gradient(self, R: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def contract_gradient(self, R: np.ndarray, rho: np.ndarray) -> np.ndarray:
        """Σ_kl ρ_kl ∂H_kl/∂R_a, shape (n, D), in Eh/Bohr (the negative MMST force)."""
        return np.einsum("nkl,ndkl->nd", rho, self.hamiltonian_gradient(R))

    def adiabatic(self, R: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Adiabatic energies (n, F) ascending (Eh) and eigenvectors U (n, F, F), columns = states.

        Sign convention: the largest-magnitude component of each column is positive, so the basis
        is reproducible between calls and engines.
        """
        E, U = np.linalg.eigh(self.hamiltonian(R))
        n, f, _ = U.shape
        big = np.argmax(np.abs(U), axis=1)  # (n, F): row index of the largest entry of each column
        sign = np.sign(np.take_along_axis(U, big[:, None, :], axis=1))[:, 0, :]
        sign[sign == 0] = 1.0
        return E, U * sign[:, None, :]
