"""Tests of eddybox.solver.estimators.timeseries: transient detection, blocking error bars, run comparison.

Synthetic series with known statistics stand in for run output. The reference for the
AR(1) checks is the textbook result for x_{t+1} = phi x_t + xi_t (Box & Jenkins, Time
Series Analysis; common practice):

    sigma_x^2 = sigma_xi^2 / (1 - phi^2),
    Var(mean) ~ sigma_x^2 (1 + phi) / (1 - phi) / n,
    t_int     = 1/2 + sum_{k>=1} phi^k = (1 + phi) / (2 (1 - phi))   [samples].
"""

import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter

from eddybox.solver.estimators.timeseries import (
    PLATEAU_RULES,
    block_average,
    blocking_levels,
    mser_statistic,
    mser_truncation,
    stationary_summary,
    stationary_summary_bins,
    uniform_samples,
)

PHI = 0.9
SEEDS = range(8)


def ar1(n, seed, phi=PHI, sigma_xi=1.0):
    """Stationary AR(1) sample path: x_0 drawn from the stationary law, then the recursion."""
    xi = np.random.default_rng(seed).standard_normal(n) * sigma_xi
    xi[0] /= np.sqrt(1.0 - phi**2)
    return lfilter([1.0], [1.0, -phi], xi)


def ar1_stderr(n, phi=PHI, sigma_xi=1.0):
    # Box & Jenkins (textbook time-series result; common practice)
    var_x = sigma_xi**2 / (1.0 - phi**2)
    return np.sqrt(var_x * (1.0 + phi) / (1.0 - phi) / n)


def ar1_t_int(phi=PHI):
    # Box & Jenkins: sum of the AR(1) autocorrelation phi^|k| over all lags, halved
    return (1.0 + phi) / (2.0 * (1.0 - phi))


# ------------------------------------------------------------------------------------------
# Blocking (Flyvbjerg & Petersen 1989)
# ------------------------------------------------------------------------------------------

def test_blocking_levels_match_scipy_sem_of_block_means():
    # scipy.stats.sem (ddof=1) of the 2^j-sample block means is the Flyvbjerg & Petersen
    # (1989) level-j estimate sqrt(c0/(n'-1)); its error is that over sqrt(2(n'-1)).
    x = ar1(2**12, seed=3)
    levels = blocking_levels(x)
    for j, size in enumerate(levels.block_size):
        means = x.reshape(-1, size).mean(axis=1)
        assert levels.n_blocks[j] == means.size
        assert levels.stderr[j] == pytest.approx(stats.sem(means), rel=1e-12)
        assert levels.stderr_err[j] == pytest.approx(
            stats.sem(means) / np.sqrt(2 * (means.size - 1)), rel=1e-12)


@pytest.mark.parametrize("rule", sorted(PLATEAU_RULES))
@pytest.mark.parametrize("n", [2**13, 2**15, 50_000])
def test_blocking_error_matches_ar1_standard_error(rule, n):
    # analytic AR(1) standard error of the mean (Box & Jenkins; common practice), within 20 %
    ratios = [block_average(ar1(n, seed), rule=rule).stderr / ar1_stderr(n) for seed in SEEDS]
    assert np.mean(ratios) == pytest.approx(1.0, rel=0.20)


@pytest.mark.parametrize("rule", sorted(PLATEAU_RULES))
@pytest.mark.parametrize("n", [2**15, 2**17])
def test_integral_time_matches_ar1(rule, n):
    # t_int = (1+phi)/(2(1-phi)) = 9.5 samples for phi = 0.9 (Box & Jenkins; common practice)
    t_int = [block_average(ar1(n, seed), rule=rule).t_int_samples for seed in SEEDS]
    assert np.mean(t_int) == pytest.approx(ar1_t_int(), rel=0.20)
    # n_eff = n / (2 t_int) by definition
    res = block_average(ar1(n, 0), rule=rule)
    assert res.n_eff == pytest.approx(n / (2 * res.t_int_samples), rel=1e-12)


