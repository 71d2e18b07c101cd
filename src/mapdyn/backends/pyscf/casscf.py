"""State-averaged CASSCF backend on PySCF: energies, gradients, NAC vectors, overlaps.

All quantities in Hartree atomic units: positions in Bohr, energies in Eh, gradients in Eh/Bohr,
coupling vectors in 1/Bohr, dipoles in e·Bohr.  The backend follows the contract of
:mod:`mapdyn.backends.contract` (docs/architecture.md#backend-contract): ``compute`` is a pure function of its arguments and
everything carried from one step to the next travels in a picklable :class:`CASSCFGuess`.

Physics and numerics (docs/theory.md#local-diabatization, docs/theory.md#sa-casscf-gradients-and-couplings, docs/theory.md#pyscf-pitfalls):

* SA-CASSCF with equal weights over ``nstates`` roots (PySCF ``state_average_``).  Spin purity is
  enforced with a spin-penalty shift (H + shift·(S² − S(S+1)), PySCF ``fix_spin_``) or with the
  spin-adapted ``direct_spin0`` solver; ⟨S²⟩ of every root is checked at every step.
* Gradients dE_k/dR: PySCF ``mc.nuc_grad_method().kernel(state=k)`` (SA-CASSCF Lagrangian
  gradients, equal weights).
* NAC vectors d_ab = ⟨ψ_a|∇ψ_b⟩: PySCF ``mc.nac_method().kernel(state=(a, b))`` which returns
  ⟨ψ_a|∇ψ_b⟩ (sign asserted against finite-difference overlaps in the tests).  ``nac_form="full"``
  keeps the CSF (basis-motion) term and matches finite differences of state overlaps;
  ``nac_form="etf"`` uses electron-translation factors (Fatehi & Subotnik), which is
  translation-invariant and conserves total momentum but differs from overlap derivatives.
* State overlaps between geometries S_kl = ⟨ψ_k(R')|ψ_l(R)⟩ from the determinant expansion of the CI
  vectors, ⟨D_I|D_J⟩ = det S^α_IJ · det S^β_IJ with the MO cross-overlap C'ᵀ S_AO(R', R) C over the
  occupied (core + string-occupied active) orbitals (Löwdin's rule for non-orthogonal determinants).
* By default all gradients and NAC vectors of a step share one pass over the derivative
  integrals (:mod:`mapdyn.backends.pyscf.casscf_one_pass`), identical to the plain per-state calls.
* Two phases (:mod:`mapdyn.backends.contract`): ``compute(..., need_gradients=False)`` then
  :meth:`CASSCFBackend.force` with the driver's weight matrices: the mapping force in one Lagrange
  solve per weight matrix and one derivative-integral pass (:mod:`mapdyn.backends.pyscf.casscf_force`).
* Warm start from the previous orbitals, Löwdin-orthonormalised at the new geometry
  C (CᵀSC)^(−1/2); the result is guarded by max|CᵀSC − 1| < 1e-10 (raw orbitals from another
  geometry give a converged but wrong CASSCF, docs/theory.md#pyscf-pitfalls).
"""

from __future__ import annotations

import time
import warnings
from typing import Any, Sequence

import numpy as np

from mapdyn.backends.contract import (
    BackendError,
    ElectronicResult,
    apply_state_signs,
    match_states,
)
from mapdyn.backends.pyscf.casscf_force import WeightedForceMixin
from mapdyn.backends.pyscf.casscf_states import (
    CASSCFGuess,
    active_overlap_min_singular,
    ci_overlap_matrix,
    lowdin_orthonormalize,
    orthonormality_error,
    state_dipoles,
)
from mapdyn.backends.pyscf.common import pin_threads, response_interception_allowed

__all__ = [
    "CASSCFBackend",
    "CASSCFGuess",
    "lowdin_orthonormalize",
    "orthonormality_error",
    "ci_overlap_matrix",
    "active_overlap_min_singular",
    "ORTHONORMALITY_TOL",
]

#: guard on starting orbitals, max |CᵀSC − 1| (docs/theory.md#pyscf-pitfalls).
ORTHONORMALITY_TOL = 1e-10

_NAC_FORMS = ("full", "etf")
_SPIN_PURITY = ("shift", "spin0", "none")


def _pyscf():
    """Import PySCF lazily and pin it to one thread (docs/architecture.md#threads-and-processes)."""
    from pyscf import lib

    pin_threads(1)
    return lib




