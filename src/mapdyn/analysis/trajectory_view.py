"""One trajectory at a glance, and a contact sheet of the whole ensemble (figures + CSV, atomic writes).

:func:`trajectory_view` collects, for one trajectory of a :class:`TrajectorySet`, the adiabatic
energies, the occupied state (SQC window, or the state with population > 1/2), the S1−S0 gap, the
total-energy drift, the internal coordinates and the transfers counted under the dwell rule
(:mod:`mapdyn.analysis.transfers`); :func:`write_trajectory_view` draws it as one figure and one
CSV.  :func:`trajectory_notes` gives the lines to print (status, flags, warnings).
:func:`write_contact_sheet` draws one small panel per trajectory (gap and occupied state vs time)
and a CSV of one row per trajectory, to spot outliers.
"""

from __future__ import annotations

import dataclasses
import os
from typing import Any, Sequence

import numpy as np

from mapdyn.analysis import plots
from mapdyn.analysis.energy import energy_report
from mapdyn.analysis.observables import GeometricObservable
from mapdyn.analysis.trajectories import TrajectorySet
from mapdyn.analysis.transfers import committed_transitions, half_crossing_times, state_fractions, state_sequence
from mapdyn.units import AU_TIME_IN_FS, HARTREE_IN_EV

__all__ = ["TrajectoryView", "trajectory_view", "trajectory_notes", "write_trajectory_view", "plot_trajectory_view",
           "ensemble_overview", "write_contact_sheet", "PANELS_PER_SHEET", "MAX_SHEETS"]

#: Panels on one contact-sheet page, and pages at most (the CSV lists every trajectory).
PANELS_PER_SHEET = 60
MAX_SHEETS = 10


@dataclasses.dataclass
class TrajectoryView:
    """One trajectory's recorded frames (frames without data dropped).

    index : study index; status, reason; method ("sqc", "ehrenfest", …); times (T,) a.u.;
    state_energies (T, F) Eh or None; actions (T, F); fractions (T, F) state populations
    (Ehrenfest e_k/Σe; for SQC the window indicators); states (T,) occupied state, −1 none;
    total_energy (T,) Eh or None; drift (T,) E(t) − E(first frame), Eh, or None;
    coordinates : name → (T,) values (Å or degrees); units : name → unit;
    transfers : (frames, from, to, times a.u.) under the dwell rule; min_dwell a.u.
    """

    index: int
    status: str
    reason: str
    method: str
    times: np.ndarray
    state_energies: np.ndarray | None
    actions: np.ndarray
    fractions: np.ndarray
    states: np.ndarray
    total_energy: np.ndarray | None
    drift: np.ndarray | None
    coordinates: dict
    units: dict
    transfers: tuple
    min_dwell: float

    @property
    def times_fs(self) -> np.ndarray:
        return self.times * AU_TIME_IN_FS

    @property
    def gap(self) -> np.ndarray | None:
        """(T,) E1 − E0 in Eh (None without state energies)."""
        if self.state_energies is None or self.state_energies.shape[1] < 2:
            return None
        return self.state_energies[:, 1] - self.state_energies[:, 0]


def trajectory_view(tset: TrajectorySet, row: int, observables: Sequence[Any] = (), min_dwell: float = 0.0
                    ) -> TrajectoryView:
    """The :class:`TrajectoryView` of row ``row`` of ``tset`` (``min_dwell`` in a.u. of time)."""
    keep = tset.frame_mask[row]
    t = tset.times[keep]
    e = tset.actions[row, keep]
    states = state_sequence(e, tset.options) if tset.options.method in ("sqc", "ehrenfest", "spin") else \
        np.full(t.size, -1)
    if tset.options.method == "sqc":
        frac = np.zeros_like(e)
        ok = states >= 0
        frac[np.nonzero(ok)[0], states[ok]] = 1.0
    else:
        frac = state_fractions(e, tset.options)
    fr, a, b = committed_transitions(t, states, min_dwell)
    tt = t[fr] if tset.options.method == "sqc" else half_crossing_times(t, frac, fr, b)
    V = None if tset.state_energies is None else tset.state_energies[row, keep]
    E = None if tset.energies is None else tset.energies[row, keep]
    drift = None if E is None or E.size == 0 else E - E[0]
    coords, units = {}, {}
    if tset.positions is not None:
        for spec in observables:
            o = GeometricObservable.from_spec(spec)
            coords[o.name] = o.values(tset.positions[row, keep])
            units[o.name] = o.unit
    return TrajectoryView(int(tset.indices[row]), tset.status[row], tset.reasons[row], tset.options.method, t, V, e,
                          frac, states, E, drift, coords, units, (fr, a, b, tt), float(min_dwell))


