"""Transfers between electronic states along trajectories, and families of transfer geometries.

The rule (docs/theory.md#transfers-and-their-geometries), applied to each trajectory on its own:

* the *state sequence* s(t) is the SQC window the actions lie in (−1 in no window), or for
  Ehrenfest (and spin mapping) the state whose population e_k / Σe (ρ_kk) exceeds 1/2 (−1 if none);
* frames with s = −1 are skipped: they neither end nor start a stay;
* the first state of the sequence is the committed state; a later run of frames in another state
  k, entered at t_e, counts as a transfer (committed → k at t_e) only if the trajectory is not
  seen in any third state before t_e + ``min_dwell``, i.e. the run is *held* for at least
  ``min_dwell`` (held until the first frame in a different state, or until the last recorded
  frame); shorter excursions are ignored and the committed state stays;
* Ehrenfest transfer times are refined by linear interpolation of the arriving state's population
  to the crossing of 1/2 between the frame before and the entry frame.

Families: transfer geometries are described by internal coordinates (distances in Å, bond angles
and torsions in degrees); torsions and bond angles are embedded as (cos θ, sin θ), so +179° and
−179° lie close, and distances are divided by ``length_scale`` (Å).  Average-linkage hierarchical
clustering (:func:`scipy.cluster.hierarchy.linkage`) on the Euclidean distances of that embedding
is cut at a distance threshold (dimensionless; 1 ≈ a torsion difference of 60°) or at a number of
families.  The representative of a family is the member closest to its centre (mean embedding).
"""

from __future__ import annotations

import dataclasses
from typing import Any, Sequence

import numpy as np

from mapdyn.analysis.statistics import circular_stats_degrees
from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.core.options import MethodOptions
from mapdyn.core.windows import window_assignment
from mapdyn.units import AU_TIME_IN_FS

__all__ = ["DEFAULT_MIN_DWELL_FS", "DEFAULT_FAMILY_DISTANCE", "DEFAULT_LENGTH_SCALE_ANGSTROM", "MAX_CLUSTERED",
           "TRANSFER_RULE", "state_sequence", "committed_transitions", "half_crossing_times", "TransferTable",
           "find_transfers", "embed_coordinates", "cluster_geometries", "TransferFamilies", "transfer_families",
           "TransferAnalysis", "analyze_transfers"]

#: Default minimum dwell time of a new state before a transfer counts (fs).
DEFAULT_MIN_DWELL_FS = 2.0
#: Default cut of the average-linkage tree (dimensionless distance of the embedding).
DEFAULT_FAMILY_DISTANCE = 1.0
#: Distances are divided by this (Å) in the clustering embedding.
DEFAULT_LENGTH_SCALE_ANGSTROM = 0.5
#: More transfer geometries than this are not clustered (the linkage needs m² memory).
MAX_CLUSTERED = 5000

TRANSFER_RULE = ("a transfer is a change of the occupied state (SQC window; Ehrenfest: population > 1/2) that is held "
                 "for at least min_dwell without a frame in a third state; frames in no window are skipped; shorter "
                 "excursions do not count")


