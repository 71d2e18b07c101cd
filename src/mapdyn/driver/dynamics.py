"""On-the-fly mapping dynamics of one trajectory: an ASE MolecularDynamics subclass.

Internals in Hartree atomic units (positions Bohr, kinetic momenta a.u., energies Eh, time a.u.);
ASE units (Å, eV, amu, ASE time) only at the boundary, converted with :mod:`ase.units`.

Equations (DESIGN.md §5b, §7.5, §7.6; Cotton, Liang & Miller, J. Chem. Phys. 147, 064112 (2017)
for the adiabatic representation with kinetic momentum P = M dR/dt):

    dR/dt = P/M,   i dz_k/dt = E_k z_k − i Σ_l σ_kl z_l,   σ_kl = V·d_kl,
    dP/dt = −Σ_kl ρ_kl ⟨ψ_k|∇H|ψ_l⟩,   ⟨ψ_k|∇H|ψ_l⟩ = δ_kl ∇E_k + (E_l − E_k) d_kl,

ρ_kl = ½(x_k x_l + p_k p_l) − γ_k δ_kl in the adiabatic basis (:func:`mapdyn.core.mapping.effective_density`),
conserved energy Σ P²/2M + Σ_k ρ_kk E_k.  One step (velocity-Verlet shape, one backend call):

1. P ← P + F(t) Δt/2;  R ← R + Δt P/M  (V = P/M is the mid-step velocity);
2. backend at the new R (warm-started from the previous ``guess``);
3. oscillators through the step: with an overlap matrix S, local diabatization (Granucci, Persico
   & Toniolo, J. Chem. Phys. 114, 10608 (2001), from memory; DESIGN §7.6): T = Löwdin(S) = U Wᵀ
   from S = U Σ Wᵀ, H_d(0) = diag E(t), H_d(Δt) = T diag E(t+Δt) Tᵀ, linear interpolation,
   exponential-midpoint substeps, z_ad(t+Δt) = Tᵀ z_d; without S, the same substeps with
   H_eff = diag E − i V·d interpolated between the two ends;
4. F(t+Δt);  P ← P + F Δt/2.

Force averaging (``force_averaging=True``, the default; own scheme, DESIGN §5b): the coherences
ρ_kl (k ≠ l) rotate as e^{−i(E_k − E_l)t}, so when ΔE·Δt is not small, kicks with ρ(t) sample the
off-diagonal force at a nearly fixed phase and the energy drifts.  Each half kick instead uses ρ̄, the
mean of ρ over the adjacent electronic half step with frozen energies (the opening kick over
[t, t+Δt/2] with E(t), the closing kick over [t+Δt/2, t+Δt] with E(t+Δt), closed form
ρ̄_kl = ½ Re(z_k z_l* e^{∓iω_kl Δt/4}) sinc(ω_kl Δt/4), ω_kl = E_k − E_l).  The two kicks then give
the nuclei Δt·(mean ρ over the step), the same energy the oscillators exchange; the scheme is
symmetric under time reversal (P → −P, z → z*), reduces to the plain kicks as Δt → 0 (second order
is kept) and costs no backend call.  A one-time warning, recorded in :attr:`MappingDynamics.metadata`,
reports when max ΔE_kl·Δt > ``GAP_PHASE_LIMIT`` (1 rad) between states with |V·d_kl|·Δt >
``GAP_COUPLING_FLOOR`` (1e-3): the step does not resolve the electronic gap.

No coupling vectors (TDA/TDDFT-like backends, DESIGN §5b): σ(t+Δt/2) = (S − Sᵀ)/(2Δt)
(Hammes-Schiffer & Tully, J. Chem. Phys. 101, 4657 (1994)), the force uses the velocity-projected
coupling d_kl ≈ σ_kl V/|V|² with σ and V at the force time extrapolated linearly from the last two
mid-steps (one extra gradient-free backend call at t = 0 supplies the first), and the off-diagonal
force is dropped when |V| is below ``velocity_floor``.  This misses the force component
perpendicular to V; a warning is issued once and recorded in :attr:`MappingDynamics.metadata`.

The complete propagation state is a :class:`DriverState` (``get_state``/``set_state``), so a
checkpoint writer can save and restore it exactly.
"""

from __future__ import annotations

import copy
import dataclasses
import os
import time as _time
import warnings
from typing import Any

import numpy as np
from ase import Atoms, units
from ase.calculators.singlepoint import SinglePointCalculator
from ase.md.md import MolecularDynamics

from mapdyn.backends.contract import BackendError, ElectronicResult
from mapdyn.core.mapping import actions, effective_density
from mapdyn.core.options import MethodOptions
from mapdyn.core.windows import (
    sample_mapping_variables,
    window_assignment,
    window_indicators,
)
from mapdyn.units import AMU_IN_ME

__all__ = ["MappingDynamics", "DriverState", "remove_total_momentum",
           "PROJECTION_WARNING", "GAP_WARNING"]

