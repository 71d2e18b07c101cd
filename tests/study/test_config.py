"""Study input validation: every malformed input gives a one-line message naming the key,
exit code 2, and writes nothing (table-driven)."""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib

import pytest
from conftest import H2_SECTIONS, tully1_study

from mapdyn.cli import main
from mapdyn.study.config import load_study_config, parse_duration

MODEL = tully1_study(name="m", trajectories=10, seed=1, duration="100 au", record_every=None,
                     checkpoint_every=None, workers=1, batch=None, analysis=False)

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


TDDFT = MOLECULE.replace(H2_SECTIONS, H2_SECTIONS.split("[electronic]")[0] + '[electronic]\nbackend = "tddft"\nbasis = "6-31g"\nstates = 2\n'
                         + "[initial]" + H2_SECTIONS.split("[initial]")[1])


def test_tddft_seam_gap_and_root_buffer_are_read(tmp_path):
    path = tmp_path / "t.toml"
    path.write_text(TDDFT.replace('states = 2', 'states = 2\nseam_gap = "0.2 eV"\nroot_buffer = 3'))
    opts = load_study_config(str(path)).electronic.options
    from ase import units
    assert opts["seam_gap"] == pytest.approx(0.2 / units.Hartree, rel=1e-12)   # reference: ase.units
    assert opts["extra_roots"] == 3
    path.write_text(TDDFT.replace('states = 2', 'states = 2\nseam_gap = "off"'))
    opts = load_study_config(str(path)).electronic.options
    assert opts["seam_gap"] is None and opts["extra_roots"] == 2


def edit(base: str, section: str, key: str, value: str | None) -> str:
    """Set (or with value None delete) ``key`` in ``[section]`` of a TOML text."""
    lines = base.strip().splitlines()
    out, in_sec, done = [], False, False
    for line in lines:
        if line.startswith("["):
            if in_sec and not done and value is not None:
                out.append(f"{key} = {value}")
                done = True
            in_sec = line.strip() == f"[{section}]"
        elif in_sec and line.split("=")[0].strip() == key:
            done = True
            if value is not None:
                out.append(f"{key} = {value}")
            continue
        out.append(line)
    if in_sec and not done and value is not None:
        out.append(f"{key} = {value}")
    if not any(line.strip() == f"[{section}]" for line in lines) and value is not None:
        out += [f"[{section}]", f"{key} = {value}"]
    return "\n".join(out) + "\n"