# ----------------------------------------------------------------------------------------------
# state sequence and transitions (arrays in, arrays out)
# ----------------------------------------------------------------------------------------------
def state_fractions(actions: np.ndarray, options: MethodOptions) -> np.ndarray:
    """Per-frame state populations (..., F) of one trajectory (dimensionless): e_k / Σe for
    Ehrenfest, ρ_kk = e_k − (Σe − 1)/F for spin mapping."""
    e = np.asarray(actions, dtype=float)
    if options.method == "spin":
        return e - (e.sum(axis=-1, keepdims=True) - 1.0) / e.shape[-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        return e / e.sum(axis=-1, keepdims=True)


def state_sequence(actions: np.ndarray, options: MethodOptions) -> np.ndarray:
    """Occupied state per frame, shape (...,) from actions (..., F): the SQC window (−1 in no
    window), else the state with population > 1/2 (−1 if none); −2 where the frame is missing (NaN)."""
    e = np.asarray(actions, dtype=float)
    lead, F = e.shape[:-1], e.shape[-1]
    flat = e.reshape(-1, F)
    ok = np.all(np.isfinite(flat), axis=1)
    out = np.full(flat.shape[0], -2, dtype=int)
    if options.method == "sqc":
        out[ok] = window_assignment(flat[ok], options)
    elif options.method in ("ehrenfest", "spin"):
        frac = state_fractions(flat[ok], options)
        above = frac > 0.5
        out[ok] = np.where(above.any(axis=1), np.argmax(above, axis=1), -1)
    else:
        raise ValueError(f"transfers are defined for method sqc, ehrenfest or spin, not {options.method!r}")
    return out.reshape(lead)


def committed_transitions(times: np.ndarray, states: np.ndarray, min_dwell: float
                          ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Transfers of one trajectory under the dwell rule (module docstring).

    times : (T,) any time unit; states : (T,) occupied state per frame, −1 = in no window
    (skipped), −2 = no frame (skipped); min_dwell : in the unit of ``times`` (≥ 0).
    Returns (frames, from_states, to_states): entry-frame index of each counted transfer and the
    states it leaves and enters.
    """
    times = np.asarray(times, dtype=float)
    states = np.asarray(states, dtype=int)
    if times.shape != states.shape or times.ndim != 1:
        raise ValueError(f"times and states must have the same shape (T,), got {times.shape} and {states.shape}")
    if not (np.isfinite(min_dwell) and min_dwell >= 0):
        raise ValueError(f"min_dwell={min_dwell!r} is not allowed; it must be a duration >= 0")
    valid = np.nonzero(states >= 0)[0]
    frames: list[int] = []
    src: list[int] = []
    dst: list[int] = []
    if valid.size == 0:
        return np.array(frames, dtype=int), np.array(src, dtype=int), np.array(dst, dtype=int)
    s = states[valid]
    starts = np.concatenate([[0], np.nonzero(np.diff(s))[0] + 1])  # runs of equal state among valid frames
    recorded = np.nonzero(states >= -1)[0]
    t_last = times[recorded[-1]]
    committed = int(s[0])
    for r, a in enumerate(starts):
        k = int(s[a])
        if k == committed:
            continue
        t_enter = times[valid[a]]
        t_leave = times[valid[starts[r + 1]]] if r + 1 < starts.size else t_last
        if t_leave - t_enter >= min_dwell * (1 - 1e-9):
            frames.append(int(valid[a]))
            src.append(committed)
            dst.append(k)
            committed = k
    return np.array(frames, dtype=int), np.array(src, dtype=int), np.array(dst, dtype=int)


def half_crossing_times(times: np.ndarray, fractions: np.ndarray, frames: np.ndarray, to_states: np.ndarray
                        ) -> np.ndarray:
    """Times at which the arriving state's population crosses 1/2 (linear interpolation between the
    frame before and the entry frame); the entry frame's time where the frame before is missing.
    times (T,), fractions (T, F), frames and to_states (m,) → (m,) in the unit of ``times``."""
    times = np.asarray(times, dtype=float)
    out = times[np.asarray(frames, dtype=int)].astype(float)
    for j, (i, k) in enumerate(zip(frames, to_states)):
        if i < 1:
            continue
        p0, p1 = fractions[i - 1, k], fractions[i, k]
        if np.isfinite(p0) and np.isfinite(p1) and p0 <= 0.5 < p1:
            out[j] = times[i - 1] + (0.5 - p0) / (p1 - p0) * (times[i] - times[i - 1])
    return out


# ----------------------------------------------------------------------------------------------
# the table of an ensemble
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class TransferTable:
    """Every counted transfer of an ensemble.

    trajectory (m,) study indices; row (m,) row in the trajectory set; frame (m,) entry frame;
    time (m,) a.u. (Ehrenfest: interpolated crossing of 1/2); from_state, to_state (m,);
    gap (m,) |E_to − E_from| at the entry frame, Eh (NaN without state energies);
    coupling_norm (m,) |d_from,to| at the entry frame, 1/Bohr (NaN when not recorded);
    values (m, k) internal coordinates at the entry frame (Å or degrees; see ``names``/``units``);
    circular (k,) torsions (periodic, degrees); positions (m, N, 3) Bohr or None;
    min_dwell a.u.; criterion: the rule in words; end_time : last time of the set, a.u.
    """

    trajectory: np.ndarray
    row: np.ndarray
    frame: np.ndarray
    time: np.ndarray
    from_state: np.ndarray
    to_state: np.ndarray
    gap: np.ndarray
    coupling_norm: np.ndarray
    names: tuple[str, ...]
    units: tuple[str, ...]
    kinds: tuple[str, ...]
    values: np.ndarray
    positions: np.ndarray | None
    min_dwell: float
    criterion: str
    end_time: float = float("nan")

    @property
    def count(self) -> int:
        return int(self.time.size)

    @property
    def time_fs(self) -> np.ndarray:
        """(m,) transfer times in fs."""
        return self.time * AU_TIME_IN_FS

    @property
    def circular(self) -> np.ndarray:
        """(k,) bool: coordinate is a torsion (periodic)."""
        return np.array([k == "dihedral" for k in self.kinds], dtype=bool)


def find_transfers(tset: TrajectorySet, min_dwell: float, observables: Sequence[Any] = ()) -> TransferTable:
    """All transfers of ``tset`` under the dwell rule; ``min_dwell`` in a.u. of time;
    ``observables``: :class:`mapdyn.analysis.observables.GeometricObservable` (or specs) evaluated
    at the entry frames (molecular sets only)."""
    from mapdyn.analysis.observables import GeometricObservable

    obs = [GeometricObservable.from_spec(o) for o in observables] if tset.positions is not None else []
    states = state_sequence(tset.actions, tset.options)
    states = np.where(tset.frame_mask, states, -2)
    cols: dict = {k: [] for k in ("trajectory", "row", "frame", "time", "from", "to")}
    for j in range(tset.ntraj):
        fr, a, b = committed_transitions(tset.times, states[j], min_dwell)
        if fr.size == 0:
            continue
        if tset.options.method == "sqc":
            t = tset.times[fr]
        else:
            t = half_crossing_times(tset.times, state_fractions(tset.actions[j], tset.options), fr, b)
        cols["trajectory"].append(np.full(fr.size, int(tset.indices[j])))
        cols["row"].append(np.full(fr.size, j))
        cols["frame"].append(fr)
        cols["time"].append(t)
        cols["from"].append(a)
        cols["to"].append(b)
    arr = {k: (np.concatenate(v) if v else np.zeros(0, dtype=float if k == "time" else int)) for k, v in cols.items()}
    rows, frames, a, b = arr["row"].astype(int), arr["frame"].astype(int), arr["from"].astype(int), arr["to"].astype(int)
    m = rows.size
    gap = np.full(m, np.nan)
    if tset.state_energies is not None and m:
        V = tset.state_energies[rows, frames]
        gap = np.abs(V[np.arange(m), b] - V[np.arange(m), a])
    cn = np.full(m, np.nan)
    if tset.coupling_norms is not None and m:
        cn = tset.coupling_norms[rows, frames, a, b]
    pos = tset.positions[rows, frames] if tset.positions is not None else None
    values = np.zeros((m, len(obs)))
    for q, o in enumerate(obs):
        values[:, q] = o.values(pos) if m else np.zeros(0)
    criterion = f"{TRANSFER_RULE}; min_dwell = {min_dwell * AU_TIME_IN_FS:.4g} fs"
    return TransferTable(arr["trajectory"].astype(int), rows, frames, arr["time"].astype(float), a, b, gap, cn,
                         tuple(o.name for o in obs), tuple(o.unit for o in obs), tuple(o.kind for o in obs), values,
                         pos, float(min_dwell), criterion, float(tset.times[-1]))


# ----------------------------------------------------------------------------------------------
# families of transfer geometries
# ----------------------------------------------------------------------------------------------
def embed_coordinates(values: np.ndarray, kinds: Sequence[str],
                      length_scale: float = DEFAULT_LENGTH_SCALE_ANGSTROM) -> np.ndarray:
    """Feature vectors (m, k') of internal coordinates (m, k) for clustering (dimensionless).

    ``kinds`` per column: "distance" (Å, divided by ``length_scale`` Å), "angle" or "dihedral"
    (degrees, embedded as (cos θ, sin θ): the chord 2 sin(Δθ/2) ≈ Δθ in radians for small Δθ, and
    ±180° coincide)."""
    v = np.asarray(values, dtype=float)
    if v.ndim != 2 or v.shape[1] != len(kinds):
        raise ValueError(f"values must have shape (m, {len(kinds)}), got {v.shape}")
    parts = []
    for q, kind in enumerate(kinds):
        if kind == "distance":
            parts.append(v[:, q:q + 1] / float(length_scale))
        elif kind in ("angle", "dihedral"):
            th = np.radians(v[:, q])
            parts.append(np.stack([np.cos(th), np.sin(th)], axis=1))
        else:
            raise ValueError(f"coordinate kind {kind!r} is not allowed; use distance, angle or dihedral")
    return np.concatenate(parts, axis=1) if parts else np.zeros((v.shape[0], 0))


def cluster_geometries(features: np.ndarray, *, distance: float | None = DEFAULT_FAMILY_DISTANCE,
                       families: int | None = None) -> np.ndarray:
    """Family label (m,) of each feature vector, 0 = largest family (ties: earliest member).

    Average-linkage hierarchical clustering on Euclidean distances (scipy.cluster.hierarchy),
    cut at ``distance`` or, when ``families`` is given, into at most that many families."""
    from scipy.cluster.hierarchy import fcluster, linkage

    x = np.asarray(features, dtype=float)
    m = x.shape[0]
    if m == 0:
        return np.zeros(0, dtype=int)
    if m == 1:
        return np.zeros(1, dtype=int)
    Z = linkage(x, method="average", metric="euclidean")
    if families is not None:
        raw = fcluster(Z, t=int(families), criterion="maxclust")
    else:
        raw = fcluster(Z, t=float(distance if distance is not None else DEFAULT_FAMILY_DISTANCE), criterion="distance")
    labels_in, first, counts = np.unique(raw, return_index=True, return_counts=True)
    order = np.lexsort((first, -counts))  # by size, then first appearance
    relabel = {int(labels_in[o]): r for r, o in enumerate(order)}
    return np.array([relabel[int(c)] for c in raw], dtype=int)


@dataclasses.dataclass
class TransferFamilies:
    """Families of transfer geometries.

    labels (m,) family of each transfer (−1: not clustered); sizes (K,); means (K, k) mean
    coordinates (circular mean for torsions; Å or degrees); spreads (K, k) std (circular std for
    torsions); representatives (K,) row of the table closest to each family centre;
    rule: how they were formed (text); skipped: why no families were formed ("" if they were).
    """

    labels: np.ndarray
    sizes: np.ndarray
    means: np.ndarray
    spreads: np.ndarray
    representatives: np.ndarray
    rule: str
    skipped: str = ""


def transfer_families(values: np.ndarray, kinds: Sequence[str], *, distance: float | None = DEFAULT_FAMILY_DISTANCE,
                      families: int | None = None, length_scale: float = DEFAULT_LENGTH_SCALE_ANGSTROM
                      ) -> TransferFamilies:
    """Cluster transfer geometries (m, k) given as internal coordinates (see :func:`embed_coordinates`)."""
    v = np.asarray(values, dtype=float)
    m, k = v.shape
    cut = f"into at most {families} families" if families is not None else f"at distance {distance:.3g}"
    rule = (f"average-linkage hierarchical clustering of the internal coordinates (torsions and angles as (cos, sin), "
            f"distances / {length_scale:.3g} Å), cut {cut}; representative = member closest to the family centre")
    empty = TransferFamilies(np.full(m, -1, dtype=int), np.zeros(0, dtype=int), np.zeros((0, k)), np.zeros((0, k)),
                             np.zeros(0, dtype=int), rule)
    ok = np.all(np.isfinite(v), axis=1)
    if k == 0:
        return dataclasses.replace(empty, skipped="no internal coordinates (give [analysis] observables)")
    if ok.sum() == 0:
        return dataclasses.replace(empty, skipped="no transfer geometries")
    if ok.sum() > MAX_CLUSTERED:
        return dataclasses.replace(empty, skipped=f"{int(ok.sum())} transfer geometries (more than {MAX_CLUSTERED})")
    feats = embed_coordinates(v[ok], kinds, length_scale)
    lab_ok = cluster_geometries(feats, distance=distance, families=families)
    labels = np.full(m, -1, dtype=int)
    labels[ok] = lab_ok
    K = int(lab_ok.max()) + 1
    rows_ok = np.nonzero(ok)[0]
    sizes = np.bincount(lab_ok, minlength=K)
    means = np.full((K, k), np.nan)
    spreads = np.full((K, k), np.nan)
    reps = np.zeros(K, dtype=int)
    for f in range(K):
        members = lab_ok == f
        centre = feats[members].mean(axis=0)
        d = np.linalg.norm(feats[members] - centre, axis=1)
        reps[f] = rows_ok[np.nonzero(members)[0][int(np.argmin(d))]]
        for q, kind in enumerate(kinds):
            col = v[ok][members, q]
            if kind == "dihedral":
                mean_q, sd_q, _, _ = circular_stats_degrees(col)
                means[f, q], spreads[f, q] = float(mean_q), float(sd_q)
            else:
                means[f, q] = float(np.mean(col))
                spreads[f, q] = float(np.std(col, ddof=1)) if col.size > 1 else 0.0
            if col.size == 1:
                spreads[f, q] = 0.0  # (the circular std of one angle is rounding noise)
    return TransferFamilies(labels, sizes, means, spreads, reps, rule)


# ----------------------------------------------------------------------------------------------
# everything about transfers of a set
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class TransferAnalysis:
    """Transfers of an ensemble (:class:`TransferTable`), their families (:class:`TransferFamilies`)
    and the atom symbols for the representative structures (or None)."""

    table: TransferTable
    families: TransferFamilies
    symbols: tuple[str, ...] | None = None


def analyze_transfers(tset: TrajectorySet, *, min_dwell: float, observables: Sequence[Any] = (),
                      family_distance: float | None = DEFAULT_FAMILY_DISTANCE, families: int | None = None,
                      length_scale: float = DEFAULT_LENGTH_SCALE_ANGSTROM) -> TransferAnalysis:
    """Transfers under the dwell rule (``min_dwell`` a.u. of time) and families of their
    geometries in the ``observables`` (see :func:`find_transfers`, :func:`transfer_families`)."""
    table = find_transfers(tset, min_dwell, observables)
    fam = transfer_families(table.values, table.kinds, distance=family_distance, families=families,
                            length_scale=length_scale)
    if tset.positions is None and not fam.skipped:
        fam.skipped = "no atomic positions"
    return TransferAnalysis(table, fam, tset.symbols)
