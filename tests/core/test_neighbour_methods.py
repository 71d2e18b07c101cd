"""Spin mapping, MASH and FSSH on the batched engine: options, sampling, streams, hops, energy, restart."""

import copy

import numpy as np
import pytest
from scipy import stats

from mapdyn.core.hopping import (
    HoppingIntegrator,
    UniformStreams,
    adiabatic_states,
    hop_probabilities,
    hopping_state,
    rescale_momentum,
    run_hopping,
)
from mapdyn.core.mapping import effective_density
from mapdyn.core.options import SQUARE_GAMMA, MethodOptions, spin_gamma
from mapdyn.core.populations import ensemble_populations
from mapdyn.core.propagators import propagate_amplitudes
from mapdyn.core.sampling import gaussian_wavepacket_ensemble, trajectory_generator
from mapdyn.core.windows import sample_actions
from mapdyn.models.tully import tully_model

SPIN, MASH, FSSH = MethodOptions("spin"), MethodOptions("mash"), MethodOptions("fssh")
FSSH_EDC = MethodOptions("fssh", decoherence="energy")


def test_option_values_and_bad_combinations():
    for o in (SPIN, MASH, FSSH, FSSH_EDC):
        assert o.describe()
    with pytest.raises(ValueError, match="decoherence"):
        MethodOptions("mash", decoherence="energy")
    with pytest.raises(ValueError, match="decoherence"):
        MethodOptions("fssh", decoherence="strong")
    with pytest.raises(ValueError, match="zero_point"):
        MethodOptions("spin", zero_point="adjusted")


@pytest.mark.parametrize("f", [2, 3, 5])
def test_spin_mapping_sphere_and_zero_point(f):
    """Focused spin-mapping actions e = δ_ki + γ_s lie on Σe = √(F+1), and the symmetrized density then
    carries γ_k = γ_s with Tr ρ = 1 (algebra of docs/theory.md#spin-mapping; γ_s from memory of
    Runeson & Richardson, J. Chem. Phys. 152, 084110 (2020))."""
    rng = np.random.default_rng(0)
    e = sample_actions(rng, f, 1, SPIN)
    assert abs(e.sum() - np.sqrt(f + 1.0)) < 1e-12
    q = 2 * np.pi * rng.random(f)
    x, p = np.sqrt(2 * e) * np.cos(q), -np.sqrt(2 * e) * np.sin(q)
    rho = effective_density(x[None], p[None], SPIN)[0]
    assert np.allclose(np.diag(rho), np.eye(f)[1], atol=1e-12)
    assert abs(np.trace(rho) - 1.0) < 1e-12
    pops, none = ensemble_populations(e[None, None, :], SPIN)
    assert np.allclose(pops[0], np.eye(f)[1]) and none[0] == 0


def test_two_state_spin_gamma_equals_square_window_gamma():
    """For two states the spin-mapping γ_s = (√3 − 1)/2 coincides with the square-window γ
    (Cotton & Miller 2013; Runeson & Richardson 2019 note the coincidence; from memory)."""
    assert abs(spin_gamma(2) - SQUARE_GAMMA) < 1e-15


def test_mash_initial_spin_uniform_on_hemisphere():
    """Two-state MASH samples the spin uniformly on the initial state's hemisphere, so S_z = e_i − e_j
    is uniform on [0, 1] (Archimedes' hat-box theorem); Kolmogorov–Smirnov test (scipy.stats)."""
    rng = np.random.default_rng(1)
    sz = np.array([np.subtract(*sample_actions(rng, 2, 0, MASH)) for _ in range(4000)])
    assert sz.min() >= 0.0
    assert stats.kstest(sz, "uniform").pvalue > 1e-3
    w = 2 * np.abs(sz)
    assert abs(w.mean() - 1.0) < 3 * w.std() / np.sqrt(w.size)  # ⟨2|S_z|⟩ = 1, 3 standard errors


@pytest.mark.parametrize("options", [SPIN, MASH, FSSH, MethodOptions("ehrenfest")])
def test_all_methods_share_nuclear_initial_conditions(options):
    model = tully_model("tully1")
    ref = gaussian_wavepacket_ensemble(model, 50, 7, -10.0, 15.0, 1.0, 0, MethodOptions("sqc", "triangle"))
    st = gaussian_wavepacket_ensemble(model, 50, 7, -10.0, 15.0, 1.0, 0, options)
    assert np.array_equal(st.R, ref.R) and np.array_equal(st.P, ref.P)


def test_fssh_streams_continue_after_initial_draws():
    """The FSSH stream of trajectory i is its study stream after D + D normals and F + F uniforms; the
    block reads equal single draws (numpy.random.Generator)."""
    model = tully_model("tully1")
    ens = gaussian_wavepacket_ensemble(model, 4, 11, -10.0, 15.0, 1.0, 0, FSSH)
    st = hopping_state(model, ens, FSSH, 11)
    draws = np.array([st.streams.draw() for _ in range(3)])  # (3, n)
    for j in range(4):
        g = trajectory_generator(11, j)
        assert np.isclose(-10.0 + g.standard_normal(1)[0], ens.R[j, 0], rtol=0, atol=1e-12)
        g.standard_normal(1)
        g.random(2)
        g.random(2)
        g.random()  # the initial active-state draw
        assert draws[:, j].tolist() == [g.random() for _ in range(3)]
    s = UniformStreams([np.random.default_rng(5)])
    ref = np.random.default_rng(5)
    assert all(s.draw()[0] == ref.random() for _ in range(300))


