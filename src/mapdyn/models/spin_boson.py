"""Spin-boson and site-exciton bath models, bath discretisations, thermal Wigner bath sampling.

Convention (docs/theory.md#spin-boson-model; Pauli matrices σ_z = diag(1, −1), σ_x, **no factors of ½**):

    H = ε σ_z + Δ σ_x + Σ_j [ P_j²/2 + ½ ω_j² Q_j² + c_j Q_j σ_z ]     (mass-weighted bath, m_j = 1)

    H_11 = V0 + ε + Σ_j c_j Q_j,   H_22 = V0 − ε − Σ_j c_j Q_j,   H_12 = Δ,   V0 = Σ_j ½ ω_j² Q_j²

    J(ω) = (π/2) Σ_j (c_j²/ω_j) δ(ω − ω_j),    λ = Σ_j c_j²/(2ω_j²) = (1/π) ∫ J(ω)/ω dω

(Leggett et al., Rev. Mod. Phys. 59, 1 (1987)).  Between the two diabats the Marcus
reorganisation energy is λ_M = Σ_j 2c_j²/ω_j² = 4λ and the driving force (state 1 → 2) is
ΔG = −2ε.  Texts writing (ε/2)σ_z + (Δ/2)σ_x have ε, Δ twice ours.  All energies and
frequencies in Eh (ħ = 1, so ω in rad per a.u. of time), Q in Bohr·√m_e, c_j in Eh/(Bohr·√m_e).
State indices in code are 0-based: state 0 is "state 1" (the donor) above.
"""

from __future__ import annotations

import numpy as np

from mapdyn.core.options import MethodOptions
from mapdyn.core.sampling import EnsembleState, gaussian_phase_space
from mapdyn.models.vibronic import LinearVibronicModel

__all__ = [
    "ohmic_spectral_density",
    "debye_spectral_density",
    "ohmic_modes",
    "debye_modes",
    "SpinBoson",
    "ExcitonTransferModel",
    "thermal_bath_widths",
    "thermal_bath_ensemble",
]


