"""mapdyn: nonadiabatic dynamics with classical mapping (MMST) oscillators and SQC windows.

Internals are in Hartree atomic units; conversion to Å, eV, fs and amu happens only at the edges
(:mod:`mapdyn.units`).  Layers and data flow: docs/architecture.md.
"""

from importlib import metadata as _metadata

try:
    __version__: str = _metadata.version("mapdyn")
except _metadata.PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0+unknown"


def load_results(run):
    """Results of a study folder ``run`` as an ``xarray.Dataset`` (time × trajectory × state, units
    in each variable's ``attrs["units"]``); see :func:`mapdyn.study.export.load_results`."""
    from mapdyn.study.export import load_results as _load

    return _load(run)
