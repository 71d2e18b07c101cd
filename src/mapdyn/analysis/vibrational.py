"""Vibrational states of diatomic fragments from final phase points (Bohr–Sommerfeld).

For a fragment made of atoms a, b (masses m_a, m_b, reduced mass μ = m_a m_b/(m_a + m_b)) with
relative coordinate r = R_b − R_a and relative velocity u = Ṙ_b − Ṙ_a:

    p_r = μ u·r̂,   L = μ |r × u|,   V_eff(r) = V(r) + L² / (2 μ r²),
    E = p_r² / (2μ) + V_eff(r),
    (v + ½) = (1/2π) ∮ p dr = (1/π) ∫_{r<}^{r>} √(2μ (E − V_eff(r))) dr,

between the turning points r< ≤ r ≤ r> of the well the fragment is in (ħ = 1, atomic units).
This is the semiclassical (Bohr–Sommerfeld / WKB) quantisation condition with the Maslov ½
(e.g. Child, "Semiclassical Mechanics with Molecular Applications", OUP 1991; common practice in
quasi-classical trajectory product analysis).  For the Morse potential it reproduces the exact
eigenvalues E_v = ω(v + ½) − ω²(v + ½)²/(4D), ω = a√(2D/μ) (Morse, Phys. Rev. 34, 57 (1929)).
The rotational (centrifugal) term uses the classical L² of the fragment (L² ≈ J(J + 1));
the continuous rotational number J = −½ + √(¼ + L²) is reported alongside.

Fragments whose energy lies above V_eff everywhere outside r (no outer turning point within the
potential's range) are *unbound* (v = NaN).  Fragments above the dissociation asymptote but
trapped behind the centrifugal barrier are counted as bound and reported as *quasi-bound*.

Binning of the continuous v (both stated in every result):

* histogram boxes: level n collects v ∈ [n − ½, n + ½); fractions of all bound fragments.
* symmetric bins (SQC-like): level n collects |v − n| ≤ w (default w = (√3 − 1)/2, the square
  SQC half-width); fractions of the fragments inside any bin (binned normalisation,
  P_n = N_n / Σ N_n'), and the number outside all bins is reported.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
from typing import Any, Callable, Sequence

import numpy as np
from scipy import interpolate, optimize

from mapdyn.core.options import SQUARE_GAMMA
from mapdyn.files import atomic_open

__all__ = [
    "FragmentPotential",
    "MorseCurve",
    "scan_fragment_potential",
    "PhasePoint",
    "fragment_phase_points",
    "vibrational_quantum_numbers",
    "VibrationalDistribution",
    "vibrational_distribution",
    "FragmentAnalysis",
    "analyze_fragment",
]

_GL_X, _GL_W = np.polynomial.legendre.leggauss(256)


# ----------------------------------------------------------------------------------------------
# potentials
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class FragmentPotential:
    """Potential-energy curve V(r) of an isolated diatomic fragment (r in Bohr, V in Eh).

    energy : vectorised callable r (m,) → V (m,); r_range : (r_lo, r_hi) Bohr where it may be
    evaluated (turning points are searched inside); source : how it was obtained (recorded in
    reports: "curve …", "callable …" or "scan …").
    """

    energy: Callable[[np.ndarray], np.ndarray]
    r_range: tuple[float, float]
    source: str
    r_grid: np.ndarray | None = None
    v_grid: np.ndarray | None = None

    def __post_init__(self):
        lo, hi = (float(x) for x in self.r_range)
        if not (np.isfinite(lo) and np.isfinite(hi) and 0.0 < lo < hi):
            raise ValueError(f"r_range={self.r_range!r} is not allowed; it must be 0 < r_lo < r_hi (Bohr)")
        self.r_range = (lo, hi)

    def __call__(self, r: np.ndarray) -> np.ndarray:
        return np.asarray(self.energy(np.asarray(r, dtype=float)), dtype=float)

    @classmethod
    def from_curve(cls, r_bohr: Sequence[float], energy_hartree: Sequence[float], source: str = "") -> "FragmentPotential":
        """Cubic-spline interpolation (scipy CubicSpline, not-a-knot) of tabulated points."""
        r = np.asarray(r_bohr, dtype=float)
        v = np.asarray(energy_hartree, dtype=float)
        if r.ndim != 1 or r.shape != v.shape or r.size < 4:
            raise ValueError("fragment curve needs matching 1-D r_bohr and energy_hartree arrays with ≥ 4 points")
        order = np.argsort(r)
        r, v = r[order], v[order]
        if np.any(np.diff(r) <= 0) or not np.all(np.isfinite(v)) or r[0] <= 0:
            raise ValueError("fragment curve: r_bohr must be positive and distinct, energies finite")
        spline = interpolate.CubicSpline(r, v)
        return cls(lambda x: spline(x), (float(r[0]), float(r[-1])),
                   source or f"curve: {r.size} points, r = {r[0]:.4g}–{r[-1]:.4g} Bohr, cubic spline", r, v)

    @classmethod
    def from_callable(cls, fn: Callable[[np.ndarray], np.ndarray], r_range: tuple[float, float] = (0.3, 30.0),
                      source: str = "") -> "FragmentPotential":
        """A user function V(r) (vectorised, Bohr → Eh), evaluated only inside ``r_range``."""
        if not callable(fn):
            raise ValueError("fragment potential must be callable: V(r_bohr) -> energy_hartree")
        name = getattr(fn, "__name__", type(fn).__name__)
        return cls(fn, r_range, source or f"callable: {name}, r in {r_range[0]:g}–{r_range[1]:g} Bohr")


@dataclasses.dataclass(frozen=True)
class MorseCurve:
    """Morse potential V(r) = D (1 − exp(−a (r − r_e)))² (Morse, Phys. Rev. 34, 57 (1929)).

    D (Eh), a (1/Bohr), r_e (Bohr).  ``levels(mu)`` gives the exact eigenvalues
    E_v = ω(v + ½) − ω²(v + ½)²/(4D), ω = a √(2D/μ), for v = 0 … v_max (largest v with E_v < D).
    """

    D: float
    a: float
    r_e: float

    def __call__(self, r: np.ndarray) -> np.ndarray:
        return self.D * (1.0 - np.exp(-self.a * (np.asarray(r, dtype=float) - self.r_e))) ** 2

    def omega(self, mu: float) -> float:
        return self.a * np.sqrt(2.0 * self.D / mu)

    def energy_of(self, v: np.ndarray | float, mu: float) -> np.ndarray:
        """E(v) for continuous v (Eh); the Bohr–Sommerfeld inverse of the Morse action."""
        w = self.omega(mu)
        x = np.asarray(v, dtype=float) + 0.5
        return w * x - (w * x) ** 2 / (4.0 * self.D)

    def v_max(self, mu: float) -> int:
        return int(np.floor(2.0 * self.D / self.omega(mu) - 0.5 - 1e-12))

    def levels(self, mu: float) -> np.ndarray:
        return self.energy_of(np.arange(self.v_max(mu) + 1), mu)

    def potential(self, r_range: tuple[float, float] | None = None) -> FragmentPotential:
        rr = r_range or (max(self.r_e - 2.5 / self.a, 0.05), self.r_e + 40.0 / self.a)
        return FragmentPotential(self, rr, f"Morse D = {self.D:g} Eh, a = {self.a:g}/Bohr, r_e = {self.r_e:g} Bohr")


def _atomic_savez(path: str, **arrays) -> None:
    with atomic_open(path, "wb") as fh:
        np.savez(fh, **arrays)


def scan_fragment_potential(backend: Any, r_grid_bohr: Sequence[float], *, state: int = 0,
                            cache_path: str | os.PathLike | None = None, label: str = "") -> FragmentPotential:
    """Scan the isolated fragment with ``backend`` (the backend contract, positions (2, 3) Bohr)
    along r_grid (Bohr) on adiabatic ``state``; cubic-spline the energies (Eh).

    With ``cache_path`` (e.g. ``<study>/fragments/<name>.npz``) the scan is stored atomically and
    reused when the grid, state and ``label`` (describe the level of theory here) match.  Points
    are computed from the shortest r outwards, each warm-started from the previous one.
    """
    r = np.asarray(r_grid_bohr, dtype=float)
    if r.ndim != 1 or r.size < 4 or np.any(np.diff(r) <= 0) or r[0] <= 0:
        raise ValueError("r_grid_bohr must be ≥ 4 increasing positive distances (Bohr)")
    lot = getattr(backend, "level_of_theory", None)
    lot = lot() if callable(lot) else lot
    level = label or (str(lot) if lot else type(backend).__name__)
    key = hashlib.sha256(json.dumps({"r": r.tolist(), "state": int(state), "label": level}).encode()).hexdigest()[:16]
    if cache_path is not None:
        cache_path = os.fspath(cache_path)
        if os.path.exists(cache_path):
            with np.load(cache_path, allow_pickle=False) as z:
                if str(z["key"]) == key:
                    return FragmentPotential.from_curve(z["r"], z["energy"],
                                                        source=f"scan (cached {os.path.basename(cache_path)}): {level}, "
                                                               f"state {state}, {r.size} points {r[0]:.3g}–{r[-1]:.3g} Bohr")
    energies = np.empty_like(r)
    guess = None
    for k, rk in enumerate(r):
        pos = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, rk]])
        res = backend.compute(pos, guess=guess, need_gradients=False)
        energies[k] = float(np.asarray(res.energies)[state])
        guess = res.guess
    if cache_path is not None:
        os.makedirs(os.path.dirname(cache_path) or ".", exist_ok=True)
        _atomic_savez(cache_path, r=r, energy=energies, key=np.array(key), state=np.array(int(state)),
                      label=np.array(level))
    return FragmentPotential.from_curve(r, energies, source=f"scan: {level}, state {state}, {r.size} points "
                                                            f"{r[0]:.3g}–{r[-1]:.3g} Bohr")


# ----------------------------------------------------------------------------------------------
# phase points → continuous quantum numbers
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class PhasePoint:
    """Relative-motion phase points of fragments (atomic units): r (m,) Bohr, p_r (m,) radial
    momentum, L (m,) angular momentum (ħ), mu reduced mass (electron masses)."""

    r: np.ndarray
    p_r: np.ndarray
    L: np.ndarray
    mu: float


def fragment_phase_points(positions_bohr: np.ndarray, momenta: np.ndarray, masses: np.ndarray,
                          atoms: tuple[int, int]) -> PhasePoint:
    """Relative coordinate, radial momentum and angular momentum of atoms (a, b).

    positions (m, N, 3) Bohr, momenta (m, N, 3) a.u., masses (N,) electron masses.
    r = |R_b − R_a|, u = P_b/m_b − P_a/m_a, p_r = μ u·r̂, L = μ |r⃗ × u|.
    """
    a, b = (int(x) for x in atoms)
    R = np.asarray(positions_bohr, dtype=float)
    P = np.asarray(momenta, dtype=float)
    m = np.asarray(masses, dtype=float)
    if R.ndim == 2:
        R, P = R[None], P[None]
    if a == b or min(a, b) < 0 or max(a, b) >= R.shape[1]:
        raise ValueError(f"fragment atoms={atoms!r} is not allowed; give two distinct indices in 0..{R.shape[1] - 1}")
    mu = m[a] * m[b] / (m[a] + m[b])
    rv = R[:, b] - R[:, a]
    u = P[:, b] / m[b] - P[:, a] / m[a]
    r = np.linalg.norm(rv, axis=1)
    p_r = mu * np.einsum("ij,ij->i", u, rv) / r
    L = mu * np.linalg.norm(np.cross(rv, u), axis=1)
    return PhasePoint(r, p_r, L, float(mu))


def _turning_point(f: Callable, r0: float, r_end: float, n: int = 4000) -> float | None:
    """First r between r0 and r_end (either direction) where f changes sign from ≥ 0 to < 0."""
    grid = np.linspace(r0, r_end, n)
    vals = f(grid)
    neg = np.nonzero(vals < 0)[0]
    if neg.size == 0:
        return None
    k = neg[0]
    if k == 0:
        return float(r0)
    return float(optimize.brentq(f, grid[k - 1], grid[k], xtol=1e-14, rtol=4 * np.finfo(float).eps))


def vibrational_quantum_numbers(potential: FragmentPotential, phase: PhasePoint
                                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Continuous Bohr–Sommerfeld v (NaN if unbound), internal energy E (Eh) and a quasi-bound
    flag for each phase point (see the module docstring for the equations).

    The action integral uses r = c + h sin θ between the turning points, which removes the
    square-root end-point singularities, and 256-point Gauss–Legendre quadrature in θ.
    """
    mu = phase.mu
    r_lo, r_hi = potential.r_range
    r_all = np.atleast_1d(phase.r)
    v_out = np.full(r_all.shape, np.nan)
    e_out = np.full(r_all.shape, np.nan)
    quasi = np.zeros(r_all.shape, dtype=bool)
    v_inf = float(potential(np.array([r_hi]))[0])
    theta = 0.5 * np.pi * _GL_X
    for k in range(r_all.size):
        r, pr, L = float(r_all[k]), float(np.atleast_1d(phase.p_r)[k]), float(np.atleast_1d(phase.L)[k])
        if not (np.isfinite(r) and np.isfinite(pr) and np.isfinite(L)) or not r_lo < r < r_hi:
            continue
        cent = L * L / (2.0 * mu)

        def veff(x, cent=cent):
            return potential(x) + cent / (x * x)

        E = pr * pr / (2.0 * mu) + float(veff(np.array([r]))[0])
        e_out[k] = E

        def f(x, E=E):
            return E - veff(np.asarray(x, dtype=float))

        r_in = _turning_point(f, r, r_lo)
        r_out = _turning_point(f, r, r_hi)
        if r_in is None or r_out is None:
            continue
        if r_out - r_in <= 0:
            v_out[k] = -0.5
            continue
        c, h = 0.5 * (r_out + r_in), 0.5 * (r_out - r_in)
        x = c + h * np.sin(theta)
        kin = np.clip(E - veff(x), 0.0, None)
        integral = 0.5 * np.pi * h * np.sum(_GL_W * np.sqrt(2.0 * mu * kin) * np.cos(theta))
        v_out[k] = integral / np.pi - 0.5
        quasi[k] = E > v_inf
    return v_out, e_out, quasi


