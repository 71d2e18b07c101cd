"""Checkpoint files: atomic HDF5 writes with integrity checks, per-trajectory restart state and
write-once frame chunks (docs/architecture.md#file-formats).

File rules
----------
* Every file is written atomically: ``<name>.tmp`` is written and closed, fsync'ed, then
  ``os.replace``'d onto ``<name>`` and the directory fsync'ed.  A reader therefore sees either the
  old or the new file, never a half-written one — unless the disk itself damages it.
* Every dataset carries a SHA-256 digest of its bytes (attribute ``sha256``) and, when it is a
  non-empty array, HDF5's fletcher32 checksum filter.  Metadata is one JSON string (attribute
  ``meta``) with its own digest.  :func:`read_h5` verifies all of them; any mismatch, truncation
  or unreadable file raises :class:`CheckpointError` naming the file.

Trajectory folder (``trajectories/000042/``)
-------------------------------------------------
* ``state.h5`` — the complete :class:`mapdyn.driver.dynamics.DriverState` as named arrays plus a
  JSON tree (``driver_state.*``, :mod:`mapdyn.study.objects`; arrays bit for bit, no pickle; the
  backend ``guess`` travels inside it), plus readable copies of step,
  time, positions, momenta and mapping variables, and ``meta`` with ``chunks`` = the number of
  frame chunks it covers (it covers chunks 0 … chunks−1) and their digests.
* ``state_previous.h5`` — the state before the last one (one older generation), the fallback.
* ``frames_0000.h5``, ``frames_0001.h5``, … — chunk c holds the frames recorded since the state
  before it was written (chunk 0 starts with the frame at step 0).  A chunk is written once, before
  the state that covers it; a chunk with an index ≥ the state's ``chunks`` (written just before a
  crash) is ignored on resume and replaced when the trajectory continues.  So I/O per checkpoint
  is one small state plus K frames, linear in trajectory length.
* ``frames.h5`` — when the trajectory has finished (:meth:`TrajectoryStore.consolidate`), all its
  chunks concatenated into one file (meta ``chunk_nframes``: frames per original chunk).  The state
  meta then says ``consolidated_chunks`` = n (chunks 0 … n−1 live in ``frames_file``), with the file's
  digest in ``frames_sha256``; chunks ≥ n (after ``extend``) stay separate files until the trajectory
  finishes again.  Order: write the new consolidated file, rewrite ``state.h5`` and then
  ``state_previous.h5`` (both become the same final state naming it), only then delete the chunks.
  A kill at any point leaves states that each name intact files; files no readable state names are
  leftovers, removed on the next open.  When ``frames.h5`` itself is being replaced (consolidating
  again after ``extend``) the new file is first written as ``frames_merged.h5`` and copied back in a
  second round, so the name a state records is never overwritten.

Resume rule (:meth:`TrajectoryStore.restart_point`): use the newest state file that reads back
intact and whose covered chunks all read back intact with the digests it recorded; otherwise the
previous generation; otherwise start from scratch.  Every problem found is reported.
"""

from __future__ import annotations

import dataclasses
import errno
import hashlib
import io
import json
import os
from typing import Any, Mapping, Sequence

import h5py
import numpy as np

from mapdyn.files import atomic_write
from mapdyn.study.objects import ObjectFormatError, decode_object, encode_object

__all__ = ["CheckpointError", "write_h5", "read_h5", "file_digest",
           "frames_to_arrays", "TrajectoryStore", "RestartPoint", "STATE_FILE", "PREVIOUS_STATE_FILE",
           "FORMAT_VERSION", "FRAMES_FILE", "consolidation_meta"]

FORMAT_VERSION = 1
STATE_FILE = "state.h5"
PREVIOUS_STATE_FILE = "state_previous.h5"
FRAMES_FILE = "frames.h5"
MERGE_FILE = "frames_merged.h5"  # intermediate name while frames.h5 itself is replaced
_CONSOLIDATION_KEYS = ("consolidated_chunks", "frames_file", "frames_sha256")


def consolidation_meta(meta: Mapping[str, Any]) -> dict:
    """The consolidation entries of a state meta (empty for a chunks-only folder), to carry into the next state."""
    return {k: meta[k] for k in _CONSOLIDATION_KEYS if k in meta}


