"""Figures for analysis results (matplotlib, Agg canvas, mapdyn house style), written atomically.

Every figure has labelled axes with units and a legend.  Times are plotted in fs for molecular
sets and in atomic units for model sets (``time_unit`` = "fs" or "a.u.").
"""

from __future__ import annotations

import contextlib
import os
from typing import Any

import numpy as np

from mapdyn.files import atomic_open, atomic_write_text

__all__ = [
    "HOUSE_STYLE",
    "STATE_COLOURS",
    "atomic_write_text",
    "save_figure",
    "new_figure",
    "plot_populations",
    "plot_initial_population",
    "plot_observable",
    "plot_first_entry",
    "plot_energy_drift",
    "plot_branching",
    "plot_vibrational_distribution",
    "plot_spectrum",
    "transfer_time_edges",
    "plot_transfer_times",
    "plot_transfer_geometries",
]

#: Our state palette: ink blue, ember, moss, plum, ochre, slate, rose, teal.
STATE_COLOURS = ("#1f3a93", "#d35400", "#3c7a3b", "#7d3c98", "#b7950b", "#566573", "#c0392b", "#138d90")

#: rc parameters of the house style (applied with matplotlib.rc_context around each figure).
HOUSE_STYLE = {
    "font.family": "DejaVu Sans",
    "font.size": 9.5,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.labelsize": 9.5,
    "axes.edgecolor": "#33373d",
    "axes.linewidth": 0.8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#d9dde3",
    "grid.linewidth": 0.6,
    "grid.linestyle": "-",
    "axes.facecolor": "#fbfbf8",
    "figure.facecolor": "white",
    "axes.prop_cycle": __import__("cycler").cycler(color=list(STATE_COLOURS)),
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "xtick.direction": "out",
    "ytick.direction": "out",
    "xtick.labelsize": 8.5,
    "ytick.labelsize": 8.5,
    "lines.linewidth": 1.7,
}

_FIGSIZE = (6.4, 4.0)


@contextlib.contextmanager
def new_figure(nrows: int = 1, ncols: int = 1, figsize=_FIGSIZE, **kw):
    """A Figure on an Agg canvas (no pyplot state) under the house style; yields (fig, axes)."""
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    with matplotlib.rc_context(HOUSE_STYLE):
        fig = Figure(figsize=figsize)
        FigureCanvasAgg(fig)
        axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
        yield fig, axes


def save_figure(fig, path: str | os.PathLike, dpi: int = 150) -> str:
    """Save ``fig`` as PNG/PDF/SVG (by suffix) atomically; returns the path."""
    path = os.fspath(path)
    fmt = os.path.splitext(path)[1].lstrip(".").lower() or "png"
    if fmt not in ("png", "pdf", "svg"):
        raise ValueError(f"figure path must end in .png, .pdf or .svg, got {path!r}")
    fig.tight_layout()
    with atomic_open(path, "wb") as fh:
        fig.savefig(fh, format=fmt, dpi=dpi)
    return path


def _integer_counts(ax) -> None:
    from matplotlib.ticker import MaxNLocator

    ax.yaxis.set_major_locator(MaxNLocator(integer=True))


def _time(times_au: np.ndarray, time_unit: str) -> tuple[np.ndarray, str]:
    from mapdyn.units import AU_TIME_IN_FS

    if time_unit == "fs":
        return np.asarray(times_au) * AU_TIME_IN_FS, "time / fs"
    if time_unit == "a.u.":
        return np.asarray(times_au), "time / a.u."
    raise ValueError(f"time_unit={time_unit!r} is not allowed; choose 'fs' or 'a.u.'")


