"""Batch jobs of a study running on SLURM/PBS through dask-jobqueue: recorded by the run, shown by status.

While ``mapdyn run`` keeps worker jobs in a batch queue it writes ``<study>/cluster.json``: the
batch system, the job id of each Dask worker job now, every job id it ever submitted (a cancelled
or pre-empted job is replaced by a new one), the run's host and process id, and whether the run
has ended.  ``mapdyn status`` reads that file, asks the batch system (``squeue`` / ``qstat``)
for the live state of those jobs, and lists them with the trajectories each one is running (from
the ``job`` field of the trajectories' ``running.json`` markers, set inside batch jobs).

The file is a record for people; nothing reads it to decide what to compute.  Times in seconds.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time

from mapdyn.files import read_json, write_json

__all__ = ["JOBS_FILE", "JobRecorder", "current_batch_job", "job_states", "jobs_report"]

JOBS_FILE = "cluster.json"


def current_batch_job() -> str | None:
    """Id of the batch job this process runs in (``SLURM_JOB_ID`` or ``PBS_JOBID``), else None."""
    return os.environ.get("SLURM_JOB_ID") or os.environ.get("PBS_JOBID") or None


class JobRecorder:
    """Listener for :meth:`DaskExecutor.add_job_listener` that keeps ``<folder>/cluster.json`` current."""

    def __init__(self, folder: str, system: str, description: str = ""):
        self.path = os.path.join(folder, JOBS_FILE)
        self.record = {"system": system, "description": description, "host": socket.gethostname(),
                       "pid": os.getpid(), "started": time.time(), "updated": time.time(),
                       "jobs": {}, "all_jobs": [], "ended": False}

    def __call__(self, jobs: dict[str, str]) -> None:
        self.record["jobs"] = dict(jobs)
        self.record["all_jobs"] += [j for j in jobs.values() if j not in self.record["all_jobs"]]
        self.record["updated"] = time.time()
        write_json(self.path, self.record)

    def close(self) -> None:
        """The run has ended (its jobs are cancelled with the cluster)."""
        self.record.update(ended=True, updated=time.time())
        write_json(self.path, self.record)


def _run(cmd: list[str]) -> str | None:
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=20)
    except (OSError, subprocess.TimeoutExpired):
        return None
    return proc.stdout if proc.returncode == 0 else None


def job_states(system: str, ids: list[str]) -> dict[str, dict[str, str]] | None:
    """Live state of batch jobs ``ids``: ``{id: {"state", "elapsed", "node"}}``; a job the batch
    system no longer lists is absent.  None when the query command is missing or fails."""
    if not ids:
        return {}
    if system == "slurm":
        if shutil.which("squeue") is None:
            return None
        out = _run(["squeue", "-h", "-j", ",".join(ids), "-o", "%i|%T|%M|%N"])
        if out is None:
            return None
        states = {}
        for line in out.splitlines():
            parts = line.strip().split("|")
            if len(parts) == 4:
                states[parts[0]] = {"state": parts[1], "elapsed": parts[2], "node": parts[3]}
        return states
    if system == "pbs":  # default qstat columns: Job id, Name, User, Time Use, S, Queue
        if shutil.which("qstat") is None:
            return None
        out = _run(["qstat", *ids])
        if out is None:
            return None
        states = {}
        for line in out.splitlines():
            parts = line.split()
            if len(parts) >= 6 and any(parts[0].startswith(i.split(".")[0]) for i in ids):
                full = next(i for i in ids if parts[0].startswith(i.split(".")[0]))
                states[full] = {"state": parts[4], "elapsed": parts[3], "node": ""}
        return states
    return None


def _running_by_job(study) -> dict[str, list[int]]:
    out: dict[str, list[int]] = {}
    if study.batched:
        return out
    for i in range(study.ntraj):
        path = os.path.join(study.trajectory_folder(i), "running.json")
        try:
            job = read_json(path).get("job")
        except (OSError, ValueError, AttributeError):
            continue
        if job:
            out.setdefault(str(job), []).append(i)
    return out


def jobs_report(study) -> dict | None:
    """What ``cluster.json`` says plus the live job states (None when the study never ran in a batch queue)."""
    path = os.path.join(study.folder, JOBS_FILE)
    try:
        record = read_json(path)
    except (OSError, ValueError):
        return None
    ids = list(record.get("all_jobs", []))
    live = job_states(record.get("system", ""), ids)
    running = _running_by_job(study)
    jobs = []
    current = set(record.get("jobs", {}).values())
    for job in ids:
        state = (live or {}).get(job)
        jobs.append({"job": job, "current": job in current,
                     "state": state["state"] if state else ("unknown" if live is None else "gone"),
                     "elapsed": state["elapsed"] if state else "", "node": state["node"] if state else "",
                     "trajectories": running.get(job, [])})
    return {"system": record.get("system"), "ended": bool(record.get("ended")),
            "updated": record.get("updated"), "host": record.get("host"), "pid": record.get("pid"),
            "queried": live is not None, "jobs": jobs}


def jobs_text(report: dict) -> str:
    """Lines for ``mapdyn status``."""
    age = time.time() - float(report.get("updated") or time.time())
    head = (f"batch jobs ({report['system']}): run on {report['host']} (pid {report['pid']}) "
            + ("has ended" if report["ended"] else f"active, record {age:.0f} s old"))
    if not report["queried"]:
        head += f"; live state not available (no working {'squeue' if report['system'] == 'slurm' else 'qstat'} here)"
    lines = [head]
    for j in report["jobs"]:
        traj = ", ".join(str(i) for i in j["trajectories"])
        lines.append(f"  job {j['job']:<10} {j['state']:<11} {j['elapsed']:>9}  {j['node']:<12}"
                     + ("" if j["current"] else " (replaced)") + (f" trajectories {traj}" if traj else ""))
    return "\n".join(lines)
