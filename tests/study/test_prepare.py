"""``mapdyn prepare``: initial conditions, absorption spectrum and initial states before any
trajectory; a later ``mapdyn run`` reuses them and gives bitwise the trajectories of a plain run."""

from __future__ import annotations

import dataclasses
import hashlib
import os

import numpy as np
import pytest
from ase import units as ase_units
from conftest import H2_SECTIONS, tully1_study, write

from mapdyn.analysis.report import read_csv
from mapdyn.cli import main
from mapdyn.study.checkpoint import TrajectoryStore, read_h5
from mapdyn.study.folder import Study

H2 = """
[study]
name = "h2_prepare"
description = "scenario of our own: H2 after excitation, SA2-CASSCF(2,2)/STO-3G"
""" + H2_SECTIONS + """spectrum_fwhm = "0.3 eV"
[dynamics]
time_step = "0.5 fs"
duration = "1.5 fs"
checkpoint_every = 2
drift_threshold = "5e-3 Eh"
[ensemble]
trajectories = 2
seed = 5
workers = 1
[analysis]
n_resamples = 99
lifetime_resamples = 0
"""


def sha(path) -> str:
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def frames(folder: str, index: int) -> dict:
    store = TrajectoryStore(Study(folder).trajectory_folder(index))
    return store.read_frames(store.restart_point().chunks)


def test_prepare_then_run_gives_the_plain_run_bitwise(tmp_path, capsys):
    study = write(tmp_path, "h2.toml", H2)
    assert main(["prepare", study, "--output", str(tmp_path / "prep")]) == 0
    out = capsys.readouterr().out
    # the summary says which level the modes come from, and it is not the dynamics' method
    assert "normal mode of the closed-shell singlet ground state at RHF/sto-3g (not the dynamics' SA2-CASSCF(2,2)/sto-3g)" in out
    assert "frequencies" in out and "cm⁻¹" in out and "initial states (fixed state 1): S1: 2" in out
    prep = tmp_path / "prep"
    assert not (prep / "trajectories").exists()  # no dynamics
    spec = read_csv(prep / "preparation" / "absorption_spectrum.csv")
    assert set(spec) >= {"energy_ev", "cross_section_angstrom2", "S1_angstrom2", "fwhm_ev"}
    assert np.all(spec["fwhm_ev"] == 0.3)  # initial.spectrum_fwhm of the input
    peak = spec["energy_ev"][np.argmax(spec["cross_section_angstrom2"])]
    assert f"peak {peak:.3f} eV" in out and "(Gaussian FWHM 0.3 eV)" in out
    arrays, _ = read_h5(prep / "initial_conditions.h5")
    states = read_csv(prep / "preparation" / "initial_states.csv")
    assert list(states["trajectory"]) == [0, 1] and list(states["state"]) == [1, 1]
    assert np.array_equal(states["excitation_energy_ev"], arrays["excitation_energies_hartree"][:, 0] * ase_units.Hartree)
    assert np.array_equal(states["oscillator_strength"], arrays["oscillator_strengths"][:, 0])
    # the peak lies on the excitations of the two geometries (a Gaussian sum of width 0.3 eV)
    assert states["excitation_energy_ev"].min() - 0.3 < peak < states["excitation_energy_ev"].max() + 0.3
    assert (prep / "preparation" / "absorption_spectrum.png").stat().st_size > 10_000
    before = sha(prep / "initial_conditions.h5")

    assert main(["run", study, "--output", str(prep), "--no-analysis", "--quiet"]) == 0
    log = (prep / "mapdyn.log").read_text()
    assert log.count("optimising the ground state") == 1 and log.count("Hessian and normal modes") == 1  # reused
    assert "running 2 trajectories" in log
    assert sha(prep / "initial_conditions.h5") == before
    assert main(["run", study, "--output", str(tmp_path / "plain"), "--no-analysis", "--quiet"]) == 0
    plain, _ = read_h5(tmp_path / "plain" / "initial_conditions.h5")
    for k in ("positions_bohr", "momenta_au", "initial_states", "rng_states_json"):
        assert bytes(arrays[k]) == bytes(plain[k])
    for i in range(2):
        a, b = frames(str(prep), i), frames(str(tmp_path / "plain"), i)
        assert sorted(a) == sorted(b) and len(a["step"]) == 4
        for k in a:
            assert np.asarray(a[k]).tobytes() == np.asarray(b[k]).tobytes(), k

    # prepare after a plain run: the spectrum is added, the rows stay
    assert main(["prepare", study, "--output", str(tmp_path / "plain")]) == 0
    again, _ = read_h5(tmp_path / "plain" / "initial_conditions.h5")
    for k in ("positions_bohr", "momenta_au", "initial_states"):
        assert bytes(again[k]) == bytes(plain[k])
    assert np.array_equal(again["oscillator_strengths"], arrays["oscillator_strengths"])

    # the report of the analysis states the sampling level and the frequencies
    assert main(["analyze", str(prep)]) == 0
    summary = (prep / "report" / "summary.md").read_text()
    assert "- initial conditions: Wigner sampling at 0 K from 1 normal mode of the closed-shell singlet ground state " \
           "at RHF/sto-3g (not the dynamics' SA2-CASSCF(2,2)/sto-3g)" in summary
    assert (prep / "report" / "spectrum.csv").exists()


