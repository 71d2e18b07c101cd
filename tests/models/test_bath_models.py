"""Bath and vibronic models, thermal Wigner bath sampling, the harmonic-bath (stiff) integrator.

Conventions under test (docs/theory.md#spin-boson-model): H = ε σ_z + Δ σ_x + Σ_j [P_j²/2 + ½ω_j²Q_j² + c_j Q_j σ_z],
σ_z = diag(1, −1), no factors ½; J(ω) = (π/2) Σ c_j²/ω_j δ(ω − ω_j); λ = Σ c²/2ω² = (1/π)∫J/ω dω.
"""

import numpy as np
import pytest
from scipy import integrate, optimize

from mapdyn.core.harmonic_bath import HarmonicBathIntegrator
from mapdyn.core.mapping import actions
from mapdyn.core.options import MethodOptions
from mapdyn.core.propagators import DiabaticIntegrator
from mapdyn.core.sampling import gaussian_wavepacket_ensemble
from mapdyn.models.callable import CallableModel
from mapdyn.models.spin_boson import (
    ExcitonTransferModel,
    SpinBoson,
    debye_modes,
    debye_spectral_density,
    ohmic_modes,
    ohmic_spectral_density,
    thermal_bath_ensemble,
    thermal_bath_widths,
)
from mapdyn.models.vibronic import LinearVibronicModel

TRIANGLE = MethodOptions(window="triangle")


def reorganization_integral(J, upper):
    """(1/π)∫_0^upper J(ω)/ω dω with scipy.integrate.quad (reference library)."""
    val, err = integrate.quad(lambda w: J(w) / w, 0.0, upper, limit=500, epsabs=0, epsrel=1e-12)
    return val / np.pi


# ----------------------------------------------------------------------------- discretisations
@pytest.mark.parametrize("nmodes", [10, 100])
def test_debye_midpoint_rule_reproduces_reorganization_integral(nmodes):
    lam, wc = 0.02, 0.005
    w, c = debye_modes(lam, wc, nmodes)
    ref = reorganization_integral(lambda x: debye_spectral_density(x, lam, wc), np.inf)
    assert abs(ref - lam) < 1e-10 * lam  # quad confirms the analytic λ of the Debye density
    assert np.sum(c ** 2 / (2 * w ** 2)) == pytest.approx(ref, rel=1e-10)  # exact rule, quad accuracy
    # the endpoint rule carries N/(N+1) of it (docs/theory.md#spin-boson-model)
    w2, c2 = debye_modes(lam, wc, nmodes, rule="endpoint")
    assert np.sum(c2 ** 2 / (2 * w2 ** 2)) == pytest.approx(ref * nmodes / (nmodes + 1), rel=1e-10)
    assert w.max() > 0.6 * nmodes * wc  # tangent rule: ω_max ≈ (4N/π) ω_c, the stiff-bath problem


def test_mode_frequencies_follow_the_spectral_density():
    """Cumulative reorganisation Σ_{ω_j<Ω} c_j²/2ω_j² against (1/π)∫_0^Ω J/ω dω (quad) at several Ω:
    tests the frequency density, not only the sum rule.  A rule with one mode per 1/N of λ can be off
    by at most half a mode (midpoint, Debye) or one mode (endpoint, Ohmic): tolerance λ/(2N), λ_mode."""
    lam, wc, N = 0.25, 1.0, 60
    w, c = debye_modes(lam, wc, N)
    xi = 0.2
    wo, co = ohmic_modes(xi, wc, N, omega_max=6.0)
    for cut in (0.1, 0.7, 1.0, 3.0, 20.0, 100.0):
        ref = reorganization_integral(lambda x: debye_spectral_density(x, lam, wc), cut)
        got = np.sum((c ** 2 / (2 * w ** 2))[w < cut])
        assert abs(got - ref) <= lam / (2 * N) + 1e-12
        if cut < 6.0:
            ref = reorganization_integral(lambda x: ohmic_spectral_density(x, xi, wc), cut)
            got = np.sum((co ** 2 / (2 * wo ** 2))[wo < cut])
            assert abs(got - ref) <= np.max(co ** 2 / (2 * wo ** 2)) * (1 + 1e-9)


