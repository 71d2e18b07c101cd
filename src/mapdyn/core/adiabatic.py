"""Adiabatic-representation mapping dynamics of one trajectory: arrays in, arrays out.

The equations of motion with kinetic momentum P = M dR/dt (Cotton, Liang & Miller, J. Chem. Phys.
147, 064112 (2017)) are

    dR/dt = P/M,   i dz_k/dt = E_k z_k − i Σ_l σ_kl z_l,   σ_kl = V·d_kl,
    dP/dt = −Σ_kl ρ_kl ⟨ψ_k|∇H|ψ_l⟩,

with z = x + ip and ρ from :func:`mapdyn.core.mapping.effective_density`; the functions below are
the pieces one step of the on-the-fly driver is made of.  Derivations and the step scheme:
docs/theory.md#adiabatic-representation.

Units: Hartree atomic units throughout (energies Eh, time a.u., positions Bohr, masses electron
masses, kinetic momenta a.u., gradients Eh/Bohr, couplings d_kl = ⟨ψ_k|∇ψ_l⟩ 1/Bohr, σ 1/a.u. time).
Electronic arrays describe one trajectory: energies (F,), gradients (F, N, 3), couplings
(F, F, N, 3), overlaps and densities (F, F), nuclear vectors (N, 3).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = [
    "GAP_WARNING", "GAP_PHASE_LIMIT", "GAP_COUPLING_FLOOR", "PROJECTION_WARNING",
    "lowdin_orthogonal", "interpolated_propagator", "velocity_couplings", "sigma_from_overlap",
    "propagate_local_diabatization", "propagate_with_couplings", "averaged_density",
    "adiabatic_force", "extrapolate_projection", "projected_force", "gap_resolution_message",
    "nuclear_kinetic_energy", "mapping_potential_energy", "mapping_total_energy", "remove_total_momentum",
]

#: Prefix of the once-per-run message that the step does not resolve the electronic gap.
GAP_WARNING = "time step does not resolve the electronic gap"
#: ΔE·Δt (rad) above which the gap message is issued (one electronic period = 2π rad).
GAP_PHASE_LIMIT = 1.0
#: |V·d_kl|·Δt below which a pair counts as uncoupled for the gap message.
GAP_COUPLING_FLOOR = 1e-3

PROJECTION_WARNING = ("no coupling vectors from the backend: the off-diagonal force uses the "
                      "velocity-projected coupling d ≈ σ V/|V|², which misses the force component "
                      "perpendicular to the velocity (exact in one dimension)")

HistoryEntry = tuple[float, np.ndarray, np.ndarray]


# ------------------------------------------------------------------------------ electronic propagation
def lowdin_orthogonal(S: np.ndarray) -> np.ndarray:
    """Orthogonal matrix closest to S (F, F): T = S (SᵀS)^(−1/2) = U Wᵀ from the SVD S = U Σ Wᵀ.

    Symmetric orthogonalisation (P.-O. Löwdin, J. Chem. Phys. 18, 365 (1950)); T is the orthogonal
    factor of the polar decomposition S = T (SᵀS)^(1/2).  Dimensionless.
    """
    u, _, wt = np.linalg.svd(S)
    return u @ wt


def interpolated_propagator(H0: np.ndarray, H1: np.ndarray, dt: float, substeps: int) -> np.ndarray:
    """U = Π_j exp(−i H(τ_j) h), h = Δt/n, τ_j = (j + ½)h, H(τ) = H0 + (τ/Δt)(H1 − H0).

    H0, H1 : Hermitian (F, F) in Eh at the two ends of the step; dt in a.u.; returns the unitary
    (F, F) with later substeps multiplying from the left.  Exponential midpoint rule on each
    substep, the second-order Magnus integrator (Blanes, Casas, Oteo & Ros, Phys. Rep. 470, 151
    (2009)); exact when H0 and H1 commute, because the midpoint rule integrates a linear H exactly.
    """
    w = (np.arange(substeps) + 0.5) / substeps
    Hs = H0[None] + w[:, None, None] * (H1 - H0)[None]
    lam, U = np.linalg.eigh(Hs)
    factors = np.einsum("jkm,jm,jlm->jkl", U, np.exp(-1j * lam * (dt / substeps)), U.conj())
    out = factors[0]
    for j in range(1, substeps):
        out = factors[j] @ out
    return out


def velocity_couplings(couplings: np.ndarray, velocity: np.ndarray) -> np.ndarray:
    """σ_kl = ⟨ψ_k|dψ_l/dt⟩ = V·d_kl (chain rule) (F, F) in 1/a.u. time, from d (F, F, N, 3) in
    1/Bohr and V (N, 3) in Bohr/a.u. time."""
    return np.einsum("klna,na->kl", np.asarray(couplings), velocity)


def sigma_from_overlap(S: np.ndarray, dt: float) -> np.ndarray:
    """Mid-step σ(t + Δt/2) ≈ (S − Sᵀ)/(2Δt) (F, F) in 1/a.u. time, S_kl = ⟨ψ_k(t)|ψ_l(t+Δt)⟩.

    Finite-difference time-derivative coupling (Hammes-Schiffer & Tully, J. Chem. Phys. 101, 4657
    (1994)); dt in a.u. (docs/theory.md#velocity-projected-couplings).
    """
    return (S - S.T) / (2.0 * dt)


def propagate_local_diabatization(z: np.ndarray, E0: np.ndarray, E1: np.ndarray, S: np.ndarray,
                                  dt: float, substeps: int) -> tuple[np.ndarray, np.ndarray]:
    """Oscillators z (F,) complex, adiabatic at t → adiabatic at t+Δt, and the mid-step σ (F, F).

    Local diabatization (Granucci, Persico & Toniolo, J. Chem. Phys. 114, 10608 (2001)): the
    diabatic basis is the adiabatic basis at t, T = Löwdin(S) with S_kl = ⟨ψ_k(t)|ψ_l(t+Δt)⟩,
    H_d(0) = diag E(t), H_d(Δt) = T diag E(t+Δt) Tᵀ interpolated linearly
    (:func:`interpolated_propagator`), z_ad(t+Δt) = Tᵀ z_d(t+Δt); σ from :func:`sigma_from_overlap`.
    E0, E1 in Eh; dt in a.u.; σ in 1/a.u. time (docs/theory.md#local-diabatization).
    """
    S = np.asarray(S, dtype=float)
    T = lowdin_orthogonal(S)
    H0 = np.diag(np.asarray(E0, dtype=float))
    H1 = T @ np.diag(np.asarray(E1, dtype=float)) @ T.T
    z_d = interpolated_propagator(H0, H1, dt, substeps) @ z
    return T.T @ z_d, sigma_from_overlap(S, dt)


def propagate_with_couplings(z: np.ndarray, E0: np.ndarray, E1: np.ndarray, d0: np.ndarray, d1: np.ndarray,
                             velocity: np.ndarray, dt: float, substeps: int) -> tuple[np.ndarray, np.ndarray]:
    """Oscillators z (F,) through the step with H_eff = diag E − i V·d, and the mid-step σ (F, F).

    i dz/dt = (diag E − iσ) z (Cotton, Liang & Miller 2017, adiabatic equations), with H_eff
    interpolated linearly between its values at t (E0, d0) and t+Δt (E1, d1) at the fixed
    mid-step velocity V (N, 3) in Bohr/a.u. time; σ_mid = ½(V·d0 + V·d1).  E in Eh, d in 1/Bohr,
    dt in a.u.
    """
    s0 = velocity_couplings(d0, velocity)
    s1 = velocity_couplings(d1, velocity)
    H0 = np.diag(np.asarray(E0, dtype=float)) - 1j * s0
    H1 = np.diag(np.asarray(E1, dtype=float)) - 1j * s1
    return interpolated_propagator(H0, H1, dt, substeps) @ z, 0.5 * (s0 + s1)


# ------------------------------------------------------------------------------ force
def averaged_density(rho: np.ndarray, x: np.ndarray, p: np.ndarray, energies: np.ndarray,
                     window: float) -> np.ndarray:
    """ρ̄ (F, F): ρ with its coherences averaged over the free electronic motion during ``window``.

    With frozen energies z_k(τ) = z_k e^{−iE_k τ}, so ρ_kl(τ) = ½ Re(z_k z_l* e^{−iω_kl τ}),
    ω_kl = E_k − E_l, and the mean over τ ∈ [0, h] (h < 0: [h, 0]) is

        ρ̄_kl = ½ Re(z_k z_l* e^{−iω_kl h/2}) sinc(ω_kl h/2),   sinc(u) = sin(u)/u

    (own derivation, elementary integral; docs/theory.md#force-averaging).  rho: the density at
    τ = 0 (dimensionless), its diagonal (ω = 0, zero-point parameters included) is kept; x, p (F,);
    energies in Eh; window in a.u. time (signed).  ρ̄ → ρ as h → 0.
    """
    rho = np.array(rho, dtype=float)
    E = np.asarray(energies, dtype=float)
    omega = E[:, None] - E[None, :]
    u = 0.5 * omega * window
    z = x + 1j * p
    coherence = 0.5 * np.real(z[:, None] * z[None, :].conj() * np.exp(-1j * u)) * np.sinc(u / np.pi)
    idx = np.arange(rho.shape[0])
    off = idx[:, None] != idx[None, :]
    rho[off] = coherence[off]
    return rho


def _diagonal_force_and_weights(rho: np.ndarray, energies: np.ndarray,
                                gradients: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """−Σ_k ρ_kk ∇E_k (N, 3) and the symmetric weights ρ_kl (E_l − E_k) (zero diagonal)."""
    E = np.asarray(energies)
    F = -np.einsum("k,kna->na", np.diag(rho).copy(), np.asarray(gradients))
    weight = rho * (E[None, :] - E[:, None])
    np.fill_diagonal(weight, 0.0)
    return F, weight


def adiabatic_force(rho: np.ndarray, energies: np.ndarray, gradients: np.ndarray,
                    couplings: np.ndarray) -> np.ndarray:
    """F = −Σ_kl ρ_kl ⟨ψ_k|∇H|ψ_l⟩ (N, 3) in Eh/Bohr, ⟨ψ_k|∇H|ψ_l⟩ = δ_kl ∇E_k + (E_l − E_k) d_kl.

    Off-diagonal Hellmann–Feynman matrix element; MMST force in the adiabatic representation
    (Cotton, Liang & Miller, J. Chem. Phys. 147, 064112 (2017)).  rho (F, F) dimensionless,
    energies (F,) Eh, gradients (F, N, 3) Eh/Bohr, couplings d_kl = ⟨ψ_k|∇ψ_l⟩ (F, F, N, 3) 1/Bohr.
    """
    F, weight = _diagonal_force_and_weights(rho, energies, gradients)
    F -= np.einsum("kl,klna->na", weight, np.asarray(couplings))
    return F


def extrapolate_projection(history: Sequence[HistoryEntry], t: float) -> tuple[np.ndarray, np.ndarray]:
    """(σ, V) at time t (a.u.) extrapolated linearly from the last two mid-step entries.

    history: entries (time a.u., σ (F, F) 1/a.u. time, V (N, 3) Bohr/a.u. time), oldest first; with
    one entry it is returned unchanged.  y(t) = y_b + (t − t_b)/(t_b − t_a) (y_b − y_a)
    (docs/theory.md#velocity-projected-couplings).
    """
    tb, sb, vb = history[-1]
    if len(history) < 2:
        return sb, vb
    ta, sa, va = history[-2]
    w = (t - tb) / (tb - ta)
    return sb + w * (sb - sa), vb + w * (vb - va)


def projected_force(rho: np.ndarray, energies: np.ndarray, gradients: np.ndarray, sigma: np.ndarray,
                    velocity: np.ndarray, velocity_floor: float) -> np.ndarray:
    """Force (N, 3) in Eh/Bohr without coupling vectors: d_kl ≈ σ_kl V/|V|² in :func:`adiabatic_force`.

    F = −Σ_k ρ_kk ∇E_k − [Σ_kl ρ_kl (E_l − E_k) σ_kl] V/|V|², the off-diagonal part dropped when
    |V| ≤ velocity_floor (Bohr/a.u. time).  Keeps the energy exchange along V exactly (σ = V·d)
    and misses the force perpendicular to V (project's scheme, exact in one dimension;
    docs/theory.md#velocity-projected-couplings).  σ (F, F) in 1/a.u. time, V (N, 3).
    """
    F, weight = _diagonal_force_and_weights(rho, energies, gradients)
    v2 = float(np.sum(velocity * velocity))
    if np.sqrt(v2) > velocity_floor:
        F -= np.sum(weight * sigma) * velocity / v2
    return F


def gap_resolution_message(energies: np.ndarray, sigma: np.ndarray, dt: float, step: int,
                           force_averaging: bool) -> str | None:
    """Message when the step does not resolve the electronic gap, else None.

    Issued when max |E_k − E_l|·Δt > GAP_PHASE_LIMIT (rad) over pairs with |σ_kl|·Δt >
    GAP_COUPLING_FLOOR: the coherences then turn by more than a radian per step
    (docs/theory.md#force-averaging).  energies (F,) Eh; σ (F, F) mid-step 1/a.u. time; dt a.u.;
    step: the step index reported in the message.
    """
    E = np.asarray(energies, dtype=float)
    phase = np.abs(E[:, None] - E[None, :]) * dt
    coupled = np.abs(np.asarray(sigma)) * dt > GAP_COUPLING_FLOOR
    np.fill_diagonal(coupled, False)
    if not (np.any(coupled) and phase[coupled].max() > GAP_PHASE_LIMIT):
        return None
    i, j = np.unravel_index(np.argmax(np.where(coupled, phase, -1.0)), phase.shape)
    return (f"{GAP_WARNING}: max ΔE·Δt = {phase[i, j]:.2f} rad > {GAP_PHASE_LIMIT} between coupled states "
            f"{min(i, j)} and {max(i, j)} (|V·d|·Δt = {abs(sigma[i, j]) * dt:.1e}) at step {step}"
            + ("; forces are averaged over the electronic half steps" if force_averaging else
               "; force_averaging is off, expect energy drift"))


# ------------------------------------------------------------------------------ energy and momenta
def nuclear_kinetic_energy(momenta: np.ndarray, masses: np.ndarray) -> float:
    """Σ_i |P_i|²/2m_i in Eh; momenta (N, 3) a.u., masses (N,) electron masses."""
    return 0.5 * float(np.sum(momenta ** 2 / np.asarray(masses)[:, None]))


def mapping_potential_energy(rho: np.ndarray, energies: np.ndarray) -> float:
    """Σ_k ρ_kk E_k in Eh (adiabatic MMST potential); rho (F, F) dimensionless, energies (F,) Eh."""
    return float(np.dot(np.diag(rho), energies))


def mapping_total_energy(momenta: np.ndarray, masses: np.ndarray, rho: np.ndarray, energies: np.ndarray) -> float:
    """Conserved MMST energy Σ P²/2M + Σ_k ρ_kk E_k in Eh (Meyer & Miller, J. Chem. Phys. 70, 3214
    (1979), adiabatic form of Cotton, Liang & Miller 2017); units as in the two terms' functions."""
    return nuclear_kinetic_energy(momenta, masses) + mapping_potential_energy(rho, energies)


def remove_total_momentum(positions: np.ndarray, momenta: np.ndarray, masses: np.ndarray,
                          linear: bool = True, angular: bool = True) -> np.ndarray:
    """Momenta (N, 3) with zero total linear and/or angular momentum (about the centre of mass).

    P_i ← P_i − m_i P_tot/M;  P_i ← P_i − m_i ω × r_i with ω = I⁻¹ L (pseudo-inverse for linear
    molecules), r_i relative to the centre of mass (rigid-body mechanics, common practice).
    Any consistent units (positions (N, 3), momenta (N, 3), masses (N,)).
    """
    R = np.asarray(positions, dtype=float)
    P = np.array(momenta, dtype=float)
    m = np.asarray(masses, dtype=float).reshape(-1, 1)
    if linear:
        P -= m * P.sum(axis=0) / m.sum()
    if angular and R.shape[0] > 1:
        r = R - (m * R).sum(axis=0) / m.sum()
        L = np.cross(r, P).sum(axis=0)
        inertia = (m[:, 0] * (r * r).sum(axis=1)).sum() * np.eye(3) - np.einsum("i,ik,il->kl", m[:, 0], r, r)
        omega = np.linalg.pinv(inertia, rcond=1e-10) @ L
        P -= m * np.cross(omega[None, :], r)
    return P
