"""Pure adiabatic-representation functions (mapdyn.core.adiabatic) against independent references.

Each check names its reference.  Tolerances: 1e-12 (absolute, on O(1) numbers) where the code and
the reference are both exact up to rounding of a few dozen floating-point operations; looser
tolerances are justified beside the check.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.integrate
import scipy.linalg

from mapdyn.core import adiabatic as ad


def random_symmetric(rng, f, scale=1.0):
    a = rng.normal(size=(f, f)) * scale
    return 0.5 * (a + a.T)


# ------------------------------------------------------------------------------ orthogonalisation
def test_lowdin_is_the_orthogonal_polar_factor():
    rng = np.random.default_rng(0)
    for f in (2, 3, 5):
        Q, _ = np.linalg.qr(rng.normal(size=(f, f)))
        S = Q + 0.05 * rng.normal(size=(f, f))  # an overlap matrix of slightly non-orthogonal states
        T = ad.lowdin_orthogonal(S)
        U, _ = scipy.linalg.polar(S, side="right")  # reference: scipy.linalg.polar, S = U P
        np.testing.assert_allclose(T, U, atol=1e-12)
        np.testing.assert_allclose(T.T @ T, np.eye(f), atol=1e-12)
    # a signed permutation (a trivial crossing) is already orthogonal: Löwdin leaves it unchanged
    S = np.array([[0.0, -1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    np.testing.assert_allclose(ad.lowdin_orthogonal(S), S, atol=1e-15)


# ------------------------------------------------------------------------------ propagator
def test_interpolated_propagator_for_constant_H_is_the_exponential():
    """Reference: scipy.linalg.expm(−iHΔt); a constant H makes every substep factor exact."""
    rng = np.random.default_rng(1)
    H = random_symmetric(rng, 3) + 1j * (lambda a: a - a.T)(rng.normal(size=(3, 3)))  # complex Hermitian
    for n in (1, 7):
        np.testing.assert_allclose(ad.interpolated_propagator(H, H, 2.3, n), scipy.linalg.expm(-1j * H * 2.3),
                                   atol=1e-12)


def test_interpolated_propagator_with_commuting_ends_is_exact():
    """H0, H1 diagonal in one basis: U = exp(−i ∫H dτ) = exp(−i (H0 + H1) Δt/2) (the midpoint rule
    integrates the linear H(τ) exactly); reference scipy.linalg.expm."""
    rng = np.random.default_rng(2)
    Q, _ = np.linalg.qr(rng.normal(size=(4, 4)))
    H0, H1 = Q @ np.diag(rng.normal(size=4)) @ Q.T, Q @ np.diag(rng.normal(size=4)) @ Q.T
    np.testing.assert_allclose(ad.interpolated_propagator(H0, H1, 1.7, 5),
                               scipy.linalg.expm(-1j * 0.5 * (H0 + H1) * 1.7), atol=1e-12)


def test_interpolated_propagator_is_second_order_in_the_substep():
    """Non-commuting ends: error against scipy.integrate.solve_ivp (DOP853, rtol = atol = 1e-12) of
    i dz/dτ = H(τ) z falls ≈ 4× per doubling of the substeps (second order; accept 3–5.5)."""
    rng = np.random.default_rng(3)
    H0 = random_symmetric(rng, 3)
    H1 = random_symmetric(rng, 3) - 1j * (lambda a: a - a.T)(rng.normal(size=(3, 3)) * 0.3)
    H1 = 0.5 * (H1 + H1.conj().T)
    dt = 1.5
    z0 = np.array([1.0, 0.3 - 0.2j, -0.5j])
    sol = scipy.integrate.solve_ivp(lambda t, z: -1j * (H0 + (t / dt) * (H1 - H0)) @ z, (0.0, dt), z0,
                                    method="DOP853", rtol=1e-12, atol=1e-12)
    exact = sol.y[:, -1]
    err = [np.abs(ad.interpolated_propagator(H0, H1, dt, n) @ z0 - exact).max() for n in (8, 16, 32)]
    assert err[-1] > 1e-8  # well above the reference's own error
    ratios = np.array(err[:-1]) / np.array(err[1:])
    assert np.all((ratios > 3.0) & (ratios < 5.5)), err


def test_sigma_from_overlap_is_the_time_derivative_coupling():
    """Two states rotating at angular velocity ω: ψ0 = (cos θ, sin θ), ψ1 = (−sin θ, cos θ), θ = ωt.
    Analytic σ_01 = ⟨ψ0|∂tψ1⟩ = −ω; the central difference gives −sin(ωΔt)/Δt (relative error
    (ωΔt)²/6 ≈ 1.7e-3 here)."""
    omega, dt = 0.01, 10.0

    def basis(t):
        c, s = np.cos(omega * t), np.sin(omega * t)
        return np.array([[c, -s], [s, c]])  # columns ψ0, ψ1

    S = basis(0.0).T @ basis(dt)
    sigma = ad.sigma_from_overlap(S, dt)
    assert abs(sigma[0, 1] / -omega - 1) < 2e-3 and abs(sigma[1, 0] / omega - 1) < 2e-3
    np.testing.assert_allclose(np.diag(sigma), 0.0, atol=0)


# ------------------------------------------------------------------------------ oscillators through a path
class ThreeStatePath:
    """Own 3-state diabatic model along one Cartesian coordinate (Eh, Bohr); gaps stay ≥ 0.02 Eh."""

    def H(self, r):
        return np.array([[0.03 * np.tanh(r), 0.01 * np.exp(-r * r), 0.002],
                         [0.01 * np.exp(-r * r), -0.03 * np.tanh(r), 0.006 * np.exp(-(r - 0.5) ** 2)],
                         [0.002, 0.006 * np.exp(-(r - 0.5) ** 2), 0.05 + 0.01 * r]])

    def dH(self, r):
        e1, e2 = np.exp(-r * r), np.exp(-(r - 0.5) ** 2)
        s = 0.03 / np.cosh(r) ** 2
        return np.array([[s, -0.02 * r * e1, 0.0],
                         [-0.02 * r * e1, -s, -0.012 * (r - 0.5) * e2],
                         [0.0, -0.012 * (r - 0.5) * e2, 0.01]])


def adiabatic_path(model, r, prev):
    """Energies and eigenvectors with signs aligned to ``prev`` (columns); d_kl from Hellmann–Feynman."""
    E, U = np.linalg.eigh(model.H(r))
    if prev is not None:
        U = U * np.sign(np.diag(prev.T @ U))
    g = U.T @ model.dH(r) @ U
    gap = E[None, :] - E[:, None]
    np.fill_diagonal(gap, 1.0)
    d = g / gap
    np.fill_diagonal(d, 0.0)
    return E, U, d


@pytest.mark.parametrize("route", ["overlap", "couplings"])
def test_oscillator_routes_follow_the_exact_electronic_dynamics(route):
    """R(t) = −2 + v t along x (v = 0.01 Bohr/a.u.), 400 a.u. through the coupling region of
    ThreeStatePath.  Reference: scipy.integrate.solve_ivp (DOP853, rtol = atol = 1e-11) of
    i dc/dt = H_d(R(t)) c in the diabatic basis, transformed to the adiabatic basis at the end.
    Both routes are second order in Δt: the error falls 3–5.5× per halving (ideal 4, measured
    3.99–4.00); at Δt = 5 a.u. measured 1.3e-3 (overlap) and 1.7e-3 (couplings) on |z| ≈ 1.4,
    bound 5e-3 (3× margin), far above the reference's own error (~1e-9)."""
    model, v, total = ThreeStatePath(), 0.01, 400.0
    V = np.array([[v, 0.0, 0.0]])
    E0, U0, _ = adiabatic_path(model, -2.0, None)
    z_start = np.array([1.2 + 0.1j, 0.3 - 0.5j, 0.2j])
    sol = scipy.integrate.solve_ivp(lambda t, c: -1j * model.H(-2.0 + v * t) @ c, (0.0, total), U0 @ z_start,
                                    method="DOP853", rtol=1e-11, atol=1e-11)
    errors = []
    for dt in (20.0, 10.0, 5.0):
        E, U, d = E0, U0, adiabatic_path(model, -2.0, None)[2]
        z = z_start.copy()
        for i in range(int(round(total / dt))):
            E1, U1, d1 = adiabatic_path(model, -2.0 + v * (i + 1) * dt, U)
            if route == "overlap":
                z, _ = ad.propagate_local_diabatization(z, E, E1, U.T @ U1, dt, 10)
            else:
                z, _ = ad.propagate_with_couplings(z, E, E1, d[:, :, None, None] * [1.0, 0, 0],
                                                   d1[:, :, None, None] * [1.0, 0, 0], V, dt, 10)
            E, U, d = E1, U1, d1
        errors.append(np.abs(z - U.T @ sol.y[:, -1]).max())
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    assert np.all((ratios > 3.0) & (ratios < 5.5)) and errors[-1] < 5e-3, (errors, ratios)


