"""Analysis of a study folder: load its trajectories, analyse, spectrum of its initial conditions."""

from __future__ import annotations

import os
from typing import Any, Callable, Sequence

import numpy as np

from mapdyn.analysis.results import AnalysisResults, analyze
from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.study.analysis_settings import settings_from_table
from mapdyn.study.backend_factory import make_model
from mapdyn.study.checkpoint import TrajectoryStore, read_h5
from mapdyn.study.diagnostics import study_warnings
from mapdyn.study.folder import INITIAL_CONDITIONS, REPORT, Study, StudyError
from mapdyn.units import AU_TIME_IN_FS, HARTREE_IN_EV


# ----------------------------------------------------------------------------------------------
# study folders
# ----------------------------------------------------------------------------------------------
def load_study_trajectories(folder: str) -> TrajectorySet:
    """Recorded results of a finished or partial study folder as a :class:`TrajectorySet`.

    Uses the folder reader of :mod:`mapdyn.study.folder` (status, failure reasons and
    frames all derived from the files); raises :class:`mapdyn.study.folder.StudyError` when nothing has
    been recorded yet.
    """
    from mapdyn.study.analyze import load_trajectory_set
    from mapdyn.study.folder import Study

    return load_trajectory_set(Study(folder))


def study_spectrum(folder: str, fwhm_ev: float = 0.15) -> Any:
    """Absorption spectrum of the sampled geometries (an
    :class:`mapdyn.initial.excitation.AbsorptionSpectrum`, Gaussian FWHM ``fwhm_ev`` eV) when the
    study's ``initial_conditions.h5`` holds excitation energies and oscillator strengths; else None."""
    import os

    from mapdyn.initial.excitation import absorption_spectrum
    from mapdyn.study.checkpoint import CheckpointError, read_h5

    path = os.path.join(folder, "initial_conditions.h5")
    if not os.path.exists(path):
        return None
    try:
        arrays, _ = read_h5(path, ["excitation_energies_hartree", "oscillator_strengths"])
    except CheckpointError:
        return None
    return absorption_spectrum(arrays["excitation_energies_hartree"], arrays["oscillator_strengths"], fwhm_ev=fwhm_ev)


def scattering_setup(cfg) -> tuple | None:
    """((a, b), transmitted side) for a 1D model study whose packet starts outside the model's
    interaction region (a scattering experiment); None otherwise."""
    from mapdyn.models.regions import default_interaction_region

    if not cfg.initial.position_bohr:  # a thermal bath, not a wavepacket
        return None
    model = make_model(cfg)
    if model.ndof != 1:
        return None
    try:
        a, b = default_interaction_region(model)
    except ValueError:
        return None
    x0, k0 = float(cfg.initial.position_bohr[0]), float(cfg.initial.momentum_au[0])
    if a < x0 < b or k0 == 0:
        return None
    return (a, b), (1 if k0 > 0 else 0)


def analyze_study(folder: Any, **overrides) -> AnalysisResults:
    """Load a study folder (or :class:`mapdyn.study.folder.Study`), read its ``[analysis]`` table, add the
    spectrum when present and run :func:`analyze`; ``overrides`` replace keyword arguments.

    The energy tolerance defaults to the study's ``dynamics.drift_threshold``.
    Fragment potentials with ``potential.scan`` are computed with a closed-shell ground-state
    PySCF backend (RHF, or RKS with the study's functional) in the study's basis on the isolated
    fragment, cached in ``<folder>/fragments/``.
    """
    from mapdyn.study.analyze import load_trajectory_set
    from mapdyn.study.folder import Study

    study = folder if isinstance(folder, Study) else Study(folder)
    tset = load_trajectory_set(study)
    cfg = study.config
    symbols = None if getattr(cfg, "molecule", None) is None else tuple(cfg.molecule.symbols)

    def fragment_backend(frag_symbols):
        from mapdyn.backends.pyscf.ground_state import PySCFGroundState

        e = cfg.electronic
        if not e.basis:
            raise ValueError("fragment potential scan: the study has no basis set (model or callback backend); "
                             "give potential.curve or potential.morse instead")
        xc = e.options.get("xc") if e.backend == "tddft" else None
        return PySCFGroundState(list(frag_symbols), e.basis, xc=xc)

    kw = settings_from_table(getattr(cfg, "analysis", None) or {}, folder=study.folder,
                             backend_factory=fragment_backend, symbols=symbols)
    fwhm = getattr(getattr(cfg, "initial", None), "spectrum_fwhm_hartree", None)
    spec = study_spectrum(study.folder) if fwhm is None else study_spectrum(study.folder, fwhm * HARTREE_IN_EV)
    if spec is not None:
        kw["spectrum"] = spec
    if cfg.is_model and "scattering" not in overrides:
        kw["scattering"] = scattering_setup(cfg)
    drift = getattr(getattr(cfg, "dynamics", None), "drift_threshold_hartree", None)
    if "energy_tolerance" not in kw and drift:
        kw["energy_tolerance"] = float(drift)      # the study's own drift threshold flags trajectories
    kw.update(overrides)
    return analyze(tset, **kw)


