"""Harmonic-bath models (vibronic, spin_boson) and the new [initial] keys in the study file:
each key reads back (round trip through the TOML writer) and a wrong value is one line naming it."""

from __future__ import annotations

import os
import tomllib

import numpy as np
import pytest
from ase import units as ase_units
from conftest import H2_SECTIONS, INPUTS, tully1_study

from mapdyn.cli import main
from mapdyn.study.config import load_study_config, parse_study
from mapdyn.study.toml_text import dumps

# ase.units is the reference library for the unit factors
CM1 = ase_units.invcm / ase_units.Hartree      # 1 cm-1 in Eh
EV = 1.0 / ase_units.Hartree                    # 1 eV in Eh

SPIN_BOSON = """
[study]
name = "sb"
[electronic]
backend = "model"
model = "spin_boson"
[electronic.parameters]
epsilon = "100 cm-1"
delta = "50 cm-1"
spectral_density = "debye"
reorganization = "100 cm-1"
cutoff = "200 cm-1"
modes = 12
[initial]
state = 0
temperature = "300 K"
bath_center = "donor"
[dynamics]
time_step = "0.2 fs"
duration = "2 fs"
[ensemble]
trajectories = 8
seed = 3
workers = 1
"""

VIBRONIC = """
[study]
name = "vib"
[electronic]
backend = "model"
model = "vibronic"
[electronic.parameters]
energies = ["0 eV", "0.3 eV", "0.5 eV"]
frequencies = ["1000 cm-1", "2000 cm-1"]
kappa = [["0 eV", "0 eV"], ["-0.1 eV", "0.05 eV"], ["0.02 eV", "-0.03 eV"]]
mode_couplings = [[1, 2, 0, "0.02 eV"]]
state_couplings = [[0, 1, "0.01 eV"]]
[initial]
state = 2
[dynamics]
time_step = "0.1 fs"
duration = "1 fs"
[ensemble]
trajectories = 4
seed = 1
workers = 1
"""

MOLECULE = """
[study]
name = "h2"
""" + H2_SECTIONS + """[dynamics]
time_step = "0.5 fs"
duration = "5 fs"
[ensemble]
trajectories = 2
seed = 1
"""


def set_key(text: str, section: str, key: str, value: str | None) -> str:
    """Replace (value None: delete) ``key`` in ``[section]``, or add it at the end of the section."""
    out, sec, done = [], None, False
    for line in text.strip().splitlines():
        if line.startswith("["):
            if sec == section and not done and value is not None:
                out.append(f"{key} = {value}")
                done = True
            sec = line.strip()[1:-1]
        elif sec == section and line.split("=")[0].strip() == key:
            done = True
            if value is not None:
                out.append(f"{key} = {value}")
            continue
        out.append(line)
    if sec == section and not done and value is not None:
        out.append(f"{key} = {value}")
    return "\n".join(out) + "\n"


def round_trip(text: str):
    """The config parsed from ``text`` and from the TOML writer's text of the same mapping."""
    a = parse_study(tomllib.loads(text), source_text=text)
    again = dumps(tomllib.loads(text))
    b = parse_study(tomllib.loads(again), source_text=again)
    return a, b


