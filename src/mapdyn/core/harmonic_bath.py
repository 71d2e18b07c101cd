"""Stiff-bath integrator: the harmonic part of the bath is propagated exactly.

For a model whose Hamiltonian splits as H(R) = V0(R)·1 + H_sys(R), V0 = Σ_j ½ m_j ω_j² R_j²
(spin-boson, linear vibronic and site-exciton models; a callable model that declares
``harmonic_frequencies``), the MMST energy is

    E = Σ P²/2m + Tr ρ · V0(R) + Σ_kl ρ_kl H_sys,kl(R),

and Tr ρ is a constant of the motion (Σ e conserved; Tr ρ = 1 for symmetrized/adjusted/Ehrenfest,
Σe − Fγ for ``fixed``).  The V0·1 part only adds a global phase to z = x + ip, which no observable
sees, so the oscillators are propagated with H_sys alone.  Per step Δt = h:

**Linear system coupling** (∂H_sys/∂R = G independent of R: spin-boson, LVC, site-exciton),
default ``averaged=True``:

    E(h/2; R̄⁻) · A(h) · E(h/2; R̄⁺)

A: (R, P) follow m R̈ = −Tr ρ m ω² R − g(t) exactly, with g = Σ_kl ρ_kl G_kl ramped linearly
   through its values before (g₀) and after (g½) the first oscillator half-step,
   g(t) = g₀ + 2(g½ − g₀) t/h (closed form: R(t) = C R0 + S P0/m − W g₀/m − X ġ/m,
   P(t) = C P0 − mΩ² S R0 − S g₀ − W ġ, with Ω² = Tr ρ ω², C = cos Ωt, S = sin Ωt/Ω,
   W = (1 − C)/Ω², X = (t − S)/Ω²);
E: z ← exp(−i H_sys(R̄) h/2) z, with R̄ the exact time average of R over that half of the A flow
   (first-order Magnus; exact time-integral of H_sys since H_sys is linear in R).  R̄⁻ uses g₀.
Averaging is what makes the step independent of ω_max: a bath mode with ω_j h ≈ 2πk sampled at
step points would look static to the oscillators (aliasing) and dephase them spuriously; its
time average is small, as in the exact dynamics.  The price: the energy is conserved to O(h)
(random-walk error from the unresolved fast-mode coupling energy), not exactly.
``averaged=False`` gives the plain E(h/2)·A(h)·E(h/2) with H_sys at the step points and g frozen:
every sub-step then conserves E exactly, so the energy is conserved to rounding for any h, but
modes near ω_j h = 2πk are aliased (tests/test_models_bath.py shows both).

**R-dependent ∂H_sys** (e.g. a callable model): K(h/2) E(h/2) A(h) E(h/2) K(h/2) with
K: P ← P − (h/2) Σ ρ ∇H_sys and A the exact rotation under Tr ρ · V0 (g = 0); accurate only while
the stiff modes' coupling is resolved (ω_max h < π), but stable beyond.

The unaveraged variants are symmetric compositions of exact sub-flows whose vector fields add up
to the MMST field, hence time-reversible and second order; the averaged variant replaces the
oscillator sub-flows by their first-order Magnus form along the exact bath flow (nearly but not
exactly reversible, since R̄⁻ uses g₀) and is second order in ⟨σ_z⟩(t) as measured in
tests/test_models_bath.py.  No sub-step resolves ω_j.  The idea is that of
multiple-time-step / mollified-impulse integrators (Tuckerman, Berne & Martyna, J. Chem. Phys. 97,
1990 (1992); García-Archilla, Sanz-Serna & Skeel, SIAM J. Sci. Comput. 20, 930 (1998); both from
memory) with the stiff harmonic part solved analytically.  Cost per step: two H_sys evaluations
and two force contractions (one of each for ``averaged=False``), all O(n·D·F²).
"""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np
from scipy.linalg.blas import dgemm as _dgemm

