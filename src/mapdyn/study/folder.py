"""Study folder (docs/architecture.md#file-formats): layout, manifest, status derived from the files, initial
conditions of molecular studies, results as a :class:`mapdyn.analysis.TrajectorySet`.

Layout::

    <folder>/
      study.toml              the input file (sealed: its text and sha256 are in the manifest)
      manifest.json           what the study is now: trajectories, duration, task layout, history,
                              its own checksum
      .lock                   one writer at a time (:mod:`mapdyn.study.integrity`)
      initial_conditions.h5   molecules: reference geometry, Hessian, modes, sampled rows
      trajectories/000042/    per-trajectory checkpoints (:mod:`mapdyn.study.checkpoint`); folders
                              named traj_000042/ by older versions are still read
          state.h5, state_previous.h5, frames_0000.h5, ... (frames.h5 once finished),  running.json, failure.json, warnings.json
      mapdyn.log              study log of command-line runs
      chunks/chunk_0003_seg00.h5  batched model studies: one file per chunk of trajectories
                              (and per time segment after an ``extend`` to a later end time)
      report/                 figures, CSV, summary (written by the analysis)

Status is never stored separately: it is read from these files every time, so it cannot
disagree with them; every checksum and recorded digest is verified on the way and damaged tasks
are reported as "damaged" with the reason.  ``running.json`` (process id and host) marks work in
progress; a marker whose process on this host no longer exists is ignored.  Runs on SLURM/PBS
also keep ``cluster.json`` (their batch jobs, :mod:`mapdyn.study.batch_jobs`).

Units: times in the manifest in a.u. (``duration_au``) and fs (``duration_fs``, for reading).
"""


from __future__ import annotations

import dataclasses
import hashlib
import os
import shutil
import socket
import time

from mapdyn.files import atomic_write_text, read_json, write_json
from mapdyn.study.batch_jobs import current_batch_job
from mapdyn.study.checkpoint import (
    CheckpointError,
    TrajectoryStore,
    read_h5,
)
from mapdyn.study.config import ConfigError, StudyConfig, load_study_config
from mapdyn.study.diagnostics import WARNINGS_FILE, read_warnings
from mapdyn.study.integrity import LOCK_FILE, first_difference, manifest_checksum

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
FORMAT = 2
#: manifest entries every reader relies on
_MANIFEST_KEYS = {"format": int, "name": str, "source_sha256": str, "kind": str, "trajectories": int,
                  "duration_au": float, "nsteps": int, "history": list}
#: names that may be in a folder before it holds a study
_IGNORABLE = (LOCK_FILE,)


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
    warnings: int = 0


