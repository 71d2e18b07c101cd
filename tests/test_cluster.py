"""Dask scale-out: the executor factory, settings validation, worker loss.

The Dask tests start a LocalCluster bound to 127.0.0.1 (processes, 2 workers, 1 thread each).
Reference results come from the same task functions run in local processes
(``concurrent.futures.ProcessPoolExecutor``), so "identical" means bitwise equal arrays.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
import os
import signal
import sys
import time
import types

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")
import cloudpickle  # noqa: E402  (a dependency of distributed)

from mapdyn import cluster  # noqa: E402
from mapdyn.cluster import (ClusterError, ClusterSettings, DaskExecutor, cluster_executor,  # noqa: E402
                            cluster_settings, local_cluster_executor)

# Workers are fresh processes that cannot import this test module by name; ship its functions by value.
cloudpickle.register_pickle_by_value(sys.modules[__name__])


# ---------------------------------------------------------------------------------------------
# An idempotent trajectory task of the same shape as the runner's model-study task: a chunk of
# Tully-1 trajectories (own seeded streams), propagated, written atomically, result returned.
# ---------------------------------------------------------------------------------------------

def model_chunk_task(seed: int, chunk: int, chunk_size: int, nsteps: int, out_dir: str) -> np.ndarray:
    """Adiabatic SQC populations (T, 2) of trajectories chunk*size … (chunk+1)*size−1 (Tully 1)."""
    from mapdyn.options import MethodOptions
    from mapdyn.models.tully import tully_model
    from mapdyn.propagators import run_diabatic
    from mapdyn.sampling import gaussian_wavepacket_ensemble

    with open(os.path.join(out_dir, "starts.log"), "a") as log:  # one line per (re-)start of a task
        log.write(f"{chunk} {os.getpid()}\n")
    final = os.path.join(out_dir, f"chunk_{chunk:03d}.npy")
    if os.path.exists(final):  # idempotent: finished work is not redone
        return np.load(final)
    model = tully_model("tully1")
    options = MethodOptions(window="triangle")
    state = gaussian_wavepacket_ensemble(model, chunk_size, seed, position=-8.0, momentum=15.0,
                                         position_width=1.0, initial_state=0, options=options,
                                         first_index=chunk * chunk_size)
    run = run_diabatic(model, state, options, dt=2.0, nsteps=nsteps, record_every=nsteps // 4)
    pops, _ = run.populations("adiabatic")
    tmp = final + ".tmp.npy"
    with open(tmp, "wb") as fh:
        np.save(fh, pops)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, final)
    return pops


def _env_and_threads() -> tuple[str, int | None]:
    try:
        from threadpoolctl import threadpool_info

        blas = max((p.get("num_threads", 1) for p in threadpool_info()), default=None)
    except ImportError:
        blas = None
    return os.environ.get("OMP_NUM_THREADS", ""), blas


def _raise_once(marker: str) -> int:
    """Raise on the first call (marker file absent), succeed afterwards: a transient failure."""
    if not os.path.exists(marker):
        open(marker, "w").close()
        raise OSError("transient file-system hiccup")
    return 42


@pytest.fixture(scope="module")
def dask_executor():
    executor = local_cluster_executor(2)
    yield executor
    executor.shutdown()


def _reference(tmp_path, nchunks, **kw):
    ref_dir = tmp_path / "local"
    ref_dir.mkdir()
    ctx = multiprocessing.get_context("spawn")
    with cf.ProcessPoolExecutor(2, mp_context=ctx) as pool:
        futs = [pool.submit(model_chunk_task, 11, c, kw["chunk_size"], kw["nsteps"], str(ref_dir))
                for c in range(nchunks)]
        return [f.result() for f in futs]


# ---------------------------------------------------------------------------------------------
# Settings
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("section, message", [
    ({}, "exactly one of"),
    ({"scheduler": "tcp://a:1", "system": "slurm"}, "exactly one of"),
    ({"scheduler": "a:8786"}, "cluster.scheduler"),
    ({"system": "lsf"}, "cluster.system"),
    ({"system": "slurm", "worker": 4}, "did you mean 'workers'"),
    ({"system": "slurm", "workers": 0}, "cluster.workers"),
    ({"system": "slurm", "workers": 6, "workers_per_job": 4}, "multiple of"),
    ({"system": "pbs", "memory_per_worker": "lots"}, "cluster.memory_per_worker"),
    ({"system": "pbs", "walltime": "1 day"}, "cluster.walltime"),
    ({"system": "local", "queue": "short"}, "cluster.queue only applies"),
    ({"system": "slurm", "job_directives": "--exclusive"}, "cluster.job_directives"),
    ({"scheduler": "tcp://a:1", "connect_timeout": -1}, "cluster.connect_timeout"),
    ({"scheduler": "tcp://a:1", "task_retries": 1.5}, "cluster.task_retries"),
])
def test_bad_cluster_sections_name_the_key(section, message):
    with pytest.raises(ValueError, match=message) as info:
        cluster_settings(section)
    assert "\n" not in str(info.value)


def test_settings_and_command_line_override():
    s = cluster_settings({"system": "slurm", "workers": 8, "workers_per_job": 4, "memory_per_worker": "1.5GB",
                          "walltime": "12:00:00", "queue": "short", "job_directives": ["--exclusive"]})
    assert (s.system, s.workers, s.workers_per_job, s.memory_per_worker) == ("slurm", 8, 4, 1_500_000_000)
    assert s.job_directives == ("--exclusive",)
    over = cluster_settings({"system": "local", "workers": 3}, scheduler="tcp://10.0.0.5:8786")
    assert over.scheduler == "tcp://10.0.0.5:8786" and over.system is None
    with pytest.raises(ValueError, match="--scheduler"):
        cluster_settings(None, scheduler="10.0.0.5:8786")


def test_missing_jobqueue_is_a_one_line_error(monkeypatch):
    monkeypatch.setitem(sys.modules, "dask_jobqueue", None)  # makes `import dask_jobqueue` fail
    with pytest.raises(ClusterError, match=r"needs the package dask-jobqueue \(pip install dask-jobqueue\)") as info:
        cluster_executor({"system": "slurm", "workers": 2})
    assert "\n" not in str(info.value)


def test_jobqueue_arguments_give_one_thread_per_worker(monkeypatch):
    # dask-jobqueue is optional and not installed here; a recording stand-in checks what we ask of it.
    calls = {}

    class Recorder:
        def __init__(self, **kwargs):
            calls["kwargs"] = kwargs

        def scale(self, n=None, jobs=None):
            calls["scale"] = n

    fake = types.ModuleType("dask_jobqueue")
    fake.SLURMCluster = fake.PBSCluster = Recorder
    monkeypatch.setitem(sys.modules, "dask_jobqueue", fake)
    s = cluster_settings({"system": "pbs", "workers": 8, "workers_per_job": 4, "memory_per_worker": "2GB",
                          "queue": "batch", "account": "chem42"})
    cluster._jobqueue_cluster(s)
    kw = calls["kwargs"]
    assert kw["cores"] == kw["processes"] == 4          # 4 processes x 1 thread per job
    assert kw["memory"] == "7.45GiB"                    # 4 x 2 GB per job (dask.utils.format_bytes)
    assert "export OMP_NUM_THREADS=1" in kw["job_script_prologue"]
    assert (kw["queue"], kw["account"], calls["scale"]) == ("batch", "chem42", 8)


def test_unreachable_scheduler_is_a_one_line_error():
    # Port 9 on 127.0.0.1 (discard service) is closed in test environments: connection refused.
    with pytest.raises(ClusterError, match="could not reach the Dask scheduler at tcp://127.0.0.1:9") as info:
        cluster_executor({"connect_timeout": 2}, scheduler="tcp://127.0.0.1:9")
    assert "\n" not in str(info.value)


# ---------------------------------------------------------------------------------------------
# LocalCluster on 127.0.0.1
# ---------------------------------------------------------------------------------------------

def test_executor_is_a_concurrent_futures_executor_with_single_threaded_workers(dask_executor):
    assert isinstance(dask_executor, cf.Executor)
    assert dask_executor.max_workers == 2
    assert set(dask_executor.worker_threads.values()) == {1}
    assert all(addr.startswith("tcp://127.0.0.1:") for addr in dask_executor.worker_threads)
    fut = dask_executor.submit(_env_and_threads)
    assert isinstance(fut, cf.Future)
    omp, blas = fut.result(timeout=60)
    assert omp == "1"
    assert blas in (None, 1)
    done, _ = cf.wait([dask_executor.submit(pow, 2, k) for k in range(5)], timeout=60)
    assert sorted(f.result() for f in done) == [1, 2, 4, 8, 16]


def test_task_that_raises_once_is_retried(dask_executor, tmp_path):
    assert dask_executor.submit(_raise_once, str(tmp_path / "marker")).result(timeout=60) == 42


def test_dask_results_equal_local_processes(dask_executor, tmp_path):
    kw = dict(chunk_size=64, nsteps=200)
    ref = _reference(tmp_path, 4, **kw)
    out = tmp_path / "dask"
    out.mkdir()
    futs = [dask_executor.submit(model_chunk_task, 11, c, kw["chunk_size"], kw["nsteps"], str(out)) for c in range(4)]
    got = [f.result(timeout=120) for f in futs]
    for a, b in zip(ref, got):
        assert np.array_equal(a, b)  # bitwise: same seeded streams, same arithmetic
    assert np.all(np.isfinite(got[0])) and got[0].shape == (5, 2)


def test_killed_worker_tasks_are_rerun_with_identical_results(tmp_path):
    kw = dict(chunk_size=200, nsteps=1200)  # ~1 s per chunk, so a worker dies mid-task
    nchunks = 6
    ref = _reference(tmp_path, nchunks, **kw)
    out = tmp_path / "dask"
    out.mkdir()
    executor = local_cluster_executor(2)
    try:
        pids = executor.worker_pids()
        futs = [executor.submit(model_chunk_task, 11, c, kw["chunk_size"], kw["nsteps"], str(out))
                for c in range(nchunks)]
        deadline = time.time() + 60
        victim = None
        while victim is None and time.time() < deadline:  # wait until a worker is inside a task
            busy = [addr for addr, keys in executor.client.processing().items() if keys]
            log = out / "starts.log"
            if busy and log.exists() and log.read_text().count("\n") >= 2:
                victim = busy[0]
            else:
                time.sleep(0.05)
        assert victim is not None
        os.kill(pids[victim], signal.SIGKILL)  # a worker process this test started
        got = [f.result(timeout=180) for f in futs]
        after = executor.worker_pids()
    finally:
        executor.shutdown()
    for a, b in zip(ref, got):
        assert np.array_equal(a, b)
    assert pids[victim] not in after.values()         # the killed worker really went away
    starts = [line.split()[0] for line in (out / "starts.log").read_text().splitlines()]
    assert len(starts) > nchunks                      # at least one task was started twice
    assert sorted(set(starts)) == [str(c) for c in range(nchunks)]
