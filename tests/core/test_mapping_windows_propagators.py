"""Physics core: mapping density, windows, sampling streams and the diabatic integrator."""

import numpy as np
import pytest
import scipy.linalg
from scipy.integrate import solve_ivp

from mapdyn.core.mapping import actions, effective_density, mapping_energy
from mapdyn.core.model import DiabaticModel
from mapdyn.core.options import SQUARE_GAMMA, MethodOptions
from mapdyn.core.populations import ensemble_populations
from mapdyn.core.propagators import DiabaticIntegrator, propagate_amplitudes, run_diabatic
from mapdyn.core.sampling import EnsembleState, gaussian_wavepacket_ensemble, trajectory_generator
from mapdyn.core.windows import sample_actions, sample_mapping_variables, window_assignment, window_indicators
from mapdyn.models.tully import DualAvoidedCrossing, SimpleAvoidedCrossing

SQUARE = MethodOptions("sqc", "square")
TRIANGLE = MethodOptions("sqc", "triangle")
EHRENFEST = MethodOptions("ehrenfest")


class ConstantModel(DiabaticModel):
    """R-independent electronic Hamiltonian on one free coordinate (frozen-electronic-H test)."""

    def __init__(self, H):
        self.H = np.asarray(H, float)
        self.nstates = self.H.shape[0]
        self.ndof = 1
        self.masses = np.array([1e30])

    def hamiltonian(self, R):
        return np.broadcast_to(self.H, (len(R),) + self.H.shape).copy()

    def hamiltonian_gradient(self, R):
        return np.zeros((len(R), 1) + self.H.shape)


def _random_symmetric(rng, f):
    a = rng.normal(size=(f, f)) * 0.01
    return a + a.T


# --- oscillators with frozen nuclei vs scipy.linalg.expm (general-purpose library) -----------------

@pytest.mark.parametrize("f", [2, 3, 5])
def test_amplitude_propagation_matches_expm(f):
    rng = np.random.default_rng(3)
    H = np.array([_random_symmetric(rng, f) for _ in range(4)])
    z = rng.normal(size=(4, f)) + 1j * rng.normal(size=(4, f))
    t = 137.0
    out = propagate_amplitudes(z, H, t)
    ref = np.array([scipy.linalg.expm(-1j * H[i] * t) @ z[i] for i in range(4)])
    assert np.max(np.abs(out - ref)) < 1e-10  # reference: scipy.linalg.expm; tolerance from docs/theory.md#validation-benchmarks


def test_integrator_with_frozen_hamiltonian_equals_expm():
    """Mapping variables under a constant H follow c(t) = expm(−iHt) c(0) exactly (step-size free)."""
    rng = np.random.default_rng(5)
    H = _random_symmetric(rng, 3)
    model = ConstantModel(H)
    x0, p0 = rng.normal(size=(2, 3)), rng.normal(size=(2, 3))
    st = EnsembleState(np.zeros((2, 1)), np.zeros((2, 1)), x0.copy(), p0.copy())
    run_diabatic(model, st, SQUARE, dt=7.3, nsteps=40)
    c_ref = (scipy.linalg.expm(-1j * H * 7.3 * 40) @ ((x0 + 1j * p0) / np.sqrt(2)).T).T
    assert np.max(np.abs((st.x + 1j * st.p) / np.sqrt(2) - c_ref)) < 1e-10


# --- integrator accuracy: solve_ivp reference and energy drift ∝ dt² ---------------------------------

def _mmst_rhs(model, options, gamma_adj):
    """Hamilton's equations of the MMST Hamiltonian (docs/theory.md#mapping-hamiltonian) for one trajectory."""
    f, d = model.nstates, model.ndof

    def rhs(t, y):
        R, P, x, p = y[:d], y[d:2 * d], y[2 * d:2 * d + f], y[2 * d + f:]
        H = model.hamiltonian(R[None])[0]
        rho = effective_density(x[None], p[None], options, gamma_adj)
        dP = -model.contract_gradient(R[None], rho)[0]
        return np.concatenate([P / model.masses, dP, H @ p, -H @ x])

    return rhs


