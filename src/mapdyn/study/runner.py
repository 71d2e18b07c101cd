"""Ensemble runner: idempotent tasks handed to any :class:`concurrent.futures.Executor`.

A task is (study folder, task id) → run or resume, and returns a :class:`TaskResult`:

* :func:`trajectory_task` — one on-the-fly trajectory (molecules, or a model through the model
  adapter with ``electronic.engine = "on_the_fly"``).  It continues from the trajectory's last
  good checkpoint (:class:`mapdyn.study.checkpoint.TrajectoryStore`), writes a frame chunk and a restart
  state every ``dynamics.checkpoint_every`` steps, and returns at once if the trajectory is done.
* :func:`chunk_task` — a chunk of model trajectories through the batched diabatic engine
  (:func:`mapdyn.core.propagators.run_diabatic`); one file per chunk and time segment, written once.

Tasks carry paths, not data, so the same code runs in local processes
(:func:`local_executor`: one process per core, one OpenMP/BLAS thread each) or on a Dask cluster
(:mod:`mapdyn.study.cluster` builds an executor with the same interface).  Re-running a task gives the
same files: trajectory i draws from its own seeded stream and the backends are pure functions of
(positions, guess), so a restarted trajectory continues exactly where it stopped (bit for bit on
the model backends).

Stopping: :meth:`mapdyn.study.folder.Study.request_stop` creates ``stop.request`` in the study folder;
tasks look for it after every checkpoint and return "interrupted".  Local worker processes
ignore SIGINT (the parent handles Ctrl-C) and stop at the next checkpoint if the parent dies.
"""

from __future__ import annotations

import concurrent.futures as cf
import dataclasses
import logging
import multiprocessing
import os
import re
import signal
import time
import traceback
from typing import Callable, Sequence

import numpy as np

from mapdyn.files import write_json
from mapdyn.study.backend_factory import make_backend, make_model, model_initial_ensemble
from mapdyn.study.checkpoint import TrajectoryStore, consolidation_meta, write_h5
from mapdyn.study.cluster import dask_worker_leaving
from mapdyn.study.diagnostics import WARNINGS_FILE, read_warnings, record_warnings
from mapdyn.study.folder import CHUNKS, Study, write_marker
from mapdyn.study.initial_conditions import initial_row
from mapdyn.study.integrity import is_environment_fault
from mapdyn.study.threads import SINGLE_THREAD_ENV, use_single_thread

__all__ = ["TaskResult", "EnsembleSummary", "trajectory_task", "chunk_task", "run_task", "local_executor",
           "SerialExecutor",
           "run_ensemble", "Progress"]


log = logging.getLogger(__name__)
_SEEN_WARNINGS: set = set()
_PARENT_PID: int | None = None
_STUDY_CACHE: dict = {}
#: in-process runs (:class:`SerialExecutor`): the runner's stop callable, checked at checkpoints.
_LOCAL_STOP: Callable[[], bool] | None = None


def _stop_requested(study: "Study") -> bool:
    return os.path.exists(study.stop_path) or (_LOCAL_STOP is not None and _LOCAL_STOP())


@dataclasses.dataclass
class TaskResult:
    """What a task did: ``status`` finished | failed | interrupted | skipped (already done);
    ``steps`` trajectory-steps computed in this call; ``seconds`` wall time; ``reason``."""

    kind: str
    index: int
    status: str
    steps: int = 0
    seconds: float = 0.0
    reason: str = ""
    ntraj: int = 1


def _worker_init(parent_pid: int | None = None) -> None:
    """Local worker: one thread, SIGINT left to the parent, and it dies with its parent: the kernel
    sends SIGKILL when the parent dies (Linux ``PR_SET_PDEATHSIG``), and a watchdog thread
    polls the parent id every 0.5 s elsewhere.  Files stay consistent: every write is atomic."""
    global _PARENT_PID
    os.environ.update(SINGLE_THREAD_ENV)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _PARENT_PID = os.getppid() if parent_pid is None else int(parent_pid)  # given: it may be dead already
    _die_with_parent()


