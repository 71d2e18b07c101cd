"""Dask scale-out: the executor factory, settings validation, the ensemble runner on Dask, worker loss.

The Dask tests start a LocalCluster bound to 127.0.0.1 (processes, 2 workers, 1 thread each).
Reference results come from the same runner and task functions run in local processes (or in
this process), so "identical" means bitwise-equal recorded arrays.
"""

from __future__ import annotations

import concurrent.futures as cf
import os
import signal
import sys
import time
import types

import numpy as np
import pytest
from conftest import tully1_study  # noqa: E402

distributed = pytest.importorskip("distributed")
import cloudpickle  # noqa: E402  (a dependency of distributed)

from mapdyn.study import cluster  # noqa: E402
from mapdyn.study.cluster import ClusterError, cluster_executor, cluster_settings, local_cluster_executor  # noqa: E402

# Workers are fresh processes that cannot import this test module by name; ship its functions by value.
cloudpickle.register_pickle_by_value(sys.modules[__name__])


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
    over = cluster_settings({"system": "slurm", "workers": 4, "walltime": "1:00:00"}, scheduler="tcp://10.0.0.5:8786")
    assert over.scheduler == "tcp://10.0.0.5:8786" and over.system is None
    with pytest.raises(ValueError, match="--scheduler"):
        cluster_settings(None, scheduler="10.0.0.5:8786")


def test_missing_jobqueue_is_a_one_line_error(monkeypatch):
    monkeypatch.setitem(sys.modules, "dask_jobqueue", None)  # makes `import dask_jobqueue` fail
    with pytest.raises(ClusterError, match=r"needs the package dask-jobqueue \(pip install dask-jobqueue\)") as info:
        cluster_executor({"system": "slurm", "workers": 2})
    assert "\n" not in str(info.value)


def test_jobqueue_arguments_give_one_thread_per_worker(monkeypatch):
    # A recording stand-in for dask-jobqueue checks what we ask of it (no batch system needed;
    # tests/cluster runs the real one on SLURM).
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


# ---------------------------------------------------------------------------------------------
# The ensemble runner on Dask: same code path (run_ensemble + run_task), same files
# ---------------------------------------------------------------------------------------------

from mapdyn.study.analyze import load_trajectory_set  # noqa: E402
from mapdyn.study.config import load_study_config  # noqa: E402
from mapdyn.study.folder import Study
from mapdyn.study.runner import run_ensemble, run_task  # noqa: E402

#: batched model study: Tully model 1 (scenario of our own), 4 chunks of 100 trajectories.
MODEL_STUDY = tully1_study(name=None, trajectories=400, seed=2026, duration="2400 au", record_every=20,
                           checkpoint_every=None, workers=2, batch=100, analysis=False)

#: on-the-fly model study (model adapter + driver, checkpoints every 20 steps): 4 trajectories.
OTF_STUDY = tully1_study(name=None, trajectories=4, seed=7, time_step="4 au", duration="800 au", record_every=10,
                         checkpoint_every=20, workers=2, batch=None, engine="on_the_fly", analysis=False)


def _study(tmp_path, text, name):
    path = tmp_path / f"{name}.toml"
    path.write_text(f'[study]\nname = "{name}"\nfolder = "{tmp_path / name}"\n' + text)
    return Study.create(load_study_config(path))


def _same_results(a, b):
    assert np.array_equal(a.indices, b.indices)
    assert a.status == b.status and set(a.status) == {"finished"}
    for field in ("actions", "energies", "coordinates", "coordinate_momenta"):
        x, y = getattr(a, field), getattr(b, field)
        assert np.array_equal(x, y, equal_nan=False), field  # bitwise, no missing frames


def test_model_study_on_dask_matches_local_processes(dask_executor, tmp_path):
    local = _study(tmp_path, MODEL_STUDY, "local")
    on_dask = _study(tmp_path, MODEL_STUDY, "dask")
    s_local = run_ensemble(local, workers=2)
    s_dask = run_ensemble(on_dask, dask_executor)
    assert (s_local.finished, s_dask.finished, s_dask.failed) == (4, 4, 0)
    _same_results(load_trajectory_set(local), load_trajectory_set(on_dask))
    assert run_ensemble(on_dask, dask_executor).skipped == 0  # nothing left to do: no task resubmitted
    assert on_dask.status().complete


def test_killed_worker_mid_run_ensemble_completes_identically(dask_executor, tmp_path):
    import threading

    reference = _study(tmp_path, OTF_STUDY, "reference")
    for i in reference.task_ids():  # the same task function, run in this process one by one
        assert run_task(reference.folder, i).status == "finished"
    study = _study(tmp_path, OTF_STUDY, "dask")
    executor = dask_executor  # its nanny restarts the killed worker, so the fixture stays usable
    outcome = {}
    try:
        pids = set(executor.worker_pids().values())
        runner = threading.Thread(target=lambda: outcome.update(summary=run_ensemble(study, executor)))
        runner.start()
        victim = None
        deadline = time.time() + 90
        while victim is None and time.time() < deadline and runner.is_alive():
            # a trajectory that has checkpointed at least once and is still running in a worker
            for i in range(study.ntraj):
                folder = study.trajectory_folder(i)
                marker = os.path.join(folder, "running.json")
                if os.path.exists(marker):
                    from mapdyn.files import read_json
                    from mapdyn.study.checkpoint import TrajectoryStore

                    try:
                        pid = int(read_json(marker)["pid"])
                    except (OSError, ValueError, KeyError):
                        continue
                    meta = TrajectoryStore(folder).read_meta()
                    if pid in pids and meta and 0 < int(meta.get("step", 0)) < study.nsteps:
                        victim = (i, pid, int(meta["step"]))
                        break
            time.sleep(0.02)
        assert victim is not None, "no trajectory was caught mid-run"
        os.kill(victim[1], signal.SIGKILL)  # a worker process of the cluster this test started
        runner.join(timeout=240)
        assert not runner.is_alive()
        after = set(executor.worker_pids().values())
    finally:
        study.request_stop()  # if anything above failed, let the runner thread return
    study.clear_stop()
    summary = outcome["summary"]
    assert (summary.finished, summary.failed, summary.interrupted) == (study.ntraj, 0, 0)
    assert victim[1] not in after                     # the worker really died (and was replaced)
    assert 0 < victim[2] < study.nsteps               # ... while its trajectory was half done
    _same_results(load_trajectory_set(reference), load_trajectory_set(study))


