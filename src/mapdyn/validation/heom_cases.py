"""Mapping-trajectory runs on the stored HEOM validation cases (shared by `mapdyn validate`, the tests and
the figure script).

The models are built from the parameters stored in ``src/mapdyn/data/heom_<case>.npz`` (written by
``make_heom_reference.py``; same Hamiltonian and J(ω) conventions, docs/theory.md#spin-boson-model), the bath is
discretised with :func:`mapdyn.models.spin_boson.debye_modes` (midpoint tangent rule), sampled from
the thermal Wigner function around Q⁰ = 0 (factorised initial state, as in the HEOM run) and
propagated with :class:`mapdyn.core.harmonic_bath.HarmonicBathIntegrator`.
"""
from __future__ import annotations

import numpy as np

from mapdyn.core.harmonic_bath import HarmonicBathIntegrator
from mapdyn.core.options import HOPPING_METHODS, MethodOptions
from mapdyn.core.populations import population_weights
from mapdyn.core.propagators import run_diabatic
from mapdyn.models.spin_boson import (
    ExcitonTransferModel,
    SpinBoson,
    thermal_bath_ensemble,
)
from mapdyn.validation.heom_reference import MappingResult, load_reference


def _run(model, data: dict, options: MethodOptions, ntraj: int, dt: float, seed: int) -> MappingResult:
    t_ref = data["times"]
    record_every = int(round((t_ref[1] - t_ref[0]) / dt))
    if abs(record_every * dt - (t_ref[1] - t_ref[0])) > 1e-9 * t_ref[-1]:
        raise ValueError(f"dt={dt!r} must divide the reference spacing {t_ref[1] - t_ref[0]!r}")
    state = thermal_bath_ensemble(model, ntraj, seed, float(data["beta"]), 0, options, bath_center="zero")
    integrator = HarmonicBathIntegrator(model, options, dt)
    run = run_diabatic(model, state, options, dt, record_every * (t_ref.size - 1), record_every=record_every,
                       integrator=integrator)
    pops, missing = run.populations("diabatic")
    e = run.actions_diabatic
    if options.method in ("ehrenfest", "spin"):
        accepted = np.full(t_ref.size, ntraj)
        w = population_weights(e, options)
        w = w / w.sum(axis=2, keepdims=True)
        se = w.std(axis=1, ddof=1) / np.sqrt(ntraj)
        sz_err = (w[:, :, 0] - w[:, :, 1]).std(axis=1, ddof=1) / np.sqrt(ntraj) if e.shape[2] == 2 else None
    else:
        accepted = ntraj - missing
        se = np.sqrt(pops * (1 - pops) / accepted[:, None])
        sz_err = np.sqrt((1 - (pops[:, 0] - pops[:, 1]) ** 2) / accepted) if e.shape[2] == 2 else None
    return MappingResult(run.times, pops, se, accepted, sz_err)


def spin_boson_mapping(name: str, options: MethodOptions, ntraj: int, nmodes: int = 60, dt: float = 0.05,
                       seed: int = 2024) -> MappingResult:
    """Mapping ⟨σz⟩(t) for spin-boson case ``name`` (units of Δ, read as Hartree atomic units with
    Δ = 1 Eh); ``nmodes`` Debye modes, time step ``dt`` (1/Δ; MASH/FSSH use dt/10)."""
    if options.method in HOPPING_METHODS:
        if options.method == "mash":
            raise NotImplementedError("MASH diabatic populations need its coherence estimators, not implemented")
        from mapdyn.validation.hopping_runs import spin_boson_hopping
        # the active-adiabat force follows the fast bath modes (ω_max ≈ 76 Δ): a tenth of the step keeps
        # ω_max·dt ≈ 0.4 (docs/theory.md#surface-hopping)
        return spin_boson_hopping(name, options, ntraj, nmodes, dt / 10, seed)
    d = load_reference(name)
    model = SpinBoson.debye(float(d["epsilon"]), float(d["delta"]), float(d["lam"]), float(d["omega_c"]), nmodes)
    return _run(model, d, options, ntraj, dt, seed)


def sites_mapping(name: str, options: MethodOptions, ntraj: int, nmodes: int = 40, dt: float | None = None,
                  seed: int = 2024) -> MappingResult:
    """Mapping site populations for site case ``name`` ("sites7", "sites3"; Hartree atomic units);
    ``nmodes`` Debye modes per site; ``dt`` (a.u.) defaults to half the HEOM output spacing (the
    oscillators see exp(−iH_sys dt) exactly and the bath flow is exact, so the step only limits the
    system–bath splitting)."""
    d = load_reference(name)
    model = ExcitonTransferModel.debye(d["h_sys"], float(d["lam"]), float(d["omega_c"]), nmodes)
    if dt is None:
        dt = (d["times"][1] - d["times"][0]) / 2
    return _run(model, d, options, ntraj, dt, seed)


def sites7_mapping(options: MethodOptions, ntraj: int, nmodes: int = 40, dt: float | None = None,
                   seed: int = 2024) -> MappingResult:
    """Mapping site populations for the 7-site case (Hartree atomic units); ``nmodes`` Debye modes
    per site; ``dt`` (a.u.) defaults to half the HEOM output spacing (2.5 fs; ω_c·dt = 0.05,
    |H_sys|·dt ≲ 0.2)."""
    return sites_mapping("sites7", options, ntraj, nmodes, dt, seed)
