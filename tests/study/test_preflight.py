"""Preflight (``mapdyn check``): finite-difference verdicts, fault detection, cost estimate.

Sources: the finite-difference references are central differences of each backend's own energies
and state overlaps (docs/theory.md#local-diabatization; Hammes-Schiffer & Tully, J. Chem. Phys. 101, 4657 (1994) for
the overlap couplings); tolerances are the backend's stated ones (``mapdyn.study.preflight.FD_TOLERANCES``,
each with its justification).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from mapdyn.backends.contract import BackendError
from mapdyn.backends.model_adapter import ModelAdapterBackend
from mapdyn.models.tully import tully_model
from mapdyn.study.preflight import (
    FD_TOLERANCES,
    CheckLine,
    check_backend,
    choose_coordinates,
    estimate_core_hours,
    finite_difference_tolerance,
    molecular_preflight,
)


def _verdicts(lines, topic):
    return [line.verdict for line in lines if line.topic == topic]


class _Faulty:
    """Wraps a backend and corrupts one field of every result (to show the check can fail)."""

    def __init__(self, inner, fault):
        self.inner, self.fault, self.nstates = inner, fault, inner.nstates
        self.finite_difference_tolerance = finite_difference_tolerance(inner)

    def compute(self, positions_bohr, guess=None, need_gradients=True):
        res = self.inner.compute(positions_bohr, guess, need_gradients)
        if self.fault == "gradient_scale" and res.gradients is not None:
            res = dataclasses.replace(res, gradients=res.gradients * 1.01)
        if self.fault == "coupling_sign" and res.couplings is not None:
            res = dataclasses.replace(res, couplings=-res.couplings)
        if self.fault == "overlap_row0" and res.overlap_prev is not None:
            s = res.overlap_prev.copy()
            s[0, 1:] *= 2.0  # one block normalised differently (a classic amplitude-convention slip)
            res = dataclasses.replace(res, overlap_prev=s)
        if self.fault == "raise":
            raise BackendError("SCF did not converge", [{"what": "damping", "outcome": "no"}])
        return res


@pytest.mark.parametrize("name, x0", [("tully1", 0.3), ("tully2", -0.4), ("tully3", 0.2)])
@pytest.mark.parametrize("with_couplings", [True, False])
def test_model_adapter_passes_within_stated_tolerance(name, x0, with_couplings):
    backend = ModelAdapterBackend(tully_model(name), with_couplings=with_couplings)
    check = check_backend(backend, backend.positions_from_model(np.array([x0])))
    tol = FD_TOLERANCES["ModelAdapterBackend"]
    assert check.passed, "\n".join(map(str, check.lines))
    assert _verdicts(check.lines, "gradients") == ["PASS"]
    assert check.gradient_error <= tol.gradient_atol
    assert check.coordinates == [(0, 0)]  # the only coordinate the 1D model uses
    if with_couplings:
        assert check.coupling_error <= tol.coupling_atol + tol.coupling_rtol * 1.0
        assert check.sigma_error is None
    else:
        assert check.coupling_error is None and check.sigma_error <= tol.coupling_atol
        assert "WARN" in _verdicts(check.lines, "couplings")  # the projected-force caveat is stated


@pytest.mark.parametrize("fault, topic", [("gradient_scale", "gradients"), ("coupling_sign", "couplings")])
def test_wrong_derivatives_fail(fault, topic):
    # A 1 % gradient error (6e-5 Eh/Bohr here) and a coupling sign error must both be caught.
    inner = ModelAdapterBackend(tully_model("tully1"))
    check = check_backend(_Faulty(inner, fault), inner.positions_from_model(np.array([0.3])))
    assert not check.passed
    assert "FAIL" in _verdicts(check.lines, topic)


def test_inconsistent_overlaps_fail_on_the_overlap_only_path():
    inner = ModelAdapterBackend(tully_model("tully1"), with_couplings=False)
    check = check_backend(_Faulty(inner, "overlap_row0"), inner.positions_from_model(np.array([0.3])))
    assert _verdicts(check.lines, "couplings")[0] == "FAIL"


def test_backend_failure_is_one_fail_line():
    inner = ModelAdapterBackend(tully_model("tully1"))
    check = check_backend(_Faulty(inner, "raise"), inner.positions_from_model(np.array([0.3])))
    assert [str(l).split()[0:2] for l in check.lines] == [["FAIL", "backend"]]
    assert "SCF did not converge" in check.lines[0].message


def test_coordinate_choice_alternates_gradient_and_coupling_rankings():
    from mapdyn.backends.contract import ElectronicResult

    g = np.zeros((2, 2, 3))
    g[1, 0, 2], g[0, 1, 1] = 0.5, 0.2
    d = np.zeros((2, 2, 2, 3))
    d[0, 1, 1, 0], d[1, 0, 1, 0] = 0.9, -0.9
    res = ElectronicResult(energies=np.array([0.0, 0.1]), gradients=g, couplings=d)
    assert choose_coordinates(res, 3) == [(0, 2), (1, 0), (1, 1)]
    assert choose_coordinates(res, 10) == [(0, 2), (1, 0), (1, 1)]  # vanishing coordinates never chosen


def test_core_hours_formula_and_validation():
    assert estimate_core_hours(3.6, 4000, 100, 7200.0) == pytest.approx(3.6 * 4000 * 100 / 3600 + 2.0)
    with pytest.raises(ValueError, match="n_steps"):
        estimate_core_hours(1.0, -1, 10)
    with pytest.raises(ValueError, match="step_seconds"):
        estimate_core_hours(float("nan"), 1, 10)
    assert str(CheckLine("PASS", "gradients", "ok")).startswith("PASS gradients")
    with pytest.raises(ValueError, match="verdict"):
        CheckLine("OK", "x", "y")


# Distorted water (Bohr), as in the backend tests.
WATER = np.array([[0.0, 0.0, 0.22], [0.0, 1.43, -0.89], [0.1, -1.40, -0.95]])


def test_tda_backend_passes_and_costs_are_reported():
    pytest.importorskip("pyscf")
    from mapdyn.backends.pyscf.tddft import TDDFTBackend

    backend = TDDFTBackend(["O", "H", "H"], basis="sto-3g", nstates=3)
    report = molecular_preflight(backend, WATER, n_steps=1000, n_trajectories=10, workers=2,
                                 symbols=["O", "H", "H"])
    text = report.text()
    assert report.passed, text
    tol = FD_TOLERANCES["TDDFTBackend"]
    assert report.numbers["gradient_error"] <= tol.gradient_atol
    assert report.numbers["sigma_error"] <= tol.coupling_atol + tol.coupling_rtol * 3.5
    assert report.numbers["coupling_error"] is None  # no NAC vectors on this path
    step = report.numbers["step_seconds"]
    assert report.numbers["core_hours"] == pytest.approx(
        (step * 1000 * 10 + report.numbers["initial_conditions_seconds"]) / 3600)
    assert "core-hours" in text and text.splitlines()[0].startswith("PASS backend")


@pytest.mark.slow
def test_casscf_backend_passes_within_stated_tolerance():
    pytest.importorskip("pyscf")
    from mapdyn.backends.pyscf.casscf import CASSCFBackend

    pos = np.array([[0.0, 0.0, 0.19], [0.19, 1.51, -0.94], [-0.09, -1.42, -0.85]])
    backend = CASSCFBackend(["O", "H", "H"], basis="sto-3g", ncas=2, nelecas=2, nstates=3)
    check = check_backend(backend, pos)
    assert check.passed, "\n".join(map(str, check.lines))
    assert check.coupling_error <= FD_TOLERANCES["CASSCFBackend"].coupling_atol


def test_check_command_on_the_demo_study(capsys):
    # `mapdyn check inputs/methaniminium_demo.toml` (CH2NH2+, SA2-CASSCF(2,2)/STO-3G): gradients and couplings (analytic NAC vectors vs
    # overlap finite differences for SA-CASSCF; overlap-coupling consistency on the TDA path) within
    # the backend's stated tolerances, and a core-hour line.
    pytest.importorskip("pyscf")
    import os

    from mapdyn.cli import main
    from mapdyn.study.config import load_study_config

    path = os.path.join(os.path.dirname(__file__), os.pardir, os.pardir, "inputs", "methaniminium_demo.toml")
    backend = load_study_config(path).electronic.backend
    code = main(["check", path])
    out = capsys.readouterr().out.splitlines()
    assert code == 0, "\n".join(out)
    tol = FD_TOLERANCES["CASSCFBackend" if backend == "casscf" else "TDDFTBackend"]
    grad = next(l for l in out if l.startswith("PASS gradients"))
    assert float(grad.split("= ")[1].split()[0]) <= tol.gradient_atol
    coup = next(l for l in out if l.startswith("PASS couplings"))
    if backend == "casscf":
        assert "d_analytic − d_FD(overlaps)" in coup
        assert float(coup.split("= ")[1].split()[0]) <= tol.coupling_atol + tol.coupling_rtol
    else:
        assert "overlap couplings consistent" in coup
    assert any(l.startswith("INFO core-hours") for l in out)
    assert not any(l.startswith("FAIL") for l in out)
