"""Analysis estimators, bootstrap bands, lifetime fits, observables, products, energy, report files."""

from __future__ import annotations

import os

import numpy as np
import pytest

import mapdyn.analysis as A
import mapdyn.study.analysis_settings as SS
import mapdyn.study.analyze as SA
from mapdyn.analysis import report as R
from mapdyn.core.options import SQUARE_GAMMA, MethodOptions

SQC = MethodOptions(window="square")
TRI = MethodOptions(window="triangle")
EHR = MethodOptions(method="ehrenfest")
G = SQUARE_GAMMA


def square_actions(assign: np.ndarray, F: int = 2) -> np.ndarray:
    """Actions at the centre of the square window of the assigned state (−1 → in no window)."""
    assign = np.asarray(assign)
    e = np.full(assign.shape + (F,), G)
    for f in range(F):
        e[assign == f, f] = 1.0 + G
    e[assign == -1] = 0.5          # e = (½, ½, …) is inside no square window (common practice check below)
    return e


def test_square_actions_helper_is_consistent_with_windows():
    from mapdyn.core.windows import window_assignment
    a = np.array([0, 1, -1, 2])
    assert np.array_equal(window_assignment(square_actions(a, 3), SQC), a)


def make_set(assign: np.ndarray, options=SQC, **kw) -> A.TrajectorySet:
    n, T = assign.shape
    e = square_actions(assign)
    return A.TrajectorySet(times=np.arange(T) * 10.0, actions=e, options=options,
                           initial_states=kw.pop("initial_states", np.ones(n, dtype=int)), **kw)


# --- estimators on synthetic actions with known answers -----------------------------------------------
def test_sqc_populations_windowed_normalisation_and_no_window_counts():
    # 6 trajectories, 3 times: counts chosen by hand
    assign = np.array([[1, 1, 0],
                       [1, 0, 0],
                       [1, -1, -1],
                       [1, 1, 1],
                       [1, 0, -1],
                       [1, 1, 0]])
    ts = make_set(assign)
    p = A.populations(ts, n_resamples=199)
    # t1: N0 = 2, N1 = 3, none = 1 → P = (2/5, 3/5); t2: N0 = 3, N1 = 1, none = 2 → (3/4, 1/4)
    np.testing.assert_allclose(p.populations, [[0, 1], [2 / 5, 3 / 5], [3 / 4, 1 / 4]], rtol=0, atol=1e-15)
    assert p.n_none.tolist() == [0, 1, 2]
    assert p.n_frames.tolist() == [6, 6, 6]
    assert np.all(p.low <= p.populations + 1e-15) and np.all(p.high >= p.populations - 1e-15)
    # t = 0: every resample gives P = (0, 1); the band is the exact interval of 0 and 6 of 6
    # (reference: scipy.stats.binomtest, Clopper–Pearson)
    from scipy.stats import binomtest
    ci = binomtest(6, 6).proportion_ci(method="exact")
    np.testing.assert_allclose(p.low[0], [0.0, ci.low], atol=1e-12)
    np.testing.assert_allclose(p.high[0], [1.0 - ci.low, 1.0], atol=1e-12)
    # agrees with the core estimator time by time
    from mapdyn.core.populations import ensemble_populations
    for t in range(3):
        pops, none = ensemble_populations(ts.actions[:, t], SQC)
        np.testing.assert_allclose(p.populations[t], pops, atol=1e-15)
        assert none == p.n_none[t]


def test_missing_frames_are_left_out_of_each_time_point():
    assign = np.array([[1, 0, 0], [1, 1, 1], [1, 1, 0]])
    ts = make_set(assign)
    ts.actions[2, 2] = np.nan                      # trajectory 2 stopped after frame 1
    ts.actions[0, 1:] = np.nan                     # trajectory 0 stopped after frame 0
    p = A.populations(ts, bootstrap=False)
    assert p.n_frames.tolist() == [3, 2, 1]
    np.testing.assert_allclose(p.populations[1], [0, 1])
    np.testing.assert_allclose(p.populations[2], [0, 1])
    assert ts.last_frame.tolist() == [0, 2, 1]


def test_triangle_windows_known_answer():
    # triangle windows (F = 2): state 0 ⇔ e0 ≥ 1, e1 ≥ 0, e0 + e1 ≤ 2
    e = np.array([[[1.2, 0.3], [0.3, 1.2]],
                  [[1.5, 0.2], [1.1, 1.1]],       # (1.1, 1.1): in no triangle window
                  [[1.1, 0.5], [1.0, 0.4]]])
    ts = A.TrajectorySet(times=[0.0, 5.0], actions=e, options=TRI, initial_states=[0, 0, 0])
    p = A.populations(ts, bootstrap=False)
    np.testing.assert_allclose(p.populations, [[1, 0], [1 / 2, 1 / 2]])
    assert p.n_none.tolist() == [0, 1]


