"""Statistics for comparing runs: initial-transient removal and error bars of correlated series.

Everything here is a plain function on arrays. A series is a 1-D array of samples; a
"binned" series is a 2-D array (samples x bins), e.g. g(r) per r-bin over the sampling
times, and every kernel works along axis 0 so all bins are treated in one pass.

Pipeline used by :func:`stationary_summary`:

1. put the samples on a uniform time grid if their spacing is not uniform (the two methods
   below reason in lags counted in samples, so they need equal spacing);
2. cut the initial transient with MSER-5 (:func:`mser_truncation`);
3. estimate the mean and its standard error on the rest by pairwise blocking
   (:func:`block_average`), which also gives the integral time and the number of
   effectively independent samples.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy import stats

__all__ = [
    "Truncation",
    "BlockingLevels",
    "BlockAverage",
    "Summary",
    "BinnedSummary",
    "PLATEAU_RULES",
    "plateau_rule",
    "uniform_samples",
    "mser_statistic",
    "mser_truncation",
    "blocking_levels",
    "block_average",
    "stationary_summary",
    "stationary_summary_bins",
]


def _columns(values) -> tuple[np.ndarray, bool]:
    """Return values as a float (n, m) array and whether the input was 1-D."""
    arr = np.asarray(values, dtype=float)
    if not np.all(np.isfinite(arr)):
        raise ValueError("series contains NaN or infinite values")
    if arr.ndim == 1:
        return arr[:, None], True
    if arr.ndim == 2:
        return arr, False
    raise ValueError(f"expected a 1-D series or a 2-D (samples x bins) array, got shape {arr.shape}")


# --------------------------------------------------------------------------------------------
# Sampling grid
# --------------------------------------------------------------------------------------------

def uniform_samples(times, values, rtol: float = 0.05):
    """Return ``(times, values, resampled)`` on a uniform time grid.

    Samples are kept as given when every spacing is within ``rtol`` of the median spacing
    (runs that sample every fixed interval at step boundaries jitter by a fraction of a
    step). Otherwise the series is linearly interpolated onto a grid with the median
    spacing from the first to the last time. Interpolation adds correlation between
    neighbouring samples; the blocking analysis measures that correlation, so the error
    bars stay honest, only the sample count changes.

    ``times`` must be strictly increasing; ``values`` is (n,) or (n, bins).
    """
    t = np.asarray(times, dtype=float)
    v = np.asarray(values, dtype=float)
    if t.ndim != 1 or t.shape[0] != v.shape[0]:
        raise ValueError("times must be 1-D with one entry per sample")
    if t.size < 2:
        return t, v, False
    dt = np.diff(t)
    if np.any(dt <= 0) or not np.all(np.isfinite(dt)):
        raise ValueError("times must be finite and strictly increasing")
    h = float(np.median(dt))
    if np.all(np.abs(dt - h) <= rtol * h):
        return t, v, False
    count = int(np.floor((t[-1] - t[0]) / h + 1e-9)) + 1
    grid = t[0] + h * np.arange(count)
    right = np.clip(np.searchsorted(t, grid, side="right"), 1, t.size - 1)
    left = right - 1
    w = (grid - t[left]) / (t[right] - t[left])
    if v.ndim == 2:
        w = w[:, None]
    return grid, v[left] * (1.0 - w) + v[right] * w, True


# --------------------------------------------------------------------------------------------
# Initial transient: MSER / MSER-5
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Truncation:
    """Result of :func:`mser_truncation`.

    ``index`` is the first sample kept (in raw samples). ``accepted`` is False when the
    minimiser lies beyond half the series; the run is then too short (or not stationary)
    for the rule to be trusted and ``index`` is the raw minimiser, not a recommendation.
    ``statistic[d]`` is MSER(d) for truncation after ``d`` batches.
    """

    index: int
    accepted: bool
    batch_size: int
    statistic: np.ndarray


def mser_statistic(batch_means) -> np.ndarray:
    """MSER(d) for every truncation point d, along axis 0.

    White (1997), "An effective truncation heuristic for bias reduction in simulation
    output", Simulation 69(6):323-334. For a series z_1..z_k, truncating the first d
    values gives

        MSER(d) = 1/(k-d)^2 * sum_{i=d+1}^{k} (z_i - zbar_d)^2,
        zbar_d  = 1/(k-d)   * sum_{i=d+1}^{k} z_i,

    i.e. (up to a constant) the squared half-width of the marginal confidence interval of
    the truncated mean. Returned for d = 0 .. k-2 (at least two values left), shape
    (k-1,) or (k-1, bins).
    """
    z, flat = _columns(batch_means)
    k = z.shape[0]
    if k < 2:
        raise ValueError("MSER needs at least two values")
    z = z - z.mean(axis=0)  # centring keeps the running sums well conditioned
    count = np.arange(k, 0, -1, dtype=float)[:, None]  # k-d values left after truncating d
    tail_sum = np.cumsum(z[::-1], axis=0)[::-1]
    tail_sq = np.cumsum((z * z)[::-1], axis=0)[::-1]
    ss = np.maximum(tail_sq - tail_sum**2 / count, 0.0)
    out = (ss / count**2)[:-1]
    return out[:, 0] if flat else out


def _batch_means(x: np.ndarray, batch_size: int) -> np.ndarray:
    """Non-overlapping batch means along axis 0; a trailing partial batch is dropped."""
    k = x.shape[0] // batch_size
    return x[: k * batch_size].reshape(k, batch_size, *x.shape[1:]).mean(axis=1)


def _mser_minimisers(x: np.ndarray, batch_size: int, tail_fraction: float):
    """Per-column MSER-b minimiser in raw samples and whether it is within the first half.

    ``x`` is (n, m). Returns (index[m], accepted[m], statistic).
    """
    n = x.shape[0]
    z = _batch_means(x, batch_size)
    k = z.shape[0]
    if k < 4:
        raise ValueError(
            f"series of {n} samples is too short for MSER with batches of {batch_size}"
        )
    stat = mser_statistic(z)  # (k-1, m)
    # The statistic over the last few batches is dominated by chance (two nearly equal
    # values give MSER ~ 0); those truncation points are not candidates.
    ignore = max(2, int(np.ceil(tail_fraction * k)))
    candidates = stat[: max(1, stat.shape[0] - ignore)]
    d = np.argmin(candidates, axis=0)
    index = d * batch_size
    accepted = index <= n // 2
    return index, accepted, stat


def mser_truncation(values, batch_size: int = 5, tail_fraction: float = 0.05) -> Truncation:
    """Initial-transient truncation point of a 1-D series by MSER-m (MSER-5 by default).

    MSER: White (1997), Simulation 69(6):323-334 (statistic in :func:`mser_statistic`).
    MSER-5: the same rule applied to the means of consecutive batches of 5 samples, which
    smooths the statistic; White, Cobb & Spratt (2000), "A comparison of five steady-state
    truncation heuristics for simulation", Proc. Winter Simulation Conference, 755-760.
    The truncation point is d* = argmin_d MSER(d) over batch means; the first sample kept
    is ``batch_size * d*``. ``batch_size=1`` gives plain MSER.

    As MSER practice recommends, a minimiser past half the series is refused
    (``accepted=False``): the data are too short to tell the transient from the steady
    state. Truncation points leaving fewer than ``tail_fraction`` of the batches (and
    never fewer than 2) are not considered, because the statistic there is noise.

    Samples are treated as given (equal weight each); call :func:`uniform_samples` first
    for a series with uneven spacing.
    """
    x = np.asarray(values, dtype=float)
    if x.ndim != 1:
        raise ValueError("mser_truncation takes a 1-D series")
    index, accepted, stat = _mser_minimisers(x[:, None], batch_size, tail_fraction)
    return Truncation(int(index[0]), bool(accepted[0]), batch_size, stat[:, 0])


# --------------------------------------------------------------------------------------------
# Standard error of the mean by blocking
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class BlockingLevels:
    """Per-level quantities of the pairwise blocking transformation.

    Level j has blocks of ``block_size[j] = 2**j`` samples and ``n_blocks[j]`` blocks.
    ``stderr[j]`` is the blocking estimate of the standard error of the mean at that level
    and ``stderr_err[j]`` its own uncertainty; ``lag1[j]`` is the lag-1 autocovariance of
    the block means divided by their variance. Arrays are (levels,) or (levels, bins).
    """

    block_size: np.ndarray
    n_blocks: np.ndarray
    stderr: np.ndarray
    stderr_err: np.ndarray
    lag1: np.ndarray


def blocking_levels(values, min_blocks: int = 2) -> BlockingLevels:
    """Flyvbjerg & Petersen (1989) pairwise blocking, level by level, along axis 0.

    Flyvbjerg, H. & Petersen, H. G. (1989), "Error estimates on averages of correlated
    data", J. Chem. Phys. 91(1):461-466. The blocking transformation replaces the series
    x_1..x_n by the n' = floor(n/2) pair means x'_i = (x_{2i-1} + x_{2i})/2 (a trailing odd
    sample is dropped); the mean is unchanged. At each level with n' values and
    c0 = 1/n' * sum (x'_i - xbar')^2,

        sigma^2(mean) >= c0 / (n' - 1),     with uncertainty
        d sigma       = sigma / sqrt(2 (n' - 1)),

    and the bound becomes an estimate once the block means are uncorrelated (the plateau).
    Levels are computed while at least ``min_blocks`` blocks remain.
    """
    x, flat = _columns(values)
    if x.shape[0] < max(2, min_blocks):
        raise ValueError("blocking needs at least two samples")
    sizes, counts, errs, derrs, lag1 = [], [], [], [], []
    size = 1
    while x.shape[0] >= max(2, min_blocks):
        nb = x.shape[0]
        dev = x - x.mean(axis=0)
        c0 = np.mean(dev * dev, axis=0)
        gamma = np.sum(dev[:-1] * dev[1:], axis=0) / nb
        with np.errstate(invalid="ignore", divide="ignore"):
            rho = np.where(c0 > 0, gamma / c0, 0.0)
        se = np.sqrt(c0 / (nb - 1))
        sizes.append(size)
        counts.append(nb)
        errs.append(se)
        derrs.append(se / np.sqrt(2.0 * (nb - 1)))
        lag1.append(rho)
        half = nb // 2
        x = 0.5 * (x[0 : 2 * half : 2] + x[1 : 2 * half : 2])
        size *= 2
    pick = (lambda a: np.asarray(a)[:, 0]) if flat else np.asarray
    return BlockingLevels(
        block_size=np.asarray(sizes),
        n_blocks=np.asarray(counts),
        stderr=pick(errs),
        stderr_err=pick(derrs),
        lag1=pick(lag1),
    )


# A plateau rule takes the levels (2-D arrays, levels x bins) and returns, per bin, the
# chosen level and whether the choice is trustworthy.
PlateauRule = Callable[[BlockingLevels], "tuple[np.ndarray, np.ndarray]"]
PLATEAU_RULES: dict[str, PlateauRule] = {}


def plateau_rule(name: str):
    """Register a rule that picks the blocking level at which the estimate has converged."""

    def register(func: PlateauRule) -> PlateauRule:
        PLATEAU_RULES[name] = func
        return func

    return register


@plateau_rule("jonsson")
def _plateau_jonsson(levels: BlockingLevels, alpha: float = 0.01, min_blocks: int = 16):
    """Automated blocking of Jonsson (2018), Phys. Rev. E 98, 043304.

    With n_j blocks and lag-1 correlation r_j = gamma_j / s_j^2 of the block means at level
    j, the statistic

        M_j = sum_{k=j}^{L-1} n_k r_k^2

    is asymptotically chi^2 with L - j degrees of freedom if the block means are
    uncorrelated from level j on. The chosen level is the first j with M_j below the
    (1 - alpha) quantile (alpha = 1 %). Lengths that are not powers of two are handled by
    dropping the odd sample at each level. The choice is flagged unreliable when no level
    passes or fewer than ``min_blocks`` blocks are left (the error of the error is then
    above ~18 %).
    """
    terms = levels.n_blocks[:, None] * levels.lag1**2
    m_stat = np.cumsum(terms[::-1], axis=0)[::-1]
    n_levels = terms.shape[0]
    dof = (n_levels - np.arange(n_levels))[:, None]
    passed = m_stat < stats.chi2.ppf(1.0 - alpha, dof)
    found = passed.any(axis=0)
    chosen = np.where(found, np.argmax(passed, axis=0), n_levels - 1)
    reliable = found & (levels.n_blocks[chosen] >= min_blocks)
    return chosen, reliable


@plateau_rule("plateau")
def _plateau_agreement(levels: BlockingLevels, min_blocks: int = 16):
    """Plateau of the blocking curve, after Flyvbjerg & Petersen (1989), J. Chem. Phys. 91:461.

    For positively correlated data the blocking estimate rises with the level until the
    block means are uncorrelated, then stays constant within its error (the plateau). The
    chosen level is the first level j that no later level rises above by more than that
    later level's own error bar:

        sigma_k - sigma_j <= d sigma_k   for all k > j with at least ``min_blocks`` blocks.

    Flyvbjerg & Petersen read the plateau off the curve; this test is our way of doing
    that automatically. Only a rise counts: for positive correlation the curve does not
    fall on average, and for anticorrelated data an early stop errs on the safe (larger)
    side. Levels with fewer blocks are too noisy to judge. Unreliable when no level but
    the last usable one qualifies, i.e. the curve is still rising: the series is too short.
    On AR(1) test series this rule is nearly unbiased; ``"jonsson"`` scatters less but
    stops early and reads 5-15 % low when the integral time is long compared with n^(1/3).
    """
    usable = int(np.sum(levels.n_blocks >= min_blocks))
    se, dse = levels.stderr, levels.stderr_err
    n_bins = se.shape[1]
    if usable < 2:
        return np.zeros(n_bins, dtype=int), np.zeros(n_bins, dtype=bool)
    ok = np.zeros((usable - 1, n_bins), dtype=bool)
    for j in range(usable - 1):
        later = slice(j + 1, usable)
        ok[j] = np.all(se[later] - se[j] <= dse[later], axis=0)
    found = ok.any(axis=0)
    chosen = np.where(found, np.argmax(ok, axis=0), usable - 1)
    return chosen, found


@dataclass(frozen=True)
class BlockAverage:
    """Mean and standard error of a correlated series (scalars, or arrays per bin).

    ``t_int_samples`` is the integral time in units of the sample spacing, defined by
    Var(mean) = sigma_x^2 * 2 t_int / n, i.e. t_int = 1/2 + sum_{k>=1} rho(k); ``t_int``
    the same in time units (``t_int_samples * spacing``, the trapezoidal-rule integral of
    the autocorrelation). ``n_eff = n / (2 t_int_samples)``, the number of independent
    samples that would give the same standard error (n for uncorrelated data).
    """

    mean: np.ndarray | float
    stderr: np.ndarray | float
    stderr_err: np.ndarray | float
    t_int_samples: np.ndarray | float
    t_int: np.ndarray | float
    n_eff: np.ndarray | float
    n_samples: int
    level: np.ndarray | int
    block_size: np.ndarray | int
    reliable: np.ndarray | bool
    levels: BlockingLevels = field(repr=False)


def block_average(values, spacing: float = 1.0, rule: str = "plateau") -> BlockAverage:
    """Mean, standard error, integral time and n_eff of a series by blocking.

    Flyvbjerg & Petersen (1989), J. Chem. Phys. 91:461 (levels, :func:`blocking_levels`);
    the level is chosen by ``rule`` from :data:`PLATEAU_RULES`: ``"plateau"`` (first level
    that no later level rises above by more than its error bar) or ``"jonsson"`` (Jonsson
    2018, Phys. Rev. E 98:043304). With sigma_x^2 the sample variance (ddof=1) and SE the chosen estimate,

        t_int = n SE^2 / (2 sigma_x^2)   [samples],   n_eff = n / (2 t_int) = sigma_x^2 / SE^2.

    ``values`` is (n,) or (n, bins); ``spacing`` is the time between samples.
    """
    if rule not in PLATEAU_RULES:
        raise ValueError(f"unknown plateau rule {rule!r}; known: {sorted(PLATEAU_RULES)}")
    x, flat = _columns(values)
    n = x.shape[0]
    levels = blocking_levels(x)
    chosen, reliable = PLATEAU_RULES[rule](levels)
    cols = np.arange(x.shape[1])
    se = levels.stderr[chosen, cols]
    dse = levels.stderr_err[chosen, cols]
    var_x = np.var(x, axis=0, ddof=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        # a constant series has no measurable correlation: t_int and n_eff are undefined
        t_int_samples = np.where(var_x > 0, n * se**2 / (2.0 * var_x), np.nan)
        n_eff = np.where(se > 0, var_x / se**2, np.nan)
    mean = x.mean(axis=0)
    size = levels.block_size[chosen]

    def out(a):
        return a[0].item() if flat else a

    return BlockAverage(
        mean=out(mean),
        stderr=out(se),
        stderr_err=out(dse),
        t_int_samples=out(t_int_samples),
        t_int=out(t_int_samples * spacing),
        n_eff=out(n_eff),
        n_samples=n,
        level=out(chosen),
        block_size=out(size),
        reliable=out(reliable),
        levels=levels if not flat else BlockingLevels(
            levels.block_size, levels.n_blocks, levels.stderr[:, 0],
            levels.stderr_err[:, 0], levels.lag1[:, 0],
        ),
    )


# --------------------------------------------------------------------------------------------
# Summaries for reports
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Summary:
    """Stationary mean of one series with its error bar, as used in run comparisons."""

    mean: float
    stderr: float
    start_time: float
    start_index: int
    n_samples: int
    n_eff: float
    t_int: float
    converged: bool
    stderr_err: float = float("nan")
    t_int_samples: float = float("nan")
    spacing: float = 1.0
    resampled: bool = False
    note: str = ""

    def __str__(self) -> str:
        text = (
            f"{self.mean:.6g} ± {self.stderr:.2g} (from t={self.start_time:.4g}, "
            f"{self.n_samples} samples, n_eff={self.n_eff:.3g}, t_int={self.t_int:.3g})"
        )
        return text if self.converged else f"{text} [not converged: {self.note}]"


@dataclass(frozen=True)
class BinnedSummary:
    """Per-bin stationary means and error bars of a (samples x bins) series.

    All bins share one start (the latest transient end over the bins), so the per-bin
    values describe the same stretch of the run.
    """

    mean: np.ndarray
    stderr: np.ndarray
    start_time: float
    start_index: int
    n_samples: int
    n_eff: np.ndarray
    t_int: np.ndarray
    converged: bool
    bin_converged: np.ndarray
    stderr_err: np.ndarray
    t_int_samples: np.ndarray
    spacing: float = 1.0
    resampled: bool = False
    note: str = ""

    def __str__(self) -> str:
        text = (
            f"{self.mean.size} bins (from t={self.start_time:.4g}, {self.n_samples} samples, "
            f"error bars {np.min(self.stderr):.2g} to {np.max(self.stderr):.2g})"
        )
        return text if self.converged else f"{text} [not converged: {self.note}]"


def _prepare(times, values, spacing_rtol: float):
    x = np.asarray(values, dtype=float)
    n = x.shape[0]
    if n < 2:
        raise ValueError("need at least two samples")
    if not np.all(np.isfinite(x)):
        raise ValueError("series contains NaN or infinite values")
    t = np.arange(n, dtype=float) if times is None else np.asarray(times, dtype=float)
    t, x, resampled = uniform_samples(t, x, rtol=spacing_rtol)
    spacing = float(np.mean(np.diff(t)))
    return t, x, spacing, resampled


def _truncate(x2d: np.ndarray, batch_size: int):
    """Common start index for the columns of x2d and the per-column acceptance."""
    n = x2d.shape[0]
    if n // batch_size < 4:
        return 0, np.zeros(x2d.shape[1], dtype=bool), "series too short to detect a transient"
    index, accepted, _ = _mser_minimisers(x2d, batch_size, tail_fraction=0.05)
    # a refused column may not push the start past half the series
    index = np.where(accepted, index, n // 2)
    note = "" if accepted.all() else "transient not over within the first half of the series"
    return int(index.max()), accepted, note


def stationary_summary(times, values, *, batch_size: int = 5, rule: str = "plateau",
                       spacing_rtol: float = 0.05) -> Summary:
    """Stationary mean and error bar of a 1-D series: MSER-5 truncation, then blocking.

    ``times`` may be None (unit spacing). Uneven spacing beyond ``spacing_rtol`` is
    resampled onto a uniform grid first (:func:`uniform_samples`); ``start_index`` and
    ``n_samples`` then count grid samples. The transient is removed by
    :func:`mser_truncation` (White 1997; White, Cobb & Spratt 2000); if its minimiser lies
    past half the series, only the first half is dropped and the result is flagged. The
    mean and error come from :func:`block_average` (Flyvbjerg & Petersen 1989). ``converged``
    is True when the truncation was accepted and the blocking plateau was found.
    """
    t, x, spacing, resampled = _prepare(times, values, spacing_rtol)
    if x.ndim != 1:
        raise ValueError("stationary_summary takes a 1-D series; use stationary_summary_bins")
    start, accepted, note = _truncate(x[:, None], batch_size)
    result = block_average(x[start:], spacing=spacing, rule=rule)
    converged = bool(accepted[0]) and bool(result.reliable)
    if not result.reliable:
        note = "; ".join(filter(None, [note, "no blocking plateau (series too short)"]))
    return Summary(
        mean=float(result.mean),
        stderr=float(result.stderr),
        start_time=float(t[start]),
        start_index=start,
        n_samples=result.n_samples,
        n_eff=float(result.n_eff),
        t_int=float(result.t_int),
        converged=converged,
        stderr_err=float(result.stderr_err),
        t_int_samples=float(result.t_int_samples),
        spacing=spacing,
        resampled=resampled,
        note=note,
    )


def stationary_summary_bins(times, values, *, batch_size: int = 5, rule: str = "plateau",
                            spacing_rtol: float = 0.05) -> BinnedSummary:
    """Per-bin version of :func:`stationary_summary` for a (samples x bins) array.

    MSER-5 runs on every bin; the common start is the latest accepted truncation over the
    bins (conservative: every bin is past its transient). Blocking then gives each bin its
    own error bar and integral time. ``converged`` is True only if every bin converged.
    """
    t, x, spacing, resampled = _prepare(times, values, spacing_rtol)
    if x.ndim != 2:
        raise ValueError("stationary_summary_bins takes a (samples x bins) array")
    start, accepted, note = _truncate(x, batch_size)
    result = block_average(x[start:], spacing=spacing, rule=rule)
    bin_converged = accepted & np.asarray(result.reliable)
    if not np.all(result.reliable):
        note = "; ".join(filter(None, [note, "no blocking plateau in some bins"]))
    return BinnedSummary(
        mean=result.mean,
        stderr=result.stderr,
        start_time=float(t[start]),
        start_index=start,
        n_samples=result.n_samples,
        n_eff=result.n_eff,
        t_int=result.t_int,
        converged=bool(bin_converged.all()),
        bin_converged=bin_converged,
        stderr_err=result.stderr_err,
        t_int_samples=result.t_int_samples,
        spacing=spacing,
        resampled=resampled,
        note=note,
    )