@pytest.mark.parametrize("options", [SQUARE, MethodOptions("sqc", "square", "fixed"), MethodOptions("sqc", "triangle", "adjusted")])
def test_integrator_second_order_against_solve_ivp(options):
    model = SimpleAvoidedCrossing()
    st0 = gaussian_wavepacket_ensemble(model, 1, 11, -4.0, 15.0, 0.5, 0, options)
    t_end = 400.0
    y0 = np.concatenate([st0.R[0], st0.P[0], st0.x[0], st0.p[0]])
    # reference: scipy.integrate.solve_ivp, DOP853, rtol 1e-10 (general-purpose library)
    ref = solve_ivp(_mmst_rhs(model, options, st0.gamma_adjusted), (0, t_end), y0, method="DOP853",
                    rtol=1e-10, atol=1e-12).y[:, -1]
    errors = []
    for dt in (4.0, 2.0, 1.0):
        st = st0.copy()
        run_diabatic(model, st, options, dt, int(round(t_end / dt)), record_every=10**6)
        y = np.concatenate([st.R[0], st.P[0], st.x[0], st.p[0]])
        errors.append(np.max(np.abs(y - ref)))
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    assert errors[-1] < 1e-3
    # second order: halving dt divides the error by ~4 (3.0–5.0 allows for higher-order terms)
    assert np.all((ratios > 3.0) & (ratios < 5.0)), (errors, ratios)


def test_energy_drift_scales_as_dt_squared():
    model = DualAvoidedCrossing()
    st0 = gaussian_wavepacket_ensemble(model, 20, 2, -8.0, 25.0, 0.5, 0, SQUARE)
    drifts = []
    for dt in (8.0, 4.0, 2.0):
        st = st0.copy()
        run = run_diabatic(model, st, SQUARE, dt, int(round(1200 / dt)), record_every=1)
        drifts.append(np.max(np.abs(run.energy - run.energy[0])))
    ratios = np.array(drifts[:-1]) / np.array(drifts[1:])
    assert np.all((ratios > 3.0) & (ratios < 5.0)), (drifts, ratios)


def test_time_reversibility():
    model = SimpleAvoidedCrossing()
    st0 = gaussian_wavepacket_ensemble(model, 5, 4, -5.0, 20.0, 0.5, 0, TRIANGLE)
    st = st0.copy()
    run_diabatic(model, st, TRIANGLE, 2.0, 300)
    st.P *= -1
    st.p *= -1  # time reversal of the mapping pair: (x, p) → (x, −p)
    run_diabatic(model, st, TRIANGLE, 2.0, 300)
    assert np.max(np.abs(st.R - st0.R)) < 1e-9
    assert np.max(np.abs(st.P + st0.P)) < 1e-9


# --- zero-point treatments ---------------------------------------------------------------------------

def test_symmetrized_energy_equals_trace_subtracted_form():
    """Σ ρ̃_kl H_kl equals V̄ + Σ_{k<l}[(1/F)(H_kk − H_ll)(e_k − e_l) + H_kl(x_k x_l + p_k p_l)]
    (docs/theory.md#mapping-hamiltonian, Cotton & Miller J. Chem. Phys. 139, 234112 (2013), form from memory)."""
    rng = np.random.default_rng(8)
    f = 4
    x, p = rng.normal(size=(3, f)), rng.normal(size=(3, f))
    H = np.array([_random_symmetric(rng, f) for _ in range(3)])
    rho = effective_density(x, p, SQUARE)
    lhs = np.einsum("nkl,nkl->n", rho, H)
    e = actions(x, p)
    rhs = np.trace(H, axis1=1, axis2=2) / f
    for k in range(f):
        for l in range(k + 1, f):
            rhs = rhs + (H[:, k, k] - H[:, l, l]) * (e[:, k] - e[:, l]) / f + H[:, k, l] * (x[:, k] * x[:, l] + p[:, k] * p[:, l])
    assert np.allclose(lhs, rhs, atol=1e-14)
    assert np.allclose(np.trace(rho, axis1=1, axis2=2), 1.0)