@dataclasses.dataclass
class StudyStatus:
    """Status of every task of a study, derived from the files."""

    name: str
    folder: str
    entries: list
    problems: list = dataclasses.field(default_factory=list)

    def counts(self) -> dict:
        """Trajectories per status (chunks count all their trajectories)."""
        out = {"finished": 0, "running": 0, "failed": 0, "pending": 0, "damaged": 0}
        for e in self.entries:
            out[e.status] += len(e.trajectories)
        return out

    @property
    def warning_count(self) -> int:
        """Distinct warnings recorded by the workers (see :mod:`mapdyn.study.diagnostics`)."""
        return int(sum(e.warnings for e in self.entries))

    @property
    def total_steps(self) -> int:
        return int(sum(e.target * len(e.trajectories) for e in self.entries))

    @property
    def done_steps(self) -> int:
        return int(sum(min(e.step, e.target) * len(e.trajectories) for e in self.entries))

    @property
    def complete(self) -> bool:
        return not self.problems and all(e.status in ("finished", "failed") for e in self.entries)

    def incomplete(self) -> list[str]:
        """One line per task whose results are missing or damaged (empty when complete)."""
        out = list(self.problems)
        for e in self.entries:
            if e.status in ("pending", "running", "damaged"):
                what = f"{e.kind} {e.index}" + (f" (trajectories {e.trajectories[0]}-{e.trajectories[-1]})"
                                                 if e.kind == "chunk" else "")
                why = "; ".join(e.problems) if e.problems else (
                    "not computed" if e.step == 0 and e.status == "pending" else f"{e.status} at step {e.step}/{e.target}")
                out.append(f"{what}: {e.status}: {why}")
        return out

    def text(self, details: bool = True) -> str:
        c = self.counts()
        n = sum(c.values())
        lines = [f"study {self.name} ({self.folder})",
                 f"trajectories: {n}  finished {c['finished']}  running {c['running']}  failed {c['failed']}  "
                 f"pending {c['pending']}  damaged {c['damaged']}   steps {self.done_steps}/{self.total_steps}   "
                 f"warnings {self.warning_count}"]
        lines += [f"  damaged {p}" for p in self.problems]
        drift = [e for e in self.entries if e.drift]
        if details:
            for e in self.entries:
                if e.status == "failed":
                    lines.append(f"  failed  {e.kind} {e.index}: {e.reason}")
            for e in self.entries:
                if e.status == "finished" and e.reason:  # ended in a channel (an outcome, counted as finished)
                    lines.append(f"  ended   {e.kind} {e.index}: {e.reason}")
            for e in self.entries:
                if e.status == "running":
                    lines.append(f"  running {e.kind} {e.index}: step {e.step}/{e.target}")
            for e in drift:
                d = e.drift
                lines.append(f"  drift   {e.kind} {e.index}: |ΔE| = {abs(d.get('drift_Eh', float('nan'))):.3g} Eh > "
                             f"{d.get('threshold_Eh', float('nan')):.3g} Eh at step {d.get('step')}")
            warned = [e for e in self.entries if e.warnings]
            for e in warned[:10]:
                lines.append(f"  warning {e.kind} {e.index}: {e.warnings} distinct warning(s), see warnings.json")
            if len(warned) > 10:
                lines.append(f"  warning … and {len(warned) - 10} more tasks with warnings (listed in report/summary.md)")
        else:
            lines.append(f"drift flags: {len(drift)}")
        for e in self.entries:
            for p in e.problems:
                lines.append(f"  damaged {e.kind} {e.index}: {p}")
        return "\n".join(lines)

    def as_dict(self) -> dict:
        return {"name": self.name, "folder": self.folder, "counts": self.counts(), "warnings": self.warning_count,
                "problems": list(self.problems),
                "steps": [self.done_steps, self.total_steps],
                "tasks": [dataclasses.asdict(e) for e in self.entries]}


