"""A diatomic molecule on real ab initio potentials: SA-CASSCF scan, ADT diabatization, 1D model.

Everything inside is in Hartree atomic units (bond length r in Bohr, energies in Eh, couplings in
1/Bohr, masses in electron masses); masses come from ``ase.data.atomic_masses`` (amu) times
``ase.units._amu/ase.units._me``.

1. **Scan** (:func:`scan_diatomic`, PySCF through :class:`mapdyn.backends.pyscf.casscf.CASSCFBackend`):
   atom A at the origin, atom B at (0, 0, r).  At every r: the SA-CASSCF energies E_1 < E_2, the
   radial energy gradients dE_k/dr = ê·∇_B E_k (translation invariance, ∇_A E = −∇_B E), and the
   coupling along the bond

       d_r = ê · [(m_A/M) d_B − (m_B/M) d_A],      M = m_A + m_B,  ê = unit vector from A to B,

   which is ⟨ψ_1|∂ψ_2/∂r⟩ at fixed centre of mass (R_A = X − (m_B/M) r ê, R_B = X + (m_A/M) r ê,
   so ∂/∂r = (m_A/M) ê·∇_B − (m_B/M) ê·∇_A).  The NAC vectors are the backend's default full form
   (``nac_form="full"``, PySCF ``use_etfs=False``: the CSF/basis-motion term is kept, which is
   what matches finite differences of state overlaps, docs/theory.md#pyscf-pitfalls).
   Sign continuity: the scan starts cold at ``start_distance`` and walks outward, then inward,
   each point warm-started from its neighbour; the backend aligns the sign of every state with
   its overlap with the neighbour's state (docs/theory.md#state-matching-and-phases), so d_r keeps one phase convention
   along the whole scan.  The smallest aligned overlap of each step is stored.
2. **Diabatization** (:func:`adt_angle`): with the adiabatic states written in the diabatic basis as
   ψ_1 = cos θ φ_1 − sin θ φ_2, ψ_2 = sin θ φ_1 + cos θ φ_2, the derivative coupling is
   ⟨ψ_1|∂_r ψ_2⟩ = dθ/dr, so the diabatic states (⟨φ_1|∂_r φ_2⟩ = 0) follow from

       θ(r) = ∫_{r_max}^{r} d_r(r') dr',     θ(r_max) = 0,

   i.e. diabats = adiabats at the largest scanned distance (the separated-atom limit).  d_r is
   interpolated with a cubic spline onto a fine grid (each scan interval cut in ``subdivisions``
   equal parts) and integrated with ``scipy.integrate.cumulative_simpson``.  Then
   H_11 = c²E_1 + s²E_2, H_22 = s²E_1 + c²E_2, H_12 = sc(E_2 − E_1) at the scan points.
   (Two-state adiabatic-to-diabatic transformation: M. Baer, Chem. Phys. Lett. 35, 112 (1975),
   from memory; in one dimension it is exact within the two-state space.)
3. **Model** (:class:`DiatomicModel`): H_11, H_22, H_12 are piecewise-cubic Hermite interpolants
   (``scipy.interpolate.CubicHermiteSpline``, C¹) of the scan-point values *and* slopes, the slopes
   built from the analytic SA-CASSCF gradients and d_r (:func:`diabatize`), so the model's
   Hellmann–Feynman coupling equals d_r and its adiabatic slopes equal the PySCF gradients at every
   scan point; derivatives between points are analytic from the interpolants.  (A not-a-knot
   CubicSpline of the values alone was 5 % off in the force on the steep inner wall with the
   0.5 Bohr spacing there.)  Beyond the scanned range every element continues linearly with the end
   value and end slope (C¹ continuation).  ndof = 1, mass = reduced mass m_A m_B/(m_A + m_B).

Only :func:`scan_diatomic` needs PySCF (imported lazily); the model and the cached-grid I/O do not.
"""

from __future__ import annotations

import dataclasses
import json
import os
import time
from importlib import resources
from typing import Sequence

import numpy as np
from scipy.integrate import cumulative_simpson
from scipy.interpolate import CubicHermiteSpline, CubicSpline

from mapdyn.core.model import DiabaticModel, as_positions
from mapdyn.files import atomic_open

