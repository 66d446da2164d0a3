"""Pooled pair estimators (solver/estimators/pairs.py) on sample streams with a known answer,
through every consumer: the pair hook's running/, the reader, `eddybox inspect`, the tidy
table behind the report's figures and pairs.csv.

Outside references: the Poisson distribution (numpy.random), Gaussian moments (handbook:
<|w|> = sigma sqrt(2/pi), <w^2> = sigma^2, <w^4> = 3 sigma^4; scipy.stats.norm), the
integral time of an AR(1) process (Box & Jenkins 1976, Time Series Analysis, ch. 3; from
memory: rho(k) = phi^k, so t_int = 1/2 + sum rho(k) = (1 + phi) / (2 (1 - phi))), normal
coverage probabilities (scipy.stats.norm).
"""
from __future__ import annotations

import csv
import math
import re

import h5py
import numpy as np
import pytest
from scipy import stats

from eddybox.particles.hooks import PairHook
from eddybox.solver.estimators import pairs as est
from eddybox.solver.run.config import PairStatsConfig
from eddybox.solver.study import readers
from eddybox.solver.study.inspect import inspect_file

N_SAMPLES = 10**4
EXPECTED = np.array([0.05, 0.3, 2.0, 50.0])  # ideal-gas pairs per sample in each bin
G_TRUE = np.array([1.6, 1.3, 1.1, 1.0])
SIGMA = np.array([0.02, 0.05, 0.1, 0.4])  # w_r Gaussian with this rms in each bin
R_CENTRES = np.array([0.1, 0.2, 0.4, 0.8])
ETA, TAU_ETA = 0.1, 0.5


def _truth():
    abs_mean = SIGMA * math.sqrt(2 / math.pi)  # <|w|> of a Gaussian (handbook)
    return {"rdf": G_TRUE, "wr_sq": SIGMA**2, "wr_abs": abs_mean,
            "kernel": 2 * np.pi * R_CENTRES**2 * G_TRUE * abs_mean,
            "kernel_norm": 2 * np.pi * R_CENTRES**2 * G_TRUE * abs_mean * TAU_ETA / ETA**3}


def _records(seed=5, n=N_SAMPLES):
    """Per-sample records as the pair hook writes them: Poisson counts, Gaussian w_r per pair,
    means NaN in empty bins, a 3-bin w_r histogram per separation bin."""
    rng = np.random.default_rng(seed)
    counts = rng.poisson(G_TRUE * EXPECTED, size=(n, EXPECTED.size))
    total = counts.sum()
    w = rng.standard_normal(total) * np.repeat(np.tile(SIGMA, n), counts.ravel())
    owner = np.repeat(np.arange(counts.size), counts.ravel())
    per = lambda x: np.bincount(owner, x, counts.size).reshape(counts.shape)  # noqa: E731
    c = counts.astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = lambda s: np.where(counts > 0, s / c, np.nan)  # noqa: E731
        recs = {"counts": counts, "expected": np.broadcast_to(EXPECTED, counts.shape).copy(),
                "rdf": counts / EXPECTED, "wr_mean": mean(per(w)), "wr_sq": mean(per(w * w)),
                "wr_abs": mean(per(np.abs(w))), "wr_inward": mean(per(np.maximum(-w, 0))),
                "wr_trans": mean(per(0.5 * w * w))}
    recs["kernel"] = 2 * np.pi * R_CENTRES**2 * recs["rdf"] * np.nan_to_num(recs["wr_abs"])
    hist = np.zeros(counts.shape + (3,), np.int64)
    np.add.at(hist, (owner // EXPECTED.size, owner % EXPECTED.size,
                     np.digitize(w, [-1e-300, 1e-300])), 1)
    recs["wr_hist"] = hist
    recs["wr_under"] = np.zeros(counts.shape, np.int64)
    recs["wr_over"] = np.zeros(counts.shape, np.int64)
    recs["r_centres"] = np.broadcast_to(R_CENTRES, counts.shape).copy()
    return recs


@pytest.fixture(scope="module")
def stream():
    return _records()


def _assert_unbiased(values, errors, names=("rdf", "wr_sq", "wr_abs", "kernel", "kernel_norm")):
    truth = _truth()
    for name in names:
        v, e = np.asarray(values[name], float), np.asarray(errors[name], float)
        assert np.all(np.isfinite(v)) and np.all(e > 0), name
        assert np.all(np.abs(v - truth[name]) < 3 * e), (name, v, truth[name], e)


def _write_file(path, recs):
    """A pairs.h5 as the run writes it (the per-sample datasets, times 0, 1, 2, ...)."""
    wr_edges = np.tile([-1.0, -1e-300, 1e-300, 1.0], (EXPECTED.size, 1))
    with h5py.File(path, "w") as f:
        f.attrs["producer"] = "eddybox"
        g = f.create_group("pairs/a__a")
        g.attrs.update({"set_a": "a", "set_b": "a", "stokes_a": 1.0, "stokes_b": 1.0,
                        "tau_p_a": 0.5, "tau_p_b": 0.5, "r_units": "box", "window": "start"})
        g["time"] = np.arange(len(recs["counts"]), dtype=float)
        g["r_edges"] = np.geomspace(0.1 / math.sqrt(2), 0.8 * math.sqrt(2), 5)  # centres R_CENTRES
        g["r_edges"].attrs["units"] = "L"
        g["wr_edges"] = wr_edges
        for k, v in recs.items():
            g[k] = v
        g["eta"] = np.full(len(recs["counts"]), ETA)
        g["tau_eta"] = np.full(len(recs["counts"]), TAU_ETA)
        g["running/start_time"] = 0.0


