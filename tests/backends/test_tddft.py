"""Tests of the PySCF TDA/TDDFT backend (mapdyn.backends.pyscf.tddft).

All quantities in Hartree atomic units.  Run with OMP_NUM_THREADS=1.
"""

from __future__ import annotations

import itertools
import pickle

import numpy as np
import pytest

pyscf = pytest.importorskip("pyscf")

from mapdyn.backends.contract import BackendError  # noqa: E402
from mapdyn.backends.pyscf.tddft import (  # noqa: E402
    TDDFTBackend,
    TDDFTGuess,
    determinant_state_overlaps,
    normalise_cis_amplitudes,
    time_derivative_couplings,
)

# Distorted (C1) water, Bohr: no symmetry, so every coupling is allowed.
WATER = np.array([[0.05, -0.03, 0.10],
                  [0.10, 1.50, 1.10],
                  [-0.10, -1.40, 1.00]])
# A fixed nuclear velocity (Bohr per atomic time unit) defining straight paths R(t) = R0 + V t;
# O moves little, the hydrogens move against each other (bend + asymmetric stretch).
VELOCITY = np.array([[0.0, 0.002, -0.001],
                     [0.004, -0.010, 0.006],
                     [-0.003, 0.012, 0.005]])


@pytest.fixture(scope="module")
def cis_backend():
    return TDDFTBackend(["O", "H", "H"], basis="6-31g", xc=None, method="tda", nstates=4)


@pytest.fixture(scope="module")
def cis_reference(cis_backend):
    return cis_backend.compute(WATER)


# ---------------------------------------------------------------------------------------------
# Brute-force determinant overlaps (independent of the analytic formula)
# ---------------------------------------------------------------------------------------------

def _brute_force_overlaps(s_mo, nocc, x_prev, x_new):
    """<Ψ_K|Ψ'_L> from explicit Slater determinants of spin-orbitals.

    Spin-orbital overlap <pσ|qτ> = S_pq δ_στ; a determinant overlap is det of the occupied
    spin-orbital overlap matrix (Löwdin's rule, common textbook fact, e.g. Szabo & Ostlund);
    |Φ_iσ^a> replaces spin-orbital (i,σ) by (a,σ) in the same position, i.e. a†_aσ a_iσ|Φ_0>;
    |Ψ_K> = Σ_ia X_ia (|Φ_iα^a> + |Φ_iβ^a>) and state 0 = |Φ_0>.
    """
    nmo = s_mo.shape[0]
    nvir = nmo - nocc
    ref = [(i, s) for s in (0, 1) for i in range(nocc)]

    def det_list(x):
        """List of (coefficient, spin-orbital list) for a state; x None -> reference."""
        if x is None:
            return [(1.0, ref)]
        out = []
        for i, a, sigma in itertools.product(range(nocc), range(nvir), (0, 1)):
            if x[i, a] == 0.0:
                continue
            occ = list(ref)
            occ[occ.index((i, sigma))] = (nocc + a, sigma)
            out.append((x[i, a], occ))
        return out

    def det_overlap(bra, ket):
        m = np.array([[s_mo[p, q] if sp == sq else 0.0 for (q, sq) in ket] for (p, sp) in bra])
        return np.linalg.det(m)

    bras = [det_list(None)] + [det_list(x) for x in x_prev]
    kets = [det_list(None)] + [det_list(x) for x in x_new]
    out = np.zeros((len(bras), len(kets)))
    for k, bra in enumerate(bras):
        for l, ket in enumerate(kets):
            out[k, l] = sum(cb * ck * det_overlap(db, dk) for cb, db in bra for ck, dk in ket)
    assert nvir > 0
    return out


def test_analytic_overlap_equals_brute_force_random_matrices():
    # A generic, far-from-identity MO overlap (not orthogonal) exercises every term of the
    # formula, including P, Q and the Schur complement; tolerance: floating-point round-off.
    rng = np.random.default_rng(7)
    nocc, nvir = 3, 3
    s_mo = np.eye(nocc + nvir) + 0.3 * rng.standard_normal((nocc + nvir, nocc + nvir))
    x_prev = normalise_cis_amplitudes(rng.standard_normal((2, nocc, nvir)))
    x_new = normalise_cis_amplitudes(rng.standard_normal((3, nocc, nvir)))
    analytic, _ = determinant_state_overlaps(s_mo, nocc, x_prev, x_new)
    brute = _brute_force_overlaps(s_mo, nocc, x_prev, x_new)
    assert analytic.shape == (3, 4)
    np.testing.assert_allclose(analytic, brute, atol=1e-12, rtol=1e-10)


