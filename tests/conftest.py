"""Shared pieces of the test suite: the Tully-1 model study input (a scenario of our own) in
every variant the tests need, and a runner for the ``mapdyn`` command in a subprocess."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
INPUTS = REPO / "inputs"
ENV = dict(os.environ, OMP_NUM_THREADS="1", PYTHONUNBUFFERED="1")


def tully1_study(*, name: str | None = "tully1_test", trajectories: int = 120, seed: int = 11,
                 time_step: str = "2 au", duration: str = "1000 au", record_every: int | None = 5,
                 checkpoint_every: int | None = 20, workers: int | None = 2, batch: int | None = 40,
                 engine: str = "batched", analysis: bool = True, folder: str | None = None) -> str:
    """TOML text of a Tully-1 study (packet at −8 Bohr, k = 15 a.u., width 1 Bohr, lower state,
    SQC triangle windows); keys given as None are left out (their defaults apply)."""
    study = ""
    if name is not None or folder is not None:
        study = "[study]\n" + (f'name = "{name}"\n' if name else "") + (f'folder = "{folder}"\n' if folder else "")
        if name == "tully1_test":
            study += 'description = "scenario of our own: Tully model 1 test ensemble"\n'
    lines = [study + "[electronic]", 'backend = "model"', 'model = "tully1"']
    if engine != "batched":
        lines.append(f'engine = "{engine}"')
    lines += ["[initial]", 'position = "-8 bohr"', 'momentum = "15 au"', 'width = "1 bohr"', "state = 0",
              "[method]", 'window = "triangle"',
              "[dynamics]", f'time_step = "{time_step}"', f'duration = "{duration}"']
    lines += [f"{k} = {v}" for k, v in (("record_every", record_every), ("checkpoint_every", checkpoint_every))
              if v is not None]
    lines += ["[ensemble]", f"trajectories = {trajectories}", f"seed = {seed}"]
    lines += [f"{k} = {v}" for k, v in (("workers", workers), ("batch", batch)) if v is not None]
    if analysis:
        lines += ["[analysis]", "n_resamples = 99", "lifetime_resamples = 0"]
    return "\n" + "\n".join(lines) + "\n"


#: H2 after excitation to S1 at SA2-CASSCF(2,2)/STO-3G (a scenario of our own): the molecule,
#: electronic and initial sections that the molecular tests share; each test adds the rest.
H2_SECTIONS = """[molecule]
atoms = [["H", 0.0, 0.0, 0.0], ["H", 0.0, 0.0, 0.74]]
[electronic]
backend = "casscf"
basis = "sto-3g"
active_orbitals = 2
active_electrons = 2
states = 2
[initial]
state = 1
"""


def write(tmp_path: Path, name: str, text: str) -> str:
    """Write ``text`` to ``tmp_path/name``; returns the path as a string."""
    path = tmp_path / name
    path.write_text(text)
    return str(path)


def mapdyn(*args: str, cwd, check: bool = True, timeout: float = 600) -> subprocess.CompletedProcess:
    """Run ``python -m mapdyn ARGS`` with one thread; assert exit 0 unless ``check`` is False."""
    proc = subprocess.run([sys.executable, "-m", "mapdyn", *args], cwd=cwd, env=ENV, capture_output=True,
                          text=True, timeout=timeout)
    if check:
        assert proc.returncode == 0, proc.stderr[-3000:]
    return proc
