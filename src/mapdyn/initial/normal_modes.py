"""Hessian (analytic RHF/RKS or central finite differences of gradients) and mass-weighted normal
modes with translations and rotations projected out (Hartree atomic units; frequencies in Eh and
cm⁻¹)."""

from __future__ import annotations

import dataclasses
import warnings
from typing import Any, Sequence

import numpy as np
import scipy.linalg

from mapdyn.backends.contract import BackendError
from mapdyn.initial.geometry import DEFAULT_TINY_FREQUENCY_CM, ModeDroppedWarning, _as_positions, masses_amu_for
from mapdyn.units import AMU_IN_ME, HARTREE_IN_CM

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


