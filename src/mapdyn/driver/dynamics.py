"""On-the-fly mapping dynamics of one trajectory: an ASE MolecularDynamics subclass.

Internals in Hartree atomic units (positions Bohr, kinetic momenta a.u., energies Eh, time a.u.);
ASE units (Å, eV, amu, ASE time) only at the boundary, converted with :mod:`ase.units`.  The
physics is in :mod:`mapdyn.core.adiabatic` (equations and sources in
docs/theory.md#adiabatic-representation); this class holds the state, calls the backend and
applies the run policies (:mod:`mapdyn.driver.observers`).  One step (velocity-Verlet shape, one
backend call):

1. P ← P + F̄(t) Δt/2;  R ← R + Δt P/M  (V = P/M is the mid-step velocity);
2. backend at the new R (warm-started from the previous ``guess``);
3. oscillators through the step: local diabatization when the backend gives overlaps with the
   previous step, else the coupling-vector Hamiltonian diag E − iV·d;
4. F̄(t+Δt);  P ← P + F̄ Δt/2.

F̄ uses ρ averaged over the adjacent electronic half step (``force_averaging=True``, the default;
docs/theory.md#force-averaging), else ρ(t).  Without coupling vectors the force uses the
velocity-projected coupling with σ and V extrapolated from the last two mid-steps, one extra
gradient-free backend call at t = 0 supplying the first (docs/theory.md#velocity-projected-couplings).
Warnings issued once (no coupling vectors, unresolved electronic gap) are recorded in
:attr:`MappingDynamics.metadata`.

Force evaluation, one driver and two ways (docs/theory.md#one-solve-force): the kick weights at a
geometry (closing kick and, with force averaging, the next step's opening kick;
:meth:`MappingDynamics.kick_weights`) are known once that step's energies and overlaps are.  A
two-phase backend (``offers_force``) is called without gradients and asked for the forces of those
weight matrices (SA-CASSCF: one Lagrange solve per matrix, one derivative-integral pass); any other
backend returns gradients and couplings that the driver contracts with the same weights.

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

from mapdyn.backends.contract import ENDED_PREFIX, BackendError, ElectronicResult, RegionReached, offers_force
from mapdyn.core.adiabatic import (
    GAP_COUPLING_FLOOR,
    GAP_PHASE_LIMIT,
    GAP_WARNING,
    PROJECTION_WARNING,
    adiabatic_force,
    averaged_density,
    extrapolate_projection,
    gap_resolution_message,
    mapping_potential_energy,
    mapping_total_energy,
    projected_force,
    propagate_local_diabatization,
    propagate_with_couplings,
    remove_total_momentum,
    sigma_from_overlap,
)
from mapdyn.core.mapping import actions, effective_density
from mapdyn.core.options import MethodOptions
from mapdyn.core.windows import sample_mapping_variables
from mapdyn.driver.observers import (
    DISCONTINUITY_OVERLAP,
    DriftMonitor,
    FrameRecorder,
    electronic_discontinuity,
    frame_atoms,
    write_frames_extxyz,
)
from mapdyn.driver.state import DriverState
from mapdyn.units import AMU_IN_ME, ASE_MOMENTUM_IN_AU, AU_TIME_IN_FS

__all__ = ["MappingDynamics", "DriverState", "remove_total_momentum",
           "PROJECTION_WARNING", "GAP_WARNING", "GAP_PHASE_LIMIT", "GAP_COUPLING_FLOOR",
           "electronic_discontinuity", "DISCONTINUITY_OVERLAP"]

_PROPAGATIONS = ("auto", "overlap", "coupling")
_ON_ERROR = ("raise", "stop")


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
    options : :class:`MethodOptions`; ``zero_point="fixed"`` is refused on this path (it rescales
        the whole bonding potential per trajectory);
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
    on_backend_error : "raise" (default) or "stop" (the trajectory stops, reason recorded); also
        applies to a jump between electronic solutions (:func:`electronic_discontinuity`), where the
        step is not taken.
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
        # two ways, one driver: a two-phase backend returns the force for the driver's weights,
        # any other returns gradients and couplings that the driver contracts with the same weights
        self.two_phase = offers_force(backend) and electronic_propagation != "coupling"
        self.masses_au = atoms.get_masses() * AMU_IN_ME  # (N,) electron masses
        if np.any(self.masses_au <= 0):
            raise ValueError("atoms have non-positive masses; set them with atoms.set_masses (amu)")
        self._M = self.masses_au[:, None]
        self.recorder = FrameRecorder(options, self.masses_au, self.record_interval)
        self.drift_monitor = DriftMonitor(self.drift_threshold, self.stop_on_drift)
        #: mid-step σ (F, F) of the last step in 1/a.u. time (the t = 0 probe's before the first
        #: step on the no-NAC path; None otherwise), recorded in the frames.
        self.step_sigma: np.ndarray | None = None
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
        if self._state.sigma_history:
            self.step_sigma = self._state.sigma_history[-1][1]
        self._sync_atoms()
        self._record_frame()

    # ------------------------------------------------------------------ setup
    def _initial_state(self, atoms, rng, mapping_variables, zero_linear, zero_angular) -> DriverState:
        f = self.nstates
        if not 0 <= self.initial_state < f:
            raise ValueError(f"initial_state={self.initial_state!r} is not allowed; it must be an integer in 0..{f - 1}")
        R = atoms.get_positions() / units.Bohr
        P = atoms.get_momenta() * ASE_MOMENTUM_IN_AU
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
        result = self._call_backend(R, None, not self.two_phase)
        if result.gradients is None and not self.two_phase:
            raise ValueError("the backend returned no gradients with need_gradients=True")
        history: list = []
        warns: list = []
        if result.couplings is None and not self.two_phase:
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
                history.append((0.5 * delta, sigma_from_overlap(S, delta), V0.copy()))
            else:
                history.append((0.0, np.zeros((f, f)), V0.copy()))
        state = DriverState(step=0, time=0.0, positions=R, momenta=P, x=x, p=p, gamma_adjusted=gamma,
                            result=result, force=np.zeros_like(R), sigma_history=history,
                            energy_reference=0.0, rng_state=rng_state, warnings=warns,
                            settings=dict(self._settings))
        state.force, state.force_open = self._kick_forces(result, x, p, gamma, 0.0, history, 0.0)
        state.energy_reference = self._total_energy(state)
        return state

    # ------------------------------------------------------------------ physics
    def density(self, x: np.ndarray, p: np.ndarray, gamma: np.ndarray | None) -> np.ndarray:
        """ρ (F, F) in the adiabatic basis with the chosen zero-point treatment (dimensionless)."""
        return effective_density(x[None], p[None], self.options, None if gamma is None else gamma[None])[0]

    def averaged_density(self, x: np.ndarray, p: np.ndarray, gamma: np.ndarray | None, energies: np.ndarray,
                         window: float) -> np.ndarray:
        """ρ̄ (F, F): ρ averaged over the free electronic motion during ``window`` (a.u. time, signed;
        energies in Eh); see :func:`mapdyn.core.adiabatic.averaged_density`."""
        return averaged_density(self.density(x, p, gamma), x, p, energies, window)

    def kick_weights(self, x: np.ndarray, p: np.ndarray, gamma: np.ndarray | None, energies: np.ndarray,
                     closing_window: float) -> np.ndarray:
        """Weights ρ̄ (M, F, F) of the kicks at one geometry (dimensionless, real symmetric).

        Row 0: the closing kick (ρ averaged over ``closing_window``, a.u. time, usually −Δt/2; 0 gives
        ρ(t)); row 1 with force averaging: the opening kick of the next step (window +Δt/2).
        Without force averaging one row, ρ(t), serves both kicks.
        """
        if not self.force_averaging:
            return self.density(x, p, gamma)[None]
        close = (self.averaged_density(x, p, gamma, energies, closing_window) if closing_window != 0.0
                 else self.density(x, p, gamma))
        return np.stack([close, self.averaged_density(x, p, gamma, energies, 0.5 * self.dt_au)])

    def _kick_forces(self, result: ElectronicResult, x, p, gamma, t: float, history: list,
                     closing_window: float) -> tuple[np.ndarray, np.ndarray | None]:
        """(closing force, opening force of the next step or None), each (N, 3) Eh/Bohr: one
        backend ``force`` call on the two-phase path, the driver's own contraction otherwise."""
        rho = self.kick_weights(x, p, gamma, result.energies, closing_window)
        if self.two_phase:
            t0 = _time.perf_counter()
            forces = np.asarray(self.backend.force(result, rho), dtype=float).reshape(rho.shape[0], -1, 3)
            self.timings["backend_seconds"] += _time.perf_counter() - t0
        else:
            forces = [self._contract(result, r, t, history) for r in rho]
        return forces[0], (forces[1] if len(forces) > 1 else None)

    def _opening_force(self, st: DriverState) -> np.ndarray:
        """Force of the opening half kick of the step that starts from ``st`` (Eh/Bohr)."""
        if not self.force_averaging:
            return st.force
        if st.force_open is not None:
            return st.force_open
        if st.result.gradients is None:  # a state made without the opening force (older checkpoint)
            return np.asarray(self.backend.force(st.result, self.averaged_density(
                st.x, st.p, st.gamma_adjusted, st.result.energies, 0.5 * self.dt_au)), dtype=float)
        return self._force(st.result, st.x, st.p, st.gamma_adjusted, st.time, st.sigma_history, 0.5 * self.dt_au)

    def _force(self, result: ElectronicResult, x, p, gamma, t: float, history: list,
               window: float = 0.0) -> np.ndarray:
        """F = −Σ_kl ρ_kl ⟨ψ_k|∇H|ψ_l⟩ (Eh/Bohr, (N, 3)); projected d on the no-NAC path.

        ``window`` (a.u. time, signed): with force averaging on, the off-diagonal ρ is the mean
        over the adjacent electronic half step; 0 gives ρ(t).
        """
        if self.force_averaging and window != 0.0:
            rho = self.averaged_density(x, p, gamma, result.energies, window)
        else:
            rho = self.density(x, p, gamma)
        return self._contract(result, rho, t, history)

    def _contract(self, result: ElectronicResult, rho: np.ndarray, t: float, history: list) -> np.ndarray:
        """−Σ_kl ρ_kl ⟨ψ_k|∇H|ψ_l⟩ (Eh/Bohr) from the backend's gradients and couplings (or the
        velocity-projected coupling when it has none)."""
        if result.couplings is not None:
            return adiabatic_force(rho, result.energies, result.gradients, result.couplings)
        sigma, V = extrapolate_projection(history, t)
        return projected_force(rho, result.energies, result.gradients, sigma, V, self.velocity_floor)

    def _check_gap_resolution(self, st: DriverState, energies: np.ndarray, sigma: np.ndarray) -> None:
        """Warn once (recorded in the state) when the step does not resolve the electronic gap."""
        if any(w.startswith(GAP_WARNING) for w in st.warnings):
            return
        msg = gap_resolution_message(energies, sigma, self.dt_au, st.step, self.force_averaging)
        if msg is not None:
            st.warnings.append(msg)
            warnings.warn(msg, stacklevel=4)

    def _total_energy(self, state: DriverState) -> float:
        """Σ P²/2M + Σ_k ρ_kk E_k (Eh)."""
        rho = self.density(state.x, state.p, state.gamma_adjusted)
        return mapping_total_energy(state.momenta, self.masses_au, rho, state.result.energies)

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

    def _step_backend(self, st: DriverState, R: np.ndarray) -> ElectronicResult | None:
        """Result at R (with gradients unless two-phase), or None when a backend failure stopped the
        trajectory."""
        try:
            new = self._call_backend(R, st.result.guess, not self.two_phase)
        except RegionReached as exc:
            self._end_in_channel(st, R, exc)
            return None
        except BackendError as exc:
            if self.on_backend_error == "raise":
                raise
            st.stopped, st.stop_reason = True, f"backend failure at step {st.step + 1}: {exc}"
            return None
        if new.gradients is None and not self.two_phase:
            raise ValueError("the backend returned no gradients with need_gradients=True")
        jump = electronic_discontinuity(new)
        if jump is not None:
            if self.on_backend_error == "raise":
                raise BackendError(f"step {st.step + 1}: {jump}")
            st.stopped, st.stop_reason = True, f"{jump} at step {st.step + 1}; stopped before it"
            return None
        return new

    def _end_in_channel(self, st: DriverState, R: np.ndarray, exc: RegionReached) -> None:
        """Stop ``st`` as an outcome: the next geometry R (Bohr) lies in the region of ``exc`` (the step
        to it is not taken; time and geometry of the would-be step are recorded in ``end_event``)."""
        t = (st.step + 1) * self.dt_au
        st.stopped = True
        st.stop_reason = (f"{ENDED_PREFIX}{exc.channel}; {exc.reason} at step {st.step + 1} "
                          f"(t = {t * AU_TIME_IN_FS:.2f} fs)")
        values = {k: v for k, v in exc.values.items() if k != "positions_bohr"}
        st.end_event = {"channel": exc.channel, "step": st.step + 1, "time_au": float(t),
                        "positions_bohr": np.asarray(R, dtype=float).tolist(), "values": values}

    def _step_kicks(self, st: DriverState, new: ElectronicResult, x, p, t: float,
                    history: list) -> tuple[np.ndarray, np.ndarray | None] | None:
        """Closing and next opening forces at the new geometry, or None when a backend failure
        stopped the trajectory."""
        try:
            return self._kick_forces(new, x, p, st.gamma_adjusted, t, history, -0.5 * self.dt_au)
        except BackendError as exc:
            if self.on_backend_error == "raise":
                raise
            st.stopped, st.stop_reason = True, f"backend failure at step {st.step + 1}: {exc}"
            return None

    def _propagate_oscillators(self, old: ElectronicResult, new: ElectronicResult, z: np.ndarray,
                               V: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """z (F,) adiabatic at t → adiabatic at t+Δt, and σ at mid-step (1/a.u. time)."""
        mode = self.electronic_propagation
        if mode == "auto":
            mode = "overlap" if new.overlap_prev is not None else "coupling"
        if mode == "overlap":
            if new.overlap_prev is None:
                raise ValueError("electronic_propagation='overlap' but the backend returned no overlap_prev")
            return propagate_local_diabatization(z, old.energies, new.energies, new.overlap_prev,
                                                 self.dt_au, self.substeps)
        if old.couplings is None or new.couplings is None:
            raise ValueError("the backend gives neither overlaps with the previous step nor coupling vectors; "
                             "nonadiabatic dynamics needs one of them")
        return propagate_with_couplings(z, old.energies, new.energies, old.couplings, new.couplings, V,
                                        self.dt_au, self.substeps)

    def step(self) -> None:
        """Advance the trajectory by one time step (one backend call)."""
        st = self._state
        if st.stopped:
            return
        t_start = _time.perf_counter()
        dt = self.dt_au
        F_open = self._opening_force(st)  # with averaging: ρ over the first electronic half step
        P_half = st.momenta + 0.5 * dt * F_open
        V = P_half / self._M
        R_new = st.positions + dt * V
        new = self._step_backend(st, R_new)
        if new is None:
            return
        z, sigma_mid = self._propagate_oscillators(st.result, new, st.x + 1j * st.p, V)
        history = st.sigma_history
        if new.couplings is None and not self.two_phase:
            history = (history + [(st.time + 0.5 * dt, sigma_mid, V.copy())])[-2:]
        x, p = z.real.copy(), z.imag.copy()
        t_new = (st.step + 1) * dt
        kicks = self._step_kicks(st, new, x, p, t_new, history)  # closing kick, next opening kick
        if kicks is None:
            return
        self._check_gap_resolution(st, new.energies, sigma_mid)
        st.momenta = P_half + 0.5 * dt * kicks[0]
        st.positions, st.x, st.p, st.result, (st.force, st.force_open) = R_new, x, p, new, kicks
        st.sigma_history, st.step, st.time = history, st.step + 1, t_new
        self.step_sigma = sigma_mid
        self.drift_monitor.check(st, self._total_energy(st) - st.energy_reference)
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
            if self.recorder.due(self.nsteps):
                self._record_frame()
            self.log()
            self.call_observers()
            yield self.nsteps >= self.max_steps or self._state.stopped
        if self.geometry_file is not None:
            self.write_geometries(self.geometry_file)

    def run(self, steps: int = 50) -> bool:
        """Run ``steps`` steps (fewer if the trajectory stops); True when all were taken."""
        done = steps == 0
        for done in self.irun(steps):  # noqa: B007 - the generator's last value is the answer
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
                "coupling_source": ("vectors" if st.result.couplings is not None or self.two_phase
                                    else "projected_overlaps"),
                "force_source": "backend (two-phase)" if self.two_phase else "driver contraction",
                "warnings": list(st.warnings), "drift_flag": copy.deepcopy(st.drift_flag),
                "stopped": st.stopped, "stop_reason": st.stop_reason, "end_event": copy.deepcopy(st.end_event),
                "steps": st.step}

    @property
    def frames(self) -> list[dict]:
        """Recorded frames (see the class docstring); the recorder's list, cleared by checkpoint writers."""
        return self.recorder.frames

    @frames.setter
    def frames(self, value: list[dict]) -> None:
        self.recorder.frames = value

    def actions(self) -> np.ndarray:
        """Adiabatic oscillator actions e_k (F,) (dimensionless)."""
        return actions(self._state.x[None], self._state.p[None])[0]

    def total_energy(self) -> float:
        """Conserved MMST energy Σ P²/2M + Σ_k ρ_kk E_k in Eh."""
        return self._total_energy(self._state)

    def _record_frame(self) -> None:
        st = self._state
        self.recorder.record(st, self.density(st.x, st.p, st.gamma_adjusted), self.step_sigma)

    def _sync_atoms(self) -> None:
        st = self._state
        self.atoms.set_positions(st.positions * units.Bohr)
        self.atoms.set_momenta(st.momenta / ASE_MOMENTUM_IN_AU)
        rho = self.density(st.x, st.p, st.gamma_adjusted)
        epot = mapping_potential_energy(rho, st.result.energies) * units.Hartree
        self.atoms.calc = SinglePointCalculator(self.atoms, energy=epot,
                                                forces=st.force * units.Hartree / units.Bohr)

    def frame_atoms(self, frame: dict) -> Atoms:
        """An ase.Atoms of a recorded frame (Å, ASE momenta) with its electronic data in ``info``."""
        return frame_atoms(frame, self.atoms.get_chemical_symbols(), self.masses_au)

    def write_geometries(self, path: str) -> None:
        """Write all recorded frames as extxyz (atomically: temp file, fsync, os.replace)."""
        write_frames_extxyz(path, [self.frame_atoms(f) for f in self.frames])