def _die_with_parent() -> None:
    import threading

    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGKILL), 0, 0, 0)  # PR_SET_PDEATHSIG = 1 (linux/prctl.h)
    except (OSError, AttributeError):
        pass
    if _orphaned():  # the parent died before the request above took effect
        os._exit(3)

    def watch() -> None:
        while True:
            time.sleep(0.5)
            if _orphaned():
                os._exit(3)

    threading.Thread(target=watch, name="mapdyn-parent-watch", daemon=True).start()


def _orphaned() -> bool:
    """The runner that started this local worker died, or this Dask worker is shutting down (its
    batch job was cancelled or ran out of time): the task must stop writing, its trajectory is
    re-run elsewhere from the last checkpoint."""
    return (_PARENT_PID is not None and os.getppid() != _PARENT_PID) or dask_worker_leaving()


def _open(study_dir: str) -> Study:
    """The study, cached per process while its manifest is unchanged."""
    mpath = os.path.join(study_dir, "manifest.json")
    key = (os.path.abspath(study_dir), os.stat(mpath).st_mtime_ns)
    st = _STUDY_CACHE.get(key)
    if st is None:
        st = Study(study_dir)
        _STUDY_CACHE.clear()
        _STUDY_CACHE[key] = st
    return st


_BACKENDS: dict = {}


def _backend_for(study: Study):
    key = (study.folder, study.manifest["source_sha256"])
    if key not in _BACKENDS:
        _BACKENDS.clear()
        _BACKENDS[key] = make_backend(study.config)
    return _BACKENDS[key]


# ----------------------------------------------------------------------------------------------
# on-the-fly trajectories
# ----------------------------------------------------------------------------------------------
def _fresh_driver(study: Study, index: int):
    """A new :class:`MappingDynamics` at t = 0 for trajectory ``index`` (seeded stream)."""
    from ase import Atoms, units

    from mapdyn.core.sampling import trajectory_generator
    from mapdyn.driver.dynamics import MappingDynamics
    from mapdyn.units import AMU_IN_ME

    cfg = study.config
    d = cfg.dynamics
    backend = _backend_for(study)
    p_ase = AMU_IN_ME * units.AUT / units.Bohr  # ASE momentum unit in a.u.
    if cfg.is_model:
        model = backend.model
        rng = trajectory_generator(cfg.ensemble.seed, index)
        D = model.ndof
        R0, k, sR = (np.asarray(v, dtype=float) for v in (cfg.initial.position_bohr, cfg.initial.momentum_au,
                                                           cfg.initial.width_bohr))
        sP = 0.5 / sR
        R = R0 + sR * rng.standard_normal(D)  # same draw order as gaussian_wavepacket_ensemble
        P = k + sP * rng.standard_normal(D)
        masses = backend.atom_masses()
        atoms = Atoms(["H"] * backend.natoms, positions=backend.positions_from_model(R) * units.Bohr,
                      masses=masses / AMU_IN_ME)
        atoms.set_momenta(backend.positions_from_model(P) / p_ase)
        state = cfg.initial.state
    else:
        pos, mom, state, rng_state, masses = initial_row(study, index)
        rng = np.random.default_rng()
        rng.bit_generator.state = rng_state
        atoms = Atoms(list(cfg.molecule.symbols), positions=pos * units.Bohr, masses=masses / AMU_IN_ME)
        atoms.set_momenta(mom / p_ase)
    return MappingDynamics(atoms, backend, d.time_step_au * units.AUT, int(state), cfg.options, rng=rng,
                           electronic_propagation=d.propagation, substeps=d.substeps,
                           drift_threshold=d.drift_threshold_hartree, stop_on_drift=d.stop_on_drift,
                           record_interval=d.record_every, on_backend_error="stop")


def _restored_driver(study: Study, state):
    from ase import Atoms, units

    from mapdyn.driver.dynamics import MappingDynamics
    from mapdyn.units import AMU_IN_ME

    cfg = study.config
    d = cfg.dynamics
    backend = _backend_for(study)
    n = state.positions.shape[0]
    symbols = ["H"] * n if cfg.is_model else list(cfg.molecule.symbols)
    if cfg.is_model:
        masses = backend.atom_masses()
    else:
        masses = initial_row(study, 0)[4]
    atoms = Atoms(symbols, positions=state.positions * units.Bohr, masses=masses / AMU_IN_ME)
    return MappingDynamics(atoms, backend, d.time_step_au * units.AUT, int(state.settings["initial_state"]),
                           cfg.options, electronic_propagation=d.propagation, substeps=d.substeps,
                           drift_threshold=d.drift_threshold_hartree, stop_on_drift=d.stop_on_drift,
                           record_interval=d.record_every, on_backend_error="stop", restart_state=state)


