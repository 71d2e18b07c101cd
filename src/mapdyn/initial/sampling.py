"""Initial conditions: ground-state optimisation, Hessian, normal modes, Wigner sampling.

Hartree atomic units inside (Eh, Bohr, electron mass m_e, ħ = 1, time unit ħ/Eh ≈ 0.02419 fs);
ASE's eV/Å appear only inside :class:`GroundStateCalculator`.  Excitation choice and the
nuclear-ensemble absorption spectrum live in :mod:`mapdyn.initial.excitation`.

Workflow::

    opt = optimize_ground_state(backend, symbols, x0, level_of_theory="RHF/6-31G")
    hess = compute_hessian(backend, opt.positions_bohr, level_of_theory=opt.level_of_theory)
    modes = normal_modes(hess.hessian, symbols, opt.positions_bohr)
    ens = sample_wigner(modes, n_trajectories=100, seed=7, temperature_kelvin=0.0)

Random numbers (docs/architecture.md#random-streams): trajectory i draws from
``np.random.default_rng(np.random.SeedSequence(seed).spawn(n)[i])`` (see :func:`trajectory_rng`);
:func:`draw_wigner` consumes, in this order, ``nvib`` standard normals for the mode coordinates Q
(mode order = ascending frequency) and then ``nvib`` standard normals for the mode momenta P_Q.
Whatever the engine draws afterwards (mapping actions, angles) comes from the same generator.
"""

from __future__ import annotations

import dataclasses
import re
import warnings
from typing import Any, Sequence

import numpy as np
import scipy.linalg
from ase import Atoms, units
from ase.calculators.calculator import Calculator, all_changes
from ase.data import atomic_masses, atomic_numbers

from mapdyn.backends.contract import BackendError
from mapdyn.units import AMU_IN_ME, HARTREE_IN_CM, KB_IN_HARTREE_PER_K

__all__ = [
    "AMU_IN_ME",
    "LevelOfTheoryWarning",
    "ModeDroppedWarning",
    "check_level_of_theory",
    "masses_amu_for",
    "GroundStateCalculator",
    "OptimizedGeometry",
    "optimize_ground_state",
    "HessianResult",
    "finite_difference_hessian",
    "compute_hessian",
    "NormalModes",
    "normal_modes",
    "trajectory_rng",
    "wigner_widths",
    "WignerSample",
    "draw_wigner",
    "WignerEnsemble",
    "sample_wigner",
    "remove_rigid_body_motion",
    "DEFAULT_GRADIENT_THRESHOLD",
    "DEFAULT_TINY_FREQUENCY_CM",
]


#: default convergence threshold on max |dE_0/dR| component, Eh/Bohr.  1.5e-5 Eh/Bohr is the
#: widely used "tight" optimisation criterion on the largest force component (common practice).
DEFAULT_GRADIENT_THRESHOLD: float = 1.5e-5
#: modes with |omega| below this (cm^-1) are dropped with a warning (stated rule, see normal_modes).
DEFAULT_TINY_FREQUENCY_CM: float = 10.0


class LevelOfTheoryWarning(UserWarning):
    """The initial conditions were made at a different level of theory than the dynamics."""


class ModeDroppedWarning(UserWarning):
    """A normal mode was excluded from sampling (tiny or allowed-imaginary frequency)."""


def _normalise_level(text: str) -> str:
    return re.sub(r"\s+", " ", str(text).strip().lower())


def check_level_of_theory(initial_conditions_level: str, dynamics_level: str) -> bool:
    """Return True when both descriptions agree (case/whitespace-insensitive); warn otherwise.

    The geometry, Hessian and Wigner ensemble should come from the same potential as the dynamics;
    a mismatch puts the ensemble off the dynamics' minimum and gives it the wrong zero-point energy.
    """
    same = _normalise_level(initial_conditions_level) == _normalise_level(dynamics_level)
    if not same:
        warnings.warn(
            f"initial conditions were made at level of theory {initial_conditions_level!r} but the "
            f"dynamics runs at {dynamics_level!r}; the ensemble is not at the dynamics' minimum",
            LevelOfTheoryWarning, stacklevel=2)
    return same


def masses_amu_for(symbols: Sequence[str]) -> np.ndarray:
    """Isotope-averaged atomic masses (amu) from ``ase.data.atomic_masses``."""
    out = []
    for s in symbols:
        if s not in atomic_numbers:
            raise ValueError(f"symbols: unknown element {s!r}")
        out.append(atomic_masses[atomic_numbers[s]])
    return np.asarray(out, dtype=float)


