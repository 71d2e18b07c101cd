"""Transfers under the dwell rule, Ehrenfest 1/2 crossings, families of transfer geometries and
their report files, on synthetic trajectories whose answers are known by construction."""

from __future__ import annotations

import numpy as np
import pytest

from mapdyn.analysis import analyze, from_trajectories
from mapdyn.analysis.report import read_csv, write_report
from mapdyn.analysis.transfers import (
    cluster_geometries,
    committed_transitions,
    embed_coordinates,
    find_transfers,
    state_sequence,
    transfer_families,
)
from mapdyn.core.options import MethodOptions
from mapdyn.units import AU_TIME_IN_FS, BOHR_IN_ANGSTROM

SQC = MethodOptions(method="sqc", window="triangle")
EHRENFEST = MethodOptions(method="ehrenfest")


def _runs(dt, pieces):
    """Frame states from (state, duration) pieces on a grid of step dt."""
    states = np.concatenate([np.full(int(round(d / dt)), s) for s, d in pieces])
    return np.arange(states.size) * dt, states


def test_short_excursions_do_not_count_and_held_ones_do():
    dt = 0.25
    t, s = _runs(dt, [(1, 10.0),     # start in 1
                      (0, 1.0),      # excursion of 1 fs < 2 fs: not counted
                      (1, 5.0),
                      (-1, 1.0),     # in no window: skipped
                      (0, 3.0),      # held 3 fs ≥ 2 fs: 1 → 0 at 17 fs
                      (-1, 4.0),     # no window again, then a 1-fs visit of 1: not counted
                      (1, 1.0),
                      (0, 6.0),
                      (1, 1.5),      # 1.5 fs in 1, left for 0 at the last frame: not counted
                      (0, 0.25)])
    fr, a, b = committed_transitions(t, s, 2.0)
    assert list(a) == [1] and list(b) == [0]
    assert t[fr[0]] == pytest.approx(17.0)
    # the 2-fs stay in 1 at 33 fs is left at 35 fs (first frame back in 0): held 2 fs → counts with min_dwell 2
    t2, s2 = _runs(dt, [(1, 10.0), (0, 3.0), (1, 2.0), (0, 3.0)])
    fr2, a2, b2 = committed_transitions(t2, s2, 2.0)
    assert list(zip(a2, b2)) == [(1, 0), (0, 1), (1, 0)]
    assert np.allclose(t2[fr2], [10.0, 13.0, 15.0])
    fr3, _, _ = committed_transitions(t2, s2, 2.5)     # the 2-fs stay no longer counts
    assert np.allclose(t2[fr3], [10.0])
    # min_dwell 0 counts every change between windows (no-window frames still skipped)
    fr0, a0, b0 = committed_transitions(t, s, 0.0)
    assert list(zip(a0, b0)) == [(1, 0), (0, 1), (1, 0), (0, 1), (1, 0), (0, 1), (1, 0)]
    assert np.allclose(t[fr0], [10.0, 11.0, 17.0, 24.0, 25.0, 31.0, 32.5])
    # missing frames (−2) behave like no-window frames; nothing recorded → nothing counted
    assert committed_transitions(t, np.full(t.size, -2), 2.0)[0].size == 0
    with pytest.raises(ValueError, match="min_dwell"):
        committed_transitions(t, s, -1.0)


def test_sqc_state_sequence_from_actions():
    e = np.array([[0.3, 1.2], [1.1, 0.9], [1.2, 1.1], [np.nan, np.nan]])  # triangle windows: e_k ≥ 1, others < 1
    assert list(state_sequence(e, SQC)) == [1, 0, -1, -2]


def _ehrenfest_set(p1_rows, dt_au):
    recs = []
    for j, p1 in enumerate(p1_rows):
        T = p1.size
        total = 1.0 + 0.3 * j                       # the estimator uses e_k / Σe: the scale must not matter
        acts = np.stack([(1 - p1) * total, p1 * total], axis=1)
        recs.append({"time_au": np.arange(T) * dt_au, "actions": acts, "initial_state": 1, "index": 10 + j})
    return from_trajectories(recs, EHRENFEST)


def test_ehrenfest_half_crossings_interpolated_and_blips_ignored():
    dt_fs = 0.5
    dt = dt_fs / AU_TIME_IN_FS
    t = np.arange(0, 80.0 + dt_fs / 2, dt_fs)
    w = 2 * np.pi / 120.0                           # P1 = 0.5 + 0.45 cos(ω t) crosses 1/2 at t = π/(2ω) = 30 fs
    p_a = 0.5 + 0.45 * np.cos(w * t)
    p_b = p_a.copy()
    blip = (t > 50.2) & (t < 51.3)                  # a 1-fs return above 1/2: must not count (min_dwell 2 fs)
    p_b[blip] = 0.6
    p_c = 0.5 + 0.45 * np.cos(w * (t + 7.3))        # crossing at 22.7 fs, between frames
    ts = _ehrenfest_set([p_a, p_b, p_c], dt)
    table = find_transfers(ts, 2.0 / AU_TIME_IN_FS)
    assert list(table.trajectory) == [10, 11, 12]
    assert list(table.from_state) == [1, 1, 1] and list(table.to_state) == [0, 0, 0]
    # linear interpolation of a cosine over 0.5 fs near its zero: error ≤ (dt²/8)·max|P''|/|P'| ≈ 1e-3 fs
    assert np.allclose(table.time_fs, [30.0, 30.0, 22.7], atol=2e-3)
    loose = find_transfers(ts, 0.0)
    assert list(loose.trajectory) == [10, 11, 11, 11, 12]   # with min_dwell 0 the blip gives 0 → 1 → 0


