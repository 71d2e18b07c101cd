"""SA-CASSCF backend (PySCF): gradients, NAC vectors, overlaps, warm start, fallback ladder.

References: PySCF 2.14 is the reference electronic-structure library; analytic derivatives are
checked against central finite differences of the backend's own energies and state overlaps
(docs/theory.md#local-diabatization, docs/theory.md#pyscf-pitfalls).  Geometries are distorted, without symmetry, in Bohr.
"""

from __future__ import annotations

import os
import pickle

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np
import pytest

pytest.importorskip("pyscf")

from mapdyn.backends.contract import BackendError  # noqa: E402
from mapdyn.backends.pyscf.casscf import (  # noqa: E402
    ORTHONORMALITY_TOL,
    CASSCFBackend,
    CASSCFGuess,
    ci_overlap_matrix,
    lowdin_orthonormalize,
    orthonormality_error,
)

# Distorted geometries, Bohr.
LIH_POS = np.array([[0.0, 0.0, 0.0], [1.9, 1.3, 1.1]])
H2O_POS = np.array([[0.0, 0.0, 0.19], [0.19, 1.51, -0.94], [-0.09, -1.42, -0.85]])

#: finite-difference step, Bohr (docs/theory.md#pyscf-pitfalls: h >= 2e-3, smaller h is limited by
#: SA-CASSCF per-state energy noise ~1e-7 Eh).
FD_STEP = 3e-3


def lih_backend(**kw) -> CASSCFBackend:
    return CASSCFBackend(["Li", "H"], basis="6-31g", ncas=2, nelecas=2, nstates=2, **kw)


def h2o_backend(**kw) -> CASSCFBackend:
    return CASSCFBackend(["O", "H", "H"], basis="sto-3g", ncas=2, nelecas=2, nstates=3, **kw)


def _fd_coordinates(ref, n: int = 3) -> list[tuple[int, int]]:
    """The n Cartesian coordinates with the largest NAC components over all pairs."""
    d = np.abs(ref.couplings).max(axis=(0, 1))
    flat = np.argsort(d.ravel())[::-1][:n]
    return [tuple(int(x) for x in np.unravel_index(i, d.shape)) for i in flat]


def _finite_differences(backend, pos, ref, coords, h=FD_STEP):
    """Central differences of energies and aligned overlaps <k(R)|l(R±h)> along each coordinate."""
    out = []
    for atom, xyz in coords:
        step = np.zeros_like(pos)
        step[atom, xyz] = h
        plus = backend.compute(pos + step, guess=ref.guess, need_gradients=False)
        minus = backend.compute(pos - step, guess=ref.guess, need_gradients=False)
        de = (plus.energies - minus.energies) / (2 * h)
        ds = (plus.overlap_prev - minus.overlap_prev) / (2 * h)
        out.append((atom, xyz, de, ds))
    return out


@pytest.fixture(scope="module", params=["LiH", "H2O"])
def fd_case(request):
    if request.param == "LiH":
        backend, pos = lih_backend(), LIH_POS
    else:
        backend, pos = h2o_backend(), H2O_POS
    ref = backend.compute(pos)
    coords = _fd_coordinates(ref)
    # one extra coordinate chosen for a large gradient component
    g = np.abs(ref.gradients).max(axis=0)
    extra = tuple(int(x) for x in np.unravel_index(np.argmax(g), g.shape))
    if extra not in coords:
        coords.append(extra)
    return request.param, backend, pos, ref, _finite_differences(backend, pos, ref, coords)


def test_gradients_match_finite_differences(fd_case):
    # Source: central finite differences of the backend's own SA-CASSCF energies.
    # Tolerance 1e-4 Eh/Bohr: FD truncation ~ E''' h^2/6 ~ 1e-6 plus per-state noise 1e-7/(2h) ~ 2e-5.
    name, _, _, ref, fd = fd_case
    worst = 0.0
    for atom, xyz, de, _ in fd:
        err = np.max(np.abs(ref.gradients[:, atom, xyz] - de))
        worst = max(worst, err)
    assert worst <= 1e-4, f"{name}: max |grad - FD| = {worst:.2e} Eh/Bohr"


