"""Study folder (docs/architecture.md#file-formats): layout, manifest, status derived from the files, initial
conditions of molecular studies, results as a :class:`mapdyn.analysis.TrajectorySet`.

Layout::

    <folder>/
      study.toml              the input file, verbatim (its sha256 is in the manifest)
      manifest.json           what the study is now: trajectories, duration, task layout, history
      initial_conditions.h5   molecules: reference geometry, Hessian, modes, sampled rows
      trajectories/traj_000042/   per-trajectory checkpoints (:mod:`mapdyn.study.checkpoint`)
          state.h5, state_previous.h5, frames_0000.h5, ...,  running.json, failure.json
      chunks/chunk_0003_seg00.h5  batched model studies: one file per chunk of trajectories
                              (and per time segment after an ``extend`` to a later end time)
      report/                 figures, CSV, summary (written by the analysis)

Status is never stored separately: it is read from these files every time, so it cannot
disagree with them.  ``running.json`` (process id and host) marks work in progress; a marker
whose process on this host no longer exists is ignored.  Runs on SLURM/PBS also keep
``cluster.json`` (their batch jobs, :mod:`mapdyn.study.batch_jobs`).

Units: times in the manifest in a.u. (``duration_au``) and fs (``duration_fs``, for reading).
"""


from __future__ import annotations

import dataclasses
import os
import socket
import time

from mapdyn.files import read_json, write_json
from mapdyn.study.batch_jobs import current_batch_job
from mapdyn.study.checkpoint import (
    CheckpointError,
    TrajectoryStore,
    atomic_write,
    read_h5,
)
from mapdyn.study.config import ConfigError, StudyConfig, load_study_config

__all__ = ["Study", "StudyError", "TrajectoryStatus", "StudyStatus",
           "write_json", "read_json", "STUDY_TOML", "MANIFEST",
           "INITIAL_CONDITIONS"]

STUDY_TOML = "study.toml"
MANIFEST = "manifest.json"
INITIAL_CONDITIONS = "initial_conditions.h5"
TRAJECTORIES = "trajectories"
CHUNKS = "chunks"
REPORT = "report"
STOP_REQUEST = "stop.request"
FORMAT = 1


class StudyError(RuntimeError):
    """The study folder cannot be used as asked (one-line message)."""


def _au_to_fs(t: float) -> float:
    from ase import units

    return float(t * units.AUT / units.fs)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except (OSError, ValueError):
        return False
    try:  # a killed process whose parent died too may linger as a zombie until reaped
        with open(f"/proc/{int(pid)}/stat") as fh:
            if fh.read().rsplit(")", 1)[1].split()[0] in ("Z", "X"):
                return False
    except (OSError, IndexError):
        pass
    return True


def marker_active(path: str) -> bool:
    """True when the ``running.json``-style marker at ``path`` names a live process (or another host)."""
    try:
        info = read_json(path)
    except (OSError, ValueError):
        return False
    if info.get("host") != socket.gethostname():
        return True
    return _pid_alive(info.get("pid", -1))


def write_marker(path: str) -> None:
    info = {"pid": os.getpid(), "host": socket.gethostname(), "started": time.time()}
    job = current_batch_job()
    if job:  # inside a batch job: `mapdyn status` lists the trajectories of each job
        info["job"] = job
    write_json(path, info)


@dataclasses.dataclass
class TrajectoryStatus:
    """One task's state: ``kind`` "trajectory" or "chunk"; ``status`` finished/running/failed/pending;
    ``step`` reached and ``target`` steps; ``reason`` for failures; ``drift`` flag dict or None;
    ``trajectories`` the study indices it holds."""

    kind: str
    index: int
    status: str
    step: int
    target: int
    reason: str = ""
    drift: dict | None = None
    trajectories: tuple = ()
    problems: tuple = ()


@dataclasses.dataclass
class StudyStatus:
    """Status of every task of a study, derived from the files."""

    name: str
    folder: str
    entries: list

    def counts(self) -> dict:
        """Trajectories per status (chunks count all their trajectories)."""
        out = {"finished": 0, "running": 0, "failed": 0, "pending": 0}
        for e in self.entries:
            out[e.status] += len(e.trajectories)
        return out

    @property
    def total_steps(self) -> int:
        return int(sum(e.target * len(e.trajectories) for e in self.entries))

    @property
    def done_steps(self) -> int:
        return int(sum(min(e.step, e.target) * len(e.trajectories) for e in self.entries))

    @property
    def complete(self) -> bool:
        return all(e.status in ("finished", "failed") for e in self.entries)

    def text(self, details: bool = True) -> str:
        c = self.counts()
        n = sum(c.values())
        lines = [f"study {self.name} ({self.folder})",
                 f"trajectories: {n}  finished {c['finished']}  running {c['running']}  failed {c['failed']}  "
                 f"pending {c['pending']}   steps {self.done_steps}/{self.total_steps}"]
        drift = [e for e in self.entries if e.drift]
        if details:
            for e in self.entries:
                if e.status == "failed":
                    lines.append(f"  failed  {e.kind} {e.index}: {e.reason}")
            for e in self.entries:
                if e.status == "running":
                    lines.append(f"  running {e.kind} {e.index}: step {e.step}/{e.target}")
            for e in drift:
                d = e.drift
                lines.append(f"  drift   {e.kind} {e.index}: |ΔE| = {abs(d.get('drift_Eh', float('nan'))):.3g} Eh > "
                             f"{d.get('threshold_Eh', float('nan')):.3g} Eh at step {d.get('step')}")
            for e in self.entries:
                for p in e.problems:
                    lines.append(f"  damaged {e.kind} {e.index}: {p}")
        else:
            lines.append(f"drift flags: {len(drift)}")
        return "\n".join(lines)

    def as_dict(self) -> dict:
        return {"name": self.name, "folder": self.folder, "counts": self.counts(),
                "steps": [self.done_steps, self.total_steps],
                "tasks": [dataclasses.asdict(e) for e in self.entries]}


