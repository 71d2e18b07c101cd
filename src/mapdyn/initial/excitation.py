"""Initial electronic state and the nuclear-ensemble absorption spectrum.

Atomic units inside (Eh, e·Bohr, Bohr²).  User-facing energy ranges and spectrum axes are in eV
(names end in ``_ev``) and converted once with ``ase.units.Hartree``.

How a sample gets its initial state (:func:`choose_initial_states`):

* ``rule="fixed"``: every geometry starts in adiabatic state ``state`` (1 = S1, ...), weight 1/n.
* ``rule="brightest"``: each geometry starts in the state with the largest oscillator strength
  f_0k (optionally only among states inside ``energy_range_ev``), weight 1/n.  Geometries with no state
  in the range are excluded.
* ``rule="energy_range"``: all states with excitation energy inside ``energy_range_ev`` (inclusive) are
  candidates, weighted by f_0k.  With ``range_assignment="draw"`` (default) each geometry i gets
  one state drawn with probability f_ik / Σ_{k∈range} f_ik and carries the weight
  w_i ∝ Σ_{k∈range} f_ik (normalised Σ w = 1); this is an unbiased estimate of the f-weighted
  sum over (geometry, state) pairs.  With ``range_assignment="all_pairs"`` every (i, k) pair in the
  range is returned with w_ik ∝ f_ik.  The draw for geometry i uses its own stream
  ``default_rng(SeedSequence(seed).spawn(n)[i].spawn(1)[0])`` (:func:`state_choice_rng`), a child of
  trajectory i's nuclear stream, so it neither consumes nor shifts the nuclear/mapping draws.
"""

from __future__ import annotations

import dataclasses
import os
from typing import Any, Sequence

import numpy as np
from ase import units

from mapdyn.files import atomic_open

__all__ = [
    "oscillator_strengths",
    "ExcitationProperties",
    "excitation_properties",
    "InitialStates",
    "choose_initial_states",
    "state_choice_rng",
    "AbsorptionSpectrum",
    "absorption_spectrum",
    "plot_absorption_spectrum",
    "CROSS_SECTION_PREFACTOR_BOHR2_HARTREE",
]

#: speed of light in atomic units (1/alpha).
C_AU: float = 1.0 / units.alpha
#: ∫σ(E) dE per unit oscillator strength: π e² h / (4πε0 m_e c) = 2π²/c in atomic units
#: (Bohr²·Eh).  Textbook integrated-absorption relation (e.g. Hilborn, Am. J. Phys. 50, 982 (1982);
#: from memory); equals the prefactor πe²ħ/(2 m_e c ε0) used for nuclear-ensemble spectra by
#: Crespo-Otero & Barbatti, Theor. Chem. Acc. 131, 1237 (2012) (from memory).
CROSS_SECTION_PREFACTOR_BOHR2_HARTREE: float = 2.0 * np.pi ** 2 / C_AU

_RULES = ("fixed", "brightest", "energy_range")
_ASSIGNMENTS = ("draw", "all_pairs")
_SHAPES = ("gaussian", "lorentzian")


def oscillator_strengths(energies_hartree: np.ndarray, transition_dipoles: np.ndarray) -> np.ndarray:
    """f_0k = (2/3) (E_k − E_0) |μ_0k|² for k = 1..F−1 (dimensionless; atomic units in).

    Length-gauge oscillator strength (standard, e.g. Hilborn 1982; from memory).  Accepts a
    leading sample axis: energies (..., F), dipoles (..., F, F, 3) -> (..., F−1).
    """
    e = np.asarray(energies_hartree, dtype=float)
    mu = np.asarray(transition_dipoles, dtype=float)
    if mu.shape[-3:] != (e.shape[-1], e.shape[-1], 3) or mu.shape[:-3] != e.shape[:-1]:
        raise ValueError(f"transition_dipoles must have shape {e.shape[:-1] + (e.shape[-1], e.shape[-1], 3)}, got {mu.shape}")
    de = e[..., 1:] - e[..., :1]
    return (2.0 / 3.0) * de * np.sum(mu[..., 0, 1:, :] ** 2, axis=-1)


@dataclasses.dataclass
class ExcitationProperties:
    """Vertical excitations at each sampled geometry.

    excitation_energies_hartree : (n, F−1) E_k − E_0, Eh, k = 1..F−1.
    oscillator_strengths : (n, F−1) f_0k, dimensionless.
    transition_dipoles : (n, F−1, 3) μ_0k, e·Bohr.
    """

    excitation_energies_hartree: np.ndarray
    oscillator_strengths: np.ndarray
    transition_dipoles: np.ndarray

    @property
    def excitation_energies_ev(self) -> np.ndarray:
        return self.excitation_energies_hartree * units.Hartree