def test_integral_time_of_white_noise_is_one_half():
    # uncorrelated samples: t_int = 1/2, n_eff = n (definition; common practice)
    n = 2**14
    res = [block_average(np.random.default_rng(s).standard_normal(n)) for s in SEEDS]
    assert np.mean([r.t_int_samples for r in res]) == pytest.approx(0.5, rel=0.20)
    assert np.mean([r.n_eff for r in res]) == pytest.approx(n, rel=0.20)


def test_integral_time_in_time_units_scales_with_spacing():
    n, dt = 2**15, 0.05
    x = ar1(n, seed=11)
    s = stationary_summary(dt * np.arange(n), x)
    assert s.spacing == pytest.approx(dt)
    assert s.t_int == pytest.approx(s.t_int_samples * dt, rel=1e-12)
    # AR(1) t_int (Box & Jenkins; common practice), single seed so 35 %
    assert s.t_int == pytest.approx(ar1_t_int() * dt, rel=0.35)


def test_short_series_is_flagged_not_converged():
    # 300 samples with t_int = 9.5: the blocking curve cannot reach its plateau
    s = stationary_summary(None, ar1(300, seed=2))
    assert not s.converged
    assert "plateau" in s.note


# ------------------------------------------------------------------------------------------
# Initial transient (MSER, White 1997; MSER-5, White, Cobb & Spratt 2000)
# ------------------------------------------------------------------------------------------

