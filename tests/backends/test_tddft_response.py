"""Z-vector solve, S1/S0-region rule and root buffer of the TDA/TDDFT backend (issue: a TDA/TDDFT
path that finishes its trajectories).  Hartree atomic units; run with OMP_NUM_THREADS=1."""

from __future__ import annotations

import numpy as np
import pytest

pyscf = pytest.importorskip("pyscf")

from mapdyn.backends.contract import BackendError, RegionReached, ended_channel  # noqa: E402
from mapdyn.backends.pyscf import tddft  # noqa: E402
from mapdyn.backends.pyscf.tddft import TDDFTBackend, root_window_diagnostics  # noqa: E402
from mapdyn.backends.pyscf.zvector import solve_zvector  # noqa: E402
from mapdyn.units import HARTREE_IN_EV  # noqa: E402

ETHYLENE = ["C", "C", "H", "H", "H", "H"]
# Ethylene twisted by 80° about C=C with one CH2 hydrogen pushed 0.3 Å out of its plane (Bohr).
# PySCF 2.14's own Z-vector solve stops at a relative residual 1.8e-4 here for S1 (CIS/STO-3G),
# whatever its tolerance or iteration limit (measured; the stall the issue reports).
STALL = np.array([[0.0, 0.0, 0.0],
                  [0.0, 0.0, 2.532233],
                  [1.738548, 0.0, -1.001555],
                  [-1.738548, 0.0, -1.001555],
                  [0.301896, 2.279053, 3.533788],
                  [-0.301896, -1.712136, 3.533788]])


def ethylene(twist_deg: float, cc_angstrom: float = 1.34) -> np.ndarray:
    """Ethylene (Bohr) with one CH2 group rotated by ``twist_deg`` about the C=C axis (z)."""
    th = np.radians(twist_deg)
    rot = np.array([[np.cos(th), -np.sin(th), 0.0], [np.sin(th), np.cos(th), 0.0], [0.0, 0.0, 1.0]])
    c2 = np.array([0.0, 0.0, cc_angstrom])
    atoms = [np.zeros(3), c2, np.array([0.92, 0.0, -0.53]), np.array([-0.92, 0.0, -0.53]),
             c2 + rot @ np.array([0.92, 0.0, 0.53]), c2 + rot @ np.array([-0.92, 0.0, 0.53])]
    return np.array(atoms) / 0.529177210903


# ---------------------------------------------------------------------------------------------
# the solver itself
# ---------------------------------------------------------------------------------------------

def test_ladder_solves_a_random_spd_system_to_tolerance():
    rng = np.random.default_rng(3)
    n = 60
    d = rng.uniform(0.5, 3.0, n)
    b_mat = rng.normal(size=(n, n)) * 0.05
    a_resp = b_mat @ b_mat.T                       # symmetric positive semidefinite response part
    rhs = rng.normal(size=n)
    sol = solve_zvector(lambda z: a_resp @ z, d, rhs, tol=1e-11)
    exact = np.linalg.solve(np.diag(d) + a_resp, rhs)
    assert sol.residual <= 1e-11
    np.testing.assert_allclose(sol.z, exact, rtol=0, atol=1e-9 * np.abs(exact).max())
    # a budget too small for GMRES hands over to MINRES and then to the dense rung
    tight = solve_zvector(lambda z: a_resp @ z, d, rhs, tol=1e-13, max_products=3)
    assert tight.solver == "dense direct solve" and tight.residual < 1e-12
    assert [a["what"].split()[0] for a in tight.attempts][-2:] == ["MINRES", "dense"]


def test_zero_rhs_and_bad_input():
    assert solve_zvector(lambda z: z, np.ones(3), np.zeros(3)).residual == 0.0
    with pytest.raises(ValueError, match="rhs"):
        solve_zvector(lambda z: z, np.ones(3), np.ones(4))
    with pytest.raises(ValueError, match="zvector_solver"):
        TDDFTBackend(["H", "H"], basis="sto-3g", nstates=2, zvector_solver="cg")
    with pytest.raises(ValueError, match="seam_gap"):
        TDDFTBackend(["H", "H"], basis="sto-3g", nstates=2, seam_gap=-1.0)


@pytest.mark.parametrize("atoms", [
    [("Li", (0.0, 0.0, 0.0)), ("H", (0.1, 0.0, 3.0))],
    [("O", (0.0, 0.0, 0.0)), ("H", (0.0, 1.43, 1.1)), ("H", (0.0, -1.43, 1.1))]])
