"""`mapdyn run` on a real SLURM cluster (munged + slurmctld + slurmd on 127.0.0.1, 2 CPUs).

The study files carry the cluster settings ([cluster] system = "slurm"): `mapdyn run` starts a
Dask scheduler in its own process and submits one batch job per worker through dask-jobqueue.
Checks: the model study and a tiny H2 SA-CASSCF/STO-3G study give the same recorded arrays,
bit for bit, as local worker processes; a job cancelled mid-run with ``scancel`` is replaced and
the ensemble still ends bitwise equal; ``mapdyn status`` lists the batch jobs and what they run
while the study runs; the daemons are gone at the end.

Bitwise equality holds because every trajectory is a pure function of the study input and its
index on one thread (own seeded random stream, restart from checkpoints bit for bit,
docs/architecture.md#random-streams), whichever process or job runs it.

Slow (about 2 minutes on 2 busy cores): run by .ci/run after it installed slurm-wlm and munge;
skipped, with the reason, when the daemons are not installed or do not start.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))
from conftest import ENV, H2_SECTIONS, tully1_study  # noqa: E402
from local_slurm import LocalSlurm, unavailable_reason  # noqa: E402

pytestmark = [pytest.mark.slow, pytest.mark.slurm]

#: Dask drops a lost batch worker after `distributed.deploy.lost-worker-timeout` (default 15 s)
#: before mapdyn submits its replacement; 2 s keeps the test short.
DASK_ENV = {"DASK_DISTRIBUTED__DEPLOY__LOST_WORKER_TIMEOUT": "2s"}


@pytest.fixture(scope="module")
def slurm(tmp_path_factory):
    reason = unavailable_reason()
    if reason:
        pytest.skip(reason)
    pytest.importorskip("dask_jobqueue", reason="dask-jobqueue not installed (pip install -e '.[test]')")
    cluster = LocalSlurm(str(tmp_path_factory.mktemp("slurm")))
    try:
        cluster.start()
    except RuntimeError as err:
        pytest.skip(f"SLURM test cluster did not start: {err}")
    yield cluster
    cluster.stop()


def _cluster_section(tmp_path: Path) -> str:
    return f"""