class Study:
    """An open study folder."""

    def __init__(self, folder: str | os.PathLike):
        self.folder = os.path.abspath(os.fspath(folder))
        mpath = os.path.join(self.folder, MANIFEST)
        if os.path.exists(self.folder) and not os.path.isdir(self.folder):
            raise StudyError(f"{self.folder} is a file, not a study folder")
        if os.path.exists(mpath) and not os.path.isfile(mpath):
            raise StudyError(f"{mpath} is not a file; the study cannot be read")
        if not os.path.isfile(mpath):
            raise StudyError(f"{self.folder} is not a study folder (no {MANIFEST}); start one with 'mapdyn run STUDY.toml'")
        self.manifest = _read_manifest(mpath)
        self._config: StudyConfig | None = None
        self._check_seal()

    def _check_seal(self) -> None:
        """Refuse a ``study.toml`` that differs from the input the study was created with."""
        spath = self.path(STUDY_TOML)
        sealed = self.manifest["source_sha256"]
        nxt = spath + ".next"
        if os.path.isfile(nxt):  # an extend stopped between sealing and renaming: finish it
            if _text_hash(_read_text(nxt, spath)) == sealed:
                os.replace(nxt, spath)
            else:
                os.unlink(nxt)
        if not os.path.isfile(spath):
            raise StudyError(f"{spath} is missing; restore it (its sealed text is the 'sealed_input' entry of "
                             f"{MANIFEST})")
        text = _read_text(spath, spath)
        if _text_hash(text) != sealed:
            where = first_difference(self.manifest.get("sealed_input", ""), text)
            raise StudyError(f"{spath} was changed after the study was sealed: first difference at {where}; "
                             f"restore it, or start a new study (use 'mapdyn extend' for more trajectories or time)")

    # ------------------------------------------------------------------ creation
    @classmethod
    def create(cls, config: StudyConfig, folder: str | None = None) -> "Study":
        """Create the folder for ``config`` (or open it if it already holds the same input).

        A folder left by a creation that failed before any result was written (no initial
        conditions, trajectory states or chunks) is taken over by a different input.
        """
        folder = os.path.abspath(folder or config.folder)
        mpath = os.path.join(folder, MANIFEST)
        if os.path.isfile(mpath):
            if holds_results(folder):
                study = cls(folder)
                known = {study.manifest.get("source_sha256")} | {h.get("previous_sha256") for h in study.manifest["history"]
                                                                  if isinstance(h, dict)}
                if config.source_hash not in known:  # the input it was created or extended from continues it
                    raise StudyError(f"{folder} already holds a different study; use 'mapdyn resume {folder}' or "
                                     f"'mapdyn extend {folder}', or choose another study.folder")
                return study
            for name in (MANIFEST, STUDY_TOML, STUDY_TOML + ".next", STOP_REQUEST):  # no results: start over
                if os.path.exists(os.path.join(folder, name)):
                    os.unlink(os.path.join(folder, name))
            for sub in (TRAJECTORIES, CHUNKS):
                if os.path.isdir(os.path.join(folder, sub)):
                    shutil.rmtree(os.path.join(folder, sub))
        if os.path.exists(folder) and not os.path.isdir(folder):
            raise StudyError(f"{folder} is a file; choose another study.folder or --output")
        if os.path.isdir(folder) and [n for n in os.listdir(folder) if n not in _IGNORABLE]:
            raise StudyError(f"{folder} exists and is not empty; choose another study.folder")
        os.makedirs(folder, exist_ok=True)
        atomic_write_text(os.path.join(folder, STUDY_TOML), config.source_text)
        manifest = {"format": FORMAT, "name": config.name, "source_sha256": config.source_hash,
                    "sealed_input": config.source_text, "source_path": config.source_path,
                    "base_dir": os.path.dirname(config.source_path) if config.source_path else os.getcwd(),
                    "kind": "model_chunks" if config.batched else "trajectories",
                    "trajectories": config.ensemble.trajectories, "duration_au": config.dynamics.duration_au,
                    "duration_fs": _au_to_fs(config.dynamics.duration_au), "nsteps": config.dynamics.nsteps,
                    "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                    "history": [{"action": "create", "trajectories": config.ensemble.trajectories,
                                 "duration_au": config.dynamics.duration_au, "time": time.time()}]}
        if config.batched:
            manifest["chunks"] = _chunk_layout(0, config.ensemble.trajectories, config.ensemble.batch)
        manifest["manifest_sha256"] = manifest_checksum(manifest)
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
        new = self.path(TRAJECTORIES, f"{index:06d}")
        old = self.path(TRAJECTORIES, f"traj_{index:06d}")  # older layout: still read and continued
        return old if not os.path.isdir(new) and os.path.isdir(old) else new

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
        self.manifest["manifest_sha256"] = manifest_checksum(self.manifest)
        write_json(self.path(MANIFEST), self.manifest)
        self._config = None

    def _reseal(self, changes: dict) -> None:
        """Write the extended trajectories/end time into ``study.toml`` (a TOML writer) and reseal.

        Order: ``study.toml.next`` → manifest with the new seal → rename; an interruption in
        between is finished by the next open (:meth:`_check_seal`)."""
        import tomllib

        import tomli_w

        spath = self.path(STUDY_TOML)
        data = tomllib.loads(_read_text(spath, spath))
        if "trajectories" in changes:
            data.setdefault("ensemble", {})["trajectories"] = int(changes["trajectories"][1])
        if "duration_au" in changes:
            data.setdefault("dynamics", {})["duration"] = f"{float(changes['duration_au'][1])!r} au"
        text = tomli_w.dumps(data)
        atomic_write_text(spath + ".next", text)
        self.manifest["history"][-1]["previous_sha256"] = self.manifest["source_sha256"]
        self.manifest["source_sha256"] = _text_hash(text)
        self.manifest["sealed_input"] = text
        self._save_manifest()
        os.replace(spath + ".next", spath)

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
            self._reseal(changes)
        return changes

    # ------------------------------------------------------------------ status
    def chunk_segments(self, chunk: int) -> list[tuple[str, dict]]:
        """Intact segment files of a chunk in order, with their meta (stops at the first damaged one)."""
        return self.checked_chunk_segments(chunk)[0]

    def checked_chunk_segments(self, chunk: int, full: bool = False) -> tuple[list[tuple[str, dict]], list[str]]:
        """(intact segments in order with their meta, problems).  Every dataset checksum is
        verified when ``full``; otherwise the metadata checksum only.  Segments must continue one
        another (start step = previous end step) and match the manifest's chunk layout; the
        first one that does not ends the list and is named in ``problems``, as is any file after a
        gap."""
        _, first, count = self.chunks()[chunk]
        out: list[tuple[str, dict]] = []
        problems: list[str] = []
        seg = 0
        step = 0
        while os.path.exists(self.chunk_segment_path(chunk, seg)):
            path = self.chunk_segment_path(chunk, seg)
            try:
                _, meta = read_h5(path, None if full else [])
            except CheckpointError as err:
                problems.append(f"{os.path.basename(path)}: {err.reason}")
                break
            if (meta.get("start_step") != step or meta.get("first") != first or meta.get("count") != count
                    or meta.get("chunk") != chunk):
                problems.append(f"{os.path.basename(path)}: does not continue segment {seg - 1} of this chunk "
                                f"(start step {meta.get('start_step')}, expected {step})")
                break
            out.append((path, meta))
            step = int(meta["end_step"])
            seg += 1
        if not problems:
            later = [n for n in _chunk_files(self.path(CHUNKS), chunk) if n > seg]
            if later:
                problems.append(f"segment {seg} is missing but segment {min(later)} exists")
        return out, problems

    def check_layout(self) -> None:
        """Refuse (one line) a file where one of the study's folders belongs; nothing is deleted."""
        for sub in (TRAJECTORIES, CHUNKS, REPORT):
            if os.path.exists(self.path(sub)) and not os.path.isdir(self.path(sub)):
                raise StudyError(f"{self.path(sub)} is a file where the study keeps a folder; move it away and resume")

    def file_problems(self) -> list[str]:
        """Damage to study-level files (initial conditions, a file where a folder belongs)."""
        for sub in (TRAJECTORIES, CHUNKS):
            if os.path.exists(self.path(sub)) and not os.path.isdir(self.path(sub)):
                return [f"{sub} is not a folder; move it away and resume"]
        path = self.path(INITIAL_CONDITIONS)
        if os.path.exists(path):
            try:
                read_h5(path)
            except CheckpointError as err:
                return [f"{INITIAL_CONDITIONS}: {err.reason}; resume recomputes it"]
        return []

    def status(self, verify: bool = True) -> StudyStatus:
        """Status of every task from the files.  With ``verify`` every checksum and recorded digest
        is checked and damaged tasks get status "damaged" with the reason in ``problems``."""
        target = self.nsteps
        entries = []
        study_problems = self.file_problems() if verify else []
        if self.batched:
            for c, first, count in self.chunks():
                segs, problems = self.checked_chunk_segments(c, full=verify)
                step = segs[-1][1]["end_step"] if segs else 0
                running = marker_active(self.path(CHUNKS, f"chunk_{c:04d}.running"))
                failure = self.path(CHUNKS, f"chunk_{c:04d}.failure.json")
                status, reason = "pending", ""
                if running:
                    status = "running"
                elif problems:
                    status = "damaged"
                elif step >= target:
                    status = "finished"
                elif os.path.exists(failure):
                    status, reason = "failed", _failure_reason(failure)
                nwarn = len(read_warnings(self.path(CHUNKS, f"chunk_{c:04d}.warnings.json")))
                entries.append(TrajectoryStatus("chunk", c, status, int(step), target, reason, None,
                                                tuple(range(first, first + count)), tuple(problems), nwarn))
            return StudyStatus(self.name, self.folder, entries, study_problems)
        for i in range(self.ntraj):
            folder = self.trajectory_folder(i)
            store = TrajectoryStore(folder)
            meta, problems = store.verified_meta(full=verify)
            step = int(meta["step"]) if meta else 0
            drift = meta.get("drift_flag") if meta else None
            failure = os.path.join(folder, "failure.json")
            status, reason = "pending", ""
            if marker_active(os.path.join(folder, "running.json")):
                status = "running"
            elif problems:
                status = "damaged"
            elif meta and meta.get("stopped") and meta.get("end_event"):  # ended in a channel: an outcome
                status, reason = "finished", meta.get("stop_reason") or "ended"
            elif meta and meta.get("stopped"):
                status, reason = "failed", meta.get("stop_reason") or "stopped"
            elif meta and step >= target:
                status = "finished"
            elif os.path.exists(failure):
                status, reason = "failed", _failure_reason(failure)
            nwarn = len(read_warnings(os.path.join(folder, WARNINGS_FILE)))
            entries.append(TrajectoryStatus("trajectory", i, status, step, target, reason, drift, (i,),
                                            tuple(problems), nwarn))
        return StudyStatus(self.name, self.folder, entries, study_problems)