__all__ = [
    "DiatomicGrid",
    "DiatomicModel",
    "scan_diatomic",
    "adt_angle",
    "diabatize",
    "reduced_mass",
    "atomic_masses_amu",
    "bond_coupling",
    "KCL_SCAN",
    "kcl_scan_distances",
    "packaged_grid_path",
    "load_packaged_grid",
    "load_packaged_reference",
    "harmonic_ground_state",
    "PhotoexcitationScenario",
    "photoexcitation_scenario",
    "PopulationHistory",
    "run_exact_photoexcitation",
    "run_mapping_photoexcitation",
]

#: The scenario of the shipped grid: KCl, SA-2 CASSCF(2,2)/6-31G, σ active space
#: (Cl 3pσ and K 4s, RHF orbitals 15 and 18 at the start distance, 0-based).
KCL_SCAN = {"symbols": ("K", "Cl"), "basis": "6-31g", "ncas": 2, "nelecas": 2, "nstates": 2,
            "cas_orbitals": (15, 18), "start_distance": 5.5}

_GRID_FILE = "diatomic_grid.npz"

#: smallest aligned state overlap accepted between scan neighbours for sign tracking (the
#: determinant overlaps are accurate to ~1e-13 here, so this leaves a wide margin).
MIN_TRACKING_OVERLAP = 1e-6


def kcl_scan_distances() -> np.ndarray:
    """The bond lengths (Bohr) of the shipped KCl scan: dense (0.1 Bohr) around the crossing near 16 Bohr."""
    parts = [np.arange(4.0, 12.0 - 1e-9, 0.5), np.arange(12.0, 15.0 - 1e-9, 0.25),
             np.arange(15.0, 17.5 - 1e-9, 0.1), np.arange(17.5, 21.0 - 1e-9, 0.25),
             np.arange(21.0, 30.0 - 1e-9, 0.75), np.arange(30.0, 40.0 + 1e-9, 2.0)]
    return np.round(np.concatenate(parts), 10)


def atomic_masses_amu(symbols: Sequence[str]) -> np.ndarray:
    """Standard atomic masses (amu) from ``ase.data.atomic_masses``."""
    from ase.data import atomic_masses, atomic_numbers

    try:
        return np.array([float(atomic_masses[atomic_numbers[s]]) for s in symbols])
    except KeyError as exc:
        raise ValueError(f"symbols: unknown element {exc.args[0]!r}") from None


def reduced_mass(symbols: Sequence[str]) -> float:
    """Reduced mass m_A m_B/(m_A + m_B) in electron masses (ase.data masses × ase.units._amu/_me)."""
    from ase import units

    if len(symbols) != 2:
        raise ValueError(f"symbols: a diatomic needs exactly two atoms, got {list(symbols)}")
    mA, mB = atomic_masses_amu(symbols) * (units._amu / units._me)
    return float(mA * mB / (mA + mB))


def bond_coupling(nac_pair: np.ndarray, positions_bohr: np.ndarray, masses: Sequence[float]) -> float:
    """d_r = ê·[(m_A/M) d_B − (m_B/M) d_A] (1/Bohr) from a NAC vector pair array (2, 3) (1/Bohr)."""
    d = np.asarray(nac_pair, dtype=float)
    pos = np.asarray(positions_bohr, dtype=float)
    mA, mB = (float(m) for m in masses)
    M = mA + mB
    e = (pos[1] - pos[0]) / np.linalg.norm(pos[1] - pos[0])
    return float(e @ ((mA / M) * d[1] - (mB / M) * d[0]))


