"""Study folder (DESIGN.md §6): layout, manifest, status derived from the files, initial
conditions of molecular studies, results as a :class:`mapdyn.analysis.core_tmp.TrajectorySet`.

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
whose process on this host no longer exists is ignored.

Units: times in the manifest in a.u. (``duration_au``) and fs (``duration_fs``, for reading).
"""

from __future__ import annotations

import dataclasses
import json
import os
import pickle
import socket
import time
from typing import Any, Callable

import numpy as np

from mapdyn.study.checkpoint import CheckpointError, TrajectoryStore, atomic_write, read_h5, write_h5
from mapdyn.study.config import ConfigError, StudyConfig, load_study

__all__ = ["Study", "StudyError", "TrajectoryStatus", "StudyStatus", "make_backend", "prepare_initial_conditions",
           "load_trajectory_set", "write_study_report", "write_json", "read_json", "STUDY_TOML", "MANIFEST",
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


def write_json(path: str, obj: Any) -> None:
    """Atomic JSON write (temp file, fsync, os.replace)."""
    text = json.dumps(obj, indent=1, sort_keys=True)

    def write(tmp: str) -> None:
        with open(tmp, "w") as fh:
            fh.write(text)
            fh.flush()

    atomic_write(path, write)


def read_json(path: str) -> Any:
    with open(path) as fh:
        return json.load(fh)


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
    write_json(path, {"pid": os.getpid(), "host": socket.gethostname(), "started": time.time()})


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
            cfg = load_study(os.path.join(self.folder, STUDY_TOML), base_dir=self.manifest.get("base_dir"),
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


# ----------------------------------------------------------------------------------------------
# backends and models
# ----------------------------------------------------------------------------------------------
def make_model(config: StudyConfig):
    """The diabatic model of a model study."""
    from mapdyn.models.tully import tully_model

    return tully_model(config.electronic.model, **config.electronic.model_parameters)


def make_backend(config: StudyConfig):
    """The electronic backend of the dynamics (PySCF pinned to one thread)."""
    e = config.electronic
    if e.backend == "model":
        from mapdyn.backends.model_adapter import ModelAdapterBackend

        return ModelAdapterBackend(make_model(config))
    if e.backend == "callback":
        from mapdyn.backends.callback import CallbackBackend
        from mapdyn.study.config import _resolve_callback

        return CallbackBackend(_resolve_callback(e.function, os.getcwd()), e.states, config.molecule.natoms)
    from pyscf import lib

    lib.num_threads(1)
    symbols = list(config.molecule.symbols)
    if e.backend == "casscf":
        from mapdyn.backends.pyscf.casscf import CASSCFBackend

        return CASSCFBackend(symbols, **e.options)
    from mapdyn.backends.pyscf.tddft import TDDFTBackend

    return TDDFTBackend(symbols, threads=1, **e.options)


class _GroundStateOf:
    """State 0 of an excited-state backend, as a one-state backend (for optimisation/Hessian)."""

    nstates = 1

    def __init__(self, backend):
        self.backend = backend

    def compute(self, positions_bohr, guess=None, need_gradients=True):
        from mapdyn.backends.contract import ElectronicResult

        r = self.backend.compute(positions_bohr, guess=guess, need_gradients=need_gradients)
        return ElectronicResult(energies=np.asarray(r.energies[:1]),
                                gradients=None if r.gradients is None else np.asarray(r.gradients[:1]),
                                guess=r.guess, converged=r.converged, diagnostics=dict(r.diagnostics))


def _ground_state_backend(config: StudyConfig, dynamics_backend):
    e = config.electronic
    if config.initial.normal_modes_from == "dynamics":
        return _GroundStateOf(dynamics_backend), e.level_of_theory + " (state 0)"
    from mapdyn.backends.pyscf.ground_state import PySCFGroundState

    xc = e.options.get("xc") if e.backend == "tddft" else None
    gs = PySCFGroundState(list(config.molecule.symbols), e.basis, xc=xc, charge=config.molecule.charge)
    return gs, gs.level_of_theory


# ----------------------------------------------------------------------------------------------
# initial conditions of molecular studies
# ----------------------------------------------------------------------------------------------
def _sample_rows(config: StudyConfig, modes, indices) -> dict:
    """Wigner rows for trajectory ``indices``: positions/momenta (a.u.) and the generator state
    after the nuclear draws (the driver draws the mapping variables from it)."""
    from mapdyn.initial.sampling import draw_wigner
    from mapdyn.core.sampling import trajectory_generator

    pos, mom, rng_states = [], [], []
    for i in indices:
        rng = trajectory_generator(config.ensemble.seed, int(i))
        s = draw_wigner(modes, rng, config.initial.temperature_kelvin)
        pos.append(s.positions_bohr)
        mom.append(s.momenta)
        rng_states.append(rng.bit_generator.state)
    return {"positions_bohr": np.array(pos), "momenta_au": np.array(mom), "rng_states": rng_states}


def _choose_states(config: StudyConfig, backend, positions, guess) -> tuple[np.ndarray, dict]:
    init = config.initial
    n = positions.shape[0]
    if init.excitation == "fixed":
        return np.full(n, int(init.state)), {}
    from mapdyn.initial.excitation import choose_initial_states, excitation_properties

    props = excitation_properties(backend, positions, guess=guess)
    choice = choose_initial_states(props.excitation_energies_hartree, props.oscillator_strengths, "brightest")
    states = np.zeros(n, dtype=int)
    states[choice.sample_index] = choice.state
    return states, {"excitation_energies_hartree": props.excitation_energies_hartree,
                    "oscillator_strengths": props.oscillator_strengths}


def prepare_initial_conditions(study: Study, log: Callable[[str], None] = lambda s: None) -> str:
    """Optimise, compute the Hessian and normal modes, Wigner-sample every trajectory (molecules).

    Idempotent: existing rows are kept; rows for trajectories added by ``extend`` are appended.
    Writes ``initial_conditions.h5`` atomically and returns its path.
    """
    import warnings

    config = study.config
    path = study.path(INITIAL_CONDITIONS)
    n = study.ntraj
    if os.path.exists(path):
        arrays, meta = read_h5(path)
        have = int(meta["trajectories"])
        if have >= n:
            return path
        modes = pickle.loads(arrays["modes_pickle"])
        backend = make_backend(config)
        log(f"sampling initial conditions for trajectories {have}..{n - 1}")
        rows = _sample_rows(config, modes, range(have, n))
        guess = pickle.loads(arrays["reference_guess_pickle"]) if "reference_guess_pickle" in arrays else None
        states, extra = _choose_states(config, backend, rows["positions_bohr"], guess)
        arrays["positions_bohr"] = np.concatenate([arrays["positions_bohr"], rows["positions_bohr"]])
        arrays["momenta_au"] = np.concatenate([arrays["momenta_au"], rows["momenta_au"]])
        arrays["initial_states"] = np.concatenate([arrays["initial_states"], states])
        old_rng = json.loads(arrays["rng_states_json"].decode())
        arrays["rng_states_json"] = json.dumps(old_rng + rows["rng_states"]).encode()
        for k, v in extra.items():
            if k in arrays:
                arrays[k] = np.concatenate([arrays[k], v])
        meta["trajectories"] = n
        write_h5(path, arrays, meta)
        return path
    from mapdyn.initial.sampling import compute_hessian, normal_modes, optimize_ground_state

    mol = config.molecule
    backend = make_backend(config)
    gs, level = _ground_state_backend(config, backend)
    x = mol.positions_bohr.copy()
    t0 = time.perf_counter()
    opt_info: dict = {"optimized": False}
    guess = None
    if config.initial.optimize:
        log(f"optimising the ground state ({level})")
        opt = optimize_ground_state(gs, list(mol.symbols), x, level_of_theory=level)
        x = opt.positions_bohr
        guess = opt.guess
        opt_info = {"optimized": True, "energy_hartree": opt.energy_hartree, "steps": opt.n_steps,
                    "max_gradient_hartree_per_bohr": opt.max_gradient_hartree_per_bohr}
    log(f"Hessian and normal modes ({level})")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        hess = compute_hessian(gs, x, level, guess=guess) if config.initial.normal_modes_from == "dynamics" \
            else compute_hessian(gs, x, level)
        modes = normal_modes(hess.hessian, list(mol.symbols), x, level_of_theory=level)
    log(f"{modes.nvib} modes, {modes.frequencies_cm.min():.0f}–{modes.frequencies_cm.max():.0f} cm^-1; "
        f"sampling {n} Wigner geometries at {config.initial.temperature_kelvin:g} K")
    rows = _sample_rows(config, modes, range(n))
    ref = backend.compute(x, guess=None, need_gradients=False)
    states, extra = _choose_states(config, backend, rows["positions_bohr"], ref.guess)
    arrays = {"reference_positions_bohr": x, "hessian": hess.hessian, "frequencies_cm": modes.frequencies_cm,
              "modes_pickle": pickle.dumps(modes), "positions_bohr": rows["positions_bohr"],
              "momenta_au": rows["momenta_au"], "initial_states": states,
              "reference_energies_hartree": np.asarray(ref.energies, dtype=float),
              "rng_states_json": json.dumps(rows["rng_states"]).encode()}
    try:
        arrays["reference_guess_pickle"] = pickle.dumps(ref.guess)
    except Exception:  # an unpicklable guess only costs the warm start of later excitation choices
        pass
    arrays.update(extra)
    meta = {"trajectories": n, "level_of_theory": level, "hessian_method": hess.method, **opt_info,
            "seconds": time.perf_counter() - t0, "temperature_kelvin": config.initial.temperature_kelvin,
            "seed": config.ensemble.seed, "symbols": list(mol.symbols)}
    write_h5(path, arrays, meta)
    log(f"initial conditions ready ({time.perf_counter() - t0:.1f} s)")
    return path


def initial_row(study: Study, index: int) -> tuple[np.ndarray, np.ndarray, int, dict, np.ndarray]:
    """(positions Bohr, momenta a.u., initial state, generator state, masses in electron masses) of one trajectory."""
    arrays, meta = read_h5(study.path(INITIAL_CONDITIONS))
    if index >= int(meta["trajectories"]):
        raise StudyError(f"initial conditions hold {meta['trajectories']} rows, trajectory {index} asked")
    modes = pickle.loads(arrays["modes_pickle"])
    rng_state = json.loads(arrays["rng_states_json"].decode())[index]
    return (arrays["positions_bohr"][index], arrays["momenta_au"][index], int(arrays["initial_states"][index]),
            rng_state, np.asarray(modes.masses_me))


# ----------------------------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------------------------
def load_trajectory_set(study: Study):
    """All recorded results of a (finished or partial) study as a :class:`mapdyn.analysis.core_tmp.TrajectorySet`.

    Time grid: every ``record_every`` steps up to the study's end; trajectories without a frame
    at a time carry NaN there.  Pending trajectories with no frames are left out.
    """
    from mapdyn.analysis.core_tmp import TrajectorySet

    cfg = study.config
    dt = cfg.dynamics.time_step_au
    rec = cfg.dynamics.record_every
    nsteps = study.nsteps
    grid_steps = np.arange(0, nsteps + 1, rec)
    times = grid_steps * dt
    T = grid_steps.size
    status_map = {e.index: e for e in study.status().entries}
    F = cfg.electronic.states
    meta = {"study": study.name, "method": cfg.method.describe(), "time_step_au": dt,
            "seed": cfg.ensemble.seed, "backend": cfg.electronic.level_of_theory}
    if study.batched:
        acts, ens, Rs, Ps, idx, stat = [], [], [], [], [], []
        for c, first, count in study.chunks():
            segs = study.chunk_segments(c)
            if not segs:
                continue
            parts = [read_h5(p)[0] for p, _ in segs]
            a = np.concatenate([p["actions_adiabatic"] for p in parts])  # (T', n, F)
            e = np.concatenate([p["energy"] for p in parts])
            R = np.concatenate([p["R"] for p in parts])
            P = np.concatenate([p["P"] for p in parts])
            pad = T - a.shape[0]
            if pad > 0:
                a = np.concatenate([a, np.full((pad,) + a.shape[1:], np.nan)])
                e = np.concatenate([e, np.full((pad,) + e.shape[1:], np.nan)])
                R = np.concatenate([R, np.full((pad,) + R.shape[1:], np.nan)])
                P = np.concatenate([P, np.full((pad,) + P.shape[1:], np.nan)])
            acts.append(np.transpose(a[:T], (1, 0, 2)))
            ens.append(e[:T].T)
            Rs.append(np.transpose(R[:T], (1, 0, 2)))
            Ps.append(np.transpose(P[:T], (1, 0, 2)))
            idx.extend(range(first, first + count))
            s = status_map[c].status
            stat.extend([s if s != "pending" else "running"] * count)
        if not acts:
            raise StudyError(f"{study.folder}: no results yet")
        model = make_model(cfg)
        init_state = cfg.initial.state
        return TrajectorySet(times=times, actions=np.concatenate(acts), options=cfg.method,
                             initial_states=np.full(len(idx), init_state), energies=np.concatenate(ens),
                             coordinates=np.concatenate(Rs), coordinate_momenta=np.concatenate(Ps),
                             masses=np.asarray(model.masses), status=tuple(stat), indices=np.array(idx),
                             metadata={**meta, "initial_basis": cfg.initial.basis})
    rows_a, rows_e, rows_R, rows_P, idx, stat, reasons, init_states = [], [], [], [], [], [], [], []
    symbols = None
    masses = None
    initial_states = None
    if not cfg.is_model and os.path.exists(study.path(INITIAL_CONDITIONS)):
        arrays, _ = read_h5(study.path(INITIAL_CONDITIONS), ["initial_states", "modes_pickle"])
        initial_states = arrays["initial_states"]
        masses = np.asarray(pickle.loads(arrays["modes_pickle"]).masses_me)
        symbols = cfg.molecule.symbols
    for i in range(study.ntraj):
        store = TrajectoryStore(study.trajectory_folder(i))
        point_chunks = store.restart_point().chunks
        if point_chunks == 0:
            continue
        fr = store.read_frames(point_chunks)
        if not fr:
            continue
        pos = np.searchsorted(grid_steps, fr["step"])
        ok = (pos < T) & (grid_steps[np.minimum(pos, T - 1)] == fr["step"])
        a = np.full((T, F), np.nan)
        e = np.full(T, np.nan)
        nat = fr["positions_bohr"].shape[1]
        R = np.full((T, nat, 3), np.nan)
        P = np.full((T, nat, 3), np.nan)
        a[pos[ok]] = fr["actions"][ok]
        e[pos[ok]] = fr["total_energy_Eh"][ok]
        R[pos[ok]] = fr["positions_bohr"][ok]
        P[pos[ok]] = fr["momenta_au"][ok]
        rows_a.append(a)
        rows_e.append(e)
        rows_R.append(R)
        rows_P.append(P)
        idx.append(i)
        entry = status_map[i]
        stat.append(entry.status if entry.status != "pending" else "running")
        reasons.append(entry.reason)
        init_states.append(int(initial_states[i]) if initial_states is not None else int(cfg.initial.state))
    if not rows_a:
        raise StudyError(f"{study.folder}: no recorded frames yet")
    kw: dict = {}
    if cfg.is_model:
        model = make_model(cfg)
        D = model.ndof
        kw = dict(coordinates=np.array(rows_R).reshape(len(idx), T, -1)[:, :, :D],
                  coordinate_momenta=np.array(rows_P).reshape(len(idx), T, -1)[:, :, :D],
                  masses=np.asarray(model.masses))
    else:
        kw = dict(positions=np.array(rows_R), momenta=np.array(rows_P), symbols=symbols, masses=masses)
    return TrajectorySet(times=times, actions=np.array(rows_a), options=cfg.method,
                         initial_states=np.array(init_states), energies=np.array(rows_e), status=tuple(stat),
                         reasons=tuple(reasons), indices=np.array(idx), metadata=meta, **kw)


def write_study_report(study: Study, log: Callable[[str], None] = lambda s: None) -> str | None:
    """Analyse the study and write ``report/`` (only if the analysis modules are installed).

    Returns the report folder, or None when the analysis is not available.
    """
    try:
        from mapdyn.analysis import core_tmp as analysis
        from mapdyn.analysis import report
    except ImportError:
        log("analysis modules not available; skipping the report")
        return None
    results = analysis.analyze_study(study)
    out = report.write_report(results, study.path(REPORT), title=f"mapdyn study {study.name}")
    return out.folder