# ----------------------------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------------------------
def load_trajectory_set(study: Study, only: Sequence[int] | None = None):
    """All recorded results of a (finished or partial) study as a :class:`mapdyn.analysis.TrajectorySet`.

    Time grid: every ``record_every`` steps up to the study's end; trajectories without a frame
    at a time carry NaN there.  Pending trajectories with no frames are left out.  ``only``: study
    indices to read (default all).  Adiabatic state energies (Eh) come from the frames (on the fly)
    or from the model at the recorded coordinates (batched model studies); coupling norms
    (1/Bohr) from the frames when the backend gave coupling vectors.
    """
    from mapdyn.analysis import TrajectorySet

    cfg = study.config
    dt = cfg.dynamics.time_step_au
    rec = cfg.dynamics.record_every
    nsteps = study.nsteps
    grid_steps = np.arange(0, nsteps + 1, rec)
    times = grid_steps * dt
    T = grid_steps.size
    status_map = {e.index: e for e in study.status().entries}
    F = cfg.electronic.states
    meta = {"study": study.name, "method": cfg.options.describe(),
            "time step": f"{dt:.4g} au ({dt * AU_TIME_IN_FS:.4g} fs)",
            "seed": cfg.ensemble.seed, "backend": cfg.electronic.level_of_theory}
    if study.batched:
        # harmonic-bath models start in a diabatic state (donor/acceptor): their populations are diabatic
        basis = "diabatic" if cfg.initial.bath_center else "adiabatic"
        acts, ens, Rs, Ps, idx, stat = [], [], [], [], [], []
        for c, first, count in study.chunks():
            segs = study.checked_chunk_segments(c, full=True)[0]  # intact segments only
            if not segs:
                continue
            parts = [read_h5(p)[0] for p, _ in segs]
            a = np.concatenate([p[f"actions_{basis}"] for p in parts])  # (T', n, F)
            e = np.concatenate([p["energy"] for p in parts])
            R = np.concatenate([p["R"] for p in parts])
            P = np.concatenate([p["P"] for p in parts])
            pad = T - a.shape[0]
            if pad > 0:
                a = np.concatenate([a, np.full((pad,) + a.shape[1:], np.nan)])
                e = np.concatenate([e, np.full((pad,) + e.shape[1:], np.nan)])
                R = np.concatenate([R, np.full((pad,) + R.shape[1:], np.nan)])
                P = np.concatenate([P, np.full((pad,) + P.shape[1:], np.nan)])
            acts.append(np.transpose(a[:T], (1, 0, 2)))
            ens.append(e[:T].T)
            Rs.append(np.transpose(R[:T], (1, 0, 2)))
            Ps.append(np.transpose(P[:T], (1, 0, 2)))
            idx.extend(range(first, first + count))
            s = status_map[c].status
            stat.extend([s if s in ("finished", "failed") else "running"] * count)  # damaged: partial
        if not acts:
            raise StudyError(f"{study.folder}: no results yet")
        model = make_model(cfg)
        init_state = cfg.initial.state
        R_all = np.concatenate(Rs)
        rows = np.arange(len(idx)) if only is None else np.nonzero(np.isin(idx, list(only)))[0]
        if rows.size == 0:
            raise StudyError(f"{study.folder}: no recorded frames of trajectory {', '.join(map(str, only or []))}")
        tset = TrajectorySet(times=times, actions=np.concatenate(acts), options=cfg.options,
                             initial_states=np.full(len(idx), init_state), energies=np.concatenate(ens),
                             coordinates=R_all, coordinate_momenta=np.concatenate(Ps),
                             masses=np.asarray(model.masses), status=tuple(stat), indices=np.array(idx),
                             metadata={**meta, "initial_basis": cfg.initial.basis, "population_basis": basis},
                             warnings=study_warnings(study))
        tset = tset.select(rows) if only is not None else tset
        tset.state_energies = _model_state_energies(model, tset.coordinates)
        return tset
    rows_a, rows_e, rows_R, rows_P, idx, stat, reasons, init_states = [], [], [], [], [], [], [], []
    symbols = None
    masses = None
    initial_states = None
    if not cfg.is_model and os.path.exists(study.path(INITIAL_CONDITIONS)):
        from mapdyn.study.initial_conditions import sampling_description
        from mapdyn.study.objects import decode_object

        arrays, ic_meta = read_h5(study.path(INITIAL_CONDITIONS))
        initial_states = arrays["initial_states"]
        meta["initial conditions"] = sampling_description(cfg, ic_meta, arrays["frequencies_cm"])
        masses = np.asarray(decode_object(arrays, "modes").masses_me)
        symbols = cfg.molecule.symbols
    rows_V: list = []
    rows_C: list = []
    for i in range(study.ntraj) if only is None else sorted(int(k) for k in only if 0 <= int(k) < study.ntraj):
        store = TrajectoryStore(study.trajectory_folder(i))
        point = store.restart_point()
        if point.chunks == 0:
            continue
        fr = store.read_frames(point.chunks, point.meta)
        if not fr:
            continue
        pos = np.searchsorted(grid_steps, fr["step"])
        ok = (pos < T) & (grid_steps[np.minimum(pos, T - 1)] == fr["step"])
        a = np.full((T, F), np.nan)
        e = np.full(T, np.nan)
        nat = fr["positions_bohr"].shape[1]
        R = np.full((T, nat, 3), np.nan)
        P = np.full((T, nat, 3), np.nan)
        a[pos[ok]] = fr["actions"][ok]
        e[pos[ok]] = fr["total_energy_Eh"][ok]
        R[pos[ok]] = fr["positions_bohr"][ok]
        P[pos[ok]] = fr["momenta_au"][ok]
        rows_a.append(a)
        rows_e.append(e)
        rows_R.append(R)
        rows_P.append(P)
        V = np.full((T, F), np.nan)
        V[pos[ok]] = fr["energies_Eh"][ok]
        rows_V.append(V)
        C = np.full((T, F, F), np.nan)
        if "coupling_norms" in fr:
            C[pos[ok]] = fr["coupling_norms"][ok]
        rows_C.append(C)
        idx.append(i)
        entry = status_map[i]
        stat.append(entry.status if entry.status in ("finished", "failed") else "running")  # damaged: partial
        reasons.append(entry.reason)
        init_states.append(int(initial_states[i]) if initial_states is not None else int(cfg.initial.state))
    if not rows_a:
        raise StudyError(f"{study.folder}: no recorded frames yet" if only is None else
                         f"{study.folder}: no recorded frames of trajectory {', '.join(map(str, only))}")
    kw: dict = {}
    if cfg.is_model:
        model = make_model(cfg)
        D = model.ndof
        kw = dict(coordinates=np.array(rows_R).reshape(len(idx), T, -1)[:, :, :D],
                  coordinate_momenta=np.array(rows_P).reshape(len(idx), T, -1)[:, :, :D],
                  masses=np.asarray(model.masses))
    else:
        kw = dict(positions=np.array(rows_R), momenta=np.array(rows_P), symbols=symbols, masses=masses)
    return TrajectorySet(times=times, actions=np.array(rows_a), options=cfg.options,
                         initial_states=np.array(init_states), energies=np.array(rows_e), status=tuple(stat),
                         reasons=tuple(reasons), indices=np.array(idx), metadata=meta,
                         warnings=[w for w in study_warnings(study) if only is None or int(w.get("index", -1)) in idx],
                         state_energies=np.array(rows_V),
                         coupling_norms=np.array(rows_C) if np.isfinite(rows_C).any() else None, **kw)


def _model_state_energies(model: Any, coordinates: np.ndarray) -> np.ndarray:
    """Adiabatic energies (n, T, F) in Eh of a model at recorded coordinates (n, T, D) Bohr (NaN
    where a frame is missing)."""
    n, T, D = coordinates.shape
    flat = coordinates.reshape(n * T, D)
    ok = np.all(np.isfinite(flat), axis=1)
    out = np.full((n * T, model.nstates), np.nan)
    if ok.any():
        out[ok] = model.adiabatic(flat[ok])[0]
    return out.reshape(n, T, model.nstates)


def write_study_report(study: Study, log: Callable[[str], None] = lambda s: None) -> str | None:
    """Analyse the study and write ``report/``; returns the report folder."""
    import warnings

    from mapdyn.analysis import report

    with warnings.catch_warnings():
        # empty/NaN time slices (no trajectory in a window yet) give NaN entries, which the report shows
        warnings.filterwarnings("ignore", category=RuntimeWarning, message=".*(slice|Degrees of freedom|invalid value).*")
        results = analyze_study(study)
        out = report.write_report(results, study.path(REPORT), title=f"mapdyn study {study.name}")
    return out.folder
