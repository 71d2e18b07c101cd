"""Single/bi-exponential lifetime fits of the initial-state population, with the reporting rule."""

from __future__ import annotations

import dataclasses
import math
from typing import Sequence

import numpy as np
from scipy import optimize

from mapdyn.units import AU_TIME_IN_FS

# ----------------------------------------------------------------------------------------------
# lifetimes
# ----------------------------------------------------------------------------------------------
#: Minimum fraction of time points at which an adequate fit lies inside the population's band.
MIN_INSIDE_BAND = 0.9

LIFETIME_RULE = (
    "A lifetime is reported only if (1) the initial-state population fell by at least "
    "max(0.05, 3 standard errors) between the first and the last time point; (2) the weighted "
    "least-squares fit converged with a finite covariance; (3) every time constant has relative "
    "uncertainty ≤ 50 % and lies below 3× the fitted time window; for the bi-exponential also "
    "(4) both amplitudes lie in [0.05, 0.95] and τ2/τ1 ≥ 2; when a confidence band is available, (5) the "
    "fitted curve lies inside the band (widened by σ/4) at ≥ 90 % of the time points.  The bi-exponential is preferred only "
    "if its AIC is lower than the single exponential's by more than 2."
)


@dataclasses.dataclass
class ExponentialFit:
    """Result of one exponential fit of the initial-state population.

    model : "mono" — P(t) = P∞ + (P0 − P∞) exp(−t'/τ);
            "bi"   — P(t) = P∞ + (P0 − P∞) [a exp(−t'/τ1) + (1 − a) exp(−t'/τ2)];
            t' = max(t − t_first − t_d, 0) (t_d = delay after the first time point, 0 without delay),
            P0 = P(t_first) fixed.
    parameters / uncertainties : name → value, 1σ (trajectory bootstrap of the fit when replicas are
        given, else the covariance; see ``diagnostics["uncertainty_method"]``), times in a.u.
    covariance : parameter covariance (order of ``names``); curve : (T,) fitted population.
    diagnostics : chi2, dof, reduced_chi2, r2, rms_residual, aic, converged, message.
    supported : whether the data support this fit's time constants (see :data:`LIFETIME_RULE`);
    reasons : why not.
    """

    model: str
    names: tuple[str, ...]
    parameters: dict
    uncertainties: dict
    covariance: np.ndarray
    curve: np.ndarray
    diagnostics: dict
    supported: bool
    reasons: list


@dataclasses.dataclass
class LifetimeResult:
    """Lifetime analysis of an initial-state population (times in a.u.; ``*_fs`` helpers in fs).

    fits : model name → :class:`ExponentialFit`; preferred : "mono", "bi" or None (no lifetime
    supported); lifetime / lifetime_uncertainty : τ (mono) or the amplitude-weighted mean
    a τ1 + (1 − a) τ2 (bi) in a.u., None if unsupported; rule : :data:`LIFETIME_RULE`.
    """

    times: np.ndarray
    population: np.ndarray
    sigma: np.ndarray
    fits: dict
    preferred: str | None
    lifetime: float | None
    lifetime_uncertainty: float | None
    rule: str
    reasons: list

    def lifetime_fs(self) -> tuple[float, float] | None:
        if self.lifetime is None:
            return None
        return self.lifetime * AU_TIME_IN_FS, self.lifetime_uncertainty * AU_TIME_IN_FS


def _mono(t, P0, tau, td, Pinf):
    tp = np.maximum(t - td, 0.0)
    return Pinf + (P0 - Pinf) * np.exp(-tp / tau)


def _bi(t, P0, tau1, tau2, a, td, Pinf):
    tp = np.maximum(t - td, 0.0)
    return Pinf + (P0 - Pinf) * (a * np.exp(-tp / tau1) + (1.0 - a) * np.exp(-tp / tau2))


