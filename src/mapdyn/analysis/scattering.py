"""Transmission and reflection per channel and adiabatic state from the last frame of 1D model
trajectories (what a scattering study measures, instead of a lifetime)."""

from __future__ import annotations

import dataclasses

import numpy as np

from mapdyn.analysis.statistics import clopper_pearson
from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.core.windows import window_assignment

__all__ = ["ScatteringChannels", "scattering_channels"]


@dataclasses.dataclass
class ScatteringChannels:
    """Channel- and state-resolved outcome (dimensionless probabilities).

    transmission, reflection : (F,) probability per adiabatic state; *_error : (F,) standard error;
    *_low, *_high : (F,) interval (Clopper–Pearson of the counts, ``confidence_level``);
    n_counted : trajectories in the denominator (SQC: those that left the region inside a window);
    n_unassigned : left the region in no window (SQC); n_inside : still inside the interaction
    region (or moving back into it) at their last frame — left out; region : (a, b) Bohr.
    """

    transmission: np.ndarray
    reflection: np.ndarray
    transmission_error: np.ndarray
    reflection_error: np.ndarray
    transmission_low: np.ndarray
    transmission_high: np.ndarray
    reflection_low: np.ndarray
    reflection_high: np.ndarray
    n_counted: int
    n_unassigned: int
    n_inside: int
    region: tuple
    confidence_level: float
    estimator: str


def scattering_channels(tset: TrajectorySet, interaction_region: tuple[float, float], transmitted_side: int = 1,
                        confidence_level: float = 0.95) -> ScatteringChannels:
    """Transmission/reflection per adiabatic state from each trajectory's last recorded frame.

    A trajectory has left when x < a moving left (p < 0) or x > b moving right (p > 0), with
    (a, b) = ``interaction_region`` in Bohr; ``transmitted_side`` 1 means x > b is transmission
    (a packet sent to +x).  SQC: P_{c,f} = N_{c,f}/N_w over trajectories in a window, standard
    error √(P(1−P)/N_w) (multinomial); Ehrenfest: mean of e_f/Σe, standard error = sample std/√N.
    The interval is the Clopper–Pearson interval of N_{c,f} of N_w (Clopper & Pearson 1934).
    """
    if tset.coordinates is None or tset.coordinates.shape[2] != 1:
        raise ValueError("scattering_channels needs a 1D model trajectory set (coordinates of shape (n, T, 1))")
    a, b = (float(v) for v in interaction_region)
    last = tset.last_frame
    has = last >= 0
    rows = np.nonzero(has)[0]
    x = tset.coordinates[rows, last[rows], 0]
    p = tset.coordinate_momenta[rows, last[rows], 0]
    e = tset.actions[rows, last[rows]]
    upper, lower = (x > b) & (p > 0), (x < a) & (p < 0)
    left = upper | lower
    side = np.where(upper, 1, 0)[left]
    e = e[left]
    F = tset.nstates
    prob = np.zeros((2, F))
    err = np.zeros((2, F))
    lo = np.zeros((2, F))
    hi = np.zeros((2, F))
    n_unassigned = 0
    if tset.options.method == "ehrenfest":
        w = e / e.sum(axis=1, keepdims=True)
        n = w.shape[0]
        for s in (0, 1):
            ws = np.where((side == s)[:, None], w, 0.0)
            prob[s] = ws.mean(axis=0) if n else np.nan
            err[s] = ws.std(axis=0, ddof=1) / np.sqrt(n) if n > 1 else np.nan
            lo[s], hi[s] = clopper_pearson(prob[s] * n, n, confidence_level)
        estimator = "Ehrenfest: mean weight e_f/Σe per channel"
    else:
        win = window_assignment(e, tset.options) if e.size else np.zeros(0, dtype=int)
        n = int(np.sum(win >= 0))
        n_unassigned = int(np.sum(win < 0))
        for s in (0, 1):
            counts = np.array([np.sum((side == s) & (win == f)) for f in range(F)], dtype=float)
            with np.errstate(invalid="ignore", divide="ignore"):
                prob[s] = counts / n if n else np.nan
                err[s] = np.sqrt(prob[s] * (1 - prob[s]) / n) if n else np.nan
            lo[s], hi[s] = clopper_pearson(counts, n, confidence_level)
        estimator = f"SQC {tset.options.window} windows: N_(channel,state) / N_in-window at the exit"
    t, r = (1, 0) if transmitted_side == 1 else (0, 1)
    return ScatteringChannels(prob[t], prob[r], err[t], err[r], lo[t], hi[t], lo[r], hi[r], n, n_unassigned,
                              int(rows.size - left.sum() + (~has).sum()), (a, b), float(confidence_level), estimator)
