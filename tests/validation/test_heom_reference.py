"""Stored HEOM reference data: files, parameters, and a fast re-run with QuTiP.

Reference method: HEOM, Y. Tanimura & R. Kubo, J. Phys. Soc. Jpn. 58, 101 (1989), as implemented in
QuTiP's ``qutip.solver.heom`` (general-purpose reference library).  Data produced by
``tests/reference/make_heom_reference.py`` (conventions and the QuTiP parameter mapping are in its
docstring: DrudeLorentzBath(Q = σz or |n⟩⟨n|, lam = λ, gamma = ω_c, T = 1/β)).
"""
from __future__ import annotations

import json
import sys
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("qutip")

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "reference"))
import make_heom_reference as ref  # noqa: E402

CASE_NAMES = ["spin_boson_symmetric", "spin_boson_biased", "sites7", "sites3"]
# The adaptive ODE integrator (atol 1e-9, rtol 1e-7) reproduces itself on a sub-window to far better
# than this; 1e-6 allows for step-size choices that differ with a shorter output grid.
ODE_REPRODUCIBILITY = 1e-6


def load(name: str) -> dict:
    path = resources.files("mapdyn") / "data" / f"heom_{name}.npz"
    with resources.as_file(path) as p, np.load(p) as data:
        return {k: data[k] for k in data.files}


@pytest.mark.parametrize("name", CASE_NAMES)
def test_stored_file_matches_script_parameters(name: str) -> None:
    data = load(name)
    params = ref.case_parameters(name)
    case = ref.CASES[name]
    meta = json.loads(str(data["metadata"]))
    np.testing.assert_allclose(data["times"], params["times"], rtol=0, atol=1e-12 * params["times"][-1])
    for key in ("lam", "omega_c", "beta"):
        assert float(data[key]) == pytest.approx(params[key], rel=1e-14), key
    assert int(data["depth"]) == case["deep"]["depth"]
    assert int(data["n_matsubara"]) == case["deep"]["n_matsubara"]
    assert meta["stored"] == "deep" and "Tanimura" in meta["citation"]
    if case["kind"] == "spin_boson":
        assert float(data["epsilon"]) == params["epsilon"] and float(data["delta"]) == params["delta"]
        obs = data["sigma_z"]
        assert obs.shape == params["times"].shape
        assert obs[0] == pytest.approx(1.0, abs=1e-12)  # spin up at t = 0
        assert np.all(np.abs(obs) <= 1.0 + 1e-6)
    else:
        np.testing.assert_allclose(data["h_sys"], params["h_sys"], rtol=1e-14)
        obs = data["populations"]
        nsites = params["h_sys"].shape[0]
        assert obs.shape == (params["times"].size, nsites)
        np.testing.assert_allclose(obs[0], np.eye(nsites)[0], atol=1e-12)  # site 1 excited at t = 0
        np.testing.assert_allclose(obs.sum(axis=1), 1.0, atol=1e-6)  # trace preserved by the HEOM
        assert obs.min() > -1e-3
    dev = float(data["convergence_deviation"])
    shallow = data[meta["observable"] + "_shallow"]
    assert dev == pytest.approx(float(np.max(np.abs(obs - shallow))), rel=1e-12)
    # converged well inside the 0.1 accuracy the SQC comparison asks for
    assert dev < 0.01
    assert float(data["matsubara_deviation"]) < 0.01 and meta["matsubara_deviation"] == float(data["matsubara_deviation"])
    norm = meta["normalisation_check"]
    assert norm["corr_max_rel_dev"] < 5e-3 and norm["single_mode_heom_vs_exact"] < 1e-4


@pytest.mark.parametrize("name", ["spin_boson_symmetric", "spin_boson_biased"])
def test_fast_rerun_reproduces_stored_data(name: str) -> None:
    """Re-run the shallow hierarchy over t ≤ 3/Δ with QuTiP: equals the stored shallow run (ODE
    tolerance) and the stored deep run within the stored convergence deviation."""
    data = load(name)
    case = ref.CASES[name]
    times, sz = ref.run_case(name, case["shallow"], t_max=3.0)
    n = times.size
    np.testing.assert_allclose(times, data["times"][:n], atol=1e-12)
    assert np.max(np.abs(sz - data["sigma_z_shallow"][:n])) < ODE_REPRODUCIBILITY
    assert np.max(np.abs(sz - data["sigma_z"][:n])) <= float(data["convergence_deviation"]) + ODE_REPRODUCIBILITY


@pytest.mark.parametrize("name", ["sites7", "sites3"])
def test_fast_rerun_sites_shallow_short_window(name: str) -> None:
    """Site models, shallow hierarchy over the first 100 fs: equals the stored shallow run."""
    data = load(name)
    t_max = 100.0 * ref.AUT_PER_FS
    times, pops = ref.run_case(name, ref.CASES[name]["shallow"], t_max=t_max)
    n = times.size
    assert n > 10
    assert np.max(np.abs(pops - data["populations_shallow"][:n])) < ODE_REPRODUCIBILITY
    assert np.max(np.abs(pops - data["populations"][:n])) <= float(data["convergence_deviation"]) + ODE_REPRODUCIBILITY


def test_qutip_drude_lorentz_normalisation_matches_our_bath() -> None:
    """QuTiP's Drude-Lorentz C(t) equals that of an explicit bath Σ c_j Q_j built from our
    J(ω) = 2λωω_c/(ω²+ω_c²) with c_j² = (2/π) ω_j J(ω_j) dω (docs/theory.md#spin-boson-model).  Tolerance 5e-3 of λω_c:
    the neglected tail ω > 500 ω_c contributes ≲ 2/(π·500·0.5) = 2.5e-3; a factor-2 convention
    error would give ~1."""
    res = ref.check_correlation_normalisation(lam=0.25, omega_c=1.0, beta=1.0, times=np.linspace(0.0, 12.0, 49))
    assert res["spectral_density_ratio_minus_1"] < 1e-12
    assert res["corr_max_rel_dev"] < 5e-3


def test_single_mode_heom_matches_exact_spin_oscillator() -> None:
    """HEOM with one undamped mode (c Q σz, exponents ±iω) vs brute-force spin ⊗ Fock evolution
    (qutip.mesolve): fixes the solver's coupling convention.  Tolerance 1e-4 (hierarchy depth 14 and
    30 Fock states are converged to ~1e-7 here); doubling c in the exact run must break agreement."""
    assert ref.check_single_mode_coupling() < 1e-4
    # sensitivity: the same HEOM against the exact result for a coupling √2 larger (a factor 2 in
    # the correlation function) is far off
    assert ref.check_single_mode_coupling(c_exact=0.6 * np.sqrt(2)) > 0.05
