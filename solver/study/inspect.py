"""`eddybox inspect`: a human summary of any eddybox output file or run folder."""
from __future__ import annotations

import os

import h5py
import numpy as np

from eddybox.solver.errors import ConfigError


def _attrs_line(f):
    a = f.attrs
    return (f"  written by eddybox {a.get('code_version', '?')} at {a.get('created', '?')}, "
            f"config hash {a.get('config_hash', '?')}")


def _series(f, lines):
    g = f["series"]
    n = g["time"].shape[0]
    lines.append(f"  {n} samples, t = {g['time'][0]:.6g} .. {g['time'][-1]:.6g}" if n else "  no samples yet")
    if n:
        lines.append(f"  {'series':16s} {'units':10s} {'first':>12s} {'last':>12s} {'mean':>12s}")
        for k, d in g.items():
            v = d[...]
            lines.append(f"  {k:16s} {d.attrs.get('units', ''):10s} {v[0]:12.5g} {v[-1]:12.5g} "
                         f"{np.mean(v):12.5g}")


def _generic(f, lines):
    def visit(name, obj):
        if isinstance(obj, h5py.Dataset):
            lines.append(f"  {name:40s} {str(obj.shape):18s} {obj.dtype}  "
                         f"[{obj.attrs.get('units', '')}] {obj.attrs.get('description', '')}"[:150])

    f.visititems(visit)


def _pairs_summary(path):
    """Per group: samples, the averaging window, and per separation bin the pooled g(r),
    <w_r^2>, <|w_r|> and the collision kernel with their standard errors (delta method with
    blocking over correlated samples; eddybox.solver.study.readers.time_average)."""
    from eddybox.solver.study.readers import list_pair_groups, read_pair_group, time_average

    lines = []
    for name in list_pair_groups(path):
        series = read_pair_group(path, name)
        n = series.n_samples
        a = series.attrs
        st = "".join(f", St_{k} = {float(a[f'stokes_{k}']):.3g}" for k in "ab" if f"stokes_{k}" in a)
        lines.append(f"  pairs {name}: {n} samples"
                     + (f", t = {series.time[0]:.4g} .. {series.time[-1]:.4g}" if n else "") + st)
        if not n:
            continue
        try:
            avg = time_average(series)
        except ValueError as exc:
            lines.append(f"    {exc}")
            continue
        lines.append(f"    averaging window: {avg.window.describe()}, {avg.n_samples} samples")
        edges = series.r_edges
        lines.append(f"    {'r_lo':>9s} {'r_hi':>9s} {'pairs':>10s} {'g(r)':>17s} "
                     f"{'<w_r^2>':>19s} {'<|w_r|>':>19s} {'kernel':>19s}   "
                     f"(r in {series.units.get('r_edges', '')})")
        for i in range(len(edges) - 1):
            lines.append(f"    {edges[i]:9.4g} {edges[i + 1]:9.4g} {avg.counts[i]:10d} "
                         f"{_pm(avg.rdf[i], avg.rdf_err[i])} {_pm(avg.wr_sq[i], avg.wr_sq_err[i])} "
                         f"{_pm(avg.wr_abs[i], avg.wr_abs_err[i])} "
                         f"{_pm(avg.kernel[i], avg.kernel_err[i])}")
    return lines


def _collisions_summary(path):
    """Per group: the collision radius, samples, contacts, and the pooled detected kernel
    beside the kinematic kernel at the same radius, with standard errors
    (eddybox.solver.study.particle_readers.collision_average)."""
    from eddybox.solver.study.particle_readers import (
        collision_average,
        collision_groups,
        read_collision_group,
    )

    lines = []
    for name in collision_groups(path):
        series = read_collision_group(path, name)
        n = series["time"].size
        r = float(series["attrs"].get("radius", float("nan")))
        lines.append(f"  collisions {name}: R = {r:.4g} L, {n} samples"
                     + (f", t = {series['time'][0]:.4g} .. {series['time'][-1]:.4g}" if n else ""))
        if not n:
            continue
        try:
            avg = collision_average(series)
        except ValueError as exc:
            lines.append(f"    {exc}")
            continue
        lines.append(f"    averaging window: {avg['window'].describe()}, {avg['samples']} samples, "
                     f"{avg['collisions']} contacts, R = {avg['radius_eta']:.3g} eta")
        lines.append(f"    kernels (L^3 T^-1): detected {_pm(avg['detected'], avg['detected_err'])}"
                     f" kinematic at R {_pm(avg['kinematic'], avg['kinematic_err'])} inward flux "
                     f"{_pm(avg['kinematic_inward'], avg['kinematic_inward_err'])}")
        lines.append(f"    detected / kinematic {_pm(avg['ratio'], avg['ratio_err'])}, g(R) "
                     f"{_pm(avg['g_contact'], avg['g_contact_err'])}")
    return lines


def _pm(v, e) -> str:
    return f"{v:9.4g}±{e:<9.2g}"