def trajectory_notes(tset: TrajectorySet, row: int, view: TrajectoryView, energy_tolerance: float,
                     extra: Sequence[str] = ()) -> list[str]:
    """Lines describing one trajectory: status, frames, states, transfers, energy flags, warnings."""
    from mapdyn.analysis.report import summarise_warnings

    L = [f"trajectory {view.index}: {view.status}" + (f" ({view.reason})" if view.reason and view.status != "failed" else "")
         + f"; {view.times.size} frames, t = {view.times_fs[0]:.4g} … {view.times_fs[-1]:.4g} fs"
         if view.times.size else f"trajectory {view.index}: {view.status}; no frames"]
    if view.times.size:
        occ = view.states[view.states >= 0]
        first = int(occ[0]) if occ.size else -1
        last = int(occ[-1]) if occ.size else -1
        what = "window" if view.method == "sqc" else "state with population > 1/2"
        L.append(f"  occupied {what}: {first} at the start, {last} at the end; "
                 f"{int(np.sum(view.states == -1))} frames in none")
        fr, a, b, tt = view.transfers
        rule = f"min_dwell {view.min_dwell * AU_TIME_IN_FS:.3g} fs"
        if fr.size:
            L.append(f"  transfers ({rule}): " + ", ".join(f"{x} → {y} at {t_ * AU_TIME_IN_FS:.4g} fs"
                                                       for x, y, t_ in zip(a, b, tt)))
        else:
            L.append(f"  transfers ({rule}): none")
        committed = int(b[-1]) if fr.size else first
        if occ.size and last != committed:  # the last stay is too short (so far) to count
            valid = np.nonzero(view.states >= 0)[0]
            other = np.nonzero(occ != last)[0]
            since = view.times[valid[other[-1] + 1] if other.size else valid[0]]
            L.append(f"  in state {last} only since {since * AU_TIME_IN_FS:.4g} fs, shorter than min_dwell before the "
                     "record ends: not counted")
        g = view.gap
        if g is not None and np.isfinite(g).any():
            k = int(np.nanargmin(g))
            L.append(f"  smallest S1−S0 gap: {g[k] * HARTREE_IN_EV:.3g} eV at {view.times_fs[k]:.4g} fs")
    flags = []
    if view.drift is not None and np.isfinite(view.drift).any():
        dev = np.abs(view.drift)
        k = int(np.nanargmax(dev))
        text = (f"max |E(t) − E(0)| = {dev[k]:.3g} Eh ({dev[k] * HARTREE_IN_EV * 1e3:.3g} meV) at "
                f"{view.times_fs[k]:.4g} fs")
        if dev[k] > energy_tolerance:
            flags.append(f"energy: {text} > tolerance {energy_tolerance:.3g} Eh")
        else:
            L.append(f"  energy: {text} (tolerance {energy_tolerance:.3g} Eh)")
    if view.status == "failed":
        flags.append("failed" + (f": {view.reason}" if view.reason else ""))
    flags.extend(extra)
    for f in flags:
        L.append(f"  flag: {f}")
    recs = [w for w in tset.warnings if int(w.get("index", -1)) == view.index]
    for line in summarise_warnings(recs):
        L.append(f"  warning: {line}")
    if not flags and not recs:
        L.append("  no flags, no warnings")
    return L


def _view_columns(view: TrajectoryView) -> tuple[list[str], list[np.ndarray]]:
    cols = ["time_fs", "time_au"]
    data: list = [view.times_fs, view.times]
    F = view.actions.shape[1]
    if view.state_energies is not None:
        cols += [f"E{k}_hartree" for k in range(F)]
        data += [view.state_energies[:, k] for k in range(F)]
        if view.gap is not None:
            cols.append("gap_E1_E0_ev")
            data.append(view.gap * HARTREE_IN_EV)
    cols += [f"action_{k}" for k in range(F)]
    data += [view.actions[:, k] for k in range(F)]
    if view.method != "sqc":
        cols += [f"population_{k}" for k in range(F)]
        data += [view.fractions[:, k] for k in range(F)]
    cols.append("occupied_state")
    data.append(view.states)
    if view.total_energy is not None:
        cols += ["total_energy_hartree", "drift_mev"]
        data += [view.total_energy, view.drift * HARTREE_IN_EV * 1e3]
    for name, v in view.coordinates.items():
        u = view.units[name]
        cols.append(f"{_slug(name)}_{'angstrom' if u == 'Å' else u}")
        data.append(v)
    return cols, data