# (label, input text, expected fragment of the message)
CASES = [
    ("unknown key with suggestion", edit(MODEL, "ensemble", "trajectorys", "5"), "ensemble.trajectorys is not a known key (did you mean 'trajectories'?)"),
    ("unknown section", MODEL + "\n[dynamcs]\nx = 1\n", "dynamcs is not a known section (did you mean 'dynamics'?)"),
    ("negative time step", edit(MODEL, "dynamics", "time_step", '"-0.5 fs"'), "dynamics.time_step = \"-0.5 fs\": must be a positive duration"),
    ("zero time step", edit(MODEL, "dynamics", "time_step", '"0 au"'), "dynamics.time_step = \"0 au\": must be a positive duration"),
    ("time step without unit", edit(MODEL, "dynamics", "time_step", "0.5"), "dynamics.time_step = 0.5: give a duration with a unit"),
    ("unknown time unit", edit(MODEL, "dynamics", "time_step", '"0.5 fms"'), "unknown time unit 'fms'"),
    ("duration not a multiple", edit(MODEL, "dynamics", "duration", '"101 au"'), "dynamics.duration = \"101 au\": not a whole number of time steps"),
    ("duration shorter than a step", edit(MODEL, "dynamics", "duration", '"1 au"'), "dynamics.duration = \"1 au\": shorter than one time step"),
    ("missing duration", edit(MODEL, "dynamics", "duration", None), "dynamics.duration is missing"),
    ("record_every not dividing", edit(MODEL, "dynamics", "record_every", "7"), "dynamics.record_every = 7"),
    ("checkpoint_every zero", edit(MODEL, "dynamics", "checkpoint_every", "0"), "dynamics.checkpoint_every = 0"),
    ("drift threshold unit", edit(MODEL, "dynamics", "drift_threshold", '"1e-3 kcal"'), "unknown energy unit 'kcal'"),
    ("wrong type trajectories", edit(MODEL, "ensemble", "trajectories", '"ten"'), "ensemble.trajectories = \"ten\": must be the number of trajectories"),
    ("zero trajectories", edit(MODEL, "ensemble", "trajectories", "0"), "ensemble.trajectories = 0"),
    ("negative seed", edit(MODEL, "ensemble", "seed", "-3"), "ensemble.seed = -3"),
    ("missing seed", edit(MODEL, "ensemble", "seed", None), "ensemble.seed is missing"),
    ("workers zero", edit(MODEL, "ensemble", "workers", "0"), "ensemble.workers = 0"),
    ("bad method with suggestion", edit(MODEL, "method", "method", '"sqcc"'), "method.method = \"sqcc\": choose one of sqc, ehrenfest (did you mean 'sqc'?)"),
    ("bad window", edit(MODEL, "method", "window", '"triangel"'), "did you mean 'triangle'?"),
    ("window width out of range", edit(edit(MODEL, "method", "window", '"square"'), "method", "gamma", "0.7"), "method.gamma"),
    ("gamma with triangle", edit(MODEL, "method", "gamma", "0.3"), "method.gamma"),
    ("initial state beyond states (model)", edit(MODEL, "initial", "state", "2"), "initial.state = 2: only states 0..1 are computed"),
    ("negative width", edit(MODEL, "initial", "width", '"-1.0 bohr"'), "initial.width = \"-1.0 bohr\": must be positive"),
    ("width without unit", edit(MODEL, "initial", "width", "1.0"), "initial.width = 1.0: give a length with a unit"),
    ("width with an energy unit", edit(MODEL, "initial", "width", '"1 eV"'), "initial.width = \"1 eV\": unknown length unit 'eV'"),
    ("old and new key together", edit(MODEL, "initial", "width_bohr", "1.0"), "initial.width_bohr is given together with initial.width"),
    ("unknown model", edit(MODEL, "electronic", "model", '"tully4"'), "electronic.model = \"tully4\": choose one of"),
    ("unknown model parameter", MODEL.replace('model = "tully1"', 'model = "tully1"\nparameters = {A = 0.01, Q = 2.0}'), "electronic.parameters.Q is not a parameter of tully1"),
    ("unknown backend", edit(MODEL, "electronic", "backend", '"cassscf"'), "electronic.backend = \"cassscf\": choose one of casscf, tddft, model, callback (did you mean 'casscf'?)"),
    ("molecule key on model study", MODEL + '\n[molecule]\natoms = [["H", 0, 0, 0]]\n', "molecule is not used with electronic.backend = \"model\""),
    ("fixed zero point on a molecule", edit(MOLECULE, "method", "zero_point", '"fixed"'), "method.zero_point = \"fixed\" is allowed for batched model studies only"),
    ("initial state beyond states (molecule)", edit(MOLECULE, "initial", "state", "2"), "initial.state = 2: only states 0..1 are computed (electronic.states = 2)"),
    ("overlapping atoms", MOLECULE.replace("0.74]", "0.05]"), "molecule.atoms: atoms 0 and 1 are 0.050 Å apart"),
    ("unknown element", MOLECULE.replace('["H", 0.0, 0.0, 0.0]', '["Xx", 0.0, 0.0, 0.0]'), "molecule.atoms: row 0: unknown element 'Xx'"),
    ("missing geometry file", MOLECULE.replace('atoms = [["H", 0.0, 0.0, 0.0], ["H", 0.0, 0.0, 0.74]]', 'geometry = "nowhere.xyz"'), "molecule.geometry = \"nowhere.xyz\": file not found"),
    ("unparsable geometry file", MOLECULE.replace('atoms = [["H", 0.0, 0.0, 0.0], ["H", 0.0, 0.0, 0.74]]', 'geometry = "broken.xyz"'), "molecule.geometry = \"broken.xyz\": ase.io cannot read it"),
    ("both geometry and atoms", MOLECULE.replace('[molecule]', '[molecule]\ngeometry = "h2.xyz"'), "molecule: give exactly one of 'geometry'"),
    ("spin parity", edit(MOLECULE, "molecule", "spin", "1"), "molecule.spin = 1: 2 electrons cannot have 2S = 1"),
    ("too many active electrons", edit(MOLECULE, "electronic", "active_electrons", "6"), "electronic.active_electrons = 6: the molecule has only 2 electrons"),
    ("bad basis", edit(MOLECULE, "electronic", "basis", '"sto-99g"'), "electronic.basis = \"sto-99g\": PySCF has no such basis"),
    ("cas_orbitals of the wrong length", edit(MOLECULE, "electronic", "cas_orbitals", "[0, 1, 2]"), "electronic.cas_orbitals = [0, 1, 2]: give active_orbitals = 2 distinct 0-based"),
    ("cas_orbitals repeated", edit(MOLECULE, "electronic", "cas_orbitals", "[1, 1]"), "electronic.cas_orbitals = [1, 1]"),
    ("cas_orbitals beyond the basis", edit(MOLECULE, "electronic", "cas_orbitals", "[0, 2]"), "electronic.cas_orbitals = [0, 2]: the sto-3g basis gives orbitals 0..1 only"),
    ("casscf key on tddft backend", edit(MOLECULE, "electronic", "backend", '"tddft"'), "electronic.active_orbitals is not used with backend = \"tddft\""),
    ("one state only", edit(MOLECULE, "electronic", "states", "1"), "electronic.states = 1"),
    ("model key on a molecule", edit(MOLECULE, "initial", "momentum", '"3.0 au"'), "initial.momentum is not used for molecules"),
    ("brightest with a state", edit(MOLECULE, "initial", "excitation", '"brightest"'), "initial.state is not used with excitation = \"brightest\""),
    ("negative temperature", edit(MOLECULE, "initial", "temperature", '"-5 K"'), "initial.temperature = \"-5 K\": must be >= 0 K"),
    ("negative temperature, old key", edit(MOLECULE, "initial", "temperature_kelvin", "-5.0"), "initial.temperature_kelvin = -5.0: must be >= 0 K"),
    ("not TOML", "[study\nname = 1\n", "is not valid TOML"),
    ("bad study name", edit(MODEL, "study", "name", '"a b/c"'), "study.name = \"a b/c\": use letters"),
    ("model-engine-only method", edit(MODEL, "method", "method", '"fssh"'), "method.method = \"fssh\" runs in `mapdyn validate` and the batched model engine"),
    ("window key with ehrenfest", edit(edit(MODEL, "method", "method", '"ehrenfest"'), "method", "window", '"square"'), "method.window is not used with method = \"ehrenfest\""),
    ("substeps on batched engine", edit(MODEL, "dynamics", "substeps", "10"), "dynamics.substeps is not used by the batched model engine"),
    ("stop_on_drift not boolean", MOLECULE.replace('duration = "5 fs"', 'duration = "5 fs"\nstop_on_drift = "yes"'), "dynamics.stop_on_drift = \"yes\": must be true or false"),
    ("analysis unknown key", MODEL + "\n[analysis]\nconfidence = 0.9\n", "analysis.confidence is not a known key"),
    ("seam_gap not an energy", TDDFT.replace('states = 2', 'states = 2\nseam_gap = "close"'), "electronic.seam_gap = \"close\""),
    ("negative root_buffer", TDDFT.replace('states = 2', 'states = 2\nroot_buffer = -1'), "electronic.root_buffer = -1"),
]


