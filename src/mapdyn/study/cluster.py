"""Trajectory tasks on a Dask distributed cluster, through the same runner code as local processes.

The ensemble runner hands its tasks (study + trajectory index, or a chunk of model trajectories)
to any :class:`concurrent.futures.Executor`.  This module builds one that sends them to Dask:

* ``scheduler = "tcp://host:port"`` (or ``--scheduler`` on the command line): connect to a
  scheduler that is already running (``dask scheduler`` plus ``dask worker … --nthreads 1``);
* ``scheduler_file = "/shared/scheduler.json"``: the same, address read from a scheduler file;
* ``system = "slurm"`` or ``"pbs"``: start a scheduler here and request workers as batch jobs
  through dask-jobqueue (optional package ``dask-jobqueue``, imported only when asked for);
* ``system = "local"``: a Dask ``LocalCluster`` on this machine (bound to 127.0.0.1).

Rules the executor enforces or documents:

* **One thread per worker.**  Every worker process runs one task at a time with one OpenMP/BLAS
  thread (``nthreads=1``, ``OMP_NUM_THREADS=1``; PySCF is pinned with ``pyscf.lib.num_threads(1)``
  inside each task).  Parallelism comes from many worker processes, as in the local runner
  (docs/theory.md#pyscf-pitfalls: two threads on a busy node made a step 13× slower).
* **Lost workers.**  When a worker dies (node failure, pre-emption, walltime), the scheduler
  re-runs its tasks elsewhere.  Tasks are idempotent (a task resumes the trajectory from its last
  checkpoint or recomputes it from its own seeded stream), so a re-run gives the same result.  A
  task that takes down ``allowed_failures`` workers is given up (Dask ``KilledWorker``) and the
  runner counts it as failed.  Exceptions raised inside a task are retried ``task_retries`` times
  (for transient trouble such as a briefly unavailable file system).  On SLURM/PBS the executor keeps
  ``workers`` requested: a worker job that was cancelled or ended is submitted again once Dask
  has dropped its worker, and listeners (``cluster.json`` for ``mapdyn status``) hear of the new
  job.  A task in a worker that is closing stops at its next checkpoint
  (:func:`dask_worker_leaving`), so it does not write while its re-run does (docs/cluster.md).
* **Shared file system.**  Workers write trajectory files straight into the study folder, so the
  study folder must be visible at the same absolute path on every worker node (an NFS/Lustre/GPFS
  home or project directory; not node-local scratch).  Results are therefore "in the same study
  folder" whether a task ran locally or on a cluster node.  Tasks carry paths, not data.
* **Same software.**  Workers must import the same mapdyn (same environment / container).

No physics and no numbers live here; there are no units.
"""

from __future__ import annotations

import concurrent.futures as cf
import dataclasses
import difflib
import functools
import os
import sys
import threading
import time
from typing import Any, Callable, Mapping

from mapdyn.study.threads import SINGLE_THREAD_ENV, use_single_thread

__all__ = [
    "ClusterError",
    "ClusterSettings",
    "DaskExecutor",
    "cluster_settings",
    "cluster_executor",
    "local_cluster_executor",
    "single_threaded_call",
    "dask_worker_leaving",
    "CLUSTER_KEYS",
    "SYSTEMS",
]

#: batch systems (dask-jobqueue classes) and the plain local Dask cluster.
SYSTEMS = ("slurm", "pbs", "local")

#: environment every worker gets (one OpenMP / BLAS thread per process).