def test_nac_matches_overlap_finite_differences_both_orders(fd_case):
    # Source: d_kl = <k|d l/dR> ~ [<k(R)|l(R+h)> - <k(R)|l(R-h)>]/2h after phase alignment
    # (docs/theory.md#local-diabatization).  This asserts PySCF's sign convention kernel(state=(a, b)) -> <a|grad b>.
    # Tolerance 2 % on components larger than 10 % of the largest (FD truncation O(h^2)).
    name, _, _, ref, fd = fd_case
    f = ref.nstates
    dmax = np.abs(ref.couplings).max()
    checked = 0
    for atom, xyz, _, ds in fd:
        for k in range(f):
            for l in range(f):
                if k == l:
                    continue
                d = ref.couplings[k, l, atom, xyz]
                if abs(d) < 0.1 * dmax:
                    continue
                assert np.sign(ds[k, l]) == np.sign(d), f"{name}: sign of d[{k},{l}] wrong"
                assert abs(ds[k, l] - d) <= 0.02 * abs(d), f"{name}: d[{k},{l}] {d:.5f} vs FD {ds[k, l]:.5f}"
                checked += 1
    assert checked >= 4
    # antisymmetry of the returned vectors (exact by construction) and of the FD matrix
    assert np.allclose(ref.couplings, -np.swapaxes(ref.couplings, 0, 1))


def test_etf_form_conserves_momentum_full_form_does_not():
    # Electron-translation factors make d_kl translation invariant: sum over atoms of d_kl = 0
    # (Fatehi & Subotnik, J. Phys. Chem. Lett. 3, 2039 (2012), from memory); the full form with the
    # CSF term is not (it equals the derivative of the overlaps, which change under translation).
    full = h2o_backend().compute(H2O_POS)
    etf = h2o_backend(nac_form="etf").compute(H2O_POS)
    assert np.allclose(full.energies, etf.energies, atol=1e-9)
    total_etf = np.abs(etf.couplings.sum(axis=2)).max()
    total_full = np.abs(full.couplings.sum(axis=2)).max()
    assert total_etf < 1e-6 * max(1.0, np.abs(etf.couplings).max()) + 1e-7
    assert total_full > 1e-3


def test_warm_and_cold_start_reach_same_energies():
    backend = h2o_backend()
    ref = backend.compute(H2O_POS, need_gradients=False)
    rng = np.random.default_rng(7)
    new = H2O_POS + rng.normal(scale=0.05, size=H2O_POS.shape)
    warm = backend.compute(new, guess=ref.guess, need_gradients=False)
    cold = backend.compute(new, need_gradients=False)
    assert warm.diagnostics["warm_start"] and not cold.diagnostics["warm_start"]
    assert np.max(np.abs(warm.energies - cold.energies)) < 1e-6
    # the warm start needs fewer macro-iterations than the cold one
    assert warm.diagnostics["macro_iterations"] <= cold.diagnostics["macro_iterations"]
    assert warm.diagnostics["active_overlap_min_singular"] > 0.99


def test_raw_guess_orbitals_are_caught():
    backend = h2o_backend()
    ref = backend.compute(H2O_POS, need_gradients=False)
    new = H2O_POS + np.array([[0.0, 0.0, 0.0], [0.0, 0.15, -0.1], [0.05, 0.0, 0.1]])
    mol = backend._build_mol(new)
    s = mol.intor_symmetric("int1e_ovlp")
    raw = ref.guess.mo_coeff
    assert orthonormality_error(raw, s) > 1e-4  # previous orbitals are not orthonormal here
    assert orthonormality_error(lowdin_orthonormalize(raw, s), s) < ORTHONORMALITY_TOL
    mf = backend._run_scf(mol)
    with pytest.raises(BackendError, match="not orthonormal"):
        backend._solve_casscf(backend._make_mc(mf), raw)
    # a guess with linearly dependent orbitals cannot be orthonormalised: the warm attempt is
    # refused and recorded, the ladder falls back to a cold start with the correct energies
    bad_mo = ref.guess.mo_coeff.copy()
    bad_mo[:, 1] = bad_mo[:, 0]
    bad = CASSCFGuess(ref.guess.positions_bohr, bad_mo, ref.guess.ci, ref.guess.energies, ref.guess.signature)
    res = backend.compute(new, guess=bad, need_gradients=False)
    cold = backend.compute(new, need_gradients=False)
    assert res.diagnostics["attempts"][0]["outcome"].startswith("failed")
    assert "linearly dependent" in res.diagnostics["attempts"][0]["outcome"]
    assert np.max(np.abs(res.energies - cold.energies)) < 1e-6