def test_analytic_overlap_equals_brute_force_between_geometries():
    # Tiny real case: LiH/STO-3G (2 occupied, 4 virtual MOs), two geometries 0.05 Bohr apart.
    backend = TDDFTBackend(["Li", "H"], basis="sto-3g", nstates=4)
    r0 = np.array([[0.0, 0.0, 0.0], [0.1, 0.0, 3.0]])
    first = backend.compute(r0, need_gradients=False)
    second = backend.compute(r0 + np.array([[0.0, 0.02, -0.03], [0.03, 0.0, 0.04]]),
                             guess=first.guess, need_gradients=False)
    from pyscf import gto
    mol0 = backend._molecule(first.guess.positions_bohr)
    mol1 = backend._molecule(second.guess.positions_bohr)
    s_mo = first.guess.mo_coeff.T @ gto.intor_cross("int1e_ovlp", mol0, mol1) @ second.guess.mo_coeff
    brute = _brute_force_overlaps(s_mo, first.guess.nocc, first.guess.x_amplitudes,
                                  second.guess.x_amplitudes)
    # the guess amplitudes carry the aligned signs, so brute force must reproduce overlap_prev
    np.testing.assert_allclose(second.overlap_prev, brute, atol=1e-12)
    assert np.all(np.diag(second.overlap_prev) > 0.9)


def test_overlap_at_same_geometry_is_identity(cis_backend, cis_reference):
    # Same geometry, same orbitals: <Ψ_K|Ψ_L> = δ_KL for CIS (TDA eigenvectors are orthonormal).
    again = cis_backend.compute(WATER, guess=cis_reference.guess, need_gradients=False)
    np.testing.assert_allclose(again.overlap_prev, np.eye(4), atol=1e-7)
    np.testing.assert_allclose(again.energies, cis_reference.energies, atol=1e-9)


def test_singular_occupied_block_is_refused():
    nocc, nvir = 2, 2
    s_mo = np.eye(4)
    s_mo[1, 1] = 0.0                     # occupied orbital 2 rotated entirely out of the space
    s_mo[1, 2] = s_mo[2, 1] = 1.0
    s_mo[2, 2] = 0.0
    x = normalise_cis_amplitudes(np.ones((1, nocc, nvir)))
    with pytest.raises(BackendError, match="nearly singular"):
        determinant_state_overlaps(s_mo, nocc, x, x)


# ---------------------------------------------------------------------------------------------
# Energies, gradients, dipoles against PySCF and finite differences
# ---------------------------------------------------------------------------------------------

def test_energies_and_oscillator_strengths_match_pyscf(cis_backend, cis_reference):
    # Source: PySCF's own RHF/TDA objects (reference library); tolerances: solver thresholds.
    from pyscf import scf
    mf = scf.RHF(cis_backend._molecule(WATER))
    mf.conv_tol = 1e-11
    mf.kernel()
    td = mf.TDA()
    td.nstates = 5
    td.conv_tol = 1e-8
    td.kernel()
    np.testing.assert_allclose(cis_reference.energies[0], mf.e_tot, atol=1e-9)
    np.testing.assert_allclose(cis_reference.energies[1:] - mf.e_tot, td.e[:3], atol=1e-8)
    np.testing.assert_allclose(cis_reference.diagnostics["oscillator_strengths"],
                               td.oscillator_strength()[:3], atol=1e-6)
    # |<0|μ|k>| is origin independent; PySCF's sign/phase convention may differ
    np.testing.assert_allclose(np.linalg.norm(cis_reference.transition_dipoles[0, 1:], axis=1),
                               np.linalg.norm(td.transition_dipole()[:3], axis=1), atol=1e-6)
    # ground-state permanent dipole equals PySCF's SCF dipole (atomic units)
    np.testing.assert_allclose(cis_reference.transition_dipoles[0, 0],
                               mf.dip_moment(unit="au", verbose=0), atol=1e-6)
    mu = cis_reference.transition_dipoles
    np.testing.assert_allclose(mu, np.swapaxes(mu, 0, 1), atol=1e-12)


def _fd_gradients(backend, r, h):
    fd = np.zeros((backend.nstates,) + r.shape)
    for a, x in itertools.product(range(r.shape[0]), range(3)):
        rp, rm = r.copy(), r.copy()
        rp[a, x] += h
        rm[a, x] -= h
        fd[:, a, x] = (backend.compute(rp, need_gradients=False).energies
                       - backend.compute(rm, need_gradients=False).energies) / (2 * h)
    return fd


