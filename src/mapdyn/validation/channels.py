"""Scattering set-up shared by the exact wavepacket solver and the mapped ensembles: argument
checks, the default interaction region and the channel-resolved result (probabilities are
dimensionless; positions in Bohr)."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from mapdyn.core.model import DiabaticModel
from mapdyn.models.regions import default_interaction_region  # noqa: F401 - re-exported for the validation API


@dataclasses.dataclass
class ScatteringResult:
    """Channel- and adiabatic-state-resolved scattering probabilities (dimensionless).

    transmission, reflection : (F,) probabilities per adiabatic state (index 0 = lowest);
    transmission_error, reflection_error : (F,) standard errors (0 for the exact solver);
    method : "exact" or the MethodOptions description; ntraj : trajectories run;
    n_unassigned : trajectories that ended in no window (SQC); n_unfinished : trajectories still in
    the interaction region at the time limit (left out of the probabilities); details : extra data.
    """

    method: str
    transmission: np.ndarray
    reflection: np.ndarray
    transmission_error: np.ndarray
    reflection_error: np.ndarray
    ntraj: int
    n_unassigned: int
    n_unfinished: int
    details: dict = dataclasses.field(default_factory=dict)

    def as_dict(self) -> dict:
        """Flat mapping "T0", "T1", …, "R0", … → probability and "dT0", … → standard error."""
        out = {}
        for f in range(self.transmission.size):
            out[f"T{f}"], out[f"R{f}"] = float(self.transmission[f]), float(self.reflection[f])
            out[f"dT{f}"], out[f"dR{f}"] = float(self.transmission_error[f]), float(self.reflection_error[f])
        return out


def _positive_int(name, v):
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
        raise ValueError(f"{name}={v!r} is not allowed; it must be a positive integer")
    return int(v)


def _check_scattering_args(model, momentum, position, position_width, initial_state):
    if not isinstance(model, DiabaticModel):
        raise ValueError(f"model={model!r} is not allowed; it must be a mapdyn DiabaticModel")
    if model.ndof != 1:
        raise ValueError(f"model has ndof={model.ndof}; scattering runs need a 1D model")
    vals = []
    for name, v in (("momentum", momentum), ("position", position), ("position_width", position_width)):
        try:
            v = float(v)
        except (TypeError, ValueError):
            raise ValueError(f"{name}={v!r} is not allowed; it must be a number") from None
        if not math.isfinite(v):
            raise ValueError(f"{name}={v!r} is not allowed; it must be finite")
        vals.append(v)
    k, x0, sig = vals
    if k == 0:
        raise ValueError("momentum=0 is not allowed; the packet must move towards the interaction region")
    if sig <= 0:
        raise ValueError(f"position_width={sig!r} is not allowed; it must be a positive number of Bohr")
    if isinstance(initial_state, bool) or not isinstance(initial_state, (int, np.integer)) \
            or not 0 <= initial_state < model.nstates:
        raise ValueError(f"initial_state={initial_state!r} is not allowed; it must be an integer in 0..{model.nstates - 1}")
    return k, x0, sig
