"""Ground-state geometry optimisation on any backend through a thin ASE calculator, and the
level-of-theory bookkeeping of initial conditions (Hartree atomic units inside; ASE's eV/Å only
inside :class:`GroundStateCalculator`).

Workflow of the initial-conditions stage::

    opt = optimize_ground_state(backend, symbols, x0, level_of_theory="RHF/6-31G")
    hess = compute_hessian(backend, opt.positions_bohr, level_of_theory=opt.level_of_theory)
    modes = normal_modes(hess.hessian, symbols, opt.positions_bohr)
    ens = sample_wigner(modes, n_trajectories=100, seed=7, temperature_kelvin=0.0)

(:mod:`mapdyn.initial.normal_modes`, :mod:`mapdyn.initial.wigner`; excitation choice and spectra in
:mod:`mapdyn.initial.excitation`.)
"""

from __future__ import annotations

import dataclasses
import re
import warnings
from typing import Any, Sequence

import numpy as np
from ase import Atoms, units
from ase.calculators.calculator import Calculator, all_changes
from ase.data import atomic_masses, atomic_numbers

from mapdyn.backends.contract import BackendError

#: default convergence threshold on max |dE_0/dR| component, Eh/Bohr.  1.5e-5 Eh/Bohr is the
#: widely used "tight" optimisation criterion on the largest force component (common practice).
DEFAULT_GRADIENT_THRESHOLD: float = 1.5e-5
#: modes with |omega| below this (cm^-1) are dropped with a warning (stated rule, see normal_modes).
DEFAULT_TINY_FREQUENCY_CM: float = 10.0


class LevelOfTheoryWarning(UserWarning):
    """The initial conditions were made at a different level of theory than the dynamics."""


class ModeDroppedWarning(UserWarning):
    """A normal mode was excluded from sampling (tiny or allowed-imaginary frequency)."""


def _normalise_level(text: str) -> str:
    return re.sub(r"\s+", " ", str(text).strip().lower())


def check_level_of_theory(initial_conditions_level: str, dynamics_level: str) -> bool:
    """Return True when both descriptions agree (case/whitespace-insensitive); warn otherwise.

    The geometry, Hessian and Wigner ensemble should come from the same potential as the dynamics;
    a mismatch puts the ensemble off the dynamics' minimum and gives it the wrong zero-point energy.
    """
    same = _normalise_level(initial_conditions_level) == _normalise_level(dynamics_level)
    if not same:
        warnings.warn(
            f"initial conditions were made at level of theory {initial_conditions_level!r} but the "
            f"dynamics runs at {dynamics_level!r}; the ensemble is not at the dynamics' minimum",
            LevelOfTheoryWarning, stacklevel=2)
    return same


def masses_amu_for(symbols: Sequence[str]) -> np.ndarray:
    """Isotope-averaged atomic masses (amu) from ``ase.data.atomic_masses``."""
    out = []
    for s in symbols:
        if s not in atomic_numbers:
            raise ValueError(f"symbols: unknown element {s!r}")
        out.append(atomic_masses[atomic_numbers[s]])
    return np.asarray(out, dtype=float)


