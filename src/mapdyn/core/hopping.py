"""Surface hopping on the batched diabatic engine: MASH and FSSH (docs/theory.md#surface-hopping).

A trajectory carries the nuclei (R, P), the electronic amplitudes z = x + ip in the diabatic basis
(½|z|² summed over states = 1; the same variables, streams and initial draws as the mapping engine),
the active adiabatic state λ and a weight.  The amplitudes evolve exactly as the mapping
oscillators, i ż = H(R(t)) z; the nuclei feel the active adiabat only, F = −∇E_λ = −u_λᵀ ∇H u_λ.

Step (Δt = h), for any :class:`DiabaticModel`: K(h/2) E(h/2) D(h) E(h/2) K(h/2) as in
:mod:`mapdyn.core.propagators` with the active-state force; for a model with a harmonic reference
V0 (spin-boson, vibronic): K(h/2) A(h) K(h/2) with A the exact V0 flow and the amplitudes propagated
with H_sys at the time-averaged position of A (as in :mod:`mapdyn.core.harmonic_bath`).

* ``mash`` (Mannouch & Richardson, J. Chem. Phys. 158, 104111 (2023), two states; from memory):
  λ = the adiabatic state with the larger |c_a|² (sign of the spin component S_z).  When it changes
  during a step the crossing time is located by bisection (12 halvings), the momentum component
  along the coupling vector d_λb is rescaled to conserve E = T + E_λ, or, when that component's kinetic
  energy is too small, reflected (frustrated hop; λ unchanged).  Initial spin uniform on the
  hemisphere of the initial state, weight 2|S_z(0)|; adiabatic populations Σ w h(λ = f)/Σ w.
* ``fssh`` (Tully, J. Chem. Phys. 93, 1061 (1990)): after each step, hop λ → b with probability
  g_b = max(0, 2 Δt Re(c_λ* c_b T_λb)/|c_λ|²), T = (O − Oᵀ)/(2Δt), O = U(t)ᵀU(t+Δt) with column signs
  aligned (Hammes-Schiffer & Tully, J. Chem. Phys. 101, 4657 (1994); from memory); rescale along d_λb,
  frustrated hops keep the momentum (Tully 1990).  Optional energy-based decoherence (Granucci &
  Persico, J. Chem. Phys. 126, 134114 (2007); from memory): c_a ← c_a e^{−Δt/τ_a} (a ≠ λ),
  τ_a = (1 + C/E_kin)/|E_a − E_λ|, C = 0.1 Eh, then |c_λ| restores the norm.

Random numbers (FSSH only): trajectory i continues its own stream
(:func:`mapdyn.core.sampling.trajectory_generator`) after the initial draws (coordinates, momenta,
actions, angles): first one uniform for the initial active state (drawn ∝ |c_a|²), then one uniform
per step, read in blocks of 128 (numpy's ``random(k)`` gives the same numbers as k single draws).
"""

from __future__ import annotations

import dataclasses
from typing import cast

import numpy as np

from mapdyn.core.harmonic_bath import harmonic_flow_coefficients
from mapdyn.core.model import DiabaticModel
from mapdyn.core.options import HOPPING_METHODS, MethodOptions
from mapdyn.core.propagators import propagate_amplitudes
from mapdyn.core.sampling import EnsembleState, trajectory_generator

__all__ = ["HoppingState", "UniformStreams", "hopping_state", "HoppingIntegrator", "HoppingRun", "run_hopping",
           "DECOHERENCE_C", "adiabatic_states", "nonadiabatic_coupling", "rescale_momentum", "hop_probabilities", "diabatic_estimator"]

#: Energy-based decoherence constant C (Eh), the value recommended by Granucci & Persico (2007), from memory.
DECOHERENCE_C = 0.1
BISECTIONS = 12
BLOCK = 128


class UniformStreams:
    """Per-trajectory uniform streams continued after the initial draws; one uniform per call of :meth:`draw`."""

    def __init__(self, generators: list):
        self.generators = list(generators)
        self._buf = np.empty((len(self.generators), BLOCK))
        self._pos = BLOCK

    def draw(self) -> np.ndarray:
        """The next uniform of every trajectory, shape (n,)."""
        if self._pos == BLOCK:
            for j, g in enumerate(self.generators):
                self._buf[j] = g.random(BLOCK)
            self._pos = 0
        out = self._buf[:, self._pos].copy()
        self._pos += 1
        return out

    def take(self, keep: np.ndarray) -> "UniformStreams":
        new = UniformStreams([g for g, k in zip(self.generators, keep) if k])
        new._buf, new._pos = self._buf[keep].copy(), self._pos
        return new


