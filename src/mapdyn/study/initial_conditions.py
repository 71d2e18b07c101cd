"""Initial conditions of molecular studies: ground state, normal modes, Wigner sampling and the
choice of initial electronic states, stored in ``initial_conditions.h5``."""

from __future__ import annotations

import json
import os
import time
from typing import Callable

import numpy as np

from mapdyn.study.backend_factory import _ground_state_backend, make_backend
from mapdyn.study.checkpoint import (
    CheckpointError,
    read_h5,
    write_h5,
)
from mapdyn.study.config import ConfigError, StudyConfig
from mapdyn.study.folder import INITIAL_CONDITIONS, Study, StudyError
from mapdyn.study.objects import decode_object, encode_object

#: oscillator strengths at or below this are dark for excitation = "energy_range" (numerical zeros
#: of symmetry-forbidden transitions come out around 1e-30; dimensionless)
DARK_OSCILLATOR_STRENGTH = 1e-8


# ----------------------------------------------------------------------------------------------
# initial conditions of molecular studies
# ----------------------------------------------------------------------------------------------
def _sample_rows(config: StudyConfig, modes, indices) -> dict:
    """Wigner rows for trajectory ``indices``: positions/momenta (a.u.) and the generator state
    after the nuclear draws (the driver draws the mapping variables from it)."""
    from mapdyn.core.sampling import trajectory_generator
    from mapdyn.initial.wigner import draw_wigner

    pos, mom, rng_states = [], [], []
    for i in indices:
        rng = trajectory_generator(config.ensemble.seed, int(i))
        s = draw_wigner(modes, rng, config.initial.temperature_kelvin)
        pos.append(s.positions_bohr)
        mom.append(s.momenta)
        rng_states.append(rng.bit_generator.state)
    return {"positions_bohr": np.array(pos), "momenta_au": np.array(mom), "rng_states": rng_states}


def _choose_states(config: StudyConfig, backend, positions, guess, *, first: int = 0,
                   excitations: bool = False) -> tuple[np.ndarray, dict]:
    """Initial states of rows ``first`` … ``first + n − 1``; with ``excitations`` (or a rule that needs
    them) also the excitation energies (Eh) and oscillator strengths of every row (the spectrum).

    "energy_range": row i draws state k among the states inside the window with probability
    f_ik / Σ f_ik (f ≤ :data:`DARK_OSCILLATOR_STRENGTH` counts as dark) from its own stream
    (:func:`mapdyn.initial.excitation.state_choice_rng` of trajectory i); ``initial_weights`` keeps
    Σ_{k in window} f_ik of each row (the geometry weight of the f-weighted ensemble,
    docs/theory.md#excitation-and-absorption-spectrum).  A row with no bright state in the window is refused."""
    init = config.initial
    n = positions.shape[0]
    if init.excitation == "fixed" and not excitations:
        return np.full(n, int(init.state)), {}
    from mapdyn.initial.excitation import choose_initial_states, excitation_properties

    try:
        props = excitation_properties(backend, positions, guess=guess, progress=True)
    except ValueError as err:
        if init.excitation != "fixed":
            raise StudyError(f"initial.excitation = \"{init.excitation}\" needs oscillator strengths: {err}") from None
        return np.full(n, int(init.state)), {}  # e.g. a callback without transition dipoles: no spectrum
    exc, f = props.excitation_energies_hartree, props.oscillator_strengths
    extra = {"excitation_energies_hartree": exc, "oscillator_strengths": f}
    if init.excitation == "fixed":
        return np.full(n, int(init.state)), extra
    if init.excitation == "brightest":
        choice = choose_initial_states(exc, f, "brightest")
        states = np.zeros(n, dtype=int)
        states[choice.sample_index] = choice.state
        return states, extra
    from mapdyn.initial.excitation import state_choice_rng
    from mapdyn.units import HARTREE_IN_EV

    lo, hi = init.energy_range_hartree
    fw = np.where((exc >= lo) & (exc <= hi) & (f > DARK_OSCILLATOR_STRENGTH), f, 0.0)
    per_row = fw.sum(axis=1)
    empty = np.nonzero(per_row <= 0)[0]
    if empty.size:
        raise ConfigError("initial.energy_range", f"= [{lo * HARTREE_IN_EV:.4g}, {hi * HARTREE_IN_EV:.4g}] eV holds no "
                          f"bright excitation at {empty.size} of {n} sampled geometries (e.g. trajectory {first + empty[0]}; "
                          f"excitations span {exc.min() * HARTREE_IN_EV:.3f}..{exc.max() * HARTREE_IN_EV:.3f} eV); "
                          "widen the window")
    states = np.empty(n, dtype=int)
    for j in range(n):
        u = state_choice_rng(config.ensemble.seed, first + j + 1, first + j).random()
        cdf = np.cumsum(fw[j]) / per_row[j]
        states[j] = int(min(np.searchsorted(cdf, u, side="right"), fw.shape[1] - 1)) + 1
    extra["initial_weights"] = per_row
    return states, extra


