"""On-the-fly driver: agreement with the diabatic engine, overlap-only path, limits, records, restart.

Method combinations are named in each test.  Orders of convergence are checked by halving the
time step: both propagators are second order (docs/theory.md#on-the-fly-step), so differences between them shrink
by ≈ 4 per halving; we accept ratios in [3, 5.5] (the asymptotic regime is reached at these steps,
measured ratios are 3.9–4.1).
"""

from __future__ import annotations

import os
import pickle
import warnings

import ase
import ase.io
import numpy as np
import pytest
from ase import units

from mapdyn.backends.callback import CallbackBackend
from mapdyn.backends.contract import BackendError
from mapdyn.backends.model_adapter import ModelAdapterBackend
from mapdyn.core.model import DiabaticModel, as_positions
from mapdyn.core.options import MethodOptions
from mapdyn.core.propagators import run_diabatic
from mapdyn.core.sampling import gaussian_wavepacket_ensemble, trajectory_generator
from mapdyn.core.windows import sample_mapping_variables
from mapdyn.driver.dynamics import AMU_IN_ME, GAP_WARNING, PROJECTION_WARNING, DriverState, MappingDynamics, remove_total_momentum
from mapdyn.models.tully import SimpleAvoidedCrossing, tully_model

pytestmark = [pytest.mark.filterwarnings("ignore:no coupling vectors:UserWarning"),
              pytest.mark.filterwarnings("ignore:time step does not resolve:UserWarning")]

P_ASE_TO_AU = AMU_IN_ME * units.AUT / units.Bohr  # ASE momentum unit in a.u.


def one_atom(x_bohr: float, p_au: float, mass_au: float) -> ase.Atoms:
    a = ase.Atoms("H", positions=[[x_bohr * units.Bohr, 0.0, 0.0]], masses=[mass_au / AMU_IN_ME])
    a.set_momenta([[p_au / P_ASE_TO_AU, 0.0, 0.0]])
    return a


def drive(model, x0, p0, z_ad, dt, nsteps, options=MethodOptions(window="square"), with_couplings=True, **kw):
    dyn = MappingDynamics(one_atom(x0, p0, model.masses[0]), ModelAdapterBackend(model, with_couplings=with_couplings),
                          dt * units.AUT, 0, options, mapping_variables=(z_ad.real, z_ad.imag), **kw)
    dyn.run(nsteps)
    R = np.array([f["positions_bohr"][0, 0] for f in dyn.frames])
    P = np.array([f["momenta_au"][0, 0] for f in dyn.frames])
    e = np.array([f["actions"] for f in dyn.frames])
    drift = np.array([f["drift_Eh"] for f in dyn.frames])
    return R, P, e, drift, dyn


CASES = {"tully1": dict(k=15.0, time=2000.0), "tully2": dict(k=25.0, time=1400.0)}


def initial_ensemble(model, k, ntraj, options, seed=7):
    ens = gaussian_wavepacket_ensemble(model, ntraj, seed, -8.0, k, 20.0 / k, 0, options)
    _, U = model.adiabatic(ens.R)
    z_ad = np.einsum("nlk,nl->nk", U, ens.x + 1j * ens.p)  # c_ad = Uᵀ c_dia at t = 0
    return ens, z_ad


@pytest.mark.parametrize("name", ["tully1", "tully2"])
def test_agrees_with_diabatic_engine_to_second_order(name):
    """sqc/square/symmetrized, 5 identical trajectories: driver (model adapter, NAC vectors, local
    diabatization) vs run_diabatic; R, P, adiabatic e_k(t) differences O(dt²)."""
    model, case = tully_model(name), CASES[name]
    opts = MethodOptions(window="square")
    ens, z_ad = initial_ensemble(model, case["k"], 5, opts)
    errors = {}
    for dt in (4.0, 2.0):
        n = int(case["time"] / dt)
        ref = run_diabatic(model, ens.copy(), opts, dt, n, record_nuclei=True)
        err = np.zeros(4)
        for j in range(5):
            R, P, e, drift, _ = drive(model, ens.R[j, 0], ens.P[j, 0], z_ad[j], dt, n, opts)
            err = np.maximum(err, [np.abs(R - ref.R[:, j, 0]).max(), np.abs(P - ref.P[:, j, 0]).max(),
                                   np.abs(e - ref.actions_adiabatic[:, j]).max(), np.abs(drift).max()])
        errors[dt] = err
    ratio = errors[4.0] / errors[2.0]
    assert np.all((ratio[:3] > 3.0) & (ratio[:3] < 5.5)), (errors, ratio)
    # regression guard at dt = 2 a.u.: measured R 1.6e-4 Bohr, P 5e-4, e 1.6e-4 (tully2, the larger); ×10 margin
    assert errors[2.0][0] < 2e-3 and errors[2.0][1] < 5e-3 and errors[2.0][2] < 2e-3, errors
    assert errors[2.0][3] < 1e-4 and ratio[3] > 3.0  # MMST energy conserved to O(dt²)


