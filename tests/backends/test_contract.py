"""Backend contract: model adapter, callback backend, state matching and phase tracking.

Closed-form references: the eigen-decomposition of a real symmetric 2×2 matrix (textbook linear
algebra, common practice), Tully model 1 matrix elements written out from J. C. Tully, J. Chem.
Phys. 93, 1061 (1990) (parameters from memory, the universally reproduced values).
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from mapdyn.backends.callback import CallbackBackend
from mapdyn.backends.contract import Backend, BackendError, ElectronicResult, match_states
from mapdyn.backends.model_adapter import ModelAdapterBackend, ModelGuess
from mapdyn.core.model import DiabaticModel, as_positions
from mapdyn.models.tully import SimpleAvoidedCrossing, tully_model


def tully1_elements(x):
    """V11, V22, V12 and derivatives of Tully model 1 (A=0.01, B=1.6, C=0.005, D=1.0), Tully 1990."""
    A, B, C, D = 0.01, 1.6, 0.005, 1.0
    if x >= 0:
        v11, d11 = A * (1 - np.exp(-B * x)), A * B * np.exp(-B * x)
    else:
        v11, d11 = -A * (1 - np.exp(B * x)), A * B * np.exp(B * x)
    v12 = C * np.exp(-D * x * x)
    return v11, -v11, v12, d11, -d11, -2 * D * x * v12


def at(x, natoms=1):
    pos = np.zeros((natoms, 3))
    pos[0, 0] = x
    return pos


class ThreeStateTwoMode(DiabaticModel):
    """A small 3-state, 2-coordinate linear vibronic model defined here for the contract tests (Eh, Bohr)."""

    nstates, ndof, name = 3, 2, "three_state_two_mode"

    def __init__(self):
        self.masses = np.array([1500.0, 1500.0])
        self.k = np.array([0.02, 0.03])
        self.kappa = np.array([[0.01, -0.004], [-0.012, 0.006], [0.003, 0.009]])
        self.e0 = np.array([0.0, 0.02, 0.045])
        self.lam = 0.004

    def hamiltonian(self, R):
        R = as_positions(R, 2)
        base = 0.5 * np.sum(self.k * R * R, axis=1)
        H = np.zeros((R.shape[0], 3, 3))
        for s in range(3):
            H[:, s, s] = base + self.e0[s] + R @ self.kappa[s]
        H[:, 0, 1] = H[:, 1, 0] = self.lam * R[:, 0]
        H[:, 1, 2] = H[:, 2, 1] = self.lam * R[:, 1] + 0.002
        return H

    def hamiltonian_gradient(self, R):
        R = as_positions(R, 2)
        G = np.zeros((R.shape[0], 2, 3, 3))
        for s in range(3):
            G[:, :, s, s] = self.k * R + self.kappa[s]
        G[:, 0, 0, 1] = G[:, 0, 1, 0] = self.lam
        G[:, 1, 1, 2] = G[:, 1, 2, 1] = self.lam
        return G


# ---------------------------------------------------------------------------------------- adapter
@pytest.mark.parametrize("x", [-3.0, -0.7, -0.1, 0.0, 0.25, 1.3, 4.0])
def test_tully1_energies_gradients_and_nac_match_closed_form(x):
    backend = ModelAdapterBackend(SimpleAvoidedCrossing())
    r = backend.compute(at(x))
    v11, v22, v12, d11, d22, d12 = tully1_elements(x)
    half_gap, dhalf = 0.5 * (v11 - v22), 0.5 * (d11 - d22)
    w = np.hypot(half_gap, v12)
    mean = 0.5 * (v11 + v22)
    # eigenvalues a ± W of [[a+Δ, V12], [V12, a−Δ]]
    np.testing.assert_allclose(r.energies, [mean - w, mean + w], rtol=0, atol=1e-15)
    dw = (half_gap * dhalf + v12 * d12) / w
    dmean = 0.5 * (d11 + d22)
    np.testing.assert_allclose(r.gradients[:, 0, 0], [dmean - dw, dmean + dw], rtol=0, atol=1e-14)
    # |d12| = |dθ/dx| with tan 2θ = V12/Δ:  dθ/dx = (Δ V12' − V12 Δ')/(2 W²)
    np.testing.assert_allclose(abs(r.couplings[0, 1, 0, 0]), abs(half_gap * d12 - v12 * dhalf) / (2 * w * w),
                               rtol=1e-12, atol=1e-15)
    assert r.couplings[0, 1, 0, 0] == -r.couplings[1, 0, 0, 0]
    assert np.all(r.gradients[:, :, 1:] == 0) and np.all(r.couplings[:, :, :, 1:] == 0)
    assert r.overlap_prev is None and isinstance(r.guess, ModelGuess)
    assert isinstance(backend, Backend)


@pytest.mark.parametrize("scramble", [None, 11])
def test_nac_sign_matches_finite_difference_of_aligned_overlaps(scramble):
    """d_kl = <ψ_k|∂ψ_l> ≈ [S_kl(R+h) − S_kl(R−h)]/(2h) with S aligned to ψ(R) (central difference, O(h²))."""
    model = ThreeStateTwoMode()
    backend = ModelAdapterBackend(model, natoms=1, scramble_signs=scramble)
    pos = np.array([[0.4, -0.3, 0.0]])
    r = backend.compute(pos)
    h = 1e-4
    for a in range(2):
        step = np.zeros((1, 3))
        step[0, a] = h
        sp = backend.compute(pos + step, r.guess).overlap_prev
        sm = backend.compute(pos - step, r.guess).overlap_prev
        fd = (sp - sm) / (2 * h)
        np.fill_diagonal(fd, 0.0)
        np.testing.assert_allclose(r.couplings[:, :, 0, a], fd, atol=1e-7)  # O(h²)·|d'''| ≪ 1e-7
        # Hellmann–Feynman gradients against central differences of the energies
        ep = backend.compute(pos + step).energies
        em = backend.compute(pos - step).energies
        np.testing.assert_allclose(r.gradients[:, 0, a], (ep - em) / (2 * h), atol=1e-9)


def test_coordinate_map_and_masses():
    backend = ModelAdapterBackend(ThreeStateTwoMode(), natoms=2)
    pos = np.array([[0.4, -0.3, 9.0], [5.0, 6.0, 7.0]])
    np.testing.assert_array_equal(backend.model_coordinates(pos), [[0.4, -0.3]])
    r = backend.compute(pos)
    assert r.gradients.shape == (3, 2, 3) and r.couplings.shape == (3, 3, 2, 3)
    assert np.all(r.gradients[:, 0, 2] == 0) and np.all(r.gradients[:, 1] == 0)
    np.testing.assert_array_equal(backend.atom_masses(), [1500.0, 1500.0])
    np.testing.assert_array_equal(backend.positions_from_model([0.4, -0.3])[0, :2], [0.4, -0.3])
    atoms = backend.make_atoms([0.4, -0.3], [12.0, -3.0])
    from mapdyn.driver.dynamics import MappingDynamics

    dyn = MappingDynamics(atoms, backend, 1.0, 0, mapping_variables=(np.ones(3), np.zeros(3)))
    np.testing.assert_allclose(dyn.state.positions[0, :2], [0.4, -0.3], rtol=1e-14)
    np.testing.assert_allclose(dyn.state.momenta[0, :2], [12.0, -3.0], rtol=1e-14)
    np.testing.assert_allclose(dyn.masses_au, [1500.0, 1500.0], rtol=1e-14)
    with pytest.raises(ValueError, match="positions_bohr"):
        backend.compute(np.zeros((1, 3)))
    with pytest.raises(ValueError, match="natoms"):
        ModelAdapterBackend(ThreeStateTwoMode(), natoms=0)


def test_first_call_uses_model_sign_convention():
    model = tully_model("tully2")
    backend = ModelAdapterBackend(model)
    for x in (-2.0, 0.3, 1.0):
        _, U = model.adiabatic(np.array([[x]]))
        np.testing.assert_array_equal(backend.compute(at(x)).guess.eigenvectors, U[0])


def test_scan_with_random_signs_is_phase_continuous():
    """Through the Tully-1 avoided crossing with raw eigenvector signs flipped at random, the aligned
    states, overlaps and couplings are continuous and equal the unscrambled scan (up to the first signs)."""
    model = SimpleAvoidedCrossing()
    plain = ModelAdapterBackend(model)
    scrambled = ModelAdapterBackend(model, scramble_signs=2024)
    xs = np.linspace(-4.0, 4.0, 161)
    g_plain = g_scr = None
    d_plain, d_scr, flips = [], [], 0
    first_signs = None
    for x in xs:
        rp = plain.compute(at(x), g_plain)
        rs = scrambled.compute(at(x), g_scr)
        if g_scr is not None:
            assert np.all(np.diag(rs.overlap_prev) > 0.9)  # Δx = 0.05 Bohr: |S_kk| ≈ 1 − O(Δx² d²)
            assert rs.diagnostics["permutation"] == [0, 1]
            flips += int(np.any(np.asarray(rs.diagnostics["signs"]) < 0))
            np.testing.assert_allclose(rs.overlap_prev, rp.overlap_prev * np.outer(first_signs, first_signs), atol=1e-14)
        else:
            first_signs = np.sign(rs.guess.eigenvectors[np.argmax(np.abs(rs.guess.eigenvectors), axis=0), [0, 1]])
        g_plain, g_scr = rp.guess, rs.guess
        d_plain.append(rp.couplings[0, 1, 0, 0])
        d_scr.append(rs.couplings[0, 1, 0, 0])
    assert flips > 20  # the scramble really flipped raw signs along the scan
    d_plain, d_scr = np.array(d_plain), np.array(d_scr)
    np.testing.assert_allclose(d_scr, d_plain * first_signs[0] * first_signs[1], atol=1e-15)
    assert np.all(np.sign(d_plain) == np.sign(d_plain[80]))  # one-signed peak: no sign jumps


def test_trivial_crossing_is_reported_as_swap_with_permutation_overlap():
    """Uncoupled diabats that cross (Tully-1 form with C = 0): energy order swaps state identity."""
    model = SimpleAvoidedCrossing(C=0.0)
    backend = ModelAdapterBackend(model)
    r0 = backend.compute(at(-0.05))
    r1 = backend.compute(at(0.05), r0.guess)
    assert r1.diagnostics["swap"] is True
    assert r1.diagnostics["permutation"] == [1, 0]
    np.testing.assert_allclose(np.abs(r1.overlap_prev), [[0.0, 1.0], [1.0, 0.0]], atol=1e-15)
    assert r1.diagnostics["min_overlap"] == pytest.approx(1.0, abs=1e-15)
    assert r1.diagnostics["low_overlap"] is False


def test_model_adapter_is_a_pure_function():
    backend = ModelAdapterBackend(ThreeStateTwoMode(), scramble_signs=5)
    pos = np.array([[0.2, 0.1, 0.0]])
    g = backend.compute(pos - 0.01).guess
    a = backend.compute(pos, g)
    backend.compute(np.array([[3.0, -2.0, 0.0]]))  # unrelated call in between
    b = backend.compute(pos, pickle.loads(pickle.dumps(g)))
    for field in ("energies", "gradients", "couplings", "overlap_prev"):
        assert np.array_equal(getattr(a, field), getattr(b, field)), field
    assert np.array_equal(a.guess.eigenvectors, b.guess.eigenvectors)


def test_withheld_couplings():
    r = ModelAdapterBackend(SimpleAvoidedCrossing(), with_couplings=False).compute(at(0.1))
    assert r.couplings is None and r.gradients is not None
    r = ModelAdapterBackend(SimpleAvoidedCrossing()).compute(at(0.1), need_gradients=False)
    assert r.gradients is None and r.couplings is None


# ---------------------------------------------------------------------------------------- matching
def test_match_states_recovers_permutation_and_signs():
    rng = np.random.default_rng(3)
    f = 5
    q, _ = np.linalg.qr(np.eye(f) + 0.05 * rng.standard_normal((f, f)))
    q *= np.sign(np.diag(q))[None, :]
    perm = rng.permutation(f)
    signs = rng.choice([-1.0, 1.0], size=f)
    raw = q[:, perm] * signs[None, :]  # new state l is old state perm[l] with sign signs[l]
    m = match_states(raw)
    np.testing.assert_array_equal(m.permutation, perm)
    np.testing.assert_array_equal(m.signs, signs)
    assert m.swap and not m.low_overlap
    np.testing.assert_allclose(m.overlap, q[:, perm], atol=0)


# ---------------------------------------------------------------------------------------- callback
def tully1_callback(flip_every: int | None = None, with_couplings: bool = False):
    model = SimpleAvoidedCrossing()
    adapter = ModelAdapterBackend(model)

    def function(positions_bohr, need_gradients=True):
        x = positions_bohr[:1, :1]
        E, U = np.linalg.eigh(model.hamiltonian(x)[0])
        if flip_every is not None:
            U = U * (-1.0 if int(abs(positions_bohr[0, 0]) * 1000) % flip_every == 0 else 1.0)
        ref = adapter.compute(positions_bohr, ModelGuess(positions_bohr, U))  # same phases as U
        out = {"energies": E, "state_vectors": U}
        if need_gradients:
            out["gradients"] = ref.gradients
            if with_couplings:
                out["couplings"] = ref.couplings
        return out

    return CallbackBackend(function, nstates=2, natoms=1)


def test_callback_state_vectors_give_the_adapter_overlaps():
    cb = tully1_callback(flip_every=3, with_couplings=True)
    ad = ModelAdapterBackend(SimpleAvoidedCrossing())
    gc = ga = None
    for x in np.linspace(-1.0, 1.0, 41):
        rc, ra = cb.compute(at(x), gc), ad.compute(at(x), ga)
        if ga is None:  # the two start from different sign conventions: s_l relates them
            s = np.sign(np.diag(rc.guess.state_vectors.T @ ra.guess.eigenvectors))
            ss = np.outer(s, s)
        else:
            np.testing.assert_allclose(rc.overlap_prev, ra.overlap_prev * ss, atol=1e-14)
        np.testing.assert_allclose(rc.couplings, ra.couplings * ss[:, :, None, None], atol=1e-14)
        np.testing.assert_allclose(rc.energies, ra.energies, atol=0)
        gc, ga = rc.guess, ra.guess


def test_callback_raw_overlap_with_state_data_path():
    """A function that does its own overlaps (e.g. an external program) through previous/state_data."""
    model = SimpleAvoidedCrossing()

    def function(positions_bohr, need_gradients=True, previous=None):
        E, U = np.linalg.eigh(model.hamiltonian(positions_bohr[:1, :1])[0])
        U = -U if positions_bohr[0, 0] > 0.3 else U  # the external code's phases jump
        out = {"energies": E, "gradients": np.zeros((2, 1, 3)), "state_data": U}
        if previous is not None:
            out["overlap_raw"] = previous.T @ U
        return out

    cb = CallbackBackend(function, nstates=2, natoms=1)
    ad = ModelAdapterBackend(model)
    gc = ga = None
    for x in np.linspace(0.0, 0.6, 13):
        rc, ra = cb.compute(at(x), gc), ad.compute(at(x), ga)
        if ga is None:  # relative sign convention of the two first calls
            s = np.sign(np.diag(rc.guess.state_data.T @ ra.guess.eigenvectors))
        else:
            np.testing.assert_allclose(rc.overlap_prev, ra.overlap_prev * np.outer(s, s), atol=1e-14)
            assert np.all(np.diag(rc.overlap_prev) > 0)
        gc, ga = rc.guess, ra.guess


def test_callback_is_pure_and_reports_failures():
    cb = tully1_callback(flip_every=2)
    g = cb.compute(at(0.1)).guess
    a, b = cb.compute(at(0.12), g), cb.compute(at(0.12), g)
    for field in ("energies", "gradients", "overlap_prev"):
        assert np.array_equal(getattr(a, field), getattr(b, field))

    def broken(positions_bohr):
        raise RuntimeError("external program crashed")

    with pytest.raises(BackendError) as info:
        CallbackBackend(broken, 2, 1).compute(at(0.0))
    assert "external program crashed" in info.value.reason and info.value.attempts
    with pytest.raises(ValueError, match="unknown key"):
        CallbackBackend(lambda pos: {"energies": [0, 1], "gradient": 0}, 2, 1).compute(at(0.0), need_gradients=False)
    with pytest.raises(ValueError, match="'gradients'"):
        CallbackBackend(lambda pos: {"energies": [0, 1]}, 2, 1).compute(at(0.0))
    with pytest.raises(ValueError, match="ascending"):
        CallbackBackend(lambda pos: {"energies": [1, 0]}, 2, 1).compute(at(0.0), need_gradients=False)


def test_result_validation_names_the_field():
    with pytest.raises(ValueError, match="couplings must be antisymmetric"):
        ElectronicResult(np.array([0.0, 1.0]), couplings=np.ones((2, 2, 1, 3))).validate()