from mapdyn.core.options import MethodOptions
from mapdyn.core.propagators import MappingEnsemble, propagate_amplitudes
from mapdyn.core.sampling import EnsembleState

__all__ = ["HarmonicBathIntegrator", "harmonic_flow_coefficients"]


def harmonic_flow_coefficients(omega2: np.ndarray, t: float):
    """C = cos Ωt, S = sin(Ωt)/Ω, W = (1 − cos Ωt)/Ω² for Ω² = ``omega2`` (any sign; cosh/sinh for Ω² < 0).

    Finite at Ω² = 0 (C = 1, S = t, W = t²/2).  Shapes follow ``omega2``; t in a.u.
    """
    omega2 = np.asarray(omega2, dtype=float)
    a = np.sqrt(np.abs(omega2))
    pos = omega2 >= 0
    x = a * t
    if np.all(pos):
        C = np.cos(x)
        S = t * np.sinc(x / np.pi)
        W = 0.5 * t * t * np.sinc(x / (2.0 * np.pi)) ** 2
        return C, S, W
    safe = np.where(a > 0, a, 1.0)
    Ch = np.cosh(x)
    Sh = np.where(a > 0, np.sinh(x) / safe, t)
    Wh = np.where(a > 0, 2.0 * np.sinh(0.5 * x) ** 2 / (safe * safe), 0.5 * t * t)
    C = np.where(pos, np.cos(x), Ch)
    S = np.where(pos, t * np.sinc(x / np.pi), Sh)
    W = np.where(pos, 0.5 * t * t * np.sinc(x / (2.0 * np.pi)) ** 2, Wh)
    return C, S, W


class HarmonicBathModel(Protocol):
    """What the integrator needs of a model: H = V0(R) + H_sys(R) with a harmonic reference V0
    (frequencies ω (N,) in 1/a.u. time, masses (N,) in electron masses), and the system part with
    its contracted gradient (Eh, Eh/Bohr)."""

    nstates: int
    masses: Any
    harmonic_frequencies: Any
    couplings: Any
    constant: Any

    def hamiltonian(self, R: np.ndarray) -> np.ndarray: ...

    def contract_gradient(self, R: np.ndarray, rho: np.ndarray) -> np.ndarray: ...

    def system_hamiltonian(self, R: np.ndarray) -> np.ndarray: ...

    def system_contract_gradient(self, R: np.ndarray, rho: np.ndarray) -> np.ndarray: ...


