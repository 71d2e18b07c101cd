"""The committed methaniminium study (examples/studies/methaniminium_s1) recomputed for its first
steps: two trajectories of each run, 2 fs, against the first frames stored with the study.

This is a reproducibility check of the committed results (the reference was written by this code
from the finished study, so it guards against silent changes, not against physics errors).
Tolerances: the frames come from a SCF/CASSCF solve converged to ~1e-10 Eh and propagated for
8 steps; a different BLAS or CPU changes summation order, which over 8 steps moves positions by
far less than 1e-6 Bohr and energies by far less than 1e-7 Eh (common practice for cross-machine
regression checks of converged SCF results).
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import REPO, mapdyn, write

from mapdyn.study.checkpoint import TrajectoryStore
from mapdyn.study.folder import Study

STUDY = REPO / "examples" / "studies" / "methaniminium_s1"
TOLERANCE = {"time_au": 1e-12, "positions_bohr": 1e-6, "energies_Eh": 1e-7, "total_energy_Eh": 1e-7, "populations": 1e-6}


@pytest.mark.slow
@pytest.mark.parametrize("method", ["sqc", "ehrenfest"])
def test_first_frames_of_the_committed_study_recompute(tmp_path, method):
    text = (STUDY / f"{method}.toml").read_text()
    short = text.replace("trajectories = 40", "trajectories = 2").replace('duration = "60 fs"', 'duration = "2 fs"')
    assert short != text and "trajectories = 2" in short and 'duration = "2 fs"' in short
    toml = write(tmp_path, f"{method}.toml", short)
    mapdyn("run", toml, "--output", str(tmp_path / "run"), "--no-analysis", "--quiet", "--workers", "1", cwd=tmp_path)

    reference = np.load(STUDY / "first_frames.npz")
    study = Study(str(tmp_path / "run"))
    for t in (0, 1):
        frames = TrajectoryStore(study.trajectory_folder(t)).read_frames()
        for key, tol in TOLERANCE.items():
            want = reference[f"{method}/{t}/{key}"]
            got = np.asarray(frames[key][: len(want)])
            assert got.shape == want.shape, (t, key)
            np.testing.assert_allclose(got, want, rtol=0, atol=tol, err_msg=f"{method} trajectory {t} {key}")
