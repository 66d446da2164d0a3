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


def _synthetic_points(a, b, sizes=((16, "rk4"), (24, "rk3"), (32, "rk4"), (48, "rk2"))):
    """Steps of t = S (9 a N^3 log2 N^3 + b N^3) and the 4-stage transform floor 36 a N^3 log2 N^3."""
    pts = []
    for n, scheme in sizes:
        n3 = n**3
        s = calibration.STAGES[scheme]
        pts.append({"n": n, "scheme": scheme, "step_seconds": s * (9 * a * n3 * math.log2(n3) + b * n3),
                    "fft_seconds": 36 * a * n3 * math.log2(n3)})
    return pts


def test_time_model_reproduces_its_calibration_points():
    a, b = 3.0e-10, 4.0e-9
    pts = _synthetic_points(a, b)
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


def test_each_coefficient_is_fitted_to_its_own_share_and_a_free_term_is_refused():
    # a fit of the step time alone can price one term at nothing (issue 13: 'fft 0 s'); each
    # coefficient is fitted to its measured share, and a calibration whose steps took no longer
    # than their transforms is refused
    pts = _synthetic_points(2e-10, 3e-8)
    for p in pts:  # noise of a few per cent on the step, not on the floor
        p["step_seconds"] *= 1.03
    fit = calibration.fit_fluid_model(pts)
    assert fit["a"] == pytest.approx(2e-10, rel=1e-8) and fit["b"] > 3e-8
    for p in pts:
        p["step_seconds"] = 0.9 * p["fft_seconds"] * calibration.STAGES[p["scheme"]] / 4
    with pytest.raises(calibration.CalibrationError, match="no positive cost model"):
        calibration.fit_fluid_model(pts)


def test_a_calibration_with_a_free_term_is_refused(tmp_path, capsys):
    path = tmp_path / "e.yaml"
    path.write_text("grid: {points: 32}\n")
    cal = tmp_path / "cal.json"
    cal.write_text('{"fluid_model": {"a": 0.0, "b": 4e-9}, "threads": 1, "umax_over_urms": 6.0}')
    assert main(["estimate", str(path), "--points", "64", "--ranks", "1", "--calibration", str(cal)]) == 2
    err = capsys.readouterr().err
    assert "fluid_model.a" in err and "> 0" in err


def test_the_short_measurement_is_physical_and_cached(tmp_path, monkeypatch):
    # the structure of the calibration `check` makes when the machine has none: positive
    # coefficients (the measured 96^3 / 128^3 step against its prediction is a bench figure,
    # `eddybox bench`, section estimate)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    cal, how = calibration.machine_calibration()
    assert "short measurement" in how and "made now" in how
    assert [p["n"] for p in cal["fluid_points"]] == list(calibration.QUICK_SIZES)
    assert cal["fluid_model"]["a"] > 0 and cal["fluid_model"]["b"] > 0
    for p in cal["fluid_points"]:
        assert 0 < p["fft_seconds"] < p["step_seconds"] and p["umax_over_urms"] > 1
    again, how = calibration.machine_calibration()
    assert again == cal and how.startswith("cached calibration")
    assert not list((tmp_path / "cache").rglob("run"))  # its run folders are gone


def test_viscosity_for_a_target_follows_the_published_relations(config_factory):
    # eta = (nu^3/eps)^(1/4); lambda = sqrt(15 nu u'^2/eps), Re_lambda = u' lambda/nu (Pope 2000,
    # Turbulent Flows, ch. 6), u' from eps = C_eps u'^3/L at the forcing's eps and L
    from eddybox.solver.run import scales

    cfg = config_factory(grid={"points": 64}, fluid={"viscosity": 0.01},
                         forcing={"kind": "ou", "band": 2.0, "dissipation": 0.2})
    eps = 0.2
    L = scales.INTEGRAL_OVER_FORCING_WAVELENGTH * 2 * math.pi / 2.0  # 0.45 x forcing wavelength
    u = (eps * L / scales.C_EPS) ** (1 / 3)
    nu = scales.viscosity_for_re_lambda(cfg, 150.0)
    lam = math.sqrt(15 * nu * u * u / eps)
    assert u * lam / nu == pytest.approx(150.0, rel=1e-12)
    nu = scales.viscosity_for_kmax_eta(cfg, 1.5)
    kmax = 64 / 3  # the 2/3 rule in a 2 pi box: |k_i| < N/3
    assert kmax * (nu**3 / eps) ** 0.25 == pytest.approx(1.5, rel=1e-12)
    # and the prediction of `check` agrees with the config it gives
    c2 = cfg.with_changes({"fluid.viscosity": nu})
    assert scales.predicted(c2)["kmax_eta"] == pytest.approx(1.5, rel=1e-12)
    with pytest.raises(est.ConfigError, match="--re-lambda: the config's forcing sets no target"):
        scales.viscosity_for_re_lambda(config_factory(), 100.0)


