"""The SA-CASSCF mapping force in one Lagrange solve (two-phase backend contract).

F = −Σ_kl ρ̄_kl ⟨ψ_k|∇H|ψ_l⟩ with ⟨ψ_k|∇H|ψ_k⟩ = ∇E_k and ⟨ψ_k|∇H|ψ_l⟩ = (E_l − E_k) d_kl.
Checked against (1) the same sum built from the individual state gradients and NAC vectors
(PySCF's Lagrangian gradient/NAC code through the one-pass path, itself tested against the plain
PySCF calls in test_backend_casscf.py), (2) central finite differences of energies and state
overlaps, (3) trajectories driven through the old path (gradients and couplings contracted by the
driver).  Distorted geometries without symmetry, Bohr.
"""

from __future__ import annotations

import dataclasses
import os

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np
import pytest

pytest.importorskip("pyscf")

import ase  # noqa: E402
from ase import units  # noqa: E402

from mapdyn.backends.contract import contract_force, offers_force  # noqa: E402
from mapdyn.backends.pyscf.casscf import CASSCFBackend  # noqa: E402
from mapdyn.core.options import MethodOptions  # noqa: E402
from mapdyn.core.sampling import trajectory_generator  # noqa: E402
from mapdyn.driver.dynamics import MappingDynamics  # noqa: E402

H2O_POS = np.array([[0.0, 0.0, 0.19], [0.19, 1.51, -0.94], [-0.09, -1.42, -0.85]])
#: Lagrange solver tolerance of these tests: tight, so that the one-solve force and the sum of
#: separately solved pieces differ by far less than the 1e-8 Eh/Bohr checked.
RTOL = 1e-9


CH2NH2_POS = np.array([[0.0, 0.0, 0.0], [0.09, 0.19, 2.46], [1.80, 0.19, -1.04], [-1.70, -0.38, -1.13],
                       [1.61, 0.38, 3.50], [-1.51, 0.09, 3.59]])
#: (symbols, geometry in Bohr, charge, basis, ncas, nelecas).  CAS(4,3): every orbital rotation
#: has a non-zero Hessian.  (With CAS(2,3) the Lagrange operator of LiH and H2O has near-null
#: orbital directions; the multipliers are then not unique and the force depends on the solver
#: path at the 1e-5 level, in the plain per-state route as much as in the weighted one.)
CASES = {"H2O": (["O", "H", "H"], H2O_POS, 0, "sto-3g", 3, 4),
         "CH2NH2+": (["C", "N", "H", "H", "H", "H"], CH2NH2_POS, 1, "sto-3g", 3, 4)}


def backend(name: str, nstates: int, **kw) -> CASSCFBackend:
    symbols, _, charge, basis, ncas, nelecas = CASES[name]
    return CASSCFBackend(symbols, basis=basis, ncas=ncas, nelecas=nelecas, nstates=nstates, charge=charge,
                         lagrange_rtol=RTOL, cold_start_alternatives=0, stability_kicks=0, **kw)


def random_weights(nstates: int, seed: int, m: int = 2) -> np.ndarray:
    w = np.random.default_rng(seed).normal(size=(m, nstates, nstates))
    return w + w.transpose(0, 2, 1)


@pytest.mark.parametrize("name, nstates", [("H2O", 2), ("H2O", 3), ("H2O", 4), ("CH2NH2+", 2),
                                           pytest.param("CH2NH2+", 3, marks=pytest.mark.slow),
                                           pytest.param("CH2NH2+", 4, marks=pytest.mark.slow)])
def test_one_solve_force_equals_weighted_individual_pieces(name, nstates):
    """Σ ρ̄_kl of the individual gradients and (E_l − E_k) d_kl, random symmetric ρ̄, to 1e-8 Eh/Bohr.

    The geometry is reached by a warm-started step from a guess with one CI vector negated, so
    the sign alignment flips states and the weights are in the phases of the returned couplings.  Forces are O(1) Eh/Bohr; the two routes
    differ only by Lagrange-solver residuals (relative tolerance 1e-9) and round-off.
    """
    b = backend(name, nstates)
    pos = CASES[name][1]
    assert offers_force(b)
    first = b.compute(pos, need_gradients=False)
    flipped = np.array(first.guess.ci, copy=True)
    flipped[1] *= -1.0
    guess = dataclasses.replace(first.guess, ci=flipped)
    new = pos + np.random.default_rng(nstates).normal(scale=0.01, size=pos.shape)
    ref = b.compute(new, guess=guess, need_gradients=True)
    assert -1.0 in ref.diagnostics["signs"]
    w = random_weights(nstates, seed=7 * nstates)
    w[1] *= 0.03  # small trace: the core term evaluated apart (|Σ ρ̄_kk| < 0.1)
    expected = contract_force(ref.energies, ref.gradients, ref.couplings, w)
    got = b.force(ref, w)
    assert got.shape == (2, len(pos), 3)
    assert np.max(np.abs(got - expected)) < 1e-8, np.max(np.abs(got - expected))
    assert np.max(np.abs(expected)) > 0.05  # the check is not trivially small
    # a single matrix gives (N, 3); the ETF form drops the CSF term in both routes
    np.testing.assert_allclose(b.force(ref, w[0]), got[0], rtol=0, atol=1e-10)