def test_ehrenfest_populations_are_action_ratios():
    rng = np.random.default_rng(3)
    e = rng.random((50, 4, 3))
    ts = A.TrajectorySet(times=np.arange(4.0), actions=e, options=EHR, initial_states=np.zeros(50, int))
    p = A.populations(ts, n_resamples=99)
    expected = e.sum(axis=0) / e.sum(axis=(0, 2))[:, None]
    np.testing.assert_allclose(p.populations, expected, rtol=1e-13)
    assert np.all(p.n_none == 0)
    init = A.initial_state_population(ts, bootstrap=False)
    np.testing.assert_allclose(init.populations[:, 0], expected[:, 0], rtol=1e-13)


def test_initial_state_population_follows_each_trajectorys_own_state():
    assign = np.array([[0, 0, 1], [1, 1, 1], [1, 0, 0], [0, 1, 1]])
    ts = make_set(assign, initial_states=np.array([0, 1, 1, 0]))
    init = A.initial_state_population(ts, bootstrap=False)
    # t1: traj0 in 0 (own 0) yes, traj1 yes, traj2 no, traj3 no → 2/4; t2: no, yes, no, no → 1/4
    np.testing.assert_allclose(init.populations[:, 0], [1.0, 0.5, 0.25])


def test_from_diabatic_run_matches_core_populations():
    from mapdyn.core.propagators import run_diabatic
    from mapdyn.core.sampling import gaussian_wavepacket_ensemble
    from mapdyn.models.tully import tully_model

    model = tully_model("tully1")
    state = gaussian_wavepacket_ensemble(model, 64, 7, position=-5.0, momentum=15.0, position_width=1.0,
                                         initial_state=0, options=SQC)
    run = run_diabatic(model, state, SQC, dt=5.0, nsteps=200, record_every=20, record_nuclei=True)
    ts = A.from_diabatic_run(run)
    assert ts.actions.shape == (64, run.times.size, 2) and ts.coordinates.shape == (64, run.times.size, 1)
    assert np.all(ts.initial_states == 0)
    p = A.populations(ts, bootstrap=False)
    ref, none = run.populations("adiabatic")
    np.testing.assert_allclose(p.populations, ref, atol=1e-15, equal_nan=True)
    assert np.array_equal(p.n_none, none)


# --- bootstrap coverage on a binomial case ---------------------------------------------------------
def test_bootstrap_interval_coverage_binomial():
    """95 % intervals for a binomial fraction (p = 0.3, n = 150) cover the truth in 95 % of
    repetitions; with M = 300 repetitions the coverage standard error is √(0.95·0.05/300) = 0.0126,
    and we accept nominal ± 3 SE (fixed seed)."""
    rng = np.random.default_rng(2024)
    p_true, n, M = 0.3, 150, 300
    hits = 0
    for m in range(M):
        x = (rng.random(n) < p_true).astype(float)[:, None]
        est, lo, hi, se = A.bootstrap_ratio(x, np.ones((n, 1)), confidence_level=0.95, n_resamples=499, seed=m)
        hits += lo[0] <= p_true <= hi[0]
        if m == 0:
            # bootstrap SE close to the binomial SE √(p(1−p)/n) (Efron & Tibshirani 1993: SE of a mean)
            assert abs(se[0] - np.sqrt(est[0] * (1 - est[0]) / n)) < 0.15 * se[0]
    coverage = hits / M
    sem = np.sqrt(0.95 * 0.05 / M)
    assert abs(coverage - 0.95) <= 3 * sem, coverage


# --- lifetimes ----------------------------------------------------------------------------------------
def test_lifetime_fit_recovers_time_constant_from_noisy_decay():
    """P(t) = exp(−(t − t_d)/τ) for t > t_d plus Gaussian noise σ = 0.01 (fixed seed)."""
    rng = np.random.default_rng(11)
    tau, td = 400.0, 150.0
    t = np.linspace(0.0, 2000.0, 121)
    clean = np.where(t > td, np.exp(-(t - td) / tau), 1.0)
    y = clean + 0.01 * rng.standard_normal(t.size)
    y[0] = 1.0
    res = A.fit_lifetimes(t, y, np.full(t.size, 0.01), delay=True, asymptote=True)
    assert res.preferred == "mono", res.reasons
    fit = res.fits["mono"]
    assert abs(fit.parameters["tau"] - tau) < 3 * fit.uncertainties["tau"]
    assert abs(fit.parameters["delay"] - td) < 3 * fit.uncertainties["delay"]
    assert res.lifetime == fit.parameters["tau"]
    assert 0.5 < fit.diagnostics["reduced_chi2"] < 1.5       # noise level was given correctly


