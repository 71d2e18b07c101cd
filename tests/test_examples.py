"""Smoke tests: the fast example scripts run from a clean folder, exit 0 and write what they say."""

from __future__ import annotations

import re
import subprocess
import sys

import ase.io
import pytest
from conftest import ENV, REPO


def run_example(name: str, *args: str, cwd) -> str:
    proc = subprocess.run([sys.executable, str(REPO / "examples" / name), *args], cwd=cwd,
                          env=dict(ENV, MPLBACKEND="Agg"), capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return proc.stdout


def test_callback_backend_example(tmp_path):
    out = run_example("callback_backend.py", cwd=tmp_path)
    drifts = [float(x) for x in re.findall(r"max \|drift\| = ([0-9.eE+-]+) Eh", out)]
    assert len(drifts) == 4 and max(drifts) < 1e-3  # the driver's default drift threshold


def test_absorption_spectrum_example(tmp_path):
    run_example("absorption_spectrum.py", "--samples", "6", "--out", str(tmp_path), cwd=tmp_path)
    assert (tmp_path / "h2co_spectrum.png").stat().st_size > 0


@pytest.mark.parametrize("steps", [4])
def test_molecule_two_trajectories_example(tmp_path, steps):
    run_example("molecule_two_trajectories.py", "--steps", str(steps), "--out", str(tmp_path), cwd=tmp_path)
    frames = ase.io.read(tmp_path / "traj_000.extxyz", index=":")
    assert len(frames) == steps + 1