def plot_populations(series: Any, path: str | os.PathLike, *, time_unit: str = "fs", title: str | None = None) -> str:
    """Populations (lines) with bootstrap bands per state; lower panel: trajectories in no window
    (SQC) and trajectories contributing, as fractions of the ensemble."""
    t, xlabel = _time(series.times, time_unit)
    sqc = series.estimator.startswith("SQC")
    with new_figure(2, 1, figsize=(6.4, 5.0), sharex=True, gridspec_kw={"height_ratios": [3.2, 1]}) as (fig, ax):
        top, bottom = ax[0, 0], ax[1, 0]
        for k, label in enumerate(series.labels):
            c = STATE_COLOURS[k % len(STATE_COLOURS)]
            top.fill_between(t, series.low[:, k], series.high[:, k], color=c, alpha=0.22, lw=0)
            top.plot(t, series.populations[:, k], color=c, label=label)
        top.set_ylabel("population")
        top.set_ylim(-0.02, 1.02)
        pct = int(round(100 * series.confidence_level))
        top.legend(loc="best", title=f"bands: {pct} % bootstrap ({series.bootstrap_method}), ⊇ Clopper–Pearson",
                   title_fontsize=8)
        top.set_title(title or ("Adiabatic populations, " + ("SQC windows" if sqc else "Ehrenfest")))
        ntot = max(int(series.n_frames.max()), 1)
        bottom.plot(t, series.n_frames / ntot, color="#566573", lw=1.2, label="with a frame")
        if sqc:
            bottom.plot(t, series.n_none / ntot, color="#c0392b", lw=1.2, label="in no window")
        bottom.set_ylabel(f"fraction of {ntot}")
        bottom.set_xlabel(xlabel)
        bottom.set_ylim(-0.03, 1.05)
        bottom.legend(loc="center right", ncol=2)
        return save_figure(fig, path)


def plot_initial_population(series: Any, lifetimes: Any, path: str | os.PathLike, *, time_unit: str = "fs",
                            title: str | None = None) -> str:
    """Initial-state population with its band and the exponential fits (solid = preferred)."""
    from mapdyn.units import AU_TIME_IN_FS

    t, xlabel = _time(series.times, time_unit)
    scale = AU_TIME_IN_FS if time_unit == "fs" else 1.0
    unit = "fs" if time_unit == "fs" else "a.u."
    with new_figure() as (fig, ax):
        ax = ax[0, 0]
        c = STATE_COLOURS[0]
        ax.fill_between(t, series.low[:, 0], series.high[:, 0], color=c, alpha=0.2, lw=0,
                        label=f"{int(round(100 * series.confidence_level))} % band (bootstrap ⊇ Clopper–Pearson)")
        ax.plot(t, series.populations[:, 0], color=c, label="initial-state population")
        tf, _ = _time(lifetimes.times, time_unit)
        styles = {"mono": ("#d35400", "single exponential"), "bi": ("#3c7a3b", "bi-exponential")}
        for name, fit in lifetimes.fits.items():
            if not fit.diagnostics.get("converged"):
                continue
            colour, label = styles[name]
            pref = lifetimes.preferred == name
            why = [r for r in lifetimes.reasons if not r.startswith(("mono: ", "bi: "))] or list(fit.reasons)
            if not fit.supported or lifetimes.reasons:
                short = (why[0] if why else "rejected").split(" (")[0]   # the reason without its explanation
                short = short if len(short) <= 45 else short[:42] + "…"
                ax.plot(tf, fit.curve, color=colour, ls=":", lw=1.0, label=f"{label}: not supported ({short})")
                continue
            if name == "mono":
                label += f", τ = {fit.parameters['tau'] * scale:.4g} ± {fit.uncertainties['tau'] * scale:.2g} {unit}"
            else:
                label += (f", τ1 = {fit.parameters['tau1'] * scale:.3g}, τ2 = {fit.parameters['tau2'] * scale:.3g} {unit}"
                          f", a = {fit.parameters['a']:.2f}")
            label += " (preferred)" if pref else ""
            ax.plot(tf, fit.curve, color=colour, ls="-" if pref else "--", lw=1.4 if pref else 1.1, label=label)
        ax.set_xlabel(xlabel)
        ax.set_ylabel("population of the initial state")
        ax.set_ylim(-0.02, 1.02)
        if lifetimes.lifetime is None:
            ax.text(0.98, 0.97, "no lifetime supported by the data", transform=ax.transAxes, ha="right",
                    va="top", fontsize=8.5, color="#c0392b")
        ax.legend(loc="lower left", fontsize=7.8)
        ax.set_title(title or "Decay of the initial state")
        return save_figure(fig, path)