#: keys allowed in a ``[cluster]`` section and what each one means (used for messages and --help).
CLUSTER_KEYS = {
    "scheduler": "address of a running Dask scheduler, e.g. 'tcp://10.0.0.5:8786'",
    "scheduler_file": "path of a Dask scheduler file written by 'dask scheduler --scheduler-file'",
    "system": "start workers here: 'slurm' or 'pbs' (needs dask-jobqueue) or 'local'",
    "workers": "number of worker processes to request (one core, one thread each)",
    "workers_per_job": "worker processes (= cores) per batch job, slurm/pbs only",
    "memory_per_worker": "memory per worker process, e.g. '2GB'",
    "walltime": "batch-job wall time 'HH:MM:SS', slurm/pbs only",
    "queue": "batch queue / partition name, slurm/pbs only",
    "account": "batch account / project to charge, slurm/pbs only",
    "job_directives": "extra batch-script directive lines (list of strings), slurm/pbs only",
    "interface": "network interface the workers and scheduler listen on, e.g. 'ib0'",
    "local_directory": "worker scratch directory (node-local is fine; the study folder is not put there)",
    "python": "python executable the batch jobs run (default: this one)",
    "task_retries": "times a task that raised is retried (default 1)",
    "allowed_failures": "worker deaths a task may cause before it is given up (default 3)",
    "connect_timeout": "seconds to wait for the scheduler and the first worker (default 120)",
}

_URL_SCHEMES = ("tcp://", "tls://", "ucx://", "inproc://")


class ClusterError(RuntimeError):
    """The cluster could not be reached or started; the message is one line saying why."""


