"""Per-step cost of the SA-CASSCF backend: plain PySCF calls vs the one-pass gradient/NAC path.

Run:  OMP_NUM_THREADS=1 python tests/bench/bench_step_cost.py
Everything is measured side by side in this run, one thread, best of ``REPEAT`` repetitions (the
machine may be shared).  Cases: CH2NH2+ SA2-CAS(2,2)/6-31G and CH2NH2+ SA3-CAS(2,2)/6-31G at a
distorted geometry; one MD-like step of 0.02 Bohr rms displacement for the warm start.
The last line is ``step_cost_in_gradients: <one-pass backend step / one plain state gradient>``.
"""

from __future__ import annotations

import os

os.environ["OMP_NUM_THREADS"] = "1"

import time  # noqa: E402

import numpy as np  # noqa: E402

from mapdyn.backends.pyscf.casscf import CASSCFBackend  # noqa: E402
from mapdyn.backends.pyscf.casscf_one_pass import one_pass_gradients_and_couplings  # noqa: E402

REPEAT = 3
ANGSTROM = 1.0 / 0.52917721092
CH2NH2_POS = np.array([[0.0, 0.0, 0.0], [0.05, 0.1, 1.30], [0.95, 0.1, -0.55], [-0.9, -0.2, -0.6],
                       [0.85, 0.2, 1.85], [-0.8, 0.05, 1.9]]) * ANGSTROM
SYMBOLS = ["C", "N", "H", "H", "H", "H"]


def best(func, repeat=REPEAT):
    times, out = [], None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = func()
        times.append(time.perf_counter() - t0)
    return min(times), out


def converged_mc(backend, pos):
    mol = backend._build_mol(pos)
    mf = backend._run_scf(mol)
    mc = backend._make_mc(mf)
    backend._solve_casscf(mc, mf.mo_coeff)
    assert mc.converged
    return mc


def run_case(nstates: int) -> dict:
    label = f"CH2NH2+ SA{nstates}-CAS(2,2)/6-31G"
    plain = CASSCFBackend(SYMBOLS, basis="6-31g", ncas=2, nelecas=2, nstates=nstates, charge=1,
                          gradient_method="plain")
    fast = CASSCFBackend(SYMBOLS, basis="6-31g", ncas=2, nelecas=2, nstates=nstates, charge=1,
                         gradient_method="one_pass")
    mc = converged_mc(plain, CH2NH2_POS)

    def one_gradient():
        g = mc.nuc_grad_method()
        g.verbose = 0
        return g.kernel(state=0)

    def one_nac():
        n = mc.nac_method()
        n.verbose = 0
        return n.kernel(state=(0, 1))

    t_grad, _ = best(one_gradient)
    t_nac, _ = best(one_nac)
    t_plain_all, (g_p, d_p, _) = best(lambda: plain._gradients_and_couplings(mc, {}))
    t_fast_all, (g_f, d_f, info) = best(lambda: one_pass_gradients_and_couplings(mc))
    diff_g = float(np.max(np.abs(g_f - g_p)))
    diff_d = float(np.max(np.abs(d_f - d_p)))

    # warm vs cold CASSCF and whole backend steps
    ref = fast.compute(CH2NH2_POS, need_gradients=False)
    rng = np.random.default_rng(2026)
    new = CH2NH2_POS + rng.normal(scale=0.02, size=CH2NH2_POS.shape)
    t_cold, cold = best(lambda: fast.compute(new, need_gradients=False))
    t_warm, warm = best(lambda: fast.compute(new, guess=ref.guess, need_gradients=False))
    t_step_plain, step_plain = best(lambda: plain.compute(new, guess=ref.guess))
    t_step_fast, step_fast = best(lambda: fast.compute(new, guess=ref.guess))

    npairs = nstates * (nstates - 1) // 2
    print(f"== {label}: {nstates} gradients + {npairs} NAC vector(s), 1 thread, best of {REPEAT}")
    print(f"  one plain state gradient            {t_grad:7.3f} s")
    print(f"  one plain NAC vector                {t_nac:7.3f} s")
    print(f"  all gradients+NACs, plain           {t_plain_all:7.3f} s  ({t_plain_all / t_grad:.2f} gradients)")
    print(f"  all gradients+NACs, one pass        {t_fast_all:7.3f} s  ({t_fast_all / t_grad:.2f} gradients)")
    print("    one-pass parts: " + ", ".join(f"{k} {v:.3f}" for k, v in info["timings"].items()))
    print(f"    max |one-pass - plain|: gradients {diff_g:.1e} Eh/Bohr, NACs {diff_d:.1e} 1/Bohr")
    print(f"  CASSCF cold (SCF + SA-CASSCF)       {t_cold:7.3f} s, {cold.diagnostics['macro_iterations']} macro-iterations")
    print(f"  CASSCF warm (Löwdin MOs + CI)       {t_warm:7.3f} s, {warm.diagnostics['macro_iterations']} macro-iterations"
          f"  |dE| vs cold {np.max(np.abs(warm.energies - cold.energies)):.1e} Eh")
    for name, t, res in (("plain", t_step_plain, step_plain), ("one pass", t_step_fast, step_fast)):
        parts = ", ".join(f"{k} {v:.3f}" for k, v in res.diagnostics["timings"].items())
        print(f"  backend step ({name:8s})            {t:7.3f} s  ({t / t_grad:.2f} gradients)  [{parts}]")
    return {"label": label, "t_grad": t_grad, "t_step_fast": t_step_fast, "t_step_plain": t_step_plain}


def main() -> None:
    results = [run_case(2), run_case(3)]
    for r in results:
        print(f"ratio {r['label']}: plain step {r['t_step_plain'] / r['t_grad']:.2f}, "
              f"one-pass step {r['t_step_fast'] / r['t_grad']:.2f} (in plain state gradients)")
    main_case = results[0]
    print(f"step_cost_in_gradients: {main_case['t_step_fast'] / main_case['t_grad']:.2f}")


if __name__ == "__main__":
    main()
