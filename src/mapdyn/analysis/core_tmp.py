"""Ensemble estimators on in-memory trajectory results: populations with bootstrap bands,
lifetimes, geometric observables, product branching, energy conservation, flags.

Everything here works on a :class:`TrajectorySet` (atomic units inside: times in a.u., energies
in Eh, positions in Bohr).  User-facing geometric values are returned in Å and degrees (the
ASE convention, converted with ``ase.units``); times are additionally offered in fs.

Estimators (stated once, used everywhere):

* **SQC populations** (Cotton & Miller, J. Phys. Chem. A 117, 7190 (2013); windowed
  normalisation as in :func:`mapdyn.core.windows.window_populations`):
  P_f(t) = N_f(t) / Σ_f' N_f'(t), N_f = number of trajectories whose adiabatic actions lie in the
  window of state f at time t.  Trajectories in no window are counted separately (``n_none``).
* **Ehrenfest populations**: P_f(t) = Σ_j e_jf(t) / Σ_j Σ_k e_jk(t).
* Both are ratios of trajectory sums, so a time point averages over the trajectories that have a
  frame at that time (partial or failed trajectories contribute up to their last frame; the
  number contributing is reported as ``n_frames``).
* **Initial-state population**: the same ratio with numerator "trajectory j is in the window of
  its own initial state i_j" (Ehrenfest: e_{j,i_j}), so ensembles started in different states are
  handled.
* **Bootstrap bands**: ``scipy.stats.bootstrap`` resampling whole trajectories (the ratio is
  recomputed on each resample, so numerator and denominator stay paired), BCa intervals by default
  (percentile for more than 2000 trajectories, where the BCa jackknife gets expensive), level
  stated in every result.  Where every resample gives the same value (e.g. P = 1 at t = 0) the
  interval collapses to the point estimate.
* **Lifetimes** (:func:`fit_lifetimes`): weighted least squares (``scipy.optimize.curve_fit``) of the
  initial-state population with single/bi-exponentials with optional delay and asymptote;
  uncertainties from refitting trajectory-bootstrap replicas of the curve (the covariance of a
  fit to correlated points is ~3× too small in our synthetic checks); reported only under
  :data:`LIFETIME_RULE`.
* **Products** (:func:`classify_products`): a user classifier or distance/coordinate/final-state
  rules on the last frame; branching ratios over classified trajectories with bootstrap bounds.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from scipy import optimize, stats

from mapdyn.core.options import MethodOptions
from mapdyn.core.windows import window_indicators

__all__ = [
    "AU_TIME_FS",
    "TrajectorySet",
    "from_diabatic_run",
    "from_trajectories",
    "frames_to_record",
    "PopulationSeries",
    "populations",
    "initial_state_population",
    "resampled_initial_population",
    "bootstrap_ratio",
    "ExponentialFit",
    "LifetimeResult",
    "LIFETIME_RULE",
    "fit_lifetimes",
    "GeometricObservable",
    "ObservableSeries",
    "observable_series",
    "FirstEntry",
    "values_at_first_entry",
    "distance_rule_classifier",
    "ProductBranching",
    "classify_products",
    "EnergyReport",
    "energy_report",
    "TrajectoryFlag",
    "flagged_trajectories",
    "AnalysisResults",
    "analyze",
    "settings_from_table",
    "fragment_from_table",
    "load_study",
    "study_spectrum",
    "analyze_study",
]

#: Atomic unit of time in fs (ase.units._aut, CODATA).
AU_TIME_FS: float = 0.0
try:  # ase.units is the single source of unit constants
    from ase import units as _ase_units

    AU_TIME_FS = float(_ase_units._aut * 1e15)
    _BOHR_ANGSTROM = float(_ase_units.Bohr)
    _HARTREE_EV = float(_ase_units.Hartree)
except Exception as exc:  # pragma: no cover - ase is a hard dependency
    raise ImportError("mapdyn.analysis.core_tmp needs ase for unit constants") from exc

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
        return self.times * AU_TIME_FS

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


# ----------------------------------------------------------------------------------------------
# bootstrap of trajectory-sum ratios
# ----------------------------------------------------------------------------------------------
def _resample_weights(idx: np.ndarray, n: int) -> np.ndarray:
    """Multiplicity of each trajectory in each resample: idx (..., m) → weights (..., n)."""
    idx = np.asarray(idx).astype(np.int64)
    lead = idx.shape[:-1]
    flat = idx.reshape(-1, idx.shape[-1])
    rows = flat.shape[0]
    offs = (np.arange(rows, dtype=np.int64) * n)[:, None]
    w = np.bincount((flat + offs).ravel(), minlength=rows * n).reshape(rows, n)
    return w.reshape(lead + (n,)).astype(float)


def bootstrap_ratio(numerator: np.ndarray, denominator: np.ndarray, column_of: np.ndarray | None = None, *,
                    confidence_level: float = 0.95, n_resamples: int = 999, seed: int = 0,
                    method: str | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Ratio estimator R_k = Σ_j a_jk / Σ_j b_j,c(k) with trajectory-bootstrap confidence bounds.

    numerator (n, K), denominator (n, C); ``column_of`` (K,) maps each numerator column to its
    denominator column (default: identity, C = K).  Resamples whole trajectories j with
    ``scipy.stats.bootstrap`` (vectorised multi-output statistic).  Returns
    (estimate (K,), low (K,), high (K,), standard_error (K,)); NaN where the denominator is 0.
    ``method`` None = "BCa" for n ≤ 2000, else "percentile".
    """
    a = np.asarray(numerator, dtype=float)
    b = np.asarray(denominator, dtype=float)
    n, K = a.shape
    if column_of is None:
        column_of = np.arange(K)
    column_of = np.asarray(column_of, dtype=int)
    if not 0.0 < confidence_level < 1.0:
        raise ValueError(f"confidence_level={confidence_level!r} is not allowed; it must lie strictly between 0 and 1")
    if isinstance(n_resamples, bool) or int(n_resamples) < 10:
        raise ValueError(f"n_resamples={n_resamples!r} is not allowed; use at least 10")
    with np.errstate(invalid="ignore", divide="ignore"):
        est = a.sum(axis=0) / b.sum(axis=0)[column_of]
    if n < 2:
        nan = np.full(K, np.nan)
        return est, nan, nan.copy(), nan.copy()
    if method is None:
        method = "BCa" if n <= 2000 else "percentile"

    def statistic(idx, axis=-1):
        w = _resample_weights(idx, n)                # (..., n)
        num = w @ a                                  # (..., K)
        den = (w @ b)[..., column_of]
        with np.errstate(invalid="ignore", divide="ignore"):
            r = num / den
        return np.moveaxis(r, -1, 0)                 # (K, ...)

    # resamples per statistic call: the products W @ a are memory-bound, so take many resamples at
    # once (≈ 2.5e7 floats of work arrays)
    batch = max(1, min(int(n_resamples), int(2.5e7 // (n + K + b.shape[1]))))
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = stats.bootstrap((np.arange(n, dtype=float),), statistic, vectorized=True, paired=False,
                              n_resamples=int(n_resamples), confidence_level=confidence_level,
                              method=method, rng=np.random.default_rng(seed), batch=batch)
    low = np.array(res.confidence_interval.low, dtype=float).reshape(K)
    high = np.array(res.confidence_interval.high, dtype=float).reshape(K)
    dist = np.asarray(res.bootstrap_distribution).reshape(K, -1)
    with np.errstate(invalid="ignore"):
        se = np.nanstd(dist, axis=1, ddof=1) if dist.shape[1] > 1 else np.full(K, np.nan)
        spread = np.nanmax(dist, axis=1) - np.nanmin(dist, axis=1)
    degenerate = np.isfinite(est) & (spread == 0)
    low[degenerate] = est[degenerate]
    high[degenerate] = est[degenerate]
    # BCa can fail (NaN) for nearly degenerate columns: fall back to percentile bounds there
    bad = np.isfinite(est) & ~(np.isfinite(low) & np.isfinite(high))
    if np.any(bad):
        alpha = (1.0 - confidence_level) / 2.0
        low[bad] = np.nanquantile(dist[bad], alpha, axis=1)
        high[bad] = np.nanquantile(dist[bad], 1.0 - alpha, axis=1)
    return est, low, high, se


# ----------------------------------------------------------------------------------------------
# populations
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class PopulationSeries:
    """Populations vs time with bootstrap bounds.

    times : (T,) a.u.; populations, low, high, standard_error : (T, K) dimensionless (K = F states
    or 1 for the initial-state population); n_none : (T,) trajectories in no window (0 for
    Ehrenfest); n_frames : (T,) trajectories contributing; labels : K column names;
    confidence_level : e.g. 0.95; estimator : one-line description; bootstrap_method : "BCa"/…
    """

    times: np.ndarray
    populations: np.ndarray
    low: np.ndarray
    high: np.ndarray
    standard_error: np.ndarray
    n_none: np.ndarray
    n_frames: np.ndarray
    labels: tuple[str, ...]
    confidence_level: float
    estimator: str
    bootstrap_method: str
    n_resamples: int

    @property
    def times_fs(self) -> np.ndarray:
        return self.times * AU_TIME_FS


def _state_weights(tset: TrajectorySet) -> tuple[np.ndarray, np.ndarray, str]:
    """Per-trajectory numerators (n, T, F) and denominators (n, T) of the population ratio."""
    e = tset.actions
    mask = tset.frame_mask
    n, T, F = e.shape
    if tset.options.method == "ehrenfest":
        num = np.where(mask[..., None], e, 0.0)
        den = num.sum(axis=2)
        return num, den, "Ehrenfest: P_f = Σ_j e_jf / Σ_j Σ_k e_jk over trajectories with a frame"
    flat = np.where(mask[..., None], e, 0.0).reshape(n * T, F)
    ind = window_indicators(flat, tset.options).reshape(n, T, F) & mask[..., None]
    num = ind.astype(float)
    den = num.sum(axis=2)
    g = tset.options.window_gamma
    return num, den, (f"SQC {tset.options.window} windows (γ = {g:.6g}), windowed normalisation "
                      "P_f = N_f / Σ_f' N_f'; trajectories in no window counted separately")


def _series(tset: TrajectorySet, num: np.ndarray, den: np.ndarray, labels, estimator: str, *,
            confidence_level: float, n_resamples: int, seed: int, method: str | None,
            bootstrap: bool) -> PopulationSeries:
    n, T, K = num.shape
    mask = tset.frame_mask
    a = num.reshape(n, T * K)
    column_of = np.repeat(np.arange(T), K)
    if method is None:
        method = "BCa" if n <= 2000 else "percentile"
    if bootstrap:
        est, low, high, se = bootstrap_ratio(a, den, column_of, confidence_level=confidence_level,
                                             n_resamples=n_resamples, seed=seed, method=method)
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            est = a.sum(axis=0) / den.sum(axis=0)[column_of]
        low = high = se = np.full(T * K, np.nan)
    n_frames = mask.sum(axis=0)
    if tset.options.method == "ehrenfest":
        n_none = np.zeros(T, dtype=int)
    else:
        n_none = (n_frames - (den > 0).sum(axis=0)).astype(int)
    shape = (T, K)
    return PopulationSeries(tset.times.copy(), est.reshape(shape), np.asarray(low).reshape(shape),
                            np.asarray(high).reshape(shape), np.asarray(se).reshape(shape), n_none,
                            n_frames.astype(int), tuple(labels), float(confidence_level), estimator,
                            method if bootstrap else "none", int(n_resamples) if bootstrap else 0)


def populations(tset: TrajectorySet, *, confidence_level: float = 0.95, n_resamples: int = 999,
                seed: int = 0, method: str | None = None, bootstrap: bool = True) -> PopulationSeries:
    """Adiabatic state populations vs time with trajectory-bootstrap bands (see module docstring).

    Columns are S0, S1, … for molecules and "state 0", "state 1", … for models.
    """
    num, den, est = _state_weights(tset)
    labels = [(f"S{k}" if tset.is_molecular else f"state {k}") for k in range(tset.nstates)]
    return _series(tset, num, den, labels, est, confidence_level=confidence_level,
                   n_resamples=n_resamples, seed=seed, method=method, bootstrap=bootstrap)


def initial_state_population(tset: TrajectorySet, *, confidence_level: float = 0.95, n_resamples: int = 999,
                             seed: int = 0, method: str | None = None, bootstrap: bool = True) -> PopulationSeries:
    """Population of each trajectory's own initial state vs time (one column), with bootstrap bands."""
    num, den, est = _state_weights(tset)
    n = tset.ntraj
    own = num[np.arange(n), :, tset.initial_states][..., None]     # (n, T, 1)
    return _series(tset, own, den, ("initial state",), est + "; numerator = own initial state",
                   confidence_level=confidence_level, n_resamples=n_resamples, seed=seed, method=method,
                   bootstrap=bootstrap)


def resampled_initial_population(tset: TrajectorySet, n_resamples: int = 100, seed: int = 0) -> np.ndarray:
    """(B, T) initial-state population curves of B trajectory-bootstrap resamples (whole trajectories
    drawn with replacement, same estimator as :func:`initial_state_population`)."""
    num, den, _ = _state_weights(tset)
    n = tset.ntraj
    own = num[np.arange(n), :, tset.initial_states]
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 7]))
    idx = rng.integers(0, n, size=(int(n_resamples), n))
    w = _resample_weights(idx, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (w @ own) / (w @ den)


# ----------------------------------------------------------------------------------------------
# lifetimes
# ----------------------------------------------------------------------------------------------
#: Minimum fraction of time points at which an adequate fit lies inside the population's band.
MIN_INSIDE_BAND = 0.9

LIFETIME_RULE = (
    "A lifetime is reported only if (1) the initial-state population fell by at least "
    "max(0.05, 3 standard errors) between the first and the last time point; (2) the weighted "
    "least-squares fit converged with a finite covariance; (3) every time constant has relative "
    "uncertainty ≤ 50 % and lies below 3× the fitted time window; for the bi-exponential also "
    "(4) both amplitudes lie in [0.05, 0.95] and τ2/τ1 ≥ 2; when a confidence band is available, (5) the "
    "fitted curve lies inside the band (widened by σ/4) at ≥ 90 % of the time points.  The bi-exponential is preferred only "
    "if its AIC is lower than the single exponential's by more than 2."
)


@dataclasses.dataclass
class ExponentialFit:
    """Result of one exponential fit of the initial-state population.

    model : "mono" — P(t) = P∞ + (P0 − P∞) exp(−t'/τ);
            "bi"   — P(t) = P∞ + (P0 − P∞) [a exp(−t'/τ1) + (1 − a) exp(−t'/τ2)];
            t' = max(t − t_first − t_d, 0) (t_d = delay after the first time point, 0 without delay),
            P0 = P(t_first) fixed.
    parameters / uncertainties : name → value, 1σ (trajectory bootstrap of the fit when replicas are
        given, else the covariance; see ``diagnostics["uncertainty_method"]``), times in a.u.
    covariance : parameter covariance (order of ``names``); curve : (T,) fitted population.
    diagnostics : chi2, dof, reduced_chi2, r2, rms_residual, aic, converged, message.
    supported : whether the data support this fit's time constants (see :data:`LIFETIME_RULE`);
    reasons : why not.
    """

    model: str
    names: tuple[str, ...]
    parameters: dict
    uncertainties: dict
    covariance: np.ndarray
    curve: np.ndarray
    diagnostics: dict
    supported: bool
    reasons: list


@dataclasses.dataclass
class LifetimeResult:
    """Lifetime analysis of an initial-state population (times in a.u.; ``*_fs`` helpers in fs).

    fits : model name → :class:`ExponentialFit`; preferred : "mono", "bi" or None (no lifetime
    supported); lifetime / lifetime_uncertainty : τ (mono) or the amplitude-weighted mean
    a τ1 + (1 − a) τ2 (bi) in a.u., None if unsupported; rule : :data:`LIFETIME_RULE`.
    """

    times: np.ndarray
    population: np.ndarray
    sigma: np.ndarray
    fits: dict
    preferred: str | None
    lifetime: float | None
    lifetime_uncertainty: float | None
    rule: str
    reasons: list

    def lifetime_fs(self) -> tuple[float, float] | None:
        if self.lifetime is None:
            return None
        return self.lifetime * AU_TIME_FS, self.lifetime_uncertainty * AU_TIME_FS


def _mono(t, P0, tau, td, Pinf):
    tp = np.maximum(t - td, 0.0)
    return Pinf + (P0 - Pinf) * np.exp(-tp / tau)


def _bi(t, P0, tau1, tau2, a, td, Pinf):
    tp = np.maximum(t - td, 0.0)
    return Pinf + (P0 - Pinf) * (a * np.exp(-tp / tau1) + (1.0 - a) * np.exp(-tp / tau2))


def _fit_one(model: str, t: np.ndarray, y: np.ndarray, s: np.ndarray, P0: float, delay: bool,
             asymptote: bool, resampled: np.ndarray | None = None) -> ExponentialFit:
    span = float(t[-1] - t[0])
    drop = P0 - y[-1]
    # 1/e time of the observed decay as a starting guess
    target = P0 - (1.0 - math.exp(-1.0)) * max(drop, 1e-12)
    below = np.nonzero(y <= target)[0]
    tau0 = float(t[below[0]] - t[0]) if below.size and t[below[0]] > t[0] else span / 2.0
    tau0 = max(tau0, span * 1e-3)
    if model == "mono":
        names = ["tau"] + (["delay"] if delay else []) + (["P_inf"] if asymptote else [])
        starts = [[tau0] + ([d] if delay else []) + ([max(0.0, min(1.0, y[-1] * 0.5))] if asymptote else [])
                  for d in ((0.0, 0.1 * span, 0.3 * span) if delay else (0.0,))]
        lo = [span * 1e-4] + ([0.0] if delay else []) + ([0.0] if asymptote else [])
        hi = [span * 1e3] + ([span * 0.95] if delay else []) + ([1.0] if asymptote else [])

        def f(tt, *q):
            it = iter(q)
            tau = next(it)
            td = next(it) if delay else 0.0
            pinf = next(it) if asymptote else 0.0
            return _mono(tt, P0, tau, td + t[0], pinf)
    else:
        names = ["tau1", "tau2", "a"] + (["delay"] if delay else []) + (["P_inf"] if asymptote else [])
        starts = [[tau0 / 3.0, tau0 * 3.0, 0.5] + ([d] if delay else []) + ([max(0.0, min(1.0, y[-1] * 0.5))] if asymptote else [])
                  for d in ((0.0, 0.1 * span) if delay else (0.0,))]
        lo = [span * 1e-4, span * 1e-4, 0.0] + ([0.0] if delay else []) + ([0.0] if asymptote else [])
        hi = [span * 1e3, span * 1e3, 1.0] + ([span * 0.95] if delay else []) + ([1.0] if asymptote else [])

        def f(tt, *q):
            it = iter(q)
            tau1, tau2, a = next(it), next(it), next(it)
            td = next(it) if delay else 0.0
            pinf = next(it) if asymptote else 0.0
            return _bi(tt, P0, tau1, tau2, a, td + t[0], pinf)

    best = None
    message = "no start converged"
    for p0 in starts:
        p0 = np.clip(np.array(p0, dtype=float), np.array(lo) + 1e-12, np.array(hi) - 1e-12)
        try:
            popt, pcov = optimize.curve_fit(f, t, y, p0=p0, sigma=s, absolute_sigma=True,
                                            bounds=(lo, hi), method="trf", maxfev=20000)
        except (RuntimeError, ValueError, optimize.OptimizeWarning) as exc:
            message = str(exc).splitlines()[0]
            continue
        chi2 = float(np.sum(((f(t, *popt) - y) / s) ** 2))
        if best is None or chi2 < best[2]:
            best = (popt, pcov, chi2)
    k = len(names)
    if best is None:
        nan = {nm: float("nan") for nm in names}
        return ExponentialFit(model, tuple(names), nan, dict(nan), np.full((k, k), np.nan), np.full_like(y, np.nan),
                              {"converged": False, "message": message}, False, [f"fit failed: {message}"])
    popt, pcov, chi2 = best
    if model == "bi" and popt[0] > popt[1]:   # order τ1 < τ2 (swap amplitude too)
        perm = list(range(k))
        perm[0], perm[1] = 1, 0
        popt = popt[perm]
        popt[2] = 1.0 - popt[2]
        pcov = pcov[np.ix_(perm, perm)]
        J = np.eye(k)
        J[2, 2] = -1.0
        pcov = J @ pcov @ J.T
    curve = f(t, *popt)
    err = np.sqrt(np.clip(np.diag(pcov), 0.0, None)) if np.all(np.isfinite(pcov)) else np.full(k, np.nan)
    cov_err = err.copy()
    samples = None
    if resampled is not None and len(resampled) >= 2:
        # trajectory bootstrap of the fit: refit every resampled population curve from the best fit
        out = []
        for yb in resampled:
            P0b = float(yb[0])

            def fb(tt, *q, P0b=P0b):
                it = iter(q)
                if model == "mono":
                    tau = next(it)
                    td = next(it) if delay else 0.0
                    pinf = next(it) if asymptote else 0.0
                    return _mono(tt, P0b, tau, td + t[0], pinf)
                tau1, tau2, a = next(it), next(it), next(it)
                td = next(it) if delay else 0.0
                pinf = next(it) if asymptote else 0.0
                return _bi(tt, P0b, tau1, tau2, a, td + t[0], pinf)
            try:
                pb, _ = optimize.curve_fit(fb, t, yb, p0=np.clip(popt, np.array(lo) + 1e-12, np.array(hi) - 1e-12),
                                           sigma=s, absolute_sigma=True, bounds=(lo, hi), method="trf", maxfev=5000)
            except (RuntimeError, ValueError):
                continue
            if model == "bi" and pb[0] > pb[1]:
                pb[0], pb[1] = pb[1], pb[0]
                pb[2] = 1.0 - pb[2]
            out.append(pb)
        if len(out) >= 2:
            samples = np.array(out)
            err = samples.std(axis=0, ddof=1)
    dof = max(len(t) - k, 1)
    ss_res = float(np.sum((curve - y) ** 2))
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    diag = {"converged": True, "message": "ok", "chi2": chi2, "dof": dof, "reduced_chi2": chi2 / dof,
            "r2": 1.0 - ss_res / ss_tot if ss_tot > 0 else float("nan"),
            "rms_residual": math.sqrt(ss_res / len(t)), "aic": chi2 + 2.0 * k, "npoints": int(len(t)),
            "uncertainty_method": (f"trajectory bootstrap ({len(samples)} refits)" if samples is not None
                                   else "covariance (independent points)"),
            "covariance_uncertainties": {nm: float(v) for nm, v in zip(names, cov_err)},
            "bootstrap_samples": samples}
    params = {nm: float(v) for nm, v in zip(names, popt)}
    uncs = {nm: float(v) for nm, v in zip(names, err)}
    reasons = []
    if not np.all(np.isfinite(pcov)):
        reasons.append("covariance not finite (parameters not determined by the data)")
    taus = ["tau"] if model == "mono" else ["tau1", "tau2"]
    for nm in taus:
        v, e = params[nm], uncs[nm]
        if not (np.isfinite(e) and e <= 0.5 * v):
            reasons.append(f"{nm} relative uncertainty {e / v:.2g} > 0.5")
        if v > 3.0 * span:
            reasons.append(f"{nm} = {v:.4g} a.u. exceeds 3× the fitted window ({span:.4g} a.u.)")
    if model == "bi":
        if not 0.05 <= params["a"] <= 0.95:
            reasons.append(f"amplitude a = {params['a']:.3g} outside [0.05, 0.95]")
        if params["tau2"] < 2.0 * params["tau1"]:
            reasons.append("tau2/tau1 < 2 (time constants not distinguishable)")
    return ExponentialFit(model, tuple(names), params, uncs, pcov, curve, diag, not reasons, reasons)


def fit_lifetimes(times: np.ndarray, population: np.ndarray, standard_error: np.ndarray | None = None, *,
                  delay: bool = True, asymptote: bool = True, models: Sequence[str] = ("mono", "bi"),
                  sigma_floor: float | None = None, t_max: float | None = None,
                  resampled_populations: np.ndarray | None = None,
                  band: tuple[np.ndarray, np.ndarray] | None = None) -> LifetimeResult:
    """Fit the initial-state population with single/bi-exponentials (scipy.optimize.curve_fit).

    times (T,) a.u.; population (T,); standard_error (T,) 1σ per point (e.g. the bootstrap SE),
    floored at ``sigma_floor`` (default 0.01) so points with zero spread (t = 0) do not get infinite
    weight; None = unweighted (σ = sigma_floor).  P0 is fixed to the first population value;
    ``delay`` adds a free onset t_d ≥ 0, ``asymptote`` a free P∞ ∈ [0, 1] (otherwise P∞ = 0).
    ``t_max`` restricts the fit to t ≤ t_max (a.u.).  Parameter uncertainties are
    √diag(covariance) with absolute σ, or — when ``resampled_populations`` (B, T) trajectory-bootstrap
    replicas of the curve are given — the standard deviation of the B refitted parameters, which
    accounts for the correlation between time points (successive points share trajectories, so the
    covariance estimate is too small).  Whether a lifetime is reported follows :data:`LIFETIME_RULE`.
    """
    t = np.asarray(times, dtype=float)
    y = np.asarray(population, dtype=float)
    for m in models:
        if m not in ("mono", "bi"):
            raise ValueError(f"models={tuple(models)!r} is not allowed; use 'mono' and/or 'bi'")
    floor = 0.01 if sigma_floor is None else float(sigma_floor)
    if not floor > 0:
        raise ValueError(f"sigma_floor={sigma_floor!r} is not allowed; it must be positive")
    s = np.full_like(y, floor) if standard_error is None else np.asarray(standard_error, dtype=float)
    s = np.where(np.isfinite(s), np.maximum(s, floor), floor)
    keep = np.isfinite(y) & np.isfinite(t)
    if t_max is not None:
        keep &= t <= float(t_max)
    t, y, s = t[keep], y[keep], s[keep]
    if band is not None:
        b_lo = np.asarray(band[0], dtype=float)[keep]
        b_hi = np.asarray(band[1], dtype=float)[keep]
    rs = None
    if resampled_populations is not None:
        rs = np.asarray(resampled_populations, dtype=float)
        if rs.ndim != 2 or rs.shape[1] != keep.size:
            raise ValueError(f"resampled_populations must have shape (B, {keep.size}), got {rs.shape}")
        rs = rs[:, keep]
        rs = rs[np.all(np.isfinite(rs), axis=1)]
    reasons: list = []
    fits: dict = {}
    if t.size < 5:
        return LifetimeResult(t, y, s, fits, None, None, None, LIFETIME_RULE,
                              [f"only {t.size} usable time points (need ≥ 5)"])
    P0 = float(y[0])
    drop = P0 - float(y[-1])
    needed = max(0.05, 3.0 * float(s[-1]))
    if drop < needed:
        reasons.append(f"population fell by {drop:.3g} < {needed:.3g} (no measurable decay in the window)")
    for m in models:
        fit = _fit_one(m, t, y, s, P0, delay, asymptote, rs)
        if band is not None and fit.diagnostics.get("converged"):
            # adequacy: the fitted curve must run inside the pointwise confidence band (small slack
            # of 1e-9 for points where the band collapses onto the estimate)
            inside = (fit.curve >= b_lo - 1e-9 - 0.25 * s) & (fit.curve <= b_hi + 1e-9 + 0.25 * s)
            frac = float(np.mean(inside[np.isfinite(b_lo) & np.isfinite(b_hi)]))
            fit.diagnostics["inside_band_fraction"] = frac
            if frac < MIN_INSIDE_BAND:
                fit.reasons.append(f"fit runs outside the confidence band at {100 * (1 - frac):.0f} % of the points "
                                   f"(> {100 * (1 - MIN_INSIDE_BAND):.0f} %: model does not describe the curve)")
                fit.supported = False
        fits[m] = fit
    preferred = None
    if not reasons:
        mono, bi = fits.get("mono"), fits.get("bi")
        if mono is not None and mono.supported:
            preferred = "mono"
        if bi is not None and bi.supported and (
                preferred is None or bi.diagnostics["aic"] < mono.diagnostics["aic"] - 2.0):
            preferred = "bi"
        if preferred is None:
            for m, fit in fits.items():
                reasons.extend(f"{m}: {r}" for r in fit.reasons)
    lifetime = unc = None
    if preferred == "mono":
        lifetime, unc = fits["mono"].parameters["tau"], fits["mono"].uncertainties["tau"]
    elif preferred == "bi":
        fit = fits["bi"]
        a, t1, t2 = (fit.parameters[k] for k in ("a", "tau1", "tau2"))
        lifetime = a * t1 + (1 - a) * t2
        grad = np.zeros(len(fit.names))
        grad[fit.names.index("tau1")] = a
        grad[fit.names.index("tau2")] = 1 - a
        grad[fit.names.index("a")] = t1 - t2
        samples = fit.diagnostics.get("bootstrap_samples")
        if samples is not None:
            ia, i1, i2 = (fit.names.index(k) for k in ("a", "tau1", "tau2"))
            mean_tau = samples[:, ia] * samples[:, i1] + (1 - samples[:, ia]) * samples[:, i2]
            unc = float(np.std(mean_tau, ddof=1))
        else:
            unc = float(math.sqrt(max(grad @ fit.covariance @ grad, 0.0)))
    return LifetimeResult(t, y, s, fits, preferred, lifetime, unc, LIFETIME_RULE, reasons)


# ----------------------------------------------------------------------------------------------
# geometric observables
# ----------------------------------------------------------------------------------------------
_KIND_NATOMS = {"distance": 2, "angle": 3, "dihedral": 4}
_KIND_UNIT = {"distance": "Å", "angle": "deg", "dihedral": "deg"}


@dataclasses.dataclass(frozen=True)
class GeometricObservable:
    """A distance (Å), angle (deg, at the middle atom) or dihedral (deg, 0–360 as in ASE) between
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

        pos = np.asarray(positions_bohr, dtype=float) * _BOHR_ANGSTROM
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
                out[ok] = get_dihedrals(p[1][ok] - p[0][ok], p[2][ok] - p[1][ok], p[3][ok] - p[2][ok])
        return out.reshape(lead)


@dataclasses.dataclass
class ObservableSeries:
    """Ensemble statistics of one observable vs time.

    times (T,) a.u.; mean, std (sample standard deviation), q10, q90 : (T,) in ``unit``;
    n : (T,) trajectories contributing; values : (n_traj, T) per-trajectory values (NaN = no frame).
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


def observable_series(tset: TrajectorySet, observable: GeometricObservable | Any) -> ObservableSeries:
    """Mean, spread (sample std) and 10/90 % quantiles of a geometric observable over trajectories."""
    obs = GeometricObservable.from_spec(observable)
    if tset.positions is None:
        raise ValueError(f"observable {obs.name}: this trajectory set has no atomic positions")
    vals = obs.values(tset.positions)
    vals = np.where(tset.frame_mask, vals, np.nan)
    n = np.isfinite(vals).sum(axis=0)
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
    name, unit = f"entry into state {state}", "a.u."
    values = np.full(tset.ntraj, np.nan)
    if observable is not None:
        obs = GeometricObservable.from_spec(observable)
        if tset.positions is None:
            raise ValueError(f"observable {obs.name}: this trajectory set has no atomic positions")
        rows = np.nonzero(has)[0]
        values[rows] = obs.values(tset.positions[rows, first[rows]])
        name, unit = obs.name, obs.unit
    return FirstEntry(int(state), name, unit, times, values, tset.indices.copy(), criterion)


# ----------------------------------------------------------------------------------------------
# products
# ----------------------------------------------------------------------------------------------
def distance_rule_classifier(rules: Mapping[str, Sequence[Mapping[str, Any]]], default: str = "other"
                             ) -> Callable[[Any], str]:
    """Classifier from rules: ``{"label": [{"distance": [i, j], "above": 2.5}, …], …}``.

    A geometry gets the first label (in the given order) whose conditions all hold; each condition
    names a distance between two atoms (molecules, Å) or a model coordinate index (models,
    ``{"coordinate": 0, "above": 0.0}``, Bohr) and ``above`` and/or ``below`` thresholds
    (strict), or the final electronic state ``{"state": k}`` (SQC window at the last frame;
    Ehrenfest: largest action).  Otherwise ``default``.
    """
    parsed = []
    for label, conds in rules.items():
        if isinstance(conds, Mapping):
            conds = [conds]
        checks = []
        for c in conds:
            if set(c) == {"state"}:
                checks.append(("state", int(c["state"]), None, None))
                continue
            what = {"distance", "coordinate"} & set(c)
            unknown = set(c) - {"distance", "coordinate", "above", "below"}
            if unknown or len(what) != 1 or not ({"above", "below"} & set(c)):
                raise ValueError(f"product rule {label!r}: each condition needs 'distance' = [i, j] (Å, molecules) or "
                                 f"'coordinate' = k (Bohr, models) and 'above' and/or 'below' (got keys {sorted(c)})")
            lo, hi = float(c.get("above", -np.inf)), float(c.get("below", np.inf))
            if "distance" in c:
                i, j = (int(a) for a in c["distance"])
                checks.append(("distance", (i, j), lo, hi))
            else:
                checks.append(("coordinate", int(c["coordinate"]), lo, hi))
        parsed.append((str(label), checks))

    def value(geometry, kind, where):
        if kind == "distance":
            if not hasattr(geometry, "get_distance"):
                raise ValueError("product rule: 'distance' conditions need molecular geometries; use 'coordinate' for models")
            return geometry.get_distance(*where)
        if hasattr(geometry, "get_distance"):
            raise ValueError("product rule: 'coordinate' conditions are for model studies; use 'distance' for molecules")
        return float(np.asarray(geometry)[where])

    def holds(geometry, state, kind, where, lo, hi) -> bool:
        if kind == "state":
            return state is not None and int(state) == where
        return lo < value(geometry, kind, where) < hi

    def classify(geometry, state: int | None = None) -> str:
        for label, checks in parsed:
            if all(holds(geometry, state, *chk) for chk in checks):
                return label
        return default

    classify.uses_state = True  # type: ignore[attr-defined]

    classify.rules = dict(rules)  # type: ignore[attr-defined]
    return classify


@dataclasses.dataclass
class ProductBranching:
    """Branching ratios over classified final geometries with bootstrap bounds.

    labels : product names; counts (L,); ratios, low, high, standard_error : (L,) fractions of the
    classified trajectories; per_trajectory : label per trajectory ("" = not classified);
    excluded : trajectory indices not classified and why.
    """

    labels: tuple[str, ...]
    counts: np.ndarray
    ratios: np.ndarray
    low: np.ndarray
    high: np.ndarray
    standard_error: np.ndarray
    per_trajectory: tuple[str, ...]
    n_classified: int
    confidence_level: float
    excluded: list


def classify_products(tset: TrajectorySet, classifier: Callable[[Any], str] | Mapping, *,
                      include_failed: bool = False, include_unfinished: bool = False,
                      confidence_level: float = 0.95, n_resamples: int = 999, seed: int = 0) -> ProductBranching:
    """Classify each trajectory's last frame and estimate branching ratios.

    Molecules: ``classifier(atoms: ase.Atoms) -> label`` on the last geometry (Å, ASE units).
    Models: ``classifier(coordinates (D,) Bohr) -> label``.  A classifier with attribute
    ``uses_state = True`` is called with the final state as second argument (−1 = no window).  A mapping is turned into
    :func:`distance_rule_classifier`.  By default only finished trajectories are classified.
    Ratios are fractions of classified trajectories; bounds from ``scipy.stats.bootstrap``.
    """
    if isinstance(classifier, Mapping):
        classifier = distance_rule_classifier(classifier)
    if not callable(classifier):
        raise ValueError("classifier must be a callable or a mapping of distance rules")
    last = tset.last_frame
    uses_state = bool(getattr(classifier, "uses_state", False))
    final_state = np.full(tset.ntraj, -1)
    rows_ok = np.nonzero(last >= 0)[0]
    if rows_ok.size:
        e_last = tset.actions[rows_ok, last[rows_ok]]
        if tset.options.method == "ehrenfest":
            final_state[rows_ok] = np.argmax(e_last, axis=1)
        else:
            from mapdyn.core.windows import window_assignment
            final_state[rows_ok] = window_assignment(e_last, tset.options)
    labels_per: list[str] = []
    excluded = []
    for j in range(tset.ntraj):
        st = tset.status[j]
        if last[j] < 0 or (st == "failed" and not include_failed) or (
                st in ("running", "pending") and not include_unfinished):
            labels_per.append("")
            excluded.append((int(tset.indices[j]), st if last[j] >= 0 else "no frames"))
            continue
        if tset.positions is not None:
            from ase import Atoms
            atoms = Atoms(symbols=list(tset.symbols), positions=tset.positions[j, last[j]] * _BOHR_ANGSTROM)
            lab = classifier(atoms, final_state[j]) if uses_state else classifier(atoms)
        elif tset.coordinates is not None:
            coords = tset.coordinates[j, last[j]].copy()
            lab = classifier(coords, final_state[j]) if uses_state else classifier(coords)
        else:
            raise ValueError("classify_products needs positions or model coordinates in the trajectory set")
        labels_per.append(str(lab))
    classified = [lab for lab in labels_per if lab]
    order = list(getattr(classifier, "rules", {}) or {})       # rule order first, then the rest sorted
    labels = tuple([lab for lab in order if lab in set(classified)] +
                   sorted(set(classified) - set(order)))
    L, m = len(labels), len(classified)
    if m == 0:
        z = np.zeros(0)
        return ProductBranching((), z.astype(int), z, z, z, z, tuple(labels_per), 0, confidence_level, excluded)
    onehot = np.array([[lab == name for name in labels] for lab in classified], dtype=float)
    est, low, high, se = bootstrap_ratio(onehot, np.ones((m, 1)), np.zeros(L, dtype=int),
                                         confidence_level=confidence_level, n_resamples=n_resamples, seed=seed)
    return ProductBranching(labels, onehot.sum(axis=0).astype(int), est, low, high, se, tuple(labels_per), m,
                            float(confidence_level), excluded)


# ----------------------------------------------------------------------------------------------
# energy conservation and flags
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class EnergyReport:
    """Total-energy conservation per trajectory (Eh; rates in Eh per a.u. of time).

    drift : E(last frame) − E(0); max_deviation : max_t |E(t) − E(0)|; drift_rate : slope of a
    linear least-squares fit of E(t); flagged : max_deviation > tolerance; tolerance (Eh);
    ensemble : summary numbers (mean/median/max |drift|, max deviation, number flagged).
    """

    indices: np.ndarray
    drift: np.ndarray
    max_deviation: np.ndarray
    drift_rate: np.ndarray
    flagged: np.ndarray
    tolerance: float
    ensemble: dict


def energy_report(tset: TrajectorySet, tolerance: float = 1e-3) -> EnergyReport | None:
    """Energy-conservation report; ``tolerance`` (Eh, default 1e-3 Eh ≈ 27 meV, a common-practice
    bound for on-the-fly runs) flags a trajectory whose max |E(t) − E(0)| exceeds it.
    None when the set has no energies."""
    if tset.energies is None:
        return None
    if not (isinstance(tolerance, (int, float)) and tolerance > 0):
        raise ValueError(f"energy tolerance={tolerance!r} is not allowed; it must be a positive number in Eh")
    E = np.where(tset.frame_mask, tset.energies, np.nan)
    n, T = E.shape
    last = tset.last_frame
    drift = np.full(n, np.nan)
    maxdev = np.full(n, np.nan)
    rate = np.full(n, np.nan)
    t = tset.times
    for j in range(n):
        ok = np.isfinite(E[j])
        if not ok[0] or last[j] < 0:
            continue
        dev = E[j, ok] - E[j, 0]
        drift[j] = E[j, last[j]] - E[j, 0]
        maxdev[j] = float(np.max(np.abs(dev)))
        if ok.sum() >= 2:
            rate[j] = float(np.polyfit(t[ok], E[j, ok], 1)[0])
    flagged = np.nan_to_num(maxdev, nan=0.0) > tolerance
    fin = np.isfinite(drift)
    ens = {
        "n": int(fin.sum()),
        "mean_abs_drift": float(np.mean(np.abs(drift[fin]))) if fin.any() else float("nan"),
        "median_abs_drift": float(np.median(np.abs(drift[fin]))) if fin.any() else float("nan"),
        "max_abs_drift": float(np.max(np.abs(drift[fin]))) if fin.any() else float("nan"),
        "max_deviation": float(np.max(maxdev[fin])) if fin.any() else float("nan"),
        "mean_drift_rate": float(np.nanmean(rate)) if np.isfinite(rate).any() else float("nan"),
        "n_flagged": int(flagged.sum()),
        "tolerance": float(tolerance),
    }
    return EnergyReport(tset.indices.copy(), drift, maxdev, rate, flagged, float(tolerance), ens)


@dataclasses.dataclass(frozen=True)
class TrajectoryFlag:
    """A trajectory that needs the user's attention: index, status and the reasons."""

    index: int
    status: str
    reasons: tuple[str, ...]


def flagged_trajectories(tset: TrajectorySet, energy: EnergyReport | None = None) -> list[TrajectoryFlag]:
    """Failed trajectories, trajectories with recorded reasons, and energy-tolerance violations."""
    out = []
    last = tset.last_frame
    for j in range(tset.ntraj):
        reasons = [r for r in [tset.reasons[j]] if r]
        if energy is not None and energy.flagged[j]:
            reasons.append(f"energy deviation {energy.max_deviation[j]:.3g} Eh > tolerance {energy.tolerance:.3g} Eh")
        if tset.status[j] == "failed" and not reasons:
            reasons.append("failed (no reason recorded)")
        if last[j] < 0:
            reasons.append("no frames recorded")
        if reasons or tset.status[j] == "failed":
            out.append(TrajectoryFlag(int(tset.indices[j]), tset.status[j], tuple(reasons)))
    return out


# ----------------------------------------------------------------------------------------------
# everything at once
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class AnalysisResults:
    """Everything :func:`mapdyn.analysis.report.write_report` writes (see the individual result types)."""

    tset: TrajectorySet
    populations: PopulationSeries
    initial_population: PopulationSeries
    lifetimes: LifetimeResult
    observables: list
    first_entries: list
    branching: ProductBranching | None
    energy: EnergyReport | None
    flags: list
    vibrational: list = dataclasses.field(default_factory=list)
    spectrum: Any = None
    settings: dict = dataclasses.field(default_factory=dict)


def analyze(tset: TrajectorySet, *, observables: Sequence[Any] = (), first_entry: Sequence[tuple] = (),
            classifier: Callable | Mapping | None = None, vibrational: Sequence[Any] = (),
            spectrum: Any = None, confidence_level: float = 0.95, n_resamples: int = 999, seed: int = 0,
            energy_tolerance: float = 1e-3, lifetime_delay: bool = True, lifetime_asymptote: bool = True,
            lifetime_resamples: int = 100) -> AnalysisResults:
    """Run every estimator on ``tset``.

    observables : specs for :class:`GeometricObservable`; first_entry : (state, observable-spec or
    None) pairs; classifier : product classifier (see :func:`classify_products`); vibrational :
    :class:`mapdyn.analysis.vibrational.FragmentAnalysis` objects (or specs) evaluated on final frames;
    spectrum : an :class:`mapdyn.initial.excitation.AbsorptionSpectrum` to include in the report;
    lifetime_resamples : trajectory-bootstrap refits for the lifetime uncertainties (0 = covariance).
    """
    kw = dict(confidence_level=confidence_level, n_resamples=n_resamples, seed=seed)
    pops = populations(tset, **kw)
    init = initial_state_population(tset, **kw)
    life = fit_lifetimes(init.times, init.populations[:, 0], init.standard_error[:, 0],
                         delay=lifetime_delay, asymptote=lifetime_asymptote,
                         sigma_floor=max(0.01, 1.0 / max(tset.ntraj, 1)),
                         band=(init.low[:, 0], init.high[:, 0]),
                         resampled_populations=(resampled_initial_population(tset, lifetime_resamples, seed)
                                                if lifetime_resamples else None))
    obs = [observable_series(tset, o) for o in observables] if tset.positions is not None else []
    entries = [values_at_first_entry(tset, int(s), o if tset.positions is not None else None)
               for s, o in first_entry]
    branching = classify_products(tset, classifier, **kw) if classifier is not None else None
    energy = energy_report(tset, energy_tolerance)
    flags = flagged_trajectories(tset, energy)
    vib = []
    for frag in vibrational:
        from mapdyn.analysis.vibrational import analyze_fragment
        vib.append(analyze_fragment(tset, frag, **kw,
                                    product_labels=None if branching is None else branching.per_trajectory))
    settings = {"confidence_level": confidence_level, "n_resamples": n_resamples, "bootstrap_seed": seed,
                "energy_tolerance_hartree": energy_tolerance, "lifetime_delay": lifetime_delay,
                "lifetime_asymptote": lifetime_asymptote, "lifetime_resamples": lifetime_resamples}
    return AnalysisResults(tset, pops, init, life, obs, entries, branching, energy, flags, vib, spectrum, settings)


# ----------------------------------------------------------------------------------------------
# settings from a study input table
# ----------------------------------------------------------------------------------------------
_ANALYSIS_KEYS = ("observables", "first_entry", "products", "fragments", "confidence_level", "n_resamples",
                  "seed", "energy_tolerance_hartree", "lifetime_delay", "lifetime_asymptote", "lifetime_resamples")
_FRAGMENT_KEYS = ("atoms", "name", "window_half_width", "include_unfinished", "potential", "product")
_POTENTIAL_KEYS = ("curve", "morse", "scan")


def _unknown_key(where: str, key: str, allowed: Sequence[str]) -> ValueError:
    import difflib
    hint = difflib.get_close_matches(key, allowed, n=1)
    extra = f" (did you mean {hint[0]!r}?)" if hint else ""
    return ValueError(f"{where}: key {key!r} is not allowed; use {', '.join(allowed)}{extra}")


def fragment_from_table(table: Mapping[str, Any], *, folder: str | None = None,
                        backend_factory: Callable[[Sequence[str]], Any] | None = None,
                        symbols: Sequence[str] | None = None) -> Any:
    """A :class:`mapdyn.analysis.vibrational.FragmentAnalysis` from an input table::

        atoms = [0, 1]          # atom indices (0-based)
        name = "H2"             # optional
        window_half_width = 0.366   # optional (default (√3 − 1)/2)
        product = "H2 + X"      # optional: only trajectories classified as this product
        potential.curve = "h2_curve.csv"   # two columns r/Bohr, V/Eh (relative to the study folder), or
        potential.morse = {D = 0.1745, a = 1.028, r_e = 1.401}   # Eh, 1/Bohr, Bohr, or
        potential.scan = {r_min = 0.8, r_max = 8.0, points = 40, state = 0}   # with the study's backend

    A scan needs ``backend_factory(fragment_symbols) -> backend``; it is cached in
    ``<folder>/fragments/<name>.npz``.
    """
    import os
    from mapdyn.analysis import vibrational as vib

    for k in table:
        if k not in _FRAGMENT_KEYS:
            raise _unknown_key("fragment", k, _FRAGMENT_KEYS)
    if "atoms" not in table or "potential" not in table:
        raise ValueError("fragment: 'atoms' (two atom indices) and 'potential' are required")
    atoms = tuple(int(a) for a in table["atoms"])
    if len(atoms) != 2 or atoms[0] == atoms[1]:
        raise ValueError(f"fragment atoms={table['atoms']!r} is not allowed; give two distinct atom indices")
    name = str(table.get("name") or (f"{symbols[atoms[0]]}{atoms[0]}-{symbols[atoms[1]]}{atoms[1]}"
                                     if symbols else f"atoms {atoms[0]}-{atoms[1]}"))
    pot_t = table["potential"]
    if not isinstance(pot_t, Mapping) or len(pot_t) != 1:
        raise ValueError(f"fragment {name}: potential must have exactly one of {', '.join(_POTENTIAL_KEYS)}")
    kind, spec = next(iter(pot_t.items()))
    if kind not in _POTENTIAL_KEYS:
        raise _unknown_key(f"fragment {name} potential", kind, _POTENTIAL_KEYS)
    if kind == "curve":
        path = os.path.join(folder or ".", str(spec))
        data = np.loadtxt(path, delimiter="," if str(spec).endswith(".csv") else None, comments="#", ndmin=2)
        potential = vib.FragmentPotential.from_curve(data[:, 0], data[:, 1],
                                                     source=f"curve file {spec} ({data.shape[0]} points, cubic spline)")
    elif kind == "morse":
        potential = vib.MorseCurve(float(spec["D"]), float(spec["a"]), float(spec["r_e"])).potential()
    else:
        if backend_factory is None or symbols is None:
            raise ValueError(f"fragment {name}: potential.scan needs the study's backend (not available here)")
        grid = np.linspace(float(spec.get("r_min", 0.8)), float(spec.get("r_max", 8.0)), int(spec.get("points", 40)))
        frag_symbols = [symbols[atoms[0]], symbols[atoms[1]]]
        cache = os.path.join(folder, "fragments", _slug_name(name) + ".npz") if folder else None
        potential = vib.scan_fragment_potential(backend_factory(frag_symbols), grid, state=int(spec.get("state", 0)),
                                                cache_path=cache)
    return vib.FragmentAnalysis(atoms, potential, name, float(table.get("window_half_width", vib.SQUARE_GAMMA)),
                                bool(table.get("include_unfinished", False)),
                                None if table.get("product") is None else str(table["product"]))


def _slug_name(text: str) -> str:
    import re
    return re.sub(r"[^A-Za-z0-9]+", "_", text).strip("_") or "fragment"


def settings_from_table(table: Mapping[str, Any] | None, *, folder: str | None = None,
                        backend_factory: Callable[[Sequence[str]], Any] | None = None,
                        symbols: Sequence[str] | None = None) -> dict:
    """Keyword arguments for :func:`analyze` from an ``[analysis]`` input table::

        observables = ["distance 0 1", "angle 0 1 2", "dihedral 0 1 2 3"]
        first_entry = [{state = 0, observable = "distance 0 1"}]
        products = {dissociated = [{distance = [0, 1], above = 2.5}]}      # Å
        fragments = [{atoms = [0, 1], potential.morse = {D = 0.17, a = 1.0, r_e = 1.4}}]
        confidence_level = 0.95, n_resamples = 999, seed = 0, energy_tolerance_hartree = 1e-3,
        lifetime_delay = true, lifetime_asymptote = true, lifetime_resamples = 100
    """
    table = dict(table or {})
    for k in table:
        if k not in _ANALYSIS_KEYS:
            raise _unknown_key("analysis", k, _ANALYSIS_KEYS)
    kw: dict = {}
    if "observables" in table:
        kw["observables"] = [GeometricObservable.from_spec(o) for o in table["observables"]]
    if "first_entry" in table:
        pairs = []
        for item in table["first_entry"]:
            if not isinstance(item, Mapping) or "state" not in item or set(item) - {"state", "observable"}:
                raise ValueError("analysis.first_entry entries need 'state' and optionally 'observable'")
            pairs.append((int(item["state"]), item.get("observable")))
        kw["first_entry"] = pairs
    if "products" in table:
        kw["classifier"] = distance_rule_classifier(table["products"])
    if "fragments" in table:
        kw["vibrational"] = [fragment_from_table(f, folder=folder, backend_factory=backend_factory, symbols=symbols)
                             for f in table["fragments"]]
    for key, conv in (("confidence_level", float), ("n_resamples", int), ("seed", int),
                      ("lifetime_delay", bool), ("lifetime_asymptote", bool), ("lifetime_resamples", int)):
        if key in table:
            kw[key] = conv(table[key])
    if "energy_tolerance_hartree" in table:
        kw["energy_tolerance"] = float(table["energy_tolerance_hartree"])
    return kw


# ----------------------------------------------------------------------------------------------
# study folders
# ----------------------------------------------------------------------------------------------
def load_study(folder: str) -> TrajectorySet:
    """Recorded results of a finished or partial study folder as a :class:`TrajectorySet`.

    (Results loader; not to be confused with :func:`mapdyn.study.config.load_study`, which reads an
    input file.)  Uses the folder reader of :mod:`mapdyn.study.folder` (status, failure reasons and
    frames all derived from the files); raises :class:`mapdyn.study.folder.StudyError` when nothing has
    been recorded yet.
    """
    from mapdyn.study.folder import Study, load_trajectory_set

    return load_trajectory_set(Study(folder))


def study_spectrum(folder: str, fwhm_ev: float = 0.15) -> Any:
    """Absorption spectrum of the sampled geometries (an
    :class:`mapdyn.initial.excitation.AbsorptionSpectrum`, Gaussian FWHM ``fwhm_ev`` eV) when the
    study's ``initial_conditions.h5`` holds excitation energies and oscillator strengths; else None."""
    import os
    from mapdyn.study.checkpoint import CheckpointError, read_h5
    from mapdyn.initial.excitation import absorption_spectrum

    path = os.path.join(folder, "initial_conditions.h5")
    if not os.path.exists(path):
        return None
    try:
        arrays, _ = read_h5(path, ["excitation_energies_hartree", "oscillator_strengths"])
    except CheckpointError:
        return None
    return absorption_spectrum(arrays["excitation_energies_hartree"], arrays["oscillator_strengths"], fwhm_ev=fwhm_ev)


def analyze_study(folder: Any, **overrides) -> AnalysisResults:
    """Load a study folder (or :class:`mapdyn.study.folder.Study`), read its ``[analysis]`` table, add the
    spectrum when present and run :func:`analyze`; ``overrides`` replace keyword arguments.

    The energy tolerance defaults to the study's ``dynamics.drift_threshold``.
    Fragment potentials with ``potential.scan`` are computed with a closed-shell ground-state
    PySCF backend (RHF, or RKS with the study's functional) in the study's basis on the isolated
    fragment, cached in ``<folder>/fragments/``.
    """
    from mapdyn.study.folder import Study, load_trajectory_set

    study = folder if isinstance(folder, Study) else Study(folder)
    tset = load_trajectory_set(study)
    cfg = study.config
    symbols = None if getattr(cfg, "molecule", None) is None else tuple(cfg.molecule.symbols)

    def fragment_backend(frag_symbols):
        from mapdyn.backends.pyscf.ground_state import PySCFGroundState

        e = cfg.electronic
        if not e.basis:
            raise ValueError("fragment potential scan: the study has no basis set (model or callback backend); "
                             "give potential.curve or potential.morse instead")
        xc = e.options.get("xc") if e.backend == "tddft" else None
        return PySCFGroundState(list(frag_symbols), e.basis, xc=xc)

    kw = settings_from_table(getattr(cfg, "analysis", None) or {}, folder=study.folder,
                             backend_factory=fragment_backend, symbols=symbols)
    spec = study_spectrum(study.folder)
    if spec is not None:
        kw["spectrum"] = spec
    drift = getattr(getattr(cfg, "dynamics", None), "drift_threshold_hartree", None)
    if "energy_tolerance" not in kw and drift:
        kw["energy_tolerance"] = float(drift)      # the study's own drift threshold flags trajectories
    kw.update(overrides)
    return analyze(tset, **kw)