@pytest.mark.parametrize("omega_max", [None, 3.0, 8.0])
def test_ohmic_rule_reproduces_truncated_reorganization_integral(omega_max):
    xi, wc, N = 0.1, 1.0, 40
    w, c = ohmic_modes(xi, wc, N, omega_max=omega_max)
    upper = wc * np.log(N + 1) if omega_max is None else omega_max
    assert w.max() == pytest.approx(upper, rel=1e-12)
    ref = reorganization_integral(lambda x: ohmic_spectral_density(x, xi, wc), upper)
    assert np.sum(c ** 2 / (2 * w ** 2)) == pytest.approx(ref, rel=1e-10)
    full = reorganization_integral(lambda x: ohmic_spectral_density(x, xi, wc), np.inf)
    assert full == pytest.approx(xi * wc / 2, rel=1e-10)
    assert np.sum(c ** 2 / (2 * w ** 2)) < full  # only the truncated integral is reproduced


# ---------------------------------------------------------------------------- Hamiltonians
def test_spin_boson_matrix_elements_and_gradient():
    rng = np.random.default_rng(3)
    eps, delta = 0.3, 0.7
    w, c = debye_modes(0.4, 1.0, 6)
    model = SpinBoson(eps, delta, w, c)
    R = rng.normal(size=(4, 6))
    H = model.hamiltonian(R)
    V0 = 0.5 * np.sum(w ** 2 * R ** 2, axis=1)
    cQ = R @ c
    # docs/theory.md#spin-boson-model written out: H11 = V0 + ε + Σ cQ, H22 = V0 − ε − Σ cQ, H12 = Δ
    assert np.allclose(H[:, 0, 0], V0 + eps + cQ, rtol=0, atol=1e-13)
    assert np.allclose(H[:, 1, 1], V0 - eps - cQ, rtol=0, atol=1e-13)
    assert np.allclose(H[:, 0, 1], delta) and np.allclose(H[:, 1, 0], delta)
    # gradient contraction against central finite differences of Σ ρ_kl H_kl (h = 1e-5, error ~h²)
    A = rng.normal(size=(4, 2, 2))
    rho = A + np.swapaxes(A, 1, 2)
    g = model.contract_gradient(R, rho)
    h = 1e-5
    fd = np.empty_like(R)
    for j in range(6):
        d = np.zeros(6)
        d[j] = h
        fd[:, j] = (np.einsum("nkl,nkl->n", rho, model.hamiltonian(R + d) - model.hamiltonian(R - d))) / (2 * h)
    assert np.allclose(g, fd, rtol=0, atol=1e-7)
    assert np.allclose(g, np.einsum("nkl,ndkl->nd", rho, model.hamiltonian_gradient(R)), rtol=0, atol=1e-13)


def test_marcus_conventions_from_explicit_minimisation():
    """ΔG = min H22 − min H11 = −2ε and λ_M = H22(Q*_1) − H22(Q*_2) = Σ 2c²/ω² = 4λ (docs/theory.md#spin-boson-model),
    minima found by scipy.optimize (no use of the model's own minimum formula)."""
    eps = 0.01
    model = SpinBoson.debye(eps, 1e-4, 0.005, 0.002, 5)
    Hkk = [lambda q, k=k: model.hamiltonian(q[None])[0, k, k] for k in (0, 1)]
    mins = [optimize.minimize(f, np.zeros(5), method="BFGS", options=dict(gtol=1e-12)) for f in Hkk]
    assert mins[1].fun - mins[0].fun == pytest.approx(-2 * eps, abs=1e-9)
    assert model.driving_force == pytest.approx(-2 * eps)
    lam_m = Hkk[1](mins[0].x) - mins[1].fun
    assert lam_m == pytest.approx(model.marcus_reorganization, rel=1e-6)
    assert model.marcus_reorganization == pytest.approx(4 * 0.005, rel=1e-12)
    assert np.allclose(model.diabatic_minimum(0), mins[0].x, atol=1e-5)
    assert model.reorganization_energies()[0, 1] == pytest.approx(model.marcus_reorganization, rel=1e-12)


