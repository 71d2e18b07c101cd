"""Orbital and CI-vector overlaps between geometries for the SA-CASSCF backend: Löwdin
orthonormalisation of warm-start orbitals, determinant overlaps of CASSCF states (core included)
and the smallest singular value of the active-orbital overlap (docs/theory.md#state-matching-and-phases,
docs/theory.md#pyscf-pitfalls).  Arrays in, arrays out."""

from __future__ import annotations

import dataclasses
from typing import Sequence

import numpy as np

from mapdyn.backends.contract import BackendError


def orthonormality_error(mo_coeff: np.ndarray, ao_overlap: np.ndarray) -> float:
    """max |CᵀSC − 1| (dimensionless) for orbitals C in an AO basis with overlap S."""
    m = mo_coeff.T @ ao_overlap @ mo_coeff
    return float(np.max(np.abs(m - np.eye(m.shape[0]))))


def lowdin_orthonormalize(mo_coeff: np.ndarray, ao_overlap: np.ndarray) -> np.ndarray:
    """Symmetric (Löwdin) orthonormalisation C → C (CᵀSC)^(−1/2).

    Löwdin, J. Chem. Phys. 18, 365 (1950): among all orthonormal sets it is the closest to C in the
    S-metric, so orbital character and order are kept (from memory; standard practice).
    """
    m = mo_coeff.T @ ao_overlap @ mo_coeff
    w, v = np.linalg.eigh(0.5 * (m + m.T))
    if w.min() <= 1e-12 * max(1.0, w.max()):
        raise BackendError(f"starting orbitals are linearly dependent (min eigenvalue of CᵀSC {w.min():.3e})")
    return mo_coeff @ (v * w ** -0.5) @ v.T


def _string_occupations(ncas: int, nelec: int) -> np.ndarray:
    """(nstrings, nelec) occupied active orbitals of each PySCF CI string, ascending."""
    from pyscf.fci import cistring

    strings = cistring.make_strings(range(ncas), nelec)
    occ = np.array([[i for i in range(ncas) if (int(s) >> i) & 1] for s in strings], dtype=int)
    return occ.reshape(len(strings), nelec)


def _string_overlap_dets(mo_overlap: np.ndarray, ncore: int, ncas: int, nelec: int) -> np.ndarray:
    """D[I, J] = det of the MO overlap over occupied orbitals (core + string I | core + string J)."""
    occ = _string_occupations(ncas, nelec) + ncore
    core = np.arange(ncore)
    full = np.array([np.concatenate([core, o]) for o in occ], dtype=int)
    n_str, n_occ = full.shape
    if n_occ == 0:
        return np.ones((n_str, n_str))
    blocks = mo_overlap[full[:, None, :, None], full[None, :, None, :]]  # (I, J, n_occ, n_occ)
    return np.linalg.det(blocks)


def ci_overlap_matrix(mo_prev: np.ndarray, ci_prev: Sequence[np.ndarray], mo_new: np.ndarray,
                      ci_new: Sequence[np.ndarray], ao_cross_overlap: np.ndarray, ncore: int,
                      ncas: int, nelecas: tuple[int, int]) -> np.ndarray:
    """S_kl = ⟨ψ_k(prev)|ψ_l(new)⟩ (dimensionless) for CAS wavefunctions at two geometries.

    ⟨D_I|D_J⟩ = det(S^α_IJ) det(S^β_IJ) with S = C_prevᵀ S_AO(prev, new) C_new over the occupied
    orbitals of each determinant (Löwdin, Phys. Rev. 97, 1474 (1955), from memory); core orbitals
    are included in every determinant.  With c[Iα, Iβ] the CI coefficients,
    S_kl = Σ c^prev_k[Iα,Iβ] Dα[Iα,Jα] Dβ[Iβ,Jβ] c^new_l[Jα,Jβ].
    """
    s_mo = mo_prev.T @ ao_cross_overlap @ mo_new
    na, nb = nelecas
    d_a = _string_overlap_dets(s_mo, ncore, ncas, na)
    d_b = d_a if nb == na else _string_overlap_dets(s_mo, ncore, ncas, nb)
    nk, nl = len(ci_prev), len(ci_new)
    out = np.empty((nk, nl))
    for l in range(nl):
        t = d_a @ np.asarray(ci_new[l]).reshape(d_a.shape[1], d_b.shape[1]) @ d_b.T
        for k in range(nk):
            out[k, l] = float(np.sum(np.asarray(ci_prev[k]).reshape(t.shape) * t))
    return out


def active_overlap_min_singular(mo_prev: np.ndarray, mo_new: np.ndarray, ao_cross_overlap: np.ndarray,
                                ncore: int, ncas: int) -> float:
    """Smallest singular value of the active-orbital overlap C_act,prevᵀ S_AO C_act,new.

    Close to 1 when the active space is carried smoothly; a drop means an orbital left the active
    space (the states' meaning changed).  Dimensionless.
    """
    a_prev = mo_prev[:, ncore:ncore + ncas]
    a_new = mo_new[:, ncore:ncore + ncas]
    return float(np.linalg.svd(a_prev.T @ ao_cross_overlap @ a_new, compute_uv=False).min())


@dataclasses.dataclass(frozen=True)
class CASSCFGuess:
    """What one CASSCF step hands to the next (picklable, numpy arrays only).

    positions_bohr : (N, 3) geometry of the step that produced this guess, Bohr.
    mo_coeff : (nao, nmo) converged orbitals at that geometry (orthonormal there).
    ci : (F, na_strings, nb_strings) CI vectors, already sign-aligned (the phases of the states
        whose couplings/dipoles were returned).
    energies : (F,) energies of that step, Eh.
    signature : tuple identifying the electronic problem (symbols, basis, charge, spin, active
        space); a guess from another problem is rejected.
    """

    positions_bohr: np.ndarray
    mo_coeff: np.ndarray
    ci: np.ndarray
    energies: np.ndarray
    signature: tuple


def state_dipoles(mol, mo: np.ndarray, ci, ncore: int, ncas: int, nelecas) -> np.ndarray:
    """μ_kl = −tr(r D^kl) (+ nuclear term on the diagonal), e·Bohr; origin at the nuclear charge centre.

    Off-diagonal elements use the active transition density C_act γ^kl C_actᵀ (core cancels by
    orthogonality); the origin only affects the diagonal of charged systems.
    """
    from pyscf.fci import direct_spin1

    charges = mol.atom_charges()
    coords = mol.atom_coords()
    origin = charges @ coords / charges.sum()
    with mol.with_common_orig(origin):
        r_ao = mol.intor_symmetric("int1e_r", comp=3)
    c_core = mo[:, :ncore]
    c_act = mo[:, ncore:ncore + ncas]
    dm_core = 2.0 * c_core @ c_core.T
    nuc = charges @ (coords - origin)
    f = len(ci)
    mu = np.zeros((f, f, 3))
    for k in range(f):
        for l in range(k, f):
            t = direct_spin1.trans_rdm1(ci[k], ci[l], ncas, nelecas)
            dm = c_act @ t @ c_act.T
            if k == l:
                mu[k, k] = nuc - np.einsum("xij,ij->x", r_ao, dm + dm_core)
            else:
                v = -np.einsum("xij,ij->x", r_ao, 0.5 * (dm + dm.T))
                mu[k, l] = mu[l, k] = v
    return mu