@dataclasses.dataclass
class DiatomicGrid:
    """SA-CASSCF data along the bond of a diatomic A–B (atomic units).

    distances (n,) Bohr, ascending; energies (n, 2) Eh; energy_gradients (n, 2) dE_k/dr Eh/Bohr;
    coupling (n,) d_r = ⟨ψ_1|∂ψ_2/∂r⟩ 1/Bohr; dipoles (n, 2) ê-component of the state dipoles
    (e·Bohr, origin at the nuclear charge centre); min_overlap (n,) smallest aligned overlap with
    the neighbour the point was warm-started from (1 at the cold start); seconds (n,) wall time per
    point; metadata: dict of JSON-able settings (symbols, basis, active space, nac form, masses...).
    """

    distances: np.ndarray
    energies: np.ndarray
    energy_gradients: np.ndarray
    coupling: np.ndarray
    dipoles: np.ndarray
    min_overlap: np.ndarray
    seconds: np.ndarray
    metadata: dict

    _ARRAYS = ("distances", "energies", "energy_gradients", "coupling", "dipoles", "min_overlap", "seconds")

    def __post_init__(self):
        for name in self._ARRAYS:
            setattr(self, name, np.asarray(getattr(self, name), dtype=float))
        n = self.distances.shape[0]
        if self.distances.ndim != 1 or n < 4:
            raise ValueError("distances: need a 1D array of at least 4 bond lengths (Bohr)")
        if np.any(np.diff(self.distances) <= 0):
            raise ValueError("distances must be strictly ascending (Bohr)")
        for name, shape in (("energies", (n, 2)), ("energy_gradients", (n, 2)), ("coupling", (n,)),
                            ("dipoles", (n, 2)), ("min_overlap", (n,)), ("seconds", (n,))):
            if getattr(self, name).shape != shape:
                raise ValueError(f"{name} must have shape {shape}, got {getattr(self, name).shape}")

    def save(self, path: str | os.PathLike) -> None:
        """Write the grid atomically as a NumPy .npz file (``path.tmp``, fsync, ``os.replace``)."""
        arrays = {name: getattr(self, name) for name in self._ARRAYS}
        with atomic_open(path, "wb") as fh:
            np.savez_compressed(fh, metadata=np.array(json.dumps(self.metadata, sort_keys=True)), **arrays)

    @classmethod
    def load(cls, path: str | os.PathLike) -> "DiatomicGrid":
        """Read a grid written by :meth:`save`."""
        with np.load(os.fspath(path), allow_pickle=False) as data:
            missing = [k for k in cls._ARRAYS + ("metadata",) if k not in data.files]
            if missing:
                raise ValueError(f"{os.fspath(path)}: not a diatomic grid file (missing {', '.join(missing)})")
            arrays = {k: np.array(data[k]) for k in cls._ARRAYS}
            meta = json.loads(str(data["metadata"]))
        return cls(metadata=meta, **arrays)

    def equals(self, other: "DiatomicGrid") -> bool:
        """Bitwise equality of all arrays and metadata."""
        return self.metadata == other.metadata and all(
            np.array_equal(getattr(self, k), getattr(other, k)) for k in self._ARRAYS)

    @property
    def symbols(self) -> tuple:
        return tuple(self.metadata["symbols"])