def test_forced_nonconvergence_raises_with_attempts():
    backend = h2o_backend(max_cycle_macro=1)
    with pytest.raises(BackendError) as info:
        backend.compute(H2O_POS, need_gradients=False)
    attempts = info.value.attempts
    assert len(attempts) >= 3
    assert all(a["outcome"].startswith("failed") for a in attempts)
    assert "cold start" in attempts[0]["what"] and "damped" in attempts[-1]["what"]
    assert "not converged" in str(info.value)


def test_three_states_are_singlets_and_purity_matters():
    res = h2o_backend().compute(H2O_POS, need_gradients=False)
    assert res.nstates == 3
    assert np.all(np.abs(res.spin_squared) < 1e-6)
    assert np.all(np.diff(res.energies) > 0)
    # the spin-adapted singlet solver gives the same states
    res0 = h2o_backend(spin_purity="spin0").compute(H2O_POS, need_gradients=False)
    assert np.max(np.abs(res0.energies - res.energies)) < 1e-7
    # without purity enforcement the Ms=0 triplet is among the three lowest CAS(2,2) roots; the
    # per-step <S^2> check refuses it
    with pytest.raises(BackendError, match="spin contamination"):
        h2o_backend(spin_purity="none").compute(H2O_POS, need_gradients=False)


def test_sign_alignment_is_applied_to_couplings_and_carried_in_guess():
    backend = lih_backend()
    ref = backend.compute(LIH_POS)
    new = LIH_POS + np.array([[0.0, 0.0, 0.0], [0.01, -0.02, 0.015]])
    step = backend.compute(new, guess=ref.guess)
    assert np.all(np.diag(step.overlap_prev) > 0.9)
    # couplings vary smoothly once phases are aligned
    assert np.allclose(step.couplings, ref.couplings, rtol=0, atol=0.05 * np.abs(ref.couplings).max())
    # flip the sign of state 1 in the carried guess: the new state 1 follows, couplings flip
    flipped_ci = ref.guess.ci.copy()
    flipped_ci[1] *= -1
    g2 = CASSCFGuess(ref.guess.positions_bohr, ref.guess.mo_coeff, flipped_ci, ref.guess.energies,
                     ref.guess.signature)
    step2 = backend.compute(new, guess=g2)
    assert np.all(np.diag(step2.overlap_prev) > 0.9)
    assert np.allclose(step2.couplings[0, 1], -step.couplings[0, 1], atol=1e-7)
    assert np.allclose(step2.transition_dipoles[0, 1], -step.transition_dipoles[0, 1], atol=1e-7)
    assert np.allclose(step2.guess.ci[1], -step.guess.ci[1], atol=1e-8)


def test_ci_overlap_is_identity_at_same_geometry_and_guess_pickles():
    backend = lih_backend()
    res = backend.compute(LIH_POS, need_gradients=False)
    mol = backend._build_mol(LIH_POS)
    s = mol.intor_symmetric("int1e_ovlp")
    g = pickle.loads(pickle.dumps(res.guess))
    ov = ci_overlap_matrix(g.mo_coeff, g.ci, g.mo_coeff, g.ci, s, backend.ncore, backend.ncas, backend.nelecas)
    assert np.allclose(ov, np.eye(2), atol=1e-10)
    ci_before = g.ci.copy()
    again = backend.compute(LIH_POS, guess=g, need_gradients=False)
    repeat = backend.compute(LIH_POS, guess=g, need_gradients=False)  # pure function of its arguments
    assert np.array_equal(g.ci, ci_before)
    assert np.allclose(repeat.energies, again.energies, atol=1e-12)
    assert np.allclose(repeat.overlap_prev, again.overlap_prev, atol=1e-12)
    assert np.allclose(again.overlap_prev, np.eye(2), atol=1e-6)
    assert again.diagnostics["permutation"] == [0, 1]


