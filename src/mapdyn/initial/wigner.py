"""Wigner sampling of the harmonic ground state at 0 K or a temperature (docs/theory.md#wigner-sampling).

Random numbers (docs/architecture.md#random-streams): trajectory i draws from
``np.random.default_rng(np.random.SeedSequence(seed).spawn(n)[i])`` (see :func:`trajectory_rng`);
:func:`draw_wigner` consumes, in this order, ``nvib`` standard normals for the mode coordinates Q
(mode order = ascending frequency) and then ``nvib`` standard normals for the mode momenta P_Q.
Whatever the engine draws afterwards (mapping actions, angles) comes from the same generator.
"""

from __future__ import annotations

import dataclasses
from typing import Sequence

import numpy as np

from mapdyn.initial.geometry import check_level_of_theory
from mapdyn.initial.normal_modes import NormalModes
from mapdyn.units import KB_IN_HARTREE_PER_K

# --------------------------------------------------------------------------------------------
# Wigner sampling
# --------------------------------------------------------------------------------------------

def trajectory_rng(seed: int, n_trajectories: int, index: int) -> np.random.Generator:
    """``default_rng(SeedSequence(seed).spawn(n_trajectories)[index])`` (docs/architecture.md#random-streams)."""
    n = int(n_trajectories)
    if n < 1:
        raise ValueError(f"n_trajectories must be >= 1, got {n_trajectories}")
    if not (0 <= int(index) < n):
        raise ValueError(f"index must be in 0..{n - 1}, got {index}")
    # SeedSequence(seed, spawn_key=(i,)) is identical to SeedSequence(seed).spawn(n)[i], in O(1).
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(int(index),)))


def _check_temperature(temperature_kelvin: float) -> float:
    t = float(temperature_kelvin)
    if not np.isfinite(t) or t < 0:
        raise ValueError(f"temperature_kelvin must be >= 0 (K), got {temperature_kelvin}")
    return t


