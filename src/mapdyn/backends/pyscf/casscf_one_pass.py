"""All SA-CASSCF state gradients and NAC vectors of one geometry with one derivative-integral pass.

Why: with PySCF's plain calls every gradient and every NAC vector evaluates the derivative
two-electron integrals (ij|kl)^x about six times (three derivative J/K builds and three dense
``int2e_ip1`` contractions: Hellmann–Feynman term, CI-Lagrange term, orbital-Lagrange term).  Those
integrals do not depend on which state is differentiated; only the densities they are contracted
with do.  This module computes every requested gradient dE_k/dR (Eh/Bohr) and NAC vector
d_ab = ⟨ψ_a|∇ψ_b⟩ (1/Bohr) with the integrals evaluated once:

1. For each quantity, solve its Lagrange (z-vector) equations with PySCF's own solver
   (``solve_lagrange``; unchanged, so the multipliers are those of the plain call).
2. *Record*: run PySCF's response routines (``get_ham_response`` + ``get_LdotJnuc``) with the
   derivative-integral primitives intercepted: every density handed to the derivative J/K builder
   ``pyscf.grad.rhf.get_jk`` and every AO two-particle density contracted with ``int2e_ip1`` is
   recorded, and zeros are returned in their place.  Cheap non-derivative intermediates (J/K
   builds, MO integral transforms) are kept for step 4.
3. *One pass*: one derivative J/K call with all recorded densities stacked, and one sweep over
   atoms of ``int2e_ip1`` contracted with the summed two-particle densities of every quantity.
4. *Replay*: run the same routines again; the derivative J/K builder now returns the stacked
   results in call order and the cached intermediates are reused; the dense two-electron
   contributions from step 3 are added.

The result equals the plain PySCF call to the solver tolerance (tested to 1e-8).  The physics is
PySCF's SA-CASSCF Lagrangian gradient and NAC code (pyscf.grad.sacasscf, pyscf.nac.sacasscf);
this module only reorganises when the integrals are evaluated.  Not thread-safe (module
attributes of PySCF are swapped during steps 2 and 4); density fitting is not supported here.
"""

from __future__ import annotations

import contextlib
import time
from typing import Any

import numpy as np

from mapdyn.backends.pyscf.common import PATCH_LOCK

__all__ = ["one_pass_gradients_and_couplings"]

_DM2_SUBSCRIPTS = "ijw,pi,qj->pqw"


