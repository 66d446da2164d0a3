"""Results of sets given by radius and density, back in physical units: a 20 µm water droplet in
a cloud of eps = 0.01 m²/s³ and nu = 1.5e-5 m²/s, checked against a hand calculation.

Outside references: the Kolmogorov scales eta = (nu³/eps)^(1/4), tau_eta = (nu/eps)^(1/2),
u_eta = (nu eps)^(1/4) (Pope 2000, §6.1); Stokes drag tau_p = rho_p d² / (18 rho_f nu) and the
terminal velocity tau_p g (any fluid-mechanics handbook); a quantity of dimension L^a T^b maps
between two flows with the same Kolmogorov-scaled statistics by (eta'/eta)^a (tau'/tau)^b
(dimensional analysis; common practice).

Hand calculation (4 significant digits, done on paper):
    nu³ = 3.375e-15, nu³/eps = 3.375e-13, eta = 3.375e-13^(1/4) = 7.622e-4 m
    tau_eta = (1.5e-5 / 0.01)^(1/2) = 1.5e-3^(1/2) = 3.873e-2 s
    u_eta = eta / tau_eta = 1.968e-2 m/s
    tau_p = 1000 (4e-5)² / (18 · 1.2 · 1.5e-5) = 1.6e-6 / 3.24e-4 = 4.938e-3 s
    v_s = tau_p g = 4.938e-3 · 9.81 = 4.844e-2 m/s,  St = tau_p / tau_eta = 0.1275
"""
from __future__ import annotations

import numpy as np
import pytest

from eddybox.particles.physical import from_kolmogorov_units, physical_numbers
from eddybox.solver.run.config import PhysicalConfig
from eddybox.solver.run.simulation import Simulation
from eddybox.solver.study.particle_readers import (
    _physical_collisions,
    collision_average,
    collision_table,
    set_table,
)
from eddybox.solver.study.readers import pair_table

CLOUD = {"viscosity": 1.5e-5, "dissipation": 0.01, "fluid_density": 1.2, "gravity": 9.81}
ETA, TAU, U_ETA = 7.622e-4, 3.873e-2, 1.968e-2  # by hand, above
TAU_P, V_S, ST = 4.938e-3, 4.844e-2, 0.1275
HAND = 2e-3  # relative: 4 significant digits


def test_droplet_numbers_equal_the_hand_calculation():
    num = physical_numbers(20e-6, 1000.0, PhysicalConfig.parse(CLOUD, "particles.physical"))
    for key, want in (("eta", ETA), ("tau_eta", TAU), ("u_eta", U_ETA), ("tau_p", TAU_P),
                      ("settling_velocity", V_S), ("stokes", ST)):
        assert num[key] == pytest.approx(want, rel=HAND), key
    # dimensions: a kernel L^3 T^-1, a velocity L T^-1, a rate per unit volume L^-3 T^-1
    assert from_kolmogorov_units(2.0, 3, -1, ETA, TAU) == pytest.approx(2 * ETA**3 / TAU)
    assert from_kolmogorov_units(0.5, 1, -1, ETA, TAU) == pytest.approx(0.5 * U_ETA, rel=HAND)


def test_collision_results_in_physical_units_equal_the_hand_calculation():
    # eight identical samples of a group of 1000 droplets (pooled values are those of one
    # sample): 30 contacts in 0.1 T, eta = 0.05 L, tau_eta = 0.25 T (u_eta = 0.2 L/T), R =
    # 0.04 L, <|w_r|> at R = 0.02 L/T from the shell
    n, vol, pairs = 8, (2 * np.pi) ** 3, 1000 * 999 / 2
    one = lambda v: np.full(n, v, dtype=float)  # noqa: E731
    series = {"time": np.arange(1, n + 1) * 0.1, "interval": one(0.1), "collisions": one(30),
              "eta": one(0.05), "tau_eta": one(0.25), "radius_eta": one(0.8),
              "shell_counts": one(50), "shell_expected": one(48.0), "shell_sum_abs": one(1.0),
              "shell_sum_inward": one(0.5),
              "attrs": {"radius": 0.04, "pairs": pairs, "volume": vol, "window": "start",
                        "window_start": 0.0, "physical_radius": 40e-6, "physical_eta": ETA,
                        "physical_tau_eta": TAU}}
    avg = collision_average(series)
    got = _physical_collisions(avg, series["attrs"])
    # by hand: Gamma = N_c V / (pairs dt) = 30 * 248.05 / (499500 * 0.1) = 0.14898 L^3/T;
    # in Kolmogorov units * tau/eta^3 = 0.14898 * 0.25 / 1.25e-4 = 297.95; in m^3/s
    # * eta^3 / tau_eta = 297.95 * 4.428e-10 / 3.873e-2 = 3.407e-6
    assert avg["detected"] == pytest.approx(0.14898, rel=HAND)
    assert got["detected_m3_s"] == pytest.approx(3.407e-6, rel=HAND)
    # K = 2 pi R^2 sum|w| / E = 2 pi 0.0016 * 1 / 48 = 2.0944e-4 L^3/T -> * 0.25/1.25e-4 =
    # 0.41888 -> * 4.428e-10 / 3.873e-2 = 4.789e-9 m^3/s
    assert got["kinematic_m3_s"] == pytest.approx(4.789e-9, rel=HAND)
    # rate per unit volume: the box is 2 pi * 0.05^-1 eta = 0.09578 m wide, V = 8.787e-4 m^3,
    # (pairs / V^2) Gamma = 499500 / 7.721e-7 * 3.407e-6 = 2.204e6 per m^3 per s
    assert got["rate_m3_s"] == pytest.approx(2.204e6, rel=HAND)
    # <|w_r|> = 1 / 50 = 0.02 L/T = 0.1 u_eta -> 0.1 * 1.968e-2 = 1.968e-3 m/s
    assert got["wr_abs_m_s"] == pytest.approx(1.968e-3, rel=HAND)
    assert got["radius_m"] == 40e-6 and got["detected_m3_s_err"] == 0.0


