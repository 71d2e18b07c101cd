"""Preflight check of a study before days of computing: ``mapdyn check STUDY.toml``.

At the first geometry of the study the electronic backend runs once; its analytic gradients and
couplings are compared with central finite differences on a few Cartesian coordinates; the cost of
one step is measured and turned into an estimate of the core-hours the whole study needs.  The
outcome is a list of verdict lines (``PASS``, ``WARN``, ``FAIL``, ``INFO``).

Finite differences (atomic units; positions in Bohr, energies in Eh, gradients in Eh/Bohr,
couplings in 1/Bohr).  For a coordinate q and step h, with all displaced calls warm-started from
the reference result at R0 so that their states carry its phases (docs/theory.md#state-matching-and-phases):

    ∂E_k/∂q ≈ [E_k(R0 + h e_q) − E_k(R0 − h e_q)] / (2h)                       (central difference)
    d_kl,q = ⟨ψ_k|∂ψ_l/∂q⟩ ≈ [S_kl(+h) − S_kl(−h)] / (2h),  S_kl(±h) = ⟨ψ_k(R0)|ψ_l(R0 ± h e_q)⟩

(both O(h²); the second is the bra-fixed form of the Hammes-Schiffer–Tully estimate, J. Chem.
Phys. 101, 4657 (1994), used by the backend tests too).  Backends without coupling vectors (the
TDA/TDDFT path, docs/theory.md#on-the-fly-step) are checked for the consistency of the overlap-based couplings the
driver will use: the bra-fixed estimate above must be antisymmetric, and must agree with the
midpoint estimate σ/|V| = (S' − S'ᵀ)/(2·2h), S' = ⟨ψ(R0 − h e_q)|ψ(R0 + h e_q)⟩, the form
``time_derivative_couplings`` applies during dynamics; two independent O(h²) estimators of the
same d_kl,q.

Cost: core-hours = t_step × n_steps × n_trajectories / 3600 + initial-conditions cost, where
t_step is the measured wall time of one warm-started backend call with gradients on one thread
(the backend call is ~95 % of a step, docs/theory.md#pyscf-pitfalls).
"""

from __future__ import annotations

import dataclasses
import time
from typing import Any, Sequence

import numpy as np

from mapdyn.backends.contract import BackendError, ElectronicResult

__all__ = [
    "CheckLine",
    "FiniteDifferenceTolerance",
    "FD_TOLERANCES",
    "BackendCheck",
    "PreflightReport",
    "finite_difference_tolerance",
    "choose_coordinates",
    "check_backend",
    "estimate_core_hours",
    "estimate_initial_conditions_seconds",
    "molecular_preflight",
    "preflight",
    "check_study",
]

_VERDICTS = ("PASS", "WARN", "FAIL", "INFO")


@dataclasses.dataclass(frozen=True)
class CheckLine:
    """One verdict line: ``verdict`` in PASS/WARN/FAIL/INFO, ``topic`` (one word), ``message``."""

    verdict: str
    topic: str
    message: str

    def __post_init__(self):
        if self.verdict not in _VERDICTS:
            raise ValueError(f"verdict must be one of {_VERDICTS}, got {self.verdict!r}")

    def __str__(self) -> str:
        return f"{self.verdict:<4} {self.topic:<11} {self.message}"


@dataclasses.dataclass(frozen=True)
class FiniteDifferenceTolerance:
    """Finite-difference step and acceptance for one backend type.

    step_bohr : h (Bohr); gradient_atol : Eh/Bohr; coupling_atol : 1/Bohr; coupling_rtol :
    relative part, a component passes when |analytic − FD| ≤ atol + rtol·|FD|; source : why.
    """

    step_bohr: float
    gradient_atol: float
    coupling_atol: float
    coupling_rtol: float
    source: str