@pytest.mark.parametrize("name", ["tully1", "tully2"])
def test_overlap_only_path_reproduces_coupling_vector_path(name):
    """sqc/square/symmetrized: couplings withheld (σ from overlaps, projected d, extrapolated to the
    force time, one t = 0 probe call) vs coupling vectors; in 1D the projection is exact, so the
    difference is only the O(dt²) extrapolation error."""
    model, case = tully_model(name), CASES[name]
    ens, z_ad = initial_ensemble(model, case["k"], 3, MethodOptions(window="square"), seed=11)
    diffs = {}
    for dt in (4.0, 2.0):
        n = int(case["time"] / dt)
        d = np.zeros(3)
        for j in range(3):
            a = drive(model, ens.R[j, 0], ens.P[j, 0], z_ad[j], dt, n)
            b = drive(model, ens.R[j, 0], ens.P[j, 0], z_ad[j], dt, n, with_couplings=False)
            d = np.maximum(d, [np.abs(a[k] - b[k]).max() for k in range(3)])
            assert b[4].metadata["coupling_source"] == "projected_overlaps"
        diffs[dt] = d
    ratio = diffs[4.0] / diffs[2.0]
    assert np.all((ratio > 3.0) & (ratio < 5.5)), (diffs, ratio)
    assert np.all(diffs[2.0] < [2e-3, 5e-3, 2e-3]), diffs


def test_coupling_vector_propagation_converges_to_diabatic_engine():
    """sqc/triangle/symmetrized, Tully 1, oscillators by exponentiating diag(E) − iV·d (no overlaps
    used): the difference to the diabatic engine falls at second order (dt 2 → 0.5: ≥ 8×, ideal 16×)."""
    model = tully_model("tully1")
    opts = MethodOptions(window="triangle")
    ens, z_ad = initial_ensemble(model, 15.0, 1, opts, seed=5)
    err = {}
    for dt in (2.0, 0.5):
        n = int(1600 / dt)
        ref = run_diabatic(model, ens.copy(), opts, dt, n, record_nuclei=True)
        R, P, e, _, _ = drive(model, ens.R[0, 0], ens.P[0, 0], z_ad[0], dt, n, opts,
                              electronic_propagation="coupling")
        err[dt] = np.array([np.abs(R - ref.R[:, 0, 0]).max(), np.abs(e - ref.actions_adiabatic[:, 0]).max()])
    assert np.all(err[2.0] / err[0.5] > 8.0), err
    assert np.all(err[0.5] < 1e-4), err


def test_ehrenfest_limit_identity():
    """Actions (1, 0) under sqc/square/symmetrized give γ = 0, i.e. exactly the Ehrenfest equations."""
    model = tully_model("tully1")
    rng = np.random.default_rng(4)
    x, p = sample_mapping_variables(rng, 2, 0, MethodOptions(method="ehrenfest"))
    z = x + 1j * p
    a = drive(model, -6.0, 12.0, z, 4.0, 400, MethodOptions(window="square"))
    b = drive(model, -6.0, 12.0, z, 4.0, 400, MethodOptions(method="ehrenfest"))
    for k in range(3):  # rounding of (Σe − 1)/F ~ 1e-16 is the only difference
        np.testing.assert_allclose(a[k], b[k], rtol=0, atol=1e-12)
    assert np.max(a[2][-1]) < 0.99  # the crossing really transferred population