def _fit_one(model: str, t: np.ndarray, y: np.ndarray, s: np.ndarray, P0: float, delay: bool,
             asymptote: bool, resampled: np.ndarray | None = None) -> ExponentialFit:
    span = float(t[-1] - t[0])
    drop = P0 - y[-1]
    # 1/e time of the observed decay as a starting guess
    target = P0 - (1.0 - math.exp(-1.0)) * max(drop, 1e-12)
    below = np.nonzero(y <= target)[0]
    tau0 = float(t[below[0]] - t[0]) if below.size and t[below[0]] > t[0] else span / 2.0
    tau0 = max(tau0, span * 1e-3)
    if model == "mono":
        names = ["tau"] + (["delay"] if delay else []) + (["P_inf"] if asymptote else [])
        starts = [[tau0] + ([d] if delay else []) + ([max(0.0, min(1.0, y[-1] * 0.5))] if asymptote else [])
                  for d in ((0.0, 0.1 * span, 0.3 * span) if delay else (0.0,))]
        lo = [span * 1e-4] + ([0.0] if delay else []) + ([0.0] if asymptote else [])
        hi = [span * 1e3] + ([span * 0.95] if delay else []) + ([1.0] if asymptote else [])

        def f(tt, *q):
            it = iter(q)
            tau = next(it)
            td = next(it) if delay else 0.0
            pinf = next(it) if asymptote else 0.0
            return _mono(tt, P0, tau, td + t[0], pinf)
    else:
        names = ["tau1", "tau2", "a"] + (["delay"] if delay else []) + (["P_inf"] if asymptote else [])
        starts = [[tau0 / 3.0, tau0 * 3.0, 0.5] + ([d] if delay else []) + ([max(0.0, min(1.0, y[-1] * 0.5))] if asymptote else [])
                  for d in ((0.0, 0.1 * span) if delay else (0.0,))]
        lo = [span * 1e-4, span * 1e-4, 0.0] + ([0.0] if delay else []) + ([0.0] if asymptote else [])
        hi = [span * 1e3, span * 1e3, 1.0] + ([span * 0.95] if delay else []) + ([1.0] if asymptote else [])

        def f(tt, *q):
            it = iter(q)
            tau1, tau2, a = next(it), next(it), next(it)
            td = next(it) if delay else 0.0
            pinf = next(it) if asymptote else 0.0
            return _bi(tt, P0, tau1, tau2, a, td + t[0], pinf)

    best = None
    message = "no start converged"
    for p0 in starts:
        p0 = np.clip(np.array(p0, dtype=float), np.array(lo) + 1e-12, np.array(hi) - 1e-12)
        try:
            popt, pcov = optimize.curve_fit(f, t, y, p0=p0, sigma=s, absolute_sigma=True,
                                            bounds=(lo, hi), method="trf", maxfev=20000)
        except (RuntimeError, ValueError, optimize.OptimizeWarning) as exc:
            message = str(exc).splitlines()[0]
            continue
        chi2 = float(np.sum(((f(t, *popt) - y) / s) ** 2))
        if best is None or chi2 < best[2]:
            best = (popt, pcov, chi2)
    k = len(names)
    if best is None:
        nan = {nm: float("nan") for nm in names}
        return ExponentialFit(model, tuple(names), nan, dict(nan), np.full((k, k), np.nan), np.full_like(y, np.nan),
                              {"converged": False, "message": message}, False, [f"fit failed: {message}"])
    popt, pcov, chi2 = best
    if model == "bi" and popt[0] > popt[1]:   # order τ1 < τ2 (swap amplitude too)
        perm = list(range(k))
        perm[0], perm[1] = 1, 0
        popt = popt[perm]
        popt[2] = 1.0 - popt[2]
        pcov = pcov[np.ix_(perm, perm)]
        J = np.eye(k)
        J[2, 2] = -1.0
        pcov = J @ pcov @ J.T
    curve = f(t, *popt)
    err = np.sqrt(np.clip(np.diag(pcov), 0.0, None)) if np.all(np.isfinite(pcov)) else np.full(k, np.nan)
    cov_err = err.copy()
    samples = None
    if resampled is not None and len(resampled) >= 2:
        # trajectory bootstrap of the fit: refit every resampled population curve from the best fit
        out = []
        for yb in resampled:
            P0b = float(yb[0])

            def fb(tt, *q, P0b=P0b):
                it = iter(q)
                if model == "mono":
                    tau = next(it)
                    td = next(it) if delay else 0.0
                    pinf = next(it) if asymptote else 0.0
                    return _mono(tt, P0b, tau, td + t[0], pinf)
                tau1, tau2, a = next(it), next(it), next(it)
                td = next(it) if delay else 0.0
                pinf = next(it) if asymptote else 0.0
                return _bi(tt, P0b, tau1, tau2, a, td + t[0], pinf)
            try:
                pb, _ = optimize.curve_fit(fb, t, yb, p0=np.clip(popt, np.array(lo) + 1e-12, np.array(hi) - 1e-12),
                                           sigma=s, absolute_sigma=True, bounds=(lo, hi), method="trf", maxfev=5000)
            except (RuntimeError, ValueError):
                continue
            if model == "bi" and pb[0] > pb[1]:
                pb[0], pb[1] = pb[1], pb[0]
                pb[2] = 1.0 - pb[2]
            out.append(pb)
        if len(out) >= 2:
            samples = np.array(out)
            err = samples.std(axis=0, ddof=1)
    dof = max(len(t) - k, 1)
    ss_res = float(np.sum((curve - y) ** 2))
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    diag = {"converged": True, "message": "ok", "chi2": chi2, "dof": dof, "reduced_chi2": chi2 / dof,
            "r2": 1.0 - ss_res / ss_tot if ss_tot > 0 else float("nan"),
            "rms_residual": math.sqrt(ss_res / len(t)), "aic": chi2 + 2.0 * k, "npoints": int(len(t)),
            "uncertainty_method": (f"trajectory bootstrap ({len(samples)} refits)" if samples is not None
                                   else "covariance (independent points)"),
            "covariance_uncertainties": {nm: float(v) for nm, v in zip(names, cov_err)},
            "bootstrap_samples": samples}
    params = {nm: float(v) for nm, v in zip(names, popt)}
    uncs = {nm: float(v) for nm, v in zip(names, err)}
    reasons = []
    if not np.all(np.isfinite(pcov)):
        reasons.append("covariance not finite (parameters not determined by the data)")
    taus = ["tau"] if model == "mono" else ["tau1", "tau2"]
    for nm in taus:
        v, e = params[nm], uncs[nm]
        if not (np.isfinite(e) and e <= 0.5 * v):
            reasons.append(f"{nm} relative uncertainty {e / v:.2g} > 0.5")
        if v > 3.0 * span:
            reasons.append(f"{nm} = {v:.4g} a.u. exceeds 3× the fitted window ({span:.4g} a.u.)")
    if model == "bi":
        if not 0.05 <= params["a"] <= 0.95:
            reasons.append(f"amplitude a = {params['a']:.3g} outside [0.05, 0.95]")
        if params["tau2"] < 2.0 * params["tau1"]:
            reasons.append("tau2/tau1 < 2 (time constants not distinguishable)")
    return ExponentialFit(model, tuple(names), params, uncs, pcov, curve, diag, not reasons, reasons)