def test_energy_window_end_to_end(tmp_path, capsys):
    """H2 with three states: S2 (σ*², g symmetry) is dark, so a window holding S1 and S2 starts every
    trajectory in S1 with geometry weight f_01; a window that misses S1 somewhere is refused in one
    line before initial_conditions.h5 is written."""
    text = H2.replace("states = 2", "states = 3").replace("state = 1\n", 'excitation = "energy_range"\n'
                                                           'energy_range = ["20 eV", "60 eV"]\n')
    path = write(tmp_path, "w.toml", text)
    assert main(["prepare", path, "--output", str(tmp_path / "w")]) == 0
    out = capsys.readouterr().out
    assert "drawn ∝ oscillator strength among the states in 20–60 eV" in out and "S1: 2" in out
    states = read_csv(tmp_path / "w" / "preparation" / "initial_states.csv")
    arrays, _ = read_h5(tmp_path / "w" / "initial_conditions.h5")
    assert list(states["state"]) == [1, 1]
    assert np.array_equal(states["weight"], arrays["initial_weights"])
    assert np.array_equal(states["weight"], arrays["oscillator_strengths"][:, 0])
    lowest = arrays["excitation_energies_hartree"][:, 0].min() * ase_units.Hartree
    narrow = text.replace('["20 eV", "60 eV"]', f'["{lowest + 0.01:.3f} eV", "60 eV"]').replace('name = "h2_prepare"',
                                                                                                  'name = "h2_narrow"')
    path = write(tmp_path, "n.toml", narrow)
    assert main(["prepare", path, "--output", str(tmp_path / "n")]) == 2
    err = capsys.readouterr().err  # progress lines of the preparation, then the one-line error
    assert err.count("mapdyn: error:") == 1 and "Traceback" not in err
    last = err.strip().splitlines()[-1]
    assert last.startswith("mapdyn: error: initial.energy_range = [") and "holds no bright excitation at 1 of 2" in last
    assert not (tmp_path / "n" / "initial_conditions.h5").exists()


class _FakeBackend:
    """Three excited states at fixed energies (Eh) with transition dipoles giving f = 0.2, 0.6, 0.4."""

    nstates = 4
    energies = np.array([0.0, 0.30, 0.35, 0.60])

    def compute(self, positions_bohr, guess=None, need_gradients=True):
        from mapdyn.backends.contract import ElectronicResult

        f = np.array([0.2, 0.6, 0.4])
        mu = np.zeros((4, 4, 3))
        mu[0, 1:, 0] = mu[1:, 0, 0] = np.sqrt(1.5 * f / self.energies[1:])  # f = (2/3) ΔE μ²
        return ElectronicResult(energies=self.energies.copy(), transition_dipoles=mu)


