"""Trajectory sets: one container for model, on-the-fly and study-folder results (atomic units)."""

from __future__ import annotations

import dataclasses
from typing import Any, Mapping, Sequence

import numpy as np

from mapdyn.core.options import MethodOptions
from mapdyn.core.windows import window_indicators
from mapdyn.units import AU_TIME_IN_FS

#: Trajectory status words used by the study folder and here.
STATUSES = ("finished", "running", "pending", "failed")


# ----------------------------------------------------------------------------------------------
# input type
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class TrajectorySet:
    """Recorded results of an ensemble on a common time grid (atomic units).

    times : (T,) a.u.
    actions : (n, T, F) mapping actions e_k = ½(x_k² + p_k²) in the *adiabatic* basis
        (dimensionless); NaN where a trajectory has no frame at that time (partial or failed runs).
    options : the :class:`MethodOptions` the ensemble ran with (decides the estimator).
    initial_states : (n,) adiabatic initial state of each trajectory.
    energies : (n, T) total (nuclear + mapping) energy, Eh, or None.
    positions : (n, T, N, 3) nuclear positions, Bohr (molecules), or None.
    momenta : (n, T, N, 3) nuclear momenta, a.u. (m_e·Bohr/a.u. time), or None.
    symbols : N chemical symbols (molecules), or None.
    masses : (N,) or (D,) nuclear masses in electron masses, or None.
    coordinates : (n, T, D) model nuclear coordinates, Bohr (model studies), or None.
    coordinate_momenta : (n, T, D) model momenta, a.u., or None.
    status : per trajectory one of ``finished``, ``running``, ``pending``, ``failed``.
    reasons : per trajectory a short text why it is flagged/failed ("" if nothing to say).
    indices : (n,) trajectory indices within the study.
    metadata : free-form description of the inputs (study name, method, dt, seed, …).
    warnings : warning records raised while the trajectories ran (dicts with index, category,
        message, first_step, last_step, count; see :mod:`mapdyn.study.diagnostics`).
    state_energies : (n, T, F) adiabatic potential energies, Eh, or None (NaN where no frame).
    coupling_norms : (n, T, F, F) |d_kl| of the nonadiabatic coupling vectors, 1/Bohr, or None
        (NaN where not recorded, e.g. overlap-only backends).
    """

    times: np.ndarray
    actions: np.ndarray
    options: MethodOptions
    initial_states: np.ndarray
    energies: np.ndarray | None = None
    positions: np.ndarray | None = None
    momenta: np.ndarray | None = None
    symbols: tuple[str, ...] | None = None
    masses: np.ndarray | None = None
    coordinates: np.ndarray | None = None
    coordinate_momenta: np.ndarray | None = None
    status: tuple[str, ...] | None = None
    reasons: tuple[str, ...] | None = None
    indices: np.ndarray | None = None
    metadata: dict = dataclasses.field(default_factory=dict)
    warnings: list = dataclasses.field(default_factory=list)
    state_energies: np.ndarray | None = None
    coupling_norms: np.ndarray | None = None

    def __post_init__(self):
        self.times = np.asarray(self.times, dtype=float)
        self.actions = np.asarray(self.actions, dtype=float)
        if self.times.ndim != 1:
            raise ValueError(f"times must have shape (T,), got {self.times.shape}")
        if self.actions.ndim != 3 or self.actions.shape[1] != self.times.shape[0]:
            raise ValueError(f"actions must have shape (n, T={self.times.shape[0]}, F), got {self.actions.shape}")
        n, T, F = self.actions.shape
        if not isinstance(self.options, MethodOptions):
            raise ValueError("options must be a mapdyn.core.options.MethodOptions")
        self.initial_states = np.asarray(self.initial_states, dtype=int).reshape(-1)
        if self.initial_states.shape != (n,) or np.any(self.initial_states < 0) or np.any(self.initial_states >= F):
            raise ValueError(f"initial_states must be ({n},) integers in 0..{F - 1}")
        for name, trailing in (("energies", ()), ("positions", None), ("momenta", None),
                               ("coordinates", None), ("coordinate_momenta", None)):
            arr = getattr(self, name)
            if arr is None:
                continue
            arr = np.asarray(arr, dtype=float)
            if arr.shape[:2] != (n, T) or (trailing == () and arr.ndim != 2):
                raise ValueError(f"{name} must have leading shape (n={n}, T={T}), got {arr.shape}")
            setattr(self, name, arr)
        for name, shape in (("state_energies", (n, T, F)), ("coupling_norms", (n, T, F, F))):
            arr = getattr(self, name)
            if arr is not None:
                arr = np.asarray(arr, dtype=float)
                if arr.shape != shape:
                    raise ValueError(f"{name} must have shape {shape}, got {arr.shape}")
                setattr(self, name, arr)
        for name in ("positions", "momenta"):
            arr = getattr(self, name)
            if arr is not None and (arr.ndim != 4 or arr.shape[3] != 3):
                raise ValueError(f"{name} must have shape (n, T, N, 3), got {arr.shape}")
        if self.positions is not None:
            if self.symbols is None or len(self.symbols) != self.positions.shape[2]:
                raise ValueError("symbols must name every atom of positions (N symbols)")
            self.symbols = tuple(str(s) for s in self.symbols)
        if self.masses is not None:
            self.masses = np.asarray(self.masses, dtype=float).reshape(-1)
        if self.status is None:
            self.status = ("finished",) * n
        self.status = tuple(str(s) for s in self.status)
        if len(self.status) != n or any(s not in STATUSES for s in self.status):
            raise ValueError(f"status must give one of {', '.join(STATUSES)} for each of the {n} trajectories")
        if self.reasons is None:
            self.reasons = ("",) * n
        self.reasons = tuple(str(s) for s in self.reasons)
        if len(self.reasons) != n:
            raise ValueError(f"reasons must have one entry per trajectory ({n})")
        self.indices = np.arange(n) if self.indices is None else np.asarray(self.indices, dtype=int).reshape(-1)
        if self.indices.shape != (n,):
            raise ValueError(f"indices must have shape ({n},)")

    @property
    def ntraj(self) -> int:
        return self.actions.shape[0]

    @property
    def nstates(self) -> int:
        return self.actions.shape[2]

    @property
    def times_fs(self) -> np.ndarray:
        """(T,) times in fs."""
        return self.times * AU_TIME_IN_FS

    @property
    def frame_mask(self) -> np.ndarray:
        """(n, T) bool: trajectory has a recorded frame at that time."""
        return np.all(np.isfinite(self.actions), axis=2)

    @property
    def last_frame(self) -> np.ndarray:
        """(n,) index of each trajectory's last recorded frame (−1 if it has none)."""
        mask = self.frame_mask
        T = mask.shape[1]
        last = T - 1 - np.argmax(mask[:, ::-1], axis=1)
        return np.where(mask.any(axis=1), last, -1)

    @property
    def is_molecular(self) -> bool:
        return self.positions is not None

    def status_counts(self) -> dict[str, int]:
        return {s: int(sum(1 for x in self.status if x == s)) for s in STATUSES}

    def outcomes(self) -> tuple[str, ...]:
        """Per trajectory: the channel it ended in (e.g. "S1/S0 region", read from its stop reason,
        see :func:`mapdyn.backends.contract.ended_channel`), else its status ("finished" = ran to
        the end time)."""
        from mapdyn.backends.contract import ended_channel

        return tuple(ended_channel(r) or s for s, r in zip(self.status, self.reasons))

    def select(self, rows: Sequence[int] | np.ndarray) -> "TrajectorySet":
        """The trajectories at positions ``rows`` (not study indices) as a new set; warnings kept
        only for those trajectories."""
        rows = np.asarray(rows, dtype=int).reshape(-1)
        keep = {int(i) for i in np.asarray(self.indices)[rows]}

        def take(arr):
            return None if arr is None else arr[rows]

        status = self.status or ()
        reasons = self.reasons or ()
        return dataclasses.replace(
            self, actions=self.actions[rows], initial_states=self.initial_states[rows], energies=take(self.energies),
            positions=take(self.positions), momenta=take(self.momenta), coordinates=take(self.coordinates),
            coordinate_momenta=take(self.coordinate_momenta), status=tuple(status[r] for r in rows),
            reasons=tuple(reasons[r] for r in rows), indices=np.asarray(self.indices)[rows],
            metadata=dict(self.metadata), warnings=[w for w in self.warnings if int(w.get("index", -1)) in keep],
            state_energies=take(self.state_energies), coupling_norms=take(self.coupling_norms))


