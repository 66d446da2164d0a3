"""w_r statistics of fluid tracers in stationary forced turbulence at 48^3 (Re_lambda ~ 30),
resolved at every separation by the sinh-spaced w_r rows.

One module-scoped run (about 25 s on one core): forced from t = 0, tracers released at t = 4
(the energy is stationary by t ~ 4-6, see tests/test_fluid_core.py), 40 pair samples to t = 8,
separations from 0.35 eta to 0.49 L (36 eta) in box units, pairs beyond 5 eta on a subsample.

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
from eddybox.solver.run.simulation import Simulation
from eddybox.solver.study.readers import read_pair_group, time_average, wr_pdf
from tests.conftest import make_config

RELEASE = 4.0


@pytest.fixture(scope="module")
def tracers(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("tracers48")
    cfg = make_config(
        tmp, name="tracers48", seed=3, grid={"points": 48},
        fluid={"viscosity": 0.015, "initial": {"kind": "spectrum", "energy": 0.3, "peak": 2}},
        forcing={"kind": "ou", "band": 2.0, "timescale": 0.3, "dissipation": 0.1},
        time={"scheme": "rk4", "cfl": 0.7, "end": 8.0},
        particles={"release": RELEASE, "interpolation": 6,
                   "sets": [{"name": "tracers", "tau_p": 0.0, "count": 40000}]},
        stats={"fluid": {"every": 0.1}, "spectra": {"every": None},
               "pairs": {"every": 0.1, "r_max": 3.1, "r_min": 0.025, "bins": 24, "units": "box",
                         "spacing": "log", "subsample_above": 0.4, "subsample_count": 4000,
                         "start": RELEASE}})
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert sim.run() == 0
    series = read_pair_group(sim.out + "/pairs.h5", "tracers__tracers")
    with h5py.File(sim.out + "/fluid.h5", "r") as f:
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