class CheckpointError(RuntimeError):
    """A checkpoint file is missing, truncated or corrupted; ``path`` names it."""

    def __init__(self, path: str, reason: str):
        self.path, self.reason = os.fspath(path), reason
        super().__init__(f"{os.fspath(path)}: {reason}")


def _digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _array_bytes(arr: np.ndarray) -> bytes:
    return np.ascontiguousarray(arr).tobytes()


#: Unit of each dataset mapdyn writes (the ``units`` attribute); names not listed are dimensionless
#: indices, flags or bytes.
DATASET_UNITS = {
    "time_au": "a.u. of time (hbar/Eh)", "times": "a.u. of time (hbar/Eh)", "final_time": "a.u. of time (hbar/Eh)",
    "positions_bohr": "bohr", "reference_positions_bohr": "bohr", "R": "bohr", "final_R": "bohr",
    "momenta_au": "a.u. (m_e bohr / a.u. time)", "P": "a.u. (m_e bohr / a.u. time)", "final_P": "a.u. (m_e bohr / a.u. time)",
    "energies_Eh": "Eh", "total_energy_Eh": "Eh", "kinetic_energy_Eh": "Eh", "potential_energy_Eh": "Eh",
    "drift_Eh": "Eh", "energy": "Eh", "reference_energies_hartree": "Eh", "excitation_energies_hartree": "Eh",
    "actions": "1", "actions_adiabatic": "1", "actions_diabatic": "1", "populations": "1",
    "coupling_norms": "1/bohr", "sigma": "1/(a.u. of time)", "min_overlap": "1",
    "hessian": "Eh/bohr^2", "frequencies_cm": "cm-1", "oscillator_strengths": "1",
}


def write_h5(path: str | os.PathLike, arrays: Mapping[str, Any], meta: Mapping[str, Any] | None = None,
             sync_directory: bool = True) -> str:
    """Write ``arrays`` (name → ndarray or bytes) and JSON ``meta`` atomically to ``path``.

    bytes become uint8 datasets (attribute ``kind = "bytes"``).  Each dataset gets a SHA-256
    attribute; non-empty arrays are chunked with the fletcher32 filter.
    """
    meta_text = json.dumps(dict(meta or {}), sort_keys=True, allow_nan=True)

    buffer = io.BytesIO()  # HDF5 writes to memory; the disk sees one plain write (a full disk fails cleanly)
    with h5py.File(buffer, "w") as h5:
        h5.attrs["meta"] = meta_text
        h5.attrs["meta_sha256"] = _digest(meta_text.encode())
        h5.attrs["format_version"] = FORMAT_VERSION
        for name, value in arrays.items():
            kind = "array"
            if isinstance(value, (bytes, bytearray)):
                arr = np.frombuffer(bytes(value), dtype=np.uint8)
                kind = "bytes"
            else:
                arr = np.asarray(value)
                if arr.dtype == object:
                    raise ValueError(f"array {name!r} has dtype object; store it as bytes")
            if arr.ndim >= 1 and arr.size > 0:
                ds = h5.create_dataset(name, data=arr, chunks=arr.shape, fletcher32=True)
            else:
                ds = h5.create_dataset(name, data=arr)
            ds.attrs["sha256"] = _digest(_array_bytes(arr))
            ds.attrs["kind"] = kind
            if name in DATASET_UNITS:
                ds.attrs["units"] = DATASET_UNITS[name]
    data = buffer.getvalue()

    def write(tmp: str) -> None:
        try:
            with open(tmp, "wb") as fh:
                fh.write(data)
        except OSError as err:
            if err.errno in (errno.ENOSPC, errno.EDQUOT):
                full = OSError(err.errno, os.strerror(err.errno), os.fspath(path))
                full.needed_bytes = len(data)  # type: ignore[attr-defined]
                raise full from None
            raise

    return atomic_write(path, write, sync_directory)


