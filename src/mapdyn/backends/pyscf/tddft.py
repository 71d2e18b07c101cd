"""PySCF linear-response backend: RHF/RKS reference + TDA (CIS-like) or full TDDFT singlet states.

Hartree atomic units throughout: positions in Bohr, energies in Eh, gradients in Eh/Bohr,
dipoles in e·Bohr, time in ħ/Eh.

What this backend returns (``ElectronicResult``, see ``mapdyn.backends.contract``):

* state 0 is the closed-shell reference determinant (RHF or RKS) with its analytic SCF gradient;
  states 1..F-1 are the lowest singlet linear-response roots with analytic gradients
  (``pyscf.grad.tdrhf`` / ``pyscf.grad.tdrks``).
* ``couplings`` is always ``None``: PySCF 2.14 has no TDA/TDDFT nonadiabatic coupling vectors.
  Couplings come from ``overlap_prev`` instead, as time-derivative couplings
  σ = (S − Sᵀ)/(2Δt) (:func:`time_derivative_couplings`, Hammes-Schiffer & Tully 1994).
* ``overlap_prev[k, l] = <Ψ_k(previous)|Ψ_l(this)>`` from the MO cross-overlap, analytic, O(N³)
  (:func:`determinant_state_overlaps`), sign-aligned with ``match_states``.
* ``transition_dipoles[k, l] = <Ψ_k|μ|Ψ_l>`` with μ = −Σ_e r_e + Σ_A Z_A R_A (origin at the
  coordinate origin of ``positions_bohr``).  Row/column 0 is the linear-response transition dipole
  (X+Y for full TDDFT, X for TDA); the excited–excited block and the diagonal are the CIS-like
  (unrelaxed) values from the normalised X amplitudes.
* ``diagnostics["oscillator_strengths"]``: (F−1,) f_0k = (2/3)(E_k − E_0)|μ_0k|², dimensionless.
* ``spin_squared``: zeros — the reference is a closed-shell determinant and the roots are
  spin-adapted singlets, so <S²> = 0 by construction.

State convention (used for overlaps and dipoles): a singlet root is
|Ψ_K> = Σ_ia X̃_ia (a†_aα a_iα + a†_aβ a_iβ)|Φ_0>, normalised by 2 Σ_ia X̃_ia² = 1, i.e. PySCF's TDA
X (Σ X² = 1/2) as is.  For full TDDFT the overlaps use the **X-only** convention: X̃ = X rescaled to
2 Σ X̃² = 1 (Y is dropped; its weight is small away from instabilities).  Caveat for users: linear
response from a single reference describes S1/S0 crossings (conical intersections with the ground
state) qualitatively wrongly; near them excitation energies go to zero or negative.  This backend
raises ``RegionReached`` there (S1−S0 gap below ``seam_gap``, a negative/complex S1, or the
reference/S1 vanishing from the computed roots after a small gap) and the driver ends the
trajectory as the outcome "S1/S0 region" (docs/theory.md#s1s0-region).  Gradients use mapdyn's
Krylov Z-vector solve (docs/theory.md#z-vector-solve); ``extra_roots`` buffer roots track the
propagated states (docs/theory.md#root-buffer).
"""

from __future__ import annotations

import contextlib
import dataclasses
import time
from typing import Any, Sequence

import numpy as np

from mapdyn.backends.contract import (
    BackendError,
    ElectronicResult,
    RegionReached,
    apply_state_signs,
    match_states,
)
from mapdyn.backends.pyscf.common import response_interception_allowed, swapped
from mapdyn.backends.pyscf.tddft_states import (
    DEFAULT_SINGULAR_TOL,
    ROOT_WINDOW_WEIGHT_MIN,
    determinant_state_overlaps,
    normalise_cis_amplitudes,
    root_window_diagnostics,
    time_derivative_couplings,
)
from mapdyn.backends.pyscf.zvector import DEFAULT_ZVECTOR_TOL, solve_zvector
from mapdyn.units import HARTREE_IN_EV

__all__ = [
    "TDDFTBackend",
    "TDDFTGuess",
    "determinant_state_overlaps",
    "time_derivative_couplings",
    "normalise_cis_amplitudes",
    "root_window_diagnostics",
    "DEFAULT_SEAM_GAP",
]

#: Default S1−S0 gap (Eh) below which a trajectory ends as "reached the S1/S0 region": 0.1 eV
#: (docs/theory.md#s1s0-region).
DEFAULT_SEAM_GAP = 0.1 / HARTREE_IN_EV