def trajectory_task(study_dir: str, index: int) -> TaskResult:
    """Run or resume on-the-fly trajectory ``index`` of the study in ``study_dir`` (idempotent)."""
    import warnings

    t0 = time.perf_counter()
    use_single_thread()
    study = _open(study_dir)
    folder = study.trajectory_folder(index)
    store = TrajectoryStore(folder)
    os.makedirs(folder, exist_ok=True)
    marker = os.path.join(folder, "running.json")
    failure = os.path.join(folder, "failure.json")
    target = study.nsteps
    K = study.config.dynamics.checkpoint_every
    steps_done = 0
    caught: list = []
    step_now = 0
    wpath = os.path.join(folder, WARNINGS_FILE)

    def flush_warnings() -> None:
        record_warnings(wpath, index, step_now, caught)
        del caught[:]

    try:
        point = store.restart_point()
        meta = point.meta
        if point.state is not None and (point.state.stopped or point.state.step >= target):
            failed = point.state.stopped and not point.state.end_event
            store.consolidate(point)  # completes a consolidation a kill interrupted (no-op when done)
            return TaskResult("trajectory", index, "failed" if failed else "skipped",
                              reason=point.state.stop_reason or "")
        write_marker(marker)
        if os.path.exists(failure):
            os.unlink(failure)
        store.adopt(point)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")  # collected with their step into warnings.json
            # interpreter-level notices about files PySCF leaves to the garbage collector are not
            # about the dynamics; they stay out of the trajectory record
            warnings.filterwarnings("ignore", category=ResourceWarning)
            if point.state is None:
                dyn = _fresh_driver(study, index)
                chunks, digests = store.commit(dyn.state, dyn.frames, 0, _state_meta(study, dyn), [])
                dyn.frames.clear()
            else:
                dyn = _restored_driver(study, point.state)
                chunks, digests = point.chunks, list(meta.get("chunk_sha256", []))
            merged = consolidation_meta(meta)  # chunks already in frames.h5 (an extended finished trajectory)
            while dyn.state.step < target and not dyn.state.stopped:
                if _stop_requested(study):
                    return TaskResult("trajectory", index, "interrupted", steps_done, time.perf_counter() - t0)
                before = dyn.state.step
                dyn.run(min(K, target - before))
                if _orphaned():  # the runner died: leave the files to the next resume
                    os._exit(3)
                steps_done += dyn.state.step - before
                chunks, digests = store.commit(dyn.state, dyn.frames, chunks, {**_state_meta(study, dyn), **merged}, digests)
                dyn.frames.clear()
                step_now = dyn.state.step
                flush_warnings()
            step_now = dyn.state.step
            flush_warnings()
        st = dyn.state
        if st.stopped or st.step >= target:  # finished: its chunks become one file
            store.consolidate()
        if st.stopped and not st.end_event:
            return TaskResult("trajectory", index, "failed", steps_done, time.perf_counter() - t0, st.stop_reason or "")
        if st.stopped:  # ended in a channel (e.g. reached the S1/S0 region): an outcome, not a failure
            return TaskResult("trajectory", index, "finished", steps_done, time.perf_counter() - t0, st.stop_reason or "")
        return TaskResult("trajectory", index, "finished", steps_done, time.perf_counter() - t0)
    except Exception as err:  # isolate failures: record and report, never take the ensemble down
        if is_environment_fault(err):  # not the trajectory's fault: stop the run, resume later
            raise
        reason = f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}"
        write_json(failure, {"reason": reason, "traceback": traceback.format_exc(), "time": time.time()})
        return TaskResult("trajectory", index, "failed", steps_done, time.perf_counter() - t0, reason)
    finally:
        try:
            flush_warnings()
        except Exception:  # noqa: BLE001 - a warning record never takes the trajectory down
            pass
        if os.path.exists(marker):
            try:
                os.unlink(marker)
            except OSError:
                pass


def _state_meta(study: Study, dyn) -> dict:
    return {"study": study.name, "trajectory": None, "target_steps": study.nsteps,
            "timings": dict(dyn.timings), "method": dyn.options.describe()}


