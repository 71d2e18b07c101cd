"""Exact HEOM reference data for the spin-boson, 7-site and 3-site excitation-transfer validation cases.

Method: hierarchical equations of motion, Y. Tanimura & R. Kubo, J. Phys. Soc. Jpn. 58, 101 (1989),
as implemented in QuTiP's ``qutip.solver.heom`` (QuTiP 5.x; reference library, test-only dependency).

Regenerate all data files (deterministic; takes a few minutes on one core)::

    OMP_NUM_THREADS=1 python tests/reference/make_heom_reference.py

or one case: ``... make_heom_reference.py --case spin_boson_symmetric`` (names in ``CASES``).
Files are written atomically into ``src/mapdyn/data/heom_<case>.npz``.

Conventions (our side; identical to docs/theory.md#spin-boson-model)
-----------------------------------------------
Spin-boson:  H = ε σz + Δ σx + Σ_j [P_j²/2 + ½ ω_j² Q_j² + c_j Q_j σz],  σz = diag(1, −1) (state 1 has
σz = +1), no factors ½.  Spectral density J(ω) = (π/2) Σ_j c_j²/ω_j δ(ω − ω_j); Debye bath
J(ω) = 2 λ ω ω_c/(ω² + ω_c²) with λ = Σ_j c_j²/(2ω_j²).  Site model: H = Σ_n E_n |n⟩⟨n| + Σ_{n≠m} V_nm |n⟩⟨m|
+ Σ_n Σ_j [P_nj²/2 + ½ ω_j² Q_nj² + c_j Q_nj |n⟩⟨n|], one independent Debye bath (λ, ω_c) per site.
Initial state: factorized, system in state 1 (spin up / site 1), every bath thermal (temperature 1/β,
k_B = 1) around Q⁰ = 0.  ħ = 1.

Mapping onto QuTiP (read in qutip/solver/heom/bofin_baths.py and qutip/core/environment.py)
------------------------------------------------------------------------------------------
``DrudeLorentzBath(Q, lam, gamma, T, Nk)`` = ``DrudeLorentzEnvironment(T, lam, gamma)`` with
J_QuTiP(ω) = 2 lam gamma ω/(gamma² + ω²), power spectrum S(ω) = 2 J(ω)(n_th(ω) + 1) and
C(t) = (1/2π)∫S(ω)e^{−iωt}dω = (1/π)∫_0^∞ J(ω)[coth(βω/2) cos ωt − i sin ωt] dω, the correlation function
of the bath operator X that couples as Q ⊗ X.  For our bath X = Σ_j c_j Q_j, whose thermal correlation
function Σ_j c_j²/(2ω_j)[coth(βω_j/2) cos ω_j t − i sin ω_j t] is the same integral with our J.  Hence
    Q = σz (spin-boson) or |n⟩⟨n| (site n),  lam = λ,  gamma = ω_c,  T = 1/β
with no extra factor.  This is verified numerically below in two ways (results stored in every file):
1. ``check_correlation_normalisation``: QuTiP's exact Drude-Lorentz C(t) (Padé sum, 200 terms) against
   the correlation function of an explicit harmonic bath built from our J with the docs/theory.md#spin-boson-model general
   rule c_j² = (2/π) ω_j J(ω_j)/ρ(ω_j) (uniform ρ, 125000 modes up to 500 ω_c), for ω_c t ≥ 0.5.
2. ``check_single_mode_coupling``: the HEOM solver with a single undamped mode c Q σz written as a
   four-exponent BosonicBath against brute-force Liouville–von Neumann evolution of spin ⊗ oscillator
   (Fock basis) — this fixes the coupling-operator convention of the solver itself (a factor 2 in Q would
   show up as an O(1) difference).

Convergence: each case is run with a shallow and a deep hierarchy (``shallow``/``deep`` settings of
depth and Matsubara count, QuTiP's Matsubara terminator — the low-temperature correction — always on);
the deep run is stored, and max_t |deep − shallow| is stored as ``convergence_deviation``.  A third run
(``matsubara_check``: shallow depth, more Matsubara terms) gives ``matsubara_deviation``.  The shallow
run is stored too (``*_shallow``) so that tests can re-run it cheaply and compare.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import qutip
from qutip.core.environment import DrudeLorentzEnvironment
from qutip.solver.heom import BosonicBath, DrudeLorentzBath, HEOMSolver

DATA_DIR = Path(__file__).resolve().parents[2] / "src" / "mapdyn" / "data"
CITATION = "Y. Tanimura & R. Kubo, J. Phys. Soc. Jpn. 58, 101 (1989); QuTiP qutip.solver.heom"
CONVENTIONS = (
    "H = eps*sz + Delta*sx + sum_j [P_j^2/2 + w_j^2 Q_j^2/2 + c_j Q_j sz], sz = diag(1,-1), no factors 1/2; "
    "J(w) = (pi/2) sum_j c_j^2/w_j delta(w-w_j); Debye J(w) = 2 lam w wc/(w^2+wc^2), lam = sum_j c_j^2/(2 w_j^2); "
    "site model: bath n couples to |n><n|; factorized initial state, system in state 1, baths thermal at Q0=0; hbar=k_B=1. "
    "QuTiP mapping: DrudeLorentzBath(Q=sz or |n><n|, lam=lam, gamma=wc, T=1/beta)."
)
ODE_OPTIONS = {"atol": 1e-9, "rtol": 1e-7, "nsteps": 100000, "progress_bar": False}

# 1 cm^-1 in hartree (CODATA 2018: 1 Eh = 219474.63136320 cm^-1)
HARTREE_PER_INVCM = 1.0 / 219474.63136320
# 1 fs in atomic units of time (CODATA 2018: ħ/Eh = 2.4188843265857e-17 s)
AUT_PER_FS = 1.0 / 2.4188843265857e-2
# k_B in hartree per kelvin (CODATA 2018: 3.166811563e-6 Eh/K)
KB_IN_HARTREE_PER_K = 3.166811563e-6


# ------------------------------------------------------------------------------------------------
# Cases (scenarios of our own choosing)
# ------------------------------------------------------------------------------------------------
def _sites7_hamiltonian_invcm() -> np.ndarray:
    """7-site aggregate of our own invention (cm⁻¹): a bent chain with a low-energy trap at site 4."""
    energies = np.array([250.0, 180.0, 120.0, 0.0, 90.0, 160.0, 210.0])
    h = np.diag(energies)
    couplings = {(0, 1): -90.0, (1, 2): 40.0, (2, 3): -70.0, (3, 4): 60.0, (4, 5): -50.0,
                 (5, 6): 80.0, (0, 6): 15.0, (1, 5): -10.0, (2, 4): 20.0}
    for (i, j), v in couplings.items():
        h[i, j] = h[j, i] = v
    return h


def _sites3_hamiltonian_invcm() -> np.ndarray:
    """3-site downhill chain of our own invention (cm⁻¹): site 1 → 2 → 3 with a weak 1–3 shortcut, so
    that all three populations matter and the F-state windows are exercised with F = 3."""
    return np.array([[200.0, 80.0, 20.0],
                     [80.0, 100.0, -60.0],
                     [20.0, -60.0, 0.0]])


CASES: dict[str, dict] = {
    # energies in units of Δ, times in units of 1/Δ (ħ = 1): equivalently Hartree atomic units with Δ = 1 Eh
    "spin_boson_symmetric": dict(
        kind="spin_boson", epsilon=0.0, delta=1.0, lam=0.25, omega_c=1.0, beta=1.0,
        t_max=12.0, n_times=241,
        shallow=dict(depth=6, n_matsubara=2), deep=dict(depth=9, n_matsubara=4),
        matsubara_check=dict(depth=6, n_matsubara=4),
    ),
    "spin_boson_biased": dict(
        kind="spin_boson", epsilon=1.0, delta=1.0, lam=0.25, omega_c=1.0, beta=1.0,
        t_max=12.0, n_times=241,
        shallow=dict(depth=6, n_matsubara=2), deep=dict(depth=9, n_matsubara=4),
        matsubara_check=dict(depth=6, n_matsubara=4),
    ),
    # Hartree atomic units (energies Eh, time a.u.); the cm⁻¹/fs/K inputs are stored alongside
    "sites7": dict(
        kind="sites", h_invcm=_sites7_hamiltonian_invcm(), lam_invcm=35.0, omega_c_invcm=106.0,
        temperature_k=300.0, t_max_fs=1000.0, n_times=201,
        shallow=dict(depth=4, n_matsubara=1), deep=dict(depth=5, n_matsubara=1),
        matsubara_check=dict(depth=4, n_matsubara=2),
    ),
    "sites3": dict(
        kind="sites", h_invcm=_sites3_hamiltonian_invcm(), lam_invcm=50.0, omega_c_invcm=100.0,
        temperature_k=300.0, t_max_fs=500.0, n_times=101,
        shallow=dict(depth=5, n_matsubara=1), deep=dict(depth=7, n_matsubara=2),
        matsubara_check=dict(depth=5, n_matsubara=3),
    ),
}


def case_parameters(name: str) -> dict:
    """Model parameters of case ``name`` in the units used for the QuTiP run and stored in the file.

    Spin-boson: units of Δ. Sites: Hartree atomic units (Eh, a.u. time), β in 1/Eh.
    """
    c = CASES[name]
    if c["kind"] == "spin_boson":
        p = {k: c[k] for k in ("epsilon", "delta", "lam", "omega_c", "beta")}
        p["times"] = np.linspace(0.0, c["t_max"], c["n_times"])
        return p
    h = c["h_invcm"] * HARTREE_PER_INVCM
    return dict(
        h_sys=h, lam=c["lam_invcm"] * HARTREE_PER_INVCM, omega_c=c["omega_c_invcm"] * HARTREE_PER_INVCM,
        beta=1.0 / (KB_IN_HARTREE_PER_K * c["temperature_k"]),
        times=np.linspace(0.0, c["t_max_fs"] * AUT_PER_FS, c["n_times"]),
    )


# ------------------------------------------------------------------------------------------------
# HEOM runs
# ------------------------------------------------------------------------------------------------
def debye_bath(coupling_op: qutip.Qobj, lam: float, omega_c: float, beta: float, n_matsubara: int,
               tag: str | None = None):
    """QuTiP Drude-Lorentz bath for our J(ω) = 2λωω_c/(ω²+ω_c²) coupled as coupling_op ⊗ Σ_j c_j Q_j.

    Returns (bath, terminator Liouvillian) — the terminator is QuTiP's Matsubara terminator (the
    low-temperature correction for the truncated Matsubara tail).
    """
    bath = DrudeLorentzBath(coupling_op, lam=lam, gamma=omega_c, T=1.0 / beta, Nk=n_matsubara, tag=tag)
    _, terminator = bath.terminator()
    return bath, terminator


def run_heom(h_sys: np.ndarray, coupling_ops: list[np.ndarray], lam: float, omega_c: float, beta: float,
             depth: int, n_matsubara: int, times: np.ndarray, e_ops: list[np.ndarray]) -> np.ndarray:
    """Expectation values ⟨e_op⟩(t), shape (len(e_ops), len(times)), system starting in state 1 (index 0)."""
    dim = h_sys.shape[0]
    h = qutip.Qobj(h_sys)
    liouvillian = qutip.liouvillian(h)
    baths = []
    for k, op in enumerate(coupling_ops):
        bath, term = debye_bath(qutip.Qobj(op), lam, omega_c, beta, n_matsubara, tag=f"bath{k}")
        baths.append(bath)
        liouvillian = liouvillian + term
    solver = HEOMSolver(liouvillian, baths, max_depth=depth, options=ODE_OPTIONS)
    rho0 = qutip.fock_dm(dim, 0)
    result = solver.run(rho0, times, e_ops=[qutip.Qobj(e) for e in e_ops])
    return np.real(np.array(result.expect))


def spin_boson_operators(epsilon: float, delta: float) -> tuple[np.ndarray, np.ndarray]:
    """(H_sys = ε σz + Δ σx, σz) with σz = diag(1, −1)."""
    sz = np.diag([1.0, -1.0])
    sx = np.array([[0.0, 1.0], [1.0, 0.0]])
    return epsilon * sz + delta * sx, sz


def run_case(name: str, settings: dict, t_max: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Run case ``name`` with ``settings`` = {depth, n_matsubara}; optionally only up to ``t_max``.

    Returns (times, observables): spin-boson ⟨σz⟩(t) shape (n_t,), sites populations shape (n_t, 7).
    """
    c = CASES[name]
    p = case_parameters(name)
    times = p["times"] if t_max is None else p["times"][p["times"] <= t_max + 1e-12]
    if c["kind"] == "spin_boson":
        h, sz = spin_boson_operators(p["epsilon"], p["delta"])
        obs = run_heom(h, [sz], p["lam"], p["omega_c"], p["beta"], settings["depth"],
                       settings["n_matsubara"], times, [sz])[0]
    else:
        n = p["h_sys"].shape[0]
        projectors = [np.diag(np.eye(n)[k]) for k in range(n)]
        obs = run_heom(p["h_sys"], projectors, p["lam"], p["omega_c"], p["beta"], settings["depth"],
                       settings["n_matsubara"], times, projectors).T
    return times, obs