def scan_diatomic(symbols: Sequence[str], distances: Sequence[float], basis: str = "6-31g", ncas: int = 2,
                  nelecas: int = 2, nstates: int = 2, cas_orbitals: Sequence[int] | None = None,
                  start_distance: float | None = None, nac_form: str = "full", track_step: float = 0.25,
                  progress=None, **backend_options) -> DiatomicGrid:
    """SA-CASSCF scan along the bond (PySCF); returns a :class:`DiatomicGrid` (atomic units).

    ``distances`` in Bohr.  The first calculation is a cold start at ``start_distance`` (default:
    the smallest distance; the ``cas_orbitals`` refer to the RHF orbitals there); the scan then
    walks outward and inward from it, warm-starting each point from its neighbour so the state
    signs (and the sign of d_r) stay continuous.  The AO basis moves with the nuclei, so the overlap
    of states at neighbouring points falls fast with the step (for K–Cl/6-31G ≈ 0.74 at 0.05 Bohr,
    0.34 at 0.1, 5e-3 at 0.25, 1e-12 at 0.75 — noise); neighbours further apart than ``track_step``
    (Bohr) are therefore joined by energy-only substeps, and a step whose smallest aligned overlap
    falls below MIN_TRACKING_OVERLAP raises.  Only two-state scans are supported (d_r is the
    1–2 coupling).  ``progress(i, n, r, seconds)`` is called after each point when given.
    """
    from mapdyn.backends.pyscf.casscf import CASSCFBackend

    if nstates != 2:
        raise ValueError(f"nstates={nstates!r} is not allowed; the diatomic scan is two-state")
    r = np.unique(np.asarray(distances, dtype=float))
    if r.size < 4 or r[0] <= 0:
        raise ValueError("distances: need at least 4 positive bond lengths (Bohr)")
    r0 = float(r[0] if start_distance is None else start_distance)
    if not (np.isfinite(track_step) and track_step > 0):
        raise ValueError(f"track_step={track_step!r} is not allowed; it must be a positive number of Bohr")
    if not r[0] <= r0 <= r[-1]:
        raise ValueError(f"start_distance={r0} must lie within the scanned range [{r[0]}, {r[-1]}] Bohr")
    masses_amu = atomic_masses_amu(symbols)
    backend = CASSCFBackend(list(symbols), basis=basis, ncas=ncas, nelecas=nelecas, nstates=nstates,
                            cas_orbitals=cas_orbitals, nac_form=nac_form, **backend_options)
    n = r.size
    out = {k: np.zeros((n, 2)) for k in ("energies", "energy_gradients", "dipoles")}
    coupling, min_overlap, seconds = np.zeros(n), np.ones(n), np.zeros(n)
    start = int(np.argmin(np.abs(r - r0)))
    order = [start] + list(range(start + 1, n)) + list(range(start - 1, -1, -1))
    guesses: dict[int, object] = {}
    for count, i in enumerate(order):
        prev = None if i == start else (i - 1 if i > start else i + 1)
        t0 = time.perf_counter()
        guess = None
        smallest = 1.0
        if prev is not None:
            # sign tracking: walk from the neighbour in energy-only substeps of at most track_step
            guess = guesses[prev]
            nsub = int(np.ceil(abs(r[i] - r[prev]) / track_step - 1e-9))
            for r_sub in np.linspace(r[prev], r[i], nsub + 1)[1:-1]:
                sub = backend.compute(np.array([[0.0, 0.0, 0.0], [0.0, 0.0, r_sub]]), guess=guess,
                                      need_gradients=False)
                smallest = min(smallest, float(np.min(np.abs(np.diag(sub.overlap_prev)))))
                guess = sub.guess
        pos = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, r[i]]])
        res = backend.compute(pos, guess=guess, need_gradients=True)
        if not res.converged:
            raise RuntimeError(f"SA-CASSCF response equations did not converge at r = {r[i]} Bohr")
        guesses[i] = res.guess
        out["energies"][i] = res.energies
        out["energy_gradients"][i] = res.gradients[:, 1, 2]
        out["dipoles"][i] = res.transition_dipoles[[0, 1], [0, 1], 2]
        coupling[i] = bond_coupling(res.couplings[0, 1], pos, masses_amu)
        if res.overlap_prev is not None:
            smallest = min(smallest, float(np.min(np.abs(np.diag(res.overlap_prev)))))
        if smallest < MIN_TRACKING_OVERLAP:
            raise RuntimeError(f"state overlap {smallest:.1e} between neighbours near r = {r[i]} Bohr is too small "
                               f"for sign tracking; lower track_step (now {track_step} Bohr)")
        min_overlap[i] = smallest
        seconds[i] = time.perf_counter() - t0
        if progress is not None:
            progress(count, n, float(r[i]), seconds[i])
    import pyscf

    meta = {"symbols": list(symbols), "basis": basis, "ncas": int(ncas), "nelecas": int(nelecas),
            "nstates": int(nstates), "cas_orbitals": None if cas_orbitals is None else [int(c) for c in cas_orbitals],
            "start_distance": r0, "nac_form": nac_form, "masses_amu": masses_amu.tolist(),
            "method": "SA-CASSCF, equal weights", "pyscf_version": pyscf.__version__,
            "geometry": "A at origin, B at (0, 0, r); r in Bohr",
            "coupling": "d_r = e.[(mA/M) d_B - (mB/M) d_A], d = <psi_1|grad psi_2>, full form (use_etfs=False)"}
    return DiatomicGrid(distances=r, coupling=coupling, min_overlap=min_overlap, seconds=seconds,
                        metadata=meta, **out)


