"""Pair statistics in small runs: running/ against the per-sample datasets, the averaging window,
self-describing files (xarray opens every group), flows at rest, r_max that does not fit.

Outside references: plain numpy sums over the stored per-sample datasets (the definition of
the pooled estimators), xarray with the h5netcdf engine (netCDF-4 dimension scales), the
ideal gas (uniform particles: g = 1; Poisson counts).
"""
from __future__ import annotations

import h5py
import numpy as np
import pytest

from eddybox.solver.cli import main
from eddybox.solver.errors import ConfigError
from eddybox.solver.run.simulation import Simulation
from eddybox.solver.study.check import check_lines
from tests.conftest import make_config

FORCED = dict(grid={"points": 16},
              fluid={"viscosity": 0.05, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
              forcing={"kind": "ou", "band": 2.0, "timescale": 0.3, "dissipation": 0.1})


def _pairs(every=0.02, **kw):
    return {"fluid": {"every": 0.05}, "spectra": {"every": None},
            "pairs": {"every": every, "r_max": 6.0, "bins": 8, "wr_bins": 31, **kw},
            "particles": {"every": 0.5, "max_count": 40}}


def _with_contacts_and_lagrangian(stats):
    """The stats of `_pairs` plus detected collisions and Lagrangian statistics (their groups
    must open in xarray too)."""
    return dict(stats, collisions={"every": 0.1, "radius": 1.0, "cross": True},
                lagrangian={"every": 0.1, "max_lag": 0.5, "count": 50})


@pytest.fixture(scope="module")
def auto_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("pairauto")
    cfg = make_config(tmp, **FORCED, time={"scheme": "rk4", "cfl": 0.5, "end": 3.0},
                      particles={"release": 0.2, "sets": [
                          {"name": "light", "stokes": 0.5, "count": 1500},
                          {"name": "tracers", "tau_p": 0.0, "count": 1500}]},
                      stats=_with_contacts_and_lagrangian(_pairs(cross=True)))
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert sim.run() == 0
    return sim.out


def test_running_equals_the_pooled_per_sample_datasets(auto_run):
    with h5py.File(auto_run + "/pairs.h5", "r") as f:
        groups = list(f["pairs"])
        assert groups == ["light__light", "light__tracers", "tracers__tracers"]
        for name in groups:
            g = f["pairs"][name]
            t = g["time"][...]
            start = float(g["running/start_time"][()])
            # start auto: decided during the run, after release + 3 tau_p
            assert np.isfinite(start) and start >= g.attrs["window_floor"] >= 0.2
            keep = t >= start - 1e-12
            n = int(g["running/samples"][()])
            assert n == keep.sum() and n >= 20
            if name == "light__light":  # St = 0.5: the samples of the first 3 tau_p are written,
                assert t[0] < g.attrs["window_floor"] and n < t.size  # but not averaged
            c = g["counts"][...][keep].astype(float)
            e = g["expected"][...][keep]
            sums = lambda k: np.where(c > 0, g[k][...][keep] * c, 0.0).sum(axis=0)  # noqa: E731
            tot = c.sum(axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                want = {"rdf": tot / e.sum(axis=0), "wr_sq": sums("wr_sq") / tot,
                        "wr_abs": sums("wr_abs") / tot, "wr_mean": sums("wr_mean") / tot,
                        "wr_inward": sums("wr_inward") / tot,
                        "kernel": (2 * np.pi * g["r_centres"][...][keep] ** 2
                                   * np.where(c > 0, g["wr_abs"][...][keep] * c, 0.0)).sum(axis=0)
                        / e.sum(axis=0)}
            for k, v in want.items():
                np.testing.assert_allclose(g[f"running/{k}"][...], v, rtol=1e-12, err_msg=k)
            np.testing.assert_array_equal(g["running/wr_hist"][...], g["wr_hist"][...][keep].sum(axis=0))
            np.testing.assert_array_equal(g["running/counts"][...], c.sum(axis=0))
            # the w_r rows: one per separation bin, fixed for the run, finer at small r
            w = g["wr_edges"][...]
            assert w.shape == (8, 32) and g["wr_edges"].attrs["units"] == "L T^-1"
            assert np.all(np.diff(w, axis=1) > 0)
            assert w[0, 16] - w[0, 15] < w[-1, 16] - w[-1, 15]
            assert g.attrs["stokes_a"] >= 0 and "tau_p_a" in g.attrs and "tau_p_b" in g.attrs
            assert g["eta"].shape == g["tau_eta"].shape == t.shape


def test_inspect_and_reader_use_the_recorded_window(auto_run, capsys):
    from eddybox.solver.study.readers import read_pair_group, time_average

    s = read_pair_group(auto_run + "/pairs.h5", "light__light")
    avg = time_average(s)
    assert avg.window.start_time == s.recorded_start and avg.window.accepted
    with h5py.File(auto_run + "/pairs.h5", "r") as f:
        np.testing.assert_allclose(avg.rdf, f["pairs/light__light/running/rdf"][...], rtol=1e-12)
    assert main(["inspect", auto_run + "/pairs.h5"]) == 0
    text = capsys.readouterr().out
    assert f"averaging window: t >= {s.recorded_start:.6g} (auto" in text


def test_inspect_summarises_detected_collisions(auto_run, capsys):
    # the pooled detected kernel beside the kinematic one, as the reader gives them
    from eddybox.solver.study.particle_readers import collision_average, read_collision_group

    assert main(["inspect", auto_run]) == 0
    text = capsys.readouterr().out
    avg = collision_average(read_collision_group(auto_run + "/collisions.h5", "light__tracers"))
    assert "collisions light__tracers" in text and f"{avg['detected']:.4g}" in text
    assert f"{avg['collisions']} contacts" in text


def test_every_group_opens_in_xarray(auto_run):
    # netCDF-4 readers need a dimension scale on every axis of every dataset (xarray, h5netcdf)
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    opened = 0
    for name in ("pairs.h5", "particles.h5", "fluid.h5", "collisions.h5"):
        path = f"{auto_run}/{name}"
        groups = ["/"]
        with h5py.File(path, "r") as f:
            f.visititems(lambda n, o: groups.append(n) if isinstance(o, h5py.Group) else None)
        for g in groups:
            with xr.open_dataset(path, engine="h5netcdf", group=g) as ds:
                opened += 1
                if g == "pairs/light__light":
                    assert ds["wr_hist"].dims == ("time", "r", "w_bin")
                    assert ds["wr_edges"].dims == ("r", "w_edge")
                    assert ds["r"].attrs["units"].startswith("eta")
                if g.endswith("snapshots"):
                    assert ds["position"].dims == ("time", "ids", "component")
                    assert ds["image"].dims == ("time", "ids", "component")
                if g.endswith("lagrangian"):
                    assert ds["dx"].dims == ("time", "lag", "component")
                    assert ds["vv"].dims == ("time", "lag")
                if g == "collisions/light__tracers":
                    assert ds["kernel"].dims == ("time",)
                    assert ds["kernel"].attrs["units"] == "L^3 T^-1"
    assert opened > 10


@pytest.mark.parametrize("frozen", [False, True])
def test_flow_at_rest_gives_valid_pair_output(config_factory, frozen):
    # particles in a fluid at rest: uniform positions (ideal gas, g = 1 within Poisson noise),
    # no relative motion (w_r = 0 in the bin centred on zero)
    cfg = config_factory(fluid={"viscosity": 0.05, "initial": {"kind": "rest"}, "frozen": frozen},
                         time={"scheme": "rk4", "cfl": 0.5, "end": 0.3, "max_dt": 0.1},
                         particles={"release": 0.0, "sets": [{"name": "a", "tau_p": 0.5, "count": 3000}]},
                         stats=_pairs(every=0.1, units="box", r_max=0.6, r_min=0.05, start=0.0))
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert sim.run() == 0
    with h5py.File(sim.out + "/pairs.h5", "r") as f:
        g = f["pairs/a__a"]
        counts, expected = g["counts"][...], g["expected"][...]
        assert counts.shape[0] == 4 and np.all(np.isfinite(g["wr_edges"][...]))
        tot, exp = counts.sum(axis=0), expected.sum(axis=0)
        assert np.all(np.abs(tot - exp) < 4 * np.sqrt(exp) + 1)
        np.testing.assert_array_equal(g["wr_hist"][...][:, :, 15], counts)
        assert int(g["running/samples"][()]) == 4


def test_eta_units_in_a_flow_without_dissipation_are_refused(config_factory):
    with pytest.raises(ConfigError, match="stats.pairs.units"):
        config_factory(fluid={"viscosity": 0.05, "initial": {"kind": "rest"}},
                       particles={"release": 0.0, "sets": [{"name": "a", "tau_p": 1.0, "count": 10}]},
                       stats=_pairs(every=0.1))
    with pytest.raises(ConfigError, match="stats.pairs.start"):
        config_factory(particles={"release": 0.0, "sets": [{"name": "a", "stokes": 1.0, "count": 10}]},
                       stats=_pairs(every=0.1, start=5.0))
    with pytest.raises(ConfigError, match="stats.pairs.start.*'auto'"):
        config_factory(particles={"release": 0.0, "sets": [{"name": "a", "stokes": 1.0, "count": 10}]},
                       stats=_pairs(every=0.1, start="automatic"))
    with pytest.raises(ConfigError, match="stats.pairs.r_max"):
        config_factory(particles={"release": 0.0, "sets": [{"name": "a", "stokes": 1.0, "count": 10}]},
                       stats=_pairs(every=0.1, units="box", r_max=3.2))


def test_r_max_beyond_the_box_is_clipped_with_warnings(config_factory, capsys):
    # eta known from the forcing's target: check warns; the run clips at the release, logs it and
    # records both values (never skipped)
    cfg = config_factory(**FORCED, time={"scheme": "rk4", "cfl": 0.5, "end": 0.3},
                         particles={"release": 0.0, "sets": [{"name": "a", "stokes": 1.0, "count": 500}]},
                         stats=_pairs(every=0.1, r_max=400.0))
    text = "\n".join(check_lines(cfg))
    assert "clipped" in text.split("warnings:")[1]
    sim = Simulation(cfg, overwrite=True, quiet=True)
    assert sim.run() == 0
    log = open(sim.out + "/log.txt").read()
    assert "warning: stats.pairs.r_max = 400 eta" in log and "clipped" in log
    with h5py.File(sim.out + "/pairs.h5", "r") as f:
        g = f["pairs/a__a"]
        r_max = g["r_edges"][-1] * g["eta"][0]
        assert g.attrs["r_max_requested"] == 400.0 and r_max == pytest.approx(0.45 * 2 * np.pi)
        assert g["counts"].shape[0] == 4


def test_report_writes_the_tidy_table_and_only_files_a_rerun_may_replace(auto_run):
    # pairs.csv holds every curve (3 groups x 8 bins); every file of the report is one that
    # `--overwrite` recognises as eddybox's (run_folder.foreign_entries)
    import csv
    from pathlib import Path

    from eddybox.solver.run.run_folder import foreign_entries
    from eddybox.solver.study.report import write_report

    out = Path(auto_run) / "report"
    write_report([auto_run], out)
    with open(out / "pairs.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 24 and {r["set_a"] for r in rows} == {"light", "tracers"}
    assert all(r["window"].startswith("t >= ") for r in rows)
    assert (out / "pairs_stokes_0.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature
    assert foreign_entries(auto_run) == []