@pytest.mark.parametrize("method", ["tda", "tddft"])
def test_hf_gradients_match_central_finite_differences(method):
    # CIS (TDA) and TDHF (RPA) analytic gradients vs central differences of the backend's own
    # energies, h = 1e-3 Bohr (truncation ~h²·E'''/6 ~ 1e-7); required ≤ 1e-5 Eh/Bohr (issue).
    backend = TDDFTBackend(["O", "H", "H"], basis="6-31g", method=method, nstates=3)
    res = backend.compute(WATER)
    fd = _fd_gradients(backend, WATER, 1e-3)
    err = np.max(np.abs(fd - res.gradients))
    assert err < 1e-5, f"max |analytic - FD| = {err:.2e} Eh/Bohr"
    assert np.max(np.abs(res.gradients)) > 0.05      # a non-trivial (distorted) geometry


def test_dft_tda_gradients_match_central_finite_differences():
    # PBE0/TDA: PySCF's TD-DFT gradients omit the grid-weight response; measured effect here
    # 6e-6 Eh/Bohr at grid level 3, 1.8e-6 at level 4 (used); required ≤ 1e-5 Eh/Bohr.
    backend = TDDFTBackend(["O", "H", "H"], basis="sto-3g", xc="pbe0", method="tda", nstates=3,
                           grids_level=4)
    res = backend.compute(WATER)
    fd = _fd_gradients(backend, WATER, 1e-3)
    err = np.max(np.abs(fd - res.gradients))
    assert err < 1e-5, f"max |analytic - FD| = {err:.2e} Eh/Bohr"


@pytest.mark.slow
@pytest.mark.parametrize("xc", ["pbe0", "pbe"])
def test_dft_full_tddft_gradients_match_central_finite_differences(xc):
    backend = TDDFTBackend(["O", "H", "H"], basis="6-31g", xc=xc, method="tddft", nstates=3)
    res = backend.compute(WATER)
    fd = _fd_gradients(backend, WATER, 1e-3)
    err = np.max(np.abs(fd - res.gradients))
    assert err < 1e-5, f"max |analytic - FD| = {err:.2e} Eh/Bohr"


# ---------------------------------------------------------------------------------------------
# Overlaps along a path: orthogonality, continuity, time-derivative couplings, sign tracking
# ---------------------------------------------------------------------------------------------

def _step_overlap(backend, r0, r1):
    first = backend.compute(r0, need_gradients=False)
    return backend.compute(r1, guess=first.guess, need_gradients=False).overlap_prev


def test_overlap_orthogonal_to_second_order(cis_backend):
    # ‖SᵀS − 1‖ = O(Δt²) (states and moving basis are unitary to first order): halving the
    # displacement must shrink it by ~4 (accept 3.3–4.7, a 2nd-order signature, not 1st or 3rd).
    dts = [8.0, 4.0, 2.0]
    errs = []
    for dt in dts:
        s = _step_overlap(cis_backend, WATER, WATER - VELOCITY * dt)
        errs.append(np.linalg.norm(s.T @ s - np.eye(4)))
    ratios = [errs[i] / errs[i + 1] for i in range(2)]
    assert all(3.3 < q < 4.7 for q in ratios), (errs, ratios)


def test_overlap_continuous_along_path(cis_backend):
    # A short path of 6 steps (t = 0 → −24, away from the S2/S3 crossing near t ≈ +9): aligned
    # diagonals stay near 1 and the mid-step couplings change smoothly (second differences much
    # smaller than the values themselves).
    dt = 4.0
    res = cis_backend.compute(WATER, need_gradients=False)
    sigmas = []
    for n in range(1, 7):
        res = cis_backend.compute(WATER - VELOCITY * dt * n, guess=res.guess, need_gradients=False)
        s = res.overlap_prev
        assert np.all(np.diag(s) > 0.99), np.diag(s)
        assert res.diagnostics["permutation"] == [0, 1, 2, 3]
        sigmas.append(time_derivative_couplings(s, dt))
    sig = np.array(sigmas)
    second_diff = np.max(np.abs(sig[2:] - 2 * sig[1:-1] + sig[:-2]))
    assert np.max(np.abs(sig)) > 1e-4
    assert second_diff < 0.05 * np.max(np.abs(sig)), (second_diff, np.max(np.abs(sig)))


