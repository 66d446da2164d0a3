"""Tests of eddybox.solver.estimators.significance: error bars of correlated means fit for a t
test, differences of independent and of correlated (same-seed) runs, and the corrections for
many comparisons.

Synthetic AR(1) series x_{t+1} = phi x_t + xi_t stand in for run output; their exact variance
of the mean is the textbook result (Box & Jenkins, Time Series Analysis; common practice):

    Var(mean) ~ sigma_xi^2 / (1 - phi^2) (1 + phi) / (1 - phi) / n,
    t_int = (1 + phi) / (2 (1 - phi))  [samples]  (9.5 at phi = 0.9).
"""
import math

import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter

from eddybox.solver.estimators.significance import (
    MIN_BATCHES,
    Difference,
    adjust,
    common_grid,
    independent_difference,
    mean_error,
    paired_difference,
    two_sided_p,
    welch_dof,
)
from eddybox.solver.estimators.timeseries import block_average


def ar1(n, rng, phi=0.9):
    xi = rng.standard_normal(n)
    xi[0] /= np.sqrt(1.0 - phi**2)  # start in the stationary law
    return lfilter([1.0], [1.0, -phi], xi)


def ar1_stderr(n, phi=0.9):
    # Box & Jenkins (common practice)
    return math.sqrt(1.0 / (1.0 - phi**2) * (1.0 + phi) / (1.0 - phi) / n)


def test_batch_means_of_independent_samples_match_scipy_sem():
    # independent samples: the means of 8 batches of the last 8 floor(n/8) samples, and their
    # scipy.stats.sem, with no bias to correct beyond the sampling noise
    x = np.random.default_rng(1).standard_normal(1003)
    e = mean_error(x)
    b, size = e.n_batches, e.batch_size
    assert b == MIN_BATCHES == 8 and size == 125
    kept = x[3:]
    sem = stats.sem(kept.reshape(b, size).mean(axis=1))
    # the correction solves V (1 - (b+1) V / (2 var_x)) = S (see mean_error)
    a = (b + 1) / (2 * np.var(kept, ddof=1))
    v = (1 - math.sqrt(1 - 4 * a * sem**2)) / (2 * a)
    assert e.stderr == pytest.approx(math.sqrt(v), rel=1e-12)
    assert e.dof == b - 1 and e.reliable and e.mean == pytest.approx(x.mean(), rel=1e-12)


def test_error_of_a_correlated_mean_is_unbiased_where_blocking_plateaus_read_low():
    # AR(1), phi = 0.9 (t_int 9.5 samples), 512 samples: about 27 effective samples
    rng = np.random.default_rng(2)
    n, exact = 512, ar1_stderr(512)
    ours, plateau = [], []
    for _ in range(400):
        x = ar1(n, rng)
        ours.append(mean_error(x).stderr / exact)
        plateau.append(block_average(x).stderr / exact)
    # the plateau rule reads about 20 % low this short (measured 0.77); ours within 10 %
    assert np.mean(plateau) < 0.85
    assert np.mean(ours) == pytest.approx(1.0, abs=0.1)


def test_too_short_series_are_flagged():
    rng = np.random.default_rng(3)
    e = mean_error(ar1(128, rng, phi=0.97))  # t_int ~ 33 samples: about 2 effective samples
    assert not e.reliable and "too short" in e.note
    assert not mean_error(np.arange(10.0)).reliable
    assert math.isnan(mean_error([]).mean)


def test_welch_dof_and_t_test_match_scipy():
    # independent samples with stderr = sem: Welch's t test (scipy.stats.ttest_ind, equal_var
    # False) gives the same statistic, degrees of freedom and p-value
    rng = np.random.default_rng(4)
    a, b = rng.normal(0.0, 1.0, 40), rng.normal(0.4, 2.0, 90)
    sa, sb = stats.sem(a), stats.sem(b)
    ref = stats.ttest_ind(b, a, equal_var=False)
    nu = welch_dof(sa, a.size - 1, sb, b.size - 1)
    assert nu == pytest.approx(ref.df, rel=1e-12)
    assert two_sided_p(b.mean() - a.mean(), math.hypot(sa, sb), nu) == pytest.approx(ref.pvalue, rel=1e-10)


def _pairs(rng, n, count, shift=0.0):
    return [independent_difference(mean_error(ar1(n, rng)), mean_error(ar1(n, rng) + shift))
            for _ in range(count)]


def test_false_positive_rate_is_nominal_for_few_effective_samples():
    # equal means, different "seeds": the uncorrected test at 5 % fires in 5 % of the
    # comparisons (binomial 99 % band for 600 trials: 2.9-7.6 %); a Gaussian 2 sigma test on
    # the blocking plateau (what eddybox did before) fires far more often
    rng = np.random.default_rng(5)
    n, trials = 512, 600
    ours, gauss = 0, 0
    ps = []
    for _ in range(trials):
        xa, xb = ar1(n, rng), ar1(n, rng)
        d = independent_difference(mean_error(xa), mean_error(xb))
        ps.append(d.p_value)
        ours += d.p_value < 0.05
        a, b = block_average(xa), block_average(xb)
        gauss += abs(b.mean - a.mean) > 2 * math.hypot(a.stderr, b.stderr)
    assert 0.025 <= ours / trials <= 0.08, ours / trials  # measured 4.3 %
    assert gauss / trials > 0.09, gauss / trials  # measured 12.3 %
    # the p-values are close to uniform under the null (Kolmogorov-Smirnov, scipy.stats)
    assert stats.kstest(ps, "uniform").pvalue > 0.001


