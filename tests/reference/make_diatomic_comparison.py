"""Exact wavepacket vs SQC vs Ehrenfest on SA-CASSCF potentials of KCl (ionic–covalent crossing).

Scenario: SA-2 CASSCF(2,2)/6-31G on K–Cl (σ active space: Cl 3pσ and K 4s), 85 bond lengths from
4 to 40 Bohr (0.1 Bohr around the avoided crossing near 16 Bohr).  The v = 0 packet of the ionic
ground state (harmonic width at r_e) is lifted vertically onto the second adiabat (covalent at
short range, zero momentum, J = 0).  It runs out to the crossing, where it either stays adiabatic
(becomes ionic: bound by the Coulomb tail, comes back) or hops to the ground adiabat (neutral
K + Cl, dissociates).  We compare the upper-adiabat population P_2(t) from
(a) the exact grid wavepacket (mapdyn.validation.exact) and (b) SQC (square and triangle windows, symmetrized
zero point) and Ehrenfest on the ADT-diabatized model (mapdyn.validation.diatomic.DiatomicModel).

Usage (from the repository root):
    OMP_NUM_THREADS=1 python tests/reference/make_diatomic_comparison.py [--study DIR] [--rescan]
        [--ntraj N] [--seed S] [--update-package-data]

The grid is cached in DIR/diatomic_grid.npz (computed with PySCF when absent or with --rescan,
reloaded otherwise); --update-package-data copies it and the exact reference into src/mapdyn/data/.
Writes examples/figures/diatomic_comparison.png, examples/figures/diatomic_table.md and
DIR/comparison.npz.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np
from ase import units

from mapdyn.core.options import MethodOptions
from mapdyn.validation.diatomic import (
    KCL_SCAN,
    DiatomicGrid,
    DiatomicModel,
    kcl_scan_distances,
    packaged_grid_path,
    photoexcitation_scenario,
    run_exact_photoexcitation,
    run_mapping_photoexcitation,
    scan_diatomic,
)

AU_TIME_IN_FS = units.AUT / units.fs  # one atomic unit of time in fs (ase.units)
EV = units.Hartree  # eV per Eh (ase.units)
ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))
FIG = os.path.join(ROOT, "examples", "figures", "diatomic_comparison.png")
TABLE = os.path.join(ROOT, "examples", "figures", "diatomic_table.md")
REFERENCE = os.path.join(ROOT, "src", "mapdyn", "data", "diatomic_reference.json")

METHODS = {"SQC square": MethodOptions("sqc", "square", "symmetrized"),
           "SQC triangle": MethodOptions("sqc", "triangle", "symmetrized"),
           "Ehrenfest": MethodOptions("ehrenfest")}


def atomic_write_text(path: str, text: str) -> None:
    tmp = path + ".tmp"
    with open(tmp, "w") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def get_grid(study: str, rescan: bool) -> tuple[DiatomicGrid, float]:
    path = os.path.join(study, "diatomic_grid.npz")
    if os.path.exists(path) and not rescan:
        return DiatomicGrid.load(path), 0.0
    t0 = time.perf_counter()
    grid = scan_diatomic(KCL_SCAN["symbols"], kcl_scan_distances(), basis=KCL_SCAN["basis"], ncas=KCL_SCAN["ncas"],
                         nelecas=KCL_SCAN["nelecas"], cas_orbitals=KCL_SCAN["cas_orbitals"],
                         start_distance=KCL_SCAN["start_distance"],
                         progress=lambda i, n, r, s: print(f"  scan {i + 1}/{n}: r = {r:.2f} Bohr, {s:.1f} s", flush=True))
    grid.save(path)
    again = DiatomicGrid.load(path)
    assert again.equals(grid), "cached grid does not reload identically"
    return grid, time.perf_counter() - t0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--study", default=os.path.join(ROOT, "study_diatomic_kcl"))
    ap.add_argument("--rescan", action="store_true")
    ap.add_argument("--ntraj", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=20261202)
    ap.add_argument("--t-final", type=float, default=90000.0)
    ap.add_argument("--update-package-data", action="store_true")
    args = ap.parse_args(argv)
    os.makedirs(args.study, exist_ok=True)

    grid, scan_seconds = get_grid(args.study, args.rescan)
    print(f"grid: {grid.distances.size} points, {grid.distances[0]}–{grid.distances[-1]} Bohr, "
          f"SA-CASSCF time {grid.seconds.sum():.0f} s (this run: {scan_seconds:.0f} s)")
    model = DiatomicModel(grid)
    sc = photoexcitation_scenario(model, t_final=args.t_final)
    print(f"scenario: r0 = {sc.position:.4f} Bohr, sigma_r = {sc.position_width:.4f} Bohr, mass {model.masses[0]:.1f} m_e")

    t0 = time.perf_counter()
    exact = run_exact_photoexcitation(model, sc, dt=2.0, spacing=0.0225)
    t_exact = time.perf_counter() - t0
    exact2 = run_exact_photoexcitation(model, sc, dt=1.0, spacing=0.018)
    conv = float(np.max(np.abs(exact.populations - exact2.populations)))
    print(f"exact: {t_exact:.0f} s, {exact.details['npoints']} points, norm error {exact.details['norm_error']:.1e}, "
          f"convergence (dt 2→1 a.u., dx 0.0225→0.018 Bohr) max |ΔP| = {conv:.1e}")

    runs = {}
    for name, opt in METHODS.items():
        t0 = time.perf_counter()
        runs[name] = run_mapping_photoexcitation(model, sc, opt, args.ntraj, args.seed, dt=10.0)
        print(f"{name}: {time.perf_counter() - t0:.0f} s, max energy drift {runs[name].details['max_energy_drift']:.1e} Eh")

    times = exact.times
    # table times: every 5000 a.u. plus the end
    table_times = [float(t) for t in np.arange(10000.0, args.t_final + 1, 10000.0)]
    idx = [int(np.argmin(np.abs(times - t))) for t in table_times]
    lines = ["| t (fs) | t (a.u.) | exact P2 | SQC square | SQC triangle | Ehrenfest |",
             "|---:|---:|---:|---:|---:|---:|"]
    fs = AU_TIME_IN_FS
    for t, i in zip(table_times, idx):
        row = [f"{t * fs:.0f}", f"{t:.0f}", f"{exact.populations[i, 1]:.3f}"]
        for name in METHODS:
            p, e = runs[name].populations[i, 1], runs[name].errors[i, 1]
            row.append(f"{p:.3f} ± {e:.3f} ({p - exact.populations[i, 1]:+.3f})")
        lines.append("| " + " | ".join(row) + " |")
    # first-pass transition probability: population moved to the ground adiabat once the packet has
    # crossed outward, before the bound part returns (t = 30000 a.u., exact P2 flat from 14000 to 48000)
    i1 = int(np.argmin(np.abs(times - 30000.0)))
    hop = {"exact": 1.0 - exact.populations[i1, 1]}
    lines.append("")
    lines.append("| first outward pass (t = 30000 a.u.) | exact | SQC square | SQC triangle | Ehrenfest |")
    lines.append("|---|---:|---:|---:|---:|")
    row = [f"{hop['exact']:.3f}"]
    for name in METHODS:
        p, e = 1.0 - runs[name].populations[i1, 1], runs[name].errors[i1, 1]
        hop[name] = p
        row.append(f"{p:.3f} ± {e:.3f} ({p - hop['exact']:+.3f})")
    lines.append("| transition probability to the ground adiabat | " + " | ".join(row) + " |")
    summary = {}
    for name in METHODS:
        d = runs[name].populations[:, 1] - exact.populations[:, 1]
        summary[name] = {"max_abs_difference": float(np.max(np.abs(d))),
                         "mean_abs_difference": float(np.mean(np.abs(d))),
                         "final_difference": float(d[-1]), "final_error": float(runs[name].errors[-1, 1])}
    lines.append("")
    lines.append("| method | max abs(ΔP2) over t | mean abs(ΔP2) | final ΔP2 ± s.e. |")
    lines.append("|---|---:|---:|---:|")
    for name, s in summary.items():
        lines.append(f"| {name} | {s['max_abs_difference']:.3f} | {s['mean_abs_difference']:.3f} | "
                     f"{s['final_difference']:+.3f} ± {s['final_error']:.3f} |")
    header = (f"KCl, SA-2 CASSCF(2,2)/6-31G, {grid.distances.size}-point scan; vertical excitation of the v = 0 packet "
              f"(r0 = {sc.position:.3f} Bohr, σ = {sc.position_width:.4f} Bohr, J = 0) to the 2nd adiabat. "
              f"P2 = population of the upper adiabat (exact: on-grid + absorbed). Mapping: {args.ntraj} trajectories, "
              f"seed {args.seed}, dt 10 a.u.; ± = one standard error; (·) = method − exact. "
              f"Exact grid convergence max |ΔP| = {conv:.1e}.\n\n")
    atomic_write_text(TABLE, header + "\n".join(lines) + "\n")
    print(header + "\n".join(lines))

    np.savez_compressed(os.path.join(args.study, "comparison.npz"), times=times, exact=exact.populations,
                        exact_mean_r=exact.mean_position,
                        **{name.replace(" ", "_"): runs[name].populations for name in METHODS},
                        **{name.replace(" ", "_") + "_err": runs[name].errors for name in METHODS})
    make_figure(grid, model, sc, exact, runs)
    ref = {"scenario": {"position": sc.position, "position_width": sc.position_width,
                        "initial_state": sc.initial_state, "momentum": sc.momentum, "t_final": sc.t_final,
                        "record_interval": sc.record_interval},
           "first_pass_time": 30000.0, "exact_first_pass_transition": float(hop["exact"]),
           "table_times": table_times, "exact_upper_population": [float(exact.populations[i, 1]) for i in idx],
           "exact_convergence": conv, "mapping_dt": 10.0,
           "mapping": {name: {"options": METHODS[name].describe(), "ntraj": args.ntraj, "seed": args.seed,
                              "upper_population": [float(runs[name].populations[i, 1]) for i in idx],
                              "standard_error": [float(runs[name].errors[i, 1]) for i in idx]}
                       for name in METHODS},
           "source": "tests/reference/make_diatomic_comparison.py"}
    if args.update_package_data:
        shutil.copyfile(os.path.join(args.study, "diatomic_grid.npz"), packaged_grid_path() + ".tmp")
        os.replace(packaged_grid_path() + ".tmp", packaged_grid_path())
        atomic_write_text(REFERENCE, json.dumps(ref, indent=1) + "\n")
        print(f"wrote {packaged_grid_path()} and {REFERENCE}")
    return 0


def make_figure(grid, model, sc, exact, runs) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fs = AU_TIME_IN_FS
    fig, axes = plt.subplots(1, 3, figsize=(15, 4.6))
    ax = axes[0]
    r = np.linspace(4.0, 40.0, 1800)
    E, _ = model.adiabatic(r[:, None])
    H = model.hamiltonian(r[:, None])
    e0 = grid.energies[-1, 0]
    ev = EV
    ax.plot(r, (E[:, 0] - e0) * ev, "k", lw=1.6, label="adiabats (spline)")
    ax.plot(r, (E[:, 1] - e0) * ev, "k", lw=1.6)
    ax.plot(r, (H[:, 0, 0] - e0) * ev, "C0--", lw=1, label="ADT diabat 1 (K + Cl at large r)")
    ax.plot(r, (H[:, 1, 1] - e0) * ev, "C3--", lw=1, label="ADT diabat 2 (K⁺Cl⁻ at large r)")
    ax.plot(grid.distances, (grid.energies[:, 0] - e0) * ev, "k.", ms=3, label="SA-CASSCF points")
    ax.plot(grid.distances, (grid.energies[:, 1] - e0) * ev, "k.", ms=3)
    ax.axvline(sc.position, color="0.6", lw=0.8)
    ax.set_ylim(-3.5, 3.5)
    ax.set_xlabel("r (Bohr)")
    ax.set_ylabel("E − E(K+Cl) (eV)")
    ax.set_title("KCl SA-2 CASSCF(2,2)/6-31G")
    ax2 = ax.twinx()
    ax2.plot(r, model.coupling(r[:, None]), "C2", lw=1)
    ax2.plot(grid.distances, grid.coupling, "C2.", ms=3)
    ax2.set_ylabel("coupling d_r (1/Bohr): model line, SA-CASSCF dots", color="C2")
    ax.legend(loc="lower right", fontsize=7)

    ax = axes[1]
    t = exact.times * fs
    ax.plot(t, exact.populations[:, 1], "k", lw=2, label="exact")
    for (name, run), c in zip(runs.items(), ("C0", "C1", "C3")):
        p, e = run.populations[:, 1], run.errors[:, 1]
        ax.plot(run.times * fs, p, color=c, lw=1.2, label=name)
        ax.fill_between(run.times * fs, p - 2 * e, p + 2 * e, color=c, alpha=0.2, lw=0)
    ax.set_xlabel("t (fs)")
    ax.set_ylabel("upper-adiabat population P2")
    ax.set_title("population of the excited adiabat (bands: ±2 s.e.)")
    ax.legend(fontsize=8)

    ax = axes[2]
    ax.plot(t, exact.mean_position, "k", lw=2, label="exact")
    for (name, run), c in zip(runs.items(), ("C0", "C1", "C3")):
        ax.plot(run.times * fs, run.mean_position, color=c, lw=1, label=name)
    ax.set_xlabel("t (fs)")
    ax.set_ylabel("⟨r⟩ on the upper adiabat (Bohr)")
    ax.set_title("mean bond length of the upper-adiabat part")
    ax.legend(fontsize=8)
    fig.tight_layout()
    tmp = FIG + ".tmp.png"
    fig.savefig(tmp, dpi=110)
    os.replace(tmp, FIG)
    print(f"wrote {FIG}")


if __name__ == "__main__":
    sys.exit(main())