@dataclasses.dataclass
class HoppingState:
    """A batch of hopping trajectories (atomic units).

    R, P : (n, D) Bohr and a.u.; x, p : (n, F) diabatic amplitudes, c = (x + ip)/√2 normalised;
    active : (n,) adiabatic index λ; weight : (n,) estimator weight (1 for FSSH, 2|S_z(0)| for MASH);
    time : a.u.; indices : (n,) trajectory indices; streams : FSSH uniform streams (None for MASH).
    """

    R: np.ndarray
    P: np.ndarray
    x: np.ndarray
    p: np.ndarray
    active: np.ndarray
    weight: np.ndarray
    time: float = 0.0
    indices: np.ndarray | None = None
    streams: UniformStreams | None = None

    @property
    def ntraj(self) -> int:
        return self.R.shape[0]

    def take(self, keep: np.ndarray) -> "HoppingState":
        keep = np.asarray(keep, dtype=bool)
        return HoppingState(self.R[keep], self.P[keep], self.x[keep], self.p[keep], self.active[keep],
                            self.weight[keep], self.time, None if self.indices is None else self.indices[keep],
                            None if self.streams is None else self.streams.take(keep))


def _continued_generator(seed: int, index: int, ndof: int, nstates: int) -> np.random.Generator:
    rng = trajectory_generator(seed, index)
    rng.standard_normal(ndof)
    rng.standard_normal(ndof)
    rng.random(nstates)
    rng.random(nstates)
    return rng


def hopping_state(model: DiabaticModel, ens: EnsembleState, options: MethodOptions, seed: int) -> HoppingState:
    """Hopping state from an ensemble sampled with ``options`` (:func:`gaussian_wavepacket_ensemble` or
    ``thermal_bath_ensemble``, same ``seed``): amplitudes as sampled, λ and weight per method."""
    if options.method not in HOPPING_METHODS:
        raise ValueError(f"method={options.method!r} is not allowed here; choose one of {', '.join(HOPPING_METHODS)}")
    F = model.nstates
    if options.method == "mash" and F != 2:
        raise ValueError(f"method='mash' supports two states (model has {F}); the multi-state form is not implemented")
    _, U = adiabatic_states(model, ens.R)
    z = ens.x + 1j * ens.p
    pop = np.abs(np.einsum("nka,nk->na", U, z)) ** 2
    pop /= pop.sum(axis=1, keepdims=True)
    idx = ens.indices if ens.indices is not None else np.arange(ens.ntraj)
    streams = None
    if options.method == "mash":
        active = np.argmax(pop, axis=1)
        weight = 2.0 * np.abs(pop[:, 1] - pop[:, 0])
    else:
        gens = [_continued_generator(seed, int(i), model.ndof, F) for i in idx]
        u = np.array([g.random() for g in gens])
        active = np.minimum((np.cumsum(pop, axis=1) <= u[:, None]).sum(axis=1), F - 1)
        weight = np.ones(ens.ntraj)
        streams = UniformStreams(gens)
    return HoppingState(ens.R.copy(), ens.P.copy(), ens.x.copy(), ens.p.copy(), active.astype(int), weight,
                        ens.time, idx.copy(), streams)


def _propagate(z: np.ndarray, H: np.ndarray, t) -> np.ndarray:
    """exp(−i H t) z per trajectory with t a number or an (n,) array (a.u.)."""
    if H.shape[-1] == 2:
        return propagate_amplitudes(z, H, cast(float, t if np.ndim(t) == 0 else np.reshape(t, -1)))
    lam, U = np.linalg.eigh(H)
    w = np.einsum("nlk,nl->nk", U, z)
    ph = np.exp(-1j * lam * np.reshape(t, (-1, 1)))
    return np.einsum("nkl,nl->nk", U, ph * w)