def _checkpoint_summary(path, f) -> list[str]:
    """What a checkpoint holds, for people: where the run stood, its grid, its forcing's state,
    its particle sets, the samples each output file had, and whether its checksums verify."""
    import yaml

    from eddybox.solver.errors import CheckpointError
    from eddybox.solver.run.checkpoint import read_checkpoint
    from eddybox.solver.run.config import validate

    a = f.attrs
    n = f["velocity_hat"].shape[1]
    lines = [f"  checkpoint at t = {float(a.get('time', float('nan'))):.6g}, step {a.get('step', '?')}, "
             f"dt = {float(a.get('dt', float('nan'))):.4g}, after {float(a.get('wall_time', 0.0)):.1f} s "
             f"of wall time; written by the {a.get('layout', '?')} layout"]
    try:
        cfg = validate(yaml.safe_load(a["config"]))
        lines.append(f"  run: {cfg.summary()}")
    except Exception:  # noqa: BLE001 - a summary, not a check: say what is missing
        cfg = None
        lines.append(f"  grid {n}^3 (the checkpoint's config is unreadable)")
    st = f["state"]
    if "forcing" in st:
        fs = st["forcing"]
        parts = []
        if "sigma2" in fs:
            parts.append(f"variance sigma^2 = {float(fs['sigma2'][()]):.6g}")
        if "calibrating" in fs:
            at = float(fs["calibrated_at"][()])
            parts.append("calibrating" if int(fs["calibrating"][()]) else
                         (f"calibrated at t = {at:.6g}" if at == at else "not calibrated"))
        parts.append(f"power of the last step {float(fs['power'][()]):.4g}")
        lines.append(f"  forcing {cfg.forcing.kind if cfg else ''}: " + ", ".join(parts))
    if "particles" in st:
        ps = st["particles"]
        released = bool(int(ps["released"][()])) if "released" in ps else False
        sets = [k for k in ps if isinstance(ps[k], h5py.Group) and "ids" in ps[k]]
        if cfg is not None:  # in the config's order
            order = [s.name for s in cfg.particles.sets]
            sets.sort(key=lambda k: order.index(k) if k in order else len(order))
        lines.append(f"  particles: {'released' if released else 'not yet released'}; "
                     f"{len(sets)} set(s)")
        for name in sets:
            g = ps[name]
            tau = float(g["tau_p"][()]) if "tau_p" in g else float("nan")
            stk = float(g["stokes"][()]) if "stokes" in g else float("nan")
            lines.append(f"    {name:14s} {g['ids'].shape[0]:10d} particles  St = {stk:.4g}  tau_p = {tau:.4g}")
    if "hooks" in st:
        counts = []
        for name, g in st["hooks"].items():
            if "samples_written" in g:
                counts.append(f"{name} {int(g['samples_written'][()])}")
        lines.append("  samples written (per output file, its shortest series): " + ", ".join(counts))
    try:
        read_checkpoint(path)
        lines.append("  checksums: every dataset verifies")
    except CheckpointError as exc:
        lines.append(f"  checksums: DAMAGED ({exc})")
    lines.append("  (every dataset: eddybox inspect --datasets FILE)")
    return lines


def inspect_file(path, datasets=False) -> str:
    lines = [f"{path}:"]
    from eddybox.solver.run.repair import needs_repair
    from eddybox.solver.run.run_folder import folder_of, lock_holder

    holder = lock_holder(folder_of(path))
    if holder is not None:
        lines.append(f"  being written by a running eddybox (PID {holder.get('pid', '?')}); "
                     "read it with h5py.File(path, 'r', swmr=True)")
    elif needs_repair(path):
        lines.append("  not closed by its writer (killed run): readable with h5py.File(path, 'r', "
                     "swmr=True); 'eddybox inspect --repair' makes it readable everywhere")
    try:
        f = h5py.File(path, "r", swmr=True)
    except (OSError, RuntimeError) as exc:
        raise ConfigError(f"{path}: not a readable HDF5 file ({exc})") from None
    with f:
        if f.attrs.get("producer") != "eddybox":
            raise ConfigError(f"{path}: an HDF5 file, but not one written by eddybox")
        lines.append(_attrs_line(f))
        if "series" in f:
            _series(f, lines)
        if "pairs" in f:
            lines += _pairs_summary(path)
        elif "collisions" in f:
            lines += _collisions_summary(path)
        elif "velocity_hat" in f and "state" in f:
            lines += _checkpoint_summary(path, f)
            if datasets:
                _generic(f, lines)
        elif "velocity_hat" in f:
            a = f.attrs
            if "step" in a:
                lines.append(f"  t = {a.get('time')}, step {a.get('step')}, "
                             f"grid {f['velocity_hat'].shape[1]}^3")
            _generic(f, lines)
        elif "series" not in f:
            _generic(f, lines)
    return "\n".join(lines)


def inspect_path(path, datasets=False) -> str:
    if not os.path.exists(path):
        raise ConfigError(f"{path}: no such file or folder")
    if os.path.isdir(path):
        from eddybox.solver.run.run_folder import lock_holder

        out = [f"run folder {path}:"]
        files = [n for n in ("fluid.h5", "particles.h5", "pairs.h5", "collisions.h5")
                 if os.path.exists(os.path.join(path, n))]
        if not files and not os.path.exists(os.path.join(path, "config.yaml")):
            runs = sorted(e.name for e in os.scandir(path) if e.is_dir()
                          and os.path.exists(os.path.join(e.path, "config.yaml")))
            if runs:  # a sweep's folder, or any folder of runs: point at them
                shown = ", ".join(os.path.join(path, r) for r in runs[:3])
                raise ConfigError(f"{path}: a folder of {len(runs)} runs, not a run folder; "
                                  f"inspect one of them ({shown}{', ...' if len(runs) > 3 else ''})")
            raise ConfigError(f"{path}: not an eddybox run folder (no config.yaml or output files)")
        holder = lock_holder(path)
        if holder is not None:
            out.append(f"  status: running (PID {holder.get('pid', '?')}, started "
                       f"{holder.get('started', '?')})")
        ck = os.path.join(path, "checkpoints")
        if os.path.isdir(ck):
            out.append(f"  checkpoints: {', '.join(sorted(os.listdir(ck))) or 'none'}")
        for n in files:
            out.append(inspect_file(os.path.join(path, n)))
        return "\n".join(out)
    return inspect_file(path, datasets)