# ----------------------------------------------------------------------------------------------
# binning
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class VibrationalDistribution:
    """Vibrational level populations of one fragment (see the module docstring for binning).

    levels (K,) v = 0 … K−1; histogram, binned and their *_low/*_high bounds : (K,) fractions;
    v_continuous (m,) (NaN = unbound); internal_energy (m,) Eh; angular_momentum (m,) ħ;
    indices (m,) trajectory indices; counts: n_bound, n_unbound (incl. n_outside_range: r outside the
    potential's range), n_quasibound, n_outside_bins.
    """

    fragment: str
    levels: np.ndarray
    histogram: np.ndarray
    histogram_low: np.ndarray
    histogram_high: np.ndarray
    binned: np.ndarray
    binned_low: np.ndarray
    binned_high: np.ndarray
    bin_half_width: float
    v_continuous: np.ndarray
    internal_energy: np.ndarray
    angular_momentum: np.ndarray
    indices: np.ndarray
    n_bound: int
    n_unbound: int
    n_quasibound: int
    n_outside_bins: int
    confidence_level: float
    potential_source: str
    normalisation: str
    n_outside_range: int = 0


def vibrational_distribution(v_continuous: np.ndarray, *, bin_half_width: float = SQUARE_GAMMA,
                             n_levels: int | None = None, fragment: str = "fragment",
                             internal_energy: np.ndarray | None = None, angular_momentum: np.ndarray | None = None,
                             indices: np.ndarray | None = None, quasibound: np.ndarray | None = None,
                             potential_source: str = "", confidence_level: float = 0.95, n_resamples: int = 999,
                             seed: int = 0) -> VibrationalDistribution:
    """Bin continuous vibrational numbers (NaN = unbound) with histogram boxes and symmetric bins.

    Bootstrap bounds over fragments (``scipy.stats.bootstrap`` via
    :func:`mapdyn.analysis.bootstrap_ratio`).  ``n_levels`` default: up to the largest occupied box.
    """
    from mapdyn.analysis.statistics import bootstrap_ratio

    w = float(bin_half_width)
    if not 0.0 < w <= 0.5:
        raise ValueError(f"bin_half_width={bin_half_width!r} is not allowed; it must lie in (0, 0.5]")
    v = np.asarray(v_continuous, dtype=float).reshape(-1)
    m = v.size
    bound = np.isfinite(v)
    nearest = np.where(bound, np.floor(v + 0.5), -1).astype(int)
    if n_levels is None:
        n_levels = int(nearest.max()) + 1 if bound.any() else 1
    K = int(n_levels)
    levels = np.arange(K)
    box = (nearest[:, None] == levels[None, :]) & bound[:, None]
    win = box & (np.abs(v[:, None] - levels[None, :]) <= w)
    n_bound = int(bound.sum())
    nan = np.full(K, np.nan)
    if n_bound:
        bv = bound.astype(float)[:, None]
        h, hl, hh, _ = bootstrap_ratio(box.astype(float), bv, np.zeros(K, dtype=int), confidence_level=confidence_level,
                                       n_resamples=n_resamples, seed=seed)
        inwin = win.any(axis=1).astype(float)[:, None]
        if inwin.sum() > 0:
            wd, wl, wh, _ = bootstrap_ratio(win.astype(float), inwin, np.zeros(K, dtype=int),
                                            confidence_level=confidence_level, n_resamples=n_resamples, seed=seed + 1)
        else:
            wd = wl = wh = nan
    else:
        h = hl = hh = wd = wl = wh = nan
    return VibrationalDistribution(
        fragment, levels, h, hl, hh, wd, wl, wh, w, v,
        np.full(m, np.nan) if internal_energy is None else np.asarray(internal_energy, dtype=float),
        np.full(m, np.nan) if angular_momentum is None else np.asarray(angular_momentum, dtype=float),
        np.arange(m) if indices is None else np.asarray(indices, dtype=int),
        n_bound, int(m - n_bound), int(0 if quasibound is None else np.sum(quasibound)),
        int(n_bound - win.any(axis=1).sum()), float(confidence_level), potential_source,
        (f"histogram: box [v − ½, v + ½) counts / all {n_bound} bound fragments; bins: |v − n| ≤ {w:.4g} "
         f"counts / fragments inside any bin (binned normalisation); {m - n_bound} unbound excluded"))