def test_adjusted_zero_point_starts_on_the_initial_state_and_keeps_trace_one():
    model = SimpleAvoidedCrossing()
    opts = MethodOptions("sqc", "square", "adjusted")
    st = gaussian_wavepacket_ensemble(model, 50, 9, -10.0, 20.0, 0.5, 0, opts, basis="diabatic")
    rho0 = effective_density(st.x, st.p, opts, st.gamma_adjusted)
    assert np.allclose(np.diagonal(rho0, axis1=1, axis2=2), [1.0, 0.0], atol=1e-13)
    run_diabatic(model, st, opts, 2.0, 500)
    rho = effective_density(st.x, st.p, opts, st.gamma_adjusted)
    assert np.allclose(np.trace(rho, axis1=1, axis2=2), 1.0, atol=1e-10)


def test_ehrenfest_equals_symmetrized_with_unit_actions():
    """Actions (1, 0) under the symmetrized zero point give Tr ρ = 1, γ_eff = 0: the Ehrenfest force."""
    model = DualAvoidedCrossing()
    a = gaussian_wavepacket_ensemble(model, 4, 6, -8.0, 20.0, 0.5, 0, EHRENFEST)
    b = a.copy()
    run_diabatic(model, a, EHRENFEST, 2.0, 400)
    run_diabatic(model, b, SQUARE, 2.0, 400)
    assert np.max(np.abs(a.R - b.R)) < 1e-10 and np.max(np.abs(a.P - b.P)) < 1e-10


def test_two_state_action_sum_is_conserved():
    """Common practice: for two states Σ e_k is a constant of the motion."""
    model = SimpleAvoidedCrossing()
    st = gaussian_wavepacket_ensemble(model, 30, 1, -10.0, 15.0, 0.5, 0, TRIANGLE)
    run = run_diabatic(model, st, TRIANGLE, 4.0, 500, record_every=50)
    s = run.actions_diabatic.sum(axis=2)
    assert np.max(np.abs(s - s[0])) < 1e-11


# --- windows -----------------------------------------------------------------------------------------

@pytest.mark.parametrize("options", [SQUARE, TRIANGLE])
@pytest.mark.parametrize("f,i", [(2, 0), (2, 1), (3, 2), (5, 1)])
def test_sampled_actions_lie_in_the_initial_window(options, f, i):
    rng = np.random.default_rng(0)
    e = np.array([sample_actions(rng, f, i, options) for _ in range(4000)])
    assert np.all(window_assignment(e, options) == i)
    pops, none = ensemble_populations(e, options)
    assert none == 0 and pops[i] == 1.0


def test_square_window_is_a_box_of_half_width_gamma():
    g = SQUARE_GAMMA
    e = np.array([[1.0 + 2 * g - 1e-9, 2 * g - 1e-9], [1.0 + 2 * g + 1e-6, 0.1], [1.2, 2 * g + 1e-6], [0.1, 1.5]])
    assert window_assignment(e, SQUARE).tolist() == [0, -1, -1, 1]


def test_triangle_window_geometry():
    """Two-state triangle: e_occ ≥ 1 and e_unocc < 1 (docs/theory.md#triangle-windows-for-more-than-two-states); on the set reachable
    from the sampled triangle (Σ e ≤ 2, conserved) this is e_occ ∈ [1, 2], e_unocc ∈ [0, 2 − e_occ]."""
    e = np.array([[1.5, 0.49], [1.5, 0.5], [0.99, 0.0], [1.0, 1.0 - 1e-9], [0.2, 1.7], [1.0, 1.0]])
    assert window_assignment(e, TRIANGLE).tolist() == [0, 0, -1, 0, 1, -1]