def test_lifetime_from_trajectory_ensemble_end_to_end():
    """Survival times t_d + Exp(τ) for 800 trajectories → SQC window populations → bootstrap SE →
    fit; τ recovered within 3σ (fixed seed)."""
    rng = np.random.default_rng(5)
    n, tau, td = 800, 300.0, 100.0
    times = np.arange(0.0, 1500.0 + 1e-9, 15.0)
    hop = td + rng.exponential(tau, n)
    assign = np.where(times[None, :] < hop[:, None], 1, 0)
    ts = make_set(assign)
    ts.times = times
    res = A.analyze(ts, n_resamples=299, lifetime_resamples=40)
    life = res.lifetimes
    assert life.preferred == "mono", life.reasons
    tau_fit, err = life.fits["mono"].parameters["tau"], life.fits["mono"].uncertainties["tau"]
    assert abs(tau_fit - tau) < 3 * err, (tau_fit, err)


def test_biexponential_preferred_when_data_have_two_time_constants():
    rng = np.random.default_rng(8)
    t = np.linspace(0.0, 3000.0, 151)
    y = 0.6 * np.exp(-t / 60.0) + 0.4 * np.exp(-t / 900.0) + 0.005 * rng.standard_normal(t.size)
    res = A.fit_lifetimes(t, y, np.full(t.size, 0.005), delay=False, asymptote=False)
    assert res.preferred == "bi", res.fits["bi"].reasons
    f = res.fits["bi"]
    for name, true in (("tau1", 60.0), ("tau2", 900.0), ("a", 0.6)):
        assert abs(f.parameters[name] - true) < 3 * f.uncertainties[name], name


def test_no_lifetime_without_decay():
    rng = np.random.default_rng(1)
    t = np.linspace(0, 1000, 51)
    y = 1.0 - 0.01 * rng.random(t.size)
    y[0] = 1.0
    res = A.fit_lifetimes(t, y, np.full(t.size, 0.01))
    assert res.lifetime is None and res.preferred is None
    assert any("no measurable decay" in r for r in res.reasons)


def test_no_lifetime_when_decay_far_slower_than_window():
    t = np.linspace(0, 100, 51)
    y = np.exp(-t / 2000.0)                       # drops by 5 %: τ not determined by 100 a.u. of data
    res = A.fit_lifetimes(t, y, np.full(t.size, 0.02), delay=False)
    assert res.lifetime is None


# --- geometric observables, first entry, products --------------------------------------------------
def random_molecule_set(n=5, T=4, N=4, seed=0, assign=None):
    rng = np.random.default_rng(seed)
    pos = rng.normal(scale=2.0, size=(n, T, N, 3))
    if assign is None:
        assign = np.ones((n, T), dtype=int)
    return A.TrajectorySet(times=np.arange(T) * 41.34, actions=square_actions(assign), options=SQC,
                           initial_states=np.ones(n, int), positions=pos, momenta=rng.normal(size=pos.shape),
                           symbols=("C", "O", "H", "H")[:N])


def test_geometric_observables_match_ase_atoms_methods():
    from ase import Atoms
    from ase.units import Bohr

    ts = random_molecule_set()
    specs = ["distance 0 1", ("angle", 0, 1, 2), {"kind": "dihedral", "atoms": [0, 1, 2, 3]}]
    for spec in specs:
        obs = A.GeometricObservable.from_spec(spec)
        vals = obs.values(ts.positions)
        for j in range(ts.ntraj):
            for t in range(ts.times.size):
                atoms = Atoms("COHH", positions=ts.positions[j, t] * Bohr)
                ref = {"distance": lambda: atoms.get_distance(0, 1), "angle": lambda: atoms.get_angle(0, 1, 2),  # noqa: B023
                       "dihedral": lambda: atoms.get_dihedral(0, 1, 2, 3)}[obs.kind]()  # noqa: B023
                if obs.kind == "dihedral":   # ASE gives 0–360°, mapdyn folds into (−180°, 180°]
                    assert -180.0 < vals[j, t] <= 180.0
                    ref = ref - 360.0 if ref > 180.0 else ref
                assert vals[j, t] == pytest.approx(ref, rel=1e-10, abs=1e-9)   # reference library: ASE
        series = A.observable_series(ts, obs)
        if obs.kind == "dihedral":   # reference library: scipy.stats circular statistics
            from scipy.stats import circmean, circstd
            ref_mean = np.degrees(circmean(np.radians(vals), axis=0, high=np.pi, low=-np.pi))
            np.testing.assert_allclose(np.cos(np.radians(series.mean - ref_mean)), 1.0, atol=1e-12)
            np.testing.assert_allclose(series.std, np.degrees(circstd(np.radians(vals), axis=0)), rtol=1e-10)
            continue
        np.testing.assert_allclose(series.mean, vals.mean(axis=0), rtol=1e-12)
        np.testing.assert_allclose(series.std, vals.std(axis=0, ddof=1), rtol=1e-12)