def adt_angle(distances: np.ndarray, coupling: np.ndarray, subdivisions: int = 20) -> tuple[np.ndarray, np.ndarray]:
    """ADT angle θ(r) = ∫_{r_max}^{r} d_r dr' (rad) on a fine grid; returns (r_fine, θ_fine).

    d_r (1/Bohr) at the scan points ``distances`` (Bohr) is interpolated with a not-a-knot cubic
    spline onto a grid that cuts every scan interval into ``subdivisions`` equal parts (so the scan
    points are on it) and integrated with ``scipy.integrate.cumulative_simpson``; θ(r_max) = 0.
    """
    r = np.asarray(distances, dtype=float)
    d = np.asarray(coupling, dtype=float)
    if isinstance(subdivisions, bool) or not isinstance(subdivisions, (int, np.integer)) or subdivisions < 2:
        raise ValueError(f"subdivisions={subdivisions!r} is not allowed; it must be an integer >= 2")
    frac = np.arange(subdivisions) / subdivisions
    fine = np.concatenate([(r[:-1, None] + frac[None, :] * np.diff(r)[:, None]).ravel(), r[-1:]])
    d_fine = CubicSpline(r, d)(fine)
    acc = cumulative_simpson(d_fine, x=fine, initial=0.0)  # ∫_{r_min}^{r}
    return fine, acc - acc[-1]


def diabatize(grid: DiatomicGrid, subdivisions: int = 20) -> dict:
    """Diabatic matrix elements at the scan points (Eh), their r-derivatives (Eh/Bohr), θ (rad).

    ψ_1 = cos θ φ_1 − sin θ φ_2, ψ_2 = sin θ φ_1 + cos θ φ_2 ⇒ H_11 = c²E_1 + s²E_2,
    H_22 = s²E_1 + c²E_2, H_12 = sc(E_2 − E_1); with dθ/dr = d_r and the analytic SA-CASSCF
    gradients E_k' = dE_k/dr: H_11' = c²E_1' + s²E_2' + 2sc d_r (E_2 − E_1),
    H_22' = s²E_1' + c²E_2' − 2sc d_r (E_2 − E_1), H_12' = (c² − s²) d_r (E_2 − E_1) + sc(E_2' − E_1').
    """
    fine, theta_fine = adt_angle(grid.distances, grid.coupling, subdivisions)
    theta = theta_fine[::subdivisions]
    c, s = np.cos(theta), np.sin(theta)
    E1, E2 = grid.energies[:, 0], grid.energies[:, 1]
    g1, g2 = grid.energy_gradients[:, 0], grid.energy_gradients[:, 1]
    w = grid.coupling * (E2 - E1)  # θ' (E_2 − E_1)
    return {"theta": theta, "H11": c * c * E1 + s * s * E2, "H22": s * s * E1 + c * c * E2,
            "H12": s * c * (E2 - E1),
            "dH11": c * c * g1 + s * s * g2 + 2 * s * c * w, "dH22": s * s * g1 + c * c * g2 - 2 * s * c * w,
            "dH12": (c * c - s * s) * w + s * c * (g2 - g1), "r_fine": fine, "theta_fine": theta_fine}


class _LinearlyContinuedSpline:
    """Piecewise-cubic Hermite interpolant (values and slopes at the knots; scipy
    CubicHermiteSpline) inside [x_0, x_n]; outside, the tangent line at the nearer end."""

    def __init__(self, x: np.ndarray, y: np.ndarray, dydx: np.ndarray):
        self.spline = CubicHermiteSpline(x, y, dydx)
        self.lo, self.hi = float(x[0]), float(x[-1])
        self.ends = [(self.lo, float(self.spline(self.lo)), float(self.spline(self.lo, 1))),
                     (self.hi, float(self.spline(self.hi)), float(self.spline(self.hi, 1)))]

    def __call__(self, x: np.ndarray, nu: int = 0) -> np.ndarray:
        xc = np.clip(x, self.lo, self.hi)
        v = self.spline(xc, nu)
        for (x0, y0, s0), mask in ((self.ends[0], x < self.lo), (self.ends[1], x > self.hi)):
            if np.any(mask):
                v = np.where(mask, y0 + s0 * (x - x0) if nu == 0 else s0, v)
        return v