def test_linear_vibronic_from_dimensionless_coordinates():
    """H(q) = Σ ω/2 q² + E_k + κ q (diag) + λ q (off-diag) with q = √ω Q (Köppel–Domcke–Cederbaum
    form, ħ = 1), compared element by element."""
    rng = np.random.default_rng(5)
    E = np.array([0.0, 0.05, 0.08])
    w = np.array([0.004, 0.01])
    kappa = rng.normal(scale=0.01, size=(3, 2))
    lam = rng.normal(scale=0.003, size=(2, 3, 3))
    lam = 0.5 * (lam + np.swapaxes(lam, 1, 2))
    model = LinearVibronicModel.from_dimensionless(E, w, kappa, lam)
    Q = rng.normal(scale=10.0, size=(3, 2))
    q = Q * np.sqrt(w)
    H = model.hamiltonian(Q)
    for n in range(3):
        ref = np.diag(E + kappa @ q[n]) + np.sum(0.5 * w * q[n] ** 2) * np.eye(3)
        for j in range(2):
            ref += q[n, j] * lam[j] * (1 - np.eye(3))
        assert np.allclose(H[n], ref, rtol=0, atol=1e-14)
    A = rng.normal(size=(3, 3, 3))
    rho = A + np.swapaxes(A, 1, 2)
    h = 1e-4
    fd = np.stack([np.einsum("nkl,nkl->n", rho, model.hamiltonian(Q + h * np.eye(2)[j])
                             - model.hamiltonian(Q - h * np.eye(2)[j])) / (2 * h) for j in range(2)], axis=1)
    assert np.allclose(model.contract_gradient(Q, rho), fd, rtol=1e-8, atol=1e-12)


def test_exciton_model_one_debye_bath_per_site():
    h = np.array([[0.0, 0.001, 0.0], [0.001, 0.002, 0.0005], [0.0, 0.0005, 0.001]])
    model = ExcitonTransferModel.debye(h, [0.001, 0.002, 0.003], 0.0005, 8)
    assert model.nstates == 3 and model.ndof == 24
    assert np.allclose(model.site_reorganization, [0.001, 0.002, 0.003], rtol=1e-12)
    rng = np.random.default_rng(1)
    R = rng.normal(size=(2, 24))
    H = model.hamiltonian(R)
    V0 = 0.5 * np.sum(model.frequencies ** 2 * R ** 2, axis=1)
    for n in range(3):
        block = slice(8 * n, 8 * n + 8)
        assert np.allclose(H[:, n, n], V0 + h[n, n] + R[:, block] @ model.site_couplings[n], atol=1e-14)
    assert np.allclose(H[:, 0, 1], 0.001) and np.allclose(H[:, 0, 2], 0.0)


# ------------------------------------------------------------------------------ sampling
def test_thermal_wigner_moments_and_donor_centre():
    """⟨Q²⟩ = coth(βω/2)/(2ω), ⟨P²⟩ = (ω/2)coth(βω/2) (textbook; docs/theory.md#validation-benchmarks), mean −c/ω² for the
    donor-equilibrated bath; 4000 samples, tolerance 4 standard errors, fixed seed."""
    model = SpinBoson(0.0, 0.1, [0.5, 2.0, 6.0], [0.3, 0.8, 1.5])
    beta, n = 1.0, 4000
    st = thermal_bath_ensemble(model, n, 11, beta, 0, TRIANGLE, bath_center="donor")
    w = model.frequencies
    coth = 1 / np.tanh(beta * w / 2)
    q0 = -model.bath_couplings / w ** 2
    dq = st.R - q0
    for data, var in ((dq, coth / (2 * w)), (st.P, w * coth / 2)):
        m2 = (data ** 2).mean(axis=0)
        se = np.sqrt(2.0) * var / np.sqrt(n)  # s.e. of a Gaussian second moment
        assert np.all(np.abs(m2 - var) < 4 * se)
    assert np.all(np.abs(st.R.mean(axis=0) - q0) < 4 * np.sqrt(coth / (2 * w) / n))
    zero = thermal_bath_ensemble(model, n, 11, beta, 0, TRIANGLE)
    assert np.allclose(zero.R - st.R, -q0)  # same stream, only the centre moves
    sQ, sP = thermal_bath_widths(model, np.inf)
    assert np.allclose(sQ * sP, 0.5)  # T = 0: minimum-uncertainty ground state


