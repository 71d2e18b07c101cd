"""The guard around PySCF attribute swaps (docs/architecture.md#pyscf-response-interception):
originals restored after an exception, one swap at a time, the tested version range declared once
and an untested PySCF release taking the plain path with a warning — never a different number."""

from __future__ import annotations

import threading
import tomllib
import types
import warnings

import numpy as np
import pytest
from conftest import REPO

from mapdyn.backends.pyscf import common


def test_swapped_restores_the_originals_after_an_exception():
    mod = types.SimpleNamespace(a=1, b="x")
    with pytest.raises(RuntimeError):
        with common.swapped((mod, "a", 2), (mod, "b", "y")):
            assert (mod.a, mod.b) == (2, "y")
            raise RuntimeError("inside the swapped region")
    assert (mod.a, mod.b) == (1, "x")


def test_swapped_restores_pyscf_module_attributes_after_an_exception():
    from pyscf.grad import tdrhf, tdrks
    from pyscf.scf import cphf

    with pytest.raises(ZeroDivisionError):
        with common.swapped((tdrhf, "cphf", object()), (tdrks, "cphf", object())):
            1 / 0
    assert tdrhf.cphf is cphf and tdrks.cphf is cphf


def test_swaps_are_serialised_by_the_lock():
    mod = types.SimpleNamespace(a=0)
    seen = []
    inside = threading.Event()
    release = threading.Event()

    def first():
        with common.swapped((mod, "a", 1)):
            inside.set()
            release.wait(5)
            seen.append(("first", mod.a))

    def second():
        inside.wait(5)
        with common.swapped((mod, "a", 2)):
            seen.append(("second", mod.a))

    t1, t2 = threading.Thread(target=first), threading.Thread(target=second)
    t1.start()
    t2.start()
    inside.wait(5)
    assert not common.PATCH_LOCK.acquire(blocking=False) or common.PATCH_LOCK.release()  # held by t1
    release.set()
    t1.join(5)
    t2.join(5)
    assert seen == [("first", 1), ("second", 2)] and mod.a == 0


def test_tested_range_is_the_declared_dependency_range():
    deps = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["dependencies"]
    spec = next(d for d in deps if d.startswith("pyscf"))
    (lo_major, lo_minor), (hi_major, hi_minor) = common.TESTED_PYSCF
    assert spec == f"pyscf>={lo_major}.{lo_minor},<{hi_major}.{hi_minor}"


@pytest.mark.parametrize("version,allowed", [("2.6.0", True), ("2.14.0", True), ("2.5.2", False),
                                             ("2.15.0", False), ("3.0.1", False)])
def test_version_guard(version, allowed, monkeypatch):
    monkeypatch.setattr(common, "_warned", set())
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        assert common.response_interception_allowed(version) is allowed
        assert common.response_interception_allowed(version) is allowed
    assert len(caught) == (0 if allowed else 1)  # one warning per version, not per call


def test_untested_pyscf_gives_the_same_tddft_gradients(monkeypatch):
    """Faked out-of-range version: no CPHF swap, no residual recorded, same gradients."""
    from mapdyn.backends.pyscf.tddft import TDDFTBackend

    r = np.array([[0.0, 0.0, 0.0], [0.1, 0.0, 3.0]])
    normal = TDDFTBackend(["Li", "H"], basis="sto-3g", nstates=3).compute(r)
    monkeypatch.setattr(common, "_warned", set())
    monkeypatch.setattr(common, "pyscf_version", lambda: "9.0.0")
    with pytest.warns(RuntimeWarning, match="outside the tested range"):
        fallback = TDDFTBackend(["Li", "H"], basis="sto-3g", nstates=3).compute(r)
    np.testing.assert_array_equal(fallback.gradients, normal.gradients)
    assert np.all(np.isfinite(normal.diagnostics["cphf_residuals"]))
    assert np.all(np.isnan(fallback.diagnostics["cphf_residuals"]))