# ------------------------------------------------------------------------------ force averaging
def test_averaged_density_is_the_time_mean_of_the_free_density():
    """Reference: scipy.integrate.quad_vec of ρ_kl(τ) = ½(x_k x_l + p_k p_l)(τ) with
    z(τ) = e^{−iEτ} z over the window, divided by its length (quadrature error ~1e-14)."""
    x, p, E = np.array([1.2, -0.4, 0.3]), np.array([0.3, 0.9, -0.7]), np.array([-0.1, 0.05, 0.3])
    gamma = np.array([0.2, 0.1, -0.05])
    rho0 = 0.5 * (np.outer(x, x) + np.outer(p, p)) - np.diag(gamma)

    def rho_at(tau):
        z = (x + 1j * p) * np.exp(-1j * E * tau)
        return 0.5 * (np.outer(z.real, z.real) + np.outer(z.imag, z.imag)) - np.diag(gamma)

    for h in (7.0, -7.0, 40.0):
        lo, hi = min(0.0, h), max(0.0, h)
        ref = scipy.integrate.quad_vec(rho_at, lo, hi, epsabs=1e-13)[0] / (hi - lo)
        np.testing.assert_allclose(ad.averaged_density(rho0, x, p, E, h), ref, atol=1e-12)
    # Δt → 0 gives ρ itself (sinc(u) = 1 − u²/6: deviation ~1e-19 at h = 1e-9)
    np.testing.assert_allclose(ad.averaged_density(rho0, x, p, E, 1e-9), rho0, atol=1e-12)
    assert np.array_equal(np.diag(ad.averaged_density(rho0, x, p, E, 40.0)), np.diag(rho0))


