"""Batched versus per-trajectory propagation of a 2-state, 100-mode spin-boson ensemble.

Same physics both ways: SQC (triangle windows, symmetrized), Debye bath (λ = 0.25, ω_c = 1, Δ = 1,
ε = 0, β = 1; model units), thermal Wigner bath at Q⁰ = 0, the harmonic-bath integrator at
dt = 0.05/ω_c.  Batched: ``--ntraj`` trajectories in chunks of ``--chunk`` spread over ``--workers``
processes, ``--nsteps`` steps.  Loop: the same integrator stepping one trajectory at a time in
Python, run for ``--loop-traj`` trajectories × ``--loop-steps`` steps and extrapolated (the loop
cost per trajectory·step is constant); the loop is credited with perfect scaling over the same
number of workers, so the speed-up is per core.  The loop results are checked against the batched
run of the same trajectories.

Prints trajectory·steps per second and peak memory (max resident set size of any process); the
line before last is ``batched_throughput: <trajectory·steps per second>`` and the last line
``batched_speedup: <ratio>``.

    python tests/bench/bench_batched_models.py [--ntraj 10000 --nsteps 1000 --workers 2]
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import resource  # noqa: E402
import time  # noqa: E402
from concurrent.futures import ProcessPoolExecutor  # noqa: E402

import numpy as np  # noqa: E402

from mapdyn.core.harmonic_bath import HarmonicBathIntegrator  # noqa: E402
from mapdyn.core.options import MethodOptions  # noqa: E402
from mapdyn.core.sampling import EnsembleState  # noqa: E402
from mapdyn.core.windows import window_indicators  # noqa: E402
from mapdyn.models.spin_boson import SpinBoson, thermal_bath_ensemble  # noqa: E402

OPTIONS = MethodOptions(window="triangle")
DT = 0.05
SEED = 2024


def make_model(nmodes: int) -> SpinBoson:
    return SpinBoson.debye(0.0, 1.0, 0.25, 1.0, nmodes)


def propagate_chunk(args):
    """Worker: sample trajectories [first, first + n) and propagate them; returns counts and timings."""
    nmodes, first, n, nsteps = args
    model = make_model(nmodes)
    state = thermal_bath_ensemble(model, n, SEED, 1.0, 0, OPTIONS, first_index=first)
    integ = HarmonicBathIntegrator(model, OPTIONS, DT)
    t0 = time.perf_counter()
    for _ in range(nsteps):
        integ.step(state)
    elapsed = time.perf_counter() - t0
    e = 0.5 * (state.x ** 2 + state.p ** 2)
    counts = window_indicators(e, OPTIONS).sum(axis=0)
    rss_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return counts, elapsed, rss_kb


def loop_run(model, state, nsteps):
    """The same physics, one trajectory at a time (n = 1 batches) in a Python loop."""
    integ = HarmonicBathIntegrator(model, OPTIONS, DT)
    finals = []
    for i in range(state.ntraj):
        one = EnsembleState(state.R[i:i + 1].copy(), state.P[i:i + 1].copy(),
                            state.x[i:i + 1].copy(), state.p[i:i + 1].copy())
        for _ in range(nsteps):
            integ.step(one)
        finals.append(one)
    return finals


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ntraj", type=int, default=10000)
    ap.add_argument("--nsteps", type=int, default=1000)
    ap.add_argument("--nmodes", type=int, default=100)
    ap.add_argument("--chunk", type=int, default=500)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--loop-traj", type=int, default=20)
    ap.add_argument("--loop-steps", type=int, default=100)
    a = ap.parse_args()
    for name in ("ntraj", "nsteps", "nmodes", "chunk", "workers", "loop_traj", "loop_steps"):
        if getattr(a, name) < 1:
            raise SystemExit(f"--{name.replace('_', '-')} must be a positive integer")
    model = make_model(a.nmodes)
    print(f"model: 2-state spin-boson, {a.nmodes} Debye modes (omega_max/omega_c = {model.frequencies.max():.1f}), "
          f"{OPTIONS.describe()}, dt = {DT} (omega_max*dt = {model.frequencies.max() * DT:.2f})")

    # ---- per-trajectory loop (subsample) and a check that it is the same physics
    sub = thermal_bath_ensemble(model, a.loop_traj, SEED, 1.0, 0, OPTIONS)
    t0 = time.perf_counter()
    finals = loop_run(model, sub, a.loop_steps)
    loop_seconds = time.perf_counter() - t0
    loop_rate = a.loop_traj * a.loop_steps / loop_seconds
    check = sub.copy()
    integ = HarmonicBathIntegrator(model, OPTIONS, DT)
    for _ in range(a.loop_steps):
        integ.step(check)
    diff = max(np.abs(np.vstack([f.R for f in finals]) - check.R).max(),
               np.abs(np.vstack([f.x for f in finals]) - check.x).max())
    print(f"loop: {a.loop_traj} trajectories x {a.loop_steps} steps in {loop_seconds:.2f} s "
          f"-> {loop_rate:.4g} trajectory*steps/s per core; max |loop - batched| = {diff:.1e}")

    # ---- batched, chunks over worker processes
    tasks = [(a.nmodes, first, min(a.chunk, a.ntraj - first), a.nsteps) for first in range(0, a.ntraj, a.chunk)]
    t0 = time.perf_counter()
    with ProcessPoolExecutor(a.workers) as ex:
        results = list(ex.map(propagate_chunk, tasks))
    wall = time.perf_counter() - t0
    counts = np.sum([r[0] for r in results], axis=0)
    busy = sum(r[1] for r in results)
    rss_mb = max([r[2] for r in results] + [resource.getrusage(resource.RUSAGE_SELF).ru_maxrss]) / 1024
    work = a.ntraj * a.nsteps
    throughput = work / wall
    print(f"batched: {a.ntraj} trajectories x {a.nsteps} steps, chunks of {a.chunk} on {a.workers} processes: "
          f"wall {wall:.2f} s (sampling included; propagation {busy:.2f} s summed over chunks, "
          f"{work / busy:.4g} trajectory*steps/s per core)")
    pops = counts / counts.sum()
    print(f"final SQC populations {np.round(pops, 3).tolist()} ({a.ntraj - int(counts.sum())} in no window)")
    print(f"peak memory (max resident set of any process): {rss_mb:.0f} MB")
    loop_total = work / (loop_rate * a.workers)
    print(f"loop extrapolated to the full ensemble on {a.workers} cores: {loop_total:.0f} s")
    print(f"batched_throughput: {throughput:.4g}")
    print(f"batched_speedup: {loop_total / wall:.1f}")


if __name__ == "__main__":
    main()