def test_triangle_mean_actions_two_states():
    """F = 2 triangle: centroid e = (4/3, 1/3), i.e. n = N + γ with γ = 1/3 (Cotton & Miller,
    J. Chem. Phys. 145, 144108 (2016)); Monte Carlo within 4 standard errors."""
    rng = np.random.default_rng(1)
    e = np.array([sample_actions(rng, 2, 0, TRIANGLE) for _ in range(40000)])
    se = e.std(axis=0) / np.sqrt(len(e))
    assert np.all(np.abs(e.mean(axis=0) - [4 / 3, 1 / 3]) < 4 * se)


def test_triangle_mean_actions_many_states():
    """F-state triangle sampling (pairwise two-state triangle, docs/theory.md#triangle-windows-for-more-than-two-states): ⟨e_i⟩ = 4/3,
    ⟨e_j⟩ = 1/3 = γ for every F."""
    rng = np.random.default_rng(2)
    f = 4
    e = np.array([sample_actions(rng, f, 0, TRIANGLE) for _ in range(40000)])
    expected = np.array([4 / 3] + [1 / 3] * (f - 1))
    se = e.std(axis=0) / np.sqrt(len(e))
    assert np.all(np.abs(e.mean(axis=0) - expected) < 4 * se)


def test_square_sampling_is_uniform_in_the_box():
    rng = np.random.default_rng(4)
    e = np.array([sample_actions(rng, 3, 1, SQUARE) for _ in range(30000)])
    g = SQUARE_GAMMA
    expected = np.array([g, 1 + g, g])
    se = e.std(axis=0) / np.sqrt(len(e))
    assert np.all(np.abs(e.mean(axis=0) - expected) < 4 * se)
    # variance of U(0, 2γ) is (2γ)²/12
    assert np.allclose(e.var(axis=0), (2 * g) ** 2 / 12, rtol=0.03)


def test_mapping_variables_reproduce_actions_and_uniform_angles():
    rng = np.random.default_rng(7)
    x, p = np.array([sample_mapping_variables(rng, 2, 0, SQUARE) for _ in range(20000)]).transpose(1, 0, 2)
    angles = np.arctan2(-p, x)
    # uniform angle: ⟨cos q⟩ = ⟨sin q⟩ = 0, standard error 1/√(2N)
    assert np.all(np.abs(np.cos(angles).mean(axis=0)) < 4 / np.sqrt(2 * 20000))
    assert np.all(window_assignment(actions(x, p), SQUARE) == 0)


# --- per-trajectory random streams -------------------------------------------------------------------

def test_streams_do_not_depend_on_chunking():
    model = SimpleAvoidedCrossing()
    whole = gaussian_wavepacket_ensemble(model, 10, 42, -10.0, 20.0, 0.5, 0, SQUARE)
    part = gaussian_wavepacket_ensemble(model, 4, 42, -10.0, 20.0, 0.5, 0, SQUARE, first_index=6)
    assert np.array_equal(whole.R[6:], part.R) and np.array_equal(whole.x[6:], part.x)
    spawned = np.random.default_rng(np.random.SeedSequence(42).spawn(10)[7])
    assert spawned.random() == trajectory_generator(42, 7).random()


def test_wavepacket_wigner_moments():
    """Wigner function of ψ ∝ exp[−(R−R0)²/(4σ²) + ikR]: ⟨R⟩ = R0, var R = σ², var P = 1/(4σ²)."""
    model = SimpleAvoidedCrossing()
    st = gaussian_wavepacket_ensemble(model, 20000, 3, -10.0, 20.0, 0.8, 0, SQUARE)
    n = st.ntraj
    assert abs(st.R.mean() + 10.0) < 4 * 0.8 / np.sqrt(n)
    assert abs(st.P.mean() - 20.0) < 4 * (0.5 / 0.8) / np.sqrt(n)
    assert abs(st.R.var() / 0.64 - 1) < 4 * np.sqrt(2 / n)
    assert abs(st.P.var() / (0.25 / 0.64) - 1) < 4 * np.sqrt(2 / n)


