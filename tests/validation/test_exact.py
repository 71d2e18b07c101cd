"""The exact grid wavepacket solver (mapdyn.validation.exact).

Independent references used here:
* a second propagator on the same grid Hamiltonian H = T + V − iW (same FFT kinetic operator, same
  diabatic matrices, same absorbing potential): ``scipy.sparse.linalg.expm_multiply`` on a
  LinearOperator (general-purpose library; docs/theory.md#validation-benchmarks), tolerance 1e-4 on probabilities;
* the Landau–Zener formula P = exp(−2π H12²/(ħ v |ΔF|)) — L. D. Landau, Phys. Z. Sowjetunion 2, 46
  (1932); C. Zener, Proc. R. Soc. A 137, 696 (1932) — on the wide linear-crossing model, ~1e-3.
"""

import math

import numpy as np
import pytest
import scipy.integrate
import scipy.sparse.linalg as sla

from mapdyn.core.model import DiabaticModel, as_positions
from mapdyn.models.tully import SimpleAvoidedCrossing, WideLinearCrossing
from mapdyn.validation.exact import (
    Absorber,
    ExactSettings,
    Grid,
    GridPropagator,
    check_convergence,
    exact_scattering,
    gaussian_wavepacket,
    propagate_wavepacket,
)


class CrossingWithVibration(DiabaticModel):
    """Test-only 2D model: Tully model 1 along x plus a harmonic mode y (M ω² y²/2 on both states),
    optionally with a state-dependent shift of the mode and a y-dependent coupling (non-separable)."""

    nstates, ndof = 2, 2

    def __init__(self, omega=0.005, shift=0.0, coupling_slope=0.0):
        self.masses = np.array([2000.0, 2000.0])
        self.tully = SimpleAvoidedCrossing()
        self.omega, self.shift, self.slope = omega, shift, coupling_slope

    def hamiltonian(self, R):
        R = as_positions(R, 2)
        H = self.tully.hamiltonian(R[:, :1])
        k = self.masses[1] * self.omega ** 2
        y = R[:, 1]
        H[:, 0, 0] += 0.5 * k * y * y
        H[:, 1, 1] += 0.5 * k * (y - self.shift) ** 2
        H[:, 0, 1] *= 1.0 + self.slope * y
        H[:, 1, 0] = H[:, 0, 1]
        return H

    def hamiltonian_gradient(self, R):  # not needed by the grid solver
        raise NotImplementedError


def expm_reference(prop: GridPropagator, psi0: np.ndarray, times: np.ndarray) -> np.ndarray:
    """ψ(t) = exp(−i(T + V − iW)t) ψ0 at equally spaced ``times`` (from 0) with scipy's expm_multiply."""
    F, N = psi0.shape
    shape = (F,) + prop.grid.shape
    axes = tuple(range(1, prop.grid.ndim + 1))
    V, W, T = prop.potential, prop.absorbing_potential, prop.kinetic

    def apply(v, sign=1.0):  # sign=-1 gives the adjoint (T, V Hermitian; −iW → +iW)
        psi = v.reshape(F, N)
        out = np.fft.ifftn(T * np.fft.fftn(psi.reshape(shape), axes=axes), axes=axes).reshape(F, N)
        out += np.einsum("nkl,ln->kn", V, psi) - sign * 1j * W * psi
        return out.ravel()

    # A = −iH_eff; its adjoint is +iH_eff† = i(T + V + iW)
    A = sla.LinearOperator((F * N, F * N), matvec=lambda v: -1j * apply(v), rmatvec=lambda v: 1j * apply(v, -1.0),
                           dtype=complex)
    trace = -1j * (F * T.sum() + np.trace(V, axis1=1, axis2=2).sum() - 1j * F * W.sum())
    # scipy's 1-norm estimator divides by zero entries of its probe vectors (harmless warnings; a NaN in
    # the result would make the comparisons below fail)
    with np.errstate(all="ignore"):
        out = sla.expm_multiply(A, psi0.ravel(), start=0.0, stop=times[-1], num=times.size, endpoint=True,
                                traceA=trace)
    assert np.all(np.isfinite(out))
    return out.reshape(times.size, F, N)


def _tully1_setup(dt):
    model = SimpleAvoidedCrossing()
    grid = Grid((-32.0,), (32.0,), (512,))  # Δx = 0.125 → k up to 25 a.u.
    prop = GridPropagator(model, grid, dt, Absorber(8.0, 0.05))
    psi0 = gaussian_wavepacket(model, grid, -12.0, 15.0, 1.0, 0)
    return model, grid, prop, psi0