def test_estimate_answers_re_lambda_with_particles_on_many_ranks_in_one_command(tmp_path, capsys):
    path = tmp_path / "e.yaml"
    path.write_text(yaml.safe_dump({
        "grid": {"points": 32}, "fluid": {"viscosity": 0.01},
        "forcing": {"kind": "ou", "band": 2.0, "dissipation": 0.1}, "time": {"end": 10.0},
        "particles": {"release": 1.0, "sets": [{"name": "d", "stokes": [0.5, 1, 2], "count": 1000}]},
        "stats": {"pairs": {"every": 0.5}}}))
    cal = tmp_path / "cal.json"
    cal.write_text('{"fluid_model": {"a": 3e-10, "b": 4e-9}, "threads": 1, "umax_over_urms": 6.0}')
    args = ["estimate", str(path), "--ranks", "4096", "--particles", "1e7", "--calibration", str(cal)]
    assert main(args + ["--re-lambda", "200"]) == 0
    out = capsys.readouterr().out
    from eddybox.solver.run.config import validate

    c = validate(yaml.safe_load(path.read_text()))
    kmax_eta = float(out.split("\n  k_max eta")[1].split()[0])
    assert "Re_lambda (predicted)   200" in out and kmax_eta >= scales_kmax_eta(c) - 1e-9
    assert "(the config's own)" in out and "rank 0" in out
    for word in ("network:", "GB/s", "per 3-D transform", "core-hours", "u' = "):
        assert word in out
    # N and k_max eta: nu follows; all three over-determine it
    assert main(args + ["--points", "256", "--kmax-eta", "1.5"]) == 0
    out = capsys.readouterr().out
    assert "for k_max eta = 1.5 at N = 256" in out and "k_max eta               1.5" in out
    assert main(args + ["--points", "256", "--kmax-eta", "1.5", "--re-lambda", "100"]) == 2
    assert "give at most two" in capsys.readouterr().err
    assert main(args + ["--re-lambda", "-3"]) == 2
    assert "--re-lambda" in capsys.readouterr().err


def scales_kmax_eta(cfg):
    from eddybox.solver.run import scales

    return scales.predicted(cfg)["kmax_eta"]


def test_initial_field_temporaries_cover_what_the_builders_allocate():
    # tracemalloc (Python standard library) sees every numpy allocation of the builder beyond
    # the field it fills; the registry's figure must cover it without overstating it much
    import tracemalloc

    from eddybox.solver.fluid import fft
    from eddybox.solver.fluid.initial import INITIAL_TEMPORARY, build_initial
    from eddybox.solver.fluid.layout import make_layout
    from eddybox.solver.fluid.navier_stokes import NonlinearTerm
    from eddybox.solver.run.config import validate

    n = 48
    lay = make_layout(n, 2 * math.pi, "auto", None, None)
    nl = NonlinearTerm(lay, "two-thirds", seed=1)
    uh = fft.empty_complex((3,) + lay.spec_shape)
    for kind in ("spectrum", "taylor-green"):
        cfg = validate({"fluid": {"initial": {"kind": kind}}}).fluid.initial
        build_initial(cfg, lay, nl, 1, uh)  # compile and plan outside the trace
        tracemalloc.start()
        try:
            build_initial(cfg, lay, nl, 1, uh)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
        predicted = INITIAL_TEMPORARY[kind](n, int(np.prod(lay.spec_shape)), n**3)
        # numpy's ufunc buffers (a few blocks of 64 KiB while it broadcasts) are not modelled
        assert peak - 2**18 <= predicted <= 1.15 * peak, (kind, peak, predicted)


def test_predicted_peak_memory_of_a_run_matches_the_measured_one():
    # the peak resident memory (VmHWM, /proc/self/status, Linux) of fresh processes that run two
    # steps with a fluid sample and the final checkpoint, start-up included: eddybox itself
    # measured on a 16^3 run, the arrays from the model; within 10 % at two sizes, and the
    # growth between them (where the process cancels) within 10 %
    from eddybox.solver.run.config import validate
    from eddybox.solver.run.inventory import memory_needed

    process = calibration.measured_process_bytes()
    measured, predicted = {}, {}
    for n in (64, 112):
        raw = calibration.peak_run_config(n)
        measured[n] = calibration.peak_rss_of_run(raw)
        predicted[n] = sum(memory_needed(validate(raw), process_bytes=process).values())
        assert predicted[n] == pytest.approx(measured[n], rel=0.10), (n, measured, predicted)
    grown = measured[112] - measured[64]
    assert predicted[112] - predicted[64] == pytest.approx(grown, rel=0.10), (measured, predicted)
