"""The catalogue of hostile inputs and faults: a careless user, a damaged file, a second
process, a full disk. Every case asserts

* the documented exit code (2 for a refusal, 1 for a failed write);
* one line of output, without a traceback;
* the key or file named in it;
* every file that existed before unchanged, by checksum (and, for a refusal, no new file).

Cases run in-process through `eddybox.solver.cli.main`; the ones that need a real process
(signals, a live run's lock, a real full disk, MPI) are in tests/test_data_safety.py.
"""
import errno
import hashlib
import os
import shutil

import h5py
import numpy as np
import pytest
import yaml

from eddybox.solver.cli import main

CFG = {"name": "hostile", "seed": 5, "grid": {"points": 16},
       "fluid": {"viscosity": 0.05, "initial": {"kind": "spectrum", "energy": 0.5, "peak": 2}},
       "forcing": {"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
       "time": {"end": 0.3},
       "particles": {"release": 0.0, "interpolation": 4,
                     "sets": [{"name": "drops", "stokes": 1.0, "count": 60}]},
       "stats": {"fluid": {"every": 0.05}, "spectra": {"every": 0.1},
                 "pairs": {"every": 0.1, "r_max": 1.0, "bins": 4, "spacing": "linear",
                           "units": "box", "wr_bins": 5},
                 "fields": {"every": 0.2}},
       "checkpoint": {"every": 0.05, "keep": 10}}


def _merge(base, patch):
    """`patch` over `base`; a section with a `kind` replaces the old one (its keys differ)."""
    out = dict(base)
    for k, v in patch.items():
        nested = isinstance(v, dict) and isinstance(base.get(k), dict) and "kind" not in v
        out[k] = _merge(base[k], v) if nested else v
    return out


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished run with particles, pair statistics, field snapshots and checkpoints."""
    tmp = tmp_path_factory.mktemp("finished")
    cfg = tmp / "run.yaml"
    cfg.write_text(yaml.safe_dump(CFG))
    assert main(["run", str(cfg), "--out", str(tmp / "run"), "--quiet"]) == 0
    return tmp / "run"


class Case:
    """The files of one case, made under `root` before the command runs."""

    def __init__(self, root, finished):
        self.root, self.finished = root, finished

    def config(self, patch=None, name="run.yaml", **top):
        path = self.root / name
        path.write_text(yaml.safe_dump(_merge(_merge(CFG, patch or {}), top)))
        return str(path)

    def run(self, name="run"):
        """A copy of the finished run."""
        dst = self.root / name
        shutil.copytree(self.finished, dst)
        return dst

    def checkpoints(self, run):
        return sorted((run / "checkpoints").glob("checkpoint_*.h5"))

    def field(self, name, data, group=False, **attrs):
        path = self.root / name
        with h5py.File(path, "w") as f:
            f.attrs["producer"] = "eddybox"
            if group:
                f.create_group("velocity_hat")
            else:
                d = f.create_dataset("velocity_hat", data=data)
                for k, v in attrs.items():
                    d.attrs[k] = v
        return str(path)


def _snapshot(root):
    out = {}
    for dirpath, dirnames, filenames in os.walk(root):
        for n in filenames + [d for d in dirnames if os.path.islink(os.path.join(dirpath, d))]:
            p = os.path.join(dirpath, n)
            rel = os.path.relpath(p, root)
            if os.path.islink(p):
                out[rel] = "link:" + os.readlink(p)
            else:
                with open(p, "rb") as fh:
                    out[rel] = hashlib.sha256(fh.read()).hexdigest()
    return out


def _flip_bits(path, dataset):
    """Flip one bit in the middle of a dataset's stored bytes (a damaged disk block)."""
    with h5py.File(path, "r") as f:
        off, size = f[dataset].id.get_offset(), f[dataset].id.get_storage_size()
    with open(path, "r+b") as fh:
        fh.seek(off + size // 2)
        b = fh.read(1)
        fh.seek(off + size // 2)
        fh.write(bytes([b[0] ^ 0x04]))


def _rewrite(path, dataset, value):
    """Replace a checkpoint dataset and give it a matching checksum (a consistent but wrong
    file, as a buggy or hostile writer would leave it)."""
    from eddybox.solver.fluid.field_file import checksum

    with h5py.File(path, "r+") as f:
        del f[dataset]
        d = f.create_dataset(dataset, data=value)
        d.attrs["crc32"] = checksum(np.asarray(value))


# --- the cases: (id, setup(case) -> argv, exit code, text the one line must contain) ----------------
def _overwrite_cwd(c, mp):
    run = c.run()
    mp.chdir(run)
    return ["run", c.config(), "--out", ".", "--overwrite"]


def _overwrite_parent_of_cwd(c, mp):
    run = c.run()
    mp.chdir(run / "checkpoints")
    return ["run", c.config(), "--out", str(run), "--overwrite"]


def _overwrite_victim(c, mp):
    victim = c.root / "victim"
    victim.mkdir()
    (victim / "notes.txt").write_text("three years of notes")
    work = c.root / "work"
    work.mkdir()
    mp.chdir(work)
    return ["run", c.config(output="../victim"), "--overwrite"]


def _overwrite_foreign(name, folder=False):
    def setup(c, mp):
        run = c.run()
        target = run / name
        target.parent.mkdir(parents=True, exist_ok=True)
        if folder:
            target.mkdir()
            (target / "data.csv").write_text("1,2,3\n")
        else:
            target.write_text("mine")
        return ["run", c.config(), "--out", str(run), "--overwrite"]
    return setup


def _overwrite_symlink(c, mp):
    run = c.run()
    (c.root / "elsewhere.h5").write_text("precious")
    os.remove(run / "pairs.h5")
    os.symlink(c.root / "elsewhere.h5", run / "pairs.h5")
    return ["run", c.config(), "--out", str(run), "--overwrite"]


def _overwrite_unmarked_run(c, mp):
    run = c.run()
    os.remove(run / ".eddybox-run")  # a folder eddybox did not make (or made before markers)
    return ["run", c.config(), "--out", str(run), "--overwrite"]


def _out_is_file(c, mp):
    (c.root / "thesis.pdf").write_text("%PDF")
    return ["run", c.config(), "--out", str(c.root / "thesis.pdf"), "--overwrite"]


def _out_below_file(c, mp):
    (c.root / "notes.txt").write_text("x")
    return ["run", c.config(), "--out", str(c.root / "notes.txt" / "run")]


def _validate_first(patch, **top):
    """--overwrite of a finished run with a config that can be refused without a time step."""
    def setup(c, mp):
        run = c.run()
        return ["run", c.config(patch, **top), "--out", str(run), "--overwrite"]
    return setup


def _initial(data, group=False, **attrs):
    def setup(c, mp):
        run = c.run()
        path = c.field("init.h5", data, group=group, **attrs)
        return ["run", c.config({"fluid": {"initial": {"kind": "file", "path": path}}}),
                "--out", str(run), "--overwrite"]
    return setup


def _initial_path(make):
    def setup(c, mp):
        run = c.run()
        path = make(c)
        return ["run", c.config({"fluid": {"initial": {"kind": "file", "path": path}}}),
                "--out", str(run), "--overwrite"]
    return setup


def _damaged_checkpoint_as_initial(c):
    src = c.checkpoints(c.finished)[-1]
    dst = c.root / "damaged.h5"
    shutil.copy(src, dst)
    _flip_bits(dst, "velocity_hat")
    return str(dst)


_GOOD_FIELD = np.zeros((3, 16, 16, 9), complex)
_NAN_FIELD = _GOOD_FIELD.copy()
_NAN_FIELD[0, 1, 1, 1] = np.nan
_INF_FIELD = _GOOD_FIELD.copy()
_INF_FIELD[2, 3, 0, 2] = np.inf


def _restart(damage, which=-1, latest=False):
    def setup(c, mp):
        run = c.run()
        ck = c.checkpoints(run)[which]
        damage(c, run, ck)
        return ["run", c.config(), "--out", str(run), "--restart",
                "latest" if latest else str(ck), "--set", "time.end=0.5"]
    return setup


def _all_damaged(c, run, ck):
    for p in c.checkpoints(run):
        _flip_bits(p, "velocity_hat")


def _tamper_attrs(c, run, ck):
    with h5py.File(ck, "r+") as f:
        f.attrs["step"] = int(f.attrs["step"]) + 1


def _strip_checksum(c, run, ck):
    with h5py.File(ck, "r+") as f:
        del f["state/forcing/power"].attrs["crc32"]


def _garbage(name):
    def damage(c, run, ck):
        (run / name).write_bytes(b"\x89HDF\r\n\x1a\n" + os.urandom(200))
    return damage


def _truncated_series(c, run, ck):
    """fluid.h5 replaced by an older copy holding fewer samples than the checkpoint recorded."""
    with h5py.File(run / "fluid.h5", "r") as f:
        data = {k: f[f"series/{k}"][:2] for k in f["series"]}
    os.remove(run / "fluid.h5")
    with h5py.File(run / "fluid.h5", "w") as f:
        for k, v in data.items():
            f.create_dataset(f"series/{k}", data=v, maxshape=(None,))


def _locked(argv_of):
    def setup(c, mp):
        from eddybox.solver.run.run_folder import RunLock

        run = c.run()
        c.lock = RunLock(run).acquire("run")  # this process plays the running run
        return argv_of(c, run)
    return setup


def _report_garbage_pairs(c, mp):
    run = c.run()
    (run / "pairs.h5").write_bytes(b"not HDF5 at all")
    return ["report", str(run), "--out", str(c.root / "report")]


def _report_pairs_without_groups(c, mp):
    run = c.run()
    os.remove(run / "pairs.h5")
    with h5py.File(run / "pairs.h5", "w") as f:
        f.create_group("pairs/drops__drops")  # no datasets in it
    return ["report", str(run), "--out", str(c.root / "report")]


def _report_into_user_folder(c, mp):
    site = c.root / "site"
    site.mkdir()
    (site / "index.html").write_text("<html>my own page</html>")
    (site / "summary.csv").write_text("a,b\n1,2\n")
    return ["report", str(c.run()), "--out", str(site)]


def _bench_json_over_users_file(c, mp):
    (c.root / "results.json").write_text('{"my": "measurements"}')
    return ["bench", "--section", "estimate", "--quick", "--json", str(c.root / "results.json")]


def _sweep_over_users_status_file(c, mp):
    (c.root / "s").mkdir()
    (c.root / "s" / "sweep_status.json").write_text('{"my": "notes"}')
    return _sweep()(c, mp)


def _sweep_while_another_sweeps(c, mp):
    from eddybox.solver.run.run_folder import RunLock

    (c.root / "s").mkdir()
    c.lock = RunLock(c.root / "s").acquire("sweep")  # this process plays the first sweep
    return _sweep()(c, mp)


def _sweep(*extra):
    """`eddybox sweep` of the hostile config over two seeds, with these arguments."""
    return lambda c, mp: ["sweep", c.config(), "--vary", "seed=1,2", "--out", str(c.root / "s"),
                          *extra]


def _estimate(*extra, calibration=None):
    def setup(c, mp):
        argv = ["estimate", c.config(), "--points", "64", "--ranks", "4", *extra]
        if calibration is not None:
            path = c.root / "cal.json"
            path.write_text(calibration)
            argv += ["--calibration", str(path)]
        else:
            good = c.root / "good-cal.json"
            good.write_text('{"fluid_model": {"a": 3e-10, "b": 4e-9}, "threads": 1, '
                            '"umax_over_urms": 6.0}')
            argv += ["--calibration", str(good)]
        return argv
    return setup


REFUSALS = [
    # --overwrite replaces only a folder eddybox made, holding only eddybox's files
    ("overwrite-current-folder", _overwrite_cwd, "current folder"),
    ("overwrite-parent-of-current-folder", _overwrite_parent_of_cwd, "contains the current folder"),
    ("overwrite-foreign-folder", _overwrite_victim, "not a run folder made by eddybox"),
    ("overwrite-thesis-file", _overwrite_foreign("thesis.tex"), "thesis.tex"),
    ("overwrite-user-subfolder", _overwrite_foreign("mydata", folder=True), "mydata"),
    ("overwrite-file-in-checkpoints", _overwrite_foreign("checkpoints/README"), "checkpoints/README"),
    ("overwrite-file-in-set-aside", _overwrite_foreign("checkpoints/set-aside-1/keep.txt"),
     "checkpoints/set-aside-1/keep.txt"),
    ("overwrite-symlink", _overwrite_symlink, "pairs.h5"),
    ("overwrite-unmarked-folder", _overwrite_unmarked_run, ".eddybox-run"),
    ("output-is-a-file", _out_is_file, "thesis.pdf"),
    ("output-below-a-file", _out_below_file, "notes.txt"),
    ("output-in-proc", lambda c, mp: ["run", c.config(), "--out", "/proc/eddybox-x/run"], "/proc/eddybox-x"),
    ("output-name-too-long", lambda c, mp: ["run", c.config(), "--out", str(c.root / ("r" * 300))],
     "r" * 300),
    # every check that needs no time step runs before anything is removed
    ("overwrite-1e10-particles", _validate_first(
        {"particles": {"sets": [{"name": "drops", "stokes": 1.0, "count": 10**10}]}}),
     "particles.sets[0].count"),
    ("overwrite-huge-pair-histogram", _validate_first(
        {"stats": {"pairs": {"bins": 10000, "wr_bins": 100001}}}), "stats.pairs.bins"),
    ("overwrite-4096-cubed", _validate_first({"grid": {"points": 4096}}), "grid.points"),
    ("overwrite-rest-with-stokes", _validate_first(
        {"fluid": {"initial": {"kind": "rest"}}, "forcing": {"kind": "none"}}),
     "particles.sets[0].stokes"),
    ("overwrite-rest-linear-forcing", _validate_first(
        {"fluid": {"initial": {"kind": "rest"}}, "forcing": {"kind": "linear", "coefficient": 0.5},
         "particles": {"release": 0.1}}), "particles.sets[0].stokes"),
    ("overwrite-frozen-rest", _validate_first(
        {"fluid": {"initial": {"kind": "rest"}, "frozen": True}}), "particles.sets[0].stokes"),
    ("overwrite-collisions-without-radius", _validate_first(
        {"stats": {"collisions": {"every": 0.1}}}), "stats.collisions.radius"),
    ("overwrite-collision-radius-beyond-box", _validate_first(
        {"stats": {"collisions": {"every": 0.1, "radius": 2.0, "units": "box"}}}),
     "stats.collisions.radius"),
    ("overwrite-collisions-eta-at-rest", _validate_first(
        {"fluid": {"initial": {"kind": "rest"}, "frozen": True},
         "stats": {"collisions": {"every": 0.1, "radius": 0.5}}}), "stats.collisions.units"),
    ("overwrite-collision-shell-zero", _validate_first(
        {"stats": {"collisions": {"every": 0.1, "radius": 0.5, "shell": 0}}}),
     "stats.collisions.shell"),
    ("overwrite-lagrangian-too-many-lags", _validate_first(
        {"stats": {"lagrangian": {"every": 1e-4, "max_lag": 5.0}}}), "stats.lagrangian.max_lag"),
    ("overwrite-lagrangian-history-too-big", _validate_first(
        {"particles": {"sets": [{"name": "drops", "stokes": 1.0, "count": 10**7}]},
         "stats": {"lagrangian": {"every": 0.001, "max_lag": 10.0, "count": 10**7}}}),
     "stats.lagrangian.count"),
    ("overwrite-length-1e300", _validate_first({"grid": {"length": 1e300}}), "grid.length"),
    ("overwrite-length-1e-300", _validate_first({"grid": {"length": 1e-300}}), "grid.length"),
    ("max-memory-too-small-for-grid", lambda c, mp: ["check", c.config({"grid": {"points": 512}}),
                                                     "--max-memory", "2GiB"], "grid.points"),
    ("max-memory-below-the-program", lambda c, mp: ["run", c.config(), "--max-memory", "1MiB",
                                                    "--out", str(c.root / "o")], "--max-memory"),
    ("max-memory-not-a-size", lambda c, mp: ["check", c.config(), "--max-memory", "lots"], "--max-memory"),
    ("max-memory-nan", lambda c, mp: ["check", c.config(), "--max-memory", "nanGiB"], "--max-memory"),
    # initial field files: what was found and what is expected, naming fluid.initial.path
    ("initial-1d", _initial(np.zeros(10, complex)), "shape (10,)"),
    ("initial-strings", _initial(np.array([b"abc", b"def"])), "fluid.initial.path"),
    ("initial-two-components", _initial(np.zeros((2, 16, 16, 9), complex)), "shape (2, 16, 16, 9)"),
    ("initial-short-last-axis", _initial(np.zeros((3, 16, 16, 5), complex)), "shape (3, 16, 16, 5)"),
    ("initial-real-numbers", _initial(np.zeros((3, 16, 16, 9))), "float64"),
    ("initial-group", _initial(None, group=True), "group"),
    ("initial-nan", _initial(_NAN_FIELD), "NaN"),
    ("initial-inf", _initial(_INF_FIELD), "infinite"),
    ("initial-other-box", _initial(_GOOD_FIELD, length=1.0), "box length"),
    ("initial-length-not-a-number", _initial(_GOOD_FIELD, length="big"), "length"),
    ("initial-text-file", _initial_path(lambda c: (c.root / "t.h5").write_text("x") and str(c.root / "t.h5")),
     "not a readable HDF5"),
    ("initial-missing", _initial_path(lambda c: str(c.root / "nowhere.h5")), "no such file"),
    ("initial-damaged-checkpoint", _initial_path(_damaged_checkpoint_as_initial), "checksum"),
    # damaged checkpoints are refused, naming the file; nothing is changed before that
    ("restart-flipped-bits", _restart(lambda c, run, ck: _flip_bits(ck, "velocity_hat")), "checksum"),
    ("restart-flipped-bits-in-state", _restart(lambda c, run, ck: _flip_bits(ck, "state/particles/drops/x")),
     "state/particles/drops/x"),
    ("restart-garbled-rng", _restart(lambda c, run, ck: _rewrite(
        ck, "state/forcing/rng", np.frombuffer(b"{'state': \xff\xfe garbage", np.uint8))),
     "random-generator"),
    ("restart-nan-field", _restart(lambda c, run, ck: _rewrite(
        ck, "velocity_hat", np.full((3, 16, 16, 9), np.nan + 0j))), "NaN"),
    ("restart-tampered-attributes", _restart(_tamper_attrs), "attributes"),
    ("restart-no-checksum", _restart(_strip_checksum), "no checksum"),
    ("restart-state-missing", _restart(lambda c, run, ck: _rewrite(ck, "state/checkpoint_schedule/next",
                                                                   np.array([1.0, 2.0]))),
     "checkpoint_schedule"),
    ("restart-latest-all-damaged", _restart(_all_damaged, latest=True), "no readable checkpoint"),
    ("restart-garbage-pairs", _restart(_garbage("pairs.h5"), latest=True), "pairs.h5"),
    ("restart-garbage-fluid", _restart(_garbage("fluid.h5"), latest=True), "fluid.h5"),
    ("restart-pairs-missing", _restart(lambda c, run, ck: os.remove(run / "pairs.h5"), latest=True),
     "pairs.h5"),
    ("restart-series-shorter-than-checkpoint", _restart(_truncated_series, latest=True), "fluid.h5"),
    ("restart-checkpoint-is-a-folder", lambda c, mp: ["run", c.config(), "--out", str(c.run()),
                                                      "--restart", str(c.root)], str("unreadable")),
    # a running run's folder is left alone
    ("locked-run", _locked(lambda c, run: ["run", c.config(), "--out", str(run)]), f"PID {os.getpid()}"),
    ("locked-overwrite", _locked(lambda c, run: ["run", c.config(), "--out", str(run), "--overwrite"]),
     f"PID {os.getpid()}"),
    ("locked-restart", _locked(lambda c, run: ["run", c.config(), "--out", str(run), "--restart", "latest"]),
     f"PID {os.getpid()}"),
    ("locked-repair", _locked(lambda c, run: ["inspect", str(run), "--repair"]), f"PID {os.getpid()}"),
    ("locked-repair-one-file", _locked(lambda c, run: ["inspect", str(run / "checkpoints" / os.listdir(
        run / "checkpoints")[0]), "--repair"]), f"PID {os.getpid()}"),
    # study tools
    ("sweep-match-without-reference", _sweep("--match", "dissipation"), "--match"),
    ("sweep-match-unknown", _sweep("--reference", "seed=9", "--match", "energy"), "--match 'energy'"),
    ("sweep-match-forcing-without-dissipation", _sweep(
        "--reference", "seed=9", "--match", "dissipation", "--set", "forcing={kind: none}"),
     "--match dissipation"),
    ("sweep-match-reinject-energy-mode", _sweep(
        "--reference", "seed=9", "--match", "dissipation", "--set",
        "forcing={kind: reinject, mode: energy}"), "forcing.mode: power"),
    ("sweep-reference-bad-key", _sweep("--reference", "forcing.timscale=1"), "--reference"),
    ("sweep-reference-output", _sweep("--reference", "output=elsewhere"), "--reference output"),
    ("sweep-reference-not-a-pair", _sweep("--reference", "reinject"), "--reference 'reinject'"),
    ("report-bad-correction", lambda c, mp: ["report", str(c.run()), "--correction", "bonferoni"],
     "--correction"),
    ("report-negative-separation", lambda c, mp: ["report", str(c.run()), "--separation", "-1",
                                                  "--out", str(c.root / "rep")], "--separation"),
    ("report-garbage-pairs", _report_garbage_pairs, "pairs.h5"),
    ("report-pairs-without-data", _report_pairs_without_groups, "pairs.h5"),
    ("report-into-a-folder-of-the-users", _report_into_user_folder, "holds files eddybox did not write"),
    ("estimate-negative-bandwidth", _estimate("--network-bandwidth", "-1e9"), "--network-bandwidth"),
    ("estimate-nan-latency", _estimate("--network-latency", "nan"), "--network-latency"),
    ("estimate-negative-particles", _estimate("--particles", "-5"), "--particles"),
    ("estimate-zero-ranks", _estimate("--ranks", "0"), "--ranks"),
    ("estimate-negative-calibration", _estimate(calibration='{"fluid_model": {"a": -3e-10, "b": 4e-9}}'),
     "--calibration"),
    ("estimate-calibration-not-a-mapping", _estimate(calibration="[1, 2, 3]"), "--calibration"),
    ("estimate-calibration-zero-velocity", _estimate(
        calibration='{"fluid_model": {"a": 3e-10, "b": 4e-9}, "umax_over_urms": 0}'), "--calibration"),
    ("estimate-calibration-free-transforms", _estimate(
        calibration='{"fluid_model": {"a": 0.0, "b": 4e-9}}'), "fluid_model.a"),
    ("estimate-points-kmax-eta-and-re-lambda", _estimate("--kmax-eta", "1.5", "--re-lambda", "100"),
     "give at most two"),
    ("estimate-re-lambda-nan", _estimate("--re-lambda", "nan"), "--re-lambda"),
    ("estimate-re-lambda-tiny", _estimate("--re-lambda", "1e-9"), "--re-lambda"),
    ("estimate-kmax-eta-beyond-any-grid", lambda c, mp: _estimate()(c, mp)[:2] + [
        "--ranks", "4", "--kmax-eta", "1e12", "--calibration", str(c.root / "good-cal.json")],
     "--kmax-eta"),
    ("bench-unknown-section", lambda c, mp: ["bench", "--section", "everything"], "--section"),
    ("sweep-while-another-sweeps", _sweep_while_another_sweeps, "a second sweep on this folder"),
    ("sweep-over-a-users-status-file", _sweep_over_users_status_file, "sweep_status.json"),
    ("bench-json-over-a-users-file", _bench_json_over_users_file, "--json"),
]


def _one_line(capsys):
    cap = capsys.readouterr()
    text = (cap.out + cap.err).strip()
    assert "Traceback" not in text, text
    assert len(text.splitlines()) == 1, text
    return text


@pytest.mark.parametrize("setup,needle", [c[1:] for c in REFUSALS], ids=[c[0] for c in REFUSALS])
def test_refused_with_exit_2_and_nothing_touched(tmp_path, finished, capsys, monkeypatch, setup, needle):
    case = Case(tmp_path, finished)
    argv = setup(case, monkeypatch)
    before = _snapshot(tmp_path)
    try:
        code = main([str(a) for a in argv])
    finally:
        if getattr(case, "lock", None) is not None:
            case.lock.release()
    text = _one_line(capsys)
    assert code == 2, text
    assert needle in text, text
    assert _snapshot(tmp_path) == before  # nothing changed, removed or added


# --- faults: a write fails at each place eddybox writes ---------------------------------------------
def _enospc(path="?"):
    return OSError(errno.ENOSPC, "No space left on device", str(path))


def _h5_create_fails(n, match):
    """h5py.File(path, 'w') fails the n-th time for a path containing `match`."""
    def inject(monkeypatch):
        real = h5py.File
        calls = {"n": 0}

        def failing(name, mode="r", *a, **kw):
            if mode == "w" and match in str(name):
                calls["n"] += 1
                if calls["n"] == n:
                    raise RuntimeError("Unable to create file (unable to open file: errno = 28, "
                                       "error message = 'No space left on device')")
            return real(name, mode, *a, **kw)

        monkeypatch.setattr(h5py, "File", failing)
    return inject


def _sample_append_fails(n, path_part):
    def inject(monkeypatch):
        from eddybox.solver.run.output import SampleFile

        real = SampleFile.append
        calls = {"n": 0}

        def failing(self, record):
            if path_part in self.path:
                calls["n"] += 1
                if calls["n"] == n:
                    self.failed = True
                    from eddybox.solver.run.output import write_error

                    raise write_error(self.path, RuntimeError("Can't write data (error message = "
                                                              "'No space left on device')"))
            return real(self, record)

        monkeypatch.setattr(SampleFile, "append", failing)
    return inject


def _open_fails(module_name, n, match):
    """The n-th open() for writing of a path containing `match` fails, in one module."""
    def inject(monkeypatch):
        import builtins
        import importlib

        mod = importlib.import_module(module_name)
        real = builtins.open
        calls = {"n": 0}

        def failing(file, mode="r", *a, **kw):
            if match in str(file) and ("w" in mode or "a" in mode):
                calls["n"] += 1
                if calls["n"] == n:
                    raise _enospc(file)
            return real(file, mode, *a, **kw)

        monkeypatch.setattr(mod, "open", failing, raising=False)
    return inject


def _log_fails_after(n):
    def inject(monkeypatch):
        from eddybox.solver.run import progress

        real = progress.RunLog.write
        calls = {"n": 0}

        def failing(self, msg):
            if self.fh is not None:
                calls["n"] += 1
                if calls["n"] >= n:
                    raise _enospc("log.txt")
            return real(self, msg)

        monkeypatch.setattr(progress.RunLog, "write", failing)
    return inject


# (id, inject(monkeypatch), restart?, the file the line must name, whether a checkpoint exists)
FAULTS = [
    ("fluid-series-append", _sample_append_fails(4, "fluid.h5"), False, "fluid.h5", True),
    ("particles-append", _sample_append_fails(3, "particles.h5"), False, "particles.h5", True),
    ("pairs-append", _sample_append_fails(2, "pairs.h5"), False, "pairs.h5", True),
    ("checkpoint-write", _h5_create_fails(3, "checkpoint_"), False, "checkpoint_", True),
    ("first-checkpoint-write", _h5_create_fails(1, "checkpoint_"), False, "checkpoint_", False),
    ("field-snapshot", _h5_create_fails(2, "field_"), False, "field_", True),
    ("xdmf-sidecar", _open_fails("eddybox.solver.run.output", 2, ".xdmf"), False, ".xdmf", True),
    ("config-yaml", _open_fails("eddybox.solver.run.simulation", 1, "config.yaml"), False, "config.yaml", False),
    ("sample-file-create", _h5_create_fails(1, "fluid.h5"), False, "fluid.h5", False),
    ("log-full", _log_fails_after(1), False, "log.txt", True),
    ("restart-rebuild", _h5_create_fails(1, "fluid.h5.rebuild"), True, "fluid.h5", True),
]


@pytest.mark.parametrize("inject,restart,needle,have_checkpoint", [f[1:] for f in FAULTS],
                         ids=[f[0] for f in FAULTS])
def test_failed_write_exit_1_names_last_good_checkpoint(tmp_path, finished, capsys, monkeypatch,
                                                       inject, restart, needle, have_checkpoint):
    case = Case(tmp_path, finished)
    cfg = case.config()
    out = case.run() if restart else tmp_path / "fresh"
    argv = ["run", cfg, "--out", str(out), "--quiet"]
    if restart:
        argv += ["--restart", "latest", "--set", "time.end=0.5"]
    before = _snapshot(tmp_path)
    inject(monkeypatch)
    code = main(argv)
    monkeypatch.undo()
    text = _one_line(capsys)
    assert code == 1, text
    assert needle in text and "last good checkpoint" in text, text
    assert ("--restart latest" in text) == have_checkpoint, text
    if have_checkpoint:
        from eddybox.solver.run.checkpoint import read_checkpoint

        last = text.split("last good checkpoint: ")[1].split(". ")[0]
        read_checkpoint(last)  # intact, verified
    after = _snapshot(tmp_path)
    # a run appends to its log and renews its lock; nothing else that existed is touched
    changed = [k for k, v in before.items() if after.get(k) != v
               and os.path.basename(k) not in ("log.txt", ".eddybox-lock")]
    assert not changed, changed


def test_report_on_a_full_disk_exit_1_one_line_runs_untouched(tmp_path, finished, capsys,
                                                              monkeypatch):
    from matplotlib.figure import Figure

    case = Case(tmp_path, finished)
    run = case.run()
    before = _snapshot(tmp_path)

    def full(self, *a, **kw):
        raise _enospc(a[0] if a else "?")

    monkeypatch.setattr(Figure, "savefig", full)
    code = main(["report", str(run), "--out", str(tmp_path / "rep")])
    monkeypatch.undo()
    text = _one_line(capsys)
    assert code == 1 and "report in" in text and "No space left on device" in text, text
    after = _snapshot(tmp_path)
    assert all(after.get(k) == v for k, v in before.items())  # every file that existed, as it was
    assert not (tmp_path / "rep" / "index.html").exists()  # no page that looks complete


def test_catalogue_size():
    assert len(REFUSALS) + len(FAULTS) >= 40
