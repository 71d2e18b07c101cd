"""Linear vibronic coupling models: F diabatic states, D harmonic modes, couplings linear in Q.

Mass-weighted form (masses m_j, default 1; atomic units):

    H_kl(Q) = δ_kl V0(Q) + A_kl + Σ_j Q_j G_j,kl,      V0(Q) = Σ_j ½ m_j ω_j² Q_j²

A (F, F) constant diabatic matrix (Eh), ω_j (Eh), G_j (F, F) real symmetric coupling matrices
(Eh per unit of Q_j).  V0 is potential only: the bath kinetic energy Σ P_j²/2m_j is the nuclear
kinetic term.  This is the linear vibronic coupling Hamiltonian of Köppel, Domcke & Cederbaum,
Adv. Chem. Phys. 57, 59 (1984) (citation from memory), written with mass-weighted coordinates
instead of dimensionless ones; :meth:`LinearVibronicModel.from_dimensionless` converts
(q_j = √(m_j ω_j) Q_j, ħ = 1, common practice).

Spin-boson and site-exciton models are special cases (:mod:`mapdyn.models.spin_boson`).  Every
model here also exposes the split H = V0·1 + H_sys(Q) used by the stiff-bath integrator
(:mod:`mapdyn.core.harmonic_bath`): ``harmonic_frequencies``, ``system_hamiltonian`` and
``system_force_constant`` (∂H_sys/∂Q contracted with ρ, independent of Q).
"""

from __future__ import annotations

import numpy as np

from mapdyn.core.model import DiabaticModel, as_positions

__all__ = ["LinearVibronicModel"]


