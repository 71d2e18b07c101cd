"""SQC window and Ehrenfest populations with bootstrap bands; initial-state population."""

from __future__ import annotations

import dataclasses

import numpy as np

from mapdyn.analysis.statistics import _resample_weights, bootstrap_ratio, widen_to_binomial
from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.core.populations import population_weights
from mapdyn.units import AU_TIME_IN_FS


# ----------------------------------------------------------------------------------------------
# populations
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class PopulationSeries:
    """Populations vs time with bootstrap bounds, never narrower than the exact binomial interval.

    low/high: the trajectory-bootstrap interval widened to contain the Clopper–Pearson interval of
    k = P·n out of n (n = trajectories counted in the denominator at that time; Clopper & Pearson,
    Biometrika 26, 404 (1934)), so 0 of 4 gives [0, 0.60] rather than [0, 0]; ``interval`` says so.

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
    interval: str = ""

    @property
    def times_fs(self) -> np.ndarray:
        return self.times * AU_TIME_IN_FS


def _state_weights(tset: TrajectorySet) -> tuple[np.ndarray, np.ndarray, str]:
    """Per-trajectory numerators (n, T, F) and denominators (n, T) of the population ratio."""
    mask = tset.frame_mask
    num = np.where(mask[..., None], population_weights(tset.actions, tset.options), 0.0)
    den = num.sum(axis=2)
    if tset.options.method == "ehrenfest":
        return num, den, "Ehrenfest: P_f = Σ_j e_jf / Σ_j Σ_k e_jk over trajectories with a frame"
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
    trials = np.repeat((den > 0).sum(axis=0), K)
    low, high = widen_to_binomial(est, low, high, trials, confidence_level)
    interval = (f"{int(round(100 * confidence_level))} % trajectory bootstrap ({method}) widened to contain the "
                "Clopper–Pearson interval of the observed counts" if bootstrap else
                f"{int(round(100 * confidence_level))} % Clopper–Pearson interval of the observed counts")
    n_frames = mask.sum(axis=0)
    if tset.options.method == "ehrenfest":
        n_none = np.zeros(T, dtype=int)
    else:
        n_none = (n_frames - (den > 0).sum(axis=0)).astype(int)
    shape = (T, K)
    return PopulationSeries(tset.times.copy(), est.reshape(shape), np.asarray(low).reshape(shape),
                            np.asarray(high).reshape(shape), np.asarray(se).reshape(shape), n_none,
                            n_frames.astype(int), tuple(labels), float(confidence_level), estimator,
                            method if bootstrap else "none", int(n_resamples) if bootstrap else 0, interval)


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


