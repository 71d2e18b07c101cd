"""F-state triangle windows and their sampling (docs/theory.md#triangle-windows-for-more-than-two-states).

Source of the construction: Cotton & Miller, J. Chem. Phys. 150, 104101 (2019), generalising the
two-state triangle of J. Chem. Phys. 145, 144108 (2016); the published equations could not be checked
here, so the window form is "from memory".  What is tested is the stated distribution itself:
    e_i = 1 + u, density of u ∈ [0, 1] is 2(1 − u);  e_j = (1 − u) ξ_j, ξ_j ~ U(0, 1) independent,
    W_i(e) = h(e_i − 1) Π_{j≠i} h(1 − e_j).
Statistical checks use fixed seeds; Kolmogorov–Smirnov p-value threshold 0.001 and means within
4 standard errors (false-alarm rate ≲ 1e-3 per check for a correct sampler; a wrong exponent in the
u-density, e.g. the uniform-pyramid (1 − u)^(F−1), gives p ≪ 1e-10 at these sample sizes).
"""
from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from mapdyn.core.options import MethodOptions
from mapdyn.core.windows import sample_actions, window_assignment, window_indicators

TRI = MethodOptions(window="triangle")
N = 20000
P_MIN = 1e-3


def _sample(f: int, initial: int, n: int = N, seed: int = 11) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.array([sample_actions(rng, f, initial, TRI) for _ in range(n)])


def _two_state_triangle(e: np.ndarray) -> np.ndarray:
    """Cotton & Miller (2016) two-state triangle for state 0: e_0 ≥ 1, e_1 ≥ 0, e_0 + e_1 ≤ 2."""
    return (e[:, 0] >= 1.0) & (e[:, 1] >= 0.0) & (e[:, 0] + e[:, 1] <= 2.0)


def test_two_states_reduce_to_the_triangle_on_the_reachable_set():
    """F = 2: for every point with e ≥ 0 and e_0 + e_1 ≤ 2 (the set a sampled trajectory never leaves,
    since Σ e_k is conserved) the F-state window equals the two-state triangle, for both states, except
    at the single shared corner e = (1, 1) (measure zero), which the triangle gives to state 0."""
    rng = np.random.default_rng(3)
    e = rng.random((50000, 2)) * 2.0
    e = e[e.sum(axis=1) <= 2.0]
    edges = np.array([[1.0, 0.0], [1.0, 1.0 - 1e-12], [2.0, 0.0], [0.0, 1.0], [1.0 - 1e-12, 1.0], [1.5, 0.5]])
    e = np.vstack([e, edges])
    ind = window_indicators(e, TRI)
    np.testing.assert_array_equal(ind[:, 0], _two_state_triangle(e))
    np.testing.assert_array_equal(ind[:, 1], _two_state_triangle(e[:, ::-1]))


def test_two_state_sampling_is_uniform_in_the_triangle():
    """F = 2: uniform density 2 on the triangle ⇔ u = e_0 − 1 has CDF 1 − (1 − u)² and
    e_1/(1 − u) is U(0, 1) independent of u."""
    e = _sample(2, 0)
    u = e[:, 0] - 1.0
    assert stats.kstest(u, lambda x: 1.0 - (1.0 - np.clip(x, 0, 1)) ** 2).pvalue > P_MIN
    t = e[:, 1] / (1.0 - u)
    assert stats.kstest(t, "uniform").pvalue > P_MIN
    assert abs(stats.pearsonr(t, u).statistic) < 4 / np.sqrt(N)


@pytest.mark.parametrize("f", [3, 7])
def test_sampled_actions_follow_the_stated_distribution(f: int):
    e = _sample(f, 0)
    u = e[:, 0] - 1.0
    ks_u = stats.kstest(u, lambda x: 1.0 - (1.0 - np.clip(x, 0, 1)) ** 2)
    assert ks_u.pvalue > P_MIN, f"occupied action: KS p = {ks_u.pvalue:.1e}"
    for j in range(1, f):
        # every pair (e_0, e_j) is uniform in the two-state triangle
        t = e[:, j] / (1.0 - u)
        assert stats.kstest(t, "uniform").pvalue > P_MIN
        assert abs(stats.pearsonr(t, u).statistic) < 4 / np.sqrt(N)
        # marginal density of e_j is 2(1 − e_j) on [0, 1]
        assert stats.kstest(e[:, j], lambda x: 1.0 - (1.0 - np.clip(x, 0, 1)) ** 2).pvalue > P_MIN
    # centroids: ⟨e_0⟩ = 1 + γ, ⟨e_j⟩ = γ with γ = 1/3 for every F
    se = e.std(axis=0, ddof=1) / np.sqrt(N)
    expected = np.array([4 / 3] + [1 / 3] * (f - 1))
    assert np.all(np.abs(e.mean(axis=0) - expected) < 4 * se)
    # the unoccupied actions share the factor (1 − u): Cov(e_j, e_k) = Var(√ξ)/4 = (1/2 − 4/9)/4 = 1/72
    c = np.cov(e[:, 1], e[:, 2])[0, 1]
    se_c = np.std((e[:, 1] - e[:, 1].mean()) * (e[:, 2] - e[:, 2].mean()), ddof=1) / np.sqrt(N)
    assert abs(c - 1 / 72) < 4 * se_c


def test_uniform_pyramid_would_be_rejected():
    """Power of the KS check: the former uniform-pyramid sampler (u density ∝ (1 − u)^(F−1), F = 7)
    fails the occupied-action test decisively."""
    rng = np.random.default_rng(5)
    u = 1.0 - rng.random(N) ** (1.0 / 7)
    assert stats.kstest(u, lambda x: 1.0 - (1.0 - np.clip(x, 0, 1)) ** 2).pvalue < 1e-10


@pytest.mark.parametrize("f", [2, 3, 5])
def test_every_sample_lies_in_its_own_window(f: int):
    for i in range(f):
        assert np.all(window_assignment(_sample(f, i, n=2000, seed=i), TRI) == i)


def test_windows_are_symmetric_under_relabelling():
    """W_{π(i)}(e∘π⁻¹) = W_i(e) for every permutation π of 4 states (exact), and the sampler gives the
    same distribution for every initial state once the states are relabelled (two-sample KS)."""
    rng = np.random.default_rng(8)
    e = rng.random((4000, 4)) * 1.6
    ind = window_indicators(e, TRI)
    for perm in itertools.permutations(range(4)):
        perm = list(perm)
        np.testing.assert_array_equal(window_indicators(e[:, perm], TRI), ind[:, perm])
    ref = _sample(4, 0, n=8000, seed=21)
    for i in (1, 2, 3):
        s = _sample(4, i, n=8000, seed=30 + i)
        order = [i] + [k for k in range(4) if k != i]
        for a, b in zip(ref.T, s[:, order].T):
            assert stats.ks_2samp(a, b).pvalue > P_MIN


def test_windows_do_not_overlap_and_known_points():
    e = np.array([[1.2, 0.9, 0.99], [1.2, 1.0, 0.1], [0.5, 0.5, 0.5], [0.0, 0.0, 3.0], [2.5, 0.2, 0.9]])
    assert window_assignment(e, TRI).tolist() == [0, -1, -1, 2, 0]
    rng = np.random.default_rng(9)
    assert window_indicators(rng.random((5000, 5)) * 2, TRI).sum(axis=1).max() <= 1
