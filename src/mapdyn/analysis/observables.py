"""Geometric observables (distances, angles, dihedrals) along trajectories and at first window entry."""

from __future__ import annotations

import dataclasses
from typing import Any, Mapping

import numpy as np

from mapdyn.analysis.statistics import circular_stats_degrees, fold_degrees
from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.core.windows import window_indicators
from mapdyn.units import BOHR_IN_ANGSTROM

# ----------------------------------------------------------------------------------------------
# geometric observables
# ----------------------------------------------------------------------------------------------
_KIND_NATOMS = {"distance": 2, "angle": 3, "dihedral": 4}
_KIND_UNIT = {"distance": "Å", "angle": "deg", "dihedral": "deg"}


@dataclasses.dataclass(frozen=True)
class GeometricObservable:
    """A distance (Å), angle (deg, at the middle atom) or dihedral (deg, folded into (−180°, 180°]) between
    atom indices (0-based), computed with the vectorised functions behind ase.Atoms
    get_distance / get_angle / get_dihedral (``ase.geometry.get_angles``/``get_dihedrals``).
    """

    kind: str
    atoms: tuple[int, ...]
    name: str = ""

    def __post_init__(self):
        if self.kind not in _KIND_NATOMS:
            raise ValueError(f"observable kind={self.kind!r} is not allowed; choose distance, angle or dihedral")
        atoms = tuple(int(a) for a in self.atoms)
        if len(atoms) != _KIND_NATOMS[self.kind] or len(set(atoms)) != len(atoms) or min(atoms) < 0:
            raise ValueError(f"observable atoms={self.atoms!r} is not allowed; a {self.kind} needs "
                             f"{_KIND_NATOMS[self.kind]} distinct non-negative atom indices")
        object.__setattr__(self, "atoms", atoms)
        if not self.name:
            object.__setattr__(self, "name", f"{self.kind}({','.join(map(str, atoms))})")

    @property
    def unit(self) -> str:
        return _KIND_UNIT[self.kind]

    @property
    def circular(self) -> bool:
        """Dihedrals are periodic (360°): averaged with circular statistics."""
        return self.kind == "dihedral"

    @classmethod
    def from_spec(cls, spec: Any) -> "GeometricObservable":
        """From "distance 0 1", ("angle", 0, 1, 2) or {"kind": …, "atoms": […], "name": …}."""
        if isinstance(spec, GeometricObservable):
            return spec
        if isinstance(spec, str):
            parts = spec.split()
            return cls(parts[0], tuple(int(p) for p in parts[1:]))
        if isinstance(spec, Mapping):
            unknown = set(spec) - {"kind", "atoms", "name"}
            if unknown:
                raise ValueError(f"observable key {sorted(unknown)[0]!r} is not allowed; use kind, atoms, name")
            return cls(spec["kind"], tuple(spec["atoms"]), spec.get("name", ""))
        parts = list(spec)
        return cls(parts[0], tuple(parts[1:]))

    def values(self, positions_bohr: np.ndarray) -> np.ndarray:
        """Observable for positions (..., N, 3) in Bohr → (...) in Å or degrees."""
        from ase.geometry import get_angles, get_dihedrals

        pos = np.asarray(positions_bohr, dtype=float) * BOHR_IN_ANGSTROM
        if max(self.atoms) >= pos.shape[-2]:
            raise ValueError(f"observable {self.name}: atom index {max(self.atoms)} out of range for {pos.shape[-2]} atoms")
        lead = pos.shape[:-2]
        p = [pos[..., a, :].reshape(-1, 3) for a in self.atoms]
        out = np.full(p[0].shape[0], np.nan)
        ok = np.all(np.isfinite(np.concatenate(p, axis=1)), axis=1)
        if self.kind == "distance":
            out[ok] = np.linalg.norm(p[1][ok] - p[0][ok], axis=1)
        elif self.kind == "angle":
            if ok.any():
                out[ok] = get_angles(p[0][ok] - p[1][ok], p[2][ok] - p[1][ok])
        else:
            if ok.any():
                out[ok] = fold_degrees(get_dihedrals(p[1][ok] - p[0][ok], p[2][ok] - p[1][ok], p[3][ok] - p[2][ok]))
        return out.reshape(lead)


