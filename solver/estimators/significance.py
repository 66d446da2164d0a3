"""Is a difference between two runs real?  Tests of differences of stationary means of correlated
series, honest for few effectively independent samples, and corrections for testing many
quantities at once.

Three steps, each a plain function on arrays:

1. the error of a mean (:func:`mean_error`): the means of :data:`MIN_BATCHES` batches, corrected
   for the bias of short batches, with b − 1 degrees of freedom for the t distribution;
2. the difference of two means (:func:`independent_difference` for runs with different seeds,
   Welch's t with Welch–Satterthwaite degrees of freedom; :func:`paired_difference` for runs
   that share a seed, whose samples are correlated with each other: the error of the
   difference series on a common time grid);
3. the correction for the number of quantities compared (:data:`CORRECTIONS`: Holm 1979,
   Benjamini & Hochberg 1995) applied to the two-sided p-values.

Why not the plateau of the blocking curve with a Gaussian 2σ threshold: on AR(1) series with
integral time τ = 9.5 samples and 256 to 512 samples (13 to 27 effective ones, typical of a short
run's fluid series), that error bar is 25-35 % too small, and a 2σ test of two such runs with equal
means fires in 14-19 % of the comparisons instead of 5 %.  The estimator here keeps that rate
within 4-7 % down to about 25 effective samples (tests/test_significance.py) and flags shorter
series as not converged.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = [
    "MIN_BATCHES",
    "SIGNIFICANCE_LEVEL",
    "MeanError",
    "Difference",
    "mean_error",
    "welch_dof",
    "two_sided_p",
    "independent_difference",
    "paired_difference",
    "common_grid",
    "CORRECTIONS",
    "correction",
    "adjust",
]

#: batches the error of a mean rests on (the t distribution then has 7 degrees of freedom)
MIN_BATCHES = 8
#: the nominal level of every test (two-sided, after the correction)
SIGNIFICANCE_LEVEL = 0.05
#: bias factors beyond this (batches shorter than about twice the integral time) are not trusted
MAX_BIAS_CORRECTION = 2.0


@dataclass(frozen=True)
class MeanError:
    """A mean (or a pooled ratio) with its standard error and the degrees of freedom of that
    error.  ``reliable`` is False when the series is too short for the error bar to be trusted
    (``note`` says why); the error is then a floor, likely too small."""

    mean: float
    stderr: float
    dof: float
    n_samples: int
    batch_size: int = 1
    n_batches: int = 0
    bias_factor: float = 1.0
    reliable: bool = True
    note: str = ""


def mean_error(values) -> MeanError:
    """Mean of a correlated series with a standard error fit for a t test.

    Batch means (Schmeiser, B. 1982, "Batch size effects in the analysis of simulation output",
    Oper. Res. 30:556-568): the last b B samples are cut into b = MIN_BATCHES batches of
    B = floor(n/b) samples (few long batches: the least bias for a given series), and

        S = sum_i (Y_i - Ybar)^2 / (b (b - 1)),     Y_i the batch means,

    estimates the variance V of the mean; (mean - mu)/sqrt(S) follows a t distribution with
    b - 1 degrees of freedom once the batch means are independent and normal.

    Short batches make S too small.  From E sum_i (Y_i - Ybar)^2 = b Var(Y_i) - b Var(Ybar) and
    Var(Y_i) = (sigma_inf^2 - gamma/B)/B + O(B^-2), with sigma_inf^2 = n V and
    gamma = 2 sum_k k R(k) (R the autocovariance), follows

        E[S] = V (1 - c (b + 1) / n),    c = gamma / sigma_inf^2

    (the bias of batch means; the same form as in Song, W.-M. T. & Schmeiser, B. 1995,
    Management Science 41:110-123, from memory).  For an exponential autocorrelation c equals
    the integral time t_int = n V / (2 sigma_x^2) in samples (for AR(1), c/t_int = 4 phi /
    (1 + phi)^2: 0.997 at phi = 0.9, 0.89 at phi = 0.5).  With that assumption V solves
    V (1 - (b + 1) V / (2 sigma_x^2)) = S:

        V = (1 - sqrt(1 - 4 a S)) / (2 a),    a = (b + 1) / (2 sigma_x^2).

    When the correction would exceed a factor MAX_BIAS_CORRECTION in V (batches shorter than
    about twice the integral time) or has no solution, the result is flagged unreliable and V
    is S times that factor.  A series with fewer than 2 MIN_BATCHES samples gets the plain
    standard error of independent samples, flagged unreliable.
    """
    x = np.asarray(values, dtype=float)
    if x.ndim != 1:
        raise ValueError("mean_error takes a 1-D series")
    n = x.size
    if n == 0 or not np.all(np.isfinite(x)):
        return MeanError(math.nan, math.nan, math.nan, n, reliable=False,
                         note="no samples" if n == 0 else "non-finite samples")
    mean = float(x.mean())
    if n < 2 * MIN_BATCHES:
        se = float(x.std(ddof=1) / math.sqrt(n)) if n > 1 else math.nan
        return MeanError(mean, se, max(n - 1, 1), n, 1, n, 1.0, False,
                         f"{n} samples: too few for an error bar of correlated samples")
    b = MIN_BATCHES
    size = n // b
    kept = x[n - b * size:]  # the remainder is dropped at the start, where a transient would be
    means = kept.reshape(b, size).mean(axis=1)
    s = float(np.var(means, ddof=1)) / b
    var_x = float(np.var(kept, ddof=1))
    if var_x == 0.0 or s == 0.0:
        return MeanError(mean, 0.0, b - 1, n, size, b)
    a = (b + 1) / (2.0 * var_x)
    disc = 1.0 - 4.0 * a * s
    v = (1.0 - math.sqrt(disc)) / (2.0 * a) if disc > 0 else math.inf
    if v > MAX_BIAS_CORRECTION * s:
        return MeanError(mean, math.sqrt(MAX_BIAS_CORRECTION * s), b - 1, n, size, b,
                         MAX_BIAS_CORRECTION, False,
                         f"batches of {size} samples are shorter than about twice the "
                         "integral time: the series is too short for a trusted error bar")
    return MeanError(mean, math.sqrt(v), b - 1, n, size, b, v / s)


def welch_dof(se_a, dof_a, se_b, dof_b) -> float:
    """Welch–Satterthwaite degrees of freedom of se_a^2 + se_b^2 (Satterthwaite, F. E. 1946,
    Biometrics Bull. 2:110-114; Welch, B. L. 1947, Biometrika 34:28-35):

        nu = (se_a^2 + se_b^2)^2 / (se_a^4 / dof_a + se_b^4 / dof_b)."""
    va, vb = float(se_a) ** 2, float(se_b) ** 2
    den = (va * va / dof_a if va > 0 else 0.0) + (vb * vb / dof_b if vb > 0 else 0.0)
    if den == 0.0:
        return float(min(dof_a, dof_b))
    return (va + vb) ** 2 / den


def two_sided_p(diff, stderr, dof) -> float:
    """P(|T| >= |diff/stderr|) for T ~ Student's t with ``dof`` degrees of freedom
    (scipy.stats.t); 1 for a zero difference with zero error, 0 for a nonzero one."""
    if not (math.isfinite(diff) and math.isfinite(stderr)) or not dof > 0:
        return math.nan
    if stderr == 0.0:
        return 1.0 if diff == 0.0 else 0.0
    return float(2.0 * stats.t.sf(abs(diff) / stderr, dof))


@dataclass(frozen=True)
class Difference:
    """b − a, its standard error and degrees of freedom, the two-sided p-value of a t test of
    no difference, and the reference a over the compared window.  ``relative`` = diff / |a|
    (the sign says which way b moved, whatever the sign of a)."""

    diff: float
    stderr: float
    dof: float
    p_value: float
    reference: float
    reference_err: float
    paired: bool
    converged: bool
    note: str = ""

    @property
    def relative(self) -> float:
        a = abs(self.reference)
        return self.diff / a if a > 0 else math.nan

    @property
    def relative_err(self) -> float:
        """First-order error of diff/|a| (delta method; the covariance of the difference and
        the reference neglected): sqrt((d diff / a)^2 + (diff d a / a^2)^2)."""
        a = abs(self.reference)
        if not a > 0:
            return math.nan
        ref_err = self.reference_err if math.isfinite(self.reference_err) else 0.0
        return math.hypot(self.stderr / a, self.diff * ref_err / (a * a))


def independent_difference(a: MeanError, b: MeanError, note: str = "") -> Difference:
    """b − a for independent runs (different seeds): Welch's t test (Welch 1947) with the
    errors and degrees of freedom of :func:`mean_error`:

        t = (b - a) / sqrt(se_a^2 + se_b^2),   nu from :func:`welch_dof`."""
    diff = b.mean - a.mean
    se = math.hypot(a.stderr, b.stderr)
    dof = welch_dof(a.stderr, a.dof, b.stderr, b.dof)
    notes = "; ".join(dict.fromkeys(x for x in (note, a.note, b.note) if x))
    return Difference(diff, se, dof, two_sided_p(diff, se, dof), a.mean, a.stderr, False,
                      a.reliable and b.reliable, notes)


def paired_difference(diff: float, error: MeanError, reference: MeanError,
                      note: str = "") -> Difference:
    """b − a for correlated runs (the same seed): ``error`` is :func:`mean_error` of the
    per-sample difference series b_i − a_i on a common time grid (for a pooled ratio, of the
    difference of the linearised samples), which carries the correlation between the runs;
    the t test has its b − 1 degrees of freedom (a paired t test on batch means: Student 1908,
    Biometrika 6:1-25, on Schmeiser 1982 batches).  ``reference`` is a over the same window
    (its error enters only the relative difference's error bar, not the test)."""
    notes = "; ".join(dict.fromkeys(x for x in (note, error.note, reference.note) if x))
    return Difference(diff, error.stderr, error.dof, two_sided_p(diff, error.stderr, error.dof),
                      reference.mean, reference.stderr, True, error.reliable, notes)


def common_grid(t_a, x_a, t_b, x_b, start: float = -math.inf):
    """(t, a, b): two sampled series on one uniform grid over their common span from
    ``start`` on, with the coarser of the two median spacings; linear interpolation (which adds
    correlation between neighbouring samples; the batch means measure it).  Samples at the
    same times pass through unchanged.  Empty arrays when the spans do not overlap."""
    t_a, t_b = np.asarray(t_a, float), np.asarray(t_b, float)
    x_a, x_b = np.asarray(x_a, float), np.asarray(x_b, float)
    lo = max(float(start), float(t_a[0]), float(t_b[0])) if t_a.size and t_b.size else math.inf
    hi = min(float(t_a[-1]), float(t_b[-1])) if t_a.size and t_b.size else -math.inf
    if not hi > lo or t_a.size < 2 or t_b.size < 2:
        return np.empty(0), np.empty(0), np.empty(0)
    h = max(float(np.median(np.diff(t_a))), float(np.median(np.diff(t_b))))
    # start on a sample of the coarser series, so identical sampling is kept as it is
    coarse = t_a if np.median(np.diff(t_a)) >= np.median(np.diff(t_b)) else t_b
    first = coarse[np.searchsorted(coarse, lo - 1e-9 * max(1.0, abs(lo)))]
    count = int(np.floor((hi - first) / h + 1e-6)) + 1
    t = first + h * np.arange(max(count, 0))
    return t, np.interp(t, t_a, x_a), np.interp(t, t_b, x_b)


# --- multiple comparisons -------------------------------------------------------------------
def _holm(p: np.ndarray) -> np.ndarray:
    """Holm, S. (1979) "A simple sequentially rejective multiple test procedure", Scand. J.
    Statist. 6:65-70: with the m p-values sorted, p_(1) <= ... <= p_(m), the adjusted values are

        p~_(i) = max_{j <= i} min(1, (m - j + 1) p_(j)),

    and rejecting p~ <= alpha keeps the chance of any false rejection (the family-wise error
    rate) at or below alpha, whatever the dependence between the tests."""
    m = p.size
    order = np.argsort(p, kind="stable")
    adj = np.minimum(1.0, np.maximum.accumulate((m - np.arange(m)) * p[order]))
    out = np.empty(m)
    out[order] = adj
    return out


def _benjamini_hochberg(p: np.ndarray) -> np.ndarray:
    """Benjamini, Y. & Hochberg, Y. (1995) "Controlling the false discovery rate", J. R.
    Statist. Soc. B 57:289-300 (scipy.stats.false_discovery_control, method 'bh'): with
    p_(i) sorted, p~_(i) = min_{j >= i} min(1, m p_(j) / j); rejecting p~ <= alpha keeps the
    expected fraction of false rejections among the rejections at or below alpha (for
    independent or positively dependent tests)."""
    return np.asarray(stats.false_discovery_control(p, method="bh"), dtype=float)


#: name -> (adjustment of an array of p-values, what it controls, citation)
CORRECTIONS = {
    "holm": (_holm, "the family-wise error rate (the chance of any false flag)",
             "Holm 1979, Scand. J. Statist. 6:65"),
    "bh": (_benjamini_hochberg, "the false discovery rate (the expected fraction of false flags "
           "among the flags)", "Benjamini & Hochberg 1995, J. R. Statist. Soc. B 57:289"),
    "none": (lambda p: p.copy(), "nothing: every comparison at the nominal level", "no correction"),
}


def correction(name: str):
    """The adjustment function of :data:`CORRECTIONS`; ValueError naming the choices."""
    if name not in CORRECTIONS:
        raise ValueError(f"unknown correction {name!r}; choose one of {', '.join(CORRECTIONS)}")
    return CORRECTIONS[name][0]


def adjust(p_values, method: str = "holm") -> np.ndarray:
    """Adjusted p-values of one family of tests; NaN entries (no test possible) stay NaN and do
    not count towards the family size."""
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    if ok.any():
        out[ok] = correction(method)(np.clip(p[ok], 0.0, 1.0))
    return out
