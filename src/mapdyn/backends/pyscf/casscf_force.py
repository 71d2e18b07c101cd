"""The SA-CASSCF mapping force in one Lagrange solve and one derivative-integral pass.

The mapping force for a real symmetric weight matrix ρ̄ (F × F, dimensionless) is

    F = −Σ_kl ρ̄_kl ⟨ψ_k|∇H|ψ_l⟩,   ⟨ψ_k|∇H|ψ_k⟩ = ∇E_k,   ⟨ψ_k|∇H|ψ_l⟩ = (E_l − E_k) d_kl  (k ≠ l),

in Eh/Bohr.  Every piece of the SA-CASSCF Lagrangian derivative (Stålring, Bernhardsson & Lindh,
Mol. Phys. 99, 103 (2001); the NAC extension of Lengsfield, Saxe & Yarkony, J. Chem. Phys. 81, 4549
(1984), as coded in pyscf.grad.sacasscf and pyscf.nac.sacasscf) is linear in the weights:

* the Hellmann–Feynman term is the CASSCF gradient expression evaluated with the weighted active
  densities γ^w = Σ_k ρ̄_kk γ^k + Σ_{k<l} 2 ρ̄_kl ½(γ^kl + γ^lk) (one- and two-particle), plus
  W = Σ_k ρ̄_kk times the core and nuclear-repulsion terms;
* the Lagrange (z-vector) source is b^w = Σ_k ρ̄_kk b^k + Σ_{k<l} 2 ρ̄_kl b^kl and the Lagrange
  operator is the state-averaged Hessian, the same for every state, so z^w = Σ ρ̄ z is one solve;
* the multiplier term z·∂g/∂R is linear in z;
* the CSF (basis-motion) term of the couplings is linear in the antisymmetric transition density.

So the whole force needs one solve per weight matrix and a single pass over the derivative
integrals for all weight matrices together (the record/replay machinery of
:mod:`mapdyn.backends.pyscf.casscf_one_pass`), whatever the number of states.  The per-state sources b^k,
b^kl are cheap (no derivative integrals) and are computed by PySCF's own ``get_wfn_response``.
Not thread-safe (PySCF module attributes are swapped while recording); no density fitting.
"""

from __future__ import annotations

import time
import warnings

import numpy as np

from mapdyn.backends.contract import ElectronicResult, check_weights, contract_force
from mapdyn.backends.pyscf.casscf_one_pass import _DM2_SUBSCRIPTS, _dense_eri_pass, _intercept, _Tape
from mapdyn.backends.pyscf.casscf_states import CASSCFGuess

__all__ = ["weighted_active_densities", "weighted_force"]

#: |W| = |Σ_k ρ̄_kk| above which the core term is carried by scaling the active densities by 1/W
#: (one gradient expression); below it the core term is evaluated separately.
_SCALE_FLOOR = 0.1


class _ScaledTape(_Tape):
    """A tape whose recorded two-particle densities are multiplied by ``scale`` (the contributions
    of a call whose result the caller multiplies by ``scale``), and whose MO integral transforms
    are shared between calls with the same orbitals (they do not depend on the weights)."""

    scale = 1.0

    def cached(self, key: str, func, *args, **kwargs):
        if key != "ao2mo" or self.mode != "record":
            return super().cached(key, func, *args, **kwargs)
        import hashlib

        h = hashlib.sha1(repr(sorted(kwargs.items())).encode())
        for item in args[1:]:
            for a in item if isinstance(item, (tuple, list)) else (item,):
                arr = np.ascontiguousarray(a)
                h.update(repr(arr.shape).encode())
                h.update(arr.tobytes())
        memo = self.__dict__.setdefault("_memo", {})
        sig = (id(args[0]) if args else None, h.digest())
        if sig not in memo:
            memo[sig] = func(*args, **kwargs)
        self.cheap_cache.setdefault(key, []).append(memo[sig])
        return memo[sig]

    def einsum(self, real_einsum, subscripts, *operands, **kwargs):
        out = real_einsum(subscripts, *operands, **kwargs)
        if self.mode == "record" and subscripts == _DM2_SUBSCRIPTS:
            self.pending_dm2.append(self.scale * out)
        return out


#: the small-system pass holds the unpacked derivative integrals, 3·nao⁴ doubles; up to this many MB.
SMALL_SYSTEM_MB = 150.0


