"""`mapdyn validate`: the table equals the underlying functions, and a broken option fails."""

import numpy as np
import pytest

import mapdyn.core.windows
from mapdyn.core.options import MethodOptions
from mapdyn.models.tully import tully_model
from mapdyn.validation import table as validate
from mapdyn.validation.scattering import run_scattering

TRIANGLE = MethodOptions("sqc", "triangle")


def _case(prefix):
    return next(c for c in validate.builtin_cases() if c.name.startswith(prefix))


def test_builtin_cases_cover_the_benchmark_set():
    names = [c.name for c in validate.builtin_cases()]
    for model in ("tully1", "tully2", "tully3", "wide_crossing", "spin_boson_symmetric", "spin_boson_biased", "KCl"):
        assert any(n.startswith(model) for n in names), model
    quick = [c.name.split()[0] for c in validate.builtin_cases()
             if c.quick and not c.name.endswith(("stat/wp", "(closed)"))]
    assert len(quick) == len(set(quick)) == 6  # one quick case per model
    assert [c.name for c in validate.builtin_cases() if c.quick and c.name.endswith("stat/wp")] == ["tully3 k=30 R0 stat/wp"]
    closed = [c for c in validate.builtin_cases() if c.name.endswith("(closed)")]
    assert [c.name for c in closed] == ["tully1 k=6 T1 (closed)", "tully3 k=20 T1 (closed)"]
    assert all(c.tolerance == 0.1 for c in closed)


def test_exact_agreement_row_is_the_stationary_solver_against_the_stored_wavepacket():
    """Independent exact rows: column "exact" is mapdyn.validation.stationary's packet average, "method" the stored
    split-operator value; Tully 3 at k = 30 (near threshold) agrees within 1e-3 (measured 5e-5)."""
    from mapdyn.validation.stationary import packet_probabilities
    case = _case("tully3 k=30 R0 stat/wp")
    exact, stored, diff, _ = case.run(TRIANGLE, 10, 0)
    ref = validate._load_npz("exact_scattering.npz")
    i = next(j for j, m in enumerate(ref["model"]) if m == "tully3" and ref["momentum"][j] == 30.0)
    assert stored == ref["reflection"][i, 0]
    assert exact == packet_probabilities(tully_model("tully3"), 30.0, float(ref["position_width"][i])).reflection[0]
    assert diff == abs(stored - exact) <= case.tolerance


def test_table_numbers_equal_the_underlying_functions():
    """The row of Tully 1 at k = 20 is run_scattering's own upper-state transmission for the same seed,
    and its exact column is the stored split-operator value."""
    case = _case("tully1 k=20")
    exact, value, diff, err = case.run(TRIANGLE, 300, 5)
    ref = validate._load_npz("exact_scattering.npz")
    i = [j for j, m in enumerate(ref["model"]) if m == "tully1" and ref["momentum"][j] == 20.0][0]
    direct = run_scattering(tully_model("tully1"), 20.0, float(ref["position"][i]), float(ref["position_width"][i]),
                            TRIANGLE, ntraj=300, seed=5, interaction_region=tuple(ref["interaction_region"][i]))
    assert exact == ref["transmission"][i, 1]
    assert value == direct.transmission[1] and err == direct.transmission_error[1]
    assert diff == abs(value - exact)


def test_table_format_and_closing_line():
    rows = [validate.CaseResult("a", 0.5, 0.52, 0.02, 0.01, 0.07, 1.0),
            validate.CaseResult("b", 0.1, 0.3, 0.2, 0.01, 0.1, 1.0)]
    text = validate.format_table(rows, TRIANGLE)
    assert text.splitlines()[-1] == "validate: 1 passed, 1 failed"
    assert "FAIL" in text.splitlines()[-2]


def test_swapped_windows_make_cases_fail(monkeypatch):
    """Deliberately broken binning (each window read as the other state's) must fail the check."""
    case = _case("tully2 k=30")
    _, _, good, _ = case.run(TRIANGLE, 400, 1)
    monkeypatch.setattr("mapdyn.validation.scattering.window_assignment",
                        lambda e, options: np.where(mapdyn.core.windows.window_assignment(e, options) >= 0,
                                                    1 - mapdyn.core.windows.window_assignment(e, options), -1))
    _, _, bad, _ = case.run(TRIANGLE, 400, 1)
    assert good <= case.tolerance < bad


def test_bad_trajectory_count():
    with pytest.raises(ValueError, match="ntraj"):
        validate.run_validation(TRIANGLE, quick=True, ntraj=3)


def test_closed_channel_row_is_the_upper_transmission_against_zero():
    """Tully 1 at k = 6: the upper adiabat (asymptotically 0.01 Eh above ε_0 = −0.01 Eh at both ends)
    needs k ≥ √(2·2000·0.02) ≈ 8.9, far above the packet (σ_p = 0.15), so the exact value is 0
    (also the energy-resolved solver's value, test_stationary.py); the row reports run_scattering's T1."""
    case = _case("tully1 k=6 T1 (closed)")
    exact, value, diff, err = case.run(TRIANGLE, 300, 3)
    direct = run_scattering(tully_model("tully1"), 6.0, -12.0, 20.0 / 6.0, TRIANGLE, ntraj=300, seed=3)
    assert exact == 0.0 and value == diff == direct.transmission[1] and err == direct.transmission_error[1]