def test_observable_bad_specs_raise():
    with pytest.raises(ValueError, match="kind"):
        A.GeometricObservable("torsion", (0, 1, 2, 3))
    with pytest.raises(ValueError, match="atoms"):
        A.GeometricObservable("angle", (0, 1))
    with pytest.raises(ValueError, match="key"):
        A.GeometricObservable.from_spec({"kind": "distance", "atom": [0, 1]})


def test_value_at_first_entry_into_state():
    assign = np.array([[1, 1, 0, 0], [1, 0, 1, 0], [1, 1, 1, 1], [0, 0, 1, 0]])
    ts = random_molecule_set(n=4, assign=assign)
    ent = A.values_at_first_entry(ts, 0, "distance 0 1")
    d = A.GeometricObservable("distance", (0, 1)).values(ts.positions)
    assert ent.times[0] == ts.times[2] and ent.values[0] == d[0, 2]
    assert ent.times[1] == ts.times[1] and ent.values[1] == d[1, 1]
    assert np.isnan(ent.times[2]) and np.isnan(ent.values[2])
    # trajectory 3 starts in state 0; it "enters" when it comes back at frame 3
    assert ent.times[3] == ts.times[3] and ent.values[3] == d[3, 3]


def test_product_branching_from_distance_rules():
    rng = np.random.default_rng(4)
    n, k = 40, 13
    ts = random_molecule_set(n=n, T=2, N=2, seed=4)
    ts.positions[:] = 0.0
    sep = np.where(np.arange(n) < k, 6.0, 2.2)          # Bohr
    ts.positions[:, -1, 1, 2] = sep
    ts.status = ("finished",) * (n - 1) + ("failed",)
    rules = {"dissociated": [{"distance": [0, 1], "above": 2.0}], "bound": [{"distance": [0, 1], "below": 2.0}]}
    br = A.classify_products(ts, rules, n_resamples=299)
    assert br.n_classified == n - 1 and br.excluded == [(n - 1, "failed")]
    idx = br.labels.index("dissociated")
    assert br.counts[idx] == k and br.ratios[idx] == pytest.approx(k / (n - 1), abs=1e-15)
    assert br.low[idx] < k / (n - 1) < br.high[idx]
    assert br.ratios.sum() == pytest.approx(1.0)
    del rng


# --- energy and flags ---------------------------------------------------------------------------------
def test_energy_report_and_flags():
    ts = random_molecule_set(n=3, T=5)
    t = ts.times
    ts.energies = np.array([np.full(5, -1.0),
                            -1.0 + 1e-4 * t / t[-1],
                            -1.0 + np.array([0, 3e-3, -1e-3, 0, 5e-4])])
    ts.status = ("finished", "finished", "failed")
    ts.reasons = ("", "", "backend: SCF did not converge")
    rep = A.energy_report(ts, tolerance=1e-3)
    np.testing.assert_allclose(rep.drift, [0.0, 1e-4, 5e-4], atol=1e-15)
    np.testing.assert_allclose(rep.max_deviation, [0.0, 1e-4, 3e-3], atol=1e-15)
    np.testing.assert_allclose(rep.drift_rate[1], 1e-4 / t[-1], rtol=1e-8)
    assert rep.flagged.tolist() == [False, False, True] and rep.ensemble["n_flagged"] == 1
    flags = A.flagged_trajectories(ts, rep)
    assert [f.index for f in flags] == [2]
    assert "SCF" in flags[0].reasons[0] and "energy deviation" in flags[0].reasons[1]
    with pytest.raises(ValueError, match="tolerance"):
        A.energy_report(ts, tolerance=-1.0)


