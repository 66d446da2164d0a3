"""Single-particle Lagrangian statistics: periodic image counters, the multiple-origin correlator
and its pooled estimators on a process with a known answer, and a heavy particle relaxing in a
uniform flow against the analytic solution.

Outside references: the unwrapped trajectory as the cumulative sum of the displacements (numpy);
the Ornstein–Uhlenbeck process sampled at interval Δ is exactly the AR(1) process v_{n+1} =
ρ v_n + √(1 − ρ²) σ ξ with ρ = e^{−Δ/T} (Uhlenbeck & Ornstein 1930; Gillespie 1996, Phys. Rev.
E 54, 2084), so R_L(kΔ) = ρ^k, and the position summed from it has ⟨(Σ_{j<k} v_j Δ)²⟩ =
σ²Δ² Σ_{i,j<k} ρ^{|i−j|} per component; the solution of dv/dt = (U − v)/τ_p from rest,
v = U(1 − e^{−t/τ_p}), x = U(t − τ_p(1 − e^{−t/τ_p})) (Maxey & Riley 1983 with a uniform
flow, here gravity: U = τ_p g in a fluid at rest).
"""
from __future__ import annotations

import math

import h5py
import numpy as np
import pytest

from eddybox.particles.integrator import track_images
from eddybox.particles.lagrangian import LagrangianCorrelator, history_bytes
from eddybox.solver.estimators.lagrangian import lagrangian_estimate, window_mask
from eddybox.solver.run.simulation import Simulation
from eddybox.solver.study.particle_readers import lagrangian_average, read_lagrangian

L = 2.0 * np.pi


def test_image_counters_follow_every_wrap():
    rng = np.random.default_rng(1)
    x = rng.random((500, 3)) * L
    true = x.copy()
    image = np.zeros((500, 3), np.int32)
    for _ in range(400):
        d = rng.standard_normal((500, 3)) * 0.4  # crossing the faces often, both ways
        start = x.copy()
        true += d
        x = np.mod(x + d, L)
        disp = np.empty_like(x)
        track_images(start, x, L, image, disp)
        np.testing.assert_allclose(disp, d, atol=1e-12)
    assert np.abs(image).max() > 3
    np.testing.assert_allclose(x + image * L, true, atol=1e-9)


def _ar1_rows(seed, m=300, lags=30, samples=1500, dt=0.1, t_corr=0.7, sigma=0.8):
    rng = np.random.default_rng(seed)
    rho = math.exp(-dt / t_corr)
    v = rng.standard_normal((m, 3)) * sigma
    x = np.zeros((m, 3))
    corr = LagrangianCorrelator(m, lags)
    rows, times = {}, []
    for n in range(samples):
        for k, a in corr.add(n * dt, v, x).items():
            rows.setdefault(k, []).append(a)
        times.append(n * dt)
        x = x + v * dt
        v = rho * v + math.sqrt(1 - rho * rho) * sigma * rng.standard_normal((m, 3))
    k = np.arange(lags + 1)
    exact = {"r_l": rho**k, "u2": sigma**2,
             "t_l": float(np.sum(0.5 * (rho ** k[1:] + rho ** k[:-1]) * dt)),
             "msd": np.array([3 * sigma**2 * dt**2 * sum(rho ** abs(i - j) for i in range(q)
                                                        for j in range(q)) for q in k])}
    return {key: np.array(a) for key, a in rows.items()}, np.array(times), exact


def test_pooled_estimates_of_an_ou_process_within_their_error_bars():
    rows, times, exact = _ar1_rows(5)
    e = lagrangian_estimate(rows, times, start=0.0)
    assert e.pairs[0] == 300 * 1500 and e.pairs[-1] == 300 * (1500 - 30)
    np.testing.assert_allclose(e.lag, 0.1 * np.arange(31), atol=1e-12)
    assert e.r_l[0] == 1.0 and e.r_l_err[0] == 0.0
    for name in ("r_l", "msd"):
        got, err, want = getattr(e, name)[1:], getattr(e, name + "_err")[1:], exact[name][1:]
        assert np.all(np.abs(got - want) < 4.5 * err), (name, np.max(np.abs(got - want) / err))
    for name in ("u2", "t_l"):
        assert abs(getattr(e, name) - exact[name]) < 4.5 * getattr(e, name + "_err"), name
    # Taylor (1921): the dispersion slope per component tends to 2 u'^2 T_L (here R_L(3) = 0.014)
    assert abs(e.taylor_ratio - 1.0) < 0.05 and e.taylor_ratio_err < 0.02


def test_error_bars_cover_the_exact_values():
    # 12 independent realisations: |estimate - exact| < 2 errors in most of them (about 95 %
    # for a Gaussian estimate; at least 9 of 12 allows for chance and for blocking's own error)
    hits = {"r_l": 0, "t_l": 0, "msd": 0}
    for seed in range(12):
        rows, times, exact = _ar1_rows(100 + seed, m=60, lags=10, samples=500)
        e = lagrangian_estimate(rows, times)
        hits["r_l"] += abs(e.r_l[5] - exact["r_l"][5]) < 2 * e.r_l_err[5]
        hits["msd"] += abs(e.msd[5] - exact["msd"][5]) < 2 * e.msd_err[5]
        hits["t_l"] += abs(e.t_l - exact["t_l"]) < 2 * e.t_l_err
    assert all(h >= 9 for h in hits.values()), hits