# ------------------------------------------------------------------------------------------------
# Normalisation checks
# ------------------------------------------------------------------------------------------------
def discretised_debye_correlation(lam: float, omega_c: float, beta: float, times: np.ndarray,
                                  d_omega_per_wc: float = 0.004, omega_max_per_wc: float = 500.0) -> np.ndarray:
    """C(t) = Σ_j c_j²/(2ω_j)[coth(βω_j/2) cos ω_j t − i sin ω_j t] of X = Σ_j c_j Q_j.

    Modes from the docs/theory.md#spin-boson-model general rule c_j² = (2/π) ω_j J(ω_j)/ρ(ω_j) with a uniform density
    ρ = 1/dω (ω_j = (j − ½)dω up to ω_max), so the sum is a Riemann sum valid for t ≪ 2π/dω; the
    neglected tail ω > ω_max contributes ≲ 2λω_c/(π ω_max t).
    """
    d_omega = d_omega_per_wc * omega_c
    w = (np.arange(int(omega_max_per_wc / d_omega_per_wc)) + 0.5) * d_omega
    j_ours = 2 * lam * w * omega_c / (w**2 + omega_c**2)
    c2 = (2 / np.pi) * w * j_ours * d_omega
    amp = c2 / (2 * w)
    coth = 1.0 / np.tanh(beta * w / 2)
    out = np.empty(times.shape, dtype=complex)
    for k, t in enumerate(times):
        out[k] = np.sum(amp * (coth * np.cos(w * t) - 1j * np.sin(w * t)))
    return out