def test_initial_draws_follow_the_trajectory_stream():
    """rng after the nuclear draws → same mapping variables as the model engine's sampler."""
    model, opts = tully_model("tully2"), MethodOptions(window="triangle")
    ens, z_ad = initial_ensemble(model, 20.0, 1, opts, seed=9)
    rng = trajectory_generator(9, 0)
    rng.standard_normal(1)
    rng.standard_normal(1)
    dyn = MappingDynamics(one_atom(ens.R[0, 0], ens.P[0, 0], 2000.0), ModelAdapterBackend(model), 2 * units.AUT,
                          0, opts, rng=rng)
    np.testing.assert_allclose(dyn.state.x + 1j * dyn.state.p, z_ad[0], atol=1e-14)
    assert dyn.state.rng_state == rng.bit_generator.state


def test_fixed_zero_point_is_refused():
    with pytest.raises(ValueError, match="zero_point='fixed' is not allowed on the on-the-fly path"):
        MappingDynamics(one_atom(0, 10, 2000), ModelAdapterBackend(tully_model("tully1")), units.AUT, 0,
                        MethodOptions(zero_point="fixed"), mapping_variables=(np.ones(2), np.zeros(2)))


def test_adjusted_zero_point_conserves_its_energy():
    """sqc/square/adjusted: γ_k = e_k(0) − δ_k0 in the adiabatic basis; energy conserved to O(dt²)."""
    model = tully_model("tully1")
    rng = np.random.default_rng(1)
    x, p = sample_mapping_variables(rng, 2, 0, MethodOptions(zero_point="adjusted"))
    drifts = [np.abs(drive(model, -6.0, 15.0, x + 1j * p, dt, int(1200 / dt), MethodOptions(zero_point="adjusted"))[3]).max()
              for dt in (4.0, 2.0)]
    assert drifts[1] < 2e-5 and 3.0 < drifts[0] / drifts[1] < 5.5, drifts


def test_trivial_crossing_moves_population_diabatically():
    """Uncoupled crossing diabats: starting in adiabatic state 0, after the crossing the trajectory is
    in adiabatic state 1 (same diabat), through the permutation-like overlap."""
    model = SimpleAvoidedCrossing(C=0.0)
    R, P, e, _, dyn = drive(model, -3.0, 20.0, np.array([np.sqrt(2.0), 0.0]), 4.0, 150, MethodOptions(method="ehrenfest"))
    assert R[-1] > 1.0
    np.testing.assert_allclose(e[-1], [0.0, 1.0], atol=1e-12)
    assert sum(f["swap"] for f in dyn.frames) == 1


class TwoModeModel(DiabaticModel):
    """2-state, 2-coordinate model (own definition) for multi-dimensional checks, Eh and Bohr."""

    nstates, ndof = 2, 2

    def __init__(self):
        self.masses = np.array([2000.0, 2000.0])

    def hamiltonian(self, R):
        R = as_positions(R, 2)
        H = np.empty((R.shape[0], 2, 2))
        H[:, 0, 0] = 0.01 * np.tanh(R[:, 0]) + 0.002 * R[:, 1] ** 2
        H[:, 1, 1] = -0.01 * np.tanh(R[:, 0]) + 0.002 * (R[:, 1] - 0.5) ** 2
        H[:, 0, 1] = H[:, 1, 0] = 0.004 * np.exp(-R[:, 0] ** 2) * (1 + 0.5 * R[:, 1])
        return H

    def hamiltonian_gradient(self, R):
        R = as_positions(R, 2)
        G = np.zeros((R.shape[0], 2, 2, 2))
        s = 0.01 / np.cosh(R[:, 0]) ** 2
        g = 0.004 * np.exp(-R[:, 0] ** 2)
        G[:, 0, 0, 0], G[:, 0, 1, 1] = s, -s
        G[:, 1, 0, 0], G[:, 1, 1, 1] = 0.004 * R[:, 1], 0.004 * (R[:, 1] - 0.5)
        G[:, 0, 0, 1] = G[:, 0, 1, 0] = -2 * R[:, 0] * g * (1 + 0.5 * R[:, 1])
        G[:, 1, 0, 1] = G[:, 1, 1, 0] = 0.5 * g
        return G