def test_state_dipoles_match_pyscf_density_dipole():
    # Source: PySCF scf.hf.dip_moment on the state's AO density (reference library), Debye -> e·Bohr.
    from pyscf import mcscf, scf
    from pyscf.data import nist

    backend = h2o_backend()
    res = backend.compute(H2O_POS, need_gradients=False)
    mol = backend._build_mol(H2O_POS)
    mf = scf.RHF(mol)
    mc = mcscf.CASSCF(mf, 2, 2)
    for k in range(3):
        dm = mc.make_rdm1(mo_coeff=res.guess.mo_coeff, ci=res.guess.ci[k])
        mu_debye = scf.hf.dip_moment(mol, dm, unit="Debye", verbose=0)
        mu = mu_debye / nist.AU2DEBYE
        assert np.allclose(res.transition_dipoles[k, k], mu, atol=1e-8)  # neutral: origin-free
    mu = res.transition_dipoles
    assert np.allclose(mu, np.swapaxes(mu, 0, 1))


@pytest.mark.filterwarnings("ignore:Basis may be available")
def test_bad_inputs_raise_value_error():
    with pytest.raises(ValueError, match="auxbasis"):
        lih_backend(density_fitting=True).compute(LIH_POS, need_gradients=False)  # no Li cc-pvdz-jkfit
    with pytest.raises(ValueError, match="nac_form"):
        lih_backend(nac_form="other")
    with pytest.raises(ValueError, match="spin_purity"):
        lih_backend(spin_purity="maybe")
    with pytest.raises(ValueError, match="nelecas"):
        CASSCFBackend(["Li", "H"], basis="6-31g", ncas=2, nelecas=3, nstates=2)
    backend = lih_backend()
    with pytest.raises(ValueError, match="positions_bohr"):
        backend.compute(np.zeros((3, 3)))
    with pytest.raises(ValueError, match="guess"):
        backend.compute(LIH_POS, guess={"mo": 1})
    other = h2o_backend().compute(H2O_POS, need_gradients=False)
    with pytest.raises(ValueError, match="guess"):
        backend.compute(LIH_POS, guess=other.guess)


CH2NH2_POS = np.array([[0.0, 0.0, 0.0], [0.05, 0.1, 1.30], [0.95, 0.1, -0.55], [-0.9, -0.2, -0.6],
                       [0.85, 0.2, 1.85], [-0.8, 0.05, 1.9]]) / 0.52917721092  # Angstrom -> Bohr


@pytest.mark.slow
def test_cation_gradients_and_nacs_match_finite_differences():
    # CH2NH2+ SA2-CAS(2,2)/6-31G, distorted; same sources and tolerances as the small cases above.
    backend = CASSCFBackend(["C", "N", "H", "H", "H", "H"], basis="6-31g", ncas=2, nelecas=2, nstates=2,
                            charge=1)
    ref = backend.compute(CH2NH2_POS)
    fd = _finite_differences(backend, CH2NH2_POS, ref, _fd_coordinates(ref, n=4))
    for atom, xyz, de, ds in fd:
        assert np.max(np.abs(ref.gradients[:, atom, xyz] - de)) <= 1e-4
        d = ref.couplings[0, 1, atom, xyz]
        assert abs(ds[0, 1] - d) <= 0.02 * abs(d) and abs(ds[1, 0] + d) <= 0.02 * abs(d)


@pytest.mark.parametrize("spin_purity,nac_form", [("shift", "full"), ("spin0", "etf")])
def test_one_pass_equals_plain_pyscf_calls(spin_purity, nac_form):
    # Source: PySCF's own per-state calls (nuc_grad_method().kernel(state=k),
    # nac_method().kernel(state=(a, b))) on the same converged SA-CASSCF; the one-pass path only
    # reorders when the derivative integrals are evaluated, so agreement is to round-off (1e-8).
    from mapdyn.backends.pyscf.casscf_one_pass import one_pass_gradients_and_couplings

    backend = h2o_backend(spin_purity=spin_purity, nac_form=nac_form, gradient_method="plain")
    mol = backend._build_mol(H2O_POS)
    mf = backend._run_scf(mol)
    mc = backend._make_mc(mf)
    backend._solve_casscf(mc, mf.mo_coeff)
    g_plain, d_plain, _ = backend._gradients_and_couplings(mc, {})
    g_one, d_one, info = one_pass_gradients_and_couplings(mc, use_etfs=nac_form == "etf")
    assert info["gradients_converged"] and info["couplings_converged"]
    assert np.max(np.abs(g_one - g_plain)) < 1e-8
    assert np.max(np.abs(d_one - d_plain)) < 1e-8
    # and through the backend: the default path is the one-pass one
    assert CASSCFBackend(["O", "H", "H"], nstates=3).gradient_method == "one_pass"
    res = h2o_backend(spin_purity=spin_purity, nac_form=nac_form).compute(H2O_POS)
    assert "eri_pass" in res.diagnostics["timings"]
    assert np.max(np.abs(res.gradients - g_plain)) < 1e-6  # independent CASSCF run: 1e-6 convergence
    assert np.max(np.abs(res.couplings - d_plain)) < 1e-5


