"""Method options, kept orthogonal (docs/theory.md#method-options): method × window × zero-point treatment."""

from __future__ import annotations

import dataclasses
import difflib
import math

__all__ = ["MethodOptions", "SQUARE_GAMMA", "TRIANGLE_GAMMA", "METHODS", "WINDOWS", "ZERO_POINTS", "DEFAULT_WINDOW",
           "HOPPING_METHODS", "DECOHERENCE", "spin_gamma"]

#: Square-window half-width γ = (√3 − 1)/2 (Cotton & Miller, J. Phys. Chem. A 117, 7190 (2013)).
SQUARE_GAMMA = (math.sqrt(3.0) - 1.0) / 2.0
#: Triangle-window centroid offset γ = 1/3 (Cotton & Miller, J. Chem. Phys. 145, 144108 (2016)).
TRIANGLE_GAMMA = 1.0 / 3.0

METHODS = ("sqc", "ehrenfest", "spin", "mash", "fssh")
#: methods whose nuclei move on one active adiabat (mapdyn.core.hopping; docs/theory.md#surface-hopping)
HOPPING_METHODS = ("mash", "fssh")
#: FSSH decoherence corrections: none, or the energy-based one (docs/theory.md#fewest-switches-surface-hopping)
DECOHERENCE = ("none", "energy")


def spin_gamma(nstates: int) -> float:
    """Spin-mapping zero-point parameter γ_s = (√(F+1) − 1)/F per state (dimensionless) in the
    convention ρ_kk = e_k − γ_k (docs/theory.md#spin-mapping; Runeson & Richardson, J. Chem. Phys.
    152, 084110 (2020), whose γ multiplies ½ and is twice this; from memory)."""
    return (math.sqrt(nstates + 1.0) - 1.0) / nstates
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

    Neighbouring methods (docs/theory.md#neighbouring-methods), sharing sampling streams and engine:
    "spin" (spin mapping: focused actions e_k = δ_ki + γ_s, population ρ_kk; window and zero_point
    unused), "mash" (mapping approach to surface hopping, two states) and "fssh" (fewest switches).
    decoherence : "none" or "energy" (energy-based correction, C = 0.1 Eh; fssh only).
    """

    method: str = "sqc"
    window: str = DEFAULT_WINDOW
    zero_point: str = "symmetrized"
    gamma: float | None = None
    decoherence: str = "none"

    def __post_init__(self):
        if self.method not in METHODS:
            raise _choice_error("method", self.method, METHODS)
        if self.decoherence not in DECOHERENCE:
            raise _choice_error("decoherence", self.decoherence, DECOHERENCE)
        if self.decoherence != "none" and self.method != "fssh":
            raise ValueError(f"decoherence={self.decoherence!r} is not allowed with method={self.method!r}; "
                             "only fssh takes a decoherence correction")
        if self.method in ("spin",) + HOPPING_METHODS and self.zero_point != "symmetrized":
            raise ValueError(f"zero_point={self.zero_point!r} is not allowed with method={self.method!r}; "
                             "its zero point is fixed by the method (leave the default)")
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
        """γ of the window in use (dimensionless); 0 for Ehrenfest and the hopping methods."""
        if self.method in ("ehrenfest",) + HOPPING_METHODS:
            return 0.0
        if self.window == "triangle":
            return TRIANGLE_GAMMA
        return SQUARE_GAMMA if self.gamma is None else float(self.gamma)

    def describe(self) -> str:
        if self.method in ("ehrenfest", "spin", "mash"):
            return self.method
        if self.method == "fssh":
            return "fssh" if self.decoherence == "none" else f"fssh/{self.decoherence}-decoherence"
        return f"sqc/{self.window}/{self.zero_point}"

    def long_name(self) -> str:
        """The method in words, e.g. "symmetrical quasi-classical (SQC) mapping dynamics with triangle
        windows (γ = 1/3), symmetrized zero-point treatment"."""
        if self.method == "ehrenfest":
            return "Ehrenfest (mean-field) mapping dynamics"
        g = "1/3" if self.window == "triangle" else f"{self.window_gamma:.4f}"
        return (f"symmetrical quasi-classical (SQC) Meyer–Miller–Stock–Thoss mapping dynamics with {self.window} "
                f"windows (γ = {g}), {self.zero_point} zero-point treatment")
