"""Electron-transfer rates across the Marcus inverted regime: SQC and Ehrenfest versus Marcus theory.

Model (our own scenario; energies in units of k_BT, ħ = 1, times in ħ/k_BT):
    H = ε σ_z + Δ σ_x + Σ_j [P_j²/2 + ½ω_j²Q_j² + c_j Q_j σ_z]      (σ_z = diag(1, −1), no ½)
    Ohmic bath J(ω) = (π/2) ξ ω e^{−ω/ω_c}, ω_c = 0.25 k_BT (classical bath), 50 modes up to
    ω_max = 6 ω_c, ξ chosen so that λ_M = Σ 2c_j²/ω_j² = 8 k_BT (1 − e^{−6}) ≈ 7.98 k_BT;
    Δ = 0.1 k_BT (nonadiabatic: 2πΔ²/ω_c ≈ 0.25 and Δ ≪ k_BT, λ_M);
    driving force ΔG = −2ε, scanned over −ΔG = 2 … 16 k_BT (normal, activationless at λ_M,
    inverted).  Bath: thermal Wigner at β = 1 centred on the donor minimum Q⁰_j = −c_j/ω_j².
    Electronic: donor state 0 (state 1 in the formulas).

References: the Marcus golden-rule rate k = 2πΔ²(4πλ_M k_BT)^(−1/2) exp[−(ΔG + λ_M)²/(4λ_M k_BT)]
(R. A. Marcus, J. Chem. Phys. 24, 966 (1956)) and the quantum golden-rule rate of the same
discretised bath (:meth:`mapdyn.models.spin_boson.SpinBoson.golden_rule_rate`).

Rates: donor population P_D(t) (SQC windows in the diabatic basis; Ehrenfest: mean action) recorded
every 2 ħ/k_BT; with detailed balance k_b = k_f e^{βΔG}, P_D − P_eq = (1 − P_eq) e^{−(k_f+k_b) t},
P_eq = e^{βΔG}/(1 + e^{βΔG}); k_f from a straight-line fit of −ln[(P_D − P_eq)/(1 − P_eq)] against t
for t ≥ 10 ħ/k_BT (after the initial electronic transient); uncertainty = standard deviation over
200 bootstrap resamples of the trajectories.

Writes, atomically, examples/figures/marcus_rates.csv and examples/figures/marcus_rates.png.

    python tests/reference/make_marcus_study.py [--ntraj 10000 --workers 2]   (≈ 20–40 min on 2 cores)
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import io  # noqa: E402
import time  # noqa: E402
from concurrent.futures import ProcessPoolExecutor  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from mapdyn.core.harmonic_bath import HarmonicBathIntegrator  # noqa: E402
from mapdyn.core.options import MethodOptions  # noqa: E402
from mapdyn.core.windows import window_indicators  # noqa: E402
from mapdyn.models.spin_boson import SpinBoson, thermal_bath_ensemble  # noqa: E402

BETA = 1.0
CUTOFF = 0.25
LAMBDA_M_TARGET = 8.0
DELTA = 0.1
NMODES = 50
OMEGA_MAX = 6.0 * CUTOFF
DT = 0.1
RECORD = 2.0
FIT_START = 10.0
SEED = 1956
DRIVING = (2.0, 4.0, 6.0, 8.0, 10.0, 12.0, 14.0, 16.0)  # −ΔG in k_BT
METHODS = {
    "sqc-triangle-symmetrized": MethodOptions(window="triangle", zero_point="symmetrized"),
    "sqc-triangle-adjusted": MethodOptions(window="triangle", zero_point="adjusted"),
    "ehrenfest": MethodOptions(method="ehrenfest"),
}
FIGURES = Path(__file__).resolve().parents[2] / "examples" / "figures"


def make_model(minus_dG: float) -> SpinBoson:
    """Spin-boson of the study at driving force ΔG = −minus_dG (ε = minus_dG/2)."""
    kondo = (LAMBDA_M_TARGET / 4.0) / (CUTOFF / 2.0)  # λ = ξω_c/2 (full integral), λ_M = 4λ
    return SpinBoson.ohmic(0.5 * minus_dG, DELTA, kondo, CUTOFF, NMODES, omega_max=OMEGA_MAX)


def end_time(model: SpinBoson) -> float:
    """Simulated time: about 1.2 Marcus lifetimes, between 100 and 300 ħ/k_BT."""
    return float(np.clip(1.2 / model.marcus_rate(BETA), 100.0, 300.0))


def run_chunk(args):
    """Propagate trajectories [first, first + n); return the donor indicator (SQC: window code
    0 = donor, 1 = acceptor, −1 = none; Ehrenfest: donor action) at each record time."""
    minus_dG, method, first, n, t_end = args
    model, options = make_model(minus_dG), METHODS[method]
    state = thermal_bath_ensemble(model, n, SEED, BETA, 0, options, bath_center="donor", first_index=first)
    integ = HarmonicBathIntegrator(model, options, DT)
    every, nsteps = int(round(RECORD / DT)), int(round(t_end / DT))
    rec = []
    for i in range(1, nsteps + 1):
        integ.step(state)
        if i % every == 0:
            e = 0.5 * (state.x ** 2 + state.p ** 2)
            if options.method == "ehrenfest":
                rec.append((e[:, 0] / e.sum(axis=1)).astype(np.float32))
            else:
                ind = window_indicators(e, options)
                code = np.where(ind[:, 0], 0, np.where(ind[:, 1], 1, -1)).astype(np.int8)
                rec.append(code)
    return np.array(rec).T  # (n, T)


def donor_population(records: np.ndarray, method: str) -> np.ndarray:
    """P_D(t) from per-trajectory records (n, T): SQC N_D/(N_D + N_A); Ehrenfest mean action."""
    if method == "ehrenfest":
        return records.mean(axis=0)
    nd = (records == 0).sum(axis=0)
    na = (records == 1).sum(axis=0)
    return nd / np.maximum(nd + na, 1)


def fit_forward_rate(times: np.ndarray, pop: np.ndarray, minus_dG: float, t_start: float = FIT_START) -> float:
    """k_f from P_D − P_eq = (1 − P_eq) e^{−(k_f + k_b) t}, k_b = k_f e^{−β(−ΔG)} (see module docstring)."""
    ratio = np.exp(-BETA * minus_dG)
    p_eq = ratio / (1.0 + ratio)
    sel = times >= t_start
    y = (pop[sel] - p_eq) / (1.0 - p_eq)
    if np.any(y <= 0):
        return float("nan")
    slope = np.polyfit(times[sel], -np.log(y), 1)[0]
    return float(slope / (1.0 + ratio))


def rate_with_error(times, records, method, minus_dG, nboot=200, seed=0):
    """Fitted k_f and its bootstrap standard deviation (resampling trajectories)."""
    k = fit_forward_rate(times, donor_population(records, method), minus_dG)
    rng = np.random.default_rng(seed)
    n = records.shape[0]
    boot = [fit_forward_rate(times, donor_population(records[rng.integers(0, n, n)], method), minus_dG)
            for _ in range(nboot)]
    return k, float(np.nanstd(boot))


def run_point(minus_dG, method, ntraj, chunk, workers, t_end=None, first_index=0):
    """Records (n, T) of trajectories first_index … first_index + ntraj − 1 and the record times."""
    model = make_model(minus_dG)
    t_end = end_time(model) if t_end is None else t_end
    tasks = [(minus_dG, method, first_index + first, min(chunk, ntraj - first), t_end)
             for first in range(0, ntraj, chunk)]
    if workers > 1:
        with ProcessPoolExecutor(workers) as ex:
            parts = list(ex.map(run_chunk, tasks))
    else:
        parts = [run_chunk(t) for t in tasks]
    records = np.concatenate(parts, axis=0)
    times = RECORD * np.arange(1, records.shape[1] + 1)
    return times, records


def _write_atomic(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ntraj", type=int, default=10000)
    ap.add_argument("--chunk", type=int, default=500)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--methods", default=",".join(METHODS))
    ap.add_argument("--plot-only", action="store_true", help="redraw the figure from the written table")
    a = ap.parse_args()
    if a.plot_only:
        rows = read_table()
        plot_rates(rows, [m for m in METHODS if any(r[1] == m for r in rows)])
        return
    methods = a.methods.split(",")
    for m in methods:
        if m not in METHODS:
            raise SystemExit(f"--methods: {m!r} is not one of {', '.join(METHODS)}")
    rows = []
    for x in DRIVING:
        model = make_model(x)
        k_marcus, k_gr = model.marcus_rate(BETA), model.golden_rule_rate(BETA)
        for method in methods:
            t0 = time.time()
            times, rec = run_point(x, method, a.ntraj, a.chunk, a.workers)
            k, dk = rate_with_error(times, rec, method, x)
            rows.append((x, method, k, dk, k_marcus, k_gr, times[-1], a.ntraj))
            print(f"-dG = {x:5.1f}  {method:26s} k = {k:.4e} ± {dk:.1e}  Marcus {k_marcus:.4e}  "
                  f"golden rule {k_gr:.4e}  ratio {k / k_marcus:.2f}  ({time.time() - t0:.0f} s)", flush=True)
    write_table(rows)
    plot_rates(rows, methods)


def write_table(rows) -> None:
    lam_m = make_model(8.0).marcus_reorganization
    header = ("# Marcus study (tests/reference/make_marcus_study.py): energies in k_BT, rates in k_BT/hbar; "
              f"lambda_M = {lam_m:.4f}, Delta = {DELTA}, omega_c = {CUTOFF}, {NMODES} Ohmic modes\n"
              "minus_dG,method,k,k_err,k_marcus,k_golden_rule,t_end,ntraj\n")
    body = "".join(f"{x:g},{m},{k:.6e},{dk:.3e},{km:.6e},{kg:.6e},{te:g},{n}\n" for x, m, k, dk, km, kg, te, n in rows)
    _write_atomic(FIGURES / "marcus_rates.csv", (header + body).encode())


def read_table(path: Path = FIGURES / "marcus_rates.csv"):
    """Rows (−ΔG, method, k, k_err, k_marcus, k_golden_rule, t_end, ntraj) of a written table."""
    rows = []
    with open(path) as fh:
        for line in fh:
            if line.startswith("#") or line.startswith("minus_dG"):
                continue
            x, m, k, dk, km, kg, te, n = line.strip().split(",")
            rows.append((float(x), m, float(k), float(dk), float(km), float(kg), float(te), int(n)))
    return rows


def plot_rates(rows, methods) -> None:
    lam_m = make_model(8.0).marcus_reorganization
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots(figsize=(6.0, 4.2))
    xs = np.linspace(0.0, 18.0, 200)
    ax.semilogy(xs, [make_model(v).marcus_rate(BETA) for v in xs], "k-", label="Marcus (classical golden rule)")
    ax.semilogy(DRIVING, [make_model(v).golden_rule_rate(BETA) for v in DRIVING], "k+", ms=9,
                label="quantum golden rule, same bath")
    styles = {"sqc-triangle-symmetrized": ("o", "C0"), "sqc-triangle-adjusted": ("s", "C2"), "ehrenfest": ("^", "C3")}
    for method in methods:
        sel = [r for r in rows if r[1] == method]
        mk, col = styles[method]
        ax.errorbar([r[0] for r in sel], [r[2] for r in sel], yerr=[2 * r[3] for r in sel], fmt=mk, color=col,
                    capsize=3, label=method.replace("-", " "))
    ax.axvline(lam_m, color="0.6", ls=":", lw=1)
    ax.text(lam_m + 0.2, 1.1e-2, r"$-\Delta G=\lambda_M$", color="0.4")
    ax.set_ylim(1e-4, 2e-2)
    ax.set_xlabel(r"driving force $-\Delta G$ ($k_BT$)")
    ax.set_ylabel(r"rate constant $k$ ($k_BT/\hbar$)")
    ax.set_title(r"Electron transfer, $\lambda_M\approx 8\,k_BT$, $\Delta=0.1\,k_BT$ (error bars 2σ)", fontsize=10)
    ax.legend(fontsize=8, loc="lower left")
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=120)
    _write_atomic(FIGURES / "marcus_rates.png", buf.getvalue())
    print(f"wrote {FIGURES / 'marcus_rates.png'}")


if __name__ == "__main__":
    main()
