"""Bohr–Sommerfeld vibrational analysis of diatomic fragments."""

from __future__ import annotations

import os

import numpy as np
import pytest
from scipy import integrate, optimize

import mapdyn.analysis as A
from mapdyn.analysis import vibrational as V
from mapdyn.core.options import SQUARE_GAMMA, MethodOptions

# Morse parameters close to H2 (D ≈ 4.75 eV, a ≈ 1.03 /Bohr, r_e ≈ 1.40 Bohr; from memory — only used
# as a realistic shape, the checks are exact for any Morse parameters).
MORSE = V.MorseCurve(D=0.1745, a=1.0282, r_e=1.4011)
M_H = 1837.15                       # proton mass in electron masses (rounded; only enters through μ)
MU = M_H / 2


def morse_turning_points(E):
    s = np.sqrt(E / MORSE.D)
    return MORSE.r_e - np.log1p(s) / MORSE.a, MORSE.r_e - np.log1p(-s) / MORSE.a


def cartesian_pair(r, p_r, rng, L=0.0, com_velocity=None):
    """Two H atoms with relative distance r, radial momentum p_r and angular momentum L, randomly
    oriented, optionally moving with a common centre-of-mass velocity (a.u.)."""
    m = len(r)
    n_hat = rng.normal(size=(m, 3))
    n_hat /= np.linalg.norm(n_hat, axis=1)[:, None]
    t_hat = np.cross(n_hat, rng.normal(size=(m, 3)))
    t_hat /= np.linalg.norm(t_hat, axis=1)[:, None]
    u = (p_r / MU)[:, None] * n_hat + (L / (MU * r))[:, None] * t_hat     # relative velocity
    com = rng.normal(size=(m, 3)) * 5.0 if com_velocity is None else com_velocity
    pos = np.zeros((m, 2, 3))
    pos[:, 0] = rng.normal(size=(m, 3))
    pos[:, 1] = pos[:, 0] + r[:, None] * n_hat
    vel = np.stack([com - 0.5 * u, com + 0.5 * u], axis=1)
    return pos, vel * M_H, np.array([M_H, M_H])


def test_morse_levels_give_back_integer_v():
    """Bohr–Sommerfeld with the ½ is exact for the Morse oscillator (Morse, Phys. Rev. 34, 57 (1929)):
    phase points anywhere on the E_v shell must give v back to 1e-6."""
    rng = np.random.default_rng(1)
    levels = MORSE.levels(MU)
    assert levels.size == MORSE.v_max(MU) + 1 and levels[-1] < MORSE.D
    vs, rs, prs = [], [], []
    for v, E in enumerate(levels):
        r_in, r_out = morse_turning_points(E)
        r = np.concatenate([[r_in + 1e-9, r_out - 1e-9], rng.uniform(r_in, r_out, 4)])
        pr = np.sqrt(np.clip(2 * MU * (E - MORSE(r)), 0, None)) * rng.choice([-1.0, 1.0], r.size)
        vs += [v] * r.size
        rs.append(r)
        prs.append(pr)
    r, pr = np.concatenate(rs), np.concatenate(prs)
    pos, mom, masses = cartesian_pair(r, pr, rng)
    phase = V.fragment_phase_points(pos, mom, masses, (0, 1))
    np.testing.assert_allclose(phase.r, r, rtol=1e-13)
    np.testing.assert_allclose(phase.p_r, pr, rtol=1e-9, atol=1e-9)
    assert np.all(phase.L < 1e-8)
    v_cont, E, quasi = V.vibrational_quantum_numbers(MORSE.potential(), phase)
    assert np.max(np.abs(v_cont - np.array(vs))) < 1e-6
    assert not quasi.any()


def test_morse_continuous_v_between_levels():
    """E(v) = ω(v+½) − ω²(v+½)²/(4D) also for non-integer v (the Morse action is analytic)."""
    rng = np.random.default_rng(2)
    v_true = rng.uniform(-0.5, MORSE.v_max(MU) + 0.3, 40)
    E = MORSE.energy_of(v_true, MU)
    r = np.array([rng.uniform(*morse_turning_points(e)) for e in E])
    pr = np.sqrt(2 * MU * (E - MORSE(r)))
    v_cont, _, _ = V.vibrational_quantum_numbers(MORSE.potential(), V.PhasePoint(r, pr, np.zeros_like(r), MU))
    assert np.max(np.abs(v_cont - v_true)) < 1e-6