def read_h5(path: str | os.PathLike, names: Sequence[str] | None = None) -> tuple[dict, dict]:
    """Read datasets (all, or ``names``) and meta from ``path``, verifying every checksum.

    Returns (arrays, meta); bytes datasets come back as ``bytes``.  Raises :class:`CheckpointError`.
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise CheckpointError(path, "missing")
    try:
        with h5py.File(path, "r") as h5:
            text = h5.attrs["meta"]
            text = text.decode() if isinstance(text, bytes) else str(text)
            if _digest(text.encode()) != h5.attrs["meta_sha256"]:
                raise CheckpointError(path, "metadata checksum mismatch")
            meta = json.loads(text)
            out = {}
            for name in (names if names is not None else list(h5.keys())):
                if name not in h5:
                    raise CheckpointError(path, f"dataset {name!r} missing")
                ds = h5[name]
                arr = ds[()]
                arr = np.asarray(arr)
                if _digest(_array_bytes(arr)) != ds.attrs["sha256"]:
                    raise CheckpointError(path, f"dataset {name!r} checksum mismatch")
                out[name] = arr.tobytes() if ds.attrs.get("kind") == "bytes" else arr
    except CheckpointError:
        raise
    except Exception as err:  # truncated/corrupted HDF5 raises OSError, KeyError, ValueError, ...
        first = str(err).splitlines()[0] if str(err) else ""
        raise CheckpointError(path, f"unreadable ({type(err).__name__}{': ' + first if first else ''})") from None
    return out, meta


def file_digest(path: str | os.PathLike) -> str:
    """SHA-256 of a whole file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


# ----------------------------------------------------------------------------------------------
# frames
# ----------------------------------------------------------------------------------------------
_FRAME_SCALARS = {"step": np.int64, "time_au": float, "window": np.int64, "kinetic_energy_Eh": float,
                  "potential_energy_Eh": float, "total_energy_Eh": float, "drift_Eh": float, "swap": bool}
_FRAME_DIAGNOSTICS = ("active_space_change", "active_overlap_min_singular", "overlap_retries", "response_residual",
                      "response_converged")
_FRAME_ARRAYS = ("positions_bohr", "momenta_au", "energies_Eh", "actions", "populations",
                 "coupling_norms", "sigma", "permutation")


def frames_to_arrays(frames: Sequence[Mapping[str, Any]]) -> dict[str, np.ndarray]:
    """Stack driver frames (:attr:`MappingDynamics.frames`) into arrays with a leading frame axis.

    Fields that are None in every frame are left out; ``min_overlap`` None → NaN.
    """
    out: dict[str, np.ndarray] = {}
    if not frames:
        return out
    for k, dtype in _FRAME_SCALARS.items():
        out[k] = np.array([f[k] for f in frames], dtype=dtype)
    out["min_overlap"] = np.array([np.nan if f.get("min_overlap") is None else f["min_overlap"] for f in frames], dtype=float)
    for k in _FRAME_DIAGNOSTICS:  # backend health per frame (NaN: not reported)
        out[k] = np.array([np.nan if f.get(k) is None else f[k] for f in frames], dtype=float)
    for k in _FRAME_ARRAYS:
        vals = [f.get(k) for f in frames]
        if all(v is None for v in vals):
            continue
        template = np.asarray(next(v for v in vals if v is not None))
        fill = np.full(template.shape, -1 if k == "permutation" else np.nan)
        out[k] = np.array([fill if v is None else np.asarray(v) for v in vals])
    return out


# ----------------------------------------------------------------------------------------------
# per-trajectory store
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class RestartPoint:
    """Where a trajectory continues: ``state`` (a DriverState, or None = start from scratch),
    ``chunks`` covered, the state's ``meta``, and the ``problems`` found on the way (messages)."""

    state: Any
    chunks: int
    meta: dict
    problems: list
    source: str | None = None


