"""Readers of a run folder's files: ``pairs.h5`` reduced to what a paper plots (pooled averages
with error bars over the averaging window, w_r PDFs, one tidy table across runs and Stokes
numbers), the fluid series and spectra of ``fluid.h5``.

Layout read (design contract): one group per set pair, ``/pairs/<a>__<b>``, holding ``r_edges``
(nbins_r + 1, in the units of its ``units`` attribute: Kolmogorov lengths at each sample, or box
units), ``wr_edges`` (nbins_r × (nbins_w + 1), one row per separation bin; a single row in files
of earlier versions), ``time`` (samples), per sample and bin ``counts``, ``expected``, ``rdf``,
``wr_mean``, ``wr_sq``, ``wr_abs``, ``wr_inward``, ``kernel``, ``r_centres``, ``wr_under``,
``wr_over``, per sample ``eta`` and ``tau_eta``, and ``wr_hist`` (samples × nbins_r × nbins_w).

Averages are the pooled ratio estimators of :mod:`eddybox.solver.estimators.pairs` (ratios of
sums over samples, delta-method errors with blocking for correlated samples), over the
averaging window: by default the one the run recorded (``running/start_time``, from
``stats.pairs.start``), or, where the run has not fixed it yet, the same rule applied to the
samples written so far.  A file still being written is read as far as every dataset reaches (a
run killed between two appends leaves datasets of unequal length).
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from eddybox.particles.pairs import bin_centres
from eddybox.particles.physical import from_kolmogorov_units
from eddybox.solver.errors import ConfigError
from eddybox.solver.estimators import pairs as est

__all__ = [
    "PairSeries",
    "PairAverage",
    "WrPdf",
    "PairTable",
    "list_pair_groups",
    "read_pair_group",
    "averaging_window",
    "time_average",
    "nearest_bin",
    "wr_pdf",
    "read_pairs",
    "pair_table",
]

_PER_BIN = ("counts", "rdf", "wr_mean", "wr_sq", "wr_abs", "wr_inward", "kernel")
_OPTIONAL = ("expected", "wr_under", "wr_over", "wr_trans", "r_centres", "eta", "tau_eta")


@dataclass
class PairSeries:
    """All samples of one set pair as stored (arrays with a leading sample axis), the group's
    attributes (set names, Stokes numbers, tau_p, units) and the window the run recorded."""

    group: str
    r_edges: np.ndarray
    wr_edges: np.ndarray  # (nbins_r, nbins_w + 1)
    time: np.ndarray
    counts: np.ndarray
    rdf: np.ndarray
    wr_hist: np.ndarray
    wr_mean: np.ndarray
    wr_sq: np.ndarray
    wr_abs: np.ndarray
    wr_inward: np.ndarray
    kernel: np.ndarray
    expected: np.ndarray | None = None
    wr_under: np.ndarray | None = None
    wr_over: np.ndarray | None = None
    wr_trans: np.ndarray | None = None
    r_centres: np.ndarray | None = None
    eta: np.ndarray | None = None
    tau_eta: np.ndarray | None = None
    units: dict[str, str] = field(default_factory=dict)
    attrs: dict = field(default_factory=dict)
    recorded_start: float = math.nan

    @property
    def n_samples(self) -> int:
        return int(self.time.size)

    @property
    def in_eta(self) -> bool:
        return self.attrs.get("r_units", "eta") == "eta" or "eta" in self.units.get("r_edges", "")

    def r_over_eta(self) -> np.ndarray:
        """Bin centres over η per sample (samples × bins); NaN where η is not recorded."""
        if self.in_eta:
            return np.broadcast_to(bin_centres(self.r_edges), self.counts.shape)
        if self.eta is None:
            return np.full(self.counts.shape, np.nan)
        return bin_centres(self.r_edges)[None, :] / self.eta[:, None]

    def sums(self) -> dict:
        """Per-sample sums of every pooled estimator (estimators.pairs.pair_sums)."""
        expected = self.expected
        if expected is None:  # files of earlier versions: counts / rdf
            with np.errstate(invalid="ignore", divide="ignore"):
                expected = np.where(self.rdf > 0, self.counts / self.rdf, 0.0)
        r = self.r_centres
        if r is None:
            r = bin_centres(self.r_edges)[None, :] * (self.eta[:, None] if self.in_eta and
                                                      self.eta is not None else 1.0)
        means = {k: getattr(self, k) for k in ("wr_mean", "wr_sq", "wr_abs", "wr_inward",
                                               "wr_trans") if getattr(self, k) is not None}
        means.update(counts=self.counts, expected=expected)
        eta = self.eta if self.eta is not None else np.nan
        tau = self.tau_eta if self.tau_eta is not None else np.nan
        return est.pair_sums(means, r, eta, tau)


@dataclass
class PairAverage:
    """Pooled averages per r-bin over the window and their standard errors (``*_err``).

    ``rdf`` = Σcounts/Σexpected, ``wr_*`` = Σ sums/Σ counts, ``kernel`` = Σ 2πr²|w_r|/Σexpected
    (the collision kernel of Wang, Wexler & Zhou 2000), ``kernel_norm`` = the same over η²u_η
    per sample.  ``r_eta`` is r/η (η averaged over the window when r is in box units)."""

    group: str
    r_edges: np.ndarray
    r_centres: np.ndarray
    r_eta: np.ndarray
    n_samples: int
    time_span: tuple[float, float]
    window: est.Window
    counts: np.ndarray  # total over the window
    rdf: np.ndarray
    rdf_err: np.ndarray
    wr_mean: np.ndarray
    wr_mean_err: np.ndarray
    wr_sq: np.ndarray
    wr_sq_err: np.ndarray
    wr_abs: np.ndarray
    wr_abs_err: np.ndarray
    wr_inward: np.ndarray
    wr_inward_err: np.ndarray
    kernel: np.ndarray
    kernel_err: np.ndarray
    kernel_norm: np.ndarray
    kernel_norm_err: np.ndarray
    wr_rms: np.ndarray  # √⟨w_r²⟩
    reliable: np.ndarray  # blocking plateau found for g

    def to_xarray(self):
        """An xarray Dataset over the separation bins (dimension ``r``; coordinates the bin
        centres ``r`` and ``r_eta``): every average with its ``*_err`` (xarray is imported here,
        it is not needed otherwise)."""
        import xarray as xr

        names = ("rdf", "wr_mean", "wr_sq", "wr_abs", "wr_inward", "kernel", "kernel_norm")
        data = {k: ("r", getattr(self, k)) for k in names}
        data.update({f"{k}_err": ("r", getattr(self, f"{k}_err")) for k in names})
        data.update(counts=("r", self.counts), wr_rms=("r", self.wr_rms),
                    reliable=("r", self.reliable))
        return xr.Dataset(data, coords={"r": ("r", self.r_centres), "r_eta": ("r", self.r_eta)},
                          attrs={"group": self.group, "samples": self.n_samples,
                                 "window": self.window.describe()})


@dataclass
class WrPdf:
    """Pooled PDF of x = w_r / σ in one separation bin, σ = √⟨w_r²⟩ of that bin over the window.

    ``pdf`` integrates to 1 − ``tail_fraction``: pairs outside the bin's w_r range are left out
    of the end bins when the file records them (``wr_under``/``wr_over``), otherwise they stay
    folded in and ``tail_fraction`` is NaN.  Errors are those of the bin probabilities
    (estimators.pairs.pdf_estimate); σ is taken as exact.  ``skewness`` and ``flatness`` are
    those of the histogram (density uniform within each bin)."""

    group: str
    r_requested: float
    r_bin: int
    r_lo: float
    r_hi: float
    r_eta: float
    rms: float
    x_edges: np.ndarray
    x_centres: np.ndarray
    pdf: np.ndarray
    pdf_err: np.ndarray
    tail_fraction: float
    n_samples: int
    skewness: float
    flatness: float
    window: est.Window

    def to_xarray(self):
        """An xarray Dataset over the w_r bins (dimension ``x`` = w_r/σ at the bin centres):
        ``pdf`` and ``pdf_err``; σ, r/η, skewness and flatness as attributes."""
        import xarray as xr

        return xr.Dataset({"pdf": ("x", self.pdf), "pdf_err": ("x", self.pdf_err)},
                          coords={"x": ("x", self.x_centres)},
                          attrs={"group": self.group, "r_eta": self.r_eta, "rms": self.rms,
                                 "skewness": self.skewness, "flatness": self.flatness,
                                 "samples": self.n_samples, "window": self.window.describe()})


def list_pair_groups(path) -> list[str]:
    """Names ``<a>__<b>`` of the groups under ``/pairs``."""
    with h5py.File(path, "r", swmr=True) as f:  # SWMR: readable even after a killed run
        return sorted(f["pairs"].keys()) if "pairs" in f else []


def _text(v):
    return v.decode() if isinstance(v, bytes) else v


def read_pair_group(path, group: str) -> PairSeries:
    """Read one ``/pairs/<group>``, truncated to the samples every dataset holds."""
    with h5py.File(path, "r", swmr=True) as f:  # SWMR: readable even after a killed run
        if "pairs" not in f or group not in f["pairs"]:
            raise KeyError(f"{path}: no group /pairs/{group}; found {list_pair_groups(path)}")
        g = f["pairs"][group]
        missing = [k for k in ("r_edges", "wr_edges", "time", "wr_hist", *_PER_BIN) if k not in g]
        if missing:
            raise KeyError(f"{path}: /pairs/{group} lacks {', '.join(missing)}")
        names = ["time", "wr_hist", *_PER_BIN, *(k for k in _OPTIONAL if k in g)]
        n = min(g[k].shape[0] for k in names)
        data = {k: np.asarray(g[k][:n]) for k in names}
        r_edges = np.asarray(g["r_edges"][()])
        wr_edges = np.asarray(g["wr_edges"][()], dtype=float)
        if wr_edges.ndim == 1:
            wr_edges = np.broadcast_to(wr_edges, (r_edges.size - 1, wr_edges.size)).copy()
        units = {k: str(_text(g[k].attrs["units"])) for k in g
                 if isinstance(g[k], h5py.Dataset) and "units" in g[k].attrs}
        attrs = {k: _text(v) for k, v in g.attrs.items()}
        start = math.nan
        if "running" in g and "start_time" in g["running"]:
            start = float(g["running/start_time"][()])
        return PairSeries(group=group, r_edges=r_edges, wr_edges=wr_edges, units=units,
                          attrs=attrs, recorded_start=start, **data)


def averaging_window(series: PairSeries, t_min: float | None = None) -> est.Window:
    """The window of the default averages: ``t_min`` when given; else the start the run
    recorded in ``running/start_time``; else (``stats.pairs.start: auto`` not decided yet, or
    a file without it) the run's rule applied to the samples so far: MSER-5 on g at small r
    after the floor release + 3 τ_p (estimators.pairs.detect_window)."""
    if t_min is not None:
        return est.Window(float(t_min), "start")
    if series.attrs.get("window") == "start" and math.isfinite(series.recorded_start):
        return est.Window(series.recorded_start, "start")
    floor = float(series.attrs.get("window_floor", series.time[0] if series.n_samples else 0.0))
    if math.isfinite(series.recorded_start):
        return est.Window(series.recorded_start, "auto", True, floor)
    if series.n_samples == 0:
        return est.Window(floor, "auto", False, floor, "no samples")
    expected = series.sums()["expected"]
    g = est.transient_series(series.counts, expected, series.r_over_eta())
    return est.detect_window(series.time, g, floor)


def _window_mask(series: PairSeries, window: est.Window, t_max) -> np.ndarray:
    keep = window.mask(series.time)
    if t_max is not None:
        keep &= series.time <= t_max
    if not keep.any():
        raise ValueError(f"{series.group}: no samples in the averaging window "
                         f"{window.describe()}" + (f", t <= {t_max}" if t_max is not None else ""))
    return keep


def time_average(series: PairSeries, t_min: float | None = None,
                 t_max: float | None = None) -> PairAverage:
    """Pooled averages over the window (:func:`averaging_window`; ``t_min`` overrides it) and
    ``t <= t_max``, with delta-method + blocking standard errors (estimators.pairs)."""
    window = averaging_window(series, t_min)
    keep = _window_mask(series, window, t_max)
    sums = series.sums()
    e = est.pair_estimates(sums, keep)
    out = {}
    for name in ("rdf", "wr_mean", "wr_sq", "wr_abs", "wr_inward", "kernel", "kernel_norm"):
        out[name], out[name + "_err"] = e[name].value, e[name].stderr
    t = series.time[keep]
    r_eta = series.r_over_eta()[keep]
    return PairAverage(group=series.group, r_edges=series.r_edges,
                       r_centres=bin_centres(series.r_edges), r_eta=np.nanmean(r_eta, axis=0),
                       n_samples=int(keep.sum()), time_span=(float(t.min()), float(t.max())),
                       window=window, counts=series.counts[keep].sum(axis=0),
                       wr_rms=np.sqrt(out["wr_sq"]), reliable=e["rdf"].reliable, **out)


def nearest_bin(series: PairSeries, r: float, in_eta: bool) -> int:
    """The bin whose centre is nearest to r in log r (r in η when ``in_eta``, else in the
    units of r_edges)."""
    centres = np.nanmean(series.r_over_eta(), axis=0) if in_eta else bin_centres(series.r_edges)
    ok = centres > 0
    if not ok.any():
        return int(np.argmin(np.abs(centres - r)))
    d = np.where(ok, np.abs(np.log(np.where(ok, centres, 1.0)) - math.log(max(r, 1e-300))), np.inf)
    return int(np.argmin(d))


def wr_pdf(series: PairSeries, r: float, t_min: float | None = None,
           t_max: float | None = None, r_in_eta: bool | None = None) -> WrPdf:
    """Pooled PDF of w_r / σ in the separation bin nearest to ``r`` (in log r; r in Kolmogorov
    lengths when ``r_in_eta``, default: the units of the file's r_edges), over the averaging
    window, with error bars.  Each sample counts by its pairs (estimators.pairs.pdf_estimate)."""
    window = averaging_window(series, t_min)
    keep = _window_mask(series, window, t_max)
    in_eta = series.in_eta if r_in_eta is None else r_in_eta
    k = nearest_bin(series, r, in_eta)
    hist = series.wr_hist[keep, k, :].astype(np.float64)
    counts = series.counts[keep, k].astype(np.float64)
    if series.wr_under is not None and series.wr_over is not None:
        under = series.wr_under[keep, k].astype(np.float64)
        over = series.wr_over[keep, k].astype(np.float64)
        hist[:, 0] -= under
        hist[:, -1] -= over
        with np.errstate(invalid="ignore", divide="ignore"):
            tail = float((under.sum() + over.sum()) / counts.sum())
    else:
        tail = float("nan")
    sums = series.sums()
    sigma = float(np.sqrt(est.pooled_ratio(sums["sum_wr2"][keep, k], counts)))
    edges = series.wr_edges[k]
    x_edges = edges / sigma if sigma > 0 else edges.copy()
    p = est.pdf_estimate(hist, counts, x_edges)
    mom = est.binned_moments(hist.sum(axis=0), edges)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = mom[2] - mom[1] ** 2
        skew = (mom[3] - 3 * mom[1] * mom[2] + 2 * mom[1] ** 3) / var**1.5
        flat = (mom[4] - 4 * mom[1] * mom[3] + 6 * mom[1] ** 2 * mom[2] - 3 * mom[1] ** 4) / var**2
    return WrPdf(group=series.group, r_requested=float(r), r_bin=k,
                 r_lo=float(series.r_edges[k]), r_hi=float(series.r_edges[k + 1]),
                 r_eta=float(np.nanmean(series.r_over_eta()[keep, k])), rms=sigma,
                 x_edges=x_edges, x_centres=0.5 * (x_edges[1:] + x_edges[:-1]), pdf=p.value,
                 pdf_err=p.stderr, tail_fraction=tail, n_samples=int(keep.sum()),
                 skewness=float(skew), flatness=float(flat), window=window)


def read_pairs(path, group: str, separations=(), t_min: float | None = None,
               t_max: float | None = None) -> tuple[PairAverage, list[WrPdf]]:
    """Pooled averages of one group and the normalised w_r PDFs at the given separations (in
    the units of the file's r_edges)."""
    series = read_pair_group(path, group)
    return (time_average(series, t_min, t_max),
            [wr_pdf(series, r, t_min, t_max) for r in separations])


# --- one tidy table across runs and Stokes numbers ------------------------------------------------
#: columns of :class:`PairTable`, with units ('' for text)
TABLE_COLUMNS = {
    "run": "", "set_a": "", "set_b": "", "stokes_a": "1", "stokes_b": "1", "tau_p_a": "T",
    "tau_p_b": "T", "r_eta": "1", "r": "L", "g": "1", "g_err": "1", "wr_sq": "L^2 T^-2",
    "wr_sq_err": "L^2 T^-2", "wr_abs": "L T^-1", "wr_abs_err": "L T^-1", "kernel": "L^3 T^-1",
    "kernel_err": "L^3 T^-1", "kernel_norm": "1", "kernel_norm_err": "1", "pairs": "1",
    "samples": "1", "eta": "L", "tau_eta": "T", "t_start": "T", "t_end": "T", "window": "",
    "converged": "1",
    # sets given by radius and density (NaN otherwise): through the physical Kolmogorov scales
    "r_m": "m", "kernel_m3_s": "m^3 s^-1", "kernel_m3_s_err": "m^3 s^-1", "wr_abs_m_s": "m s^-1",
    "wr_abs_m_s_err": "m s^-1",
}


@dataclass
class PairTable:
    """A tidy table: one row per run, set pair and separation bin; ``columns`` maps each name
    of :data:`TABLE_COLUMNS` to a 1-D array (object arrays for text), ``units`` to its units.
    (The tables of detected collisions and of particle sets, in study.particle_readers, are
    the same kind of table with their own columns.)"""

    columns: dict
    units: dict = field(default_factory=lambda: dict(TABLE_COLUMNS))

    def __len__(self) -> int:
        return len(self.columns["run"]) if self.columns else 0

    def select(self, mask) -> "PairTable":
        return type(self)({k: v[mask] for k, v in self.columns.items()}, self.units)

    def rows(self) -> list[dict]:
        return [{k: v[i] for k, v in self.columns.items()} for i in range(len(self))]

    def write_csv(self, path):
        """CSV with a header row; floats at full precision."""
        with open(path, "w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(list(self.columns))
            for row in self.rows():
                w.writerow([repr(float(v)) if isinstance(v, (float, np.floating)) else v
                            for v in row.values()])


def pair_table(run_dirs, names=None, t_min: float | None = None) -> PairTable:
    """Every pair group of every run as one tidy table, the full curves: per run, set pair and
    separation bin, r/η, g, ⟨w_r²⟩, ⟨|w_r|⟩, the collision kernel K and K/(η² u_η), each with
    its standard error (pooled estimators with delta-method + blocking errors, over each
    group's averaging window; see :func:`time_average`), the sets' Stokes numbers and τ_p,
    the window and the mean η and τ_η over it; ``converged`` is 1 where the window's start
    was established and blocking found its plateau for g (else the errors may be too small).

        table = pair_table(["runs/a", "runs/b"])
        st1 = table.select(table.columns["stokes_a"] == 1.0)
        table.write_csv("pairs.csv")

    ``run_dirs`` are run folders (with pairs.h5; runs without one add no rows) or pairs.h5
    files; ``names`` the run labels (default: the folder names); ``t_min`` overrides every
    window.  The report's across-Stokes figures and pairs.csv are drawn from this table."""
    cols = {k: [] for k in TABLE_COLUMNS}
    run_dirs = list(run_dirs)
    names = list(names) if names is not None else [Path(d).name for d in run_dirs]
    for name, d in zip(names, run_dirs):
        path = Path(d)
        path = path / "pairs.h5" if path.is_dir() else path
        if not path.is_file():
            continue
        try:
            groups = [read_pair_group(path, g) for g in list_pair_groups(path)]
        except (OSError, RuntimeError, KeyError, ValueError, TypeError, IndexError) as exc:
            raise ConfigError(f"{path}: not a readable pairs file of eddybox ({exc})") from None
        for series in groups:
            group = series.group
            if series.n_samples == 0:
                continue
            avg = time_average(series, t_min)
            keep = avg.window.mask(series.time)
            a = series.attrs
            eta = float(np.mean(series.eta[keep])) if series.eta is not None else math.nan
            tau = float(np.mean(series.tau_eta[keep])) if series.tau_eta is not None else math.nan
            r_sim = (np.nanmean(series.r_centres[keep], axis=0) if series.r_centres is not None
                     else avg.r_centres)
            n = avg.rdf.size
            const = {"run": name, "set_a": a.get("set_a", group.split("__")[0]),
                     "set_b": a.get("set_b", group.split("__")[-1]),
                     "stokes_a": float(a.get("stokes_a", math.nan)),
                     "stokes_b": float(a.get("stokes_b", math.nan)),
                     "tau_p_a": float(a.get("tau_p_a", math.nan)),
                     "tau_p_b": float(a.get("tau_p_b", math.nan)), "samples": avg.n_samples,
                     "eta": eta, "tau_eta": tau, "t_start": avg.time_span[0],
                     "t_end": avg.time_span[1], "window": avg.window.describe()}
            per_bin = {"r_eta": avg.r_eta, "r": r_sim, "g": avg.rdf, "g_err": avg.rdf_err,
                       "wr_sq": avg.wr_sq, "wr_sq_err": avg.wr_sq_err, "wr_abs": avg.wr_abs,
                       "wr_abs_err": avg.wr_abs_err, "kernel": avg.kernel,
                       "kernel_err": avg.kernel_err, "kernel_norm": avg.kernel_norm,
                       "kernel_norm_err": avg.kernel_norm_err, "pairs": avg.counts,
                       "converged": (avg.reliable & avg.window.accepted).astype(np.int64)}
            per_bin.update(_physical_pair_columns(series, keep, avg))
            for k in TABLE_COLUMNS:
                cols[k] += [const[k]] * n if k in const else list(per_bin[k])
    out = {}
    for k, v in cols.items():
        out[k] = np.array(v, dtype=object if TABLE_COLUMNS[k] == "" else
                          (np.int64 if k in ("pairs", "samples", "converged") else np.float64))
    return PairTable(out)


def _physical_pair_columns(series: PairSeries, keep, avg: PairAverage) -> dict:
    """The physical columns of one group's rows (NaN unless the group records the physical
    Kolmogorov scales of its sets, given by radius and density): r in m, the kernel in m³/s
    from K/(η²u_η) pooled sample by sample, ⟨|w_r|⟩ in m/s from |w_r|/u_η pooled likewise
    (eddybox.particles.physical.from_kolmogorov_units)."""
    eta_p = float(series.attrs.get("physical_eta", math.nan))
    tau_p = float(series.attrs.get("physical_tau_eta", math.nan))
    n = avg.rdf.size
    if not (math.isfinite(eta_p) and math.isfinite(tau_p)) or series.eta is None:
        return {k: np.full(n, math.nan) for k in ("r_m", "kernel_m3_s", "kernel_m3_s_err",
                                                   "wr_abs_m_s", "wr_abs_m_s_err")}
    sums = series.sums()
    u_eta = (series.eta / series.tau_eta)[:, None]
    w = est.ratio_estimate(sums["sum_abs"][keep] / u_eta[keep], sums["counts"][keep])
    return {"r_m": avg.r_eta * eta_p,
            "kernel_m3_s": from_kolmogorov_units(avg.kernel_norm, 3, -1, eta_p, tau_p),
            "kernel_m3_s_err": from_kolmogorov_units(avg.kernel_norm_err, 3, -1, eta_p, tau_p),
            "wr_abs_m_s": from_kolmogorov_units(w.value, 1, -1, eta_p, tau_p),
            "wr_abs_m_s_err": from_kolmogorov_units(w.stderr, 1, -1, eta_p, tau_p)}


# --- fluid.h5 and run folders ---------------------------------------------------------------
def open_output(path):
    try:
        return h5py.File(path, "r", swmr=True)
    except OSError:
        try:
            return h5py.File(path, "r")
        except OSError as exc:
            raise ConfigError(f"{path}: not a readable HDF5 file ({exc})") from None


def check_run_dir(run_dir):
    """ConfigError naming `run_dir` unless it is a run folder (holds fluid.h5)."""
    p = Path(run_dir)
    if (p / "fluid.h5").is_file():
        return
    if p.is_file():
        hint = "; it is a file: give run folders (for a sweep: SWEEP_DIR/*/)"
    elif (p / "sweep_status.json").exists():
        hint = f"; it is a sweep folder: give its runs, e.g. {p}/*/"
    elif not p.exists():
        hint = "; no such folder"
    else:
        hint = ""
    raise ConfigError(f"{run_dir}: not an eddybox run folder (no fluid.h5){hint}")


def read_fluid_series(run_dir) -> dict:
    """Every /series/<name> of RUN_DIR/fluid.h5, cut to the samples all of them hold (a run
    still writing, or killed between two appends, leaves them one sample apart)."""
    check_run_dir(run_dir)
    path = Path(run_dir) / "fluid.h5"
    with open_output(path) as f:
        if "series" not in f or "time" not in f["series"]:
            raise ConfigError(f"{path}: has no /series/time; not a fluid.h5 written by eddybox")
        g = f["series"]
        n = min(g[k].shape[0] for k in g)
        return {k: np.asarray(g[k][:n], dtype=float) for k in g}


def read_spectra(run_dir):
    """(k, time, E(k) samples x shells) from fluid.h5, or None."""
    path = Path(run_dir) / "fluid.h5"
    if not path.exists():
        return None
    with open_output(path) as f:
        if "spectra" not in f:
            return None
        g = f["spectra"]
        n = min(g["time"].shape[0], g["energy"].shape[0])
        return np.asarray(g["k"][()]), np.asarray(g["time"][:n]), np.asarray(g["energy"][:n])