class _Tape:
    """Records (mode 'record') or replays (mode 'replay') the intercepted primitives."""

    def __init__(self, mol):
        self.mol = mol
        self.mode = "record"
        self.current: int | None = None
        self.jk_requests: list[tuple[int, np.ndarray, bool]] = []  # (quantity, dms, single)
        self.jk_results: list[tuple[np.ndarray, np.ndarray]] = []
        self.jk_cursor = 0
        self.cheap_cache: dict[str, list] = {}
        self.cheap_cursor: dict[str, int] = {}
        self.pending_dm2: list[np.ndarray] = []
        self.dm2_by_quantity: dict[int, dict[int, np.ndarray]] = {}
        ao_loc = mol.ao_loc_nr()
        self.ao_loc = ao_loc
        self.atom_of_shell0 = {int(s0): k for k, (s0, _s1, _p0, _p1) in enumerate(mol.aoslice_by_atom())}
        nao = mol.nao_nr()
        self.nao_pair = nao * (nao + 1) // 2

    # -- cheap intermediates: computed in record mode, reused in call order in replay mode
    def cached(self, key: str, func, *args, **kwargs):
        if self.mode == "record":
            out = func(*args, **kwargs)
            self.cheap_cache.setdefault(key, []).append(out)
            return out
        i = self.cheap_cursor.get(key, 0)
        self.cheap_cursor[key] = i + 1
        return self.cheap_cache[key][i]

    # -- derivative J/K builder
    def get_jk(self, mol, dm):
        dms = np.asarray(dm, dtype=float)
        single = dms.ndim == 2
        dms = dms.reshape(-1, dms.shape[-2], dms.shape[-1])
        n, nao = dms.shape[0], dms.shape[-1]
        if self.mode == "record":
            self.jk_requests.append((self.current, dms.copy(), single))
            z = np.zeros((n, 3, nao, nao))
            return (z[0], z[0].copy()) if single else (z, z.copy())
        vj, vk = self.jk_results[self.jk_cursor]
        _, recorded, _ = self.jk_requests[self.jk_cursor]
        self.jk_cursor += 1
        if recorded.shape != dms.shape or np.max(np.abs(recorded - dms), initial=0.0) > 1e-12:
            raise RuntimeError("one-pass replay diverged from the recorded call sequence (J/K densities differ)")
        return (vj[0], vk[0]) if single else (vj, vk)

    # -- dense int2e_ip1 contraction
    def einsum(self, real_einsum, subscripts, *operands, **kwargs):
        out = real_einsum(subscripts, *operands, **kwargs)
        if self.mode == "record" and subscripts == _DM2_SUBSCRIPTS:
            self.pending_dm2.append(out.copy())  # PySCF accumulates in place (dm2_ao += ...)
        return out

    def intor(self, real_intor, intor, comp=None, hermi=0, aosym="s1", out=None, shls_slice=None, **kwargs):
        if intor not in ("int2e_ip1", "int2e_ip1_sph"):
            return real_intor(intor, comp=comp, hermi=hermi, aosym=aosym, out=out, shls_slice=shls_slice, **kwargs)
        if shls_slice is None or aosym != "s2kl" or tuple(shls_slice[4:]) != (0, self.mol.nbas, 0, self.mol.nbas):
            raise RuntimeError("one-pass: unexpected int2e_ip1 request pattern in PySCF")
        shl0, shl1, b0, b1 = (int(x) for x in shls_slice[:4])
        di = int(self.ao_loc[shl1] - self.ao_loc[shl0])
        dj = int(self.ao_loc[b1] - self.ao_loc[b0])
        if self.mode == "record":
            if not self.pending_dm2:
                raise RuntimeError("one-pass: int2e_ip1 requested without a recorded two-particle density")
            dm2 = np.sum(self.pending_dm2, axis=0)
            self.pending_dm2 = []
            if dm2.shape != (di, dj, self.nao_pair):
                raise RuntimeError("one-pass: two-particle density shape does not match the integral block")
            atom = self.atom_of_shell0[shl0]
            per_atom = self.dm2_by_quantity.setdefault(self.current, {})
            q0 = int(self.ao_loc[b0])
            if atom not in per_atom:
                per_atom[atom] = np.zeros((di, self.mol.nao_nr(), self.nao_pair))
            per_atom[atom][:, q0:q0 + dj] += dm2
        return np.zeros((3, di, dj, self.nao_pair))


class _LibProxy:
    """Stands in for ``pyscf.lib`` inside the gradient modules; routes ``einsum`` through the tape."""

    def __init__(self, real_lib, tape: _Tape):
        self._real = real_lib
        self._tape = tape

    def __getattr__(self, name):
        return getattr(self._real, name)

    def einsum(self, subscripts, *operands, **kwargs):
        return self._tape.einsum(self._real.einsum, subscripts, *operands, **kwargs)


class _Ao2moProxy:
    """Stands in for ``pyscf.ao2mo`` inside pyscf.grad.casscf; caches ``kernel`` for the replay."""

    def __init__(self, real_ao2mo, tape: _Tape):
        self._real = real_ao2mo
        self._tape = tape

    def __getattr__(self, name):
        return getattr(self._real, name)

    def kernel(self, *args, **kwargs):
        return self._tape.cached("ao2mo", self._real.kernel, *args, **kwargs)


@contextlib.contextmanager
def _intercept(tape: _Tape, mf):
    """Swap PySCF's derivative-integral primitives for the tape, under the PySCF patch lock;
    every attribute is restored on exit, also after an exception."""
    with PATCH_LOCK:
        yield from _intercepted(tape, mf)