class TrajectoryStore:
    """The checkpoint files of one trajectory in ``folder`` (see the module docstring)."""

    def __init__(self, folder: str | os.PathLike):
        self.folder = os.fspath(folder)

    def chunk_path(self, index: int) -> str:
        return os.path.join(self.folder, f"frames_{index:04d}.h5")

    @property
    def state_path(self) -> str:
        return os.path.join(self.folder, STATE_FILE)

    @property
    def previous_state_path(self) -> str:
        return os.path.join(self.folder, PREVIOUS_STATE_FILE)

    # ------------------------------------------------------------------ writing
    def commit(self, state: Any, frames: Sequence[Mapping[str, Any]], chunks_before: int, meta: Mapping[str, Any],
               chunk_digests: Sequence[str]) -> tuple[int, list[str]]:
        """Write chunk ``chunks_before`` with ``frames`` and then the state covering it.

        ``chunk_digests`` are the file digests of chunks 0 … chunks_before−1 (from the previous
        commit).  Returns (chunks covered now, digests).  The old state becomes the previous
        generation.
        """
        os.makedirs(self.folder, exist_ok=True)
        cpath = self.chunk_path(chunks_before)
        arrays = frames_to_arrays(frames)
        steps = arrays.get("step", np.zeros(0, dtype=np.int64))
        write_h5(cpath, arrays, {"chunk": chunks_before, "nframes": int(len(frames)),
                                 "first_step": int(steps[0]) if len(steps) else None,
                                 "last_step": int(steps[-1]) if len(steps) else None},
                 sync_directory=False)  # the state write below syncs the directory
        digests = list(chunk_digests) + [file_digest(cpath)]
        full_meta = dict(meta)
        full_meta.update({"chunks": chunks_before + 1, "chunk_sha256": digests, "step": int(state.step),
                          "time_au": float(state.time), "stopped": bool(state.stopped),
                          "stop_reason": state.stop_reason, "drift_flag": _jsonable(state.drift_flag),
                          "end_event": _jsonable(getattr(state, "end_event", None))})
        arrays = {"step": np.int64(state.step), "time_au": np.float64(state.time),
                  "positions_bohr": state.positions, "momenta_au": state.momenta, "x": state.x, "p": state.p}
        arrays.update(encode_object(state, "driver_state"))
        if os.path.exists(self.state_path):
            os.replace(self.state_path, self.previous_state_path)
        write_h5(self.state_path, arrays, full_meta)
        return chunks_before + 1, digests

    # ------------------------------------------------------------------ reading
    def _load_state(self, path: str) -> tuple[Any, dict]:
        arrays, meta = read_h5(path)  # every dataset verified, not only the one restored
        if "driver_state" in arrays:
            raise CheckpointError(path, "holds a pickled restart state written by an older mapdyn; re-run the study "
                                        "with the version that made it")
        try:
            state = decode_object(arrays, "driver_state")
        except ObjectFormatError as err:
            raise CheckpointError(path, f"restart state cannot be read: {err}") from None
        return state, meta

    def verified_meta(self, full: bool = True) -> tuple[dict | None, list[str]]:
        """(meta of the newest state that verifies, problems found) without unpickling anything.

        ``full``: every dataset checksum of the state and the recorded digest of every frame chunk
        it covers; otherwise the metadata checksum and the chunk files' presence only."""
        problems: list[str] = []
        for path in (self.state_path, self.previous_state_path):
            if not os.path.exists(path):
                continue
            try:
                _, meta = read_h5(path, None if full else [])
                self._check_chunks(meta, path, digests=full, read=False)
                return meta, problems
            except CheckpointError as err:
                problems.append(f"{os.path.basename(err.path)}: {err.reason}")
        return None, problems

    def frames_file_path(self, meta: Mapping[str, Any]) -> str | None:
        """Path of the consolidated frames file ``meta`` names, or None (chunks only)."""
        if not int(meta.get("consolidated_chunks", 0)):
            return None
        return os.path.join(self.folder, os.path.basename(str(meta.get("frames_file", FRAMES_FILE))))

    def _check_chunks(self, meta: dict, path: str, digests: bool = True, read: bool = True) -> None:
        n = int(meta.get("chunks", 0))
        check = digests
        digests = meta.get("chunk_sha256", [])
        m = min(int(meta.get("consolidated_chunks", 0)), n)
        fp = self.frames_file_path(meta)
        if m and fp is not None:
            what = f"consolidated frames (chunks 0-{m - 1}) named by {os.path.basename(path)}"
            if not os.path.isfile(fp):
                raise CheckpointError(fp, f"{what} {'is not a file' if os.path.exists(fp) else 'is missing'}")
            if check and file_digest(fp) != meta.get("frames_sha256"):
                raise CheckpointError(fp, f"{what} differ from the digest recorded there")
            if read:
                read_h5(fp)
        for c in range(m, n):
            cp = self.chunk_path(c)
            if not os.path.isfile(cp):
                what = "is not a file" if os.path.exists(cp) else "is missing"
                raise CheckpointError(cp, f"frame chunk {c} named by {os.path.basename(path)} {what}")
            if check and (c >= len(digests) or file_digest(cp) != digests[c]):
                raise CheckpointError(cp, f"frame chunk {c} differs from the digest recorded in {os.path.basename(path)}")
            if read:
                read_h5(cp)

    def read_meta(self) -> dict | None:
        """Meta of the current state file (cheap, no chunk checks), or None if absent/unreadable.
        While a writer rotates ``state.h5`` to ``state_previous.h5`` the current file is briefly
        absent; the previous one is then the newest state and is read instead."""
        paths = [self.state_path] + ([] if os.path.exists(self.state_path) else [self.previous_state_path])
        for path in paths:
            try:
                _, meta = read_h5(path, [])
                return meta
            except CheckpointError:
                continue
        return None

    def restart_point(self) -> RestartPoint:
        """The newest intact state whose chunks are intact (see the module docstring)."""
        problems: list[str] = []
        for path in (self.state_path, self.previous_state_path):
            if not os.path.exists(path):
                continue
            try:
                state, meta = self._load_state(path)
                self._check_chunks(meta, path)
                return RestartPoint(state, int(meta["chunks"]), meta, problems, path)
            except CheckpointError as err:
                problems.append(str(err))
        return RestartPoint(None, 0, {}, problems, None)

    def read_frames(self, chunks: int | None = None, meta: Mapping[str, Any] | None = None) -> dict[str, np.ndarray]:
        """Frames of chunks 0 … chunks−1 (default: those covered by the usable state), concatenated.

        ``meta``: the state meta that says which chunks live in the consolidated file (default: the
        usable state's).  Both layouts give the same arrays bit for bit."""
        if meta is None:
            if chunks is not None and not any(os.path.exists(os.path.join(self.folder, f)) for f in (FRAMES_FILE, MERGE_FILE)):
                meta = {}  # chunks-only folder: no state needed
            else:
                point = self.restart_point()
                meta = point.meta
                chunks = point.chunks if chunks is None else chunks
        if chunks is None:
            chunks = int(meta.get("chunks", 0))
        parts, _ = self._frame_parts(chunks, meta)
        return _concatenate(parts)

    def _frame_parts(self, chunks: int, meta: Mapping[str, Any]) -> tuple[list[dict], list[int]]:
        """(non-empty frame parts in order, frames per chunk) for chunks 0 … chunks−1."""
        parts: list[dict] = []
        counts: list[int] = []
        m = min(int(meta.get("consolidated_chunks", 0)), chunks)
        fp = self.frames_file_path(meta)
        if m and fp is not None:
            arrays, fmeta = read_h5(fp)
            counts = [int(k) for k in fmeta.get("chunk_nframes", [])][:m]
            if len(counts) != m:
                raise CheckpointError(fp, f"holds {len(counts)} chunks, the state names {m}")
            nf = sum(counts)
            parts.append({k: v[:nf] for k, v in arrays.items()} if nf < len(arrays.get("step", ())) else arrays)
        for c in range(m, chunks):
            p = read_h5(self.chunk_path(c))[0]
            counts.append(int(len(p["step"])) if "step" in p else 0)
            parts.append(p)
        return [p for p in parts if p], counts

    def consolidate(self, point: RestartPoint | None = None) -> bool:
        """Merge the frame chunks of a finished trajectory into ``frames.h5`` (module docstring, crash-safe
        order), then delete the chunks.  Idempotent: also completes an interrupted consolidation and
        removes its leftovers.  ``point``: the folder's restart point if already found (saves a
        verification).  Returns True when the folder ends consolidated; merged chunks' digests stay
        in ``chunk_sha256`` but are no longer checked."""
        for _ in range(3):  # at most two rounds (frames.h5 → frames_merged.h5 → frames.h5) plus the check
            point = point if point is not None else self.restart_point()
            if point.state is None:
                return False
            meta = point.meta
            n = int(meta.get("chunks", 0))
            current = os.path.basename(str(meta.get("frames_file", ""))) if meta.get("consolidated_chunks") else ""
            if int(meta.get("consolidated_chunks", 0)) == n and current == FRAMES_FILE:
                if point.source != self.state_path or not _same_meta(self.previous_state_path, meta):
                    self._write_final_state(point.source or self.state_path, dict(meta))
                self.remove_leftovers()
                return True
            target = MERGE_FILE if current == FRAMES_FILE else FRAMES_FILE
            tpath = os.path.join(self.folder, target)
            try:
                previous_names = self.frames_file_path(read_h5(self.previous_state_path, [])[1])
            except CheckpointError:
                previous_names = None
            if previous_names == tpath and point.source == self.state_path:  # never overwrite a file a state names
                write_h5(self.previous_state_path, read_h5(self.state_path)[0], meta)
            parts, counts = self._frame_parts(n, meta)
            frames = _concatenate(parts)
            steps = frames.get("step", np.zeros(0, dtype=np.int64))
            write_h5(tpath, frames, {"consolidated_chunks": n, "chunk_nframes": counts, "nframes": int(sum(counts)),
                                     "first_step": int(steps[0]) if len(steps) else None,
                                     "last_step": int(steps[-1]) if len(steps) else None})
            new_meta = dict(meta)
            new_meta.update({"consolidated_chunks": n, "frames_file": target, "frames_sha256": file_digest(tpath)})
            self._write_final_state(point.source or self.state_path, new_meta)
            self.remove_leftovers()
            point = None
        return False

    def _write_final_state(self, source: str, meta: dict) -> None:
        """Rewrite the state read from ``source`` with ``meta`` as ``state.h5``, then the same as ``state_previous.h5``."""
        arrays, _ = read_h5(source)
        write_h5(self.state_path, arrays, meta)
        write_h5(self.previous_state_path, arrays, meta)

    def remove_leftovers(self) -> None:
        """Delete frame files that no readable state names: chunks merged into the consolidated file
        by every readable state, and consolidated files no readable state names."""
        if not os.path.isdir(self.folder):
            return
        metas = []
        for path in (self.state_path, self.previous_state_path):
            try:
                metas.append(read_h5(path, [])[1])
            except CheckpointError:
                continue
        if not metas:
            return
        merged = min(int(m.get("consolidated_chunks", 0)) for m in metas)
        named = {os.path.basename(p) for p in (self.frames_file_path(m) for m in metas) if p}
        for name in os.listdir(self.folder):
            path = os.path.join(self.folder, name)
            if name in (FRAMES_FILE, MERGE_FILE):
                if name not in named:
                    _remove(path)
            elif name.startswith("frames_") and name.endswith(".h5"):
                try:
                    idx = int(name[7:-3])
                except ValueError:
                    continue
                if idx < merged:
                    _remove(path)

    def adopt(self, point: RestartPoint) -> None:
        """Make the files agree with ``point`` before continuing: the state used becomes
        ``state.h5`` (a damaged newer one is dropped), uncovered chunks are deleted."""
        if point.state is None:
            for path in (self.state_path, self.previous_state_path):
                if os.path.exists(path):
                    _remove(path)
        elif point.source == self.previous_state_path:
            os.replace(self.previous_state_path, self.state_path)
        self.discard_after(point.chunks)
        self.remove_leftovers()

    def discard_after(self, chunks: int) -> None:
        """Delete chunk files with index >= ``chunks`` (not covered by the state in use)."""
        if not os.path.isdir(self.folder):
            return
        for name in os.listdir(self.folder):
            if name.startswith("frames_") and name.endswith(".h5"):
                try:
                    idx = int(name[7:-3])
                except ValueError:
                    continue
                if idx >= chunks:
                    _remove(os.path.join(self.folder, name))


def _concatenate(parts: Sequence[Mapping[str, np.ndarray]]) -> dict[str, np.ndarray]:
    """Frame parts joined along the frame axis; keys present in every part."""
    if not parts:
        return {}
    keys = [k for k in parts[0] if all(k in p for p in parts)]
    return {k: np.concatenate([p[k] for p in parts]) if len(parts) > 1 else parts[0][k] for k in keys}


def _same_meta(path: str, meta: Mapping[str, Any]) -> bool:
    try:
        return read_h5(path, [])[1] == dict(meta)
    except CheckpointError:
        return False


def _remove(path: str) -> None:
    """Delete a file, or a folder found where a file belongs."""
    if os.path.isdir(path) and not os.path.islink(path):
        import shutil

        shutil.rmtree(path)
    else:
        os.unlink(path)


def _jsonable(value: Any) -> Any:
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    return repr(value)