def test_time_derivative_couplings_converge_second_order(cis_backend):
    # HST midpoint formula σ(t_m) ≈ (S − Sᵀ)/(2Δt), Hammes-Schiffer & Tully, J. Chem. Phys. 101,
    # 4657 (1994): error O(Δt²) at fixed t_m, so successive differences shrink ~4× per halving.
    t_mid = -16.0        # geometries t_mid ± 8 stay clear of the S2/S3 crossing near t ≈ +9
    sig = {}
    for dt in (16.0, 8.0, 4.0):
        s = _step_overlap(cis_backend, WATER + VELOCITY * (t_mid - dt / 2),
                          WATER + VELOCITY * (t_mid + dt / 2))
        sig[dt] = time_derivative_couplings(s, dt)
    d1 = np.max(np.abs(sig[16.0] - sig[8.0]))
    d2 = np.max(np.abs(sig[8.0] - sig[4.0]))
    assert 3.3 < d1 / d2 < 4.7, (d1, d2)
    np.testing.assert_allclose(sig[4.0], -sig[4.0].T, atol=1e-14)
    # Independent estimator at the same instant: centred difference with the bra fixed at t_m,
    # σ_kl ≈ [<ψ_k(t_m)|ψ_l(t_m+δ)> − <ψ_k(t_m)|ψ_l(t_m−δ)>]/(2δ), also O(δ²); both estimators
    # must agree to the O(Δt²) size of their differences.
    delta = 2.0
    mid = cis_backend.compute(WATER + VELOCITY * t_mid, need_gradients=False)
    plus = cis_backend.compute(WATER + VELOCITY * (t_mid + delta), guess=mid.guess,
                               need_gradients=False).overlap_prev
    minus = cis_backend.compute(WATER + VELOCITY * (t_mid - delta), guess=mid.guess,
                                need_gradients=False).overlap_prev
    centred = (plus - minus) / (2 * delta)
    off = ~np.eye(4, dtype=bool)
    assert np.max(np.abs(centred[off])) > 1e-4
    np.testing.assert_allclose(centred[off], sig[4.0][off], atol=2 * d2)


def test_trivial_crossing_is_reported_as_swap(cis_backend):
    # Along +V, S2 and S3 of distorted water cross almost without interaction between t = 8 and
    # t = 12 (gap 6e-4 Eh at t = 8, measured): matching finds the swap, the aligned overlap is a
    # near-permutation and energy order is kept.
    before = cis_backend.compute(WATER + VELOCITY * 8.0, need_gradients=False)
    after = cis_backend.compute(WATER + VELOCITY * 12.0, guess=before.guess, need_gradients=False)
    assert after.diagnostics["swap"] is True
    assert after.diagnostics["permutation"] == [0, 1, 3, 2]
    s = after.overlap_prev
    assert s[2, 3] > 0.9 and s[3, 2] > 0.9 and abs(s[2, 2]) < 0.1 and abs(s[3, 3]) < 0.1
    assert np.all(np.diff(after.energies) > 0)


def test_sign_tracking_survives_flipped_amplitude(cis_backend, cis_reference):
    # Flip state 2 in the carried guess (as if its phase had changed): the new step must follow
    # it — positive aligned diagonal, the new state 2 (and its dipoles) flipped with it.
    r1 = WATER + VELOCITY * 4.0
    plain = cis_backend.compute(r1, guess=cis_reference.guess, need_gradients=False)
    g = pickle.loads(pickle.dumps(cis_reference.guess))
    g.x_amplitudes[1] *= -1.0
    flipped = cis_backend.compute(r1, guess=g, need_gradients=False)
    assert np.all(np.diag(flipped.overlap_prev) > 0.99)
    assert flipped.diagnostics["signs"][2] == -plain.diagnostics["signs"][2]
    np.testing.assert_allclose(flipped.guess.x_amplitudes[1], -plain.guess.x_amplitudes[1], atol=1e-12)
    np.testing.assert_allclose(flipped.guess.x_amplitudes[[0, 2]], plain.guess.x_amplitudes[[0, 2]],
                               atol=1e-12)
    sign = np.array([1.0, 1.0, -1.0, 1.0])
    np.testing.assert_allclose(flipped.transition_dipoles,
                               plain.transition_dipoles * np.outer(sign, sign)[:, :, None], atol=1e-10)
    # σ from the flipped run differs from the plain one only by the bra flip of state 2
    np.testing.assert_allclose(flipped.overlap_prev, plain.overlap_prev * np.outer(sign, sign), atol=1e-10)