def test_centrifugal_term_isotropic_oscillator():
    """3-D isotropic harmonic oscillator V = ½ μ ω² r²: the classical radial action is
    I_r = E/(2ω) − L/2 (action-angle variables, e.g. Goldstein, Classical Mechanics, ch. 10; from memory),
    so v = E/(2ω) − L/2 − ½.  Tests the L²/(2μr²) term."""
    mu, omega = 1000.0, 0.01
    pot = V.FragmentPotential.from_callable(lambda r: 0.5 * mu * omega ** 2 * r ** 2, (1e-3, 50.0))
    rng = np.random.default_rng(3)
    L = rng.uniform(0.0, 8.0, 30)
    E = omega * (L + 1.0) + rng.uniform(0.0, 0.05, 30)      # above the minimum of V_eff (= ω L)
    # a random point between the turning points of V_eff
    r, pr = [], []
    for Ek, Lk in zip(E, L):
        veff = lambda x, Lk=Lk: 0.5 * mu * omega ** 2 * x ** 2 + Lk ** 2 / (2 * mu * x ** 2)
        rmin = np.sqrt(Lk / (mu * omega)) if Lk > 0 else 1e-2
        lo = optimize.brentq(lambda x, f=veff, E=Ek: f(x) - E, 1e-3, rmin) if Lk > 0 else 1e-2
        hi = optimize.brentq(lambda x, f=veff, E=Ek: f(x) - E, rmin, 50.0)
        rk = rng.uniform(lo, hi)
        r.append(rk)
        pr.append(np.sqrt(2 * mu * (Ek - veff(rk))))
    v_cont, E_out, _ = V.vibrational_quantum_numbers(pot, V.PhasePoint(np.array(r), np.array(pr), L, mu))
    np.testing.assert_allclose(E_out, E, rtol=1e-12)
    np.testing.assert_allclose(v_cont, E / (2 * omega) - L / 2 - 0.5, atol=1e-6)


def test_rotating_morse_against_direct_quadrature():
    """With L ≠ 0 the action is checked against an independent scipy.integrate.quad evaluation, and
    every point on the same (E, L) shell gives the same v."""
    rng = np.random.default_rng(4)
    E, L = MORSE.levels(MU)[3], 12.0
    veff = lambda x: MORSE(x) + L ** 2 / (2 * MU * x ** 2)
    rmin = optimize.minimize_scalar(veff, bounds=(0.8, 3.0), method="bounded").x
    r_in = optimize.brentq(lambda x: veff(x) - E, 0.3, rmin, xtol=1e-15)
    r_out = optimize.brentq(lambda x: veff(x) - E, rmin, 6.0, xtol=1e-15)
    ref = integrate.quad(lambda x: np.sqrt(max(2 * MU * (E - veff(x)), 0.0)), r_in, r_out, epsabs=1e-12,
                         limit=200)[0] / np.pi - 0.5
    r = rng.uniform(r_in, r_out, 8)
    pr = np.sqrt(2 * MU * (E - veff(r))) * rng.choice([-1.0, 1.0], 8)
    pos, mom, masses = cartesian_pair(r, pr, rng, L=np.full(8, L))
    phase = V.fragment_phase_points(pos, mom, masses, (0, 1))
    np.testing.assert_allclose(phase.L, L, rtol=1e-9)
    v_cont, _, _ = V.vibrational_quantum_numbers(MORSE.potential(), phase)
    np.testing.assert_allclose(v_cont, ref, atol=1e-6)
    assert ref < 3 - 0.1                       # rotation takes energy out of the vibration


def test_unbound_and_quasibound_fragments():
    pot = MORSE.potential()
    r = np.array([3.0, 3.0])
    # above the asymptote with L = 0: no outer turning point → unbound
    pr = np.sqrt(2 * MU * (MORSE.D * 1.05 - MORSE(r)))
    v, E, quasi = V.vibrational_quantum_numbers(pot, V.PhasePoint(r, pr, np.zeros(2), MU))
    assert np.all(np.isnan(v)) and np.all(E > MORSE.D)
    # slightly above D but behind a centrifugal barrier (large L) → quasi-bound, finite v
    L = 25.0
    Ek = MORSE.D + 0.002
    veff = lambda x: MORSE(x) + L ** 2 / (2 * MU * x ** 2)
    assert veff(np.linspace(2.5, 6, 200)).max() > Ek
    r0 = np.array([1.6])
    v, _, quasi = V.vibrational_quantum_numbers(pot, V.PhasePoint(r0, np.sqrt(2 * MU * (Ek - veff(r0))), np.array([L]), MU))
    assert np.isfinite(v[0]) and quasi[0]


