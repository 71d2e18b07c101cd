"""Study folders that never lie: each test injects one fault (named in its docstring) into a
finished study folder and checks that it is detected, repaired bitwise or refused with exit 2 and
one line.

Reference results come from the same code on an undamaged copy: the model backends are
deterministic functions of the seeded initial conditions, so a repaired study must be bitwise
equal (np.array_equal); any difference is a repair bug.  Model studies only (fast).
"""

from __future__ import annotations

import json
import os
import shutil

import h5py
import numpy as np
import pytest
from conftest import H2_SECTIONS, tully1_study, write

from mapdyn.cli import main
from mapdyn.study.checkpoint import TrajectoryStore, read_h5, write_h5
from mapdyn.study.folder import Study
from mapdyn.study.integrity import StudyLock, first_difference, manifest_checksum
from mapdyn.study.objects import ObjectFormatError, decode_object, encode_object

QUIET = ["--quiet", "--workers", "1"]


@pytest.fixture(scope="module")
def refs(tmp_path_factory):
    """Undamaged finished studies: on-the-fly (3 trajectories, 7 frame chunks each, consolidated into
    frames.h5 when each finished) and batched
    (40 trajectories in 4 chunks)."""
    base = tmp_path_factory.mktemp("refs")
    otf = write(base, "o.toml", tully1_study(trajectories=3, engine="on_the_fly", duration="120 au",
                                             checkpoint_every=10, record_every=1, workers=1))
    bat = write(base, "b.toml", tully1_study(trajectories=40, batch=10, duration="200 au", workers=1))
    assert main(["run", otf, "--output", str(base / "otf"), *QUIET]) == 0
    assert main(["run", bat, "--output", str(base / "bat"), *QUIET]) == 0
    return {"otf": base / "otf", "bat": base / "bat", "otf_toml": otf, "bat_toml": bat}


def copy(refs, kind, tmp_path):
    dst = tmp_path / kind
    shutil.copytree(refs[kind], dst)
    return dst


def otf_results(folder):
    study = Study(folder)
    out = {}
    for i in range(study.ntraj):
        store = TrajectoryStore(study.trajectory_folder(i))
        point = store.restart_point()
        frames = store.read_frames(point.chunks)
        out[i] = {**frames, "x": point.state.x, "p": point.state.p, "R": point.state.positions}
    return out


def bat_results(folder):
    study = Study(folder)
    out = {}
    for c, _, _ in study.chunks():
        segs = [read_h5(p)[0] for p, _ in study.chunk_segments(c)]
        out[c] = {k: np.concatenate([s[k] for s in segs]) for k in ("actions_adiabatic", "R", "P", "energy")}
        out[c].update({k: segs[-1][k] for k in ("final_R", "final_P", "final_x", "final_p")})
    return out


def assert_bitwise(a, b):
    assert a.keys() == b.keys()
    for k in a:
        assert a[k].keys() == b[k].keys(), k
        for f in a[k]:
            assert np.array_equal(a[k][f], b[k][f], equal_nan=True), (k, f)


def flip(path, dataset):
    """Flip one byte inside the stored data of ``dataset`` (its first HDF5 chunk), as a disk error
    would; a flip at an arbitrary offset may land in unused file space and change nothing."""
    with h5py.File(path, "r") as h5:
        offset = h5[dataset].id.get_chunk_info(0).byte_offset
    data = bytearray(open(path, "rb").read())
    data[offset + 3] ^= 0xFF
    open(path, "wb").write(bytes(data))


def alter_dataset(path, name="x"):
    """Change a dataset's values in place through HDF5 (a valid file whose data no longer matches
    its recorded digest; a raw byte flip may land in unused file space and change nothing)."""
    with h5py.File(path, "r+") as h5:
        ds = h5[name]
        ds[...] = ds[()] + 1.0


def status_of(folder):
    return {e.index: (e.status, e.problems) for e in Study(folder).status().entries}


def one_line_error(capsys, code, expected_code=2):
    err = capsys.readouterr().err.strip().splitlines()
    assert code == expected_code, err
    assert len(err) == 1 and err[0].startswith("mapdyn: error: "), err
    return err[0]


