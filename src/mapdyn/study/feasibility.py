"""Checks run before a study folder is created or changed (docs/architecture.md#study-folder):
the ``[analysis]`` values against the molecule, electronic-structure feasibility by cheap counting
(a PySCF ``Mole`` is built, no SCF), and a size limit.

Every failure is a :class:`mapdyn.study.input_values.ConfigError` (one line naming the key); the
command line turns it into exit code 2 before anything is written.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

from mapdyn.study.config import StudyConfig
from mapdyn.study.input_values import ConfigError, show_value

__all__ = ["validate_study", "check_analysis", "check_electronic", "check_size", "csf_count",
           "MAX_TRAJECTORIES", "MAX_STEPS", "MAX_MODEL_TRAJECTORY_STEPS", "MAX_MOLECULAR_TRAJECTORY_STEPS"]

#: Size limits, lifted with ``--force``.  A manifest of 10⁶ trajectories is a few MB and 10⁶
#: trajectory folders is already a heavy file system load; 10⁷ steps of 0.5 fs are 5 ns.
MAX_TRAJECTORIES = 1_000_000
MAX_STEPS = 10_000_000
#: trajectories × steps: batched model steps run at ~10⁷ per second per core (order of magnitude),
#: an on-the-fly electronic-structure step takes ~0.1-10 s, so 10⁷ of them are months of core time.
MAX_MODEL_TRAJECTORY_STEPS = 10_000_000_000
MAX_MOLECULAR_TRAJECTORY_STEPS = 10_000_000


def validate_study(cfg: StudyConfig, force: bool = False) -> None:
    """All checks; raises :class:`ConfigError` on the first problem."""
    check_analysis(cfg)
    check_electronic(cfg)
    check_size(cfg.ensemble.trajectories, cfg.dynamics.nsteps, cfg.is_model, force)


# ----------------------------------------------------------------------------------------------
# size
# ----------------------------------------------------------------------------------------------
def check_size(trajectories: int, nsteps: int, is_model: bool, force: bool = False) -> None:
    """Refuse studies above the stated limits unless ``force``."""
    if force:
        return
    hint = "; give --force to run it anyway"
    if trajectories > MAX_TRAJECTORIES:
        raise ConfigError("ensemble.trajectories", f"= {trajectories}: more than the limit {MAX_TRAJECTORIES:.0e}{hint}")
    if nsteps > MAX_STEPS:
        raise ConfigError("dynamics.duration", f"gives {nsteps} steps: more than the limit {MAX_STEPS:.0e}{hint}")
    limit = MAX_MODEL_TRAJECTORY_STEPS if is_model else MAX_MOLECULAR_TRAJECTORY_STEPS
    if trajectories * nsteps > limit:
        raise ConfigError("ensemble.trajectories", f"× steps = {trajectories} × {nsteps} = {trajectories * nsteps:.3g}: "
                          f"more than the limit {limit:.0e} for {'model' if is_model else 'molecular'} studies{hint}")


# ----------------------------------------------------------------------------------------------
# [analysis]
# ----------------------------------------------------------------------------------------------
def _int(table: Mapping, key: str, minimum: int) -> None:
    if key in table:
        v = table[key]
        if isinstance(v, bool) or not isinstance(v, int) or v < minimum:
            raise ConfigError(f"analysis.{key}", f"= {show_value(v)}: must be an integer >= {minimum}")


def _atoms(key: str, atoms: Any, natoms: int | None) -> None:
    if natoms is None:
        return
    for a in atoms:
        if not isinstance(a, int) or isinstance(a, bool) or not 0 <= a < natoms:
            raise ConfigError(key, f"= {show_value(list(atoms))}: atom index {show_value(a)} is outside the molecule "
                              f"(indices 0..{natoms - 1})")


def check_analysis(cfg: StudyConfig) -> None:
    """Value ranges of ``[analysis]`` and atom/state indices against the study."""
    table = cfg.analysis or {}
    if "confidence_level" in table:
        v = table["confidence_level"]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 < v < 1:
            raise ConfigError("analysis.confidence_level", f"= {show_value(v)}: must lie strictly between 0 and 1, e.g. 0.95")
    _int(table, "n_resamples", 1)
    _int(table, "lifetime_resamples", 0)
    _int(table, "seed", 0)
    if "energy_tolerance_hartree" in table:
        v = table["energy_tolerance_hartree"]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not (v > 0 and math.isfinite(v)):
            raise ConfigError("analysis.energy_tolerance_hartree", f"= {show_value(v)}: must be a positive energy in Eh")
    natoms = None if cfg.molecule is None else cfg.molecule.natoms
    nstates = cfg.electronic.states
    for k, spec in enumerate(table.get("observables", []) or []):
        from mapdyn.analysis.observables import GeometricObservable

        if cfg.molecule is None:
            raise ConfigError("analysis.observables", "are geometric (atom indices) and need a molecule; "
                              "model studies have none")
        _atoms(f"analysis.observables[{k}]", GeometricObservable.from_spec(spec).atoms, natoms)
    for k, item in enumerate(table.get("first_entry", []) or []):
        st = item.get("state") if isinstance(item, Mapping) else None
        if isinstance(st, bool) or not isinstance(st, int) or not 0 <= st < nstates:
            raise ConfigError(f"analysis.first_entry[{k}].state", f"= {show_value(st)}: must be a state index 0..{nstates - 1}")
    for label, conds in (table.get("products", {}) or {}).items():
        for c in ([conds] if isinstance(conds, Mapping) else conds):
            if "distance" in c:
                if cfg.molecule is None:
                    raise ConfigError(f"analysis.products.{label}", "uses 'distance' (atoms); model studies use 'coordinate'")
                _atoms(f"analysis.products.{label}.distance", c["distance"], natoms)
            if "state" in c and not (isinstance(c["state"], int) and 0 <= c["state"] < nstates):
                raise ConfigError(f"analysis.products.{label}.state", f"= {show_value(c['state'])}: must be 0..{nstates - 1}")
    for k, frag in enumerate(table.get("fragments", []) or []):
        if isinstance(frag, Mapping) and "atoms" in frag:
            _atoms(f"analysis.fragments[{k}].atoms", frag["atoms"], natoms)


# ----------------------------------------------------------------------------------------------
# electronic structure
# ----------------------------------------------------------------------------------------------
def csf_count(orbitals: int, electrons: int, two_s: int) -> int:
    """Number of spin-adapted configurations (CSFs) of ``electrons`` in ``orbitals`` with spin
    S = two_s/2 — Weyl's dimension formula (Paldus, J. Chem. Phys. 61, 5321 (1974)):
    N = (2S+1)/(n+1) · C(n+1, N/2 − S) · C(n+1, N/2 + S + 1)."""
    n, N = orbitals, electrons
    if (N - two_s) % 2 or two_s > N or N > 2 * n or two_s < 0:
        return 0
    a, b = (N - two_s) // 2, (N + two_s) // 2 + 1
    if a < 0 or b > n + 1:
        return 0
    return (two_s + 1) * math.comb(n + 1, a) * math.comb(n + 1, b) // (n + 1)


def _mole(cfg: StudyConfig):
    import warnings

    from pyscf import gto

    mol_cfg = cfg.molecule
    assert mol_cfg is not None
    from mapdyn.units import BOHR_IN_ANGSTROM

    atoms = [(s, tuple(float(x) * BOHR_IN_ANGSTROM for x in r)) for s, r in zip(mol_cfg.symbols, mol_cfg.positions_bohr)]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return gto.M(atom=atoms, basis=cfg.electronic.basis, charge=mol_cfg.charge, spin=mol_cfg.spin,
                         unit="Angstrom", verbose=0)
    except Exception as err:  # PySCF: RuntimeError for electron number vs spin, KeyError for basis
        first = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise ConfigError("molecule", f"charge = {mol_cfg.charge}, spin = {mol_cfg.spin}: PySCF refuses the molecule "
                          f"({first})") from None


def check_electronic(cfg: StudyConfig) -> None:
    """Electron count vs charge and spin, active space within the basis and electron count, states
    available for the spin, TDA/TDDFT states within the single-excitation space, open shells."""
    e = cfg.electronic
    if cfg.molecule is None or e.backend not in ("casscf", "tddft"):
        return
    mol_cfg = cfg.molecule
    from ase.data import atomic_numbers

    nelec = sum(atomic_numbers[s] for s in mol_cfg.symbols) - mol_cfg.charge
    if nelec < 1:
        raise ConfigError("molecule.charge", f"= {mol_cfg.charge}: leaves {nelec} electrons")
    if (nelec - mol_cfg.spin) % 2 or mol_cfg.spin > nelec:
        raise ConfigError("molecule.spin", f"= {mol_cfg.spin} (2S): impossible with {nelec} electrons "
                          f"(2S must have the parity of the electron count and be <= it)")
    if mol_cfg.spin != 0 and cfg.initial.normal_modes_from == "scf":
        raise ConfigError("molecule.spin", f"= {mol_cfg.spin}: initial conditions from initial.normal_modes_from = \"scf\" "
                          f"use a closed-shell (RHF/RKS) ground state; give normal_modes_from = \"dynamics\" (state 0 "
                          f"of the CASSCF backend at this spin) or a closed-shell molecule")
    mol = _mole(cfg)
    nao = int(mol.nao_nr())
    if e.backend == "casscf":
        ncas, nel = int(e.options["ncas"]), int(e.options["nelecas"])
        ncore = (nelec - nel) // 2
        if ncore + ncas > nao:
            raise ConfigError("electronic.active_orbitals", f"= {ncas}: with {ncore} core orbitals needs {ncore + ncas} "
                              f"orbitals, the basis {e.basis} has {nao} for this molecule")
        purity = e.options.get("spin_purity", "shift")
        if purity == "none":
            na, nb = (nel + mol_cfg.spin) // 2, (nel - mol_cfg.spin) // 2
            available = math.comb(ncas, na) * math.comb(ncas, nb)
            what = "determinants"
        else:
            available = csf_count(ncas, nel, mol_cfg.spin)
            what = f"configurations of spin S = {mol_cfg.spin / 2:g}"
        if e.states > available:
            raise ConfigError("electronic.states", f"= {e.states}: CAS({nel},{ncas}) has only {available} {what}")
        return
    nocc = nelec // 2
    nvir = nao - nocc
    space = nocc * nvir
    if e.states - 1 > space:
        raise ConfigError("electronic.states", f"= {e.states}: {e.options.get('method', 'tda').upper()} on a closed shell "
                          f"with {nocc} occupied and {nvir} virtual orbitals ({e.basis}) has only {space} singlet "
                          f"excitations, so at most {space + 1} states")