def test_adiabatic_initial_state_is_converted_to_diabatic():
    """Started on the lower adiabat at the crossing of Tully 1 (x = 0, where it is (|1⟩ − |2⟩)/√2... up to
    sign), the diabatic actions share the window population equally on average."""
    model = SimpleAvoidedCrossing()
    st = gaussian_wavepacket_ensemble(model, 4000, 1, 0.0, 10.0, 1e-9, 0, EHRENFEST)
    e = actions(st.x, st.p)
    assert np.allclose(e, 0.5, atol=1e-6)
    _, U = model.adiabatic(st.R)
    c_ad = np.einsum("nlk,nl->nk", U, st.x + 1j * st.p)
    assert np.allclose(0.5 * np.abs(c_ad) ** 2, [1.0, 0.0], atol=1e-12)


# --- bad input ----------------------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs,word", [
    (dict(method="surface"), "method"),
    (dict(window="circle"), "window"),
    (dict(zero_point="none"), "zero_point"),
    (dict(gamma=0.5), "gamma"),
    (dict(gamma=0.0), "gamma"),
    (dict(gamma=float("nan")), "gamma"),
    (dict(window="triangle", gamma=0.3), "gamma"),
])
def test_bad_options_name_the_parameter(kwargs, word):
    with pytest.raises(ValueError, match=word):
        MethodOptions(**kwargs)


def test_bad_inputs_elsewhere():
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="nstates"):
        sample_actions(rng, 1, 0, SQUARE)
    with pytest.raises(ValueError, match="initial_state"):
        sample_actions(rng, 2, 2, SQUARE)
    model = SimpleAvoidedCrossing()
    with pytest.raises(ValueError, match="positions"):
        model.hamiltonian(np.zeros((3, 2)))
    with pytest.raises(ValueError, match="non-finite"):
        model.hamiltonian(np.array([[np.nan]]))
    st = gaussian_wavepacket_ensemble(model, 2, 0, -5.0, 10.0, 0.5, 0, SQUARE)
    with pytest.raises(ValueError, match="dt"):
        run_diabatic(model, st, SQUARE, -1.0, 10)
    bad = st.copy()
    bad.x = np.zeros((2, 3))
    with pytest.raises(ValueError, match="state.x"):
        run_diabatic(model, bad, SQUARE, 1.0, 10)
    with pytest.raises(ValueError, match="ntraj"):
        gaussian_wavepacket_ensemble(model, 0, 0, -5.0, 10.0, 0.5, 0, SQUARE)
    with pytest.raises(ValueError, match="seed"):
        trajectory_generator(-1, 0)
    with pytest.raises(ValueError, match="mass"):
        SimpleAvoidedCrossing(mass=-1.0)
    with pytest.raises(ValueError, match="actions"):
        window_indicators(np.zeros(3), SQUARE)


def test_energy_function_matches_definition():
    model = SimpleAvoidedCrossing()
    st = gaussian_wavepacket_ensemble(model, 3, 0, -1.0, 10.0, 0.5, 0, MethodOptions("sqc", "square", "fixed"))
    H = model.hamiltonian(st.R)
    e = actions(st.x, st.p)
    g = SQUARE_GAMMA
    ref = st.P[:, 0] ** 2 / 4000 + (e[:, 0] - g) * H[:, 0, 0] + (e[:, 1] - g) * H[:, 1, 1] \
        + (st.x[:, 0] * st.x[:, 1] + st.p[:, 0] * st.p[:, 1]) * H[:, 0, 1]
    integ = DiabaticIntegrator(model, MethodOptions("sqc", "square", "fixed"), 1.0)
    assert np.allclose(integ.energy(st), ref, atol=1e-15)
    assert np.allclose(mapping_energy(st.P, model.masses, H, integ.density(st)), ref, atol=1e-15)