class DiatomicModel(DiabaticModel):
    """Two-state diabatic model of a diatomic's bond stretch from a :class:`DiatomicGrid`.

    ndof = 1 (bond length r, Bohr); ``masses`` = [reduced mass] (electron masses); H_11, H_22, H_12
    (Eh) are cubic splines of the ADT-diabatized scan values with analytic derivatives (Eh/Bohr),
    continued linearly beyond the scanned range (see the module docstring).  ``theta_scan`` (rad)
    holds the ADT angle at the scan points; ``grid`` the source data.
    """

    nstates = 2
    ndof = 1

    def __init__(self, grid: DiatomicGrid, subdivisions: int = 20, mass: float | None = None):
        self.grid = grid
        dia = diabatize(grid, subdivisions)
        self.theta_scan = dia["theta"]
        self.name = "diatomic_" + "".join(grid.symbols)
        m = reduced_mass(grid.symbols) if mass is None else float(mass)
        if not (np.isfinite(m) and m > 0):
            raise ValueError(f"mass={mass!r} is not allowed; it must be a positive number of electron masses")
        self.masses = np.array([m])
        r = grid.distances
        self._splines = [_LinearlyContinuedSpline(r, dia[k], dia["d" + k]) for k in ("H11", "H22", "H12")]
        self.range = (float(r[0]), float(r[-1]))

    def _elements(self, R, nu: int) -> np.ndarray:
        x = as_positions(R, 1)[:, 0]
        h11, h22, h12 = (s(x, nu) for s in self._splines)
        H = np.empty((x.size, 2, 2))
        H[:, 0, 0], H[:, 1, 1], H[:, 0, 1], H[:, 1, 0] = h11, h22, h12, h12
        return H

    def hamiltonian(self, R: np.ndarray) -> np.ndarray:
        """Diabatic H_kl(r) (n, 2, 2) in Eh for bond lengths R (n, 1) in Bohr."""
        return self._elements(R, 0)

    def hamiltonian_gradient(self, R: np.ndarray) -> np.ndarray:
        """∂H_kl/∂r (n, 1, 2, 2) in Eh/Bohr (analytic spline derivatives)."""
        return self._elements(R, 1)[:, None]

    def coupling(self, R: np.ndarray) -> np.ndarray:
        """Hellmann–Feynman coupling d_12(r) = u_1ᵀ (∂H/∂r) u_2/(E_2 − E_1) (1/Bohr), shape (n,).

        u_k are the columns of the ADT rotation U = [[c, s], [−s, c]] recovered from H (θ taken
        continuous from the scan), so the sign follows the scan's phase convention.
        """
        x = as_positions(R, 1)[:, 0]
        H = self.hamiltonian(x)
        dH = self.hamiltonian_gradient(x)[:, 0]
        E, V = np.linalg.eigh(H)
        theta_ref = np.interp(x, self.grid.distances, self.theta_scan)
        u1 = np.stack([np.cos(theta_ref), -np.sin(theta_ref)], axis=1)
        # align the eigenvectors with the reference rotation (sign only)
        s1 = np.sign(np.einsum("nk,nk->n", V[:, :, 0], u1))
        v1 = V[:, :, 0] * s1[:, None]
        v2 = np.stack([v1[:, 1], -v1[:, 0]], axis=1) * -1.0  # u_2 = (s, c) is u_1 rotated by +90°
        num = np.einsum("nk,nkl,nl->n", v1, dH, v2)
        return num / (E[:, 1] - E[:, 0])


def harmonic_ground_state(model: DiabaticModel, r_guess: float, state: int = 0) -> dict:
    """Minimum r_e (Bohr) of adiabat ``state``, its harmonic ω (Eh) and the v = 0 width σ_R (Bohr).

    ω = √(k/μ) with k = E''(r_e) from a central difference (h = 1e-3 Bohr) of the model adiabat;
    |χ_0|² has standard deviation σ_R = (2μω)^(−1/2) (harmonic oscillator; common practice).
    """
    from scipy.optimize import minimize_scalar

    def energy(r):
        return float(model.adiabatic(np.array([[r]]))[0][0, state])

    res = minimize_scalar(energy, bracket=(r_guess - 0.5, r_guess, r_guess + 0.5), tol=1e-10)
    re = float(res.x)
    h = 1e-3
    k = (energy(re + h) - 2 * energy(re) + energy(re - h)) / h**2
    mu = float(model.masses[0])
    omega = float(np.sqrt(k / mu))
    return {"r_e": re, "omega": omega, "sigma_r": float(1.0 / np.sqrt(2.0 * mu * omega)), "force_constant": k}


def packaged_grid_path() -> str:
    """Path of the shipped KCl grid (``mapdyn/data/diatomic_grid.npz``)."""
    return str(resources.files("mapdyn") / "data" / _GRID_FILE)


def load_packaged_grid() -> DiatomicGrid:
    """The shipped KCl SA-2 CASSCF(2,2)/6-31G grid (regenerate with tests/reference/make_diatomic_comparison.py)."""
    path = packaged_grid_path()
    if not os.path.exists(path):
        raise FileNotFoundError(f"{path}: the cached diatomic grid is not installed")
    return DiatomicGrid.load(path)