def _real_array(name: str, value, shape=None) -> np.ndarray:
    a = np.asarray(value, dtype=float)
    if shape is not None and a.shape != shape:
        raise ValueError(f"{name} must have shape {shape}, got {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError(f"{name} contains non-finite values")
    return a


class LinearVibronicModel(DiabaticModel):
    """H_kl(Q) = δ_kl Σ_j ½ m_j ω_j² Q_j² + A_kl + Σ_j Q_j G_j,kl (mass-weighted, atomic units).

    constant : (F, F) symmetric A_kl in Eh; frequencies : (D,) ω_j > 0 in Eh (= rad per a.u. of
    time); couplings : (D, F, F) symmetric G_j,kl in Eh per (Bohr·√m_e); masses : (D,) in electron
    masses (default 1, i.e. mass-weighted coordinates).  Q in Bohr·√m_e when masses are 1.
    """

    name = "linear_vibronic"

    def __init__(self, constant, frequencies, couplings, masses=None):
        A = _real_array("constant", constant)
        if A.ndim != 2 or A.shape[0] != A.shape[1] or A.shape[0] < 2:
            raise ValueError(f"constant must be a square (F, F) matrix with F >= 2, got shape {A.shape}")
        if not np.allclose(A, A.T, rtol=0, atol=1e-14 * max(1.0, np.abs(A).max())):
            raise ValueError("constant must be a symmetric matrix")
        F = A.shape[0]
        w = _real_array("frequencies", frequencies)
        if w.ndim != 1 or w.size < 1:
            raise ValueError(f"frequencies must be a non-empty vector, got shape {w.shape}")
        if np.any(w <= 0):
            raise ValueError("frequencies must all be positive (Eh)")
        D = w.size
        G = _real_array("couplings", couplings, (D, F, F))
        if not np.allclose(G, np.swapaxes(G, 1, 2), rtol=0, atol=1e-14 * max(1.0, np.abs(G).max())):
            raise ValueError("couplings must be symmetric in their two state indices")
        m = np.ones(D) if masses is None else _real_array("masses", masses, (D,))
        if np.any(m <= 0):
            raise ValueError("masses must all be positive (electron masses)")
        self.nstates, self.ndof = F, D
        self.constant = 0.5 * (A + A.T)
        self.frequencies = w
        self.couplings = 0.5 * (G + np.swapaxes(G, 1, 2))
        self.masses = m
        self._k = m * w * w                      # force constants m ω² (Eh/Bohr²)
        self._G2 = self.couplings.reshape(D, F * F)   # (D, F²) for BLAS contractions
        self._G2T = np.ascontiguousarray(self._G2.T)  # (F², D)

    # ----------------------------------------------------------------- alternative constructor
    @classmethod
    def from_dimensionless(cls, energies, frequencies, kappa, lam=None) -> "LinearVibronicModel":
        """From the dimensionless-coordinate LVC form (ħ = 1):

            H = Σ_j (ω_j/2)(p_j² + q_j²) + Σ_k |k⟩⟨k| (E_k + Σ_j κ_j^(k) q_j) + Σ_{k≠l} |k⟩⟨l| Σ_j λ_j^(kl) q_j

        energies (F,) Eh or an (F, F) constant matrix; frequencies (D,) Eh; kappa (F, D) Eh;
        lam (D, F, F) Eh (off-diagonal part used, symmetrised) or None.  With unit masses
        q_j = √ω_j Q_j, so G_j = √ω_j · (diag κ^(·)_j + λ_j) (common practice).
        """
        E = np.asarray(energies, dtype=float)
        A = np.diag(E) if E.ndim == 1 else E
        w = _real_array("frequencies", frequencies)
        if w.ndim != 1 or np.any(w <= 0):
            raise ValueError("frequencies must be a vector of positive numbers (Eh)")
        F, D = A.shape[0], w.size
        kap = _real_array("kappa", kappa, (F, D))
        G = np.zeros((D, F, F))
        idx = np.arange(F)
        G[:, idx, idx] = kap.T
        if lam is not None:
            L = _real_array("lam", lam, (D, F, F))
            off = L * (1.0 - np.eye(F))
            G += 0.5 * (off + np.swapaxes(off, 1, 2))
        G *= np.sqrt(w)[:, None, None]
        return cls(A, w, G)

    # ------------------------------------------------------------------------ DiabaticModel
    def harmonic_potential(self, R: np.ndarray) -> np.ndarray:
        """V0(Q) = Σ_j ½ m_j ω_j² Q_j² in Eh, shape (n,)."""
        R = as_positions(R, self.ndof)
        return 0.5 * (R * R) @ self._k

    def system_hamiltonian(self, R: np.ndarray) -> np.ndarray:
        """H_sys(Q) = A + Σ_j Q_j G_j = H(Q) − V0(Q)·1, shape (n, F, F), Eh."""
        R = as_positions(R, self.ndof)
        F = self.nstates
        return (R @ self._G2).reshape(-1, F, F) + self.constant

    def hamiltonian(self, R: np.ndarray) -> np.ndarray:
        R = as_positions(R, self.ndof)
        H = self.system_hamiltonian(R)
        v0 = 0.5 * (R * R) @ self._k
        idx = np.arange(self.nstates)
        H[:, idx, idx] += v0[:, None]
        return H

    def hamiltonian_gradient(self, R: np.ndarray) -> np.ndarray:
        """∂H_kl/∂Q_j = δ_kl m_j ω_j² Q_j + G_j,kl, shape (n, D, F, F) (built in full: not for hot loops)."""
        R = as_positions(R, self.ndof)
        dH = np.broadcast_to(self.couplings, (R.shape[0],) + self.couplings.shape).copy()
        idx = np.arange(self.nstates)
        dH[:, :, idx, idx] += (R * self._k)[:, :, None]
        return dH

    def system_force_constant(self, rho: np.ndarray) -> np.ndarray:
        """g_j = Σ_kl ρ_kl G_j,kl (Eh per unit Q), shape (n, D): the Q-independent part of the gradient."""
        n, F, _ = rho.shape
        return rho.reshape(n, F * F) @ self._G2T

    def system_contract_gradient(self, R: np.ndarray, rho: np.ndarray) -> np.ndarray:
        """Σ_kl ρ_kl ∂H_sys,kl/∂Q_j = g_j (independent of R), (n, D), Eh/Bohr."""
        return self.system_force_constant(rho)

    def contract_gradient(self, R: np.ndarray, rho: np.ndarray) -> np.ndarray:
        """Σ_kl ρ_kl ∂H_kl/∂Q_j = Tr ρ · m_j ω_j² Q_j + Σ_kl ρ_kl G_j,kl, (n, D), Eh/Bohr; O(n·D·F²)."""
        R = as_positions(R, self.ndof)
        tr = np.trace(rho, axis1=1, axis2=2)
        return (tr[:, None] * self._k) * R + self.system_force_constant(rho)

    # -------------------------------------------------------------------- harmonic split data
    @property
    def harmonic_frequencies(self) -> np.ndarray:
        """ω_j (Eh) of the state-independent harmonic reference V0 (used by the stiff-bath integrator)."""
        return self.frequencies

    system_gradient_is_constant = True  # ∂H_sys/∂Q does not depend on Q (linear coupling)

    def diabatic_minimum(self, state: int) -> np.ndarray:
        """Minimum of the diabatic potential H_kk(Q), k = ``state``: Q_j = −G_j,kk/(m_j ω_j²), (D,)."""
        if isinstance(state, bool) or not isinstance(state, (int, np.integer)) or not 0 <= state < self.nstates:
            raise ValueError(f"state={state!r} is not allowed; it must be an integer in 0..{self.nstates - 1}")
        return -self.couplings[:, state, state] / self._k

    def reorganization_energies(self) -> np.ndarray:
        """λ_kl = H_ll(Q*_k) − H_ll(Q*_l) = Σ_j (G_j,kk − G_j,ll)²/(2 m_j ω_j²), (F, F) Eh (vertical
        energy released on relaxing state l from the minimum of state k; textbook harmonic algebra)."""
        g = np.einsum("jkk->jk", self.couplings)  # (D, F)
        diff = g[:, :, None] - g[:, None, :]
        return np.einsum("jkl,j->kl", diff * diff, 0.5 / self._k)