def two_mode_driver(with_couplings=True, dt=2.0, **kw):
    a = ase.Atoms("H", positions=[[-4.0 * units.Bohr, 0.3 * units.Bohr, 0.0]], masses=[2000.0 / AMU_IN_ME])
    a.set_momenta([[15.0 / P_ASE_TO_AU, 3.0 / P_ASE_TO_AU, 0.0]])
    return MappingDynamics(a, ModelAdapterBackend(TwoModeModel(), with_couplings=with_couplings), dt * units.AUT, 0,
                           MethodOptions(window="square"), mapping_variables=(np.array([1.5, 0.4]), np.array([-0.2, 0.6])), **kw)


def test_projected_path_in_two_dimensions_conserves_energy_and_warns_once():
    """sqc/square/symmetrized in 2D without NAC vectors: the projection keeps the energy exchange
    along V right, so the MMST energy is still conserved to O(dt²); one warning, recorded."""
    drifts = []
    for dt in (4.0, 2.0):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            dyn = two_mode_driver(False, dt=dt)
            dyn.run(int(800 / dt))
        assert sum(PROJECTION_WARNING in str(w.message) for w in caught) == 1
        assert dyn.metadata["warnings"] == [PROJECTION_WARNING]
        drifts.append(max(abs(f["drift_Eh"]) for f in dyn.frames))
    assert drifts[1] < 1e-4 and 3.0 < drifts[0] / drifts[1] < 5.5, drifts


def test_restart_is_bitwise(tmp_path):
    """Stop after n steps, pickle the state, continue in a new driver: identical to an uninterrupted run
    (coupling-vector path and the projected path with its σ history)."""
    for with_couplings in (True, False):
        full = two_mode_driver(with_couplings)
        full.run(40)
        part = two_mode_driver(with_couplings)
        part.run(17)
        blob = pickle.dumps(part.get_state())
        state = pickle.loads(blob)
        assert isinstance(state, DriverState) and state.step == 17
        again = two_mode_driver(with_couplings, restart_state=state)
        again.run(23)
        a, b = full.state, again.state
        for field in ("positions", "momenta", "x", "p", "force"):
            assert np.array_equal(getattr(a, field), getattr(b, field)), field
        assert a.time == b.time and a.step == b.step == 40
        assert np.array_equal(full.frames[-1]["energies_Eh"], again.frames[-1]["energies_Eh"])
        assert len(again.frames) == 23
    with pytest.raises(ValueError, match="different settings"):
        two_mode_driver(True, dt=1.0, restart_state=state)


def test_drift_monitor_flags_and_stops():
    dyn = two_mode_driver(True, dt=8.0, drift_threshold=1e-9, stop_on_drift=True)
    done = dyn.run(50)
    flag = dyn.metadata["drift_flag"]
    assert not done and dyn.metadata["stopped"] and flag["step"] == dyn.state.step < 50
    assert abs(flag["drift_Eh"]) > 1e-9 and "energy drift" in dyn.metadata["stop_reason"]
    dyn = two_mode_driver(True, dt=8.0, drift_threshold=1e-9)
    assert dyn.run(20) and dyn.metadata["drift_flag"]["step"] >= 1 and dyn.state.step == 20


def test_frames_extxyz_observers_and_units(tmp_path):
    path = tmp_path / "traj.extxyz"
    dyn = two_mode_driver(True, record_interval=5, geometry_file=str(path))
    calls = []
    dyn.attach(lambda: calls.append(dyn.nsteps), interval=10)
    dyn.run(30)
    assert calls == [0, 10, 20, 30]
    assert [f["step"] for f in dyn.frames] == [0, 5, 10, 15, 20, 25, 30]
    images = ase.io.read(str(path), ":")
    assert len(images) == 7 and not os.path.exists(str(path) + ".tmp")
    last, frame = images[-1], dyn.frames[-1]
    np.testing.assert_allclose(last.positions / units.Bohr, frame["positions_bohr"], atol=1e-7)  # 8 decimals in Å
    np.testing.assert_allclose(last.info["energies_Eh"], frame["energies_Eh"], rtol=1e-12)
    np.testing.assert_allclose(last.info["time_fs"], 30 * 2.0 * units.AUT / units.fs, rtol=1e-12)
    # atoms carry the driver state in ASE units, with the mapping potential in eV
    np.testing.assert_allclose(dyn.atoms.get_momenta() * P_ASE_TO_AU, dyn.state.momenta, rtol=1e-12)
    np.testing.assert_allclose(dyn.atoms.get_potential_energy() / units.Hartree, frame["potential_energy_Eh"], rtol=1e-12)
    np.testing.assert_allclose(dyn.get_time() / units.AUT, 60.0, rtol=1e-12)
    assert frame["coupling_norms"].shape == (2, 2) and frame["window"] in (-1, 0, 1)


