"""Bad configs and command lines: exit code 2, one message naming the key or file, no
traceback, and the output folder left exactly as it was."""
import os
import subprocess
import sys

import pytest
import yaml

from eddybox.solver.cli import main

GOOD = {"name": "bad-input", "grid": {"points": 16}, "fluid": {"viscosity": 0.05},
        "time": {"end": 0.1}, "stats": {"fluid": {"every": None}, "spectra": {"every": None}}}


def _merge(base, patch):
    out = dict(base)
    for k, v in patch.items():
        out[k] = _merge(base[k], v) if isinstance(v, dict) and isinstance(base.get(k), dict) else v
    return out


PARTICLES = {"release": 0.0, "sets": [{"name": "a", "stokes": 1.0, "count": 10}]}

# (patch to the good config, text the message must contain)
BAD_CONFIGS = [
    ({"grid": {"points": 63}}, "grid.points"),
    ({"grid": {"points": 0}}, "grid.points"),
    ({"grid": {"points": "sixty"}}, "grid.points"),
    ({"grid": {"points": 32.5}}, "grid.points"),
    ({"grid": {"pionts": 32}}, "did you mean 'points'"),
    ({"grid": {"length": -1.0}}, "grid.length"),
    ({"fluid": {"viscosity": 0.0}}, "fluid.viscosity"),
    ({"fluid": {"viscosity": -0.1}}, "fluid.viscosity"),
    ({"fluid": {"frozen": "yes"}}, "fluid.frozen"),
    ({"fluid": {"initial": {"kind": "spectral"}}}, "did you mean 'spectrum'"),
    ({"fluid": {"initial": {"kind": "spectrum", "energy": -1}}}, "fluid.initial.energy"),
    ({"fluid": {"initial": {"kind": "abc", "peak": 2}}}, "fluid.initial.peak"),
    ({"fluid": {"initial": {"kind": "file"}}}, "fluid.initial.path"),
    ({"fluid": {"dealias": "three-halves"}}, "fluid.dealias"),
    ({"fluid": {"dealias": "stage-shift"}, "time": {"scheme": "rk3"}}, "time.scheme 'rk3'"),
    ({"time": {"cfl": 0.0}}, "time.cfl"),
    ({"time": {"cfl": 5.0}}, "time.cfl"),
    ({"time": {"scheme": "rk3", "cfl": 2.0}}, "time.cfl"),
    ({"time": {"scheme": "euler"}}, "time.scheme"),
    ({"time": {"end": 0}}, "time.end"),
    ({"time": {"max_steps": 0}}, "time.max_steps"),
    ({"time": {"walltime": "ten minutes"}}, "time.walltime"),
    ({"tme": {"end": 1.0}}, "did you mean 'time'"),
    ({"forcing": {"kind": "ou", "band": 0.5}}, "forcing.band"),
    ({"forcing": {"kind": "ou", "band": 9.0}}, "forcing.band"),
    ({"forcing": {"kind": "ou", "timescale": -1.0}}, "forcing.timescale"),
    ({"forcing": {"kind": "ou", "variance": 1.0, "dissipation": 0.1}}, "forcing"),
    ({"forcing": {"kind": "reinject", "mode": "power"}}, "forcing.dissipation"),
    ({"forcing": {"kind": "reinject", "mode": "enrgy"}}, "forcing.mode"),
    ({"forcing": {"kind": "linear"}}, "linear"),
    ({"forcing": {"kind": "stochastic"}}, "forcing.kind"),
    ({"forcing": {"kind": "ou", "amplitude": 1.0}}, "forcing.amplitude"),
    ({"seed": -3}, "seed"),
    ({"name": "my run/1"}, "name"),
    ({"stats": {"fluid": {"every": -1}}}, "stats.fluid.every"),
    ({"checkpoint": {"keep": 0}}, "checkpoint.keep"),
    ({"parallel": {"layout": "cubes"}}, "parallel.layout"),
    ({"parallel": {"layout": "slab", "grid": [2, 1]}}, "parallel.grid"),
    ({"particles": {"sets": [{"name": "a", "stokes": -1.0, "count": 10}]}}, "stokes"),
    ({"particles": {"sets": [{"name": "a", "stokes": 1.0, "count": -5}]}}, "count"),
    ({"particles": {"sets": [{"name": "a", "stokes": 1.0, "count": 10},
                             {"name": "a", "stokes": 2.0, "count": 10}]}}, "duplicate"),
    ({"particles": {"interpolation": 5, "sets": PARTICLES["sets"]}}, "particles.interpolation"),
    ({"particles": {"release": 5.0, "sets": PARTICLES["sets"]}}, "particles.release"),
    ({"particles": {"sets": [{"name": "a", "count": 10}]}}, "exactly one of stokes"),
    ({"particles": {"sets": [{"name": "a", "stokes": 1, "tau_p": 1, "count": 10}]}}, "exactly one of stokes"),
    ({"particles": {"sets": [{"name": "a", "radius": 1e-5, "density": 1000.0, "count": 10}]}}, "particles.physical"),
    ({"particles": {"sets": "lots"}}, "particles.sets"),
    ({"stats": {"pairs": {"every": 0.1}}}, "stats.pairs.every"),
    ({"particles": PARTICLES, "stats": {"pairs": {"every": 0.1, "units": "box", "r_max": 4.0}}},
     "stats.pairs.r_max"),
    ({"particles": PARTICLES, "stats": {"pairs": {"every": 0.1, "wr_bins": 100}}}, "stats.pairs.wr_bins"),
    ({"particles": PARTICLES, "stats": {"pairs": {"every": 0.1, "spacing": "cubic"}}}, "stats.pairs.spacing"),
    # every physical input is bounded to a finite, meaningful range
    ({"grid": {"length": 1e300}}, "grid.length"),
    ({"grid": {"length": 1e-300}}, "grid.length"),
    ({"grid": {"points": 10**6}}, "grid.points"),
    ({"fluid": {"viscosity": float("nan")}}, "fluid.viscosity"),
    ({"time": {"end": float("inf")}}, "time.end"),
    ({"time": {"walltime": float("nan")}}, "time.walltime"),
    ({"time": {"max_steps": 10**23}}, "time.max_steps"),
    ({"seed": 10**30}, "seed"),
    ({"particles": {"sets": [{"name": "a", "stokes": 1.0, "count": 10**23}]}}, "count"),
    ({"particles": {"gravity": [0, 0, float("-inf")], "sets": PARTICLES["sets"]}}, "particles.gravity"),
    ({"name": "x" * 300}, "name"),
]