def test_full_tddft_x_only_overlaps_near_unitary():
    # X-only convention for RPA states: at zero displacement the overlap deviates from 1 only
    # through the de-excitation weight (O(Y²); measured 1e-9 for TDHF water/STO-3G, bound 1e-6);
    # along a short step it stays unitary to O(Δ²) (measured 1.8e-3, bound 5e-3).
    backend = TDDFTBackend(["O", "H", "H"], basis="sto-3g", xc=None, method="tddft", nstates=3)
    res = backend.compute(WATER, need_gradients=False)
    same = backend.compute(WATER, guess=res.guess, need_gradients=False).overlap_prev
    assert np.max(np.abs(same - np.eye(3))) < 1e-6
    step = backend.compute(WATER + VELOCITY * 2.0, guess=res.guess, need_gradients=False).overlap_prev
    assert np.max(np.abs(step.T @ step - np.eye(3))) < 5e-3


# ---------------------------------------------------------------------------------------------
# Contract: purity, picklable guess, warm start, errors
# ---------------------------------------------------------------------------------------------

def test_result_contract_and_purity(cis_backend, cis_reference):
    res = cis_reference
    assert res.nstates == 4 and res.couplings is None and res.overlap_prev is None
    assert res.gradients.shape == (4, 3, 3)
    assert isinstance(res.guess, TDDFTGuess)
    g = pickle.loads(pickle.dumps(res.guess))
    r1 = WATER + VELOCITY * 3.0
    a = cis_backend.compute(r1, guess=g)
    b = cis_backend.compute(r1, guess=res.guess)
    np.testing.assert_array_equal(a.energies, b.energies)
    np.testing.assert_array_equal(a.overlap_prev, b.overlap_prev)
    cold = cis_backend.compute(r1)
    np.testing.assert_allclose(a.energies, cold.energies, atol=1e-9)     # warm start = cold start
    np.testing.assert_allclose(a.gradients, cold.gradients, atol=1e-6)
    assert a.diagnostics["attempts"][0]["what"].startswith("warm start")
    np.testing.assert_allclose(np.sum(a.guess.x_amplitudes ** 2, axis=(1, 2)), 0.5, atol=1e-12)


def test_bad_input_is_refused():
    with pytest.raises(ValueError, match="spin"):
        TDDFTBackend(["O", "H", "H"], spin=2)
    with pytest.raises(ValueError, match="xc"):
        TDDFTBackend(["O", "H", "H"], xc="not-a-functional")
    with pytest.raises(ValueError, match="method"):
        TDDFTBackend(["O", "H", "H"], method="cis2")
    with pytest.raises(ValueError, match="charge"):
        TDDFTBackend(["O", "H", "H"], charge=1)
    with pytest.raises(ValueError, match="nstates"):
        TDDFTBackend(["H", "H"], basis="sto-3g", nstates=3)
    backend = TDDFTBackend(["H", "H"], basis="sto-3g", nstates=2)
    with pytest.raises(ValueError, match="positions_bohr"):
        backend.compute(np.zeros((3, 3)))
    with pytest.raises(ValueError, match="guess"):
        backend.compute(np.array([[0, 0, 0], [0, 0, 1.4]]), guess={"mo": 1})
    with pytest.raises(ValueError, match="time"):
        time_derivative_couplings(np.eye(2), 0.0)


def test_non_convergence_raises_with_attempts():
    r = np.array([[0, 0, 0], [0, 0, 1.4]], dtype=float)
    with pytest.raises(BackendError) as err:
        TDDFTBackend(["H", "H"], basis="6-31g", nstates=2, scf_max_cycle=1).compute(r)
    assert len(err.value.attempts) == 2 and "SCF" in err.value.reason
    with pytest.raises(BackendError) as err:
        TDDFTBackend(["O", "H", "H"], basis="6-31g", nstates=3, td_conv_tol=1e-12,
                     td_max_cycle=1).compute(WATER, need_gradients=False)
    assert "Davidson" in err.value.reason and len(err.value.attempts) == 3
    with pytest.raises(BackendError) as err:
        TDDFTBackend(["O", "H", "H"], basis="sto-3g", nstates=2,
                     cphf_residual_tol=1e-30).compute(WATER)  # below round-off: no solver can reach it
    assert "gradient" in err.value.reason