def test_empty_lags_and_the_window():
    rows, times, _ = _ar1_rows(7, m=20, lags=8, samples=6)
    e = lagrangian_estimate(rows, times)
    assert np.all(e.pairs[:6] == 20 * np.arange(6, 0, -1)) and np.all(e.pairs[6:] == 0)
    assert np.all(np.isnan(e.r_l[6:])) and np.all(np.isnan(e.msd[6:]))
    assert np.isfinite(e.t_l)  # integrated over the lags with data
    # window from t = 0.2: entries whose origin lies before it carry no weight
    keep = window_mask(times, rows["lag_time"], rows["count"], 0.2)
    assert keep.sum() == sum(n - 1 for n in range(2, 6))  # origins n - k >= 2 of samples 2..5
    e = lagrangian_estimate(rows, times, start=0.2)
    assert e.n_samples == 4 and e.pairs[0] == 20 * 4 and e.pairs[3] == 20 * 1
    assert np.isnan(lagrangian_estimate(rows, times, start=1e9).t_l)  # nothing in the window


def test_correlator_state_continues_bitwise():
    rng = np.random.default_rng(3)
    a, b = LagrangianCorrelator(10, 4), LagrangianCorrelator(10, 4)
    samples = [(rng.standard_normal((10, 3)), rng.standard_normal((10, 3))) for _ in range(9)]
    for i, (v, x) in enumerate(samples[:5]):
        a.add(0.1 * i, v, x)
        b.add(0.1 * i, v, x)
    c = LagrangianCorrelator(10, 4)
    c.load_state(b.state())
    for i, (v, x) in enumerate(samples[5:], start=5):
        ra, rc = a.add(0.1 * i, v, x), c.add(0.1 * i, v, x)
        assert all(np.array_equal(ra[k], rc[k]) for k in ra)
    assert a.nbytes == history_bytes(10, 4) == 2 * 5 * 10 * 3 * 8 + 5 * 8


@pytest.fixture(scope="module")
def uniform_flow(tmp_path_factory):
    from tests.conftest import make_config

    tmp = tmp_path_factory.mktemp("uniformflow")
    cfg = make_config(
        tmp, grid={"points": 16}, fluid={"viscosity": 0.05, "initial": {"kind": "rest"},
                                         "frozen": True},
        time={"scheme": "rk4", "cfl": 0.5, "end": 6.0, "max_dt": 0.02},
        particles={"release": 0.0, "interpolation": 4, "gravity": [0.0, 0.0, -5.0],
                   "sets": [{"name": "heavy", "tau_p": 0.3, "count": 100}]},
        stats={"fluid": {"every": None}, "spectra": {"every": None},
               "particles": {"every": 1.0, "max_count": 100},
               "lagrangian": {"every": 0.1, "max_lag": 1.0, "count": 50, "start": 0.0}})
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert sim.run() == 0
    from eddybox.solver.run.inventory import live_inventory, predicted_inventory

    return sim.out, live_inventory(sim), predicted_inventory(cfg)


def _exact(t, tau=0.3, u=-1.5):
    """Velocity and displacement along z of dv/dt = (U - v)/tau from rest, U = tau g."""
    return u * (1 - np.exp(-t / tau)), u * (t - tau * (1 - np.exp(-t / tau)))


def test_heavy_particle_in_a_uniform_flow_matches_the_analytic_solution(uniform_flow):
    out = uniform_flow[0]
    rows, times, attrs = read_lagrangian(out, "heavy")
    assert attrs["particles"] == 50 and times.size == 61
    origin = times[:, None] - rows["lag_time"]
    have = rows["count"] > 0
    v1, z1 = _exact(times[:, None])
    v0, z0 = _exact(origin)
    n = np.where(have, rows["count"], 1)
    # every entry of every row: sums over the 50 identical particles
    np.testing.assert_allclose(np.where(have, rows["vv"] / n, 0), np.where(have, v0 * v1, 0),
                               rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(np.where(have, rows["dx2"] / n, 0),
                               np.where(have, (z1 - z0) ** 2, 0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(np.where(have, rows["dx"][..., 2] / n, 0),
                               np.where(have, z1 - z0, 0), rtol=1e-9, atol=1e-12)
    # pooled over every origin: the autocorrelation <v(t).v(t + tau)> and the mean-square
    # displacement equal the same averages of the analytic solution over the same entries
    e = lagrangian_average(out, "heavy", start=0.0)
    w = np.where(have, rows["count"], 0)
    np.testing.assert_allclose(e.correlation, (w * v0 * v1).sum(0) / w.sum(0), rtol=1e-9)
    np.testing.assert_allclose(e.msd, (w * (z1 - z0) ** 2).sum(0) / w.sum(0), rtol=1e-9)
    # the spread about the mean drift is that of the displacements over the origins (the
    # relaxation makes early origins move less)
    want = (w * (z1 - z0) ** 2).sum(0) / w.sum(0) - ((w * (z1 - z0)).sum(0) / w.sum(0)) ** 2
    np.testing.assert_allclose(e.dispersion, want, rtol=1e-7, atol=1e-12)


def test_unwrapped_snapshots_follow_the_particles_through_the_box(uniform_flow):
    out = uniform_flow[0]
    with h5py.File(out + "/particles.h5", "r") as f:
        g = f["sets/heavy/snapshots"]
        t, pos, image = g["time"][...], g["position"][...], g["image"][...]
    z = pos[..., 2] + image[..., 2] * L
    assert image[-1, :, 2].min() <= -1  # they fell through the bottom face at least once
    _, dz = _exact(t)
    np.testing.assert_allclose(z - z[0], np.broadcast_to(dz[:, None] - dz[0], z.shape), atol=1e-9)
    assert np.all(image[..., :2] == 0)


def test_lagrangian_history_memory_is_what_the_inventory_predicts(uniform_flow):
    _, live, predicted = uniform_flow
    assert live["lagrangian_history"] == predicted["lagrangian_history"] == history_bytes(50, 10)