def test_bath_sampling_follows_the_common_stream_and_draw_order():
    """At T = 0 the Wigner bath is the Gaussian packet of width σ_Q = (2ω)^(−1/2): the independent
    wavepacket sampler of mapdyn.core.sampling must give the same numbers trajectory by trajectory."""
    model = SpinBoson(0.1, 0.2, [0.5, 1.0, 3.0], [0.1, 0.2, 0.3])
    opts = MethodOptions(window="square", zero_point="adjusted")
    a = thermal_bath_ensemble(model, 7, 42, np.inf, 1, opts, first_index=3)
    b = gaussian_wavepacket_ensemble(model, 7, 42, 0.0, 0.0, np.sqrt(0.5 / model.frequencies), 1, opts,
                                     basis="diabatic", first_index=3)
    for name in ("R", "P", "x", "p", "gamma_adjusted", "indices"):
        assert np.allclose(getattr(a, name), getattr(b, name), rtol=0, atol=1e-15), name


def test_bad_input_is_refused_with_named_parameter():
    model = SpinBoson.debye(0.0, 1.0, 0.25, 1.0, 4)
    with pytest.raises(ValueError, match="bath_center"):
        thermal_bath_ensemble(model, 2, 0, 1.0, 0, TRIANGLE, bath_center="acceptor")
    with pytest.raises(ValueError, match="beta"):
        thermal_bath_ensemble(model, 2, 0, -1.0, 0, TRIANGLE)
    with pytest.raises(ValueError, match="cutoff"):
        debye_modes(0.1, 0.0, 5)
    with pytest.raises(ValueError, match="rule"):
        debye_modes(0.1, 1.0, 5, rule="trapezoid")
    with pytest.raises(ValueError, match="frequencies"):
        SpinBoson(0.0, 1.0, [1.0, -1.0], [0.1, 0.1])
    with pytest.raises(ValueError, match="hamiltonian returned shape"):
        CallableModel(lambda R: np.zeros((3, 3)), lambda R: 0, 2, 1, 1.0, batched=False).hamiltonian([[0.0]])
    with pytest.raises(ValueError, match="not symmetric"):
        CallableModel(lambda R: np.array([[0.0, 1.0], [0.0, 0.0]]), lambda R: 0, 2, 1, 1.0,
                      batched=False).hamiltonian([[0.0]])


# ------------------------------------------------------------------------------ callable
def _explicit_spin_boson(eps, delta, w, c):
    """The same spin-boson Hamiltonian written out per geometry (independent of the model code)."""
    def H(q):
        v0 = 0.5 * np.dot(w * w, q * q)
        s = np.dot(c, q)
        return np.array([[v0 + eps + s, delta], [delta, v0 - eps - s]])

    def dH(q):
        out = np.zeros((q.size, 2, 2))
        out[:, 0, 0] = w * w * q + c
        out[:, 1, 1] = w * w * q - c
        return out
    return H, dH


@pytest.mark.parametrize("batched", [False, True])
def test_callable_model_gives_identical_trajectories(batched):
    eps, delta = 0.2, 0.5
    w, c = debye_modes(0.3, 1.0, 5)
    builtin = SpinBoson(eps, delta, w, c)
    H, dH = _explicit_spin_boson(eps, delta, w, c)
    if batched:
        user = CallableModel(lambda R: np.array([H(r) for r in R]), lambda R: np.array([dH(r) for r in R]),
                             2, 5, np.ones(5), batched=True)
    else:
        user = CallableModel(H, dH, 2, 5, np.ones(5), batched=False)
    st = thermal_bath_ensemble(builtin, 6, 9, 2.0, 0, TRIANGLE)
    a, b = st.copy(), st.copy()
    ia, ib = DiabaticIntegrator(builtin, TRIANGLE, 0.02), DiabaticIntegrator(user, TRIANGLE, 0.02)
    for _ in range(200):
        ia.step(a)
        ib.step(b)
    for name in ("R", "P", "x", "p"):  # same H, same integrator: agreement to rounding
        assert np.allclose(getattr(a, name), getattr(b, name), rtol=0, atol=1e-10), name