def from_diabatic_run(run: Any, initial_states: Sequence[int] | int | None = None,
                      masses: np.ndarray | None = None, metadata: dict | None = None) -> TrajectorySet:
    """A :class:`TrajectorySet` from a :class:`mapdyn.core.propagators.DiabaticRun` (model ensembles).

    Takes the adiabatic actions (T, n, F) → (n, T, F), energies (T, n) → (n, T) Eh and, when
    recorded, R/P (T, n, D) → coordinates/coordinate_momenta (n, T, D).  ``initial_states``
    defaults to the window each trajectory occupies at the first frame (SQC) or the largest
    action (Ehrenfest).
    """
    e = np.transpose(np.asarray(run.actions_adiabatic, dtype=float), (1, 0, 2))
    options = run.options
    if initial_states is None:
        if options.method == "ehrenfest":
            initial_states = np.argmax(e[:, 0, :], axis=1)
        else:
            ind = window_indicators(e[:, 0, :], options)
            if not np.all(ind.any(axis=1)):
                raise ValueError("initial_states: some trajectories are in no window at t = 0; pass initial_states explicitly")
            initial_states = np.argmax(ind, axis=1)
    elif np.ndim(initial_states) == 0:
        initial_states = np.full(e.shape[0], int(initial_states))
    coords = None if run.R is None else np.transpose(np.asarray(run.R), (1, 0, 2))
    moms = None if run.P is None else np.transpose(np.asarray(run.P), (1, 0, 2))
    indices = getattr(run.final, "indices", None)
    meta = {"source": "DiabaticRun"}
    meta.update(metadata or {})
    return TrajectorySet(times=np.asarray(run.times, dtype=float), actions=e, options=options,
                         initial_states=np.asarray(initial_states), energies=np.asarray(run.energy).T,
                         coordinates=coords, coordinate_momenta=moms, masses=masses,
                         indices=indices, metadata=meta)