def adiabatic_states(model: DiabaticModel, R: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``model.adiabatic(R)``; for two states and the base-class eigensolver, the same result in closed form
    (E = a ∓ √(b² + v²), columns (−sin θ, cos θ), (cos θ, sin θ) with tan 2θ = 2v/(H00 − H11), then
    the base class's sign rule: the largest-magnitude component of each column positive)."""
    if model.nstates != 2 or type(model).adiabatic is not DiabaticModel.adiabatic:
        return model.adiabatic(R)
    H = model.hamiltonian(R)
    a = 0.5 * (H[:, 0, 0] + H[:, 1, 1])
    b = 0.5 * (H[:, 0, 0] - H[:, 1, 1])
    v = H[:, 0, 1]
    r = np.sqrt(b * b + v * v)
    E = np.stack([a - r, a + r], axis=1)
    th = 0.5 * np.arctan2(v, b)
    c, s = np.cos(th), np.sin(th)
    U = np.empty(H.shape)
    U[:, 0, 0], U[:, 1, 0], U[:, 0, 1], U[:, 1, 1] = -s, c, c, s
    big = np.argmax(np.abs(U), axis=1)
    sign = np.sign(np.take_along_axis(U, big[:, None, :], axis=1))[:, 0, :]
    sign[sign == 0] = 1.0
    return E, U * sign[:, None, :]


def nonadiabatic_coupling(model: DiabaticModel, R: np.ndarray, E: np.ndarray, U: np.ndarray,
                          a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """d_ab = u_aᵀ ∇H u_b/(E_b − E_a) (1/Bohr), shape (n, D), for per-trajectory state pairs a ≠ b."""
    rows = np.arange(R.shape[0])
    ua, ub = U[rows, :, a], U[rows, :, b]
    num = model.contract_gradient(R, ua[:, :, None] * ub[:, None, :])
    gap = E[rows, b] - E[rows, a]
    return num / np.where(np.abs(gap) > 1e-300, gap, 1e-300)[:, None]


def rescale_momentum(P: np.ndarray, masses: np.ndarray, d: np.ndarray, dE: np.ndarray,
                     frustrated: str) -> tuple[np.ndarray, np.ndarray]:
    """P → P − κ d with Σ(P − κd)²/2M = Σ P²/2M − ΔE (smallest |κ|); returns (P', accepted).

    When the kinetic energy along d is below ΔE: ``frustrated="reflect"`` reverses the component along
    d (κ = b/a, MASH), ``"keep"`` leaves P unchanged (Tully 1990).  P (n, D) a.u.; dE (n,) Eh."""
    a = 0.5 * np.sum(d * d / masses, axis=1)
    b = np.sum(P * d / masses, axis=1)
    disc = b * b - 4.0 * a * dE
    ok = (disc >= 0) & (a > 0)
    root = np.sqrt(np.where(ok, disc, 0.0))
    safe_a = np.where(a > 0, a, 1.0)
    kappa = np.where(b < 0, b + root, b - root) / (2.0 * safe_a)
    if frustrated == "reflect":
        kappa = np.where(ok, kappa, np.where(a > 0, b / safe_a, 0.0))
    else:
        kappa = np.where(ok, kappa, 0.0)
    return P - kappa[:, None] * d, ok


def hop_probabilities(U0: np.ndarray, U1: np.ndarray, z0: np.ndarray, z1: np.ndarray, active: np.ndarray,
                      dt: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fewest-switches probabilities g (n, F) for one step of ``dt`` (a.u.) from the adiabatic vectors
    U0, U1 (n, F, F) and diabatic amplitudes z0, z1 (n, F) at its ends (module docstring; g_λ = 0).
    Also returns the adiabatic amplitudes c1 (n, F) at the end and U1 with its column signs aligned to U0."""
    rows = np.arange(z0.shape[0])
    O = np.einsum("nka,nkb->nab", U0, U1)
    s = np.sign(np.diagonal(O, axis1=1, axis2=2))
    s[s == 0] = 1.0
    Ua = U1 * s[:, None, :]
    O = O * s[:, None, :]
    T = (O - np.swapaxes(O, 1, 2)) / (2.0 * dt)
    c0 = np.einsum("nka,nk->na", U0, z0) / np.sqrt(2.0)
    c1 = np.einsum("nka,nk->na", Ua, z1) / np.sqrt(2.0)
    cm = 0.5 * (c0 + c1)
    cl = cm[rows, active]
    flux = 2.0 * dt * np.real(np.conj(cl)[:, None] * cm * T[rows, active, :])
    g = np.clip(flux / np.maximum(np.abs(cl) ** 2, 1e-300)[:, None], 0.0, None)
    g[rows, active] = 0.0
    return g, c1, Ua


class HoppingIntegrator:
    """One batched step of MASH or FSSH; ``step(state)`` advances a :class:`HoppingState` by ``dt`` (a.u.)."""

    def __init__(self, model: DiabaticModel, options: MethodOptions, dt: float):
        if not np.isfinite(dt) or dt <= 0:
            raise ValueError(f"dt={dt!r} is not allowed; the time step must be a positive number of a.u.")
        if options.method not in HOPPING_METHODS:
            raise ValueError(f"method={options.method!r} is not allowed here; choose one of {', '.join(HOPPING_METHODS)}")
        self.model, self.options, self.dt = model, options, float(dt)
        self.m = np.asarray(model.masses, dtype=float)
        self.harmonic = all(hasattr(model, k) for k in ("harmonic_frequencies", "system_hamiltonian",
                                                          "system_contract_gradient"))
        if self.harmonic:
            freqs: np.ndarray = np.asarray(model.harmonic_frequencies, dtype=float)  # type: ignore[attr-defined]
            self.w2 = freqs ** 2
        self._cache: tuple | None = None
        self.n_hops = 0
        self.n_frustrated = 0

    # --- pieces -----------------------------------------------------------------------------------
    def _force(self, R, U, active):
        u = U[np.arange(R.shape[0]), :, active]
        rho = u[:, :, None] * u[:, None, :]
        if self.harmonic:
            return -self.model.system_contract_gradient(R, rho)
        return -self.model.contract_gradient(R, rho)

    def _advance(self, R, P, z, active, F0, h):
        """Propagate by h (number or (n,) array); returns R, P, z, E, U, F at the end."""
        hc = np.reshape(h, (-1, 1))
        P = P + 0.5 * hc * F0
        if self.harmonic:
            C, S, W = harmonic_flow_coefficients(np.broadcast_to(self.w2, R.shape), hc)
            Rbar = (S * R + W * P / self.m) / hc
            R, P = C * R + S * P / self.m, C * P - self.m * self.w2 * S * R
            z = _propagate(z, self.model.system_hamiltonian(Rbar), h)
        else:
            z = _propagate(z, self.model.hamiltonian(R), 0.5 * np.asarray(h))
            R = R + hc * P / self.m
            z = _propagate(z, self.model.hamiltonian(R), 0.5 * np.asarray(h))
        E, U = adiabatic_states(self.model, R)
        F1 = self._force(R, U, active)
        P = P + 0.5 * hc * F1
        return R, P, z, E, U, F1

    def _refresh(self, state: HoppingState):
        E, U = adiabatic_states(self.model, state.R)
        F = self._force(state.R, U, state.active)
        self._cache = (state.R.copy(), state.active.copy(), E, U, F)

    def energy(self, state: HoppingState) -> np.ndarray:
        """T + E_λ per trajectory (Eh), the conserved energy of both methods between and across hops."""
        E, _ = adiabatic_states(self.model, state.R)
        return 0.5 * np.sum(state.P ** 2 / self.m, axis=1) + E[np.arange(state.ntraj), state.active]

    def step(self, state: HoppingState) -> None:
        c = self._cache
        if c is None or c[0].shape != state.R.shape or not np.array_equal(c[0], state.R) \
                or not np.array_equal(c[1], state.active):
            self._refresh(state)
        assert self._cache is not None
        _, _, E0, U0, F0 = self._cache
        R0, P0, z0 = state.R, state.P, state.x + 1j * state.p
        R, P, z, E, U, F = self._advance(R0, P0, z0, state.active, F0, self.dt)
        if self.options.method == "mash":
            R, P, z, E, U, F = self._mash_hops(state, R0, P0, z0, U0, F0, R, P, z, E, U, F)
        else:
            P, z, F = self._fssh_hops(state, z0, U0, R, P, z, E, U, F)
        state.R, state.P, state.x, state.p = R, P, z.real.copy(), z.imag.copy()
        state.time += self.dt
        self._cache = (R.copy(), state.active.copy(), E, U, F)

    # --- MASH -------------------------------------------------------------------------------------
    def _mash_hops(self, state, R0, P0, z0, U0, F0, R, P, z, E, U, F):
        a0 = np.argmax(np.abs(np.einsum("nka,nk->na", U0, z0)), axis=1)
        a1 = np.argmax(np.abs(np.einsum("nka,nk->na", U, z)), axis=1)
        idx = np.nonzero((a1 != state.active) & (a0 == state.active))[0]
        if idx.size == 0:
            return R, P, z, E, U, F
        act = state.active[idx]
        args = (R0[idx], P0[idx], z0[idx], act, F0[idx])
        lo, hi = np.zeros(idx.size), np.ones(idx.size)
        for _ in range(BISECTIONS):
            mid = 0.5 * (lo + hi)
            Rm, _, zm, _, Um, _ = self._advance(*args, mid * self.dt)
            crossed = np.argmax(np.abs(np.einsum("nka,nk->na", Um, zm)), axis=1) != act
            hi, lo = np.where(crossed, mid, hi), np.where(crossed, lo, mid)
        Rh, Ph, zh, Eh, Uh, _ = self._advance(*args, hi * self.dt)
        target = 1 - act
        d = nonadiabatic_coupling(self.model, Rh, Eh, Uh, act, target)
        rows = np.arange(idx.size)
        Ph, ok = rescale_momentum(Ph, self.m, d, Eh[rows, target] - Eh[rows, act], "reflect")
        new = np.where(ok, target, act)
        self.n_hops += int(ok.sum())
        self.n_frustrated += int((~ok).sum())
        Fh = self._force(Rh, Uh, new)
        Rr, Pr, zr, Er, Ur, Fr = self._advance(Rh, Ph, zh, new, Fh, (1.0 - hi) * self.dt)
        R, P, z, E, U, F = R.copy(), P.copy(), z.copy(), E.copy(), U.copy(), F.copy()
        R[idx], P[idx], z[idx], E[idx], U[idx], F[idx] = Rr, Pr, zr, Er, Ur, Fr
        state.active = state.active.copy()
        state.active[idx] = new
        return R, P, z, E, U, F

    # --- FSSH -------------------------------------------------------------------------------------
    def _fssh_hops(self, state, z0, U0, R, P, z, E, U, F):
        n, nst = z.shape
        rows = np.arange(n)
        lam = state.active
        g, c1, Ua = hop_probabilities(U0, U, z0, z, lam, self.dt)
        xi = state.streams.draw()
        cum = np.cumsum(g, axis=1)
        hop = xi < cum[:, -1]
        target = np.minimum((cum <= xi[:, None]).sum(axis=1), nst - 1)
        hi = np.nonzero(hop)[0]
        if hi.size:
            d = nonadiabatic_coupling(self.model, R[hi], E[hi], U[hi], lam[hi], target[hi])
            r = np.arange(hi.size)
            Pn, ok = rescale_momentum(P[hi], self.m, d, E[hi][r, target[hi]] - E[hi][r, lam[hi]], "keep")
            P = P.copy()
            P[hi] = Pn
            state.active = state.active.copy()
            state.active[hi[ok]] = target[hi[ok]]
            self.n_hops += int(ok.sum())
            self.n_frustrated += int((~ok).sum())
            if ok.any():
                F = F.copy()
                j = hi[ok]
                F[j] = self._force(R[j], U[j], state.active[j])
        if self.options.decoherence == "energy":
            lam = state.active
            ekin = np.maximum(0.5 * np.sum(P * P / self.m, axis=1), 1e-300)
            gap = np.abs(E - E[rows, lam][:, None])
            tau = (1.0 + DECOHERENCE_C / ekin)[:, None] / np.maximum(gap, 1e-300)
            damp = np.exp(-self.dt / tau)
            damp[rows, lam] = 1.0
            c1 = c1 * damp
            rest = np.sum(np.abs(c1) ** 2, axis=1) - np.abs(c1[rows, lam]) ** 2
            cl = c1[rows, lam]
            scale = np.sqrt(np.clip(1.0 - rest, 0.0, None) / np.maximum(np.abs(cl) ** 2, 1e-300))
            c1[rows, lam] = cl * scale
            z = np.sqrt(2.0) * np.einsum("nka,na->nk", Ua, c1)
        return P, z, F


@dataclasses.dataclass
class HoppingRun:
    """Recorded output of :func:`run_hopping` (atomic units).

    times : (T,) a.u.; active : (T, n) adiabatic index; weight : (n,); diabatic_weights : (T, n, F)
    per-trajectory diabatic-population estimator (FSSH; NaN for MASH); energy : (T, n) Eh;
    final : the final state; n_hops, n_frustrated : counts over the run.
    """

    times: np.ndarray
    active: np.ndarray
    weight: np.ndarray
    diabatic_weights: np.ndarray
    energy: np.ndarray
    final: HoppingState
    options: MethodOptions
    n_hops: int
    n_frustrated: int

    def populations(self, basis: str = "adiabatic") -> tuple[np.ndarray, np.ndarray]:
        """Populations (T, F) and standard errors (T, F) in ``basis`` (see :func:`hopping_populations`)."""
        nst = self.diabatic_weights.shape[2]
        if basis == "adiabatic":
            w = self.weight[None, :, None] * (self.active[:, :, None] == np.arange(nst))
            return _ratio(w, self.weight)
        if basis == "diabatic":
            if self.options.method == "mash":
                raise ValueError("basis='diabatic' is not available for method='mash' (its coherence estimators "
                                 "are not implemented); use basis='adiabatic'")
            return _ratio(self.diabatic_weights, self.weight)
        raise ValueError(f"basis={basis!r} is not allowed; choose adiabatic or diabatic")


def _ratio(w: np.ndarray, weight: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Ratio estimator Σ_j w_jf/Σ_j W_j over trajectories (axis 1) and its delta-method standard error."""
    n = weight.size
    den = weight.sum()
    pops = w.sum(axis=1) / den
    resid = w - pops[:, None, :] * weight[None, :, None]
    err = np.sqrt(np.sum(resid ** 2, axis=1) / max(n - 1, 1) / n) / (den / n)
    return pops, err


def diabatic_estimator(U: np.ndarray, z: np.ndarray, active: np.ndarray) -> np.ndarray:
    """FSSH diabatic populations per trajectory (n, F): Σ_a |U_ka|² δ_aλ + Σ_{a<b} 2 U_ka U_kb Re(c_a c_b*)
    (the mixed estimator; Landry, Falk & Subotnik, J. Chem. Phys. 139, 211101 (2013); from memory)."""
    n, nst = z.shape
    c = np.einsum("nka,nk->na", U, z) / np.sqrt(2.0)
    rows = np.arange(n)
    ul = U[rows, :, active]
    out = ul * ul
    coh = np.real(c[:, :, None] * np.conj(c[:, None, :]))
    off = np.einsum("nka,nkb,nab->nk", U, U, coh) - np.einsum("nka,na->nk", U * U, np.abs(c) ** 2)
    return out + off


def run_hopping(model: DiabaticModel, state: HoppingState, options: MethodOptions, dt: float, nsteps: int,
                record_every: int = 1, integrator: HoppingIntegrator | None = None) -> HoppingRun:
    """Propagate a hopping batch for ``nsteps`` steps of ``dt`` (a.u.), recording every ``record_every``."""
    if isinstance(nsteps, bool) or not isinstance(nsteps, (int, np.integer)) or nsteps < 0:
        raise ValueError(f"nsteps={nsteps!r} is not allowed; it must be a non-negative integer")
    if isinstance(record_every, bool) or not isinstance(record_every, (int, np.integer)) or record_every < 1:
        raise ValueError(f"record_every={record_every!r} is not allowed; it must be a positive integer")
    integ = integrator or HoppingIntegrator(model, options, dt)
    times, act, dia, energy = [], [], [], []

    def record():
        times.append(state.time)
        act.append(state.active.copy())
        if options.method == "fssh":
            _, U = adiabatic_states(model, state.R)
            dia.append(diabatic_estimator(U, state.x + 1j * state.p, state.active))
        else:
            dia.append(np.full(state.x.shape, np.nan))
        energy.append(integ.energy(state))

    record()
    for i in range(1, nsteps + 1):
        integ.step(state)
        if i % record_every == 0:
            record()
    return HoppingRun(np.array(times), np.array(act), state.weight.copy(), np.array(dia), np.array(energy),
                      state, options, integ.n_hops, integ.n_frustrated)