# ------------------------------------------------------------------------------ force contraction
def random_electronic(rng, f=3, natoms=2):
    E = np.sort(rng.normal(size=f))
    G = rng.normal(size=(f, natoms, 3))
    d = rng.normal(size=(f, f, natoms, 3))
    d = 0.5 * (d - d.transpose(1, 0, 2, 3))
    rho = random_symmetric(rng, f)
    return rho, E, G, d


def explicit_force(rho, E, G, d):
    """−Σ_kl ρ_kl ⟨ψ_k|∇H|ψ_l⟩ with ⟨ψ_k|∇H|ψ_l⟩ = δ_kl ∇E_k + (E_l − E_k) d_kl, as a plain loop."""
    F = np.zeros(G.shape[1:])
    for k in range(len(E)):
        for l in range(len(E)):  # noqa: E741
            m = (G[k] if k == l else 0.0) + (E[l] - E[k]) * d[k, l]
            F -= rho[k, l] * m
    return F


def test_adiabatic_force_matches_the_explicit_loop():
    rng = np.random.default_rng(4)
    for _ in range(3):
        rho, E, G, d = random_electronic(rng)
        np.testing.assert_allclose(ad.adiabatic_force(rho, E, G, d), explicit_force(rho, E, G, d), atol=1e-13)


