"""The complete propagation state of one on-the-fly trajectory (atomic units)."""

from __future__ import annotations

import copy
import dataclasses

import numpy as np

from mapdyn.backends.contract import ElectronicResult

__all__ = ["DriverState"]


@dataclasses.dataclass
class DriverState:
    """Everything needed to continue a trajectory exactly (atomic units).

    step : steps taken; time : a.u.; positions (N, 3) Bohr; momenta (N, 3) kinetic momenta a.u.;
    x, p : (F,) mapping variables in the adiabatic basis of ``positions``; gamma_adjusted : (F,)
    or None; result : the backend result at ``positions`` (its ``guess`` warm-starts the next
    call); force : (N, 3) Eh/Bohr at ``positions``; sigma_history : up to two
    (time a.u., σ (F, F) 1/a.u. time, velocity (N, 3) Bohr/a.u. time) mid-step entries;
    energy_reference : Eh at step 0; force_open : (N, 3) Eh/Bohr, the opening-kick force of the
    next step with force averaging (None: computed from ``result`` when needed); drift_flag : None or {step, time_au, drift_Eh}; stopped,
    stop_reason; end_event : None or, for a trajectory that ended in a channel (backend
    ``RegionReached``), {channel, step, time_au, positions_bohr (N, 3 list, Bohr), values};
    rng_state : the trajectory generator's state after the initial draws (or None);
    warnings : messages issued once per run; settings : what the state was made with (checked on
    restore).
    """

    step: int
    time: float
    positions: np.ndarray
    momenta: np.ndarray
    x: np.ndarray
    p: np.ndarray
    gamma_adjusted: np.ndarray | None
    result: ElectronicResult
    force: np.ndarray
    sigma_history: list
    energy_reference: float
    drift_flag: dict | None = None
    stopped: bool = False
    stop_reason: str | None = None
    rng_state: dict | None = None
    warnings: list = dataclasses.field(default_factory=list)
    settings: dict = dataclasses.field(default_factory=dict)
    force_open: np.ndarray | None = None
    end_event: dict | None = None

    def copy(self) -> "DriverState":
        return copy.deepcopy(self)
