"""Per-trajectory random streams and initial conditions for model ensembles.

Trajectory i of a study with seed s draws from ``numpy.random.SeedSequence(s).spawn(n)[i]``
(equivalently ``SeedSequence(s, spawn_key=(i,))``, which does not depend on n), in a fixed order:
nuclear coordinates, nuclear momenta, actions, angles.  So the same seed gives the same initial
conditions whichever engine or worker runs the trajectory.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from mapdyn.core.model import DiabaticModel
from mapdyn.core.options import MethodOptions
from mapdyn.core.windows import sample_mapping_variables

__all__ = ["trajectory_generator", "EnsembleState", "gaussian_wavepacket_ensemble", "to_diabatic"]


def trajectory_generator(seed: int, index: int) -> np.random.Generator:
    """The random generator of trajectory ``index`` for study seed ``seed``."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed={seed!r} is not allowed; it must be a non-negative integer")
    if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or index < 0:
        raise ValueError(f"trajectory index={index!r} is not allowed; it must be a non-negative integer")
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(int(index),)))


@dataclasses.dataclass
class EnsembleState:
    """A batch of mapping trajectories in the diabatic basis (atomic units).

    R, P : (n, D) positions (Bohr) and momenta (a.u.); x, p : (n, F) mapping variables;
    gamma_adjusted : (n, F) trajectory-adjusted zero-point parameters (only for zero_point="adjusted");
    time : a.u.; indices : (n,) trajectory indices within the study.
    """

    R: np.ndarray
    P: np.ndarray
    x: np.ndarray
    p: np.ndarray
    gamma_adjusted: np.ndarray | None = None
    time: float = 0.0
    indices: np.ndarray | None = None

    def copy(self) -> "EnsembleState":
        return EnsembleState(self.R.copy(), self.P.copy(), self.x.copy(), self.p.copy(),
                             None if self.gamma_adjusted is None else self.gamma_adjusted.copy(),
                             self.time, None if self.indices is None else self.indices.copy())

    @property
    def ntraj(self) -> int:
        return self.R.shape[0]


def to_diabatic(model: DiabaticModel, R: np.ndarray, x: np.ndarray, p: np.ndarray):
    """Mapping variables given in the adiabatic basis at R → diabatic basis: c_dia = U c_ad."""
    _, U = model.adiabatic(R)
    c = np.einsum("nkl,nl->nk", U, x + 1j * p)
    return c.real.copy(), c.imag.copy()


def _as_dof_vector(name: str, value, ndof: int, positive: bool = False) -> np.ndarray:
    v = np.broadcast_to(np.asarray(value, dtype=float), (ndof,)).copy() if np.ndim(value) <= 1 else None
    if v is None or v.shape != (ndof,):
        raise ValueError(f"{name} must be a number or a vector of length {ndof}, got shape {np.shape(value)}")
    if not np.all(np.isfinite(v)):
        raise ValueError(f"{name} contains non-finite values")
    if positive and np.any(v < 0):
        raise ValueError(f"{name} must be non-negative, got {v.tolist()}")
    return v



def gaussian_phase_space(R0: np.ndarray, sR: np.ndarray, P0: np.ndarray, sP: np.ndarray, nstates: int,
                         initial_state: int, options: MethodOptions, ntraj: int, seed: int,
                         first_index: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Independent Gaussian draws R = R0 + σ_R ξ, P = P0 + σ_P ξ' (a.u.) and mapping variables in
    the initial window, trajectory j from stream ``first_index + j`` in the order coordinates,
    momenta, actions, angles (docs/architecture.md#random-streams).  Returns R, P (n, D), x, p (n, F)."""
    D = R0.shape[0]
    R = np.empty((ntraj, D))
    P = np.empty((ntraj, D))
    x = np.empty((ntraj, nstates))
    p = np.empty((ntraj, nstates))
    for j in range(ntraj):
        rng = trajectory_generator(seed, first_index + j)
        R[j] = R0 + sR * rng.standard_normal(D)
        P[j] = P0 + sP * rng.standard_normal(D)
        x[j], p[j] = sample_mapping_variables(rng, nstates, initial_state, options)
    return R, P, x, p

def gaussian_wavepacket_ensemble(model: DiabaticModel, ntraj: int, seed: int, position, momentum,
                                 position_width, initial_state: int, options: MethodOptions,
                                 basis: str = "adiabatic", first_index: int = 0) -> EnsembleState:
    """Initial conditions from the Wigner function of a Gaussian wavepacket on one electronic state.

    Wavepacket ψ(R) ∝ exp[−(R − R0)²/(4σ_R²) + i k (R − R0)] per degree of freedom, whose Wigner
    function is ρ_W ∝ exp[−(R−R0)²/(2σ_R²) − (P−k)²/(2σ_P²)] with σ_P = 1/(2σ_R) (ħ = 1; common
    practice).  ``position`` R0 (Bohr), ``momentum`` k (a.u.), ``position_width`` σ_R (Bohr): numbers
    or length-D vectors.  The electronic state ``initial_state`` is taken in ``basis``
    ("adiabatic" or "diabatic"); returned variables are diabatic.  For zero_point="adjusted" the
    γ_k are e_k(0) − |⟨k|initial⟩|² in the diabatic (propagation) basis, so Σ_k n_k = 1 exactly.
    """
    if isinstance(ntraj, bool) or not isinstance(ntraj, (int, np.integer)) or ntraj < 1:
        raise ValueError(f"ntraj={ntraj!r} is not allowed; it must be a positive integer")
    if basis not in ("adiabatic", "diabatic"):
        raise ValueError(f"basis={basis!r} is not allowed; choose adiabatic or diabatic")
    D, F = model.ndof, model.nstates
    R0 = _as_dof_vector("position", position, D)
    k = _as_dof_vector("momentum", momentum, D)
    sR = _as_dof_vector("position_width", position_width, D, positive=True)
    sP = np.where(sR > 0, 0.5 / np.where(sR > 0, sR, 1.0), 0.0)
    R, P, x, p = gaussian_phase_space(R0, sR, k, sP, F, initial_state, options, ntraj, seed, first_index)
    occ = np.zeros((ntraj, F))
    occ[:, initial_state] = 1.0
    if basis == "adiabatic":
        _, U = model.adiabatic(R)
        x, p = to_diabatic(model, R, x, p)
        occ = U[:, :, initial_state] ** 2
    gamma_adj = None
    if options.method == "sqc" and options.zero_point == "adjusted":
        gamma_adj = 0.5 * (x * x + p * p) - occ
    return EnsembleState(R, P, x, p, gamma_adj, 0.0, np.arange(first_index, first_index + ntraj))
