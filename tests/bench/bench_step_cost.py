"""Per-step cost of the SA-CASSCF backend: the mapping force in one solve vs one plain state gradient.

Run:  OMP_NUM_THREADS=1 python tests/bench/bench_step_cost.py
Everything is measured side by side in this run, one thread, best of ``REPEAT`` repetitions (the
machine may be shared).  Cases: CH2NH2+ /6-31G at a distorted geometry, SA2- and SA3-CAS(2,2)
and SA4-CAS(4,3) (CAS(2,2) has only three singlets); one MD-like step of 0.02 Bohr rms
displacement, warm-started.  The backend step of the two-phase path is phase one (warm SA-CASSCF,
overlaps, dipoles) plus phase two (the forces of the two kicks at that geometry, closing and
opening, i.e. two weight matrices); it is given in units of one plain PySCF state gradient
(``mc.nuc_grad_method().kernel(state=0)``) of the same wavefunction.  For comparison the old step
(all gradients and NAC vectors in one derivative pass, contracted by the driver) and the cost of a
dense Lagrange matrix (one operator product per unknown) are printed.  Then the absolute seconds
per step of ethylene SA2-CASSCF(2,2)/STO-3G, from a geometry distorted by 0.05 Bohr rms (at the
exactly planar geometry a warm step has a smallest state overlap ~0.2 and the backend re-solves
it, overlap retry; that single step is timed once as well).  Last line:
``step_cost_in_gradients_max: <largest two-phase step over the three CH2NH2+ cases>``.
"""

from __future__ import annotations

import os

os.environ["OMP_NUM_THREADS"] = "1"

import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402

from mapdyn.backends.contract import contract_force  # noqa: E402
from mapdyn.backends.pyscf.casscf import CASSCFBackend  # noqa: E402

REPEAT = 3
ANGSTROM = 1.0 / 0.52917721092
CH2NH2_POS = np.array([[0.0, 0.0, 0.0], [0.05, 0.1, 1.30], [0.95, 0.1, -0.55], [-0.9, -0.2, -0.6],
                       [0.85, 0.2, 1.85], [-0.8, 0.05, 1.9]]) * ANGSTROM
SYMBOLS = ["C", "N", "H", "H", "H", "H"]
ETHYLENE_POS = np.array([[0.0, 0.0, 0.6695], [0.0, 0.0, -0.6695], [0.0, 0.9289, 1.2321],
                         [0.0, -0.9289, 1.2321], [0.0, 0.9289, -1.2321], [0.0, -0.9289, -1.2321]]) * ANGSTROM


def best(func, repeat=REPEAT):
    times, out = [], None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = func()
        times.append(time.perf_counter() - t0)
    return min(times), out


def converged_mc(backend, pos):
    """A converged SA-CASSCF solver at ``pos`` (plain cold start, kept for older callers)."""
    mol = backend._build_mol(pos)
    mf = backend._run_scf(mol)
    mc = backend._make_mc(mf)
    backend._solve_casscf(mc, mf.mo_coeff)
    assert mc.converged
    return mc


def kick_weights(nstates: int, seed: int = 2026) -> np.ndarray:
    """Two symmetric weight matrices (closing and opening kick) of a mapping state in the SQC
    triangle-window style: populations near (γ, …, 1 + γ, …) with coherences of size ~0.3."""
    rng = np.random.default_rng(seed)
    w = 0.3 * rng.normal(size=(2, nstates, nstates))
    w = 0.5 * (w + w.transpose(0, 2, 1))
    for m in range(2):
        np.fill_diagonal(w[m], 0.0)
        w[m][1, 1] = 1.0
    return w


def dense_lagrange_estimate(mc, n_products: int = 20) -> tuple[int, float]:
    """(unknowns, seconds of one Lagrange operator product): a dense Lagrange matrix needs one
    product per unknown (the iterative solver needs ~20-30 per solve)."""
    g = mc.nuc_grad_method()
    g.verbose = 0
    eris = mc.ao2mo(mc.mo_coeff)
    aop, _ = g.get_Aop_Adiag(state=0, atmlst=list(range(mc.mol.natm)), verbose=0, mo=mc.mo_coeff, ci=mc.ci,
                             eris=eris)
    x = np.random.default_rng(0).normal(size=g.nlag)
    t, _ = best(lambda: [aop(x) for _ in range(n_products)], repeat=1)
    return g.nlag, t / n_products