@dataclasses.dataclass
class FragmentAnalysis:
    """What to analyse: a diatomic fragment (two atom indices) on a potential curve.

    potential : :class:`FragmentPotential` (from a curve, a callable, or a backend scan);
    name : label in reports (default "A(i)–B(j)"); bin_half_width : symmetric-bin half-width w.
    Only finished trajectories are used unless ``include_unfinished``; with ``product`` only those
    whose final geometry was classified as that product (needs a product classifier).
    """

    atoms: tuple[int, int]
    potential: FragmentPotential
    name: str = ""
    bin_half_width: float = SQUARE_GAMMA
    include_unfinished: bool = False
    product: str | None = None


def analyze_fragment(tset: Any, frag: FragmentAnalysis, *, confidence_level: float = 0.95,
                     n_resamples: int = 999, seed: int = 0,
                     product_labels: Sequence[str] | None = None) -> VibrationalDistribution:
    """Vibrational distribution of ``frag`` from each trajectory's last frame of a TrajectorySet.

    ``product_labels`` (one per trajectory, from :func:`mapdyn.analysis.classify_products`) is
    needed when ``frag.product`` is set.

    Masses: ``tset.masses`` (electron masses) or the ASE standard masses of ``tset.symbols``
    (amu × ase.units._amu/_me).
    """
    if not isinstance(frag, FragmentAnalysis):
        raise ValueError("vibrational entries must be mapdyn.analysis.vibrational.FragmentAnalysis objects")
    if tset.positions is None or tset.momenta is None:
        raise ValueError(f"fragment {frag.name or frag.atoms}: the trajectory set needs positions and momenta")
    masses = tset.masses
    if masses is None:
        from ase import units
        from ase.data import atomic_masses, atomic_numbers

        masses = np.array([atomic_masses[atomic_numbers[s]] for s in tset.symbols]) * (units._amu / units._me)
    last = tset.last_frame
    keep = np.array([last[j] >= 0 and (tset.status[j] == "finished" or
                                       (frag.include_unfinished and tset.status[j] != "failed"))
                     for j in range(tset.ntraj)], dtype=bool)
    if frag.product is not None:
        if product_labels is None:
            raise ValueError(f"fragment {frag.name or frag.atoms}: product={frag.product!r} needs a product classifier")
        keep &= np.array([lab == frag.product for lab in product_labels], dtype=bool)
    rows = np.nonzero(keep)[0]
    pos = tset.positions[rows, last[rows]]
    mom = tset.momenta[rows, last[rows]]
    a, b = frag.atoms
    name = frag.name or (f"{tset.symbols[a]}{a}-{tset.symbols[b]}{b}")
    phase = fragment_phase_points(pos, mom, masses, frag.atoms)
    v, E, quasi = vibrational_quantum_numbers(frag.potential, phase)
    lo, hi = frag.potential.r_range
    outside = int(np.sum(~((phase.r > lo) & (phase.r < hi))))
    if frag.product is not None:
        name += f" ({frag.product})"
    dist = vibrational_distribution(v, bin_half_width=frag.bin_half_width, fragment=name, internal_energy=E,
                                    angular_momentum=phase.L, indices=tset.indices[rows], quasibound=quasi,
                                    potential_source=frag.potential.source, confidence_level=confidence_level,
                                    n_resamples=n_resamples, seed=seed)
    dist.n_outside_range = outside
    return dist
