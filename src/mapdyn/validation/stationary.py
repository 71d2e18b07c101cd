"""Energy-resolved (time-independent) exact scattering for 1D multi-state models.

An exact reference that shares nothing with :mod:`mapdyn.validation.exact` (time-dependent split-operator
wavepackets): at each total energy E the coupled-channel equation

    ψ''(x) = W(x) ψ(x),   W = 2M (V(x) − E),   ψ (F,) diabatic components, ħ = 1,

is discretised with Numerov's three-point formula (B. Numerov, 1924; e.g. J. M. Blatt, J. Comput.
Phys. 1, 382 (1967)),

    A_{n+1} ψ_{n+1} − 2 B_n ψ_n + A_{n−1} ψ_{n−1} = 0,   A = 1 − h²W/12,  B = 1 + 5h²W/12,

and solved as one banded linear system on x_0 … x_{N−1} with *exact discrete outgoing-wave boundary
conditions*: beyond both ends V is constant, so in the asymptotic adiabatic channel j the discrete
solutions are λ^n with λ + 1/λ = 2 b_j/a_j (a_j, b_j the channel values of A, B).  For an open
channel λ = e^{±iθ_j}; for a closed one λ is real and the decaying root is kept.  The left end carries
the incoming wave e^{iθ n} in the initial channel plus reflected waves; the right end only transmitted
(outgoing or decaying) waves.  Because the boundary conditions are exact for the discrete equation,
the only discretisation error is Numerov's O(h⁴) (checked by halving h in the tests).  Channel
probabilities use the conserved discrete flux a_j² sin θ_j |amplitude|², so Σ R + Σ T = 1 to rounding
for a real symmetric V (tested).

Packet average (the link to a wavepacket run): a packet that starts in the asymptotic region on one
adiabatic state is a superposition of incoming scattering states, so its final channel probabilities
are ∫ |φ(p)|² P(E(p)) dp with E(p) = p²/2M + ε_initial(−∞) exactly.  Packet convention (the same as
:mod:`mapdyn.validation.exact` and :func:`mapdyn.core.sampling.gaussian_wavepacket_ensemble`):

    ψ(x) ∝ exp[−(x − x0)²/(4σ²) + ik(x − x0)]  →  |ψ|² has standard deviation σ,
    |φ(p)|² ∝ exp[−(p − k)²/(2σ_p²)],  σ_p = 1/(2σ).

``width_convention="tully"`` reads the width as in J. C. Tully, J. Chem. Phys. 93, 1061 (1990),
ψ ∝ exp[−(x − x0)²/σ_T² + ikx] (form recalled from memory), i.e. σ = σ_T/2 and σ_p = 1/σ_T.  Components
with p ≤ 0 never reach the interaction region and count as reflection in the initial channel.

All quantities in Hartree atomic units (Bohr, a.u. of momentum, Eh).
"""

from __future__ import annotations

import dataclasses
import itertools
import math

import numpy as np
import scipy.linalg

from mapdyn.core.model import DiabaticModel

__all__ = ["asymptotic_bounds", "channel_probabilities", "PacketProbabilities", "packet_probabilities",
           "WIDTH_CONVENTIONS"]

WIDTH_CONVENTIONS = ("standard_deviation", "tully")


def _potential(model: DiabaticModel, x: np.ndarray) -> np.ndarray:
    return model.hamiltonian(np.asarray(x, dtype=float).reshape(-1, 1))


def _check_1d(model: DiabaticModel) -> None:
    if model.ndof != 1:
        raise ValueError(f"model {getattr(model, 'name', model)!r} has {model.ndof} nuclear degrees of freedom; "
                         "the energy-resolved solver handles 1D models only")


def asymptotic_bounds(model: DiabaticModel, tol: float = 1e-9, reach: float = 600.0,
                      spacing: float = 0.05) -> tuple[float, float]:
    """(lower, upper) in Bohr: outside [lower, upper] every element of V(x) differs from its value at
    ∓``reach`` by at most ``tol`` (Eh).  Scanned on a grid of ``spacing`` Bohr."""
    _check_1d(model)
    x = np.arange(-reach, reach + spacing / 2, spacing)
    V = _potential(model, x)
    dev_l = np.abs(V - V[0]).max(axis=(1, 2))
    dev_r = np.abs(V - V[-1]).max(axis=(1, 2))
    bad_l = np.nonzero(dev_l > tol)[0]
    bad_r = np.nonzero(dev_r > tol)[0]
    if bad_l.size == 0 or bad_r.size == 0:
        raise ValueError("the model potential is constant over the whole scan; nothing to scatter from")
    lower = x[max(bad_l[0] - 1, 0)]
    upper = x[min(bad_r[-1] + 1, x.size - 1)]
    if lower <= x[0] or upper >= x[-1]:
        raise ValueError(f"the potential does not become constant to {tol:g} Eh within ±{reach:g} Bohr")
    return float(lower), float(upper)


