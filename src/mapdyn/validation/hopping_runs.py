"""The validation runs (1D scattering, spin-boson) for the surface-hopping methods MASH and FSSH.

Same packets, baths, seeds and streams as :func:`mapdyn.validation.scattering.run_scattering` and
:mod:`mapdyn.validation.heom_cases`; the engine is :class:`mapdyn.core.hopping.HoppingIntegrator`.
Probabilities are ratio estimators Σ_j W_j h_j/Σ_j W_j (W = 1 for FSSH, 2|S_z(0)| for MASH) with the
delta-method standard error (docs/theory.md#surface-hopping).
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from mapdyn.core.hopping import HoppingIntegrator, hopping_state, run_hopping
from mapdyn.core.model import DiabaticModel
from mapdyn.core.options import MethodOptions
from mapdyn.core.sampling import gaussian_wavepacket_ensemble
from mapdyn.validation.channels import ScatteringResult

__all__ = ["run_hopping_scattering", "spin_boson_hopping"]


def run_hopping_scattering(model: DiabaticModel, k: float, x0: float, sig: float, options: MethodOptions,
                           ntraj: int, seed: int, initial_state: int, region: tuple[float, float], dt: float,
                           max_time: float, check_every: int) -> ScatteringResult:
    """Channel- and state-resolved scattering of a hopping ensemble (arguments checked by
    :func:`mapdyn.validation.scattering.run_scattering`, which calls this for MASH and FSSH)."""
    a, b = region
    F = model.nstates
    ens = gaussian_wavepacket_ensemble(model, ntraj, seed, x0, k, sig, initial_state, options)
    state = hopping_state(model, ens, options, seed)
    weight = state.weight.copy()
    integ = HoppingIntegrator(model, options, dt)
    side = np.full(ntraj, -1)
    final_state = np.full(ntraj, -1)
    active = np.arange(ntraj)
    e0 = integ.energy(state)
    drift = np.zeros(ntraj)

    def harvest(st, act):
        x, p = st.R[:, 0], st.P[:, 0]
        low, up = (x < a) & (p < 0), (x > b) & (p > 0)
        done = low | up
        j = act[done]
        side[j] = np.where(up[done], 1, 0)
        final_state[j] = st.active[done]
        drift[j] = integ.energy(st)[done] - e0[done]
        return done

    done = harvest(state, active)
    while True:
        if done.any():
            keep = ~done
            active, e0 = active[keep], e0[keep]
            if active.size == 0:
                break
            state = state.take(keep)
        if state.time >= max_time:
            break
        for _ in range(check_every):
            integ.step(state)
        done = harvest(state, active)
    n_unfinished = int(np.sum(side < 0))
    if n_unfinished:
        warnings.warn(f"run_scattering: {n_unfinished} of {ntraj} trajectories were still inside the interaction "
                      f"region at max_time={max_time:.0f} a.u. and are left out", RuntimeWarning, stacklevel=3)
    fin = side >= 0
    W = weight[fin]
    n = max(int(fin.sum()), 1)
    prob = np.zeros((2, F))
    err = np.zeros((2, F))
    for s in (0, 1):
        for f in range(F):
            h = W * ((side[fin] == s) & (final_state[fin] == f))
            pv = h.sum() / W.sum()
            prob[s, f] = pv
            err[s, f] = math.sqrt(np.sum((h - pv * W) ** 2) / max(n - 1, 1) / n) / (W.sum() / n)
    trans_side = 1 if k > 0 else 0
    details = {"interaction_region": (a, b), "dt": dt, "final_time": state.time, "exit_side": side,
               "exit_state": final_state, "weight": weight, "max_energy_drift": float(np.max(np.abs(drift))),
               "n_hops": integ.n_hops, "n_frustrated": integ.n_frustrated, "options": options}
    return ScatteringResult(method=options.describe(), transmission=prob[trans_side], reflection=prob[1 - trans_side],
                            transmission_error=err[trans_side], reflection_error=err[1 - trans_side], ntraj=ntraj,
                            n_unassigned=0, n_unfinished=n_unfinished, details=details)


def spin_boson_hopping(name: str, options: MethodOptions, ntraj: int, nmodes: int = 60, dt: float = 0.005,
                       seed: int = 2024):
    """FSSH ⟨σz⟩(t) (diabatic, mixed estimator) on the stored spin-boson case ``name``, same bath
    discretisation and thermal sampling as the mapping run (units of Δ read as a.u.); returns a
    :class:`mapdyn.validation.heom_cases.MappingResult`."""
    from mapdyn.models.spin_boson import SpinBoson, thermal_bath_ensemble
    from mapdyn.validation.heom_reference import MappingResult, load_reference
    d = load_reference(name)
    model = SpinBoson.debye(float(d["epsilon"]), float(d["delta"]), float(d["lam"]), float(d["omega_c"]), nmodes)
    t_ref = d["times"]
    every = int(round((t_ref[1] - t_ref[0]) / dt))
    ens = thermal_bath_ensemble(model, ntraj, seed, float(d["beta"]), 0, options, bath_center="zero")
    state = hopping_state(model, ens, options, seed)
    run = run_hopping(model, state, options, dt, every * (t_ref.size - 1), record_every=every)
    pops, se = run.populations("diabatic")
    w = run.diabatic_weights
    sz = w[:, :, 0] - w[:, :, 1]
    sz_err = sz.std(axis=1, ddof=1) / np.sqrt(ntraj)
    return MappingResult(run.times, pops, se, np.full(t_ref.size, ntraj), sz_err)