def run_case(symbols, pos, basis, ncas, nelecas, nstates, charge, label, gradient_reference=True) -> dict:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        backend = CASSCFBackend(symbols, basis=basis, ncas=ncas, nelecas=nelecas, nstates=nstates, charge=charge)
        ref = backend.compute(pos, need_gradients=False)
        mc = backend._wavefunction(ref.guess)[0]
        t_grad = np.nan
        if gradient_reference:
            def one_gradient():
                g = mc.nuc_grad_method()
                g.verbose = 0
                return g.kernel(state=0)

            t_grad, _ = best(one_gradient)
        new = pos + np.random.default_rng(2026).normal(scale=0.02, size=pos.shape)
        w = kick_weights(nstates)

        def two_phase():
            r = backend.compute(new, guess=ref.guess, need_gradients=False)
            return r, backend.force(r, w)

        t_new, (res, forces) = best(two_phase)
        t_old, old = best(lambda: backend.compute(new, guess=ref.guess, need_gradients=True))
        diff = float(np.max(np.abs(forces - contract_force(old.energies, old.gradients, old.couplings, w))))
        nlag, t_aop = dense_lagrange_estimate(mc)
    tm = res.diagnostics["timings"]
    retry = res.diagnostics.get("overlap_retry", {}).get("kept")
    parts = ", ".join(f"{k} {v:.3f}" for k, v in tm["force_parts"].items())
    print(f"== {label}: {nstates} states, 1 thread, best of {REPEAT}")
    if gradient_reference:
        print(f"  one plain state gradient                   {t_grad:7.3f} s")
    print(f"  two-phase step (phase one + two kicks)     {t_new:7.3f} s"
          + (f"  ({t_new / t_grad:.2f} gradients)" if gradient_reference else ""))
    print(f"    phase one {tm['total']:.3f} s (min overlap {res.diagnostics['min_overlap']:.2f}"
          + (f", overlap retry: {retry}" if retry else "") + f"); phase two {tm['force']:.3f} s [{parts}]")
    print(f"  old step (all gradients+NACs, one pass)    {t_old:7.3f} s"
          + (f"  ({t_old / t_grad:.2f} gradients)" if gradient_reference else ""))
    print(f"    max |two-phase force - contracted gradients/NACs| {diff:.1e} Eh/Bohr (Lagrange tolerance 1e-7 rel.)")
    print(f"  dense Lagrange matrix: {nlag} unknowns x {t_aop * 1e3:.1f} ms per operator product = "
          f"{nlag * t_aop:.3f} s, vs {tm['force_parts']['lagrange']:.3f} s for both iterative solves: iterative kept")
    return {"label": label, "t_grad": t_grad, "t_new": t_new, "t_old": t_old}


def main() -> None:
    cases = [run_case(SYMBOLS, CH2NH2_POS, "6-31g", 2, 2, 2, 1, "CH2NH2+ SA2-CAS(2,2)/6-31G"),
             run_case(SYMBOLS, CH2NH2_POS, "6-31g", 2, 2, 3, 1, "CH2NH2+ SA3-CAS(2,2)/6-31G"),
             run_case(SYMBOLS, CH2NH2_POS, "6-31g", 3, 4, 4, 1, "CH2NH2+ SA4-CAS(4,3)/6-31G")]
    ethylene = ["C", "C", "H", "H", "H", "H"]
    distorted = ETHYLENE_POS + np.random.default_rng(1).normal(scale=0.05, size=ETHYLENE_POS.shape)
    demo = run_case(ethylene, distorted, "sto-3g", 2, 2, 2, 0, "ethylene SA2-CAS(2,2)/STO-3G", gradient_reference=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        b = CASSCFBackend(ethylene, basis="sto-3g", ncas=2, nelecas=2, nstates=2)
        ref = b.compute(ETHYLENE_POS, need_gradients=False)
        step = ETHYLENE_POS + np.random.default_rng(2026).normal(scale=0.02, size=ETHYLENE_POS.shape)
        t_planar, r = best(lambda: b.compute(step, guess=ref.guess, need_gradients=False), repeat=1)
    print(f"  ethylene from the exactly planar geometry: phase one {t_planar:.3f} s (min overlap "
          f"{r.diagnostics['min_overlap']:.2f}, overlap retry: {r.diagnostics.get('overlap_retry', {}).get('kept')})")
    for r in cases:
        print(f"ratio {r['label']}: two-phase step {r['t_new'] / r['t_grad']:.2f}, "
              f"old one-pass step {r['t_old'] / r['t_grad']:.2f} (in plain state gradients)")
    print(f"seconds per step, {demo['label']}: two-phase {demo['t_new']:.3f} s, old one-pass {demo['t_old']:.3f} s")
    print(f"step_cost_in_gradients_max: {max(r['t_new'] / r['t_grad'] for r in cases):.2f}")


if __name__ == "__main__":
    main()
