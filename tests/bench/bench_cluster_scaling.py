"""Ensemble throughput on 1, 2 and 4 Dask workers, with the scheduler and checkpoint overheads.

Study: ``inputs/ethylene_tiny.toml`` (SA2-CASSCF(2,2)/STO-3G ethylene, a scenario of our own)
with ``--trajectories`` trajectories (default 4) of ``--duration`` (default 4 fs = 8 steps of
0.5 fs) and a checkpoint every ``--checkpoint-every`` steps (default 2).  Measured side by side in
this run, on the same initial conditions (computed once, not timed):

* throughput on a Dask LocalCluster (127.0.0.1, one thread per worker) of 1, 2 and 4 worker
  processes.  **4 workers oversubscribe a 2-core machine** (two processes per core): that row
  shows what happens when more workers than cores are started, not a 4-core speed-up.  Workers are
  warmed (imports, backend built and run once) before the clock starts; the clock covers
  ``run_ensemble`` only.  Trajectories per hour = finished trajectories / wall time x 3600 (of this
  study's length); parallel efficiency E_N = throughput_N / (N x throughput_1), and, for N above
  the core count, also per core: throughput_N / (cores x throughput_1);
* scheduler latency: round trip of a no-op task (submit -> result) on the 2-worker cluster, median
  of 50, compared with the mean task time;
* checkpoint writes: every ``TrajectoryStore.commit`` in the workers is timed and the files it
  creates or replaces in the trajectory folder counted with their sizes (HDF5 frame chunk, restart
  state; atomic write = temporary file + rename + fsync); also the files and bytes each finished
  trajectory folder holds.

Run:  OMP_NUM_THREADS=1 python tests/bench/bench_cluster_scaling.py [--trajectories 4] [--duration "4 fs"] [--checkpoint-every 2]
Last line: ``two_worker_parallel_efficiency: <E_2>``.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import statistics
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
STUDY = os.path.join(HERE, os.pardir, os.pardir, "inputs", "ethylene_tiny.toml")

def _snapshot(folder: str) -> dict:
    out = {}
    try:
        for entry in os.scandir(folder):
            if entry.is_file():
                st = entry.stat()
                out[entry.name] = (st.st_ino, st.st_mtime_ns, st.st_size)
    except FileNotFoundError:
        pass
    return out


def install_commit_probe() -> int:
    """Runs in each worker: wrap TrajectoryStore.commit to time it and count the files it writes."""
    from mapdyn.study.checkpoint import TrajectoryStore

    if getattr(TrajectoryStore.commit, "_probe", False):
        return os.getpid()
    original = TrajectoryStore.commit

    def commit(self, *args, **kwargs):
        before = _snapshot(self.folder)
        t0 = time.perf_counter()
        out = original(self, *args, **kwargs)
        seconds = time.perf_counter() - t0
        after = _snapshot(self.folder)
        changed = {n: v for n, v in after.items() if before.get(n) != v}
        # a rename keeps size and modification time: state.h5 -> state_previous.h5 is not a write
        kept = {(v[1], v[2]) for v in before.values()}
        renamed = [n for n, v in changed.items() if (v[1], v[2]) in kept]
        new = [n for n in changed if n not in renamed]
        commit._records.append((seconds, len(new), sum(changed[n][2] for n in new), len(renamed)))
        return out

    commit._probe = True  # type: ignore[attr-defined]
    commit._records = []  # type: ignore[attr-defined]  # kept on the class: lives as long as the worker
    TrajectoryStore.commit = commit
    return os.getpid()


def read_commit_probe() -> list:
    from mapdyn.study.checkpoint import TrajectoryStore

    return list(getattr(TrajectoryStore.commit, "_records", []))


def warm_worker(study_dir: str) -> float:
    """Runs in each worker: open the study, build its backend (cached per process), one call."""
    t0 = time.perf_counter()
    from mapdyn.study import runner as ensemble
    from mapdyn.study.initial_conditions import initial_row

    study = ensemble._open(study_dir)
    backend = ensemble._backend_for(study)
    backend.compute(initial_row(study, 0)[0], None, True)
    return time.perf_counter() - t0


def _noop() -> int:
    return 0


def run_once(template: str, workdir: str, workers: int, latency: bool) -> dict:
    from mapdyn.study.cluster import local_cluster_executor
    from mapdyn.study.folder import Study
    from mapdyn.study.runner import run_ensemble

    folder = os.path.join(workdir, f"run_{workers}w")
    shutil.copytree(template, folder)
    study = Study(folder)
    executor = local_cluster_executor(workers)
    out: dict = {"workers": workers}
    try:
        executor.client.run(install_commit_probe)
        warm = executor.client.run(warm_worker, folder)
        if latency:
            trips = []
            for _ in range(50):
                t0 = time.perf_counter()
                executor.submit(_noop).result(timeout=60)
                trips.append(time.perf_counter() - t0)
            out["latency"] = statistics.median(trips)
        load_before = os.getloadavg()[0]
        t0 = time.perf_counter()
        summary = run_ensemble(study, executor)
        wall = time.perf_counter() - t0
        load_after = os.getloadavg()[0]
        commits = [c for per in executor.client.run(read_commit_probe).values() for c in per]
    finally:
        executor.shutdown()
    task_seconds = [r.seconds for r in summary.results]
    out.update(wall=wall, steps=summary.steps, finished=summary.finished, failed=summary.failed,
               throughput=summary.steps / wall, traj_per_hour=summary.finished / wall * 3600.0,
               warm=max(warm.values()), task_mean=statistics.mean(task_seconds), load=(load_before, load_after),
               commits=commits, folder=folder)
    return out


def _folder_usage(study_folder: str) -> tuple[list[int], list[int]]:
    from mapdyn.study.folder import Study

    study = Study(study_folder)
    files, sizes = [], []
    for i in range(study.ntraj):
        names = [e for e in os.scandir(study.trajectory_folder(i)) if e.is_file()]
        files.append(len(names))
        sizes.append(sum(e.stat().st_size for e in names))
    return files, sizes


def study_text(trajectories: int, duration: str, checkpoint_every: int) -> str:
    with open(STUDY) as fh:
        text = fh.read()
    for key, value in (("trajectories", str(trajectories)), ("duration", f'"{duration}"'),
                       ("checkpoint_every", str(checkpoint_every))):
        text, n = re.subn(rf"(?m)^{key} = .*$", f"{key} = {value}", text)
        assert n == 1, key
    return text


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trajectories", type=int, default=4)
    parser.add_argument("--duration", default="4 fs")
    parser.add_argument("--checkpoint-every", type=int, default=2)
    args = parser.parse_args(argv)
    os.environ.update({"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"})
    from mapdyn.study.config import load_study_config
    from mapdyn.study.folder import Study
    from mapdyn.study.initial_conditions import prepare_initial_conditions

    workdir = tempfile.mkdtemp(prefix="mapdyn_cluster_scaling_")
    try:
        path = os.path.join(workdir, "study.toml")
        with open(path, "w") as fh:
            fh.write(study_text(args.trajectories, args.duration, args.checkpoint_every))
        cfg = load_study_config(path)
        template = os.path.join(workdir, "template")
        study = Study.create(cfg, template)
        t0 = time.perf_counter()
        prepare_initial_conditions(study)
        cores = os.cpu_count() or 1
        print(f"study: {cfg.name} ({cfg.electronic.level_of_theory}), {study.ntraj} trajectories x {study.nsteps} steps, "
              f"checkpoint every {args.checkpoint_every} steps; initial conditions {time.perf_counter() - t0:.1f} s "
              f"(not timed below)")
        print(f"machine: {cores} cores; 4 workers are {'oversubscribed' if cores < 4 else 'not oversubscribed'} "
              f"({4 / cores:.1f} processes per core)")
        results = [run_once(template, workdir, w, latency=(w == 2)) for w in (1, 2, 4)]
        base = results[0]["throughput"]
        print(f"{'workers':>7} {'wall s':>8} {'steps/s':>8} {'traj/h':>8} {'E_N':>6} {'E/core':>7} {'s/step':>7}  load avg")
        for r in results:
            n = r["workers"]
            eff = r["throughput"] / (n * base)
            per_core = r["throughput"] / (min(n, cores) * base)
            print(f"{n:>7} {r['wall']:>8.2f} {r['throughput']:>8.3f} {r['traj_per_hour']:>8.0f} {eff:>6.2f} "
                  f"{per_core:>7.2f} {n / r['throughput']:>7.3f}  {r['load'][0]:.1f} -> {r['load'][1]:.1f}"
                  + ("   <- oversubscribed" if n > cores else ""))
        if any(r["failed"] or r["steps"] != study.ntraj * study.nsteps for r in results):
            print("warning: not every trajectory ran its full length; the rows compare unequal work")
        one = results[0]
        print(f"per-step cost on 1 worker (wall / steps, incl. checkpoints): {one['wall'] / one['steps']:.3f} s")
        two = results[1]
        print(f"scheduler latency (no-op task round trip, 2 workers, median of 50): {two['latency'] * 1e3:.1f} ms "
              f"= {two['latency'] / two['task_mean'] * 100:.2f} % of a mean task ({two['task_mean']:.2f} s)")
        commits = one["commits"]
        if commits:
            secs = sorted(c[0] for c in commits)
            files = statistics.mean(c[1] for c in commits)
            nbytes = statistics.mean(c[2] for c in commits)
            renames = statistics.mean(c[3] for c in commits)
            print(f"checkpoint commits (1 worker): {len(commits)}; per commit {files:.2f} files created "
                  f"({nbytes / 1e3:.1f} kB) + {renames:.2f} renamed; median {secs[len(secs) // 2] * 1e3:.1f} ms, "
                  f"max {secs[-1] * 1e3:.1f} ms = {sum(secs) / one['wall'] * 100:.1f} % of the wall time")
            per_traj = len(commits) / study.ntraj
            print(f"  per trajectory: {per_traj:.1f} commits (one at step 0, then every {args.checkpoint_every} steps)")
        files, sizes = _folder_usage(one["folder"])
        print(f"finished trajectory folder: {statistics.mean(files):.1f} files, {statistics.mean(sizes) / 1e3:.1f} kB "
              f"(mean over {len(files)})")
        print(f"two_worker_parallel_efficiency: {results[1]['throughput'] / (2 * base):.3f}")
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
