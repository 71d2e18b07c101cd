"""Linear algebra of the TDA/TDDFT states, arrays in and out: CIS amplitude normalisation, state
overlaps between steps from the MO cross-overlap, time-derivative couplings and the root-window
diagnostics of the buffer roots (docs/theory.md#root-buffer).  Conventions as in
:mod:`mapdyn.backends.pyscf.tddft`; Hartree atomic units."""

from __future__ import annotations

import numpy as np

from mapdyn.backends.contract import BackendError

__all__ = ["normalise_cis_amplitudes", "determinant_state_overlaps", "time_derivative_couplings",
           "root_window_diagnostics", "DEFAULT_SINGULAR_TOL", "ROOT_WINDOW_WEIGHT_MIN"]

#: Smallest singular value of the occupied–occupied MO overlap block below which state overlaps
#: are refused (the occupied space changed too much within one step for the expansion to be
#: trusted numerically).
DEFAULT_SINGULAR_TOL = 1e-3

#: Summed squared overlap (dimensionless) of a propagated state with all computed roots below which it
#: counts as having left the computed window (docs/theory.md#root-buffer).
ROOT_WINDOW_WEIGHT_MIN = 0.5


# ---------------------------------------------------------------------------------------------
# Pure linear algebra: state overlaps and time-derivative couplings
# ---------------------------------------------------------------------------------------------

def normalise_cis_amplitudes(x: np.ndarray) -> np.ndarray:
    """Rescale singlet amplitudes X (..., nocc, nvir) so that 2 Σ_ia X_ia² = 1 (dimensionless).

    With |Ψ> = Σ_ia X_ia (a†_aα a_iα + a†_aβ a_iβ)|Φ_0> the norm is <Ψ|Ψ> = 2 Σ X² (the two spin
    blocks are orthogonal determinants); PySCF's TDA amplitudes already satisfy Σ X² = 1/2.
    """
    x = np.asarray(x, dtype=float)
    norm = np.sqrt(2.0 * np.sum(x * x, axis=(-2, -1), keepdims=True))
    if np.any(norm == 0.0):
        raise ValueError("x: amplitude vector with zero norm cannot be normalised")
    return x / norm


def determinant_state_overlaps(mo_overlap: np.ndarray, nocc: int, x_prev: np.ndarray,
                               x_new: np.ndarray, singular_tol: float = DEFAULT_SINGULAR_TOL
                               ) -> tuple[np.ndarray, float]:
    """Overlaps <Ψ_K(prev)|Ψ_L(new)> of the reference determinant and CIS-like singlets, O(N³).

    Parameters
    ----------
    mo_overlap : (nmo, nmo) S_pq = <φ_p(prev)|φ_q(new)> (spatial MOs, dimensionless).
    nocc : number of doubly occupied orbitals (the first ``nocc`` MOs on both sides).
    x_prev, x_new : (n_prev, nocc, nvir), (n_new, nocc, nvir) singlet amplitudes normalised to
        2 Σ X² = 1 (see :func:`normalise_cis_amplitudes`).
    singular_tol : refuse when the smallest singular value of S_oo is below this.

    Returns
    -------
    overlap : (1 + n_prev, 1 + n_new) with index 0 the reference determinant.
    sigma_min : smallest singular value of the occupied–occupied block S_oo.

    Equations (derived here; checked against explicit spin-orbital determinants in
    ``tests/test_backend_tddft.py``).  With A = S_oo, d = det A, P = (S_vo A⁻¹)ᵀ, Q = A⁻¹ S_ov and
    the Schur-complemented virtual block C = S_vv − S_vo A⁻¹ S_ov, the same-spin single
    replacement determinant is d[C_ab (A⁻¹)_ji + P_ia Q_jb] (cofactor of the bordered matrix),
    the one-sided ones are d P_ia and d Q_jb, and with both spin blocks (Löwdin's rule: the overlap
    of two determinants is the determinant of the spin-orbital overlaps):

        <Φ_0|Φ'_0> = d²,   <Φ_0|Ψ'_L> = 2 d² <X'_L, Q>,   <Ψ_K|Φ'_0> = 2 d² <X_K, P>,
        <Ψ_K|Ψ'_L> = 2 d² [ tr(X_K C X'_Lᵀ A⁻¹) + 2 <X_K, P> <X'_L, Q> ].
    """
    s = np.asarray(mo_overlap, dtype=float)
    xp = np.asarray(x_prev, dtype=float)
    xn = np.asarray(x_new, dtype=float)
    if s.ndim != 2 or s.shape[0] != s.shape[1]:
        raise ValueError(f"mo_overlap must be square, got shape {s.shape}")
    nmo = s.shape[0]
    if not 0 < nocc < nmo:
        raise ValueError(f"nocc must be in 1..{nmo - 1}, got {nocc}")
    nvir = nmo - nocc
    for name, x in (("x_prev", xp), ("x_new", xn)):
        if x.ndim != 3 or x.shape[1:] != (nocc, nvir):
            raise ValueError(f"{name} must have shape (n, {nocc}, {nvir}), got {x.shape}")
    a = s[:nocc, :nocc]
    sigma = np.linalg.svd(a, compute_uv=False)
    sigma_min = float(sigma[-1])
    if sigma_min < singular_tol:
        raise BackendError(
            f"occupied-occupied MO overlap between consecutive geometries is nearly singular "
            f"(smallest singular value {sigma_min:.2e} < {singular_tol:.1e}): the step is too "
            f"long or the occupied space changed character",
            [{"what": "state overlap from MO cross-overlap", "outcome": f"sigma_min={sigma_min:.3e}"}],
        )
    d2 = float(np.prod(sigma)) ** 2          # (det A)² > 0 for a closed shell
    a_inv = np.linalg.inv(a)
    s_ov = s[:nocc, nocc:]
    s_vo = s[nocc:, :nocc]
    s_vv = s[nocc:, nocc:]
    p = (s_vo @ a_inv).T                      # (nocc, nvir)
    q = a_inv @ s_ov                          # (nocc, nvir)
    c = s_vv - s_vo @ q                       # (nvir, nvir)
    xp_p = np.einsum("kia,ia->k", xp, p)
    xn_q = np.einsum("lia,ia->l", xn, q)
    # tr(X_K C X'_L^T A^-1) = sum_ij (X_K C X'_L^T)_ij (A^-1)_ji
    xc = np.einsum("kia,ab->kib", xp, c)
    xn_ainv = np.einsum("lja,ji->lia", xn, a_inv)        # (A^-1)^T X'_L  -> index (l, i, b)
    excited = np.einsum("kib,lib->kl", xc, xn_ainv) + 2.0 * np.outer(xp_p, xn_q)
    out = np.empty((1 + xp.shape[0], 1 + xn.shape[0]))
    out[0, 0] = d2
    out[0, 1:] = 2.0 * d2 * xn_q
    out[1:, 0] = 2.0 * d2 * xp_p
    out[1:, 1:] = 2.0 * d2 * excited
    return out, sigma_min