[cluster]
system = "slurm"
workers = 2
workers_per_job = 1
memory_per_worker = "1GB"
walltime = "00:20:00"
queue = "debug"
interface = "lo"
local_directory = "{tmp_path / 'dask-scratch'}"
connect_timeout = 120
"""


def _env(slurm: LocalSlurm) -> dict:
    return dict(ENV, SLURM_CONF=slurm.conf, **DASK_ENV)


def _run(args, cwd, env, timeout=900) -> subprocess.CompletedProcess:
    proc = subprocess.run([sys.executable, "-m", "mapdyn", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=timeout)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return proc


def _frames(folder: Path) -> dict:
    """Every recorded array of every trajectory (all frames), by (trajectory, name)."""
    from mapdyn.study.checkpoint import TrajectoryStore
    from mapdyn.study.folder import Study

    study = Study(str(folder))
    assert study.status().counts()["finished"] == study.ntraj
    out = {}
    for i in range(study.ntraj):
        for key, value in TrajectoryStore(study.trajectory_folder(i)).read_frames().items():
            out[(i, key)] = np.asarray(value)
    return out


def _assert_bitwise(a: dict, b: dict) -> None:
    assert a.keys() == b.keys() and len(a) > 0
    for key in a:
        assert np.array_equal(a[key], b[key], equal_nan=True), key  # same bits (NaN where both have NaN)


def _log(tmp_path: Path, text: str) -> None:
    with open(tmp_path.parent / "slurm_test.log", "a") as fh:
        fh.write(text.rstrip() + "\n")
    print(text)


# ------------------------------------------------------------------------------------------------
# model study: cancel a job mid-run, watch `mapdyn status`
# ------------------------------------------------------------------------------------------------

#: on-the-fly Tully-1 model study (scenario of our own): one task per trajectory, checkpoint every 20 steps.
# 10 000 steps per trajectory (about 14 s each here): after a job is cancelled the remaining worker
# must still be busy when Dask drops the lost worker (lost-worker-timeout 15 s) and a replacement
# job is submitted; with 750 steps an idle machine finished the ensemble first (measured: 3.9 s).
OTF_STEPS = 10_000
OTF = tully1_study(name=None, trajectories=4, seed=7, time_step="4 au", duration=f"{4 * OTF_STEPS} au", record_every=50,
                   checkpoint_every=500, workers=2, batch=None, engine="on_the_fly", analysis=False)


def _wait(what: str, cond, proc: subprocess.Popen, timeout: float = 180):
    deadline = time.time() + timeout
    while time.time() < deadline:
        value = cond()
        if value:
            return value
        if proc.poll() is not None:
            raise AssertionError(f"the run ended (exit {proc.returncode}) before {what}: "
                                 f"{proc.stderr.read()[-2000:] if proc.stderr else ''}")
        time.sleep(0.2)
    raise AssertionError(f"timed out waiting for {what}")


def test_model_study_with_cancelled_job_matches_local_processes(slurm, tmp_path):
    from mapdyn.files import read_json
    from mapdyn.study.checkpoint import TrajectoryStore
    from mapdyn.study.folder import Study

    env = _env(slurm)
    (tmp_path / "local.toml").write_text(f'[study]\nname = "otf"\nfolder = "{tmp_path / "local"}"\n' + OTF)
    (tmp_path / "slurm.toml").write_text(f'[study]\nname = "otf"\nfolder = "{tmp_path / "slurm"}"\n' + OTF
                                         + _cluster_section(tmp_path))
    t0 = time.time()
    _run(["run", "local.toml", "--no-analysis", "--quiet"], tmp_path, env)
    t_local = time.time() - t0
    folder = tmp_path / "slurm"
    t0 = time.time()
    proc = subprocess.Popen([sys.executable, "-m", "mapdyn", "run", "slurm.toml", "--no-analysis", "--quiet"],
                            cwd=tmp_path, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        record = folder / "cluster.json"

        def two_running_jobs():
            if not record.exists():
                return None
            jobs = set(read_json(record)["jobs"].values())
            states = dict(slurm.squeue())
            return jobs if len(jobs) == 2 and all(states.get(j) == "RUNNING" for j in jobs) else None

        jobs = _wait("two running worker jobs", two_running_jobs, proc)
        _log(tmp_path, f"jobs {sorted(jobs)} RUNNING {time.time() - t0:.1f} s after 'mapdyn run' started")

        def trajectory_mid_run():  # (index, job) of a trajectory past its first checkpoint, in a job
            study = Study(str(folder))
            for i in range(4):
                tf = Path(study.trajectory_folder(i))
                try:
                    job = read_json(tf / "running.json").get("job")
                    meta = TrajectoryStore(str(tf)).read_meta()
                except (OSError, ValueError):
                    continue
                if job in jobs and meta and 0 < meta["step"] < OTF_STEPS:
                    return i, job, int(meta["step"])
            return None

        # the step is taken from this read: a second read can fall into the writer's state rotation
        victim, job, step_at_cancel = _wait("a trajectory mid-run in a batch job", trajectory_mid_run, proc)
        status = _run(["status", str(folder)], tmp_path, env).stdout
        _log(tmp_path, f"mapdyn status while running:\n{status}")
        assert "batch jobs (slurm)" in status and "active" in status
        for j in jobs:
            assert any(line.split()[:3] == ["job", j, "RUNNING"] for line in status.splitlines()), status
        assert any(line.split()[:2] == ["job", job] and "trajectories" in line and str(victim) in line.split("trajectories")[1]
                   for line in status.splitlines()), status
        subprocess.run(["scancel", job], env=env, check=True, timeout=30)
        _log(tmp_path, f"scancel {job} (trajectory {victim} at step {step_at_cancel}/{OTF_STEPS}) "
                       f"{time.time() - t0:.1f} s into the run")

        def replaced():
            new = set(read_json(record)["jobs"].values())
            return new if len(new) == 2 and job not in new else None

        new_jobs = _wait("a replacement job", replaced, proc)
        _log(tmp_path, f"job {job} replaced by {sorted(new_jobs - jobs)} {time.time() - t0:.1f} s into the run")
        _, err = proc.communicate(timeout=600)
        assert proc.returncode == 0, err[-3000:]
    finally:
        if proc.poll() is None:
            proc.kill()
    t_slurm = time.time() - t0
    _assert_bitwise(_frames(tmp_path / "local"), _frames(folder))
    final = json.loads(_run(["status", str(folder), "--json"], tmp_path, env).stdout)
    assert final["counts"]["finished"] == 4 and final["batch_jobs"]["ended"]
    assert len(final["batch_jobs"]["jobs"]) == 3                       # two first jobs and the replacement
    left = dict(slurm.squeue())
    assert not any(j["job"] in left for j in final["batch_jobs"]["jobs"]), left  # jobs end with the run
    _log(tmp_path, f"model study (4 x {OTF_STEPS} steps): local processes {t_local:.1f} s, SLURM {t_slurm:.1f} s; "
                   f"bitwise equal; jobs {[j['job'] for j in final['batch_jobs']['jobs']]}")


# ------------------------------------------------------------------------------------------------
# H2 SA-CASSCF/STO-3G on the cluster
# ------------------------------------------------------------------------------------------------

#: scenario of our own: H2 after excitation to S1, SA2-CASSCF(2,2)/STO-3G, 2 trajectories of 2 fs.
H2 = """
""" + H2_SECTIONS + """[method]
window = "square"
[dynamics]
time_step = "0.5 fs"
duration = "2 fs"
checkpoint_every = 2
drift_threshold = "5e-3 Eh"
[ensemble]
trajectories = 2
seed = 5
workers = 2
"""


def test_h2_casscf_study_matches_local_processes(slurm, tmp_path):
    env = _env(slurm)
    (tmp_path / "local.toml").write_text(f'[study]\nname = "h2"\nfolder = "{tmp_path / "local"}"\n' + H2)
    (tmp_path / "slurm.toml").write_text(f'[study]\nname = "h2"\nfolder = "{tmp_path / "slurm"}"\n' + H2
                                         + _cluster_section(tmp_path))
    t0 = time.time()
    _run(["run", "local.toml", "--no-analysis", "--quiet"], tmp_path, env)
    t_local = time.time() - t0
    t0 = time.time()
    _run(["run", "slurm.toml", "--no-analysis", "--quiet"], tmp_path, env)
    t_slurm = time.time() - t0
    a = _frames(tmp_path / "local")
    assert a[(0, "actions")].shape[0] == 5                             # frames at steps 0..4
    _assert_bitwise(a, _frames(tmp_path / "slurm"))
    jobs = json.loads(_run(["status", str(tmp_path / "slurm"), "--json"], tmp_path, env).stdout)["batch_jobs"]
    assert jobs["ended"] and len(jobs["jobs"]) == 2
    _log(tmp_path, f"H2 SA-CASSCF/STO-3G (2 x 4 steps): local processes {t_local:.1f} s, SLURM {t_slurm:.1f} s; "
                   f"bitwise equal; jobs {[j['job'] for j in jobs['jobs']]}")


def test_daemons_are_stopped(slurm, tmp_path):
    assert slurm.pids(), "the daemons should be running before the stop"
    assert slurm.stop()
    assert slurm.pids() == {}
    probe = subprocess.run(["sinfo", "-h"], env=_env(slurm), capture_output=True, text=True, timeout=60)
    assert probe.returncode != 0                                         # nobody answers any more
    _log(tmp_path, "daemons stopped: munged, slurmctld, slurmd gone; sinfo fails")