def wigner_widths(frequencies_hartree: np.ndarray, temperature_kelvin: float = 0.0
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Variances (σ_Q², σ_P²) of the thermal harmonic Wigner function for unit-mass modes.

    σ_Q² = (ħ/2ω) coth(ħω/2kT), σ_P² = (ħω/2) coth(ħω/2kT); at T = 0 coth → 1 (docs/theory.md#wigner-sampling;
    Wigner, Phys. Rev. 40, 749 (1932); Hillery et al., Phys. Rep. 106, 121 (1984); from memory).
    Units: Q in sqrt(m_e)·Bohr, P_Q in sqrt(m_e)·Bohr/(ħ/Eh); ω in Eh (ħ = 1).
    """
    t = _check_temperature(temperature_kelvin)
    w = np.asarray(frequencies_hartree, dtype=float)
    if np.any(w <= 0):
        raise ValueError("frequencies_hartree must be positive (drop imaginary/tiny modes first)")
    if t == 0.0:
        coth = np.ones_like(w)
    else:
        coth = 1.0 / np.tanh(w / (2.0 * KB_IN_HARTREE_PER_K * t))
    return coth / (2.0 * w), 0.5 * w * coth


@dataclasses.dataclass
class WignerSample:
    """One sampled nuclear initial condition (atomic units).

    positions_bohr, velocities : (N, 3) in Bohr and Bohr/(ħ/Eh); momenta = m v in m_e·Bohr/(ħ/Eh).
    mode_coordinates, mode_momenta : (nvib,) Q and P_Q as drawn (before rigid-body removal).
    """

    positions_bohr: np.ndarray
    velocities: np.ndarray
    momenta: np.ndarray
    mode_coordinates: np.ndarray
    mode_momenta: np.ndarray


def remove_rigid_body_motion(positions_bohr: np.ndarray, velocities: np.ndarray,
                             masses_me: np.ndarray, *, linear: bool = True,
                             angular: bool = True) -> np.ndarray:
    """Return velocities with total linear momentum P = Σ m v and/or angular momentum
    J = Σ m (r − R_cm) × v removed: v ← v − P/M, then v ← v − Ω × (r − R_cm), Ω = I⁻¹ J (I the
    inertia tensor about the COM; pseudo-inverse for linear geometries).  Units as given.
    """
    m = np.asarray(masses_me, dtype=float)
    v = np.array(velocities, dtype=float)
    x = np.asarray(positions_bohr, dtype=float)
    if linear:
        v -= (m @ v) / m.sum()
    if angular and m.size > 1:
        r = x - (m @ x) / m.sum()
        jvec = np.einsum("i,ij->j", m, np.cross(r, v))
        inertia = np.einsum("i,ij,ik->jk", m, r, r)
        inertia = np.trace(inertia) * np.eye(3) - inertia
        omega = np.linalg.pinv(inertia, rcond=1e-10) @ jvec
        v -= np.cross(omega[None, :], r)
    return v


def draw_wigner(modes: NormalModes, rng: np.random.Generator, temperature_kelvin: float = 0.0, *,
                zero_linear_momentum: bool = True, zero_angular_momentum: bool = True) -> WignerSample:
    """Draw one nuclear initial condition from the harmonic Wigner function (docs/theory.md#wigner-sampling).

    Draw order from ``rng``: ``nvib`` standard normals for Q, then ``nvib`` for P_Q (mode order of
    ``modes``).  ΔR = M^{-1/2} L Q, V = M^{-1/2} L P_Q; then optional removal of total linear and
    angular momentum at the displaced geometry (:func:`remove_rigid_body_motion`).  The sampled
    V already has zero linear momentum and zero angular momentum to first order in ΔR; the
    removal makes both zero exactly and changes the kinetic energy at second order.
    """
    var_q, var_p = wigner_widths(modes.frequencies_hartree, temperature_kelvin)
    q = rng.standard_normal(modes.nvib) * np.sqrt(var_q)
    p = rng.standard_normal(modes.nvib) * np.sqrt(var_p)
    x = modes.positions_bohr + (modes.cartesian_modes @ q).reshape(-1, 3)
    v = (modes.cartesian_modes @ p).reshape(-1, 3)
    if zero_linear_momentum or zero_angular_momentum:
        v = remove_rigid_body_motion(x, v, modes.masses_me, linear=zero_linear_momentum,
                                     angular=zero_angular_momentum)
    return WignerSample(x, v, v * modes.masses_me[:, None], q, p)


@dataclasses.dataclass
class WignerEnsemble:
    """Sampled nuclear initial conditions, leading trajectory axis (atomic units).

    positions_bohr, velocities, momenta : (n, N, 3) in Bohr, Bohr/(ħ/Eh), m_e·Bohr/(ħ/Eh).
    mode_coordinates, mode_momenta : (n, nvib) Q, P_Q as drawn.
    trajectory_indices : (n,) index i of each row in SeedSequence(seed).spawn(n_trajectories).
    temperature_kelvin : K.  level_of_theory : of the Hessian the modes came from.
    """

    symbols: list[str]
    masses_me: np.ndarray
    positions_bohr: np.ndarray
    velocities: np.ndarray
    momenta: np.ndarray
    mode_coordinates: np.ndarray
    mode_momenta: np.ndarray
    trajectory_indices: np.ndarray
    seed: int
    n_trajectories: int
    temperature_kelvin: float
    level_of_theory: str

    def kinetic_energy_hartree(self) -> np.ndarray:
        """(n,) Σ ½ m v², Eh."""
        return 0.5 * np.einsum("i,tij,tij->t", self.masses_me, self.velocities, self.velocities)


def sample_wigner(modes: NormalModes, n_trajectories: int, seed: int, temperature_kelvin: float = 0.0,
                  *, indices: Sequence[int] | None = None, zero_linear_momentum: bool = True,
                  zero_angular_momentum: bool = True,
                  dynamics_level_of_theory: str | None = None) -> WignerEnsemble:
    """Wigner-sample trajectories ``indices`` (default all) of an ``n_trajectories`` study.

    Trajectory i uses ``trajectory_rng(seed, n_trajectories, i)`` and :func:`draw_wigner`, so a
    row depends only on (seed, i), not on which other rows were drawn.
    """
    n = int(n_trajectories)
    if n < 1:
        raise ValueError(f"n_trajectories must be >= 1, got {n_trajectories}")
    t = _check_temperature(temperature_kelvin)
    if modes.nvib == 0:
        raise ValueError("modes: no vibrational modes left to sample")
    if dynamics_level_of_theory is not None:
        check_level_of_theory(modes.level_of_theory, dynamics_level_of_theory)
    idx = np.arange(n) if indices is None else np.asarray(indices, dtype=int).reshape(-1)
    if idx.size == 0:
        raise ValueError("indices must name at least one trajectory")
    if idx.min() < 0 or idx.max() >= n:
        raise ValueError(f"indices must lie in 0..{n - 1}")
    children = np.random.SeedSequence(seed).spawn(n)
    samples = [draw_wigner(modes, np.random.default_rng(children[i]), t,
                           zero_linear_momentum=zero_linear_momentum,
                           zero_angular_momentum=zero_angular_momentum) for i in idx]

    def stack(name: str) -> np.ndarray:
        return np.array([getattr(s, name) for s in samples])

    return WignerEnsemble(
        symbols=list(modes.symbols),
        masses_me=modes.masses_me.copy(),
        positions_bohr=stack("positions_bohr"),
        velocities=stack("velocities"),
        momenta=stack("momenta"),
        mode_coordinates=stack("mode_coordinates"),
        mode_momenta=stack("mode_momenta"),
        trajectory_indices=idx,
        seed=int(seed),
        n_trajectories=n,
        temperature_kelvin=t,
        level_of_theory=modes.level_of_theory,
    )