def test_trajectory_set_validation():
    with pytest.raises(ValueError, match="actions"):
        A.TrajectorySet(times=np.arange(3.0), actions=np.zeros((2, 4, 2)), options=SQC, initial_states=[0, 0])
    with pytest.raises(ValueError, match="status"):
        A.TrajectorySet(times=np.arange(3.0), actions=np.zeros((2, 3, 2)), options=SQC, initial_states=[0, 0],
                        status=("finished", "exploded"))
    with pytest.raises(ValueError, match="confidence_level"):
        A.bootstrap_ratio(np.ones((4, 1)), np.ones((4, 1)), confidence_level=95)


# --- report folder ------------------------------------------------------------------------------------
def synthetic_molecular_set(seed=0):
    """A 3-atom set: atoms 0–1 a bound diatomic on a Morse curve, atom 2 leaves; SQC decay 1 → 0."""
    from mapdyn.analysis.vibrational import MorseCurve
    rng = np.random.default_rng(seed)
    n, T = 60, 41
    times = np.linspace(0.0, 4000.0, T)
    hop = 400.0 + rng.exponential(800.0, n)
    assign = np.where(times[None, :] < hop[:, None], 1, 0)
    assign[:5, 20:] = -1
    pos = np.zeros((n, T, 3, 3))
    mom = np.zeros_like(pos)
    morse = MorseCurve(0.17, 1.0, 1.4)
    m_h = 1837.0
    mu = m_h / 2
    for j in range(n):
        v = rng.integers(0, 3)
        E = morse.energy_of(v, mu)
        s = np.sqrt(E / morse.D)
        r = rng.uniform(morse.r_e - np.log1p(s) / morse.a, morse.r_e - np.log1p(-s) / morse.a)
        pr = np.sqrt(max(2 * mu * (E - morse(r)), 0.0))
        pos[j, :, 1, 2] = r
        mom[j, :, 1, 2] = pr            # centre-of-mass frame: P_b = −P_a = p_r
        mom[j, :, 0, 2] = -pr
        pos[j, :, 2, 0] = 3.0 + times * (0.002 if j % 3 else 0.0)
    energies = -1.0 + 1e-5 * rng.standard_normal((n, T)).cumsum(axis=1)
    status = ["finished"] * n
    status[-1] = "failed"
    reasons = [""] * n
    reasons[-1] = "backend: CASSCF did not converge at step 37"
    return A.TrajectorySet(times=times, actions=square_actions(assign), options=SQC, initial_states=np.ones(n, int),
                           energies=energies, positions=pos, momenta=mom, symbols=("H", "H", "He"),
                           masses=np.array([m_h, m_h, 4 * m_h]), status=tuple(status), reasons=tuple(reasons),
                           metadata={"name": "synthetic test set"}), morse


