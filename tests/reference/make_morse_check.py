"""Figures for the Morse check of the vibrational-state analysis (written into examples/figures/).

Bohr–Sommerfeld quantisation with the ½ is exact for the Morse oscillator (P. M. Morse, Phys. Rev.
34, 57 (1929)): phase points placed on the analytic level energies E_v must give back v.  The
second figure bins a synthetic ensemble with known level populations (0.45/0.30/0.15/0.10) with
histogram boxes and symmetric windows.  Run: ``python tests/reference/make_morse_check.py``.
"""
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
OUT = HERE.parents[1] / "examples" / "figures"
import numpy as np

sys.path.insert(0, str(HERE.parent / "analysis"))
from test_vibrational import MORSE, MU, cartesian_pair, morse_turning_points

from mapdyn.analysis import plots
from mapdyn.analysis import vibrational as V

rng = np.random.default_rng(1)
levels = MORSE.levels(MU)
rows = []
for v, E in enumerate(levels):
    r_in, r_out = morse_turning_points(E)
    r = rng.uniform(r_in, r_out, 20)
    pr = np.sqrt(np.clip(2*MU*(E - MORSE(r)), 0, None)) * rng.choice([-1., 1.], 20)
    rows.append((np.full(20, v), r, pr, np.full(20, E)))
vt, r, pr, E = (np.concatenate(x) for x in zip(*rows))
pos, mom, masses = cartesian_pair(r, pr, rng)
vc, _, _ = V.vibrational_quantum_numbers(MORSE.potential(), V.fragment_phase_points(pos, mom, masses, (0, 1)))
print("max |v - v_exact| =", np.max(np.abs(vc - vt)))
with plots.new_figure(1, 2, figsize=(9.0, 3.8)) as (fig, ax):
    a, b = ax[0, 0], ax[0, 1]
    rr = np.linspace(0.6, 8, 400)
    a.plot(rr, MORSE(rr) * 27.211386, color=plots.STATE_COLOURS[0], label="Morse V(r)")
    for k, e in enumerate(levels):
        lo, hi = morse_turning_points(e)
        a.hlines(e * 27.211386, lo, hi, color=plots.STATE_COLOURS[1], lw=0.8, label="analytic E_v (Morse 1929)" if k == 0 else None)
    a.plot(r, E * 27.211386, ".", ms=2.5, color="#33373d", label="phase points (r)")
    a.set_xlabel("r / Bohr"); a.set_ylabel("energy / eV"); a.set_xlim(0.6, 8); a.legend(loc="lower right")
    a.set_title("Phase points on the analytic level energies")
    b.semilogy(vt + rng.uniform(-0.2, 0.2, vt.size), np.maximum(np.abs(vc - vt), 1e-17), ".", ms=3, color=plots.STATE_COLOURS[3], label="|v_BS − v| per phase point")
    b.axhline(1e-6, color="#c0392b", ls="--", lw=1, label="test tolerance 1e-6")
    b.set_xlabel("level v"); b.set_ylabel("|v_BS − v|"); b.legend(loc="upper left"); b.set_title("Bohr–Sommerfeld error")
    b.set_ylim(1e-17, 1e-4)
    plots.save_figure(fig, str(OUT / "morse_levels.png"))
# synthetic ensemble binnings
p_true = np.array([0.45, 0.3, 0.15, 0.1]); n = 1500
level = rng.choice(4, size=n, p=p_true)
v_true = level + rng.uniform(-0.5, 0.5, n)
d = V.vibrational_distribution(v_true, n_levels=4, fragment="synthetic Morse ensemble (true 0.45/0.30/0.15/0.10)")
print(d.histogram, d.binned)
plots.plot_vibrational_distribution(d, str(OUT / "vibrational_synthetic_binnings.png"))