def test_krylov_zvector_equals_pyscf_where_pyscf_converges(atoms):
    # Small systems where PySCF's Krylov routine converges (residual < 1e-10 measured): the two
    # Z-vectors agree to 1e-8 (issue), and so do the gradients.
    from pyscf import gto, scf

    mol = gto.M(atom=atoms, unit="Bohr", basis="sto-3g", verbose=0)
    mf = scf.RHF(mol).run(conv_tol=1e-12)
    td = mf.TDA().run(nstates=2, conv_tol=1e-9)
    tdg = td.nuc_grad_method()
    tdg.cphf_conv_tol, tdg.cphf_max_cycle, tdg.verbose = 1e-13, 200, 0
    z, g, res = {}, {}, {}
    for solver in ("pyscf", "krylov"):
        with tddft._response_cphf(solver, 1e-12) as stand_in:
            g[solver] = np.asarray(tdg.kernel(state=1))
        z[solver], res[solver] = stand_in.solutions[-1], stand_in.residuals[-1]
    assert res["pyscf"] < 1e-10 and res["krylov"] < 1e-12
    np.testing.assert_allclose(z["krylov"], z["pyscf"], rtol=0, atol=1e-8)
    np.testing.assert_allclose(g["krylov"], g["pyscf"], rtol=0, atol=1e-8)
    # PySCF's module is back in place
    from pyscf.grad import tdrhf
    from pyscf.scf import cphf
    assert tdrhf.cphf is cphf


@pytest.fixture(scope="module")
def stall_results():
    out = {}
    for solver in ("pyscf", "krylov"):
        backend = TDDFTBackend(ETHYLENE, basis="sto-3g", nstates=2, zvector_solver=solver, cphf_residual_tol=1.0)
        out[solver] = backend.compute(STALL)
    return out


def test_krylov_reaches_tolerance_where_pyscf_stalls(stall_results):
    stalled = stall_results["pyscf"].diagnostics["cphf_residuals"][0]
    reached = stall_results["krylov"].diagnostics["cphf_residuals"][0]
    assert stalled > 1e-5, f"PySCF no longer stalls here ({stalled:.1e}); pick another stored geometry"
    assert reached <= 1e-10
    assert stall_results["krylov"].diagnostics["zvector_solvers"][0].startswith("GMRES")
    # the stall costs gradient accuracy of order 1e-6 Eh/Bohr, well above the converged solve's noise
    diff = np.max(np.abs(stall_results["pyscf"].gradients[1] - stall_results["krylov"].gradients[1]))
    assert 1e-9 < diff < 1e-4


def test_default_backend_accepts_the_stall_geometry_and_records_the_residual():
    # with the default residual limit (1e-6) the old path would have stopped here
    res = TDDFTBackend(ETHYLENE, basis="sto-3g", nstates=2).compute(STALL)
    assert res.diagnostics["cphf_residuals"][0] <= 1e-10
    from mapdyn.driver.observers import backend_frame_diagnostics
    assert backend_frame_diagnostics(res.diagnostics)["response_residual"] <= 1e-10
    with pytest.raises(BackendError, match="gradient of state 1"):
        TDDFTBackend(ETHYLENE, basis="sto-3g", nstates=2, zvector_solver="pyscf").compute(STALL)


@pytest.mark.slow
def test_gradients_at_the_stall_geometry_match_finite_differences(stall_results):
    # central differences of the backend's own energies, h = 1e-3 Bohr; required ≤ 1e-5 Eh/Bohr
    backend = TDDFTBackend(ETHYLENE, basis="sto-3g", nstates=2)
    g = stall_results["krylov"].gradients
    h = 1e-3
    err = 0.0
    for a in range(len(ETHYLENE)):
        for x in range(3):
            rp, rm = STALL.copy(), STALL.copy()
            rp[a, x] += h
            rm[a, x] -= h
            fd = (backend.compute(rp, need_gradients=False).energies
                  - backend.compute(rm, need_gradients=False).energies) / (2 * h)
            err = max(err, float(np.max(np.abs(fd - g[:, a, x]))))
    assert err < 1e-5, f"max |analytic - FD| = {err:.2e} Eh/Bohr"


# ---------------------------------------------------------------------------------------------
# S1/S0-region rule
# ---------------------------------------------------------------------------------------------

# Two consecutive geometries (Bohr) of an ethylene CIS/STO-3G trajectory 0.5 fs apart (steps 26, 27
# of a first run of the example study at that level): S1 runs into S0 between them.
SEAM_A = np.array([[-0.103947, 0.226900, -0.830879], [0.004396, -0.148834, 3.377559],
                   [2.112088, 0.038214, -1.134860], [-1.272373, -1.592440, -1.214110],
                   [1.938868, -0.498480, 3.645779], [-1.524101, 1.256400, 3.548182]])
SEAM_B = np.array([[-0.112276, 0.243453, -0.865316], [-0.001627, -0.154436, 3.413115],
                   [2.099920, -0.030632, -1.145444], [-1.160684, -1.674134, -1.223529],
                   [2.021478, -0.539347, 3.637860], [-1.532562, 1.322667, 3.570405]])