def test_spin_boson_keys_round_trip_and_units():
    a, b = round_trip(SPIN_BOSON)
    assert a.electronic.model_parameters == b.electronic.model_parameters and a.initial == b.initial
    p = a.electronic.model_parameters
    assert p["epsilon"] == pytest.approx(100 * CM1, rel=1e-12) and p["delta"] == pytest.approx(50 * CM1, rel=1e-12)
    assert p["reorganization"] == pytest.approx(100 * CM1, rel=1e-12) and p["cutoff"] == pytest.approx(200 * CM1, rel=1e-12)
    assert p["modes"] == 12 and p["spectral_density"] == "debye"
    assert a.initial.temperature_kelvin == 300.0 and a.initial.bath_center == "donor" and a.initial.basis == "diabatic"
    assert a.electronic.states == 2 and a.batched
    from mapdyn.models.spin_boson import SpinBoson
    from mapdyn.study.backend_factory import make_model

    model = make_model(a)
    ref = SpinBoson.debye(100 * CM1, 50 * CM1, 100 * CM1, 200 * CM1, 12)
    assert np.allclose(model.frequencies, ref.frequencies, rtol=1e-12, atol=0)
    assert np.allclose(model.bath_couplings, ref.bath_couplings, rtol=1e-12, atol=0)
    # H(Q=0) = ε σ_z + Δ σ_x
    assert np.allclose(model.hamiltonian(np.zeros((1, 12)))[0], [[100 * CM1, 50 * CM1], [50 * CM1, -100 * CM1]], atol=1e-15)
    ohmic = set_key(set_key(SPIN_BOSON, "electronic.parameters", "reorganization", None),
                    "electronic.parameters", "spectral_density", '"ohmic"')
    c, d = round_trip(set_key(ohmic, "electronic.parameters", "kondo", "0.1"))
    assert c.electronic.model_parameters["kondo"] == 0.1 == d.electronic.model_parameters["kondo"]


def test_vibronic_keys_round_trip_and_hamiltonian():
    a, b = round_trip(VIBRONIC)
    assert a.electronic.model_parameters == b.electronic.model_parameters and a.electronic.states == 3
    from mapdyn.study.backend_factory import make_model

    model = make_model(a)
    H0 = model.hamiltonian(np.zeros((1, 2)))[0]
    # at Q = 0: diagonal = the diabatic energies, (0, 1) = the constant coupling
    assert np.allclose(np.diag(H0), [0.0, 0.3 * EV, 0.5 * EV], atol=1e-15)
    assert H0[0, 1] == pytest.approx(0.01 * EV, rel=1e-12) and H0[1, 2] == 0.0
    # gradient in the dimensionless coordinate q_j = √ω_j Q_j: ∂H_kk/∂q_j = κ_j^(k), ∂H_12/∂q_0 = λ
    w = np.array([1000, 2000]) * CM1
    G = model.couplings  # (D, F, F) per unit Q
    assert G[0, 1, 1] / np.sqrt(w[0]) == pytest.approx(-0.1 * EV, rel=1e-12)
    assert G[1, 2, 2] / np.sqrt(w[1]) == pytest.approx(-0.03 * EV, rel=1e-12)
    assert G[0, 1, 2] / np.sqrt(w[0]) == pytest.approx(0.02 * EV, rel=1e-12) and G[1, 1, 2] == 0.0


def test_energy_window_and_spectrum_width_round_trip():
    text = set_key(set_key(set_key(MOLECULE, "initial", "state", None), "initial", "excitation", '"energy_range"'),
                   "initial", "energy_range", '["8 eV", "10.5 eV"]')
    text = set_key(text, "initial", "spectrum_fwhm", '"0.3 eV"')
    a, b = round_trip(text)
    assert a.initial == b.initial
    assert a.initial.excitation == "energy_range" and a.initial.state is None
    assert a.initial.energy_range_hartree == pytest.approx((8 * EV, 10.5 * EV), rel=1e-12)
    assert a.initial.spectrum_fwhm_hartree == pytest.approx(0.3 * EV, rel=1e-12)
    default = parse_study(tomllib.loads(MOLECULE), source_text=MOLECULE)
    assert default.initial.spectrum_fwhm_hartree == pytest.approx(0.15 * EV, rel=1e-12)