def test_corrected_test_flags_at_most_ten_percent_of_null_comparisons():
    # the criterion: identical settings, different seeds; >= 20 comparisons per family
    # (as a report compares >= 20 quantities), Holm and Benjamini-Hochberg corrections
    rng = np.random.default_rng(6)
    for method in ("holm", "bh"):
        flagged = total = 0
        for _ in range(10):
            p = [d.p_value for d in _pairs(rng, 512, 24)]
            flagged += int(np.sum(adjust(p, method) < 0.05))
            total += len(p)
        assert flagged / total <= 0.10, (method, flagged, total)
        assert flagged / total <= 0.02  # measured: 0 of 240 for both


def test_a_real_shift_is_still_found_after_the_correction():
    # 6 exact standard errors of the difference: found in nearly every family even with Holm
    rng = np.random.default_rng(7)
    shift = 6 * math.sqrt(2) * ar1_stderr(2048)
    hits = 0
    for _ in range(20):
        null = [d.p_value for d in _pairs(rng, 2048, 19)]
        real = _pairs(rng, 2048, 1, shift)[0]
        hits += adjust(null + [real.p_value], "holm")[-1] < 0.05
        assert abs(real.diff - shift) < 4 * real.stderr
    assert hits >= 17


def test_same_seed_runs_are_compared_through_their_difference_series():
    # two runs that share a large common part (the same seed): the difference series cancels it,
    # so the paired error is that of the independent parts alone, sqrt(2) x the AR(1) error
    # (Box & Jenkins), while treating the runs as independent would add the common part twice
    rng = np.random.default_rng(8)
    n = 2048
    paired_err, indep_err, flags = [], [], 0
    for _ in range(200):
        common = 5.0 * ar1(n, rng)
        a, b = common + ar1(n, rng), common + ar1(n, rng)
        d = paired_difference(b.mean() - a.mean(), mean_error(b - a), mean_error(a))
        assert d.paired and d.reference == pytest.approx(a.mean())
        paired_err.append(d.stderr)
        indep_err.append(independent_difference(mean_error(a), mean_error(b)).stderr)
        flags += d.p_value < 0.05
    assert np.mean(paired_err) == pytest.approx(math.sqrt(2) * ar1_stderr(n), rel=0.1)
    assert np.mean(indep_err) > 3 * np.mean(paired_err)
    assert 0.01 <= flags / 200 <= 0.1  # binomial 99 % band around 5 % for 200 trials


def test_holm_and_benjamini_hochberg_by_hand():
    p = [0.01, 0.04, 0.03, 0.005, float("nan")]
    # Holm (1979): sorted 0.005, 0.01, 0.03, 0.04 times 4, 3, 2, 1 -> 0.02, 0.03, 0.06, 0.04,
    # then the running maximum -> 0.02, 0.03, 0.06, 0.06; NaN is no test and not counted
    np.testing.assert_allclose(adjust(p, "holm")[:4], [0.03, 0.06, 0.06, 0.02], rtol=1e-12)
    assert math.isnan(adjust(p, "holm")[4])
    # Benjamini & Hochberg (1995): m p_(i) / i = 0.02, 0.02, 0.04, 0.04, then the running
    # minimum from the top -> 0.02, 0.02, 0.04, 0.04
    np.testing.assert_allclose(adjust(p, "bh")[:4], [0.02, 0.04, 0.04, 0.02], rtol=1e-12)
    with pytest.raises(ValueError, match="holm"):
        adjust(p, "bonferoni")


def test_relative_difference_divides_by_the_magnitude_of_the_reference():
    # a skewness moving from -0.545 to -0.490 rose by 0.055: +10.1 %, not -10.1 %
    d = Difference(0.055, 0.01, 20, 0.001, -0.545, 0.02, False, True)
    assert d.relative == pytest.approx(0.055 / 0.545) and d.relative > 0
    # delta method: sqrt((0.01/0.545)^2 + (0.055 * 0.02 / 0.545^2)^2)
    assert d.relative_err == pytest.approx(math.hypot(0.01 / 0.545, 0.055 * 0.02 / 0.545**2))


def test_common_grid_keeps_identical_sampling_and_interpolates_otherwise():
    t = np.arange(0.0, 10.0, 0.1)
    g, a, b = common_grid(t, np.sin(t), t, np.cos(t), start=2.05)
    assert g[0] == pytest.approx(2.1) and g[-1] == pytest.approx(9.9)
    np.testing.assert_allclose(a, np.sin(g), atol=1e-12)
    t2 = np.arange(0.0, 8.0, 0.25)
    g, a, b = common_grid(t, t * 2, t2, t2 * 3)
    assert np.allclose(np.diff(g), 0.25) and g[-1] <= 7.75 + 1e-12
    np.testing.assert_allclose(a, 2 * g, atol=1e-12)  # linear data: interpolation is exact
    np.testing.assert_allclose(b, 3 * g, atol=1e-12)
    assert common_grid(t, t, t + 20, t)[0].size == 0