def excitation_properties(backend: Any, positions_bohr: np.ndarray, guess: Any = None,
                          progress: bool = False) -> ExcitationProperties:
    """Run ``backend.compute(x, guess, need_gradients=False)`` at every geometry x (n, N, 3), Bohr.

    Each geometry starts from the same ``guess`` (e.g. the reference geometry's) so the result
    does not depend on sample order.  Needs ``transition_dipoles`` from the backend.
    ``progress``: a progress bar on a terminal (:func:`mapdyn.progress.iterate`).
    """
    from mapdyn.backends.contract import BackendError
    from mapdyn.progress import iterate

    x = np.asarray(positions_bohr, dtype=float)
    if x.ndim != 3 or x.shape[2] != 3:
        raise ValueError(f"positions_bohr must have shape (n, N, 3), got {x.shape}")
    if int(backend.nstates) < 2:
        raise ValueError("backend.nstates must be >= 2 (ground plus at least one excited state)")
    ee, ff, mm = [], [], []
    for i, xi in enumerate(iterate(x, "excitation energies of the sampled geometries", total=len(x), enabled=progress)):
        res = backend.compute(xi, guess=guess, need_gradients=False)
        if not res.converged:
            raise BackendError(f"electronic structure did not converge at sample {i}")
        if res.transition_dipoles is None:
            raise ValueError("backend returned no transition_dipoles; they are needed for oscillator strengths")
        e = np.asarray(res.energies, dtype=float)
        mu = np.asarray(res.transition_dipoles, dtype=float)
        ee.append(e[1:] - e[0])
        ff.append(oscillator_strengths(e, mu))
        mm.append(mu[0, 1:, :])
    return ExcitationProperties(np.array(ee), np.array(ff), np.array(mm))


def state_choice_rng(seed: int, n_samples: int, index: int) -> np.random.Generator:
    """``default_rng(SeedSequence(seed).spawn(n_samples)[index].spawn(1)[0])``: the stream used to
    draw the initial state of sample ``index`` (independent of the nuclear stream)."""
    n = int(n_samples)
    if not (0 <= int(index) < n):
        raise ValueError(f"index must be in 0..{n - 1}, got {index}")
    # SeedSequence(seed, spawn_key=(i, 0)) is identical to SeedSequence(seed).spawn(n)[i].spawn(1)[0]
    # (numpy's spawn appends the child number to spawn_key) and costs O(1) instead of O(n).
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(int(index), 0)))


@dataclasses.dataclass
class InitialStates:
    """Initial electronic states, one row per trajectory to run.

    sample_index : (m,) row of the nuclear ensemble.  state : (m,) adiabatic index (0 = ground).
    weight : (m,) statistical weight, Σ = 1 (average observables as Σ w_j O_j).
    rule, energy_range_ev, range_assignment : how they were chosen.
    """

    sample_index: np.ndarray
    state: np.ndarray
    weight: np.ndarray
    rule: str
    energy_range_ev: tuple[float, float] | None
    range_assignment: str | None


def _energy_range_mask(exc_ev: np.ndarray, energy_range_ev: Sequence[float] | None) -> np.ndarray:
    if energy_range_ev is None:
        return np.ones_like(exc_ev, dtype=bool)
    w = tuple(float(v) for v in energy_range_ev)
    if len(w) != 2 or not all(np.isfinite(w)) or not w[0] < w[1]:
        raise ValueError(f"energy_range_ev must be (low, high) in eV with low < high, got {energy_range_ev}")
    mask = (exc_ev >= w[0]) & (exc_ev <= w[1])
    if not mask.any():
        raise ValueError(f"energy_range_ev={w} eV contains no excitation at any geometry "
                         f"(excitations span {exc_ev.min():.3f}..{exc_ev.max():.3f} eV)")
    return mask


