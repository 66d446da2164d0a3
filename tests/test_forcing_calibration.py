"""Forcing like with like: Ornstein–Uhlenbeck forcing calibrated to a requested dissipation at
any time scale, and time scales given in large-eddy turnover times T_E = L/u'."""
from __future__ import annotations

import h5py
import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main
from eddybox.solver.errors import ConfigError
from eddybox.solver.estimators.timeseries import block_average
from eddybox.solver.run import scales
from eddybox.solver.run.config import validate
from eddybox.solver.run.simulation import Simulation

OU = {"kind": "ou", "band": 2.0, "dissipation": 0.1}


def test_eddy_time_values_resolve_from_the_predicted_scales():
    cfg = validate({"grid": {"points": 32}, "fluid": {"viscosity": 0.025},
                    "forcing": dict(OU, timescale="0.5 T_E", calibrate=" 20T_E")})
    assert cfg.forcing.timescale == "0.5 T_E" and cfg.forcing.calibrate == "20 T_E"
    p = scales.predicted(cfg)
    # T_E = L/u' with L = 0.45 forcing wavelength and eps = C_eps u'^3/L (scales.predicted)
    lf = 0.45 * 2 * np.pi / 2.0
    u = (0.1 * lf / scales.C_EPS) ** (1 / 3)
    assert p["eddy_time_estimate"] == pytest.approx(lf / u, rel=1e-12)
    resolved, record = scales.resolve_eddy_times(cfg)
    assert resolved.forcing.timescale == pytest.approx(0.5 * lf / u, rel=1e-12)
    assert resolved.forcing.calibrate == pytest.approx(20 * lf / u, rel=1e-12)
    assert record["forcing.timescale"] == {"given": "0.5 T_E", "value": resolved.forcing.timescale}
    # a reference run's measured T_E takes precedence over the prediction
    resolved, record = scales.resolve_eddy_times(cfg, eddy_time=3.0, source="run ref")
    assert resolved.forcing.timescale == 1.5 and record["eddy_time_source"] == "run ref"


@pytest.mark.parametrize("forcing,needle", [
    (dict(OU, timescale="-1 T_E"), "forcing.timescale"),
    (dict(OU, timescale="0.5 T_L"), "forcing.timescale"),
    (dict(OU, timescale="nan T_E"), "forcing.timescale"),
    ({"kind": "ou", "band": 2.0, "variance": 1e-3, "timescale": "1 T_E"}, "forcing.timescale"),
    ({"kind": "ou", "band": 2.0, "variance": 1e-3, "calibrate": 5.0}, "forcing.calibrate"),
    (dict(OU, calibrate=0.0), "forcing.calibrate"),
])
def test_bad_eddy_times_and_calibrations_are_refused(forcing, needle):
    with pytest.raises(ConfigError, match=needle.replace(".", r"\.")):
        validate({"grid": {"points": 32}, "forcing": forcing})


def test_check_prints_the_resolved_times(tmp_path, capsys):
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump({"grid": {"points": 32}, "fluid": {"viscosity": 0.025},
                                    "forcing": dict(OU, timescale="2 T_E", calibrate="10 T_E")}))
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "T_E = L/u' (estimate)" in out and "forcing.timescale          2 T_E = " in out
    # 10 T_E of calibration at T_F = 2 T_E is 5 forcing time scales: too few (see below)
    assert "forcing.calibrate = 10 T_E spans 5 forcing time scales" in out
    assert "use forcing.calibrate >= 20 T_E" in out


@pytest.mark.parametrize("timescale,calibrate,warned", [
    ("2 T_E", "19.9 T_E", True), ("2 T_E", "20 T_E", False), (1.0, 9.0, True), (1.0, 10.0, False),
    ("0.25 T_E", 100.0, False)])
