"""A run from YAML end to end through the CLI: output contract, metadata, readers."""
import h5py
import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main

CFG = {"name": "out-test", "seed": 3, "grid": {"points": 16},
       "fluid": {"viscosity": 0.03, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
       "time": {"end": 0.3, "cfl": 0.5},
       "forcing": {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
       "stats": {"fluid": {"every": 0.05}, "spectra": {"every": 0.1}, "fields": {"every": 0.3}}}


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("runout")
    cfg = tmp / "run.yaml"
    cfg.write_text(yaml.safe_dump(CFG))
    out = tmp / "run"
    assert main(["run", str(cfg), "--out", str(out), "--quiet"]) == 0
    return out


def test_every_dataset_documented_and_files_stamped(run_dir):
    for name in ("fluid.h5",):
        with h5py.File(run_dir / name, "r") as f:
            for k in ("config_hash", "code_version", "created"):
                assert k in f.attrs
            seen = []

            def visit(path, obj):
                if isinstance(obj, h5py.Dataset):
                    seen.append(path)
                    assert obj.attrs["units"] is not None and obj.attrs["description"]

            f.visititems(visit)
            assert seen
    with h5py.File(run_dir / "fluid.h5", "r") as f:
        names = set(f["series"])
        for k in ("time", "step", "dt", "energy", "dissipation", "injection", "u_rms", "re_lambda",
                  "eta", "tau_eta", "integral_scale", "skewness", "kmax_eta", "cfl",
                  "divergence_max", "wall_time"):
            assert k in names
        t = f["series/time"][...]
        assert t[0] == 0.0 and t[-1] >= 0.3 - 1e-12 and np.all(np.diff(t) > 0)
        # E(k) sums to E at the same time (definition of the shell spectrum)
    with h5py.File(run_dir / "fluid.h5", "r") as f:
        k0 = f["spectra/k"][1]
        e_first = f["spectra/energy"][0].sum() * k0
    assert e_first == pytest.approx(0.5, rel=1e-10)


def test_xarray_sees_named_dimensions(run_dir):
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    ds = xr.open_dataset(run_dir / "fluid.h5", engine="h5netcdf", group="series", phony_dims="access")
    assert "time" in ds.dims and ds["energy"].dims == ("time",)
    sp = xr.open_dataset(run_dir / "fluid.h5", engine="h5netcdf", group="spectra", phony_dims="access")
    assert sp["energy"].dims == ("time", "k")


def test_resolved_config_log_fields_and_inspect(run_dir, capsys):
    d = yaml.safe_load((run_dir / "config.yaml").read_text())
    assert d["grid"]["points"] == 16 and "derived" in d
    assert d["derived"]["forced_modes"] == 32  # modes with 0 < |k| <= 2 in both signs: 6 + 12 + 8 + 6
    assert "done" in (run_dir / "log.txt").read_text()
    fields = sorted((run_dir / "fields").glob("field_*.h5"))
    assert fields and fields[0].with_suffix(".xdmf").exists()
    assert main(["inspect", str(run_dir)]) == 0
    text = capsys.readouterr().out
    assert "energy" in text and "fluid.h5" in text


def test_start_from_saved_field_with_other_resolution(run_dir, tmp_path):
    # spectral truncation / zero padding keep a band-limited field exactly (Parseval)
    field = sorted((run_dir / "fields").glob("field_*.h5"))[-1]
    with h5py.File(field) as f:
        uh = f["velocity_hat"][...]
    from eddybox.solver.run.simulation import Simulation
    from tests.conftest import make_config

    e_src = 0.5 * np.sum(np.where((np.arange(9) == 0) | (np.arange(9) == 8), 1, 2) * np.abs(uh) ** 2)
    for n in (16, 24):
        cfg = make_config(tmp_path / f"f{n}", grid={"points": n},
                          fluid={"viscosity": 0.03, "initial": {"kind": "file", "path": str(field)}})
        sim = Simulation(cfg, overwrite=True, quiet=True)
        assert sim.energy() == pytest.approx(e_src, rel=1e-12)
    cfg = make_config(tmp_path / "f8", grid={"points": 8},
                      fluid={"viscosity": 0.03, "initial": {"kind": "file", "path": str(field)}})
    assert Simulation(cfg, overwrite=True, quiet=True).energy() < e_src


def test_check_prints_scales_and_warns_when_under_resolved(tmp_path, capsys):
    cfg = dict(CFG, fluid={"viscosity": 0.001, "initial": {"kind": "rest"}})
    p = tmp_path / "c.yaml"
    p.write_text(yaml.safe_dump(cfg))
    assert main(["check", str(p)]) == 0
    out = capsys.readouterr().out
    assert "Kolmogorov length" in out and "k_max eta" in out and "memory" in out
    assert "< 1" in out  # (0.001^3/0.1)^(1/4) * 16/3 = 0.03: far from resolved


def test_live_progress_line_on_a_terminal(tmp_path):
    # on a terminal the run rewrites one line (carriage returns) with step, t, dt, E, eps,
    # Re_lambda, kmax eta and ETA; checked through a pseudo-terminal
    import os
    import pty
    import subprocess
    import sys

    cfg = dict(CFG, time={"end": 3.0, "cfl": 0.5})
    p = tmp_path / "p.yaml"
    p.write_text(yaml.safe_dump(cfg))
    master, slave = pty.openpty()
    proc = subprocess.Popen([sys.executable, "-m", "eddybox.solver.cli", "run", str(p), "--out", str(tmp_path / "r")],
                            stdout=slave, stderr=slave, close_fds=True)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 4096)
        except OSError:
            break
        if not data:
            break
        chunks.append(data)
    proc.wait(timeout=120)
    os.close(master)
    text = b"".join(chunks).decode(errors="replace")
    assert proc.returncode == 0
    assert "\rstep" in text  # a rewritten line (the terminal turns newlines into \r\n, not \rstep)
    for word in ("step", "dt", "Re_lambda", "kmax_eta", "ETA"):
        assert word in text