@pytest.fixture
def occupied(tmp_path):
    """An output folder holding a previous run's file that must survive every bad call."""
    out = tmp_path / "out"
    out.mkdir()
    (out / "fluid.h5").write_bytes(b"previous results")
    return out


def _snapshot(folder):
    return sorted((p.name, p.read_bytes()) for p in folder.iterdir())


def _call(capsys, argv):
    code = main([str(a) for a in argv])
    cap = capsys.readouterr()
    return code, cap.out + cap.err


@pytest.mark.parametrize("patch,needle", BAD_CONFIGS, ids=[n for _, n in BAD_CONFIGS])
def test_bad_config_exits_2_naming_the_key(tmp_path, capsys, occupied, patch, needle):
    cfg = _merge(GOOD, patch)
    cfg["output"] = str(occupied)
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(cfg))
    before = _snapshot(occupied)
    for cmd in (["check", path], ["run", path, "--overwrite"]):
        code, text = _call(capsys, cmd)
        assert code == 2, text
        assert needle in text
        assert "Traceback" not in text
        assert len(text.strip().splitlines()) == 1
    assert _snapshot(occupied) == before


BAD_COMMANDS = [
    (["run"], "usage"),
    (["frobnicate"], "frobnicate"),
    ([], "command"),
    (["run", "{missing}"], "no such config file"),
    (["run", "{dir}"], "is a folder"),
    (["run", "{good}", "--set", "grid.points"], "KEY=VALUE"),
    (["run", "{good}", "--set", "grid.points=[1"], "not valid YAML"),
    (["run", "{good}", "--set", "grid.points.x=3"], "not a mapping"),
    (["run", "{good}", "--out", "{occupied}"], "--overwrite"),
    (["run", "{good}", "--out", "{empty}", "--restart", "latest"], "--restart"),
    (["run", "{good}", "--out", "{occupied}", "--restart", "latest"], "no readable checkpoint"),
    (["run", "{good}", "--out", "{occupied}", "--restart", "{missing}"], "no such checkpoint"),
    (["run", "{good}", "--out", "{occupied}", "--restart", "{foreign}"], "not an eddybox checkpoint"),
    (["run", "{good}", "--out", "{occupied}", "--restart", "{garbage}"], "unreadable"),
    (["run", "{syntax}"], "line 2"),
    (["run", "{toplist}"], "mapping"),
    # a key given twice is an error (plain yaml.safe_load would keep the last one silently)
    (["run", "{duplicate}"], "duplicate key 'grid'"),
    (["check", "{duplicate_inner}"], "duplicate key 'points'"),
    # an alias bomb and a character device are refused before anything is expanded or read
    (["check", "{bomb}"], "expands to more than"),
    (["check", "/dev/zero"], "not a regular file"),
    (["check", "{huge}"], "too large"),
    (["check", "{binary}"], "not a text file"),
    (["run", "{good}", "--set", "grid.points=*nothing"], "not valid YAML"),
    (["inspect", "{missing}"], "no such file"),
    (["inspect", "{garbage}"], "not a readable HDF5"),
    (["inspect", "{foreign}"], "not one written by eddybox"),
]


