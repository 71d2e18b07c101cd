"""MMST mapping variables: actions, effective density, nuclear force and conserved energy.

Arrays carry a leading trajectory axis: x, p have shape (n, F); electronic matrices (n, F, F);
nuclear coordinates (n, D).  Atomic units.

Meyer & Miller, J. Chem. Phys. 70, 3214 (1979); Stock & Thoss, Phys. Rev. Lett. 78, 578 (1997):

    H = Σ P²/2M + Σ_kl ρ_kl H_kl(R),   ρ_kl = ½(x_k x_l + p_k p_l) − γ_k δ_kl

with the zero-point parameters γ_k chosen by the zero-point treatment (docs/theory.md#mapping-hamiltonian,
docs/theory.md#zero-point-treatments):

* ``fixed``:        γ_k = γ (one number, plain MMST form);
* ``symmetrized``:  γ_k = (Σ_m e_m − 1)/F (trace-subtracted form, Tr ρ = 1; Cotton & Miller,
  J. Chem. Phys. 139, 234112 (2013), form from memory, algebra verified in tests);
* ``adjusted``:     γ_k = e_k(0) − N_k, fixed per trajectory (Cotton & Miller, J. Chem. Phys. 150,
  194110 (2019): per-trajectory zero point making the initial nuclear force that of the initial
  state, as its abstract states; the per-state formula is from memory; docs/theory.md#closed-channels);
* Ehrenfest:        γ_k = 0 with Σ e = 1;
* spin mapping:     the symmetrized form, which with the spin-mapping sphere Σ e = √(F+1) gives
  γ_k = (√(F+1) − 1)/F = γ_s (docs/theory.md#spin-mapping).
"""

from __future__ import annotations

import numpy as np

from mapdyn.core.options import MethodOptions

__all__ = [
    "actions",
    "amplitudes",
    "from_amplitudes",
    "zero_point_parameters",
    "effective_density",
    "mapping_energy",
    "contract",
]


def actions(x: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Oscillator actions e_k = ½(x_k² + p_k²) (dimensionless), shape (n, F)."""
    return 0.5 * (x * x + p * p)


def amplitudes(x: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Complex amplitudes c_k = (x_k + i p_k)/√2 with |c_k|² = e_k."""
    return (x + 1j * p) / np.sqrt(2.0)


def from_amplitudes(c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of :func:`amplitudes`: x = √2 Re c, p = √2 Im c."""
    return np.sqrt(2.0) * c.real, np.sqrt(2.0) * c.imag


def zero_point_parameters(x: np.ndarray, p: np.ndarray, options: MethodOptions,
                          gamma_adjusted: np.ndarray | None = None) -> np.ndarray:
    """Per-trajectory, per-state zero-point parameters γ_k, shape (n, F) (dimensionless)."""
    e = actions(x, p)
    n, f = e.shape
    if options.method in ("ehrenfest", "mash", "fssh"):
        return np.zeros_like(e)
    if options.zero_point == "fixed":
        return np.full_like(e, options.window_gamma)
    if options.zero_point == "symmetrized":
        g = (e.sum(axis=1, keepdims=True) - 1.0) / f
        return np.broadcast_to(g, e.shape).copy()
    if gamma_adjusted is None:
        raise ValueError("zero_point='adjusted' needs the per-trajectory gamma_adjusted array (n, F)")
    return np.asarray(gamma_adjusted, dtype=float)


def effective_density(x: np.ndarray, p: np.ndarray, options: MethodOptions,
                      gamma_adjusted: np.ndarray | None = None) -> np.ndarray:
    """ρ_kl = ½(x_k x_l + p_k p_l) − γ_k δ_kl, shape (n, F, F) (dimensionless, real symmetric)."""
    rho = 0.5 * (x[:, :, None] * x[:, None, :] + p[:, :, None] * p[:, None, :])
    g = zero_point_parameters(x, p, options, gamma_adjusted)
    idx = np.arange(x.shape[1])
    rho[:, idx, idx] -= g
    return rho


def contract(rho: np.ndarray, matrices: np.ndarray) -> np.ndarray:
    """Σ_kl ρ_kl A_kl for A of shape (n, F, F) → (n,), or (n, D, F, F) → (n, D)."""
    if matrices.ndim == 3:
        return np.einsum("nkl,nkl->n", rho, matrices)
    return np.einsum("nkl,ndkl->nd", rho, matrices)


def mapping_energy(P: np.ndarray, masses: np.ndarray, H: np.ndarray, rho: np.ndarray) -> np.ndarray:
    """Conserved MMST energy Σ P²/2M + Σ_kl ρ_kl H_kl in Eh, shape (n,).

    P : (n, D) momenta (a.u.); masses : (D,) in electron masses; H : (n, F, F) in Eh.
    """
    return 0.5 * np.sum(P * P / masses, axis=1) + contract(rho, H)