class CASSCFBackend(WeightedForceMixin):
    """SA-CASSCF electronic backend (PySCF), equal state weights.

    Parameters
    ----------
    symbols : element symbols, one per atom (order of ``positions_bohr``).
    basis : PySCF basis name (e.g. ``"sto-3g"``, ``"6-31g"``).
    ncas : number of active orbitals.
    nelecas : active electrons, int or (n_alpha, n_beta).
    nstates : number of states averaged (equal weights) and returned, ≥ 2.
    charge, spin : total charge and 2S (PySCF convention).
    cas_orbitals : optional 0-based indices of the SCF orbitals (0 = lowest) that form the active space
        on a cold start (warm starts carry the previous active orbitals); the stability search then
        skips its orbital swaps, so the chosen orbitals are kept (its kicks still run).
    auxbasis : auxiliary basis for density fitting (None: PySCF's default JK-fit basis, which does
        not cover every element, e.g. use ``"def2-universal-jkfit"`` for Li).
    density_fitting : density-fitted integrals for SCF, CASSCF and gradients.  PySCF's NAC class
        is not density-fitting aware: NAC vectors are then built with exact integrals on the DF
        orbitals/CI, inconsistent with the DF energies at the level of the fitting error.
    nac_form : ``"full"`` (⟨ψ_a|∇ψ_b⟩ with the CSF term; matches overlap derivatives) or ``"etf"``
        (electron-translation factors; translation-invariant, momentum-conserving).
    spin_purity : ``"shift"`` (spin-penalty shift), ``"spin0"`` (spin-adapted singlet solver,
        only for spin 0 with n_alpha = n_beta) or ``"none"``.
    spin_shift : penalty in Eh for ``"shift"``.
    spin_tolerance : allowed |⟨S²⟩ − S(S+1)| per state.
    conv_tol, conv_tol_grad : CASSCF energy (Eh) and orbital-gradient thresholds (§7.10b).
    max_cycle_macro : CASSCF macro-iteration limit for every attempt of the fallback ladder.
    active_space_warning : warn when the smallest singular value of the active-orbital overlap
        with the previous step falls below this.
    gradient_method : ``"one_pass"`` (default: all gradients and NACs with one shared pass over the
        derivative integrals, :mod:`mapdyn.backends.pyscf.casscf_one_pass`; identical results) or
        ``"plain"`` (one PySCF call per gradient/NAC).  With density fitting the plain path is used.
    cold_start_alternatives : stability search of every cold start (without ``cas_orbitals``): besides
        the default choice, re-converge with the lowest active orbital swapped for each of the
        next this-many lower SCF orbitals and the highest one for each of the next this-many higher
        ones, and keep the lowest state-averaged energy.  0 disables the swaps.
    stability_kicks : after the swaps, re-converge this many times from the best orbitals rotated by
        a fixed pseudo-random unitary exp(K) (max|K| = ``stability_kick_size`` rad, fixed seeds, so the
        search is deterministic); a lower state-averaged energy is kept.  A plain SA-CASSCF cold start
        from SCF orbitals can converge to a saddle point of the state-averaged energy (ethylene
        SA2-CAS(2,2)/STO-3G at a planar geometry: the π/π* solution, 9 mEh above the σ/π*
        minimum), which the next warm-started step leaves: a jump of 50–70 mEh in S1.
    lagrange_rtol : relative tolerance of PySCF's Lagrange (z-vector) solver for gradients, NACs and
        the weighted force (None: PySCF's default, 1e-7).
    overlap_retry : when the smallest matched state overlap with the previous step falls below this,
        the step is re-solved with a damped warm start and with a cold start (with the stability
        search); the candidate with the largest smallest overlap is kept, near-ties (within 0.1) go
        to the lower state-averaged energy.  All candidates are in ``diagnostics["overlap_retry"]``.
    """

    def __init__(self, symbols: Sequence[str], basis: str = "sto-3g", ncas: int = 2,
                 nelecas: int | tuple[int, int] = 2, nstates: int = 2, charge: int = 0, spin: int = 0,
                 cas_orbitals: Sequence[int] | None = None, density_fitting: bool = False,
                 nac_form: str = "full", spin_purity: str = "shift", spin_shift: float = 1.0,
                 spin_tolerance: float = 1e-3, conv_tol: float = 1e-10, conv_tol_grad: float = 1e-6,
                 max_cycle_macro: int = 50, active_space_warning: float = 0.9,
                 gradient_method: str = "one_pass", auxbasis: str | None = None,
                 cold_start_alternatives: int = 3, stability_kicks: int = 2, stability_kick_size: float = 0.1,
                 overlap_retry: float = 0.5, lagrange_rtol: float | None = None):
        self.symbols = [str(s) for s in symbols]
        if not self.symbols:
            raise ValueError("symbols: need at least one atom")
        self.basis = basis
        self.charge = int(charge)
        self.spin = int(spin)
        if int(ncas) < 1:
            raise ValueError(f"ncas must be a positive integer, got {ncas}")
        self.ncas = int(ncas)
        if isinstance(nelecas, (int, np.integer)):
            ne = int(nelecas)
            if ne < 0 or (ne - self.spin) % 2:
                raise ValueError(f"nelecas={ne} is incompatible with spin={self.spin} (2S)")
            self.nelecas = ((ne + self.spin) // 2, (ne - self.spin) // 2)
        else:
            na, nb = (int(x) for x in nelecas)
            self.nelecas = (na, nb)
        if min(self.nelecas) < 0 or max(self.nelecas) > self.ncas:
            raise ValueError(f"nelecas={self.nelecas} does not fit in ncas={self.ncas} orbitals")
        if int(nstates) < 1:
            raise ValueError(f"nstates must be >= 1, got {nstates}")
        self.nstates = int(nstates)
        self.cas_orbitals = None if cas_orbitals is None else [int(i) for i in cas_orbitals]
        if self.cas_orbitals is not None and len(self.cas_orbitals) != self.ncas:
            raise ValueError(f"cas_orbitals must list exactly ncas={self.ncas} orbitals, got {len(self.cas_orbitals)}")
        self.density_fitting = bool(density_fitting)
        self.auxbasis = auxbasis
        if nac_form not in _NAC_FORMS:
            raise ValueError(f"nac_form must be one of {_NAC_FORMS}, got {nac_form!r}")
        self.nac_form = nac_form
        if spin_purity not in _SPIN_PURITY:
            raise ValueError(f"spin_purity must be one of {_SPIN_PURITY}, got {spin_purity!r}")
        if spin_purity == "spin0" and (self.spin != 0 or self.nelecas[0] != self.nelecas[1]):
            raise ValueError("spin_purity='spin0' needs spin=0 and equal alpha/beta active electrons")
        self.spin_purity = spin_purity
        self.spin_shift = float(spin_shift)
        self.spin_tolerance = float(spin_tolerance)
        self.conv_tol = float(conv_tol)
        self.conv_tol_grad = float(conv_tol_grad)
        if int(max_cycle_macro) < 1:
            raise ValueError(f"max_cycle_macro must be >= 1, got {max_cycle_macro}")
        self.max_cycle_macro = int(max_cycle_macro)
        self.active_space_warning = float(active_space_warning)
        if gradient_method not in ("plain", "one_pass"):
            raise ValueError(f"gradient_method must be 'plain' or 'one_pass', got {gradient_method!r}")
        self.gradient_method = gradient_method
        if int(cold_start_alternatives) < 0 or int(stability_kicks) < 0:
            raise ValueError("cold_start_alternatives and stability_kicks must be >= 0")
        self.cold_start_alternatives = int(cold_start_alternatives)
        self.stability_kicks = int(stability_kicks)
        if not 0.0 < float(stability_kick_size) <= 1.0:
            raise ValueError(f"stability_kick_size must be in (0, 1] rad, got {stability_kick_size}")
        self.stability_kick_size = float(stability_kick_size)
        if not 0.0 <= float(overlap_retry) < 1.0:
            raise ValueError(f"overlap_retry must be in [0, 1), got {overlap_retry}")
        self.overlap_retry = float(overlap_retry)
        if lagrange_rtol is not None and not 0.0 < float(lagrange_rtol) < 1.0:
            raise ValueError(f"lagrange_rtol must be in (0, 1) or None, got {lagrange_rtol}")
        self.lagrange_rtol = None if lagrange_rtol is None else float(lagrange_rtol)
        self._wavefunctions: dict = {}  # converged solvers of recent steps, keyed by their guess
        s = self.spin / 2.0
        self.target_spin_squared = s * (s + 1.0)
        # Fail early on an impossible electron count.
        mol = self._build_mol(np.zeros((len(self.symbols), 3)) + np.arange(len(self.symbols))[:, None] * 3.0)
        self.ncore = (mol.nelectron - sum(self.nelecas)) // 2
        if self.ncore < 0 or (mol.nelectron - sum(self.nelecas)) % 2:
            raise ValueError(f"nelecas={self.nelecas} incompatible with {mol.nelectron} electrons")
        if self.ncore + self.ncas > mol.nao_nr():
            raise ValueError(f"ncas={self.ncas} plus {self.ncore} core orbitals exceed {mol.nao_nr()} basis functions")

    # ------------------------------------------------------------------ helpers
    @property
    def signature(self) -> tuple:
        return (tuple(self.symbols), str(self.basis), self.charge, self.spin, self.ncas,
                self.nelecas, self.nstates)

    def _build_mol(self, positions_bohr: np.ndarray):
        _pyscf()
        from pyscf import gto

        atom = [(sym, tuple(float(x) for x in r)) for sym, r in zip(self.symbols, positions_bohr)]
        return gto.M(atom=atom, basis=self.basis, unit="Bohr", charge=self.charge, spin=self.spin,
                     verbose=0, max_memory=2000)

    def _host_scf(self, mol):
        """Closed-shell SCF object that hosts the CASSCF integrals (never run itself).

        PySCF's SA-CASSCF NAC code needs an RHF-type host (it fails on an ROHF one), so open-shell
        cases take their starting orbitals from ROHF but keep an RHF host.
        """
        from pyscf import scf

        mf = scf.hf.RHF(mol)
        if self.density_fitting:
            mf = mf.density_fit(auxbasis=self.auxbasis)
        return mf

    def _run_scf(self, mol, damped: bool = False):
        """SCF for cold-start orbitals: returns the CASSCF host with ``mo_coeff`` and ``converged`` set."""
        from pyscf import scf

        mf = scf.RHF(mol) if self.spin == 0 else scf.ROHF(mol)
        if self.density_fitting:
            mf = mf.density_fit(auxbasis=self.auxbasis)
        mf.conv_tol = 1e-12
        mf.max_cycle = 200
        if damped:
            mf.level_shift = 0.3
            mf.damp = 0.5
            mf.diis_start_cycle = 4
        mf.kernel()
        if self.spin == 0:
            return mf
        host = self._host_scf(mol)
        host.mo_coeff = mf.mo_coeff
        host.mo_energy = mf.mo_energy
        host.converged = mf.converged
        return host

    def _make_mc(self, mf):
        from pyscf import mcscf

        mc = mcscf.CASSCF(mf, self.ncas, self.nelecas)
        if self.spin_purity == "spin0":
            from pyscf.fci import direct_spin0

            mc.fcisolver = direct_spin0.FCI(mf.mol)
        elif self.spin_purity == "shift":
            mc.fix_spin_(shift=self.spin_shift, ss=self.target_spin_squared)
        mc = mc.state_average_([1.0 / self.nstates] * self.nstates)
        mc.conv_tol = self.conv_tol
        mc.conv_tol_grad = self.conv_tol_grad
        mc.max_cycle_macro = self.max_cycle_macro
        mc.verbose = 0
        return mc

    def _solve_casscf(self, mc, mo_start: np.ndarray, ci_start=None, damped: bool = False) -> dict:
        """Run CASSCF from ``mo_start``; refuse non-orthonormal starting orbitals."""
        err = orthonormality_error(mo_start, mc.mol.intor_symmetric("int1e_ovlp"))
        if err > ORTHONORMALITY_TOL:
            raise BackendError(f"starting orbitals not orthonormal at this geometry: max|CᵀSC-1| = {err:.2e} "
                               f"> {ORTHONORMALITY_TOL:.0e}")
        if damped:
            mc.max_stepsize = 0.01
            mc.ah_level_shift = 1e-4
            mc.max_cycle_micro = 6
        count = {"macro": 0}

        def _count(envs):
            count["macro"] = max(count["macro"], int(envs.get("imacro", 0)))  # 1-based in PySCF

        mc.callback = _count
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mc.kernel(mo_start, ci0=ci_start)
        return {"macro_iterations": count["macro"]}

    def _converged_trial(self, mf, mo0: np.ndarray, ci0, damped: bool, record: dict):
        """One CASSCF solve from (mo0, ci0); BackendError unless converged and spin-pure."""
        trial = self._make_mc(mf)
        record.update(self._solve_casscf(trial, mo0, ci0, damped=damped))
        if not trial.converged:
            raise BackendError(f"CASSCF not converged in {self.max_cycle_macro} macro-iterations")
        ss = self._spin_squares(trial.ci)
        if np.any(np.abs(ss - self.target_spin_squared) > self.spin_tolerance):
            raise BackendError(f"spin contamination: <S^2> = {np.round(ss, 4).tolist()} "
                               f"(target {self.target_spin_squared})")
        return trial

    @staticmethod
    def _sa_energy(mc) -> float:
        """State-averaged (equal-weight) energy, Eh."""
        return float(np.mean(mc.e_states))

    def _sorted_states(self, mc) -> tuple[np.ndarray, list[np.ndarray]]:
        """Energies (Eh, ascending) and CI vectors of a converged solver; ``mc.ci`` put in the same order."""
        energies = np.asarray(mc.e_states, dtype=float).copy()
        ci_raw = [np.asarray(c).copy() for c in mc.ci]
        if np.any(np.diff(energies) < -1e-12):  # roots come back sorted; keep the contract anyway
            order = np.argsort(energies, kind="stable")
            energies = energies[order]
            ci_raw = [ci_raw[i] for i in order]
            mc.ci = [mc.ci[i] for i in order]
        return energies, ci_raw

    def _stability_search(self, mf, mc, mo_start: np.ndarray, attempts: list) -> Any:
        """Keep the lowest state-averaged solution among re-convergences from nearby starts.

        A converged SA-CASSCF is only a stationary point of the state-averaged energy; from SCF
        orbitals it can be a saddle (the next warm start slides off it).  Candidates: the lowest
        active orbital of the start swapped with each of the next ``cold_start_alternatives`` lower
        orbitals, the highest with each of the next higher ones, then ``stability_kicks`` re-solves
        from the best orbitals times exp(K) (K antisymmetric, fixed seeds; deterministic).  A
        candidate replaces the best one when it is lower by more than 1e-6 Eh (the CASSCF energy
        noise is ~1e-10 Eh at conv_tol = 1e-10).  ``mc`` may be None (the first solve did not
        converge); None is returned when no candidate converges.  Every candidate is recorded in
        ``attempts``.
        """
        import scipy.linalg

        best, best_e = mc, (np.inf if mc is None else self._sa_energy(mc))
        nmo = mo_start.shape[1]
        lo, hi = self.ncore, self.ncore + self.ncas - 1
        starts: list[tuple[str, np.ndarray]] = []
        swaps = 0 if self.cas_orbitals is not None else self.cold_start_alternatives  # the user chose the orbitals
        for k in range(1, swaps + 1):
            for slot, other in ((lo, lo - k), (hi, hi + k)):
                if 0 <= other < nmo:
                    mo = mo_start.copy()
                    mo[:, [slot, other]] = mo[:, [other, slot]]
                    starts.append((f"stability search: start orbital {slot} swapped with {other}", mo))
        kicks = [(f"stability search: kick {i} (max|K| {self.stability_kick_size} rad)", i)
                 for i in range(self.stability_kicks)]
        for what, item in starts + kicks:
            ta = time.perf_counter()
            record: dict[str, Any] = {"what": what}
            if isinstance(item, int):
                rng = np.random.default_rng(1_000_003 + item)
                k_mat = rng.normal(size=(nmo, nmo))
                k_mat = k_mat - k_mat.T
                k_mat *= self.stability_kick_size / np.abs(k_mat).max()
                mo0 = np.asarray(mo_start if best is None else best.mo_coeff) @ scipy.linalg.expm(k_mat)
            else:
                mo0 = item
            try:
                trial = self._converged_trial(mf, mo0, None, False, record)
                e_sa = self._sa_energy(trial)
                record["sa_energy"] = e_sa
                if best is None or e_sa < best_e - 1e-6:
                    best, best_e = trial, e_sa
                    record["outcome"] = "converged, lower: kept"
                else:
                    record["outcome"] = "converged, not lower"
            except (BackendError, np.linalg.LinAlgError, RuntimeError, ArithmeticError) as exc:
                record["outcome"] = f"failed: {getattr(exc, 'reason', exc)}"
            record["seconds"] = time.perf_counter() - ta
            attempts.append(record)
        return best

    def _overlap_retry(self, mol, mc, raw, match, warm_orbitals, cold_orbitals, overlap_with_prev,
                       attempts: list):
        """Re-solve a step whose states barely overlap the previous ones (min |S| < overlap_retry).

        Candidates: the first solution, a damped warm start (small orbital steps stay near the
        previous solution) and a cold start with the stability search.  Kept: the largest smallest
        matched overlap; candidates within 0.1 of it are ranked by state-averaged energy.
        """
        cands = [{"what": "first solution", "mc": mc, "raw": raw, "match": match}]
        starts = [("warm start, damped (overlap retry)", warm_orbitals, True),
                  ("cold start with stability search (overlap retry)", lambda: cold_orbitals(False), False)]
        for what, start, damped in starts:
            ta = time.perf_counter()
            record: dict[str, Any] = {"what": what}
            try:
                mf, mo0, ci0 = start()
                if ci0 is None:
                    try:
                        trial = self._converged_trial(mf, mo0, ci0, damped, record)
                    except BackendError:
                        trial = None
                    trial = self._stability_search(mf, trial, mo0, attempts)
                    if trial is None:
                        raise BackendError("no start of the stability search converged")
                else:
                    trial = self._converged_trial(mf, mo0, ci0, damped, record)
                _, ci_t = self._sorted_states(trial)
                raw_t = overlap_with_prev(np.asarray(trial.mo_coeff), ci_t)
                cands.append({"what": what, "mc": trial, "raw": raw_t, "match": match_states(raw_t)})
                record["outcome"] = "converged"
            except (BackendError, np.linalg.LinAlgError, RuntimeError, ArithmeticError) as exc:
                record["outcome"] = f"failed: {getattr(exc, 'reason', exc)}"
            record["seconds"] = time.perf_counter() - ta
            attempts.append(record)
        top = max(c["match"].min_overlap for c in cands)
        near = [c for c in cands if c["match"].min_overlap >= top - 0.1]
        kept = min(near, key=lambda c: self._sa_energy(c["mc"]))
        retry = {"kept": kept["what"],
                 "candidates": [{"what": c["what"], "min_overlap": c["match"].min_overlap,
                                 "sa_energy": self._sa_energy(c["mc"])} for c in cands]}
        return kept["mc"], kept["raw"], kept["match"], retry

    def _check_guess(self, guess: Any, mol) -> CASSCFGuess:
        if not isinstance(guess, CASSCFGuess):
            raise ValueError(f"guess must be a CASSCFGuess from this backend or None, got {type(guess).__name__}")
        if guess.signature != self.signature:
            raise ValueError("guess: produced for a different molecule/basis/active space")
        if guess.mo_coeff.shape[0] != mol.nao_nr():
            raise ValueError("guess: orbital coefficients do not match the basis size")
        if np.shape(guess.ci)[0] != self.nstates or np.shape(guess.positions_bohr) != (len(self.symbols), 3):
            raise ValueError("guess: CI vectors or geometry do not match this backend")
        return guess

    def _spin_squares(self, ci) -> np.ndarray:
        from pyscf.fci.spin_op import spin_square0

        return np.array([spin_square0(np.asarray(c), self.ncas, self.nelecas)[0] for c in ci])

    # ------------------------------------------------------------------ main entry
    def compute(self, positions_bohr: np.ndarray, guess: CASSCFGuess | None = None,
                need_gradients: bool = True) -> ElectronicResult:
        """SA-CASSCF energies (Eh), gradients (Eh/Bohr), NACs (1/Bohr), overlaps, dipoles (e·Bohr).

        ``positions_bohr`` (N, 3) in Bohr.  ``guess`` is the previous step's ``result.guess`` (or
        None for a cold start).  With ``need_gradients=False`` gradients and couplings are None.
        Raises :class:`BackendError` when the fallback ladder is exhausted.
        """
        t_start = time.perf_counter()
        pos = np.asarray(positions_bohr, dtype=float)
        if pos.shape != (len(self.symbols), 3) or not np.all(np.isfinite(pos)):
            raise ValueError(f"positions_bohr must be a finite ({len(self.symbols)}, 3) array, got shape {pos.shape}")
        timings: dict[str, float] = {}
        mol = self._build_mol(pos)
        prev = None if guess is None else self._check_guess(guess, mol)
        s_ao = mol.intor_symmetric("int1e_ovlp")

        attempts: list[dict] = []
        mc = None
        mf_cache: dict[str, Any] = {}

        def cold_orbitals(damped_scf: bool):
            t0 = time.perf_counter()
            mf = self._run_scf(mol, damped=damped_scf)
            timings["scf"] = timings.get("scf", 0.0) + time.perf_counter() - t0
            if not mf.converged:
                raise BackendError("SCF did not converge")
            mf_cache["mf"] = mf
            mo = mf.mo_coeff
            if self.cas_orbitals is not None:
                from pyscf import mcscf

                mo = mcscf.sort_mo(self._make_mc(mf), mo, self.cas_orbitals, base=0)
            return mf, mo, None

        def warm_orbitals():
            mo = lowdin_orthonormalize(prev.mo_coeff, s_ao)
            err = orthonormality_error(mo, s_ao)
            if err > ORTHONORMALITY_TOL:
                raise BackendError(f"Löwdin-orthonormalised guess fails the guard: max|CᵀSC-1| = {err:.2e}")
            mf = mf_cache.get("mf")
            if mf is None:
                mf = self._host_scf(mol)
            return mf, mo, [np.array(c, copy=True) for c in prev.ci]  # never touch the caller's guess

        ladder = []
        if prev is not None:
            ladder.append(("warm start: previous orbitals (Löwdin) and CI", warm_orbitals, False))
            ladder.append(("warm start, damped (max_stepsize 0.01, ah_level_shift 1e-4)", warm_orbitals, True))
            ladder.append(("cold start from fresh SCF", lambda: cold_orbitals(False), False))
        else:
            ladder.append(("cold start from SCF", lambda: cold_orbitals(False), False))
            ladder.append(("cold start, damped (max_stepsize 0.01, ah_level_shift 1e-4)",
                           lambda: (mf_cache["mf"], mf_cache["mo"], None) if "mo" in mf_cache
                           else cold_orbitals(False), True))
        ladder.append(("cold start from level-shifted damped SCF, damped CASSCF", lambda: cold_orbitals(True), True))

        t0 = time.perf_counter()
        for what, start, damped in ladder:
            ta = time.perf_counter()
            record: dict[str, Any] = {"what": what}
            try:
                mf, mo0, ci0 = start()
                if "mo" not in mf_cache and ci0 is None:
                    mf_cache["mo"] = mo0
                search = ci0 is None and not damped  # stability search on the plain cold starts
                try:
                    trial = self._converged_trial(mf, mo0, ci0, damped, record)
                    record["outcome"] = "converged"
                except BackendError as exc:
                    if not search:
                        raise
                    record["outcome"] = f"failed: {exc.reason}"
                    trial = None
                record["seconds"] = time.perf_counter() - ta
                attempts.append(record)
                if search:
                    # also a fallback: a start near a saddle may creep without converging
                    trial = self._stability_search(mf, trial, mo0, attempts)
                if trial is not None:
                    mc = trial
                    solved_what, solved_macro = what, record.get("macro_iterations")
                    break
            except BackendError as exc:
                record["outcome"] = f"failed: {exc.reason}"
                record["seconds"] = time.perf_counter() - ta
                attempts.append(record)
            except (np.linalg.LinAlgError, RuntimeError, ArithmeticError) as exc:
                if type(exc).__name__ == "BasisNotFoundError":
                    raise ValueError(f"auxbasis/basis: {exc}") from exc
                record["outcome"] = f"failed: {type(exc).__name__}: {exc}"
                record["seconds"] = time.perf_counter() - ta
                attempts.append(record)
        timings["casscf"] = time.perf_counter() - t0 - timings.get("scf", 0.0)
        if mc is None:
            raise BackendError("SA-CASSCF failed after the whole fallback ladder", attempts)

        energies, ci_raw = self._sorted_states(mc)
        mo = np.asarray(mc.mo_coeff)
        diagnostics: dict[str, Any] = {"attempts": attempts, "macro_iterations": solved_macro,
                                       "warm_start": prev is not None and solved_what.startswith("warm")}

        # --- overlaps with the previous step, sign alignment
        t0 = time.perf_counter()
        signs = np.ones(self.nstates)
        overlap = None
        if prev is not None:
            prev_mol = self._build_mol(prev.positions_bohr)
            from pyscf import gto

            s_cross = gto.intor_cross("int1e_ovlp", prev_mol, mol)

            def overlap_with_prev(mo_new, ci_new):
                return ci_overlap_matrix(prev.mo_coeff, prev.ci, mo_new, ci_new, s_cross, self.ncore, self.ncas,
                                         self.nelecas)

            raw = overlap_with_prev(mo, ci_raw)
            match = match_states(raw)
            if match.min_overlap < self.overlap_retry:
                mc, raw, match, retry = self._overlap_retry(mol, mc, raw, match, warm_orbitals, cold_orbitals,
                                                           overlap_with_prev, attempts)
                diagnostics["overlap_retry"] = retry
                energies, ci_raw = self._sorted_states(mc)
                mo = np.asarray(mc.mo_coeff)
                if retry["kept"] != "first solution":
                    diagnostics["warm_start"] = retry["kept"].startswith("warm")
            signs = match.signs
            overlap = match.overlap
            diagnostics.update(match.as_diagnostics())
            diagnostics["overlap_raw"] = raw
            smin = active_overlap_min_singular(prev.mo_coeff, mo, s_cross, self.ncore, self.ncas)
            diagnostics["active_overlap_min_singular"] = smin
            diagnostics["active_space_change"] = smin < self.active_space_warning
            if smin < self.active_space_warning:
                warnings.warn(f"active space changed between steps: smallest active-orbital overlap singular "
                              f"value {smin:.3f} < {self.active_space_warning}", RuntimeWarning, stacklevel=2)
        timings["overlap"] = time.perf_counter() - t0

        spin_sq = self._spin_squares(ci_raw)

        # --- transition dipoles
        t0 = time.perf_counter()
        dipoles = state_dipoles(mol, mo, ci_raw, self.ncore, self.ncas, self.nelecas)
        timings["dipoles"] = time.perf_counter() - t0

        gradients = couplings = None
        converged = True
        if need_gradients:
            gradients, couplings, grad_info = self._gradients_and_couplings(mc, timings)
            diagnostics.update(grad_info)
            converged = bool(grad_info["gradients_converged"] and grad_info["couplings_converged"])
        couplings, dipoles = apply_state_signs(signs, couplings, dipoles)
        ci_aligned = np.array([s * c for s, c in zip(signs, ci_raw)])
        timings["total"] = time.perf_counter() - t_start
        diagnostics["timings"] = timings
        new_guess = CASSCFGuess(positions_bohr=pos.copy(), mo_coeff=mo.copy(), ci=ci_aligned,
                                energies=energies.copy(), signature=self.signature)
        self._remember(new_guess, mc, signs)
        result = ElectronicResult(energies=energies, gradients=gradients, couplings=couplings,
                                  overlap_prev=overlap, transition_dipoles=dipoles, spin_squared=spin_sq,
                                  guess=new_guess, converged=converged, diagnostics=diagnostics)
        return result.validate(natoms=len(self.symbols))

    # ------------------------------------------------------------------ properties
    def _gradients_and_couplings(self, mc, timings: dict) -> tuple[np.ndarray, np.ndarray, dict]:
        """All state gradients (Eh/Bohr) and NAC vectors d_ab = ⟨a|∇b⟩ (1/Bohr), raw CI phases."""
        f = self.nstates
        natm = len(self.symbols)
        info: dict[str, Any] = {}
        if self._one_pass_allowed():
            from mapdyn.backends.pyscf.casscf_one_pass import (
                one_pass_gradients_and_couplings,
            )

            t0 = time.perf_counter()
            grads, nacs, info = one_pass_gradients_and_couplings(mc, use_etfs=self.nac_form == "etf",
                                                                 conv_rtol=self.lagrange_rtol)
            timings.update(info.pop("timings", {}))
            timings["gradients_and_couplings"] = time.perf_counter() - t0
            if not (info["gradients_converged"] and info["couplings_converged"]):
                warnings.warn("SA-CASSCF response (Lagrange multiplier) equations did not converge",
                              RuntimeWarning, stacklevel=3)
            return grads, nacs, info
        t0 = time.perf_counter()
        grads = np.zeros((f, natm, 3))
        gconv = True
        mc_grad = mc.nuc_grad_method()
        mc_grad.verbose = 0
        if self.lagrange_rtol is not None:
            mc_grad.conv_rtol = self.lagrange_rtol
        for k in range(f):
            grads[k] = mc_grad.kernel(state=k)
            gconv = gconv and bool(mc_grad.converged)
        timings["gradients"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        nacs = np.zeros((f, f, natm, 3))
        nconv = True
        if f > 1:
            nac = mc.nac_method()
            nac.verbose = 0
            if self.lagrange_rtol is not None:
                nac.conv_rtol = self.lagrange_rtol
            for a in range(f):
                for b in range(a + 1, f):
                    d = nac.kernel(state=(a, b), use_etfs=self.nac_form == "etf")
                    nconv = nconv and bool(nac.converged)
                    nacs[a, b] = d
                    nacs[b, a] = -d
        timings["couplings"] = time.perf_counter() - t0
        info["gradients_converged"] = gconv
        info["couplings_converged"] = nconv
        if not (gconv and nconv):
            warnings.warn("SA-CASSCF response (Lagrange multiplier) equations did not converge",
                          RuntimeWarning, stacklevel=3)
        return grads, nacs, info

    # ------------------------------------------------------------------ phase two
    def _one_pass_allowed(self) -> bool:
        """One-pass response requested, exact integrals, and a PySCF release whose internals were
        tested (otherwise the plain per-state calls, with a one-time warning)."""
        return (self.gradient_method == "one_pass" and not self.density_fitting
                and response_interception_allowed())

    @property
    def offers_force(self) -> bool:
        """True when :meth:`force` runs in one solve (one-pass path, exact integrals, tested PySCF)."""
        return self._one_pass_allowed()