def _as_positions(positions_bohr: np.ndarray, natoms: int | None = None) -> np.ndarray:
    x = np.array(positions_bohr, dtype=float)
    if x.ndim != 2 or x.shape[1] != 3 or (natoms is not None and x.shape[0] != natoms):
        want = f"({natoms}, 3)" if natoms is not None else "(N, 3)"
        raise ValueError(f"positions_bohr must have shape {want}, got {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("positions_bohr contains non-finite values")
    return x


# --------------------------------------------------------------------------------------------
# ASE boundary and geometry optimisation
# --------------------------------------------------------------------------------------------

class GroundStateCalculator(Calculator):
    """ASE calculator exposing one state of a mapdyn backend (default: the ground state, index 0).

    The only place where units change: positions Å → Bohr on the way in, energy Eh → eV and
    force −dE/dR Eh/Bohr → eV/Å on the way out (``ase.units``).  The backend's ``guess`` from the
    previous call is passed to the next call (warm start along the optimisation path).
    """

    implemented_properties = ["energy", "forces"]

    def __init__(self, backend: Any, state: int = 0, **kwargs):
        super().__init__(**kwargs)
        if state < 0 or state >= int(backend.nstates):
            raise ValueError(f"state must be in 0..{int(backend.nstates) - 1}, got {state}")
        self.backend = backend
        self.state = int(state)
        self.guess: Any = None
        self.n_backend_calls = 0
        self.last_gradient_hartree_per_bohr: np.ndarray | None = None
        self.last_energy_hartree: float | None = None

    def calculate(self, atoms=None, properties=("energy",), system_changes=all_changes):
        super().calculate(atoms, properties, system_changes)
        x = self.atoms.get_positions() / units.Bohr
        res = self.backend.compute(x, guess=self.guess, need_gradients=True)
        self.n_backend_calls += 1
        if not res.converged:
            raise BackendError("electronic structure did not converge during geometry optimisation")
        res.validate(natoms=len(self.atoms))
        if res.gradients is None:
            raise BackendError("backend returned no gradients although need_gradients=True")
        self.guess = res.guess
        e = float(res.energies[self.state])
        g = np.asarray(res.gradients[self.state], dtype=float)
        self.last_energy_hartree = e
        self.last_gradient_hartree_per_bohr = g.copy()
        self.results["energy"] = e * units.Hartree
        self.results["forces"] = -g * (units.Hartree / units.Bohr)


@dataclasses.dataclass
class OptimizedGeometry:
    """Result of :func:`optimize_ground_state`.

    positions_bohr : (N, 3) optimised geometry, Bohr.
    energy_hartree : state energy at that geometry, Eh.
    max_gradient_hartree_per_bohr : largest |dE/dR| component there, Eh/Bohr.
    gradient_threshold_hartree_per_bohr : the convergence threshold used, Eh/Bohr.
    converged : max gradient component below the threshold.
    n_steps, n_backend_calls : optimiser steps and electronic-structure calls.
    level_of_theory : caller's description of the method (e.g. "RHF/6-31G").
    guess : backend guess at the final geometry (to start the Hessian from).
    """

    symbols: list[str]
    positions_bohr: np.ndarray
    energy_hartree: float
    max_gradient_hartree_per_bohr: float
    gradient_threshold_hartree_per_bohr: float
    converged: bool
    n_steps: int
    n_backend_calls: int
    level_of_theory: str
    optimizer: str
    guess: Any = None


_OPTIMIZERS = ("BFGS", "FIRE", "LBFGS", "BFGSLineSearch")


def optimize_ground_state(backend: Any, symbols: Sequence[str], positions_bohr: np.ndarray,
                          level_of_theory: str, *,
                          gradient_threshold: float = DEFAULT_GRADIENT_THRESHOLD,
                          optimizer: str = "BFGS", max_steps: int = 200, state: int = 0,
                          logfile: str | None = None,
                          dynamics_level_of_theory: str | None = None) -> OptimizedGeometry:
    """Minimise E_state(R) (default ground state) with an ASE optimiser.

    Convergence: the largest Cartesian component of dE/dR is below ``gradient_threshold``
    (Eh/Bohr).  ASE stops when max_atom |F_atom| < fmax; we pass fmax = threshold (converted to
    eV/Å), which implies the component criterion, and then re-check it on the final gradient.
    Raises RuntimeError if ``max_steps`` is exhausted without convergence.
    """
    import ase.optimize

    symbols = list(symbols)
    x0 = _as_positions(positions_bohr, len(symbols))
    if not (np.isfinite(gradient_threshold) and gradient_threshold > 0):
        raise ValueError(f"gradient_threshold must be a positive number (Eh/Bohr), got {gradient_threshold}")
    if optimizer not in _OPTIMIZERS:
        raise ValueError(f"optimizer must be one of {_OPTIMIZERS}, got {optimizer!r}")
    if int(max_steps) < 1:
        raise ValueError(f"max_steps must be >= 1, got {max_steps}")
    if not isinstance(level_of_theory, str) or not level_of_theory.strip():
        raise ValueError("level_of_theory must be a non-empty description string, e.g. 'RHF/6-31G'")
    if dynamics_level_of_theory is not None:
        check_level_of_theory(level_of_theory, dynamics_level_of_theory)

    atoms = Atoms(symbols, positions=x0 * units.Bohr)
    calc = GroundStateCalculator(backend, state=state)
    atoms.calc = calc
    fmax_ev_per_ang = gradient_threshold * units.Hartree / units.Bohr
    opt = getattr(ase.optimize, optimizer)(atoms, logfile=logfile)
    opt.run(fmax=fmax_ev_per_ang, steps=int(max_steps))
    atoms.get_forces()  # make sure the final geometry has been evaluated
    g = calc.last_gradient_hartree_per_bohr
    gmax = float(np.max(np.abs(g)))
    converged = gmax < gradient_threshold
    if not converged:
        raise RuntimeError(
            f"geometry optimisation did not converge in max_steps={max_steps}: max gradient "
            f"component {gmax:.3e} Eh/Bohr >= gradient_threshold {gradient_threshold:.3e}")
    return OptimizedGeometry(
        symbols=symbols,
        positions_bohr=atoms.get_positions() / units.Bohr,
        energy_hartree=float(calc.last_energy_hartree),
        max_gradient_hartree_per_bohr=gmax,
        gradient_threshold_hartree_per_bohr=float(gradient_threshold),
        converged=converged,
        n_steps=int(opt.nsteps),
        n_backend_calls=calc.n_backend_calls,
        level_of_theory=level_of_theory,
        optimizer=optimizer,
        guess=calc.guess,
    )


# --------------------------------------------------------------------------------------------
# Hessian
# --------------------------------------------------------------------------------------------

@dataclasses.dataclass
class HessianResult:
    """Cartesian Hessian d²E/dR_a dR_b, shape (3N, 3N), Eh/Bohr², atom-major (x1,y1,z1,x2,...).

    method : "analytic" or "finite_difference"; step_bohr : FD step (None for analytic);
    asymmetry : max |H − Hᵀ| before symmetrisation (Eh/Bohr², 0 for analytic);
    level_of_theory : caller's description.
    """

    hessian: np.ndarray
    positions_bohr: np.ndarray
    method: str
    level_of_theory: str
    step_bohr: float | None = None
    asymmetry: float = 0.0
    n_backend_calls: int = 0


def finite_difference_hessian(backend: Any, positions_bohr: np.ndarray, *, step_bohr: float = 2e-3,
                              state: int = 0, guess: Any = None) -> tuple[np.ndarray, float, int]:
    """Central differences of analytic gradients: H[:, a] = (g(R + h e_a) − g(R − h e_a)) / 2h.

    Returns (H symmetrised as (H + Hᵀ)/2 in Eh/Bohr², max |H − Hᵀ| before symmetrising,
    number of backend calls = 6N).  Every displaced calculation starts from the same ``guess``
    (the reference geometry's), so the result does not depend on the order of displacements.
    Error O(h²) from third derivatives plus (gradient noise)/h.
    """
    x0 = _as_positions(positions_bohr)
    if not (np.isfinite(step_bohr) and step_bohr > 0):
        raise ValueError(f"step_bohr must be a positive number (Bohr), got {step_bohr}")
    if state < 0 or state >= int(backend.nstates):
        raise ValueError(f"state must be in 0..{int(backend.nstates) - 1}, got {state}")
    n3 = x0.size
    h = np.empty((n3, n3))
    calls = 0
    for a in range(n3):
        grads = []
        for sgn in (+1.0, -1.0):
            x = x0.copy().reshape(-1)
            x[a] += sgn * step_bohr
            res = backend.compute(x.reshape(x0.shape), guess=guess, need_gradients=True)
            calls += 1
            if not res.converged:
                raise BackendError(f"electronic structure did not converge at FD displacement {a} ({'+' if sgn > 0 else '-'})")
            if res.gradients is None:
                raise BackendError("backend returned no gradients although need_gradients=True")
            grads.append(np.asarray(res.gradients[state], dtype=float).reshape(-1))
        h[:, a] = (grads[0] - grads[1]) / (2.0 * step_bohr)
    asym = float(np.max(np.abs(h - h.T)))
    return 0.5 * (h + h.T), asym, calls


def compute_hessian(backend: Any, positions_bohr: np.ndarray, level_of_theory: str, *,
                    method: str = "auto", step_bohr: float = 2e-3, state: int = 0,
                    guess: Any = None) -> HessianResult:
    """Hessian of state ``state`` (default ground state) at ``positions_bohr``, Eh/Bohr².

    method="auto": analytic when the backend offers ``analytic_hessian(positions_bohr)``
    (e.g. :class:`mapdyn.backends.pyscf.ground_state.PySCFGroundState` for RHF/RKS, PySCF ``mf.Hessian()``)
    and state == 0; otherwise central finite differences of the backend's analytic gradients
    (any backend, including SA-CASSCF and callbacks).
    """
    if method not in ("auto", "analytic", "finite_difference"):
        raise ValueError(f"method must be 'auto', 'analytic' or 'finite_difference', got {method!r}")
    x0 = _as_positions(positions_bohr)
    has_analytic = callable(getattr(backend, "analytic_hessian", None)) and state == 0
    if method == "analytic" and not has_analytic:
        raise ValueError("method='analytic' needs a backend with analytic_hessian() and state=0")
    if method == "analytic" or (method == "auto" and has_analytic):
        hmat = np.asarray(backend.analytic_hessian(x0), dtype=float)
        if hmat.shape != (x0.size, x0.size):
            raise BackendError(f"analytic_hessian returned shape {hmat.shape}, expected {(x0.size, x0.size)}")
        asym = float(np.max(np.abs(hmat - hmat.T)))
        return HessianResult(0.5 * (hmat + hmat.T), x0, "analytic", level_of_theory,
                             None, asym, 1)
    hmat, asym, calls = finite_difference_hessian(backend, x0, step_bohr=step_bohr, state=state, guess=guess)
    return HessianResult(hmat, x0, "finite_difference", level_of_theory, float(step_bohr), asym, calls)


# --------------------------------------------------------------------------------------------
# Normal modes
# --------------------------------------------------------------------------------------------

@dataclasses.dataclass
class NormalModes:
    """Harmonic normal modes at a reference geometry (Hartree atomic units).

    frequencies_hartree : (nvib,) ħω of the kept modes in Eh (= ω in a.u.), ascending.
    frequencies_cm : (nvib,) the same in cm^-1.
    modes : (3N, nvib) orthonormal mass-weighted eigenvectors L (columns), K = L Ω² Lᵀ on the
        vibrational subspace.
    cartesian_modes : (3N, nvib) M^{-1/2} L, Bohr per (sqrt(m_e)·Bohr) of mode coordinate.
    masses_me : (N,) nuclear masses in electron masses.  positions_bohr : (N, 3) reference.
    all_frequencies_cm : (3N − n_rigid,) every vibrational frequency before dropping (imaginary
        ones negative).  dropped_frequencies_cm : those excluded, with ``drop_reasons``.
    n_rigid : number of projected translations + rotations (6, 5 for linear, 3 for an atom).
    """

    symbols: list[str]
    positions_bohr: np.ndarray
    masses_me: np.ndarray
    frequencies_hartree: np.ndarray
    frequencies_cm: np.ndarray
    modes: np.ndarray
    cartesian_modes: np.ndarray
    all_frequencies_cm: np.ndarray
    dropped_frequencies_cm: np.ndarray
    drop_reasons: list[str]
    n_rigid: int
    level_of_theory: str

    @property
    def nvib(self) -> int:
        return int(self.frequencies_hartree.size)

    @property
    def natoms(self) -> int:
        return int(self.masses_me.size)

    @property
    def zero_point_energy_hartree(self) -> float:
        """Σ ω/2 over kept modes, Eh."""
        return float(0.5 * np.sum(self.frequencies_hartree))


def _rigid_body_basis(masses_me: np.ndarray, positions_bohr: np.ndarray) -> np.ndarray:
    """Orthonormal basis (3N, n_rigid) of mass-weighted translations and rotations about the COM."""
    m = np.asarray(masses_me, dtype=float)
    x = positions_bohr - (m @ positions_bohr) / m.sum()
    n = m.size
    sq = np.sqrt(m)
    vecs = []
    for a in range(3):
        t = np.zeros((n, 3))
        t[:, a] = sq
        vecs.append(t.reshape(-1))
    for a in range(3):
        e = np.zeros(3)
        e[a] = 1.0
        r = np.cross(e[None, :], x) * sq[:, None]
        vecs.append(r.reshape(-1))
    d = np.array(vecs).T  # (3N, 6)
    u, s, _ = np.linalg.svd(d, full_matrices=False)
    keep = s > 1e-6 * s.max()
    return u[:, keep]


def normal_modes(hessian: np.ndarray, symbols: Sequence[str], positions_bohr: np.ndarray, *,
                 masses_amu: Sequence[float] | None = None, level_of_theory: str = "",
                 tiny_frequency_cm: float = DEFAULT_TINY_FREQUENCY_CM,
                 allow_imaginary: bool = False) -> NormalModes:
    """Frequencies and modes from a Cartesian Hessian (Eh/Bohr²) with rigid-body motion removed.

    K = M^{-1/2} H M^{-1/2}; B = orthonormal complement of the mass-weighted translation/rotation
    vectors at the reference geometry (COM frame); Bᵀ K B = U Ω² Uᵀ; L = B U; ω = sign(λ)√|λ|
    (standard normal-mode analysis, e.g. Wilson, Decius & Cross, *Molecular Vibrations*, 1955;
    from memory).

    Rule for awkward modes: |ω| < ``tiny_frequency_cm`` → dropped with a ModeDroppedWarning (a
    0 K Wigner width √(1/2ω) diverges).  Imaginary with |ω| >= ``tiny_frequency_cm`` → ValueError
    (not a minimum) unless ``allow_imaginary=True``, in which case it is dropped with a warning.
    """
    symbols = list(symbols)
    x0 = _as_positions(positions_bohr, len(symbols))
    n3 = x0.size
    hmat = np.asarray(hessian, dtype=float)
    if hmat.shape != (n3, n3):
        raise ValueError(f"hessian must have shape ({n3}, {n3}), got {hmat.shape}")
    if not np.all(np.isfinite(hmat)):
        raise ValueError("hessian contains non-finite values")
    if not (np.isfinite(tiny_frequency_cm) and tiny_frequency_cm >= 0):
        raise ValueError(f"tiny_frequency_cm must be >= 0, got {tiny_frequency_cm}")
    m_amu = masses_amu_for(symbols) if masses_amu is None else np.asarray(masses_amu, dtype=float)
    if m_amu.shape != (len(symbols),) or np.any(m_amu <= 0):
        raise ValueError(f"masses_amu must be {len(symbols)} positive numbers")
    m = m_amu * AMU_IN_ME
    inv_sqrt_m = np.repeat(1.0 / np.sqrt(m), 3)
    k = 0.5 * (hmat + hmat.T) * inv_sqrt_m[:, None] * inv_sqrt_m[None, :]
    rigid = _rigid_body_basis(m, x0)
    b = scipy.linalg.null_space(rigid.T)  # (3N, 3N - n_rigid), orthonormal
    lam, u = np.linalg.eigh(b.T @ k @ b)
    l_all = b @ u
    omega_all = np.sign(lam) * np.sqrt(np.abs(lam))
    cm_all = omega_all * HARTREE_IN_CM
    keep = np.ones(lam.size, dtype=bool)
    reasons = []
    for j, w in enumerate(cm_all):
        if abs(w) < tiny_frequency_cm:
            keep[j] = False
            reasons.append(f"|omega| = {abs(w):.2f} cm^-1 < tiny_frequency_cm = {tiny_frequency_cm}")
        elif w < 0:
            if not allow_imaginary:
                raise ValueError(
                    f"hessian has an imaginary frequency {abs(w):.1f}i cm^-1 (not a minimum); "
                    f"re-optimise or pass allow_imaginary=True to drop it")
            keep[j] = False
            reasons.append(f"imaginary {abs(w):.2f}i cm^-1 dropped (allow_imaginary=True)")
    for r in reasons:
        warnings.warn(f"normal mode excluded from sampling: {r}", ModeDroppedWarning, stacklevel=2)
    l_keep = l_all[:, keep]
    return NormalModes(
        symbols=symbols,
        positions_bohr=x0,
        masses_me=m,
        frequencies_hartree=omega_all[keep],
        frequencies_cm=cm_all[keep],
        modes=l_keep,
        cartesian_modes=inv_sqrt_m[:, None] * l_keep,
        all_frequencies_cm=cm_all,
        dropped_frequencies_cm=cm_all[~keep],
        drop_reasons=reasons,
        n_rigid=int(rigid.shape[1]),
        level_of_theory=level_of_theory,
    )


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