def fit_lifetimes(times: np.ndarray, population: np.ndarray, standard_error: np.ndarray | None = None, *,
                  delay: bool = True, asymptote: bool = True, models: Sequence[str] = ("mono", "bi"),
                  sigma_floor: float | None = None, t_max: float | None = None,
                  resampled_populations: np.ndarray | None = None,
                  band: tuple[np.ndarray, np.ndarray] | None = None) -> LifetimeResult:
    """Fit the initial-state population with single/bi-exponentials (scipy.optimize.curve_fit).

    times (T,) a.u.; population (T,); standard_error (T,) 1σ per point (e.g. the bootstrap SE),
    floored at ``sigma_floor`` (default 0.01) so points with zero spread (t = 0) do not get infinite
    weight; None = unweighted (σ = sigma_floor).  P0 is fixed to the first population value;
    ``delay`` adds a free onset t_d ≥ 0, ``asymptote`` a free P∞ ∈ [0, 1] (otherwise P∞ = 0).
    ``t_max`` restricts the fit to t ≤ t_max (a.u.).  Parameter uncertainties are
    √diag(covariance) with absolute σ, or — when ``resampled_populations`` (B, T) trajectory-bootstrap
    replicas of the curve are given — the standard deviation of the B refitted parameters, which
    accounts for the correlation between time points (successive points share trajectories, so the
    covariance estimate is too small).  Whether a lifetime is reported follows :data:`LIFETIME_RULE`.
    """
    t = np.asarray(times, dtype=float)
    y = np.asarray(population, dtype=float)
    for m in models:
        if m not in ("mono", "bi"):
            raise ValueError(f"models={tuple(models)!r} is not allowed; use 'mono' and/or 'bi'")
    floor = 0.01 if sigma_floor is None else float(sigma_floor)
    if not floor > 0:
        raise ValueError(f"sigma_floor={sigma_floor!r} is not allowed; it must be positive")
    s = np.full_like(y, floor) if standard_error is None else np.asarray(standard_error, dtype=float)
    s = np.where(np.isfinite(s), np.maximum(s, floor), floor)
    keep = np.isfinite(y) & np.isfinite(t)
    if t_max is not None:
        keep &= t <= float(t_max)
    t, y, s = t[keep], y[keep], s[keep]
    if band is not None:
        b_lo = np.asarray(band[0], dtype=float)[keep]
        b_hi = np.asarray(band[1], dtype=float)[keep]
    rs = None
    if resampled_populations is not None:
        rs = np.asarray(resampled_populations, dtype=float)
        if rs.ndim != 2 or rs.shape[1] != keep.size:
            raise ValueError(f"resampled_populations must have shape (B, {keep.size}), got {rs.shape}")
        rs = rs[:, keep]
        rs = rs[np.all(np.isfinite(rs), axis=1)]
    reasons: list = []
    fits: dict = {}
    if t.size < 5:
        return LifetimeResult(t, y, s, fits, None, None, None, LIFETIME_RULE,
                              [f"only {t.size} usable time points (need ≥ 5)"])
    P0 = float(y[0])
    drop = P0 - float(y[-1])
    needed = max(0.05, 3.0 * float(s[-1]))
    if drop < needed:
        reasons.append(f"population fell by {drop:.3g} < {needed:.3g} (no measurable decay in the window)")
    for m in models:
        fit = _fit_one(m, t, y, s, P0, delay, asymptote, rs)
        if band is not None and fit.diagnostics.get("converged"):
            # adequacy: the fitted curve must run inside the pointwise confidence band (small slack
            # of 1e-9 for points where the band collapses onto the estimate)
            inside = (fit.curve >= b_lo - 1e-9 - 0.25 * s) & (fit.curve <= b_hi + 1e-9 + 0.25 * s)
            frac = float(np.mean(inside[np.isfinite(b_lo) & np.isfinite(b_hi)]))
            fit.diagnostics["inside_band_fraction"] = frac
            if frac < MIN_INSIDE_BAND:
                fit.reasons.append(f"fit runs outside the confidence band at {100 * (1 - frac):.0f} % of the points "
                                   f"(> {100 * (1 - MIN_INSIDE_BAND):.0f} %: model does not describe the curve)")
                fit.supported = False
        fits[m] = fit
    preferred = None
    if not reasons:
        mono, bi = fits.get("mono"), fits.get("bi")
        if mono is not None and mono.supported:
            preferred = "mono"
        if bi is not None and bi.supported and (
                preferred is None or bi.diagnostics["aic"] < mono.diagnostics["aic"] - 2.0):
            preferred = "bi"
        if preferred is None:
            for m, fit in fits.items():
                reasons.extend(f"{m}: {r}" for r in fit.reasons)
    lifetime = unc = None
    if preferred == "mono":
        lifetime, unc = fits["mono"].parameters["tau"], fits["mono"].uncertainties["tau"]
    elif preferred == "bi":
        fit = fits["bi"]
        a, t1, t2 = (fit.parameters[k] for k in ("a", "tau1", "tau2"))
        lifetime = a * t1 + (1 - a) * t2
        grad = np.zeros(len(fit.names))
        grad[fit.names.index("tau1")] = a
        grad[fit.names.index("tau2")] = 1 - a
        grad[fit.names.index("a")] = t1 - t2
        samples = fit.diagnostics.get("bootstrap_samples")
        if samples is not None:
            ia, i1, i2 = (fit.names.index(k) for k in ("a", "tau1", "tau2"))
            mean_tau = samples[:, ia] * samples[:, i1] + (1 - samples[:, ia]) * samples[:, i2]
            unc = float(np.std(mean_tau, ddof=1))
        else:
            unc = float(math.sqrt(max(grad @ fit.covariance @ grad, 0.0)))
    return LifetimeResult(t, y, s, fits, preferred, lifetime, unc, LIFETIME_RULE, reasons)


