"""w_r statistics of fluid tracers in stationary forced turbulence at 48^3 (Re_lambda ~ 30),
resolved at every separation by the sinh-spaced w_r rows.

The run is the session's shared tracer run (tests/conftest.py, `tracers48`): forced from t = 0,
40000 tracers released at t = 4, 40 pair samples to t = 20, separations from 0.35 eta to 0.49 L
(36 eta) in box units, pairs beyond 5 eta on a subsample.

Outside references: the velocity-derivative skewness computed from the spectral field
(fluid.h5, the longitudinal increment w_r / r tends to du/dx as r -> 0, and in isotropic flow
every direction of r-hat is alike; Pope 2000, sec. 6.1-6.2), near-Gaussian velocity
differences at integral-scale separations and intermittent (flatness > 3) ones at the
Kolmogorov scale (Pope 2000, sec. 6.2-6.3; common practice), the exact second moment
accumulated pair by pair in the kernel.
"""
from __future__ import annotations

import h5py
import numpy as np
import pytest

from eddybox.solver.estimators.pairs import binned_moments
from eddybox.solver.study.readers import read_pair_group, time_average, wr_pdf
from tests.conftest import TRACER_RELEASE as RELEASE


@pytest.fixture(scope="module")
def tracers(tracers48):
    series = read_pair_group(tracers48 + "/pairs.h5", "tracers__tracers")
    with h5py.File(tracers48 + "/fluid.h5", "r") as f:
        fluid = {k: f["series"][k][...] for k in ("time", "skewness", "eta")}
    return series, fluid


def _moments(series, k, keep):
    h = series.wr_hist[keep, k].sum(axis=0)
    return binned_moments(h, series.wr_edges[k]), int(h.sum())


def test_small_r_skewness_equals_the_velocity_derivative_skewness(tracers):
    series, fluid = tracers
    avg = time_average(series)
    keep = avg.window.mask(series.time)
    small = np.nonzero(avg.r_eta < 0.6)[0]
    assert small.size >= 3 and avg.counts[small].sum() > 30000
    # pool the moments of the smallest bins, each from its own histogram row
    mom = [_moments(series, k, keep) for k in small]
    n = sum(c for _, c in mom)
    m1, m2, m3 = (sum(c * m[p] for m, c in mom) / n for p in (1, 2, 3))
    skew = (m3 - 3 * m1 * m2 + 2 * m1**3) / (m2 - m1**2) ** 1.5
    s_fluid = fluid["skewness"][fluid["time"] >= RELEASE].mean()
    assert -0.7 < s_fluid < -0.35  # developed turbulence (Pope 2000, sec. 6.5)
    assert abs(skew - s_fluid) < 0.1, (skew, s_fluid)


def test_flatness_gaussian_at_half_the_box_and_intermittent_at_two_eta(tracers):
    series, _ = tracers
    far = wr_pdf(series, 3.0)  # box units: the largest bin, r ~ 0.47 L
    near = wr_pdf(series, 2.0, r_in_eta=True)
    assert far.r_eta > 30 and 1.7 < near.r_eta < 2.4
    assert abs(far.flatness - 3.0) < 0.3, far.flatness
    assert near.flatness > 3.5, near.flatness
    assert far.tail_fraction == 0.0 and near.tail_fraction == 0.0  # the rows reach far enough
    # the PDF at small r is resolved: many bins inside +-2 sigma (one bin before the rows)
    small = wr_pdf(series, 0.4, r_in_eta=True)
    inside = (np.abs(small.x_centres) < 2) & (small.pdf > 0)
    assert inside.sum() >= 20


def test_histogram_second_moment_matches_the_exact_sums_in_every_bin(tracers):
    series, _ = tracers
    avg = time_average(series)
    keep = avg.window.mask(series.time)
    for k in range(avg.rdf.size):
        (mom, count) = _moments(series, k, keep)
        assert count == avg.counts[k] > 0
        assert abs(mom[2] / avg.wr_sq[k] - 1) < 0.01, (k, avg.r_eta[k], mom[2] / avg.wr_sq[k])