def check_correlation_normalisation(lam: float, omega_c: float, beta: float, times: np.ndarray) -> dict:
    """Max |C_QuTiP(t) − C_ours(t)| / (λω_c) over ``times`` with ω_c t ≥ 0.5 (Re C diverges as t → 0).

    Also the ratio J_QuTiP(ω)/J_ours(ω) − 1 at ω/ω_c = 0.3, 1, 3.
    """
    t = times[times * omega_c >= 0.5]
    env = DrudeLorentzEnvironment(T=1.0 / beta, lam=lam, gamma=omega_c, Nk=200)
    c_qutip = np.asarray(env.correlation_function(t), dtype=complex)
    c_ours = discretised_debye_correlation(lam, omega_c, beta, t)
    w = np.array([0.3, 1.0, 3.0]) * omega_c
    j_ratio = env.spectral_density(w) / (2 * lam * w * omega_c / (w**2 + omega_c**2))
    return dict(corr_max_rel_dev=float(np.max(np.abs(c_qutip - c_ours)) / (lam * omega_c)),
                spectral_density_ratio_minus_1=float(np.max(np.abs(j_ratio - 1.0))))


def check_single_mode_coupling(epsilon: float = 0.5, delta: float = 1.0, omega: float = 1.3, c: float = 0.6,
                               beta: float = 2.0, t_max: float = 6.0, depth: int = 14,
                               n_fock: int = 30, c_exact: float | None = None) -> float:
    """Max |⟨σz⟩_HEOM − ⟨σz⟩_exact| for one undamped mode ω with coupling c Q σz (Q mass-weighted).

    HEOM bath: C(t) = c²/(2ω)[coth(βω/2) cos ωt − i sin ωt] as exponents ±iω.  Exact: spin ⊗ Fock
    Liouville–von Neumann evolution with Q = (a + a†)/√(2ω), oscillator initially thermal.
    ``c_exact`` (default ``c``) lets the exact run use another coupling (sensitivity check).
    """
    h_sys, sz = spin_boson_operators(epsilon, delta)
    times = np.linspace(0.0, t_max, 121)
    amp = c**2 / (2 * omega)
    coth = 1.0 / np.tanh(beta * omega / 2)
    bath = BosonicBath(qutip.Qobj(sz), ck_real=[amp * coth / 2, amp * coth / 2], vk_real=[1j * omega, -1j * omega],
                       ck_imag=[1j * amp / 2, -1j * amp / 2], vk_imag=[-1j * omega, 1j * omega])
    solver = HEOMSolver(qutip.Qobj(h_sys), [bath], max_depth=depth, options=ODE_OPTIONS)
    heom = np.real(solver.run(qutip.fock_dm(2, 0), times, e_ops=[qutip.Qobj(sz)]).expect[0])

    a = qutip.destroy(n_fock)
    q = (a + a.dag()) / np.sqrt(2 * omega)
    s_z = qutip.Qobj(sz)
    h_full = qutip.tensor(qutip.Qobj(h_sys), qutip.qeye(n_fock)) + omega * qutip.tensor(qutip.qeye(2), a.dag() * a) \
        + (c if c_exact is None else c_exact) * qutip.tensor(s_z, q)
    rho0 = qutip.tensor(qutip.fock_dm(2, 0), qutip.thermal_dm(n_fock, 1.0 / np.expm1(beta * omega)))
    exact = qutip.mesolve(h_full, rho0, times, e_ops=[qutip.tensor(s_z, qutip.qeye(n_fock))],
                          options={"atol": 1e-10, "rtol": 1e-8, "progress_bar": False}).expect[0]
    return float(np.max(np.abs(heom - np.real(exact))))