def choose_initial_states(excitation_energies_hartree: np.ndarray, oscillator_strengths: np.ndarray,
                          rule: str, *, state: int | None = None,
                          energy_range_ev: Sequence[float] | None = None,
                          range_assignment: str = "draw", seed: int | None = None) -> InitialStates:
    """Choose initial adiabatic states for n geometries (see module docstring for the rules).

    excitation_energies_hartree, oscillator_strengths : (n, F−1), Eh and dimensionless, column
    k−1 belongs to adiabatic state k.
    """
    exc = np.asarray(excitation_energies_hartree, dtype=float)
    f = np.asarray(oscillator_strengths, dtype=float)
    if exc.ndim != 2 or exc.shape[1] < 1:
        raise ValueError(f"excitation_energies_hartree must have shape (n, F-1), got {exc.shape}")
    if f.shape != exc.shape:
        raise ValueError(f"oscillator_strengths must have shape {exc.shape}, got {f.shape}")
    if np.any(f < 0) or not np.all(np.isfinite(f)):
        raise ValueError("oscillator_strengths must be finite and >= 0")
    n, nexc = exc.shape
    if rule not in _RULES:
        raise ValueError(f"rule must be one of {_RULES}, got {rule!r}")
    wtuple = None if energy_range_ev is None else (float(energy_range_ev[0]), float(energy_range_ev[1]))

    if rule == "fixed":
        if state is None or not (1 <= int(state) <= nexc):
            raise ValueError(f"state must be an excited adiabatic index in 1..{nexc} for rule='fixed', got {state}")
        return InitialStates(np.arange(n), np.full(n, int(state)), np.full(n, 1.0 / n), rule, None, None)

    mask = _energy_range_mask(exc * units.Hartree, energy_range_ev)

    if rule == "brightest":
        fm = np.where(mask, f, -np.inf)
        ok = mask.any(axis=1)
        rows = np.nonzero(ok)[0]
        states = np.argmax(fm[rows], axis=1) + 1
        return InitialStates(rows, states, np.full(rows.size, 1.0 / rows.size), rule, wtuple, None)

    # rule == "energy_range"
    if energy_range_ev is None:
        raise ValueError("energy_range_ev is required for rule='energy_range'")
    if range_assignment not in _ASSIGNMENTS:
        raise ValueError(f"range_assignment must be one of {_ASSIGNMENTS}, got {range_assignment!r}")
    fw = np.where(mask, f, 0.0)
    total = fw.sum()
    if not total > 0:
        raise ValueError(f"energy_range_ev={wtuple} eV: every excitation inside it has zero oscillator strength")
    if range_assignment == "all_pairs":
        rows, cols = np.nonzero(mask & (fw > 0))
        return InitialStates(rows, cols + 1, fw[rows, cols] / total, rule, wtuple, range_assignment)
    if seed is None:
        raise ValueError("seed is required for rule='energy_range' with range_assignment='draw'")
    per_geom = fw.sum(axis=1)
    rows = np.nonzero(per_geom > 0)[0]
    states = np.empty(rows.size, dtype=int)
    for j, i in enumerate(rows):
        u = state_choice_rng(seed, n, int(i)).random()
        cdf = np.cumsum(fw[i]) / per_geom[i]
        states[j] = int(min(np.searchsorted(cdf, u, side="right"), nexc - 1)) + 1
    return InitialStates(rows, states, per_geom[rows] / total, rule, wtuple, range_assignment)


@dataclasses.dataclass
class AbsorptionSpectrum:
    """Nuclear-ensemble absorption spectrum.

    energy_ev : (npts,) photon energy, eV.
    cross_section_angstrom2 : (npts,) σ(E), Å² per molecule (refractive index 1).
    per_state_cross_section_angstrom2 : (F−1, npts) contribution of each adiabatic state 1..F−1.
    fwhm_ev : line full width at half maximum, eV.  line_shape : "gaussian" or "lorentzian".
    n_geometries : N_p in the average.
    """

    energy_ev: np.ndarray
    cross_section_angstrom2: np.ndarray
    per_state_cross_section_angstrom2: np.ndarray
    fwhm_ev: float
    line_shape: str
    n_geometries: int

    @property
    def arbitrary_units(self) -> np.ndarray:
        """σ(E) divided by its maximum (dimensionless)."""
        peak = self.cross_section_angstrom2.max()
        return self.cross_section_angstrom2 / peak if peak > 0 else self.cross_section_angstrom2.copy()


def _line(shape: str, de: np.ndarray, fwhm: float) -> np.ndarray:
    """Area-normalised line g(ΔE) in 1/[energy]: Gaussian σ = FWHM/(2√(2 ln 2)); Lorentzian γ = FWHM/2."""
    if shape == "gaussian":
        s = fwhm / (2.0 * np.sqrt(2.0 * np.log(2.0)))
        return np.exp(-0.5 * (de / s) ** 2) / (s * np.sqrt(2.0 * np.pi))
    g = 0.5 * fwhm
    return (g / np.pi) / (de ** 2 + g ** 2)


