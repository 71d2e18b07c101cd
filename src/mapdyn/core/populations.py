"""The population estimator, stated once (docs/theory.md#populations).

Every trajectory j carries a weight w_jf for state f:

* SQC: w_jf = 1 when the actions e_j lie in the window of state f, else 0 (Cotton & Miller,
  J. Phys. Chem. A 117, 7190 (2013)); a trajectory is in at most one window;
* Ehrenfest: w_jf = e_jf, the action itself;
* spin mapping: w_jf = e_jf − γ_s = ρ_ff, the diagonal of the spin-mapping density (Σ_f w_jf = 1;
  docs/theory.md#spin-mapping); the hopping methods (MASH, FSSH) weigh the active state instead
  (:mod:`mapdyn.core.hopping`).

The ensemble population is the ratio of trajectory sums P_f = Σ_j w_jf / Σ_j Σ_k w_jk (the
windowed normalisation for SQC: trajectories in no window are left out of both sums and counted
separately).  All quantities are dimensionless.
"""

from __future__ import annotations

import numpy as np

from mapdyn.core.options import MethodOptions
from mapdyn.core.windows import window_indicators

__all__ = ["population_weights", "ensemble_populations"]


def population_weights(e: np.ndarray, options: MethodOptions) -> np.ndarray:
    """Weights w (..., F) of the estimator for actions ``e`` (..., F): window indicators (0/1)
    for SQC, the actions for Ehrenfest, ρ_ff for spin mapping."""
    e = np.asarray(e, dtype=float)
    if options.method == "ehrenfest":
        return e
    F = e.shape[-1]
    if options.method == "spin":
        return e - (e.sum(axis=-1, keepdims=True) - 1.0) / F
    if options.method != "sqc":
        raise ValueError(f"method={options.method!r} has no action-based weights; use mapdyn.core.hopping")
    return window_indicators(e.reshape(-1, F), options).reshape(e.shape).astype(float)


def ensemble_populations(e: np.ndarray, options: MethodOptions) -> tuple[np.ndarray, np.ndarray]:
    """Populations P (..., F) = Σ_j w_jf / Σ_j Σ_k w_jk over the trajectory axis (second to last
    of ``e`` (..., n, F)) and the number of trajectories in no window (...) (0 for Ehrenfest).
    NaN where no trajectory is in any window."""
    e = np.asarray(e, dtype=float)
    w = population_weights(e, options)
    num = w.sum(axis=-2)
    den = num.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        pops = num / den[..., None]
    if options.method in ("ehrenfest", "spin"):
        none = np.zeros(den.shape, dtype=int)
    else:
        none = (e.shape[-2] - den).round().astype(int)
    return pops, none