def _positive(name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not np.isfinite(value) or value <= 0:
        raise ValueError(f"{name}={value!r} is not allowed; it must be a positive finite number")
    return float(value)


def _count(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name}={value!r} is not allowed; it must be a positive integer")
    return int(value)


def ohmic_spectral_density(omega, kondo: float, cutoff: float) -> np.ndarray:
    """Ohmic density with exponential cutoff J(ω) = (π/2) ξ ω e^{−ω/ω_c} (Eh); ξ dimensionless.

    Reorganisation energy of the full density: λ = (1/π)∫_0^∞ J/ω dω = ξ ω_c/2.
    """
    omega = np.asarray(omega, dtype=float)
    return 0.5 * np.pi * kondo * omega * np.exp(-omega / cutoff)


def debye_spectral_density(omega, reorganization: float, cutoff: float) -> np.ndarray:
    """Debye (Drude–Lorentz) density J(ω) = 2λ ω ω_c/(ω² + ω_c²) (Eh), λ = (1/π)∫_0^∞ J/ω dω."""
    omega = np.asarray(omega, dtype=float)
    return 2.0 * reorganization * omega * cutoff / (omega * omega + cutoff * cutoff)


def ohmic_modes(kondo: float, cutoff: float, nmodes: int, omega_max: float | None = None):
    """Discrete Ohmic bath (frequencies ω_j, couplings c_j), both (N,), Eh and Eh/(Bohr·√m_e).

    Frequency density ρ(ω) = e^{−ω/ω_c}/ω_0 with ∫_0^{ω_j} ρ dω = j, and c_j² = (2/π) ω_j J(ω_j)/ρ(ω_j):

        ω_j = −ω_c ln(1 − j ω_0/ω_c),   c_j = ω_j √(ξ ω_0),   ω_0 = (ω_c/N)(1 − e^{−ω_max/ω_c}),  j = 1…N

    (Wang, Thoss & Miller, J. Chem. Phys. 115, 2979 (2001), from memory; re-derived).  The highest
    mode sits at ω_max; ``omega_max=None`` takes ω_max = ω_c ln(N + 1), i.e. the common choice
    ω_0 = ω_c/(N + 1).  Σ c_j²/(2ω_j²) = (ξ ω_c/2)(1 − e^{−ω_max/ω_c}) = the reorganisation
    integral truncated at ω_max (exact for the truncated integral only).
    """
    kondo, cutoff, nmodes = _positive("kondo", kondo), _positive("cutoff", cutoff), _count("nmodes", nmodes)
    wmax = cutoff * np.log(nmodes + 1.0) if omega_max is None else _positive("omega_max", omega_max)
    omega0 = (cutoff / nmodes) * (-np.expm1(-wmax / cutoff))
    j = np.arange(1, nmodes + 1)
    w = -cutoff * np.log1p(-j * omega0 / cutoff)
    if omega_max is not None:
        w[-1] = wmax  # the closed form gives ω_N = ω_max up to rounding
    return w, w * np.sqrt(kondo * omega0)


def debye_modes(reorganization: float, cutoff: float, nmodes: int, rule: str = "midpoint"):
    """Discrete Debye bath (ω_j, c_j), both (N,); frequency density ρ ∝ J(ω)/ω.

    rule="midpoint":  ω_j = ω_c tan[π(j − ½)/(2N)],   c_j = ω_j √(2λ/N)        (Σ c²/2ω² = λ exactly)
    rule="endpoint":  ω_j = ω_c tan[πj/(2(N+1))],     c_j = ω_j √(2λ/(N+1))    (Σ c²/2ω² = Nλ/(N+1))

    Both follow from ∫_0^{ω_j} ρ dω = j − ½ (or j) and c_j² = (2/π) ω_j J(ω_j)/ρ(ω_j) (docs/theory.md#spin-boson-model,
    re-derived; the tangent rule is common practice).  The top frequency is ≈ (4N/π) ω_c: use the
    stiff-bath integrator (:mod:`mapdyn.core.harmonic_bath`) rather than a tiny time step.
    """
    lam, cutoff, nmodes = _positive("reorganization", reorganization), _positive("cutoff", cutoff), _count("nmodes", nmodes)
    j = np.arange(1, nmodes + 1)
    if rule == "midpoint":
        w = cutoff * np.tan(0.5 * np.pi * (j - 0.5) / nmodes)
        return w, w * np.sqrt(2.0 * lam / nmodes)
    if rule == "endpoint":
        w = cutoff * np.tan(0.5 * np.pi * j / (nmodes + 1))
        return w, w * np.sqrt(2.0 * lam / (nmodes + 1))
    raise ValueError(f"rule={rule!r} is not allowed; choose midpoint or endpoint")


class SpinBoson(LinearVibronicModel):
    """Two-state spin-boson model H = ε σ_z + Δ σ_x + Σ_j [P_j²/2 + ½ω_j²Q_j² + c_j Q_j σ_z].

    epsilon ε, delta Δ (Eh); frequencies ω_j (N,) (Eh); couplings c_j (N,) (Eh/(Bohr·√m_e)).
    σ_z = diag(1, −1), no factors of ½, unit masses.  Driving force ΔG = −2ε, Marcus
    reorganisation λ_M = Σ 2c_j²/ω_j² = 4λ (docs/theory.md#spin-boson-model; Leggett et al. 1987).
    """

    name = "spin_boson"

    def __init__(self, epsilon: float, delta: float, frequencies, couplings):
        for nm, v in (("epsilon", epsilon), ("delta", delta)):
            if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) or not np.isfinite(v):
                raise ValueError(f"{nm}={v!r} is not allowed; it must be a finite number (Eh)")
        w = np.asarray(frequencies, dtype=float)
        c = np.asarray(couplings, dtype=float)
        if w.ndim != 1 or c.shape != w.shape:
            raise ValueError(f"frequencies and couplings must be vectors of equal length, got {w.shape} and {c.shape}")
        sz = np.array([[1.0, 0.0], [0.0, -1.0]])
        super().__init__([[epsilon, delta], [delta, -epsilon]], w, c[:, None, None] * sz)
        self.epsilon, self.delta = float(epsilon), float(delta)
        self.bath_couplings = c.copy()

    @classmethod
    def ohmic(cls, epsilon: float, delta: float, kondo: float, cutoff: float, nmodes: int,
              omega_max: float | None = None) -> "SpinBoson":
        """Spin-boson with the discretised Ohmic bath of :func:`ohmic_modes` (J = (π/2) ξ ω e^{−ω/ω_c})."""
        return cls(epsilon, delta, *ohmic_modes(kondo, cutoff, nmodes, omega_max))

    @classmethod
    def debye(cls, epsilon: float, delta: float, reorganization: float, cutoff: float, nmodes: int,
              rule: str = "midpoint") -> "SpinBoson":
        """Spin-boson with the discretised Debye bath of :func:`debye_modes` (J = 2λωω_c/(ω²+ω_c²))."""
        return cls(epsilon, delta, *debye_modes(reorganization, cutoff, nmodes, rule))

    @property
    def reorganization(self) -> float:
        """λ = Σ_j c_j²/(2ω_j²) (Eh), the spectral-density reorganisation energy (1/π)∫J/ω dω."""
        return float(np.sum(self.bath_couplings ** 2 / (2.0 * self.frequencies ** 2)))

    @property
    def marcus_reorganization(self) -> float:
        """λ_M = Σ_j 2c_j²/ω_j² = 4λ (Eh): H_22 at the state-1 minimum minus the state-2 minimum."""
        return 4.0 * self.reorganization

    @property
    def driving_force(self) -> float:
        """ΔG = −2ε (Eh): minimum of H_22 minus minimum of H_11 (electron transfer 1 → 2)."""
        return -2.0 * self.epsilon

    def marcus_rate(self, beta: float) -> float:
        """Classical nonadiabatic (Marcus) rate of transfer 1 → 2 in 1/a.u. of time, ħ = 1:

            k = 2π Δ² (4π λ_M k_BT)^(−1/2) exp[−(ΔG + λ_M)²/(4 λ_M k_BT)]

        with |V| = Δ (H_12), λ_M = Σ 2c²/ω², ΔG = −2ε (R. A. Marcus, J. Chem. Phys. 24, 966 (1956);
        golden-rule prefactor as in docs/theory.md#validation-benchmarks).  beta = 1/k_BT in 1/Eh.
        """
        beta = _positive("beta", beta)
        lam = self.marcus_reorganization
        return float(2.0 * np.pi * self.delta ** 2 / np.sqrt(4.0 * np.pi * lam / beta)
                     * np.exp(-beta * (self.driving_force + lam) ** 2 / (4.0 * lam)))

    def golden_rule_rate(self, beta: float, npoints: int = 2001) -> float:
        """Fermi golden-rule rate 1 → 2 (1/a.u.) for this discretised bath, quantum (ħ = 1):

            k = 2 Δ² Re ∫_0^∞ dt exp{ i 2ε t − Σ_j S_j [coth(βω_j/2)(1 − cos ω_j t) + i sin ω_j t] },
            S_j = 2 c_j²/ω_j³  (Huang–Rhys factors of the displacement 2c_j/ω_j² between the diabats)

        (displaced-oscillator line shape: Kubo & Toyozawa, Prog. Theor. Phys. 13, 160 (1955), from
        memory; re-derived for this Hamiltonian).  Its short-time (classical, βω → 0) limit is
        :meth:`marcus_rate`.  The integrand is sampled on ``npoints`` points up to the time where the
        Gaussian envelope exp(−t² Σ S_j ω_j² coth/2) has fallen below 1e-16 (trapezoid rule; 1001
        points already agree with 20001 to 1e-9 for the study's baths); the integrand must have
        decayed before the bath's recurrence time, which holds for λ_M k_BT ≫ (ω_c/N)².
        """
        beta = _positive("beta", beta)
        w, c = self.frequencies, self.bath_couplings
        S = 2.0 * c * c / w ** 3
        coth = 1.0 / np.tanh(0.5 * beta * w)
        curvature = np.sum(S * coth * w * w)  # exponent ≈ −curvature t²/2 at short times
        t_end = np.sqrt(2.0 * 37.0 / curvature)
        t = np.linspace(0.0, t_end, int(npoints))
        wt = np.outer(t, w)
        phase = 2.0 * self.epsilon * t - np.sin(wt) @ S
        decay = (1.0 - np.cos(wt)) @ (S * coth)
        f = np.exp(-decay) * np.cos(phase)
        return float(2.0 * self.delta ** 2 * np.trapezoid(f, t))