def test_rescale_momentum_conserves_energy_or_reflects():
    m = np.array([2000.0, 500.0])
    P = np.array([[60.0, -3.0], [1.0, 0.5]])
    d = np.array([[1.0, 0.5], [1.0, 0.5]])
    dE = np.array([0.05, 0.05])
    Pn, ok = rescale_momentum(P, m, d, dE, "reflect")
    ke = lambda q: 0.5 * np.sum(q * q / m, axis=1)  # noqa: E731
    assert ok.tolist() == [True, False]
    assert abs(ke(P)[0] - ke(Pn)[0] - dE[0]) < 1e-14
    assert abs(ke(P)[1] - ke(Pn)[1]) < 1e-15  # reflection keeps the kinetic energy …
    a = np.sum(d[1] * P[1] / m)
    assert abs(np.sum(d[1] * Pn[1] / m) + a) < 1e-15  # … and reverses the velocity along d
    Pk, _ = rescale_momentum(P, m, d, dE, "keep")
    assert np.array_equal(Pk[1], P[1])


def test_fewest_switches_probability_is_the_population_flux():
    """Σ_b g_b |c_λ|² equals the loss of |c_λ|² over a step where it decreases, to O(Δt²) (Tully 1990)."""
    model = tully_model("tully1")
    R0 = np.linspace(-1.0, 1.0, 9)[:, None]
    v = 20.0 / 2000.0
    dt = 0.5
    R1 = R0 + v * dt
    rng = np.random.default_rng(2)
    z0 = rng.normal(size=(9, 2)) + 1j * rng.normal(size=(9, 2))
    z0 *= np.sqrt(2.0) / np.linalg.norm(z0, axis=1, keepdims=True)
    Hm = model.hamiltonian(0.5 * (R0 + R1))
    z1 = propagate_amplitudes(z0, Hm, dt)
    _, U0 = adiabatic_states(model, R0)
    _, U1 = adiabatic_states(model, R1)
    lam = np.zeros(9, dtype=int)
    g, c1, _ = hop_probabilities(U0, U1, z0, z1, lam, dt)
    c0 = np.einsum("nka,nk->na", U0, z0) / np.sqrt(2)
    loss = np.abs(c0[:, 0]) ** 2 - np.abs(c1[:, 0]) ** 2
    mask = loss > 1e-6
    assert mask.sum() >= 3
    assert np.allclose(g[mask, 1] * np.abs(c0[mask, 0]) ** 2, loss[mask], rtol=0.05)
    assert np.all(g[~mask, 1] < 1e-4)


@pytest.mark.parametrize("options", [MASH, FSSH, FSSH_EDC])
def test_energy_conserved_through_hops(options):
    """T + E_λ is conserved across hops (rescaling) to the integrator's O(Δt²) error: drift < 1e-4 Eh
    against kinetic energies ≈ 0.1 Eh (measured ≈ 3e-6 Eh at Δt = 2)."""
    model = tully_model("tully1")
    ens = gaussian_wavepacket_ensemble(model, 100, 3, -10.0, 20.0, 1.0, 0, options)
    st = hopping_state(model, ens, options, 3)
    run = run_hopping(model, st, options, 2.0, 1000, record_every=50)
    assert run.n_hops > 10
    assert np.max(np.abs(run.energy - run.energy[0])) < 1e-4


@pytest.mark.parametrize("options", [MASH, FSSH_EDC])
def test_restart_is_bitwise(options):
    """Stopping after n steps and resuming from a copy of the state (streams included) with a new
    integrator gives bitwise the run without the stop."""
    model = tully_model("tully2")
    ens = gaussian_wavepacket_ensemble(model, 60, 5, -10.0, 25.0, 0.8, 0, options)
    a = hopping_state(model, ens, options, 5)
    b = copy.deepcopy(a)
    run_hopping(model, a, options, 2.0, 800)
    run_hopping(model, b, options, 2.0, 400)
    b = copy.deepcopy(b)
    run_hopping(model, b, options, 2.0, 400)
    for k in ("R", "P", "x", "p", "active"):
        assert np.array_equal(getattr(a, k), getattr(b, k)), k


def test_mash_rejects_more_than_two_states():
    from mapdyn.models.spin_boson import ExcitonTransferModel
    model = ExcitonTransferModel.debye(np.diag([0.0, 0.01, 0.02]) + 0.005 * (1 - np.eye(3)), 0.01, 0.01, 3)
    ens = gaussian_wavepacket_ensemble(model, 2, 0, 0.0, 0.0, 0.1, 0, MASH)
    with pytest.raises(ValueError, match="two states"):
        hopping_state(model, ens, MASH, 0)
    with pytest.raises(ValueError, match="method"):
        HoppingIntegrator(model, SPIN, 1.0)
