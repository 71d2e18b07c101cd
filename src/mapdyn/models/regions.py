"""Interaction region of a one-dimensional model: where its Hamiltonian still varies (Bohr)."""

from __future__ import annotations

import numpy as np

from mapdyn.core.model import DiabaticModel

__all__ = ["default_interaction_region"]


def default_interaction_region(model: DiabaticModel, gradient_tolerance: float = 1e-5,
                               search_range: tuple = (-200.0, 200.0), spacing: float = 0.01) -> tuple[float, float]:
    """The smallest interval [a, b] (Bohr) outside which every |∂H_kl/∂x| < ``gradient_tolerance``
    (Eh/Bohr), searched on ``search_range`` with ``spacing``.  Outside it the forces vanish and the
    adiabatic states are fixed, so channel and state no longer change."""
    if model.ndof != 1:
        raise ValueError(f"model has ndof={model.ndof}; an interaction region is defined for 1D models")
    x = np.arange(search_range[0], search_range[1] + spacing, spacing)
    big = np.max(np.abs(model.hamiltonian_gradient(x[:, None])[:, 0]), axis=(1, 2)) > gradient_tolerance
    if not big.any():
        raise ValueError(f"gradient_tolerance={gradient_tolerance!r}: the model has no interaction region in {search_range}")
    idx = np.nonzero(big)[0]
    if idx[0] == 0 or idx[-1] == x.size - 1:
        raise ValueError(f"search_range={search_range!r} is too small; the potential still varies at its ends")
    return float(x[idx[0]] - spacing), float(x[idx[-1]] + spacing)