def _failure_reason(path: str) -> str:
    try:
        return str(read_json(path).get("reason", ""))
    except (OSError, ValueError, AttributeError):
        return "failure record unreadable"


def _chunk_files(folder: str, chunk: int) -> list[int]:
    """Segment numbers of the files of ``chunk`` present in ``folder``."""
    out = []
    prefix = f"chunk_{chunk:04d}_seg"
    if os.path.isdir(folder):
        for name in os.listdir(folder):
            if name.startswith(prefix) and name.endswith(".h5"):
                try:
                    out.append(int(name[len(prefix):-3]))
                except ValueError:
                    pass
    return out


def _text_hash(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def _read_text(path: str, name: str) -> str:
    try:
        with open(path, "rb") as fh:
            return fh.read().decode("utf-8")
    except UnicodeDecodeError:
        raise StudyError(f"{name} is damaged (not UTF-8 text)") from None


def _read_manifest(mpath: str) -> dict:
    """The manifest, checked: JSON, format version, required entries, checksum."""
    try:
        manifest = read_json(mpath)
    except (ValueError, UnicodeDecodeError) as err:
        raise StudyError(f"{mpath} is damaged (not JSON: {str(err).splitlines()[0]}); the study cannot be "
                         f"read") from None
    if not isinstance(manifest, dict):
        raise StudyError(f"{mpath} is damaged (not a JSON object)")
    fmt = manifest.get("format")
    if fmt != FORMAT:
        if isinstance(fmt, int) and not isinstance(fmt, bool) and fmt < FORMAT:
            raise StudyError(f"{mpath} has study format {fmt} (pickled restart data, written by an older mapdyn); "
                             f"this mapdyn reads format {FORMAT}: re-run it with the version that made it")
        raise StudyError(f"{mpath} has study format {fmt!r}; this mapdyn reads format {FORMAT} (written by a newer "
                         f"mapdyn? open it with that version)")
    for key, typ in _MANIFEST_KEYS.items():
        val = manifest.get(key)
        ok = isinstance(val, typ) or (typ is float and isinstance(val, int))
        if not ok or isinstance(val, bool):
            raise StudyError(f"{mpath} is damaged (entry {key!r} missing or not a {typ.__name__})")
    if manifest.get("manifest_sha256") != manifest_checksum(manifest):
        raise StudyError(f"{mpath} is damaged or was edited (its checksum does not match its content); "
                         f"restore it or start the study again")
    return manifest


def holds_results(folder: str) -> bool:
    """True when ``folder`` holds any computed result (initial conditions, a trajectory state or
    frame chunk, a model chunk): such a folder is never taken over by another input."""
    if os.path.exists(os.path.join(folder, INITIAL_CONDITIONS)):
        return True
    chunks = os.path.join(folder, CHUNKS)
    if os.path.isdir(chunks) and any(n.endswith(".h5") for n in os.listdir(chunks)):
        return True
    trajs = os.path.join(folder, TRAJECTORIES)
    if os.path.isdir(trajs):
        for sub in os.listdir(trajs):
            p = os.path.join(trajs, sub)
            if os.path.isdir(p) and any(n.endswith(".h5") for n in os.listdir(p)):
                return True
    return False


def _chunk_layout(first: int, count: int, batch: int) -> list[list[int]]:
    out = []
    a = first
    while a < first + count:
        n = min(batch, first + count - a)
        out.append([a, n])
        a += n
    return out