def test_report_files_exist_and_csvs_equal_memory(tmp_path):
    from mapdyn.analysis.vibrational import FragmentAnalysis
    from mapdyn.initial.excitation import absorption_spectrum

    ts, morse = synthetic_molecular_set()
    rng = np.random.default_rng(0)
    spec = absorption_spectrum(0.15 + 0.01 * rng.standard_normal((20, 2)), rng.random((20, 2)) * 0.1, n_points=200)
    res = A.analyze(ts, observables=["distance 0 2", "angle 1 0 2"], first_entry=[(0, "distance 0 2")],
                    classifier={"H2 + He": [{"distance": [0, 2], "above": 4.0}]},
                    vibrational=[FragmentAnalysis((0, 1), morse.potential(), name="H2")], spectrum=spec,
                    n_resamples=199, lifetime_resamples=20)
    rep = R.write_report(res, tmp_path / "report")
    expected = {"populations", "initial_population", "observable_distance_0_2", "observable_angle_1_0_2",
                "first_entry_state0_distance_0_2", "energy_drift", "branching", "vibrational_H2", "spectrum",
                "transfer_times", "transfer_geometries"}
    assert set(rep.figures) == expected
    for name, path in rep.figures.items():
        with open(path, "rb") as fh:
            assert fh.read(8) == b"\x89PNG\r\n\x1a\n", name
        assert os.path.getsize(path) > 5000
    assert set(rep.tables) == (expected - {"transfer_geometries"}) | {"vibrational_H2_continuous", "transfers",
                                                                        "transfer_families"}
    assert not [f for f in os.listdir(rep.folder) if f.endswith(".tmp")]

    def same(a, b):
        np.testing.assert_array_equal(np.asarray(a, dtype=float), np.asarray(b, dtype=float))

    c = R.read_csv(rep.tables["populations"])
    same(c["time_au"], res.populations.times)
    for k, lab in enumerate(res.populations.labels):
        same(c[f"P_{lab}"], res.populations.populations[:, k])
        same(c[f"low_{lab}"], res.populations.low[:, k])
        same(c[f"high_{lab}"], res.populations.high[:, k])
    same(c["n_none"], res.populations.n_none)
    c = R.read_csv(rep.tables["initial_population"])
    same(c["P_initial"], res.initial_population.populations[:, 0])
    same(c["fit_mono"], res.lifetimes.fits["mono"].curve)
    for obs in res.observables:
        c = R.read_csv(rep.tables["observable_" + obs.name.replace("(", "_").replace(",", "_").rstrip(")")])
        u = "angstrom" if obs.unit == "Å" else obs.unit
        same(c[f"mean_{u}"], obs.mean)
        same(c[f"std_{u}"], obs.std)
    c = R.read_csv(rep.tables["first_entry_state0_distance_0_2"])
    same(c["value_angstrom"], res.first_entries[0].values)
    c = R.read_csv(rep.tables["energy_drift"])
    same(c["drift_hartree"], res.energy.drift)
    c = R.read_csv(rep.tables["branching"])
    assert list(c["product"]) == list(res.branching.labels)
    same(c["ratio"], res.branching.ratios)
    c = R.read_csv(rep.tables["vibrational_H2"])
    same(c["histogram"], res.vibrational[0].histogram)
    np.testing.assert_allclose(res.vibrational[0].v_continuous, np.round(res.vibrational[0].v_continuous), atol=1e-6)
    same(c["binned"], res.vibrational[0].binned)
    c = R.read_csv(rep.tables["spectrum"])
    same(c["cross_section_angstrom2"], spec.cross_section_angstrom2)

    text = open(rep.summary, encoding="utf-8").read()
    for needle in ("## Inputs", "## Lifetime of the initial state", "## Products", "CASSCF did not converge",
                   "populations.png", "synthetic test set", "Rule:"):
        assert needle in text, needle


def test_write_report_accepts_a_trajectory_set(tmp_path):
    assign = np.ones((8, 6), dtype=int)
    ts = make_set(assign)
    rep = R.write_report(ts, tmp_path)
    assert os.path.exists(rep.summary) and "No lifetime reported" in open(rep.summary, encoding="utf-8").read()


def test_from_trajectories_pads_unequal_lengths():
    rng = np.random.default_rng(0)
    recs = []
    for j, T in enumerate((5, 3, 0)):
        t = np.arange(T) * 20.0
        a = square_actions(np.array([1] * T)) if T else np.zeros((0, 2))
        recs.append({"time_au": t, "actions": a, "total_energy_Eh": -1.0 + np.zeros(T),
                     "positions_bohr": rng.normal(size=(T, 2, 3)), "momenta_au": rng.normal(size=(T, 2, 3)),
                     "status": ("finished", "failed", "pending")[j], "reason": ("", "SCF failed", "")[j],
                     "index": 10 + j, **({"initial_state": 1} if T == 0 else {})})
    ts = A.from_trajectories(recs, SQC, symbols=("H", "H"))
    assert ts.actions.shape == (3, 5, 2) and ts.positions.shape == (3, 5, 2, 3)
    assert ts.frame_mask.sum(axis=1).tolist() == [5, 3, 0]
    np.testing.assert_array_equal(ts.positions[1, :3], recs[1]["positions_bohr"])
    assert np.isnan(ts.positions[1, 3:]).all()
    assert ts.initial_states.tolist() == [1, 1, 1] and ts.indices.tolist() == [10, 11, 12]
    p = A.populations(ts, bootstrap=False)
    assert p.n_frames.tolist() == [2, 2, 2, 1, 1]
    flags = A.flagged_trajectories(ts)
    assert [(f.index, f.status) for f in flags] == [(11, "failed"), (12, "pending")]