#: Default S1−S0 gap (Eh) of the previous step below which a vanished S1 or a changed reference
#: determinant counts as having entered the S1/S0 region: 1 eV (docs/theory.md#s1s0-region).
DEFAULT_SEAM_WATCH_GAP = 1.0 / HARTREE_IN_EV

#: Tolerance on |C'ᵀ S C' − 1| for a warm-start orbital set after Löwdin orthonormalisation
#: (docs/theory.md#pyscf-pitfalls: unorthonormalised warm starts converge to wrong energies).
WARM_START_ORTHO_TOL = 1e-10


# ---------------------------------------------------------------------------------------------
# Backend
# ---------------------------------------------------------------------------------------------

@dataclasses.dataclass
class TDDFTGuess:
    """What the next ``compute`` call needs (picklable; arrays in atomic units).

    positions_bohr : (N, 3) geometry of this step, Bohr.
    mo_coeff : (nao, nmo) MO coefficients at that geometry.
    nocc : number of doubly occupied MOs.
    x_amplitudes : (F−1, nocc, nvir) excited-state amplitudes, normalised 2ΣX² = 1, with the signs
        aligned to the previous step (the phase convention the next overlap refers to).
    fingerprint : (symbols, basis, charge) the guess belongs to.
    gap_Eh : S1 − S0 energy gap at that geometry (Eh), None with one state.
    """

    positions_bohr: np.ndarray
    mo_coeff: np.ndarray
    nocc: int
    x_amplitudes: np.ndarray
    fingerprint: tuple
    gap_Eh: float | None = None


class _ResponseCPHF:
    """Stand-in for ``pyscf.scf.cphf`` inside the TD gradient modules (docs/theory.md#z-vector-solve).

    ``solver="krylov"``: the field-independent Z-vector equation (ε_a − ε_i) z + fvind(z) = −w that
    ``cphf.solve`` would hand to PySCF's Krylov routine is solved by :func:`solve_zvector` instead
    (GMRES → MINRES → dense, to ``tol``).  ``solver="pyscf"``: PySCF's own solve.  Either way the
    true relative residual is recomputed afterwards and recorded in ``residuals`` (PySCF's solver
    never reports non-convergence).  Calls with an overlap derivative ``s1`` go to PySCF unchanged.
    """

    def __init__(self, real_module, solver: str = "krylov", tol: float = DEFAULT_ZVECTOR_TOL):
        self._real = real_module
        self._solver = solver
        self._tol = tol
        self.residuals: list[float] = []
        self.solvers: list[str] = []
        self.products: list[int] = []
        self.solutions: list[np.ndarray] = []

    def solve(self, fvind, mo_energy, mo_occ, h1, s1=None, **kwargs):
        if s1 is not None:
            return self._real.solve(fvind, mo_energy, mo_occ, h1, s1, **kwargs)
        e_a = mo_energy[mo_occ == 0]
        e_i = mo_energy[mo_occ > 0]
        shape = (len(e_a), len(e_i))
        diag = (e_a[:, None] - e_i[None, :]).ravel()
        rhs = -np.asarray(h1, dtype=float).ravel()
        if self._solver == "krylov":
            sol = solve_zvector(lambda z: np.asarray(fvind(z.reshape(shape))).ravel(), diag, rhs, tol=self._tol)
            z, res = sol.z, sol.residual
            self.solvers.append(sol.solver)
            self.products.append(sol.products)
        else:
            z = np.asarray(self._real.solve(fvind, mo_energy, mo_occ, h1, None, **kwargs)[0]).ravel()
            lhs = diag * z + np.asarray(fvind(z.reshape(shape))).ravel()
            res = float(np.linalg.norm(lhs - rhs) / max(np.linalg.norm(rhs), 1e-300))
            self.solvers.append("pyscf krylov")
        self.residuals.append(float(res))
        self.solutions.append(z.copy())
        return z.reshape(np.shape(h1)), None

    def __getattr__(self, name):
        return getattr(self._real, name)