def plot_observable(series: Any, path: str | os.PathLike, *, time_unit: str = "fs", title: str | None = None) -> str:
    """Ensemble mean ± standard deviation (band) and 10/90 % quantiles of one observable."""
    t, xlabel = _time(series.times, time_unit)
    with new_figure() as (fig, ax):
        ax = ax[0, 0]
        c = STATE_COLOURS[3]
        circ = getattr(series, "circular", False)
        mean, q10, q90 = (np.asarray(v, dtype=float) for v in (series.mean, series.q10, series.q90))
        if circ:  # follow the mean continuously through ±180°: shift each time point by whole turns
            ok = np.isfinite(mean)
            shift = np.zeros_like(mean)
            shift[ok] = np.degrees(np.unwrap(np.radians(mean[ok]))) - mean[ok]
            mean, q10, q90 = mean + shift, q10 + shift, q90 + shift
        ax.fill_between(t, mean - series.std, mean + series.std, color=c, alpha=0.2, lw=0,
                        label="circular mean ± circular std" if circ else "mean ± standard deviation")
        ax.plot(t, mean, color=c, label="circular mean" if circ else "ensemble mean")
        ax.plot(t, q10, color=c, ls=":", lw=1.0, label="10 % / 90 % quantiles")
        ax.plot(t, q90, color=c, ls=":", lw=1.0)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(f"{series.name} / {series.unit}" + (" (continuous in time, modulo 360)" if circ else ""))
        ax.legend(loc="best")
        ax.set_title(title or f"{series.name} over the ensemble")
        return save_figure(fig, path)


def plot_first_entry(entry: Any, path: str | os.PathLike, *, time_unit: str = "fs", bins: int = 20,
                     title: str | None = None) -> str:
    """Histogram of the value (or time) at which trajectories first enter a state."""
    use_values = np.isfinite(entry.values).any()
    if use_values:
        data, xlabel = entry.values[np.isfinite(entry.values)], f"{entry.name} / {entry.unit}"
        if getattr(entry, "circular", False):
            xlabel += " (folded into (−180, 180])"
    else:
        data, xlabel = _time(entry.times[np.isfinite(entry.times)], time_unit)
        xlabel = "entry " + xlabel
    with new_figure() as (fig, ax):
        ax = ax[0, 0]
        if data.size:
            if use_values and getattr(entry, "circular", False):
                bins = np.linspace(-180.0, 180.0, int(bins) + 1)
            ax.hist(data, bins=bins, color=STATE_COLOURS[2], alpha=0.8, edgecolor="white",
                    label=f"{data.size} of {entry.times.size} trajectories")
        else:
            ax.text(0.5, 0.5, "no trajectory entered this state", transform=ax.transAxes, ha="center")
        ax.set_xlabel(xlabel)
        ax.set_ylabel("trajectories")
        _integer_counts(ax)
        if data.size:
            ax.legend(loc="best")
        ax.set_title(title or f"At first entry into state {entry.state}")
        return save_figure(fig, path)


def plot_energy_drift(energy: Any, path: str | os.PathLike, *, bins: int = 30, title: str | None = None) -> str:
    """Histogram of the total-energy drift E(end) − E(0) per trajectory, in meV, with the tolerance."""
    from mapdyn.units import HARTREE_IN_EV

    d = energy.drift[np.isfinite(energy.drift)] * HARTREE_IN_EV * 1e3
    tol = energy.tolerance * HARTREE_IN_EV * 1e3
    with new_figure() as (fig, ax):
        ax = ax[0, 0]
        if d.size:
            ax.hist(d, bins=bins, color=STATE_COLOURS[0], alpha=0.85, edgecolor="white",
                    label=f"{d.size} trajectories")
        lo, hi = ax.get_xlim()
        if lo <= -tol or tol <= hi:
            ax.axvline(tol, color="#c0392b", ls="--", lw=1.0, label=f"tolerance ±{tol:.3g} meV (on max deviation)")
            ax.axvline(-tol, color="#c0392b", ls="--", lw=1.0)
            ax.set_xlim(min(lo, -1.1 * tol), max(hi, 1.1 * tol))
            off = ""
        else:
            off = f"; tolerance ±{tol:.3g} meV off scale"
        ax.set_xlabel("energy drift E(end) − E(0) / meV")
        ax.set_ylabel("trajectories")
        _integer_counts(ax)
        ax.legend(loc="best")
        if lo <= -tol or tol <= hi:
            off = ""
        ax.set_title(title or f"Energy conservation ({energy.ensemble['n_flagged']} flagged{off})")
        return save_figure(fig, path)