def test_synthetic_ensemble_level_populations_recovered_by_both_binnings():
    """Levels drawn with known populations, continuous v spread uniformly within ±½ of each level
    (so the histogram recovers the drawn counts exactly, the windows see the central 2w of each box
    and, normalised over the windows, are unbiased); both within 3 bootstrap standard errors of the
    true populations (fixed seed)."""
    rng = np.random.default_rng(7)
    p_true = np.array([0.45, 0.3, 0.15, 0.1])
    n = 1500
    level = rng.choice(4, size=n, p=p_true)
    v_true = level + rng.uniform(-0.5, 0.5, n)
    E = MORSE.energy_of(v_true, MU)
    r = np.array([rng.uniform(*morse_turning_points(e)) for e in E])
    pr = np.sqrt(np.clip(2 * MU * (E - MORSE(r)), 0, None)) * rng.choice([-1.0, 1.0], n)
    pos, mom, masses = cartesian_pair(r, pr, rng)
    v_cont, _, _ = V.vibrational_quantum_numbers(MORSE.potential(), V.fragment_phase_points(pos, mom, masses, (0, 1)))
    np.testing.assert_allclose(v_cont, v_true, atol=1e-6)
    d = V.vibrational_distribution(v_cont, n_levels=4, n_resamples=499)
    counts = np.bincount(level, minlength=4)
    np.testing.assert_allclose(d.histogram, counts / n, atol=1e-12)
    for est in (d.histogram, d.binned):
        se = np.sqrt(p_true * (1 - p_true) / n) * (1.0 if est is d.histogram else 1 / np.sqrt(2 * SQUARE_GAMMA))
        assert np.all(np.abs(est - p_true) < 3 * se), (est, p_true)
    assert d.bin_half_width == SQUARE_GAMMA
    inside = np.abs(v_cont - np.round(v_cont)) <= SQUARE_GAMMA
    assert d.n_outside_bins == int(n - inside.sum())
    assert np.all(d.histogram_low <= d.histogram) and np.all(d.binned_high >= d.binned)


def test_potential_from_curve_and_bad_inputs():
    r = np.linspace(0.6, 12.0, 400)
    pot = V.FragmentPotential.from_curve(r, MORSE(r))
    assert "curve: 400 points" in pot.source
    E = MORSE.levels(MU)[:5]
    rr = np.array([np.mean(morse_turning_points(e)) for e in E])
    pr = np.sqrt(2 * MU * (E - MORSE(rr)))
    v, _, _ = V.vibrational_quantum_numbers(pot, V.PhasePoint(rr, pr, np.zeros(5), MU))
    assert np.max(np.abs(v - np.arange(5))) < 1e-4             # spline interpolation error of a 400-point curve
    with pytest.raises(ValueError, match="r_range"):
        V.FragmentPotential.from_callable(MORSE, (2.0, 1.0))
    with pytest.raises(ValueError, match="bin_half_width"):
        V.vibrational_distribution(np.zeros(3), bin_half_width=0.7)
    with pytest.raises(ValueError, match="fragment atoms"):
        V.fragment_phase_points(np.zeros((1, 2, 3)), np.zeros((1, 2, 3)), np.ones(2), (0, 0))


class CountingBackend:
    """Wraps a real backend and counts calls (to see the cache being used)."""

    def __init__(self, inner):
        self.inner, self.calls, self.nstates = inner, 0, inner.nstates

    @property
    def level_of_theory(self):
        return self.inner.level_of_theory

    def compute(self, positions_bohr, guess=None, need_gradients=True):
        self.calls += 1
        return self.inner.compute(positions_bohr, guess=guess, need_gradients=need_gradients)


def test_scan_with_backend_is_cached(tmp_path):
    from mapdyn.backends.pyscf.ground_state import PySCFGroundState

    backend = CountingBackend(PySCFGroundState(["H", "H"], "sto-3g"))
    grid = np.linspace(0.9, 4.0, 8)
    cache = tmp_path / "fragments" / "H2.npz"
    pot = V.scan_fragment_potential(backend, grid, cache_path=cache)
    assert backend.calls == 8 and cache.exists() and pot.source.startswith("scan:")
    # RHF/STO-3G H2 has its minimum near 1.35 Bohr (Szabo & Ostlund, Modern Quantum Chemistry, §3.5; from memory)
    rmin = optimize.minimize_scalar(pot, bounds=(1.0, 2.0), method="bounded").x
    assert 1.25 < rmin < 1.45
    again = V.scan_fragment_potential(backend, grid, cache_path=cache)
    assert backend.calls == 8 and "cached" in again.source
    np.testing.assert_array_equal(again.v_grid, pot.v_grid)
    V.scan_fragment_potential(backend, grid, cache_path=cache, label="other level")
    assert backend.calls == 16
    assert not [f for f in os.listdir(cache.parent) if f.endswith(".tmp")]


