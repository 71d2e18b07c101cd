"""One-dimensional scattering with the batched mapping engine, channel- and state-resolved.

:func:`run_scattering` samples the Wigner function of the Gaussian packet
ψ ∝ exp[−(x−x0)²/(4σ²) + ik(x−x0)] on one adiabatic state (σ_P = 1/(2σ); common practice), runs the
batched MMST integrator (:class:`mapdyn.core.propagators.DiabaticIntegrator`) and stops each trajectory
when it has left the interaction region [a, b] moving outwards (x < a with p < 0, or x > b with
p > 0).  Its adiabatic actions at that moment are read with the SQC windows (or, for Ehrenfest, as
the mean-field weights e_f/Σe) and binned by side: "transmitted" is the side the packet moves
towards (k > 0: x > b), "reflected" the other.  The run ends when all trajectories have left.

Probabilities (SQC): P_{c,f} = N_{c,f}/N_w, N_w the trajectories that ended inside some window, with
the multinomial standard error √(P(1−P)/N_w).  Ehrenfest: P_{c,f} = mean of the per-trajectory
weight; standard error = sample standard deviation/√N.  :func:`mapdyn.validation.exact.exact_scattering` takes
the same arguments and gives the exact quantum answer for the same packet.
"""

from __future__ import annotations

import dataclasses
import math
import warnings

import numpy as np

from mapdyn.core.model import DiabaticModel
from mapdyn.core.options import MethodOptions
from mapdyn.core.propagators import DiabaticIntegrator, adiabatic_actions
from mapdyn.core.sampling import EnsembleState, gaussian_wavepacket_ensemble
from mapdyn.core.windows import window_assignment

__all__ = ["ScatteringResult", "default_interaction_region", "run_scattering", "compare_scattering"]


@dataclasses.dataclass
class ScatteringResult:
    """Channel- and adiabatic-state-resolved scattering probabilities (dimensionless).

    transmission, reflection : (F,) probabilities per adiabatic state (index 0 = lowest);
    transmission_error, reflection_error : (F,) standard errors (0 for the exact solver);
    method : "exact" or the MethodOptions description; ntraj : trajectories run;
    n_unassigned : trajectories that ended in no window (SQC); n_unfinished : trajectories still in
    the interaction region at the time limit (left out of the probabilities); details : extra data.
    """

    method: str
    transmission: np.ndarray
    reflection: np.ndarray
    transmission_error: np.ndarray
    reflection_error: np.ndarray
    ntraj: int
    n_unassigned: int
    n_unfinished: int
    details: dict = dataclasses.field(default_factory=dict)

    def as_dict(self) -> dict:
        """Flat mapping "T0", "T1", …, "R0", … → probability and "dT0", … → standard error."""
        out = {}
        for f in range(self.transmission.size):
            out[f"T{f}"], out[f"R{f}"] = float(self.transmission[f]), float(self.reflection[f])
            out[f"dT{f}"], out[f"dR{f}"] = float(self.transmission_error[f]), float(self.reflection_error[f])
        return out


def _positive_int(name, v):
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
        raise ValueError(f"{name}={v!r} is not allowed; it must be a positive integer")
    return int(v)


def _check_scattering_args(model, momentum, position, position_width, initial_state):
    if not isinstance(model, DiabaticModel):
        raise ValueError(f"model={model!r} is not allowed; it must be a mapdyn DiabaticModel")
    if model.ndof != 1:
        raise ValueError(f"model has ndof={model.ndof}; scattering runs need a 1D model")
    vals = []
    for name, v in (("momentum", momentum), ("position", position), ("position_width", position_width)):
        try:
            v = float(v)
        except (TypeError, ValueError):
            raise ValueError(f"{name}={v!r} is not allowed; it must be a number") from None
        if not math.isfinite(v):
            raise ValueError(f"{name}={v!r} is not allowed; it must be finite")
        vals.append(v)
    k, x0, sig = vals
    if k == 0:
        raise ValueError("momentum=0 is not allowed; the packet must move towards the interaction region")
    if sig <= 0:
        raise ValueError(f"position_width={sig!r} is not allowed; it must be a positive number of Bohr")
    if isinstance(initial_state, bool) or not isinstance(initial_state, (int, np.integer)) \
            or not 0 <= initial_state < model.nstates:
        raise ValueError(f"initial_state={initial_state!r} is not allowed; it must be an integer in 0..{model.nstates - 1}")
    return k, x0, sig