def test_settings_from_table(tmp_path):
    r = np.linspace(0.8, 10, 50)
    np.savetxt(tmp_path / "curve.csv", np.c_[r, 0.17 * (1 - np.exp(-(r - 1.4))) ** 2], delimiter=",")
    kw = SS.settings_from_table({"observables": ["distance 0 1"], "first_entry": [{"state": 0}],
                                "products": {"apart": [{"distance": [0, 1], "above": 3.0}]},
                                "fragments": [{"atoms": [0, 1], "potential": {"curve": "curve.csv"}},
                                              {"atoms": [0, 1], "name": "m", "potential": {"morse": {"D": 0.17, "a": 1.0, "r_e": 1.4}}}],
                                "n_resamples": 99, "energy_tolerance_hartree": 2e-3}, folder=str(tmp_path),
                               symbols=("H", "H"))
    assert kw["n_resamples"] == 99 and kw["energy_tolerance"] == 2e-3 and kw["first_entry"] == [(0, None)]
    assert "curve file curve.csv" in kw["vibrational"][0].potential.source
    assert kw["vibrational"][0].name == "H0-H1" and "Morse" in kw["vibrational"][1].potential.source
    with pytest.raises(ValueError, match="'observable'"):
        SS.settings_from_table({"observable": []})
    with pytest.raises(ValueError, match="needs the study's backend"):
        SS.settings_from_table({"fragments": [{"atoms": [0, 1], "potential": {"scan": {}}}]}, symbols=("H", "H"))


def test_no_lifetime_when_exponential_does_not_describe_the_curve():
    """A Gaussian-shaped decay with a tight band: neither exponential stays inside the band."""
    t = np.linspace(0.0, 1000.0, 101)
    y = 0.3 + 0.7 * np.exp(-(t / 300.0) ** 2)
    se = np.full(t.size, 0.005)
    res = A.fit_lifetimes(t, y, se, delay=False, band=(y - 2 * se, y + 2 * se))
    assert res.lifetime is None
    assert any("outside the confidence band" in r for r in res.fits["mono"].reasons)
    # the same curve shape from a true exponential is accepted
    y2 = 0.3 + 0.7 * np.exp(-t / 300.0)
    res2 = A.fit_lifetimes(t, y2, se, delay=False, band=(y2 - 2 * se, y2 + 2 * se))
    assert res2.preferred == "mono" and res2.fits["mono"].diagnostics["inside_band_fraction"] == 1.0


# --- study folders ------------------------------------------------------------------------------------
STUDY_TOML = """
# Scenario of our own for a test: Tully model 1 (J. Chem. Phys. 93, 1061 (1990)), short run.
[study]
name = "tiny_tully1"
[electronic]
backend = "model"
model = "tully1"
[initial]
position = "-4.0 bohr"
momentum = "20.0 au"
width = "1.0 bohr"
state = 0
basis = "adiabatic"
[method]
method = "sqc"
window = "square"
[dynamics]
time_step = "4 au"
duration = "800 au"
record_every = 10
[ensemble]
trajectories = 40
seed = 77
workers = 1
batch = 15
[analysis]
n_resamples = 99
lifetime_resamples = 10
""" + (
    'products = {"transmitted on 1" = [{coordinate = 0, above = 0.0}, {state = 1}], '
    '"transmitted on 0" = [{coordinate = 0, above = 0.0}, {state = 0}], reflected = [{coordinate = 0, below = 0.0}]}\n')


def test_study_folder_load_analyze_and_cli(tmp_path):
    from mapdyn.cli import main
    from mapdyn.core.propagators import run_diabatic
    from mapdyn.core.sampling import gaussian_wavepacket_ensemble
    from mapdyn.models.tully import tully_model

    toml = tmp_path / "tiny.toml"
    toml.write_text(STUDY_TOML)
    folder = tmp_path / "study"
    assert main(["run", str(toml), "--output", str(folder), "--quiet", "--no-analysis"]) == 0
    ts = SA.load_study_trajectories(str(folder))
    assert ts.ntraj == 40 and ts.status_counts()["finished"] == 40 and ts.times[-1] == 800.0
    # the same 40 trajectories in memory (same seed, same per-trajectory streams) give the same populations
    model = tully_model("tully1")
    state = gaussian_wavepacket_ensemble(model, 40, 77, np.array([-4.0]), np.array([20.0]), np.array([1.0]), 0, SQC)
    run = run_diabatic(model, state, SQC, 4.0, 200, record_every=10, record_nuclei=True)
    mem = A.populations(A.from_diabatic_run(run), bootstrap=False)
    disk = A.populations(ts, bootstrap=False)
    np.testing.assert_allclose(disk.populations, mem.populations, atol=1e-12, equal_nan=True)
    assert np.array_equal(disk.n_none, mem.n_none)
    res = SA.analyze_study(str(folder))
    br = res.branching
    assert br is not None and sum(br.counts) == 40
    final = run.final.R[:, 0]
    from mapdyn.core.windows import window_assignment
    w = window_assignment(run.actions_adiabatic[-1], SQC)
    assert br.counts[br.labels.index("transmitted on 0")] == int(np.sum((final > 0) & (w == 0)))
    # `mapdyn analyze DIR` writes the report folder
    assert main(["analyze", str(folder)]) == 0
    for name in ("summary.md", "populations.png", "populations.csv", "branching.csv", "energy_drift.png"):
        assert (folder / "report" / name).exists(), name
    # a partial folder: one chunk lost → its trajectories are left out, the rest still analysed
    os.unlink(folder / "chunks" / "chunk_0001_seg00.h5")
    part = SA.load_study_trajectories(str(folder))
    assert part.ntraj == 25 and 15 not in part.indices
    A.analyze(part, n_resamples=99, lifetime_resamples=0)