#: Stated tolerances per backend class (a backend may instead carry a ``finite_difference_tolerance``
#: attribute holding a :class:`FiniteDifferenceTolerance`).
FD_TOLERANCES: dict[str, FiniteDifferenceTolerance] = {
    "ModelAdapterBackend": FiniteDifferenceTolerance(
        1e-4, 1e-7, 1e-6, 1e-4,
        "exact analytic model derivatives; central-difference truncation h²|f'''|/6 ≲ 1e-8 at h = 1e-4 Bohr"),
    "TDDFTBackend": FiniteDifferenceTolerance(
        1e-3, 3e-5, 1e-4, 0.02,
        "TDDFTBackend docstring: missing DFT grid-weight response ~6e-6 Eh/Bohr at grid level 3, Z-vector "
        "residual ~2e-7; truncation ~1e-6 at h = 1e-3 Bohr; warm-started excitation energies scatter by "
        "~1e-8 Eh (measured on water/STO-3G CIS: the SCF orbital-gradient threshold enters them linearly), "
        "~1e-5 Eh/Bohr after division by 2h"),
    "CASSCFBackend": FiniteDifferenceTolerance(
        3e-3, 1e-4, 1e-3, 0.02,
        "docs/theory.md#pyscf-pitfalls and tests/test_backend_casscf.py: SA-CASSCF per-state noise ~1e-7 Eh over 2h "
        "(~2e-5 Eh/Bohr) plus truncation; NAC agreement 2e-5–6e-4 seen at h = 2e-3–4e-3 Bohr"),
}

#: fallback for backends not listed (e.g. user callbacks): h = 1e-3 Bohr, loose bounds.
DEFAULT_FD_TOLERANCE = FiniteDifferenceTolerance(
    1e-3, 1e-4, 1e-3, 0.02,
    "generic: central differences at h = 1e-3 Bohr, truncation ~1e-7 times third derivatives, "
    "solver noise of ~1e-8 Eh amplified by 1/(2h)")


def finite_difference_tolerance(backend: Any) -> FiniteDifferenceTolerance:
    """The backend's stated finite-difference tolerance (attribute, else :data:`FD_TOLERANCES`)."""
    stated = getattr(backend, "finite_difference_tolerance", None)
    if isinstance(stated, FiniteDifferenceTolerance):
        return stated
    return FD_TOLERANCES.get(type(backend).__name__, DEFAULT_FD_TOLERANCE)


def choose_coordinates(result: ElectronicResult, n: int = 3) -> list[tuple[int, int]]:
    """The n Cartesian coordinates (atom, xyz) with the largest |gradient| or |coupling| component.

    Coordinates alternate between the largest-gradient and the largest-coupling rankings so both
    quantities are probed where they are large (errors in small components are invisible).
    Coordinates where both vanish (e.g. unused coordinates of a model) are never chosen.
    """
    rankings = []
    if result.gradients is not None:
        rankings.append(np.abs(np.asarray(result.gradients)).max(axis=0))
    if result.couplings is not None:
        rankings.append(np.abs(np.asarray(result.couplings)).max(axis=(0, 1)))
    if not rankings:
        raise ValueError("choose_coordinates needs a result with gradients or couplings")
    shape = rankings[0].shape
    orders = [[int(i) for i in np.argsort(-r.ravel(), kind="stable") if r.ravel()[i] > 0.0] for r in rankings]
    chosen: list[int] = []
    pos = [0] * len(orders)
    while len(chosen) < n and any(p < len(o) for p, o in zip(pos, orders)):
        for j, order in enumerate(orders):
            while pos[j] < len(order) and order[pos[j]] in chosen:
                pos[j] += 1
            if pos[j] < len(order) and len(chosen) < n:
                chosen.append(order[pos[j]])
                pos[j] += 1
    return [tuple(int(x) for x in np.unravel_index(i, shape)) for i in chosen]


@dataclasses.dataclass
class BackendCheck:
    """Outcome of :func:`check_backend` (times in seconds, errors in the units named).

    lines : verdict lines; reference : backend result at the first geometry (None if it failed);
    first_call_seconds : cold call with gradients; step_seconds : warm call with gradients (the
    per-step cost); energy_call_seconds : mean warm energy-only call; coordinates : probed (atom, xyz);
    gradient_error : max |analytic − FD| (Eh/Bohr); coupling_error : max |analytic − FD| (1/Bohr),
    None without coupling vectors; sigma_error : max difference of the two overlap estimators
    (1/Bohr), None with coupling vectors; tolerance : what was applied.
    """

    lines: list[CheckLine]
    reference: ElectronicResult | None
    first_call_seconds: float | None = None
    step_seconds: float | None = None
    energy_call_seconds: float | None = None
    coordinates: list[tuple[int, int]] = dataclasses.field(default_factory=list)
    gradient_error: float | None = None
    coupling_error: float | None = None
    sigma_error: float | None = None
    tolerance: FiniteDifferenceTolerance | None = None

    @property
    def passed(self) -> bool:
        return not any(line.verdict == "FAIL" for line in self.lines)