# ---------------------------------------------------------------------- stiff-bath integrator
def _mean_sigma_z(model, integrator_cls, state, dt, t_end, every, **kw):
    s = state.copy()
    integ = integrator_cls(model, TRIANGLE, dt, **kw)
    out, e0 = [], integ.energy(s)
    nsteps, stride = int(round(t_end / dt)), int(round(every / dt))
    for i in range(1, nsteps + 1):
        integ.step(s)
        if i % stride == 0:
            e = actions(s.x, s.p)
            out.append((e[:, 0] - e[:, 1]).mean())
    return np.array(out), np.abs(integ.energy(s) - e0), e0


def test_harmonic_flow_is_exact_when_the_electrons_are_frozen():
    """Δ = 0: σ_z is conserved and each mode is a displaced oscillator,
    Q(t) = Q* + (Q0 − Q*) cos ωt + (P0/ω) sin ωt, Q* = −c σ/ω² (textbook), for any step."""
    model = SpinBoson.debye(0.1, 0.0, 0.25, 1.0, 50)  # ω_max ≈ 64 ω_c
    st = thermal_bath_ensemble(model, 5, 1, 1.0, 0, TRIANGLE)
    rho = HarmonicBathIntegrator(model, TRIANGLE, 0.37).density(st)
    sigma = rho[:, 0, 0] - rho[:, 1, 1]
    w, c = model.frequencies, model.bath_couplings
    qstar = -c * sigma[:, None] / w ** 2
    s = st.copy()
    integ = HarmonicBathIntegrator(model, TRIANGLE, 0.37)
    for _ in range(40):
        integ.step(s)
    t = 40 * 0.37
    ref = qstar + (st.R - qstar) * np.cos(w * t) + st.P / w * np.sin(w * t)
    assert np.allclose(s.R, ref, rtol=0, atol=1e-10)


def test_stiff_bath_step_set_by_cutoff_not_by_highest_frequency():
    """Debye bath, 100 modes, ω_max = 127 ω_c.  Reference: the plain integrator with ω_max·dt = 0.13
    (converged: halving its step changes ⟨σ_z⟩ by < 1e-5).  The harmonic-bath integrator at
    dt = 0.05/ω_c (ω_max dt = 6.4, where the plain Verlet-type step is unstable, ω dt > 2) must give
    the same ⟨σ_z⟩(t) on identical initial conditions within 2e-3 (measured 2.4e-4) and conserve the
    energy to 0.1 % of its value (measured 2.3e-4 relative, mean over trajectories); without averaging
    the top mode is aliased (ω_max dt ≈ 2π) and the error is > 0.05 (measured 0.31) although the energy
    is then exact (measured 2e-14 relative).  The plain step at the same dt is already off by > 0.05."""
    model = SpinBoson.debye(0.0, 1.0, 0.25, 1.0, 100)
    st = thermal_bath_ensemble(model, 100, 1, 1.0, 0, TRIANGLE)
    ref, _, _ = _mean_sigma_z(model, DiabaticIntegrator, st, 0.001, 5.0, 0.5)
    avg, dE, e0 = _mean_sigma_z(model, HarmonicBathIntegrator, st, 0.05, 5.0, 0.5)
    assert np.abs(avg - ref).max() < 2e-3
    assert dE.mean() < 1e-3 * e0.mean()
    raw, dE_raw, _ = _mean_sigma_z(model, HarmonicBathIntegrator, st, 0.05, 5.0, 0.5, averaged=False)
    assert np.abs(raw - ref).max() > 0.05
    assert dE_raw.max() < 1e-9 * e0.mean()
    with np.errstate(all="ignore"):
        plain, _, _ = _mean_sigma_z(model, DiabaticIntegrator, st, 0.05, 1.0, 0.5)
    assert not np.all(np.isfinite(plain)) or np.abs(plain - ref[:2]).max() > 0.05


