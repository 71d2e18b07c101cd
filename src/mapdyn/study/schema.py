"""The validated study: frozen dataclasses built by :func:`mapdyn.study.config.parse_study`
(atomic units inside; see the config module docstring for the input keys)."""

from __future__ import annotations

import dataclasses
import hashlib

import numpy as np

from mapdyn.core.options import MethodOptions
from mapdyn.study.input_values import (
    ConfigError,
)
from mapdyn.units import HARTREE_IN_EV


# ----------------------------------------------------------------------------------------------
# dataclasses
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class MoleculeConfig:
    """symbols (N,), positions_bohr (N, 3) Bohr, charge (e), spin = 2S, source (file or "inline")."""

    symbols: tuple[str, ...]
    positions_bohr: np.ndarray
    charge: int
    spin: int
    source: str

    @property
    def natoms(self) -> int:
        return len(self.symbols)


@dataclasses.dataclass(frozen=True)
class ElectronicConfig:
    """Backend name, number of states F (including the ground state) and backend options.

    options : keyword arguments of the backend class (already translated to its names).
    model, model_parameters, engine : backend = "model" only ("batched" | "on_the_fly").
    function : backend = "callback" only ("file.py:name" or "package.module:name").
    """

    backend: str
    states: int
    basis: str | None = None
    options: dict = dataclasses.field(default_factory=dict)
    model: str | None = None
    model_parameters: dict = dataclasses.field(default_factory=dict)
    engine: str = "batched"
    function: str | None = None
    level_of_theory: str = ""


@dataclasses.dataclass(frozen=True)
class InitialConfig:
    """Initial conditions.

    Molecules: optimize (bool), normal_modes_from ("scf" RHF/RKS in the same basis with an
    analytic Hessian | "dynamics": the dynamics backend's ground state with a finite-difference
    Hessian), temperature_kelvin (K), excitation ("fixed" | "brightest" | "energy_range"), state
    (adiabatic index, 0 = ground state; "fixed" only), energy_range_hartree ((low, high) in Eh;
    "energy_range" only: the state of each geometry is drawn with probability ∝ f_0k among the
    states inside the window, see mapdyn.initial.excitation), spectrum_fwhm_hartree (Eh, the
    Gaussian line width of the absorption spectrum written by ``mapdyn prepare`` and the report).
    Models: position_bohr, momentum_au, width_bohr (Gaussian wavepacket centre, mean momentum,
    position width σ_R; σ_P = 1/(2σ_R)), state, basis ("adiabatic" | "diabatic"); harmonic-bath
    models (vibronic, spin_boson) instead: temperature_kelvin (K, thermal Wigner bath) and
    bath_center ("zero" | "donor", see mapdyn.models.spin_boson.thermal_bath_ensemble).
    """

    state: int | None = None
    optimize: bool = True
    normal_modes_from: str = "scf"
    temperature_kelvin: float = 0.0
    excitation: str = "fixed"
    position_bohr: tuple = ()
    momentum_au: tuple = ()
    width_bohr: tuple = ()
    basis: str = "adiabatic"
    energy_range_hartree: tuple | None = None
    spectrum_fwhm_hartree: float = 0.15 / HARTREE_IN_EV
    bath_center: str = ""


@dataclasses.dataclass(frozen=True)
class DynamicsConfig:
    """time_step_au, duration_au (a.u. of time); nsteps = duration/time_step; checkpoint_every,
    record_every (steps); drift_threshold_hartree (Eh or None); stop_on_drift; substeps;
    propagation ("auto" | "overlap" | "coupling")."""

    time_step_au: float
    duration_au: float
    nsteps: int
    checkpoint_every: int = 10
    record_every: int = 1
    drift_threshold_hartree: float | None = 1e-3
    stop_on_drift: bool = False
    substeps: int = 20
    propagation: str = "auto"


@dataclasses.dataclass(frozen=True)
class EnsembleConfig:
    """trajectories, seed, workers (processes, one thread each), batch (model trajectories per task)."""

    trajectories: int
    seed: int
    workers: int
    batch: int = 200


@dataclasses.dataclass(frozen=True)
class StudyConfig:
    """A validated study (see the module docstring)."""

    name: str
    description: str
    folder: str
    electronic: ElectronicConfig
    initial: InitialConfig
    options: MethodOptions
    dynamics: DynamicsConfig
    ensemble: EnsembleConfig
    molecule: MoleculeConfig | None = None
    analysis: dict = dataclasses.field(default_factory=dict)
    cluster: dict | None = None
    source_path: str = ""
    source_text: str = ""

    @property
    def is_model(self) -> bool:
        return self.electronic.backend == "model"

    @property
    def batched(self) -> bool:
        """True when trajectories run through the batched diabatic engine (chunks of trajectories)."""
        return self.is_model and self.electronic.engine == "batched"

    @property
    def source_hash(self) -> str:
        """sha256 of the input text."""
        return hashlib.sha256(self.source_text.encode()).hexdigest()

    def with_overrides(self, trajectories: int | None = None, duration_au: float | None = None) -> "StudyConfig":
        """The same study with more trajectories and/or a later end time (``extend``)."""
        ens, dyn = self.ensemble, self.dynamics
        if trajectories is not None:
            ens = dataclasses.replace(ens, trajectories=int(trajectories))
        if duration_au is not None:
            dyn = _dynamics_with_duration(dyn, float(duration_au), "extend --duration")
        return dataclasses.replace(self, ensemble=ens, dynamics=dyn)


def _dynamics_with_duration(dyn: DynamicsConfig, duration_au: float, key: str) -> DynamicsConfig:
    ratio = duration_au / dyn.time_step_au
    nsteps = int(round(ratio))
    if nsteps < 1 or abs(ratio - nsteps) > 1e-6 * max(1.0, ratio):
        raise ConfigError(key, f"= {duration_au:.6g} au is not a whole number of time steps ({dyn.time_step_au:.6g} au)")
    if nsteps % dyn.record_every:
        raise ConfigError(key, f"gives {nsteps} steps, not a multiple of dynamics.record_every = {dyn.record_every}")
    return dataclasses.replace(dyn, duration_au=float(duration_au), nsteps=nsteps)