def did_you_mean(key: str, allowed) -> str:
    close = difflib.get_close_matches(key, list(allowed), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _parse_memory(text: str, key: str) -> int:
    from dask.utils import parse_bytes

    try:
        value = parse_bytes(str(text))
    except (ValueError, TypeError):
        raise ValueError(f"cluster.{key} = {text!r} is not a memory size; use e.g. '2GB' or '1500MiB'") from None
    if value <= 0:
        raise ValueError(f"cluster.{key} must be a positive memory size, got {text!r}")
    return int(value)


def _check_walltime(text: str) -> str:
    parts = str(text).split(":")
    if len(parts) not in (2, 3) or not all(p.isdigit() for p in parts):
        raise ValueError(f"cluster.walltime = {text!r} is not a wall time; use 'HH:MM:SS' or 'HH:MM'")
    return str(text)


def _check_address(address: str, key: str = "scheduler") -> str:
    text = str(address).strip()
    if not text.startswith(_URL_SCHEMES) or len(text.split("://", 1)[1]) == 0:
        raise ValueError(f"{key} = {address!r} is not a Dask scheduler address; "
                         f"use e.g. 'tcp://host:8786' (schemes {', '.join(s[:-3] for s in _URL_SCHEMES)})")
    return text


@dataclasses.dataclass(frozen=True)
class ClusterSettings:
    """A validated ``[cluster]`` section (see :data:`CLUSTER_KEYS` for the meaning of each field).

    Exactly one of ``scheduler``, ``scheduler_file`` or ``system`` is set.  Memory in bytes,
    timeouts in seconds.
    """

    scheduler: str | None = None
    scheduler_file: str | None = None
    system: str | None = None
    workers: int = 2
    workers_per_job: int = 1
    memory_per_worker: int = 2 * 10**9
    walltime: str = "24:00:00"
    queue: str | None = None
    account: str | None = None
    job_directives: tuple[str, ...] = ()
    interface: str | None = None
    local_directory: str | None = None
    python: str | None = None
    task_retries: int = 1
    allowed_failures: int = 3
    connect_timeout: float = 120.0

    def describe(self) -> str:
        """One line for logs and study metadata."""
        if self.scheduler:
            return f"Dask scheduler {self.scheduler}"
        if self.scheduler_file:
            return f"Dask scheduler from {self.scheduler_file}"
        if self.system == "local":
            return f"Dask LocalCluster, {self.workers} workers x 1 thread"
        return (f"Dask on {self.system.upper()} via dask-jobqueue, {self.workers} workers x 1 thread "
                f"in jobs of {self.workers_per_job}")


def _positive_int(section: Mapping, key: str, default: int, minimum: int = 1) -> int:
    value = section.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise ValueError(f"cluster.{key} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def cluster_settings(section: Mapping[str, Any] | None = None, *, scheduler: str | None = None) -> ClusterSettings:
    """Validate a ``[cluster]`` TOML section (a mapping) into :class:`ClusterSettings`.

    ``scheduler`` (the ``--scheduler`` command-line option) overrides any address or system given
    in the section.  Bad input raises ``ValueError`` with a one-line message naming the key.
    """
    section = dict(section or {})
    for key in section:
        if key not in CLUSTER_KEYS:
            raise ValueError(f"cluster.{key} is not a known key{did_you_mean(key, CLUSTER_KEYS)}; "
                             f"allowed: {', '.join(CLUSTER_KEYS)}")
    if scheduler is not None:  # --scheduler wins: drop what only a started cluster would use
        for key in ("scheduler_file", "system", "workers_per_job", "walltime", "queue", "account",
                    "job_directives", "python"):
            section.pop(key, None)
        section["scheduler"] = scheduler
    given = [k for k in ("scheduler", "scheduler_file", "system") if section.get(k) is not None]
    if len(given) != 1:
        raise ValueError("cluster: give exactly one of 'scheduler', 'scheduler_file' or 'system'"
                         + (f" (got {', '.join(given)})" if given else ""))
    out: dict[str, Any] = {}
    if "scheduler" in given:
        out["scheduler"] = _check_address(section["scheduler"], "cluster.scheduler" if scheduler is None else "--scheduler")
    if "scheduler_file" in given:
        if not isinstance(section["scheduler_file"], str) or not section["scheduler_file"]:
            raise ValueError(f"cluster.scheduler_file must be a path, got {section['scheduler_file']!r}")
        out["scheduler_file"] = section["scheduler_file"]
    if "system" in given:
        system = str(section["system"]).lower()
        if system not in SYSTEMS:
            raise ValueError(f"cluster.system = {section['system']!r} is not allowed; use one of {', '.join(SYSTEMS)}")
        out["system"] = system
    out["workers"] = _positive_int(section, "workers", 2)
    out["workers_per_job"] = _positive_int(section, "workers_per_job", 1)
    if "memory_per_worker" in section:
        out["memory_per_worker"] = _parse_memory(section["memory_per_worker"], "memory_per_worker")
    if "walltime" in section:
        out["walltime"] = _check_walltime(section["walltime"])
    for key in ("queue", "account", "interface", "local_directory", "python"):
        if key in section:
            if not isinstance(section[key], str) or not section[key]:
                raise ValueError(f"cluster.{key} must be a non-empty string, got {section[key]!r}")
            out[key] = section[key]
    if "job_directives" in section:
        lines = section["job_directives"]
        if isinstance(lines, str) or not all(isinstance(x, str) for x in lines):
            raise ValueError("cluster.job_directives must be a list of strings, e.g. ['--constraint=skylake']")
        out["job_directives"] = tuple(lines)
    out["task_retries"] = _positive_int(section, "task_retries", 1, minimum=0)
    out["allowed_failures"] = _positive_int(section, "allowed_failures", 3, minimum=0)
    timeout = section.get("connect_timeout", 120.0)
    if isinstance(timeout, bool) or not isinstance(timeout, (int, float)) or not timeout > 0:
        raise ValueError(f"cluster.connect_timeout must be a positive number of seconds, got {timeout!r}")
    out["connect_timeout"] = float(timeout)
    system = out.get("system")
    batch_only = ("workers_per_job", "walltime", "queue", "account", "job_directives", "python")
    if system != "slurm" and system != "pbs":
        extra = [k for k in batch_only if k in section]
        if extra:
            raise ValueError(f"cluster.{extra[0]} only applies with system = 'slurm' or 'pbs'")
    if system in ("slurm", "pbs") and out["workers"] % out["workers_per_job"]:
        raise ValueError(f"cluster.workers ({out['workers']}) must be a multiple of "
                         f"cluster.workers_per_job ({out['workers_per_job']})")
    return ClusterSettings(**out)


# ---------------------------------------------------------------------------------------------
# Tasks run with one thread
# ---------------------------------------------------------------------------------------------

def single_threaded_call(fn: Callable, *args, **kwargs):
    """Call ``fn(*args, **kwargs)`` with one OpenMP/BLAS thread (and PySCF pinned to one thread).

    The environment variables only reach libraries initialised after this point (or child
    processes); PySCF's own pool is set directly when PySCF is loaded, and every backend pins it
    again itself.
    """
    use_single_thread()
    return fn(*args, **kwargs)


def dask_worker_leaving() -> bool:
    """True inside a Dask worker that is closing (cancelled batch job, walltime, lost scheduler).

    The scheduler re-runs that worker's tasks elsewhere as soon as it has left, so a task still
    computing there must stop writing the trajectory's files at its next checkpoint.
    """
    mod = sys.modules.get("distributed")
    if mod is None:
        return False
    try:
        worker = mod.get_worker()
    except ValueError:  # not inside a Dask task
        return False
    return getattr(worker.status, "name", "") in ("closing", "closed", "failed")


def _import_distributed():
    try:
        import distributed
    except ImportError:  # pragma: no cover - dask is a test dependency here
        raise ClusterError("running on a Dask cluster needs the package dask[distributed] "
                           "(pip install 'dask[distributed]')") from None
    return distributed


class DaskExecutor(cf.Executor):
    """A :class:`concurrent.futures.Executor` that runs tasks on a Dask cluster.

    ``submit(fn, *args, **kwargs)`` returns a ``concurrent.futures.Future``; tasks run with one
    thread (:func:`single_threaded_call`), are never de-duplicated (``pure=False``), are retried
    ``task_retries`` times when they raise, and are re-run by the scheduler when their worker is
    lost.  ``shutdown`` closes the client, and the cluster when this executor started it.
    """

    def __init__(self, client: Any, cluster: Any = None, task_retries: int = 1, description: str = "",
                 expected_workers: int | None = None, system: str | None = None,
                 keep_workers: int | None = None, watch_interval: float = 2.0):
        self.client = client
        self.cluster = cluster
        self.expected_workers = expected_workers
        self.system = system
        self.task_retries = int(task_retries)
        self.description = description or f"Dask scheduler {client.scheduler.address}"
        self._inner = client.get_executor(pure=False, retries=self.task_retries)
        self._closed = False
        self._job_listeners: list[Callable[[dict[str, str]], None]] = []
        self._watch_stop = threading.Event()
        self._watcher: threading.Thread | None = None
        if keep_workers is not None and cluster is not None:
            self._watcher = threading.Thread(target=self._watch_jobs, args=(int(keep_workers), float(watch_interval)),
                                             name="mapdyn-batch-jobs", daemon=True)
            self._watcher.start()

    # -------------------------------------------------------------- executor protocol
    def submit(self, fn: Callable, /, *args, **kwargs) -> cf.Future:
        if self._closed:
            raise RuntimeError("cannot schedule new tasks after shutdown")
        return self._inner.submit(functools.partial(single_threaded_call, fn), *args, **kwargs)

    def shutdown(self, wait: bool = True, *, cancel_futures: bool = False) -> None:
        if self._closed:
            return
        self._closed = True
        self._watch_stop.set()
        if self._watcher is not None:
            self._watcher.join(timeout=30)
        try:
            self._inner.shutdown(wait=wait and not cancel_futures)
        finally:
            try:
                self.client.close()
            finally:
                if self.cluster is not None:
                    self.cluster.close()

    # -------------------------------------------------------------- information
    @property
    def worker_threads(self) -> dict[str, int]:
        """Threads of each connected worker, by address."""
        info = self.client.scheduler_info()
        return {addr: int(w.get("nthreads", 1)) for addr, w in info.get("workers", {}).items()}

    @property
    def max_workers(self) -> int:
        """Tasks that can run at once: worker threads connected now, or the workers requested from
        a batch system / local cluster if more (they may still be queued); at least 1."""
        return max(1, sum(self.worker_threads.values()), int(self.expected_workers or 0))

    def batch_jobs(self) -> dict[str, str]:
        """Batch job id of each worker job this executor started, by Dask worker name (empty
        when the workers are not batch jobs)."""
        workers = getattr(self.cluster, "workers", None) if self.system in ("slurm", "pbs") else None
        if not workers:
            return {}
        for _ in range(5):  # the cluster's event loop may change the dict while we copy it
            try:
                items = list(workers.items())
                break
            except RuntimeError:
                time.sleep(0.01)
        else:
            return {}
        return {str(name): str(job.job_id) for name, job in items if getattr(job, "job_id", None)}

    def add_job_listener(self, listener: Callable[[dict[str, str]], None]) -> None:
        """Call ``listener(batch_jobs())`` now and whenever the set of batch jobs changes."""
        self._job_listeners.append(listener)
        listener(self.batch_jobs())

    def _watch_jobs(self, keep: int, interval: float) -> None:
        """Keep ``keep`` workers requested: a worker job that was cancelled, pre-empted or ran out
        of wall time is dropped by the cluster once its worker is gone (after Dask's
        ``distributed.deploy.lost-worker-timeout``) and submitted again here; tell the listeners."""
        last: dict[str, str] = {}
        while not self._watch_stop.wait(interval):
            try:
                self.cluster.scale(n=keep)
                jobs = self.batch_jobs()
            except Exception:  # the cluster is closing; the next round or shutdown settles it
                continue
            if jobs != last:
                last = jobs
                for listener in list(self._job_listeners):
                    try:
                        listener(jobs)
                    except Exception:  # a status file that cannot be written must not stop the run
                        pass

    def worker_pids(self) -> dict[str, int]:
        """Process id of each worker, by address (for diagnostics)."""
        return self.client.run(os.getpid)

    def __repr__(self) -> str:
        return f"DaskExecutor({self.description})"


def _wait_for_first_worker(client, timeout: float, what: str) -> None:
    try:
        client.wait_for_workers(1, timeout=timeout)
    except Exception as err:  # distributed raises TimeoutError (or OSError on a dead scheduler)
        client.close()
        raise ClusterError(f"no Dask worker joined {what} within {timeout:g} s ({type(err).__name__})") from None


def _check_single_thread_workers(executor: DaskExecutor) -> None:
    multi = {a: n for a, n in executor.worker_threads.items() if n > 1}
    if multi:
        import warnings

        addr, n = next(iter(multi.items()))
        warnings.warn(f"Dask worker {addr} has {n} threads; start workers with '--nthreads 1' "
                      f"(one trajectory per process, one thread each) for predictable speed",
                      RuntimeWarning, stacklevel=3)


def local_cluster_executor(n_workers: int = 2, *, task_retries: int = 1, allowed_failures: int = 3,
                           memory_per_worker: int | str | None = None,
                           local_directory: str | None = None) -> DaskExecutor:
    """A Dask ``LocalCluster`` on 127.0.0.1: ``n_workers`` processes, one thread each (dashboard on a free local port)."""
    distributed = _import_distributed()
    import dask

    if isinstance(n_workers, bool) or not isinstance(n_workers, int) or n_workers < 1:
        raise ValueError(f"n_workers must be an integer >= 1, got {n_workers!r}")
    with dask.config.set({"distributed.scheduler.allowed-failures": int(allowed_failures)}):
        cluster = distributed.LocalCluster(
            n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
            dashboard_address="127.0.0.1:0", env=dict(SINGLE_THREAD_ENV),
            memory_limit=memory_per_worker if memory_per_worker is not None else "auto",
            local_directory=local_directory)
    client = distributed.Client(cluster)
    return DaskExecutor(client, cluster, task_retries, f"Dask LocalCluster, {n_workers} workers x 1 thread",
                        expected_workers=n_workers)


def _jobqueue_cluster(settings: ClusterSettings):
    """Start a dask-jobqueue SLURMCluster/PBSCluster for ``settings`` (workers requested, not awaited)."""
    try:
        import dask_jobqueue
    except ImportError:
        raise ClusterError(f"cluster.system = '{settings.system}' needs the package dask-jobqueue "
                           f"(pip install dask-jobqueue)") from None
    from dask.utils import format_bytes

    cls = {"slurm": dask_jobqueue.SLURMCluster, "pbs": dask_jobqueue.PBSCluster}[settings.system]
    per_job = settings.workers_per_job
    kwargs: dict[str, Any] = dict(
        cores=per_job, processes=per_job,  # one thread per worker process
        memory=format_bytes(settings.memory_per_worker * per_job).replace(" ", ""),
        walltime=settings.walltime,
        job_script_prologue=[f"export {k}={v}" for k, v in SINGLE_THREAD_ENV.items()],
        job_extra_directives=list(settings.job_directives),
    )
    for key, name in (("queue", "queue"), ("account", "account"), ("interface", "interface"),
                      ("local_directory", "local_directory"), ("python", "python")):
        value = getattr(settings, key)
        if value is not None:
            kwargs[name] = value
    cluster = cls(**kwargs)
    cluster.scale(n=settings.workers)
    return cluster


def cluster_executor(settings: ClusterSettings | Mapping[str, Any] | None = None, *,
                     scheduler: str | None = None) -> DaskExecutor:
    """Executor for trajectory tasks on Dask, from a ``[cluster]`` section and/or ``--scheduler``.

    Connects to ``scheduler`` (or ``settings.scheduler`` / ``scheduler_file``), or starts a cluster
    for ``settings.system``; waits until at least one worker has joined (``connect_timeout``).
    Raises :class:`ClusterError` (one line) when the scheduler cannot be reached, no worker joins,
    or a needed package is missing; ``ValueError`` for bad settings.
    """
    if not isinstance(settings, ClusterSettings):
        settings = cluster_settings(settings, scheduler=scheduler)
    elif scheduler is not None:
        settings = dataclasses.replace(settings, scheduler=_check_address(scheduler, "--scheduler"),
                                       scheduler_file=None, system=None)
    if settings.system == "local":
        executor = local_cluster_executor(settings.workers, task_retries=settings.task_retries,
                                          allowed_failures=settings.allowed_failures,
                                          memory_per_worker=settings.memory_per_worker,
                                          local_directory=settings.local_directory)
        _wait_for_first_worker(executor.client, settings.connect_timeout, "the local cluster")
        return executor
    distributed = _import_distributed()
    if settings.system in ("slurm", "pbs"):
        import dask

        with dask.config.set({"distributed.scheduler.allowed-failures": settings.allowed_failures}):
            cluster = _jobqueue_cluster(settings)
        client = distributed.Client(cluster)
        executor = DaskExecutor(client, cluster, settings.task_retries, settings.describe(),
                                expected_workers=settings.workers, system=settings.system,
                                keep_workers=settings.workers)
        _wait_for_first_worker(client, settings.connect_timeout, f"the {settings.system} cluster")
        return executor
    target = settings.scheduler
    try:
        if settings.scheduler_file:
            if not os.path.exists(settings.scheduler_file):
                raise ClusterError(f"cluster.scheduler_file {settings.scheduler_file!r} does not exist")
            client = distributed.Client(scheduler_file=settings.scheduler_file, timeout=settings.connect_timeout)
            target = settings.scheduler_file
        else:
            client = distributed.Client(settings.scheduler, timeout=settings.connect_timeout)
    except ClusterError:
        raise
    except Exception as err:
        raise ClusterError(f"could not reach the Dask scheduler at {target}: "
                           f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else 'no reply'}") from None
    executor = DaskExecutor(client, None, settings.task_retries, settings.describe())
    _wait_for_first_worker(client, settings.connect_timeout, f"the scheduler at {target}")
    _check_single_thread_workers(executor)
    return executor