def small_system_pass(mol, jk_dms: np.ndarray | None, dm2_by_quantity: dict, nquant: int
                      ) -> tuple[np.ndarray | None, np.ndarray | None, np.ndarray]:
    """Derivative J/K matrices and the two-particle contraction from ONE evaluation of (∇i j|kl).

    For small basis sets the whole ``int2e_ip1`` tensor (the integrals PySCF's derivative J/K
    builder and its CASSCF gradient loop each evaluate) is computed once and contracted with
    everything: vj[n,x,i,j] = −Σ_kl (∂_x i j|kl) D^n_lk, vk[n,x,i,l] = −Σ_jk (∂_x i j|kl) D^n_jk
    (pyscf.grad.rhf.get_jk conventions) and −2 Σ (∂_x i j|kl) Γ^q_{ij,kl} per atom of i
    (pyscf.grad.casscf.grad_elec).  Returns (vj (n, 3, nao, nao), vk, (nquant, natm, 3)).
    """
    from pyscf import lib

    nao = mol.nao_nr()
    npair = nao * (nao + 1) // 2
    eri1 = mol.intor("int2e_ip1", comp=3, aosym="s2kl").reshape(3, nao, nao, npair)
    out = np.zeros((nquant, mol.natm, 3))
    for atom, (_s0, _s1, p0, p1) in enumerate(mol.aoslice_by_atom()):
        blk = eri1[:, p0:p1].reshape(3, -1)
        for q in range(nquant):
            dm2 = dm2_by_quantity.get(q, {}).get(atom)
            if dm2 is not None:
                out[q, atom] -= 2.0 * (blk @ dm2.reshape(-1))
    vj = vk = None
    if jk_dms is not None and len(jk_dms):
        full = lib.unpack_tril(eri1.reshape(-1, npair)).reshape(3, nao, nao, nao, nao)
        d = np.asarray(jk_dms, dtype=float)
        n = d.shape[0]
        vj = -(full.reshape(3 * nao * nao, nao * nao) @ d.transpose(0, 2, 1).reshape(n, -1).T)
        vj = vj.T.reshape(n, 3, nao, nao)
        vk = -np.einsum("xijkl,njk->nxil", full, d, optimize=True)
    return vj, vk, out


