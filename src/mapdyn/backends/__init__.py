"""Electronic-structure backends (adapters returning :class:`mapdyn.backends.contract.ElectronicResult`).

Imported lazily so that model studies never pay for importing PySCF.
"""

import importlib

_EXPORTS = {
    "CASSCFBackend": "mapdyn.backends.pyscf.casscf",
    "CASSCFGuess": "mapdyn.backends.pyscf.casscf",
    "TDDFTBackend": "mapdyn.backends.pyscf.tddft",
    "time_derivative_couplings": "mapdyn.backends.pyscf.tddft",
}

__all__ = list(_EXPORTS)


def __getattr__(name):
    if name in _EXPORTS:
        return getattr(importlib.import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'mapdyn.backends' has no attribute {name!r}")
