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


def run_study(spec, folder=None, **kw):
    """Build a study from a dict, TOML text or file, run what is missing, return its results as an
    ``xarray.Dataset``; see :func:`mapdyn.study.notebook.run_study`."""
    from mapdyn.study.notebook import run_study as _run

    return _run(spec, folder, **kw)