def test_the_shipped_spin_boson_example_runs_and_reports_diabatic_populations(tmp_path):
    """inputs/model_spin_boson.toml (invented parameters): a few seconds; populations start at 1 on
    the donor (diabatic state 0, the initial state of the thermal bath sample)."""
    from mapdyn.analysis.report import read_csv

    cfg = load_study_config(os.path.join(INPUTS, "model_spin_boson.toml"))
    assert cfg.electronic.model == "spin_boson" and cfg.initial.bath_center == "donor"
    out = tmp_path / "sb"
    assert main(["run", os.path.join(INPUTS, "model_spin_boson.toml"), "--output", str(out), "--quiet"]) == 0
    pops = read_csv(out / "report" / "populations.csv")
    assert pops["P_state_0"][0] == 1.0
    # the donor loses population: downhill transfer by ΔG = −2ε = −200 cm-1 (the scenario's bias)
    assert pops["P_state_0"][-1] < 0.9
    summary = (out / "report" / "summary.md").read_text()
    assert "population_basis: diabatic" in summary
    # the preflight samples the same thermal bath and checks the model's gradients and couplings
    assert main(["check", os.path.join(INPUTS, "model_spin_boson.toml")]) == 0


MOL_PLUS = set_key(MOLECULE, "initial", "state", None)
REFUSALS = [
    ("model energies not a list", set_key(VIBRONIC, "electronic.parameters", "energies", '"0 eV"'),
     "electronic.parameters.energies = \"0 eV\": must be a list of energies"),
    ("model frequency without unit", set_key(VIBRONIC, "electronic.parameters", "frequencies", '["1000", "2000 cm-1"]'),
     "electronic.parameters.frequencies"),
    ("negative frequency", set_key(VIBRONIC, "electronic.parameters", "frequencies", '["-1000 cm-1", "2000 cm-1"]'),
     "electronic.parameters.frequencies = ['-1000 cm-1', '2000 cm-1']: must all be positive"),
    ("kappa rows", set_key(VIBRONIC, "electronic.parameters", "kappa", '[["0 eV", "0 eV"]]'),
     "electronic.parameters.kappa = [['0 eV', '0 eV']]: give 3 rows"),
    ("mode coupling to itself", set_key(VIBRONIC, "electronic.parameters", "mode_couplings", '[[1, 1, 0, "0.1 eV"]]'),
     "electronic.parameters.mode_couplings: entry [1, 1, 0, '0.1 eV']: couples a state to itself"),
    ("mode coupling mode index", set_key(VIBRONIC, "electronic.parameters", "mode_couplings", '[[0, 1, 5, "0.1 eV"]]'),
     "electronic.parameters.mode_couplings = 5: mode j must be an integer 0..1"),
    ("state coupling shape", set_key(VIBRONIC, "electronic.parameters", "state_couplings", '[[0, "0.1 eV"]]'),
     "electronic.parameters.state_couplings: entry [0, '0.1 eV']: must be [state k, state l"),
    ("unknown vibronic key", set_key(VIBRONIC, "electronic.parameters", "kapa", "1"),
     "electronic.parameters.kapa is not a parameter of vibronic (did you mean 'kappa'?)"),
    ("vibronic states", set_key(VIBRONIC, "electronic", "states", "2"), "electronic.states = 2: this vibronic model has 3 states"),
    ("spin-boson spectral density", set_key(SPIN_BOSON, "electronic.parameters", "spectral_density", '"lorentz"'),
     "electronic.parameters.spectral_density = \"lorentz\": allowed \"debye\", \"ohmic\""),
    ("spin-boson delta unit", set_key(SPIN_BOSON, "electronic.parameters", "delta", '"50 K"'), "electronic.parameters.delta"),
    ("spin-boson delta missing", set_key(SPIN_BOSON, "electronic.parameters", "delta", None),
     "electronic.parameters.delta is missing"),
    ("spin-boson cutoff", set_key(SPIN_BOSON, "electronic.parameters", "cutoff", '"-200 cm-1"'),
     "electronic.parameters.cutoff = \"-200 cm-1\": must be positive"),
    ("spin-boson modes", set_key(SPIN_BOSON, "electronic.parameters", "modes", "0"),
     "electronic.parameters.modes = 0: must be a number of bath modes"),
    ("spin-boson kondo with debye", set_key(SPIN_BOSON, "electronic.parameters", "kondo", "0.1"),
     "electronic.parameters.kondo is not used with spectral_density = \"debye\""),
    ("spin-boson epsilon", set_key(SPIN_BOSON, "electronic.parameters", "epsilon", "100"),
     "electronic.parameters.epsilon = 100: give"),
    ("bath model on the fly", set_key(SPIN_BOSON, "electronic", "engine", '"on_the_fly"'),
     "electronic.engine = \"on_the_fly\": model \"spin_boson\" runs on the batched engine only"),
    ("bath temperature", set_key(SPIN_BOSON, "initial", "temperature", '"-3 K"'), "initial.temperature = \"-3 K\": must be >= 0 K"),
    ("bath center", set_key(SPIN_BOSON, "initial", "bath_center", '"acceptor"'), "initial.bath_center = \"acceptor\""),
    ("bath adiabatic basis", set_key(SPIN_BOSON, "initial", "basis", '"adiabatic"'),
     "initial.basis = \"adiabatic\": model \"spin_boson\" starts in a diabatic state"),
    ("wavepacket on a bath model", set_key(SPIN_BOSON, "initial", "position", '"1 bohr"'), "initial.position is not used with model"),
    ("bath keys on a Tully model", set_key(set_key(SPIN_BOSON, "electronic.parameters", "delta", None), "electronic", "model",
                                           '"tully1"'), "electronic.parameters"),
    ("bath temperature on a Tully model", set_key(tully1_study(analysis=False), "initial", "temperature", '"300 K"'),
     "initial.temperature is used with the harmonic-bath models (vibronic, spin_boson) only"),
    ("energy window missing", set_key(MOL_PLUS, "initial", "excitation", '"energy_range"'), "initial.energy_range is missing"),
    ("energy window order", set_key(set_key(MOL_PLUS, "initial", "excitation", '"energy_range"'), "initial", "energy_range",
                                    '["10 eV", "8 eV"]'), "initial.energy_range = ['10 eV', '8 eV']: needs 0 <= low < high"),
    ("energy window unit", set_key(set_key(MOL_PLUS, "initial", "excitation", '"energy_range"'), "initial", "energy_range",
                                   '["8", "10 eV"]'), "initial.energy_range"),
    ("energy window with a fixed state", set_key(MOLECULE, "initial", "energy_range", '["8 eV", "10 eV"]'),
     "initial.energy_range is used with excitation = \"energy_range\" only"),
    ("energy window with a state", set_key(set_key(MOLECULE, "initial", "excitation", '"energy_range"'), "initial",
                                           "energy_range", '["8 eV", "10 eV"]'),
     "initial.state is not used with excitation = \"energy_range\""),
    ("spectrum width", set_key(MOLECULE, "initial", "spectrum_fwhm", '"-0.1 eV"'),
     "initial.spectrum_fwhm = \"-0.1 eV\": must be a positive width"),
    ("spectrum width unit", set_key(MOLECULE, "initial", "spectrum_fwhm", "0.1"), "initial.spectrum_fwhm = 0.1"),
]


@pytest.mark.parametrize("label,text,fragment", REFUSALS, ids=[c[0] for c in REFUSALS])
def test_wrong_values_are_one_line_errors_and_nothing_is_written(tmp_path, monkeypatch, capsys, label, text, fragment):
    path = tmp_path / "study.toml"
    path.write_text(text)
    monkeypatch.chdir(tmp_path)
    code = main(["run", str(path)])
    err = capsys.readouterr().err
    assert code == 2, err
    assert fragment in err, err
    assert err.count("\n") == 1 and err.startswith("mapdyn: error: ")
    assert sorted(os.listdir(tmp_path)) == ["study.toml"]
