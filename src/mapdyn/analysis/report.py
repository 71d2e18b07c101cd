"""Report folder: PNG figures, one CSV per plotted curve, and a Markdown summary (atomic writes).

``write_report(results, folder)`` takes an :class:`mapdyn.analysis.AnalysisResults` (or a
:class:`mapdyn.analysis.TrajectorySet`, analysed with default settings) and writes

    populations.png / populations.csv            adiabatic populations with bootstrap bands
    initial_population.png / .csv                 initial-state population and exponential fits
    observable_<name>.png / .csv                  each geometric observable (mean, std, quantiles)
    first_entry_state<k>_<name>.png / .csv        value/time at first entry into state k
    energy_drift.png / energy_drift.csv           per-trajectory energy drift (histogram)
    branching.png / branching.csv                 product branching ratios
    vibrational_<fragment>.png / .csv (+ _continuous.csv)   vibrational level populations
    spectrum.png / spectrum.csv                   absorption spectrum, when supplied
    transfers.csv                                 every counted transfer (time, states, gap, coordinates, family)
    transfer_times.png / .csv                     histogram of transfer times per kind of transfer
    transfer_geometries.png, transfer_families.csv, transfer_families/family_NN.xyz
                                                  families of transfer geometries and their representatives
    summary.md                                    inputs, counts, lifetimes, products, flags

CSV files: a header line of column names (units in the names), numbers written with 17
significant digits (``%.17g``) so they read back equal to the in-memory arrays.
"""

from __future__ import annotations

import dataclasses
import io
import os
import re
from typing import Any, Iterable, Sequence

import numpy as np

from mapdyn.analysis import AnalysisResults, TrajectorySet, analyze, plots
from mapdyn.analysis.trajectories import STATUSES
from mapdyn.units import AU_TIME_IN_FS, HARTREE_IN_EV

__all__ = ["Report", "write_report", "write_csv", "read_csv", "summarise_warnings"]

_NUMBER_RE = re.compile(r"[-+]?\d+\.?\d*(?:[eE][-+]?\d+)?")


@dataclasses.dataclass
class Report:
    """What :func:`write_report` wrote: folder, figure paths, CSV paths, summary path (all str)."""

    folder: str
    figures: dict
    tables: dict
    summary: str


def _slug(text: str) -> str:
    s = re.sub(r"[^A-Za-z0-9]+", "_", text).strip("_")
    return s or "item"


def _fmt(v: Any) -> str:
    if isinstance(v, str):
        return '"' + v.replace('"', "'") + '"' if ("," in v or '"' in v) else v
    if isinstance(v, (bool, np.bool_)):
        return "1" if v else "0"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    return "%.17g" % float(v)


def write_csv(path: str | os.PathLike, columns: Sequence[str], data: Sequence[Sequence[Any]]) -> str:
    """CSV with a header of ``columns`` and one row per entry of the column arrays in ``data``
    (numbers as %.17g, integers plain, NaN as "nan"); atomic write."""
    cols = [list(c) if not isinstance(c, np.ndarray) else c for c in data]
    nrow = len(cols[0]) if cols else 0
    if any(len(c) != nrow for c in cols) or len(columns) != len(cols):
        raise ValueError(f"write_csv {path}: columns must all have the same length and match the header")
    buf = io.StringIO()
    buf.write(",".join(columns) + "\n")
    for i in range(nrow):
        buf.write(",".join(_fmt(c[i]) for c in cols) + "\n")
    return plots.atomic_write_text(path, buf.getvalue())