# ---------------------------------------------------------------------------------------------
# The photoexcitation scenario: exact wavepacket and mapping ensembles from the same packet


@dataclasses.dataclass(frozen=True)
class PhotoexcitationScenario:
    """Vertical excitation of the v = 0 packet of the ground adiabat onto adiabat ``initial_state``.

    position r_0 = r_e (Bohr), position_width σ_R of the harmonic v = 0 state (Bohr), momentum 0
    (zero angular momentum: the radial J = 0 problem), ``t_final`` and ``record_interval`` in a.u.
    """

    position: float
    position_width: float
    initial_state: int = 1
    momentum: float = 0.0
    t_final: float = 90000.0
    record_interval: float = 500.0

    @property
    def times(self) -> np.ndarray:
        """Recording times (a.u.)."""
        n = int(round(self.t_final / self.record_interval))
        return self.record_interval * np.arange(n + 1)


def photoexcitation_scenario(model: DiatomicModel, t_final: float = 90000.0,
                             record_interval: float = 500.0) -> PhotoexcitationScenario:
    """The scenario of the shipped comparison: r_0 = r_e of the ground adiabat, σ_R of its v = 0 state."""
    g = harmonic_ground_state(model, float(model.grid.distances[np.argmin(model.grid.energies[:, 0])]))
    return PhotoexcitationScenario(position=g["r_e"], position_width=g["sigma_r"], t_final=float(t_final),
                                   record_interval=float(record_interval))


@dataclasses.dataclass
class PopulationHistory:
    """Adiabatic populations vs time (dimensionless) and their standard errors.

    times (T,) a.u.; populations, errors (T, 2); mean_position (T,) Bohr: ⟨r⟩ of the part on the
    initial (upper) adiabat (exact: weighted by its on-grid density; SQC: trajectories in its window;
    Ehrenfest: weighted by e_f/Σe);
    method: "exact" or the MethodOptions description; details: extra numbers (norm error, …).
    """

    method: str
    times: np.ndarray
    populations: np.ndarray
    errors: np.ndarray
    mean_position: np.ndarray
    details: dict = dataclasses.field(default_factory=dict)


def run_exact_photoexcitation(model: DiatomicModel, scenario: PhotoexcitationScenario, dt: float = 1.0,
                              spacing: float = 0.0225, lower: float = -20.0, upper: float = 72.0,
                              absorber_length: float = 12.0, absorber_strength: float = 0.02) -> PopulationHistory:
    """Exact wavepacket (split-operator FFT, :mod:`mapdyn.validation.exact`) for the scenario.

    Populations are on-grid plus absorbed probability per adiabatic state (absorbed flux booked in
    the state it left on).  Grid: [lower, upper) Bohr with at most ``spacing`` (the point count is
    rounded up to a fast FFT length); absorbing layers of ``absorber_length`` Bohr at both faces.
    """
    import scipy.fft

    from mapdyn.validation.exact import (
        Absorber,
        Grid,
        GridPropagator,
        gaussian_wavepacket,
    )

    npts = scipy.fft.next_fast_len(int(np.ceil((upper - lower) / spacing)))
    grid = Grid((lower,), (upper,), (npts,))
    prop = GridPropagator(model, grid, dt, Absorber(absorber_length, absorber_strength))
    psi = gaussian_wavepacket(model, grid, scenario.position, scenario.momentum, scenario.position_width,
                              scenario.initial_state, basis="adiabatic")
    every = int(round(scenario.record_interval / dt))
    if abs(every * dt - scenario.record_interval) > 1e-9 * scenario.record_interval:
        raise ValueError(f"dt={dt} must divide record_interval={scenario.record_interval} a.u.")
    nsteps = int(round(scenario.t_final / dt))
    absorbed = np.zeros((prop.nchannels, 2))
    x = grid.points[:, 0]
    dv = grid.volume_element
    times, pops, norms, mean_r = [], [], [], []

    def record(i):
        dia, ad = prop.populations(psi)
        times.append(i * dt)
        pops.append(ad + absorbed.sum(axis=0))
        norms.append(dia.sum() + absorbed.sum())
        dens = np.abs(prop.adiabatic_amplitudes(psi)[scenario.initial_state]) ** 2 * dv
        mean_r.append(float(dens @ x / max(dens.sum(), 1e-300)))

    record(0)
    for i in range(1, nsteps + 1):
        psi = prop.step(psi, absorbed)
        if i % every == 0:
            record(i)
    pops = np.array(pops)
    return PopulationHistory("exact", np.array(times), pops, np.zeros_like(pops), np.array(mean_r),
                             {"norm_error": float(np.max(np.abs(np.array(norms) - 1.0))), "npoints": npts,
                              "dt": dt, "absorbed": absorbed.copy(),
                              "absorbed_channels": list(prop.channel_names)})


