"""Open formats for study results: an ``xarray.Dataset``, extended XYZ per trajectory, CSV, HDF5.

* :func:`load_results` — the whole study as an :class:`xarray.Dataset` with dimensions
  ``time × trajectory × state`` (plus ``atom``/``xyz`` for molecules, ``dof`` for models),
  coordinates, and the unit of every variable in its ``units`` attribute.
* :func:`export_study` (``mapdyn export RUN``) — writes into ``RUN/export/``:

  ``<index>.xyz``     one extended-XYZ file per trajectory with recorded atoms, readable with
                      ``ase.io.read(path, index=":")``; each frame carries in ``atoms.info``:
                      ``time_fs``, ``time_au``, ``step``, ``energies_eV`` (adiabatic potential
                      energies), ``total_energy_eV``, ``populations`` (window indicators, or
                      Ehrenfest action fractions), ``window`` (occupied window, −1 none),
                      ``actions``; momenta in ASE units.
  ``frames.csv``      one row per (trajectory, recorded time): status, window, energies, actions.
  ``ensemble.csv``    ensemble populations vs time with their Clopper–Pearson intervals.
  ``results.h5``      the dataset of :func:`load_results` as plain HDF5 (trajectory axis first,
                      ``units`` attribute on every dataset, atom symbols and masses,
                      ``format_version``).
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from mapdyn.units import AU_TIME_IN_FS, BOHR_IN_ANGSTROM, HARTREE_IN_EV

__all__ = ["load_results", "export_study", "EXPORT_FORMAT_VERSION"]

#: Version of the exported layout (``results.h5`` attribute and dataset attribute).
EXPORT_FORMAT_VERSION = 1
EXPORT_FOLDER = "export"

_UNITS = {
    "time": "a.u. of time (hbar/Eh)", "time_fs": "fs", "actions": "1 (mapping action e = (x^2 + p^2)/2)",
    "populations": "1", "window": "state index (-1: in no window)", "total_energy": "Eh",
    "positions": "bohr", "momenta": "a.u. (m_e bohr / a.u. time)", "coordinates": "bohr",
    "coordinate_momenta": "a.u.", "masses": "m_e (electron masses)", "masses_amu": "Da",
    "population": "1", "population_low": "1", "population_high": "1", "n_counted": "trajectories",
    "initial_state": "state index", "potential_energies": "Eh",
    "min_overlap": "1 (smallest |<state(t-dt)|state(t)>| of the matched states)",
    "active_space_change": "1 = CASSCF active space rotated, 0 = kept",
    "active_overlap_min_singular": "1", "overlap_retries": "extra CASSCF solutions tried",
    "response_residual": "1 (largest TDDFT Z-vector residual norm)",
    "response_converged": "1 = CASSCF response equations converged, 0 = not",
}


def _study(run: Any):
    from mapdyn.study.folder import Study

    return run if isinstance(run, Study) else Study(os.fspath(run))


def _window_and_populations(tset) -> tuple[np.ndarray, np.ndarray]:
    from mapdyn.core.populations import population_weights
    from mapdyn.core.windows import window_indicators

    e = tset.actions
    n, T, F = e.shape
    mask = tset.frame_mask
    if tset.options.method == "ehrenfest":
        with np.errstate(invalid="ignore", divide="ignore"):
            pops = e / e.sum(axis=2, keepdims=True)
        window = np.where(mask, np.argmax(np.where(np.isfinite(e), e, -np.inf), axis=2), -1)
        return window, pops
    flat = np.where(mask[..., None], e, 0.0).reshape(-1, F)
    ind = window_indicators(flat, tset.options).reshape(n, T, F)
    window = np.where(ind.any(axis=2) & mask, np.argmax(ind, axis=2), -1)
    pops = np.where(mask[..., None], population_weights(np.where(mask[..., None], e, 0.0), tset.options), np.nan)
    return window, pops


def load_results(run: Any) -> Any:
    """Results of a study folder (path or :class:`mapdyn.study.folder.Study`) as an ``xarray.Dataset``.

    Dimensions: ``time`` (a.u.; coordinate ``time_fs`` in fs), ``trajectory`` (study indices),
    ``state`` (adiabatic index), and ``atom``/``xyz`` (molecules) or ``dof`` (models).
    Variables (dims, unit in ``attrs["units"]``): ``actions`` (time, trajectory, state),
    ``populations`` (per-trajectory estimator weights), ``window`` (time, trajectory; −1 none),
    ``total_energy`` (Eh), ``positions``/``momenta`` (bohr, a.u.) or ``coordinates``/
    ``coordinate_momenta``, ``status``/``initial_state`` (trajectory), ensemble ``population``
    with ``population_low``/``population_high`` (time, state; Clopper–Pearson interval of the
    counts, no bootstrap), ``masses`` (m_e) and, for on-the-fly trajectories, the per-frame backend
    diagnostics (time, trajectory) ``min_overlap``, ``active_space_change``,
    ``active_overlap_min_singular``, ``overlap_retries``, ``response_residual``,
    ``response_converged`` (NaN where the backend does not report them).  Frames a trajectory did not record are NaN.
    ``attrs``: study name, method, format version.
    """
    import xarray as xr

    from mapdyn.analysis.populations import populations
    from mapdyn.study.analyze import load_trajectory_set

    study = _study(run)
    ts = load_trajectory_set(study)
    window, pops = _window_and_populations(ts)
    tt = lambda a: np.swapaxes(a, 0, 1)  # (n, T, …) → (T, n, …)
    data: dict = {
        "actions": (("time", "trajectory", "state"), tt(ts.actions)),
        "populations": (("time", "trajectory", "state"), tt(pops)),
        "window": (("time", "trajectory"), tt(window).astype(np.int64)),
        "status": (("trajectory",), np.array(ts.status, dtype=str)),
        "initial_state": (("trajectory",), ts.initial_states.astype(np.int64)),
    }
    if ts.energies is not None:
        data["total_energy"] = (("time", "trajectory"), tt(ts.energies))
    coords: dict = {"time": ("time", ts.times), "time_fs": ("time", ts.times * AU_TIME_IN_FS),
                    "trajectory": ("trajectory", ts.indices.astype(np.int64)),
                    "state": ("state", np.arange(ts.nstates))}
    if ts.positions is not None:
        data["positions"] = (("time", "trajectory", "atom", "xyz"), tt(ts.positions))
        if ts.momenta is not None:
            data["momenta"] = (("time", "trajectory", "atom", "xyz"), tt(ts.momenta))
        coords["atom"] = ("atom", np.arange(len(ts.symbols)))
        coords["symbol"] = ("atom", np.array(ts.symbols, dtype=str))
        coords["xyz"] = ("xyz", np.array(["x", "y", "z"]))
        if ts.masses is not None:
            data["masses"] = (("atom",), ts.masses)
    elif ts.coordinates is not None:
        data["coordinates"] = (("time", "trajectory", "dof"), tt(ts.coordinates))
        if ts.coordinate_momenta is not None:
            data["coordinate_momenta"] = (("time", "trajectory", "dof"), tt(ts.coordinate_momenta))
        coords["dof"] = ("dof", np.arange(ts.coordinates.shape[2]))
        if ts.masses is not None and ts.masses.size == ts.coordinates.shape[2]:
            data["masses"] = (("dof",), ts.masses)
    ens = populations(ts, bootstrap=False)
    data["population"] = (("time", "state"), ens.populations)
    data["population_low"] = (("time", "state"), ens.low)
    data["population_high"] = (("time", "state"), ens.high)
    data["n_counted"] = (("time",), ens.n_frames - ens.n_none)
    if not study.batched:
        data.update(_frame_diagnostics(study, ts))
    ds = xr.Dataset(data, coords=coords)
    for name in list(ds.data_vars) + list(ds.coords):
        if name in _UNITS:
            ds[name].attrs["units"] = _UNITS[name]
    ds["population"].attrs["long_name"] = ens.estimator
    ds["population_low"].attrs["long_name"] = ens.interval
    ds.attrs.update({"study": study.name, "method": ts.options.describe(), "format_version": EXPORT_FORMAT_VERSION,
                     "units_note": "Hartree atomic units unless a variable's units attribute says otherwise",
                     "n_warnings": len(ts.warnings)})
    return ds


_DIAGNOSTICS = ("min_overlap", "active_space_change", "active_overlap_min_singular", "overlap_retries",
                "response_residual", "response_converged")


def _frame_diagnostics(study, ts) -> dict:
    """Per-frame backend diagnostics (time, trajectory) from the frame files; NaN = not reported."""
    from mapdyn.study.checkpoint import TrajectoryStore

    T, n = ts.times.size, ts.ntraj
    out = {k: np.full((T, n), np.nan) for k in _DIAGNOSTICS}
    found = set()
    for j, i in enumerate(ts.indices):
        store = TrajectoryStore(study.trajectory_folder(int(i)))
        if not os.path.isdir(store.folder):
            continue
        fr = store.read_frames()
        if not fr:
            continue
        cols = np.searchsorted(np.round(ts.times, 6), np.round(fr["time_au"], 6))
        ok = cols < T
        for k in _DIAGNOSTICS:
            if k in fr:
                out[k][cols[ok], j] = fr[k][ok]
                found.add(k)
    return {k: (("time", "trajectory"), v) for k, v in out.items() if k in found}


def _xyz_frames(study, index: int, symbols, masses_me) -> list:
    """ase.Atoms of every recorded frame of on-the-fly trajectory ``index`` (empty if none)."""
    from ase import Atoms, units

    from mapdyn.study.checkpoint import TrajectoryStore
    from mapdyn.units import AMU_IN_ME

    store = TrajectoryStore(study.trajectory_folder(index))
    if not os.path.isdir(store.folder):
        return []
    fr = store.read_frames()
    if not fr or "positions_bohr" not in fr:
        return []
    p_ase = AMU_IN_ME * units.AUT / units.Bohr  # one ASE momentum unit in a.u.
    out = []
    for k in range(fr["step"].size):
        pos = fr["positions_bohr"][k]
        sym = list(symbols) if symbols is not None else ["X"] * pos.shape[0]
        a = Atoms(sym, positions=pos * BOHR_IN_ANGSTROM, pbc=False)
        if masses_me is not None and len(masses_me) == len(a):
            a.set_masses(np.asarray(masses_me) / AMU_IN_ME)
        a.set_momenta(fr["momenta_au"][k] / p_ase)
        a.info.update({
            "trajectory": int(index), "step": int(fr["step"][k]), "time_au": float(fr["time_au"][k]),
            "time_fs": float(fr["time_au"][k] * AU_TIME_IN_FS),
            "energies_eV": np.asarray(fr["energies_Eh"][k], dtype=float) * HARTREE_IN_EV,
            "total_energy_eV": float(fr["total_energy_Eh"][k] * HARTREE_IN_EV),
            "populations": np.asarray(fr["populations"][k], dtype=float),
            "actions": np.asarray(fr["actions"][k], dtype=float),
            "window": int(fr["window"][k]),
        })
        out.append(a)
    return out


def _write_h5(path: str, ds: Any) -> str:
    """``ds`` as plain HDF5: trajectory axis first, ``units`` on every dataset (atomic write)."""
    import h5py

    from mapdyn.files import atomic_write

    def write(tmp: str) -> None:
        with h5py.File(tmp, "w") as h5:
            h5.attrs["format_version"] = EXPORT_FORMAT_VERSION
            for k, v in ds.attrs.items():
                h5.attrs[k] = v
            for name in list(ds.coords) + list(ds.data_vars):
                var = ds[name]
                dims = list(var.dims)
                if "trajectory" in dims:
                    order = ["trajectory"] + [d for d in dims if d != "trajectory"]
                    var = var.transpose(*order)
                    dims = order
                arr = np.asarray(var.values)
                if arr.dtype.kind == "U":
                    arr = arr.astype(h5py.string_dtype())
                dset = h5.create_dataset(name, data=arr)
                dset.attrs["dimensions"] = ",".join(dims)
                dset.attrs["units"] = var.attrs.get("units", "1" if arr.dtype.kind == "f" else "")
                if "long_name" in var.attrs:
                    dset.attrs["long_name"] = var.attrs["long_name"]

    return atomic_write(path, write)


def export_study(run: Any, out: str | os.PathLike | None = None, *, xyz: bool = True) -> dict:
    """Write the open-format export of a study (see the module docstring) into ``out``
    (default ``RUN/export``); returns {"xyz": [paths], "frames_csv", "ensemble_csv", "h5"}."""
    from ase.io import write as ase_write

    from mapdyn.analysis.report import write_csv
    from mapdyn.files import atomic_write

    study = _study(run)
    out = os.fspath(out) if out is not None else study.path(EXPORT_FOLDER)
    os.makedirs(out, exist_ok=True)
    ds = load_results(study)
    written: dict = {"xyz": []}
    if xyz and not study.batched:
        symbols = [str(s) for s in ds["symbol"].values] if "symbol" in ds.coords else None
        masses = ds["masses"].values if ("masses" in ds and "atom" in ds["masses"].dims) else None
        if study.config.is_model:  # on-the-fly model trajectories move pseudo-atoms "H" of the model's masses
            from mapdyn.study.backend_factory import make_backend

            backend = make_backend(study.config)
            masses = np.asarray(backend.atom_masses())
            symbols = ["H"] * masses.size
        for i in ds["trajectory"].values:
            frames = _xyz_frames(study, int(i), symbols, masses)
            if not frames:
                continue
            path = os.path.join(out, f"{int(i):06d}.xyz")
            atomic_write(path, lambda tmp, fr=frames: ase_write(tmp, fr, format="extxyz"))
            written["xyz"].append(path)
    T, n, F = ds.sizes["time"], ds.sizes["trajectory"], ds.sizes["state"]
    has = np.isfinite(ds["actions"].values).all(axis=2)            # (T, n)
    tix, jix = np.nonzero(has)
    cols = ["trajectory", "status", "time_au", "time_fs", "window"]
    data: list = [ds["trajectory"].values[jix], ds["status"].values[jix], ds["time"].values[tix],
                  ds["time_fs"].values[tix], ds["window"].values[tix, jix]]
    if "total_energy" in ds:
        cols.append("total_energy_Eh")
        data.append(ds["total_energy"].values[tix, jix])
    for k in range(F):
        cols += [f"action_{k}", f"population_{k}"]
        data += [ds["actions"].values[tix, jix, k], ds["populations"].values[tix, jix, k]]
    written["frames_csv"] = write_csv(os.path.join(out, "frames.csv"), cols, data)
    cols = ["time_au", "time_fs", "n_counted"]
    data = [ds["time"].values, ds["time_fs"].values, ds["n_counted"].values]
    for k in range(F):
        cols += [f"P_{k}", f"low_{k}", f"high_{k}"]
        data += [ds["population"].values[:, k], ds["population_low"].values[:, k], ds["population_high"].values[:, k]]
    written["ensemble_csv"] = write_csv(os.path.join(out, "ensemble.csv"), cols, data)
    written["h5"] = _write_h5(os.path.join(out, "results.h5"), ds)
    del T, n
    return written
