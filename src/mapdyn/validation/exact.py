"""Exact multi-state wavepacket dynamics on 1D and 2D grids (the quantum reference).

Split-operator Fourier propagation (M. D. Feit, J. A. Fleck & A. Steiger, J. Comput. Phys. 47, 412
(1982); D. Kosloff & R. Kosloff, J. Comput. Phys. 52, 35 (1983)) of ψ_k(R), k = 1…F diabatic states,
under H = T + V(R) − iW(R), atomic units (ħ = 1), per step Δt:

    ψ ← A · e^{−iVΔt/2} · F⁻¹ e^{−iTΔt} F · e^{−iVΔt/2} · A · ψ,      A = e^{−WΔt/2}

* T = Σ_a k_a²/(2M_a) is diagonal on the FFT wavenumber grid k_a = 2π·fftfreq(N_a, Δx_a);
* e^{−iV(R)Δt/2} is the exact exponential of the F×F diabatic matrix at every grid point
  (U diag e^{−iEΔt/2} Uᵀ from its eigen-decomposition), so the electronic coupling is not split;
* W(R) ≥ 0 is a scalar absorbing potential in layers at the box faces: W = W0 Σ_a (d_a/L)², d_a the
  depth into the layer along axis a (a quadratic complex absorbing potential; common practice).
  Because W is the same for every state it commutes with V, so A·e^{−iVΔt/2} = e^{−(iV+W)Δt/2}
  exactly; the split error is the usual O(Δt²) from [T, V − iW].

The probability removed by each application of A is booked per grid point into the adiabatic state
(|ψ_ad,f|² = |(Uᵀψ)_f|², W being state-independent) and into the channel of the face the point
belongs to (a corner point goes to the face it is deepest into, relative to L), so on-grid norm +
absorbed = 1 to rounding at all times (tested).  In 1D the faces are "lower" (x → −∞) and "upper".

Wavepacket convention (the same as :func:`mapdyn.core.sampling.gaussian_wavepacket_ensemble`):
ψ(R) ∝ Π_a exp[−(R_a − R0_a)²/(4σ_a²) + i k_a (R_a − R0_a)] on one electronic state, so |ψ|² has
standard deviation σ_a (``position_width``, Bohr) and the momentum density σ_P = 1/(2σ_a).

No I/O, no PySCF/ASE; arrays in atomic units (Bohr, a.u. of momentum, Eh, a.u. of time).
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from typing import TYPE_CHECKING

import numpy as np
import scipy.fft

from mapdyn.core.model import DiabaticModel

if TYPE_CHECKING:  # pragma: no cover
    from mapdyn.validation.channels import ScatteringResult

__all__ = [
    "Grid",
    "Absorber",
    "GridPropagator",
    "WavepacketRun",
    "gaussian_wavepacket",
    "propagate_wavepacket",
    "ExactSettings",
    "exact_scattering",
    "ConvergenceReport",
    "check_convergence",
]


@dataclasses.dataclass(frozen=True)
class Grid:
    """A periodic product grid: axis a has ``npoints[a]`` points x_j = lower_a + j Δx_a,
    Δx_a = (upper_a − lower_a)/npoints_a (Bohr).  ``upper`` is the periodic image of ``lower``."""

    lower: tuple
    upper: tuple
    npoints: tuple

    def __post_init__(self):
        lo, hi, n = (tuple(np.atleast_1d(np.asarray(v)).tolist()) for v in (self.lower, self.upper, self.npoints))
        if not (len(lo) == len(hi) == len(n)) or len(n) not in (1, 2):
            raise ValueError(f"grid lower/upper/npoints must all have length 1 or 2, got {lo}, {hi}, {n}")
        for a in range(len(n)):
            if not (math.isfinite(lo[a]) and math.isfinite(hi[a]) and hi[a] > lo[a]):
                raise ValueError(f"grid axis {a}: upper={hi[a]!r} must be finite and above lower={lo[a]!r}")
            if int(n[a]) != n[a] or n[a] < 8:
                raise ValueError(f"grid npoints[{a}]={n[a]!r} is not allowed; it must be an integer ≥ 8")
        object.__setattr__(self, "lower", tuple(float(v) for v in lo))
        object.__setattr__(self, "upper", tuple(float(v) for v in hi))
        object.__setattr__(self, "npoints", tuple(int(v) for v in n))

    @property
    def ndim(self) -> int:
        return len(self.npoints)

    @property
    def shape(self) -> tuple:
        return self.npoints

    @property
    def spacing(self) -> np.ndarray:
        """Δx_a (Bohr), shape (D,)."""
        return (np.array(self.upper) - np.array(self.lower)) / np.array(self.npoints)

    @property
    def volume_element(self) -> float:
        """Π_a Δx_a (Bohr^D): ∫|ψ|² = Σ|ψ|² · volume_element."""
        return float(np.prod(self.spacing))

    @property
    def axes(self) -> list[np.ndarray]:
        """Grid coordinates per axis (Bohr)."""
        return [lo + dx * np.arange(n) for lo, dx, n in zip(self.lower, self.spacing, self.npoints)]

    @property
    def points(self) -> np.ndarray:
        """All grid points, shape (N_total, D), C order (last axis fastest) (Bohr)."""
        mesh = np.meshgrid(*self.axes, indexing="ij")
        return np.stack([m.ravel() for m in mesh], axis=1)

    @property
    def wavenumbers(self) -> list[np.ndarray]:
        """FFT wavenumbers per axis, k = 2π fftfreq(N, Δx) (Bohr⁻¹)."""
        return [2.0 * np.pi * np.fft.fftfreq(n, dx) for n, dx in zip(self.npoints, self.spacing)]

    @property
    def max_wavenumber(self) -> np.ndarray:
        """π/Δx_a, the largest momentum the grid represents (a.u.), shape (D,)."""
        return np.pi / self.spacing


@dataclasses.dataclass(frozen=True)
class Absorber:
    """Quadratic absorbing layers of ``length`` (Bohr; a number, or one per axis) inside every face of
    the box, W = ``strength`` · Σ_a (d_a/length_a)² (Eh), d_a the depth into the layer along axis a."""

    length: float | tuple = 12.0
    strength: float = 0.05

    def __post_init__(self):
        lengths = np.atleast_1d(np.asarray(self.length, dtype=float))
        if lengths.ndim != 1 or not np.all(np.isfinite(lengths)) or np.any(lengths <= 0):
            raise ValueError(f"absorber length={self.length!r} is not allowed; it must be a positive number of Bohr (or one per axis)")
        if not (math.isfinite(self.strength) and self.strength >= 0):
            raise ValueError(f"absorber strength={self.strength!r} is not allowed; it must be a non-negative number of Eh")

    def lengths(self, ndim: int) -> np.ndarray:
        """Layer length per axis (Bohr), shape (ndim,)."""
        lengths = np.atleast_1d(np.asarray(self.length, dtype=float))
        if lengths.size not in (1, ndim):
            raise ValueError(f"absorber length={self.length!r} must be one number or {ndim} numbers")
        return np.broadcast_to(lengths, (ndim,)).copy()

    def potential_and_channels(self, grid: Grid) -> tuple[np.ndarray, np.ndarray, list[str]]:
        """W at the grid points (N_total,) in Eh, the channel index of each point (−1 = interior) and
        the channel names ("lower"/"upper" in 1D; "lower_0", "upper_0", "lower_1", "upper_1" in 2D)."""
        X = grid.points
        L = self.lengths(grid.ndim)
        lo, hi = np.array(grid.lower), np.array(grid.upper) - grid.spacing
        if np.any(2 * L >= hi - lo):
            raise ValueError(f"absorber length={self.length} is too long for a box of width {(hi - lo).tolist()} Bohr")
        depth_lo = np.clip(lo + L - X, 0.0, None) / L  # (N, D), fraction of the layer
        depth_hi = np.clip(X - (hi - L), 0.0, None) / L
        W = self.strength * np.sum(depth_lo ** 2 + depth_hi ** 2, axis=1)
        depths = np.empty((X.shape[0], 2 * grid.ndim))
        depths[:, 0::2], depths[:, 1::2] = depth_lo, depth_hi
        channel = np.where(depths.max(axis=1) > 0, np.argmax(depths, axis=1), -1)
        if grid.ndim == 1:
            names = ["lower", "upper"]
        else:
            names = [f"{side}_{a}" for a in range(grid.ndim) for side in ("lower", "upper")]
        return W, channel, names


def _check_model(model: DiabaticModel, grid: Grid) -> None:
    if model.ndof != grid.ndim:
        raise ValueError(f"model has {model.ndof} nuclear degrees of freedom but the grid has {grid.ndim} axes")


def _apply_pointwise(A: np.ndarray, psi: np.ndarray, transpose: bool = False) -> np.ndarray:
    """out[k, n] = Σ_l A[k, l, n] psi[l, n] (or A[l, k, n] when ``transpose``), A (F, F, N)."""
    F = psi.shape[0]
    out = np.empty(psi.shape, dtype=complex)
    for k in range(F):
        acc = (A[0, k] if transpose else A[k, 0]) * psi[0]
        for l in range(1, F):
            acc += (A[l, k] if transpose else A[k, l]) * psi[l]
        out[k] = acc
    return out


class GridPropagator:
    """Split-operator propagator for ``model`` on ``grid`` with time step ``dt`` (a.u.).

    Wavefunctions are complex arrays (F, N_total) in the diabatic basis, normalised so that
    Σ|ψ|² · grid.volume_element = 1.  Attributes exposing the grid Hamiltonian (for independent
    checks): ``potential`` (N, F, F) Eh, ``kinetic`` (grid.shape) Eh on the FFT grid,
    ``absorbing_potential`` (N,) Eh, ``channel`` (N,) int, ``channel_names``, ``eigvecs`` (N, F, F).
    """

    def __init__(self, model: DiabaticModel, grid: Grid, dt: float, absorber: Absorber | None = Absorber()):
        _check_model(model, grid)
        if not (math.isfinite(dt) and dt > 0):
            raise ValueError(f"dt={dt!r} is not allowed; the time step must be a positive number of a.u.")
        self.model, self.grid, self.dt = model, grid, float(dt)
        X = grid.points
        self.potential = model.hamiltonian(X)
        E, U = np.linalg.eigh(self.potential)
        self.eigvals = E
        self.eigvecs = model.adiabatic(X)[1]
        # (F, F, N) so that one step is F² vector operations
        self._vhalf = np.ascontiguousarray(np.einsum("nkl,nl,nml->kmn", U, np.exp(-0.5j * self.dt * E), U))
        ks = np.meshgrid(*grid.wavenumbers, indexing="ij")
        self.kinetic = sum(0.5 * k * k / m for k, m in zip(ks, np.asarray(model.masses, dtype=float)))
        self._tphase = np.exp(-1j * self.dt * self.kinetic)
        nch = 2 * grid.ndim
        self.channel_names = ["lower", "upper"] if grid.ndim == 1 else \
            [f"{s}_{a}" for a in range(grid.ndim) for s in ("lower", "upper")]
        if absorber is None:
            self.absorbing_potential = np.zeros(X.shape[0])
            self.channel = np.full(X.shape[0], -1)
        else:
            self.absorbing_potential, self.channel, self.channel_names = absorber.potential_and_channels(grid)
        self._abs_idx = np.nonzero(self.absorbing_potential > 0)[0]
        self._abs_mask = np.exp(-0.5 * self.dt * self.absorbing_potential[self._abs_idx])
        self._abs_loss = (1.0 - self._abs_mask ** 2) * grid.volume_element
        self._abs_channel = self.channel[self._abs_idx]
        self._abs_U = np.ascontiguousarray(np.transpose(self.eigvecs[self._abs_idx], (1, 2, 0)))  # (F, F, n_abs)
        self.nchannels = nch
        self.nstates = model.nstates

    def _absorb(self, psi: np.ndarray, absorbed: np.ndarray) -> None:
        if self._abs_idx.size == 0:
            return
        sub = psi[:, self._abs_idx]
        ad = _apply_pointwise(self._abs_U, sub, transpose=True)
        loss = np.abs(ad) ** 2 * self._abs_loss  # (F, n_abs)
        for f in range(self.nstates):
            absorbed[:, f] += np.bincount(self._abs_channel, weights=loss[f], minlength=self.nchannels)
        psi[:, self._abs_idx] = sub * self._abs_mask

    def step(self, psi: np.ndarray, absorbed: np.ndarray) -> np.ndarray:
        """One step: returns the new ψ (F, N); adds the absorbed probability to ``absorbed``
        (n_channels, F) in place (adiabatic states).  The input ``psi`` is overwritten."""
        self._absorb(psi, absorbed)
        psi = _apply_pointwise(self._vhalf, psi)
        axes = tuple(range(1, self.grid.ndim + 1))
        phi = scipy.fft.fftn(psi.reshape((self.nstates,) + self.grid.shape), axes=axes)
        phi *= self._tphase
        psi = scipy.fft.ifftn(phi, axes=axes).reshape(self.nstates, -1)
        psi = _apply_pointwise(self._vhalf, psi)
        self._absorb(psi, absorbed)
        return psi

    def adiabatic_amplitudes(self, psi: np.ndarray) -> np.ndarray:
        """ψ_ad = Uᵀ ψ at every grid point, (F, N)."""
        return np.einsum("nlk,ln->kn", self.eigvecs, psi)

    def populations(self, psi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """On-grid diabatic and adiabatic populations, each (F,) (dimensionless)."""
        dv = self.grid.volume_element
        return (np.sum(np.abs(psi) ** 2, axis=1) * dv,
                np.sum(np.abs(self.adiabatic_amplitudes(psi)) ** 2, axis=1) * dv)


def gaussian_wavepacket(model: DiabaticModel, grid: Grid, position, momentum, position_width,
                        initial_state: int = 0, basis: str = "adiabatic") -> np.ndarray:
    """ψ(R) ∝ Π_a exp[−(R_a−R0_a)²/(4σ_a²) + i k_a(R_a−R0_a)] times electronic state
    ``initial_state`` of ``basis`` at each point ("adiabatic": column of U(R)), normalised on the grid.

    position R0 (Bohr), momentum k (a.u.), position_width σ (Bohr, > 0): numbers or length-D vectors.
    Returns (F, N_total) complex diabatic amplitudes.
    """
    _check_model(model, grid)
    D, F = grid.ndim, model.nstates
    vals = []
    for name, v in (("position", position), ("momentum", momentum), ("position_width", position_width)):
        a = np.broadcast_to(np.asarray(v, dtype=float), (D,)) if np.ndim(v) <= 1 and np.size(v) in (1, D) else None
        if a is None or not np.all(np.isfinite(a)):
            raise ValueError(f"{name} must be a finite number or a vector of length {D}, got {v!r}")
        vals.append(a)
    R0, k, sig = vals
    if np.any(sig <= 0):
        raise ValueError(f"position_width={position_width!r} is not allowed; it must be positive (Bohr)")
    if basis not in ("adiabatic", "diabatic"):
        raise ValueError(f"basis={basis!r} is not allowed; choose adiabatic or diabatic")
    if isinstance(initial_state, bool) or not isinstance(initial_state, (int, np.integer)) or not 0 <= initial_state < F:
        raise ValueError(f"initial_state={initial_state!r} is not allowed; it must be an integer in 0..{F - 1}")
    X = grid.points
    d = X - R0
    g = np.exp(np.sum(-d * d / (4.0 * sig * sig) + 1j * k * d, axis=1))
    if basis == "adiabatic":
        vec = model.adiabatic(X)[1][:, :, initial_state].T
    else:
        vec = np.zeros((F, X.shape[0]))
        vec[initial_state] = 1.0
    psi = vec * g
    norm = np.sum(np.abs(psi) ** 2) * grid.volume_element
    return psi / np.sqrt(norm)


@dataclasses.dataclass
class WavepacketRun:
    """Recorded output of :func:`propagate_wavepacket` (atomic units).

    times (T,) a.u.; norm (T,) on-grid probability; populations_diabatic/adiabatic (T, F) on grid;
    absorbed (T, n_channels, F) cumulative probability absorbed per channel and adiabatic state;
    channel_names; final_psi (F, N); final_absorbed (n_channels, F).
    ``total_adiabatic`` = on-grid + absorbed adiabatic populations (T, F).
    """

    times: np.ndarray
    norm: np.ndarray
    populations_diabatic: np.ndarray
    populations_adiabatic: np.ndarray
    absorbed: np.ndarray
    channel_names: list
    final_psi: np.ndarray
    final_absorbed: np.ndarray

    @property
    def total_adiabatic(self) -> np.ndarray:
        return self.populations_adiabatic + self.absorbed.sum(axis=1)


def propagate_wavepacket(propagator: GridPropagator, psi0: np.ndarray, nsteps: int,
                         record_every: int = 1) -> WavepacketRun:
    """Propagate ψ0 (F, N) for ``nsteps`` steps of ``propagator.dt``, recording every ``record_every``."""
    if isinstance(nsteps, bool) or not isinstance(nsteps, (int, np.integer)) or nsteps < 0:
        raise ValueError(f"nsteps={nsteps!r} is not allowed; it must be a non-negative integer")
    if isinstance(record_every, bool) or not isinstance(record_every, (int, np.integer)) or record_every < 1:
        raise ValueError(f"record_every={record_every!r} is not allowed; it must be a positive integer")
    F, N = propagator.nstates, propagator.grid.points.shape[0]
    psi = np.array(psi0, dtype=complex)
    if psi.shape != (F, N):
        raise ValueError(f"psi0 must have shape ({F}, {N}), got {psi.shape}")
    absorbed = np.zeros((propagator.nchannels, F))
    rec = {"t": [], "norm": [], "dia": [], "ad": [], "abs": []}

    def record(i):
        dia, ad = propagator.populations(psi)
        rec["t"].append(i * propagator.dt)
        rec["norm"].append(dia.sum())
        rec["dia"].append(dia)
        rec["ad"].append(ad)
        rec["abs"].append(absorbed.copy())

    record(0)
    for i in range(1, nsteps + 1):
        psi = propagator.step(psi, absorbed)
        if i % record_every == 0:
            record(i)
    return WavepacketRun(np.array(rec["t"]), np.array(rec["norm"]), np.array(rec["dia"]), np.array(rec["ad"]),
                         np.array(rec["abs"]), list(propagator.channel_names), psi, absorbed)


# ---------------------------------------------------------------------------------------------
# 1D scattering with the exact solver (same arguments as mapdyn.validation.scattering.run_scattering)


@dataclasses.dataclass(frozen=True)
class ExactSettings:
    """Numerical settings of :func:`exact_scattering` (None = chosen automatically).

    spacing : grid spacing Δx (Bohr); default π/(``momentum_margin`` · k_max) with k_max the largest
        local momentum reachable on the lowest adiabat by the packet's momentum range |k| + 6σ_P.
    dt : time step (a.u.); default min(2, 1.5/ΔE) with ΔE the largest energy range on the grid (Eh).
    margin : free space between the interaction region / initial packet (±8σ) and the absorbers (Bohr).
    absorber : the absorbing layers.
    tolerance : the run ends once the probability inside the interaction region falls below it.
    max_time : time limit (a.u.); default 6 × box length / initial speed.
    """

    spacing: float | None = None
    dt: float | None = None
    margin: float = 6.0
    absorber: Absorber = Absorber()
    tolerance: float = 1e-5
    momentum_margin: float = 1.3
    max_time: float | None = None


def _region_from_model(model, interaction_region):
    from mapdyn.validation.channels import default_interaction_region
    if interaction_region is None:
        return default_interaction_region(model)
    a, b = (float(v) for v in interaction_region)
    if not (math.isfinite(a) and math.isfinite(b) and b > a):
        raise ValueError(f"interaction_region={interaction_region!r} is not allowed; give (lower, upper) Bohr with upper > lower")
    return a, b


def exact_scattering(model: DiabaticModel, momentum: float, position: float, position_width: float, *,
                     initial_state: int = 0, interaction_region: tuple | None = None,
                     settings: ExactSettings = ExactSettings(), record_every: int = 0) -> "ScatteringResult":
    """Exact channel-resolved scattering probabilities for a 1D model (same arguments as
    :func:`mapdyn.validation.scattering.run_scattering`, which are keywords here after the packet).

    The packet ψ ∝ exp[−(x−x0)²/(4σ²) + ik(x−x0)] (``position`` x0 Bohr, ``momentum`` k a.u.,
    ``position_width`` σ Bohr) starts on adiabatic state ``initial_state`` and is propagated until
    less than ``settings.tolerance`` of probability remains inside ``interaction_region`` (Bohr;
    default :func:`mapdyn.validation.scattering.default_interaction_region`).  Channel probabilities per
    adiabatic state = probability absorbed at that side + probability still on the grid beyond the
    region on that side.  "Transmitted" is the side the packet moves towards (k > 0: x → +∞).
    Returns a :class:`mapdyn.validation.scattering.ScatteringResult` with zero standard errors; ``details``
    holds the grid, dt, final time, residual inside the region and, when ``record_every`` > 0, the
    on-grid adiabatic populations and cumulative absorbed probabilities vs time (every that many
    steps and at the final step).
    """
    from mapdyn.validation.channels import ScatteringResult, _check_scattering_args
    if model.ndof != 1:
        raise ValueError(f"exact_scattering needs a 1D model; this one has ndof={model.ndof}")
    k, x0, sig = _check_scattering_args(model, momentum, position, position_width, initial_state)
    a, b = _region_from_model(model, interaction_region)
    M = float(model.masses[0])
    sP = 0.5 / sig
    lo_in = min(a, x0 - 8 * sig) - settings.margin
    hi_in = max(b, x0 + 8 * sig) + settings.margin
    L = float(settings.absorber.lengths(1)[0])
    lo, hi = lo_in - L, hi_in + L
    xs = np.linspace(lo, hi, 4001)[:, None]
    E = model.adiabatic(xs)[0]
    E0 = float(model.adiabatic(np.array([[x0]]))[0][0, initial_state])
    e_top = (abs(k) + 6 * sP) ** 2 / (2 * M) + E0
    kmax = math.sqrt(2 * M * max(e_top - E[:, 0].min(), 1e-12))
    dx = settings.spacing or math.pi / (settings.momentum_margin * kmax)
    n = scipy.fft.next_fast_len(int(math.ceil((hi - lo) / dx)))
    grid = Grid((lo,), (lo + n * dx,), (n,))
    if settings.dt is None:
        erange = max(e_top, E.max()) - E.min()
        dt = min(2.0, 1.5 / max(erange, 1e-12))
    else:
        dt = settings.dt
    prop = GridPropagator(model, grid, dt, settings.absorber)
    psi = gaussian_wavepacket(model, grid, x0, k, sig, initial_state, "adiabatic")
    X = grid.points[:, 0]
    inside = (X >= a) & (X <= b)
    left, right = X < a, X > b
    dv = grid.volume_element
    max_time = settings.max_time or 6.0 * (hi - lo) / max(abs(k) / M, 1e-12)
    nmax = int(math.ceil(max_time / dt))
    absorbed = np.zeros((2, model.nstates))
    p_in = float(np.sum(np.abs(psi[:, inside]) ** 2) * dv)
    entered = p_in >= settings.tolerance
    times, pops, absorbed_t = [], [], []
    check = 5
    step = 0
    while step < nmax:
        psi = prop.step(psi, absorbed)
        step += 1
        if record_every and step % record_every == 0:
            times.append(step * dt)
            pops.append(prop.populations(psi)[1])
            absorbed_t.append(absorbed.copy())
        if step % check == 0:
            p_in = float(np.sum(np.abs(psi[:, inside]) ** 2) * dv)
            if p_in >= settings.tolerance:
                entered = True
            elif entered:
                break
    if record_every and step % record_every:
        times.append(step * dt)
        pops.append(prop.populations(psi)[1])
        absorbed_t.append(absorbed.copy())
    converged = entered and p_in < settings.tolerance
    if not converged:
        warnings.warn(f"exact_scattering: {p_in:.2e} probability still inside the interaction region at "
                      f"t = {step * dt:.0f} a.u. (max_time); results are incomplete", RuntimeWarning, stacklevel=2)
    ad = np.abs(prop.adiabatic_amplitudes(psi)) ** 2 * dv
    lower = absorbed[0] + ad[:, left].sum(axis=1)
    upper = absorbed[1] + ad[:, right].sum(axis=1)
    trans, refl = (upper, lower) if k >= 0 else (lower, upper)
    details = {"grid": grid, "dt": dt, "final_time": step * dt, "residual_inside": p_in,
               "absorbed": absorbed.copy(), "converged": converged, "interaction_region": (a, b),
               "norm_on_grid": float(np.sum(np.abs(psi) ** 2) * dv)}
    if record_every:
        details.update(times=np.array(times), populations_adiabatic=np.array(pops),
                       absorbed_vs_time=np.array(absorbed_t))
    zeros = np.zeros(model.nstates)
    return ScatteringResult(method="exact", transmission=trans, reflection=refl, transmission_error=zeros,
                            reflection_error=zeros.copy(), ntraj=0, n_unassigned=0, n_unfinished=0,
                            details=details)


@dataclasses.dataclass
class ConvergenceReport:
    """Channel probabilities of the base run and of each refined run, and the largest absolute
    change of any transmission/reflection probability per refinement (dimensionless)."""

    base: object
    variants: dict
    deviations: dict

    @property
    def max_deviation(self) -> float:
        return max(self.deviations.values())


def check_convergence(model: DiabaticModel, momentum: float, position: float, position_width: float, *,
                      initial_state: int = 0, interaction_region: tuple | None = None,
                      settings: ExactSettings = ExactSettings()) -> ConvergenceReport:
    """Re-run :func:`exact_scattering` with a 1.5× finer grid, a larger box with 1.5× longer absorbers
    and half the time step, and report how much the channel probabilities move."""
    base = exact_scattering(model, momentum, position, position_width, initial_state=initial_state,
                            interaction_region=interaction_region, settings=settings)
    g, dt = base.details["grid"], base.details["dt"]
    refined = {
        "grid": dataclasses.replace(settings, spacing=float(g.spacing[0]) / 1.5, dt=dt),
        "box": dataclasses.replace(settings, spacing=float(g.spacing[0]), dt=dt, margin=settings.margin + 10.0,
                                   absorber=Absorber(1.5 * settings.absorber.lengths(1)[0], settings.absorber.strength)),
        "time_step": dataclasses.replace(settings, spacing=float(g.spacing[0]), dt=dt / 2),
    }
    variants, devs = {}, {}
    for name, s in refined.items():
        r = exact_scattering(model, momentum, position, position_width, initial_state=initial_state,
                             interaction_region=interaction_region, settings=s)
        variants[name] = r
        devs[name] = float(max(np.max(np.abs(r.transmission - base.transmission)),
                               np.max(np.abs(r.reflection - base.reflection))))
    return ConvergenceReport(base, variants, devs)