def test_short_calibration_windows_are_warned(timescale, calibrate, warned):
    # the bound is ours: 10 T_F (issue 12's 32^3 runs: 3 T_F missed eps* by 28 %, 15 T_F met it)
    from eddybox.solver.run.config_warnings import config_warnings

    cfg = validate({"grid": {"points": 32}, "fluid": {"viscosity": 0.025},
                    "forcing": dict(OU, timescale=timescale, calibrate=calibrate)})
    assert any("forcing time scales" in w for w in config_warnings(cfg)) == warned


def test_runs_ending_or_releasing_inside_the_calibration_window_are_warned():
    from eddybox.solver.run.config_warnings import config_warnings

    def warnings(**c):
        return " ".join(config_warnings(validate(dict(
            {"grid": {"points": 32}, "fluid": {"viscosity": 0.025},
             "forcing": dict(OU, timescale=1.0, calibrate=20.0)}, **c))))

    assert "time.end = 15 is within the calibration window" in warnings(time={"end": 15.0})
    sets = [{"name": "a", "tau_p": 0.1, "count": 10}]
    assert "particles.release = 5 is inside" in warnings(
        time={"end": 40.0}, particles={"release": 5.0, "sets": sets})
    quiet = warnings(time={"end": 40.0}, particles={"release": 25.0, "sets": sets})
    assert "calibration window" not in quiet