class HarmonicBathIntegrator(MappingEnsemble):
    """Batched MMST step with the harmonic reference V0 integrated exactly (see module docstring).

    Same interface as :class:`mapdyn.core.propagators.DiabaticIntegrator` (``step``, ``force``,
    ``energy``, ``density``), so it can be passed to :func:`mapdyn.core.propagators.run_diabatic` as
    ``integrator=``.  The model needs ``harmonic_frequencies`` (D,) (Eh), ``masses``,
    ``system_hamiltonian(R)`` and ``system_contract_gradient(R, rho)``.  dt in a.u.
    averaged : time-averaged H_sys in the oscillator steps (default; see module docstring).
    """

    def __init__(self, model: HarmonicBathModel, options: MethodOptions, dt: float,
                 averaged: bool = True):
        if not np.isfinite(dt) or dt <= 0:
            raise ValueError(f"dt={dt!r} is not allowed; the time step must be a positive number of a.u.")
        for attr in ("harmonic_frequencies", "system_hamiltonian", "system_contract_gradient"):
            if not hasattr(model, attr):
                raise ValueError(f"model {getattr(model, 'name', model)!r} has no {attr}; the harmonic-bath "
                                 "integrator needs a model with a harmonic reference V0 (e.g. spin-boson)")
        self.model, self.options, self.dt = model, options, float(dt)
        self._needs_gamma = options.method == "sqc" and options.zero_point == "adjusted"
        self._linear = bool(getattr(model, "system_gradient_is_constant", False))
        w = np.asarray(model.harmonic_frequencies, dtype=float)
        self._m = np.asarray(model.masses, dtype=float)
        self._w2 = w * w
        self._unit = harmonic_flow_coefficients(self._w2, self.dt)  # Tr ρ = 1 fast path
        Ch, Sh, Wh = harmonic_flow_coefficients(self._w2, 0.5 * self.dt)
        self._half_unit = (Ch, Sh, Wh, _third_integral(self._w2, 0.5 * self.dt, Sh),
                           _fourth_integral(self._w2, 0.5 * self.dt, Wh))
        self._unit_X = _third_integral(self._w2, self.dt, self._unit[1])
        if not isinstance(averaged, bool):
            raise ValueError(f"averaged={averaged!r} is not allowed; it must be True or False")
        self.averaged = averaged
        self._R_cached: np.ndarray | None = None
        self._fast: dict[str, np.ndarray] | None = None
        if self._linear and averaged and hasattr(model, "couplings") and hasattr(model, "constant"):
            self._fast = self._fast_coefficients(np.asarray(model.couplings, dtype=float))

    def _fast_coefficients(self, G: np.ndarray):
        """Matrices for the Tr ρ = 1 path of the averaged step, with H_sys(R) = A + Σ_j R_j G_j, so
        that H_sys(R̄) and the flow are assembled from (n, D)·(D, F²) products (no (n, D) temporaries
        for the averages).  Algebra: module docstring with g = ρ·G, ġ = (g½ − g₀)/(h/2)."""
        D, F, _ = G.shape
        G2 = G.reshape(D, F * F)
        G2T = G2.T
        m, tau = self._m, 0.5 * self.dt
        C, S, W = self._unit
        X = self._unit_X
        c, s, w, x, zz = self._half_unit
        k = m * self._w2
        MR = (s / tau)[:, None] * G2
        MP = (w / (m * tau))[:, None] * G2
        Mg0 = G2T @ ((x / (m * tau))[:, None] * G2)
        BR = np.vstack([G2T * ((W - X / tau) / m), G2T * (X / (tau * m))])
        BP = np.vstack([G2T * (S - W / tau), G2T * (W / tau)])
        Mgs = np.vstack([G2T @ (((x - zz / tau) / (m * tau))[:, None] * G2),
                         G2T @ (((-2.0 * x + zz / tau) / (m * tau))[:, None] * G2)])
        # H_sys(R̄⁺) = Rn·M_R − Pn·M_P + rs·Mgs + A, rewritten in the start-of-step R, P
        # (Rn = C R + (S/m) P − rs·B_R, Pn = C P − kS R − rs·B_P):
        MRp = C[:, None] * MR + (k * S)[:, None] * MP
        MPp = (S / m)[:, None] * MR - C[:, None] * MP
        Mgs2 = Mgs - BR @ MR + BP @ MP
        return dict(C=C, Sm=S / m, kS=k * S, Mg0=Mg0, BR=BR, BP=BP, Mgs2=Mgs2,
                    MR2=np.hstack([MR, MRp]), MP2=np.hstack([MP, MPp]),
                    A=np.asarray(self.model.constant, dtype=float).reshape(F * F))


    def _harmonic_flow(self, state: EnsembleState, tr: np.ndarray, g: np.ndarray | None,
                       gdot: np.ndarray | None = None) -> None:
        """Exact flow over dt of m R̈ = −Tr ρ m ω² R − g − ġ t (g, ġ frozen; ġ optional)."""
        m, R, P = self._m, state.R, state.P
        if np.all(np.abs(tr - 1.0) < 1e-12):
            C, S, W = self._unit
            X = self._unit_X
            k = m * self._w2
        else:
            o2 = tr[:, None] * self._w2
            C, S, W = harmonic_flow_coefficients(o2, self.dt)
            X = _third_integral(o2, self.dt, S)
            k = tr[:, None] * (m * self._w2)
        Rn = C * R + S * (P / m)
        Pn = C * P - (k * S) * R
        if g is not None:
            Rn -= (W / m) * g
            Pn -= S * g
        if gdot is not None:
            Rn -= (X / m) * gdot
            Pn -= W * gdot
        state.R, state.P = Rn, Pn

    def _mean_position(self, R, P, g, tr, t, gdot=None):
        """(1/t)∫_0^t R(s) ds along the flow of m R̈ = −Tr ρ m ω² R − g − ġ s from (R, P) (exact)."""
        m = self._m
        if np.all(np.abs(tr - 1.0) < 1e-12):
            C, S, W, X, Z = self._half_unit
        else:
            o2 = tr[:, None] * self._w2
            C, S, W = harmonic_flow_coefficients(o2, t)
            X = _third_integral(o2, t, S)
            Z = _fourth_integral(o2, t, W)
        out = S * R + W * (P / m) - (X / m) * g
        if gdot is not None:
            out -= (Z / m) * gdot
        return out / t

    def step(self, state: EnsembleState) -> None:
        if self._needs_gamma and state.gamma_adjusted is None:
            raise ValueError("zero_point='adjusted' needs state.gamma_adjusted")
        model, half = self.model, 0.5 * self.dt
        if self._linear and self.averaged:
            self._step_averaged(state)
            return
        fresh = self._R_cached is None or self._R_cached.shape != state.R.shape \
            or not np.array_equal(self._R_cached, state.R)
        if fresh:
            self._Hs = model.system_hamiltonian(state.R)
        if not self._linear:
            if fresh:
                self._Fs = -model.system_contract_gradient(state.R, self.density(state))
            state.P = state.P + half * self._Fs
        z = propagate_amplitudes(state.x + 1j * state.p, self._Hs, half)
        state.x, state.p = z.real.copy(), z.imag.copy()
        rho = self.density(state)
        tr = np.trace(rho, axis1=1, axis2=2)
        g = model.system_contract_gradient(state.R, rho) if self._linear else None
        self._harmonic_flow(state, tr, g)
        self._Hs = model.system_hamiltonian(state.R)
        z = propagate_amplitudes(z, self._Hs, half)
        state.x, state.p = z.real.copy(), z.imag.copy()
        if not self._linear:
            self._Fs = -model.system_contract_gradient(state.R, self.density(state))
            state.P = state.P + half * self._Fs
        self._R_cached = state.R.copy()
        state.time += self.dt

    def _step_averaged(self, state: EnsembleState) -> None:
        """E(h/2; R̄⁻) A(h) E(h/2; R̄⁺) of the module docstring (linear system coupling)."""
        model, half = self.model, 0.5 * self.dt
        if self._fast is not None and model.nstates == 2 and not (
                self.options.method == "sqc" and self.options.zero_point == "fixed"):
            r0 = self._two_state_density(state.x[:, 0], state.x[:, 1], state.p[:, 0], state.p[:, 1], state)
            if np.all(np.abs(r0[:, 0] + r0[:, 3] - 1.0) < 1e-12):
                self._step_two_state_unit_trace(state, r0.reshape(-1, 2, 2))
                return
        rho0 = self.density(state)
        tr = np.trace(rho0, axis1=1, axis2=2)
        if self._fast is not None and np.all(np.abs(tr - 1.0) < 1e-12):
            if rho0.shape[1] == 2:
                self._step_two_state_unit_trace(state, rho0)
            else:
                self._step_averaged_unit_trace(state, rho0)
            return
        g0 = model.system_contract_gradient(state.R, rho0)
        Rm = self._mean_position(state.R, state.P, g0, tr, half)
        z = propagate_amplitudes(state.x + 1j * state.p, model.system_hamiltonian(Rm), half)
        state.x, state.p = z.real.copy(), z.imag.copy()
        rho = self.density(state)
        g = model.system_contract_gradient(state.R, rho)
        gdot = (g - g0) / half
        self._harmonic_flow(state, tr, g0, gdot)
        # second half, traversed backwards from the end point: force g(h − s) = (2g½ − g₀) − ġ s
        Rp = self._mean_position(state.R, -state.P, 2.0 * g - g0, tr, half, -gdot)
        z = propagate_amplitudes(z, model.system_hamiltonian(Rp), half)
        state.x, state.p = z.real.copy(), z.imag.copy()
        state.time += self.dt


    def _step_averaged_unit_trace(self, state: EnsembleState, rho0: np.ndarray) -> None:
        """Same step as the general averaged path, specialised to Tr ρ = 1 (symmetrized/adjusted/
        Ehrenfest) with precomputed coefficient matrices (identical algebra, fewer passes):
        H_sys(R̄⁻) and H_sys(R̄⁺) both come from R·[M_R | M_R'] and P·[M_P | M_P'] at the step start."""
        c, half = self._fast, 0.5 * self.dt
        assert c is not None
        n, F, _ = rho0.shape
        F2 = F * F
        R, P = state.R, state.P
        r0 = rho0.reshape(n, F2)
        HR = R @ c["MR2"]
        HP = P @ c["MP2"]
        Hm = HR[:, :F2] + HP[:, :F2] - r0 @ c["Mg0"] + c["A"]
        z = propagate_amplitudes(state.x + 1j * state.p, Hm.reshape(n, F, F), half)
        state.x, state.p = z.real.copy(), z.imag.copy()
        rs = np.concatenate([r0, self.density(state).reshape(n, F2)], axis=1)
        buf = self._buffers(R.shape)
        np.multiply(R, c["kS"], out=buf[0])
        R *= c["C"]
        np.multiply(P, c["Sm"], out=buf[1])
        R += buf[1]
        _subtract_product(R, rs, c["BR"], buf[1])
        P *= c["C"]
        P -= buf[0]
        _subtract_product(P, rs, c["BP"], buf[1])
        Hp = HR[:, F2:] + HP[:, F2:] + rs @ c["Mgs2"] + c["A"]
        z = propagate_amplitudes(z, Hp.reshape(n, F, F), half)
        state.x, state.p = z.real.copy(), z.imag.copy()
        state.time += self.dt

    def _two_state_density(self, x0, x1, p0, p1, state):
        """Flattened ρ (n, 4) = [ρ00, ρ01, ρ10, ρ11] for F = 2 (same definition as mapping.effective_density)."""
        e0 = 0.5 * (x0 * x0 + p0 * p0)
        e1 = 0.5 * (x1 * x1 + p1 * p1)
        off = 0.5 * (x0 * x1 + p0 * p1)
        if self.options.method == "ehrenfest":
            g0 = g1 = 0.0
        elif self.options.zero_point == "symmetrized":
            g0 = g1 = 0.5 * (e0 + e1 - 1.0)
        else:  # adjusted (fixed never reaches the Tr ρ = 1 path)
            g0, g1 = state.gamma_adjusted[:, 0], state.gamma_adjusted[:, 1]
        return np.stack([e0 - g0, off, off, e1 - g1], axis=1)

    @staticmethod
    def _two_state_propagate(x0, x1, p0, p1, H, t):
        """exp(−i H t) on z = x + ip for F = 2 in real arithmetic (same closed form as
        propagators.propagate_amplitudes); H given as (n, 4) flattened rows [H00, H01, H10, H11]."""
        a = 0.5 * (H[:, 0] + H[:, 3])
        b3 = 0.5 * (H[:, 0] - H[:, 3])
        b1 = 0.5 * (H[:, 1] + H[:, 2])
        w = np.sqrt(b1 * b1 + b3 * b3)
        c = np.cos(w * t)
        s = t * np.sinc(w * t / np.pi)
        # cos(wt) z − i s B z, B = [[b3, b1], [b1, −b3]]
        Bx0, Bx1 = b3 * x0 + b1 * x1, b1 * x0 - b3 * x1
        Bp0, Bp1 = b3 * p0 + b1 * p1, b1 * p0 - b3 * p1
        X0, X1 = c * x0 + s * Bp0, c * x1 + s * Bp1
        Y0, Y1 = c * p0 - s * Bx0, c * p1 - s * Bx1
        ca, sa = np.cos(a * t), np.sin(a * t)
        return ca * X0 + sa * Y0, ca * X1 + sa * Y1, ca * Y0 - sa * X0, ca * Y1 - sa * X1

    def _step_two_state_unit_trace(self, state: EnsembleState, rho0: np.ndarray) -> None:
        """:meth:`_step_averaged_unit_trace` for F = 2 with the oscillator algebra in real columns."""
        c, half = self._fast, 0.5 * self.dt
        assert c is not None
        n = rho0.shape[0]
        R, P = state.R, state.P
        r0 = rho0.reshape(n, 4)
        HR = R @ c["MR2"]
        HP = P @ c["MP2"]
        Hm = HR[:, :4] + HP[:, :4] - r0 @ c["Mg0"] + c["A"]
        x0, x1, p0, p1 = self._two_state_propagate(state.x[:, 0], state.x[:, 1], state.p[:, 0], state.p[:, 1],
                                                   Hm, half)
        rs = np.concatenate([r0, self._two_state_density(x0, x1, p0, p1, state)], axis=1)
        buf = self._buffers(R.shape)
        np.multiply(R, c["kS"], out=buf[0])
        R *= c["C"]
        np.multiply(P, c["Sm"], out=buf[1])
        R += buf[1]
        _subtract_product(R, rs, c["BR"], buf[1])
        P *= c["C"]
        P -= buf[0]
        _subtract_product(P, rs, c["BP"], buf[1])
        Hp = HR[:, 4:] + HP[:, 4:] + rs @ c["Mgs2"] + c["A"]
        x0, x1, p0, p1 = self._two_state_propagate(x0, x1, p0, p1, Hp, half)
        state.x = np.stack([x0, x1], axis=1)
        state.p = np.stack([p0, p1], axis=1)
        state.time += self.dt

    def _buffers(self, shape):
        if getattr(self, "_buf_shape", None) != shape:
            self._buf = (np.empty(shape), np.empty(shape))
            self._buf_shape = shape
        return self._buf