class Study:
    """An open study folder."""

    def __init__(self, folder: str | os.PathLike):
        self.folder = os.path.abspath(os.fspath(folder))
        mpath = os.path.join(self.folder, MANIFEST)
        if not os.path.isfile(mpath):
            raise StudyError(f"{self.folder} is not a study folder (no {MANIFEST}); start one with 'mapdyn run STUDY.toml'")
        self.manifest = read_json(mpath)
        self._config: StudyConfig | None = None

    # ------------------------------------------------------------------ creation
    @classmethod
    def create(cls, config: StudyConfig, folder: str | None = None) -> "Study":
        """Create the folder for ``config`` (or open it if it already holds the same input)."""
        folder = os.path.abspath(folder or config.folder)
        mpath = os.path.join(folder, MANIFEST)
        if os.path.isfile(mpath):
            study = cls(folder)
            if study.manifest.get("source_sha256") != config.source_hash:
                raise StudyError(f"{folder} already holds a different study; use 'mapdyn resume {folder}' or "
                                 f"'mapdyn extend {folder}', or choose another study.folder")
            return study
        if os.path.isdir(folder) and os.listdir(folder):
            raise StudyError(f"{folder} exists and is not empty; choose another study.folder")
        os.makedirs(folder, exist_ok=True)

        def write_toml(tmp: str) -> None:
            with open(tmp, "w") as fh:
                fh.write(config.source_text)

        atomic_write(os.path.join(folder, STUDY_TOML), write_toml)
        manifest = {"format": FORMAT, "name": config.name, "source_sha256": config.source_hash,
                    "source_path": config.source_path,
                    "base_dir": os.path.dirname(config.source_path) if config.source_path else os.getcwd(),
                    "kind": "model_chunks" if config.batched else "trajectories",
                    "trajectories": config.ensemble.trajectories, "duration_au": config.dynamics.duration_au,
                    "duration_fs": _au_to_fs(config.dynamics.duration_au), "nsteps": config.dynamics.nsteps,
                    "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                    "history": [{"action": "create", "trajectories": config.ensemble.trajectories,
                                 "duration_au": config.dynamics.duration_au, "time": time.time()}]}
        if config.batched:
            manifest["chunks"] = _chunk_layout(0, config.ensemble.trajectories, config.ensemble.batch)
        write_json(mpath, manifest)
        study = cls(folder)
        study._config = config.with_overrides()
        return study

    # ------------------------------------------------------------------ configuration
    @property
    def config(self) -> StudyConfig:
        """The study's configuration: the stored input plus the manifest's trajectories/duration."""
        if self._config is None:
            cfg = load_study_config(os.path.join(self.folder, STUDY_TOML), base_dir=self.manifest.get("base_dir"),
                             check_extras=False, default_name=self.manifest.get("name"))
            cfg = cfg.with_overrides(self.manifest["trajectories"], self.manifest["duration_au"])
            self._config = cfg
        return self._config

    @property
    def name(self) -> str:
        return self.manifest["name"]

    @property
    def batched(self) -> bool:
        return self.manifest["kind"] == "model_chunks"

    @property
    def ntraj(self) -> int:
        return int(self.manifest["trajectories"])

    @property
    def nsteps(self) -> int:
        return int(self.manifest["nsteps"])

    def path(self, *parts: str) -> str:
        return os.path.join(self.folder, *parts)

    def trajectory_folder(self, index: int) -> str:
        return self.path(TRAJECTORIES, f"traj_{index:06d}")

    def chunk_segment_path(self, chunk: int, segment: int) -> str:
        return self.path(CHUNKS, f"chunk_{chunk:04d}_seg{segment:02d}.h5")

    def chunks(self) -> list[tuple[int, int, int]]:
        """(chunk id, first trajectory, count) of a batched model study."""
        return [(c, int(a), int(n)) for c, (a, n) in enumerate(self.manifest.get("chunks", []))]

    def task_ids(self) -> list[int]:
        return [c for c, _, _ in self.chunks()] if self.batched else list(range(self.ntraj))

    @property
    def stop_path(self) -> str:
        return self.path(STOP_REQUEST)

    def request_stop(self) -> None:
        write_json(self.stop_path, {"time": time.time()})

    def clear_stop(self) -> None:
        if os.path.exists(self.stop_path):
            os.unlink(self.stop_path)

    def _save_manifest(self) -> None:
        write_json(self.path(MANIFEST), self.manifest)
        self._config = None

    # ------------------------------------------------------------------ extend
    def extend(self, trajectories: int | None = None, duration_au: float | None = None) -> dict:
        """Raise the trajectory count and/or the end time; finished work is kept.

        Returns what changed.  Refuses fewer trajectories or an earlier end time.
        """
        changes: dict = {}
        cfg = self.config
        if trajectories is not None:
            if trajectories < self.ntraj:
                raise ConfigError("--trajectories", f"= {trajectories}: the study already has {self.ntraj}; extend only adds")
            if trajectories > self.ntraj:
                changes["trajectories"] = [self.ntraj, int(trajectories)]
        if duration_au is not None:
            new = cfg.with_overrides(duration_au=duration_au).dynamics  # validates step multiples
            if new.nsteps < self.nsteps:
                raise ConfigError("--duration", f"= {_au_to_fs(duration_au):.6g} fs: earlier than the current end "
                                  f"({self.manifest['duration_fs']:.6g} fs); extend only goes later")
            if new.nsteps > self.nsteps:
                changes["duration_au"] = [self.manifest["duration_au"], new.duration_au]
                self.manifest["duration_au"] = new.duration_au
                self.manifest["duration_fs"] = _au_to_fs(new.duration_au)
                self.manifest["nsteps"] = new.nsteps
        if "trajectories" in changes:
            old, new_n = changes["trajectories"]
            if self.batched:
                self.manifest["chunks"] = self.manifest["chunks"] + _chunk_layout(old, new_n - old, cfg.ensemble.batch)
            self.manifest["trajectories"] = new_n
        if changes:
            self.manifest["history"].append({"action": "extend", **changes, "time": time.time()})
            self._save_manifest()
        return changes

    # ------------------------------------------------------------------ status
    def chunk_segments(self, chunk: int) -> list[tuple[str, dict]]:
        """Intact segment files of a chunk in order, with their meta (stops at the first damaged one)."""
        out = []
        seg = 0
        while os.path.exists(self.chunk_segment_path(chunk, seg)):
            path = self.chunk_segment_path(chunk, seg)
            try:
                _, meta = read_h5(path, [])
            except CheckpointError:
                break
            out.append((path, meta))
            seg += 1
        return out

    def status(self) -> StudyStatus:
        target = self.nsteps
        entries = []
        if self.batched:
            for c, first, count in self.chunks():
                segs = self.chunk_segments(c)
                step = segs[-1][1]["end_step"] if segs else 0
                running = marker_active(self.path(CHUNKS, f"chunk_{c:04d}.running"))
                failure = self.path(CHUNKS, f"chunk_{c:04d}.failure.json")
                status, reason = "pending", ""
                if step >= target:
                    status = "finished"
                elif running:
                    status = "running"
                elif os.path.exists(failure):
                    status, reason = "failed", read_json(failure).get("reason", "")
                entries.append(TrajectoryStatus("chunk", c, status, int(step), target, reason, None,
                                                tuple(range(first, first + count))))
            return StudyStatus(self.name, self.folder, entries)
        for i in range(self.ntraj):
            folder = self.trajectory_folder(i)
            store = TrajectoryStore(folder)
            meta = store.read_meta()
            problems: tuple = ()
            if meta is None and os.path.exists(store.state_path):
                problems = (f"{store.state_path} is damaged; resume falls back to the previous state or the start",)
                try:
                    _, meta = read_h5(store.previous_state_path, [])
                except CheckpointError:
                    meta = None
            step = int(meta["step"]) if meta else 0
            drift = meta.get("drift_flag") if meta else None
            failure = os.path.join(folder, "failure.json")
            status, reason = "pending", ""
            if meta and meta.get("stopped"):
                status, reason = "failed", meta.get("stop_reason") or "stopped"
            elif meta and step >= target:
                status = "finished"
            elif marker_active(os.path.join(folder, "running.json")):
                status = "running"
            elif os.path.exists(failure):
                try:
                    status, reason = "failed", read_json(failure).get("reason", "")
                except (OSError, ValueError):
                    status, reason = "failed", "failure record unreadable"
            entries.append(TrajectoryStatus("trajectory", i, status, step, target, reason, drift, (i,), problems))
        return StudyStatus(self.name, self.folder, entries)


def _chunk_layout(first: int, count: int, batch: int) -> list[list[int]]:
    out = []
    a = first
    while a < first + count:
        n = min(batch, first + count - a)
        out.append([a, n])
        a += n
    return out


