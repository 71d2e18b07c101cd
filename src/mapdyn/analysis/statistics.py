"""Bootstrap of trajectory-sum ratios (scipy.stats.bootstrap over whole trajectories)."""

from __future__ import annotations

import numpy as np
from scipy import stats


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
# exact binomial intervals
# ----------------------------------------------------------------------------------------------
def clopper_pearson(successes: np.ndarray | float, trials: np.ndarray | float,
                    confidence_level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Clopper–Pearson ("exact") interval of a binomial proportion k/n.

    low = B⁻¹(α/2; k, n − k + 1), high = B⁻¹(1 − α/2; k + 1, n − k) with B the beta distribution
    (Clopper & Pearson, Biometrika 26, 404 (1934)); low = 0 for k = 0, high = 1 for k = n.  The
    same formula as ``scipy.stats.binomtest(k, n).proportion_ci(method="exact")``; non-integer k
    (fractional Ehrenfest weights) use the beta quantiles unchanged.  NaN where n ≤ 0.
    Dimensionless arrays broadcast over ``successes`` and ``trials``.
    """
    k = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    k, n = np.broadcast_arrays(k, n)
    alpha = 1.0 - float(confidence_level)
    ok = n > 0
    kk = np.clip(np.where(ok, k, 0.0), 0.0, np.where(ok, n, 1.0))
    nn = np.where(ok, n, 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(kk > 0, stats.beta.ppf(alpha / 2, np.maximum(kk, 1e-300), nn - kk + 1), 0.0)
        high = np.where(kk < nn, stats.beta.ppf(1 - alpha / 2, kk + 1, np.maximum(nn - kk, 1e-300)), 1.0)
    low = np.where(ok, low, np.nan)
    high = np.where(ok, high, np.nan)
    return low, high


def widen_to_binomial(estimate: np.ndarray, low: np.ndarray, high: np.ndarray, trials: np.ndarray,
                      confidence_level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Bootstrap bounds widened to contain the Clopper–Pearson interval of the observed counts
    k = estimate · trials (see :func:`clopper_pearson`); a bootstrap of few trajectories can
    collapse to a point (e.g. 0 of 4 → [0, 0]) where the exact interval is [0, 0.60]."""
    est = np.asarray(estimate, dtype=float)
    cl, ch = clopper_pearson(est * trials, trials, confidence_level)
    lo = np.asarray(low, dtype=float)
    hi = np.asarray(high, dtype=float)
    with np.errstate(invalid="ignore"):
        new_lo = np.where(np.isfinite(cl), np.fmin(lo, cl), lo)
        new_hi = np.where(np.isfinite(ch), np.fmax(hi, ch), hi)
    return new_lo, new_hi


# ----------------------------------------------------------------------------------------------
# circular statistics (angles in degrees)
# ----------------------------------------------------------------------------------------------
def fold_degrees(values: np.ndarray) -> np.ndarray:
    """Angles folded into (−180°, 180°]."""
    v = np.asarray(values, dtype=float)
    out = -((-v + 180.0) % 360.0) + 180.0
    return out


def circular_stats_degrees(values: np.ndarray, axis: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Circular mean, circular standard deviation and 10/90 % quantiles of angles in degrees.

    mean = atan2(⟨sin θ⟩, ⟨cos θ⟩) folded into (−180°, 180°]; spread = √(−2 ln R̄) (Mardia & Jupp,
    Directional Statistics (2000), §2.3.4), both from ``scipy.stats.circmean``/``circstd``
    (NaN ignored).  Quantiles are those of the deviations from the mean folded into (−180°, 180°],
    added back to the mean (so they may leave (−180°, 180°] by less than 180°).
    """
    import warnings

    v = np.moveaxis(np.asarray(values, dtype=float), axis, 0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # all-NaN slices give NaN, which is what we report
        mean = np.asarray(fold_degrees(stats.circmean(v, high=180.0, low=-180.0, axis=0, nan_policy="omit")), dtype=float)
        std = np.asarray(stats.circstd(v, high=180.0, low=-180.0, axis=0, nan_policy="omit"), dtype=float)
        dev = fold_degrees(v - mean)
        q10 = mean + np.nanquantile(dev, 0.1, axis=0)
        q90 = mean + np.nanquantile(dev, 0.9, axis=0)
    n = np.isfinite(v).sum(axis=0)
    nan = n == 0
    for a in (mean, std, q10, q90):
        if a.ndim:
            a[nan] = np.nan
    return mean, std, q10, q90