def test_stiff_integrator_second_order_and_general_trace_path():
    """Error vs a fine plain reference falls ~4× per halving of dt (second order); the general
    Tr ρ ≠ 1 path (zero_point='fixed') is checked the same way, and the Tr ρ = 1 fast path agrees with
    the general code to rounding.  Measured: errors 1.1e-4 and 2.8e-5 (ratio 4.0); fixed path 2e-5 with
    energy error 1.5e-3 on E ≈ 22."""
    model = SpinBoson.debye(0.2, 1.0, 0.25, 1.0, 12)  # ω_max ≈ 15 ω_c
    st = thermal_bath_ensemble(model, 60, 4, 1.0, 0, TRIANGLE)
    ref, _, _ = _mean_sigma_z(model, DiabaticIntegrator, st, 0.0005, 3.0, 0.5)
    e1 = np.abs(_mean_sigma_z(model, HarmonicBathIntegrator, st, 0.05, 3.0, 0.5)[0] - ref).max()
    e2 = np.abs(_mean_sigma_z(model, HarmonicBathIntegrator, st, 0.025, 3.0, 0.5)[0] - ref).max()
    assert 2.8 < e1 / e2 < 5.5 and e2 < 1e-3
    a, b = st.copy(), st.copy()
    fast, slow = HarmonicBathIntegrator(model, TRIANGLE, 0.1), HarmonicBathIntegrator(model, TRIANGLE, 0.1)
    slow._fast = None
    for _ in range(50):
        fast.step(a)
        slow.step(b)
    assert np.allclose(a.R, b.R, atol=1e-11) and np.allclose(a.x, b.x, atol=1e-11)
    fixed = MethodOptions(window="square", zero_point="fixed")
    sf = thermal_bath_ensemble(model, 60, 4, 1.0, 0, fixed)

    def run(cls, dt):
        s, integ = sf.copy(), cls(model, fixed, dt)
        for _ in range(int(round(3.0 / dt))):
            integ.step(s)
        e = actions(s.x, s.p)
        return (e[:, 0] - e[:, 1]).mean(), np.abs(integ.energy(s) - integ.energy(sf)).max()
    r, _ = run(DiabaticIntegrator, 0.0005)
    h, dE = run(HarmonicBathIntegrator, 0.02)
    assert abs(h - r) < 1e-3 and dE < 1e-2


def test_stiff_integrator_with_callable_nonlinear_path():
    """A callable model declaring harmonic_frequencies takes the K·E·A·E·K path; it must converge to
    the plain reference: within 5e-3 at dt = 0.02 with ω_max dt = 0.3 (measured 4e-4, and 1e-4 at
    dt = 0.01: second order), energy within 0.3 % (measured 0.085 %)."""
    w, c = debye_modes(0.25, 1.0, 12)
    H, dH = _explicit_spin_boson(0.2, 1.0, w, c)
    user = CallableModel(H, dH, 2, 12, 1.0, batched=False, harmonic_frequencies=w)
    model = SpinBoson(0.2, 1.0, w, c)
    st = thermal_bath_ensemble(model, 20, 4, 1.0, 0, TRIANGLE)
    ref, _, _ = _mean_sigma_z(model, DiabaticIntegrator, st, 0.001, 2.0, 0.5)
    got, dE, e0 = _mean_sigma_z(user, HarmonicBathIntegrator, st, 0.02, 2.0, 0.5)
    assert np.abs(got - ref).max() < 5e-3
    assert dE.max() < 3e-3 * e0.mean()


def test_stiff_integrator_on_a_three_site_exciton_model():
    """F = 3 (general-F fast path): mean site actions at t = 3 agree with the plain integrator at
    dt = 0.001 within 3e-3 at dt = 0.5 (ω_max dt = 3.2; measured 1.1e-3, and 1.9e-4 at dt = 0.2)."""
    h = np.array([[0.5, 0.4, 0.0], [0.4, 0.0, 0.3], [0.0, 0.3, -0.4]])
    model = ExcitonTransferModel.debye(h, 0.2, 0.5, 10)
    st = thermal_bath_ensemble(model, 40, 8, 2.0, 0, TRIANGLE, bath_center="donor")

    def pops(cls, dt):
        s, integ = st.copy(), cls(model, TRIANGLE, dt)
        for _ in range(int(round(3.0 / dt))):
            integ.step(s)
        return actions(s.x, s.p).mean(axis=0)
    assert np.abs(pops(HarmonicBathIntegrator, 0.5) - pops(DiabaticIntegrator, 0.001)).max() < 3e-3