@dataclasses.dataclass
class ObservableSeries:
    """Ensemble statistics of one observable vs time.

    times (T,) a.u.; mean, std (sample standard deviation), q10, q90 : (T,) in ``unit``;
    n : (T,) trajectories contributing; values : (n_traj, T) per-trajectory values (NaN = no frame).
    circular : True for dihedrals — mean/std are the circular mean and circular standard deviation
    (:func:`mapdyn.analysis.statistics.circular_stats_degrees`), values folded into (−180°, 180°].
    """

    name: str
    unit: str
    times: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    q10: np.ndarray
    q90: np.ndarray
    n: np.ndarray
    values: np.ndarray
    circular: bool = False

    @property
    def statistic(self) -> str:
        return "circular mean ± circular std" if self.circular else "mean ± std"


def observable_series(tset: TrajectorySet, observable: GeometricObservable | Any) -> ObservableSeries:
    """Mean, spread (sample std) and 10/90 % quantiles of a geometric observable over trajectories."""
    obs = GeometricObservable.from_spec(observable)
    if tset.positions is None:
        raise ValueError(f"observable {obs.name}: this trajectory set has no atomic positions")
    vals = obs.values(tset.positions)
    vals = np.where(tset.frame_mask, vals, np.nan)
    n = np.isfinite(vals).sum(axis=0)
    if obs.circular:
        mean, std, q10, q90 = circular_stats_degrees(vals, axis=0)
        return ObservableSeries(obs.name, obs.unit, tset.times.copy(), mean, std, q10, q90, n.astype(int), vals, True)
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        mean = np.nanmean(vals, axis=0)
        std = np.where(n > 1, np.nanstd(vals, axis=0, ddof=1 if vals.shape[0] > 1 else 0), np.nan)
        q10 = np.nanquantile(vals, 0.1, axis=0)
        q90 = np.nanquantile(vals, 0.9, axis=0)
    return ObservableSeries(obs.name, obs.unit, tset.times.copy(), mean, std, q10, q90, n.astype(int), vals)


@dataclasses.dataclass
class FirstEntry:
    """Per trajectory: time (a.u., NaN if never) when it first enters ``state``'s window after
    being outside it, and the observable value there (``unit``; NaN if never / no observable)."""

    state: int
    name: str
    unit: str
    times: np.ndarray
    values: np.ndarray
    indices: np.ndarray
    criterion: str
    circular: bool = False


def _state_occupancy(tset: TrajectorySet, state: int) -> tuple[np.ndarray, str]:
    """(n, T) bool: trajectory counted in ``state`` (SQC window; Ehrenfest e_s/Σe ≥ ½)."""
    e = tset.actions
    mask = tset.frame_mask
    if tset.options.method == "ehrenfest":
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = e[..., state] / e.sum(axis=2)
        return mask & (frac >= 0.5), "Ehrenfest: first frame with e_s / Σe ≥ 1/2"
    n, T, F = e.shape
    flat = np.where(mask[..., None], e, 0.0).reshape(n * T, F)
    ind = window_indicators(flat, tset.options)[:, state].reshape(n, T)
    return mask & ind, f"SQC: first frame inside the {tset.options.window} window of state {state}"


def values_at_first_entry(tset: TrajectorySet, state: int, observable: GeometricObservable | Any | None = None
                          ) -> FirstEntry:
    """Time and (optionally) geometric observable when each trajectory first enters ``state``.

    "Enters" = first frame inside the state (see :func:`_state_occupancy`) preceded by a frame
    outside it, so trajectories that start in ``state`` are counted when they come back.
    """
    if isinstance(state, bool) or not isinstance(state, (int, np.integer)) or not 0 <= state < tset.nstates:
        raise ValueError(f"state={state!r} is not allowed; it must be an integer in 0..{tset.nstates - 1}")
    occ, criterion = _state_occupancy(tset, int(state))
    entered = occ[:, 1:] & ~occ[:, :-1] & tset.frame_mask[:, :-1]
    has = entered.any(axis=1)
    first = np.argmax(entered, axis=1) + 1
    times = np.where(has, tset.times[first], np.nan)
    name, unit, circular = f"entry into state {state}", "a.u.", False
    values = np.full(tset.ntraj, np.nan)
    if observable is not None:
        obs = GeometricObservable.from_spec(observable)
        if tset.positions is None:
            raise ValueError(f"observable {obs.name}: this trajectory set has no atomic positions")
        rows = np.nonzero(has)[0]
        values[rows] = obs.values(tset.positions[rows, first[rows]])
        name, unit, circular = obs.name, obs.unit, obs.circular
    return FirstEntry(int(state), name, unit, times, values, tset.indices.copy(), criterion, circular)


