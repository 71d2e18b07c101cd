"""Circular statistics of angles and exact binomial intervals."""

import numpy as np
import pytest
from scipy.stats import binomtest

from mapdyn.analysis import statistics as S


def test_angles_across_the_wrap_average_to_180_with_small_spread():
    # a set at ±179°: arithmetic mean would be 0°, the circular mean is 180° (Mardia & Jupp §2.2)
    vals = np.array([179.0, -179.0, 178.5, -178.5, 179.5, -179.5])
    mean, std, q10, q90 = S.circular_stats_degrees(vals)
    assert abs(S.fold_degrees(mean) - 180.0) < 1e-9
    # circular std √(−2 ln R̄) of deviations ≤ 1.5°: close to the linear std of the deviations (≈1.1°)
    dev = np.array([1.0, -1.0, 1.5, -1.5, 0.5, -0.5])
    assert std == pytest.approx(np.sqrt(np.mean(dev ** 2)), rel=1e-3)
    assert std < 2.0
    assert 178.0 < q10 < 180.0 < q90 < 182.0


def test_angles_near_zero_and_folding():
    vals = np.array([[10.0, 350.0], [-10.0, 370.0]])
    mean, std, _, _ = S.circular_stats_degrees(vals, axis=0)
    np.testing.assert_allclose(mean, [0.0, 0.0], atol=1e-9)
    np.testing.assert_allclose(S.fold_degrees([270.0, -90.0, 180.0, -180.0, 540.0]), [-90.0, -90.0, 180.0, 180.0, 180.0])


@pytest.mark.parametrize("k", [0, 2, 4])
def test_clopper_pearson_matches_scipy_binomtest(k):
    # reference: scipy.stats.binomtest(k, n).proportion_ci(method="exact") (Clopper–Pearson 1934)
    ref = binomtest(k, 4).proportion_ci(confidence_level=0.95, method="exact")
    low, high = S.clopper_pearson(k, 4, 0.95)
    assert low == pytest.approx(ref.low, abs=1e-12)
    assert high == pytest.approx(ref.high, abs=1e-12)


def test_widened_interval_contains_exact_interval_for_degenerate_bootstrap():
    est = np.array([0.0, 1.0, 0.5])
    low, high = S.widen_to_binomial(est, est.copy(), est.copy(), np.array([4, 4, 4]))
    for k, (lo, hi) in enumerate(zip(low, high)):
        ref = binomtest(int(round(est[k] * 4)), 4).proportion_ci(method="exact")   # scipy reference
        assert lo <= ref.low + 1e-12 and hi >= ref.high - 1e-12
    assert high[0] == pytest.approx(0.6023646356164858, abs=1e-12)   # 0 of 4: [0, 0.60]


def _planar_set(n=4, T=6):
    """n molecules (4 atoms) with dihedrals alternating near +179° / −179° (just off planar trans) and
    all in state 1 throughout (no decay)."""
    from mapdyn.analysis import TrajectorySet
    from mapdyn.core.options import MethodOptions

    opts = MethodOptions()
    from mapdyn.core.windows import window_indicators

    e = np.zeros((n, T, 2))
    e[..., 0] = 0.1
    e[..., 1] = 1.1
    assert window_indicators(e.reshape(-1, 2), opts)[:, 1].all()
    pos = np.zeros((n, T, 4, 3))
    for j in range(n):
        phi = np.radians(179.0 if j % 2 else -179.0)
        pos[j, :, 0] = [1.0, 0.0, 0.0]
        pos[j, :, 1] = [0.0, 0.0, 0.0]
        pos[j, :, 2] = [0.0, 0.0, 2.5]
        pos[j, :, 3] = [np.cos(phi), np.sin(phi), 2.5]
    return TrajectorySet(times=np.arange(T) * 10.0, actions=e, options=opts, initial_states=np.ones(n, int),
                         positions=pos, momenta=np.zeros_like(pos), symbols=("C", "C", "H", "H"),
                         energies=np.zeros((n, T)))


def test_report_shows_circular_angles_exact_intervals_and_no_rejected_numbers(tmp_path):
    from mapdyn.analysis import analyze, report

    ts = _planar_set()
    res = analyze(ts, observables=["dihedral 0 1 2 3"], n_resamples=99)
    obs = res.observables[0]
    np.testing.assert_allclose(np.abs(obs.mean), 180.0, atol=1e-6)   # not 0 (arithmetic mean of ±179°)
    assert np.all(obs.std < 2.0)
    pops = res.populations
    ref = binomtest(0, 4).proportion_ci(method="exact")                # scipy reference, 0 of 4 in S0
    assert pops.low[-1, 0] == 0.0 and pops.high[-1, 0] >= ref.high - 1e-12
    out = report.write_report(res, tmp_path / "rep")
    text = open(out.summary).read()
    assert "circular mean ± circular std" in text
    assert "[0.0000, 0.6024]" in text
    assert "No lifetime reported" in text
    for line in text.splitlines():
        if line.startswith("| mono") or line.startswith("| bi"):
            assert "not supported (population fell by" in line and "tau =" not in line
