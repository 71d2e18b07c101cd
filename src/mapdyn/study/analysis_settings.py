"""The ``[analysis]`` table of a study input: observables, fragments, products, bootstrap settings."""

from __future__ import annotations

from typing import Any, Callable, Mapping, Sequence

import numpy as np

from mapdyn.analysis.observables import GeometricObservable
from mapdyn.analysis.products import distance_rule_classifier

# ----------------------------------------------------------------------------------------------
# settings from a study input table
# ----------------------------------------------------------------------------------------------
ANALYSIS_KEYS = ("observables", "first_entry", "products", "fragments", "confidence_level", "n_resamples",
                  "seed", "energy_tolerance_hartree", "lifetime_delay", "lifetime_asymptote", "lifetime_resamples",
                  "min_dwell", "transfer_family_distance", "transfer_families")
_FRAGMENT_KEYS = ("atoms", "name", "bin_half_width", "include_unfinished", "potential", "product")
_POTENTIAL_KEYS = ("curve", "morse", "scan")


def _unknown_key(where: str, key: str, allowed: Sequence[str]) -> ValueError:
    import difflib
    hint = difflib.get_close_matches(key, allowed, n=1)
    extra = f" (did you mean {hint[0]!r}?)" if hint else ""
    return ValueError(f"{where}: key {key!r} is not allowed; use {', '.join(allowed)}{extra}")


def fragment_from_table(table: Mapping[str, Any], *, folder: str | None = None,
                        backend_factory: Callable[[Sequence[str]], Any] | None = None,
                        symbols: Sequence[str] | None = None) -> Any:
    """A :class:`mapdyn.analysis.vibrational.FragmentAnalysis` from an input table::

        atoms = [0, 1]          # atom indices (0-based)
        name = "H2"             # optional
        bin_half_width = 0.366   # optional (default (√3 − 1)/2)
        product = "H2 + X"      # optional: only trajectories classified as this product
        potential.curve = "h2_curve.csv"   # two columns r/Bohr, V/Eh (relative to the study folder), or
        potential.morse = {D = 0.1745, a = 1.028, r_e = 1.401}   # Eh, 1/Bohr, Bohr, or
        potential.scan = {r_min = 0.8, r_max = 8.0, points = 40, state = 0}   # with the study's backend

    A scan needs ``backend_factory(fragment_symbols) -> backend``; it is cached in
    ``<folder>/fragments/<name>.npz``.
    """
    import os

    from mapdyn.analysis import vibrational as vib

    for k in table:
        if k not in _FRAGMENT_KEYS:
            raise _unknown_key("fragment", k, _FRAGMENT_KEYS)
    if "atoms" not in table or "potential" not in table:
        raise ValueError("fragment: 'atoms' (two atom indices) and 'potential' are required")
    atoms = tuple(int(a) for a in table["atoms"])
    if len(atoms) != 2 or atoms[0] == atoms[1]:
        raise ValueError(f"fragment atoms={table['atoms']!r} is not allowed; give two distinct atom indices")
    name = str(table.get("name") or (f"{symbols[atoms[0]]}{atoms[0]}-{symbols[atoms[1]]}{atoms[1]}"
                                     if symbols else f"atoms {atoms[0]}-{atoms[1]}"))
    pot_t = table["potential"]
    if not isinstance(pot_t, Mapping) or len(pot_t) != 1:
        raise ValueError(f"fragment {name}: potential must have exactly one of {', '.join(_POTENTIAL_KEYS)}")
    kind, spec = next(iter(pot_t.items()))
    if kind not in _POTENTIAL_KEYS:
        raise _unknown_key(f"fragment {name} potential", kind, _POTENTIAL_KEYS)
    if kind == "curve":
        path = os.path.join(folder or ".", str(spec))
        data = np.loadtxt(path, delimiter="," if str(spec).endswith(".csv") else None, comments="#", ndmin=2)
        potential = vib.FragmentPotential.from_curve(data[:, 0], data[:, 1],
                                                     source=f"curve file {spec} ({data.shape[0]} points, cubic spline)")
    elif kind == "morse":
        potential = vib.MorseCurve(float(spec["D"]), float(spec["a"]), float(spec["r_e"])).potential()
    else:
        if backend_factory is None or symbols is None:
            raise ValueError(f"fragment {name}: potential.scan needs the study's backend (not available here)")
        grid = np.linspace(float(spec.get("r_min", 0.8)), float(spec.get("r_max", 8.0)), int(spec.get("points", 40)))
        frag_symbols = [symbols[atoms[0]], symbols[atoms[1]]]
        cache = os.path.join(folder, "fragments", _slug_name(name) + ".npz") if folder else None
        potential = vib.scan_fragment_potential(backend_factory(frag_symbols), grid, state=int(spec.get("state", 0)),
                                                cache_path=cache)
    return vib.FragmentAnalysis(atoms, potential, name, float(table.get("bin_half_width", vib.SQUARE_GAMMA)),
                                bool(table.get("include_unfinished", False)),
                                None if table.get("product") is None else str(table["product"]))