def frames_to_record(frames: Sequence[Mapping[str, Any]], **extra) -> dict:
    """One trajectory record for :func:`from_trajectories` from the frame dicts recorded by
    :class:`mapdyn.driver.dynamics.MappingDynamics` (keys time_au, actions, total_energy_Eh,
    positions_bohr, momenta_au).  ``extra`` adds status, reason, initial_state, index."""
    rec = {"time_au": np.array([f["time_au"] for f in frames], dtype=float),
           "actions": np.array([f["actions"] for f in frames], dtype=float)}
    for key in ("total_energy_Eh", "positions_bohr", "momenta_au"):
        if frames and key in frames[0] and frames[0][key] is not None:
            rec[key] = np.array([f[key] for f in frames], dtype=float)
    rec.update(extra)
    return rec


def from_trajectories(records: Sequence[Mapping[str, Any]], options: MethodOptions, *,
                      symbols: Sequence[str] | None = None, masses: np.ndarray | None = None,
                      metadata: dict | None = None, time_decimals: int = 6) -> TrajectorySet:
    """A :class:`TrajectorySet` from per-trajectory records of possibly different lengths.

    Each record: ``time_au`` (T_j,), ``actions`` (T_j, F) adiabatic, optional ``total_energy_Eh``
    (T_j,), ``positions_bohr``/``momenta_au`` (T_j, N, 3), ``status`` (default "finished"),
    ``reason``, ``initial_state`` (default: window at the first frame, or largest action), ``index``.
    Frames are placed on the union of all recorded times (rounded to ``time_decimals`` a.u.);
    missing frames are NaN.  Records without frames are kept (status/reason listed, no data).
    """
    if not records:
        raise ValueError("records must contain at least one trajectory")
    F = None
    for rec in records:
        a = np.asarray(rec.get("actions", np.zeros((0, 0))), dtype=float)
        if a.size:
            F = a.shape[1]
            break
    if F is None:
        raise ValueError("records: no trajectory has any recorded frame")
    all_t = np.concatenate([np.round(np.asarray(r.get("time_au", []), dtype=float), time_decimals) for r in records])
    times = np.unique(all_t)
    n, T = len(records), times.size
    e = np.full((n, T, F), np.nan)
    has_e = any("total_energy_Eh" in r for r in records)
    has_x = symbols is not None and any("positions_bohr" in r for r in records)
    E = np.full((n, T), np.nan) if has_e else None
    N = len(symbols) if symbols is not None else 0
    X = np.full((n, T, N, 3), np.nan) if has_x else None
    Pm = np.full((n, T, N, 3), np.nan) if has_x and any("momenta_au" in r for r in records) else None
    status, reasons, init, idx = [], [], [], []
    for j, rec in enumerate(records):
        t = np.round(np.asarray(rec.get("time_au", []), dtype=float), time_decimals)
        cols = np.searchsorted(times, t)
        a = np.asarray(rec.get("actions", np.zeros((0, F))), dtype=float).reshape(-1, F)
        if a.shape[0] != t.size:
            raise ValueError(f"record {j}: actions has {a.shape[0]} frames but time_au has {t.size}")
        e[j, cols] = a
        if E is not None and "total_energy_Eh" in rec:
            E[j, cols] = np.asarray(rec["total_energy_Eh"], dtype=float)
        if X is not None and "positions_bohr" in rec:
            X[j, cols] = np.asarray(rec["positions_bohr"], dtype=float).reshape(t.size, N, 3)
            if Pm is not None and "momenta_au" in rec:
                Pm[j, cols] = np.asarray(rec["momenta_au"], dtype=float).reshape(t.size, N, 3)
        status.append(str(rec.get("status", "finished")))
        reasons.append(str(rec.get("reason", "") or ""))
        idx.append(int(rec.get("index", j)))
        if rec.get("initial_state") is not None:
            init.append(int(rec["initial_state"]))
        elif a.shape[0] == 0:
            init.append(0)
        elif options.method == "ehrenfest":
            init.append(int(np.argmax(a[0])))
        else:
            w = window_indicators(a[:1], options)[0]
            if not w.any():
                raise ValueError(f"record {j}: first frame is in no window; give initial_state")
            init.append(int(np.argmax(w)))
    return TrajectorySet(times=times, actions=e, options=options, initial_states=np.array(init), energies=E,
                         positions=X, momenta=Pm, symbols=None if symbols is None else tuple(symbols),
                         masses=masses, status=tuple(status), reasons=tuple(reasons), indices=np.array(idx),
                         metadata=dict(metadata or {}))