def test_run_command_with_scheduler_address(dask_executor, tmp_path):
    # `mapdyn run STUDY.toml --scheduler tcp://…` connects to a running scheduler (here the
    # LocalCluster of the fixture), runs every task there and leaves the cluster running.
    from mapdyn.cli import main

    path = tmp_path / "cli.toml"
    path.write_text(f'[study]\nname = "cli"\nfolder = "{tmp_path / "cli"}"\n' + MODEL_STUDY)
    address = dask_executor.client.scheduler.address
    assert main(["run", str(path), "--scheduler", address, "--quiet", "--no-analysis"]) == 0
    study = Study(str(tmp_path / "cli"))
    assert study.status().complete
    local = _study(tmp_path, MODEL_STUDY, "local_ref")
    for i in local.task_ids():  # reference: the same task function in this process
        assert run_task(local.folder, i).status == "finished"
    _same_results(load_trajectory_set(local), load_trajectory_set(study))
    assert dask_executor.submit(pow, 3, 2).result(timeout=60) == 9  # the cluster outlives the command


# ---------------------------------------------------------------------------------------------
# Batch jobs: a lost job is submitted again, recorded in cluster.json and shown by `mapdyn status`
# ---------------------------------------------------------------------------------------------

class _FakeJobCluster:
    """Stand-in for a dask-jobqueue cluster: ``workers`` maps worker names to jobs; ``scale(n)``
    submits a new job for every name that has lost its job (as SpecCluster does)."""

    def __init__(self):
        self.workers = {"w0": types.SimpleNamespace(job_id="101"), "w1": types.SimpleNamespace(job_id="102")}
        self.next_id = 103
        self.scale_calls = []

    def scale(self, n=None):
        self.scale_calls.append(n)
        for name in ("w0", "w1")[:n]:
            if name not in self.workers:
                self.workers[name] = types.SimpleNamespace(job_id=str(self.next_id))
                self.next_id += 1

    def close(self):
        pass


def test_lost_batch_job_is_submitted_again_and_recorded(tmp_path):
    from mapdyn.files import read_json
    from mapdyn.study.batch_jobs import JobRecorder

    client = types.SimpleNamespace(get_executor=lambda **kw: types.SimpleNamespace(shutdown=lambda wait: None),
                                   close=lambda: None)
    fake = _FakeJobCluster()
    executor = cluster.DaskExecutor(client, fake, description="fake slurm", system="slurm", keep_workers=2,
                                    watch_interval=0.02)
    recorder = JobRecorder(str(tmp_path), "slurm", executor.description)
    executor.add_job_listener(recorder)
    assert read_json(tmp_path / "cluster.json")["jobs"] == {"w0": "101", "w1": "102"}
    del fake.workers["w1"]  # job 102 cancelled: the cluster has dropped its worker
    deadline = time.time() + 10
    while time.time() < deadline and read_json(tmp_path / "cluster.json")["jobs"].get("w1") != "103":
        time.sleep(0.02)
    executor.shutdown()
    recorder.close()
    record = read_json(tmp_path / "cluster.json")
    assert record["jobs"] == {"w0": "101", "w1": "103"} and record["all_jobs"] == ["101", "102", "103"]
    assert record["ended"] and set(fake.scale_calls) == {2}


def test_status_lists_batch_jobs_and_their_trajectories(tmp_path, monkeypatch, capsys):
    from mapdyn.cli import main
    from mapdyn.files import write_json
    from mapdyn.study.batch_jobs import JobRecorder

    study = _study(tmp_path, OTF_STUDY, "jobs")
    JobRecorder(study.folder, "slurm")({"w0": "101", "w1": "103"})
    os.makedirs(study.trajectory_folder(2), exist_ok=True)
    write_json(os.path.join(study.trajectory_folder(2), "running.json"),
               {"pid": 1, "host": "node-elsewhere", "started": 0.0, "job": "103"})
    # stand-in squeue answering in the format we ask for (-o '%i|%T|%M|%N'): only job 103 is listed
    bindir = tmp_path / "bin"
    bindir.mkdir()
    (bindir / "squeue").write_text("#!/bin/sh\necho '103|RUNNING|1:05|node7'\n")
    (bindir / "squeue").chmod(0o755)
    monkeypatch.setenv("PATH", f"{bindir}{os.pathsep}{os.environ['PATH']}")
    assert main(["status", study.folder]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert any(ln.startswith("batch jobs (slurm): run on") and "active" in ln for ln in lines)
    assert any(ln.split() == ["job", "101", "gone"] for ln in lines)
    assert any(ln.split() == ["job", "103", "RUNNING", "1:05", "node7", "trajectories", "2"] for ln in lines)
    assert main(["status", study.folder, "--json"]) == 0
    jobs = __import__("json").loads(capsys.readouterr().out)["batch_jobs"]["jobs"]
    assert [(j["job"], j["state"], j["trajectories"]) for j in jobs] == [("101", "gone", []), ("103", "RUNNING", [2])]
