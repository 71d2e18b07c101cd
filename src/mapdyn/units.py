"""Unit constants and conversions: Hartree atomic units inside mapdyn, other units at the edges.

Every factor derives from :mod:`ase.units` (CODATA values as ASE ships them), so mapdyn and ASE
always agree.  Names read "one <unit> in <other unit>".
"""

from __future__ import annotations

from ase import units as _ase

#: 1 Bohr in Å.
BOHR_IN_ANGSTROM: float = float(_ase.Bohr)
#: 1 Hartree (Eh) in eV.
HARTREE_IN_EV: float = float(_ase.Hartree)
#: 1 Hartree in cm⁻¹ (wavenumber).
HARTREE_IN_CM: float = float(_ase.Hartree / _ase.invcm)
#: 1 atomic unit of time (ħ/Eh) in fs.
AU_TIME_IN_FS: float = float(_ase._aut * 1e15)
#: 1 atomic mass unit (Dalton) in electron masses.
AMU_IN_ME: float = float(_ase._amu / _ase._me)
#: Boltzmann constant in Eh/K.
KB_IN_HARTREE_PER_K: float = float(_ase.kB / _ase.Hartree)
#: 1 atomic unit of time in ASE's time unit (Å √(amu/eV)).
AU_TIME_IN_ASE: float = float(_ase.AUT)
#: 1 fs in ASE's time unit.
FS_IN_ASE: float = float(_ase.fs)

#: Energy units accepted in inputs → their size in eV (ASE's energy unit), all from ase.units.
ENERGY_UNITS_IN_EV: dict[str, float] = {
    "Eh": float(_ase.Hartree), "eV": 1.0, "meV": 1e-3, "kcal/mol": float(_ase.kcal / _ase.mol),
    "kJ/mol": float(_ase.kJ / _ase.mol), "cm-1": float(_ase.invcm),
}
#: Time units → their size in fs.
TIME_UNITS_IN_FS: dict[str, float] = {"au": float(_ase._aut * 1e15), "as": 1e-3, "fs": 1.0, "ps": 1e3}
#: Length units → their size in Å.
LENGTH_UNITS_IN_ANGSTROM: dict[str, float] = {"bohr": float(_ase.Bohr), "Å": 1.0, "nm": 10.0}
#: Spellings accepted for each unit (case-insensitive) → the canonical name above.
UNIT_ALIASES: dict[str, str] = {
    "eh": "Eh", "hartree": "Eh", "ha": "Eh", "ev": "eV", "mev": "meV", "kcal/mol": "kcal/mol",
    "kj/mol": "kJ/mol", "cm-1": "cm-1", "cm^-1": "cm-1", "1/cm": "cm-1", "cm⁻¹": "cm-1",
    "au": "au", "a.u.": "au", "aut": "au", "as": "as", "fs": "fs", "ps": "ps",
    "bohr": "bohr", "a0": "bohr", "å": "Å", "a": "Å", "ang": "Å", "angstrom": "Å", "nm": "nm",
    "k": "K", "kelvin": "K",
}


def fs_to_au(t_fs: float) -> float:
    """Time in fs → atomic units of time."""
    return t_fs / AU_TIME_IN_FS


def au_to_fs(t_au: float) -> float:
    """Time in atomic units → fs."""
    return t_au * AU_TIME_IN_FS


#: ASE's momentum unit (amu·Å per ASE time unit) in atomic units of momentum.
ASE_MOMENTUM_IN_AU: float = AMU_IN_ME * AU_TIME_IN_ASE / BOHR_IN_ANGSTROM