def test_geometry_file_input_and_zero_momenta(tmp_path):
    rng = np.random.default_rng(8)
    R = rng.normal(size=(4, 3))
    P = rng.normal(size=(4, 3))
    m = np.array([12.0, 1.0, 1.0, 16.0])
    Q = remove_total_momentum(R, P, m)
    np.testing.assert_allclose(Q.sum(axis=0), 0, atol=1e-13)
    com = (m[:, None] * R).sum(0) / m.sum()
    np.testing.assert_allclose(np.cross(R - com, Q).sum(axis=0), 0, atol=1e-12)

    def flat(positions_bohr, need_gradients=True):  # two uncoupled flat states: a free molecule
        return {"energies": [0.0, 0.1], "gradients": np.zeros((2, 3, 3)), "couplings": np.zeros((2, 2, 3, 3))}

    atoms = ase.Atoms("OH2", positions=[[0, 0, 0], [0, 0.76, 0.59], [0, -0.76, 0.59]])
    atoms.set_momenta(rng.normal(size=(3, 3)))
    path = tmp_path / "water.xyz"
    ase.io.write(str(path), atoms, format="extxyz")
    dyn = MappingDynamics(str(path), CallbackBackend(flat, 2, 3), 0.5 * units.fs, 1, MethodOptions(window="square"),
                          rng=np.random.default_rng(0), zero_linear_momentum=True, zero_angular_momentum=True)
    P0 = dyn.state.momenta
    np.testing.assert_allclose(P0.sum(axis=0), 0, atol=1e-12)
    np.testing.assert_allclose(dyn.masses_au / AMU_IN_ME, atoms.get_masses(), rtol=1e-14)
    dyn.run(10)  # free flight: momenta unchanged, energy exact
    np.testing.assert_allclose(dyn.state.momenta, P0, atol=1e-14)
    assert abs(dyn.frames[-1]["drift_Eh"]) < 1e-14


def test_backend_failure_stops_or_raises():
    model = tully_model("tully1")
    adapter = ModelAdapterBackend(model)

    def sometimes(positions_bohr, need_gradients=True):
        if positions_bohr[0, 0] > -5.9:
            raise RuntimeError("no convergence")
        r = adapter.compute(positions_bohr)
        return {"energies": r.energies, "gradients": r.gradients, "couplings": r.couplings}

    def make(mode):
        return MappingDynamics(one_atom(-6.0, 20.0, 2000.0), CallbackBackend(sometimes, 2, 1), 4 * units.AUT, 0,
                               MethodOptions(window="square"), mapping_variables=(np.array([1.5, 0.3]), np.zeros(2)),
                               on_backend_error=mode)

    dyn = make("stop")
    assert not dyn.run(100)
    assert dyn.metadata["stopped"] and "no convergence" in dyn.metadata["stop_reason"] and 0 < dyn.state.step < 100
    with pytest.raises(BackendError):
        make("raise").run(100)


def test_backend_without_couplings_or_overlaps_is_refused():
    def bare(positions_bohr, need_gradients=True):
        return {"energies": [0.0, 0.1], "gradients": np.zeros((2, 1, 3))}

    with pytest.raises(ValueError, match="neither coupling vectors nor overlaps"):
        MappingDynamics(one_atom(0.0, 10.0, 2000.0), CallbackBackend(bare, 2, 1), units.AUT, 0, MethodOptions(window="square"),
                        mapping_variables=(np.ones(2), np.zeros(2)))


