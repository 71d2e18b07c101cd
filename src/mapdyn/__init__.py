"""mapdyn: nonadiabatic dynamics with classical mapping (MMST) oscillators and SQC windows.

Internals are in Hartree atomic units; conversion to Å, eV, fs and amu happens only at the ASE
boundary (``ase.units``).
"""

__version__ = "0.1.0"