def test_pooled_estimators_are_unbiased_from_sparse_to_dense_bins(stream):
    # from 0.05 to 50 expected pairs per sample: every pooled ratio within 3 standard errors
    # of the truth over 10^4 samples
    sums = est.pair_sums(stream, stream["r_centres"], ETA, TAU_ETA)
    e = est.pair_estimates(sums)
    _assert_unbiased({k: v.value for k, v in e.items()}, {k: v.stderr for k, v in e.items()})
    # the two averages this replaces fail the same test in the sparse bin: NaN -> 0 before a
    # mean over samples (biased by P(c > 0)), and a mean over non-empty samples of K (1/P(c > 0))
    p_any = 1 - np.exp(-G_TRUE[0] * EXPECTED[0])  # Poisson P(c > 0)
    zero_filled = np.nan_to_num(stream["wr_abs"][:, 0]).mean()
    k_nonempty = np.nanmean(np.where(stream["counts"][:, 0] > 0, stream["kernel"][:, 0], np.nan))
    truth = _truth()
    assert abs(zero_filled / truth["wr_abs"][0] - p_any) < 0.02
    assert abs(zero_filled - truth["wr_abs"][0]) > 10 * e["wr_abs"].stderr[0]
    assert abs(k_nonempty - truth["kernel"][0]) > 10 * e["kernel"].stderr[0]


def test_running_group_of_the_hook_is_unbiased(stream):
    cfg = PairStatsConfig.parse({"every": 1.0, "start": 0.0, "units": "box", "r_max": 1.13},
                                "stats.pairs")
    hook = PairHook(cfg, "unused.h5", ["a"], 2 * np.pi, 1)
    g = "/pairs/a__a"
    for i in range(N_SAMPLES):
        values = {k: v[i] for k, v in stream.items()}
        hook._window_sample(g, float(i), values, ETA, TAU_ETA)
    acc = hook.running[g]
    assert acc.n == N_SAMPLES
    means = acc.means()
    errors = {k: v.stderr for k, v in
              est.pair_estimates(est.pair_sums(stream, stream["r_centres"], ETA, TAU_ETA)).items()}
    _assert_unbiased(means, errors)
    np.testing.assert_array_equal(acc.totals["wr_hist"], stream["wr_hist"].sum(axis=0))