def _intercepted(tape: _Tape, mf):
    from pyscf import ao2mo as real_ao2mo
    from pyscf import lib as real_lib
    from pyscf.grad import casscf as casscf_grad
    from pyscf.grad import rhf as rhf_grad
    from pyscf.grad import sacasscf as sacasscf_grad

    mol = tape.mol
    real_get_jk = rhf_grad.get_jk
    real_intor = mol.intor
    had_mf_get_jk = "get_jk" in mf.__dict__
    old_mf_get_jk = mf.__dict__.get("get_jk")
    real_mf_get_jk = mf.get_jk
    lib_proxy = _LibProxy(real_lib, tape)
    saved = {(casscf_grad, "lib"): casscf_grad.lib, (sacasscf_grad, "lib"): sacasscf_grad.lib,
             (casscf_grad, "ao2mo"): casscf_grad.ao2mo}
    try:
        rhf_grad.get_jk = tape.get_jk
        mol.intor = lambda intor, *a, **k: tape.intor(real_intor, intor, *a, **k)
        mf.get_jk = lambda *a, **k: tape.cached("scf_get_jk", real_mf_get_jk, *a, **k)
        casscf_grad.lib = lib_proxy
        sacasscf_grad.lib = lib_proxy
        casscf_grad.ao2mo = _Ao2moProxy(real_ao2mo, tape)
        yield
    finally:
        rhf_grad.get_jk = real_get_jk
        del mol.intor
        if had_mf_get_jk:
            mf.get_jk = old_mf_get_jk
        else:
            del mf.get_jk
        for (module, name), value in saved.items():
            setattr(module, name, value)


def _dense_eri_pass(mol, dm2_by_quantity: dict[int, dict[int, np.ndarray]], nquant: int,
                    max_memory_mb: float = 1000.0) -> np.ndarray:
    """Σ over atoms of −2 (∇_A ij|kl) Γ^q_{ij,kl} for every quantity q, one integral sweep.

    Returns (nquant, natm, 3).  Same contraction and sign as PySCF's CASSCF gradient loop
    (pyscf.grad.casscf.grad_elec), with the two-particle densities of all quantities stacked.
    """
    from pyscf.grad.mp2 import _shell_prange

    natm = mol.natm
    nao = mol.nao_nr()
    npair = nao * (nao + 1) // 2
    out = np.zeros((nquant, natm, 3))
    aoslices = mol.aoslice_by_atom()
    for atom in range(natm):
        qs = [q for q in range(nquant) if atom in dm2_by_quantity.get(q, {})]
        if not qs:
            continue
        shl0, shl1, p0, p1 = (int(x) for x in aoslices[atom])
        dp = p1 - p0
        blksize = int(max_memory_mb * 1e6 / 8 / ((3 + len(qs)) * max(dp, 1) * npair))
        blksize = min(nao, max(2, blksize))
        q1 = 0
        for b0, b1, nf in _shell_prange(mol, 0, mol.nbas, blksize):
            q0, q1 = q1, q1 + nf
            eri1 = mol.intor("int2e_ip1", comp=3, aosym="s2kl",
                             shls_slice=(shl0, shl1, b0, b1, 0, mol.nbas, 0, mol.nbas)).reshape(3, -1)
            dm2 = np.stack([dm2_by_quantity[q][atom][:, q0:q1] for q in qs]).reshape(len(qs), -1)
            out[qs, atom] -= 2.0 * (dm2 @ eri1.T)
    return out