def plot_branching(branching: Any, path: str | os.PathLike, *, title: str | None = None) -> str:
    """Branching ratios as bars with bootstrap error bars."""
    x = np.arange(len(branching.labels))
    with new_figure() as (fig, ax):
        ax = ax[0, 0]
        r = branching.ratios
        err = np.vstack([r - branching.low, branching.high - r])
        ax.bar(x, r, color=[STATE_COLOURS[k % len(STATE_COLOURS)] for k in range(len(x))], alpha=0.85,
               label=f"{branching.n_classified} classified trajectories")
        ax.errorbar(x, r, yerr=err, fmt="none", ecolor="#33373d", capsize=4, lw=1.0,
                    label=f"{int(round(100 * branching.confidence_level))} % bootstrap interval")
        ax.set_xticks(x, branching.labels)
        ax.set_ylabel("branching ratio")
        ax.set_ylim(0, 1.05)
        ax.set_xlabel("product")
        ax.legend(loc="upper right")
        ax.set_title(title or "Products from the final geometries")
        return save_figure(fig, path)


def plot_vibrational_distribution(dist: Any, path: str | os.PathLike, *, title: str | None = None) -> str:
    """Population per vibrational level from plain histogram boxes and from symmetric bins."""
    v = np.asarray(dist.levels)
    w = 0.38
    with new_figure(1, 2, figsize=(8.6, 3.8), gridspec_kw={"width_ratios": [2.2, 1]}) as (fig, ax):
        a, b = ax[0, 0], ax[0, 1]
        err_h = np.vstack([dist.histogram - dist.histogram_low, dist.histogram_high - dist.histogram])
        err_w = np.vstack([dist.binned - dist.binned_low, dist.binned_high - dist.binned])
        a.bar(v - w / 2, dist.histogram, width=w, color=STATE_COLOURS[0], alpha=0.85,
              label="histogram boxes [v − ½, v + ½)")
        a.errorbar(v - w / 2, dist.histogram, yerr=err_h, fmt="none", ecolor="#33373d", capsize=2, lw=0.8)
        a.bar(v + w / 2, dist.binned, width=w, color=STATE_COLOURS[1], alpha=0.85,
              label=f"symmetric bins |v − n| ≤ {dist.bin_half_width:.3g}")
        a.errorbar(v + w / 2, dist.binned, yerr=err_w, fmt="none", ecolor="#33373d", capsize=2, lw=0.8)
        a.set_xlabel("vibrational level v")
        a.set_ylabel("population (fraction of bound fragments)")
        a.set_xticks(v)
        a.legend(loc="upper right")
        a.set_title("Population per level")
        fig.suptitle(title or f"Vibrational levels of {dist.fragment}", fontsize=10, fontweight="bold", x=0.01,
                     ha="left")
        cont = dist.v_continuous[np.isfinite(dist.v_continuous)]
        if cont.size:
            edges = np.arange(-0.5, max(float(cont.max()), len(v) - 0.5) + 0.25, 0.25)
            b.hist(cont, bins=edges, color=STATE_COLOURS[5], alpha=0.85, edgecolor="white",
                   label=f"{cont.size} bound, {dist.n_unbound} unbound")
            b.legend(loc="upper right", fontsize=7.5)
        else:
            for axis, text in ((a, "no bound fragment in the selected trajectories"), (b, "none")):
                axis.text(0.5, 0.5, text, transform=axis.transAxes, ha="center", va="center", fontsize=8.5,
                          color="#c0392b")
        b.set_xlabel("continuous v (Bohr–Sommerfeld)")
        b.set_ylabel("fragments")
        _integer_counts(b)
        b.set_title("Continuous quantum number")
        return save_figure(fig, path)


def plot_spectrum(spectrum: Any, path: str | os.PathLike, *, title: str | None = None) -> str:
    """Nuclear-ensemble absorption cross section (Å²) vs photon energy (eV), total and per state."""
    e = spectrum.energy_ev
    with new_figure() as (fig, ax):
        ax = ax[0, 0]
        per = spectrum.per_state_cross_section_angstrom2
        peak = max(float(np.max(spectrum.cross_section_angstrom2)), 1e-300)
        for k, sk in enumerate(per if per.shape[0] > 1 else []):
            if np.max(sk) > 1e-3 * peak:
                ax.plot(e, sk, lw=1.1, ls="--", color=STATE_COLOURS[(k + 1) % len(STATE_COLOURS)], label=f"S{k + 1}")
        ax.fill_between(e, 0, spectrum.cross_section_angstrom2, color=STATE_COLOURS[0], alpha=0.12, lw=0)
        ax.plot(e, spectrum.cross_section_angstrom2, color=STATE_COLOURS[0], label="total")
        ax.set_xlabel("photon energy / eV")
        ax.set_ylabel("cross section σ / Å²")
        ax.set_xlim(e[0], e[-1])
        ax.set_ylim(bottom=0)
        ax.legend(loc="upper right")
        ax.set_title(title or f"Absorption spectrum ({spectrum.n_geometries} geometries, {spectrum.line_shape} "
                              f"FWHM {spectrum.fwhm_ev:g} eV)")
        return save_figure(fig, path)


