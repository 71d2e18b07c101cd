"""SQC windows: sampling inside the initial window, window assignment, populations.

All functions work on actions e_k = ½(x_k² + p_k²) (dimensionless), shape (n, F).

Square windows (Cotton & Miller, J. Phys. Chem. A 117, 7190 (2013); formulas from memory):
    W_i(e) = Π_k h(γ − |e_k − γ − δ_ki|),   γ = (√3 − 1)/2,
i.e. e_k ∈ [δ_ki, δ_ki + 2γ].

Triangle windows, F states (Cotton & Miller, J. Chem. Phys. 145, 144108 (2016) for F = 2; the
F-state generalisation of Cotton & Miller, J. Chem. Phys. 150, 104101 (2019); the published equations
could not be checked here, the form below is recalled from memory and derived in docs/theory.md#triangle-windows-for-more-than-two-states):
    W_i(e) = h(e_i − 1) · Π_{j≠i} h(1 − e_j),   γ = 1/3,
and the initial actions of state i are drawn so that every pair (e_i, e_j) is uniform in the
two-state triangle {e_i ≥ 1, e_j ≥ 0, e_i + e_j ≤ 2}:
    e_i = 1 + u,  u ∈ [0, 1] with density 2(1 − u);   e_j = (1 − u) ξ_j,  ξ_j ~ U(0, 1) independent,
so ⟨e_i⟩ = 4/3 = 1 + γ and ⟨e_j⟩ = 1/3 = γ for every F.  For F = 2 this is the two-state triangle: the
sampled point is uniform in it, and because Σ_k e_k is conserved (≤ 2), a trajectory with e_i ≥ 1
has e_j ≤ 1 and e_j ≥ 0 automatically.
"""

from __future__ import annotations

import numpy as np

from mapdyn.core.options import MethodOptions, spin_gamma

__all__ = [
    "sample_actions",
    "sample_mapping_variables",
    "window_indicators",
    "window_assignment",
]


def _check_state(nstates: int, initial_state: int) -> None:
    if isinstance(nstates, bool) or not isinstance(nstates, (int, np.integer)) or nstates < 2:
        raise ValueError(f"nstates={nstates!r} is not allowed; mapping dynamics needs at least 2 states")
    if isinstance(initial_state, bool) or not isinstance(initial_state, (int, np.integer)) \
            or not 0 <= initial_state < nstates:
        raise ValueError(f"initial_state={initial_state!r} is not allowed; it must be an integer in 0..{nstates - 1}")


def sample_actions(rng: np.random.Generator, nstates: int, initial_state: int,
                   options: MethodOptions) -> np.ndarray:
    """Actions e (F,) for one trajectory drawn in the initial state's window (square: uniform in the box;
    triangle: the pairwise-triangle distribution of the module docstring).

    Draws exactly ``nstates`` uniforms from ``rng`` (so the stream position after the call does not
    depend on the window shape).  Ehrenfest: e = δ_{k,i} (the uniforms are still drawn).
    """
    _check_state(nstates, initial_state)
    xi = rng.random(nstates)
    occ = np.zeros(nstates)
    occ[initial_state] = 1.0
    if options.method in ("ehrenfest", "fssh"):
        return occ
    if options.method == "spin":
        # focused spin-mapping actions e_k = δ_ki + γ_s (docs/theory.md#spin-mapping)
        return occ + spin_gamma(nstates)
    if options.method == "mash":
        # uniform on the unit sphere Σe = 1 (e ~ Dirichlet(1,…,1) from −log ξ), restricted to the region where
        # the initial state has the largest action by moving the largest entry there (docs/theory.md#mash)
        g = -np.log1p(-xi)
        e = g / g.sum()
        big = int(np.argmax(e))
        e[[big, initial_state]] = e[[initial_state, big]]
        return e
    if options.window == "square":
        return occ + 2.0 * options.window_gamma * xi
    # pairwise two-state triangle: 1 − u = √ξ_i has density 2(1 − u) (docs/theory.md#triangle-windows-for-more-than-two-states)
    one_minus_u = np.sqrt(xi[initial_state])
    e = one_minus_u * xi
    e[initial_state] = 2.0 - one_minus_u
    return e


def sample_mapping_variables(rng: np.random.Generator, nstates: int, initial_state: int,
                             options: MethodOptions) -> tuple[np.ndarray, np.ndarray]:
    """(x, p), each (F,), for one trajectory: actions from the window, then F uniform angles q_k.

    x_k = √(2e_k) cos q_k,  p_k = −√(2e_k) sin q_k (docs/theory.md#square-windows).  Draw order: actions, angles.
    """
    e = sample_actions(rng, nstates, initial_state, options)
    q = 2.0 * np.pi * rng.random(nstates)
    r = np.sqrt(2.0 * e)
    return r * np.cos(q), -r * np.sin(q)


def window_indicators(e: np.ndarray, options: MethodOptions) -> np.ndarray:
    """Boolean (n, F): trajectory inside the window of state f at these actions.

    Windows do not overlap, so each row has at most one True.  For Ehrenfest every trajectory is
    counted with weight e_k instead (see :mod:`mapdyn.core.populations`); this function then raises.
    """
    e = np.asarray(e, dtype=float)
    if e.ndim != 2:
        raise ValueError(f"actions must have shape (n, F), got {e.shape}")
    if options.method != "sqc":
        raise ValueError(f"window_indicators is for method='sqc', not {options.method!r} (see mapdyn.core.populations)")
    n, f = e.shape
    if options.window == "square":
        g = options.window_gamma
        occupied = np.abs(e - g - 1.0) <= g
        empty = np.abs(e - g) <= g
        inside = np.empty((n, f), dtype=bool)
        for i in range(f):
            others = np.delete(empty, i, axis=1).all(axis=1)
            inside[:, i] = occupied[:, i] & others
        return inside
    occupied = e >= 1.0
    below = ~occupied
    n_below = below.sum(axis=1, keepdims=True)
    # state i: e_i ≥ 1 and all F − 1 others < 1
    return occupied & (n_below == f - 1)


def window_assignment(e: np.ndarray, options: MethodOptions) -> np.ndarray:
    """State index each trajectory's window belongs to, −1 where it is in no window; shape (n,)."""
    ind = window_indicators(e, options)
    out = np.full(ind.shape[0], -1, dtype=int)
    rows, cols = np.nonzero(ind)
    out[rows] = cols
    return out
