"""Everything at once: :func:`analyze` on a trajectory set."""

from __future__ import annotations

import dataclasses
from typing import Any, Callable, Mapping, Sequence

from mapdyn.analysis.energy import EnergyReport, energy_report, flagged_trajectories
from mapdyn.analysis.lifetimes import LifetimeResult, fit_lifetimes
from mapdyn.analysis.observables import observable_series, values_at_first_entry
from mapdyn.analysis.populations import (
    PopulationSeries,
    initial_state_population,
    populations,
    resampled_initial_population,
)
from mapdyn.analysis.products import ProductBranching, classify_products
from mapdyn.analysis.trajectories import TrajectorySet


# ----------------------------------------------------------------------------------------------
# everything at once
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class AnalysisResults:
    """Everything :func:`mapdyn.analysis.report.write_report` writes (see the individual result types)."""

    tset: TrajectorySet
    populations: PopulationSeries
    initial_population: PopulationSeries
    lifetimes: LifetimeResult
    observables: list
    first_entries: list
    branching: ProductBranching | None
    energy: EnergyReport | None
    flags: list
    vibrational: list = dataclasses.field(default_factory=list)
    spectrum: Any = None
    settings: dict = dataclasses.field(default_factory=dict)
    scattering: Any = None
    transfers: Any = None


def analyze(tset: TrajectorySet, *, observables: Sequence[Any] = (), first_entry: Sequence[tuple] = (),
            classifier: Callable | Mapping | None = None, vibrational: Sequence[Any] = (),
            spectrum: Any = None, confidence_level: float = 0.95, n_resamples: int = 999, seed: int = 0,
            energy_tolerance: float = 1e-3, lifetime_delay: bool = True, lifetime_asymptote: bool = True,
            lifetime_resamples: int = 100, scattering: tuple | None = None, min_dwell: float | None = None,
            transfer_family_distance: float | None = None, transfer_families: int | None = None) -> AnalysisResults:
    """Run every estimator on ``tset``.

    observables : specs for :class:`GeometricObservable`; first_entry : (state, observable-spec or
    None) pairs; classifier : product classifier (see :func:`classify_products`); vibrational :
    :class:`mapdyn.analysis.vibrational.FragmentAnalysis` objects (or specs) evaluated on final frames;
    spectrum : an :class:`mapdyn.initial.excitation.AbsorptionSpectrum` to include in the report;
    lifetime_resamples : trajectory-bootstrap refits for the lifetime uncertainties (0 = covariance);
    scattering : ((a, b) interaction region in Bohr, transmitted side 1 = +x / 0 = −x) for 1D
    scattering studies: transmission/reflection per channel are reported instead of a lifetime.
    min_dwell : a.u. of time a new state must be held before a transfer counts (default
    :data:`mapdyn.analysis.transfers.DEFAULT_MIN_DWELL_FS` fs); transfer_family_distance (dimensionless)
    or transfer_families (a count) cut the clustering of transfer geometries in the ``observables``
    (:func:`mapdyn.analysis.transfers.analyze_transfers`; SQC, Ehrenfest and spin mapping only).
    """
    kw = dict(confidence_level=confidence_level, n_resamples=n_resamples, seed=seed)
    pops = populations(tset, **kw)
    init = initial_state_population(tset, **kw)
    life = fit_lifetimes(init.times, init.populations[:, 0], init.standard_error[:, 0],
                         delay=lifetime_delay, asymptote=lifetime_asymptote,
                         sigma_floor=max(0.01, 1.0 / max(tset.ntraj, 1)),
                         band=(init.low[:, 0], init.high[:, 0]),
                         resampled_populations=(resampled_initial_population(tset, lifetime_resamples, seed)
                                                if lifetime_resamples else None))
    obs = [observable_series(tset, o) for o in observables] if tset.positions is not None else []
    entries = [values_at_first_entry(tset, int(s), o if tset.positions is not None else None)
               for s, o in first_entry]
    branching = classify_products(tset, classifier, **kw) if classifier is not None else None
    energy = energy_report(tset, energy_tolerance)
    flags = flagged_trajectories(tset, energy)
    vib = []
    for frag in vibrational:
        from mapdyn.analysis.vibrational import analyze_fragment
        vib.append(analyze_fragment(tset, frag, **kw,
                                    product_labels=None if branching is None else branching.per_trajectory))
    settings = {"confidence_level": confidence_level, "n_resamples": n_resamples, "bootstrap_seed": seed,
                "energy_tolerance_hartree": energy_tolerance, "lifetime_delay": lifetime_delay,
                "lifetime_asymptote": lifetime_asymptote, "lifetime_resamples": lifetime_resamples}
    scat = None
    if scattering is not None:
        from mapdyn.analysis.scattering import scattering_channels

        region, side = scattering
        scat = scattering_channels(tset, region, side, confidence_level)
    transfers = None
    if tset.options.method in ("sqc", "ehrenfest", "spin"):
        from mapdyn.analysis.transfers import DEFAULT_FAMILY_DISTANCE, DEFAULT_MIN_DWELL_FS, analyze_transfers
        from mapdyn.units import AU_TIME_IN_FS

        dwell = DEFAULT_MIN_DWELL_FS / AU_TIME_IN_FS if min_dwell is None else float(min_dwell)
        transfers = analyze_transfers(tset, min_dwell=dwell, observables=observables,
                                      family_distance=(DEFAULT_FAMILY_DISTANCE if transfer_family_distance is None
                                                       else float(transfer_family_distance)),
                                      families=transfer_families)
        settings["min_dwell_au"] = dwell
    return AnalysisResults(tset, pops, init, life, obs, entries, branching, energy, flags, vib, spectrum, settings,
                           scat, transfers)