def test_fragment_analysis_from_trajectory_set_and_report(tmp_path):
    from mapdyn.analysis import report as R

    rng = np.random.default_rng(9)
    n = 30
    level = rng.choice(3, size=n, p=[0.5, 0.3, 0.2])
    E = MORSE.levels(MU)[level]
    r = np.array([rng.uniform(*morse_turning_points(e)) for e in E])
    pr = np.sqrt(np.clip(2 * MU * (E - MORSE(r)), 0, None))
    pos, mom, masses = cartesian_pair(r, pr, rng)
    T = 3
    pos3 = np.repeat(pos[:, None], T, axis=1)
    mom3 = np.repeat(mom[:, None], T, axis=1)
    e = np.zeros((n, T, 2))
    e[..., 0] = 1 + SQUARE_GAMMA
    e[..., 1] = SQUARE_GAMMA
    ts = A.TrajectorySet(times=np.arange(T) * 100.0, actions=e, options=MethodOptions(), initial_states=np.zeros(n, int),
                         positions=pos3, momenta=mom3, symbols=("H", "H"), masses=masses)
    frag = V.FragmentAnalysis((0, 1), MORSE.potential(), name="H2")
    d = V.analyze_fragment(ts, frag, n_resamples=199)
    np.testing.assert_allclose(d.v_continuous, level, atol=1e-6)
    np.testing.assert_allclose(d.histogram, np.bincount(level, minlength=3) / n, atol=1e-12)
    np.testing.assert_allclose(d.binned, d.histogram, atol=1e-12)     # all exactly on levels
    res = A.analyze(ts, vibrational=[frag], n_resamples=199, lifetime_resamples=0)
    rep = R.write_report(res, tmp_path)
    c = R.read_csv(rep.tables["vibrational_H2"])
    np.testing.assert_array_equal(c["histogram"], res.vibrational[0].histogram)
    np.testing.assert_array_equal(c["binned_low"], res.vibrational[0].binned_low)
    c = R.read_csv(rep.tables["vibrational_H2_continuous"])
    np.testing.assert_array_equal(c["v_continuous"], res.vibrational[0].v_continuous)
    assert "Morse" in open(rep.summary, encoding="utf-8").read()
    with open(rep.figures["vibrational_H2"], "rb") as fh:
        assert fh.read(4) == b"\x89PNG"


def test_fragment_restricted_to_a_product():
    rng = np.random.default_rng(10)
    n = 20
    E = MORSE.levels(MU)[np.zeros(n, int)]
    r = np.array([rng.uniform(*morse_turning_points(e)) for e in E])
    pos, mom, masses = cartesian_pair(r, np.sqrt(np.clip(2 * MU * (E - MORSE(r)), 0, None)), rng)
    pos3 = np.concatenate([pos, np.zeros((n, 1, 3))], axis=1)
    pos3[:, 2, 0] = np.where(np.arange(n) < 7, 20.0, 3.0)           # He far away in 7 trajectories
    mom3 = np.concatenate([mom, np.zeros((n, 1, 3))], axis=1)
    e = np.zeros((n, 1, 2))
    e[..., 0], e[..., 1] = 1 + SQUARE_GAMMA, SQUARE_GAMMA
    ts = A.TrajectorySet(times=[0.0], actions=e, options=MethodOptions(), initial_states=np.zeros(n, int),
                         positions=pos3[:, None], momenta=mom3[:, None], symbols=("H", "H", "He"),
                         masses=np.array([M_H, M_H, 4 * M_H]))
    frag = V.FragmentAnalysis((0, 1), MORSE.potential(), name="H2", product="H2 + He")
    with pytest.raises(ValueError, match="product classifier"):
        V.analyze_fragment(ts, frag)
    br = A.classify_products(ts, {"H2 + He": [{"distance": [0, 2], "above": 5.0}]}, n_resamples=99)
    d = V.analyze_fragment(ts, frag, product_labels=br.per_trajectory, n_resamples=99)
    assert d.v_continuous.size == 7 and d.fragment == "H2 (H2 + He)"
    assert np.all(np.abs(d.v_continuous) < 1e-6)
