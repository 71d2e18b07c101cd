"""Worker warnings reach status and summary; export to extended XYZ/CSV/HDF5; xarray reader."""

import json

import numpy as np
import pytest
from conftest import mapdyn, tully1_study, write


@pytest.fixture(scope="module")
def gap_study(tmp_path_factory):
    """Two on-the-fly Tully-1 trajectories in two worker processes with a 60 a.u. step: the
    driver's "time step does not resolve the electronic gap" warning (ΔE·Δt > 1 rad near the
    crossing) is raised inside the workers."""
    tmp = tmp_path_factory.mktemp("gap")
    path = write(tmp, "gap.toml", tully1_study(name="gap", trajectories=2, time_step="60 au", duration="1500 au",
                                               record_every=1, checkpoint_every=5, workers=2, batch=None,
                                               engine="on_the_fly"))
    proc = mapdyn("run", path, "--quiet", cwd=tmp)
    return tmp / "runs" / "gap", proc


def test_worker_warning_in_status_summary_and_log(gap_study):
    folder, proc = gap_study
    assert "time step does not resolve the electronic gap" in proc.stderr      # reached the terminal
    status = json.loads(mapdyn("status", str(folder), "--json", cwd=folder).stdout)
    assert status["warnings"] == 2 and all(t["warnings"] == 1 for t in status["tasks"])
    text = mapdyn("status", str(folder), cwd=folder).stdout
    assert "warnings 2" in text
    summary = (folder / "report" / "summary.md").read_text()
    section = summary.split("## Warnings raised during the dynamics")[1].split("##")[0]
    assert "2× UserWarning: time step does not resolve the electronic gap" in section
    assert "trajectories 0, 1" in section
    log = (folder / "mapdyn.log").read_text()
    assert "trajectory 0 finished" in log and "time step does not resolve" in log


def test_export_reads_back_with_ase_equal_to_stored_frames(gap_study):
    import ase.io
    from ase.units import Bohr

    from mapdyn.study.checkpoint import TrajectoryStore
    from mapdyn.study.folder import Study
    from mapdyn.units import AU_TIME_IN_FS, HARTREE_IN_EV

    folder, _ = gap_study
    mapdyn("export", str(folder), cwd=folder)
    study = Study(str(folder))
    for i in range(2):
        stored = TrajectoryStore(study.trajectory_folder(i)).read_frames()
        frames = ase.io.read(str(folder / "export" / f"{i:06d}.xyz"), index=":")   # reader: ASE extxyz
        assert len(frames) == stored["step"].size == 26
        for k, a in enumerate(frames):
            # extxyz writes positions with 8 decimals (Å) and info floats with 17 significant digits
            np.testing.assert_allclose(a.positions, stored["positions_bohr"][k] * Bohr, atol=1e-7)
            assert a.info["step"] == stored["step"][k] and a.info["window"] == stored["window"][k]
            assert a.info["time_fs"] == pytest.approx(stored["time_au"][k] * AU_TIME_IN_FS, rel=1e-14)
            np.testing.assert_allclose(a.info["energies_eV"], stored["energies_Eh"][k] * HARTREE_IN_EV, rtol=1e-14)
            np.testing.assert_allclose(a.info["populations"], stored["populations"][k], rtol=0, atol=0)
    from mapdyn.analysis.report import read_csv

    rows = read_csv(folder / "export" / "frames.csv")
    assert rows["trajectory"].size == 52
    ens = read_csv(folder / "export" / "ensemble.csv")
    ok = np.isfinite(ens["P_0"])                                     # NaN: no trajectory in any window
    assert ok.sum() >= 20
    assert np.all(ens["low_0"][ok] <= ens["P_0"][ok]) and np.all(ens["P_0"][ok] <= ens["high_0"][ok])
    import h5py

    with h5py.File(folder / "export" / "results.h5") as h5:
        assert h5.attrs["format_version"] == 1
        assert h5["actions"].shape == (2, 26, 2) and h5["actions"].attrs["dimensions"] == "trajectory,time,state"
        assert h5["time"].attrs["units"].startswith("a.u.") and h5["total_energy"].attrs["units"] == "Eh"


def test_load_results_dataset(gap_study):
    import mapdyn

    folder, _ = gap_study
    ds = mapdyn.load_results(folder)
    assert ds["actions"].dims == ("time", "trajectory", "state") and ds.sizes["time"] == 26
    assert ds["time"].attrs["units"].startswith("a.u.") and ds["time_fs"].attrs["units"] == "fs"
    assert ds["total_energy"].attrs["units"] == "Eh"
    p = ds["populations"].sum("trajectory") / ds["populations"].sum(("trajectory", "state"))
    np.testing.assert_allclose(p.values, ds["population"].values, atol=1e-12)   # windowed normalisation
    # backend diagnostics per frame: the model backend has no active space and never retries
    assert ds["overlap_retries"].dims == ("time", "trajectory")
    assert np.all(ds["overlap_retries"].values == 0) and np.all(np.isnan(ds["active_space_change"].values))


def test_backend_frame_diagnostics_from_backend_reports():
    from mapdyn.driver.observers import backend_frame_diagnostics
    from mapdyn.study.checkpoint import frames_to_arrays

    casscf = {"active_space_change": True, "active_overlap_min_singular": 0.41,
              "overlap_retry": {"kept": "cold", "candidates": [{}, {}, {}]},
              "gradients_converged": True, "couplings_converged": False}
    tddft = {"cphf_residuals": [1e-7, 3e-6]}
    d1, d2 = backend_frame_diagnostics(casscf), backend_frame_diagnostics(tddft)
    assert d1["active_space_change"] == 1.0 and d1["overlap_retries"] == 2.0 and d1["response_converged"] == 0.0
    assert d2["response_residual"] == 3e-6 and np.isnan(d2["active_space_change"]) and d2["overlap_retries"] == 0.0
    base = {"step": 0, "time_au": 0.0, "window": 0, "kinetic_energy_Eh": 0.0, "potential_energy_Eh": 0.0,
            "total_energy_Eh": 0.0, "drift_Eh": 0.0, "swap": False}
    arr = frames_to_arrays([{**base, **d1}, {**base, **d2}])
    np.testing.assert_array_equal(arr["overlap_retries"], [2.0, 0.0])
    assert arr["active_space_change"][0] == 1.0 and np.isnan(arr["active_space_change"][1])


def test_old_trajectory_folder_names_are_still_read(gap_study, tmp_path):
    import shutil

    from mapdyn.study.folder import Study

    folder, _ = gap_study
    copy = tmp_path / "old_layout"
    shutil.copytree(folder, copy)
    for i in range(2):
        (copy / "trajectories" / f"{i:06d}").rename(copy / "trajectories" / f"traj_{i:06d}")
    study = Study(str(copy))
    assert study.trajectory_folder(1).endswith("traj_000001")
    assert study.status().counts()["finished"] == 2 and study.status().warning_count == 2


def test_checkpoint_datasets_carry_units(gap_study):
    import h5py

    from mapdyn.study.checkpoint import TrajectoryStore
    from mapdyn.study.folder import Study

    folder, _ = gap_study
    store = TrajectoryStore(Study(str(folder)).trajectory_folder(0))
    with h5py.File(f"{store.folder}/frames.h5") as h5:  # a finished trajectory: consolidated
        assert h5["positions_bohr"].attrs["units"] == "bohr" and h5["energies_Eh"].attrs["units"] == "Eh"
        assert h5["time_au"].attrs["units"].startswith("a.u. of time")
