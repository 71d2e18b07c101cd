"""Electron-transfer rate checks: golden-rule reference against Marcus, and one SQC point of the study.

The full study is tests/reference/make_marcus_study.py (table examples/figures/marcus_rates.csv).
"""

import csv
import importlib.util
from pathlib import Path

import numpy as np
import pytest

from mapdyn.models.spin_boson import SpinBoson

ROOT = Path(__file__).resolve().parents[2]
_spec = importlib.util.spec_from_file_location("make_marcus_study", ROOT / "tests" / "reference" / "make_marcus_study.py")
study = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(study)


def marcus_formula(delta, lam, dG, kT):
    """k = (2π/ħ)|V|² (4πλk_BT)^(−1/2) exp(−(ΔG+λ)²/(4λk_BT)) — R. A. Marcus, J. Chem. Phys. 24, 966
    (1956), as written in docs/theory.md#validation-benchmarks (ħ = 1)."""
    return 2 * np.pi * delta ** 2 / np.sqrt(4 * np.pi * lam * kT) * np.exp(-(dG + lam) ** 2 / (4 * lam * kT))


@pytest.mark.parametrize("minus_dG", [0.0, 4.0, 8.0, 12.0, 20.0])
def test_golden_rule_of_a_classical_bath_is_the_marcus_rate(minus_dG):
    """For ω_c ≪ k_BT the displaced-oscillator golden rule must reduce to Marcus' formula; with
    ω_c = 0.02 k_BT the quantum corrections are O((βω)²) ≈ 1e-3 of the exponent: tolerance 1 %
    (measured < 0.1 %).  For the study's bath (ω_c = 0.25 k_BT) they stay below 5 % up to −ΔG = 2λ_M
    (measured ≤ 2 %), so Marcus is the right reference there too."""
    kT, lam_m = 1.0, 8.0
    cold = SpinBoson.ohmic(minus_dG / 2, 0.1, lam_m / 4 / 0.01, 0.02, 200, omega_max=0.3)
    ref = marcus_formula(0.1, cold.marcus_reorganization, -minus_dG, kT)
    assert cold.marcus_rate(1 / kT) == pytest.approx(ref, rel=1e-12)
    assert cold.golden_rule_rate(1 / kT) == pytest.approx(ref, rel=1e-2)
    if minus_dG <= 16.0:
        model = study.make_model(minus_dG)
        assert model.golden_rule_rate(1.0) == pytest.approx(model.marcus_rate(1.0), rel=5e-2)


def test_rate_fit_recovers_a_known_two_state_kinetics():
    """Synthetic P_D(t) = P_eq + (1 − P_eq) e^{−(k_f + k_b) t} with k_b = k_f e^{βΔG} is fitted exactly."""
    times = np.arange(2.0, 300.0, 2.0)
    for minus_dG, kf in ((2.0, 3e-3), (8.0, 6e-3), (16.0, 8e-4)):
        kb = kf * np.exp(-minus_dG)
        p_eq = kb / (kf + kb)
        pop = p_eq + (1 - p_eq) * np.exp(-(kf + kb) * times)
        assert study.fit_forward_rate(times, pop, minus_dG) == pytest.approx(kf, rel=1e-9)


def _study_row(minus_dG, method):
    path = ROOT / "examples" / "figures" / "marcus_rates.csv"
    with open(path) as fh:
        rows = [r for r in csv.DictReader(line for line in fh if not line.startswith("#"))]
    for r in rows:
        if float(r["minus_dG"]) == minus_dG and r["method"] == method:
            return {k: (v if k == "method" else float(v)) for k, v in r.items()}
    raise AssertionError(f"no row for -dG={minus_dG}, {method} in {path}")


def test_sqc_rate_at_the_activationless_point_reduced_statistics():
    """−ΔG = λ_M (activationless), SQC triangle windows (symmetrized, the default), 1500 fresh
    trajectories (indices after the study's): agrees with the committed full study (10,000
    trajectories) within 4 combined bootstrap standard errors, and with Marcus within a factor 2.5
    (docs/theory.md#validation-benchmarks: factor ~2 expected; the full study measures k_SQC/k_Marcus = 0.64 ± 0.01 here)."""
    method, x = "sqc-triangle-symmetrized", 8.0
    full = _study_row(x, method)
    times, rec = study.run_point(x, method, 1500, 750, 1, t_end=full["t_end"], first_index=int(full["ntraj"]))
    k, dk = study.rate_with_error(times, rec, method, x, nboot=100, seed=1)
    assert abs(k - full["k"]) < 4 * np.hypot(dk, full["k_err"])
    assert 1 / 2.5 < k / full["k_marcus"] < 2.5
