"""Backend and model objects for a study configuration (PySCF backends imported lazily)."""

from __future__ import annotations

import os

import numpy as np

from mapdyn.study.config import StudyConfig


# ----------------------------------------------------------------------------------------------
# backends and models
# ----------------------------------------------------------------------------------------------
def make_model(config: StudyConfig):
    """The diabatic model of a model study."""
    from mapdyn.models.tully import tully_model
    from mapdyn.study.model_input import BATH_MODELS, bath_model

    if config.electronic.model in BATH_MODELS:
        return bath_model(config.electronic.model, config.electronic.model_parameters)

    return tully_model(config.electronic.model, **config.electronic.model_parameters)


def make_backend(config: StudyConfig):
    """The electronic backend of the dynamics (PySCF pinned to one thread)."""
    e = config.electronic
    if e.backend == "model":
        from mapdyn.backends.model_adapter import ModelAdapterBackend

        return ModelAdapterBackend(make_model(config))
    if e.backend == "callback":
        from mapdyn.backends.callback import CallbackBackend
        from mapdyn.study.config import _resolve_callback

        return CallbackBackend(_resolve_callback(e.function, os.getcwd()), e.states, config.molecule.natoms)
    from mapdyn.backends.pyscf.common import pin_threads

    pin_threads(1)
    symbols = list(config.molecule.symbols)
    if e.backend == "casscf":
        from mapdyn.backends.pyscf.casscf import CASSCFBackend

        return CASSCFBackend(symbols, **e.options)
    from mapdyn.backends.pyscf.tddft import TDDFTBackend

    return TDDFTBackend(symbols, threads=1, **e.options)


class _GroundStateOf:
    """State 0 of an excited-state backend, as a one-state backend (for optimisation/Hessian)."""

    nstates = 1

    def __init__(self, backend):
        self.backend = backend

    def compute(self, positions_bohr, guess=None, need_gradients=True):
        from mapdyn.backends.contract import ElectronicResult

        r = self.backend.compute(positions_bohr, guess=guess, need_gradients=need_gradients)
        return ElectronicResult(energies=np.asarray(r.energies[:1]),
                                gradients=None if r.gradients is None else np.asarray(r.gradients[:1]),
                                guess=r.guess, converged=r.converged, diagnostics=dict(r.diagnostics))


def _ground_state_backend(config: StudyConfig, dynamics_backend):
    e = config.electronic
    if config.initial.normal_modes_from == "dynamics":
        return _GroundStateOf(dynamics_backend), e.level_of_theory + " (state 0)"
    from mapdyn.backends.pyscf.ground_state import PySCFGroundState

    xc = e.options.get("xc") if e.backend == "tddft" else None
    gs = PySCFGroundState(list(config.molecule.symbols), e.basis, xc=xc, charge=config.molecule.charge)
    return gs, gs.level_of_theory




def model_initial_ensemble(config: StudyConfig, model, count: int, first_index: int = 0):
    """Initial :class:`mapdyn.core.sampling.EnsembleState` of trajectories ``first_index`` … of a
    batched model study: the Gaussian wavepacket of ``[initial]`` (Tully models) or, for the
    harmonic-bath models, the thermal Wigner bath at ``initial.temperature`` on a diabatic state."""
    init = config.initial
    if init.bath_center:
        from mapdyn.models.spin_boson import thermal_bath_ensemble
        from mapdyn.units import KB_IN_HARTREE_PER_K

        beta = 1.0 / (KB_IN_HARTREE_PER_K * init.temperature_kelvin) if init.temperature_kelvin > 0 else np.inf
        return thermal_bath_ensemble(model, count, config.ensemble.seed, beta, init.state, config.options,
                                     bath_center=init.bath_center, first_index=first_index)
    from mapdyn.core.sampling import gaussian_wavepacket_ensemble

    return gaussian_wavepacket_ensemble(model, count, config.ensemble.seed, np.array(init.position_bohr),
                                        np.array(init.momentum_au), np.array(init.width_bohr), init.state,
                                        config.options, basis=init.basis, first_index=first_index)
