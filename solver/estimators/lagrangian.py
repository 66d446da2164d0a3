"""Single-particle Lagrangian statistics from the rows a run streams (one row per sample, one column
per lag; see eddybox.particles.lagrangian): the velocity autocorrelation R_L(τ), the Lagrangian
integral time T_L, the mean-square displacement, and Taylor's long-time dispersion, pooled over
the particles and the time origins of an averaging window, with error bars.

Every average is a ratio of sums over the (sample, lag) entries whose origin and end lie in the
window, per lag k (N_k = Σ count, X the unwrapped position):

    ⟨v·v'⟩_k = Σ vv / N_k,   m_k = Σ v_start / N_k,   m'_k = Σ v_end / N_k,
    C(τ_k) = ⟨v·v'⟩_k − m_k·m'_k              velocity covariance (3 components summed)
    R_L(τ_k) = C(τ_k) / C(0),   u′² = C(0)/3    (Pope 2000, §12.2: R_L(s) = ⟨u′(t)u′(t+s)⟩/⟨u′²⟩)
    T_L = ∫_0^τmax R_L dτ                      (trapezoidal rule on the mean lags)
    MSD(τ_k) = Σ dx2 / N_k,   D(τ_k) = MSD − |Σ dx / N_k|²   (dispersion about the mean drift)

Taylor (1921, Proc. Lond. Math. Soc. 20, 196): in stationary homogeneous turbulence
d⟨X_1²⟩/dτ = 2u′² ∫_0^τ R_L, so per component the dispersion grows as 2u′²T_L τ for τ ≫ T_L;
here ``slope`` is the least-squares slope of D/3 over the lags τ >= ``fit_from`` τmax, and
``taylor_ratio`` = slope / (2u′²T_L) (1 at long times).

Error bars: every output is linearised in all the pooled ratios at once (the delta method) and
the error of the linearised series comes from blocking over the correlated samples, so the
correlation between lags is kept (T_L and the slope combine many lags). This module is plain
functions on arrays.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from eddybox.solver.estimators import timeseries

__all__ = ["LagrangianEstimate", "window_mask", "lagrangian_estimate"]


@dataclass(frozen=True)
class LagrangianEstimate:
    """Pooled Lagrangian statistics of one set over a window, each with its standard error
    (``*_err``, NaN without data or with fewer than two samples). Per lag: ``lag`` (mean actual
    lag), ``pairs`` (particle-origin pairs pooled), ``correlation`` ⟨v(t)·v(t+τ)⟩,
    ``covariance`` C(τ), ``r_l`` R_L(τ), ``msd`` ⟨|ΔX|²⟩ and ``dispersion`` D(τ) (3-D, divide
    by 3 per component). Scalars: ``u2`` u′² per component, ``t_l`` T_L, ``slope`` dD/3/dτ over
    τ >= ``fit_from`` τmax, ``taylor_ratio`` slope / (2u′²T_L). ``reliable``: blocking found
    its plateau for T_L."""

    lag: np.ndarray
    pairs: np.ndarray
    correlation: np.ndarray
    correlation_err: np.ndarray
    covariance: np.ndarray
    covariance_err: np.ndarray
    r_l: np.ndarray
    r_l_err: np.ndarray
    msd: np.ndarray
    msd_err: np.ndarray
    dispersion: np.ndarray
    dispersion_err: np.ndarray
    u2: float
    u2_err: float
    t_l: float
    t_l_err: float
    slope: float
    slope_err: float
    taylor_ratio: float
    taylor_ratio_err: float
    fit_from: float
    n_samples: int
    reliable: bool


def window_mask(times, lag_time, count, start: float) -> np.ndarray:
    """(samples × lags) True where the entry has particles and both its origin t − lag and its
    end t lie at or after ``start``."""
    t = np.asarray(times, dtype=float)[:, None]
    eps = 1e-9 * max(1.0, abs(float(start))) if np.isfinite(start) else 0.0
    return (np.asarray(count) > 0) & (t - np.asarray(lag_time, dtype=float) >= start - eps)


class _Ratios:
    """Pooled ratios m = Σ y / Σ c per lag over the kept entries and their linearised
    deviations e_i = (y_i − m c_i) / mean(c) per sample (delta method, Cochran 1977, §6.3;
    from memory), so that m̂ − m ≈ mean_i e_i."""

    def __init__(self, rows, keep):
        self.keep = keep
        self.c = np.where(keep, np.asarray(rows["count"], dtype=float), 0.0)
        self.total = self.c.sum(axis=0)
        self.cbar = self.total / max(self.c.shape[0], 1)
        self.rows = rows

    def __call__(self, name, weighted=False):
        y = np.asarray(self.rows[name], dtype=float)
        vector = y.ndim == 3
        k = self.keep[..., None] if vector else self.keep
        if weighted:  # a per-entry value (the lag): weighted by its particles
            y = y * self.c
        y = np.where(k, y, 0.0)
        c = self.c[..., None] if vector else self.c
        tot = self.total[:, None] if vector else self.total
        cbar = self.cbar[:, None] if vector else self.cbar
        with np.errstate(invalid="ignore", divide="ignore"):
            m = np.where(tot > 0, y.sum(axis=0) / np.where(tot > 0, tot, 1.0), np.nan)
            e = (y - m * c) / cbar
        return m, e


def _stderr(z):
    """Blocking standard errors of the means of the columns of z (samples × q); NaN for
    columns that are not finite or with fewer than two samples."""
    err = np.full(z.shape[1], np.nan)
    reliable = np.zeros(z.shape[1], dtype=bool)
    ok = np.all(np.isfinite(z), axis=0)
    if z.shape[0] >= 2 and ok.any():
        ba = timeseries.block_average(z[:, ok])
        err[ok], reliable[ok] = ba.stderr, ba.reliable
    return err, reliable


def _trapezoid_weights(x, y):
    """∂/∂y_k and ∂/∂x_k of the trapezoidal ∫ y dx on the points (x_k, y_k)."""
    wy = np.zeros_like(x)
    dx = np.diff(x)
    wy[:-1] += 0.5 * dx
    wy[1:] += 0.5 * dx
    wx = np.zeros_like(x)
    wx[1:] += 0.5 * (y[1:] + y[:-1])
    wx[:-1] -= 0.5 * (y[1:] + y[:-1])
    return wy, wx


def lagrangian_estimate(rows: dict, times, start: float = -np.inf,
                        fit_from: float = 2.0 / 3.0) -> LagrangianEstimate:
    """Pooled Lagrangian statistics of the rows (name -> samples × lags [× 3] arrays, the
    datasets of /sets/<name>/lagrangian) at ``times``, over the entries of
    :func:`window_mask` (origin and end at or after ``start``), with delta-method + blocking
    errors: every output is linearised in the pooled ratios (its derivatives written out
    below), and the standard error of the mean of the linearised series comes from blocking
    (Flyvbjerg & Petersen 1989). Lags without entries are NaN; T_L integrates R_L over the lags
    with data from lag 0 on; the slope takes the mean lags as exact."""
    keep = window_mask(times, rows["lag_time"], rows["count"], start)
    used = keep.any(axis=1)  # samples without a kept entry carry no weight: left out
    sub = {k: np.asarray(v)[used] for k, v in rows.items()}
    r = _Ratios(sub, keep[used])
    lag, e_lag = r("lag_time", weighted=True)
    vv, e_vv = r("vv")
    vs, e_vs = r("v_start")
    ve, e_ve = r("v_end")
    dx2, e_dx2 = r("dx2")
    dx, e_dx = r("dx")
    cov = vv - np.einsum("ki,ki->k", vs, ve)
    z_cov = e_vv - np.einsum("ki,nki->nk", ve, e_vs) - np.einsum("ki,nki->nk", vs, e_ve)
    disp = dx2 - np.einsum("ki,ki->k", dx, dx)
    z_disp = e_dx2 - 2.0 * np.einsum("ki,nki->nk", dx, e_dx)
    c0 = cov[0] if cov.size else np.nan
    with np.errstate(invalid="ignore", divide="ignore"):
        r_l = cov / c0 if c0 > 0 else np.full(cov.shape, np.nan)
        z_r = (z_cov - r_l[None, :] * z_cov[:, :1]) / c0
    ok = np.isfinite(r_l) & np.isfinite(lag)
    last = int(np.argmin(ok)) if not ok.all() else ok.size  # lags with data from 0 on
    n = z_cov.shape[0]
    t_l = slope = ratio = np.nan
    z_tl = z_slope = np.full(n, np.nan)
    if last >= 2:
        x, y = lag[:last], r_l[:last]
        wy, wx = _trapezoid_weights(x, y)
        t_l = float(np.sum(0.5 * (y[1:] + y[:-1]) * np.diff(x)))
        z_tl = z_r[:, :last] @ wy + e_lag[:, :last] @ wx
        fit = np.nonzero(x >= fit_from * x[-1] - 1e-12)[0]
        if fit.size >= 2:
            xf = x[fit] - x[fit].mean()
            coef = xf / np.sum(xf * xf) / 3.0  # slope of D/3: linear in D
            slope = float(coef @ disp[fit])
            z_slope = z_disp[:, fit] @ coef
    u2 = c0 / 3.0
    z_u2 = z_cov[:, 0] / 3.0 if cov.size else np.full(n, np.nan)
    if u2 > 0 and np.isfinite(t_l) and t_l != 0 and np.isfinite(slope):
        ratio = slope / (2.0 * u2 * t_l)
        z_ratio = ratio * (z_slope / slope - z_u2 / u2 - z_tl / t_l)
    else:
        z_ratio = np.full(n, np.nan)
    z = np.column_stack([e_vv, z_cov, z_r, e_dx2, z_disp, z_u2, z_tl, z_slope, z_ratio])
    err, reliable = _stderr(z)
    k = cov.size
    cut = [err[i * k:(i + 1) * k] for i in range(5)]
    se = err[5 * k:]
    return LagrangianEstimate(
        lag=lag, pairs=r.total.astype(np.int64), correlation=vv, correlation_err=cut[0],
        covariance=cov, covariance_err=cut[1], r_l=r_l, r_l_err=cut[2], msd=dx2,
        msd_err=cut[3], dispersion=disp, dispersion_err=cut[4], u2=float(u2),
        u2_err=float(se[0]), t_l=float(t_l), t_l_err=float(se[1]), slope=float(slope),
        slope_err=float(se[2]), taylor_ratio=float(ratio), taylor_ratio_err=float(se[3]),
        fit_from=float(fit_from), n_samples=int(used.sum()), reliable=bool(reliable[5 * k + 1]))