def one_pass_gradients_and_couplings(mc, use_etfs: bool = False, states=None, pairs=None,
                                     conv_rtol: float | None = None):
    """Gradients (F, N, 3) in Eh/Bohr and NAC vectors (F, F, N, 3) in 1/Bohr of a converged SA-CASSCF.

    ``mc`` is a converged PySCF state-averaged CASSCF object (equal weights).  ``states``: states
    whose gradients are wanted (default all); ``pairs``: (a, b) pairs, a < b, whose NAC vectors
    d_ab = ⟨ψ_a|∇ψ_b⟩ are wanted (default all); d_ba = −d_ab is filled in.  ``use_etfs`` drops the
    CSF term (electron-translation factors).  Returns (gradients, couplings, info) where ``info``
    holds ``gradients_converged``, ``couplings_converged`` and ``timings`` (seconds).
    ``conv_rtol`` overrides PySCF's relative tolerance of the Lagrange solver.
    """
    mol = mc.mol
    nstates = len(mc.ci)
    natm = mol.natm
    states = list(range(nstates)) if states is None else [int(s) for s in states]
    pairs = [(a, b) for a in range(nstates) for b in range(a + 1, nstates)] if pairs is None else \
        [tuple(int(x) for x in p) for p in pairs]
    if getattr(mc._scf, "with_df", None) is not None:
        raise ValueError("one-pass gradients: density fitting is not supported; use gradient_method='plain'")
    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    mo = mc.mo_coeff
    ci = mc.ci
    e_states = np.asarray(mc.e_states)
    atmlst = list(range(natm))
    mf_grad = mc._scf.nuc_grad_method()
    mf_grad.verbose = 0
    eris = mc.ao2mo(mo)

    quantities: list[tuple[str, Any, Any, dict]] = []
    for k in states:
        obj = mc.nuc_grad_method()
        quantities.append(("grad", k, obj, {"state": k}))
    for a, b in pairs:
        obj = mc.nac_method()
        quantities.append(("nac", (a, b), obj, {"state": (a, b), "use_etfs": bool(use_etfs)}))
    timings["response_setup"] = time.perf_counter() - t0

    # 1. Lagrange multipliers (PySCF's solver, unchanged)
    t0 = time.perf_counter()
    lvecs = []
    conv = []
    for _kind, _label, obj, extra in quantities:
        obj.verbose = 0
        if conv_rtol is not None:
            obj.conv_rtol = float(conv_rtol)
        obj.eris = eris
        obj.e_states = e_states
        kw = dict(atmlst=atmlst, verbose=0, mo=mo, ci=ci, eris=eris, mf_grad=mf_grad, e_states=e_states, **extra)
        ok, lvec, _bvec, _aop, _adiag = obj.solve_lagrange(level_shift=obj.level_shift, **kw)
        extra["_kw"] = kw
        lvecs.append(lvec)
        conv.append(bool(ok))
    timings["lagrange"] = time.perf_counter() - t0

    tape = _Tape(mol)

    def run_responses():
        des = []
        for iq, (_kind, _label, obj, extra) in enumerate(quantities):
            tape.current = iq
            kw = extra["_kw"]
            de = obj.get_ham_response(**kw) + obj.get_LdotJnuc(lvecs[iq], **kw)
            des.append(np.asarray(de))
        return des

    # 2. record
    t0 = time.perf_counter()
    with _intercept(tape, mc._scf):
        run_responses()
    if tape.pending_dm2:
        raise RuntimeError("one-pass: two-particle density recorded without an integral request")
    timings["record"] = time.perf_counter() - t0

    # 3. one pass over derivative integrals
    t0 = time.perf_counter()
    from pyscf.grad import rhf as rhf_grad

    if tape.jk_requests:
        all_dms = np.concatenate([d for _, d, _ in tape.jk_requests])
        vj, vk = rhf_grad.get_jk(mol, all_dms)
        vj = np.asarray(vj).reshape(len(all_dms), 3, mol.nao_nr(), mol.nao_nr())
        vk = np.asarray(vk).reshape(len(all_dms), 3, mol.nao_nr(), mol.nao_nr())
        i = 0
        for _, d, _single in tape.jk_requests:
            n = d.shape[0]
            tape.jk_results.append((vj[i:i + n], vk[i:i + n]))
            i += n
    timings["jk_pass"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    eri_contrib = _dense_eri_pass(mol, tape.dm2_by_quantity, len(quantities))
    timings["eri_pass"] = time.perf_counter() - t0

    # 4. replay with the real J/K results, add the dense two-electron parts
    t0 = time.perf_counter()
    tape.mode = "replay"
    with _intercept(tape, mc._scf):
        des = run_responses()
    if tape.jk_cursor != len(tape.jk_requests):
        raise RuntimeError("one-pass replay diverged from the recorded call sequence (J/K call count)")
    timings["replay"] = time.perf_counter() - t0

    grads = np.zeros((nstates, natm, 3))
    nacs = np.zeros((nstates, nstates, natm, 3))
    gconv, nconv = True, True
    for iq, (kind, label, _obj, _extra) in enumerate(quantities):
        de = des[iq] + eri_contrib[iq]
        if kind == "grad":
            grads[label] = de
            gconv = gconv and conv[iq]
        else:
            a, b = label
            # PySCF NonAdiabaticCouplings.kernel: state=(a, b) gives <a|grad b> after dividing
            # the Lagrangian derivative by E_b - E_a.
            d = de / (e_states[b] - e_states[a])
            nacs[a, b] = d
            nacs[b, a] = -d
            nconv = nconv and conv[iq]
    # nuclear repulsion: PySCF's SA-CASSCF gradient kernel adds it through get_ham_response
    # (casscf Gradients.kernel includes grad_nuc); NAC vectors have none.
    return grads, nacs, {"gradients_converged": gconv, "couplings_converged": nconv, "timings": timings}