def test_energy_window_draws_states_in_proportion_to_oscillator_strength(tmp_path):
    """S1 (f = 0.2) and S2 (f = 0.6) lie in the window 7–10 eV, S3 (16.3 eV) outside: the fraction of
    S1 among 2000 draws is 0.25 within 4 binomial standard errors; the draw of a trajectory does not
    depend on how many rows are drawn with it (extend)."""
    from mapdyn.study.config import load_study_config
    from mapdyn.study.initial_conditions import _choose_states

    cfg = load_study_config(write(tmp_path, "s.toml", H2))
    cfg = dataclasses.replace(cfg, initial=dataclasses.replace(cfg.initial, excitation="energy_range", state=None,
                                                               energy_range_hartree=(7 / ase_units.Hartree, 10 / ase_units.Hartree)))
    n = 2000
    x = np.zeros((n, 2, 3))
    states, extra = _choose_states(cfg, _FakeBackend(), x, None)
    assert set(np.unique(states)) == {1, 2}
    frac = np.mean(states == 1)
    assert abs(frac - 0.25) < 4 * np.sqrt(0.25 * 0.75 / n)
    assert np.allclose(extra["initial_weights"], 0.8, rtol=1e-12)
    tail, _ = _choose_states(cfg, _FakeBackend(), x[:10], None, first=1990)
    assert np.array_equal(tail, states[1990:])


def test_prepare_refuses_a_model_study_in_one_line(tmp_path, capsys):
    path = write(tmp_path, "m.toml", tully1_study(analysis=False))
    before = sorted(os.listdir(tmp_path))
    assert main(["prepare", path]) == 2
    err = capsys.readouterr().err
    assert err == ("mapdyn: error: prepare applies to molecular studies; a model study samples its initial conditions "
                   "inside each task (nothing to prepare): use 'mapdyn run'\n")
    assert sorted(os.listdir(tmp_path)) == before


@pytest.mark.parametrize("bad", ['"0 eV"', '"wide"'])
def test_prepare_refuses_bad_input_before_writing(tmp_path, capsys, bad):
    path = write(tmp_path, "b.toml", H2.replace('spectrum_fwhm = "0.3 eV"', f"spectrum_fwhm = {bad}"))
    assert main(["prepare", path, "--output", str(tmp_path / "b")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("mapdyn: error: initial.spectrum_fwhm") and err.count("\n") == 1
    assert not (tmp_path / "b").exists()


def test_extend_after_prepare_appends_the_excitations_of_the_new_rows(tmp_path):
    """Rows added by ``extend`` to a prepared study get their excitation energies and oscillator
    strengths too, equal to those of a study prepared with that many trajectories at once."""
    from mapdyn.study.initial_conditions import prepare_initial_conditions

    one = write(tmp_path, "one.toml", H2.replace("trajectories = 2", "trajectories = 1"))
    two = write(tmp_path, "two.toml", H2)
    assert main(["prepare", one, "--output", str(tmp_path / "a")]) == 0
    assert main(["extend", str(tmp_path / "a"), "--trajectories", "2", "--no-run"]) == 0
    prepare_initial_conditions(Study(str(tmp_path / "a")))
    assert main(["prepare", two, "--output", str(tmp_path / "b")]) == 0
    a, _ = read_h5(tmp_path / "a" / "initial_conditions.h5")
    b, _ = read_h5(tmp_path / "b" / "initial_conditions.h5")
    for k in ("positions_bohr", "initial_states", "excitation_energies_hartree", "oscillator_strengths"):
        assert a[k].shape[0] == 2 and np.array_equal(a[k], b[k]), k
