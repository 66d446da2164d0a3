"""`eddybox check` plans the run (steps from the CFL at the predicted u', wall time and
core-hours from this machine's calibration) and `run` logs every warning `check` prints.

Outside references: eps = C_eps u'^3/L and the CFL step dt = cfl dx / U_max written out here
(Pope 2000, ch. 6, for the first; common practice for the second)."""
from __future__ import annotations

import json
import math

import pytest
import yaml

from eddybox.solver.cli import main
from eddybox.solver.run import scales
from eddybox.solver.run.config import validate
from eddybox.solver.run.config_warnings import config_warnings

CAL = {"fluid_model": {"a": 3e-10, "b": 4e-9}, "threads": 1, "umax_over_urms": 6.0,
       "created": "test", "source": "a test calibration"}


def _config(tmp_path, **changes):
    raw = {"name": "plan", "output": str(tmp_path / "run"), "grid": {"points": 32},
           "fluid": {"viscosity": 0.01},
           "forcing": {"kind": "ou", "band": 2.0, "dissipation": 0.1},
           "time": {"cfl": 0.5, "end": 10.0}}
    raw.update(changes)
    path = tmp_path / "plan.yaml"
    path.write_text(yaml.safe_dump(raw))
    return path


def test_check_plans_steps_wall_time_and_core_hours(tmp_path, monkeypatch, capsys):
    cache = tmp_path / "cache" / "eddybox"
    cache.mkdir(parents=True)
    (cache / "calibration.json").write_text(json.dumps(CAL))
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    path = _config(tmp_path)
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    plan = out.split("plan on this machine")[1]
    # u' from eps = C_eps u'^3/L, L = 0.45 x forcing wavelength (2 pi / band); dt = cfl dx / U_max
    L = 0.45 * 2 * math.pi / 2.0
    u = (0.1 * L / 0.5) ** (1 / 3)
    dt = 0.5 * (2 * math.pi / 32) / (6.0 * u)
    steps = math.ceil(10.0 / dt)
    assert f"steps to t = 10         {steps}\n" in plan
    n3 = 32.0**3
    share = 1.0  # the 2/3 rule's own pruned transforms: the calibration's reference
    t = 4 * (9 * 3e-10 * share * n3 * math.log2(n3) + 4e-9 * n3)
    assert f"seconds per step        {t:.4g}\n" in plan
    assert f"core-hours              {steps * t / 3600:.4g}" in plan
    for word in ("wall time", "assumptions:", "cached calibration of test (a test calibration)",
                 "u' = ", "no allowance for I/O"):
        assert word in plan
    assert not (tmp_path / "run").exists()  # check writes nothing into the output folder


def test_check_without_a_calibration_measures_briefly_and_keeps_it(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    path = _config(tmp_path)
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "a short measurement at 32^3, 48^3, 64^3" in out and "made now" in out
    cal = json.loads((tmp_path / "cache" / "eddybox" / "calibration.json").read_text())
    assert cal["fluid_model"]["a"] > 0 and cal["fluid_model"]["b"] > 0
    assert not (tmp_path / "run").exists()
    assert main(["check", str(path)]) == 0
    assert "cached calibration" in capsys.readouterr().out


def test_run_logs_every_warning_check_prints(tmp_path, capsys):
    # k_max eta < 1 (issue 13: the run showed none of check's warnings) and r_max beyond the box
    path = _config(tmp_path, fluid={"viscosity": 0.0005},
                   time={"cfl": 0.5, "end": 10.0, "max_steps": 2},
                   particles={"release": 0.0, "sets": [{"name": "a", "tau_p": 0.1, "count": 50}]},
                   stats={"fluid": {"every": None}, "spectra": {"every": None},
                          "pairs": {"every": 1.0, "r_max": 2000.0}})
    cfg = validate(yaml.safe_load(path.read_text()))
    warnings = config_warnings(cfg)
    assert len(warnings) == 2 and warnings[0].startswith("k_max eta = ")
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert out.split("\nwarnings:\n")[1].splitlines() == [f"  - {w}" for w in warnings]
    assert main(["run", str(path), "--quiet"]) == 0
    log = (tmp_path / "run" / "log.txt").read_text()
    for w in warnings:
        assert f"warning: {w}" in log


def test_plan_of_a_decaying_flow_and_of_a_flow_at_rest(tmp_path, monkeypatch, capsys):
    cache = tmp_path / "cache" / "eddybox"
    cache.mkdir(parents=True)
    (cache / "calibration.json").write_text(json.dumps(CAL))
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    # Taylor-Green: u' = U0/sqrt(12) from E = U0^2/8 (box average of its squared components)
    tg = validate({"fluid": {"initial": {"kind": "taylor-green", "amplitude": 2.0}},
                   "forcing": {"kind": "none"}})
    u, how = scales.velocity_estimate(tg)
    assert u == pytest.approx(2.0 / math.sqrt(12)) and "decays" in how
    path = _config(tmp_path, fluid={"viscosity": 0.01, "initial": {"kind": "rest"}},
                   forcing={"kind": "none"})
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "steps                   unknown: no target dissipation and no initial energy" in out
