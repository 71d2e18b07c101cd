"""One-dimensional scattering with the batched mapping engine, channel- and state-resolved.

:func:`run_scattering` samples the Wigner function of the Gaussian packet
ψ ∝ exp[−(x−x0)²/(4σ²) + ik(x−x0)] on one adiabatic state (σ_P = 1/(2σ); common practice), runs the
batched MMST integrator (:class:`mapdyn.core.propagators.DiabaticIntegrator`) and stops each trajectory
when it has left the interaction region [a, b] moving outwards (x < a with p < 0, or x > b with
p > 0).  Its adiabatic actions at that moment are read with the SQC windows (or, for Ehrenfest, as
the mean-field weights e_f/Σe; for spin mapping as ρ_ff) and binned by side (MASH and FSSH: the
active state, :mod:`mapdyn.validation.hopping_runs`): "transmitted" is the side the packet moves
towards (k > 0: x > b), "reflected" the other.  The run ends when all trajectories have left.

Probabilities (SQC): P_{c,f} = N_{c,f}/N_w, N_w the trajectories that ended inside some window, with
the multinomial standard error √(P(1−P)/N_w).  Ehrenfest: P_{c,f} = mean of the per-trajectory
weight; standard error = sample standard deviation/√N.  :func:`mapdyn.validation.exact.exact_scattering` takes
the same arguments and gives the exact quantum answer for the same packet.
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from mapdyn.core.model import DiabaticModel
from mapdyn.core.options import HOPPING_METHODS, MethodOptions
from mapdyn.core.populations import population_weights
from mapdyn.core.propagators import DiabaticIntegrator, adiabatic_actions
from mapdyn.core.sampling import EnsembleState, gaussian_wavepacket_ensemble
from mapdyn.core.windows import window_assignment
from mapdyn.validation.channels import (
    ScatteringResult,
    _check_scattering_args,
    _positive_int,
    default_interaction_region,
)

__all__ = ["ScatteringResult", "default_interaction_region", "run_scattering", "compare_scattering"]


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
    if options.method in HOPPING_METHODS:
        from mapdyn.validation.hopping_runs import run_hopping_scattering
        return run_hopping_scattering(model, k, x0, sig, options, ntraj, seed, initial_state, (a, b), dt,
                                      max_time, check_every)
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
    if options.method in ("ehrenfest", "spin"):
        w = population_weights(e_exit[fin], options)
        w = w / w.sum(axis=1, keepdims=True)
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
