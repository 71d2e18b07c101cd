"""Tully models vs the published formulas, written out independently here.

Source: J. C. Tully, J. Chem. Phys. 93, 1061 (1990), Eqs. for models 1–3 (parameters from memory,
the universally reproduced values).
"""

import math

import numpy as np
import pytest

from mapdyn.models.tully import DualAvoidedCrossing, ExtendedCoupling, SimpleAvoidedCrossing, WideLinearCrossing, tully_model

POINTS = [-7.3, -1.1, -0.2, 0.35, 1.7, 6.0]


def tully1(x):
    v11 = 0.01 * (1 - math.exp(-1.6 * x)) if x > 0 else -0.01 * (1 - math.exp(1.6 * x))
    return v11, -v11, 0.005 * math.exp(-x * x)


def tully2(x):
    return 0.0, -0.10 * math.exp(-0.28 * x * x) + 0.05, 0.015 * math.exp(-0.06 * x * x)


def tully3(x):
    v12 = 0.10 * math.exp(0.90 * x) if x < 0 else 0.10 * (2 - math.exp(-0.90 * x))
    return 6e-4, -6e-4, v12


@pytest.mark.parametrize("model,ref", [(SimpleAvoidedCrossing(), tully1), (DualAvoidedCrossing(), tully2),
                                       (ExtendedCoupling(), tully3)])
def test_matrix_elements_match_published_formulas(model, ref):
    H = model.hamiltonian(np.array(POINTS)[:, None])
    for i, x in enumerate(POINTS):
        v11, v22, v12 = ref(x)
        assert H[i, 0, 0] == pytest.approx(v11, abs=1e-15)
        assert H[i, 1, 1] == pytest.approx(v22, abs=1e-15)
        assert H[i, 0, 1] == pytest.approx(v12, abs=1e-15) and H[i, 1, 0] == H[i, 0, 1]


@pytest.mark.parametrize("model", [SimpleAvoidedCrossing(), DualAvoidedCrossing(), ExtendedCoupling(), WideLinearCrossing()])
def test_gradients_match_central_differences(model):
    x = np.array(POINTS)[:, None]
    h = 1e-5
    fd = (model.hamiltonian(x + h) - model.hamiltonian(x - h)) / (2 * h)
    # central differences: error O(h²·H''') ≲ 1e-9 for these smooth (away from x = 0) functions
    assert np.max(np.abs(fd - model.hamiltonian_gradient(x)[:, 0])) < 1e-8


def test_tully1_adiabatic_gap_at_crossing_is_twice_the_coupling():
    E, U = SimpleAvoidedCrossing().adiabatic(np.array([[0.0]]))
    assert E[0, 1] - E[0, 0] == pytest.approx(2 * 0.005, abs=1e-15)


def test_lower_adiabat_asymptotes():
    """Model 3: lower adiabat is diabat 2 at x → −∞ (docs/theory.md#tully-models)."""
    _, U = ExtendedCoupling().adiabatic(np.array([[-15.0]]))
    assert abs(U[0, 1, 0]) > 1 - 1e-6
    _, U = SimpleAvoidedCrossing().adiabatic(np.array([[-15.0]]))
    assert abs(U[0, 0, 0]) > 1 - 1e-6


def test_unknown_model_name():
    with pytest.raises(ValueError, match="tully1"):
        tully_model("tully4")