def _subtract_product(target: np.ndarray, a: np.ndarray, b: np.ndarray, scratch: np.ndarray) -> None:
    """target −= a @ b in place; one fused BLAS call (dgemm with β = 1 on the transposed, Fortran-
    ordered views) when the arrays are C-contiguous float64, else matmul into ``scratch``."""
    if target.flags.c_contiguous and a.flags.c_contiguous and b.flags.c_contiguous \
            and target.dtype == a.dtype == b.dtype == np.float64:
        out = _dgemm(-1.0, b.T, a.T, 1.0, target.T, overwrite_c=1)
        if np.shares_memory(out, target):
            return
        target[...] = out.T
        return
    np.matmul(a, b, out=scratch)
    target -= scratch


def _fourth_integral(omega2, t, W):
    """Z(t) = ∫_0^t X ds = (t²/2 − W)/Ω², with the series t⁴/24 (1 − Ω²t²/30) where |Ω²| t² < 1e-4."""
    omega2 = np.asarray(omega2, dtype=float)
    small = np.abs(omega2) * t * t < 1e-4
    safe = np.where(small, 1.0, omega2)
    return np.where(small, t ** 4 / 24.0 * (1.0 - omega2 * t * t / 30.0), (0.5 * t * t - W) / safe)


def _third_integral(omega2, t, S):
    """X(t) = ∫_0^t W ds = (t − S)/Ω², with the series t³/6 (1 − Ω²t²/20) where |Ω²| t² < 1e-4."""
    omega2 = np.asarray(omega2, dtype=float)
    small = np.abs(omega2) * t * t < 1e-4
    safe = np.where(small, 1.0, omega2)
    return np.where(small, t ** 3 / 6.0 * (1.0 - omega2 * t * t / 20.0), (t - S) / safe)