def test_mser_statistic_is_the_published_formula():
    # White (1997): MSER(d) = sum_{i>d} (z_i - zbar_d)^2 / (k-d)^2 = var(z[d:]) / (k-d)
    z = np.random.default_rng(5).standard_normal(50) + np.linspace(3, 0, 50)
    expected = [np.var(z[d:]) / (z.size - d) for d in range(z.size - 1)]
    np.testing.assert_allclose(mser_statistic(z), expected, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("seed", range(100, 110))
def test_mser_finds_a_step_transient(seed):
    # a 5-sigma offset over the first 200 of 2000 samples must be cut at ~200
    x = np.random.default_rng(seed).standard_normal(2000)
    x[:200] += 5.0
    cut = mser_truncation(x)
    assert cut.accepted
    assert 200 <= cut.index <= 250


def test_mser_finds_a_step_transient_in_correlated_noise():
    idx = []
    for seed in SEEDS:
        x = ar1(2000, seed) * np.sqrt(1 - PHI**2)  # unit variance
        x[:200] += 5.0
        idx.append(mser_truncation(x).index)
    assert min(idx) >= 195
    assert 195 <= np.median(idx) <= 260


def test_mser_exponential_transient():
    # offset 5 exp(-t/100): cut after at least one and at most five decay times
    t = np.arange(2000)
    for seed in SEEDS:
        x = np.random.default_rng(seed).standard_normal(t.size) + 5.0 * np.exp(-t / 100.0)
        cut = mser_truncation(x)
        assert cut.accepted
        assert 100 <= cut.index <= 500


@pytest.mark.parametrize("correlated", [False, True])
def test_mser_leaves_a_stationary_series_almost_whole(correlated):
    idx = []
    for seed in range(10):
        x = ar1(2000, seed) if correlated else np.random.default_rng(seed).standard_normal(2000)
        cut = mser_truncation(x)
        assert cut.accepted
        idx.append(cut.index)
    assert max(idx) <= 0.15 * 2000
    assert np.median(idx) <= 0.05 * 2000


def test_mser_refuses_to_cut_more_than_half():
    # a steady drift never settles: the minimiser lies in the second half and is refused
    n = 2000
    x = np.random.default_rng(7).standard_normal(n) + 10.0 * np.arange(n) / n
    cut = mser_truncation(x)
    assert not cut.accepted
    assert cut.index > n // 2
    s = stationary_summary(None, x)
    assert not s.converged
    assert s.start_index == n // 2  # at most half is dropped


def test_summary_removes_transient_before_averaging():
    n = 2**14
    x = ar1(n, seed=21)
    x[:1000] += 5.0 / np.sqrt(1.0 - PHI**2)  # 5 sigma_x over the first 1000 samples
    s = stationary_summary(None, x)
    assert s.converged
    assert 1000 <= s.start_index <= 1200
    # the true mean is 0; the error bar must cover it (AR(1) reference, 3 sigma)
    assert abs(s.mean) < 3 * s.stderr
    assert s.stderr == pytest.approx(ar1_stderr(s.n_samples), rel=0.35)
    assert str(s).startswith(f"{s.mean:.6g} ± ")


# ------------------------------------------------------------------------------------------
# Uneven sampling
# ------------------------------------------------------------------------------------------

def test_uniform_samples_keeps_nearly_even_times_and_resamples_uneven_ones():
    t = np.arange(100) * 0.1 + np.random.default_rng(0).uniform(-0.002, 0.002, 100)
    t2, v2, resampled = uniform_samples(t, np.sin(t))
    assert not resampled
    assert np.array_equal(t2, t) and np.array_equal(v2, np.sin(t))
    # uneven times: linear interpolation reproduces a linear function exactly
    t = np.cumsum(np.random.default_rng(1).uniform(0.05, 0.15, 200))
    f = np.stack([3.0 * t - 1.0, -t], axis=1)
    grid, v, resampled = uniform_samples(t, f)
    assert resampled
    np.testing.assert_allclose(np.diff(grid), np.median(np.diff(t)), rtol=1e-9)
    np.testing.assert_allclose(v[:, 0], 3.0 * grid - 1.0, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(v[:, 1], -grid, rtol=1e-12, atol=1e-12)


def test_summary_of_unevenly_sampled_series():
    # AR(1) on a fine uniform grid, then observed at uneven times (every 1..3 grid steps)
    x = ar1(3 * 2**14, seed=4)
    steps = np.random.default_rng(4).integers(1, 4, size=2**14)
    keep = np.cumsum(steps)
    keep = keep[keep < x.size]
    s = stationary_summary(keep.astype(float), x[keep])
    assert s.resampled
    # the mean error does not depend on how the path was observed (AR(1) reference, 35 %)
    assert s.stderr == pytest.approx(ar1_stderr(keep[-1] - keep[0]), rel=0.35)
    # integral time in time units (grid steps) stays the AR(1) one
    assert s.t_int == pytest.approx(ar1_t_int(), rel=0.35)


# ------------------------------------------------------------------------------------------
# Binned series (samples x bins)
# ------------------------------------------------------------------------------------------

def test_binned_summary_per_bin_errors():
    n = 2**15
    phis = [0.0, 0.5, 0.9]
    cols = [ar1(n, seed=30 + i, phi=p) for i, p in enumerate(phis)]
    cols.append(np.full(n, 1.25))  # an empty-ish bin that never changes
    x = np.stack(cols, axis=1)
    x[:500, 2] += 25.0  # transient in one bin only
    s = stationary_summary_bins(np.arange(n) * 0.5, x)
    assert 500 <= s.start_index <= 800  # common start covers the slowest bin
    assert s.start_time == pytest.approx(0.5 * s.start_index)
    for i, p in enumerate(phis):
        # AR(1) standard error and t_int per bin (Box & Jenkins; common practice)
        assert s.stderr[i] == pytest.approx(ar1_stderr(s.n_samples, phi=p), rel=0.25)
        assert s.t_int_samples[i] == pytest.approx(ar1_t_int(p), rel=0.5)
    assert s.mean[3] == 1.25 and s.stderr[3] == 0.0
    assert s.bin_converged[:3].all()
    # a bin on its own gives the same numbers as the scalar summary from the same start
    one = block_average(x[s.start_index:, 2], spacing=0.5)
    assert one.stderr == pytest.approx(s.stderr[2], rel=1e-12)
