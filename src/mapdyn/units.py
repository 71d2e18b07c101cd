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


def fs_to_au(t_fs: float) -> float:
    """Time in fs → atomic units of time."""
    return t_fs / AU_TIME_IN_FS


def au_to_fs(t_au: float) -> float:
    """Time in atomic units → fs."""
    return t_au * AU_TIME_IN_FS


#: ASE's momentum unit (amu·Å per ASE time unit) in atomic units of momentum.
ASE_MOMENTUM_IN_AU: float = AMU_IN_ME * AU_TIME_IN_ASE / BOHR_IN_ANGSTROM
