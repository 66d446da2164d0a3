"""README "From Python": the snippet runs exactly as printed (taken from the README's text), on
a small run where `eddybox demo` puts its own, and its numpy and xarray views agree with the
files read by plain h5py (the outside reference)."""
from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main

ROOT = Path(__file__).resolve().parent.parent


def readme_snippet() -> str:
    text = (ROOT / "README.md").read_text()
    section = text.split("\n## From Python\n", 1)[1].split("\n## ", 1)[0]
    return section.split("```python\n", 1)[1].split("```", 1)[0]


def test_the_readme_python_snippet_runs_as_printed(tmp_path, monkeypatch, capsys):
    pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    # a small forced run with the demo's set name 'droplets', in runs/demo
    cfg = {"name": "demo", "seed": 2026, "grid": {"points": 16},
           "fluid": {"viscosity": 0.05, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
           "time": {"scheme": "rk4", "cfl": 0.5, "end": 3.0},
           "forcing": {"kind": "ou", "band": 2.0, "timescale": 0.3, "dissipation": 0.1},
           "particles": {"release": 0.2, "sets": [{"name": "droplets", "stokes": 1.0, "count": 1500},
                                                  {"name": "tracers", "tau_p": 0.0, "count": 1500}]},
           "stats": {"fluid": {"every": 0.05}, "spectra": {"every": 0.5},
                     "pairs": {"every": 0.02, "r_max": 6.0, "bins": 8, "wr_bins": 31},
                     "collisions": {"every": 0.05, "radius": 1.0},
                     "lagrangian": {"every": 0.05, "max_lag": 0.5, "count": 200}}}
    monkeypatch.chdir(tmp_path)
    Path("demo.yaml").write_text(yaml.safe_dump(cfg))
    assert main(["run", "demo.yaml", "--out", "runs/demo", "--quiet"]) == 0
    capsys.readouterr()
    ns = {}
    exec(compile(readme_snippet(), "README.md (From Python)", "exec"), ns)
    try:
        assert capsys.readouterr().out.startswith("Re_lambda = ")
        with h5py.File("runs/demo/fluid.h5", "r") as f:
            np.testing.assert_array_equal(ns["t"], f["series/time"][...])
            np.testing.assert_array_equal(ns["eps"], f["series/dissipation"][...])
            np.testing.assert_array_equal(ns["E"], f["spectra/energy"][...])
        np.testing.assert_array_equal(ns["series"]["dissipation"].values, ns["eps"])
        assert ns["spectra"]["energy"].dims == ("time", "k")
        np.testing.assert_array_equal(ns["spectra"]["energy"].values, ns["E"])
        with h5py.File("runs/demo/pairs.h5", "r") as f:
            # g pooled over the window: sum of counts / sum of expected counts (its definition)
            grp = f["pairs/droplets__droplets"]
            keep = ns["g"].window.mask(grp["time"][...])
            assert keep.sum() == ns["g"].n_samples > 0
            np.testing.assert_allclose(ns["rdf"], grp["counts"][...][keep].sum(axis=0)
                                       / grp["expected"][...][keep].sum(axis=0), rtol=1e-12)
        assert np.all(ns["rdf_err"][ns["g"].counts > 0] >= 0)
        np.testing.assert_array_equal(ns["g_xr"]["rdf"].values, ns["rdf"])
        np.testing.assert_array_equal(ns["g_xr"]["rdf_err"].values, ns["rdf_err"])
        np.testing.assert_array_equal(ns["g_xr"]["r_eta"].values, ns["r_eta"])
        np.testing.assert_array_equal(ns["pdf_xr"]["pdf"].values, ns["p"])
        np.testing.assert_array_equal(ns["pdf_xr"]["pdf_err"].values, ns["p_err"])
        # a PDF of w_r/sigma: its integral is 1 less the pairs outside the bin's range
        pdf = ns["pdf"]
        integral = float(np.sum(pdf.pdf * np.diff(pdf.x_edges)))
        assert integral == pytest.approx(1.0 - pdf.tail_fraction, rel=1e-9)
        assert set(ns["table"].columns["set_a"]) == {"droplets", "tracers"}
        with h5py.File("runs/demo/collisions.h5", "r") as f:  # contacts counted in the file
            total = {g: int(f[f"collisions/{g}/collisions"][...].sum()) for g in f["collisions"]}
        hits = ns["hits"].columns
        assert list(hits["set_a"]) == ["droplets", "tracers"] and all(hits["collisions"] > 0)
        assert all(hits["collisions"] <= [total[f"{a}__{a}"] for a in hits["set_a"]])
        assert ns["lag"].r_l[0] == 1.0 and np.isfinite(ns["lag"].t_l)
    finally:
        ns["series"].close()
        ns["spectra"].close()