def test_force_from_a_rebuilt_wavefunction_and_fallback_path():
    """Phase two after pickling (no kept solver: rebuilt from the guess) and with
    gradient_method='plain' (contracted gradients and couplings) equals the one-pass force."""
    import copy
    import pickle

    b = backend("H2O", 3)
    res = b.compute(H2O_POS, need_gradients=False)
    w = random_weights(3, seed=11)
    got = b.force(res, w)
    again = pickle.loads(pickle.dumps(b)).force(copy.deepcopy(res), w)
    np.testing.assert_allclose(again, got, rtol=0, atol=1e-8)
    plain = backend("H2O", 3, gradient_method="plain")
    assert not offers_force(plain)
    np.testing.assert_allclose(plain.force(res, w), got, rtol=0, atol=1e-8)
    assert "force" in res.diagnostics["timings"]
    with pytest.raises(ValueError, match="symmetric"):
        b.force(res, np.triu(np.ones((3, 3))))
    with pytest.raises(ValueError, match="shape"):
        b.force(res, np.eye(2))


def test_force_matches_finite_differences_of_energies_and_overlaps():
    """Source: central differences, step h = 3e-3 Bohr, of the backend's energies E_k(R ± h) and
    aligned overlaps S_kl(±) = ⟨ψ_k(R)|ψ_l(R ± h)⟩: the weighted energy Σ_kl ρ̄_kl H_kl with ρ̄
    fixed in the adiabatic basis at R has the derivative
    Σ_k ρ̄_kk ∂E_k + Σ_{k≠l} ρ̄_kl (E_l − E_k) ∂S_kl (off-diagonal identity ⟨k|∇H|l⟩ = (E_l − E_k) d_kl).
    Tolerance 1e-4 Eh/Bohr per unit Σ|ρ̄_kl|: FD truncation E'''h²/6 ~ 1e-6 plus per-state energy
    noise 1e-7 Eh / 2h ~ 2e-5 per term (as for the gradient check in test_backend_casscf.py)."""
    b = backend("H2O", 3)
    ref = b.compute(H2O_POS, need_gradients=False)
    w = random_weights(3, seed=5, m=1)[0]
    force = b.force(ref, w)
    E = ref.energies
    h = 3e-3
    for atom, xyz in ((0, 2), (1, 1), (2, 0)):
        step = np.zeros_like(H2O_POS)
        step[atom, xyz] = h
        plus = b.compute(H2O_POS + step, guess=ref.guess, need_gradients=False)
        minus = b.compute(H2O_POS - step, guess=ref.guess, need_gradients=False)
        de = (plus.energies - minus.energies) / (2 * h)
        ds = (plus.overlap_prev - minus.overlap_prev) / (2 * h)
        hkl = np.diag(de) + (E[None, :] - E[:, None]) * (ds - np.diag(np.diag(ds)))
        fd = -float(np.sum(w * hkl))
        assert abs(force[atom, xyz] - fd) < 1e-4 * np.abs(w).sum(), (atom, xyz, force[atom, xyz], fd)


class _WithoutPhaseTwo:
    """The same backend seen by the driver as one without phase two (old path)."""

    def __init__(self, inner):
        self.inner = inner
        self.nstates = inner.nstates

    def compute(self, positions_bohr, guess=None, need_gradients=True):
        return self.inner.compute(positions_bohr, guess=guess, need_gradients=need_gradients)


def _lih_run(backend, nsteps):
    rng = trajectory_generator(3, 0)
    atoms = ase.Atoms("LiH", positions=[[0, 0, 0], [0, 0, 1.6]])
    atoms.set_momenta(rng.normal(size=(2, 3)) * np.sqrt(atoms.get_masses()[:, None] * units.kB * 300.0))
    dyn = MappingDynamics(atoms, backend, 0.5 * units.fs, 1, MethodOptions(), rng=rng,
                          zero_linear_momentum=True, zero_angular_momentum=True)
    dyn.run(nsteps)
    return dyn


@pytest.mark.parametrize("nsteps", [6, pytest.param(20, marks=pytest.mark.slow)])
def test_trajectories_through_old_and_new_paths_agree(nsteps):
    """LiH SA2-CASSCF(2,2)/STO-3G, steps of 0.5 fs from S1, force averaging on: the two-phase path
    (one weighted solve per weight matrix) and the driver contracting gradients and NACs agree in
    positions (Bohr), momenta (a.u.) and mapping variables to 1e-7 relative to the largest
    component.  The per-step force difference is the Lagrange tolerance (1e-9 relative) and
    round-off; measured after 20 steps: 1.2e-9 Bohr, 5.9e-8 a.u. momentum (of ~3), 1e-9 in x, p."""
    kw = dict(basis="sto-3g", ncas=2, nelecas=2, nstates=2, lagrange_rtol=RTOL, cold_start_alternatives=0,
              stability_kicks=0)
    new = _lih_run(CASSCFBackend(["Li", "H"], **kw), nsteps)
    old = _lih_run(_WithoutPhaseTwo(CASSCFBackend(["Li", "H"], **kw)), nsteps)
    assert new.two_phase and not old.two_phase
    assert new.state.result.gradients is None and old.state.result.gradients is not None
    assert new.metadata["coupling_source"] == "vectors"
    for a, b in ((new.state.positions, old.state.positions), (new.state.momenta, old.state.momenta),
                 (new.state.x, old.state.x), (new.state.p, old.state.p)):
        assert np.max(np.abs(a - b)) < 1e-7 * max(1.0, np.max(np.abs(b))), np.max(np.abs(a - b))
    drift_new = max(abs(f["drift_Eh"]) for f in new.frames)
    drift_old = max(abs(f["drift_Eh"]) for f in old.frames)
    assert abs(drift_new - drift_old) < 1e-8
