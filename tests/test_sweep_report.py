"""`eddybox sweep` (runs as subprocesses, skip / resume / overwrite) and `eddybox report`
(HTML + PNG + CSV whose numbers are eddybox.solver.estimators.timeseries applied to the run files)."""
import csv
import glob
import math
import os
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main
from eddybox.solver.errors import ConfigError
from eddybox.solver.estimators import timeseries as analysis
from eddybox.solver.study.report import write_report
from eddybox.solver.study.sweep import folder_name, plan_runs, split_values

CFG = {"name": "sweep-test", "seed": 5, "grid": {"points": 16},
       "fluid": {"viscosity": 0.05, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
       "time": {"end": 1.2, "cfl": 0.5, "max_dt": 0.04},
       "forcing": {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
       "particles": {"release": 0.3, "interpolation": 4,
                     "sets": [{"name": "drops", "stokes": 1.0, "count": 500}]},
       "stats": {"fluid": {"every": 0.02}, "spectra": {"every": 0.2},
                 "pairs": {"every": 0.04, "r_max": 10.0, "r_min": 1.0, "bins": 6, "wr_bins": 21}},
       "checkpoint": {"every": 0.5, "keep": 2}}
VARY = ["--vary", "forcing.timescale=0.5,1.0", "--vary", "particles.sets.0.stokes=0.5"]
NAMES = ["forcing.timescale=0.5__particles.sets.0.stokes=0.5",
         "forcing.timescale=1.0__particles.sets.0.stokes=0.5"]


@pytest.fixture(scope="module")
def config_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("sweepcfg") / "sweep.yaml"
    path.write_text(yaml.safe_dump(CFG))
    return path


@pytest.fixture(scope="module")
def swept(config_file, tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep") / "runs"
    code = main(["sweep", str(config_file), *VARY, "--out", str(out), "--jobs", "2"])
    assert code == 0
    return out


def _series(run, name="energy"):
    with h5py.File(run / "fluid.h5", "r") as f:
        return f["series/time"][...], f[f"series/{name}"][...]


# --- planning (no runs) ----------------------------------------------------------------------
def test_plan_is_the_cartesian_product_with_safe_folder_names(config_file, tmp_path):
    root, runs = plan_runs(config_file, ["forcing.timescale=0.25,0.5,1", "particles.gravity="
                                         "[0,0,-1],[0, 0, -2]"], [], tmp_path / "s")
    assert root == tmp_path / "s" and len(runs) == 3 * 2
    combos = {(r.config.forcing.timescale, r.config.particles.gravity[2]) for r in runs}
    assert combos == {(a, b) for a in (0.25, 0.5, 1.0) for b in (-1.0, -2.0)}
    assert len({r.folder for r in runs}) == 6
    for r in runs:
        assert re.fullmatch(r"[A-Za-z0-9._=+\-]+", r.name) and r.folder.parent == root
    assert runs[0].name == "forcing.timescale=0.25__particles.gravity=0-0--1"
    assert split_values("[0,0,-1],{a: 1, b: 2},'x,y'") == ["[0,0,-1]", "{a: 1, b: 2}", "'x,y'"]
    assert folder_name({"a.b": "x y/z"}) == "a.b=x-y-z"
    # default parent folder: the config's output (runs/<name> when output is null)
    assert plan_runs(config_file, ["seed=1,2"], [])[0] == Path("runs") / CFG["name"]


@pytest.mark.parametrize("vary, words", [
    (["forcing.timescale"], ["--vary", "KEY=V1,V2"]),
    (["forcing.timscale=0.5,1"], ["--vary", "forcing.timscale", "did you mean 'timescale'"]),
    (["grid.points=16,15"], ["--vary", "grid.points=15", "even integer"]),
    (["seed=1,,2"], ["--vary", "empty value"]),
    (["seed=1,1"], ["--vary seed", "twice"]),
])
def test_bad_vary_exits_2_before_anything_is_written(config_file, tmp_path, capsys, vary, words):
    out = tmp_path / "never"
    args = ["sweep", str(config_file)] + [x for v in vary for x in ("--vary", v)]
    assert main(args + ["--out", str(out)]) == 2
    err = capsys.readouterr().err
    for w in words:
        assert w in err
    assert "Traceback" not in err and not out.exists()


# --- running, skipping, resuming -------------------------------------------------------------
def test_sweep_runs_every_combination_with_its_config(swept):
    # what the shell's SWEEP/*/ gives `eddybox report` (hidden .console/ excluded)
    assert sorted(Path(p).name for p in glob.glob(f"{glob.escape(str(swept))}/*/")) == NAMES
    for name, ts in zip(NAMES, (0.5, 1.0)):
        cfg = yaml.safe_load((swept / name / "config.yaml").read_text())
        assert cfg["forcing"]["timescale"] == ts and cfg["particles"]["sets"][0]["stokes"] == 0.5
        assert cfg["grid"]["points"] == 16 and cfg["seed"] == 5
        t, _ = _series(swept / name)
        assert t[-1] == pytest.approx(1.2, abs=1e-12)
    status = yaml.safe_load((swept / "sweep_status.json").read_text())
    assert all(status["runs"][n]["exit"] == 0 for n in NAMES)


def test_second_invocation_skips_completed_runs(swept, config_file, capsys):
    before = {n: os.stat(swept / n / "fluid.h5").st_mtime_ns for n in NAMES}
    assert main(["sweep", str(config_file), *VARY, "--out", str(swept)]) == 0
    out = capsys.readouterr().out
    assert "started" not in out and out.count("skipped (0)") == 2
    assert before == {n: os.stat(swept / n / "fluid.h5").st_mtime_ns for n in NAMES}


def test_inspect_on_the_sweep_folder_points_at_its_runs(swept, capsys):
    assert main(["inspect", str(swept)]) == 2
    err = capsys.readouterr().err
    assert "a folder of 2 runs, not a run folder" in err and str(swept / NAMES[0]) in err


def test_folder_states_decide_the_action(swept, config_file, tmp_path):
    from eddybox.solver.study.sweep import decide_action

    _, runs = plan_runs(config_file, VARY[1::2], [], swept)
    assert [decide_action(r, None) for r in runs] == ["skip", "skip"]
    # time.end may change on a restart: a longer end continues the run from its checkpoint
    _, longer = plan_runs(config_file, VARY[1::2], ["time.end=2.0"], swept)
    assert decide_action(longer[0], None) == "resume"
    # another physical config in the folder is refused, naming the folder and the key
    _, other = plan_runs(config_file, VARY[1::2], ["fluid.viscosity=0.04"], swept)
    with pytest.raises(ConfigError, match=r"different config.*fluid\.viscosity"):
        decide_action(other[0], None)
    # a folder that is not a run is never overwritten
    _, mine = plan_runs(config_file, VARY[1::2], [], tmp_path)
    mine[0].folder.mkdir()
    (mine[0].folder / "notes.txt").write_text("my notes")
    with pytest.raises(ConfigError, match="not an eddybox run folder"):
        decide_action(mine[0], None)


def test_interrupted_run_resumes_and_started_run_is_redone(swept, config_file, tmp_path, capsys):
    out = tmp_path / "sw"
    args = ["sweep", str(config_file), *VARY, "--set", "checkpoint.every=0.1", "--out", str(out)]
    # one run at a time; SIGTERM to the sweep after the first checkpoint of the first run
    proc = subprocess.Popen([sys.executable, "-m", "eddybox.solver.cli", *args, "--jobs", "1"],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            env=dict(os.environ, EDDYBOX_THREADS="1"))
    ckdir = out / NAMES[0] / "checkpoints"
    deadline = time.monotonic() + 120
    while not list(ckdir.glob("checkpoint_*.h5")) and time.monotonic() < deadline:
        time.sleep(0.02)
    proc.send_signal(signal.SIGTERM)
    text = proc.communicate(timeout=120)[0].decode()
    assert proc.returncode == 75, text
    assert "stopped early" in (out / NAMES[0] / "log.txt").read_text()
    assert not (out / NAMES[1]).exists() and "not started" in text
    # the second run was started by hand and killed before its first checkpoint (eddybox had
    # marked its folder as a run folder, eddybox.solver.run.run_folder)
    (out / NAMES[1]).mkdir()
    (out / NAMES[1] / ".eddybox-run").write_text("eddybox run folder\n")
    (out / NAMES[1] / "log.txt").write_text("2026-01-01 00:00:00 eddybox run: killed early\n")

    assert main(args + ["--jobs", "2"]) == 0
    text = capsys.readouterr().out
    assert f"{NAMES[0]} (resume)" in text and f"{NAMES[1]} (overwrite)" in text
    assert "resumed (0)" in text and "done (0)" in text
    assert "continuing from" in (out / NAMES[0] / "log.txt").read_text()
    # a resumed run reproduces the uninterrupted one sample for sample (same physics, same
    # seed; common practice for checkpoint/restart: the restart is exact)
    for name in NAMES:
        t_ref, e_ref = _series(swept / name)
        t, e = _series(out / name)
        np.testing.assert_allclose(t, t_ref, rtol=0, atol=1e-12)
        np.testing.assert_allclose(e, e_ref, rtol=1e-12)


def test_failed_run_is_reported_and_sweep_returns_1(config_file, tmp_path, capsys):
    # the config validates, but the child cannot read its initial field: it exits 2 at start
    out = tmp_path / "sw"
    code = main(["sweep", str(config_file), "--set", "fluid.initial={kind: file}",
                 "--vary", f"fluid.initial.path={tmp_path / 'missing.h5'}", "--out", str(out)])
    assert code == 1
    text = capsys.readouterr().out
    assert "failed (2)" in text
    status = yaml.safe_load((out / "sweep_status.json").read_text())
    (entry,) = status["runs"].values()
    assert entry["exit"] == 2 and entry["status"] == "failed"
    (console,) = (out / ".console").iterdir()
    assert "missing.h5" in console.read_text()


# --- the report ------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def report(swept, tmp_path_factory):
    out = tmp_path_factory.mktemp("report")
    index = write_report([swept / n for n in NAMES], out)
    return out, index


def test_report_writes_again_only_where_a_report_wrote(swept, report, tmp_path):
    from eddybox.solver.errors import ConfigError
    from eddybox.solver.run.run_folder import foreign_entries

    import shutil

    assert (report[0] / ".eddybox-report").is_file()
    again = shutil.copytree(report[0], tmp_path / "again")
    write_report([swept / NAMES[0]], again)  # a report's own folder: written again
    # a folder of the user's with a file of the same name is refused, and left as it was
    site = tmp_path / "site"
    site.mkdir()
    (site / "pairs.csv").write_text("mine")
    with pytest.raises(ConfigError, match="holds files eddybox did not write"):
        write_report([swept / NAMES[0]], site)
    assert [p.name for p in site.iterdir()] == ["pairs.csv"]
    # a report inside a run folder (the demo's report/) counts as eddybox's own output there
    run = shutil.copytree(swept / NAMES[0], tmp_path / "run")
    write_report([run], run / "report")
    assert foreign_entries(run) == []


def _csv_rows(out):
    with open(out / "summary.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def test_page_references_existing_valid_pngs(report):
    from matplotlib.image import imread  # reference PNG decoder

    out, index = report
    page = index.read_text()
    srcs = re.findall(r'<img src="([^"]+)"', page)
    assert {"timeseries.png", "spectra.png", "pairs_drops__drops.png"} <= set(srcs)
    for src in srcs:
        path = out / src
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
        img = imread(path)
        assert img.ndim == 3 and img.shape[0] > 200 and img.shape[1] > 400
    assert "http" not in page.replace("summary.csv", "") and "<script" not in page
    assert "MSER-5" in page and "Flyvbjerg" in page and "research estimates" in page


def _direct(run):
    """The table quantities computed straight from the files with eddybox.solver.estimators.timeseries."""
    with h5py.File(run / "fluid.h5", "r") as f:
        s = {k: f["series"][k][...] for k in f["series"]}
    t = s["time"]
    got = {k: analysis.stationary_summary(t, s[k]) for k in
           ("energy", "dissipation", "u_rms", "integral_scale", "taylor_scale", "re_lambda", "eta",
            "kmax_eta", "skewness")}
    got["eddy_time"] = analysis.stationary_summary(t, s["integral_scale"] / s["u_rms"])
    comp = np.stack([s["energy_x"], s["energy_y"], s["energy_z"]])
    got["isotropy"] = analysis.stationary_summary(t, comp.max(0) / comp.min(0))
    # coefficient of variation of the injection over its MSER-5 window; error by first-order
    # propagation of the blocking errors of the mean and the variance (delta method,
    # Bevington & Robinson 2003, Data Reduction and Error Analysis, ch. 3)
    inj = analysis.stationary_summary(t, s["injection"])
    w = analysis.uniform_samples(t, s["injection"])[1][inj.start_index:]
    m, d2 = w.mean(), (w - w.mean()) ** 2
    cv = math.sqrt(d2.mean()) / abs(m)
    err = cv * math.hypot(analysis.block_average(d2).stderr / (2 * d2.mean()), inj.stderr / m)
    values = {k: (v.mean, v.stderr) for k, v in got.items()}
    values["injection_cv"] = (cv, err)
    # pairs: ratios of sums over the group's averaging window (the window rule is tested in
    # test_pair_estimators), errors by eddybox.solver.estimators.pairs.ratio_estimate
    from eddybox.solver.estimators.pairs import ratio_estimate
    from eddybox.solver.study.readers import averaging_window, read_pair_group

    window = averaging_window(read_pair_group(run / "pairs.h5", "drops__drops"))
    with h5py.File(run / "pairs.h5", "r") as f:
        g = f["pairs/drops__drops"]
        keep = window.mask(g["time"][...])
        c, e = g["counts"][...][keep, 0].astype(float), g["expected"][...][keep, 0]
        r = g["r_centres"][...][keep, 0]
        s_abs = np.where(c > 0, g["wr_abs"][...][keep, 0] * c, 0.0)
        edges = g["r_edges"][...]
    gs = ratio_estimate(c, e)
    ks = ratio_estimate(2 * np.pi * r**2 * s_abs, e)  # K = 2 pi r^2 sum|w_r| / sum expected
    assert gs.value == pytest.approx(c.sum() / e.sum(), rel=1e-12)
    values["drops__drops/g_small"] = (gs.value, gs.stderr)
    values["drops__drops/kernel_small"] = (ks.value, ks.stderr)
    values["drops__drops/r_small_eta"] = (math.sqrt(edges[0] * edges[1]), None)  # log-bin centre
    return values


def test_csv_equals_analysis_of_the_files(swept, report):
    out, _ = report
    rows = _csv_rows(out)
    assert [r["run"] for r in rows] == NAMES
    for row, name in zip(rows, NAMES):
        for key, (mean, err) in _direct(swept / name).items():
            assert float(row[key]) == pytest.approx(mean, rel=1e-12, abs=1e-300), key
            if err is not None:
                assert float(row[f"{key}_stderr"]) == pytest.approx(err, rel=1e-12, abs=1e-300), key
        assert 1.0 < float(row["isotropy"]) < 3.0 and float(row["energy"]) > 0


def test_differences_are_flagged_by_their_adjusted_p_values(report):
    # bold red exactly where the shown adjusted p-value is at most 0.05 (the Holm adjustment
    # itself is checked by hand in test_forcing_study); same-seed runs are compared paired
    _, index = report
    page = index.read_text()
    diff_part = page.split("<h2>Differences")[1].split("<h2>")[0]
    cells = re.findall(r'<td( class="sig")? title="(paired|independent)[^"]*">(.*?)p̃ = '
                       r"([0-9.e+-]+)</span></td>", diff_part)
    assert len(cells) >= 12
    assert sum(how == "paired" for _, how, *_ in cells) >= 11  # both seed 5: every mean
    # flagged: p~ <= 0.05 and an established error bar (no not-converged mark)
    assert [bool(sig) for sig, *_ in cells] == [float(p) <= 0.05 and "†" not in text
                                                for _, _, text, p in cells]
    assert "Bold red" in diff_part and "holm" in diff_part


def test_wr_pdf_is_normalised(swept):
    # a PDF integrates to one (definition); pairs beyond the stored w_r range are left out,
    # so the integral is 1 minus the fraction outside
    from eddybox.solver.study.readers import read_pair_group, wr_pdf

    series = read_pair_group(swept / NAMES[0] / "pairs.h5", "drops__drops")
    k = series.counts.shape[1] - 1
    pdf = wr_pdf(series, 1e9)  # the largest separation bin
    assert pdf.r_bin == k
    keep = pdf.window.mask(series.time)
    c = series.counts[keep, k]
    outside = (series.wr_under[keep, k] + series.wr_over[keep, k]).sum() / c.sum()
    assert pdf.pdf @ np.diff(pdf.x_edges) == pytest.approx(1.0 - outside, rel=1e-12)
    # sigma = sqrt(sum w_r^2 / sum counts) over the window (pooled)
    assert pdf.rms == pytest.approx(math.sqrt((series.wr_sq[keep, k] * c).sum() / c.sum()),
                                    rel=1e-12)


def test_report_refuses_a_folder_that_is_not_a_run(tmp_path, swept, capsys):
    with pytest.raises(ConfigError, match=re.escape(str(tmp_path))):
        write_report([swept / NAMES[0], tmp_path], tmp_path / "rep")
    assert main(["report", str(tmp_path), "--out", str(tmp_path / "rep")]) == 2
    assert "no fluid.h5" in capsys.readouterr().err and not (tmp_path / "rep").exists()


def _chromium():
    for name in ("/usr/bin/chromium", "chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


@pytest.mark.skipif(_chromium() is None, reason="headless Chromium is not installed")
def test_page_renders_in_headless_chromium(report, tmp_path):
    from matplotlib.image import imread

    _, index = report
    shot = tmp_path / "shot.png"
    subprocess.run([_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                    "--no-first-run", "--disable-background-networking",
                    "--disable-component-update", "--disable-sync",
                    f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}",
                    "--window-size=1280,2400", index.resolve().as_uri()],
                   capture_output=True, timeout=120, check=False)
    assert shot.exists()
    img = imread(shot)[..., :3]
    assert img.shape[:2] == (2400, 1280)
    dark = (img.mean(axis=2) < 0.8).mean()  # text, table rules and plotted lines
    assert dark > 0.01 and img.std() > 0.05