@pytest.fixture(scope="module")
def droplet_run(tmp_path_factory):
    from tests.conftest import make_config

    tmp = tmp_path_factory.mktemp("droplets")
    cfg = make_config(
        tmp, grid={"points": 16},
        fluid={"viscosity": 0.05, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
        forcing={"kind": "ou", "band": 2.0, "timescale": 0.3, "dissipation": 0.1},
        time={"scheme": "rk4", "cfl": 0.5, "end": 1.0},
        particles={"release": 0.2, "interpolation": 4, "gravity": [0.0, 0.0, -1.0],
                   "physical": CLOUD,
                   "sets": [{"name": "drops", "radius": 20e-6, "density": 1000.0, "count": 2000}]},
        stats={"fluid": {"every": 0.05}, "spectra": {"every": None},
               "pairs": {"every": 0.1, "r_max": 6.0, "bins": 6, "wr_bins": 11},
               "collisions": {"every": 0.1},
               "lagrangian": {"every": 0.1, "max_lag": 0.3, "count": 100}})
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert sim.run() == 0
    return sim.out, sim.particles.release_scales["eta"]


def test_readers_give_the_droplet_run_in_physical_units(droplet_run):
    droplet_run, eta_release = droplet_run
    sets = set_table([droplet_run])
    c = {k: v[0] for k, v in sets.columns.items()}
    assert c["radius_m"] == 20e-6 and c["density_kg_m3"] == 1000.0
    assert c["tau_p_s"] == pytest.approx(TAU_P, rel=HAND)
    assert c["terminal_m_s"] == pytest.approx(V_S, rel=HAND)
    assert c["stokes"] == pytest.approx(ST, rel=HAND)
    assert np.isfinite(c["settling_m_s"]) and np.isfinite(c["t_l_s"]) and c["u_rms_m_s"] > 0
    # the collision radius is the sum of the radii: R = 40 um = 40e-6 / 7.622e-4 eta, fixed in
    # simulation units with eta at the release
    t = collision_table([droplet_run])
    assert t.columns["radius_m"][0] == pytest.approx(40e-6)
    assert t.columns["radius"][0] == pytest.approx(40e-6 / ETA * eta_release, rel=HAND)
    # the pair table: r in m = (r/eta) * 7.622e-4, the kernel K/(eta^2 u_eta) * eta^3/tau_eta
    p = pair_table([droplet_run])
    np.testing.assert_allclose(p.columns["r_m"], p.columns["r_eta"] * ETA, rtol=HAND)
    np.testing.assert_allclose(p.columns["kernel_m3_s"], p.columns["kernel_norm"] * ETA**3 / TAU,
                               rtol=3 * HAND)


def test_report_shows_the_physical_units(droplet_run, tmp_path):
    from eddybox.solver.study.report import write_report

    index = write_report([droplet_run[0]], tmp_path / "report")
    text = index.read_text()
    assert "Results in physical units" in text and "Detected collisions" in text
    terminal = set_table([droplet_run[0]]).columns["terminal_m_s"][0]  # = V_S, tested above
    assert f"<td>{terminal:.4g}</td>" in text
    assert (tmp_path / "report" / "sets.csv").exists()
    assert (tmp_path / "report" / "collisions.csv").exists()