def time_derivative_couplings(overlap_aligned: np.ndarray, dt: float) -> np.ndarray:
    """Mid-step time-derivative couplings σ_kl(t + Δt/2) ≈ (S_kl − S_lk)/(2Δt), in 1/(ħ/Eh).

    ``overlap_aligned[k, l] = <ψ_k(t)|ψ_l(t+Δt)>`` after sign alignment (``match_states``);
    σ_kl = <ψ_k|∂ψ_l/∂t> = V·d_kl, antisymmetric, error O(Δt²) at the midpoint.
    Source: Hammes-Schiffer & Tully, J. Chem. Phys. 101, 4657 (1994); see docs/theory.md#local-diabatization.
    ``dt`` is the time between the two geometries in atomic time units (ħ/Eh).
    """
    s = np.asarray(overlap_aligned, dtype=float)
    if s.ndim != 2 or s.shape[0] != s.shape[1]:
        raise ValueError(f"overlap_aligned must be square, got shape {s.shape}")
    if not np.isfinite(dt) or dt <= 0.0:
        raise ValueError(f"dt must be a positive finite time in atomic units, got {dt}")
    return (s - s.T) / (2.0 * dt)


def root_window_diagnostics(overlap_all: np.ndarray, nstates: int,
                            weight_min: float = ROOT_WINDOW_WEIGHT_MIN) -> dict:
    """Where the propagated states of the previous step went among all computed roots.

    overlap_all : (F, 1 + n_roots) <Ψ_k(prev)|Ψ_l(new)> with the F propagated previous states as rows
        (index 0 the reference) and every computed root, buffer included, as columns (dimensionless).
    Returns ``root_window_weight`` (F,) Σ_l |S_kl|² over all computed states (≈ 1 when state k is still
    inside the computed window), ``root_best_match`` (F,) column of the largest |S_kl|, and
    ``root_tracking``: "" (all matched inside the propagated set), "entered buffer: …" (a propagated
    state now matches best a buffer root, i.e. a higher state came down below it) or "left window: …"
    (its weight dropped below ``weight_min``: it is not among the computed roots any more).
    See docs/theory.md#root-buffer.
    """
    s = np.asarray(overlap_all, dtype=float)
    weight = np.sum(s * s, axis=1)
    best = np.argmax(np.abs(s), axis=1)
    notes = []
    left = [k for k in range(s.shape[0]) if weight[k] < weight_min]
    if left:
        notes.append("left window: state " + ", ".join(f"{k} (weight {weight[k]:.2f})" for k in left))
    moved = [k for k in range(s.shape[0]) if best[k] >= nstates and k not in left]
    if moved:
        notes.append("entered buffer: state " + ", ".join(f"{k} -> root {best[k]}" for k in moved))
    return {"root_window_weight": weight, "root_best_match": best.astype(int), "root_tracking": "; ".join(notes),
            "buffer_roots": int(s.shape[1] - nstates)}
