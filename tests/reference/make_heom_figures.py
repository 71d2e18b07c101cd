"""README figures: exact HEOM vs SQC (square and triangle windows) vs Ehrenfest on the stored cases.

HEOM reference: Y. Tanimura & R. Kubo, J. Phys. Soc. Jpn. 58, 101 (1989), computed with QuTiP by
``make_heom_reference.py``.  Mapping runs: ``mapdyn.validation.heom_cases`` (symmetrized zero point, thermal
Wigner Debye bath, fixed seeds).  Regenerate (a few minutes on one core)::

    OMP_NUM_THREADS=1 python tests/reference/make_heom_figures.py

writes ``examples/figures/heom_spin_boson_symmetric.png``, ``heom_spin_boson_biased.png`` and
``heom_sites7.png`` and prints the maximum deviation of each method from HEOM.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

import mapdyn.validation.heom_cases as cmp  # noqa: E402
from mapdyn.analysis.plots import new_figure, save_figure  # noqa: E402
from mapdyn.core.options import MethodOptions  # noqa: E402

FIG_DIR = Path(__file__).resolve().parents[2] / "examples" / "figures"
AUT_PER_FS = 41.341373335  # a.u. of time per fs (CODATA 2018)
METHODS = {
    "SQC square": MethodOptions(method="sqc", window="square"),
    "SQC triangle": MethodOptions(method="sqc", window="triangle"),
    "Ehrenfest": MethodOptions(method="ehrenfest"),
}
STYLES = {"SQC square": ("#d35400", "--"), "SQC triangle": ("#1f3a93", "-."), "Ehrenfest": ("#566573", ":")}


def spin_boson_figure(name: str, title: str, ntraj: int = 20000) -> dict:
    ref = cmp.load_reference(name)
    devs = {}
    with new_figure() as (fig, axes):
        ax = axes[0, 0]
        ax.plot(ref["times"], ref["sigma_z"], color="black", lw=2.2, label="HEOM (exact)")
        for label, opts in METHODS.items():
            res = cmp.spin_boson_mapping(name, opts, ntraj=ntraj, nmodes=100, dt=0.025, seed=7)
            devs[label] = float(np.max(np.abs(res.sigma_z - ref["sigma_z"])))
            colour, ls = STYLES[label]
            ax.plot(res.times, res.sigma_z, color=colour, ls=ls, label=f"{label} (max |Δ| {devs[label]:.2f})")
        ax.set_xlabel("time / (1/Δ)")
        ax.set_ylabel("⟨σz⟩")
        ax.set_title(title)
        ax.legend(loc="upper right")
        save_figure(fig, FIG_DIR / f"heom_{name}.png")
    return devs


def sites7_figure(ntraj: int = 4000) -> dict:
    ref = cmp.load_reference("sites7")
    t_fs = ref["times"] / AUT_PER_FS
    results = {label: cmp.sites7_mapping(opts, ntraj=ntraj) for label, opts in METHODS.items()}
    devs = {label: float(np.max(np.abs(r.populations - ref["populations"]))) for label, r in results.items()}
    with new_figure(2, 4, figsize=(11.0, 5.2), sharex=True, sharey=True) as (fig, axes):
        for n in range(7):
            ax = axes.flat[n]
            ax.plot(t_fs, ref["populations"][:, n], color="black", lw=2.0)
            for label, r in results.items():
                colour, ls = STYLES[label]
                ax.plot(t_fs, r.populations[:, n], color=colour, ls=ls)
            ax.set_title(f"site {n + 1}")
            if n >= 3:
                ax.set_xlabel("time / fs")
            if n % 4 == 0:
                ax.set_ylabel("population")
        leg = axes.flat[7]
        leg.axis("off")
        leg.plot([], [], color="black", lw=2.0, label="HEOM (exact)")
        for label in results:
            colour, ls = STYLES[label]
            leg.plot([], [], color=colour, ls=ls, label=f"{label} (max |Δ| {devs[label]:.2f})")
        leg.legend(loc="center")
        save_figure(fig, FIG_DIR / "heom_sites7.png")
    return devs


def main() -> int:
    FIG_DIR.mkdir(parents=True, exist_ok=True)
    for name, title in (("spin_boson_symmetric", "Spin-boson, ε = 0, Debye λ = 0.25Δ, ω_c = Δ, β = 1/Δ"),
                        ("spin_boson_biased", "Spin-boson, ε = Δ, Debye λ = 0.25Δ, ω_c = Δ, β = 1/Δ")):
        print(name, {k: round(v, 3) for k, v in spin_boson_figure(name, title).items()}, flush=True)
    print("sites7", {k: round(v, 3) for k, v in sites7_figure().items()}, flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