def _run(config_factory, forcing, end, points=16, **time):
    return Simulation(config_factory(
        grid={"points": points}, seed=9,
        fluid={"viscosity": 0.025, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
        forcing=forcing, time=dict({"scheme": "rk4", "cfl": 1.0, "end": end}, **time),
        stats={"fluid": {"every": 0.1}, "spectra": {"every": None}},
        checkpoint={"every": 1.0, "keep": 10}), overwrite=True, quiet=True)


def test_calibration_is_recorded_and_frozen(config_factory):
    sim = _run(config_factory, dict(OU, timescale=0.5, calibrate=2.0), end=3.0)
    assert sim.run() == 0
    with h5py.File(sim.out + "/fluid.h5") as f:
        t, var = f["series/time"][...], f["series/forcing_variance"][...]
        assert f["series/forcing_variance"].attrs["units"] == "L^2 T^-4"
    derived = yaml.safe_load(open(sim.out + "/config.yaml"))["derived"]
    cal = derived["forcing_calibration"]
    assert cal["status"] == "done" and cal["updates"] >= 10 and 2.0 <= cal["window_end"] < 2.2
    # Eswaran & Pope (1988): sigma^2 = eps*/(4 N_F T_F); N_F = 32 wavenumbers with 0 < |k| <= 2
    assert derived["forcing_variance_eswaran_pope"] == pytest.approx(0.1 / (4 * 32 * 0.5), rel=1e-12)
    assert var[0] == pytest.approx(derived["forcing_variance_eswaran_pope"], rel=1e-12)
    after = var[t > cal["window_end"] + 1e-9]
    assert after.size > 5 and np.all(after == cal["variance"])  # frozen: a true OU process
    assert len(set(var[t < 2.0])) > 5  # adjusted during the window
    log = open(sim.out + "/log.txt").read()
    assert "forcing calibrated at t=" in log
    # a window of 4 T_F: the blocking of its power cannot plateau, and the record says so; the
    # error is then the forcing-time floor s_P sqrt(T_F / W) (ornstein_uhlenbeck._error_parts)
    assert cal["relative_error_established"] is False and "found no plateau" in log
    assert cal["relative_error_from"] == "forcing time scale" and "the floor from the" in log
    p = np.asarray(sim.forcing._rm_power)  # the per-step power after the spin-up
    blocking = block_average(p).stderr / p.mean()
    # a square of an OU process decorrelates over T_F/2 (Isserlis 1918): with W = 1.5 the
    # window after the spin-up (18 of 24 intervals of 2.0) the floor is s_P sqrt(T_F / W)
    floor = np.std(p, ddof=1) / p.mean() * np.sqrt(0.5 / 1.5)
    assert floor > blocking and cal["relative_error"] == pytest.approx(floor, rel=1e-9)


def test_restart_inside_the_calibration_window_is_bitwise(config_factory, tmp_path):
    from tests.test_resilience import assert_same_outputs

    forcing = dict(OU, timescale=0.5, calibrate=2.0)
    ref = _run(config_factory, forcing, end=3.0)
    assert ref.run() == 0
    cfg = config_factory(grid={"points": 16}, seed=9,
                         fluid={"viscosity": 0.025, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
                         forcing=forcing, time={"scheme": "rk4", "cfl": 1.0, "end": 3.0},
                         stats={"fluid": {"every": 0.1}, "spectra": {"every": None}},
                         checkpoint={"every": 1.0, "keep": 10}, output=str(tmp_path / "b"))
    first = Simulation(cfg.with_changes({"time.max_steps": 12}), overwrite=True, quiet=True)
    assert first.run() == 0 and 0.5 < first.t < 2.0
    assert Simulation(cfg, restart="latest", quiet=True).run() == 0
    assert_same_outputs(ref.out, str(tmp_path / "b"))


#: calibration window and end time, in predicted T_E (1.71 here): the calibrated variance is
#: uncertain by the standard error of the mean power over the window (measured: 2-4 % for 40 T_E
#: windows at 32^3), so windows are long
MATCHED = {"0.25 T_E": ("60 T_E", 120), "1 T_E": ("60 T_E", 120), "4 T_E": ("60 T_E", 160)}


@pytest.fixture(scope="module")
def matched_runs(tmp_path_factory):
    """OU runs at 32^3 with T_F = 1/4, 1 and 4 T_E (T_E predicted from the config), each
    calibrated to eps* = 0.1 over its first window, then measured to its end."""
    from eddybox.solver.run.scales import predicted

    out = {}
    for t_f, (window, end) in MATCHED.items():
        tmp = tmp_path_factory.mktemp("matched")
        raw = {"name": "matched", "output": str(tmp / "r"), "seed": 4, "grid": {"points": 32},
               "fluid": {"viscosity": 0.025, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
               "forcing": {"kind": "ou", "dissipation": 0.1, "timescale": t_f, "calibrate": window},
               "stats": {"fluid": {"every": 0.1}, "spectra": {"every": None}}}
        t_e = predicted(validate(raw))["eddy_time_estimate"]
        cfg = validate(dict(raw, time={"cfl": 1.2, "end": end * t_e}))
        sim = Simulation(cfg, overwrite=True, quiet=True)
        assert sim.run() == 0
        out[t_f] = sim.out
    return out


@pytest.mark.parametrize("t_f", ["0.25 T_E", "1 T_E", "4 T_E"])
def test_calibrated_ou_meets_its_target_dissipation(matched_runs, t_f):
    # the stationary mean dissipation after the calibration window is within 5 % of eps* and
    # within 2 standard errors: the blocking error of the mean (Flyvbjerg & Petersen 1989)
    # combined with the calibration's own uncertainty, which the run records
    out = matched_runs[t_f]
    cal = yaml.safe_load(open(out + "/config.yaml"))["derived"]["forcing_calibration"]
    with h5py.File(out + "/fluid.h5") as f:
        t, eps = f["series/time"][...], f["series/dissipation"][...]
    est = block_average(eps[t > cal["window_end"]], spacing=0.1)
    err = np.hypot(est.stderr, cal["relative_error"] * 0.1)
    assert 0 < cal["relative_error"] < 0.10
    # the power the calibration reached over its window is the target within its own error
    assert abs(cal["window_mean_power"] / cal["target_dissipation"] - 1) < 3 * cal["relative_error"]
    assert isinstance(cal["relative_error_established"], bool)  # True at 1/4 T_E here, False at
    # 1 and 4 T_E (blocking finds no plateau within 45 T_F), yet within 5 % and 2 errors
    assert abs(est.mean / 0.1 - 1) < 0.05, (t_f, est.mean, est.stderr, cal["relative_error"])
    assert abs(est.mean - 0.1) < 2 * err, (t_f, est.mean, est.stderr, cal["relative_error"])