def test_at_least_25_cases():
    assert len(CASES) >= 25


@pytest.mark.parametrize("label,text,fragment", CASES, ids=[c[0] for c in CASES])
def test_malformed_input(tmp_path, monkeypatch, capsys, label, text, fragment):
    (tmp_path / "broken.xyz").write_text("this is\nnot a geometry file\n")
    (tmp_path / "h2.xyz").write_text("2\n\nH 0 0 0\nH 0 0 0.74\n")
    path = tmp_path / "study.toml"
    path.write_text(text)
    before = sorted(os.listdir(tmp_path))
    monkeypatch.chdir(tmp_path)
    code = main(["run", str(path)])
    err = capsys.readouterr().err
    assert code == 2
    assert fragment in err, err
    assert err.count("\n") == 1 and err.startswith("mapdyn: error: ")  # one line
    assert sorted(os.listdir(tmp_path)) == before  # nothing written


def test_exit_code_of_the_real_command(tmp_path):
    path = tmp_path / "s.toml"
    path.write_text(edit(MODEL, "dynamics", "time_step", '"-1 fs"'))
    proc = subprocess.run([sys.executable, "-m", "mapdyn", "run", str(path)], cwd=tmp_path,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "dynamics.time_step" in proc.stderr
    assert sorted(os.listdir(tmp_path)) == ["s.toml"]


def test_valid_inputs_and_units(tmp_path):
    p = tmp_path / "m.toml"
    p.write_text(MODEL)
    cfg = load_study_config(p)
    assert cfg.batched and cfg.dynamics.nsteps == 50 and cfg.initial.position_bohr == (-8.0,)
    assert cfg.options.window == "triangle" and cfg.folder == os.path.abspath(os.path.join("runs", "m"))
    # 1 fs = 41.341 a.u. of time (CODATA, via ase.units: 1 a.u. = 2.4188843e-17 s)
    assert parse_duration("1 fs") == pytest.approx(41.341373, rel=1e-7)
    assert parse_duration("500 as") == pytest.approx(0.5 * parse_duration("1 fs"), rel=1e-15)
    (tmp_path / "h2.xyz").write_text("2\n\nH 0 0 0\nH 0 0 0.74\n")
    q = tmp_path / "mol.toml"
    q.write_text(MOLECULE.replace('atoms = [["H", 0.0, 0.0, 0.0], ["H", 0.0, 0.0, 0.74]]', 'geometry = "h2.xyz"'))
    mol = load_study_config(q)
    # 0.74 Å in Bohr (ase.units.Bohr = 0.52917721 Å)
    assert mol.molecule.positions_bohr[1, 2] == pytest.approx(0.74 / 0.529177210903, rel=1e-8)
    assert mol.electronic.options["ncas"] == 2 and mol.dynamics.nsteps == 10
    assert mol.initial.normal_modes_from == "scf"
    # chosen active orbitals (0-based RHF indices) reach the CASSCF backend
    q.write_text(edit(MOLECULE, "electronic", "cas_orbitals", "[1, 0]"))
    from mapdyn.study.backend_factory import make_backend

    assert make_backend(load_study_config(q)).cas_orbitals == [1, 0]


def test_every_shipped_input_is_valid():
    here = os.path.join(os.path.dirname(__file__), "..", "..", "inputs")
    names = sorted(f for f in os.listdir(here) if f.endswith(".toml"))
    assert len(names) >= 3
    for name in names:
        load_study_config(os.path.join(here, name))


# --- units read from strings; factors checked against ase.units (the reference library) ---------
@pytest.mark.parametrize("text, kind, expected", [
    ("1 Eh", "energy", lambda u: 1.0),
    ("2.5 eV", "energy", lambda u: 2.5 / u.Hartree),
    ("3 meV", "energy", lambda u: 3e-3 / u.Hartree),
    ("1 kcal/mol", "energy", lambda u: u.kcal / u.mol / u.Hartree),
    ("4 kJ/mol", "energy", lambda u: 4 * u.kJ / u.mol / u.Hartree),
    ("100 cm-1", "energy", lambda u: 100 * u.invcm / u.Hartree),
    ("100 cm^-1", "energy", lambda u: 100 * u.invcm / u.Hartree),
    ("20 au", "time", lambda u: 20.0),
    ("0.5 fs", "time", lambda u: 0.5 * u.fs / u.AUT),
    ("500 as", "time", lambda u: 0.5 * u.fs / u.AUT),
    ("0.1 ps", "time", lambda u: 100 * u.fs / u.AUT),
    ("-8 bohr", "length", lambda u: -8.0),
    ("1.2 Å", "length", lambda u: 1.2 / u.Bohr),
    ("1.2 angstrom", "length", lambda u: 1.2 / u.Bohr),
    ("300 K", "temperature", lambda u: 300.0),
])
def test_each_unit_string_gives_the_ase_units_value(text, kind, expected):
    from ase import units

    from mapdyn.study.input_values import parse_quantity

    assert parse_quantity(text, "key", kind) == pytest.approx(expected(units), rel=1e-12)


def test_deprecated_unit_in_name_keys_still_work_with_a_warning():
    from mapdyn.study.config import parse_study

    old = tomllib.loads(MODEL)
    init = old["initial"]
    init["position_bohr"], init["momentum_au"], init["width_bohr"] = -8.0, 15.0, 1.0
    for k in ("position", "momentum", "width"):
        del init[k]
    with pytest.warns(FutureWarning, match="initial.position_bohr is deprecated"):
        cfg_old = parse_study(old)
    cfg_new = parse_study(tomllib.loads(MODEL))
    assert cfg_old.initial == cfg_new.initial
