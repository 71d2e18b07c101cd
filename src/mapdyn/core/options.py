"""Method options, kept orthogonal (docs/theory.md#method-options): method × window × zero-point treatment."""

from __future__ import annotations

import dataclasses
import difflib
import math

__all__ = ["MethodOptions", "SQUARE_GAMMA", "TRIANGLE_GAMMA", "METHODS", "WINDOWS", "ZERO_POINTS", "DEFAULT_WINDOW"]

#: Square-window half-width γ = (√3 − 1)/2 (Cotton & Miller, J. Phys. Chem. A 117, 7190 (2013)).
SQUARE_GAMMA = (math.sqrt(3.0) - 1.0) / 2.0
#: Triangle-window centroid offset γ = 1/3 (Cotton & Miller, J. Chem. Phys. 145, 144108 (2016)).
TRIANGLE_GAMMA = 1.0 / 3.0

METHODS = ("sqc", "ehrenfest")
WINDOWS = ("square", "triangle")
#: The window used when none is given — by studies, ``mapdyn validate`` and :class:`MethodOptions`
#: alike: the triangle window, the better validated of the two (Cotton & Miller 2016; docs/theory.md).
DEFAULT_WINDOW = "triangle"
ZERO_POINTS = ("symmetrized", "adjusted", "fixed")


def _choice_error(name: str, value, allowed) -> ValueError:
    hint = difflib.get_close_matches(str(value), allowed, n=1)
    extra = f" (did you mean {hint[0]!r}?)" if hint else ""
    return ValueError(f"{name}={value!r} is not allowed; choose one of {', '.join(allowed)}{extra}")


@dataclasses.dataclass(frozen=True)
class MethodOptions:
    """How the electronic oscillators are sampled, propagated and read out.

    method : "sqc" (windowed mapping) or "ehrenfest" (mean field, actions (1, 0, …), γ = 0).
    window : "square" (γ = (√3−1)/2) or "triangle" (γ = 1/3, the default :data:`DEFAULT_WINDOW`);
        decides sampling and binning (sqc only).
    zero_point : "symmetrized" (trace-subtracted Hamiltonian, Σ ρ̃_kk = 1; default), "adjusted"
        (trajectory-adjusted γ_k = e_k(0) − N_k) or "fixed" (plain MMST with one γ; models only).
    gamma : override of the square-window half-width (dimensionless, 0 < γ < 1/2); None = standard.
    """

    method: str = "sqc"
    window: str = DEFAULT_WINDOW
    zero_point: str = "symmetrized"
    gamma: float | None = None

    def __post_init__(self):
        if self.method not in METHODS:
            raise _choice_error("method", self.method, METHODS)
        if self.window not in WINDOWS:
            raise _choice_error("window", self.window, WINDOWS)
        if self.zero_point not in ZERO_POINTS:
            raise _choice_error("zero_point", self.zero_point, ZERO_POINTS)
        if self.gamma is not None:
            g = self.gamma
            if isinstance(g, bool) or not isinstance(g, (int, float)) or not math.isfinite(g) or not 0.0 < g < 0.5:
                raise ValueError(f"gamma={g!r} is not allowed; the window half-width must lie strictly between 0 and 1/2")
            if self.window == "triangle":
                raise ValueError("gamma cannot be set for window='triangle' (its γ = 1/3 is fixed by the triangle geometry)")

    @property
    def window_gamma(self) -> float:
        """γ of the window in use (dimensionless); 0 for Ehrenfest."""
        if self.method == "ehrenfest":
            return 0.0
        if self.window == "triangle":
            return TRIANGLE_GAMMA
        return SQUARE_GAMMA if self.gamma is None else float(self.gamma)

    def describe(self) -> str:
        if self.method == "ehrenfest":
            return "ehrenfest"
        return f"sqc/{self.window}/{self.zero_point}"

    def long_name(self) -> str:
        """The method in words, e.g. "symmetrical quasi-classical (SQC) mapping dynamics with triangle
        windows (γ = 1/3), symmetrized zero-point treatment"."""
        if self.method == "ehrenfest":
            return "Ehrenfest (mean-field) mapping dynamics"
        g = "1/3" if self.window == "triangle" else f"{self.window_gamma:.4f}"
        return (f"symmetrical quasi-classical (SQC) Meyer–Miller–Stock–Thoss mapping dynamics with {self.window} "
                f"windows (γ = {g}), {self.zero_point} zero-point treatment")