def test_seam_rule_triggers_on_a_scan_that_crosses_it():
    # Linear scan SEAM_A -> SEAM_B: the CIS S1-S0 gap falls from 0.139 eV through 0.1 eV to about
    # -0.001 eV (measured).  The rule (default 0.1 eV) lets the first points through and ends at the
    # first one below; with the threshold at 0 only the negative S1 ends it.  PySCF by itself drops
    # TDA roots below 1e-3 Eh (0.027 eV), which would have hidden S1 at the last two points.
    free = TDDFTBackend(ETHYLENE, basis="sto-3g", nstates=2, seam_gap=0.0)
    ruled = TDDFTBackend(ETHYLENE, basis="sto-3g", nstates=2)
    gaps, ended = [], []
    for lam in np.linspace(0.0, 1.0, 6):
        r = (1.0 - lam) * SEAM_A + lam * SEAM_B
        try:
            gaps.append(float(np.diff(free.compute(r, need_gradients=False).energies[:2])[0]) * HARTREE_IN_EV)
        except RegionReached as exc:
            gaps.append(exc.values["gap_Eh"] * HARTREE_IN_EV)
            assert lam == 1.0 and exc.values["gap_Eh"] < 0.0
        try:
            ruled.compute(r, need_gradients=False)
            ended.append(False)
        except RegionReached as exc:
            ended.append(True)
            assert exc.channel == "S1/S0 region"
            assert exc.values["gap_Eh"] * HARTREE_IN_EV == pytest.approx(gaps[-1], abs=1e-6)
            np.testing.assert_allclose(exc.values["positions_bohr"], r)
    assert np.all(np.diff(gaps) < 0) and gaps[0] > 0.1 and gaps[-1] < 0.0
    assert 0.0 < gaps[-2] < 1e-3 * HARTREE_IN_EV                 # kept although below PySCF's cut
    assert ended == [g < 0.1 for g in gaps] and ended[:2] == [False, False]


def test_s1_vanishing_from_the_roots_after_a_small_gap_ends_in_the_channel():
    # Previous step at SEAM_A (gap 0.139 eV < 5 x 0.1 eV).  A backend with a 0-eV threshold run
    # to SEAM_B sees S1 negative; with the PySCF default cut restored the S1 root disappears and
    # the window check must still end the trajectory in the channel, not carry on with the jump.
    backend = TDDFTBackend(ETHYLENE, basis="sto-3g", nstates=2, extra_roots=2, seam_gap=0.0)
    first = backend.compute(SEAM_A, need_gradients=False)
    backend.seam_gap = tddft.DEFAULT_SEAM_GAP
    original = backend._run_td

    def pyscf_cut(mf, attempts):                  # PySCF's own behaviour: roots < 1e-3 Eh dropped
        td = original(mf, attempts)
        keep = np.asarray(td.e) > 1e-3
        td.e = np.asarray(td.e)[keep]
        td.xy = [xy for xy, k in zip(td.xy, keep) if k]
        return td

    backend._run_td = pyscf_cut
    with pytest.raises(RegionReached, match="not among the computed roots"):
        backend.compute(SEAM_B, guess=first.guess, need_gradients=False)


def test_seam_rule_negative_and_complex_excitations():
    backend = TDDFTBackend(["H", "H"], basis="sto-3g", nstates=2)
    r = np.zeros((2, 3))
    with pytest.raises(RegionReached, match="gap"):
        backend._check_seam(np.array([-0.01]), r, [])
    with pytest.raises(RegionReached, match="complex"):
        backend._check_seam(np.array([0.2 + 0.01j]), r, [])
    assert backend._check_seam(np.array([0.2 + 0.0j]), r, [])[0] == 0.2
    backend.seam_gap = None
    with pytest.raises(BackendError, match="non-positive"):
        backend._check_seam(np.array([-0.01]), r, [])


def test_driver_ends_the_trajectory_in_the_channel_with_time_and_geometry():
    from ase import units

    from mapdyn.backends.model_adapter import ModelAdapterBackend
    from mapdyn.core.options import MethodOptions
    from mapdyn.driver.dynamics import MappingDynamics
    from mapdyn.models.tully import tully_model

    inner = ModelAdapterBackend(tully_model("tully1"))

    class Fenced:
        nstates = inner.nstates

        def compute(self, positions_bohr, guess=None, need_gradients=True):
            if positions_bohr[0, 0] > -3.0:
                raise RegionReached("S1/S0 region", "test fence at x = -3 Bohr", {"gap_Eh": 0.001})
            return inner.compute(positions_bohr, guess, need_gradients)

    import ase

    from mapdyn.units import AMU_IN_ME
    atoms = ase.Atoms("H", positions=[[-5.0 * units.Bohr, 0, 0]], masses=[2000.0 / AMU_IN_ME])
    atoms.set_momenta([[20.0 / (AMU_IN_ME * units.AUT / units.Bohr), 0, 0]])  # p = 20 a.u.
    dyn = MappingDynamics(atoms, Fenced(), 5 * units.AUT, 0, MethodOptions(window="square"),
                          mapping_variables=(np.array([1.2, 0.3]), np.array([0.4, 0.2])), on_backend_error="raise")
    dyn.run(400)
    st = dyn.state
    assert st.stopped and st.end_event is not None
    assert ended_channel(st.stop_reason) == "S1/S0 region"
    assert st.end_event["positions_bohr"][0][0] > -3.0 >= st.positions[0, 0]
    assert st.end_event["time_au"] == pytest.approx((st.step + 1) * 5.0, rel=1e-9)
    assert dyn.metadata["end_event"]["channel"] == "S1/S0 region"
    assert ended_channel("backend failure at step 3: x") is None