def run_mapping_photoexcitation(model: DiabaticModel, scenario: PhotoexcitationScenario, options,
                                ntraj: int, seed: int, dt: float = 10.0) -> PopulationHistory:
    """Mapping ensemble (:func:`mapdyn.core.propagators.run_diabatic`) for the scenario.

    Initial conditions from the Wigner function of the same packet
    (:func:`mapdyn.core.sampling.gaussian_wavepacket_ensemble`, adiabatic initial state).  SQC
    populations: window counts over trajectories inside a window, standard error √(P(1−P)/N_w);
    Ehrenfest: mean weight e_f/Σe, standard error = sample standard deviation/√N.
    """
    from mapdyn.core.propagators import run_diabatic
    from mapdyn.core.sampling import gaussian_wavepacket_ensemble

    every = int(round(scenario.record_interval / dt))
    if abs(every * dt - scenario.record_interval) > 1e-9 * scenario.record_interval:
        raise ValueError(f"dt={dt} must divide record_interval={scenario.record_interval} a.u.")
    state = gaussian_wavepacket_ensemble(model, ntraj, seed, scenario.position, scenario.momentum,
                                         scenario.position_width, scenario.initial_state, options,
                                         basis="adiabatic")
    run = run_diabatic(model, state, options, dt, int(round(scenario.t_final / dt)), record_every=every,
                       record_nuclei=True)
    e = run.actions_adiabatic  # (T, n, F)
    if options.method in ("ehrenfest", "spin"):
        from mapdyn.core.populations import population_weights
        w = population_weights(e, options)
        w = w / w.sum(axis=2, keepdims=True)
        pops = w.mean(axis=1)
        err = w.std(axis=1, ddof=1) / np.sqrt(ntraj)
        n_none = np.zeros(len(run.times), dtype=int)
    else:
        pops, n_none = run.populations("adiabatic")
        nw = ntraj - n_none
        err = np.sqrt(pops * (1.0 - pops) / np.maximum(nw, 1)[:, None])
    drift = np.abs(run.energy - run.energy[0]).max()
    f = scenario.initial_state
    if options.method in ("ehrenfest", "spin"):
        weight = w[:, :, f]
    else:
        from mapdyn.core.windows import window_assignment

        weight = np.array([window_assignment(e[t], options) == f for t in range(e.shape[0])], dtype=float)
    r_upper = np.sum(weight * run.R[:, :, 0], axis=1) / np.maximum(weight.sum(axis=1), 1e-300)
    return PopulationHistory(options.describe(), run.times, pops, err, r_upper,
                             {"ntraj": ntraj, "seed": seed, "dt": dt, "n_unassigned": n_none,
                              "max_energy_drift": float(drift), "R": run.R[:, :, 0], "P": run.P[:, :, 0],
                              "actions_adiabatic": e})


def load_packaged_reference() -> dict:
    """The stored exact reference of the shipped KCl scenario (``mapdyn/data/diatomic_reference.json``).

    Keys: ``scenario`` (position, position_width Bohr; initial_state; momentum a.u.; t_final,
    record_interval a.u.), ``table_times`` (a.u.), ``exact_upper_population`` (upper-adiabat
    population at those times), ``exact_convergence`` (max |ΔP| between two exact grids), the
    measured mapping results of the comparison run (``mapping``: method → populations and standard
    errors at the table times, ntraj, seed, dt).  Written by tests/reference/make_diatomic_comparison.py.
    """
    path = str(resources.files("mapdyn") / "data" / "diatomic_reference.json")
    if not os.path.exists(path):
        raise FileNotFoundError(f"{path}: the diatomic exact reference is not installed")
    with open(path) as fh:
        return json.load(fh)