def test_clustering_recovers_planted_families_across_the_seam():
    rng = np.random.default_rng(5)
    n = 15
    plus = np.column_stack([90 + 8 * rng.standard_normal(n), 1.40 + 0.02 * rng.standard_normal(n)])
    minus = np.column_stack([-90 + 8 * rng.standard_normal(n), 1.40 + 0.02 * rng.standard_normal(n)])
    seam = 180 + 6 * rng.standard_normal(n)
    seam = np.column_stack([np.where(seam > 180, seam - 360, seam), 1.40 + 0.02 * rng.standard_normal(n)])
    assert (seam[:, 0] > 0).any() and (seam[:, 0] < 0).any()   # the family really straddles ±180°
    values = np.concatenate([plus, minus, seam])
    kinds = ("dihedral", "distance")
    fam = transfer_families(values, kinds)
    planted = np.repeat([0, 1, 2], n)
    assert fam.sizes.tolist() == [n, n, n]
    for g in range(3):  # each planted group is exactly one family
        assert len(set(fam.labels[planted == g])) == 1
    assert len(set(fam.labels)) == 3
    seam_family = fam.labels[2 * n]
    assert abs(abs(fam.means[seam_family, 0]) - 180) < 6            # circular mean at the seam, not near 0
    assert fam.spreads[seam_family, 0] < 15
    for f in range(3):  # the representative is the member closest to the family centre
        members = np.nonzero(fam.labels == f)[0]
        feats = embed_coordinates(values[members], kinds)
        best = members[np.argmin(np.linalg.norm(feats - feats.mean(axis=0), axis=1))]
        assert fam.representatives[f] == best
    # without the (cos, sin) embedding the seam family would split in two: check that it does
    naive = cluster_geometries(values[:, :1] / 57.3)
    assert len(set(naive[planted == 2])) == 2
    # a number of families instead of a distance
    two = transfer_families(values, kinds, families=2)
    assert two.sizes.sum() == 3 * n and two.sizes.size == 2


def _dihedral_positions(phi_deg):
    """Four atoms (Bohr) with dihedral 0-1-2-3 = phi (degrees)."""
    phi = np.radians(phi_deg)
    p = np.array([[1.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 1.5], [np.cos(phi), np.sin(phi), 1.5]])
    return p / BOHR_IN_ANGSTROM


def test_report_writes_transfer_tables_families_and_structures(tmp_path):
    """A small molecular ensemble: each trajectory leaves window 1 for window 0 at a known frame, at a
    torsion of +90° (first half) or −90° (second half)."""
    dt_fs = 0.5
    T = 60
    rng = np.random.default_rng(2)
    recs = []
    for j in range(8):
        hop = 20 + 3 * j
        phi_hop = (90.0 if j < 4 else -90.0) + 5 * rng.standard_normal()
        phis = phi_hop + 2.0 * (np.arange(T) - hop)
        pos = np.array([_dihedral_positions(p) for p in phis])
        acts = np.where(np.arange(T)[:, None] < hop, [0.4, 1.3], [1.3, 0.4])
        recs.append({"time_au": np.arange(T) * dt_fs / AU_TIME_IN_FS, "actions": acts, "positions_bohr": pos,
                     "momenta_au": np.zeros_like(pos), "total_energy_Eh": np.zeros(T), "index": j})
    ts = from_trajectories(recs, SQC, symbols=("H", "C", "C", "H"), masses=np.ones(4))
    res = analyze(ts, observables=["dihedral 0 1 2 3"], n_resamples=99, lifetime_resamples=0)
    tb = res.transfers.table
    assert np.allclose(tb.time_fs, [(20 + 3 * j) * dt_fs for j in range(8)])
    assert res.transfers.families.sizes.tolist() == [4, 4]
    rep = write_report(res, tmp_path)
    rows = read_csv(tmp_path / "transfers.csv")
    assert rows["trajectory"].tolist() == list(range(8))
    assert set(rows["family"][:4]) != set(rows["family"][4:])
    fams = read_csv(tmp_path / "transfer_families.csv")
    assert sorted(np.sign(fams["circmean_dihedral_0_1_2_3_deg"]).tolist()) == [-1.0, 1.0]
    xyz = sorted(p.name for p in (tmp_path / "transfer_families").iterdir())
    assert xyz == ["family_01.xyz", "family_02.xyz"]
    import ase.io

    atoms = ase.io.read(tmp_path / "transfer_families" / "family_01.xyz")
    assert abs(abs(atoms.get_dihedral(0, 1, 2, 3, mic=False) - 180) - 90) < 20
    hist = read_csv(tmp_path / "transfer_times.csv")
    assert hist["count_1_to_0"].sum() == 8
    text = open(rep.summary, encoding="utf-8").read()
    assert "## Transfers between states" in text and "8 transfers in 8 trajectories" in text
    assert "transfer_times.png" in rep.figures["transfer_times"]
