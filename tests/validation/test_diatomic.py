"""KCl on SA-CASSCF potentials: cached grid, ADT diabatization, diabatic model, exact wavepacket.

Reference library: PySCF 2.14 (the live scan reproduces the cached SA-CASSCF values); scipy
(cumulative_simpson and CubicSpline.antiderivative for the ADT integral).  The shipped grid
``mapdyn/data/diatomic_grid.npz`` is produced by tests/reference/make_diatomic_comparison.py.
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np
import pytest
from scipy.interpolate import CubicSpline

from mapdyn.validation.diatomic import (
    KCL_SCAN,
    DiatomicGrid,
    DiatomicModel,
    adt_angle,
    bond_coupling,
    diabatize,
    load_packaged_grid,
    photoexcitation_scenario,
    reduced_mass,
)
from mapdyn.validation.exact import Absorber, Grid, GridPropagator, gaussian_wavepacket


@pytest.fixture(scope="module")
def grid() -> DiatomicGrid:
    return load_packaged_grid()


@pytest.fixture(scope="module")
def model(grid) -> DiatomicModel:
    return DiatomicModel(grid)


def test_cached_grid_reloads_identically(grid, tmp_path):
    path = tmp_path / "grid.npz"
    grid.save(path)
    again = DiatomicGrid.load(path)
    assert again.equals(grid)
    assert not os.path.exists(str(path) + ".tmp")
    r = np.linspace(3.0, 45.0, 301)[:, None]
    assert np.array_equal(DiatomicModel(again).hamiltonian(r), DiatomicModel(grid).hamiltonian(r))


def test_grid_file_rejects_foreign_npz(tmp_path):
    path = tmp_path / "other.npz"
    np.savez(path, a=np.zeros(3))
    with pytest.raises(ValueError, match="not a diatomic grid"):
        DiatomicGrid.load(path)


def test_grid_describes_an_ionic_covalent_crossing(grid):
    """Dipoles (e·Bohr, origin at the nuclear charge centre): K⁺Cl⁻ has μ ≈ −r, K + Cl has μ ≈ 0.

    The ground state is ionic at short range and covalent beyond the crossing; the excited state the
    reverse (physical expectation for an alkali halide; common knowledge).  The scan's sign tracking
    held with overlaps far above the ~1e-13 noise of the determinant overlaps.
    """
    r, mu = grid.distances, grid.dipoles
    short, far = r < 12.0, r > 20.0
    assert np.all(mu[short, 0] / -r[short] > 0.7) and np.all(np.abs(mu[short, 1]) / r[short] < 0.35)
    assert np.all(np.abs(mu[far, 0]) < 0.05) and np.all(np.abs(mu[far, 1] + r[far]) < 0.05)
    gap = grid.energies[:, 1] - grid.energies[:, 0]
    assert 15.8 < r[np.argmin(gap)] < 16.6 and gap.min() < 0.003
    assert grid.min_overlap.min() > 1e-6
    assert grid.metadata["nac_form"] == "full" and grid.metadata["basis"] == KCL_SCAN["basis"]


def test_reduced_mass_from_ase():
    from ase import units
    from ase.data import atomic_masses, atomic_numbers

    mK, mCl = atomic_masses[atomic_numbers["K"]], atomic_masses[atomic_numbers["Cl"]]
    expected = mK * mCl / (mK + mCl) * units._amu / units._me
    assert reduced_mass(["K", "Cl"]) == pytest.approx(expected, rel=1e-14)
    with pytest.raises(ValueError, match="symbols"):
        reduced_mass(["K", "Cl", "H"])


def test_bond_coupling_projection():
    """d_r = ê·[(m_A/M) d_B − (m_B/M) d_A]; a pure translation d_A = d_B = t contributes ê·t (m_A − m_B)/M."""
    pos = np.array([[1.0, 2.0, 3.0], [1.0, 2.0, 3.0]]) + np.array([[0, 0, 0], [3.0, 4.0, 0.0]])
    e = np.array([0.6, 0.8, 0.0])
    dA, dB = np.array([0.1, -0.2, 0.3]), np.array([-0.4, 0.5, 0.7])
    got = bond_coupling(np.stack([dA, dB]), pos, [2.0, 3.0])
    assert got == pytest.approx(e @ (0.4 * dB - 0.6 * dA), abs=1e-15)


def test_adt_angle_cumulative_simpson_matches_spline_antiderivative(grid):
    """scipy.integrate.cumulative_simpson on the fine grid vs the exact integral of the same cubic
    spline (CubicSpline.antiderivative): Simpson on 20 subdivisions per interval is accurate to
    ~(h/20)⁴ · max|d''''|; measured 2e-6 rad (tolerance 1e-5 rad)."""
    r, d = grid.distances, grid.coupling
    fine, theta = adt_angle(r, d)
    anti = CubicSpline(r, d).antiderivative()
    exact = anti(fine) - anti(r[-1])
    assert theta[-1] == 0.0
    assert np.max(np.abs(theta - exact)) < 1e-5


def test_model_reproduces_adiabatic_energies_on_grid(grid, model):
    """Eigenvalues of the diabatic spline at the scan points = SA-CASSCF energies (rounding)."""
    E, _ = model.adiabatic(grid.distances[:, None])
    assert np.max(np.abs(E - grid.energies)) < 1e-10


def test_model_gradient_is_the_derivative_of_the_hamiltonian(model):
    """Analytic ∂H/∂r vs central differences (h = 1e-5 Bohr).  |H| ≈ 1.06e3 Eh, so rounding alone
    gives ε|H|/h ≈ 2e-8 Eh/Bohr; tolerance 1e-7."""
    r = np.linspace(3.0, 45.0, 97)[:, None]  # includes the linear continuation on both sides
    h = 1e-5
    fd = (model.hamiltonian(r + h) - model.hamiltonian(r - h)) / (2 * h)
    assert np.max(np.abs(model.hamiltonian_gradient(r)[:, 0] - fd)) < 1e-7


def test_adiabatic_slopes_equal_pyscf_analytic_gradients_on_grid(grid, model):
    """The Hermite interpolation takes its knot slopes from the SA-CASSCF analytic gradients (PySCF),
    so the model adiabats' slopes equal them at the scan points up to the finite-difference error of
    this check (h = 1e-5 Bohr on |E| ≈ 1e3 Eh, and the curvature of the adiabats at the 2 mEh gap):
    measured 1.2e-6 Eh/Bohr, tolerance 1e-5."""
    r = grid.distances
    h = 1e-5
    E_p, _ = model.adiabatic((r + h)[:, None])
    E_m, _ = model.adiabatic((r - h)[:, None])
    slope = (E_p - E_m) / (2 * h)
    assert np.max(np.abs(slope - grid.energy_gradients)) < 1e-5


def test_hellmann_feynman_coupling_reproduces_input_coupling(grid, model):
    """u_1ᵀ ∂H u_2/(E_2 − E_1) of the model vs the SA-CASSCF d_r.

    On the scan points it is d_r by construction (knot slopes of H built from d_r): measured 2e-10
    /Bohr, tolerance 1e-8.  Between the points the model's coupling is compared with the cubic-spline
    interpolant of d_r that defines θ(r): measured max 1e-4 /Bohr (at 4.25 Bohr, on the 0.5 Bohr
    part of the grid; 3e-5 at the 1.08 /Bohr peak), tolerance 5e-4.  The error against PySCF itself
    between points is measured in the live test.
    """
    r = grid.distances
    assert np.max(np.abs(model.coupling(r[:, None]) - grid.coupling)) < 1e-8
    mid = 0.5 * (r[1:] + r[:-1])
    ref = CubicSpline(r, grid.coupling)(mid)
    assert np.max(np.abs(model.coupling(mid[:, None]) - ref)) < 5e-4


def test_linear_continuation_beyond_the_grid(model):
    lo, hi = model.range
    for edge, outside in ((lo, lo - 1.0), (hi, hi + 3.0)):
        H0, dH0 = model.hamiltonian([[edge]]), model.hamiltonian_gradient([[edge]])[:, 0]
        H1 = model.hamiltonian([[outside]])
        assert np.allclose(H1, H0 + dH0 * (outside - edge), atol=1e-12, rtol=0)
        assert np.allclose(model.hamiltonian_gradient([[outside]])[:, 0], dH0, atol=1e-14, rtol=0)


def test_exact_wavepacket_conserves_norm_on_the_model(model):
    """Split-operator propagation (unitary pieces) without absorber: norm constant to rounding;
    with absorbers: on-grid + absorbed = 1 (mapdyn.validation.exact bookkeeping).  1000 steps of 2 a.u."""
    sc = photoexcitation_scenario(model)
    grid = Grid((-20.0,), (72.0,), (4096,))
    for absorber in (None, Absorber(12.0, 0.02)):
        prop = GridPropagator(model, grid, 2.0, absorber)
        psi = gaussian_wavepacket(model, grid, sc.position, 40.0 if absorber else 0.0, sc.position_width, 1)
        absorbed = np.zeros((prop.nchannels, 2))
        for _ in range(1000):
            psi = prop.step(psi, absorbed)
        dia, ad = prop.populations(psi)
        assert abs(dia.sum() + absorbed.sum() - 1.0) < 1e-10
        assert abs(ad.sum() - dia.sum()) < 1e-10


def test_live_scan_reproduces_cached_points(grid):
    """A fresh PySCF scan of three grid points plus one midpoint at the crossing (cold start at 15.9).

    Grid points: cached SA-CASSCF energies reproduced to 1e-8 Eh (measured; tolerance 1e-7, CASSCF
    conv_tol 1e-10 from another starting chain), d_r to 8e-6 /Bohr (measured; tolerance 1e-4,
    response-equation convergence); a cold start's phase convention is arbitrary, so d_r is compared
    up to one global sign.  Midpoint 16.05 Bohr (interpolation error of the model against PySCF):
    adiabatic energies 7e-9 Eh (tolerance 1e-6), coupling 4e-6 of 1.004 /Bohr (tolerance 1e-4)."""
    pytest.importorskip("pyscf")
    from mapdyn.validation.diatomic import scan_diatomic

    pts = np.array([15.9, 16.0, 16.05, 16.1])
    # at 15.9 Bohr the RHF Cl 3pσ orbital is number 17 (below the 3pπ pair at 5.5 Bohr, above it here)
    live = scan_diatomic(KCL_SCAN["symbols"], pts, basis=KCL_SCAN["basis"], ncas=2, nelecas=2,
                         cas_orbitals=(17, 18), start_distance=15.9)
    on_grid = np.isin(np.round(pts, 6), np.round(grid.distances, 6))
    idx = [int(np.argmin(np.abs(grid.distances - p))) for p in pts[on_grid]]
    assert np.max(np.abs(live.energies[on_grid] - grid.energies[idx])) < 1e-7
    sign = np.sign(live.coupling[0] * grid.coupling[idx[0]])
    assert np.max(np.abs(sign * live.coupling[on_grid] - grid.coupling[idx])) < 1e-4
    model = DiatomicModel(grid)
    mid = ~on_grid
    E, _ = model.adiabatic(pts[mid][:, None])
    assert np.max(np.abs(E - live.energies[mid])) < 1e-6
    assert np.max(np.abs(model.coupling(pts[mid][:, None]) - sign * live.coupling[mid])) < 1e-4


def test_diabatize_definitions(grid):
    dia = diabatize(grid)
    c, s = np.cos(dia["theta"]), np.sin(dia["theta"])
    U = np.stack([np.stack([c, s], -1), np.stack([-s, c], -1)], -2)  # rows: U[k, l]
    H = np.stack([np.stack([dia["H11"], dia["H12"]], -1), np.stack([dia["H12"], dia["H22"]], -1)], -2)
    back = np.einsum("nlk,nlm,nmj->nkj", U, H, U)  # Uᵀ H U = diag(E)
    assert np.allclose(back[:, 0, 0], grid.energies[:, 0], atol=1e-10, rtol=0)
    assert np.allclose(back[:, 1, 1], grid.energies[:, 1], atol=1e-10, rtol=0)
    assert np.allclose(back[:, 0, 1], 0.0, atol=1e-10)