def _timed(fn, *args, **kwargs):
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t0


def _fmt_coords(coords: Sequence[tuple[int, int]], symbols: Sequence[str] | None) -> str:
    def one(c):
        atom = f"{symbols[c[0]]}{c[0]}" if symbols is not None and c[0] < len(symbols) else f"atom{c[0]}"
        return f"{atom}.{'xyz'[c[1]]}"

    return ", ".join(one(c) for c in coords)


def check_backend(backend: Any, positions_bohr: np.ndarray, *, n_coordinates: int = 3,
                  coordinates: Sequence[tuple[int, int]] | None = None,
                  tolerance: FiniteDifferenceTolerance | None = None,
                  symbols: Sequence[str] | None = None) -> BackendCheck:
    """Run ``backend`` at ``positions_bohr`` (N, 3) and check it against finite differences.

    Calls: one cold call with gradients at R0, one warm call with gradients at R0 (the timed
    step), two warm energy-only calls per probed coordinate (±h), plus one per coordinate on the
    overlap-only path (the midpoint overlap).  Lines: ``backend`` (ran / converged), ``gradients``,
    ``couplings`` (analytic vs FD of overlaps, or overlap-estimator consistency), ``overlaps``
    (aligned diagonal near 1 over ±h).
    """
    pos = np.array(positions_bohr, dtype=float)
    if pos.ndim != 2 or pos.shape[1] != 3 or not np.all(np.isfinite(pos)):
        raise ValueError(f"positions_bohr must be a finite (N, 3) array, got shape {pos.shape}")
    if isinstance(n_coordinates, bool) or not isinstance(n_coordinates, int) or n_coordinates < 1:
        raise ValueError(f"n_coordinates must be an integer >= 1, got {n_coordinates!r}")
    tol = tolerance or finite_difference_tolerance(backend)
    name = type(backend).__name__
    lines: list[CheckLine] = []
    out = BackendCheck(lines=lines, reference=None, tolerance=tol)
    try:
        first, t_first = _timed(backend.compute, pos, None, True)
        first.validate(pos.shape[0])
        ref, t_step = _timed(backend.compute, pos, first.guess, True)
        ref.validate(pos.shape[0])
    except (BackendError, ValueError) as err:
        lines.append(CheckLine("FAIL", "backend", f"{name} failed at the first geometry: {str(err).splitlines()[0]}"))
        return out
    out.reference, out.first_call_seconds, out.step_seconds = ref, t_first, t_step
    f = ref.nstates
    ok = first.converged and ref.converged
    gaps_ev = (ref.energies - ref.energies[0]) * 27.211386245988  # CODATA 2018 Eh in eV
    lines.append(CheckLine("PASS" if ok else "FAIL", "backend",
                           f"{name}, {f} states, ran at the first geometry: cold {t_first:.3g} s, warm "
                           f"{t_step:.3g} s; {'converged' if ok else 'NOT converged'}; "
                           f"E_k − E_0 = {', '.join(f'{g:.3f}' for g in gaps_ev[1:])} eV"))
    if ref.gradients is None:
        lines.append(CheckLine("FAIL", "gradients", f"{name} returned no gradients with need_gradients=True"))
        return out
    coords = list(coordinates) if coordinates is not None else choose_coordinates(ref, n_coordinates)
    if not coords:
        lines.append(CheckLine("WARN", "gradients", "all gradient and coupling components vanish at the first "
                                                     "geometry; nothing to compare"))
        return out
    out.coordinates = coords
    h = tol.step_bohr
    g_err = 0.0
    d_err = 0.0
    sig_err = 0.0
    antisym = 0.0
    min_diag = 1.0
    unitarity = 0.0
    d_worst_ratio = 0.0
    d_max = 0.0
    energy_times = []
    overlap_missing = False
    for atom, xyz in coords:
        step = np.zeros_like(pos)
        step[atom, xyz] = h
        try:
            plus, tp = _timed(backend.compute, pos + step, ref.guess, False)
            minus, tm = _timed(backend.compute, pos - step, ref.guess, False)
        except BackendError as err:
            lines.append(CheckLine("FAIL", "gradients", f"backend failed at a displaced geometry "
                                                        f"(h = {h:g} Bohr): {err.reason}"))
            return out
        energy_times += [tp, tm]
        fd_grad = (plus.energies - minus.energies) / (2.0 * h)
        g_err = max(g_err, float(np.max(np.abs(fd_grad - ref.gradients[:, atom, xyz]))))
        if plus.overlap_prev is None or minus.overlap_prev is None:
            overlap_missing = True
            continue
        sp, sm = np.asarray(plus.overlap_prev), np.asarray(minus.overlap_prev)
        min_diag = min(min_diag, float(np.min(np.diag(sp))), float(np.min(np.diag(sm))))
        d_fd = (sp - sm) / (2.0 * h)
        off = ~np.eye(f, dtype=bool)
        if ref.couplings is not None:
            d_an = np.asarray(ref.couplings)[:, :, atom, xyz]
            diff = np.abs(d_an - d_fd)[off]
            d_err = max(d_err, float(diff.max(initial=0.0)))
            d_max = max(d_max, float(np.abs(d_an[off]).max(initial=0.0)))
            d_worst_ratio = max(d_worst_ratio, float(np.max(diff / (tol.coupling_atol + tol.coupling_rtol
                                                                    * np.abs(d_fd[off])), initial=0.0)))
        else:
            try:
                mid = backend.compute(pos + step, minus.guess, False)
            except BackendError as err:
                lines.append(CheckLine("FAIL", "couplings", f"backend failed for the midpoint overlap: {err.reason}"))
                return out
            s_mid = np.asarray(mid.overlap_prev)
            sigma = (s_mid - s_mid.T) / (2.0 * 2.0 * h)  # σ/|V| for a displacement 2h along e_q
            unitarity = max(unitarity, float(np.max(np.abs(s_mid.T @ s_mid - np.eye(f)))))
            diff = np.abs(sigma - d_fd)[off]
            antisym = max(antisym, float(np.max(np.abs(d_fd + d_fd.T)[off], initial=0.0)))
            sig_err = max(sig_err, float(diff.max(initial=0.0)))
            d_max = max(d_max, float(np.abs(d_fd[off]).max(initial=0.0)))
            d_worst_ratio = max(d_worst_ratio, float(np.max(diff / (tol.coupling_atol + tol.coupling_rtol
                                                                    * np.abs(d_fd[off])), initial=0.0)))
    out.energy_call_seconds = float(np.mean(energy_times)) if energy_times else None
    where = f"{len(coords)} coordinates ({_fmt_coords(coords, symbols)}) × {f} states, h = {h:g} Bohr"
    out.gradient_error = g_err
    lines.append(CheckLine("PASS" if g_err <= tol.gradient_atol else "FAIL", "gradients",
                           f"max |analytic − FD| = {g_err:.2e} Eh/Bohr over {where} "
                           f"(tolerance {tol.gradient_atol:.0e}; max |grad| {np.abs(ref.gradients).max():.3f})"))
    if f < 2:
        return out
    if overlap_missing:
        verdict = "FAIL" if ref.couplings is None else "WARN"
        lines.append(CheckLine(verdict, "couplings", "backend returns no overlaps with the previous step"
                               + ("; with no coupling vectors either, nonadiabatic dynamics is impossible"
                                  if ref.couplings is None else "; coupling vectors not checked")))
        return out
    bound = f"|Δ| ≤ {tol.coupling_atol:.0e} + {tol.coupling_rtol:g}·|d|"
    if ref.couplings is not None:
        out.coupling_error = d_err
        lines.append(CheckLine("PASS" if d_worst_ratio <= 1.0 else "FAIL", "couplings",
                               f"max |d_analytic − d_FD(overlaps)| = {d_err:.2e} 1/Bohr over {where} "
                               f"(tolerance {bound}; max |d| {d_max:.3g})"))
    else:
        out.sigma_error = sig_err
        consistent = d_worst_ratio <= 1.0 and antisym <= tol.coupling_atol + tol.coupling_rtol * d_max
        lines.append(CheckLine("PASS" if consistent else "FAIL", "couplings",
                               f"no coupling vectors ({name}): overlap couplings consistent — midpoint σ vs "
                               f"bra-fixed estimate max |Δ| = {sig_err:.2e} 1/Bohr, antisymmetry "
                               f"{antisym:.1e}, |S'ᵀS' − 1| = {unitarity:.1e} over {where} "
                               f"(tolerance {bound}; max |d| {d_max:.3g})"))
        lines.append(CheckLine("WARN", "couplings", "the off-diagonal force will use the velocity-projected "
                                                    "coupling σV/|V|² (misses the part perpendicular to V)"))
    lines.append(CheckLine("PASS" if min_diag > 0.99 else "WARN", "overlaps",
                           f"aligned diagonal overlaps over ±h ≥ {min_diag:.6f}"
                           + ("" if min_diag > 0.99 else " (states change character within h; nearly "
                                                          "degenerate states at the first geometry?)")))
    return out