# ----------------------------------------------------------------------------------------------
# batched model chunks
# ----------------------------------------------------------------------------------------------
def chunk_task(study_dir: str, chunk: int) -> TaskResult:
    """Run (or continue to the study's end time) chunk ``chunk`` of a batched model study."""
    from mapdyn.core.propagators import run_diabatic
    from mapdyn.core.sampling import EnsembleState

    t0 = time.perf_counter()
    study = _open(study_dir)
    cfg = study.config
    _, first, count = study.chunks()[chunk]
    target = study.nsteps
    segs, problems = study.checked_chunk_segments(chunk, full=True)
    step = segs[-1][1]["end_step"] if segs else 0
    if problems:
        for seg in _segment_numbers(study, chunk):
            if seg >= len(segs):  # damaged, or not continuing the intact ones: recomputed
                os.unlink(study.chunk_segment_path(chunk, seg))
    if step >= target:
        return TaskResult("chunk", chunk, "skipped", ntraj=count)
    marker = study.path(CHUNKS, f"chunk_{chunk:04d}.running")
    failure = study.path(CHUNKS, f"chunk_{chunk:04d}.failure.json")
    os.makedirs(study.path(CHUNKS), exist_ok=True)
    write_marker(marker)
    try:
        if os.path.exists(failure):
            os.unlink(failure)
        model = make_model(cfg)
        if segs:
            from mapdyn.study.checkpoint import read_h5

            last, _ = read_h5(segs[-1][0])
            state = EnsembleState(last["final_R"], last["final_P"], last["final_x"], last["final_p"],
                                  last["final_gamma"] if "final_gamma" in last else None,
                                  float(last["final_time"]), np.arange(first, first + count))
        else:
            state = model_initial_ensemble(cfg, model, count, first)
        import warnings

        with warnings.catch_warnings(record=True) as caught_chunk:
            warnings.simplefilter("always")
            try:
                run = run_diabatic(model, state, cfg.options, cfg.dynamics.time_step_au, target - step,
                                   record_every=cfg.dynamics.record_every, record_nuclei=True)
            finally:  # step of a chunk warning: the segment's end step
                record_warnings(study.path(CHUNKS, f"chunk_{chunk:04d}.warnings.json"), first, target, caught_chunk)
        keep = slice(1, None) if segs else slice(None)  # a continuation's first frame repeats the last one
        f = run.final
        arrays = {"times": run.times[keep], "actions_adiabatic": run.actions_adiabatic[keep],
                  "actions_diabatic": run.actions_diabatic[keep], "energy": run.energy[keep],
                  "R": run.R[keep], "P": run.P[keep], "final_R": f.R, "final_P": f.P, "final_x": f.x,
                  "final_p": f.p, "final_time": np.float64(f.time), "indices": np.arange(first, first + count)}
        if f.gamma_adjusted is not None:
            arrays["final_gamma"] = f.gamma_adjusted
        write_h5(study.chunk_segment_path(chunk, len(segs)), arrays,
                 {"chunk": chunk, "first": first, "count": count, "start_step": step, "end_step": target,
                  "segment": len(segs), "seconds": time.perf_counter() - t0})
        return TaskResult("chunk", chunk, "finished", (target - step) * count, time.perf_counter() - t0, ntraj=count)
    except Exception as err:
        if is_environment_fault(err):
            raise
        reason = f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}"
        write_json(failure, {"reason": reason, "traceback": traceback.format_exc(), "time": time.time()})
        return TaskResult("chunk", chunk, "failed", 0, time.perf_counter() - t0, reason, ntraj=count)
    finally:
        try:
            os.unlink(marker)
        except OSError:
            pass


def _segment_numbers(study: Study, chunk: int) -> list[int]:
    from mapdyn.study.folder import _chunk_files

    return _chunk_files(study.path(CHUNKS), chunk)


def run_task(study_dir: str, task_id: int) -> TaskResult:
    """The task of ``task_id`` for this study (chunk or trajectory)."""
    study = _open(study_dir)
    return chunk_task(study_dir, task_id) if study.batched else trajectory_task(study_dir, task_id)