class ExcitonTransferModel(LinearVibronicModel):
    """Excitation transfer between F sites, one independent harmonic bath per site:

        H = Σ_nm h_nm |n⟩⟨m| + Σ_n Σ_j [P_nj²/2 + ½ω_nj²Q_nj² + c_nj Q_nj |n⟩⟨n|]

    site_hamiltonian h (F, F) Eh (site energies on the diagonal, excitonic couplings off it);
    frequencies, couplings (F, N): bath of site n (Eh, Eh/(Bohr·√m_e)).  Modes are ordered site-major:
    degree of freedom n·N + j.  Reorganisation energy of site n: λ_n = Σ_j c_nj²/(2ω_nj²).
    """

    name = "exciton_transfer"

    def __init__(self, site_hamiltonian, frequencies, couplings):
        h = np.asarray(site_hamiltonian, dtype=float)
        if h.ndim != 2 or h.shape[0] != h.shape[1] or h.shape[0] < 2:
            raise ValueError(f"site_hamiltonian must be a square (F, F) matrix with F >= 2, got shape {h.shape}")
        F = h.shape[0]
        w = np.asarray(frequencies, dtype=float)
        c = np.asarray(couplings, dtype=float)
        if w.ndim != 2 or w.shape[0] != F or c.shape != w.shape:
            raise ValueError(f"frequencies and couplings must both have shape ({F}, N), got {w.shape} and {c.shape}")
        N = w.shape[1]
        G = np.zeros((F * N, F, F))
        for n in range(F):
            G[n * N:(n + 1) * N, n, n] = c[n]
        super().__init__(h, w.reshape(-1), G)
        self.site_hamiltonian = h.copy()
        self.modes_per_site = N
        self.site_frequencies, self.site_couplings = w.copy(), c.copy()

    @classmethod
    def debye(cls, site_hamiltonian, reorganization, cutoff, nmodes: int,
              rule: str = "midpoint") -> "ExcitonTransferModel":
        """One Debye bath (:func:`debye_modes`) per site; reorganization λ_n and cutoff ω_c,n are
        numbers or (F,) vectors (Eh)."""
        h = np.asarray(site_hamiltonian, dtype=float)
        if h.ndim != 2:
            raise ValueError(f"site_hamiltonian must be a square (F, F) matrix, got shape {h.shape}")
        F = h.shape[0]
        lam = np.broadcast_to(np.asarray(reorganization, dtype=float), (F,))
        wc = np.broadcast_to(np.asarray(cutoff, dtype=float), (F,))
        modes = [debye_modes(float(lam[n]), float(wc[n]), nmodes, rule) for n in range(F)]
        return cls(h, np.array([m[0] for m in modes]), np.array([m[1] for m in modes]))

    @property
    def site_reorganization(self) -> np.ndarray:
        """λ_n = Σ_j c_nj²/(2ω_nj²) per site (F,), Eh."""
        return np.sum(self.site_couplings ** 2 / (2.0 * self.site_frequencies ** 2), axis=1)


