"""Exact scattering reference data for the built-in 1D benchmarks (used by ``mapdyn validate``).

Method: split-operator FFT wavepacket propagation with absorbing layers, ``mapdyn.validation.exact.exact_scattering``
(checked against scipy's expm_multiply on the same grid Hamiltonian and against Landau–Zener in
tests/test_exact.py).  Models: J. C. Tully, J. Chem. Phys. 93, 1061 (1990) (models 1–3) and the wide
linear crossing of docs/theory.md#validation-benchmarks (``WideLinearCrossing``), all with mass 2000 a.u.

Regenerate (deterministic, about two minutes on one core)::

    OMP_NUM_THREADS=1 python tests/reference/make_exact_scattering.py

writes ``src/mapdyn/data/exact_scattering.npz`` atomically.  Every case is also run through
``mapdyn.validation.exact.check_convergence`` (1.5× finer grid, larger box with longer absorbers, half the time
step); the largest change of any channel probability is stored as ``convergence_deviation``.

Conventions: packet ψ ∝ exp[−(x−x0)²/(4σ²) + ik(x−x0)] on the lower adiabat, σ = ``position_width``
(Bohr; Tully models σ = 20/k, wide crossing σ = 5), k = ``momentum`` (a.u.), x0 = ``position`` (Bohr).
``transmission``/``reflection`` (case, adiabatic state) are probabilities per adiabatic state
(0 = lower) on the far / near side of the interaction region.  For the wide crossing the
Landau–Zener probability of staying diabatic (= transmission on the upper adiabat) averaged over
the packet's momentum distribution is stored as ``landau_zener`` (NaN for the Tully models).
"""
from __future__ import annotations

import json
import math
import os
import sys
import time
from pathlib import Path

import numpy as np

from mapdyn.models.tully import tully_model
from mapdyn.validation.exact import ExactSettings, check_convergence

OUT = Path(__file__).resolve().parents[2] / "src" / "mapdyn" / "data" / "exact_scattering.npz"
START = {"tully1": -12.0, "tully2": -16.0, "tully3": -15.0, "wide_crossing": -85.0}
TULLY_MOMENTA = {"tully1": (10.0, 13.0, 16.0, 20.0, 25.0, 30.0), "tully2": (16.0, 20.0, 25.0, 30.0, 40.0),
                 "tully3": (5.0, 10.0, 12.0, 15.0, 20.0, 25.0, 30.0)}
WIDE_CROSSING_SPEEDS = (0.015, 0.02, 0.03)  # speed at the crossing, a.u.
WIDE_WIDTH = 5.0
MASS, LZ_COUPLING, LZ_SLOPE = 2000.0, 0.003, 0.01


def wide_crossing_momentum(speed: float) -> float:
    """Initial k giving speed ``speed`` at the crossing, where the diabatic energy is 0 (a.u.)."""
    E0 = float(tully_model("wide_crossing").adiabatic(np.array([[START["wide_crossing"]]]))[0][0, 0])
    return math.sqrt(2 * MASS * (0.5 * MASS * speed ** 2 - E0))


def landau_zener_average(k: float, sigma: float) -> float:
    """exp(−2π C²/(v ΔF)) (Landau 1932; Zener 1932) averaged over the packet's momentum density."""
    E0 = float(tully_model("wide_crossing").adiabatic(np.array([[START["wide_crossing"]]]))[0][0, 0])
    sP = 0.5 / sigma
    p = k + sP * np.linspace(-7, 7, 281)
    w = np.exp(-0.5 * ((p - k) / sP) ** 2)
    v = np.sqrt(2.0 * (p * p / (2 * MASS) + E0) / MASS)
    return float(np.sum(w * np.exp(-2 * np.pi * LZ_COUPLING ** 2 / (v * LZ_SLOPE))) / w.sum())


def cases():
    for name, ks in TULLY_MOMENTA.items():
        for k in ks:
            yield name, k, START[name], 20.0 / k
    for v in WIDE_CROSSING_SPEEDS:
        yield "wide_crossing", wide_crossing_momentum(v), START["wide_crossing"], WIDE_WIDTH


def main() -> int:
    settings = ExactSettings()
    rows = []
    for name, k, x0, sigma in cases():
        t0 = time.time()
        rep = check_convergence(tully_model(name), k, x0, sigma, initial_state=0, settings=settings)
        r = rep.base
        g = r.details["grid"]
        lz = landau_zener_average(k, sigma) if name == "wide_crossing" else math.nan
        rows.append(dict(model=name, momentum=k, position=x0, position_width=sigma, T=r.transmission, R=r.reflection,
                         region=r.details["interaction_region"], lower=g.lower[0], upper=g.upper[0], n=g.npoints[0],
                         dt=r.details["dt"], residual=r.details["residual_inside"], dev=rep.max_deviation, lz=lz))
        print(f"{name:14s} k={k:7.3f}  T={np.round(r.transmission, 5)}  R={np.round(r.reflection, 5)}  "
              f"conv={rep.max_deviation:.1e}  ({time.time() - t0:.1f} s)", flush=True)
    meta = {
        "source": "mapdyn.validation.exact.exact_scattering via tests/reference/make_exact_scattering.py",
        "models": "J. C. Tully, J. Chem. Phys. 93, 1061 (1990); wide linear crossing of docs/theory.md#validation-benchmarks; mass 2000",
        "wavepacket": "psi ~ exp[-(x-x0)^2/(4 sigma^2) + i k (x-x0)] on the lower adiabat; initial_state 0",
        "units": "Hartree atomic units (Bohr, a.u. momentum, a.u. time, Eh)",
        "absorber": {"length": float(settings.absorber.lengths(1)[0]), "strength": settings.absorber.strength,
                     "form": "W = strength*(depth/length)^2"},
        "margin": settings.margin, "tolerance": settings.tolerance, "momentum_margin": settings.momentum_margin,
        "landau_zener": "exp(-2 pi C^2/(v dF)), C = 0.003, dF = 0.01, averaged over the momentum density",
    }
    arrays = {
        "model": np.array([r["model"] for r in rows]),
        "momentum": np.array([r["momentum"] for r in rows]),
        "position": np.array([r["position"] for r in rows]),
        "position_width": np.array([r["position_width"] for r in rows]),
        "initial_state": np.zeros(len(rows), dtype=int),
        "transmission": np.array([r["T"] for r in rows]),
        "reflection": np.array([r["R"] for r in rows]),
        "interaction_region": np.array([r["region"] for r in rows]),
        "grid_lower": np.array([r["lower"] for r in rows]),
        "grid_upper": np.array([r["upper"] for r in rows]),
        "grid_npoints": np.array([r["n"] for r in rows]),
        "dt": np.array([r["dt"] for r in rows]),
        "residual_inside": np.array([r["residual"] for r in rows]),
        "convergence_deviation": np.array([r["dev"] for r in rows]),
        "landau_zener": np.array([r["lz"] for r in rows]),
        "metadata": np.array(json.dumps(meta)),
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    tmp = OUT.with_suffix(".npz.tmp")
    with open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, OUT)
    print(f"wrote {OUT}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