def test_bad_settings_name_the_parameter():
    backend = ModelAdapterBackend(tully_model("tully1"))
    base = dict(mapping_variables=(np.ones(2), np.zeros(2)))
    for kw, msg in ((dict(electronic_propagation="magnus"), "electronic_propagation"),
                    (dict(substeps=0), "substeps"), (dict(drift_threshold=-1.0), "drift_threshold"),
                    (dict(on_backend_error="retry"), "on_backend_error")):
        with pytest.raises(ValueError, match=msg):
            MappingDynamics(one_atom(0.0, 10.0, 2000.0), backend, units.AUT, 0, MethodOptions(window="square"), **base, **kw)
    with pytest.raises(ValueError, match="initial_state"):
        MappingDynamics(one_atom(0.0, 10.0, 2000.0), backend, units.AUT, 2, MethodOptions(window="square"), **base)
    with pytest.raises(ValueError, match="rng"):
        MappingDynamics(one_atom(0.0, 10.0, 2000.0), backend, units.AUT, 0, MethodOptions(window="square"))


class WideGapModel(DiabaticModel):
    """2-state, 1D model (own definition): constant diabatic gap 0.3 Eh, Gaussian coupling
    0.05 exp(−R²) Eh, flat diabats; mass 2000 electron masses.  The adiabatic gap stays 0.30–0.32 Eh."""

    nstates, ndof = 2, 1

    def __init__(self, gap: float = 0.3, coupling: float = 0.05):
        self.masses = np.array([2000.0])
        self.gap, self.coupling = gap, coupling

    def hamiltonian(self, R):
        R = as_positions(R, 1)
        H = np.zeros((R.shape[0], 2, 2))
        H[:, 1, 1] = self.gap
        H[:, 0, 1] = H[:, 1, 0] = self.coupling * np.exp(-R[:, 0] ** 2)
        return H

    def hamiltonian_gradient(self, R):
        R = as_positions(R, 1)
        G = np.zeros((R.shape[0], 1, 2, 2))
        G[:, 0, 0, 1] = G[:, 0, 1, 0] = -2 * R[:, 0] * self.coupling * np.exp(-R[:, 0] ** 2)
        return G


def test_force_averaging_conserves_energy_when_the_step_does_not_resolve_the_gap():
    """sqc/square/symmetrized from state 1, 3 trajectories (seed 2) through the coupling region of
    WideGapModel with Δt = 20 a.u., i.e. ΔE·Δt ≈ 6 rad ≈ one electronic period per step.  Kicks at
    ρ(t) sample the coherence force at a nearly fixed phase: measured max |drift| 3.4–4.4e-2 Eh;
    with ρ averaged over the adjacent electronic half steps 2.2–4.8e-3 Eh.  Thresholds: old > 2e-2
    (the failure is real), new < 1e-2 Eh and ≥ 5× smaller than old on every trajectory.  At
    Δt = 2 a.u. (resolved gap) both are small and the gap warning is not issued."""
    model = WideGapModel()
    rng = np.random.default_rng(2)
    for _ in range(3):
        x, p = sample_mapping_variables(rng, 2, 1, MethodOptions(window="square"))
        old = drive(model, -4.0, 20.0, x + 1j * p, 20.0, 40, force_averaging=False)
        new = drive(model, -4.0, 20.0, x + 1j * p, 20.0, 40)
        d_old, d_new = np.abs(old[3]).max(), np.abs(new[3]).max()
        assert d_old > 2e-2 and d_new < 1e-2 and d_new < d_old / 5, (d_old, d_new)
        assert new[0][-1] > 3.5  # went through the coupling region
        for dyn in (old[4], new[4]):
            gap_warnings = [w for w in dyn.metadata["warnings"] if w.startswith(GAP_WARNING)]
            assert len(gap_warnings) == 1 and "ΔE·Δt = 6.0" in gap_warnings[0], dyn.metadata["warnings"]
        assert new[4].metadata["force_averaging"] is True and old[4].metadata["force_averaging"] is False
    fine = drive(model, -4.0, 20.0, x + 1j * p, 2.0, 400)
    assert np.abs(fine[3]).max() < 2e-5 and fine[4].metadata["warnings"] == []  # measured 5.7e-6 Eh