def absorption_spectrum(excitation_energies_hartree: np.ndarray, oscillator_strengths: np.ndarray, *,
                        fwhm_ev: float = 0.1, line_shape: str = "gaussian",
                        energy_ev: np.ndarray | None = None, n_points: int = 1000) -> AbsorptionSpectrum:
    """σ(E) = (2π²/c) (1/N_p) Σ_i Σ_k f_ik g(E − ΔE_ik; FWHM) (atomic units), reported in Å².

    Nuclear-ensemble approach, Crespo-Otero & Barbatti, Theor. Chem. Acc. 131, 1237 (2012) (from
    memory); prefactor see :data:`CROSS_SECTION_PREFACTOR_BOHR2_HARTREE`.  g is area-normalised, so
    ∫σ dE = (2π²/c) ⟨Σ_k f_k⟩.  Default grid: n_points from min(ΔE) − 5 FWHM to max(ΔE) + 5 FWHM.
    """
    exc = np.asarray(excitation_energies_hartree, dtype=float)
    f = np.asarray(oscillator_strengths, dtype=float)
    if exc.ndim != 2 or f.shape != exc.shape or exc.size == 0:
        raise ValueError("excitation_energies_hartree and oscillator_strengths must both have shape (n, F-1), "
                         f"got {exc.shape} and {f.shape}")
    if line_shape not in _SHAPES:
        raise ValueError(f"line_shape must be one of {_SHAPES}, got {line_shape!r}")
    if not (np.isfinite(fwhm_ev) and fwhm_ev > 0):
        raise ValueError(f"fwhm_ev must be a positive width in eV, got {fwhm_ev}")
    exc_ev = exc * units.Hartree
    if energy_ev is None:
        if int(n_points) < 2:
            raise ValueError(f"n_points must be >= 2, got {n_points}")
        lo = max(exc_ev.min() - 5 * fwhm_ev, 0.0)
        energy_ev = np.linspace(lo, exc_ev.max() + 5 * fwhm_ev, int(n_points))
    grid_ev = np.asarray(energy_ev, dtype=float)
    if grid_ev.ndim != 1 or grid_ev.size < 2:
        raise ValueError("energy_ev must be a 1-D grid of at least 2 points")
    grid_h = grid_ev / units.Hartree
    fwhm_h = fwhm_ev / units.Hartree
    npts = exc.shape[0]
    # (F-1, npts): sum over geometries of f * g, in 1/Eh
    lines = _line(line_shape, grid_h[None, None, :] - exc[:, :, None], fwhm_h)  # (n, F-1, npts)
    per_state_bohr2 = CROSS_SECTION_PREFACTOR_BOHR2_HARTREE * np.einsum("ik,ikp->kp", f, lines) / npts
    bohr2_to_a2 = units.Bohr ** 2
    per_state = per_state_bohr2 * bohr2_to_a2
    return AbsorptionSpectrum(grid_ev, per_state.sum(axis=0), per_state, float(fwhm_ev), line_shape, npts)


def plot_absorption_spectrum(spectrum: AbsorptionSpectrum, path: str | os.PathLike, *, title: str | None = None,
                             sticks: tuple[np.ndarray, np.ndarray] | None = None, dpi: int = 150) -> str:
    """Write a PNG/PDF/SVG (by suffix) of σ(E) in Å² with per-state contributions; atomic write.

    ``sticks`` = (excitation_energies_hartree (n, F−1), oscillator_strengths (n, F−1)) adds the
    individual transitions as a stick plot on a second axis (oscillator strength).
    Returns the path written.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = os.fspath(path)
    fmt = os.path.splitext(path)[1].lstrip(".").lower() or "png"
    if fmt not in ("png", "pdf", "svg"):
        raise ValueError(f"path must end in .png, .pdf or .svg, got {path!r}")
    fig = Figure(figsize=(6.4, 4.2))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    e = spectrum.energy_ev
    per_state = spectrum.per_state_cross_section_angstrom2
    for k, sk in enumerate(per_state if per_state.shape[0] > 1 else []):
        if np.max(sk) > 1e-3 * max(np.max(spectrum.cross_section_angstrom2), 1e-300):
            ax.plot(e, sk, lw=1.0, ls="--", label=f"S{k + 1}")
    ax.plot(e, spectrum.cross_section_angstrom2, color="k", lw=1.8, label="total")
    ax.set_xlabel("photon energy / eV")
    ax.set_ylabel("cross section σ / Å²")
    ax.set_xlim(e[0], e[-1])
    ax.set_ylim(bottom=0)
    if sticks is not None:
        ax2 = ax.twinx()
        se = np.asarray(sticks[0]).reshape(-1) * units.Hartree
        sf = np.asarray(sticks[1]).reshape(-1)
        ax2.vlines(se, 0, sf, color="tab:gray", alpha=0.25, lw=0.6)
        ax2.set_ylabel("oscillator strength (sticks)")
        ax2.set_ylim(bottom=0)
    ax.legend(loc="upper left", fontsize=8)
    shape = spectrum.line_shape
    ax.set_title(title or f"nuclear ensemble, {spectrum.n_geometries} geometries, {shape} FWHM {spectrum.fwhm_ev:g} eV",
                 fontsize=9)
    fig.tight_layout()
    with atomic_open(path, "wb") as fh:
        fig.savefig(fh, format=fmt, dpi=dpi)
    return path