#: ASE momentum unit (amu·Å/ASE time) in atomic units of momentum.
_ASE_MOMENTUM_IN_AU = AMU_IN_ME * units.AUT / units.Bohr

#: Prefix of the once-per-run warning that the step does not resolve the electronic gap.
GAP_WARNING = "time step does not resolve the electronic gap"
#: ΔE·Δt (rad) above which the gap warning is issued (one electronic period = 2π rad).
GAP_PHASE_LIMIT = 1.0
#: |V·d_kl|·Δt below which a pair counts as uncoupled for the gap warning.
GAP_COUPLING_FLOOR = 1e-3

PROJECTION_WARNING = ("no coupling vectors from the backend: the off-diagonal force uses the "
                      "velocity-projected coupling d ≈ σ V/|V|², which misses the force component "
                      "perpendicular to the velocity (exact in one dimension)")

_PROPAGATIONS = ("auto", "overlap", "coupling")
_ON_ERROR = ("raise", "stop")


@dataclasses.dataclass
class DriverState:
    """Everything needed to continue a trajectory exactly (atomic units).

    step : steps taken; time : a.u.; positions (N, 3) Bohr; momenta (N, 3) kinetic momenta a.u.;
    x, p : (F,) mapping variables in the adiabatic basis of ``positions``; gamma_adjusted : (F,)
    or None; result : the backend result at ``positions`` (its ``guess`` warm-starts the next
    call); force : (N, 3) Eh/Bohr at ``positions``; sigma_history : up to two
    (time a.u., σ (F, F) 1/a.u. time, velocity (N, 3) Bohr/a.u. time) mid-step entries;
    energy_reference : Eh at step 0; drift_flag : None or {step, time_au, drift_Eh}; stopped,
    stop_reason; rng_state : the trajectory generator's state after the initial draws (or None);
    warnings : messages issued once per run; settings : what the state was made with (checked on
    restore).
    """

    step: int
    time: float
    positions: np.ndarray
    momenta: np.ndarray
    x: np.ndarray
    p: np.ndarray
    gamma_adjusted: np.ndarray | None
    result: ElectronicResult
    force: np.ndarray
    sigma_history: list
    energy_reference: float
    drift_flag: dict | None = None
    stopped: bool = False
    stop_reason: str | None = None
    rng_state: dict | None = None
    warnings: list = dataclasses.field(default_factory=list)
    settings: dict = dataclasses.field(default_factory=dict)

    def copy(self) -> "DriverState":
        return copy.deepcopy(self)


def remove_total_momentum(positions: np.ndarray, momenta: np.ndarray, masses: np.ndarray,
                          linear: bool = True, angular: bool = True) -> np.ndarray:
    """Momenta (N, 3) with zero total linear and/or angular momentum (about the centre of mass).

    P_i ← P_i − m_i P_tot/M;  P_i ← P_i − m_i ω × r_i with ω = I⁻¹ L (pseudo-inverse for linear
    molecules), r_i relative to the centre of mass (common practice).  Any consistent units.
    """
    R = np.asarray(positions, dtype=float)
    P = np.array(momenta, dtype=float)
    m = np.asarray(masses, dtype=float).reshape(-1, 1)
    if linear:
        P -= m * P.sum(axis=0) / m.sum()
    if angular and R.shape[0] > 1:
        r = R - (m * R).sum(axis=0) / m.sum()
        L = np.cross(r, P).sum(axis=0)
        inertia = (m[:, 0] * (r * r).sum(axis=1)).sum() * np.eye(3) - np.einsum("i,ik,il->kl", m[:, 0], r, r)
        omega = np.linalg.pinv(inertia, rcond=1e-10) @ L
        P -= m * np.cross(omega[None, :], r)
    return P


def _lowdin(S: np.ndarray) -> np.ndarray:
    """Orthogonal matrix closest to S: T = S (SᵀS)^(−1/2) = U Wᵀ from S = U Σ Wᵀ (Löwdin)."""
    u, _, wt = np.linalg.svd(S)
    return u @ wt


def _interpolated_propagator(H0: np.ndarray, H1: np.ndarray, dt: float, substeps: int) -> np.ndarray:
    """Π_j exp(−i H(τ_j) h), h = Δt/n, τ_j = (j + ½)h, H(τ) = H0 + (τ/Δt)(H1 − H0) (Hermitian (F, F)).

    Exponential midpoint rule on each substep (second order in h); the factors for later substeps
    multiply from the left.
    """
    w = (np.arange(substeps) + 0.5) / substeps
    Hs = H0[None] + w[:, None, None] * (H1 - H0)[None]
    lam, U = np.linalg.eigh(Hs)
    factors = np.einsum("jkm,jm,jlm->jkl", U, np.exp(-1j * lam * (dt / substeps)), U.conj())
    out = factors[0]
    for j in range(1, substeps):
        out = factors[j] @ out
    return out