# ----------------------------------------------------------------------------------------------
# runner
# ----------------------------------------------------------------------------------------------
def local_executor(workers: int) -> cf.ProcessPoolExecutor:
    """``workers`` spawned processes with one OpenMP/BLAS thread each (set before they start)."""
    os.environ.update(SINGLE_THREAD_ENV)
    return cf.ProcessPoolExecutor(max_workers=int(workers), mp_context=multiprocessing.get_context("spawn"),
                                  initializer=_worker_init, initargs=(os.getpid(),))


class SerialExecutor(cf.Executor):
    """Runs each task at once in this process (``workers = 1``: no process start-up cost)."""

    max_workers = 1

    def submit(self, fn, /, *args, **kwargs) -> cf.Future:
        fut: cf.Future = cf.Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except BaseException as err:  # noqa: BLE001 - handed to the caller through the future
            if isinstance(err, KeyboardInterrupt):
                raise
            fut.set_exception(err)
        return fut


@dataclasses.dataclass
class Progress:
    """A progress snapshot: trajectories done/failed/total, steps done/total, steps per second, ETA (s)."""

    done: int
    failed: int
    total: int
    steps: int
    total_steps: int
    steps_per_second: float
    eta_seconds: float | None
    elapsed: float
    interrupted: bool = False

    def line(self) -> str:
        eta = "--" if self.eta_seconds is None else _fmt_seconds(self.eta_seconds)
        return (f"[{self.done + self.failed}/{self.total}] done {self.done}  failed {self.failed}  "
                f"steps {self.steps}/{self.total_steps}  {self.steps_per_second:.3g} steps/s  ETA {eta}"
                + ("  (stopping after the current checkpoint)" if self.interrupted else ""))


def _fmt_seconds(s: float) -> str:
    s = max(0.0, float(s))
    if s < 90:
        return f"{s:.0f} s"
    if s < 5400:
        return f"{s / 60:.1f} min"
    return f"{s / 3600:.1f} h"


@dataclasses.dataclass
class EnsembleSummary:
    """Outcome of :func:`run_ensemble`: per-task results, counts and wall time."""

    results: list
    finished: int
    failed: int
    interrupted: int
    skipped: int
    steps: int
    seconds: float

    @property
    def complete(self) -> bool:
        return self.interrupted == 0


def _live_steps(study: Study, ids: Sequence[int]) -> int:
    """Trajectory-steps reached by running trajectory tasks (from their state files)."""
    if study.batched:
        return 0
    total = 0
    for i in ids:
        meta = TrajectoryStore(study.trajectory_folder(i)).read_meta()
        if meta:
            total += int(meta.get("step", 0))
    return total


def _log_task(study: Study, res: TaskResult) -> None:
    """Log a returned task (study log) and the warnings its worker recorded."""
    level = logging.WARNING if res.status == "failed" else logging.INFO
    log.log(level, "%s %d %s (%d steps, %.1f s)%s", res.kind, res.index, res.status, res.steps, res.seconds,
            f": {res.reason}" if res.reason else "")
    path = (study.path(CHUNKS, f"chunk_{res.index:04d}.warnings.json") if study.batched
            else os.path.join(study.trajectory_folder(res.index), WARNINGS_FILE))
    for w in read_warnings(path):
        shape = (study.folder, w["category"], re.sub(r"[-+]?\d+\.?\d*(?:[eE][-+]?\d+)?", "#", w["message"]))
        first = shape not in _SEEN_WARNINGS  # the console gets each kind once, the log file every one
        _SEEN_WARNINGS.add(shape)
        log.log(logging.WARNING if first else logging.INFO, "%s %d, step %d: %s: %s%s", res.kind, res.index,
                w["first_step"], w["category"], w["message"],
                " (further ones of this kind go to the log file only)" if first else "")