def _channel_roots(w: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per asymptotic channel with W eigenvalue w: (a, open, θ, λ_decay).

    a = 1 − h²w/12; for open channels cos θ = b/a ∈ (−1, 1); for closed ones the root of
    λ + 1/λ = 2b/a with |λ| < 1."""
    a = 1.0 - h * h * w / 12.0
    b = 1.0 + 5.0 * h * h * w / 12.0
    c = b / a
    is_open = c < 1.0
    theta = np.where(is_open, np.arccos(np.clip(c, -1.0, 1.0)), 0.0)
    cc = np.maximum(c, 1.0)
    decay = cc - np.sqrt(cc * cc - 1.0)
    return a, is_open, theta, decay


def channel_probabilities(model: DiabaticModel, energy: float, lower: float, upper: float, step: float,
                          initial_state: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Reflection and transmission probabilities (F,), (F,) per asymptotic adiabatic state (ascending
    energy) at total energy ``energy`` (Eh), incoming from x → −∞ in adiabatic state ``initial_state``.

    ``lower``/``upper`` (Bohr): ends of the grid, beyond which V is taken constant (see
    :func:`asymptotic_bounds`); ``step`` h (Bohr).  Closed channels get probability 0."""
    _check_1d(model)
    if not (math.isfinite(step) and step > 0):
        raise ValueError(f"step={step!r} is not allowed; it must be a positive number of Bohr")
    if not upper > lower:
        raise ValueError(f"upper={upper!r} must lie above lower={lower!r}")
    n = int(round((upper - lower) / step)) + 1
    x = lower + step * np.arange(n)
    V = _potential(model, x)
    f = V.shape[1]
    if not 0 <= initial_state < f:
        raise ValueError(f"initial_state={initial_state!r} is not allowed; it must be in 0..{f - 1}")
    M = float(np.atleast_1d(model.masses)[0])
    eye = np.eye(f)
    W = 2.0 * M * (V - energy * eye)
    A = eye - step * step * W / 12.0
    B = eye + 5.0 * step * step * W / 12.0

    eps_l, U_l = np.linalg.eigh(V[0])
    eps_r, U_r = np.linalg.eigh(V[-1])
    a_l, open_l, th_l, dec_l = _channel_roots(2.0 * M * (eps_l - energy), step)
    a_r, open_r, th_r, dec_r = _channel_roots(2.0 * M * (eps_r - energy), step)
    if not open_l[initial_state]:
        raise ValueError(f"energy={energy!r} Eh is below the asymptotic energy {eps_l[initial_state]!r} Eh of the "
                         f"initial channel {initial_state}")
    mu_l = np.where(open_l, np.exp(-1j * th_l), 1.0 / np.maximum(dec_l, 1e-300))   # reflected: μ^n, n ≤ 0
    nu_r = np.where(open_r, np.exp(1j * th_r), dec_r)                               # transmitted: ν^n
    lam0 = np.exp(1j * th_l[initial_state])

    # block tridiagonal → banded (unknown index F·n + s); diagonal blocks −2B_n, off-diagonal A_{n±1}
    diag = (-2.0 * B).astype(complex)
    diag[0] += A[0] @ (U_l * (1.0 / mu_l)) @ U_l.T
    diag[-1] += A[-1] @ (U_r * nu_r) @ U_r.T
    rhs = np.zeros((n, f), dtype=complex)
    rhs[0] = -A[0] @ U_l[:, initial_state] * (1.0 / lam0 - 1.0 / mu_l[initial_state])
    bw = 2 * f - 1
    ab = np.zeros((2 * bw + 1, n * f), dtype=complex)
    for s in range(f):
        for t in range(f):
            # diagonal block: row F n + s, column F n + t
            ab[bw + s - t, f * np.arange(n) + t] = diag[:, s, t]
            # upper block: row F n + s, column F (n+1) + t, value A_{n+1}[s, t]
            ab[bw + s - t - f, f * np.arange(1, n) + t] = A[1:, s, t]
            # lower block: row F (n+1) + s, column F n + t, value A_n[s, t]
            ab[bw + s - t + f, f * np.arange(n - 1) + t] = A[:-1, s, t]
    psi = scipy.linalg.solve_banded((bw, bw), ab, rhs.reshape(-1), check_finite=False).reshape(n, f)

    phi_l = U_l.T @ psi[0]
    phi_r = U_r.T @ psi[-1]
    r = phi_l.copy()
    r[initial_state] -= 1.0
    flux_in = a_l[initial_state] ** 2 * math.sin(th_l[initial_state])
    R = np.where(open_l, a_l ** 2 * np.sin(th_l) * np.abs(r) ** 2, 0.0) / flux_in
    T = np.where(open_r, a_r ** 2 * np.sin(th_r) * np.abs(phi_r) ** 2, 0.0) / flux_in
    return R, T


@dataclasses.dataclass
class PacketProbabilities:
    """Packet-averaged channel probabilities (dimensionless), per asymptotic adiabatic state."""

    reflection: np.ndarray
    transmission: np.ndarray
    momentum_width: float
    energies: int
    step: float
    lower: float
    upper: float


def _gauss_segment(a: float, b: float, n: int, sqrt_at: str | None) -> tuple[np.ndarray, np.ndarray]:
    """Gauss–Legendre nodes/weights on [a, b]; with ``sqrt_at`` = "a"/"b" the substitution
    p = a + s² (or b − s²) removes a square-root threshold at that end."""
    t, w = np.polynomial.legendre.leggauss(n)
    if sqrt_at is None:
        return 0.5 * (b - a) * t + 0.5 * (a + b), 0.5 * (b - a) * w
    L = math.sqrt(b - a)
    s = 0.5 * L * (t + 1.0)
    ws = 0.5 * L * w * 2.0 * s
    return (a + s * s, ws) if sqrt_at == "a" else (b - s * s, ws)


def packet_probabilities(model: DiabaticModel, momentum: float, position_width: float, *,
                         initial_state: int = 0, width_convention: str = "standard_deviation",
                         nodes: int = 32, span: float = 8.0, step_factor: float = 0.05,
                         bounds: tuple[float, float] | None = None) -> PacketProbabilities:
    """Channel probabilities of a Gaussian packet (module docstring) averaged over its momenta.

    momentum k (a.u.), position_width (Bohr; σ or Tully's σ_T per ``width_convention``).  The momentum
    density is integrated over k ± ``span`` σ_p with ``nodes`` Gauss–Legendre points per segment,
    segments split at the channel thresholds (square-root substitution next to each).  Grid step
    h = ``step_factor``/k_loc,max (Bohr), k_loc,max the largest local wavenumber at the highest energy."""
    _check_1d(model)
    if width_convention not in WIDTH_CONVENTIONS:
        raise ValueError(f"width_convention={width_convention!r} is not allowed; choose one of "
                         f"{', '.join(WIDTH_CONVENTIONS)}")
    if not (math.isfinite(momentum) and momentum > 0 and math.isfinite(position_width) and position_width > 0):
        raise ValueError(f"momentum={momentum!r} and position_width={position_width!r} must be positive numbers")
    sigma = position_width if width_convention == "standard_deviation" else position_width / 2.0
    sp = 1.0 / (2.0 * sigma)
    lower, upper = asymptotic_bounds(model) if bounds is None else bounds
    M = float(np.atleast_1d(model.masses)[0])
    eps_l = np.linalg.eigvalsh(_potential(model, [lower])[0])
    eps_r = np.linalg.eigvalsh(_potential(model, [upper])[0])
    e0 = eps_l[initial_state]
    p_lo, p_hi = max(momentum - span * sp, 0.0), momentum + span * sp
    # momenta at which a channel opens (either end)
    thresholds = sorted({math.sqrt(2 * M * (e - e0)) for e in np.concatenate([eps_l, eps_r]) if e > e0}
                        | ({0.0} if p_lo == 0.0 else set()))
    cuts = [p_lo] + [t for t in thresholds if p_lo < t < p_hi] + [p_hi]
    ps, ws = [], []
    for a, b in itertools.pairwise(cuts):
        near_a = a in thresholds
        near_b = b in thresholds
        if near_a and near_b:
            mid = 0.5 * (a + b)
            for seg in ((a, mid, "a"), (mid, b, "b")):
                p, w = _gauss_segment(*seg[:2], nodes, seg[2])
                ps.append(p), ws.append(w)
        else:
            p, w = _gauss_segment(a, b, nodes, "a" if near_a else ("b" if near_b else None))
            ps.append(p), ws.append(w)
    p = np.concatenate(ps)
    w = np.concatenate(ws) * np.exp(-0.5 * ((p - momentum) / sp) ** 2) / (math.sqrt(2 * math.pi) * sp)
    energies = p * p / (2 * M) + e0
    vmin = float(np.linalg.eigvalsh(_potential(model, np.linspace(lower, upper, 2001))).min())
    h = step_factor / math.sqrt(2 * M * (energies.max() - vmin))
    f = eps_l.size
    R = np.zeros(f)
    T = np.zeros(f)
    for pk, wk, E in zip(p, w, energies):
        if pk <= 0.0:
            continue
        r, t = channel_probabilities(model, float(E), lower, upper, h, initial_state)
        R += wk * r
        T += wk * t
    # mass of the momentum density outside the integration range: p ≤ max(k − span σ_p, 0) is reflected
    # unchanged (for p ≤ 0 exactly; the span makes the rest < 1e-14), p above the range is dropped
    below = 0.5 * math.erfc((momentum - p_lo) / (math.sqrt(2) * sp))
    R[initial_state] += below
    return PacketProbabilities(R, T, sp, int(p.size), h, lower, upper)
