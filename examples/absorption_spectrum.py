"""Demo (invented scenario): nuclear-ensemble absorption spectrum of gas-phase formaldehyde.

This is a made-up demonstration, not a study of a published system: H2CO at the RHF/6-31G
minimum, 0 K Wigner ensemble from the analytic RHF Hessian, vertical TDA-on-HF (CIS) excitations
at every sampled geometry, and the Gaussian-broadened cross section.  The n→π* band (S1) is
symmetry-forbidden at the planar C2v minimum; in the ensemble it borrows intensity from
out-of-plane and asymmetric distortions, which is what a nuclear-ensemble spectrum shows and a
single-geometry stick spectrum misses.

Steps:
  1. optimise the ground state (ASE BFGS on the backend's state-0 gradient, max |dE/dR| < 1.5e-5 Eh/Bohr);
  2. analytic Hessian (PySCF mf.Hessian()), normal modes with rigid-body motion projected out;
  3. Wigner sampling at T = 0 K, trajectory i from SeedSequence(seed).spawn(n)[i];
  4. TDA excitation energies and transition dipoles at each geometry;
  5. initial states for dynamics in a 9.0–10.8 eV window, one state per geometry drawn with
     probability ∝ f (weights ∝ Σ_window f);
  6. spectrum (Gaussian, FWHM 0.15 eV, cross section in Å²) as .npz data and two PNG figures.

Run:  OMP_NUM_THREADS=1 python examples/absorption_spectrum.py [--samples 200] [--out DIR]
Cost: about 0.4 s per geometry (≈ 1.5 min for 200) on one core (RHF + 4 TDA roots, 6-31G).
"""

from __future__ import annotations

import argparse
import os
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from ase import units  # noqa: E402

from mapdyn.backends.pyscf.tddft import TDDFTBackend  # noqa: E402
from mapdyn.initial.sampling import (check_level_of_theory, compute_hessian, normal_modes,  # noqa: E402
                            optimize_ground_state, sample_wigner)
from mapdyn.initial.excitation import (absorption_spectrum, choose_initial_states,  # noqa: E402
                                       excitation_properties, plot_absorption_spectrum)
from mapdyn.backends.pyscf.ground_state import PySCFGroundState  # noqa: E402

SYMBOLS = ["C", "O", "H", "H"]
#: rough starting geometry (Å), planar, converted to Bohr at this boundary
START_ANGSTROM = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 1.21], [0.0, 0.94, -0.59], [0.0, -0.94, -0.59]])


def _save_npz_atomic(path: str, **arrays) -> None:
    tmp = path + ".tmp"
    with open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=200, help="number of Wigner geometries")
    ap.add_argument("--seed", type=int, default=2026, help="study seed")
    ap.add_argument("--temperature", type=float, default=0.0, help="Wigner temperature, K")
    ap.add_argument("--fwhm", type=float, default=0.15, help="Gaussian FWHM, eV")
    ap.add_argument("--out", default="absorption_spectrum_output", help="output directory")
    args = ap.parse_args()
    os.makedirs(args.out, exist_ok=True)
    t0 = time.time()

    ground = PySCFGroundState(SYMBOLS, "6-31g")
    level = ground.level_of_theory  # "RHF/6-31g"
    opt = optimize_ground_state(ground, SYMBOLS, START_ANGSTROM / units.Bohr, level)
    print(f"optimised {level}: E = {opt.energy_hartree:.8f} Eh, max|grad| = "
          f"{opt.max_gradient_hartree_per_bohr:.2e} Eh/Bohr after {opt.n_steps} BFGS steps")

    hess = compute_hessian(ground, opt.positions_bohr, level)
    modes = normal_modes(hess.hessian, SYMBOLS, opt.positions_bohr, level_of_theory=level)
    print(f"{hess.method} Hessian; {modes.nvib} modes (cm^-1): "
          + " ".join(f"{w:.0f}" for w in modes.frequencies_cm)
          + f"; ZPE = {modes.zero_point_energy_hartree * units.Hartree:.3f} eV")

    # the excited-state backend for the dynamics has the same RHF/6-31G ground state
    excited = TDDFTBackend(SYMBOLS, basis="6-31g", xc=None, method="tda", nstates=5)
    check_level_of_theory(modes.level_of_theory, "RHF/6-31G")

    ens = sample_wigner(modes, args.samples, seed=args.seed, temperature_kelvin=args.temperature)
    props = excitation_properties(excited, ens.positions_bohr)
    ref = excitation_properties(excited, opt.positions_bohr[None])
    print("at the minimum: " + ", ".join(
        f"S{k + 1} {e:.2f} eV f={f:.3g}" for k, (e, f) in
        enumerate(zip(ref.excitation_energies_ev[0], ref.oscillator_strengths[0]))))
    print("ensemble mean f: " + ", ".join(f"S{k + 1} {f:.3g}" for k, f in
                                          enumerate(props.oscillator_strengths.mean(axis=0))))

    window = (9.0, 10.8)
    starts = choose_initial_states(props.excitation_energies_hartree, props.oscillator_strengths,
                                   "energy_range", energy_range_ev=window, seed=args.seed)
    counts = {f"S{s}": int(np.sum(starts.state == s)) for s in np.unique(starts.state)}
    print(f"window {window} eV: {starts.sample_index.size} of {args.samples} geometries start, by state {counts}")

    spec = absorption_spectrum(props.excitation_energies_hartree, props.oscillator_strengths,
                               fwhm_ev=args.fwhm, line_shape="gaussian",
                               energy_ev=np.linspace(2.5, 13.0, 2101))
    band = absorption_spectrum(props.excitation_energies_hartree[:, :1], props.oscillator_strengths[:, :1],
                               fwhm_ev=args.fwhm, line_shape="gaussian", energy_ev=np.linspace(2.5, 6.5, 801))
    tag = f"{args.samples} Wigner geometries at {args.temperature:g} K"
    p1 = plot_absorption_spectrum(
        spec, os.path.join(args.out, "h2co_spectrum.png"), sticks=(props.excitation_energies_hartree,
                                                                  props.oscillator_strengths),
        title=f"demo: H2CO, TDA(HF)/6-31G on {tag}; Gaussian FWHM {args.fwhm:g} eV")
    p2 = plot_absorption_spectrum(
        band, os.path.join(args.out, "h2co_n_pi_star_band.png"),
        sticks=(props.excitation_energies_hartree[:, :1], props.oscillator_strengths[:, :1]),
        title=f"demo: H2CO n→π* band (forbidden at C2v), {tag}")
    _save_npz_atomic(os.path.join(args.out, "h2co_spectrum.npz"),
                     energy_ev=spec.energy_ev, cross_section_angstrom2=spec.cross_section_angstrom2,
                     per_state_cross_section_angstrom2=spec.per_state_cross_section_angstrom2,
                     fwhm_ev=spec.fwhm_ev, excitation_energies_hartree=props.excitation_energies_hartree,
                     oscillator_strengths=props.oscillator_strengths, start_sample_index=starts.sample_index,
                     start_state=starts.state, start_weight=starts.weight)
    print(f"wrote {p1}, {p2} and h2co_spectrum.npz in {time.time() - t0:.0f} s")


if __name__ == "__main__":
    main()