def weighted_active_densities(ci, ncas: int, nelecas, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """γ^w (ncas, ncas) and Γ^w (ncas,)*4: Σ_kl ρ̄_kl of the symmetrised (transition) active densities.

    PySCF's ``direct_spin1.trans_rdm12`` conventions (dm1[p,q] = ⟨bra|p†q|ket⟩); the transition
    densities are symmetrised as in pyscf.nac.sacasscf (½(γ + γᵀ), ½(Γ + Γ^T(1,0,3,2))).
    """
    from pyscf.fci import direct_spin1

    w = np.asarray(weights, dtype=float)
    nst = w.shape[0]
    dm1 = np.zeros((ncas, ncas))
    dm2 = np.zeros((ncas,) * 4)
    for k in range(nst):
        for l in range(k, nst):
            c = w[k, k] if k == l else 2.0 * w[k, l]
            if c == 0.0:
                continue
            t1, t2 = direct_spin1.trans_rdm12(ci[l], ci[k], ncas, nelecas)
            dm1 += c * 0.5 * (t1 + t1.T)
            dm2 += c * 0.5 * (t2 + t2.transpose(1, 0, 3, 2))
    return dm1, dm2


def _csf_density(mc, mo: np.ndarray, ci, e_states: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """AO density whose contraction with the overlap derivative gives Σ_{k<l} 2 ρ̄_kl (E_l−E_k) d^CSF_kl.

    Same transition density and sign as pyscf.nac.sacasscf.nac_csf for state=(k, l).
    """
    from pyscf.fci import direct_spin1

    ncore, ncas = mc.ncore, mc.ncas
    tm = np.zeros((ncas, ncas))
    nst = weights.shape[0]
    for k in range(nst):
        for l in range(k + 1, nst):
            if weights[k, l] == 0.0:
                continue
            t1 = direct_spin1.trans_rdm1(ci[l], ci[k], ncas, mc.nelecas)
            tm += 2.0 * weights[k, l] * (e_states[l] - e_states[k]) * (t1.T - t1)
    mo_cas = mo[:, ncore:ncore + ncas]
    return mo_cas @ tm @ mo_cas.T


def weighted_force(mc, weights: np.ndarray, use_etfs: bool = False, conv_rtol: float | None = None,
                   ci=None, small_system: bool | None = None) -> tuple[np.ndarray, dict]:
    """Forces F_m = −Σ_kl ρ̄^m_kl ⟨ψ_k|∇H|ψ_l⟩ (M, N, 3) in Eh/Bohr of a converged SA-CASSCF ``mc``.

    ``weights`` (M, F, F) or (F, F): real symmetric weight matrices (dimensionless) in the basis of
    the CI vectors ``ci`` (default ``mc.ci``; pass sign-flipped vectors to use another phase
    convention).  ``use_etfs`` drops the CSF term of the couplings.  ``conv_rtol`` overrides PySCF's
    relative tolerance of the Lagrange solver.  One Lagrange solve per weight matrix, one
    derivative-integral pass for all: with ``small_system`` (default: when 3·nao⁴ doubles fit in
    ``SMALL_SYSTEM_MB``) the derivative integrals are evaluated once for J/K and the two-particle
    term together (:func:`small_system_pass`), otherwise PySCF's J/K builder plus one sweep.
    Returns (forces, info) with ``converged`` and ``timings`` (s).
    """
    from pyscf.grad import casscf as casscf_grad
    from pyscf.grad import rhf as rhf_grad
    from pyscf.nac.sacasscf import _nac_csf

    w_all = np.asarray(weights, dtype=float)
    single = w_all.ndim == 2
    w_all = w_all.reshape((-1,) + w_all.shape[-2:])
    mol = mc.mol
    nst = len(mc.ci)
    if w_all.shape[1:] != (nst, nst):
        raise ValueError(f"weights must have shape (M, {nst}, {nst}), got {np.shape(weights)}")
    if not np.all(np.isfinite(w_all)) or np.max(np.abs(w_all - w_all.transpose(0, 2, 1)), initial=0.0) > 1e-12:
        raise ValueError("weights must be finite real symmetric matrices")
    if getattr(mc._scf, "with_df", None) is not None:
        raise ValueError("weighted force: density fitting is not supported; use gradient_method='plain'")
    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    nw = w_all.shape[0]
    natm = mol.natm
    atmlst = list(range(natm))
    mo = mc.mo_coeff
    ci = list(mc.ci) if ci is None else [np.asarray(c) for c in ci]
    e_states = np.asarray(mc.e_states, dtype=float)
    mf_grad = mc._scf.nuc_grad_method()
    mf_grad.verbose = 0
    eris = mc.ao2mo(mo)
    kw = dict(atmlst=atmlst, verbose=0, mo=mo, ci=ci, eris=eris, mf_grad=mf_grad, e_states=e_states)

    # sources of every state and pair (no derivative integrals), combined per weight matrix
    gobj = mc.nuc_grad_method()
    gobj.verbose = 0
    gobj.eris = eris
    gobj.e_states = e_states
    if conv_rtol is not None:
        gobj.conv_rtol = float(conv_rtol)
    nobj = mc.nac_method() if nst > 1 else None
    if nobj is not None:
        nobj.verbose = 0
        nobj.eris = eris
        nobj.e_states = e_states
    src = np.zeros((nw, gobj.nlag))
    for k in range(nst):
        if np.any(w_all[:, k, k] != 0.0):
            src += w_all[:, k, k, None] * gobj.get_wfn_response(state=k, **kw)[None]
        for l in range(k + 1, nst):
            if np.any(w_all[:, k, l] != 0.0):
                src += 2.0 * w_all[:, k, l, None] * nobj.get_wfn_response(state=(k, l), **kw)[None]
    timings["sources"] = time.perf_counter() - t0

    # one Lagrange solve per weight matrix (PySCF's preconditioned conjugate gradients).  PySCF keeps
    # a spin-penalty solver with a zero penalty in the Lagrange operator; without it the products
    # are the same and about twice as fast.
    from pyscf.fci.addons import SpinPenaltyFCISolver

    make_sa = gobj.make_fcasscf_sa

    def make_sa_without_zero_penalty(*a, **k):
        fc = make_sa(*a, **k)
        if isinstance(fc.fcisolver, SpinPenaltyFCISolver) and fc.fcisolver.ss_penalty == 0:
            fc.fcisolver = fc.fcisolver.undo_fix_spin()
        return fc

    gobj.make_fcasscf_sa = make_sa_without_zero_penalty
    t0 = time.perf_counter()
    lvecs, conv = [], True
    for m in range(nw):
        gobj.get_wfn_response = lambda _b=src[m], **_k: _b
        ok, lvec, *_ = gobj.solve_lagrange(level_shift=gobj.level_shift, state=0, **kw)
        del gobj.get_wfn_response
        lvecs.append(lvec)
        conv = conv and bool(ok)
    timings["lagrange"] = time.perf_counter() - t0

    # weighted Hellmann–Feynman densities; W·(core + nuclear) carried by scaling or separately
    scale = w_all.trace(axis1=1, axis2=2)
    dens = [weighted_active_densities(ci, mc.ncas, mc.nelecas, w) for w in w_all]
    core_apart = [abs(s) < _SCALE_FLOOR for s in scale]

    def grad_elec_with(dm1, dm2):
        attr = {"make_rdm12": lambda *a, **k: (dm1, dm2), "make_rdm1": lambda *a, **k: dm1,
                "make_rdm2": lambda *a, **k: dm2}
        fc = gobj.make_fcasscf(state=0, casscf_attr={}, fcisolver_attr=attr)
        fg = casscf_grad.Gradients(fc)
        fg.verbose = 0
        return np.asarray(fg.grad_elec(mo_coeff=mo, ci=ci[0], atmlst=atmlst, verbose=0))

    tape = _ScaledTape(mol)

    def run_responses():
        out = []
        for m in range(nw):
            tape.current = m
            dm1, dm2 = dens[m]
            if core_apart[m]:
                de = grad_elec_with(dm1, dm2)
                de = de + (scale[m] - 1.0) * grad_elec_with(np.zeros_like(dm1), np.zeros_like(dm2))
            else:
                tape.scale = scale[m]
                de = scale[m] * grad_elec_with(dm1 / scale[m], dm2 / scale[m])
                tape.scale = 1.0
            de = de + gobj.get_LdotJnuc(lvecs[m], **kw)
            out.append(de)
        return out

    t0 = time.perf_counter()
    with _intercept(tape, mc._scf):
        run_responses()
    if tape.pending_dm2:
        raise RuntimeError("weighted force: two-particle density recorded without an integral request")
    timings["record"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    nao = mol.nao_nr()
    if small_system is None:
        small_system = 3 * nao ** 4 * 8 / 1e6 <= SMALL_SYSTEM_MB
    all_dms = np.concatenate([d for _, d, _ in tape.jk_requests]) if tape.jk_requests else None
    if small_system:
        vj, vk, eri_contrib = small_system_pass(mol, all_dms, tape.dm2_by_quantity, nw)
        timings["integral_pass"] = time.perf_counter() - t0
    else:
        if all_dms is not None:
            vj, vk = rhf_grad.get_jk(mol, all_dms)
            vj = np.asarray(vj).reshape(len(all_dms), 3, nao, nao)
            vk = np.asarray(vk).reshape(len(all_dms), 3, nao, nao)
        timings["jk_pass"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        eri_contrib = _dense_eri_pass(mol, tape.dm2_by_quantity, nw)
        timings["eri_pass"] = time.perf_counter() - t0
    if all_dms is not None:
        i = 0
        for _, d, _single in tape.jk_requests:
            n = d.shape[0]
            tape.jk_results.append((vj[i:i + n], vk[i:i + n]))
            i += n

    t0 = time.perf_counter()
    tape.mode = "replay"
    with _intercept(tape, mc._scf):
        des = run_responses()
    if tape.jk_cursor != len(tape.jk_requests):
        raise RuntimeError("weighted force: replay diverged from the recorded call sequence (J/K call count)")
    timings["replay"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    nuc = rhf_grad.grad_nuc(mol, atmlst)
    forces = np.zeros((nw, natm, 3))
    for m in range(nw):
        de = des[m] + eri_contrib[m] + scale[m] * nuc
        if not use_etfs and nst > 1:
            tm1 = _csf_density(mc, mo, ci, e_states, w_all[m])
            if np.any(tm1 != 0.0):
                de = de + _nac_csf(mol, mf_grad, tm1, atmlst)
        forces[m] = -de
    timings["csf_and_nuclear"] = time.perf_counter() - t0
    return (forces[0] if single else forces), {"converged": conv, "timings": timings}


class WeightedForceMixin:
    """Phase two of the SA-CASSCF backend (mixed into
    :class:`mapdyn.backends.pyscf.casscf.CASSCFBackend`): the mapping force for weight matrices
    from the converged wavefunction of a phase-one result.  Uses the host's ``nstates``,
    ``offers_force``, ``nac_form``, ``lagrange_rtol``, ``_wavefunctions`` and its molecule/solver
    builders."""

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_wavefunctions"] = {}
        return state

    @staticmethod
    def _guess_key(guess: CASSCFGuess) -> bytes:
        import hashlib

        h = hashlib.sha1()
        for a in (guess.positions_bohr, guess.mo_coeff, guess.ci, guess.energies):
            h.update(np.ascontiguousarray(a, dtype=float).tobytes())
        return h.digest()

    def _remember(self, guess: CASSCFGuess, mc, signs: np.ndarray) -> None:
        """Keep the converged solver of ``guess`` and the signs s_l that align its CI vectors
        (ψ_l returned = s_l ψ_l of the solver) for phase two."""
        self._wavefunctions[self._guess_key(guess)] = (mc, np.array(signs, dtype=float))
        while len(self._wavefunctions) > 2:
            self._wavefunctions.pop(next(iter(self._wavefunctions)))

    def _wavefunction(self, guess: CASSCFGuess):
        """(solver, signs): the converged SA-CASSCF of ``guess`` as kept by :meth:`compute`, or one
        rebuilt from the guess's orbitals and (aligned) CI vectors with signs 1."""
        kept = self._wavefunctions.get(self._guess_key(guess))
        if kept is not None:
            return kept
        mol = self._build_mol(np.asarray(guess.positions_bohr, dtype=float))
        guess = self._check_guess(guess, mol)
        mc = self._make_mc(self._host_scf(mol))
        mc.mo_coeff = np.array(guess.mo_coeff, copy=True)
        mc.ci = [np.array(c, copy=True) for c in guess.ci]
        mc.fcisolver.e_states = [float(e) for e in guess.energies]
        mc.converged = True
        return mc, np.ones(self.nstates)

    def force(self, result: ElectronicResult, weights: np.ndarray) -> np.ndarray:
        """Phase two: F = −Σ_kl ρ̄_kl ⟨ψ_k|∇H|ψ_l⟩ in Eh/Bohr at the geometry of ``result``.

        ``result`` comes from :meth:`compute` (its ``guess`` carries the wavefunction); ``weights``
        (F, F) or (M, F, F) real symmetric (dimensionless) in the phases of ``result`` (those of
        its couplings and dipoles).  Returns (N, 3) or (M, N, 3).  One-pass path: one Lagrange solve
        per weight matrix and one derivative-integral pass; otherwise all gradients and couplings
        are computed and contracted.  Timings go to ``result.diagnostics["timings"]["force"]``.
        """
        w = check_weights(weights, self.nstates)
        if not isinstance(result, ElectronicResult) or not isinstance(result.guess, CASSCFGuess):
            raise ValueError("result must be an ElectronicResult from this backend's compute")
        t0 = time.perf_counter()
        mc, signs = self._wavefunction(result.guess)
        w_solver = w * (signs[:, None] * signs[None, :])[None]  # ⟨ψ_k|∇H|ψ_l⟩ = s_k s_l × solver's
        if self.offers_force:
            forces, info = weighted_force(mc, w_solver, use_etfs=self.nac_form == "etf", conv_rtol=self.lagrange_rtol)
            if not info["converged"]:
                warnings.warn("SA-CASSCF weighted Lagrange equations did not converge", RuntimeWarning, stacklevel=2)
            parts = info["timings"]
        else:
            grads, nacs, _ = self._gradients_and_couplings(mc, parts := {})
            forces = contract_force(result.energies, grads, nacs, w_solver)
        timings = result.diagnostics.setdefault("timings", {})
        timings["force"] = time.perf_counter() - t0
        timings["force_parts"] = parts
        return forces[0] if np.ndim(weights) == 2 else forces