def test_time_reversal_returns_to_the_start():
    """R, P → R, −P and z → z* after 20 steps, 20 more steps: back at the start to rounding (1e-12),
    with and without force averaging (both schemes are symmetric in time), WideGapModel, Δt = 20."""
    model = WideGapModel()
    x, p = sample_mapping_variables(np.random.default_rng(2), 2, 1, MethodOptions(window="square"))
    for averaging in (False, True):
        st = drive(model, -2.0, 20.0, x + 1j * p, 20.0, 20, force_averaging=averaging)[4].state
        back = drive(model, st.positions[0, 0], -st.momenta[0, 0], st.x - 1j * st.p, 20.0, 20,
                     force_averaging=averaging)[4].state
        assert abs(back.positions[0, 0] + 2.0) < 1e-12 and abs(back.momenta[0, 0] + 20.0) < 1e-12
        np.testing.assert_allclose(back.x, x, atol=1e-12)
        np.testing.assert_allclose(back.p, -p, atol=1e-12)


def test_averaged_density_limits():
    """ρ̄ → ρ as the window → 0; diagonal unchanged; for a window of one gap period (ΔE·h = 2π) the
    coherences average to zero (sinc(π) = 0)."""
    dyn = drive(WideGapModel(), -4.0, 20.0, np.array([1.2 + 0.3j, -0.4 + 0.9j]), 20.0, 0)[4]
    x, p, E = np.array([1.2, -0.4]), np.array([0.3, 0.9]), np.array([0.0, 0.3])
    rho = dyn.density(x, p, None)
    np.testing.assert_allclose(dyn.averaged_density(x, p, None, E, 1e-9), rho, atol=1e-12)
    full = dyn.averaged_density(x, p, None, E, 2 * np.pi / 0.3)
    np.testing.assert_allclose(np.diag(full), np.diag(rho), atol=1e-15)
    assert abs(full[0, 1]) < 1e-15 and full[0, 1] == full[1, 0]
    with pytest.raises(ValueError, match="force_averaging"):
        drive(WideGapModel(), -4.0, 20.0, np.array([1.0, 0.0]), 20.0, 0, force_averaging="yes")


class _JumpAt:
    """Model adapter whose result at call ``at`` carries the diagnostics of a jump between
    electronic solutions (an orbital left the active space, state overlap 0.07, as measured for
    CH2NH2+ SA2-CASSCF(2,2)/STO-3G at C–N 3.2 Å); energies and forces are untouched."""

    def __init__(self, model, at: int, active_change: bool = True):
        self.inner = ModelAdapterBackend(model)
        self.nstates, self.calls, self.at, self.active_change = self.inner.nstates, 0, at, active_change

    def compute(self, positions_bohr, guess=None, need_gradients=True):
        result = self.inner.compute(positions_bohr, guess=guess, need_gradients=need_gradients)
        self.calls += 1
        if self.calls == self.at:
            result.diagnostics = {**result.diagnostics, "min_overlap": 0.07, "active_overlap_min_singular": 0.06,
                                  "active_space_change": self.active_change}
        return result


def test_jump_between_electronic_solutions_stops_the_trajectory():
    """A step onto another electronic solution is not taken: with on_backend_error="stop" the
    trajectory stops before it with the reason recorded, with "raise" a BackendError names it.  A low
    state overlap with continuous orbitals (a passage through an intersection) is integrated."""
    z = np.array([0.3 + 0.1j, 1.2 - 0.2j])
    mk = lambda backend, mode: MappingDynamics(one_atom(-4.0, 20.0, 2000.0), backend, 2.0 * units.AUT, 1,
                                               MethodOptions(), mapping_variables=(z.real, z.imag),
                                               on_backend_error=mode)
    dyn = mk(_JumpAt(WideGapModel(), at=6), "stop")  # call 1 is t = 0, call 6 is step 5
    assert dyn.run(10) is False
    assert dyn.state.step == 4 and dyn.state.stopped
    assert "electronic structure discontinuous" in dyn.state.stop_reason and "step 5" in dyn.state.stop_reason
    with pytest.raises(BackendError, match="discontinuous"):
        mk(_JumpAt(WideGapModel(), at=6), "raise").run(10)
    assert mk(_JumpAt(WideGapModel(), at=6, active_change=False), "stop").run(10) is True


