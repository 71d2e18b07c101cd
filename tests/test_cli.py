"""The ``mapdyn`` command end to end: run, status, kill -9 + resume, extend, on model and
molecular studies.

Equality checks on the model backends are bitwise (np.array_equal): the batched engine and the
model adapter are deterministic functions of the seeded initial conditions, so any difference
would be a restart bug.  Method combinations: sqc/triangle/symmetrized (batched and on-the-fly
model studies), sqc/square/symmetrized (molecular).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from conftest import ENV, H2_SECTIONS, INPUTS, mapdyn, tully1_study, write

from mapdyn.cli import main
from mapdyn.study.checkpoint import TrajectoryStore, read_h5
from mapdyn.study.folder import Study


def model_toml(trajectories=120, batch=40, duration="1000 au", engine="batched", checkpoint_every=20,
               workers=2, record_every=5) -> str:
    return tully1_study(trajectories=trajectories, batch=batch, duration=duration, engine=engine,
                        checkpoint_every=checkpoint_every, workers=workers, record_every=record_every)


def chunk_arrays(folder):
    study = Study(folder)
    out = {}
    for c, _, _ in study.chunks():
        segs = [read_h5(p)[0] for p, _ in study.chunk_segments(c)]
        out[c] = {k: np.concatenate([s[k] for s in segs]) if segs[0][k].ndim else segs[-1][k]
                  for k in ("times", "actions_adiabatic", "actions_diabatic", "energy", "R", "P")}
        out[c].update({k: segs[-1][k] for k in ("final_R", "final_P", "final_x", "final_p")})
    return out


def traj_frames(folder):
    study = Study(folder)
    return {i: TrajectoryStore(study.trajectory_folder(i)).read_frames() for i in range(study.ntraj)}


def assert_equal_dicts(a, b):
    assert a.keys() == b.keys()
    for k in a:
        if isinstance(a[k], dict):
            assert_equal_dicts(a[k], b[k])
        else:
            assert np.array_equal(a[k], b[k], equal_nan=True), k


def file_ids(paths):
    return {p: (os.stat(p).st_ino, os.stat(p).st_mtime_ns) for p in paths}


def test_model_study_end_to_end(tmp_path, capsys, monkeypatch):
    """run → chunks equal to run_diabatic on the same rows; report written; status; rerun is a no-op."""
    from mapdyn.core.options import MethodOptions
    from mapdyn.core.propagators import run_diabatic
    from mapdyn.core.sampling import gaussian_wavepacket_ensemble
    from mapdyn.models.tully import tully_model

    toml = write(tmp_path, "m.toml", model_toml(trajectories=80))
    proc = mapdyn("run", toml, cwd=tmp_path)
    assert "finished 80, failed 0" in proc.stderr
    folder = tmp_path / "runs" / "tully1_test"
    for name in ("populations.png", "populations.csv", "summary.md"):
        assert (folder / "report" / name).is_file()
    assert main(["status", str(folder), "--json"]) == 0
    status = json.loads(capsys.readouterr().out)
    assert status["counts"] == {"finished": 80, "running": 0, "failed": 0, "pending": 0, "damaged": 0}
    # chunk 1 = trajectories 40..79, compared with the engine called directly
    opts = MethodOptions(window="triangle")
    model = tully_model("tully1")
    state = gaussian_wavepacket_ensemble(model, 40, 11, -8.0, 15.0, 1.0, 0, opts, first_index=40)
    run = run_diabatic(model, state, opts, 2.0, 500, record_every=5, record_nuclei=True)
    got = chunk_arrays(folder)[1]
    assert np.array_equal(got["actions_adiabatic"], run.actions_adiabatic)
    assert np.array_equal(got["R"], run.R)
    monkeypatch.chdir(tmp_path)
    assert main(["run", toml, "--no-analysis", "--quiet"]) == 0
    assert "(0 steps computed" in capsys.readouterr().err


def _kill_when(proc, condition, timeout=300):
    t0 = time.time()
    while time.time() - t0 < timeout:
        if condition():
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
            return True
        if proc.poll() is not None:
            return False
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    return False


def test_kill_and_resume_batched_model_is_bitwise(tmp_path):
    toml = write(tmp_path, "m.toml", model_toml(trajectories=240, batch=30, duration="1200 au", workers=1))
    ref = str(tmp_path / "ref")
    assert main(["run", toml, "--output", ref, "--no-analysis", "--quiet", "--workers", "2"]) == 0
    folder = tmp_path / "killed"
    chunks = folder / "chunks"
    proc = subprocess.Popen([sys.executable, "-m", "mapdyn", "run", toml, "--output", str(folder), "--no-analysis"],
                            cwd=tmp_path, env=ENV, start_new_session=True, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    killed = _kill_when(proc, lambda: chunks.is_dir() and len([f for f in os.listdir(chunks) if f.endswith(".h5")]) >= 2)
    assert killed, "the run ended before it could be killed"
    before = sorted(str(chunks / f) for f in os.listdir(chunks) if f.endswith(".h5"))
    ids = file_ids(before)
    n_before = len(before)
    assert 2 <= n_before < 8
    status = Study(folder).status().counts()
    assert status["finished"] == 30 * n_before and status["running"] == 0  # dead markers are ignored
    res = mapdyn("resume", str(folder), "--no-analysis", cwd=tmp_path)
    steps = int(res.stderr.split("(")[-1].split(" steps computed")[0])
    assert steps == (8 - n_before) * 30 * 600  # only the missing chunks were computed
    print(f"batched: killed with {n_before}/8 chunks written; resume computed {steps} trajectory-steps "
          f"= {8 - n_before} chunks x 30 x 600")
    assert file_ids(before) == ids  # finished chunks untouched
    assert_equal_dicts(chunk_arrays(folder), chunk_arrays(ref))


def consolidated(folder) -> bool:
    """True once a finished trajectory's chunks are merged into frames.h5 and deleted."""
    names = os.listdir(folder)
    return "frames.h5" in names and not any(n.startswith("frames_") for n in names)