def _slug_name(text: str) -> str:
    import re
    return re.sub(r"[^A-Za-z0-9]+", "_", text).strip("_") or "fragment"


def settings_from_table(table: Mapping[str, Any] | None, *, folder: str | None = None,
                        backend_factory: Callable[[Sequence[str]], Any] | None = None,
                        symbols: Sequence[str] | None = None) -> dict:
    """Keyword arguments for :func:`analyze` from an ``[analysis]`` input table::

        observables = ["distance 0 1", "angle 0 1 2", "dihedral 0 1 2 3"]
        first_entry = [{state = 0, observable = "distance 0 1"}]
        products = {dissociated = [{distance = [0, 1], above = 2.5}]}      # Å
        fragments = [{atoms = [0, 1], potential.morse = {D = 0.17, a = 1.0, r_e = 1.4}}]
        confidence_level = 0.95, n_resamples = 999, seed = 0, energy_tolerance_hartree = 1e-3,
        lifetime_delay = true, lifetime_asymptote = true, lifetime_resamples = 100
        min_dwell = "2 fs"                 # a new state counts as a transfer only when held this long
        transfer_family_distance = 1.0     # cut of the transfer-geometry clustering (dimensionless), or
        transfer_families = 3              # a number of families instead
    """
    table = dict(table or {})
    for k in table:
        if k not in ANALYSIS_KEYS:
            raise _unknown_key("analysis", k, ANALYSIS_KEYS)
    kw: dict = {}
    if "observables" in table:
        kw["observables"] = [GeometricObservable.from_spec(o) for o in table["observables"]]
    if "first_entry" in table:
        pairs = []
        for item in table["first_entry"]:
            if not isinstance(item, Mapping) or "state" not in item or set(item) - {"state", "observable"}:
                raise ValueError("analysis.first_entry entries need 'state' and optionally 'observable'")
            pairs.append((int(item["state"]), item.get("observable")))
        kw["first_entry"] = pairs
    if "products" in table:
        kw["classifier"] = distance_rule_classifier(table["products"])
    if "fragments" in table:
        kw["vibrational"] = [fragment_from_table(f, folder=folder, backend_factory=backend_factory, symbols=symbols)
                             for f in table["fragments"]]
    for key, conv in (("confidence_level", float), ("n_resamples", int), ("seed", int),
                      ("lifetime_delay", bool), ("lifetime_asymptote", bool), ("lifetime_resamples", int)):
        if key in table:
            kw[key] = conv(table[key])
    if "energy_tolerance_hartree" in table:
        kw["energy_tolerance"] = float(table["energy_tolerance_hartree"])
    kw.update(_transfer_settings(table))
    return kw


def _transfer_settings(table: Mapping[str, Any]) -> dict:
    """min_dwell (a time with a unit, >= 0) → a.u.; transfer_family_distance (> 0) or
    transfer_families (integer >= 1), not both.  One-line ConfigError naming the key."""
    import math

    from mapdyn.study.input_values import ConfigError, parse_quantity, show_value

    kw: dict = {}
    if "min_dwell" in table:
        au = parse_quantity(table["min_dwell"], "analysis.min_dwell", "time")
        if not (math.isfinite(au) and au >= 0):
            raise ConfigError("analysis.min_dwell", f"= {show_value(table['min_dwell'])}: must be a duration >= 0, "
                              'e.g. "2 fs"')
        kw["min_dwell"] = au
    if "transfer_family_distance" in table and "transfer_families" in table:
        raise ConfigError("analysis.transfer_families", "and analysis.transfer_family_distance are alternatives; "
                          "give one of them")
    if "transfer_family_distance" in table:
        v = table["transfer_family_distance"]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not (math.isfinite(v) and v > 0):
            raise ConfigError("analysis.transfer_family_distance", f"= {show_value(v)}: must be a number > 0 "
                              "(dimensionless; 1 ≈ a torsion difference of 60°)")
        kw["transfer_family_distance"] = float(v)
    if "transfer_families" in table:
        v = table["transfer_families"]
        if isinstance(v, bool) or not isinstance(v, int) or v < 1:
            raise ConfigError("analysis.transfer_families", f"= {show_value(v)}: must be a number of families >= 1")
        kw["transfer_families"] = int(v)
    return kw