def test_reader_inspect_and_table_are_unbiased(stream, tmp_path):
    path = tmp_path / "pairs.h5"
    _write_file(path, stream)
    series = readers.read_pair_group(path, "a__a")
    avg = readers.time_average(series)
    assert avg.window.method == "start" and avg.n_samples == N_SAMPLES
    _assert_unbiased({"rdf": avg.rdf, "wr_sq": avg.wr_sq, "wr_abs": avg.wr_abs,
                      "kernel": avg.kernel, "kernel_norm": avg.kernel_norm},
                     {"rdf": avg.rdf_err, "wr_sq": avg.wr_sq_err, "wr_abs": avg.wr_abs_err,
                      "kernel": avg.kernel_err, "kernel_norm": avg.kernel_norm_err})
    # the CSV of the report: the tidy table written and read back as text
    table = readers.pair_table([path], ["synthetic"])
    table.write_csv(tmp_path / "pairs.csv")
    with open(tmp_path / "pairs.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == EXPECTED.size and rows[0]["run"] == "synthetic"
    col = lambda k: np.array([float(r[k]) for r in rows])  # noqa: E731
    _assert_unbiased({"rdf": col("g"), "wr_sq": col("wr_sq"), "wr_abs": col("wr_abs"),
                      "kernel": col("kernel"), "kernel_norm": col("kernel_norm")},
                     {"rdf": col("g_err"), "wr_sq": col("wr_sq_err"), "wr_abs": col("wr_abs_err"),
                      "kernel": col("kernel_err"), "kernel_norm": col("kernel_norm_err")})
    np.testing.assert_allclose(col("r_eta"), R_CENTRES / ETA, rtol=1e-12)
    # eddybox inspect prints g, <w_r^2>, <|w_r|> and K with their errors per bin
    text = inspect_file(path)
    lines = [ln for ln in text.splitlines() if ln.strip() and ln.split()[0][0].isdigit()]
    got = np.array([[float(x) for x in re.findall(r"([-\d.e+]+)±([-\d.e+]+)", ln)[j]]
                    for ln in lines for j in range(4)]).reshape(len(lines), 4, 2)
    assert "averaging window: t >= 0 (configured start)" in text
    _assert_unbiased({"rdf": got[:, 0, 0], "wr_sq": got[:, 1, 0], "wr_abs": got[:, 2, 0],
                      "kernel": got[:, 3, 0]},
                     {"rdf": got[:, 0, 1], "wr_sq": got[:, 1, 1], "wr_abs": got[:, 2, 1],
                      "kernel": got[:, 3, 1]}, names=("rdf", "wr_sq", "wr_abs", "kernel"))


def test_empty_and_single_sample_bins_give_nan_not_errors():
    num = np.array([[0.0, 1.0], [0.0, 3.0]])
    den = np.array([[0.0, 2.0], [0.0, 2.0]])
    e = est.ratio_estimate(num, den)
    assert np.isnan(e.value[0]) and np.isnan(e.stderr[0]) and e.value[1] == 1.0
    one = est.ratio_estimate(num[:1], den[:1])
    assert one.value[1] == 0.5 and np.isnan(one.stderr[1])
    assert np.isnan(est.pooled_ratio([0.0], [0.0]))


def _ar1(rng, n, m, phi):
    """m independent AR(1) series of length n with unit variance, started stationary."""
    x = np.empty((n, m))
    x[0] = rng.standard_normal(m)
    noise = rng.standard_normal((n, m)) * math.sqrt(1 - phi * phi)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + noise[i]
    return x


def test_error_bars_cover_the_true_ratio_for_correlated_samples():
    # 400 series of a ratio of correlated sums: denominators Poisson with an AR(1) rate,
    # numerators x_i (mu + AR(1) noise); phi = 0.9: integral time 9.5 samples (Box & Jenkins)
    rng = np.random.default_rng(11)
    n, m, phi, mu = 4096, 400, 0.9, 2.0
    rate = 20.0 * np.exp(0.3 * _ar1(rng, n, m, phi))
    x = rng.poisson(rate).astype(float)
    y = x * (mu + 0.5 * _ar1(rng, n, m, phi)) + np.sqrt(x) * rng.standard_normal((n, m))
    e = est.ratio_estimate(y, x)
    # the ratio of the long-run means is mu (E[y_i] = mu E[x_i])
    inside1 = np.mean(np.abs(e.value - mu) < e.stderr)
    inside2 = np.mean(np.abs(e.value - mu) < 2 * e.stderr)
    # nominal normal coverage (scipy.stats.norm) within 3 binomial standard deviations
    for got, k in ((inside1, 1), (inside2, 2)):
        p = stats.norm.cdf(k) - stats.norm.cdf(-k)
        assert abs(got - p) < 3 * math.sqrt(p * (1 - p) / m) + 0.02, (k, got, p)
    # error bars that treat the samples as independent cover far too rarely
    z = (y - e.value * x) / x.mean(axis=0)
    naive = z.std(axis=0, ddof=1) / math.sqrt(n)
    assert np.mean(np.abs(e.value - mu) < naive) < 0.4
    # and the error bar is the spread of the estimate over independent series (400 series:
    # the sample standard deviation is good to about 4 %)
    assert 0.85 < np.std(e.value, ddof=1) / np.median(e.stderr) < 1.15


def test_window_detects_the_end_of_a_transient():
    # g relaxes from 1 towards 2 with time scale 1 after the release at t = 0, then fluctuates;
    # the window starts after the relaxation and never before the floor (release + 3 tau_p)
    rng = np.random.default_rng(3)
    t = np.arange(0.0, 40.0, 0.1)
    g = 2.0 - np.exp(-t) + 0.05 * rng.standard_normal(t.size)
    w = est.detect_window(t, g, floor_time=0.5)
    assert w.accepted and 2.0 < w.start_time < 8.0 and "auto" in w.describe()
    late = est.detect_window(t, g, floor_time=10.0)
    assert late.accepted and late.start_time >= 10.0
    short = est.detect_window(t[:15], g[:15], floor_time=0.0)
    assert not short.accepted and "too few" in short.note
    past = est.detect_window(t[:50], g[:50], floor_time=20.0)
    assert not past.accepted and past.start_time == t[25]
    np.testing.assert_array_equal(w.mask(t), t >= w.start_time)


def test_pdf_and_moments_of_a_binned_gaussian():
    # a unit Gaussian binned on a sinh row: the pooled PDF matches scipy.stats.norm, and the
    # moments from the histogram give <w^2> = 1, <w^4> = 3 (handbook) within 0.5 %
    from eddybox.particles.pairs import sinh_wr_edges

    rng = np.random.default_rng(8)
    edges = sinh_wr_edges(0.3, 8.0, 61)
    samples = [np.histogram(rng.standard_normal(20000), edges)[0] for _ in range(50)]
    hist = np.array(samples, float)
    p = est.pdf_estimate(hist, hist.sum(axis=1), edges)
    ref = np.diff(stats.norm.cdf(edges)) / np.diff(edges)
    ok = ref > 1e-3
    assert np.all(np.abs(p.value[ok] - ref[ok]) < 4 * p.stderr[ok] + 1e-3)
    mom = est.binned_moments(hist.sum(axis=0), edges)
    assert abs(mom[2] - 1) < 0.005 and abs(mom[4] / 3 - 1) < 0.01 and abs(mom[1]) < 0.01