def test_adiabatic_force_equals_the_diabatic_force():
    """Basis independence: with ρ_ad = Uᵀ ρ_d U, −Σ ρ_ad,kl ⟨ψ_k|∇H|ψ_l⟩ = −Σ ρ_d,kl ∇H_d,kl.
    Independent reference: E_k gradients and d_kl = ⟨ψ_k|∂ψ_l⟩ by central finite differences
    (h = 1e-5 Bohr) of numpy.linalg.eigh, force from the analytic diabatic gradient.  Tolerance
    1e-7 Eh/Bohr: finite-difference error O(h²) × third derivatives (~1e-10) plus rounding
    ε/h ~ 1e-11, times the sizes of ρ."""
    rng = np.random.default_rng(5)
    f = 3
    A = random_symmetric(rng, f, 0.1) + np.diag([0.0, 0.3, 0.6])
    B = [random_symmetric(rng, f, 0.05) for _ in range(3)]
    C = random_symmetric(rng, f, 0.02)

    def H(R):  # one atom, R (3,) Bohr
        return A + sum(R[a] * B[a] for a in range(3)) + (R @ R) * C

    def dH(R, a):
        return B[a] + 2 * R[a] * C

    R = np.array([0.2, -0.1, 0.3])
    E, U = np.linalg.eigh(H(R))
    h = 1e-5
    G, d = np.zeros((f, 1, 3)), np.zeros((f, f, 1, 3))
    for a in range(3):
        e = np.zeros(3)
        e[a] = h
        (Ep, Up), (Em, Um) = np.linalg.eigh(H(R + e)), np.linalg.eigh(H(R - e))
        Up, Um = Up * np.sign(np.diag(U.T @ Up)), Um * np.sign(np.diag(U.T @ Um))
        G[:, 0, a] = (Ep - Em) / (2 * h)
        d[:, :, 0, a] = U.T @ (Up - Um) / (2 * h)
    d = 0.5 * (d - d.transpose(1, 0, 2, 3))  # the exact d is antisymmetric; removes O(h²) noise
    rho_d = random_symmetric(rng, f)
    rho_ad = U.T @ rho_d @ U
    F_dia = -np.array([np.sum(rho_d * dH(R, a)) for a in range(3)])
    np.testing.assert_allclose(ad.adiabatic_force(rho_ad, E, G, d)[0], F_dia, atol=1e-7)


def test_projected_force_is_exact_when_the_couplings_lie_along_the_velocity():
    """d_kl = c_kl u with V ∥ u: σ = V·d and d ≈ σV/|V|² are exact, so the projected force equals
    the explicit loop; couplings ⟂ V add nothing; below the velocity floor only −Σ ρ_kk ∇E_k."""
    rng = np.random.default_rng(6)
    rho, E, G, _ = random_electronic(rng)
    u = rng.normal(size=(2, 3))
    u /= np.linalg.norm(u)
    c = (lambda a: a - a.T)(rng.normal(size=(3, 3)))
    d = c[:, :, None, None] * u
    V = 0.004 * u
    sigma = ad.velocity_couplings(d, V)
    np.testing.assert_allclose(ad.projected_force(rho, E, G, sigma, V, 1e-5), explicit_force(rho, E, G, d), atol=1e-12)
    w = rng.normal(size=(2, 3))
    w -= np.sum(w * u) * u  # ⟂ u
    d_perp = c[:, :, None, None] * w
    np.testing.assert_allclose(ad.projected_force(rho, E, G, ad.velocity_couplings(d_perp, V), V, 1e-5),
                               explicit_force(rho, E, G, np.zeros_like(d)), atol=1e-12)
    np.testing.assert_allclose(ad.projected_force(rho, E, G, sigma, V, 1.0),
                               explicit_force(rho, E, G, np.zeros_like(d)), atol=1e-12)


