"""Steady-state ensemble throughput on 1, 2 and 4 Dask workers (LocalCluster on 127.0.0.1).

Study: ``inputs/methaniminium_demo.toml`` (CH2NH2+, SA2-CASSCF(2,2)/STO-3G, a scenario of our own)
with 8 trajectories of equal length (``--duration``, default 4 fs = 16 steps of 0.25 fs).  Start-up is excluded:
initial conditions are computed once and copied into each run folder, the cluster is started and
every worker is warmed (imports, the study opened, the backend built and run once at a sampled
geometry) before the clock starts.  The clock covers ``run_ensemble`` only: the same runner and
task code as local processes.  Throughput = trajectory-steps / wall time; the speedup is the ratio
of the throughputs measured side by side in this run; the parallel efficiency divides it by the
number of cores the workers can use, min(workers, cores): more workers than cores (4 on a 2-core
machine) is oversubscription and measures its overhead, not extra parallelism.

Run:  OMP_NUM_THREADS=1 python tests/bench/bench_ensemble_scaling.py [--trajectories 8] [--duration "4 fs"] [--workers 1,2,4]
Last line: ``two_worker_speedup: <ratio>``.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
STUDY = os.path.join(HERE, os.pardir, os.pardir, "inputs", "methaniminium_demo.toml")


def warm_worker(study_dir: str) -> float:
    """Runs inside each worker: open the study, build its backend (cached per process), one call."""
    t0 = time.perf_counter()
    from mapdyn.study import runner as ensemble
    from mapdyn.study.initial_conditions import initial_row

    study = ensemble._open(study_dir)
    backend = ensemble._backend_for(study)
    backend.compute(initial_row(study, 0)[0], None, True)
    return time.perf_counter() - t0


def run_once(template: str, workdir: str, workers: int) -> dict:
    from mapdyn.study.cluster import local_cluster_executor
    from mapdyn.study.folder import Study
    from mapdyn.study.runner import run_ensemble

    folder = os.path.join(workdir, f"run_{workers}w")
    shutil.copytree(template, folder)
    study = Study(folder)
    executor = local_cluster_executor(workers)
    try:
        warm = executor.client.run(warm_worker, folder)
        load_before = os.getloadavg()[0]
        t0 = time.perf_counter()
        summary = run_ensemble(study, executor)
        wall = time.perf_counter() - t0
        load_after = os.getloadavg()[0]
    finally:
        executor.shutdown()
    task_seconds = sorted(r.seconds for r in summary.results)
    return {"workers": workers, "wall": wall, "steps": summary.steps, "finished": summary.finished,
            "failed": summary.failed, "throughput": summary.steps / wall, "warm": max(warm.values()),
            "task_min": task_seconds[0], "task_max": task_seconds[-1], "load": (load_before, load_after)}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trajectories", type=int, default=8)
    parser.add_argument("--duration", default="4 fs")
    parser.add_argument("--workers", default="1,2,4", help="comma-separated worker counts; must include 1 and 2")
    args = parser.parse_args(argv)
    counts = sorted({int(w) for w in args.workers.split(",")})
    if 1 not in counts or 2 not in counts:
        parser.error(f"--workers {args.workers}: must include 1 and 2")
    os.environ.update({"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"})
    from mapdyn.study.config import load_study_config, parse_duration
    from mapdyn.study.folder import Study
    from mapdyn.study.initial_conditions import prepare_initial_conditions

    cfg = load_study_config(STUDY)
    cfg = cfg.with_overrides(trajectories=args.trajectories, duration_au=parse_duration(args.duration, "--duration"))
    workdir = tempfile.mkdtemp(prefix="mapdyn_scaling_")
    try:
        template = os.path.join(workdir, "template")
        study = Study.create(cfg, template)
        t0 = time.perf_counter()
        prepare_initial_conditions(study)
        print(f"study: {cfg.name} ({cfg.electronic.level_of_theory}), {study.ntraj} trajectories x "
              f"{study.nsteps} steps; initial conditions {time.perf_counter() - t0:.1f} s (not timed below)")
        print(f"machine: {os.cpu_count()} cores")
        results = [run_once(template, workdir, w) for w in counts]
        cores = os.cpu_count() or 1
        base = results[0]["throughput"]
        for r in results:
            speedup = r["throughput"] / base
            usable = min(r["workers"], cores)
            print(f"{r['workers']} worker(s): {r['finished']} finished, {r['failed']} failed, {r['steps']} steps in "
                  f"{r['wall']:.2f} s -> {r['throughput']:.3f} steps/s = "
                  f"{r['throughput'] * 3600 / study.nsteps:.0f} trajectories/hour; speedup {speedup:.2f}, "
                  f"parallel efficiency {speedup / usable:.2f} on {usable} core(s)"
                  + (" (oversubscribed)" if r["workers"] > cores else "")
                  + f"; task times {r['task_min']:.2f}-{r['task_max']:.2f} s; warm-up {r['warm']:.2f} s (excluded); "
                  f"load average {r['load'][0]:.1f} -> {r['load'][1]:.1f}")
        if any(r["failed"] or r["steps"] != study.ntraj * study.nsteps for r in results):
            print("warning: not every trajectory ran its full length; the ratio compares unequal work")
        ratio = results[counts.index(2)]["throughput"] / base
        print(f"two_worker_speedup: {ratio:.3f}")
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