def run_ensemble(study: Study, executor: cf.Executor | None = None, workers: int | None = None, *,
                 tasks: Sequence[int] | None = None, retry_failed: bool = False,
                 progress: Callable[[Progress], None] | None = None, progress_interval: float = 1.0,
                 stop: Callable[[], bool] | None = None) -> EnsembleSummary:
    """Run every unfinished task of ``study`` on ``executor`` (default: local processes).

    At most as many tasks are in flight as the executor has workers, so a stop request leaves no
    queue behind.  ``stop()`` returning True (e.g. after Ctrl-C) writes the stop request; running
    tasks return after their current checkpoint.  Failed tasks are counted, not retried, unless
    ``retry_failed``.
    """
    t_start = time.perf_counter()
    study.clear_stop()
    status = {e.index: e for e in study.status().entries}
    ids = list(tasks) if tasks is not None else study.task_ids()
    todo = [i for i in ids if status[i].status != "finished" and (retry_failed or status[i].status != "failed")]
    ntraj_of = {e.index: len(e.trajectories) for e in status.values()}
    total = sum(ntraj_of[i] for i in ids)
    done = sum(ntraj_of[i] for i in ids if status[i].status == "finished")
    failed = sum(ntraj_of[i] for i in ids if status[i].status == "failed" and i not in todo)
    total_steps = study.nsteps * total
    steps_before = sum(min(status[i].step, study.nsteps) * ntraj_of[i] for i in ids)
    global _LOCAL_STOP
    own = executor is None
    if own:
        workers = int(workers or study.config.ensemble.workers)
        executor = SerialExecutor() if workers == 1 else local_executor(workers)
    if isinstance(executor, SerialExecutor):
        _LOCAL_STOP = stop
    capacity = int(workers or getattr(executor, "max_workers", None) or getattr(executor, "_max_workers", 1) or 1)
    results: list[TaskResult] = []
    in_flight: dict = {}
    pending = list(todo)
    finished_steps = 0
    interrupted = False
    last_report = 0.0
    start_steps_in_flight: dict = {}

    def snapshot() -> Progress:
        live = _live_steps(study, list(in_flight.values()))
        base = sum(start_steps_in_flight.values())
        computed = finished_steps + max(0, live - base)
        elapsed = time.perf_counter() - t_start
        rate = computed / elapsed if elapsed > 0 else 0.0
        steps_now = steps_before + computed
        remaining = total_steps - steps_now
        eta = remaining / rate if rate > 0 else None
        return Progress(done, failed, total, int(min(steps_now, total_steps)), total_steps, rate, eta, elapsed, interrupted)

    try:
        while pending or in_flight:
            if not interrupted and stop is not None and stop():
                interrupted = True
                study.request_stop()
            while pending and not interrupted and len(in_flight) < capacity:
                i = pending.pop(0)
                in_flight[executor.submit(run_task, study.folder, i)] = i
                start_steps_in_flight[i] = 0 if study.batched else min(status[i].step, study.nsteps)
            if not in_flight:
                break
            finished_now, _ = cf.wait(list(in_flight), timeout=min(progress_interval, 0.5), return_when=cf.FIRST_COMPLETED)
            for fut in finished_now:
                i = in_flight.pop(fut)
                start_steps_in_flight.pop(i, None)
                try:
                    res = fut.result()
                except Exception as err:  # the worker process itself died (or a Dask KilledWorker)
                    if is_environment_fault(err):
                        raise
                    res = TaskResult("chunk" if study.batched else "trajectory", i, "failed",
                                     reason=f"worker lost: {type(err).__name__}: {err}", ntraj=ntraj_of[i])
                    if not study.batched:  # the steps it checkpointed count; its files say how far it got
                        res.steps = 0
                results.append(res)
                _log_task(study, res)
                finished_steps += res.steps
                if res.status in ("finished", "skipped"):
                    done += res.ntraj
                elif res.status == "failed":
                    failed += res.ntraj
            if progress is not None and in_flight and time.perf_counter() - last_report >= progress_interval:
                last_report = time.perf_counter()
                progress(snapshot())
    except KeyboardInterrupt:
        interrupted = True
        study.request_stop()
        for fut in list(in_flight):
            try:
                results.append(fut.result())
            except Exception:
                pass
        raise
    finally:
        _LOCAL_STOP = None
        if own:
            executor.shutdown(wait=True, cancel_futures=True)
        if progress is not None:
            progress(snapshot())
        study.clear_stop()
    n_int = sum(1 for r in results if r.status == "interrupted") + len(pending)
    return EnsembleSummary(results, sum(1 for r in results if r.status == "finished"),
                           sum(1 for r in results if r.status == "failed"), n_int,
                           sum(1 for r in results if r.status == "skipped"),
                           sum(r.steps for r in results), time.perf_counter() - t_start)