@contextlib.contextmanager
def _response_cphf(solver: str = "krylov", tol: float = DEFAULT_ZVECTOR_TOL):
    """Swap :class:`_ResponseCPHF` into PySCF's TD gradient modules (under the PySCF patch lock,
    restored on any exit).  On an untested PySCF release nothing is swapped: PySCF's own solve
    runs and no residual is recorded (``.residuals`` stays empty)."""
    from pyscf.grad import tdrhf, tdrks
    from pyscf.scf import cphf

    stand_in = _ResponseCPHF(cphf, solver, tol)
    if not response_interception_allowed():
        yield stand_in
        return
    with swapped((tdrhf, "cphf", stand_in), (tdrks, "cphf", stand_in)):
        yield stand_in


class TDDFTBackend:
    """Closed-shell singlet excited states from PySCF linear response (TDA or full TDDFT).

    Parameters
    ----------
    symbols : element symbols, one per atom (order of ``positions_bohr`` rows).
    charge : total molecular charge (e).
    spin : 2S; only 0 (closed-shell singlet reference) is supported.
    basis : any basis name PySCF knows (e.g. "6-31g").
    xc : None or "hf" → RHF reference and CIS (TDA) / TDHF (RPA); any functional PySCF/libxc parses
        → RKS reference and TDA / TDDFT.
    method : "tda" (default) or "tddft" (full linear response, X and Y).
    nstates : number of states F **including** the ground state (F ≥ 1).
    scf_conv_tol : SCF energy tolerance (Eh); scf_conv_tol_grad : orbital-gradient tolerance.
    td_conv_tol : Davidson residual tolerance (Eh); cphf_conv_tol : tolerance handed to PySCF's own
        Z-vector solve (``zvector_solver="pyscf"`` and the last fallback).
    cphf_residual_tol : relative Z-vector residual above which a gradient counts as unconverged.
    zvector_solver : "krylov" (default; :func:`mapdyn.backends.pyscf.zvector.solve_zvector`, GMRES →
        MINRES → dense, docs/theory.md#z-vector-solve) or "pyscf" (PySCF's Krylov routine, which
        stalls near a relative residual 1e-5..1e-3 at some geometries whatever its tolerance says).
    zvector_tol : relative residual the Krylov ladder aims for.
    seam_gap : S1−S0 gap in Eh below which the trajectory ends as "reached the S1/S0 region"
        (:class:`~mapdyn.backends.contract.RegionReached`, docs/theory.md#s1s0-region); a negative or
        complex excitation energy ends it too.  None switches the rule off (a non-positive excitation
        energy is then a ``BackendError``).  Default :data:`DEFAULT_SEAM_GAP` (0.1 eV).
    seam_watch_gap : previous-step S1−S0 gap in Eh below which S0 or S1 vanishing from the computed
        roots (SCF solution jump, S1 root lost) also ends the trajectory in the S1/S0 region
        (default 1 eV); elsewhere such a jump is a ``BackendError``.
    Accuracy note: PySCF's TD-DFT gradients omit the DFT grid-weight response; against finite
    differences this costs ~6e-6 Eh/Bohr at grid level 3 and ~2e-6 at level 4 (water/STO-3G, PBE0).
    grids_level : PySCF DFT grid level (0–9), ignored for HF.
    extra_roots : buffer of additional roots solved above the propagated ones (not returned): they
        stabilise the Davidson solve near degeneracies and let the state matching see whether a
        propagated state moved out of the propagated set (diagnostics ``root_window_weight``,
        ``root_tracking``; docs/theory.md#root-buffer).
    singular_tol : smallest allowed singular value of the occupied–occupied MO overlap.
    threads : OpenMP threads handed to ``pyscf.lib.num_threads`` during ``compute``.
    """

    def __init__(self, symbols: Sequence[str], charge: int = 0, spin: int = 0,
                 basis: str = "6-31g", xc: str | None = None, method: str = "tda",
                 nstates: int = 3, scf_conv_tol: float = 1e-11, scf_conv_tol_grad: float = 1e-7,
                 td_conv_tol: float = 1e-7, cphf_conv_tol: float = 1e-9,
                 cphf_residual_tol: float = 1e-6, grids_level: int = 3, extra_roots: int = 2,
                 scf_max_cycle: int = 100, td_max_cycle: int = 200,
                 singular_tol: float = DEFAULT_SINGULAR_TOL, threads: int = 1,
                 zvector_solver: str = "krylov", zvector_tol: float = DEFAULT_ZVECTOR_TOL,
                 seam_gap: float | None = DEFAULT_SEAM_GAP, seam_watch_gap: float = DEFAULT_SEAM_WATCH_GAP):
        from pyscf import gto

        self.symbols = [str(s) for s in symbols]
        if not self.symbols:
            raise ValueError("symbols: need at least one atom")
        if int(spin) != 0:
            raise ValueError(f"spin: only closed-shell singlets (spin=0) are supported, got {spin}")
        self.charge = int(charge)
        self.spin = 0
        self.basis = basis
        self.method = str(method).lower()
        if self.method not in ("tda", "tddft"):
            raise ValueError(f"method must be 'tda' or 'tddft', got {method!r}")
        if xc is None or str(xc).lower() in ("hf", "rhf"):
            self.xc = None
        else:
            from pyscf.dft import libxc
            try:
                libxc.parse_xc(xc)
            except (KeyError, ValueError) as err:
                raise ValueError(f"xc: PySCF does not know the functional {xc!r} ({err})") from None
            self.xc = str(xc)
        if int(nstates) < 1:
            raise ValueError(f"nstates (including the ground state) must be >= 1, got {nstates}")
        self.nstates = int(nstates)
        for name, value in (("scf_conv_tol", scf_conv_tol), ("scf_conv_tol_grad", scf_conv_tol_grad),
                            ("td_conv_tol", td_conv_tol), ("cphf_conv_tol", cphf_conv_tol),
                            ("cphf_residual_tol", cphf_residual_tol), ("singular_tol", singular_tol)):
            if not (np.isfinite(value) and value > 0):
                raise ValueError(f"{name} must be a positive number, got {value}")
        self.scf_conv_tol = float(scf_conv_tol)
        self.scf_conv_tol_grad = float(scf_conv_tol_grad)
        self.td_conv_tol = float(td_conv_tol)
        self.cphf_conv_tol = float(cphf_conv_tol)
        self.cphf_residual_tol = float(cphf_residual_tol)
        self.zvector_solver = str(zvector_solver).lower()
        if self.zvector_solver not in ("krylov", "pyscf"):
            raise ValueError(f"zvector_solver must be 'krylov' or 'pyscf', got {zvector_solver!r}")
        if not (np.isfinite(zvector_tol) and zvector_tol > 0):
            raise ValueError(f"zvector_tol must be a positive number, got {zvector_tol}")
        self.zvector_tol = float(zvector_tol)
        if seam_gap is not None and not (np.isfinite(seam_gap) and seam_gap >= 0):
            raise ValueError(f"seam_gap must be None or a non-negative energy in Eh, got {seam_gap}")
        self.seam_gap = None if seam_gap is None else float(seam_gap)
        if not (np.isfinite(seam_watch_gap) and seam_watch_gap >= 0):
            raise ValueError(f"seam_watch_gap must be a non-negative energy in Eh, got {seam_watch_gap}")
        self.seam_watch_gap = float(seam_watch_gap)
        self.singular_tol = float(singular_tol)
        if not 0 <= int(grids_level) <= 9:
            raise ValueError(f"grids_level must be 0..9, got {grids_level}")
        self.grids_level = int(grids_level)
        if int(extra_roots) < 0:
            raise ValueError(f"extra_roots must be >= 0, got {extra_roots}")
        self.extra_roots = int(extra_roots)
        self.scf_max_cycle = int(scf_max_cycle)
        self.td_max_cycle = int(td_max_cycle)
        if int(threads) < 1:
            raise ValueError(f"threads must be >= 1, got {threads}")
        self.threads = int(threads)
        from pyscf.data import elements
        try:
            nelectron = sum(elements.charge(s) for s in self.symbols) - self.charge
        except (KeyError, ValueError) as err:
            raise ValueError(f"symbols: unknown element in {self.symbols} ({err})") from None
        if nelectron <= 0 or nelectron % 2:
            raise ValueError(f"charge: {self.charge} leaves {nelectron} electrons; a closed-shell "
                             f"singlet needs a positive even number")
        # validate the basis once, at a dummy geometry
        probe = self._molecule(np.arange(3 * len(self.symbols), dtype=float).reshape(-1, 3) * 2.0)
        self._nocc = probe.nelectron // 2
        self._nvir = probe.nao_nr() - self._nocc
        if self.nstates - 1 > self._nocc * self._nvir:
            raise ValueError(f"nstates: at most {1 + self._nocc * self._nvir} states exist in this basis, "
                             f"got {self.nstates}")
        del gto

    # -- helpers ---------------------------------------------------------------------------

    @property
    def fingerprint(self) -> tuple:
        return (tuple(self.symbols), str(self.basis), self.charge)

    def _molecule(self, positions_bohr: np.ndarray):
        from pyscf import gto

        try:
            return gto.M(atom=[(s, tuple(map(float, r))) for s, r in zip(self.symbols, positions_bohr)],
                         unit="Bohr", basis=self.basis, charge=self.charge, spin=0, verbose=0,
                         symmetry=False)
        except (KeyError, RuntimeError, ValueError) as err:
            raise ValueError(f"basis/symbols: PySCF cannot build the molecule ({err})") from None

    def _scf_object(self, mol):
        from pyscf import dft, scf

        if self.xc is None:
            mf = scf.RHF(mol)
        else:
            mf = dft.RKS(mol, xc=self.xc)
            mf.grids.level = self.grids_level
        mf.conv_tol = self.scf_conv_tol
        mf.conv_tol_grad = self.scf_conv_tol_grad
        mf.max_cycle = self.scf_max_cycle
        mf.verbose = 0
        return mf

    def _run_scf(self, mol, guess: TDDFTGuess | None, attempts: list[dict]):
        plans = []
        if guess is not None:
            plans.append("warm start from previous orbitals")
        plans += ["cold start (minao)", "second-order SCF from cold start"]
        for plan in plans:
            mf = self._scf_object(mol)
            dm0 = None
            if plan.startswith("warm"):
                c = np.asarray(guess.mo_coeff)
                s_ao = mol.intor("int1e_ovlp")
                m = c.T @ s_ao @ c
                w, v = np.linalg.eigh(m)
                if w[0] <= 1e-8:
                    attempts.append({"what": plan, "outcome": "previous orbitals linearly dependent here"})
                    continue
                c_orth = c @ (v * w ** -0.5) @ v.T
                err = float(np.max(np.abs(c_orth.T @ s_ao @ c_orth - np.eye(c.shape[1]))))
                if err > WARM_START_ORTHO_TOL:
                    attempts.append({"what": plan, "outcome": f"orthonormalisation error {err:.1e}"})
                    continue
                occ = np.zeros(c.shape[1])
                occ[:guess.nocc] = 2.0
                dm0 = mf.make_rdm1(c_orth, occ)
            if plan.startswith("second"):
                mf = mf.newton()
            mf.kernel(dm0=dm0)
            outcome = "converged" if mf.converged else "not converged"
            attempts.append({"what": plan, "outcome": f"{outcome} (E={mf.e_tot:.10f}, cycles={getattr(mf, 'cycles', '?')})"})
            if mf.converged:
                return mf
        raise BackendError("SCF did not converge", attempts)

    def _check_seam(self, exc: np.ndarray, r: np.ndarray, attempts: list[dict]) -> np.ndarray:
        """Excitation energies (Eh, real) after the S1/S0-region rule (docs/theory.md#s1s0-region):
        raise :class:`RegionReached` when the lowest excitation is complex, non-positive or below
        ``seam_gap``; with the rule off a non-positive or complex one is a ``BackendError``."""
        exc = np.asarray(exc)
        complex_root = bool(np.iscomplexobj(exc) and np.any(np.abs(exc.imag) > 1e-10 * np.maximum(1.0, np.abs(exc.real))))
        exc_real = np.asarray(exc.real, dtype=float)
        gap = float(exc_real[0])
        if self.seam_gap is None:
            if complex_root or np.any(exc_real <= 0.0):
                raise BackendError(
                    f"non-positive or complex excitation energy {exc_real.min():.3e} Eh: the reference is "
                    f"unstable (linear response is unreliable near S1/S0 crossings)", attempts)
            return exc_real
        if complex_root or not np.all(np.isfinite(exc_real)) or gap < self.seam_gap:
            why = ("a complex excitation energy" if complex_root else
                   f"S1-S0 gap {gap * HARTREE_IN_EV:.3f} eV < {self.seam_gap * HARTREE_IN_EV:.3f} eV")
            raise RegionReached("S1/S0 region", f"{why} (linear response from one reference is not valid there)",
                                {"gap_Eh": gap, "seam_gap_Eh": self.seam_gap, "complex": complex_root,
                                 "positions_bohr": np.asarray(r, dtype=float).tolist()})
        return exc_real

    def _check_window(self, diagnostics: dict, guess: TDDFTGuess, attempts: list[dict]) -> None:
        """A propagated state of the previous step that is not among the computed roots any more
        (``root_window_weight`` < :data:`ROOT_WINDOW_WEIGHT_MIN`) makes the surfaces discontinuous.
        If it is S0 (the reference determinant changed: another SCF solution) or S1, and the previous
        S1−S0 gap was below ``seam_watch_gap``, the single reference broke down within the step: the
        trajectory entered the S1/S0 region (:class:`RegionReached`).  Otherwise a ``BackendError``
        names the state (docs/theory.md#root-buffer)."""
        weight = diagnostics["root_window_weight"]
        left = [k for k in range(len(weight)) if weight[k] < ROOT_WINDOW_WEIGHT_MIN]
        if not left:
            return
        gap = guess.gap_Eh
        if ((0 in left or 1 in left) and self.seam_gap is not None and gap is not None
                and gap < self.seam_watch_gap):
            what = ("the reference determinant changed (another SCF solution)" if 0 in left else
                    "S1 of the previous step is not among the computed roots any more")
            raise RegionReached("S1/S0 region", f"{what} after an S1-S0 gap of {gap * HARTREE_IN_EV:.3f} eV "
                                f"(weights of the previous states among the new roots: "
                                + ", ".join(f"{w:.2f}" for w in weight) + ")",
                                {"gap_Eh": gap, "seam_gap_Eh": self.seam_gap,
                                 "window_weight": [float(w) for w in weight]})
        raise BackendError("electronic structure discontinuous: state(s) " + ", ".join(map(str, left))
                           + " of the previous step are not among the computed roots (weights "
                           + ", ".join(f"{weight[k]:.2f}" for k in left) + ")", attempts)

    def _run_td(self, mf, attempts: list[dict]):
        nexc = self.nstates - 1
        maxroots = self._nocc * self._nvir
        plans = [(min(nexc + self.extra_roots, maxroots), self.td_max_cycle),
                 (min(nexc + self.extra_roots + 3, maxroots), 3 * self.td_max_cycle)]
        for nroots, max_cycle in plans:
            if self.method == "tda":
                td = mf.TDA()
            else:
                td = mf.TDDFT() if self.xc is not None else mf.TDHF()
            td.nstates = nroots
            if self.method == "tda":
                # PySCF silently drops roots below 1e-3 Eh (positive_eig_threshold); keep them so the
                # S1/S0-region rule sees a collapsing or negative S1 (docs/theory.md#pyscf-pitfalls)
                td.positive_eig_threshold = -np.inf
            td.conv_tol = self.td_conv_tol
            td.max_cycle = max_cycle
            td.verbose = 0
            td.kernel()
            conv = np.asarray(td.converged, dtype=bool)
            ok = len(td.e) >= nexc and bool(np.all(conv[:nexc]))
            attempts.append({"what": f"{self.method.upper()} Davidson, {nroots} roots, max_cycle={max_cycle}",
                             "outcome": "converged" if ok else f"not converged (flags {conv.tolist()})"})
            if ok:
                return td
        raise BackendError(f"{self.method.upper()} Davidson did not converge", attempts)

    # -- the contract --------------------------------------------------------------------

    def compute(self, positions_bohr: np.ndarray, guess: Any = None,
                need_gradients: bool = True) -> ElectronicResult:
        """Energies (Eh), gradients (Eh/Bohr), overlaps and dipoles at ``positions_bohr`` (N, 3) Bohr.

        ``guess`` is ``None`` or the ``TDDFTGuess`` of the previous step (``result.guess``).
        Raises ``BackendError`` (with ``attempts``) when SCF, Davidson or a gradient fails.
        """
        from pyscf import gto, lib

        r = np.asarray(positions_bohr, dtype=float)
        if r.shape != (len(self.symbols), 3) or not np.all(np.isfinite(r)):
            raise ValueError(f"positions_bohr must be a finite ({len(self.symbols)}, 3) array, got shape {r.shape}")
        if guess is not None:
            if not isinstance(guess, TDDFTGuess):
                raise ValueError(f"guess must be None or a TDDFTGuess, got {type(guess).__name__}")
            if guess.fingerprint != self.fingerprint:
                raise ValueError(f"guess belongs to {guess.fingerprint}, this backend is {self.fingerprint}")
            if guess.x_amplitudes.shape[0] != self.nstates - 1:
                raise ValueError(f"guess carries {guess.x_amplitudes.shape[0] + 1} states, backend has {self.nstates}")
        old_threads = lib.num_threads()
        lib.num_threads(self.threads)
        try:
            return self._compute(r, guess, bool(need_gradients), gto)
        finally:
            lib.num_threads(old_threads)

    def _compute(self, r: np.ndarray, guess: TDDFTGuess | None, need_gradients: bool, gto) -> ElectronicResult:
        timings: dict[str, float] = {}
        attempts: list[dict] = []
        nexc = self.nstates - 1
        mol = self._molecule(r)

        t0 = time.perf_counter()
        mf = self._run_scf(mol, guess, attempts)
        timings["scf"] = time.perf_counter() - t0
        nocc = int(np.count_nonzero(mf.mo_occ > 0))
        c_new = np.asarray(mf.mo_coeff)

        energies = np.array([mf.e_tot])
        x_norm = np.zeros((0, nocc, c_new.shape[1] - nocc))
        xpy = x_norm
        td = None
        if nexc > 0:
            t0 = time.perf_counter()
            td = self._run_td(mf, attempts)
            timings["td"] = time.perf_counter() - t0
            exc = self._check_seam(np.asarray(td.e[:nexc]), r, attempts)
            energies = np.concatenate([energies, mf.e_tot + exc])
            nroots = len(td.e)
            xs_all = np.array([np.asarray(td.xy[k][0]) for k in range(nroots)])
            xs = xs_all[:nexc]
            ys = [td.xy[k][1] for k in range(nexc)]
            ys = np.array([np.zeros_like(xs[0]) if isinstance(y, (int, float)) else np.asarray(y) for y in ys])
            x_all = normalise_cis_amplitudes(xs_all)
            x_norm = x_all[:nexc]
            # linear-response transition density X+Y (PySCF normalisation Σ(X²−Y²) = 1/2)
            xpy = xs + ys

        # dipole integrals (origin at 0) and MO blocks
        with mol.with_common_orig((0.0, 0.0, 0.0)):
            r_ao = mol.intor_symmetric("int1e_r", comp=3)
        r_mo = np.einsum("xpq,pi,qj->xij", r_ao, c_new, c_new)
        r_oo, r_ov, r_vv = r_mo[:, :nocc, :nocc], r_mo[:, :nocc, nocc:], r_mo[:, nocc:, nocc:]
        mu_nuc = np.einsum("a,ax->x", mol.atom_charges().astype(float), mol.atom_coords())
        mu0 = mu_nuc - 2.0 * np.einsum("xii->x", r_oo)
        dip = np.zeros((self.nstates, self.nstates, 3))
        dip[0, 0] = mu0
        if nexc > 0:
            # <Φ0|μ|Ψ_K> = −2 Σ_ia (X+Y)_ia r_ia  (electron charge −1)
            mu_0k = -2.0 * np.einsum("kia,xia->kx", xpy, r_ov)
            dip[0, 1:] = mu_0k
            dip[1:, 0] = mu_0k
            # CIS-like <Ψ_K|μ|Ψ_L> = δ_KL μ0 − 2[tr(X_K r_vv X_Lᵀ) − tr(X_Kᵀ r_oo X_L)]
            ov = 2.0 * np.einsum("kia,lia->kl", x_norm, x_norm)
            t_vv = np.einsum("kia,xab,lib->klx", x_norm, r_vv, x_norm)
            t_oo = np.einsum("kia,xij,lja->klx", x_norm, r_oo, x_norm)
            dip[1:, 1:] = ov[:, :, None] * mu0 - 2.0 * (t_vv - t_oo)
        osc = (2.0 / 3.0) * (energies[1:] - energies[0]) * np.sum(dip[0, 1:] ** 2, axis=-1)

        # state overlaps with the previous step, sign alignment
        diagnostics: dict[str, Any] = {}
        overlap_aligned = None
        if guess is not None:
            t0 = time.perf_counter()
            mol_prev = self._molecule(np.asarray(guess.positions_bohr))
            s_ao = gto.intor_cross("int1e_ovlp", mol_prev, mol)
            s_mo = np.asarray(guess.mo_coeff).T @ s_ao @ c_new
            if guess.nocc != nocc:
                raise BackendError(f"occupied count changed between steps ({guess.nocc} -> {nocc})", attempts)
            raw_all, sigma_min = determinant_state_overlaps(s_mo, nocc, guess.x_amplitudes,
                                                            x_all if nexc > 0 else x_norm, self.singular_tol)
            raw = raw_all[:, :self.nstates]
            diagnostics["overlap_raw"] = raw
            diagnostics.update(root_window_diagnostics(raw_all, self.nstates))
            self._check_window(diagnostics, guess, attempts)
            match = match_states(raw)
            signs = match.signs
            overlap_aligned = match.overlap
            diagnostics.update(match.as_diagnostics())
            diagnostics["occ_overlap_sigma_min"] = sigma_min
            diagnostics["overlap_orthogonality_error"] = float(
                np.max(np.abs(overlap_aligned.T @ overlap_aligned - np.eye(self.nstates))))
            timings["overlap"] = time.perf_counter() - t0
        else:
            # deterministic first-call phase: largest |X| element positive
            signs = np.ones(self.nstates)
            for k in range(nexc):
                flat = x_norm[k].ravel()
                if flat[np.argmax(np.abs(flat))] < 0:
                    signs[k + 1] = -1.0
        x_norm = x_norm * signs[1:, None, None]
        _, dip = apply_state_signs(signs, transition_dipoles=dip)

        gradients = None
        if need_gradients:
            t0 = time.perf_counter()
            gradients = np.zeros((self.nstates, len(self.symbols), 3))
            g0 = mf.nuc_grad_method()
            g0.verbose = 0
            gradients[0] = g0.kernel()
            if nexc > 0:
                tdg = td.nuc_grad_method()
                tdg.verbose = 0
                tdg.cphf_conv_tol = self.cphf_conv_tol
                residuals, solvers, products = [], [], []
                plans = [("krylov", 50)] if self.zvector_solver == "krylov" else []
                plans += [("pyscf", 50), ("pyscf", 200)]
                for k in range(nexc):
                    best: tuple | None = None
                    for solver, cycles in plans:
                        tdg.cphf_max_cycle = cycles
                        with _response_cphf(solver, self.zvector_tol) as stand_in:
                            g = np.asarray(tdg.kernel(state=k + 1))
                        res = max(stand_in.residuals) if stand_in.residuals else float("nan")
                        ok = bool(np.all(np.isfinite(g))) and not res > self.cphf_residual_tol  # NaN: not recorded
                        name = stand_in.solvers[-1] if stand_in.solvers else "pyscf (not intercepted)"
                        what = f"state {k + 1} gradient, Z-vector by {name}" + (
                            f", cphf_max_cycle={cycles}" if solver == "pyscf" else f", {sum(stand_in.products)} products")
                        attempts.append({"what": what, "outcome": f"{'converged' if ok else 'not converged'} "
                                                                  f"(Z-vector residual {res:.1e})"})
                        if best is None or (np.isfinite(res) and not res >= best[1]):
                            best = (g, res, name, sum(stand_in.products))
                        if ok:
                            break
                    else:
                        raise BackendError(f"gradient of state {k + 1} did not converge", attempts)
                    gradients[k + 1] = g
                    residuals.append(res)
                    solvers.append(name)
                    products.append(sum(stand_in.products))
                diagnostics["cphf_residuals"] = residuals
                diagnostics["zvector_solvers"] = solvers
                diagnostics["zvector_products"] = products
            timings["gradients"] = time.perf_counter() - t0

        diagnostics.update({
            "timings": timings,
            "attempts": attempts,
            "scf_cycles": getattr(mf, "cycles", None),
            "warm_start": attempts[0]["what"].startswith("warm") and attempts[0]["outcome"].startswith("converged"),
            "excitation_energies": (energies[1:] - energies[0]).tolist(),
            "oscillator_strengths": osc,
            "method": self.method,
            "reference": "RHF" if self.xc is None else f"RKS/{self.xc}",
            "overlap_convention": "X-only, 2ΣX²=1" if self.method == "tddft" else "CIS-like X, 2ΣX²=1",
        })
        new_guess = TDDFTGuess(positions_bohr=r.copy(), mo_coeff=c_new.copy(), nocc=nocc,
                               x_amplitudes=x_norm.copy(), fingerprint=self.fingerprint,
                               gap_Eh=float(energies[1] - energies[0]) if nexc > 0 else None)
        result = ElectronicResult(
            energies=energies, gradients=gradients, couplings=None, overlap_prev=overlap_aligned,
            transition_dipoles=dip, spin_squared=np.zeros(self.nstates), guess=new_guess,
            converged=True, diagnostics=diagnostics)
        return result.validate(natoms=len(self.symbols))