# ---------------------------------------------------------------------------------------- SA-CASSCF
def lih_casscf_run(dt_fs: float, nsteps: int) -> MappingDynamics:
    """LiH, SA-CASSCF(2,2)/STO-3G over 2 singlets, sqc/square/symmetrized, started in S1 from 1.6 Å
    with 300 K-like random momenta (trajectory 0 of seed 3), total momenta removed."""
    pytest.importorskip("pyscf")
    from mapdyn.backends.pyscf.casscf import CASSCFBackend

    rng = trajectory_generator(3, 0)
    atoms = ase.Atoms("LiH", positions=[[0, 0, 0], [0, 0, 1.6]])
    atoms.set_momenta(rng.normal(size=(2, 3)) * np.sqrt(atoms.get_masses()[:, None] * units.kB * 300.0))
    backend = CASSCFBackend(["Li", "H"], basis="sto-3g", ncas=2, nelecas=2, nstates=2)
    dyn = MappingDynamics(atoms, backend, dt_fs * units.fs, 1, MethodOptions(window="square"), rng=rng,
                          zero_linear_momentum=True, zero_angular_momentum=True)
    dyn.run(nsteps)
    return dyn


def test_casscf_energy_conservation():
    """40 steps of 0.5 fs (20 fs; S0–S1 gap ≈ 0.13 Eh, ΔE·Δt ≈ 2.6 rad): measured max |E(t) − E(0)|
    = 1.5e-5 Eh with force averaging (1.5e-4 Eh with kicks at ρ(t), force_averaging=False), far
    above the ~1e-7 Eh solver noise.  Threshold 5e-5 Eh (3× the measured value); ~8 s."""
    dyn = lih_casscf_run(0.5, 40)
    drift = np.array([f["drift_Eh"] for f in dyn.frames])
    assert dyn.state.step == 40 and np.abs(drift).max() < 5e-5, np.abs(drift).max()
    assert dyn.metadata["coupling_source"] == "vectors"
    assert all(f["min_overlap"] > 0.9 for f in dyn.frames[1:])  # states tracked smoothly
    assert sum(w.startswith(GAP_WARNING) for w in dyn.metadata["warnings"]) == 1


@pytest.mark.slow
def test_casscf_drift_is_second_order_in_the_step():
    d = [max(abs(f["drift_Eh"]) for f in lih_casscf_run(dt, int(50 / dt)).frames) for dt in (0.5, 0.25)]
    assert 3.0 < d[0] / d[1] < 5.5, d


def test_tda_no_nac_path_conserves_energy():
    """LiH CIS (TDA on RHF)/STO-3G, S0–S2 mapped, sqc/square/symmetrized from S1, no NAC vectors:
    overlaps, projected couplings, t = 0 probe.  30 fs at 0.5 fs: measured max drift 7.9e-5 Eh with
    force averaging (2.9e-4 Eh with plain kicks, 8.0e-5 Eh plain at 0.25 fs); threshold 2.5e-4 Eh."""
    pytest.importorskip("pyscf")
    from mapdyn.backends.pyscf.tddft import TDDFTBackend

    rng = trajectory_generator(3, 0)
    atoms = ase.Atoms("LiH", positions=[[0, 0, 0], [0, 0, 1.6]])
    atoms.set_momenta(rng.normal(size=(2, 3)) * np.sqrt(atoms.get_masses()[:, None] * units.kB * 300.0))
    backend = TDDFTBackend(["Li", "H"], basis="sto-3g", xc=None, method="tda", nstates=3)
    dyn = MappingDynamics(atoms, backend, 0.5 * units.fs, 1, MethodOptions(window="square"), rng=rng,
                          zero_linear_momentum=True, zero_angular_momentum=True)
    dyn.run(60)
    assert dyn.metadata["coupling_source"] == "projected_overlaps" and dyn.metadata["warnings"][0] == PROJECTION_WARNING
    assert max(abs(f["drift_Eh"]) for f in dyn.frames) < 2.5e-4
    assert dyn.timings["backend_calls"] == 62  # initial call, the t = 0 probe, one per step