def prepare_initial_conditions(study: Study, log: Callable[[str], None] = lambda s: None, *,
                               excitations: bool = False) -> str:
    """Optimise, compute the Hessian and normal modes, Wigner-sample every trajectory (molecules).

    Idempotent: existing rows are kept; rows for trajectories added by ``extend`` are appended.
    ``excitations``: also compute the excitation energies and oscillator strengths of every row
    (``mapdyn prepare``: the absorption spectrum); a file holding them keeps them for appended rows.
    Writes ``initial_conditions.h5`` atomically and returns its path.
    """
    import warnings

    config = study.config
    path = study.path(INITIAL_CONDITIONS)
    n = study.ntraj
    if os.path.exists(path):
        try:
            read_h5(path)
        except CheckpointError as err:  # recomputed from the same seeds: the same rows come back
            log(f"{err}; recomputing the initial conditions")
            os.unlink(path)
    if os.path.exists(path):
        arrays, meta = read_h5(path)
        have = int(meta["trajectories"])
        if excitations and "oscillator_strengths" not in arrays:
            # prepared by a run before: the spectrum is added, every row and its state stay as they are
            backend = make_backend(config)
            guess = decode_object(arrays, "reference_guess") if "reference_guess.tree" in arrays else None
            log(f"excitation energies of the {have} sampled geometries")
            _, extra = _choose_states(config, backend, arrays["positions_bohr"], guess, excitations=True)
            extra.pop("initial_weights", None)
            arrays.update(extra)
            write_h5(path, arrays, meta)
        if have >= n:
            return path
        modes = decode_object(arrays, "modes")
        backend = make_backend(config)
        log(f"sampling initial conditions for trajectories {have}..{n - 1}")
        rows = _sample_rows(config, modes, range(have, n))
        guess = decode_object(arrays, "reference_guess") if "reference_guess.tree" in arrays else None
        states, extra = _choose_states(config, backend, rows["positions_bohr"], guess, first=have,
                                       excitations="oscillator_strengths" in arrays)
        arrays["positions_bohr"] = np.concatenate([arrays["positions_bohr"], rows["positions_bohr"]])
        arrays["momenta_au"] = np.concatenate([arrays["momenta_au"], rows["momenta_au"]])
        arrays["initial_states"] = np.concatenate([arrays["initial_states"], states])
        old_rng = json.loads(arrays["rng_states_json"].decode())
        arrays["rng_states_json"] = json.dumps(old_rng + rows["rng_states"]).encode()
        for k, v in extra.items():
            if k in arrays:
                arrays[k] = np.concatenate([arrays[k], v])
        meta["trajectories"] = n
        write_h5(path, arrays, meta)
        return path
    from mapdyn.initial.geometry import optimize_ground_state
    from mapdyn.initial.normal_modes import compute_hessian, normal_modes

    mol = config.molecule
    backend = make_backend(config)
    gs, level = _ground_state_backend(config, backend)
    x = mol.positions_bohr.copy()
    t0 = time.perf_counter()
    opt_info: dict = {"optimized": False}
    guess = None
    if config.initial.optimize:
        log(f"optimising the ground state ({level})")
        opt = optimize_ground_state(gs, list(mol.symbols), x, level_of_theory=level)
        x = opt.positions_bohr
        guess = opt.guess
        opt_info = {"optimized": True, "energy_hartree": opt.energy_hartree, "steps": opt.n_steps,
                    "max_gradient_hartree_per_bohr": opt.max_gradient_hartree_per_bohr}
    log(f"Hessian and normal modes ({level})")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        hess = compute_hessian(gs, x, level, guess=guess) if config.initial.normal_modes_from == "dynamics" \
            else compute_hessian(gs, x, level)
        modes = normal_modes(hess.hessian, list(mol.symbols), x, level_of_theory=level)
    log(f"{modes.nvib} modes, {modes.frequencies_cm.min():.0f}–{modes.frequencies_cm.max():.0f} cm^-1; "
        f"sampling {n} Wigner geometries at {config.initial.temperature_kelvin:g} K")
    rows = _sample_rows(config, modes, range(n))
    ref = backend.compute(x, guess=None, need_gradients=False)
    states, extra = _choose_states(config, backend, rows["positions_bohr"], ref.guess, excitations=excitations)
    arrays = {"reference_positions_bohr": x, "hessian": hess.hessian, "frequencies_cm": modes.frequencies_cm,
              "positions_bohr": rows["positions_bohr"],
              "momenta_au": rows["momenta_au"], "initial_states": states,
              "reference_energies_hartree": np.asarray(ref.energies, dtype=float),
              "rng_states_json": json.dumps(rows["rng_states"]).encode()}
    arrays.update(encode_object(modes, "modes"))
    try:
        arrays.update(encode_object(ref.guess, "reference_guess"))
    except TypeError:  # a guess that cannot be stored only costs the warm start of later excitation choices
        pass
    arrays.update(extra)
    meta = {"trajectories": n, "level_of_theory": level, "hessian_method": hess.method, **opt_info,
            "seconds": time.perf_counter() - t0, "temperature_kelvin": config.initial.temperature_kelvin,
            "seed": config.ensemble.seed, "symbols": list(mol.symbols)}
    write_h5(path, arrays, meta)
    log(f"initial conditions ready ({time.perf_counter() - t0:.1f} s)")
    return path