def test_density_fitted_gradients_match_finite_differences():
    # Source: central differences of the backend's own DF energies; tolerance as above.
    # The NAC vectors come from PySCF's non-DF NAC code and are only checked for shape here.
    backend = lih_backend(density_fitting=True, auxbasis="def2-universal-jkfit")
    ref = backend.compute(LIH_POS)
    assert ref.couplings.shape == (2, 2, 2, 3)
    exact = lih_backend().compute(LIH_POS, need_gradients=False)
    assert np.max(np.abs(ref.energies - exact.energies)) < 1e-3  # DF error, common practice ~1e-4 Eh/atom
    for atom, xyz in [(1, 0), (1, 2)]:
        step = np.zeros_like(LIH_POS)
        step[atom, xyz] = FD_STEP
        ep = backend.compute(LIH_POS + step, guess=ref.guess, need_gradients=False).energies
        em = backend.compute(LIH_POS - step, guess=ref.guess, need_gradients=False).energies
        assert np.max(np.abs((ep - em) / (2 * FD_STEP) - ref.gradients[:, atom, xyz])) < 1e-4


def test_active_space_change_is_detected_and_cas_orbitals_option():
    from mapdyn.backends.pyscf.casscf_states import active_overlap_min_singular

    backend = h2o_backend()
    res = backend.compute(H2O_POS, need_gradients=False)
    mol = backend._build_mol(H2O_POS)
    s = mol.intor_symmetric("int1e_ovlp")
    mo = res.guess.mo_coeff
    nc, na = backend.ncore, backend.ncas
    assert active_overlap_min_singular(mo, mo, s, nc, na) == pytest.approx(1.0, abs=1e-10)
    swapped = mo.copy()
    swapped[:, [nc + 1, nc + 2]] = swapped[:, [nc + 2, nc + 1]]  # an active orbital leaves, a virtual enters
    assert active_overlap_min_singular(mo, swapped, s, nc, na) < 1e-8
    # explicit active orbitals equal to the default choice (0-based HOMO, LUMO) give the same states
    explicit = h2o_backend(cas_orbitals=[nc, nc + 1]).compute(H2O_POS, need_gradients=False)
    assert np.max(np.abs(explicit.energies - res.energies)) < 1e-8
    with pytest.raises(ValueError, match="cas_orbitals"):
        h2o_backend(cas_orbitals=[1, 2, 3])
    # the stability search swaps orbitals only for the default choice; chosen orbitals are kept
    assert any("swapped" in a["what"] for a in res.diagnostics["attempts"])
    assert not any("swapped" in a["what"] for a in explicit.diagnostics["attempts"])


def test_doublet_cation_states_gradients_and_nacs():
    # H2O+ SA2-CAS(3,3)/STO-3G (spin 2S = 1): ROHF starting orbitals on an RHF-type host (PySCF's
    # NAC code needs it).  Sources and tolerances as in the finite-difference tests above; the
    # target <S^2> = S(S+1) = 0.75 for a doublet (textbook).
    backend = CASSCFBackend(["O", "H", "H"], basis="sto-3g", ncas=3, nelecas=3, nstates=2, charge=1, spin=1)
    ref = backend.compute(H2O_POS)
    assert np.allclose(ref.spin_squared, 0.75, atol=1e-6)
    fd = _finite_differences(backend, H2O_POS, ref, [(1, 1), (2, 2)])
    for atom, xyz, de, ds in fd:
        assert np.max(np.abs(ref.gradients[:, atom, xyz] - de)) <= 1e-4
        d = ref.couplings[0, 1, atom, xyz]
        assert abs(ds[0, 1] - d) <= 0.02 * abs(d) and abs(ds[1, 0] + d) <= 0.02 * abs(d)


ETHYLENE_POS = np.array([[0.0, 0.0, 0.6695], [0.0, 0.0, -0.6695], [0.0, 0.9289, 1.2321], [0.0, -0.9289, 1.2321],
                         [0.0, 0.9289, -1.2321], [0.0, -0.9289, -1.2321]]) / 0.52917721092  # Angstrom -> Bohr