# ------------------------------------------------------------------------------------------------
# Output
# ------------------------------------------------------------------------------------------------
def write_npz_atomic(path: Path, **arrays) -> None:
    """np.savez_compressed to ``path`` via ``path.tmp`` + fsync + os.replace."""
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as fh:
        np.savez_compressed(fh, **arrays)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def generate(name: str, single_mode_dev: float) -> Path:
    c = CASES[name]
    p = case_parameters(name)
    t0 = time.time()
    times, shallow = run_case(name, c["shallow"])
    t_shallow = time.time() - t0
    t0 = time.time()
    _, deep = run_case(name, c["deep"])
    t_deep = time.time() - t0
    dev = float(np.max(np.abs(deep - shallow)))
    t0 = time.time()
    _, mats = run_case(name, c["matsubara_check"])
    t_mats = time.time() - t0
    mats_dev = float(np.max(np.abs(mats - shallow)))
    norm = check_correlation_normalisation(p["lam"], p["omega_c"], p["beta"], times)
    obs_name = "sigma_z" if c["kind"] == "spin_boson" else "populations"
    meta = dict(
        citation=CITATION, conventions=CONVENTIONS, qutip_version=qutip.__version__,
        units=("energies and times in units of Delta and 1/Delta (hbar=1)" if c["kind"] == "spin_boson"
               else "Hartree atomic units: energies Eh, times a.u. (input given in cm^-1, fs, K)"),
        observable=obs_name, shallow=c["shallow"], deep=c["deep"], stored="deep",
        terminator=True, ode_options={k: v for k, v in ODE_OPTIONS.items() if k != "progress_bar"},
        matsubara_check=c["matsubara_check"], matsubara_deviation=mats_dev,
        convergence_deviation=dev, runtime_s=dict(shallow=t_shallow, deep=t_deep, matsubara_check=t_mats),
        normalisation_check=dict(norm, single_mode_heom_vs_exact=single_mode_dev),
        regenerate="OMP_NUM_THREADS=1 python tests/reference/make_heom_reference.py --case " + name,
    )
    arrays = dict(times=times, convergence_deviation=np.float64(dev), matsubara_deviation=np.float64(mats_dev),
                  metadata=np.array(json.dumps(meta)),
                  lam=np.float64(p["lam"]), omega_c=np.float64(p["omega_c"]), beta=np.float64(p["beta"]),
                  depth=np.int64(c["deep"]["depth"]), n_matsubara=np.int64(c["deep"]["n_matsubara"]),
                  shallow_depth=np.int64(c["shallow"]["depth"]),
                  shallow_n_matsubara=np.int64(c["shallow"]["n_matsubara"]))
    arrays[obs_name] = deep
    arrays[obs_name + "_shallow"] = shallow
    if c["kind"] == "spin_boson":
        arrays.update(epsilon=np.float64(p["epsilon"]), delta=np.float64(p["delta"]))
    else:
        arrays.update(h_sys=p["h_sys"], h_sys_invcm=c["h_invcm"], lam_invcm=np.float64(c["lam_invcm"]),
                      omega_c_invcm=np.float64(c["omega_c_invcm"]),
                      temperature_k=np.float64(c["temperature_k"]), times_fs=times / AUT_PER_FS)
    path = DATA_DIR / f"heom_{name}.npz"
    write_npz_atomic(path, **arrays)
    print(f"{name}: wrote {path.name}; convergence deviation {dev:.2e}; runtimes shallow {t_shallow:.1f} s, "
          f"deep {t_deep:.1f} s; Matsubara deviation {mats_dev:.2e}; C(t) rel. dev {norm['corr_max_rel_dev']:.1e}", flush=True)
    return path


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", choices=sorted(CASES), action="append",
                        help="case to regenerate (repeatable; default: all)")
    args = parser.parse_args(argv)
    t0 = time.time()
    single_mode_dev = check_single_mode_coupling()
    print(f"single-mode HEOM vs exact spin-oscillator: max |d<sz>| = {single_mode_dev:.2e} "
          f"({time.time() - t0:.1f} s)", flush=True)
    for name in args.case or list(CASES):
        generate(name, single_mode_dev)
    return 0


if __name__ == "__main__":
    sys.exit(main())