def transfer_time_edges(times: np.ndarray, end: float = float("nan"), bins: int = 24) -> np.ndarray:
    """Bin edges for a histogram of transfer times (unit of ``times``): ``bins`` equal bins from 0
    to ``end`` (the end of the run) or, when larger or ``end`` is NaN, to just above the latest time."""
    top = float(np.nanmax(times)) * 1.0000001 if np.size(times) and np.isfinite(times).any() else 1.0
    if np.isfinite(end) and end > 0:
        top = max(top, float(end))
    return np.linspace(0.0, max(top, 1e-12), int(bins) + 1)


def plot_transfer_times(table: Any, path: str | os.PathLike, *, time_unit: str = "fs", bins: int = 24,
                        title: str | None = None) -> str:
    """Stacked histogram of transfer times, one colour per kind of transfer (from → to)."""
    from mapdyn.units import AU_TIME_IN_FS

    t, xlabel = _time(table.time, time_unit)
    edges = transfer_time_edges(t, float(_time(np.array([table.end_time]), time_unit)[0][0]), bins)
    with new_figure() as (fig, ax):
        ax = ax[0, 0]
        kinds = sorted({(int(a), int(b)) for a, b in zip(table.from_state, table.to_state)})
        if kinds:
            data = [t[(table.from_state == a) & (table.to_state == b)] for a, b in kinds]
            ax.hist(data, bins=edges, stacked=True, edgecolor="white",
                    color=[STATE_COLOURS[b % len(STATE_COLOURS)] for _, b in kinds],
                    label=[f"{a} → {b} ({d.size})" for (a, b), d in zip(kinds, data)])
            ax.legend(loc="best", title="transfer (count)")
        else:
            ax.text(0.5, 0.5, "no transfer counted", transform=ax.transAxes, ha="center")
        ax.set_xlabel("transfer " + xlabel)
        ax.set_ylabel("transfers")
        _integer_counts(ax)
        dwell = table.min_dwell * (1.0 if time_unit == "a.u." else AU_TIME_IN_FS)
        ax.set_title(title or f"Transfer times ({table.count} transfers, min dwell {dwell:.3g} {time_unit})")
        return save_figure(fig, path)


def plot_transfer_geometries(table: Any, families: Any, path: str | os.PathLike, *, bins: int = 24,
                             title: str | None = None) -> str:
    """One histogram per internal coordinate at transfer, stacked by family of transfer geometries."""
    k = len(table.names)
    ncols = min(max(k, 1), 2)
    nrows = max(1, (k + 1) // 2)
    with new_figure(nrows, ncols, figsize=(6.4 if ncols == 1 else 9.0, 2.9 * nrows)) as (fig, axes):
        flat = axes.ravel()
        K = families.sizes.size
        for q in range(k):
            ax = flat[q]
            v = table.values[:, q]
            circ = table.kinds[q] == "dihedral"
            edges = np.linspace(-180.0, 180.0, bins + 1) if circ else bins
            if K:
                data = [v[families.labels == f] for f in range(K)]
                labels = [f"family {f + 1} ({families.sizes[f]})" for f in range(K)]
                ax.hist(data, bins=edges, stacked=True, edgecolor="white", label=labels,
                        color=[STATE_COLOURS[f % len(STATE_COLOURS)] for f in range(K)])
            elif v.size:
                ax.hist(v[np.isfinite(v)], bins=edges, color=STATE_COLOURS[0], edgecolor="white", label="all")
            if circ:
                ax.set_xlim(-180, 180)
                ax.set_xticks([-180, -90, 0, 90, 180])
            ax.set_xlabel(f"{table.names[q]} / {table.units[q]}" + (" (folded into (−180, 180])" if circ else ""))
            ax.set_ylabel("transfers")
            _integer_counts(ax)
            if q == 0 and (K or v.size):
                ax.legend(loc="best", fontsize=7.5)
        for ax in flat[k:]:
            ax.set_visible(False)
        if k == 0:
            flat[0].set_visible(True)
            flat[0].text(0.5, 0.5, "no internal coordinates", transform=flat[0].transAxes, ha="center")
        flat[0].set_title(title or f"Geometries at transfer ({table.count}; {K} families)")
        return save_figure(fig, path)