def default_interaction_region(model: DiabaticModel, gradient_tolerance: float = 1e-5,
                               search_range: tuple = (-200.0, 200.0), spacing: float = 0.01) -> tuple[float, float]:
    """The smallest interval [a, b] (Bohr) outside which every |∂H_kl/∂x| < ``gradient_tolerance``
    (Eh/Bohr), searched on ``search_range`` with ``spacing``.  Outside it the forces vanish and the
    adiabatic states are fixed, so channel and state no longer change."""
    if model.ndof != 1:
        raise ValueError(f"model has ndof={model.ndof}; an interaction region is defined for 1D models")
    x = np.arange(search_range[0], search_range[1] + spacing, spacing)
    big = np.max(np.abs(model.hamiltonian_gradient(x[:, None])[:, 0]), axis=(1, 2)) > gradient_tolerance
    if not big.any():
        raise ValueError(f"gradient_tolerance={gradient_tolerance!r}: the model has no interaction region in {search_range}")
    idx = np.nonzero(big)[0]
    if idx[0] == 0 or idx[-1] == x.size - 1:
        raise ValueError(f"search_range={search_range!r} is too small; the potential still varies at its ends")
    return float(x[idx[0]] - spacing), float(x[idx[-1]] + spacing)


def run_scattering(model: DiabaticModel, momentum: float, position: float, position_width: float,
                   options: MethodOptions = MethodOptions(), ntraj: int = 2000, seed: int = 0,
                   initial_state: int = 0, interaction_region: tuple | None = None, dt: float = 2.0,
                   max_time: float | None = None, check_every: int = 5) -> ScatteringResult:
    """Scattering probabilities of a 1D model from a mapping-trajectory ensemble.

    model : any 1D :class:`DiabaticModel`; momentum k (a.u., sign = direction); position x0 (Bohr);
    position_width σ (Bohr) of ψ ∝ exp[−(x−x0)²/(4σ²) + ik(x−x0)] on adiabatic state
    ``initial_state``; options : method/window/zero point; ntraj, seed : ensemble size and study seed
    (trajectory i uses :func:`mapdyn.core.sampling.trajectory_generator`); interaction_region (a, b) Bohr
    (default :func:`default_interaction_region`); dt : time step (a.u.); max_time (a.u.; default
    6 × (b − a + |x0| distance) / initial speed); check_every : steps between exit checks.
    Returns a :class:`ScatteringResult` (transmission/reflection per adiabatic state ± standard error).
    """
    k, x0, sig = _check_scattering_args(model, momentum, position, position_width, initial_state)
    ntraj = _positive_int("ntraj", ntraj)
    check_every = _positive_int("check_every", check_every)
    if not (isinstance(dt, (int, float)) and math.isfinite(dt) and dt > 0):
        raise ValueError(f"dt={dt!r} is not allowed; the time step must be a positive number of a.u.")
    if not isinstance(options, MethodOptions):
        raise ValueError(f"options={options!r} is not allowed; pass a mapdyn.core.options.MethodOptions")
    if interaction_region is None:
        a, b = default_interaction_region(model)
    else:
        a, b = (float(v) for v in interaction_region)
        if not (math.isfinite(a) and math.isfinite(b) and b > a):
            raise ValueError(f"interaction_region={interaction_region!r} is not allowed; give (lower, upper) Bohr with upper > lower")
    M = float(model.masses[0])
    F = model.nstates
    if max_time is None:
        span = max(b, x0 + 8 * sig) - min(a, x0 - 8 * sig)
        max_time = 6.0 * span / (abs(k) / M)
    state = gaussian_wavepacket_ensemble(model, ntraj, seed, x0, k, sig, initial_state, options)
    integ = DiabaticIntegrator(model, options, dt)
    side = np.full(ntraj, -1)              # 0 = lower side (x < a), 1 = upper side (x > b)
    e_exit = np.zeros((ntraj, F))
    exit_time = np.full(ntraj, np.nan)
    active = np.arange(ntraj)

    def harvest(st: EnsembleState, act: np.ndarray) -> np.ndarray:
        x, p = st.R[:, 0], st.P[:, 0]
        low, up = (x < a) & (p < 0), (x > b) & (p > 0)
        done = low | up
        if done.any():
            j = act[done]
            side[j] = np.where(up[done], 1, 0)
            e_exit[j] = adiabatic_actions(model, st.R[done], st.x[done], st.p[done])
            exit_time[j] = st.time
        return done

    done = harvest(state, active)
    nsteps = 0
    while True:
        if done.any():
            keep = ~done
            active = active[keep]
            if active.size == 0:
                break
            state = EnsembleState(state.R[keep], state.P[keep], state.x[keep], state.p[keep],
                                  None if state.gamma_adjusted is None else state.gamma_adjusted[keep],
                                  state.time, active.copy())
        if state.time >= max_time:
            break
        for _ in range(check_every):
            integ.step(state)
        nsteps += check_every
        done = harvest(state, active)
    n_unfinished = int(np.sum(side < 0))
    if n_unfinished:
        warnings.warn(f"run_scattering: {n_unfinished} of {ntraj} trajectories were still inside the interaction "
                      f"region at max_time={max_time:.0f} a.u. and are left out", RuntimeWarning, stacklevel=2)
    fin = side >= 0
    trans_side = 1 if k > 0 else 0
    prob = np.zeros((2, F))
    err = np.zeros((2, F))
    n_unassigned = 0
    if options.method == "ehrenfest":
        w = e_exit[fin] / e_exit[fin].sum(axis=1, keepdims=True)
        n = max(int(fin.sum()), 1)
        for s in (0, 1):
            ws = np.where((side[fin] == s)[:, None], w, 0.0)
            prob[s] = ws.mean(axis=0) if fin.any() else np.nan
            err[s] = ws.std(axis=0, ddof=1) / math.sqrt(n) if n > 1 else np.nan
    else:
        win = window_assignment(e_exit[fin], options)
        s_fin = side[fin]
        nw = int(np.sum(win >= 0))
        n_unassigned = int(np.sum(win < 0))
        for s in (0, 1):
            for f in range(F):
                c = int(np.sum((s_fin == s) & (win == f)))
                prob[s, f] = c / nw if nw else np.nan
                err[s, f] = math.sqrt(prob[s, f] * (1 - prob[s, f]) / nw) if nw else np.nan
    details = {"interaction_region": (a, b), "dt": dt, "final_time": state.time, "nsteps": nsteps,
               "exit_time": exit_time, "exit_side": side, "exit_actions": e_exit, "options": options}
    return ScatteringResult(method=options.describe(), transmission=prob[trans_side], reflection=prob[1 - trans_side],
                            transmission_error=err[trans_side], reflection_error=err[1 - trans_side], ntraj=ntraj,
                            n_unassigned=n_unassigned, n_unfinished=n_unfinished, details=details)


def compare_scattering(model: DiabaticModel, momentum: float, position: float, position_width: float,
                       options: MethodOptions = MethodOptions(), ntraj: int = 2000, seed: int = 0,
                       initial_state: int = 0, interaction_region: tuple | None = None,
                       dt: float = 2.0) -> tuple[ScatteringResult, ScatteringResult]:
    """(mapping result, exact result) for the same packet and model; see :func:`run_scattering` and
    :func:`mapdyn.validation.exact.exact_scattering`."""
    from mapdyn.validation.exact import exact_scattering
    mapped = run_scattering(model, momentum, position, position_width, options, ntraj, seed, initial_state,
                            interaction_region, dt)
    exact = exact_scattering(model, momentum, position, position_width, initial_state=initial_state,
                             interaction_region=interaction_region)
    return mapped, exact