def backend_frame_diagnostics(diagnostics: dict) -> dict:
    """Per-frame backend health numbers (NaN where the backend does not report one):
    ``active_space_change`` 1/0 (CASSCF active orbitals rotated out of the previous space),
    ``active_overlap_min_singular`` (smallest singular value of the active-orbital overlap),
    ``overlap_retries`` (extra CASSCF solutions tried because the state overlap was low),
    ``response_residual`` (largest TDDFT Z-vector residual), ``response_converged`` 1/0 (CASSCF
    gradient and coupling response equations)."""
    d = diagnostics or {}
    nan = float("nan")

    def flag(v):
        return nan if v is None else float(bool(v))

    retry = d.get("overlap_retry")
    res = d.get("cphf_residuals")
    conv = None
    if "gradients_converged" in d or "couplings_converged" in d:
        conv = bool(d.get("gradients_converged", True)) and bool(d.get("couplings_converged", True))
    return {"active_space_change": flag(d.get("active_space_change")),
            "active_overlap_min_singular": float(d.get("active_overlap_min_singular", nan)),
            "overlap_retries": float(max(len(retry.get("candidates", [])) - 1, 0)) if isinstance(retry, dict) else 0.0,
            "response_residual": float(np.nanmax(res)) if res is not None and len(res) else nan,
            "response_converged": flag(conv)}