def _slug(text: str) -> str:
    import re
    return re.sub(r"[^A-Za-z0-9]+", "_", text).strip("_") or "item"


def _state_spans(ax, t: np.ndarray, states: np.ndarray, alpha: float = 0.18) -> None:
    """Shade the time axis by occupied state (state colours; none left white)."""
    if t.size == 0:
        return
    edges = np.concatenate([[t[0]], 0.5 * (t[1:] + t[:-1]), [t[-1]]])
    starts = np.concatenate([[0], np.nonzero(np.diff(states))[0] + 1])
    ends = np.concatenate([starts[1:], [states.size]])
    for s0, s1 in zip(starts, ends):
        k = int(states[s0])
        if k >= 0:
            ax.axvspan(edges[s0], edges[s1], color=plots.STATE_COLOURS[k % len(plots.STATE_COLOURS)], alpha=alpha, lw=0)


def plot_trajectory_view(view: TrajectoryView, path: str | os.PathLike, *, drift_tolerance: float | None = None,
                         title: str | None = None) -> str:
    """Stacked panels vs time (fs): energies with the occupied state, actions or populations, S1−S0 gap,
    energy drift, internal coordinates; counted transfers as vertical lines."""
    t = view.times_fs
    F = view.actions.shape[1]
    units = sorted(set(view.units.values()), key=lambda u: (u != "Å", u))
    nrows = 4 + len(units)
    colour = plots.STATE_COLOURS
    fr, a, b, tt = view.transfers
    with plots.new_figure(nrows, 1, figsize=(7.0, 1.9 * nrows + 0.6), sharex=True) as (fig, axes):
        ax = axes[0, 0]
        if view.state_energies is not None:
            ref = view.state_energies[0, 0]
            V = (view.state_energies - ref) * HARTREE_IN_EV
            for k in range(F):
                ax.plot(t, V[:, k], color=colour[k % len(colour)], lw=1.1, label=f"state {k}")
            if view.method == "sqc":
                for k in range(F):  # one piece per state: no connector where the window changes
                    ax.plot(t, np.where(view.states == k, V[:, k], np.nan), color="#222222", lw=3.2, alpha=0.35,
                            label="occupied window" if k == 0 else None)
            else:
                ax.plot(t, np.sum(view.fractions * V, axis=1), color="#222222", ls="--", lw=1.2,
                        label="Σ P_k E_k (mean field)")
            ax.set_ylabel("E − E0(0) / eV")
        else:
            ax.text(0.5, 0.5, "no state energies recorded", transform=ax.transAxes, ha="center")
        ax.legend(loc="best", fontsize=7.5, ncol=2)
        ax = axes[1, 0]
        if view.method == "sqc":
            for k in range(F):
                ax.plot(t, view.actions[:, k], color=colour[k % len(colour)], lw=1.2, label=f"e{k}")
            ax.axhline(1.0, color="#888888", ls=":", lw=0.9)
            _state_spans(ax, t, view.states)
            ax.set_ylabel("action e_k")
            ax.legend(loc="best", fontsize=7.5, ncol=F, title="shaded: window", title_fontsize=7.5)
        else:
            for k in range(F):
                ax.plot(t, view.fractions[:, k], color=colour[k % len(colour)], lw=1.2, label=f"P{k}")
            ax.axhline(0.5, color="#888888", ls=":", lw=0.9)
            ax.set_ylim(-0.03, 1.03)
            ax.set_ylabel("population")
            ax.legend(loc="best", fontsize=7.5, ncol=F)
        ax = axes[2, 0]
        g = view.gap
        if g is not None:
            ax.plot(t, g * HARTREE_IN_EV, color=colour[5], label="E1 − E0")
            if F > 2:  # the occupied state and the one below it
                k = view.states
                ok = k >= 1
                below = np.full(t.size, np.nan)
                rows = np.nonzero(ok)[0]
                below[rows] = view.state_energies[rows, k[ok]] - view.state_energies[rows, k[ok] - 1]
                ax.plot(t, below * HARTREE_IN_EV, color=colour[1], ls="--", lw=1.2, label="E_occ − E_occ−1")
                ax.legend(loc="best", fontsize=7.5)
            ax.set_ylabel("gap / eV")
            if np.isfinite(g).any():
                ax.set_ylim(bottom=0)
        else:
            ax.text(0.5, 0.5, "no gap (fewer than two states recorded)", transform=ax.transAxes, ha="center")
        ax = axes[3, 0]
        if view.drift is not None:
            ax.plot(t, view.drift * HARTREE_IN_EV * 1e3, color=colour[0])
            if drift_tolerance:
                tol = drift_tolerance * HARTREE_IN_EV * 1e3
                ax.axhline(tol, color="#c0392b", ls="--", lw=0.9, label=f"±{tol:.3g} meV")
                ax.axhline(-tol, color="#c0392b", ls="--", lw=0.9)
                ax.legend(loc="best", fontsize=7.5)
            ax.set_ylabel("E(t) − E(0) / meV")
        else:
            ax.text(0.5, 0.5, "no total energy recorded", transform=ax.transAxes, ha="center")
        for r, u in enumerate(units):
            ax = axes[4 + r, 0]
            for q, (name, v) in enumerate(view.coordinates.items()):
                if view.units[name] == u:
                    if u == "deg":  # no vertical line where a torsion wraps through ±180°
                        v = np.where(np.concatenate([[False], np.abs(np.diff(v)) > 180.0]), np.nan, v)
                    ax.plot(t, v, lw=1.2, label=name, color=colour[(q + 2) % len(colour)])
            if u == "deg" and any(n for n in view.coordinates if view.units[n] == u):
                ax.set_ylim(-185, 185)
                ax.set_yticks([-180, -90, 0, 90, 180])
            ax.set_ylabel(f"/ {u}")
            ax.legend(loc="best", fontsize=7.5, ncol=2)
        for ax in axes[:, 0]:
            for x in tt:
                ax.axvline(x * AU_TIME_IN_FS, color="#c0392b", lw=0.9, ls="-.", alpha=0.8)
        axes[-1, 0].set_xlabel("time / fs")
        n_tr = fr.size
        axes[0, 0].set_title(title or f"Trajectory {view.index} ({view.status}; {n_tr} transfer{'s' if n_tr != 1 else ''},"
                                      f" dash-dot lines; min dwell {view.min_dwell * AU_TIME_IN_FS:.3g} fs)")
        return plots.save_figure(fig, path, dpi=110)