# ----------------------------------------------------------------------------------------------
# damaged trajectory files: detected by status, repaired bitwise by resume
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("fault", ["flip_frames", "delete_frames", "truncate_frames",
                                   "flip_state", "flip_both_states", "delete_states", "delete_folder",
                                   "zero_length_frames"])
def test_damaged_trajectory_is_reported_and_repaired_bitwise(refs, tmp_path, capsys, fault):
    """Fault: one file of finished trajectory 1 (its consolidated frames.h5 or a state) flipped,
    deleted, truncated or emptied."""
    folder = copy(refs, "otf", tmp_path)
    t1 = folder / "trajectories" / "000001"
    assert sorted(os.listdir(t1)) == ["frames.h5", "state.h5", "state_previous.h5"]  # no warnings caught: no warnings.json
    {"flip_frames": lambda: flip(t1 / "frames.h5", "actions"),
     "delete_frames": lambda: os.unlink(t1 / "frames.h5"),
     "truncate_frames": lambda: os.truncate(t1 / "frames.h5", os.path.getsize(t1 / "frames.h5") // 2),
     "flip_state": lambda: alter_dataset(t1 / "state.h5"),
     "flip_both_states": lambda: (alter_dataset(t1 / "state.h5"), alter_dataset(t1 / "state_previous.h5", "p")),
     "delete_states": lambda: (os.unlink(t1 / "state.h5"), os.unlink(t1 / "state_previous.h5")),
     "delete_folder": lambda: shutil.rmtree(t1),
     "zero_length_frames": lambda: os.truncate(t1 / "frames.h5", 0)}[fault]()
    st = status_of(folder)
    assert st[0][0] == st[2][0] == "finished"
    if fault in ("delete_states", "delete_folder"):
        assert st[1][0] == "pending"  # nothing verifiable left: the trajectory is missing
    else:
        assert st[1][0] == "damaged" and st[1][1], st[1]
    assert main(["status", str(folder)]) == 0
    text = capsys.readouterr().out
    assert ("damaged trajectory 1" in text) == (st[1][0] == "damaged")
    # the report is built from what is there, says what is missing and exits 3
    assert main(["analyze", str(folder)]) == 3
    summary = (folder / "report" / "summary.md").read_text()
    assert "Missing or damaged data" in summary and "trajectory 1:" in summary
    if "frames" in fault:  # named like a damaged chunk
        assert any("frames.h5" in p for p in st[1][1]), st[1]
    full = fault == "flip_frames"  # the report round trip once; the repair in every case
    if full:
        assert main(["analyze", str(folder), "--allow-incomplete"]) == 0
    assert main(["resume", str(folder), *QUIET, *([] if full else ["--no-analysis"])]) == 0
    assert all(s == "finished" for s, _ in status_of(folder).values())
    assert_bitwise(otf_results(folder), otf_results(refs["otf"]))
    if full:
        assert "Missing or damaged data" not in (folder / "report" / "summary.md").read_text()


def test_damaged_unfinished_state_falls_back(refs, tmp_path):
    """Fault: state.h5 of finished trajectory 0 damaged; state_previous.h5 (after consolidation a
    second copy of the final state) is intact and used, and resume rewrites state.h5 from it."""
    folder = copy(refs, "otf", tmp_path)
    t0 = folder / "trajectories" / "000000"
    alter_dataset(t0 / "state.h5")
    meta, problems = TrajectoryStore(t0).verified_meta()
    assert meta["step"] == 60 and problems and "checksum" in problems[0]
    assert main(["resume", str(folder), *QUIET, "--no-analysis"]) == 0
    assert TrajectoryStore(t0).verified_meta() == (meta, [])
    assert_bitwise(otf_results(folder), otf_results(refs["otf"]))


# ----------------------------------------------------------------------------------------------
# damaged batched chunks
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("fault", ["flip", "delete", "truncate", "stray_segment", "foreign_segment"])
def test_damaged_model_chunk_is_reported_and_repaired_bitwise(refs, tmp_path, fault):
    """Fault: chunk 2 of a finished batched study flipped, deleted, truncated; a segment after a
    gap; chunk 3's file copied over chunk 2 (a valid file that belongs elsewhere)."""
    folder = copy(refs, "bat", tmp_path)
    c2 = folder / "chunks" / "chunk_0002_seg00.h5"
    if fault == "flip":
        flip(c2, "actions_adiabatic")
    elif fault == "delete":
        os.unlink(c2)
    elif fault == "truncate":
        os.truncate(c2, os.path.getsize(c2) // 3)
    elif fault == "stray_segment":
        shutil.copy(c2, folder / "chunks" / "chunk_0002_seg03.h5")
    else:
        shutil.copy(folder / "chunks" / "chunk_0003_seg00.h5", c2)
    st = status_of(folder)
    assert st[2][0] == ("pending" if fault == "delete" else "damaged"), st[2]
    assert [st[c][0] for c in (0, 1, 3)] == ["finished"] * 3
    assert main(["analyze", str(folder)]) == (3 if fault != "stray_segment" else 3)
    assert main(["resume", str(folder), *QUIET, "--no-analysis"]) == 0
    assert [s for s, _ in status_of(folder).values()] == ["finished"] * 4
    assert_bitwise(bat_results(folder), bat_results(refs["bat"]))
    assert not (folder / "chunks" / "chunk_0002_seg03.h5").exists()


# ----------------------------------------------------------------------------------------------
# manifest and input seal
# ----------------------------------------------------------------------------------------------
def _edit_manifest(folder, change, keep_checksum=False):
    path = folder / "manifest.json"
    m = json.loads(path.read_text())
    change(m)
    if keep_checksum:
        m["manifest_sha256"] = manifest_checksum(m)
    path.write_text(json.dumps(m))


@pytest.mark.parametrize("fault", ["garbage", "empty", "not_object", "edited_value", "missing_key",
                                   "old_format", "future_format", "deleted", "directory"])
def test_damaged_manifest_is_refused_by_every_command(refs, tmp_path, capsys, fault):
    """Fault: manifest.json replaced by garbage, emptied, a JSON list, a value edited (trajectories
    3 → 2), a required key removed, format 1 (pickled era), format 99, deleted, a folder in its place."""
    folder = copy(refs, "otf", tmp_path)
    path = folder / "manifest.json"
    if fault == "garbage":
        path.write_bytes(os.urandom(200))
    elif fault == "empty":
        path.write_text("")
    elif fault == "not_object":
        path.write_text("[1, 2]")
    elif fault == "edited_value":
        _edit_manifest(folder, lambda m: m.update(trajectories=2))
    elif fault == "missing_key":
        _edit_manifest(folder, lambda m: m.pop("nsteps"), keep_checksum=True)
    elif fault == "old_format":
        _edit_manifest(folder, lambda m: m.update(format=1), keep_checksum=True)
    elif fault == "future_format":
        _edit_manifest(folder, lambda m: m.update(format=99), keep_checksum=True)
    elif fault == "deleted":
        path.unlink()
    else:
        path.unlink()
        path.mkdir()
    for cmd in (["status"], ["resume", *QUIET], ["analyze"], ["extend", "--trajectories", "5"]):
        line = one_line_error(capsys, main([cmd[0], str(folder), *cmd[1:]]))
        assert "manifest.json" in line
    if fault == "old_format":
        assert "re-run it with the version that made it" in line


@pytest.mark.parametrize("edit,key", [
    (lambda t: t.replace('window = "triangle"', 'window = "square"'), "method.window"),
    (lambda t: t.replace("seed = 11", "seed = 12"), "ensemble.seed"),
    (lambda t: t.replace('[method]', '[method]\nmethod = "ehrenfest"'), "method.method"),
    (lambda t: t.replace("lifetime_resamples = 0\n", ""), "analysis.lifetime_resamples"),
    (lambda t: t + "\n# a comment\n", "the text only"),
    (lambda t: t.replace("[dynamics]", "[dynamics"), "no longer valid TOML"),
])
def test_edited_input_is_refused_naming_the_key(refs, tmp_path, capsys, edit, key):
    """Fault: study.toml inside the folder edited after the study was sealed."""
    folder = copy(refs, "otf", tmp_path)
    path = folder / "study.toml"
    path.write_text(edit(path.read_text()))
    for cmd in (["status"], ["resume", *QUIET], ["analyze"], ["extend", "--trajectories", "5"]):
        line = one_line_error(capsys, main([cmd[0], str(folder), *cmd[1:]]))
        assert "changed after the study was sealed" in line and key in line, line


def test_file_where_the_chunks_folder_belongs(refs, tmp_path, capsys):
    """Fault: chunks/ of a batched study replaced by a file: status names it, resume refuses with
    one line and leaves the file alone."""
    folder = copy(refs, "bat", tmp_path)
    shutil.rmtree(folder / "chunks")
    (folder / "chunks").write_text("not a folder")
    status = Study(folder).status()
    assert not status.complete and "chunks is not a folder" in status.problems[0]
    assert "chunks" in one_line_error(capsys, main(["resume", str(folder), *QUIET, "--no-analysis"]))
    assert (folder / "chunks").read_text() == "not a folder"


def test_deleted_input_is_refused(refs, tmp_path, capsys):
    """Fault: study.toml deleted from the folder."""
    folder = copy(refs, "otf", tmp_path)
    (folder / "study.toml").unlink()
    assert "study.toml is missing" in one_line_error(capsys, main(["resume", str(folder)]))


def test_extend_writes_the_input_and_reseals(refs, tmp_path, capsys):
    """extend --trajectories/--duration: the stored input carries the new values (TOML writer) and
    the seal follows; an extend interrupted between sealing and renaming is finished on open."""
    import tomllib

    folder = copy(refs, "otf", tmp_path)
    assert main(["extend", str(folder), "--trajectories", "4", "--duration", "140 au", "--no-run"]) == 0
    data = tomllib.loads((folder / "study.toml").read_text())
    assert data["ensemble"]["trajectories"] == 4 and data["dynamics"]["duration"] == "140.0 au"
    study = Study(folder)
    assert study.ntraj == 4 and study.nsteps == 70 and study.config.ensemble.trajectories == 4
    # the file it was created from still continues it (its hash is in the history)
    assert main(["run", refs["otf_toml"], "--output", str(folder), *QUIET, "--no-analysis"]) == 0
    assert Study(folder).status().complete and Study(folder).ntraj == 4
    # interrupted: the new text exists as study.toml.next, the manifest already sealed it
    sealed = (folder / "study.toml").read_text()
    (folder / "study.toml.next").write_text(sealed)
    (folder / "study.toml").write_text(sealed.replace("140.0 au", "120 au"))
    Study(folder)
    assert (folder / "study.toml").read_text() == sealed and not (folder / "study.toml.next").exists()


def test_first_difference_names_keys():
    assert first_difference("[a]\nx = 1\ny = 2\n", "[a]\nx = 1\ny = 3\n") == "a.y (sealed 2, now 3)"
    assert first_difference("[a]\nx = 1\n", "[a]\nx = 1\nz = 0\n") == "a.z (absent when sealed, now 0)"
    assert first_difference("[a]\nx = 1\n", "[b]\nx = 1\n") == "a.x (sealed 1, now absent)"


# ----------------------------------------------------------------------------------------------
# one writer, temporaries
# ----------------------------------------------------------------------------------------------
def test_second_writer_is_refused_naming_the_holder(refs, tmp_path, capsys):
    """Fault: the folder is locked by another writer (here: this process through another handle)."""
    folder = copy(refs, "otf", tmp_path)
    with StudyLock(str(folder), "mapdyn run"):
        for cmd in (["resume", *QUIET], ["extend", "--trajectories", "5"], ["analyze"]):
            line = one_line_error(capsys, main([cmd[0], str(folder), *cmd[1:]]))
            assert f"in use by pid {os.getpid()}" in line and "mapdyn run" in line
        assert main(["status", str(folder)]) == 0  # reading needs no lock
    assert main(["resume", str(folder), *QUIET, "--no-analysis"]) == 0  # released with the holder


def test_temporaries_of_an_interrupted_write_are_removed(refs, tmp_path, capsys):
    """Fault: *.tmp files left by writes interrupted mid-way (report, state, manifest)."""
    folder = copy(refs, "otf", tmp_path)
    tmps = [folder / "manifest.json.999.tmp", folder / "trajectories" / "000001" / "state.h5.999.tmp",
            folder / "report" / "summary.md.12.tmp"]
    for p in tmps:
        p.write_bytes(b"partial")
    assert main(["resume", str(folder), *QUIET, "--no-analysis"]) == 0
    assert not any(p.exists() for p in tmps)
    assert "removed 3 temporary file(s)" in capsys.readouterr().err


# ----------------------------------------------------------------------------------------------
# no pickles
# ----------------------------------------------------------------------------------------------
def test_restart_state_has_no_pickle_and_round_trips(refs):
    """The stored restart state is named arrays + JSON; decoding gives the same arrays bit for bit."""
    store = TrajectoryStore(Study(refs["otf"]).trajectory_folder(0))
    with h5py.File(store.state_path, "r") as h5:
        names = list(h5.keys())
        tree = json.loads(bytes(h5["driver_state.tree"][()]).decode())
    assert "driver_state" not in names and tree["format"] == 1
    state = store.restart_point().state
    again = decode_object(encode_object(state, "s"), "s")
    assert np.array_equal(again.x, state.x) and np.array_equal(again.result.energies, state.result.energies)
    assert type(again.result.guess) is type(state.result.guess)


def test_old_pickled_state_and_unknown_format_are_clear_errors(tmp_path):
    """Fault: a state file with a pickled payload (older mapdyn); an object of format 2; a class
    name outside mapdyn."""
    store = TrajectoryStore(str(tmp_path / "t"))
    os.makedirs(store.folder)
    write_h5(store.state_path, {"driver_state": b"\x80\x04N."}, {"chunks": 0})
    point = store.restart_point()
    assert point.state is None and "re-run the study with the version that made it" in point.problems[0]
    arrays = encode_object({"a": np.arange(3)}, "o")
    arrays["o.tree"] = arrays["o.tree"].replace(b'"format": 1', b'"format": 2')
    with pytest.raises(ObjectFormatError, match="has format 2; this mapdyn reads format 1"):
        decode_object(arrays, "o")
    bad = {"o.tree": json.dumps({"format": 1, "root": {"$c": "os:system", "f": {}}}).encode()}
    with pytest.raises(ObjectFormatError, match="not a mapdyn class"):
        decode_object(bad, "o")


# ----------------------------------------------------------------------------------------------
# damaged initial conditions (molecular, H2 SA2-CASSCF(2,2)/STO-3G, one trajectory of 2 steps)
# ----------------------------------------------------------------------------------------------
H2 = """
[study]
name = "h2_ic"
description = "scenario of our own: H2 after excitation, SA2-CASSCF(2,2)/STO-3G"
""" + H2_SECTIONS + """[dynamics]
time_step = "0.5 fs"
duration = "1 fs"
checkpoint_every = 2
[ensemble]
trajectories = 1
seed = 5
workers = 1
"""


@pytest.mark.parametrize("fault", ["altered_rows", "garbage_bytes", "deleted"])
def test_damaged_initial_conditions_are_reported_and_recomputed(tmp_path, capsys, fault):
    """Fault: initial_conditions.h5 of a finished molecular study altered (rows changed through
    HDF5), overwritten with random bytes, or deleted.  Status names it; resume recomputes it from
    the same seeds and geometry (one thread: the same arrays bit for bit) and keeps the finished
    trajectory."""
    toml = write(tmp_path, "h2.toml", H2)
    ref = tmp_path / "ref"
    assert main(["run", toml, "--output", str(ref), *QUIET, "--no-analysis"]) == 0
    folder = tmp_path / "hurt"
    shutil.copytree(ref, folder)
    ic = folder / "initial_conditions.h5"
    if fault == "altered_rows":
        alter_dataset(ic, "positions_bohr")
    elif fault == "garbage_bytes":
        ic.write_bytes(os.urandom(4096))
    else:
        ic.unlink()
    status = Study(folder).status()
    if fault != "deleted":
        assert status.problems and "initial_conditions.h5" in status.problems[0] and not status.complete
        assert main(["status", str(folder)]) == 0
        assert "damaged initial_conditions.h5" in capsys.readouterr().out
    traj_files = sorted(os.listdir(folder / "trajectories" / "000000"))
    assert main(["resume", str(folder), *QUIET, "--no-analysis"]) == 0
    a, _ = read_h5(ref / "initial_conditions.h5")
    b, _ = read_h5(ic)
    assert a.keys() == b.keys()
    for k in a:
        assert np.array_equal(a[k], b[k]) if isinstance(a[k], np.ndarray) else a[k] == b[k], k
    assert sorted(os.listdir(folder / "trajectories" / "000000")) == traj_files
    assert Study(folder).status().complete