class MappingDynamics(MolecularDynamics):
    """MMST/SQC trajectory propagated on the fly (see the module docstring for the equations).

    Parameters
    ----------
    atoms : ase.Atoms (or a file name ase.io reads) with positions (Å), momenta (ASE units) and
        masses (amu; set isotopes with ``atoms.set_masses``).  The driver owns the state; ``atoms``
        is updated after every step.
    backend : object with ``nstates`` and ``compute(positions_bohr, guess, need_gradients)``
        (:mod:`mapdyn.backends.contract`).
    timestep : ASE time units (``0.5 * ase.units.fs``; a.u. → ``dt_au * ase.units.AUT``).
    initial_state : adiabatic state index the trajectory starts in (0 = ground state).
    options : :class:`MethodOptions`; ``zero_point="fixed"`` is refused on this path (DESIGN §5a);
        ``"adjusted"`` takes γ_k = e_k(0) − δ_{k,initial_state} in the adiabatic basis at t = 0.
    rng : the trajectory's generator, positioned after the nuclear draws; the mapping variables are
        drawn from it with :func:`sample_mapping_variables` (actions, then angles).
    mapping_variables : (x, p), each (F,), in the adiabatic basis at t = 0, instead of ``rng``.
    electronic_propagation : "auto" (overlaps when the backend gives them, else coupling
        vectors), "overlap" or "coupling".
    substeps : exponential-midpoint substeps per step for the oscillators.
    velocity_floor : |V| (Bohr per a.u. of time) below which the projected off-diagonal force is
        dropped (no-NAC path only).
    probe_fraction : length of the extra t = 0 call as a fraction of the step (no-NAC path).
    drift_threshold : |E(t) − E(0)| in Eh that flags the trajectory (None: monitor only).
    stop_on_drift : stop the run when the drift threshold is crossed.
    record_interval : record a frame every this many steps (in memory, :attr:`frames`).
    geometry_file : extxyz file (any name ase.io reads back) rewritten atomically at the end of
        each ``run`` with all recorded frames.
    zero_linear_momentum, zero_angular_momentum : remove them from the initial momenta.
    on_backend_error : "raise" (default) or "stop" (the trajectory stops, reason recorded).
    restart_state : a :class:`DriverState` to continue from instead of starting anew (no backend
        call, no random draws).
    force_averaging : half kicks with ρ averaged over the adjacent electronic half step (default,
        see the module docstring); False gives the plain velocity-Verlet kicks with ρ(t).

    Records: :attr:`frames` is a list of dicts, one per recorded step, with ``step``, ``time_au``,
    ``positions_bohr`` (N, 3), ``momenta_au`` (N, 3), ``energies_Eh`` (F,), ``actions`` (F,),
    ``populations`` (F,) (SQC window indicator 0/1, or e_k/Σe for Ehrenfest), ``window`` (state
    index, −1 = no window or Ehrenfest), ``kinetic_energy_Eh``, ``potential_energy_Eh``,
    ``total_energy_Eh``, ``drift_Eh``, ``coupling_norms`` (F, F) |d_kl| in 1/Bohr (None without
    vectors), ``sigma`` (F, F) mid-step σ_kl = V·d_kl in 1/a.u. time, ``min_overlap``, ``swap``,
    ``permutation``.  After a restart the list starts empty (a checkpoint writer keeps the older
    frames).  ``atoms`` carries a single-point calculator with the mapping potential Σ_k ρ_kk E_k
    (eV) and the force (eV/Å), so ASE observers and loggers work.
    """

    def __init__(self, atoms: Atoms | str | os.PathLike, backend: Any, timestep: float, initial_state: int = 0,
                 options: MethodOptions | None = None, *, rng: np.random.Generator | None = None,
                 mapping_variables: tuple[np.ndarray, np.ndarray] | None = None,
                 electronic_propagation: str = "auto", substeps: int = 20, velocity_floor: float = 1e-5,
                 probe_fraction: float = 0.1, drift_threshold: float | None = 1e-3,
                 stop_on_drift: bool = False, record_interval: int = 1, geometry_file: str | None = None,
                 zero_linear_momentum: bool = False, zero_angular_momentum: bool = False,
                 on_backend_error: str = "raise", restart_state: DriverState | None = None,
                 logfile: Any = None, loginterval: int = 1, force_averaging: bool = True):
        options = MethodOptions() if options is None else options
        if not isinstance(options, MethodOptions):
            raise ValueError(f"options must be a MethodOptions, got {type(options).__name__}")
        if options.method == "sqc" and options.zero_point == "fixed":
            raise ValueError("zero_point='fixed' is not allowed on the on-the-fly path: it rescales the whole "
                             "bonding potential by a per-trajectory factor; use 'symmetrized' or 'adjusted'")
        if isinstance(atoms, (str, os.PathLike)):
            from ase.io import read

            atoms = read(atoms)
        if not isinstance(atoms, Atoms):
            raise ValueError(f"atoms must be an ase.Atoms or a geometry file ase.io reads, got {type(atoms).__name__}")
        if not hasattr(backend, "compute") or not hasattr(backend, "nstates"):
            raise ValueError("backend must have 'nstates' and compute(positions_bohr, guess, need_gradients)")
        if not (isinstance(timestep, (int, float, np.floating)) and np.isfinite(timestep) and timestep > 0):
            raise ValueError(f"timestep={timestep!r} is not allowed; it must be a positive number in ASE time units")
        if electronic_propagation not in _PROPAGATIONS:
            raise ValueError(f"electronic_propagation={electronic_propagation!r} is not allowed; choose one of {', '.join(_PROPAGATIONS)}")
        if on_backend_error not in _ON_ERROR:
            raise ValueError(f"on_backend_error={on_backend_error!r} is not allowed; choose one of {', '.join(_ON_ERROR)}")
        for name, val in (("substeps", substeps), ("record_interval", record_interval)):
            if isinstance(val, bool) or not isinstance(val, (int, np.integer)) or val < 1:
                raise ValueError(f"{name}={val!r} is not allowed; it must be a positive integer")
        if not (np.isfinite(velocity_floor) and velocity_floor >= 0):
            raise ValueError(f"velocity_floor={velocity_floor!r} is not allowed; it must be >= 0 (Bohr per a.u. time)")
        if not (np.isfinite(probe_fraction) and 0 < probe_fraction <= 1):
            raise ValueError(f"probe_fraction={probe_fraction!r} is not allowed; it must lie in (0, 1]")
        if drift_threshold is not None and not (np.isfinite(drift_threshold) and drift_threshold > 0):
            raise ValueError(f"drift_threshold={drift_threshold!r} is not allowed; give a positive energy in Eh or None")
        super().__init__(atoms, timestep, trajectory=None, logfile=logfile, loginterval=loginterval)
        self.backend = backend
        self.options = options
        self.nstates = int(backend.nstates)
        self.initial_state = int(initial_state)
        self.dt_au = float(timestep) / units.AUT
        self.electronic_propagation = electronic_propagation
        self.substeps = int(substeps)
        self.velocity_floor = float(velocity_floor)
        self.probe_fraction = float(probe_fraction)
        self.drift_threshold = None if drift_threshold is None else float(drift_threshold)
        self.stop_on_drift = bool(stop_on_drift)
        self.record_interval = int(record_interval)
        self.geometry_file = None if geometry_file is None else os.fspath(geometry_file)
        self.on_backend_error = on_backend_error
        if not isinstance(force_averaging, (bool, np.bool_)):
            raise ValueError(f"force_averaging={force_averaging!r} is not allowed; it must be True or False")
        self.force_averaging = bool(force_averaging)
        self.masses_au = atoms.get_masses() * AMU_IN_ME  # (N,) electron masses
        if np.any(self.masses_au <= 0):
            raise ValueError("atoms have non-positive masses; set them with atoms.set_masses (amu)")
        self._M = self.masses_au[:, None]
        self.frames: list[dict] = []
        self.timings = {"steps": 0, "step_seconds": 0.0, "backend_seconds": 0.0, "backend_calls": 0}
        self._observed_initial = False
        self._settings = {"timestep_au": self.dt_au, "nstates": self.nstates, "natoms": len(atoms),
                          "options": dataclasses.asdict(options), "initial_state": self.initial_state,
                          "electronic_propagation": electronic_propagation, "substeps": self.substeps,
                          "velocity_floor": self.velocity_floor, "probe_fraction": self.probe_fraction,
                          "force_averaging": self.force_averaging}
        if restart_state is not None:
            self.set_state(restart_state)
            return
        self._state = self._initial_state(atoms, rng, mapping_variables, zero_linear_momentum, zero_angular_momentum)
        self._sync_atoms()
        self._record_frame()

    # ------------------------------------------------------------------ setup
    def _initial_state(self, atoms, rng, mapping_variables, zero_linear, zero_angular) -> DriverState:
        f = self.nstates
        if not 0 <= self.initial_state < f:
            raise ValueError(f"initial_state={self.initial_state!r} is not allowed; it must be an integer in 0..{f - 1}")
        R = atoms.get_positions() / units.Bohr
        P = atoms.get_momenta() * _ASE_MOMENTUM_IN_AU
        if zero_linear or zero_angular:
            P = remove_total_momentum(R, P, self.masses_au, linear=zero_linear, angular=zero_angular)
        rng_state = None
        if mapping_variables is not None:
            x, p = (np.array(v, dtype=float).reshape(-1) for v in mapping_variables)
            if x.shape != (f,) or p.shape != (f,) or not (np.all(np.isfinite(x)) and np.all(np.isfinite(p))):
                raise ValueError(f"mapping_variables must be two finite arrays of shape ({f},)")
        elif rng is not None:
            if not isinstance(rng, np.random.Generator):
                raise ValueError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
            x, p = sample_mapping_variables(rng, f, self.initial_state, self.options)
            rng_state = copy.deepcopy(rng.bit_generator.state)
        else:
            raise ValueError("give either rng (the trajectory generator after the nuclear draws) or mapping_variables")
        gamma = None
        if self.options.method == "sqc" and self.options.zero_point == "adjusted":
            occ = np.zeros(f)
            occ[self.initial_state] = 1.0
            gamma = actions(x[None], p[None])[0] - occ
        result = self._call_backend(R, None, True)
        if result.gradients is None:
            raise ValueError("the backend returned no gradients with need_gradients=True")
        history: list = []
        warns: list = []
        if result.couplings is None:
            warns.append(PROJECTION_WARNING)
            warnings.warn(PROJECTION_WARNING, stacklevel=3)
            V0 = P / self._M
            if np.linalg.norm(V0) > 0:
                delta = self.probe_fraction * self.dt_au
                probe = self._call_backend(R + delta * V0, result.guess, False)
                if probe.overlap_prev is None:
                    raise ValueError("the backend gives neither coupling vectors nor overlaps with the previous "
                                     "step; nonadiabatic dynamics needs one of them")
                S = np.asarray(probe.overlap_prev)
                history.append((0.5 * delta, (S - S.T) / (2.0 * delta), V0.copy()))
            else:
                history.append((0.0, np.zeros((f, f)), V0.copy()))
        state = DriverState(step=0, time=0.0, positions=R, momenta=P, x=x, p=p, gamma_adjusted=gamma,
                            result=result, force=np.zeros_like(R), sigma_history=history,
                            energy_reference=0.0, rng_state=rng_state, warnings=warns,
                            settings=dict(self._settings))
        state.force = self._force(state.result, x, p, gamma, 0.0, history)
        state.energy_reference = self._total_energy(state)
        return state

    # ------------------------------------------------------------------ physics
    def density(self, x: np.ndarray, p: np.ndarray, gamma: np.ndarray | None) -> np.ndarray:
        """ρ (F, F) in the adiabatic basis with the chosen zero-point treatment (dimensionless)."""
        return effective_density(x[None], p[None], self.options, None if gamma is None else gamma[None])[0]

    def _extrapolate(self, history: list, t: float) -> tuple[np.ndarray, np.ndarray]:
        tb, sb, vb = history[-1]
        if len(history) < 2:
            return sb, vb
        ta, sa, va = history[-2]
        w = (t - tb) / (tb - ta)
        return sb + w * (sb - sa), vb + w * (vb - va)

    def averaged_density(self, x: np.ndarray, p: np.ndarray, gamma: np.ndarray | None, energies: np.ndarray,
                         window: float) -> np.ndarray:
        """ρ̄ (F, F): ρ averaged over the free electronic motion during ``window`` (a.u. time, signed).

        With frozen energies z_k(τ) = z_k e^{−iE_k τ}, so ρ_kl(τ) = ½ Re(z_k z_l* e^{−iω_kl τ}),
        ω_kl = E_k − E_l (Eh), and the mean over τ ∈ [0, h] (h < 0: [h, 0]) is

            ρ̄_kl = ½ Re(z_k z_l* e^{−iω_kl h/2}) sinc(ω_kl h/2),   sinc(u) = sin(u)/u,

        (own derivation, elementary integral).  The diagonal (ω = 0) is unchanged, so the
        zero-point treatment is untouched; ρ̄ → ρ as h → 0.
        """
        rho = self.density(x, p, gamma)
        E = np.asarray(energies, dtype=float)
        omega = E[:, None] - E[None, :]
        u = 0.5 * omega * window
        z = x + 1j * p
        coherence = 0.5 * np.real(z[:, None] * z[None, :].conj() * np.exp(-1j * u)) * np.sinc(u / np.pi)
        idx = np.arange(rho.shape[0])
        off = idx[:, None] != idx[None, :]
        rho[off] = coherence[off]
        return rho

    def _force(self, result: ElectronicResult, x, p, gamma, t: float, history: list,
               window: float = 0.0) -> np.ndarray:
        """F = −Σ_kl ρ_kl ⟨ψ_k|∇H|ψ_l⟩ (Eh/Bohr, (N, 3)), §7.5; projected d on the no-NAC path.

        ``window`` (a.u. time, signed): with force averaging on, the off-diagonal ρ is the mean
        over the adjacent electronic half step (:meth:`averaged_density`); 0 gives ρ(t).
        """
        if self.force_averaging and window != 0.0:
            rho = self.averaged_density(x, p, gamma, result.energies, window)
        else:
            rho = self.density(x, p, gamma)
        E = np.asarray(result.energies)
        G = np.asarray(result.gradients)
        F = -np.einsum("k,kna->na", np.diag(rho).copy(), G)
        weight = rho * (E[None, :] - E[:, None])  # ρ_kl (E_l − E_k), symmetric
        np.fill_diagonal(weight, 0.0)
        if result.couplings is not None:
            F -= np.einsum("kl,klna->na", weight, np.asarray(result.couplings))
        else:
            sigma, V = self._extrapolate(history, t)
            v2 = float(np.sum(V * V))
            if np.sqrt(v2) > self.velocity_floor:
                F -= np.sum(weight * sigma) * V / v2
        return F

    def _check_gap_resolution(self, st: DriverState, energies: np.ndarray, sigma: np.ndarray) -> None:
        """Warn once (recorded in the state) when max ΔE_kl·Δt > GAP_PHASE_LIMIT over pairs with
        |σ_kl|·Δt > GAP_COUPLING_FLOOR (σ_kl = V·d_kl at mid-step)."""
        if any(w.startswith(GAP_WARNING) for w in st.warnings):
            return
        E = np.asarray(energies, dtype=float)
        phase = np.abs(E[:, None] - E[None, :]) * self.dt_au
        coupled = np.abs(np.asarray(sigma)) * self.dt_au > GAP_COUPLING_FLOOR
        np.fill_diagonal(coupled, False)
        if np.any(coupled) and phase[coupled].max() > GAP_PHASE_LIMIT:
            k, l = np.unravel_index(np.argmax(np.where(coupled, phase, -1.0)), phase.shape)
            msg = (f"{GAP_WARNING}: max ΔE·Δt = {phase[k, l]:.2f} rad > {GAP_PHASE_LIMIT} between coupled states "
                   f"{min(k, l)} and {max(k, l)} (|V·d|·Δt = {abs(sigma[k, l]) * self.dt_au:.1e}) at step {st.step}"
                   + ("; forces are averaged over the electronic half steps" if self.force_averaging else
                      "; force_averaging is off, expect energy drift"))
            st.warnings.append(msg)
            warnings.warn(msg, stacklevel=4)

    def _total_energy(self, state: DriverState) -> float:
        """Σ P²/2M + Σ_k ρ_kk E_k (Eh)."""
        rho = self.density(state.x, state.p, state.gamma_adjusted)
        kin = 0.5 * float(np.sum(state.momenta ** 2 / self._M))
        return kin + float(np.dot(np.diag(rho), state.result.energies))

    def _call_backend(self, R: np.ndarray, guess, need_gradients: bool) -> ElectronicResult:
        t0 = _time.perf_counter()
        result = self.backend.compute(R, guess=guess, need_gradients=need_gradients)
        self.timings["backend_seconds"] += _time.perf_counter() - t0
        self.timings["backend_calls"] += 1
        if not isinstance(result, ElectronicResult):
            raise ValueError(f"backend.compute must return an ElectronicResult, got {type(result).__name__}")
        result.validate(natoms=R.shape[0])
        if result.nstates != self.nstates:
            raise ValueError(f"backend returned {result.nstates} states, expected nstates={self.nstates}")
        return result

    def _propagate_oscillators(self, old: ElectronicResult, new: ElectronicResult, z: np.ndarray,
                               V: np.ndarray) -> tuple[np.ndarray, np.ndarray, str]:
        """z (F,) adiabatic at t → adiabatic at t+Δt; also σ at mid-step (1/a.u. time)."""
        dt, n = self.dt_au, self.substeps
        mode = self.electronic_propagation
        if mode == "auto":
            mode = "overlap" if new.overlap_prev is not None else "coupling"
        if mode == "overlap":
            if new.overlap_prev is None:
                raise ValueError("electronic_propagation='overlap' but the backend returned no overlap_prev")
            S = np.asarray(new.overlap_prev, dtype=float)
            T = _lowdin(S)
            H0 = np.diag(np.asarray(old.energies, dtype=float))
            H1 = T @ np.diag(np.asarray(new.energies, dtype=float)) @ T.T
            z_d = _interpolated_propagator(H0, H1, dt, n) @ z
            return T.T @ z_d, (S - S.T) / (2.0 * dt), mode
        if old.couplings is None or new.couplings is None:
            raise ValueError("the backend gives neither overlaps with the previous step nor coupling vectors; "
                             "nonadiabatic dynamics needs one of them")
        s0 = np.einsum("klna,na->kl", np.asarray(old.couplings), V)
        s1 = np.einsum("klna,na->kl", np.asarray(new.couplings), V)
        H0 = np.diag(np.asarray(old.energies, dtype=float)) - 1j * s0
        H1 = np.diag(np.asarray(new.energies, dtype=float)) - 1j * s1
        return _interpolated_propagator(H0, H1, dt, n) @ z, 0.5 * (s0 + s1), mode

    def step(self) -> None:
        """Advance the trajectory by one time step (one backend call)."""
        st = self._state
        if st.stopped:
            return
        t_start = _time.perf_counter()
        dt = self.dt_au
        if self.force_averaging:  # opening kick: ρ averaged over the first electronic half step
            F_open = self._force(st.result, st.x, st.p, st.gamma_adjusted, st.time, st.sigma_history, 0.5 * dt)
        else:
            F_open = st.force
        P_half = st.momenta + 0.5 * dt * F_open
        V = P_half / self._M
        R_new = st.positions + dt * V
        try:
            new = self._call_backend(R_new, st.result.guess, True)
        except BackendError as exc:
            if self.on_backend_error == "raise":
                raise
            st.stopped, st.stop_reason = True, f"backend failure at step {st.step + 1}: {exc}"
            return
        if new.gradients is None:
            raise ValueError("the backend returned no gradients with need_gradients=True")
        z, sigma_mid, _ = self._propagate_oscillators(st.result, new, st.x + 1j * st.p, V)
        t_new = (st.step + 1) * dt
        history = st.sigma_history
        if new.couplings is None:
            history = (history + [(st.time + 0.5 * dt, sigma_mid, V.copy())])[-2:]
        x, p = z.real.copy(), z.imag.copy()
        F_new = self._force(new, x, p, st.gamma_adjusted, t_new, history, -0.5 * dt)  # closing kick
        self._check_gap_resolution(st, new.energies, sigma_mid)
        st.momenta = P_half + 0.5 * dt * F_new
        st.positions, st.x, st.p, st.result, st.force = R_new, x, p, new, F_new
        st.sigma_history = history
        st.step += 1
        st.time = t_new
        self._last_sigma = sigma_mid
        drift = self._total_energy(st) - st.energy_reference
        if self.drift_threshold is not None and st.drift_flag is None and abs(drift) > self.drift_threshold:
            st.drift_flag = {"step": st.step, "time_au": st.time, "drift_Eh": drift,
                             "threshold_Eh": self.drift_threshold}
            if self.stop_on_drift:
                st.stopped = True
                st.stop_reason = f"energy drift {drift:.3e} Eh exceeds {self.drift_threshold:.3e} Eh at step {st.step}"
        self.timings["steps"] += 1
        self.timings["step_seconds"] += _time.perf_counter() - t_start

    # ------------------------------------------------------------------ ASE contract
    def irun(self, steps: int = 50):
        """Run as a generator (ASE contract); stops early when the trajectory is stopped."""
        if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or steps < 0:
            raise ValueError(f"steps={steps!r} is not allowed; it must be a non-negative integer")
        self.nsteps = self._state.step
        self.max_steps = self.nsteps + steps
        if self.nsteps == 0 and not self._observed_initial:
            self._observed_initial = True
            self._sync_atoms()
            self.log()
            self.call_observers()
        yield self.nsteps >= self.max_steps or self._state.stopped
        while self.nsteps < self.max_steps and not self._state.stopped:
            before = self._state.step
            self.step()
            if self._state.step == before:  # stopped by a backend failure
                break
            self.nsteps = self._state.step
            self._sync_atoms()
            if self.nsteps % self.record_interval == 0:
                self._record_frame()
            self.log()
            self.call_observers()
            yield self.nsteps >= self.max_steps or self._state.stopped
        if self.geometry_file is not None:
            self.write_geometries(self.geometry_file)

    def run(self, steps: int = 50) -> bool:
        """Run ``steps`` steps (fewer if the trajectory stops); True when all were taken."""
        done = steps == 0
        for done in self.irun(steps):
            pass
        return bool(done) and not self._state.stopped

    def _refresh_properties(self) -> None:  # ASE hook; atoms carry a single-point calculator
        return None

    def todict(self) -> dict:
        return {"type": "molecular-dynamics", "md-type": type(self).__name__, "timestep": self.dt,
                "options": self.options.describe()}

    def get_time(self) -> float:
        """Elapsed time in ASE time units."""
        return self._state.time * units.AUT

    # ------------------------------------------------------------------ state and records
    @property
    def state(self) -> DriverState:
        """The live state (do not modify; use :meth:`get_state` for a copy)."""
        return self._state

    def get_state(self) -> DriverState:
        """A deep copy of the complete propagation state."""
        return self._state.copy()

    def set_state(self, state: DriverState) -> None:
        """Continue from ``state`` (a deep copy is taken); its settings must match this driver's."""
        if not isinstance(state, DriverState):
            raise ValueError(f"state must be a DriverState, got {type(state).__name__}")
        mismatch = [k for k, v in self._settings.items() if state.settings.get(k) != v]
        if mismatch:
            raise ValueError(f"restart state was made with different settings: {', '.join(mismatch)}")
        self._state = state.copy()
        self.nsteps = self._state.step
        self._observed_initial = self._state.step > 0
        self._sync_atoms()

    @property
    def metadata(self) -> dict:
        """Run metadata: method, settings, warnings issued once, drift flag, stop reason."""
        st = self._state
        return {"method": self.options.describe(), **copy.deepcopy(self._settings),
                "coupling_source": "vectors" if st.result.couplings is not None else "projected_overlaps",
                "warnings": list(st.warnings), "drift_flag": copy.deepcopy(st.drift_flag),
                "stopped": st.stopped, "stop_reason": st.stop_reason, "steps": st.step}

    def actions(self) -> np.ndarray:
        """Adiabatic oscillator actions e_k (F,) (dimensionless)."""
        return actions(self._state.x[None], self._state.p[None])[0]

    def total_energy(self) -> float:
        """Conserved MMST energy Σ P²/2M + Σ_k ρ_kk E_k in Eh."""
        return self._total_energy(self._state)

    def _populations(self, e: np.ndarray) -> tuple[np.ndarray, int]:
        if self.options.method == "ehrenfest":
            return e / e.sum(), -1
        ind = window_indicators(e[None], self.options)[0]
        return ind.astype(float), int(window_assignment(e[None], self.options)[0])

    def _record_frame(self) -> None:
        st = self._state
        e = self.actions()
        pops, window = self._populations(e)
        r = st.result
        rho = self.density(st.x, st.p, st.gamma_adjusted)
        kin = 0.5 * float(np.sum(st.momenta ** 2 / self._M))
        sigma = getattr(self, "_last_sigma", None)
        if st.step == 0 and st.sigma_history:
            sigma = st.sigma_history[-1][1]
        self.frames.append({
            "step": st.step, "time_au": st.time,
            "positions_bohr": st.positions.copy(), "momenta_au": st.momenta.copy(),
            "energies_Eh": np.asarray(r.energies, dtype=float).copy(),
            "actions": e, "populations": pops, "window": window,
            "kinetic_energy_Eh": kin, "potential_energy_Eh": float(np.dot(np.diag(rho), r.energies)),
            "total_energy_Eh": kin + float(np.dot(np.diag(rho), r.energies)),
            "drift_Eh": kin + float(np.dot(np.diag(rho), r.energies)) - st.energy_reference,
            "coupling_norms": None if r.couplings is None else np.linalg.norm(
                np.asarray(r.couplings).reshape(self.nstates, self.nstates, -1), axis=2),
            "sigma": None if sigma is None else np.array(sigma),
            "min_overlap": r.diagnostics.get("min_overlap"), "swap": bool(r.diagnostics.get("swap", False)),
            "permutation": r.diagnostics.get("permutation"),
            **backend_frame_diagnostics(r.diagnostics),
        })

    def _sync_atoms(self) -> None:
        st = self._state
        self.atoms.set_positions(st.positions * units.Bohr)
        self.atoms.set_momenta(st.momenta / _ASE_MOMENTUM_IN_AU)
        rho = self.density(st.x, st.p, st.gamma_adjusted)
        epot = float(np.dot(np.diag(rho), st.result.energies)) * units.Hartree
        self.atoms.calc = SinglePointCalculator(self.atoms, energy=epot,
                                                forces=st.force * units.Hartree / units.Bohr)

    def frame_atoms(self, frame: dict) -> Atoms:
        """An ase.Atoms of a recorded frame (Å, ASE momenta) with its electronic data in ``info``."""
        a = Atoms(self.atoms.get_chemical_symbols(), positions=frame["positions_bohr"] * units.Bohr,
                  masses=self.masses_au / AMU_IN_ME, pbc=False)
        a.set_momenta(frame["momenta_au"] / _ASE_MOMENTUM_IN_AU)
        a.info.update({"step": int(frame["step"]), "time_fs": frame["time_au"] * units.AUT / units.fs,
                       "energies_Eh": frame["energies_Eh"], "actions": frame["actions"],
                       "populations": frame["populations"], "window": int(frame["window"]),
                       "total_energy_Eh": frame["total_energy_Eh"]})
        if frame["coupling_norms"] is not None:
            iu = np.triu_indices(self.nstates, 1)
            a.info["coupling_norms_upper"] = frame["coupling_norms"][iu]
        return a

    def write_geometries(self, path: str) -> None:
        """Write all recorded frames as extxyz (atomically: temp file, fsync, os.replace)."""
        from ase.io import write

        path = os.fspath(path)
        tmp = path + ".tmp"
        with open(tmp, "w") as fh:
            write(fh, [self.frame_atoms(f) for f in self.frames], format="extxyz")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
