"""Stored HEOM references and the result type of the mapping runs compared with them
(dimensionless populations; times in the units of each reference)."""

from __future__ import annotations

from dataclasses import dataclass
from importlib import resources

import numpy as np

__all__ = ["load_reference", "MappingResult"]


def load_reference(name: str) -> dict:
    """Arrays of ``src/mapdyn/data/heom_<name>.npz`` as a dict."""
    path = resources.files("mapdyn") / "data" / f"heom_{name}.npz"
    with resources.as_file(path) as p, np.load(p) as data:
        return {k: data[k] for k in data.files}


@dataclass
class MappingResult:
    """Populations on the HEOM time grid: times (T,) a.u.; populations (T, F); standard_error (T, F)
    (binomial √(P(1−P)/N_acc) for window counts, conditional on the accepted count; sample standard
    error of the normalised actions for Ehrenfest); accepted (T,) trajectories inside a window (all of
    them for Ehrenfest); sigma_z_error (T,) standard error of P_1 − P_2 (two states only, else None):
    √((1 − ⟨σz⟩²)/N_acc) for windows."""

    times: np.ndarray
    populations: np.ndarray
    standard_error: np.ndarray
    accepted: np.ndarray
    sigma_z_error: np.ndarray | None

    @property
    def sigma_z(self) -> np.ndarray:
        """⟨σz⟩ = P_1 − P_2 for two states (σz = diag(1, −1))."""
        return self.populations[:, 0] - self.populations[:, 1]
