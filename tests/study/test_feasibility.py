"""Validation before the first byte is written: each case injects one infeasible or malformed
input (named in its parameter id) and checks exit 2, a one-line message naming the key, and that
no study folder was created.  No SCF runs (only PySCF Mole objects are built), so this is fast.
"""

from __future__ import annotations

import pytest
from conftest import tully1_study, write

from mapdyn.cli import main
from mapdyn.study.feasibility import check_size, csf_count
from mapdyn.study.input_values import ConfigError

H2 = """
[molecule]
atoms = [["H", 0.0, 0.0, 0.0], ["H", 0.0, 0.0, 0.74]]
{molecule}
[electronic]
{electronic}
[initial]
state = 1
{initial}
[dynamics]
time_step = "0.5 fs"
duration = "1 fs"
[ensemble]
trajectories = 2
seed = 5
[analysis]
{analysis}
"""
CAS = 'backend = "casscf"\nbasis = "sto-3g"\nactive_orbitals = 2\nactive_electrons = 2\nstates = 2'


def h2(molecule="", electronic=CAS, initial="", analysis=""):
    return H2.format(molecule=molecule, electronic=electronic, initial=initial, analysis=analysis)


CASES = {
    # [analysis] values
    "confidence_1.5": (h2(analysis="confidence_level = 1.5"), "analysis.confidence_level"),
    "confidence_0": (h2(analysis="confidence_level = 0"), "analysis.confidence_level"),
    "negative_resamples": (h2(analysis="n_resamples = -5"), "analysis.n_resamples"),
    "zero_resamples": (h2(analysis="n_resamples = 0"), "analysis.n_resamples"),
    "negative_lifetime_resamples": (h2(analysis="lifetime_resamples = -1"), "analysis.lifetime_resamples"),
    "float_resamples": (h2(analysis="n_resamples = 9.5"), "analysis.n_resamples"),
    "negative_energy_tolerance": (h2(analysis="energy_tolerance_hartree = -1e-3"), "analysis.energy_tolerance_hartree"),
    "observable_atom_beyond_molecule": (h2(analysis='observables = ["distance 0 5"]'), "analysis.observables[0]"),
    "first_entry_state_beyond_states": (h2(analysis="first_entry = [{state = 4}]"), "analysis.first_entry[0].state"),
    "product_atom_beyond_molecule": (h2(analysis="products = {far = [{distance = [0, 7], above = 2.0}]}"),
                                     "analysis.products.far.distance"),
    "fragment_atom_beyond_molecule": (h2(analysis="fragments = [{atoms = [0, 9], potential.morse = "
                                                  "{D = 0.17, a = 1.0, r_e = 1.4}}]"), "analysis.fragments[0].atoms"),
    # electronic structure
    "he_cas22_in_one_orbital": (h2(electronic=CAS).replace('["H", 0.0, 0.0, 0.0], ["H", 0.0, 0.0, 0.74]',
                                                           '["He", 0.0, 0.0, 0.0]'), "electronic.active_orbitals"),
    "active_space_beyond_basis": (h2(electronic=CAS.replace("active_orbitals = 2", "active_orbitals = 3")),
                                  "electronic.active_orbitals"),
    "more_states_than_cas_singlets": (h2(electronic=CAS.replace("states = 2", "states = 4")), "electronic.states"),
    "triplet_with_two_states": (h2(molecule="spin = 2", electronic=CAS, initial='normal_modes_from = "dynamics"'),
                                "electronic.states"),
    "doublet_cation_scf_ground_state": (h2(molecule="charge = 1\nspin = 1",
                                           electronic=CAS.replace("active_electrons = 2", "active_electrons = 1")),
                                        "molecule.spin"),
    "triplet_scf_ground_state": (h2(molecule="spin = 2", electronic=CAS), "molecule.spin"),
    "spin_parity": (h2(molecule="spin = 1", electronic=CAS.replace("active_electrons = 2", "active_electrons = 1")),
                    "molecule.spin"),
    "no_electrons_left": (h2(molecule="charge = 2", electronic='backend = "tddft"\nbasis = "sto-3g"\nstates = 2'),
                          "molecule.charge"),
    "three_tda_states_on_h2": (h2(electronic='backend = "tddft"\nbasis = "sto-3g"\nstates = 3'), "electronic.states"),
    "unknown_basis": (h2(electronic=CAS.replace("sto-3g", "no-such-basis")), "electronic.basis"),
    "unknown_functional": (h2(electronic='backend = "tddft"\nbasis = "sto-3g"\nstates = 2\nfunctional = "xyzzy"'),
                           "electronic.functional"),
    # size limits
    "1e9_trajectories": (tully1_study(trajectories=10**9, analysis=False), "ensemble.trajectories"),
    "1e8_steps": (tully1_study(trajectories=2, duration="2e8 au", record_every=None, analysis=False),
                  "dynamics.duration"),
    "model_observables": (tully1_study(trajectories=2, analysis=False) + '[analysis]\nobservables = ["distance 0 1"]\n',
                          "analysis.observables"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_infeasible_input_is_refused_before_anything_is_written(tmp_path, capsys, case):
    text, key = CASES[case]
    toml = write(tmp_path, "in.toml", text)
    out = tmp_path / "study"
    code = main(["run", toml, "--output", str(out), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2, err
    assert len(err) == 1 and key in err[0], err
    assert not out.exists()


def test_folder_of_a_failed_creation_is_reused_with_fixed_input(tmp_path, capsys):
    """Fault: a folder holding only the manifest and input of a creation that failed before any
    result; the corrected input takes it over, a folder with results is never taken over."""
    from mapdyn.study.config import load_study_config
    from mapdyn.study.folder import Study

    bad = write(tmp_path, "bad.toml", tully1_study(trajectories=4, seed=1, analysis=False))
    good = write(tmp_path, "good.toml", tully1_study(trajectories=4, seed=2, duration="40 au", analysis=False))
    out = tmp_path / "study"
    Study.create(load_study_config(bad), str(out))  # creation that stopped before computing anything
    assert main(["run", good, "--output", str(out), "--quiet", "--workers", "1", "--no-analysis"]) == 0
    assert Study(out).config.ensemble.seed == 2
    assert main(["run", bad, "--output", str(out), "--quiet"]) == 2
    assert "already holds a different study" in capsys.readouterr().err


def test_size_limit_is_lifted_by_force():
    with pytest.raises(ConfigError):
        check_size(10**9, 10, True)
    check_size(10**9, 10, True, force=True)


def test_csf_count_weyl_formula():
    """Singlet CSF counts of CAS(2,2), CAS(4,4), CAS(6,6) = 3, 20, 175 and the CAS(2,2) triplet = 1
    (from memory; they follow from Weyl's formula, Paldus, J. Chem. Phys. 61, 5321 (1974)); checked
    here against an independent count: determinants with M_S = S minus those with M_S = S + 1."""
    from math import comb

    def by_determinants(n, N, two_s):
        def det(ms2):
            na, nb = (N + ms2) // 2, (N - ms2) // 2
            return comb(n, na) * comb(n, nb) if 0 <= nb <= na <= n and (N + ms2) % 2 == 0 else 0
        return det(two_s) - det(two_s + 2)

    assert (csf_count(2, 2, 0), csf_count(4, 4, 0), csf_count(6, 6, 0), csf_count(2, 2, 2)) == (3, 20, 175, 1)
    for n in range(1, 7):
        for N in range(0, 2 * n + 1):
            for two_s in range(N % 2, N + 1, 2):
                assert csf_count(n, N, two_s) == by_determinants(n, N, two_s), (n, N, two_s)
