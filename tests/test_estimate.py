"""`eddybox estimate`: memory equals the solver's own array inventory; the time model fits."""
import math

import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main
from eddybox.solver.run.inventory import live_inventory, predicted_inventory
from eddybox.solver.run.simulation import Simulation
from eddybox.solver.study import calibration
from eddybox.solver.study import estimate as est


@pytest.mark.parametrize("scheme,dealias,particles", [("rk4", "two-thirds", False), ("rk3", "two-thirds", True),
                                                       ("rk2", "phase-shift", True), ("rk4", "stage-shift", False)])
def test_memory_inventory_matches_live_arrays(config_factory, scheme, dealias, particles):
    kw = dict(grid={"points": 24}, fluid={"viscosity": 0.05, "initial": {"kind": "taylor-green"},
                                          "dealias": dealias},
              time={"scheme": scheme, "cfl": 0.4, "end": 0.1})
    if particles:
        kw["particles"] = {"release": 0.0, "sets": [{"name": "a", "stokes": 1.0, "count": 300},
                                                    {"name": "b", "tau_p": 0.0, "count": 200}]}
    cfg = config_factory(**kw)
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert predicted_inventory(cfg) == live_inventory(sim)


def test_pair_histogram_memory_bounds_what_a_sample_allocates(config_factory):
    # tracemalloc (Python standard library) sees every numpy allocation; the predicted
    # temporary of one pair sample must cover the measured peak without overstating it much
    import tracemalloc

    from eddybox.solver.run.inventory import temporary_arrays

    cfg = config_factory(particles={"release": 0.0, "sets": [{"name": "a", "stokes": 1.0, "count": 300},
                                                             {"name": "b", "tau_p": 0.0, "count": 300}]},
                         stats={"fluid": {"every": None}, "spectra": {"every": None},
                                "pairs": {"every": 0.1, "r_max": 1.0, "units": "box", "bins": 100,
                                          "wr_bins": 1001, "cross": True}})
    # compile the pair kernel outside the trace (with a cold numba cache the compiler's own
    # allocations would be traced)
    from eddybox.particles.pairs import pair_statistics, separation_wr_edges

    x = np.random.default_rng(0).random((50, 3))
    pair_statistics(x, x, 1.0, np.geomspace(0.1, 0.4, 4), separation_wr_edges([0.1, 0.2, 0.3], 2.0, 11))
    sim = Simulation(cfg, overwrite=True, quiet=True)
    try:
        hook = next(h for h in sim.hooks if h.name == "pairs")
        tracemalloc.start()
        hook.run(sim)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
        sim.close()
    predicted = temporary_arrays(cfg)["pair_histograms"]
    assert peak <= predicted <= 1.3 * peak, (peak, predicted)


def test_time_model_reproduces_its_calibration_points():
    a, b = 3.0e-10, 4.0e-9
    pts = []
    for n, scheme in ((16, "rk4"), (24, "rk3"), (32, "rk4"), (48, "rk2")):
        n3 = n**3
        s = calibration.STAGES[scheme]
        pts.append({"n": n, "scheme": scheme, "step_seconds": s * (9 * a * n3 * math.log2(n3) + b * n3)})
    fit = calibration.fit_fluid_model(pts)
    assert fit["a"] == pytest.approx(a, rel=1e-8) and fit["b"] == pytest.approx(b, rel=1e-6)
    cal = {"fluid_model": fit, "threads": 1, "umax_over_urms": 6.0}
    for p in pts:
        t, _ = est.step_time(cal, p["n"], 1, p["scheme"])
        assert t == pytest.approx(p["step_seconds"], rel=1e-8)


