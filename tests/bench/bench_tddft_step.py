"""Per-step cost of the TDA/TDDFT backend, one thread: cold vs warm step and where the time goes.

Run: OMP_NUM_THREADS=1 python tests/bench/bench_tddft_step.py
Prints, for each case, the cold-step and mean warm-step wall times (s), their ratio, and the
fraction of a warm step spent in SCF, Davidson, overlaps and gradients (all states).
"""

from __future__ import annotations

import time

import numpy as np
from ase import units
from ase.build import molecule

from mapdyn.backends.pyscf.tddft import TDDFTBackend

CASES = [("H2O", "6-31g", None, "tda"), ("H2CO", "6-31g", None, "tda"),
         ("H2CO", "6-31g", "pbe0", "tda"), ("H2CO", "6-31g", "pbe0", "tddft")]


def main(nstates: int = 3, nsteps: int = 3) -> None:
    rng = np.random.default_rng(1)
    for name, basis, xc, method in CASES:
        atoms = molecule(name)
        r0 = atoms.get_positions() / units.Bohr
        step = rng.normal(size=r0.shape) * 0.01          # Bohr per step
        backend = TDDFTBackend(atoms.get_chemical_symbols(), basis=basis, xc=xc, method=method,
                               nstates=nstates)
        t0 = time.perf_counter()
        res = backend.compute(r0)
        cold = time.perf_counter() - t0
        warm, parts = [], []
        for n in range(1, nsteps + 1):
            t0 = time.perf_counter()
            res = backend.compute(r0 + n * step, guess=res.guess)
            warm.append(time.perf_counter() - t0)
            parts.append(res.diagnostics["timings"])
        mean = float(np.mean(warm))
        share = {k: np.mean([p[k] for p in parts]) / mean for k in parts[0]}
        print(f"{name}/{basis} {xc or 'HF'} {method} F={nstates}: cold {cold:.2f} s, warm {mean:.2f} s, "
              f"warm/cold {mean / cold:.2f}; shares " + ", ".join(f"{k} {v:.0%}" for k, v in share.items()))


if __name__ == "__main__":
    main()