def test_rule_classifier_coordinates_states_and_mismatch():
    clf = A.distance_rule_classifier({"right, 1": [{"coordinate": 0, "above": 0.0}, {"state": 1}],
                                      "right": [{"coordinate": 0, "above": 0.0}]})
    assert clf(np.array([1.0]), 1) == "right, 1" and clf(np.array([1.0]), 0) == "right"
    assert clf(np.array([-1.0]), 1) == "other"
    from ase import Atoms
    with pytest.raises(ValueError, match="coordinate"):
        clf(Atoms("H2", positions=[[0, 0, 0], [0, 0, 1]]), 1)
    with pytest.raises(ValueError, match="each condition"):
        A.distance_rule_classifier({"x": [{"distance": [0, 1]}]})


def test_study_spectrum_from_initial_conditions(tmp_path):
    from mapdyn.initial.excitation import absorption_spectrum
    from mapdyn.study.checkpoint import write_h5

    assert SA.study_spectrum(str(tmp_path)) is None
    rng = np.random.default_rng(2)
    exc, osc = 0.2 + 0.01 * rng.standard_normal((10, 2)), rng.random((10, 2)) * 0.2
    write_h5(tmp_path / "initial_conditions.h5", {"excitation_energies_hartree": exc, "oscillator_strengths": osc})
    spec = SA.study_spectrum(str(tmp_path), fwhm_ev=0.2)
    ref = absorption_spectrum(exc, osc, fwhm_ev=0.2)
    np.testing.assert_array_equal(spec.cross_section_angstrom2, ref.cross_section_angstrom2)


def test_driver_frames_give_the_drivers_own_window_bookkeeping():
    """Frames of the on-the-fly driver (MappingDynamics) → from_trajectories: the SQC populations
    equal those built from the per-frame window indicators the driver itself recorded
    (frame['populations'], its own bookkeeping)."""
    import warnings

    import ase
    from ase import units

    from mapdyn.backends.model_adapter import ModelAdapterBackend
    from mapdyn.core.sampling import trajectory_generator
    from mapdyn.driver.dynamics import MappingDynamics
    from mapdyn.models.tully import tully_model
    from mapdyn.units import AMU_IN_ME

    model = tully_model("tully1")
    p_ase = AMU_IN_ME * units.AUT / units.Bohr
    records, driver_pops = [], []
    for i in range(6):
        atoms = ase.Atoms("H", positions=[[-3.0 * units.Bohr, 0, 0]], masses=[model.masses[0] / AMU_IN_ME])
        atoms.set_momenta([[25.0 / p_ase, 0, 0]])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            dyn = MappingDynamics(atoms, ModelAdapterBackend(model), 5.0 * units.AUT, 1, SQC,
                                  rng=trajectory_generator(3, i))
            dyn.run(40 + 10 * i)
        records.append(A.frames_to_record(dyn.frames, status="finished", initial_state=1, index=i))
        driver_pops.append(np.array([f["populations"] for f in dyn.frames]))
    ts = A.from_trajectories(records, SQC, symbols=("H",))
    assert ts.positions.shape[2:] == (1, 3) and ts.frame_mask.sum(axis=1).tolist() == [41 + 10 * i for i in range(6)]
    p = A.populations(ts, bootstrap=False)
    counts = np.zeros((ts.times.size, 2))
    for pops in driver_pops:
        counts[:pops.shape[0]] += pops
    with np.errstate(invalid="ignore"):
        np.testing.assert_allclose(p.populations, counts / counts.sum(axis=1)[:, None], atol=1e-15, equal_nan=True)
    assert p.populations[0].tolist() == [0.0, 1.0] and ts.energies is not None