def test_kill_and_resume_on_the_fly_is_bitwise(tmp_path):
    toml = write(tmp_path, "o.toml", model_toml(trajectories=3, duration="600 au", engine="on_the_fly",
                                                checkpoint_every=20, workers=1, record_every=1))
    ref = str(tmp_path / "ref")
    assert main(["run", toml, "--output", ref, "--no-analysis", "--quiet", "--workers", "2"]) == 0
    folder = tmp_path / "killed"
    t0 = folder / "trajectories" / "000000"
    t1 = folder / "trajectories" / "000001"

    def progressed():
        m0, m1 = TrajectoryStore(t0).read_meta(), TrajectoryStore(t1).read_meta()
        return m0 is not None and m0["step"] == 300 and consolidated(t0) and m1 is not None and m1["step"] >= 40

    proc = subprocess.Popen([sys.executable, "-m", "mapdyn", "run", toml, "--output", str(folder), "--no-analysis"],
                            cwd=tmp_path, env=ENV, start_new_session=True, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    assert _kill_when(proc, progressed), "the run ended before it could be killed"
    m1 = TrajectoryStore(t1).read_meta()
    done_steps = 300 + m1["step"]
    finished_files = [str(t0 / f) for f in os.listdir(t0)]
    partial = TrajectoryStore(t1).read_frames(m1["chunks"])
    ids = file_ids(finished_files)
    st = {e.index: e.status for e in Study(folder).status().entries}
    assert st == {0: "finished", 1: "pending", 2: "pending"}
    res = mapdyn("resume", str(folder), "--no-analysis", cwd=tmp_path)
    steps = int(res.stderr.split("(")[-1].split(" steps computed")[0])
    assert steps == 3 * 300 - done_steps  # nothing already checkpointed was recomputed
    print(f"on the fly: killed at traj0 300/300, traj1 {m1['step']}/300, traj2 0/300; resume computed {steps} steps")
    assert file_ids(finished_files) == ids  # the finished trajectory's files untouched
    # trajectory 1's chunks were merged into frames.h5 when it finished: its checkpointed frames are a prefix
    resumed = TrajectoryStore(t1).read_frames()
    assert all(np.array_equal(resumed[k][:len(partial["step"])], partial[k], equal_nan=True) for k in partial)
    assert_equal_dicts(traj_frames(folder), traj_frames(ref))
    for i in range(3):
        a = TrajectoryStore(Study(folder).trajectory_folder(i)).restart_point().state
        b = TrajectoryStore(Study(ref).trajectory_folder(i)).restart_point().state
        assert np.array_equal(a.positions, b.positions) and np.array_equal(a.x, b.x) and np.array_equal(a.p, b.p)


def test_extend_trajectories_and_duration(tmp_path):
    short = write(tmp_path, "s.toml", model_toml(trajectories=60, batch=40, duration="400 au"))
    long = write(tmp_path, "l.toml", model_toml(trajectories=100, batch=40, duration="800 au"))
    a, b = str(tmp_path / "a"), str(tmp_path / "b")
    assert main(["run", short, "--output", a, "--no-analysis", "--quiet", "--workers", "1"]) == 0
    first = sorted(str(p) for p in (tmp_path / "a" / "chunks").iterdir())
    ids = file_ids(first)
    assert main(["extend", a, "--trajectories", "100", "--no-analysis", "--quiet", "--workers", "1"]) == 0
    assert file_ids(first) == ids
    assert main(["extend", a, "--duration", "800 au", "--no-analysis", "--quiet", "--workers", "1"]) == 0
    assert file_ids(first) == ids
    assert main(["run", long, "--output", b, "--no-analysis", "--quiet", "--workers", "1"]) == 0
    # the chunk layout differs (40 + 20 | 40 per extension) from the fresh run (40 + 40 + 20):
    # compare per trajectory
    def per_traj(folder):
        study = Study(folder)
        rows = {}
        for c, first_i, count in study.chunks():
            arr = chunk_arrays(folder)[c]
            for j in range(count):
                rows[first_i + j] = (arr["actions_adiabatic"][:, j], arr["R"][:, j])
        return rows

    ra, rb = per_traj(a), per_traj(b)
    assert sorted(ra) == sorted(rb) == list(range(100))
    for i in range(100):
        assert np.array_equal(ra[i][0], rb[i][0]) and np.array_equal(ra[i][1], rb[i][1])
    # on the fly: a later end time continues each trajectory from its final state
    s2 = write(tmp_path, "s2.toml", model_toml(trajectories=2, duration="200 au", engine="on_the_fly", record_every=1))
    l2 = write(tmp_path, "l2.toml", model_toml(trajectories=2, duration="400 au", engine="on_the_fly", record_every=1))
    c, d = str(tmp_path / "c"), str(tmp_path / "d")
    assert main(["run", s2, "--output", c, "--no-analysis", "--quiet", "--workers", "1"]) == 0
    assert main(["extend", c, "--duration", "400 au", "--no-analysis", "--quiet", "--workers", "1"]) == 0
    for i in range(2):  # consolidated again when the extension finished: no chunk left
        names = set(os.listdir(Study(c).trajectory_folder(i)))
        assert {"frames.h5", "state.h5", "state_previous.h5"} <= names <= {"frames.h5", "state.h5", "state_previous.h5",
                                                                            "warnings.json"}, names
    assert main(["run", l2, "--output", d, "--no-analysis", "--quiet", "--workers", "1"]) == 0
    assert_equal_dicts(traj_frames(c), traj_frames(d))
    # refusals: fewer trajectories, an earlier end time
    assert main(["extend", c, "--trajectories", "1"]) == 2
    assert main(["extend", c, "--duration", "100 au"]) == 2


H2 = """
[study]
name = "h2_test"
description = "scenario of our own: H2 after excitation, SA2-CASSCF(2,2)/STO-3G"
""" + H2_SECTIONS + """[method]
window = "square"
[dynamics]
time_step = "0.5 fs"
duration = "{duration}"
checkpoint_every = 2
drift_threshold = "5e-3 Eh"
[ensemble]
trajectories = 2
seed = 5
workers = 2
[analysis]
observables = ["distance 0 1"]
n_resamples = 99
lifetime_resamples = 0
"""


def test_molecular_study_end_to_end_and_continuation(tmp_path):
    """Optimise, Hessian, Wigner, SA-CASSCF dynamics, report; a continuation (extend to a later
    end time, i.e. restart from the saved state) agrees with an uninterrupted run."""
    long = write(tmp_path, "l.toml", H2.format(duration="3 fs"))
    short = write(tmp_path, "s.toml", H2.format(duration="1.5 fs"))
    proc = mapdyn("run", long, "--output", "full", cwd=tmp_path)
    assert "finished 2, failed 0" in proc.stderr
    for name in ("populations.png", "observable_distance_0_1.csv", "summary.md"):
        assert (tmp_path / "full" / "report" / name).is_file()
    assert (tmp_path / "full" / "initial_conditions.h5").is_file()
    mapdyn("run", short, "--output", "part", "--no-analysis", cwd=tmp_path)
    mapdyn("extend", "part", "--duration", "3 fs", "--no-analysis", cwd=tmp_path)
    fa, fb = traj_frames(str(tmp_path / "full")), traj_frames(str(tmp_path / "part"))
    for i in range(2):
        assert np.array_equal(fa[i]["step"], np.arange(7)) and np.array_equal(fb[i]["step"], np.arange(7))
        # same initial conditions and the same first half (computed identically)
        assert np.array_equal(fa[i]["positions_bohr"][:4], fb[i]["positions_bohr"][:4])
        # after the restart: the backend is a pure function of (positions, guess) and the guess
        # (orbitals, CI vectors) is restored bit for bit, so on one thread the continuation is
        # identical (measured: 0 difference, tests/bench/bench_checkpoint_cost.py)
        for key in ("positions_bohr", "momenta_au", "actions", "total_energy_Eh"):
            assert np.array_equal(fa[i][key], fb[i][key]), key


@pytest.mark.slow
def test_shipped_demo_study(tmp_path):
    # the README's first command (after installation), run as a new user would
    here = str(INPUTS / "methaniminium_demo.toml")
    proc = mapdyn("run", here, "--output", "demo", cwd=tmp_path, timeout=3600)
    assert "failed 0" in proc.stderr
    assert (tmp_path / "demo" / "report" / "populations.png").is_file()


def test_help_and_usage_errors(tmp_path, capsys):
    with pytest.raises(SystemExit) as e:
        main(["--help"])
    assert e.value.code == 0
    out = capsys.readouterr().out
    for word in ("run", "resume", "status", "extend", "analyze", "Ctrl-C"):
        assert word in out
    assert main(["status", str(tmp_path)]) == 2
    assert "not a study folder" in capsys.readouterr().err


def test_molecular_extend_adds_trajectories_with_the_same_initial_conditions(tmp_path, monkeypatch):
    """Rows appended by ``extend`` equal those of a study created with more trajectories at once."""
    monkeypatch.chdir(tmp_path)
    one = write(tmp_path, "one.toml", H2.format(duration="1 fs").replace("trajectories = 2", "trajectories = 1"))
    two = write(tmp_path, "two.toml", H2.format(duration="1 fs"))
    assert main(["run", one, "--output", "a", "--no-analysis", "--quiet", "--workers", "1"]) == 0
    first = file_ids([str(tmp_path / "a" / "trajectories" / "000000" / f)
                      for f in os.listdir(tmp_path / "a" / "trajectories" / "000000")])
    assert main(["extend", "a", "--trajectories", "2", "--no-analysis", "--quiet", "--workers", "1"]) == 0
    assert main(["run", two, "--output", "b", "--no-analysis", "--quiet", "--workers", "1"]) == 0
    assert file_ids(list(first)) == first
    ia, _ = read_h5(tmp_path / "a" / "initial_conditions.h5", ["positions_bohr", "momenta_au", "rng_states_json"])
    ib, _ = read_h5(tmp_path / "b" / "initial_conditions.h5", ["positions_bohr", "momenta_au", "rng_states_json"])
    assert np.array_equal(ia["positions_bohr"], ib["positions_bohr"]) and ia["rng_states_json"] == ib["rng_states_json"]
    assert_equal_dicts(traj_frames(str(tmp_path / "a")), traj_frames(str(tmp_path / "b")))


def test_kill_and_resume_molecular_is_bitwise(tmp_path):
    """kill -9 of ``mapdyn run`` on an SA-CASSCF study, then ``resume``: identical to an
    uninterrupted run (the saved guess makes every restarted backend call take the same branch)."""
    toml = write(tmp_path, "h2.toml", H2.format(duration="8 fs").replace("workers = 2", "workers = 1"))
    ref = str(tmp_path / "ref")
    mapdyn("run", toml, "--output", ref, "--no-analysis", "--workers", "2", cwd=tmp_path)
    folder = tmp_path / "killed"
    t0, t1 = (folder / "trajectories" / f"00000{i}" for i in (0, 1))

    def progressed():
        m0, m1 = TrajectoryStore(t0).read_meta(), TrajectoryStore(t1).read_meta()
        return m0 is not None and m0["step"] == 16 and consolidated(t0) and m1 is not None and m1["step"] >= 4

    proc = subprocess.Popen([sys.executable, "-m", "mapdyn", "run", toml, "--output", str(folder), "--no-analysis"],
                            cwd=tmp_path, env=ENV, start_new_session=True, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    assert _kill_when(proc, progressed), "the run ended before it could be killed"
    m1 = TrajectoryStore(t1).read_meta()
    kept = [str(t0 / f) for f in os.listdir(t0)]
    partial = TrajectoryStore(t1).read_frames(m1["chunks"])
    ids = file_ids(kept)
    res = mapdyn("resume", str(folder), "--no-analysis", cwd=tmp_path)
    steps = int(res.stderr.split("(")[-1].split(" steps computed")[0])
    assert steps == 16 - m1["step"]
    print(f"SA-CASSCF: killed at traj0 16/16, traj1 {m1['step']}/16; resume computed {steps} steps")
    assert file_ids(kept) == ids  # the finished trajectory's files untouched
    resumed = TrajectoryStore(t1).read_frames()  # trajectory 1's chunks now merged: its checkpointed frames a prefix
    assert all(np.array_equal(resumed[k][:len(partial["step"])], partial[k], equal_nan=True) for k in partial)
    assert_equal_dicts(traj_frames(str(folder)), traj_frames(ref))


def test_prepare_is_a_command_with_an_example(capsys):
    with pytest.raises(SystemExit) as e:
        main(["--help"])
    assert e.value.code == 0
    out = capsys.readouterr().out
    assert "prepare" in out and "mapdyn prepare inputs/methaniminium_demo.toml" in out
    with pytest.raises(SystemExit):
        main(["prepare", "--help"])
    assert "absorption_spectrum.png" in capsys.readouterr().out


def test_show_one_trajectory_and_contact_sheet(tmp_path, capsys):
    """`mapdyn show`: files in report/show/, transfers and warnings printed; the min_dwell key of
    [analysis] round-trips through the study folder and reaches the report."""
    from mapdyn.study.analysis_settings import settings_from_table
    from mapdyn.study.diagnostics import record_warnings
    from mapdyn.units import AU_TIME_IN_FS

    text = tully1_study(trajectories=12, batch=6, workers=1) + 'min_dwell = "50 au"\ntransfer_families = 2\n'
    mapdyn("run", write(tmp_path, "m.toml", text), cwd=tmp_path)
    folder = tmp_path / "runs" / "tully1_test"
    study = Study(folder)
    assert study.config.analysis["min_dwell"] == "50 au"
    assert settings_from_table(study.config.analysis)["min_dwell"] == pytest.approx(50.0)
    assert "min_dwell = 1.209 fs" in (folder / "report" / "summary.md").read_text()
    assert (folder / "report" / "transfers.csv").is_file() and (folder / "report" / "transfer_times.png").is_file()

    class Caught:  # a warning as the worker would have caught it
        category = UserWarning
        message = "time step does not resolve the electronic gap (test record)"

    record_warnings(folder / "chunks" / "chunk_0000.warnings.json", 3, 40, [Caught()])
    assert main(["show", str(folder), "--trajectory", "3"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("trajectory 3: finished; 101 frames")
    assert f"transfers (min_dwell {50 * AU_TIME_IN_FS:.3g} fs)" in out
    assert "warning: 1× UserWarning: time step does not resolve the electronic gap (test record)" in out
    show = folder / "report" / "show"
    assert (show / "trajectory_000003.png").stat().st_size > 10_000
    from mapdyn.analysis.report import read_csv

    rows = read_csv(show / "trajectory_000003.csv")
    assert rows["time_au"].size == 101 and np.all(rows["gap_E1_E0_ev"] > 0)
    assert main(["show", str(folder), "--all"]) == 0
    out = capsys.readouterr().out
    assert "12 trajectories with frames (finished 12)" in out
    assert (show / "contact_sheet_01.png").is_file()
    sheet = read_csv(show / "contact_sheet.csv")
    assert sheet["trajectory"].tolist() == list(range(12)) and sheet["warnings"][3] == 1
    assert main(["show", str(folder), "--trajectory", "12"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--trajectory 12: the study has trajectories 0..11" in err


@pytest.mark.parametrize("line,fragment", [
    ("min_dwell = 2", "analysis.min_dwell = 2: give a duration with a unit"),
    ('min_dwell = "-1 fs"', "analysis.min_dwell = \"-1 fs\": must be a duration >= 0"),
    ('min_dwell = "2 m"', "analysis.min_dwell = \"2 m\": unknown time unit"),
    ("transfer_families = 0", "analysis.transfer_families = 0: must be a number of families >= 1"),
    ("transfer_family_distance = -1.0", "analysis.transfer_family_distance = -1.0: must be a number > 0"),
    ("transfer_families = 2\ntransfer_family_distance = 1.0", "are alternatives; give one of them"),
])
def test_transfer_keys_refused_in_one_line(tmp_path, monkeypatch, capsys, line, fragment):
    path = tmp_path / "s.toml"
    path.write_text(tully1_study(trajectories=4, workers=1) + line + "\n")
    monkeypatch.chdir(tmp_path)
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert fragment in err, err
    assert err.count("\n") == 1 and err.startswith("mapdyn: error: ")
    assert sorted(os.listdir(tmp_path)) == ["s.toml"]  # nothing written