def test_estimate_table_and_scaling(tmp_path, capsys):
    cfg = {"grid": {"points": 32}, "fluid": {"viscosity": 0.01},
           "forcing": {"kind": "ou", "dissipation": 0.1, "band": 2.0},
           "time": {"end": 10.0},
           "particles": {"release": 1.0, "sets": [{"name": "d", "stokes": 1.0, "count": 1000}]},
           "stats": {"pairs": {"every": 0.5}}}
    path = tmp_path / "e.yaml"
    path.write_text(yaml.safe_dump(cfg))
    cal = tmp_path / "cal.json"
    cal.write_text('{"fluid_model": {"a": 3e-10, "b": 4e-9}, "threads": 1, "umax_over_urms": 6.0, '
                   '"created": "test"}')
    assert main(["estimate", str(path), "--points", "256", "--ranks", "64", "--particles", "1000000",
                 "--calibration", str(cal)]) == 0
    out = capsys.readouterr().out
    for word in ("memory per rank", "seconds per step", "core-hours", "assumptions", "InfiniBand"):
        assert word in out
    from eddybox.solver.run.config import validate

    c = validate(cfg)
    calib = calibration.load_calibration(str(cal))
    e1 = est.estimate(c, 256, 1, cal=calib)
    e8 = est.estimate(c, 256, 8, cal=calib)
    assert e8["memory_per_rank"] < e1["memory_per_rank"] / 4  # plus transpose buffers and ghosts
    assert e8["seconds_per_step"] < e1["seconds_per_step"]
    # dt from the CFL condition: halving dx doubles the steps
    e2 = est.estimate(c, 512, 8, cal=calib)
    assert e2["steps"] == pytest.approx(2 * e8["steps"], rel=0.01)
    assert main(["estimate", str(path), "--points", "255", "--ranks", "4", "--calibration", str(cal)]) == 2


def test_fft_friendly_sizes():
    # even, prime factors 2, 3, 5, 7 only (the sizes FFTW plans fastest; common practice)
    assert [est.fft_friendly(x) for x in (4, 63.2, 66, 68, 90.5, 97, 127)] == [4, 64, 70, 70, 96, 98, 128]


def test_estimate_picks_the_cheapest_dealiasing_for_a_target_kmax_eta(tmp_path, capsys):
    from eddybox.solver.run.config import validate

    cfg = validate({"grid": {"points": 64}, "fluid": {"viscosity": 0.005},
                    "forcing": {"kind": "ou", "band": 2.0, "dissipation": 0.1},
                    "time": {"end": 10.0, "cfl": 0.6}})
    cal = {"fluid_model": {"a": 3e-10, "b": 4e-9}, "threads": 1, "umax_over_urms": 6.0}
    rows = {r["dealias"]: r for r in est.resolution_options(cfg, 1.5, 1, cal)}
    eta = (0.005**3 / 0.1) ** 0.25  # Kolmogorov length (Pope 2000, eq. 6.1x)
    for r in rows.values():
        assert r["kmax_eta"] >= 1.5
        assert r["kmax_eta"] == pytest.approx(r["points"] * eta * (2**0.5 if r["dealias"] != "two-thirds" else 1) / 3)
    # the same k_max with sqrt(2) fewer points per direction, the same dt, a step a third
    # the cost; phase-shift does two products per stage
    assert rows["stage-shift"]["points"] < rows["two-thirds"]["points"] / 1.35
    assert rows["stage-shift"]["dt"] == pytest.approx(rows["two-thirds"]["dt"], rel=0.05)
    assert rows["stage-shift"]["core_hours"] < rows["two-thirds"]["core_hours"] / 2
    assert rows["phase-shift"]["seconds_per_step"] == pytest.approx(
        2 * rows["stage-shift"]["seconds_per_step"], rel=0.05)
    assert min(rows.values(), key=lambda r: r["core_hours"])["dealias"] == "stage-shift"
    path = tmp_path / "e.yaml"
    path.write_text(yaml.safe_dump({"fluid": {"viscosity": 0.005}, "time": {"scheme": "rk3"},
                                    "forcing": {"kind": "ou", "band": 2.0, "dissipation": 0.1}}))
    calp = tmp_path / "cal.json"
    calp.write_text('{"fluid_model": {"a": 3e-10, "b": 4e-9}, "threads": 1, "umax_over_urms": 6.0}')
    assert main(["estimate", str(path), "--kmax-eta", "1.5", "--ranks", "8", "--calibration", str(calp)]) == 0
    out = capsys.readouterr().out
    # rk3 cannot take stage-shift: it is offered with rk4
    assert "stage-shift   rk4" in out and "two-thirds    rk3" in out
    assert "cheapest: fluid.dealias stage-shift, time.scheme rk4" in out
    assert main(["estimate", str(path), "--ranks", "8", "--calibration", str(calp)]) == 2
    assert "--points" in capsys.readouterr().err