def read_csv(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """Read a CSV written by :func:`write_csv`: column name → array (float where numeric, else str)."""
    import csv

    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    header, body = rows[0], rows[1:]
    out = {}
    for k, name in enumerate(header):
        col = [r[k] for r in body]
        try:
            out[name] = np.array([float(x) for x in col])
        except ValueError:
            out[name] = np.array(col, dtype=str)
    return out


def _time_columns(times_au: np.ndarray) -> tuple[list[str], list[np.ndarray]]:
    return ["time_au", "time_fs"], [times_au, times_au * AU_TIME_IN_FS]


def _pm(v: float, e: float, digits: int = 3) -> str:
    if v is None or not np.isfinite(v):
        return "n/a"
    if e is None or not np.isfinite(e):
        return f"{v:.{digits}g}"
    return f"{v:.{digits}g} ± {e:.2g}"


def summarise_warnings(records: Iterable[dict], limit: int = 20) -> list[str]:
    """Lines "N× Category: message (trajectories a, b, …; first at step s)" grouped by message
    shape (numbers blanked), most frequent first."""
    groups: dict = {}
    for r in records:
        key = (r.get("category", "Warning"), _NUMBER_RE.sub("#", r.get("message", "")))
        g = groups.setdefault(key, {"count": 0, "trajectories": set(), "first": None, "example": r.get("message", "")})
        g["count"] += int(r.get("count", 1))
        g["trajectories"].add(int(r.get("index", -1)))
        s = int(r.get("first_step", 0))
        g["first"] = s if g["first"] is None else min(g["first"], s)
    lines = []
    for (cat, _), g in sorted(groups.items(), key=lambda kv: -kv[1]["count"])[:limit]:
        trajs = sorted(g["trajectories"])
        shown = ", ".join(str(t) for t in trajs[:8]) + (", …" if len(trajs) > 8 else "")
        lines.append(f"{g['count']}× {cat}: {g['example']} (trajectories {shown}; first at step {g['first']})")
    if len(groups) > limit:
        lines.append(f"… and {len(groups) - limit} more kinds of warning")
    return lines


def _energy_text(eh: Any) -> str:
    """An energy in Eh as "1e-03 Eh (27.2 meV)"; "n/a" when missing."""
    if eh is None:
        return "n/a"
    return f"{float(eh):.3g} Eh ({float(eh) * HARTREE_IN_EV * 1e3:.3g} meV)"


def fit_supported(life: Any, fit: Any) -> tuple[bool, str]:
    """Whether a lifetime fit may be shown as numbers: the fit passes the rule and the data show a
    decay at all; else (False, reason)."""
    if fit.supported and not life.reasons:
        return True, ""
    why = ([r for r in life.reasons if not r.startswith(("mono: ", "bi: "))] or list(fit.reasons)
           or ["fit did not converge"])
    return False, "; ".join(why)


def _circ_pm(values: np.ndarray, unit: str) -> str:
    from mapdyn.analysis.statistics import circular_stats_degrees

    m, sd, _, _ = circular_stats_degrees(values[np.isfinite(values)])
    return f"{float(m):.4g} ± {float(sd):.2g} {unit} (circular mean ± circular std, range (−180°, 180°])"


def write_report(results: AnalysisResults | TrajectorySet, folder: str | os.PathLike, *,
                 time_unit: str | None = None, title: str | None = None) -> Report:
    """Write figures, CSV files and ``summary.md`` into ``folder`` (created if missing).

    ``time_unit`` for the figures: "fs" (default for molecular sets) or "a.u." (default for
    model sets).  CSVs always carry both ``time_au`` and ``time_fs``.
    """
    if isinstance(results, TrajectorySet):
        results = analyze(results)
    if not isinstance(results, AnalysisResults):
        raise ValueError("results must be an AnalysisResults (from mapdyn.analysis.analyze) or a TrajectorySet")
    folder = os.fspath(folder)
    os.makedirs(folder, exist_ok=True)
    ts = results.tset
    tu = time_unit or ("fs" if ts.is_molecular else "a.u.")
    figs: dict = {}
    tabs: dict = {}
    notes: dict = {}

    def fig(name, fn, *args, note: str = "", **kw):
        figs[name] = fn(*args, os.path.join(folder, name + ".png"), **kw)
        notes[name] = note

    def tab(name, columns, data):
        tabs[name] = write_csv(os.path.join(folder, name + ".csv"), columns, data)

    # populations ------------------------------------------------------------------------------
    pops = results.populations
    cols, data = _time_columns(pops.times)
    for k, lab in enumerate(pops.labels):
        s = _slug(lab)
        cols += [f"P_{s}", f"low_{s}", f"high_{s}", f"se_{s}"]
        data += [pops.populations[:, k], pops.low[:, k], pops.high[:, k], pops.standard_error[:, k]]
    cols += ["n_none", "n_frames"]
    data += [pops.n_none, pops.n_frames]
    tab("populations", cols, data)
    fig("populations", plots.plot_populations, pops, time_unit=tu,
        note=(f"adiabatic populations vs time, bands: {pops.interval}; "
              "lower panel: fraction of trajectories with a frame and (SQC) in no window"))

    # initial-state population and fits ----------------------------------------------------------
    init, life = results.initial_population, results.lifetimes
    cols, data = _time_columns(init.times)
    cols += ["P_initial", "low", "high", "se"]
    data += [init.populations[:, 0], init.low[:, 0], init.high[:, 0], init.standard_error[:, 0]]
    for name, fitres in life.fits.items():
        curve = np.full(init.times.shape, np.nan)
        idx = np.searchsorted(init.times, life.times)
        if fitres.curve.shape == life.times.shape:
            curve[idx] = fitres.curve
        cols.append(f"fit_{name}")
        data.append(curve)
    tab("initial_population", cols, data)
    fig("initial_population", plots.plot_initial_population, init, life, time_unit=tu,
        note="population of each trajectory's initial state with its band and the single/bi-exponential fits")

    # observables -------------------------------------------------------------------------------
    for obs in results.observables:
        name = "observable_" + _slug(obs.name)
        cols, data = _time_columns(obs.times)
        u = "angstrom" if obs.unit == "Å" else obs.unit
        stat = "circmean" if obs.circular else "mean"
        cols += [f"{stat}_{u}", f"{'circstd' if obs.circular else 'std'}_{u}", f"q10_{u}", f"q90_{u}", "n"]
        data += [obs.mean, obs.std, obs.q10, obs.q90, obs.n]
        tab(name, cols, data)
        fig(name, plots.plot_observable, obs, time_unit=tu,
            note=f"{obs.name} ({obs.unit}): ensemble {obs.statistic} and 10/90 % quantiles"
                 + (" (of deviations from the circular mean; angles folded into (−180°, 180°])" if obs.circular else ""))

    for ent in results.first_entries:
        name = f"first_entry_state{ent.state}_" + _slug(ent.name)
        u = "angstrom" if ent.unit == "Å" else ent.unit
        tab(name, ["trajectory", "time_au", "time_fs", f"value_{_slug(u)}"],
            [ent.indices, ent.times, ent.times * AU_TIME_IN_FS, ent.values])
        fig(name, plots.plot_first_entry, ent, time_unit=tu,
            note=f"histogram of {ent.name} when trajectories first enter state {ent.state} ({ent.criterion})")

    # energy -----------------------------------------------------------------------------------
    en = results.energy
    if en is not None:
        tab("energy_drift", ["trajectory", "drift_hartree", "max_deviation_hartree", "drift_rate_hartree_per_au",
                             "flagged"], [en.indices, en.drift, en.max_deviation, en.drift_rate, en.flagged])
        fig("energy_drift", plots.plot_energy_drift, en,
            note="histogram of total-energy drift E(end) − E(0) per trajectory (meV) with the flag tolerance")

    # outcomes: ran to the end time, ended in a channel, failed ---------------------------------------
    outcome = ts.outcomes()
    if any(o not in STATUSES for o in outcome):
        last = ts.last_frame
        tab("outcomes", ["trajectory", "outcome", "last_frame_time_au", "last_frame_time_fs", "reason"],
            [ts.indices, list(outcome), [ts.times[k] if k >= 0 else np.nan for k in last],
             [ts.times_fs[k] if k >= 0 else np.nan for k in last], list(ts.reasons)])

    # products ---------------------------------------------------------------------------------
    br = results.branching
    if br is not None and len(br.labels):
        tab("branching", ["product", "count", "ratio", "low", "high", "se"],
            [list(br.labels), br.counts, br.ratios, br.low, br.high, br.standard_error])
        fig("branching", plots.plot_branching, br,
            note=f"branching ratios of the final geometries with {int(round(100 * br.confidence_level))} % bootstrap intervals")

    # vibrational ------------------------------------------------------------------------------
    for dist in results.vibrational:
        name = "vibrational_" + _slug(dist.fragment)
        tab(name, ["v", "histogram", "histogram_low", "histogram_high", "binned", "binned_low", "binned_high"],
            [dist.levels, dist.histogram, dist.histogram_low, dist.histogram_high, dist.binned,
             dist.binned_low, dist.binned_high])
        tab(name + "_continuous", ["trajectory", "v_continuous", "internal_energy_hartree", "angular_momentum_au"],
            [dist.indices, dist.v_continuous, dist.internal_energy, dist.angular_momentum])
        fig(name, plots.plot_vibrational_distribution, dist,
            note=(f"vibrational level populations of {dist.fragment} from histogram boxes and from symmetric bins "
                  f"|v − n| ≤ {dist.bin_half_width:.3g}; right: continuous Bohr–Sommerfeld v"))

    # spectrum ---------------------------------------------------------------------------------
    spec = results.spectrum
    if spec is not None:
        cols = ["energy_ev", "cross_section_angstrom2"] + [f"S{k + 1}_angstrom2"
                                                          for k in range(spec.per_state_cross_section_angstrom2.shape[0])]
        tab("spectrum", cols, [spec.energy_ev, spec.cross_section_angstrom2] + list(spec.per_state_cross_section_angstrom2))
        fig("spectrum", plots.plot_spectrum, spec,
            note="nuclear-ensemble absorption spectrum of the sampled geometries (Å²) with per-state contributions")

    sc = getattr(results, "scattering", None)
    if sc is not None:
        F = sc.transmission.size
        tab("scattering", ["channel", "state", "probability", "standard_error", "low", "high"],
            [["transmission"] * F + ["reflection"] * F, list(range(F)) * 2,
             np.concatenate([sc.transmission, sc.reflection]),
             np.concatenate([sc.transmission_error, sc.reflection_error]),
             np.concatenate([sc.transmission_low, sc.reflection_low]),
             np.concatenate([sc.transmission_high, sc.reflection_high])])

    tr = getattr(results, "transfers", None)
    if tr is not None:
        _write_transfers(tr, folder, tab, fig, tu)

    summary = _summary(results, figs, tabs, notes, title, tu)
    spath = plots.atomic_write_text(os.path.join(folder, "summary.md"), summary)
    return Report(folder, figs, tabs, spath)


def _coordinate_column(name: str, unit: str) -> str:
    return f"{_slug(name)}_{'angstrom' if unit == 'Å' else _slug(unit)}"


def _write_transfers(tr: Any, folder: str, tab, fig, tu: str) -> None:
    """transfers.csv, transfer_times.csv/.png and, with families, transfer_geometries.png,
    transfer_families.csv and transfer_families/family_NN.xyz (stale family files removed)."""
    tb, fam = tr.table, tr.families
    cols = ["trajectory", "time_au", "time_fs", "from_state", "to_state", "gap_ev", "coupling_norm_per_bohr", "family"]
    data: list = [tb.trajectory, tb.time, tb.time_fs, tb.from_state, tb.to_state, tb.gap * HARTREE_IN_EV,
                  tb.coupling_norm, fam.labels + np.where(fam.labels >= 0, 1, 0)]
    for q, (name, unit) in enumerate(zip(tb.names, tb.units)):
        cols.append(_coordinate_column(name, unit))
        data.append(tb.values[:, q])
    tab("transfers", cols, data)
    t_plot = tb.time_fs if tu == "fs" else tb.time
    edges = plots.transfer_time_edges(t_plot, tb.end_time * (AU_TIME_IN_FS if tu == "fs" else 1.0))
    kinds = sorted({(int(a), int(b)) for a, b in zip(tb.from_state, tb.to_state)})
    u = "fs" if tu == "fs" else "au"
    hcols = [f"bin_low_{u}", f"bin_high_{u}"] + [f"count_{a}_to_{b}" for a, b in kinds]
    hdata = [edges[:-1], edges[1:]] + [np.histogram(t_plot[(tb.from_state == a) & (tb.to_state == b)], edges)[0]
                                       for a, b in kinds]
    tab("transfer_times", hcols, hdata)
    fig("transfer_times", plots.plot_transfer_times, tb, time_unit=tu,
        note=f"histogram of transfer times by kind of transfer; rule: {tb.criterion}")
    if not tb.names:
        return
    fig("transfer_geometries", plots.plot_transfer_geometries, tb, fam,
        note="internal coordinates at each transfer, stacked by family of transfer geometries")
    K = fam.sizes.size
    fcols = ["family", "size", "representative_trajectory", "representative_time_fs"]
    fdata: list = [np.arange(1, K + 1), fam.sizes, tb.trajectory[fam.representatives], tb.time_fs[fam.representatives]]
    for q, (name, unit) in enumerate(zip(tb.names, tb.units)):
        c = _coordinate_column(name, unit)
        circ = tb.kinds[q] == "dihedral"
        fcols += [("circmean_" if circ else "mean_") + c, ("circstd_" if circ else "std_") + c]
        fdata += [fam.means[:, q], fam.spreads[:, q]]
    tab("transfer_families", fcols, fdata)
    xyz_dir = os.path.join(folder, "transfer_families")
    if tb.positions is not None and tr.symbols is not None:
        os.makedirs(xyz_dir, exist_ok=True)
        for f in range(K):
            r = int(fam.representatives[f])
            _write_xyz(os.path.join(xyz_dir, f"family_{f + 1:02d}.xyz"), tr.symbols, tb.positions[r],
                       f"family {f + 1} of {K}: {fam.sizes[f]} transfers; representative: trajectory "
                       f"{tb.trajectory[r]} at t = {tb.time_fs[r]:.4f} fs, {tb.from_state[r]} -> {tb.to_state[r]}; "
                       "positions in Angstrom")
    if os.path.isdir(xyz_dir):
        for name in os.listdir(xyz_dir):
            m = re.fullmatch(r"family_(\d+)\.xyz", name)
            if m and int(m.group(1)) > K:
                os.remove(os.path.join(xyz_dir, name))


def _write_xyz(path: str, symbols: Sequence[str], positions_bohr: np.ndarray, comment: str) -> str:
    """Plain XYZ (Å) of one structure, written atomically."""
    from mapdyn.units import BOHR_IN_ANGSTROM

    pos = np.asarray(positions_bohr, dtype=float) * BOHR_IN_ANGSTROM
    lines = [str(len(symbols)), comment.replace("\n", " ")]
    lines += [f"{s:<2s} {x:16.10f} {y:16.10f} {z:16.10f}" for s, (x, y, z) in zip(symbols, pos)]
    return plots.atomic_write_text(path, "\n".join(lines) + "\n")


def _transfer_summary(tr: Any) -> list[str]:
    tb, fam = tr.table, tr.families
    L = ["## Transfers between states", f"Rule: {tb.criterion}.", ""]
    if tb.count == 0:
        L += ["No transfer counted.", ""]
        return L
    ntr = len(set(tb.trajectory.tolist()))
    L.append(f"- {tb.count} transfer{'s' if tb.count != 1 else ''} in {ntr} trajector{'ies' if ntr != 1 else 'y'}; "
             "transfer times (fs): median "
             f"{np.median(tb.time_fs):.4g}, 10–90 % {np.quantile(tb.time_fs, 0.1):.4g}–{np.quantile(tb.time_fs, 0.9):.4g}")
    kinds = sorted({(int(a), int(b)) for a, b in zip(tb.from_state, tb.to_state)})
    for a, b in kinds:
        sel = (tb.from_state == a) & (tb.to_state == b)
        gap = tb.gap[sel] * HARTREE_IN_EV
        g = f", gap at transfer {np.nanmedian(gap):.3g} eV (median)" if np.isfinite(gap).any() else ""
        L.append(f"- {a} → {b}: {int(sel.sum())}, first at {np.min(tb.time_fs[sel]):.4g} fs{g}")
    for q, (name, unit) in enumerate(zip(tb.names, tb.units)):
        v = tb.values[:, q]
        if not np.isfinite(v).any():
            continue
        if tb.kinds[q] == "dihedral":
            L.append(f"- {name} at transfer: {_circ_pm(v, unit)}")
        else:
            L.append(f"- {name} at transfer: {np.nanmean(v):.4g} ± {np.nanstd(v):.2g} {unit} (mean ± std)")
    L.append("")
    if fam.skipped:
        L += [f"Families of transfer geometries: not formed ({fam.skipped}).", ""]
        return L
    L.append(f"Families of transfer geometries ({fam.rule}); representatives in `transfer_families/`:")
    L.append("")
    heads = [f"{n} / {u}" for n, u in zip(tb.names, tb.units)]
    L.append("| family | size | " + " | ".join(heads) + " | representative |")
    L.append("|---" * (len(heads) + 3) + "|")
    for f in range(fam.sizes.size):
        r = int(fam.representatives[f])
        cells = [f"{fam.means[f, q]:.4g} ± {fam.spreads[f, q]:.2g}" for q in range(len(heads))]
        L.append(f"| {f + 1} | {fam.sizes[f]} | " + " | ".join(cells) +
                 f" | trajectory {tb.trajectory[r]}, {tb.time_fs[r]:.4g} fs |")
    L.append("")
    L.append("Torsions: circular mean ± circular std (degrees); other coordinates: mean ± std.")
    L.append("")
    return L


def _summary(res: AnalysisResults, figs: dict, tabs: dict, notes: dict, title: str | None, tu: str) -> str:
    ts = res.tset
    L: list[str] = []
    L.append(f"# {title or ts.metadata.get('name') or 'mapdyn analysis report'}")
    L.append("")
    L.append("## Inputs")
    L.append(f"- method: {ts.options.long_name()} [{ts.options.describe()}]")
    L.append(f"- trajectories: {ts.ntraj}; states: {ts.nstates}; time points: {ts.times.size}, "
             f"t = {ts.times[0]:.6g} … {ts.times[-1]:.6g} a.u. ({ts.times[0] * AU_TIME_IN_FS:.4g} … "
             f"{ts.times[-1] * AU_TIME_IN_FS:.4g} fs)")
    states, counts = np.unique(ts.initial_states, return_counts=True)
    L.append("- initial states: " + ", ".join(f"{s}: {c}" for s, c in zip(states, counts)))
    for k, v in ts.metadata.items():
        if k != "method":
            shown = f"{v:.6g}" if isinstance(v, (float, np.floating)) else v  # no 16-digit floats in prose
            L.append(f"- {k}: {shown}")
    st = res.settings
    if st:
        L.append(f"- analysis: {int(round(100 * st.get('confidence_level', 0.95)))} % bootstrap intervals, "
                 f"{st.get('n_resamples')} resamples (seed {st.get('bootstrap_seed')}), "
                 f"energy tolerance {_energy_text(st.get('energy_tolerance_hartree'))}")
    L.append("")
    L.append("## Counts")
    sc = ts.status_counts()
    L.append("- status: " + ", ".join(f"{k} {v}" for k, v in sc.items()))
    outcome = ts.outcomes()
    channels = sorted({o for o in outcome if o not in STATUSES})
    for ch in channels:
        rows = [j for j, o in enumerate(outcome) if o == ch]
        t_end = np.array([ts.times_fs[ts.last_frame[j]] for j in rows if ts.last_frame[j] >= 0])
        L.append(f"- ended in the channel \"{ch}\" (counted as finished, an outcome): {len(rows)}"
                 + (f", last frames at {t_end.min():.4g}–{t_end.max():.4g} fs (median {np.median(t_end):.4g} fs)"
                    if t_end.size else ""))
    if channels:
        L.append(f"- ran to the end time: {sum(1 for o in outcome if o == 'finished')}")
    pops = res.populations
    L.append(f"- estimator: {pops.estimator}")
    if ts.options.method == "sqc":
        L.append(f"- trajectories in no window: {int(pops.n_none[-1])} at the last time, at most "
                 f"{int(pops.n_none.max())}")
    L.append("")
    L.append(f"Populations at the last time (t = {pops.times[-1] * AU_TIME_IN_FS:.4g} fs; interval: "
             f"{pops.interval or pops.bootstrap_method}):")
    L.append("")
    L.append("| state | population | interval |")
    L.append("|---|---|---|")
    for k, lab in enumerate(pops.labels):
        L.append(f"| {lab} | {pops.populations[-1, k]:.4f} | [{pops.low[-1, k]:.4f}, {pops.high[-1, k]:.4f}] |")
    L.append("")
    sc = getattr(res, "scattering", None)
    if sc is not None:
        L.append("## Scattering channels")
        a, b = sc.region
        L.append(f"A scattering study: what it measures is where the packet ends up, so no lifetime is fitted. "
                 f"Trajectories that left the interaction region [{a:.3g}, {b:.3g}] bohr at their last frame: "
                 f"{sc.n_counted} counted, {sc.n_unassigned} in no window, {sc.n_inside} still inside (left out).")
        L.append(f"Estimator: {sc.estimator}; ± standard error; "
                 f"{int(round(100 * sc.confidence_level))} % Clopper–Pearson interval.")
        L.append("")
        L.append("| channel | state | probability | interval |")
        L.append("|---|---|---|---|")
        for name, p_, e_, lo_, hi_ in (("transmission", sc.transmission, sc.transmission_error, sc.transmission_low,
                                        sc.transmission_high),
                                       ("reflection", sc.reflection, sc.reflection_error, sc.reflection_low,
                                        sc.reflection_high)):
            for f in range(p_.size):
                L.append(f"| {name} | {f} | {p_[f]:.4f} ± {e_[f]:.2g} | [{lo_[f]:.4f}, {hi_[f]:.4f}] |")
        L.append("")
    L.append("## Lifetime of the initial state")
    life = res.lifetimes
    if sc is not None:
        L.append("Not reported for a scattering study (the initial-state population follows the passage through "
                 "the coupling region, not a decay); see the scattering channels above.")
        L.append("")
    elif life.lifetime is None:
        L.append("No lifetime reported: " + ("; ".join(life.reasons) if life.reasons else "not supported") + ".")
    else:
        tau_fs, err_fs = life.lifetime_fs()
        what = "τ" if life.preferred == "mono" else "amplitude-weighted mean a·τ1 + (1 − a)·τ2"
        L.append(f"**{_pm(tau_fs, err_fs, 4)} fs** ({what}, {'single' if life.preferred == 'mono' else 'bi'}-exponential fit).")
    L.append("")
    if life.fits and sc is None:
        L.append("| model | parameters (times in fs) | reduced χ² | AIC | supported |")
        L.append("|---|---|---|---|---|")
        for name, f in life.fits.items():
            ok, why = fit_supported(life, f)
            if ok:
                parts = []
                for p in f.names:
                    scale = AU_TIME_IN_FS if p.startswith("tau") or p == "delay" else 1.0
                    parts.append(f"{p} = {_pm(f.parameters[p] * scale, f.uncertainties[p] * scale)}")
                params = ", ".join(parts)
            else:
                params = f"not supported ({why})"
            d = f.diagnostics
            rc = f"{d['reduced_chi2']:.3g}" if "reduced_chi2" in d else "n/a"
            aic = f"{d['aic']:.4g}" if "aic" in d else "n/a"
            sup = "yes" if ok else "no"
            L.append(f"| {name} | {params} | {rc} | {aic} | {sup} |")
        L.append("")
        meth = {f.diagnostics.get("uncertainty_method") for f in life.fits.values() if f.diagnostics.get("converged")}
        L.append("Uncertainties (1σ): " + ", ".join(sorted(m for m in meth if m)) + ".")
        L.append("")
    if sc is None:
        L.append(f"Rule: {life.rule}")
    L.append("")
    if res.observables or res.first_entries:
        L.append("## Geometric observables")
        for o in res.observables:
            rng = ", angles folded into (−180°, 180°]" if o.circular else ""
            L.append(f"- {o.name}: {o.mean[0]:.4g} ± {o.std[0]:.2g} {o.unit} at the start, "
                     f"{o.mean[-1]:.4g} ± {o.std[-1]:.2g} {o.unit} at the end ({o.statistic}{rng})")
        for e in res.first_entries:
            ok = np.isfinite(e.times)
            if ok.any():
                if not np.isfinite(e.values).any():
                    extra = ""
                elif getattr(e, "circular", False):
                    extra = f", {e.name} there {_circ_pm(e.values, e.unit)}"
                else:
                    extra = f", {e.name} there {np.nanmean(e.values):.4g} ± {np.nanstd(e.values):.2g} {e.unit} (mean ± std)"
                L.append(f"- first entry into state {e.state}: {int(ok.sum())} of {ok.size} trajectories, "
                         f"mean time {np.nanmean(e.times) * AU_TIME_IN_FS:.4g} fs{extra}")
            else:
                L.append(f"- first entry into state {e.state}: no trajectory entered")
        L.append("")
    if getattr(res, "transfers", None) is not None:
        L.extend(_transfer_summary(res.transfers))
    br = res.branching
    if br is not None:
        L.append("## Products")
        L.append(f"{br.n_classified} trajectories classified ({len(br.excluded)} excluded: not finished or failed).")
        L.append("")
        L.append("| product | count | ratio | interval |")
        L.append("|---|---|---|---|")
        for k, lab in enumerate(br.labels):
            L.append(f"| {lab} | {br.counts[k]} | {br.ratios[k]:.4f} | [{br.low[k]:.4f}, {br.high[k]:.4f}] |")
        L.append("")
    for dist in res.vibrational:
        L.append(f"## Vibrational levels of {dist.fragment}")
        L.append(f"- potential: {dist.potential_source}")
        rng_note = (f" ({dist.n_outside_range} with r outside the potential's range)"
                    if getattr(dist, "n_outside_range", 0) else "")
        L.append(f"- {dist.n_bound} bound, {dist.n_unbound} unbound{rng_note}; symmetric bins: {dist.n_outside_bins} "
                 f"bound fragments in no window (half-width {dist.bin_half_width:.4g})")
        L.append(f"- normalisation: {dist.normalisation}")
        L.append("")
    en = res.energy
    L.append("## Energy conservation")
    if en is None:
        L.append("No energies recorded.")
    else:
        e = en.ensemble
        L.append(f"- |drift| mean {e['mean_abs_drift'] * HARTREE_IN_EV * 1e3:.3g} meV, median "
                 f"{e['median_abs_drift'] * HARTREE_IN_EV * 1e3:.3g} meV, max {e['max_abs_drift'] * HARTREE_IN_EV * 1e3:.3g} meV; "
                 f"max deviation {e['max_deviation'] * HARTREE_IN_EV * 1e3:.3g} meV")
        L.append(f"- flagged (max deviation > {en.tolerance:.3g} Eh = {en.tolerance * HARTREE_IN_EV * 1e3:.3g} meV): "
                 f"{e['n_flagged']}")
    L.append("")
    L.append("## Warnings raised during the dynamics")
    wrec = getattr(ts, "warnings", None) or []
    if not wrec:
        L.append("None recorded.")
    else:
        ntr = len({int(r.get("index", -1)) for r in wrec})
        L.append(f"{len(wrec)} distinct warning(s) in {ntr} trajectory record(s) (per-trajectory details in "
                 "`warnings.json` next to each trajectory's checkpoints):")
        L.append("")
        L.extend("- " + line for line in summarise_warnings(wrec))
    L.append("")
    L.append("## Flagged and failed trajectories")
    if not res.flags:
        L.append("None.")
    for fl in res.flags[:50]:
        L.append(f"- trajectory {fl.index} ({fl.status}): {'; '.join(fl.reasons)}")
    if len(res.flags) > 50:
        L.append(f"- … and {len(res.flags) - 50} more (see energy_drift.csv)")
    L.append("")
    L.append("## Figures")
    for name, path in figs.items():
        L.append(f"- `{os.path.basename(path)}`: {notes.get(name, '')}")
    L.append("")
    L.append("## Data files")
    L.append("Every plotted curve is in a CSV next to its figure: " + ", ".join(
        f"`{os.path.basename(p)}`" for p in tabs.values()) + ".")
    L.append("")
    return "\n".join(L)