def _ethylene_path(backend, n_steps=3, step=0.01):
    """Cold start at planar ethylene, then warm steps of ``step`` Bohr along a fixed random direction."""
    rng = np.random.default_rng(1)
    direction = rng.normal(size=ETHYLENE_POS.shape)
    direction *= step / np.linalg.norm(direction)
    results = [backend.compute(ETHYLENE_POS, need_gradients=False)]
    for i in range(1, n_steps + 1):
        results.append(backend.compute(ETHYLENE_POS + i * direction, guess=results[-1].guess, need_gradients=False))
    return results


@pytest.mark.filterwarnings("ignore:active space changed")
def test_cold_start_saddle_is_left_and_path_stays_on_one_solution():
    # Ethylene SA2-CAS(2,2)/STO-3G at the planar geometry ETHYLENE_POS.  From RHF
    # orbitals the SA-CASSCF converges to the pi/pi* stationary point, a saddle of the state-averaged
    # energy: 0.01 Bohr off the planar geometry the warm start slides to the sigma/pi* solution,
    # 8.9 mEh lower in SA energy (measured), S1 drops by ~60 mEh and the state overlap is ~0.01.
    old = CASSCFBackend(["C", "C", "H", "H", "H", "H"], ncas=2, nelecas=2, nstates=2,
                        cold_start_alternatives=0, stability_kicks=0, overlap_retry=0.0)
    old_path = _ethylene_path(old, n_steps=1)
    assert old_path[1].diagnostics["min_overlap"] < 0.5
    assert abs(old_path[1].energies[1] - old_path[0].energies[1]) > 0.03
    # With the stability search the cold start lands on the lower solution and the warm steps
    # follow it.  Thresholds: min overlap 0.9 (a smooth step keeps overlaps > 0.99, measured); energy
    # change per step < 5 mEh (|dE| <= |grad E| * 0.004 Bohr with |grad E| ~ 0.1 Eh/Bohr gives
    # < 1 mEh; the jump is 60 mEh).  The path stops at 0.012 Bohr: near 0.02 Bohr along this
    # direction the sigma(CC)/pi* solution ends and the warm start passes to the sigma(CH)/pi* one
    # (2.6 mEh, overlap 0.33, measured), a crossing of CASSCF solutions that no start can avoid.
    new = CASSCFBackend(["C", "C", "H", "H", "H", "H"], ncas=2, nelecas=2, nstates=2)
    path = _ethylene_path(new, n_steps=3, step=0.004)
    assert np.mean(path[0].energies) < np.mean(old_path[0].energies) - 5e-3
    for prev, cur in zip(path[:-1], path[1:]):
        assert cur.diagnostics["min_overlap"] > 0.9
        assert cur.diagnostics["active_overlap_min_singular"] > 0.9
        assert np.max(np.abs(cur.energies - prev.energies)) < 5e-3
        assert "overlap_retry" not in cur.diagnostics
    assert any(a["what"].startswith("stability search") for a in path[0].diagnostics["attempts"])
    # the search is deterministic: a second cold start gives the same solution
    again = new.compute(ETHYLENE_POS, need_gradients=False)
    assert np.allclose(again.energies, path[0].energies, atol=1e-9)


@pytest.mark.filterwarnings("ignore:active space changed")
def test_overlap_retry_is_recorded_and_keeps_lowest_sa_energy():
    # Without the cold-start search the first step jumps off the saddle (min overlap ~0.01); the
    # retry (damped warm start, cold start with the search) cannot bring back a saddle, so it keeps
    # the lowest SA energy among equally poor overlaps and records every candidate.
    backend = CASSCFBackend(["C", "C", "H", "H", "H", "H"], ncas=2, nelecas=2, nstates=2,
                            cold_start_alternatives=0, stability_kicks=0)
    path = _ethylene_path(backend, n_steps=1)
    retry = path[1].diagnostics["overlap_retry"]
    assert len(retry["candidates"]) == 3
    kept = [c for c in retry["candidates"] if c["what"] == retry["kept"]][0]
    assert kept["sa_energy"] == pytest.approx(np.mean(path[1].energies), abs=1e-9)
    assert kept["sa_energy"] <= min(c["sa_energy"] for c in retry["candidates"]
                                    if c["min_overlap"] >= kept["min_overlap"] - 0.1) + 1e-12
