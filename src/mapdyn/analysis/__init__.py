"""Ensemble estimators on in-memory trajectory results (atomic units inside; geometric values
out in Å and degrees, times also in fs).  Never reads a study folder itself: the study layer
builds a :class:`TrajectorySet` and passes it in.

Estimators, stated once (details in ``docs/theory.md#populations``):

* SQC populations (Cotton & Miller, J. Phys. Chem. A 117, 7190 (2013)): P_f(t) = N_f / Σ_f' N_f',
  N_f = trajectories whose adiabatic actions lie in the window of state f at t; trajectories in no
  window are counted separately.  Ehrenfest: P_f = Σ_j e_jf / Σ_jk e_jk.
* Bootstrap bands resample whole trajectories (scipy.stats.bootstrap, BCa up to 2000
  trajectories, percentile above).
* Lifetimes: weighted least-squares single/bi-exponential fits, uncertainties from
  trajectory-bootstrap refits, reported only under :data:`LIFETIME_RULE`.
* Transfers: changes of the occupied state held for at least ``min_dwell``, and families of the
  geometries at transfer (:mod:`mapdyn.analysis.transfers`, docs/theory.md#transfers-and-their-geometries).
"""

from mapdyn.analysis.energy import (
                                         EnergyReport,
                                         TrajectoryFlag,
                                         energy_report,
                                         flagged_trajectories,
)
from mapdyn.analysis.lifetimes import (
                                         LIFETIME_RULE,
                                         ExponentialFit,
                                         LifetimeResult,
                                         fit_lifetimes,
)
from mapdyn.analysis.observables import (
                                         FirstEntry,
                                         GeometricObservable,
                                         ObservableSeries,
                                         observable_series,
                                         values_at_first_entry,
)
from mapdyn.analysis.populations import (
                                         PopulationSeries,
                                         initial_state_population,
                                         populations,
                                         resampled_initial_population,
)
from mapdyn.analysis.products import (
                                         ProductBranching,
                                         classify_products,
                                         distance_rule_classifier,
)
from mapdyn.analysis.results import AnalysisResults, analyze
from mapdyn.analysis.statistics import bootstrap_ratio
from mapdyn.analysis.trajectories import (
                                         STATUSES,
                                         TrajectorySet,
                                         frames_to_record,
                                         from_diabatic_run,
                                         from_trajectories,
)
from mapdyn.analysis.transfers import (
                                         TransferAnalysis,
                                         TransferTable,
                                         analyze_transfers,
                                         find_transfers,
)

__all__ = [
    "TrajectorySet", "STATUSES", "from_diabatic_run", "from_trajectories", "frames_to_record",
    "PopulationSeries", "populations", "initial_state_population", "resampled_initial_population",
    "bootstrap_ratio", "ExponentialFit", "LifetimeResult", "LIFETIME_RULE", "fit_lifetimes",
    "GeometricObservable", "ObservableSeries", "observable_series", "FirstEntry",
    "values_at_first_entry", "distance_rule_classifier", "ProductBranching", "classify_products",
    "EnergyReport", "energy_report", "TrajectoryFlag", "flagged_trajectories",
    "AnalysisResults", "analyze", "TransferAnalysis", "TransferTable", "analyze_transfers", "find_transfers",
]