def test_projection_extrapolation_is_exact_for_linear_histories():
    """σ(t) = A + Bt, V(t) = C + Dt sampled at two mid-steps: the linear extrapolation returns the
    line itself (reference: the line evaluated at t)."""
    rng = np.random.default_rng(7)
    A, B, C, D = rng.normal(size=(2, 2)), rng.normal(size=(2, 2)), rng.normal(size=(1, 3)), rng.normal(size=(1, 3))
    hist = [(t, A + B * t, C + D * t) for t in (3.0, 5.0)]
    s, v = ad.extrapolate_projection(hist, 6.0)
    np.testing.assert_allclose(s, A + 6.0 * B, atol=1e-12)
    np.testing.assert_allclose(v, C + 6.0 * D, atol=1e-12)
    s1, v1 = ad.extrapolate_projection(hist[:1], 6.0)
    assert s1 is hist[0][1] and v1 is hist[0][2]


# ------------------------------------------------------------------------------ checks and energies
def test_gap_resolution_message():
    """ΔE = 0.3 Eh: Δt = 20 a.u. turns the coherence by 6 rad per step (> 1 rad) → message when the
    pair is coupled (|σ|Δt = 0.02 > 1e-3), None when uncoupled or when Δt = 2 a.u. (0.6 rad)."""
    E = np.array([0.0, 0.3])
    sigma = np.array([[0.0, 1e-3], [-1e-3, 0.0]])
    msg = ad.gap_resolution_message(E, sigma, 20.0, 7, True)
    assert msg.startswith(ad.GAP_WARNING) and "ΔE·Δt = 6.00" in msg and "at step 7" in msg
    assert "force_averaging is off" in ad.gap_resolution_message(E, sigma, 20.0, 7, False)
    assert ad.gap_resolution_message(E, 1e-6 * sigma, 20.0, 7, True) is None
    assert ad.gap_resolution_message(E, sigma, 2.0, 7, True) is None


def test_total_energy_is_kinetic_plus_population_weighted_energies():
    """Reference: Σ_i |P_i|²/(2m_i) + Σ_k ρ_kk E_k summed atom by atom and state by state."""
    rng = np.random.default_rng(8)
    P, m = rng.normal(size=(3, 3)) * 10, np.array([1836.0, 21874.0, 29156.0])
    rho, E = random_symmetric(rng, 3), rng.normal(size=3)
    ref = sum(P[i] @ P[i] / (2 * m[i]) for i in range(3)) + sum(rho[k, k] * E[k] for k in range(3))
    assert abs(ad.mapping_total_energy(P, m, rho, E) - ref) < 1e-12


def test_remove_total_momentum():
    """Zero total linear and angular momentum (L = Σ r_i × P_i about the centre of mass, computed
    directly); a rigid translation + rotation m_i(v + ω × r_i) added to cleaned momenta is removed
    again (rigid-body kinematics); a linear molecule keeps its (singular) axis untouched."""
    rng = np.random.default_rng(9)
    R, P, m = rng.normal(size=(5, 3)), rng.normal(size=(5, 3)), rng.uniform(1, 20, size=5)
    com = (m[:, None] * R).sum(0) / m.sum()
    Q = ad.remove_total_momentum(R, P, m)
    np.testing.assert_allclose(Q.sum(0), 0.0, atol=1e-12)
    np.testing.assert_allclose(np.cross(R - com, Q).sum(0), 0.0, atol=1e-12)
    v, w = rng.normal(size=3), rng.normal(size=3)
    rigid = m[:, None] * (v + np.cross(w, R - com))
    np.testing.assert_allclose(ad.remove_total_momentum(R, Q + rigid, m), Q, atol=1e-12)
    only_linear = ad.remove_total_momentum(R, P, m, angular=False)
    np.testing.assert_allclose(only_linear.sum(0), 0.0, atol=1e-12)
    assert np.abs(np.cross(R - com, only_linear).sum(0)).max() > 1e-3  # angular part left alone
    Rl = np.outer([0.0, 1.1, 2.5], [0.0, 0.0, 1.0])  # atoms on the z axis
    Ql = ad.remove_total_momentum(Rl, P[:3], m[:3])
    comz = (m[:3] * Rl[:, 2]).sum() / m[:3].sum()
    np.testing.assert_allclose(np.cross(Rl - [0, 0, comz], Ql).sum(0), 0.0, atol=1e-12)
    np.testing.assert_allclose(Ql.sum(0), 0.0, atol=1e-12)
