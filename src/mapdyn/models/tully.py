"""Tully's one-dimensional two-state scattering models, batched, atomic units, mass 2000 a.u.

J. C. Tully, "Molecular dynamics with electronic transitions", J. Chem. Phys. 93, 1061 (1990).
Parameters are the universally reproduced values (from memory; matrix elements are tested
against the formulas written out independently in tests/test_models_tully.py).
"""

from __future__ import annotations

import numpy as np

from mapdyn.core.model import DiabaticModel, as_positions

__all__ = ["SimpleAvoidedCrossing", "DualAvoidedCrossing", "ExtendedCoupling", "WideLinearCrossing", "tully_model"]


class _OneDimensionalTwoState(DiabaticModel):
    nstates = 2
    ndof = 1

    def __init__(self, mass: float = 2000.0):
        if not np.isfinite(mass) or mass <= 0:
            raise ValueError(f"mass={mass!r} is not allowed; it must be a positive number of electron masses")
        self.masses = np.array([float(mass)])

    def _elements(self, x):  # -> (v11, v22, v12, dv11, dv22, dv12)
        raise NotImplementedError

    def hamiltonian(self, R):
        x = as_positions(R, 1)[:, 0]
        v11, v22, v12, *_ = self._elements(x)
        H = np.empty((x.size, 2, 2))
        H[:, 0, 0], H[:, 1, 1], H[:, 0, 1], H[:, 1, 0] = v11, v22, v12, v12
        return H

    def hamiltonian_gradient(self, R):
        x = as_positions(R, 1)[:, 0]
        *_, d11, d22, d12 = self._elements(x)
        G = np.empty((x.size, 1, 2, 2))
        G[:, 0, 0, 0], G[:, 0, 1, 1], G[:, 0, 0, 1], G[:, 0, 1, 0] = d11, d22, d12, d12
        return G


class SimpleAvoidedCrossing(_OneDimensionalTwoState):
    """Tully model 1: V11 = A(1 − e^{−Bx}) (x > 0), −A(1 − e^{Bx}) (x < 0); V22 = −V11; V12 = C e^{−Dx²}.

    A = 0.01 Eh, B = 1.6 /Bohr, C = 0.005 Eh, D = 1.0 /Bohr².
    """

    name = "tully1"

    def __init__(self, A=0.01, B=1.6, C=0.005, D=1.0, mass=2000.0):
        super().__init__(mass)
        self.A, self.B, self.C, self.D = A, B, C, D

    def _elements(self, x):
        A, B, C, D = self.A, self.B, self.C, self.D
        ex = np.exp(-B * np.abs(x))
        v11 = np.sign(x) * A * (1.0 - ex)
        d11 = A * B * ex
        v12 = C * np.exp(-D * x * x)
        return v11, -v11, v12, d11, -d11, -2.0 * D * x * v12


class DualAvoidedCrossing(_OneDimensionalTwoState):
    """Tully model 2: V11 = 0; V22 = −A e^{−Bx²} + E0; V12 = C e^{−Dx²}.

    A = 0.10 Eh, B = 0.28 /Bohr², E0 = 0.05 Eh, C = 0.015 Eh, D = 0.06 /Bohr².
    """

    name = "tully2"

    def __init__(self, A=0.10, B=0.28, E0=0.05, C=0.015, D=0.06, mass=2000.0):
        super().__init__(mass)
        self.A, self.B, self.E0, self.C, self.D = A, B, E0, C, D

    def _elements(self, x):
        g = self.A * np.exp(-self.B * x * x)
        v12 = self.C * np.exp(-self.D * x * x)
        zero = np.zeros_like(x)
        return zero, self.E0 - g, v12, zero, 2.0 * self.B * x * g, -2.0 * self.D * x * v12


class ExtendedCoupling(_OneDimensionalTwoState):
    """Tully model 3: V11 = A, V22 = −A; V12 = B e^{Cx} (x < 0), B(2 − e^{−Cx}) (x > 0).

    A = 6e-4 Eh, B = 0.10 Eh, C = 0.90 /Bohr.  The lower adiabat is diabat 2 at x → −∞.
    """

    name = "tully3"

    def __init__(self, A=6e-4, B=0.10, C=0.90, mass=2000.0):
        super().__init__(mass)
        self.A, self.B, self.C = A, B, C

    def _elements(self, x):
        A, B, C = self.A, self.B, self.C
        ex = np.exp(-C * np.abs(x))
        v12 = np.where(x < 0, B * ex, B * (2.0 - ex))
        d12 = B * C * ex
        a = np.full_like(x, A)
        zero = np.zeros_like(x)
        return a, -a, v12, zero, zero, d12


class WideLinearCrossing(_OneDimensionalTwoState):
    """A wide, nearly linear crossing built for the Landau–Zener regime (docs/theory.md#validation-benchmarks).

    V11 = −V22 = ½ ΔF W tanh(x/W), V12 = C exp(−(x/W)²); defaults W = 20 Bohr, ΔF = 0.01 Eh/Bohr,
    C = 0.003 Eh.  Near x = 0 the diabatic slope difference is ΔF.
    """

    name = "wide_crossing"

    def __init__(self, width=20.0, slope_difference=0.01, coupling=0.003, mass=2000.0):
        super().__init__(mass)
        self.W, self.dF, self.C = width, slope_difference, coupling

    def _elements(self, x):
        W, dF, C = self.W, self.dF, self.C
        t = np.tanh(x / W)
        v11 = 0.5 * dF * W * t
        d11 = 0.5 * dF * (1.0 - t * t)
        v12 = C * np.exp(-(x / W) ** 2)
        return v11, -v11, v12, d11, -d11, -2.0 * x / W**2 * v12


_MODELS = {"tully1": SimpleAvoidedCrossing, "tully2": DualAvoidedCrossing, "tully3": ExtendedCoupling,
           "wide_crossing": WideLinearCrossing}


def tully_model(name: str, **params) -> DiabaticModel:
    """Build a 1D model by name: tully1, tully2, tully3 or wide_crossing."""
    if name not in _MODELS:
        raise ValueError(f"model={name!r} is not allowed; choose one of {', '.join(_MODELS)}")
    return _MODELS[name](**params)
