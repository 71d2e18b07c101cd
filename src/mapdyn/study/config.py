"""Study input: one TOML file → validated, frozen dataclasses (:class:`StudyConfig`).

Everything is checked before any computation or file is written.  Bad input raises
:class:`ConfigError` (a ``ValueError``) whose message is one line naming the offending key and
what is allowed, e.g.::

    dynamics.time_step = "-0.5 fs": must be a positive duration, e.g. "0.5 fs"
    ensemble.trajectorys is not a known key (did you mean 'trajectories'?); allowed: ...

The command line turns it into exit code 2.

Units.  Durations are strings with a unit: ``"0.5 fs"``, ``"500 as"``, ``"0.1 ps"``, ``"20 au"``
(atomic units of time, ħ/Eh ≈ 0.02419 fs); energies likewise ``"1e-3 Eh"``, ``"0.03 eV"``,
``"3 meV"``, ``"0.5 kcal/mol"``, ``"2 kJ/mol"``, ``"20 cm-1"``.
Inline atom positions are in Å (``molecule.units = "bohr"`` switches to Bohr).  Model initial
conditions are strings with units too (``position = "-8 bohr"``, ``momentum = "15 au"``,
``width = "1 bohr"``, ``temperature = "300 K"``); the older unit-in-name keys (``position_bohr``,
``momentum_au``, ``width_bohr``, ``temperature_kelvin``) are still read, with a FutureWarning.
Internally (the dataclass fields) everything is Hartree atomic units; conversions use
:mod:`ase.units`.

Sections and keys (names are our own; see ``mapdyn run --help`` and the files in ``inputs/``)::

    [study]      name, description, folder
    [molecule]   geometry | atoms, units, charge, spin            (not for backend = "model")
    [electronic] backend = "casscf" | "tddft" | "model" | "callback", states, and per backend:
                 casscf:   basis, active_orbitals, active_electrons, cas_orbitals (0-based
                           RHF orbital indices, 0 = lowest), density_fitting, coupling_form,
                           spin_purity
                 tddft:    basis, functional, response, grid_level, gradient_residual_limit,
                           seam_gap ("0.1 eV" default, "off"), root_buffer (2)
                 model:    model, parameters, engine (vibronic / spin_boson parameters:
                           see mapdyn.study.model_input)
                 callback: function
    [initial]    molecules: optimize, normal_modes_from, temperature, excitation, state,
                            energy_range, spectrum_fwhm
                 models:    position, momentum, width, state, basis (Tully models);
                            temperature, bath_center, state (vibronic, spin_boson)
    [method]     method, window, zero_point, gamma                 (:class:`MethodOptions`)
    [dynamics]   time_step, duration, checkpoint_every, record_every, drift_threshold,
                 stop_on_drift, substeps, propagation
    [ensemble]   trajectories, seed, workers, batch
    [analysis]   passed to :func:`mapdyn.analysis.settings_from_table` (keys checked here)
    [cluster]    passed to :func:`mapdyn.study.cluster.cluster_settings`
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import math
import os
import re
import tomllib
import warnings
from typing import Any, Mapping

import numpy as np

from mapdyn.core.options import DEFAULT_WINDOW, WINDOWS, ZERO_POINTS, MethodOptions
from mapdyn.study.input_values import (
    ConfigError,
    Section,
    did_you_mean,
    parse_duration,
    parse_energy,
    parse_quantity,
    show_value,
)
from mapdyn.study.schema import DynamicsConfig, ElectronicConfig, EnsembleConfig, InitialConfig, MoleculeConfig, StudyConfig
from mapdyn.units import BOHR_IN_ANGSTROM

__all__ = ["ConfigError", "StudyConfig", "MoleculeConfig", "ElectronicConfig", "InitialConfig",
           "DynamicsConfig", "EnsembleConfig", "load_study_config", "parse_study", "parse_duration",
           "parse_energy", "BACKENDS", "SECTIONS", "MODEL_NAMES", "MIN_ATOM_DISTANCE_ANGSTROM"]

#: Backends a study can name.
BACKENDS = ("casscf", "tddft", "model", "callback")
#: Model names for backend = "model" (mapdyn.models.tully; harmonic-bath models: study/model_input).
MODEL_NAMES = ("tully1", "tully2", "tully3", "wide_crossing", "vibronic", "spin_boson")
#: Two atoms closer than this (Å) are refused as overlapping (no bond is shorter than ~0.5 Å;
#: H2 is 0.74 Å — common knowledge).
MIN_ATOM_DISTANCE_ANGSTROM = 0.3


# ----------------------------------------------------------------------------------------------
# sections
# ----------------------------------------------------------------------------------------------
SECTIONS = ("study", "molecule", "electronic", "initial", "method", "dynamics", "ensemble", "analysis", "cluster")

_STUDY_KEYS = ("name", "description", "folder")
_MOLECULE_KEYS = ("geometry", "atoms", "units", "charge", "spin")
_ELEC_COMMON = ("backend", "states")
_ELEC_BY_BACKEND = {
    "casscf": ("basis", "active_orbitals", "active_electrons", "cas_orbitals", "density_fitting", "coupling_form",
               "spin_purity"),
    "tddft": ("basis", "functional", "response", "grid_level", "gradient_residual_limit", "seam_gap", "root_buffer"),
    "model": ("model", "parameters", "engine"),
    "callback": ("function",),
}
_INITIAL_MOLECULE = ("optimize", "normal_modes_from", "temperature", "temperature_kelvin", "excitation", "state",
                     "energy_range", "spectrum_fwhm")
_INITIAL_MODEL = ("position", "momentum", "width", "position_bohr", "momentum_au", "width_bohr", "state", "basis",
                  "temperature", "bath_center")
#: Old keys with the unit in the name → (new key, unit to write): still read, with a FutureWarning.
DEPRECATED_KEYS = {"initial.temperature_kelvin": ("initial.temperature", "K"),
                   "initial.position_bohr": ("initial.position", "bohr"),
                   "initial.momentum_au": ("initial.momentum", "au"),
                   "initial.width_bohr": ("initial.width", "bohr")}
_METHOD_KEYS = ("method", "window", "zero_point", "gamma")
_DYNAMICS_KEYS = ("time_step", "duration", "checkpoint_every", "record_every", "drift_threshold",
                  "stop_on_drift", "substeps", "propagation")
_ENSEMBLE_KEYS = ("trajectories", "seed", "workers", "batch")


def _parse_molecule(sec: Section, base_dir: str) -> MoleculeConfig:
    from ase.data import atomic_numbers

    has_file, has_inline = sec.has("geometry"), sec.has("atoms")
    if has_file == has_inline:
        raise ConfigError("molecule", "give exactly one of 'geometry' (a file ase.io reads) or 'atoms' (inline list)")
    length = sec.choice("units", ("angstrom", "bohr"), "angstrom")
    if has_file:
        if sec.has("units"):
            raise ConfigError("molecule.units", "applies to inline 'atoms' only (geometry files carry their own units)")
        name = sec.string("geometry", what="a file name (any format ase.io reads, e.g. .xyz)")
        path = name if os.path.isabs(name) else os.path.join(base_dir, name)
        if not os.path.isfile(path):
            raise ConfigError("molecule.geometry", f"= {show_value(name)}: file not found (looked for {path})")
        try:
            import ase.io

            atoms = ase.io.read(path)
        except Exception as err:  # ase raises many types for unreadable files
            first = str(err).splitlines()[0] if str(err) else type(err).__name__
            raise ConfigError("molecule.geometry", f"= {show_value(name)}: ase.io cannot read it ({first})") from None
        if len(atoms) == 0:
            raise ConfigError("molecule.geometry", f"= {show_value(name)}: the file holds no atoms")
        symbols = tuple(atoms.get_chemical_symbols())
        pos_ang = atoms.get_positions()
        source = os.path.abspath(path)
    else:
        rows = sec.raw("atoms")
        what = 'a list of [symbol, x, y, z] rows, e.g. [["H", 0.0, 0.0, 0.0], ["H", 0.0, 0.0, 0.74]]'
        if not isinstance(rows, list) or not rows:
            raise ConfigError("molecule.atoms", f"must be {what}")
        symbols_l, pos_l = [], []
        for j, row in enumerate(rows):
            if (not isinstance(row, list) or len(row) != 4 or not isinstance(row[0], str)
                    or not all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in row[1:])):
                raise ConfigError("molecule.atoms", f"row {j} = {show_value(row)}: must be [symbol, x, y, z] with numbers")
            if row[0] not in atomic_numbers or row[0] == "X":
                elements = [s for s in atomic_numbers if s != 'X']
                raise ConfigError("molecule.atoms", f"row {j}: unknown element {row[0]!r}{did_you_mean(row[0], elements)}")
            symbols_l.append(row[0])
            pos_l.append([float(v) for v in row[1:]])
        symbols = tuple(symbols_l)
        pos_ang = np.array(pos_l) * (BOHR_IN_ANGSTROM if length == "bohr" else 1.0)
        source = "inline"
    key = "molecule.geometry" if has_file else "molecule.atoms"
    if len(symbols) > 1:
        d = np.linalg.norm(pos_ang[:, None, :] - pos_ang[None, :, :], axis=2)
        d[np.diag_indices(len(symbols))] = np.inf
        i, j = np.unravel_index(np.argmin(d), d.shape)
        if d[i, j] < MIN_ATOM_DISTANCE_ANGSTROM:
            raise ConfigError(key, f"atoms {min(i, j)} and {max(i, j)} are {d[i, j]:.3f} Å apart (overlapping; "
                              f"the minimum allowed is {MIN_ATOM_DISTANCE_ANGSTROM} Å)")
    charge = sec.integer("charge", 0, what="an integer total charge")
    spin = sec.integer("spin", 0, minimum=0, what="a non-negative integer 2S (0 singlet, 1 doublet, ...)")
    nelec = sum(atomic_numbers[s] for s in symbols) - charge
    if nelec <= 0:
        raise ConfigError("molecule.charge", f"= {charge}: leaves {nelec} electrons")
    if (nelec - spin) % 2:
        raise ConfigError("molecule.spin", f"= {spin}: {nelec} electrons cannot have 2S = {spin} (parity)")
    return MoleculeConfig(symbols, np.asarray(pos_ang, dtype=float) / BOHR_IN_ANGSTROM, charge, spin, source)


def _cas_orbitals(sec: Section, ncas: int, basis: str, molecule: "MoleculeConfig") -> list[int] | None:
    """``electronic.cas_orbitals``: ``ncas`` distinct 0-based RHF orbital indices (0 = lowest in energy)
    that form the active space of every cold start, or None (the orbitals around the HOMO/LUMO)."""
    key = sec.key("cas_orbitals")
    v = sec.raw("cas_orbitals")
    if v is None:
        return None
    if (not isinstance(v, list) or not all(isinstance(i, int) and not isinstance(i, bool) for i in v)
            or len(v) != ncas or len(set(v)) != ncas or min(v) < 0):
        raise ConfigError(key, f"= {show_value(v)}: give active_orbitals = {ncas} distinct 0-based RHF orbital indices "
                          f"(0 = lowest), e.g. [6, 7]")
    from pyscf import gto

    atoms = [(s, (0.0, 0.0, 2.0 * i)) for i, s in enumerate(molecule.symbols)]
    nmo = gto.M(atom=atoms, basis=basis, charge=molecule.charge, spin=molecule.spin, verbose=0).nao_nr()
    if max(v) >= nmo:
        raise ConfigError(key, f"= {show_value(v)}: the {basis} basis gives orbitals 0..{nmo - 1} only")
    return [int(i) for i in v]


def _check_basis(basis: str, symbols, key: str) -> None:
    import warnings

    try:
        from pyscf import gto

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # PySCF suggests installing extra packages for unknown names
            for s in sorted(set(symbols)):
                if not gto.basis.load(basis, s):
                    raise KeyError(s)
    except Exception:
        raise ConfigError(key, f"= {show_value(basis)}: PySCF has no such basis for {', '.join(sorted(set(symbols)))} "
                          f"(e.g. \"sto-3g\", \"6-31g*\", \"cc-pvdz\")") from None


def _resolve_callback(spec: str, base_dir: str):
    """"file.py:name" (relative to the input file) or "package.module:name" → the callable."""
    key = "electronic.function"
    if ":" not in spec:
        raise ConfigError(key, f"= {show_value(spec)}: write \"file.py:function\" or \"package.module:function\"")
    target, name = spec.rsplit(":", 1)
    if target.endswith(".py"):
        path = target if os.path.isabs(target) else os.path.join(base_dir, target)
        if not os.path.isfile(path):
            raise ConfigError(key, f"= {show_value(spec)}: file not found (looked for {path})")
        modname = "mapdyn_user_" + hashlib.sha1(os.path.abspath(path).encode()).hexdigest()[:12]
        try:
            loader_spec = importlib.util.spec_from_file_location(modname, path)
            module = importlib.util.module_from_spec(loader_spec)
            loader_spec.loader.exec_module(module)
        except Exception as err:
            raise ConfigError(key, f"= {show_value(spec)}: importing the file failed ({type(err).__name__}: {err})") from None
    else:
        try:
            module = importlib.import_module(target)
        except Exception as err:
            raise ConfigError(key, f"= {show_value(spec)}: cannot import {target!r} ({type(err).__name__})") from None
    fn = getattr(module, name, None)
    if not callable(fn):
        raise ConfigError(key, f"= {show_value(spec)}: {target} has no function {name!r}")
    return fn


def _parse_electronic(sec: Section, molecule: MoleculeConfig | None, base_dir: str) -> ElectronicConfig:
    backend = sec.choice("backend", BACKENDS, required=True)
    own = _ELEC_BY_BACKEND[backend]
    for k in sec.table:
        if k not in _ELEC_COMMON and k not in own:
            raise ConfigError(sec.key(k), f"is not used with backend = \"{backend}\"; its keys are {', '.join(_ELEC_COMMON + own)}")
    if backend == "model":
        if molecule is not None:
            raise ConfigError("molecule", "is not used with electronic.backend = \"model\" (the model defines the coordinates)")
        name = sec.choice("model", MODEL_NAMES, required=True)
        params = sec.raw("parameters", {})
        from mapdyn.study.model_input import BATH_MODELS, parse_bath_model

        if name in BATH_MODELS:
            parsed, F = parse_bath_model(name, params)
            states = sec.integer("states", F, what="an integer")
            if states != F:
                raise ConfigError("electronic.states", f"= {states}: this {name} model has {F} states")
            if sec.raw("engine", "batched") != "batched":
                raise ConfigError("electronic.engine", f"= {show_value(sec.raw('engine'))}: model \"{name}\" runs on the "
                                  "batched engine only (its initial state is diabatic); use \"batched\"")
            engine = "batched"
            return ElectronicConfig("model", states, model=name, model_parameters=parsed, engine=engine,
                                    level_of_theory=f"model {name}")
        if not isinstance(params, Mapping):
            raise ConfigError("electronic.parameters", "must be a table of model parameters, e.g. {A = 0.01, B = 1.6}")
        from mapdyn.models.tully import tully_model

        for k, v in params.items():
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise ConfigError(f"electronic.parameters.{k}", f"= {show_value(v)}: must be a number (atomic units)")
        try:
            model = tully_model(name, **params)
        except TypeError:
            import inspect

            allowed = [p for p in inspect.signature(type(tully_model(name)).__init__).parameters if p != "self"]
            bad = next((k for k in params if k not in allowed), "?")
            raise ConfigError(f"electronic.parameters.{bad}", f" is not a parameter of {name}{did_you_mean(bad, allowed)}; "
                              f"allowed: {', '.join(allowed)}") from None
        states = sec.integer("states", model.nstates, what="an integer")
        if states != model.nstates:
            raise ConfigError("electronic.states", f"= {states}: model {name} has {model.nstates} states")
        engine = sec.choice("engine", ("batched", "on_the_fly"), "batched")
        return ElectronicConfig("model", states, model=name, model_parameters=dict(params), engine=engine,
                                level_of_theory=f"model {name}")
    if molecule is None:
        raise ConfigError("molecule", f"is missing; electronic.backend = \"{backend}\" needs a [molecule] section")
    states = sec.integer("states", required=True, minimum=2,
                         what="the number of electronic states including the ground state (>= 2)")
    if backend == "callback":
        spec = sec.string("function", required=True, what="\"file.py:function\" or \"package.module:function\"")
        _resolve_callback(spec, base_dir)
        path, _, name = spec.rpartition(":")
        if path.endswith(".py") and not os.path.isabs(path):
            spec = os.path.abspath(os.path.join(base_dir, path)) + ":" + name
        return ElectronicConfig("callback", states, function=spec, level_of_theory=f"callback {spec}")
    basis = sec.string("basis", required=True, what="a PySCF basis name, e.g. \"6-31g*\"")
    _check_basis(basis, molecule.symbols, "electronic.basis")
    if backend == "casscf":
        ncas = sec.integer("active_orbitals", required=True, minimum=1, what="the number of active orbitals (>= 1)")
        nel = sec.integer("active_electrons", required=True, minimum=1, what="the number of active electrons (>= 1)")
        from ase.data import atomic_numbers

        nelec = sum(atomic_numbers[s] for s in molecule.symbols) - molecule.charge
        if nel > nelec:
            raise ConfigError("electronic.active_electrons", f"= {nel}: the molecule has only {nelec} electrons")
        if nel > 2 * ncas:
            raise ConfigError("electronic.active_electrons", f"= {nel}: more than 2 × active_orbitals = {2 * ncas}")
        if (nelec - nel) % 2:
            raise ConfigError("electronic.active_electrons", f"= {nel}: leaves an odd number of core electrons ({nelec - nel})")
        if (nel - molecule.spin) % 2 or nel < molecule.spin:
            raise ConfigError("electronic.active_electrons", f"= {nel}: incompatible with molecule.spin = {molecule.spin}")
        cas_orbitals = _cas_orbitals(sec, ncas, basis, molecule)
        options = {"basis": basis, "ncas": ncas, "nelecas": nel, "nstates": states, "charge": molecule.charge,
                   "spin": molecule.spin,
                   "density_fitting": sec.boolean("density_fitting", False),
                   "nac_form": sec.choice("coupling_form", ("full", "etf"), "full"),
                   "spin_purity": sec.choice("spin_purity", ("shift", "spin0", "none"), "shift")}
        if cas_orbitals is not None:
            options["cas_orbitals"] = cas_orbitals
        level = f"SA{states}-CASSCF({nel},{ncas})/{basis}"
        return ElectronicConfig("casscf", states, basis, options, level_of_theory=level)
    # tddft
    if molecule.spin != 0:
        raise ConfigError("molecule.spin", f"= {molecule.spin}: the tddft backend needs a closed-shell singlet (spin = 0)")
    functional = sec.string("functional", "hf", what="\"hf\" (CIS/TDHF) or a functional name, e.g. \"pbe0\"")
    if functional.lower() not in ("hf", "rhf"):
        try:
            from pyscf.dft import libxc

            libxc.parse_xc(functional)
        except Exception:
            raise ConfigError("electronic.functional", f"= {show_value(functional)}: PySCF does not know this functional "
                              f"(e.g. \"hf\", \"pbe0\", \"b3lyp\")") from None
    response = sec.choice("response", ("tda", "full"), "tda")
    grid = sec.integer("grid_level", 3, minimum=0, what="a DFT grid level 0..9")
    if grid > 9:
        raise ConfigError("electronic.grid_level", f"= {grid}: must be 0..9")
    residual = sec.number("gradient_residual_limit", 1e-6,
                          what="the largest relative Z-vector (CPHF) residual accepted for a gradient, e.g. 1e-4")
    if not 0 < residual < 1:
        raise ConfigError("electronic.gradient_residual_limit", f"= {residual}: must lie between 0 and 1")
    # S1/S0-region rule (docs/theory.md#s1s0-region) and the root buffer (docs/theory.md#root-buffer)
    seam_text = sec.raw("seam_gap", "0.1 eV")
    seam_gap = None if isinstance(seam_text, str) and seam_text.strip().lower() == "off" else \
        parse_energy(seam_text, "electronic.seam_gap")
    buffer = sec.integer("root_buffer", 2, minimum=0, what="the number of extra roots computed above the propagated ones")
    options = {"basis": basis, "xc": None if functional.lower() in ("hf", "rhf") else functional,
               "method": "tda" if response == "tda" else "tddft", "nstates": states,
               "charge": molecule.charge, "grids_level": grid, "cphf_residual_tol": residual,
               "seam_gap": seam_gap, "extra_roots": buffer}
    name = ("CIS" if response == "tda" else "TDHF") if options["xc"] is None else \
        (f"TDA-{functional}" if response == "tda" else f"TD-{functional}")
    return ElectronicConfig("tddft", states, basis, options, level_of_theory=f"{name}/{basis}")


def _vector(sec: Section, k: str, ndof: int, default=None, positive: bool = False, what: str = "a number") -> tuple:
    v = sec.raw(k, default)
    if v is None:
        raise ConfigError(sec.key(k), f"is missing; give {what}")
    vals = v if isinstance(v, list) else [v]
    if (len(vals) not in (1, ndof) or
            not all(isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x) for x in vals)):
        raise ConfigError(sec.key(k), f"= {show_value(v)}: must be {what} (or a list of {ndof})")
    if positive and any(x <= 0 for x in vals):
        raise ConfigError(sec.key(k), f"= {show_value(v)}: must be positive")
    return tuple(float(x) for x in (vals * ndof if len(vals) == 1 else vals))


def _quantities(sec: Section, new: str, old: str, kind: str, ndof: int, deprecated: list, *,
                positive: bool = False, default=None, what: str) -> tuple:
    """``new`` = "<number> <unit>" (or a list of them) in atomic units, or the deprecated
    unit-in-name key ``old`` (plain numbers, recorded in ``deprecated``)."""
    if sec.has(new) and sec.has(old):
        raise ConfigError(sec.key(old), f"is given together with {sec.key(new)}; keep only {sec.key(new)}")
    if sec.has(old):
        deprecated.append(sec.key(old))
        return _vector(sec, old, ndof, default, positive=positive, what=what)
    v = sec.raw(new, default)
    if v is None:
        raise ConfigError(sec.key(new), f"is missing; give {what} with a unit, e.g. {_EXAMPLES[kind]}")
    if isinstance(v, (int, float)) and not isinstance(v, bool) and v == 0 and kind == "temperature":
        return (0.0,)
    vals = v if isinstance(v, list) else [v]
    if len(vals) not in (1, ndof):
        raise ConfigError(sec.key(new), f"= {show_value(v)}: give one value or a list of {ndof}")
    out = tuple(parse_quantity(x, sec.key(new), kind) for x in vals)
    if positive and any(x <= 0 for x in out):
        raise ConfigError(sec.key(new), f"= {show_value(v)}: must be positive")
    return out * ndof if len(out) == 1 else out


_EXAMPLES = {"length": '"-8 bohr"', "momentum": '"15 au"', "temperature": '"300 K"'}


def _parse_initial(sec: Section, elec: ElectronicConfig, deprecated: list | None = None) -> InitialConfig:
    F = elec.states
    deprecated = [] if deprecated is None else deprecated
    if elec.backend == "model":
        state = sec.integer("state", 0, minimum=0, what=f"an electronic state index 0..{F - 1}")
        if state >= F:
            raise ConfigError("initial.state", f"= {state}: only states 0..{F - 1} are computed (electronic.states = {F})")
        from mapdyn.study.model_input import BATH_MODELS

        if elec.model in BATH_MODELS:
            for k in ("position", "momentum", "width", "position_bohr", "momentum_au", "width_bohr"):
                if sec.has(k):
                    raise ConfigError(sec.key(k), f"is not used with model \"{elec.model}\" (its bath starts thermal: "
                                      "give initial.temperature and initial.bath_center)")
            if sec.raw("basis", "diabatic") != "diabatic":
                raise ConfigError("initial.basis", f"= {show_value(sec.raw('basis'))}: model \"{elec.model}\" starts in a "
                                  "diabatic state; only \"diabatic\" is allowed")
            temp = parse_quantity(sec.raw("temperature", "0 K"), "initial.temperature", "temperature")
            if temp < 0:
                raise ConfigError("initial.temperature", f"= {show_value(sec.raw('temperature'))}: must be >= 0 K")
            return InitialConfig(state=state, temperature_kelvin=temp, basis="diabatic",
                                 bath_center=sec.choice("bath_center", ("zero", "donor"), "zero"))
        for k in ("temperature", "bath_center"):
            if sec.has(k):
                raise ConfigError(sec.key(k), f"is used with the harmonic-bath models ({', '.join(BATH_MODELS)}) only")
        return InitialConfig(state=state,
                             position_bohr=_quantities(sec, "position", "position_bohr", "length", 1, deprecated,
                                                       what="the wavepacket centre"),
                             momentum_au=_quantities(sec, "momentum", "momentum_au", "momentum", 1, deprecated,
                                                     what="the mean momentum"),
                             width_bohr=_quantities(sec, "width", "width_bohr", "length", 1, deprecated, positive=True,
                                                    what="the position width σ_R"),
                             basis=sec.choice("basis", ("adiabatic", "diabatic"), "adiabatic"))
    excitation = sec.choice("excitation", ("fixed", "brightest", "energy_range"), "fixed")
    energy_range = None
    if excitation == "energy_range":
        energy_range = _energy_window(sec)
    elif sec.has("energy_range"):
        raise ConfigError("initial.energy_range", f"is used with excitation = \"energy_range\" only (here \"{excitation}\")")
    fwhm = parse_quantity(sec.raw("spectrum_fwhm", "0.15 eV"), "initial.spectrum_fwhm", "energy")
    if not fwhm > 0:
        raise ConfigError("initial.spectrum_fwhm", f"= {show_value(sec.raw('spectrum_fwhm'))}: must be a positive width, "
                          "e.g. \"0.15 eV\"")
    if excitation == "fixed":
        state = sec.integer("state", required=True, minimum=0, what=f"the initial adiabatic state 0..{F - 1} (1 = first excited)")
        if state >= F:
            raise ConfigError("initial.state", f"= {state}: only states 0..{F - 1} are computed (electronic.states = {F})")
    else:
        if sec.has("state"):
            raise ConfigError("initial.state", f"is not used with excitation = \"{excitation}\" (the state is chosen per geometry)")
        state = None
    default_modes = "dynamics" if elec.backend == "callback" else "scf"
    modes = sec.choice("normal_modes_from", ("scf", "dynamics"), default_modes)
    if elec.backend == "callback" and modes == "scf":
        raise ConfigError("initial.normal_modes_from", "= \"scf\" needs a PySCF backend; with a callback use \"dynamics\"")
    if sec.has("temperature_kelvin"):
        if sec.has("temperature"):
            raise ConfigError("initial.temperature_kelvin",
                              "is given together with initial.temperature; keep only initial.temperature")
        deprecated.append("initial.temperature_kelvin")
        temp = sec.number("temperature_kelvin", 0.0, what="a temperature in K (>= 0)")
        if temp < 0:
            raise ConfigError("initial.temperature_kelvin", f"= {temp}: must be >= 0 K")
    else:
        temp = parse_quantity(sec.raw("temperature", "0 K"), "initial.temperature", "temperature")
        if temp < 0:
            raise ConfigError("initial.temperature", f"= {show_value(sec.raw('temperature'))}: must be >= 0 K")
    return InitialConfig(state=state, optimize=sec.boolean("optimize", True), normal_modes_from=modes,
                         temperature_kelvin=temp, excitation=excitation, energy_range_hartree=energy_range,
                         spectrum_fwhm_hartree=fwhm)


def _energy_window(sec: Section) -> tuple[float, float]:
    """``initial.energy_range = ["<low>", "<high>"]``: excitation-energy window (Eh), low < high, low >= 0."""
    v = sec.raw("energy_range")
    if v is None:
        raise ConfigError("initial.energy_range", "is missing; excitation = \"energy_range\" needs a window, "
                          "e.g. [\"8 eV\", \"10 eV\"]")
    if not isinstance(v, list) or len(v) != 2:
        raise ConfigError("initial.energy_range", f"= {show_value(v)}: give [low, high] with units, e.g. [\"8 eV\", \"10 eV\"]")
    lo, hi = (parse_quantity(x, "initial.energy_range", "energy") for x in v)
    if not 0 <= lo < hi:
        raise ConfigError("initial.energy_range", f"= {show_value(v)}: needs 0 <= low < high")
    return (lo, hi)


#: methods a study can run (the neighbouring methods of docs/theory.md#neighbouring-methods are model-engine only)
STUDY_METHODS = ("sqc", "ehrenfest")


def _parse_method(sec: Section, elec: ElectronicConfig) -> MethodOptions:
    if sec.raw("method") in ("spin", "mash", "fssh"):
        raise ConfigError("method.method", f"= \"{sec.raw('method')}\" runs in `mapdyn validate` and the batched model "
                          "engine (mapdyn.core.hopping) only; studies take \"sqc\" or \"ehrenfest\"")
    method = sec.choice("method", STUDY_METHODS, "sqc")
    window = sec.choice("window", WINDOWS, DEFAULT_WINDOW)
    zero = sec.choice("zero_point", ZERO_POINTS, "symmetrized")
    gamma = sec.number("gamma", None, what="a window half-width strictly between 0 and 1/2")
    if zero == "fixed" and method == "sqc" and not (elec.backend == "model" and elec.engine == "batched"):
        raise ConfigError("method.zero_point", "= \"fixed\" is allowed for batched model studies only: on a molecule "
                          "it rescales the whole bonding potential per trajectory; use \"symmetrized\" or \"adjusted\"")
    if method == "ehrenfest":
        for k in ("window", "zero_point", "gamma"):
            if sec.has(k):
                raise ConfigError(f"method.{k}", "is not used with method = \"ehrenfest\"")
    try:
        return MethodOptions(method, window, zero, gamma)
    except ValueError as err:
        key = "gamma" if "gamma" in str(err) else "window"
        raise ConfigError(f"method.{key}", str(err)) from None


def _parse_dynamics(sec: Section, elec: ElectronicConfig) -> DynamicsConfig:
    dt = parse_duration(sec.required("time_step", "a time step with a unit, e.g. \"0.5 fs\""), "dynamics.time_step")
    total = parse_duration(sec.required("duration", "the simulated time with a unit, e.g. \"100 fs\""), "dynamics.duration")
    if total < dt * (1 - 1e-9):
        raise ConfigError("dynamics.duration", f"= {show_value(sec.raw('duration'))}: shorter than one time step")
    ck = sec.integer("checkpoint_every", 10, minimum=1, what="a number of steps >= 1")
    rec = sec.integer("record_every", 1, minimum=1, what="a number of steps >= 1")
    drift = sec.raw("drift_threshold", "1e-3 Eh")
    if drift is False:
        drift_eh = None
    else:
        drift_eh = parse_energy(drift, "dynamics.drift_threshold")
    stop = sec.boolean("stop_on_drift", False)
    if stop and drift_eh is None:
        raise ConfigError("dynamics.stop_on_drift", "needs a dynamics.drift_threshold")
    substeps = sec.integer("substeps", 20, minimum=1, what="an integer >= 1")
    prop = sec.choice("propagation", ("auto", "overlap", "coupling"), "auto")
    if elec.backend == "model" and elec.engine == "batched":
        for k in ("substeps", "propagation", "stop_on_drift"):
            if sec.has(k):
                raise ConfigError(f"dynamics.{k}", "is not used by the batched model engine (electronic.engine = \"batched\")")
    ratio = total / dt
    nsteps = int(round(ratio))
    if abs(ratio - nsteps) > 1e-6 * max(1.0, ratio):
        raise ConfigError("dynamics.duration", f"= {show_value(sec.raw('duration'))}: not a whole number of time steps "
                          f"({ratio:.6g} × {show_value(sec.raw('time_step'))})")
    if nsteps % rec:
        raise ConfigError("dynamics.record_every", f"= {rec}: the {nsteps} steps are not a whole number of recording intervals")
    return DynamicsConfig(dt, total, nsteps, ck, rec, drift_eh, stop, substeps, prop)


def _parse_ensemble(sec: Section) -> EnsembleConfig:
    n = sec.integer("trajectories", required=True, minimum=1, what="the number of trajectories (>= 1)")
    seed = sec.integer("seed", required=True, minimum=0, what="a non-negative integer random seed")
    w = sec.raw("workers", "auto")
    if w == "auto":
        workers = max(1, os.cpu_count() or 1)
    elif isinstance(w, bool) or not isinstance(w, int) or w < 1:
        raise ConfigError("ensemble.workers", f"= {show_value(w)}: must be a number of processes >= 1 or \"auto\"")
    else:
        workers = int(w)
    batch = sec.integer("batch", 200, minimum=1, what="a number of model trajectories per task (>= 1)")
    return EnsembleConfig(n, seed, workers, batch)


def _parse_analysis(table: Any) -> dict:
    if not isinstance(table, Mapping):
        raise ConfigError("analysis", f"must be a table ([analysis]), got {show_value(table)}")
    from mapdyn.study.analysis_settings import ANALYSIS_KEYS, settings_from_table

    for k in table:
        if k not in ANALYSIS_KEYS:
            raise ConfigError(f"analysis.{k}", f" is not a known key{did_you_mean(k, ANALYSIS_KEYS)}; "
                              f"allowed: {', '.join(ANALYSIS_KEYS)}")
    try:
        settings_from_table({k: v for k, v in table.items() if k != "fragments"})
    except ConfigError:
        raise
    except (ValueError, TypeError, KeyError) as err:
        raise ConfigError("analysis", str(err).splitlines()[0] if str(err) else type(err).__name__) from None
    return dict(table)


def _parse_cluster(table: Any) -> dict:
    if not isinstance(table, Mapping):
        raise ConfigError("cluster", f"must be a table ([cluster]), got {show_value(table)}")
    from mapdyn.study.cluster import cluster_settings

    try:
        cluster_settings(table)
    except ValueError as err:
        raise ConfigError("cluster", str(err).splitlines()[0]) from None
    return dict(table)


def parse_study(data: Mapping[str, Any], *, base_dir: str = ".", source_path: str = "", source_text: str = "",
                default_name: str = "study", check_extras: bool = True) -> StudyConfig:
    """Validate a parsed TOML mapping; relative geometry/callback files are relative to ``base_dir``,
    a relative ``study.folder`` to the current directory.  ``check_extras=False`` skips checking
    the [analysis] and [cluster] tables (done once when the study was created)."""
    if not source_text and isinstance(data, Mapping):
        # a mapping given directly (notebooks): store its TOML text so the study folder can be
        # reopened from study.toml like any file-based study
        from mapdyn.study.toml_text import dumps

        try:
            source_text = dumps(data)
        except ValueError as err:
            raise ConfigError("study input", str(err).splitlines()[0]) from None
    for k in data:
        if k not in SECTIONS:
            raise ConfigError(k, f" is not a known section{did_you_mean(k, SECTIONS)}; allowed: {', '.join(SECTIONS)}")
    for required in ("electronic", "dynamics", "ensemble"):
        if required not in data:
            raise ConfigError(required, f"section is missing; add a [{required}] table")
    study = Section("study", data.get("study", {}), _STUDY_KEYS)
    name = study.string("name", default_name, what="a non-empty name")
    if not re.fullmatch(r"[A-Za-z0-9_.\-]+", name):
        raise ConfigError("study.name", f"= {show_value(name)}: use letters, digits, '_', '-', '.' only (it names folders)")
    description = study.string("description", "", what="a string") if study.has("description") else ""
    folder = study.string("folder", os.path.join("runs", name), what="a folder path")
    electronic_table = data["electronic"]
    backend = electronic_table.get("backend") if isinstance(electronic_table, Mapping) else None
    mol = None
    if "molecule" in data:
        if backend == "model":
            raise ConfigError("molecule", "is not used with electronic.backend = \"model\" (the model defines the coordinates)")
        mol = _parse_molecule(Section("molecule", data["molecule"], _MOLECULE_KEYS), base_dir)
    all_elec = tuple(dict.fromkeys(_ELEC_COMMON + sum(_ELEC_BY_BACKEND.values(), ())))
    elec = _parse_electronic(Section("electronic", electronic_table, all_elec), mol, base_dir)
    if elec.backend == "model":
        init_sec = Section("initial", data.get("initial", {}), _INITIAL_MODEL,
                            {k: "with electronic.backend = \"model\"" for k in _INITIAL_MOLECULE if k not in _INITIAL_MODEL})
    else:
        init_sec = Section("initial", data.get("initial", {}), _INITIAL_MOLECULE,
                            {k: "for molecules (it is a model-study key)" for k in _INITIAL_MODEL if k not in _INITIAL_MOLECULE})
    deprecated: list = []
    initial = _parse_initial(init_sec, elec, deprecated)
    if check_extras:  # once, when the input is read from the user (not when a study folder reopens it)
        for key in deprecated:
            new, unit = DEPRECATED_KEYS[key]
            msg = (f"{key} is deprecated: write {new} = \"<number> {unit}\" (units are read from the string; "
                   "energies also take eV, meV, kcal/mol, kJ/mol, cm-1, lengths Å)")
            warnings.warn(msg, FutureWarning, stacklevel=3)
    method = _parse_method(Section("method", data.get("method", {}), _METHOD_KEYS), elec)
    dynamics = _parse_dynamics(Section("dynamics", data["dynamics"], _DYNAMICS_KEYS), elec)
    ensemble = _parse_ensemble(Section("ensemble", data["ensemble"], _ENSEMBLE_KEYS))
    if check_extras:
        analysis = _parse_analysis(data.get("analysis", {}))
        cluster = _parse_cluster(data["cluster"]) if "cluster" in data else None
    else:
        analysis = dict(data.get("analysis", {}))
        cluster = dict(data["cluster"]) if "cluster" in data else None
    return StudyConfig(name, description, os.path.abspath(folder), elec, initial, method, dynamics, ensemble,
                       mol, analysis, cluster, source_path, source_text)


def load_study_config(path: str | os.PathLike, *, base_dir: str | None = None, check_extras: bool = True,
               default_name: str | None = None) -> StudyConfig:
    """Read and validate a study TOML file (raises :class:`ConfigError`)."""
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ConfigError(path, "file not found")
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
        text = raw.decode("utf-8")
        data = tomllib.loads(text)
    except UnicodeDecodeError:
        raise ConfigError(path, "is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(path, f"is not valid TOML ({err})") from None
    stem = re.sub(r"[^A-Za-z0-9_.\-]+", "_", os.path.splitext(os.path.basename(path))[0]) or "study"
    return parse_study(data, base_dir=base_dir or os.path.dirname(os.path.abspath(path)), source_path=os.path.abspath(path),
                       source_text=text, default_name=default_name or stem, check_extras=check_extras)
