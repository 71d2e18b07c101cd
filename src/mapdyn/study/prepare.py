"""``mapdyn prepare``: the initial conditions of a molecular study and what they show before any
trajectory runs — the nuclear-ensemble absorption spectrum and the chosen initial states.

Writes, in the study folder, ``initial_conditions.h5`` (the same file ``mapdyn run`` makes and then
reuses: ground-state optimisation, normal modes, Wigner rows, initial states, plus the excitation
energies and oscillator strengths of every row) and ``preparation/``:

* ``absorption_spectrum.png`` / ``absorption_spectrum.csv``: σ(E) in Å² (columns ``energy_ev``,
  ``cross_section_angstrom2``, one ``S<k>_angstrom2`` per excited state, ``fwhm_ev``), Gaussian
  lines of ``initial.spectrum_fwhm`` (:func:`mapdyn.initial.excitation.absorption_spectrum`);
* ``initial_states.csv``: ``trajectory``, ``state``, ``excitation_energy_ev``,
  ``oscillator_strength`` (and ``weight`` = Σ f in the window for ``excitation = "energy_range"``);
* ``summary.txt``: the lines printed by the command.
"""

from __future__ import annotations

import dataclasses
import os
import time
from typing import Callable

import numpy as np

from mapdyn.study.checkpoint import read_h5
from mapdyn.study.folder import Study, StudyError
from mapdyn.study.initial_conditions import prepare_initial_conditions, sampling_description
from mapdyn.units import HARTREE_IN_EV

__all__ = ["PREPARATION", "Preparation", "prepare_study"]

#: folder of the preparation outputs inside a study folder
PREPARATION = "preparation"


@dataclasses.dataclass
class Preparation:
    """What ``prepare`` found: the summary lines, the spectrum peak (eV, Å²; None without
    oscillator strengths), initial-state counts {state: trajectories}, written files, seconds."""

    lines: list
    peak_ev: float | None
    peak_cross_section_angstrom2: float | None
    state_counts: dict
    files: list
    seconds: float


def prepare_study(study: Study, log: Callable[[str], None] = lambda s: None) -> Preparation:
    """Initial conditions with excitations for every row, spectrum and initial-state files (molecules)."""
    from mapdyn.analysis.report import write_csv
    from mapdyn.initial.excitation import absorption_spectrum, plot_absorption_spectrum

    cfg = study.config
    if cfg.is_model:
        raise StudyError("prepare applies to molecular studies; a model study samples its initial conditions "
                         "inside each task (nothing to prepare): use 'mapdyn run'")
    t0 = time.perf_counter()
    path = prepare_initial_conditions(study, log=log, excitations=True)
    arrays, meta = read_h5(path)
    out = study.path(PREPARATION)
    os.makedirs(out, exist_ok=True)
    n = int(meta["trajectories"])
    states = np.asarray(arrays["initial_states"][:n], dtype=int)
    lines = [f"study {study.name}: {n} trajectories, dynamics {cfg.electronic.level_of_theory}",
             sampling_description(cfg, meta, arrays["frequencies_cm"])]
    files = [path]
    peak_ev = peak_sigma = None
    have_f = "oscillator_strengths" in arrays
    exc_ev = np.full(n, np.nan)
    f_chosen = np.full(n, np.nan)
    if have_f:
        exc = arrays["excitation_energies_hartree"][:n]
        f = arrays["oscillator_strengths"][:n]
        fwhm_ev = cfg.initial.spectrum_fwhm_hartree * HARTREE_IN_EV
        spec = absorption_spectrum(exc, f, fwhm_ev=fwhm_ev)
        k = int(np.argmax(spec.cross_section_angstrom2))
        peak_ev, peak_sigma = float(spec.energy_ev[k]), float(spec.cross_section_angstrom2[k])
        nexc = spec.per_state_cross_section_angstrom2.shape[0]
        cols = ["energy_ev", "cross_section_angstrom2"] + [f"S{j + 1}_angstrom2" for j in range(nexc)] + ["fwhm_ev"]
        files.append(write_csv(os.path.join(out, "absorption_spectrum.csv"), cols,
                               [spec.energy_ev, spec.cross_section_angstrom2, *spec.per_state_cross_section_angstrom2,
                                np.full(spec.energy_ev.size, fwhm_ev)]))
        files.append(plot_absorption_spectrum(
            spec, os.path.join(out, "absorption_spectrum.png"), sticks=(exc, f),
            title=f"{study.name}: {cfg.electronic.level_of_theory}, {n} Wigner geometries, Gaussian FWHM {fwhm_ev:g} eV"))
        excited = states >= 1
        rows = np.nonzero(excited)[0]
        exc_ev[rows] = exc[rows, states[rows] - 1] * HARTREE_IN_EV
        f_chosen[rows] = f[rows, states[rows] - 1]
        lo, hi = exc.min() * HARTREE_IN_EV, exc.max() * HARTREE_IN_EV
        lines.append(f"absorption spectrum: peak {peak_ev:.3f} eV, σ = {peak_sigma:.4g} Å² (Gaussian FWHM {fwhm_ev:g} eV); "
                     f"excitations {lo:.2f}–{hi:.2f} eV over the geometries")
    else:
        lines.append("absorption spectrum: not available (the backend gives no transition dipoles)")
    cols = ["trajectory", "state", "excitation_energy_ev", "oscillator_strength"]
    data = [np.arange(n), states, exc_ev, f_chosen]
    if "initial_weights" in arrays:
        cols.append("weight")
        data.append(arrays["initial_weights"][:n])
    files.append(write_csv(os.path.join(out, "initial_states.csv"), cols, data))
    counts = {int(s): int(c) for s, c in zip(*np.unique(states, return_counts=True))}
    init = cfg.initial
    rule = {"fixed": f"fixed state {init.state}", "brightest": "brightest state per geometry"}.get(init.excitation)
    if rule is None:
        lo_w, hi_w = (v * HARTREE_IN_EV for v in init.energy_range_hartree)
        w = arrays["initial_weights"][:n]
        rule = (f"drawn ∝ oscillator strength among the states in {lo_w:g}–{hi_w:g} eV "
                f"(geometry weights Σf from {w.min():.3g} to {w.max():.3g}; the analysis averages trajectories "
                "with equal weight)")
    lines.append("initial states (" + rule + "): " + ", ".join(f"S{s}: {c}" for s, c in counts.items()))
    seconds = time.perf_counter() - t0
    lines.append(f"prepared in {seconds:.1f} s; files in {out}; 'mapdyn run' on this folder reuses them")
    from mapdyn.files import atomic_write_text

    atomic_write_text(os.path.join(out, "summary.txt"), "\n".join(lines) + "\n")
    files.append(os.path.join(out, "summary.txt"))
    return Preparation(lines, peak_ev, peak_sigma, counts, files, seconds)
