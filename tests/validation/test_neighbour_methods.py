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


#: case-name prefixes each method is expected to miss, with the reason (checked to fail, so the list stays honest)
EXPECTED_FAILURES = {
    "sqc": {},
    "spin": {},
    "mash": {},
    "fssh": {"spin_boson_biased": "Wigner bath zero-point energy feeds upward hops"},
    "fssh-edc": {"spin_boson_biased": "Wigner bath zero-point energy feeds upward hops"},
}
OPTIONS = {"sqc": MethodOptions("sqc", "triangle"), "spin": SPIN, "mash": MASH, "fssh": FSSH, "fssh-edc": FSSH_EDC}


@pytest.mark.slow
@pytest.mark.parametrize("label", list(EXPECTED_FAILURES))
def test_full_table(label):
    rows = [r for r in run_validation(OPTIONS[label], ntraj=2000, seed=2024) if "stat/wp" not in r.case]
    for r in rows:
        if r.unavailable:
            continue
        expected_fail = any(r.case.startswith(p) for p in EXPECTED_FAILURES[label])
        assert r.passed != expected_fail, (label, r.case, r.difference, r.tolerance)