# ---------------------------------------------------------------------------------------------
# root buffer
# ---------------------------------------------------------------------------------------------

def test_root_window_diagnostics_flags_buffer_entry_and_leaving():
    # rows: previous propagated states 0..2; columns: reference + 4 roots (2 propagated + 2 buffer)
    s = np.zeros((3, 5))
    s[0, 0] = 1.0
    s[1, 1] = 1.0
    s[2, 3] = 0.9                       # old S2 now best matches buffer root 3 (a state came down)
    s[2, 2] = 0.3
    d = root_window_diagnostics(s, 3)
    assert d["buffer_roots"] == 2 and d["root_best_match"].tolist() == [0, 1, 3]
    assert d["root_tracking"].startswith("entered buffer: state 2 -> root 3")
    s[2] = 0.0
    s[2, 4] = 0.5                       # weight 0.25: no longer inside the computed window
    d = root_window_diagnostics(s, 3)
    assert d["root_tracking"].startswith("left window: state 2")
    assert d["root_window_weight"][2] == pytest.approx(0.25)


def test_root_buffer_on_the_near_degenerate_planar_pair():
    # Planar ethylene, CIS/STO-3G: S1 and S2 lie 0.01 eV apart (11.092, 11.102 eV).  Two buffer
    # roots are computed.  A small push mixes the pair strongly (rotation by ~27°, measured), yet both
    # states stay inside the computed window and the pair block of the overlap stays orthogonal.
    backend = TDDFTBackend(ETHYLENE, basis="sto-3g", nstates=3, extra_roots=2)
    r0 = ethylene(0.0)
    first = backend.compute(r0, need_gradients=False)
    e = np.asarray(first.diagnostics["excitation_energies"]) * HARTREE_IN_EV
    assert e[1] - e[0] < 0.05
    r1 = r0.copy()
    r1[4, 1] += 0.02                     # a slight out-of-plane push of one hydrogen
    second = backend.compute(r1, guess=first.guess, need_gradients=False)
    d = second.diagnostics
    assert d["buffer_roots"] == 2 and d["root_tracking"] == ""
    assert np.all(d["root_window_weight"] > 0.99)
    s = second.overlap_prev
    assert abs(s[1, 2]) > 0.2 and abs(s[2, 1]) > 0.2           # the near-degenerate pair mixes
    pair = s[1:, 1:]
    assert np.max(np.abs(pair.T @ pair - np.eye(2))) < 0.01
    assert np.all(np.diag(s) > 0.8)                             # sign-aligned, no swap at this push
    assert d["overlap_raw"].shape == (3, 3)
    from mapdyn.driver.observers import backend_frame_diagnostics
    frame = backend_frame_diagnostics(d)
    assert frame["root_window_min"] == pytest.approx(float(np.min(d["root_window_weight"])))
    assert frame["root_buffer_entry"] == 0.0
    assert backend_frame_diagnostics({"root_tracking": "entered buffer: state 2 -> root 3"})["root_buffer_entry"] == 1.0


def test_window_check_reference_jump_after_a_small_gap_is_the_channel_else_an_error():
    backend = TDDFTBackend(["H", "H"], basis="6-31g", nstates=3)
    guess = tddft.TDDFTGuess(np.zeros((2, 3)), np.eye(2), 1, np.zeros((2, 1, 1)), backend.fingerprint, gap_Eh=0.5 / HARTREE_IN_EV)
    jump = {"root_window_weight": np.array([0.08, 0.9, 0.04])}       # new SCF solution: S0 gone
    with pytest.raises(RegionReached, match="reference determinant changed"):
        backend._check_window(jump, guess, [])
    guess.gap_Eh = 3.0 / HARTREE_IN_EV                                 # far from S0: a plain failure
    with pytest.raises(BackendError, match="discontinuous: state"):
        backend._check_window(jump, guess, [])
    backend._check_window({"root_window_weight": np.array([1.0, 0.99, 0.97])}, guess, [])  # inside: nothing
