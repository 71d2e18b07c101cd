"""Why SQC (symmetrized zero point) falls below Marcus in the deep inverted regime of the Marcus study.

Same model, bath sampling, integrator and seed as ``make_marcus_study.py`` (first N trajectories).
Prints, for each driving force and zero-point treatment:
* the fitted forward rate / Marcus rate from the window populations on several time segments
  (observation-time check) and from the window-free donor population ⟨ρ_11⟩ = ⟨e_1 − γ_1⟩;
* at t_end, the fraction of trajectories that moved more than 0.25 of action from donor to acceptor
  (δ = ½Δ(e_2 − e_1)) and where those trajectories are read: acceptor window, donor window, no window.

    OMP_NUM_THREADS=1 python tests/reference/marcus_inverted_diagnostics.py [--ntraj 2000 --t-end 600]
(about one minute per driving force and treatment on one core).  Numbers are in docs/theory.md#marcus-inverted-regime.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import make_marcus_study as ms  # noqa: E402

from mapdyn.core.harmonic_bath import HarmonicBathIntegrator  # noqa: E402
from mapdyn.core.mapping import zero_point_parameters  # noqa: E402
from mapdyn.core.windows import window_assignment  # noqa: E402
from mapdyn.models.spin_boson import thermal_bath_ensemble  # noqa: E402

SEGMENTS = ((10.0, 100.0), (100.0, 200.0), (200.0, 300.0), (300.0, 600.0), (10.0, 300.0))


def fit_segment(times, pop, minus_dG, t0, t1):
    ratio = np.exp(-ms.BETA * minus_dG)
    p_eq = ratio / (1.0 + ratio)
    sel = (times >= t0) & (times <= t1)
    y = (pop[sel] - p_eq) / (1.0 - p_eq)
    if sel.sum() < 3 or np.any(y <= 0):
        return float("nan")
    return float(np.polyfit(times[sel], -np.log(y), 1)[0] / (1.0 + ratio))


def diagnose(minus_dG: float, method: str, ntraj: int, t_end: float) -> str:
    model, options = ms.make_model(minus_dG), ms.METHODS[method]
    st = thermal_bath_ensemble(model, ntraj, ms.SEED, ms.BETA, 0, options, bath_center="donor")
    gamma_adj = getattr(st, "gamma_adjusted", None)
    e0 = 0.5 * (st.x ** 2 + st.p ** 2)
    integ = HarmonicBathIntegrator(model, options, ms.DT)
    every = int(round(ms.RECORD / ms.DT))
    codes, rho11 = [], []
    for i in range(1, int(round(t_end / ms.DT)) + 1):
        integ.step(st)
        if i % every == 0:
            e = 0.5 * (st.x ** 2 + st.p ** 2)
            w = window_assignment(e, options)
            codes.append(np.where(w == 0, 0, np.where(w == 1, 1, -1)).astype(np.int8))
            rho11.append(float((e - zero_point_parameters(st.x, st.p, options, gamma_adj))[:, 0].mean()))
    codes = np.array(codes).T
    times = ms.RECORD * np.arange(1, codes.shape[1] + 1)
    k_m = model.marcus_rate(ms.BETA)
    segs = [s for s in SEGMENTS if s[1] <= t_end]
    r_win = [fit_segment(times, ms.donor_population(codes, method), minus_dG, *s) / k_m for s in segs]
    r_act = [fit_segment(times, np.array(rho11), minus_dG, *s) / k_m for s in segs]
    e = 0.5 * (st.x ** 2 + st.p ** 2)
    moved = 0.5 * ((e[:, 1] - e[:, 0]) - (e0[:, 1] - e0[:, 0])) > 0.25
    w = window_assignment(e, options)
    return (f"-dG = {minus_dG:g} {method}: k/k_Marcus windows {np.round(r_win, 2).tolist()}, "
            f"<rho_11> {np.round(r_act, 2).tolist()} on {segs}; moved > 0.25: {moved.mean():.3f}, of these "
            f"acceptor {np.mean(w[moved] == 1):.2f} / donor {np.mean(w[moved] == 0):.2f} / none {np.mean(w[moved] == -1):.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ntraj", type=int, default=2000)
    ap.add_argument("--t-end", type=float, default=600.0)
    ap.add_argument("--driving", default="8,14,16")
    a = ap.parse_args()
    for x in (float(v) for v in a.driving.split(",")):
        print(f"golden rule / Marcus (discretised bath) at -dG = {x:g}: "
              f"{ms.make_model(x).golden_rule_rate(ms.BETA) / ms.make_model(x).marcus_rate(ms.BETA):.3f}", flush=True)
        for method in ("sqc-triangle-symmetrized", "sqc-triangle-adjusted"):
            print(diagnose(x, method, a.ntraj, a.t_end), flush=True)


if __name__ == "__main__":
    main()