def test_norm_plus_absorbed_is_one_and_unitary_without_absorber():
    model, grid, prop, psi0 = _tully1_setup(2.0)
    run = propagate_wavepacket(prop, psi0, 5000, record_every=50)  # t = 10000 a.u.: most flux absorbed
    total = run.norm + run.absorbed.sum(axis=(1, 2))
    assert np.max(np.abs(total - 1.0)) < 1e-12
    assert run.norm[-1] < 0.05 and run.absorbed[-1].sum() > 0.95  # the absorber did absorb
    # without absorber the propagation is unitary (exact pointwise coupling exponential, FFT kinetic)
    free = propagate_wavepacket(GridPropagator(model, grid, 2.0, None), psi0, 1500, record_every=100)
    assert np.max(np.abs(free.norm - 1.0)) < 1e-12
    assert np.allclose(free.populations_adiabatic.sum(axis=1), 1.0, atol=1e-12)
    # the transition actually happened (so unitarity covers the coupled case)
    assert free.populations_adiabatic[-1, 1] > 0.2


def test_split_operator_agrees_with_expm_multiply_1d():
    """Populations per region and state, and the per-channel absorbed probability, vs expm_multiply on the
    same grid Hamiltonian; tolerance 1e-4 (docs/theory.md#validation-benchmarks).  Split error at Δt = 0.5 is O(Δt²) ≈ 1e-5."""
    model, grid, prop, psi0 = _tully1_setup(0.5)
    nsteps, every = 12000, 30  # t = 6000 a.u., so the packets have entered the absorbers
    run = propagate_wavepacket(prop, psi0, nsteps, record_every=every)
    ref = expm_reference(prop, psi0, run.times)
    dv = grid.volume_element
    ad = np.abs(np.einsum("nlk,tln->tkn", prop.eigvecs, ref)) ** 2 * dv  # (T, F, N)
    x = grid.points[:, 0]
    for t_index in (run.times.size // 3, run.times.size // 2):  # during and after the crossing
        ours = np.abs(prop.adiabatic_amplitudes(_replay(prop, psi0, t_index * every))) ** 2 * dv
        for region in (x < 0, x >= 0):
            assert np.max(np.abs(ours[:, region].sum(axis=1) - ad[t_index][:, region].sum(axis=1))) < 1e-4
    assert np.max(np.abs(run.norm - ad.sum(axis=(1, 2)))) < 1e-4
    # absorbed per channel and adiabatic state: ∫ 2 Σ_{x∈c} W |ψ_ad,f|² dV dt with Simpson's rule
    W = prop.absorbing_potential
    for c in (0, 1):
        rate = 2.0 * np.sum(W * (prop.channel == c) * ad, axis=2)  # (T, F)
        absorbed_ref = scipy.integrate.simpson(rate, x=run.times, axis=0)
        assert np.max(np.abs(run.absorbed[-1, c] - absorbed_ref)) < 1e-4
    assert run.absorbed[-1, 1].sum() > 0.5  # the check covers real absorption


def _replay(prop, psi0, nsteps):
    psi = psi0.copy()
    junk = np.zeros((prop.nchannels, prop.nstates))
    for _ in range(nsteps):
        psi = prop.step(psi, junk)
    return psi


def test_two_dimensional_separable_case_reproduces_the_1d_solver():
    """Tully model 1 plus a decoupled vibration prepared in its ground state: the state populations of the
    2D propagation equal those of the 1D one (the y factor is a common, stationary phase)."""
    dt, nsteps = 2.0, 1200
    m1 = SimpleAvoidedCrossing()
    g1 = Grid((-32.0,), (32.0,), (256,))
    p1 = GridPropagator(m1, g1, dt, Absorber(8.0, 0.05))
    run1 = propagate_wavepacket(p1, gaussian_wavepacket(m1, g1, -12.0, 12.0, 1.0, 0), nsteps, 100)
    m2 = CrossingWithVibration(omega=0.005)
    sig_y = math.sqrt(1.0 / (2 * 2000.0 * 0.005))  # ground state of the mode: |ψ|² has σ² = 1/(2Mω)
    g2 = Grid((-32.0, -2.4), (32.0, 2.4), (256, 24))
    p2 = GridPropagator(m2, g2, dt, Absorber((8.0, 0.6), 0.05))
    run2 = propagate_wavepacket(p2, gaussian_wavepacket(m2, g2, (-12.0, 0.0), (12.0, 0.0), (1.0, sig_y), 0),
                                nsteps, 100)
    assert run2.channel_names == ["lower_0", "upper_0", "lower_1", "upper_1"]
    # the discretised ground state in y is not exactly stationary (Δy = 0.2): differences ≲ 1e-6
    assert np.max(np.abs(run2.populations_adiabatic - run1.populations_adiabatic)) < 1e-5
    assert np.max(np.abs(run2.absorbed[:, :2] - run1.absorbed)) < 1e-5
    assert np.max(np.abs(run2.norm + run2.absorbed.sum(axis=(1, 2)) - 1.0)) < 1e-12


def test_split_operator_agrees_with_expm_multiply_2d_coupled():
    """A non-separable 2D model (shifted mode, y-dependent coupling) against expm_multiply, 1e-4."""
    model = CrossingWithVibration(omega=0.01, shift=0.3, coupling_slope=0.8)
    grid = Grid((-24.0, -1.6), (24.0, 1.6), (256, 16))  # π/Δx = 16.8 > k + 6σ_P = 15
    prop = GridPropagator(model, grid, 0.5, Absorber((6.0, 0.4), 0.05))
    psi0 = gaussian_wavepacket(model, grid, (-8.0, 0.0), (12.0, 0.0), (1.0, 0.2), 0)
    nsteps, every = 4000, 100  # t = 2000 a.u.: through the crossing
    run = propagate_wavepacket(prop, psi0, nsteps, every)
    ref = expm_reference(prop, psi0, run.times)
    ad = np.abs(np.einsum("nlk,tln->tkn", prop.eigvecs, ref)) ** 2 * grid.volume_element
    assert np.max(np.abs(run.populations_adiabatic - ad.sum(axis=2))) < 1e-4
    assert run.populations_adiabatic[-1, 1] > 0.1  # a real transition


@pytest.mark.parametrize("crossing_speed", [0.015, 0.02, 0.03])
def test_landau_zener_on_the_wide_crossing(crossing_speed):
    """Probability of staying diabatic (= ending on the upper adiabat) vs Landau–Zener,
    P = exp(−2π C²/(v ΔF)) with v the speed at the crossing (diabatic energy 0 there), averaged over the
    packet's momentum distribution.  Tolerance 1e-3 (docs/theory.md#validation-benchmarks); measured ≈ 1–2e-4."""
    model = WideLinearCrossing()
    M, C, dF = 2000.0, 0.003, 0.01
    x0, sigma = -85.0, 5.0
    E0 = float(model.adiabatic(np.array([[x0]]))[0][0, 0])
    k = math.sqrt(2 * M * (0.5 * M * crossing_speed ** 2 - E0))
    res = exact_scattering(model, k, x0, sigma)
    assert res.details["converged"]
    sP = 0.5 / sigma
    p = k + sP * np.linspace(-7, 7, 281)
    w = np.exp(-0.5 * ((p - k) / sP) ** 2)
    v = np.sqrt(2.0 * (p * p / (2 * M) + E0) / M)
    p_lz = np.sum(w * np.exp(-2 * np.pi * C ** 2 / (v * dF))) / w.sum()
    assert abs(res.transmission[1] - p_lz) < 1e-3
    assert abs(res.transmission.sum() - 1.0) < 1e-4  # no reflection at these energies


def test_scattering_accounts_for_all_probability_and_direction_symmetry():
    """Tully model 1 is symmetric under x → −x with the diabats swapped, so a packet coming from the right
    gives the same channel probabilities; probability is fully accounted for (residual < tolerance)."""
    m = SimpleAvoidedCrossing()
    right = exact_scattering(m, 20.0, -12.0, 1.0)
    left = exact_scattering(m, -20.0, 12.0, 1.0)
    # both runs stop once < 1e-5 is left inside, at slightly different times: agreement to ~tolerance
    assert np.max(np.abs(right.transmission - left.transmission)) < 2 * ExactSettings().tolerance
    total = right.transmission.sum() + right.reflection.sum()
    assert abs(total - 1.0) < 2 * ExactSettings().tolerance
    assert right.details["residual_inside"] < ExactSettings().tolerance


def test_convergence_check_passes_when_resolved_and_flags_an_underresolved_grid():
    m = SimpleAvoidedCrossing()
    good = check_convergence(m, 20.0, -12.0, 1.0)
    assert set(good.deviations) == {"grid", "box", "time_step"}
    assert good.max_deviation < 1e-4
    assert good.variants["grid"].details["grid"].npoints[0] > good.base.details["grid"].npoints[0]
    # a grid that cannot represent the momentum (π/Δx = 18 < k = 20) must show a large change on refinement
    bad = check_convergence(m, 20.0, -12.0, 1.0, settings=ExactSettings(spacing=math.pi / 18.0))
    assert bad.deviations["grid"] > 0.01


def test_populations_vs_time_are_recorded():
    res = exact_scattering(SimpleAvoidedCrossing(), 20.0, -12.0, 1.0, record_every=20)
    pops, absorbed = res.details["populations_adiabatic"], res.details["absorbed_vs_time"]
    assert pops.shape[1] == 2 and absorbed.shape[1:] == (2, 2)
    total = pops.sum(axis=1) + absorbed.sum(axis=(1, 2))
    assert np.max(np.abs(total - 1.0)) < 1e-10
    # the totals differ from T + R only by the residual left inside the region (< tolerance)
    np.testing.assert_allclose(pops[-1] + absorbed[-1].sum(axis=0),
                               res.transmission + res.reflection, atol=ExactSettings().tolerance)
    assert abs(pops[-1].sum() + absorbed[-1].sum() - res.transmission.sum() - res.reflection.sum()
               - res.details["residual_inside"]) < 1e-10


def test_bad_input_is_rejected():
    m = SimpleAvoidedCrossing()
    with pytest.raises(ValueError, match="npoints"):
        Grid((-1.0,), (1.0,), (4,))
    with pytest.raises(ValueError, match="upper"):
        Grid((1.0,), (-1.0,), (64,))
    with pytest.raises(ValueError, match="absorber length"):
        Absorber(-1.0)
    with pytest.raises(ValueError, match="too long"):
        GridPropagator(m, Grid((-10.0,), (10.0,), (64,)), 1.0, Absorber(12.0))
    with pytest.raises(ValueError, match="dt"):
        GridPropagator(m, Grid((-10.0,), (10.0,), (64,)), 0.0)
    with pytest.raises(ValueError, match="degrees of freedom"):
        GridPropagator(CrossingWithVibration(), Grid((-10.0,), (10.0,), (64,)), 1.0, None)
    with pytest.raises(ValueError, match="momentum"):
        exact_scattering(m, 0.0, -12.0, 1.0)
    with pytest.raises(ValueError, match="position_width"):
        exact_scattering(m, 10.0, -12.0, -1.0)
    with pytest.raises(ValueError, match="interaction_region"):
        exact_scattering(m, 10.0, -12.0, 1.0, interaction_region=(3.0, -3.0))


def _stored_reference():
    import json
    from importlib import resources
    with resources.files("mapdyn").joinpath("data/exact_scattering.npz").open("rb") as fh:
        data = dict(np.load(fh))
    return data, json.loads(str(data["metadata"]))


def _recompute_stored_case(data, meta, i):
    from mapdyn.models.tully import tully_model
    n = int(data["grid_npoints"][i])
    spacing = (data["grid_upper"][i] - data["grid_lower"][i]) / n
    settings = ExactSettings(spacing=float(spacing), dt=float(data["dt"][i]), margin=meta["margin"],
                             absorber=Absorber(meta["absorber"]["length"], meta["absorber"]["strength"]),
                             tolerance=meta["tolerance"])
    res = exact_scattering(tully_model(str(data["model"][i])), float(data["momentum"][i]), float(data["position"][i]),
                           float(data["position_width"][i]), initial_state=int(data["initial_state"][i]), settings=settings)
    assert res.details["grid"].npoints[0] == n
    return res


def test_stored_reference_data_match_a_fresh_run():
    """src/mapdyn/data/exact_scattering.npz (tests/reference/make_exact_scattering.py) is reproducible:
    one stored case recomputed with the recorded packet and grid parameters agrees to 1e-8."""
    data, meta = _stored_reference()
    assert set(data["model"]) == {"tully1", "tully2", "tully3", "wide_crossing"}
    assert np.all(data["convergence_deviation"] < 1e-3)
    wide = data["model"] == "wide_crossing"
    assert np.all(np.abs(data["transmission"][wide, 1] - data["landau_zener"][wide]) < 1e-3)
    i = int(np.nonzero((data["model"] == "tully1") & (data["momentum"] == 20.0))[0][0])
    res = _recompute_stored_case(data, meta, i)
    assert np.max(np.abs(res.transmission - data["transmission"][i])) < 1e-8
    assert np.max(np.abs(res.reflection - data["reflection"][i])) < 1e-8


@pytest.mark.slow
def test_every_stored_case_reproduces():
    data, meta = _stored_reference()
    for i in range(data["model"].size):
        res = _recompute_stored_case(data, meta, i)
        assert np.max(np.abs(res.transmission - data["transmission"][i])) < 1e-8
        assert np.max(np.abs(res.reflection - data["reflection"][i])) < 1e-8