def write_trajectory_view(view: TrajectoryView, folder: str | os.PathLike, *, drift_tolerance: float | None = None
                          ) -> tuple[str, str]:
    """``trajectory_NNNNNN.png`` and ``.csv`` in ``folder`` (created); returns both paths."""
    from mapdyn.analysis.report import write_csv

    folder = os.fspath(folder)
    os.makedirs(folder, exist_ok=True)
    stem = os.path.join(folder, f"trajectory_{view.index:06d}")
    cols, data = _view_columns(view)
    csv = write_csv(stem + ".csv", cols, data)
    png = plot_trajectory_view(view, stem + ".png", drift_tolerance=drift_tolerance)
    return png, csv


# ----------------------------------------------------------------------------------------------
# contact sheet
# ----------------------------------------------------------------------------------------------
def ensemble_overview(tset: TrajectorySet, min_dwell: float, energy_tolerance: float) -> dict[str, np.ndarray]:
    """One row per trajectory: index, status, frames, start/end state, transfers, first transfer
    time (fs), smallest S1−S0 gap (eV), max |E(t) − E(0)| (meV), warning records, flagged."""
    n = tset.ntraj
    out: dict = {k: [] for k in ("trajectory", "status", "frames", "first_state", "last_state", "transfers",
                                 "first_transfer_fs", "min_gap_ev", "max_energy_deviation_mev", "warnings", "flagged")}
    en = energy_report(tset, energy_tolerance)
    nwarn: dict = {}
    for w in tset.warnings:
        nwarn[int(w.get("index", -1))] = nwarn.get(int(w.get("index", -1)), 0) + 1
    for j in range(n):
        v = trajectory_view(tset, j, (), min_dwell)
        occ = v.states[v.states >= 0]
        fr, _, _, tt = v.transfers
        g = v.gap
        out["trajectory"].append(v.index)
        out["status"].append(v.status)
        out["frames"].append(v.times.size)
        out["first_state"].append(int(occ[0]) if occ.size else -1)
        out["last_state"].append(int(occ[-1]) if occ.size else -1)
        out["transfers"].append(int(fr.size))
        out["first_transfer_fs"].append(float(tt[0] * AU_TIME_IN_FS) if fr.size else np.nan)
        out["min_gap_ev"].append(float(np.nanmin(g) * HARTREE_IN_EV) if g is not None and np.isfinite(g).any() else np.nan)
        dev = np.nan if en is None else en.max_deviation[j] * HARTREE_IN_EV * 1e3
        out["max_energy_deviation_mev"].append(dev)
        out["warnings"].append(nwarn.get(v.index, 0))
        out["flagged"].append(bool((en is not None and en.flagged[j]) or v.status == "failed" or v.reason))
    return {k: np.asarray(val) for k, val in out.items()}