def estimate_core_hours(step_seconds: float, n_steps: int, n_trajectories: int,
                        initial_conditions_seconds: float = 0.0) -> float:
    """Core-hours = t_step × n_steps × n_trajectories / 3600 + t_initial / 3600 (one core per task)."""
    for name, value in (("step_seconds", step_seconds), ("initial_conditions_seconds", initial_conditions_seconds)):
        if not (np.isfinite(value) and value >= 0):
            raise ValueError(f"{name} must be a non-negative number of seconds, got {value!r}")
    for name, value in (("n_steps", n_steps), ("n_trajectories", n_trajectories)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
            raise ValueError(f"{name} must be a non-negative integer, got {value!r}")
    return (float(step_seconds) * int(n_steps) * int(n_trajectories) + float(initial_conditions_seconds)) / 3600.0


@dataclasses.dataclass
class PreflightReport:
    """What ``mapdyn check`` prints: verdict lines plus the numbers behind them (seconds, core-hours)."""

    lines: list[CheckLine]
    numbers: dict = dataclasses.field(default_factory=dict)

    @property
    def passed(self) -> bool:
        """True when no line is a FAIL (WARN lines do not fail the check)."""
        return not any(line.verdict == "FAIL" for line in self.lines)

    def text(self) -> str:
        return "\n".join(str(line) for line in self.lines)

    def __str__(self) -> str:
        return self.text()


def estimate_initial_conditions_seconds(ground_gradient_seconds: float, natoms: int, n_samples: int,
                                       excited_energy_seconds: float, optimisation_steps: int = 20) -> float:
    """Rough wall time (s, one core) of the initial conditions of a molecular study.

    = (optimisation_steps + 6N) × t_ground_gradient + n_samples × t_excited_energy: a geometry
    optimisation of ~20 steps from a sensible start (common practice), a Hessian costed as a
    central-difference one (2 × 3N gradients; an upper bound for the analytic RHF/RKS Hessian), and
    one cold excited-state call (energies, transition dipoles) per sampled geometry for the choice
    of initial states.
    """
    return float((optimisation_steps + 6 * natoms) * ground_gradient_seconds + n_samples * excited_energy_seconds)


def _hours(seconds: float) -> str:
    if seconds < 60:
        return f"{seconds:.3g} s"
    if seconds < 3600:
        return f"{seconds / 60:.3g} min"
    return f"{seconds / 3600:.3g} h"


def molecular_preflight(backend: Any, positions_bohr: np.ndarray, *, n_steps: int, n_trajectories: int,
                        workers: int = 1, symbols: Sequence[str] | None = None,
                        ground_state_backend: Any = None, initial_conditions_done: bool = False,
                        n_coordinates: int = 3, tolerance: FiniteDifferenceTolerance | None = None) -> PreflightReport:
    """Backend check (:func:`check_backend`) plus cost lines for an on-the-fly study.

    ``n_steps`` per trajectory, ``n_trajectories``, ``workers`` running at once (for the wall-time
    line); ``ground_state_backend`` (e.g. :class:`mapdyn.backends.pyscf.ground_state.PySCFGroundState`) is timed
    once for the initial-conditions estimate unless ``initial_conditions_done``.
    """
    pos = np.asarray(positions_bohr, dtype=float)
    check = check_backend(backend, pos, n_coordinates=n_coordinates, tolerance=tolerance, symbols=symbols)
    lines = list(check.lines)
    numbers: dict[str, Any] = {"first_call_seconds": check.first_call_seconds, "step_seconds": check.step_seconds,
                               "gradient_error": check.gradient_error, "coupling_error": check.coupling_error,
                               "sigma_error": check.sigma_error, "coordinates": check.coordinates,
                               "n_steps": int(n_steps), "n_trajectories": int(n_trajectories)}
    if check.step_seconds is None:
        return PreflightReport(lines, numbers)
    init_seconds = 0.0
    if initial_conditions_done:
        lines.append(CheckLine("INFO", "initial", "initial conditions already computed; not costed"))
    else:
        try:
            _, t_excited = _timed(backend.compute, pos, None, False)
            t_ground = None
            if ground_state_backend is not None:
                _, t_ground = _timed(ground_state_backend.compute, pos, None, True)
            else:
                t_ground = t_excited  # no ground-state backend given: the excited call bounds it
            init_seconds = estimate_initial_conditions_seconds(t_ground, pos.shape[0], int(n_trajectories), t_excited)
            lines.append(CheckLine("INFO", "initial", f"initial conditions ≈ {_hours(init_seconds)} on one core "
                                   f"(rough: 20 optimisation steps at {t_ground:.3g} s, a Hessian costed as "
                                   f"{6 * pos.shape[0]} gradients, {int(n_trajectories)} excited-state calls "
                                   f"at {t_excited:.3g} s)"))
        except BackendError as err:
            lines.append(CheckLine("WARN", "initial", f"could not time the initial-conditions calls: {err.reason}"))
    numbers["initial_conditions_seconds"] = init_seconds
    total = estimate_core_hours(check.step_seconds, int(n_steps), int(n_trajectories), init_seconds)
    numbers["core_hours"] = total
    lines.append(CheckLine("INFO", "cost", f"{check.step_seconds:.3g} s per step (warm backend call with "
                           f"gradients{'' if check.reference.couplings is None else ' and couplings'}, one thread)"))
    wall = total * 3600.0 / max(1, int(workers))
    lines.append(CheckLine("INFO", "core-hours", f"≈ {total:.3g} core-hours = {check.step_seconds:.3g} s × "
                           f"{int(n_steps)} steps × {int(n_trajectories)} trajectories + initial conditions; "
                           f"≈ {_hours(wall)} wall time on {int(workers)} worker{'s' if int(workers) != 1 else ''}"))
    numbers["wall_seconds"] = wall
    return PreflightReport(lines, numbers)


def _batched_model_cost(config: Any, probe_steps: int = 50) -> tuple[float, int]:
    """Seconds per trajectory-step of the batched diabatic engine, timed on one task-sized batch."""
    from mapdyn.core.propagators import DiabaticIntegrator
    from mapdyn.study.backend_factory import make_model, model_initial_ensemble

    model = make_model(config)
    n = int(min(config.ensemble.batch, config.ensemble.trajectories))
    state = model_initial_ensemble(config, model, n)
    integ = DiabaticIntegrator(model, config.options, config.dynamics.time_step_au)
    integ.step(state)  # first call outside the timing (allocation, caches)
    t0 = time.perf_counter()
    for _ in range(probe_steps):
        integ.step(state)
    return (time.perf_counter() - t0) / (probe_steps * n), n


def _model_point(backend: Any, pos: np.ndarray) -> str:
    r = backend.model_coordinates(pos)[0]
    return ", ".join(f"{x:.3g}" for x in r) + " Bohr"


def _strongest_coupling_point(backend: Any, pos: np.ndarray, npoints: int = 200) -> np.ndarray | None:
    """Positions (N, 3) of the largest max|d_kl| on the segment R0 → −R0 (R0 ± 5 Bohr if R0 = 0).

    An even number of grid points keeps off the segment's midpoint, where a model may be
    non-analytic (Tully model 1 has a second-derivative jump at R = 0, which makes central
    differences there first-order only).
    """
    r0 = backend.model_coordinates(pos)[0]
    r1 = -r0 if np.any(r0 != 0.0) else r0 + 5.0
    a = r0 if np.any(r0 != 0.0) else r0 - 5.0
    best, best_d = None, 0.0
    for s in np.linspace(0.0, 1.0, npoints):
        p = backend.positions_from_model(a + s * (r1 - a))
        res = backend.compute(p, None, True)
        if res.couplings is None:
            return None
        d = float(np.abs(res.couplings).max())
        if d > best_d:
            best, best_d = p, d
    return best


def preflight(study_config: Any, *, n_coordinates: int = 3,
              positions_bohr: np.ndarray | None = None) -> PreflightReport:
    """Preflight of a validated study (:class:`mapdyn.study.config.StudyConfig`): ``mapdyn check``.

    First geometry: for molecules the first trajectory's sampled geometry when the study folder
    already holds initial conditions, else the input geometry (before optimisation); for model
    studies the wavepacket centre ``initial.position_bohr``.  ``positions_bohr`` (N, 3) overrides.
    Lines: backend, gradients, couplings, overlaps (see :func:`check_backend`), then the
    initial-conditions, per-step and core-hour estimates.  Units: seconds, core-hours.
    """
    import os

    from mapdyn.study.backend_factory import make_backend
    from mapdyn.study.folder import INITIAL_CONDITIONS

    cfg = study_config
    n_traj = int(cfg.ensemble.trajectories)
    n_steps = int(cfg.dynamics.nsteps)
    workers = int(cfg.ensemble.workers)
    backend = make_backend(cfg)
    if cfg.is_model:
        if cfg.initial.bath_center:  # harmonic-bath model: the centre of its thermal sample
            model = backend.model
            centre = model.diabatic_minimum(cfg.initial.state) if cfg.initial.bath_center == "donor" else np.zeros(model.ndof)
        else:
            centre = np.asarray(cfg.initial.position_bohr, dtype=float)
        pos = backend.positions_from_model(centre) if positions_bohr is None else np.asarray(positions_bohr, dtype=float)
        check = check_backend(backend, pos, n_coordinates=n_coordinates)
        lines = [dataclasses.replace(l, message=f"[R = {_model_point(backend, pos)}] {l.message}") for l in check.lines]
        if check.passed and positions_bohr is None:
            # The wavepacket usually starts where nothing happens; check again where the coupling
            # is strongest on the way from R0 to −R0 (the region the packet crosses).
            strong = _strongest_coupling_point(backend, pos)
            if strong is not None:
                more = check_backend(backend, strong, n_coordinates=n_coordinates)
                lines += [dataclasses.replace(l, message=f"[R = {_model_point(backend, strong)}, strongest coupling] "
                                                         f"{l.message}") for l in more.lines if l.topic != "backend"]
        numbers: dict[str, Any] = {"first_call_seconds": check.first_call_seconds,
                                   "gradient_error": check.gradient_error, "coupling_error": check.coupling_error,
                                   "sigma_error": check.sigma_error, "coordinates": check.coordinates,
                                   "n_steps": n_steps, "n_trajectories": n_traj, "initial_conditions_seconds": 0.0}
        if check.step_seconds is None:
            return PreflightReport(lines, numbers)
        if cfg.batched:
            per_step, batch = _batched_model_cost(cfg)
            what = f"batched diabatic engine, per trajectory-step, timed on a batch of {batch}"
        else:
            per_step = check.step_seconds
            what = "model adapter call per step (driver overhead not included)"
        numbers["step_seconds"] = per_step
        total = estimate_core_hours(per_step, n_steps, n_traj)
        numbers["core_hours"] = total
        numbers["wall_seconds"] = total * 3600.0 / max(1, workers)
        lines.append(CheckLine("INFO", "cost", f"{per_step:.3g} s per step ({what})"))
        lines.append(CheckLine("INFO", "core-hours", f"≈ {total:.3g} core-hours = {per_step:.3g} s × {n_steps} "
                               f"steps × {n_traj} trajectories; ≈ {_hours(numbers['wall_seconds'])} wall time "
                               f"on {workers} worker{'s' if workers != 1 else ''}"))
        return PreflightReport(lines, numbers)

    from mapdyn.study.backend_factory import _ground_state_backend

    ic_path = os.path.join(cfg.folder, INITIAL_CONDITIONS)
    done = os.path.isfile(ic_path)
    where = "input geometry"
    if positions_bohr is not None:
        pos = np.asarray(positions_bohr, dtype=float)
        where = "given geometry"
    elif done:
        from mapdyn.study.checkpoint import read_h5

        arrays, _ = read_h5(ic_path)
        pos = np.asarray(arrays["positions_bohr"][0], dtype=float)
        where = "sampled geometry of trajectory 0"
    else:
        pos = np.asarray(cfg.molecule.positions_bohr, dtype=float)
    ground, _ = _ground_state_backend(cfg, backend)
    report = molecular_preflight(backend, pos, n_steps=n_steps, n_trajectories=n_traj, workers=workers,
                                 symbols=list(cfg.molecule.symbols), ground_state_backend=ground,
                                 initial_conditions_done=done, n_coordinates=n_coordinates)
    report.lines.insert(0, CheckLine("INFO", "study", f"{cfg.name}: {cfg.electronic.level_of_theory}, "
                                     f"{n_traj} trajectories × {n_steps} steps; checked at the {where}"))
    return report


#: name the command line looks for.
check_study = preflight