def _as_positions(positions_bohr: np.ndarray, natoms: int | None = None) -> np.ndarray:
    x = np.array(positions_bohr, dtype=float)
    if x.ndim != 2 or x.shape[1] != 3 or (natoms is not None and x.shape[0] != natoms):
        want = f"({natoms}, 3)" if natoms is not None else "(N, 3)"
        raise ValueError(f"positions_bohr must have shape {want}, got {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("positions_bohr contains non-finite values")
    return x


# --------------------------------------------------------------------------------------------
# ASE boundary and geometry optimisation
# --------------------------------------------------------------------------------------------

class GroundStateCalculator(Calculator):
    """ASE calculator exposing one state of a mapdyn backend (default: the ground state, index 0).

    The only place where units change: positions Å → Bohr on the way in, energy Eh → eV and
    force −dE/dR Eh/Bohr → eV/Å on the way out (``ase.units``).  The backend's ``guess`` from the
    previous call is passed to the next call (warm start along the optimisation path).
    """

    implemented_properties = ["energy", "forces"]

    def __init__(self, backend: Any, state: int = 0, **kwargs):
        super().__init__(**kwargs)
        if state < 0 or state >= int(backend.nstates):
            raise ValueError(f"state must be in 0..{int(backend.nstates) - 1}, got {state}")
        self.backend = backend
        self.state = int(state)
        self.guess: Any = None
        self.n_backend_calls = 0
        self.last_gradient_hartree_per_bohr: np.ndarray | None = None
        self.last_energy_hartree: float | None = None

    def calculate(self, atoms=None, properties=("energy",), system_changes=all_changes):
        super().calculate(atoms, properties, system_changes)
        x = self.atoms.get_positions() / units.Bohr
        res = self.backend.compute(x, guess=self.guess, need_gradients=True)
        self.n_backend_calls += 1
        if not res.converged:
            raise BackendError("electronic structure did not converge during geometry optimisation")
        res.validate(natoms=len(self.atoms))
        if res.gradients is None:
            raise BackendError("backend returned no gradients although need_gradients=True")
        self.guess = res.guess
        e = float(res.energies[self.state])
        g = np.asarray(res.gradients[self.state], dtype=float)
        self.last_energy_hartree = e
        self.last_gradient_hartree_per_bohr = g.copy()
        self.results["energy"] = e * units.Hartree
        self.results["forces"] = -g * (units.Hartree / units.Bohr)


@dataclasses.dataclass
class OptimizedGeometry:
    """Result of :func:`optimize_ground_state`.

    positions_bohr : (N, 3) optimised geometry, Bohr.
    energy_hartree : state energy at that geometry, Eh.
    max_gradient_hartree_per_bohr : largest |dE/dR| component there, Eh/Bohr.
    gradient_threshold_hartree_per_bohr : the convergence threshold used, Eh/Bohr.
    converged : max gradient component below the threshold.
    n_steps, n_backend_calls : optimiser steps and electronic-structure calls.
    level_of_theory : caller's description of the method (e.g. "RHF/6-31G").
    guess : backend guess at the final geometry (to start the Hessian from).
    """

    symbols: list[str]
    positions_bohr: np.ndarray
    energy_hartree: float
    max_gradient_hartree_per_bohr: float
    gradient_threshold_hartree_per_bohr: float
    converged: bool
    n_steps: int
    n_backend_calls: int
    level_of_theory: str
    optimizer: str
    guess: Any = None


_OPTIMIZERS = ("BFGS", "FIRE", "LBFGS", "BFGSLineSearch")


def optimize_ground_state(backend: Any, symbols: Sequence[str], positions_bohr: np.ndarray,
                          level_of_theory: str, *,
                          gradient_threshold: float = DEFAULT_GRADIENT_THRESHOLD,
                          optimizer: str = "BFGS", max_steps: int = 200, state: int = 0,
                          logfile: str | None = None,
                          dynamics_level_of_theory: str | None = None) -> OptimizedGeometry:
    """Minimise E_state(R) (default ground state) with an ASE optimiser.

    Convergence: the largest Cartesian component of dE/dR is below ``gradient_threshold``
    (Eh/Bohr).  ASE stops when max_atom |F_atom| < fmax; we pass fmax = threshold (converted to
    eV/Å), which implies the component criterion, and then re-check it on the final gradient.
    Raises RuntimeError if ``max_steps`` is exhausted without convergence.
    """
    import ase.optimize

    symbols = list(symbols)
    x0 = _as_positions(positions_bohr, len(symbols))
    if not (np.isfinite(gradient_threshold) and gradient_threshold > 0):
        raise ValueError(f"gradient_threshold must be a positive number (Eh/Bohr), got {gradient_threshold}")
    if optimizer not in _OPTIMIZERS:
        raise ValueError(f"optimizer must be one of {_OPTIMIZERS}, got {optimizer!r}")
    if int(max_steps) < 1:
        raise ValueError(f"max_steps must be >= 1, got {max_steps}")
    if not isinstance(level_of_theory, str) or not level_of_theory.strip():
        raise ValueError("level_of_theory must be a non-empty description string, e.g. 'RHF/6-31G'")
    if dynamics_level_of_theory is not None:
        check_level_of_theory(level_of_theory, dynamics_level_of_theory)

    atoms = Atoms(symbols, positions=x0 * units.Bohr)
    calc = GroundStateCalculator(backend, state=state)
    atoms.calc = calc
    fmax_ev_per_ang = gradient_threshold * units.Hartree / units.Bohr
    opt = getattr(ase.optimize, optimizer)(atoms, logfile=logfile)
    opt.run(fmax=fmax_ev_per_ang, steps=int(max_steps))
    atoms.get_forces()  # make sure the final geometry has been evaluated
    g = calc.last_gradient_hartree_per_bohr
    gmax = float(np.max(np.abs(g)))
    converged = gmax < gradient_threshold
    if not converged:
        raise RuntimeError(
            f"geometry optimisation did not converge in max_steps={max_steps}: max gradient "
            f"component {gmax:.3e} Eh/Bohr >= gradient_threshold {gradient_threshold:.3e}")
    return OptimizedGeometry(
        symbols=symbols,
        positions_bohr=atoms.get_positions() / units.Bohr,
        energy_hartree=float(calc.last_energy_hartree),
        max_gradient_hartree_per_bohr=gmax,
        gradient_threshold_hartree_per_bohr=float(gradient_threshold),
        converged=converged,
        n_steps=int(opt.nsteps),
        n_backend_calls=calc.n_backend_calls,
        level_of_theory=level_of_theory,
        optimizer=optimizer,
        guess=calc.guess,
    )