@pytest.mark.parametrize("argv,needle", BAD_COMMANDS, ids=[n for _, n in BAD_COMMANDS])
def test_bad_command_lines(tmp_path, capsys, occupied, argv, needle):
    import h5py

    good = tmp_path / "good.yaml"
    good.write_text(yaml.safe_dump(GOOD))
    (tmp_path / "syntax.yaml").write_text("grid: {points: 16\nfluid: [\n")
    (tmp_path / "toplist.yaml").write_text("- 1\n- 2\n")
    (tmp_path / "duplicate.yaml").write_text("grid: {points: 16}\nfluid: {viscosity: 0.05}\n"
                                             "grid: {points: 32}\n")
    (tmp_path / "duplicate_inner.yaml").write_text("grid:\n  points: 16\n  points: 32\n")
    bomb = ["a: &a [x, x, x, x, x, x, x, x, x, x]"]
    for i in range(1, 9):  # 10^9 values once expanded
        bomb.append(f"{chr(97 + i)}: &{chr(97 + i)} [" + ", ".join([f"*{chr(96 + i)}"] * 10) + "]")
    (tmp_path / "bomb.yaml").write_text("\n".join(bomb) + "\n")
    (tmp_path / "huge.yaml").write_text("# padding\n" * 200_000)
    (tmp_path / "binary.yaml").write_bytes(b"grid: \xff\xfe\x00")
    (tmp_path / "garbage.h5").write_bytes(b"\x89HDF\r\n\x1a\n truncated")
    with h5py.File(tmp_path / "foreign.h5", "w") as f:
        f["x"] = [1, 2, 3]
    (tmp_path / "empty").mkdir()
    subs = {"missing": tmp_path / "missing.yaml", "dir": tmp_path, "good": good,
            "occupied": occupied, "empty": tmp_path / "empty", "syntax": tmp_path / "syntax.yaml",
            "toplist": tmp_path / "toplist.yaml", "garbage": tmp_path / "garbage.h5",
            "duplicate": tmp_path / "duplicate.yaml", "duplicate_inner": tmp_path / "duplicate_inner.yaml",
            "bomb": tmp_path / "bomb.yaml", "huge": tmp_path / "huge.yaml",
            "binary": tmp_path / "binary.yaml",
            "foreign": tmp_path / "foreign.h5"}
    argv = [a.format(**subs) if "{" in a else a for a in argv]
    before = _snapshot(occupied)
    code, text = _call(capsys, argv)
    assert code == 2, text
    assert needle in text
    assert "Traceback" not in text
    assert _snapshot(occupied) == before


def test_real_process_bad_config_no_traceback(tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text("grid: {points: 15}\n")
    r = subprocess.run([sys.executable, "-m", "eddybox.solver.cli", "run", str(path)], capture_output=True,
                       text=True, cwd=tmp_path)
    assert r.returncode == 2
    assert "grid.points" in r.stderr and "Traceback" not in r.stderr
    assert not os.path.exists(tmp_path / "runs")
