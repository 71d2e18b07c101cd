"""Trajectories that ended in a channel (backend RegionReached) are outcomes, not failures."""

from __future__ import annotations

import numpy as np

from mapdyn.analysis.energy import flagged_trajectories
from mapdyn.analysis.products import classify_products
from mapdyn.analysis.report import write_report
from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.core.options import MethodOptions


def _set() -> TrajectorySet:
    T, F = 5, 2
    actions = np.full((3, T, F), 0.5)
    actions[:, :, 1] = 1.2                     # in the S1 window
    actions[0, 3:] = np.nan                    # trajectory 0 ended after its 3rd frame
    reasons = ("ended: S1/S0 region; S1-S0 gap 0.05 eV < 0.10 eV at step 4 (t = 2.00 fs)", "", "backend failure at step 2: x")
    status = ("finished", "finished", "failed")
    pos = np.zeros((3, T, 2, 3))
    pos[:, :, 1, 2] = 1.4
    return TrajectorySet(times=np.arange(T) * 20.0, actions=actions, options=MethodOptions(window="square"),
                         initial_states=np.ones(3, dtype=int), status=status, reasons=reasons,
                         positions=pos, symbols=("H", "H"), masses=np.full(2, 1837.0))


def test_outcomes_flags_and_products_count_the_channel():
    ts = _set()
    assert ts.outcomes() == ("S1/S0 region", "finished", "failed")
    flagged = {f.index for f in flagged_trajectories(ts)}
    assert flagged == {2}                      # the ended trajectory is not flagged, the failed one is
    br = classify_products(ts, lambda atoms: "H2", n_resamples=99)
    assert dict(zip(br.labels, br.counts.tolist())) == {"H2": 1, "S1/S0 region": 1}


def test_report_writes_the_outcome_table(tmp_path):
    write_report(_set(), tmp_path)
    text = (tmp_path / "outcomes.csv").read_text()
    assert "S1/S0 region" in text and "failed" in text
    summary = (tmp_path / "summary.md").read_text()
    assert 'ended in the channel "S1/S0 region" (counted as finished, an outcome): 1' in summary
