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
    """Faked out-of-range version: no CPHF swap, no residual recorded, the same gradients."""
    from mapdyn.backends.pyscf.tddft import TDDFTBackend

    r = np.array([[0.0, 0.0, 0.0], [0.1, 0.0, 3.0]])
    normal = TDDFTBackend(["Li", "H"], basis="sto-3g", nstates=3).compute(r)
    monkeypatch.setattr(common, "_warned", set())
    monkeypatch.setattr(common, "pyscf_version", lambda: "9.0.0")
    with pytest.warns(RuntimeWarning, match="outside the tested range"):
        fallback = TDDFTBackend(["Li", "H"], basis="sto-3g", nstates=3).compute(r)
    # plain path: PySCF's own Z-vector solve (converges here), intercepted path: mapdyn's Krylov ladder
    np.testing.assert_allclose(fallback.gradients, normal.gradients, rtol=0, atol=1e-10)
    assert np.all(np.isfinite(normal.diagnostics["cphf_residuals"]))
    assert np.all(np.isnan(fallback.diagnostics["cphf_residuals"]))


def test_one_pass_interception_restores_pyscf_after_an_exception():
    from pyscf import gto, lib, scf
    from pyscf.grad import casscf as casscf_grad
    from pyscf.grad import rhf as rhf_grad
    from pyscf.grad import sacasscf as sacasscf_grad

    from mapdyn.backends.pyscf.casscf_one_pass import _intercept, _Tape

    mol = gto.M(atom="H 0 0 0; H 0 0 1.4", unit="Bohr", basis="sto-3g", verbose=0)
    mf = scf.RHF(mol)
    before = (rhf_grad.get_jk, casscf_grad.lib, sacasscf_grad.lib, casscf_grad.ao2mo, mol.intor)
    with pytest.raises(KeyError):
        with _intercept(_Tape(mol), mf):
            assert casscf_grad.lib is not lib and common.PATCH_LOCK.acquire(blocking=False)
            common.PATCH_LOCK.release()  # re-entrant: this thread holds it
            raise KeyError("inside the intercepted region")
    after = (rhf_grad.get_jk, casscf_grad.lib, sacasscf_grad.lib, casscf_grad.ao2mo, mol.intor)
    assert all(a is b or a == b for a, b in zip(before, after)) and "get_jk" not in mf.__dict__


def test_untested_pyscf_gives_the_same_casscf_gradients(monkeypatch):
    """Faked out-of-range version: the SA-CASSCF backend takes PySCF's plain per-state calls and
    offers no one-solve force; gradients and couplings equal the one-pass ones (tolerance: the
    Lagrange solver tolerance of both paths, 1e-7 Eh/Bohr)."""
    from mapdyn.backends.pyscf.casscf import CASSCFBackend

    r = np.array([[0.0, 0.0, 0.0], [0.1, 0.05, 3.0]])
    fast = CASSCFBackend(["Li", "H"], basis="sto-3g", ncas=2, nelecas=2, nstates=2)
    ref = fast.compute(r)
    assert fast.offers_force
    monkeypatch.setattr(common, "_warned", set())
    monkeypatch.setattr(common, "pyscf_version", lambda: "9.0.0")
    slow = CASSCFBackend(["Li", "H"], basis="sto-3g", ncas=2, nelecas=2, nstates=2)
    with pytest.warns(RuntimeWarning, match="outside the tested range"):
        res = slow.compute(r)
    assert not slow.offers_force
    np.testing.assert_allclose(res.gradients, ref.gradients, atol=1e-7)
    np.testing.assert_allclose(res.couplings, ref.couplings, atol=1e-6)
