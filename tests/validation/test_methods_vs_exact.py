"""Spin mapping, MASH and FSSH against the stored exact references (quick subset; full table under -m slow).

References: data/exact_scattering.npz (split-operator wavepackets of Tully's models, J. C. Tully,
J. Chem. Phys. 93, 1061 (1990)); data/heom_*.npz (HEOM, Tanimura & Kubo 1989, QuTiP).  Tolerances
are those of `mapdyn validate` (0.07 for one passage through an avoided crossing, 0.1 for Tully 3 and
the spin-boson maxima); which method is expected within them follows the published behaviour noted at
each check (from memory where marked) and the measured table in docs/theory.md#neighbouring-methods.
"""

import numpy as np
import pytest

from mapdyn.core.options import MethodOptions
from mapdyn.models.tully import tully_model
from mapdyn.validation.heom_cases import load_reference, spin_boson_mapping
from mapdyn.validation.scattering import run_scattering
from mapdyn.validation.table import _load_npz, run_validation

SPIN, MASH, FSSH = MethodOptions("spin"), MethodOptions("mash"), MethodOptions("fssh")
FSSH_EDC = MethodOptions("fssh", decoherence="energy")


def _stored(model: str, k: float):
    ref = _load_npz("exact_scattering.npz")
    i = [j for j in range(len(ref["model"])) if str(ref["model"][j]) == model and float(ref["momentum"][j]) == k][0]
    return ref, i


def _scatter(options, model, k, ntraj, seed=2024):
    ref, i = _stored(model, k)
    res = run_scattering(tully_model(model), k, float(ref["position"][i]), float(ref["position_width"][i]), options,
                         ntraj=ntraj, seed=seed, initial_state=int(ref["initial_state"][i]),
                         interaction_region=tuple(float(v) for v in ref["interaction_region"][i]))
    return ref, i, res


# Tully 1 and 2, one passage (model 2: two) through an avoided crossing: FSSH is accurate here (Tully 1990,
# Figs. 3-6, from memory), so is MASH (Mannouch & Richardson 2023, from memory); spin mapping with the
# two-state γ_s = square-window γ runs the SQC dynamics with the ρ_ff estimator.
@pytest.mark.parametrize("options,model,k,state", [
    (FSSH, "tully1", 20.0, 1), (FSSH, "tully2", 30.0, 0),
    (MASH, "tully1", 20.0, 1), (MASH, "tully2", 30.0, 0),
    (SPIN, "tully1", 20.0, 1), (SPIN, "tully2", 30.0, 0),
])
def test_quick_transmission(options, model, k, state):
    ref, i, res = _scatter(options, model, k, 1000)
    exact = float(ref["transmission"][i, state])
    err = float(res.transmission_error[state])
    assert err < 0.02  # the 0.07 tolerance is ≥ 3.5 standard errors
    assert abs(res.transmission[state] - exact) <= 0.07
    if options.method in ("mash", "fssh"):
        assert res.details["max_energy_drift"] < 1e-4  # T + E_λ through hops (Eh)
        assert res.n_unfinished == 0


def test_quick_spin_mapping_biased_spin_boson():
    """Spin mapping on the biased spin-boson case: max |Δ⟨σz⟩| ≤ 0.1 (HEOM reference; measured 0.053 with
    2000 trajectories, σ ≈ 0.02 per point)."""
    ref = load_reference("spin_boson_biased")
    res = spin_boson_mapping("spin_boson_biased", SPIN, ntraj=2000, seed=2024)
    assert np.max(np.abs(res.sigma_z - ref["sigma_z"])) <= 0.1


def test_mash_has_no_diabatic_estimator():
    with pytest.raises(NotImplementedError):
        spin_boson_mapping("spin_boson_symmetric", MASH, ntraj=10)


@pytest.mark.slow
def test_fssh_wigner_bath_fails_biased_spin_boson():
    """Expected failure, stated: FSSH on a Wigner-sampled bath lets the zero-point energy of the fast modes
    pay for upward hops, so the biased case does not relax (measured max |Δ⟨σz⟩| ≈ 0.43 with 500
    trajectories; with classical bath sampling ≈ 0.16, docs/theory.md#neighbouring-methods)."""
    ref = load_reference("spin_boson_biased")
    res = spin_boson_mapping("spin_boson_biased", FSSH, ntraj=1000, seed=2024)
    assert np.max(np.abs(res.sigma_z - ref["sigma_z"])) > 0.25


#: case-name prefixes each method misses at 2000 trajectories, seed 2024 (examples/figures/methods_table.md),
#: with the reason; each is checked to fail, so the list stays honest (the runs are deterministic)
EXPECTED_FAILURES = {
    "sqc": {"tully3 k=25 R0": "marginal, 0.1004 against 0.1",
            "KCl first pass": "marginal, 0.0702 against 0.07"},
    "spin": {},
    "mash": {"tully2 k=16 T0": "measured 0.103", "tully3 k=10 R0": "reflection on the wrong adiabat (measured 0.125)"},
    "fssh": {"tully2 k=16 T0": "misses the two-crossing interference (measured 0.088)",
             "tully2 k=25 T0": "misses the two-crossing interference (measured 0.094)",
             "tully3 k=10 R0": "overcoherence after reflection, no decoherence (Tully 1990; measured 0.108)",
             "spin_boson_biased": "Wigner bath zero-point energy feeds upward hops (measured 0.387)"},
    "ehrenfest": {"tully2 k=25 T0": "mean-field branching (measured 0.116)",
                  "tully3 k=12": "mean field cannot reflect on one adiabat", "tully3 k=15": "same",
                  "tully3 k=20 R0": "same", "tully3 k=25": "same",
                  "spin_boson_biased": "no detailed balance (measured 0.402)",
                  "tully3 k=20 T1 (closed)": "mean-field weights leak into the closed channel (0.397)"},
    "fssh-edc": {"tully1 k=13": "damping during the single passage", "tully1 k=16": "same",
                 "tully1 k=20": "same", "tully2 k=20": "damping between the two crossings kills the interference",
                 "tully2 k=25": "same", "tully2 k=30": "same", "tully2 k=40": "same",
                 "spin_boson": "decoherence plus the Wigner-bath zero-point energy"},
}
OPTIONS = {"sqc": MethodOptions("sqc", "triangle"), "ehrenfest": MethodOptions("ehrenfest"), "spin": SPIN,
           "mash": MASH, "fssh": FSSH, "fssh-edc": FSSH_EDC}


@pytest.mark.slow
@pytest.mark.parametrize("label", list(EXPECTED_FAILURES))
def test_full_table(label):
    rows = [r for r in run_validation(OPTIONS[label], ntraj=2000, seed=2024) if "stat/wp" not in r.case]
    for r in rows:
        if r.unavailable:
            continue
        expected_fail = any(r.case.startswith(p) for p in EXPECTED_FAILURES[label])
        assert r.passed != expected_fail, (label, r.case, r.difference, r.tolerance)