def initial_row(study: Study, index: int) -> tuple[np.ndarray, np.ndarray, int, dict, np.ndarray]:
    """(positions Bohr, momenta a.u., initial state, generator state, masses in electron masses) of one trajectory."""
    arrays, meta = read_h5(study.path(INITIAL_CONDITIONS))
    if index >= int(meta["trajectories"]):
        raise StudyError(f"initial conditions hold {meta['trajectories']} rows, trajectory {index} asked")
    if "modes_pickle" in arrays:
        raise StudyError(f"{study.path(INITIAL_CONDITIONS)} holds pickled data written by an older mapdyn; re-run "
                         f"the study with the version that made it")
    modes = decode_object(arrays, "modes")
    rng_state = json.loads(arrays["rng_states_json"].decode())[index]
    return (arrays["positions_bohr"][index], arrays["momenta_au"][index], int(arrays["initial_states"][index]),
            rng_state, np.asarray(modes.masses_me))


def sampling_description(config: StudyConfig, meta: dict, frequencies_cm: np.ndarray) -> str:
    """One sentence: where the normal modes of the Wigner sampling come from and their frequency range
    (cm⁻¹), e.g. for an SA-CASSCF study the RHF closed-shell ground state, not the dynamics' method."""
    level = str(meta.get("level_of_theory", "?"))
    how = {"analytic": "analytic Hessian", "finite_difference": "finite-difference Hessian"}.get(
        str(meta.get("hessian_method")), f"{meta.get('hessian_method')} Hessian")
    w = np.asarray(frequencies_cm, dtype=float)
    dyn = config.electronic.level_of_theory
    if config.initial.normal_modes_from == "scf":
        source = f"the closed-shell singlet ground state at {level}"
        if level != dyn:
            source += f" (not the dynamics' {dyn})"
    else:
        source = f"the ground state of the dynamics' method, {level}"
    opt = "optimised geometry" if meta.get("optimized") else "input geometry (not optimised)"
    return (f"Wigner sampling at {float(meta.get('temperature_kelvin', 0.0)):g} K from {w.size} normal mode{'s' if w.size != 1 else ''} of "
            f"{source}, {how} at the {opt}; frequencies {w.min():.0f}–{w.max():.0f} cm⁻¹")
