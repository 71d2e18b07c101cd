"""Energy conservation report and flagged trajectories."""

from __future__ import annotations

import dataclasses

import numpy as np

from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.backends.contract import ended_channel


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
        reasons = [r for r in [tset.reasons[j]] if r and not ended_channel(r)]  # an ended channel is an outcome
        if energy is not None and energy.flagged[j]:
            reasons.append(f"energy deviation {energy.max_deviation[j]:.3g} Eh > tolerance {energy.tolerance:.3g} Eh")
        if tset.status[j] == "failed" and not reasons:
            reasons.append("failed (no reason recorded)")
        if last[j] < 0:
            reasons.append("no frames recorded")
        if reasons or tset.status[j] == "failed":
            out.append(TrajectoryFlag(int(tset.indices[j]), tset.status[j], tuple(reasons)))
    return out