def thermal_bath_widths(model: LinearVibronicModel, beta: float) -> tuple[np.ndarray, np.ndarray]:
    """Widths (σ_Q, σ_P), each (D,), of the thermal Wigner function of the harmonic modes V0:

        σ_Q² = coth(βω/2)/(2mω),   σ_P² = (mω/2) coth(βω/2)

    (Wigner, Phys. Rev. 40, 749 (1932); Hillery et al., Phys. Rep. 106, 121 (1984); docs/theory.md#wigner-sampling).
    beta = 1/k_BT in 1/Eh; ``numpy.inf`` gives the ground state (coth → 1).
    """
    if isinstance(beta, bool) or not isinstance(beta, (int, float, np.integer, np.floating)) \
            or np.isnan(beta) or beta <= 0:
        raise ValueError(f"beta={beta!r} is not allowed; it must be a positive number of 1/Eh (numpy.inf for T = 0)")
    w, m = model.harmonic_frequencies, model.masses
    coth = 1.0 / np.tanh(0.5 * beta * w) if np.isfinite(beta) else np.ones_like(w)
    return np.sqrt(coth / (2.0 * m * w)), np.sqrt(0.5 * m * w * coth)


def thermal_bath_ensemble(model: LinearVibronicModel, ntraj: int, seed: int, beta: float,
                          initial_state: int, options: MethodOptions, bath_center="zero",
                          first_index: int = 0) -> EnsembleState:
    """Initial conditions: thermal Wigner bath × SQC (or Ehrenfest) electronic sample on one diabat.

    Q_j ~ N(Q_j⁰, σ_Q,j²), P_j ~ N(0, σ_P,j²) with the widths of :func:`thermal_bath_widths`
    (a thermal state of the state-independent oscillators V0, displaced to Q⁰):

    * ``bath_center="zero"``: Q⁰ = 0, bath equilibrated to V0 (factorised initial state ρ_el ⊗ e^{−βH_B},
      the usual benchmark and the initial state of HEOM references);
    * ``bath_center="donor"``: Q⁰ = minimum of the initially occupied diabat, −c_j/ω_j² for the spin-boson
      state 0 (bath equilibrated to the donor, as in electron-transfer rate studies);
    * or an explicit (D,) array Q⁰ (Bohr·√m_e).

    Electronic variables are sampled in the window of diabatic state ``initial_state``.  Trajectory i
    uses :func:`mapdyn.core.sampling.trajectory_generator` (seed, first_index + i) and draws, in this order,
    D normals for Q, D normals for P, then F action uniforms and F angle uniforms
    (:func:`mapdyn.core.windows.sample_mapping_variables`).  beta in 1/Eh.
    """
    if isinstance(ntraj, bool) or not isinstance(ntraj, (int, np.integer)) or ntraj < 1:
        raise ValueError(f"ntraj={ntraj!r} is not allowed; it must be a positive integer")
    if not hasattr(model, "harmonic_frequencies"):
        raise ValueError("model has no harmonic bath (harmonic_frequencies); thermal_bath_ensemble needs one")
    D, F = model.ndof, model.nstates
    sQ, sP = thermal_bath_widths(model, beta)
    if isinstance(bath_center, str):
        if bath_center == "zero":
            Q0 = np.zeros(D)
        elif bath_center == "donor":
            if not hasattr(model, "diabatic_minimum"):
                raise ValueError("bath_center='donor' needs a model with diabatic_minimum (a linear vibronic "
                                 "model); pass the centre as an explicit array instead")
            Q0 = model.diabatic_minimum(initial_state)
        else:
            raise ValueError(f"bath_center={bath_center!r} is not allowed; choose zero, donor or a length-{D} array")
    else:
        Q0 = np.asarray(bath_center, dtype=float)
        if Q0.shape != (D,) or not np.all(np.isfinite(Q0)):
            raise ValueError(f"bath_center must be 'zero', 'donor' or a finite array of shape ({D},), got shape {Q0.shape}")
    R, P, x, p = gaussian_phase_space(Q0, sQ, np.zeros(D), sP, F, initial_state, options, ntraj, seed, first_index)
    gamma_adj = None
    if options.method == "sqc" and options.zero_point == "adjusted":
        occ = np.zeros((ntraj, F))
        occ[:, initial_state] = 1.0
        gamma_adj = 0.5 * (x * x + p * p) - occ
    return EnsembleState(R, P, x, p, gamma_adj, 0.0, np.arange(first_index, first_index + ntraj))
