"""Product classification of final frames and branching ratios with bootstrap bounds."""

from __future__ import annotations

import dataclasses
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from mapdyn.analysis.statistics import bootstrap_ratio, widen_to_binomial
from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.backends.contract import ended_channel
from mapdyn.units import BOHR_IN_ANGSTROM


# ----------------------------------------------------------------------------------------------
# products
# ----------------------------------------------------------------------------------------------
def distance_rule_classifier(rules: Mapping[str, Sequence[Mapping[str, Any]]], default: str = "other"
                             ) -> Callable[[Any], str]:
    """Classifier from rules: ``{"label": [{"distance": [i, j], "above": 2.5}, …], …}``.

    A geometry gets the first label (in the given order) whose conditions all hold; each condition
    names a distance between two atoms (molecules, Å) or a model coordinate index (models,
    ``{"coordinate": 0, "above": 0.0}``, Bohr) and ``above`` and/or ``below`` thresholds
    (strict), or the final electronic state ``{"state": k}`` (SQC window at the last frame;
    Ehrenfest: largest action).  Otherwise ``default``.
    """
    parsed = []
    for label, conds in rules.items():
        if isinstance(conds, Mapping):
            conds = [conds]
        checks = []
        for c in conds:
            if set(c) == {"state"}:
                checks.append(("state", int(c["state"]), None, None))
                continue
            what = {"distance", "coordinate"} & set(c)
            unknown = set(c) - {"distance", "coordinate", "above", "below"}
            if unknown or len(what) != 1 or not ({"above", "below"} & set(c)):
                raise ValueError(f"product rule {label!r}: each condition needs 'distance' = [i, j] (Å, molecules) or "
                                 f"'coordinate' = k (Bohr, models) and 'above' and/or 'below' (got keys {sorted(c)})")
            lo, hi = float(c.get("above", -np.inf)), float(c.get("below", np.inf))
            if "distance" in c:
                i, j = (int(a) for a in c["distance"])
                checks.append(("distance", (i, j), lo, hi))
            else:
                checks.append(("coordinate", int(c["coordinate"]), lo, hi))
        parsed.append((str(label), checks))

    def value(geometry, kind, where):
        if kind == "distance":
            if not hasattr(geometry, "get_distance"):
                raise ValueError("product rule: 'distance' conditions need molecular geometries; use 'coordinate' for models")
            return geometry.get_distance(*where)
        if hasattr(geometry, "get_distance"):
            raise ValueError("product rule: 'coordinate' conditions are for model studies; use 'distance' for molecules")
        return float(np.asarray(geometry)[where])

    def holds(geometry, state, kind, where, lo, hi) -> bool:
        if kind == "state":
            return state is not None and int(state) == where
        return lo < value(geometry, kind, where) < hi

    def classify(geometry, state: int | None = None) -> str:
        for label, checks in parsed:
            if all(holds(geometry, state, *chk) for chk in checks):
                return label
        return default

    classify.uses_state = True  # type: ignore[attr-defined]

    classify.rules = dict(rules)  # type: ignore[attr-defined]
    return classify


@dataclasses.dataclass
class ProductBranching:
    """Branching ratios over classified final geometries with bootstrap bounds.

    labels : product names; counts (L,); ratios, low, high, standard_error : (L,) fractions of the
    classified trajectories; per_trajectory : label per trajectory ("" = not classified);
    excluded : trajectory indices not classified and why.
    """

    labels: tuple[str, ...]
    counts: np.ndarray
    ratios: np.ndarray
    low: np.ndarray
    high: np.ndarray
    standard_error: np.ndarray
    per_trajectory: tuple[str, ...]
    n_classified: int
    confidence_level: float
    excluded: list


def classify_products(tset: TrajectorySet, classifier: Callable[[Any], str] | Mapping, *,
                      include_failed: bool = False, include_unfinished: bool = False,
                      confidence_level: float = 0.95, n_resamples: int = 999, seed: int = 0) -> ProductBranching:
    """Classify each trajectory's last frame and estimate branching ratios.

    Molecules: ``classifier(atoms: ase.Atoms) -> label`` on the last geometry (Å, ASE units).
    Models: ``classifier(coordinates (D,) Bohr) -> label``.  A classifier with attribute
    ``uses_state = True`` is called with the final state as second argument (−1 = no window).  A mapping is turned into
    :func:`distance_rule_classifier`.  By default only finished trajectories are classified.
    Ratios are fractions of classified trajectories; bounds from ``scipy.stats.bootstrap``.
    """
    if isinstance(classifier, Mapping):
        classifier = distance_rule_classifier(classifier)
    if not callable(classifier):
        raise ValueError("classifier must be a callable or a mapping of distance rules")
    last = tset.last_frame
    uses_state = bool(getattr(classifier, "uses_state", False))
    final_state = np.full(tset.ntraj, -1)
    rows_ok = np.nonzero(last >= 0)[0]
    if rows_ok.size:
        e_last = tset.actions[rows_ok, last[rows_ok]]
        if tset.options.method == "ehrenfest":
            final_state[rows_ok] = np.argmax(e_last, axis=1)
        else:
            from mapdyn.core.windows import window_assignment
            final_state[rows_ok] = window_assignment(e_last, tset.options)
    labels_per: list[str] = []
    excluded = []
    for j in range(tset.ntraj):
        st = tset.status[j]
        if last[j] < 0 or (st == "failed" and not include_failed) or (
                st in ("running", "pending") and not include_unfinished):
            labels_per.append("")
            excluded.append((int(tset.indices[j]), st if last[j] >= 0 else "no frames"))
            continue
        channel = ended_channel(tset.reasons[j]) if tset.reasons is not None else None
        if channel:  # ended where the electronic structure is not valid: that region is its product
            labels_per.append(channel)
            continue
        if tset.positions is not None:
            from ase import Atoms
            atoms = Atoms(symbols=list(tset.symbols), positions=tset.positions[j, last[j]] * BOHR_IN_ANGSTROM)
            lab = classifier(atoms, final_state[j]) if uses_state else classifier(atoms)
        elif tset.coordinates is not None:
            coords = tset.coordinates[j, last[j]].copy()
            lab = classifier(coords, final_state[j]) if uses_state else classifier(coords)
        else:
            raise ValueError("classify_products needs positions or model coordinates in the trajectory set")
        labels_per.append(str(lab))
    classified = [lab for lab in labels_per if lab]
    order = list(getattr(classifier, "rules", {}) or {})       # rule order first, then the rest sorted
    labels = tuple([lab for lab in order if lab in set(classified)] +
                   sorted(set(classified) - set(order)))
    L, m = len(labels), len(classified)
    if m == 0:
        z = np.zeros(0)
        return ProductBranching((), z.astype(int), z, z, z, z, tuple(labels_per), 0, confidence_level, excluded)
    onehot = np.array([[lab == name for name in labels] for lab in classified], dtype=float)
    est, low, high, se = bootstrap_ratio(onehot, np.ones((m, 1)), np.zeros(L, dtype=int),
                                         confidence_level=confidence_level, n_resamples=n_resamples, seed=seed)
    low, high = widen_to_binomial(est, low, high, np.full(L, m), confidence_level)  # never narrower than exact
    return ProductBranching(labels, onehot.sum(axis=0).astype(int), est, low, high, se, tuple(labels_per), m,
                            float(confidence_level), excluded)