def write_contact_sheet(tset: TrajectorySet, folder: str | os.PathLike, *, min_dwell: float,
                        energy_tolerance: float) -> tuple[list[str], str]:
    """``contact_sheet_NN.png`` pages (:data:`PANELS_PER_SHEET` trajectories each, at most
    :data:`MAX_SHEETS`) and ``contact_sheet.csv`` (every trajectory) in ``folder``."""
    from mapdyn.analysis.report import write_csv

    folder = os.fspath(folder)
    os.makedirs(folder, exist_ok=True)
    ov = ensemble_overview(tset, min_dwell, energy_tolerance)
    csv = write_csv(os.path.join(folder, "contact_sheet.csv"), list(ov), list(ov.values()))
    pages = []
    n = tset.ntraj
    npages = min(MAX_SHEETS, -(-n // PANELS_PER_SHEET))
    gmax = 0.0
    if tset.state_energies is not None and tset.nstates > 1:
        gaps = (tset.state_energies[..., 1] - tset.state_energies[..., 0]) * HARTREE_IN_EV
        gmax = float(np.nanmax(gaps)) if np.isfinite(gaps).any() else 0.0
    for p in range(npages):
        rows = list(range(p * PANELS_PER_SHEET, min(n, (p + 1) * PANELS_PER_SHEET)))
        path = os.path.join(folder, f"contact_sheet_{p + 1:02d}.png")
        pages.append(_plot_sheet(tset, rows, ov, path, min_dwell, gmax, f"page {p + 1} of {npages}"))
    for name in os.listdir(folder):  # pages left from a larger ensemble
        if name.startswith("contact_sheet_") and name.endswith(".png") and os.path.join(folder, name) not in pages:
            os.remove(os.path.join(folder, name))
    return pages, csv


def _plot_sheet(tset: TrajectorySet, rows: list, ov: dict, path: str, min_dwell: float, gmax: float,
                page: str) -> str:
    ncols = 6 if len(rows) > 24 else 4 if len(rows) > 8 else max(1, min(len(rows), 4))
    nrows = -(-len(rows) // ncols)
    t_end = float(tset.times[-1] * AU_TIME_IN_FS)
    tu, scale = "fs", AU_TIME_IN_FS
    with plots.new_figure(nrows, ncols, figsize=(2.3 * ncols, 1.45 * nrows + 0.9), sharex=True, sharey=True) \
            as (fig, axes):
        flat = axes.ravel()
        for ax, j in zip(flat, rows):
            v = trajectory_view(tset, j, (), min_dwell)
            t = v.times * scale
            _state_spans(ax, t, v.states, alpha=0.35)
            g = v.gap
            if g is not None:
                ax.plot(t, g * HARTREE_IN_EV, color="#222222", lw=0.9, marker="o" if t.size < 3 else None, ms=3)
            else:
                ax.step(t, v.states, where="mid", color="#222222", lw=0.9)
            for x in v.transfers[3]:
                ax.axvline(x * scale, color="#c0392b", lw=0.8, ls="-.")
            flagged = bool(ov["flagged"][j])
            nw = int(ov["warnings"][j])
            label = f"#{v.index} {v.status}" + (" !" if flagged else "") + (f" w{nw}" if nw else "")
            ax.set_title(label, fontsize=7.5, color="#c0392b" if flagged else "#33373d", loc="left")
            ax.tick_params(labelsize=6.5)
            ax.grid(False)
        for ax in flat[len(rows):]:
            ax.set_visible(False)
        flat[0].set_xlim(0, t_end)
        if gmax > 0 and tset.state_energies is not None:
            flat[0].set_ylim(0, 1.05 * gmax)
        ylabel = "E1 − E0 / eV" if tset.state_energies is not None and tset.nstates > 1 else "state"
        for r in range(nrows):
            axes[r, 0].set_ylabel(ylabel, fontsize=7.5)
        for c in range(ncols):
            axes[-1, c].set_xlabel(f"time / {tu}", fontsize=7.5)
        what = "SQC window" if tset.options.method == "sqc" else "state with population > 1/2"
        fig.suptitle(f"{len(rows)} trajectories ({page}); line: E1 − E0; shading: occupied {what} "
                     "(state colours: " + ", ".join(f"{k}" for k in range(tset.nstates)) + ")\n"
                     "dash-dot: counted transfer; red title with '!': flagged; wN: N warning records", fontsize=8.5)
        return plots.save_figure(fig, path, dpi=100)
