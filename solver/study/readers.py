"""Readers of a run folder's files: ``pairs.h5`` reduced to time averages with standard errors,
the fluid series and spectra of ``fluid.h5``.

Layout read (design contract): one group per set pair, ``/pairs/<a>__<b>``, holding
``r_edges`` (nbins_r + 1), ``wr_edges`` (nbins_w + 1, or one row per sample), ``time`` (samples),
``counts``, ``rdf``, ``wr_mean``, ``wr_sq``, ``wr_abs``, ``wr_inward``, ``kernel``
(samples × nbins_r, per-sample values per bin) and ``wr_hist`` (samples × nbins_r × nbins_w).
Optional ``wr_under`` / ``wr_over`` (samples × nbins_r) give the pairs folded into the end w bins.

Error bars are standard errors of the mean over samples, std(ddof=1)/√n_samples.  This assumes
the samples are independent; samples closer together than the correlation time of the statistic
are not, and block averaging of the series (done elsewhere) refines these error bars.

Separations are in the units of the stored ``r_edges`` (see its ``units`` attribute; the run
hook may store them in Kolmogorov lengths).  A file still being written is read as far as every
dataset reaches (a run killed between two
appends leaves datasets of unequal length; the shortest one sets the number of samples).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from eddybox.particles.pairs import bin_centres
from eddybox.solver.errors import ConfigError

__all__ = [
    "PairSeries",
    "PairAverage",
    "WrPdf",
    "list_pair_groups",
    "read_pair_group",
    "time_average",
    "wr_pdf",
    "read_pairs",
]

_PER_BIN = ("counts", "rdf", "wr_mean", "wr_sq", "wr_abs", "wr_inward", "kernel")
_OPTIONAL = ("wr_under", "wr_over")


@dataclass
class PairSeries:
    """All samples of one set pair as stored (arrays with a leading sample axis)."""

    group: str
    r_edges: np.ndarray
    wr_edges: np.ndarray
    time: np.ndarray
    counts: np.ndarray
    rdf: np.ndarray
    wr_hist: np.ndarray
    wr_mean: np.ndarray
    wr_sq: np.ndarray
    wr_abs: np.ndarray
    wr_inward: np.ndarray
    kernel: np.ndarray
    wr_under: np.ndarray | None = None
    wr_over: np.ndarray | None = None
    units: dict[str, str] = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        return int(self.time.size)


@dataclass
class PairAverage:
    """Time averages per r-bin (means over samples) and their standard errors (``*_err``)."""

    group: str
    r_edges: np.ndarray
    r_centres: np.ndarray
    n_samples: int
    time_span: tuple[float, float]
    counts: np.ndarray  # total over the samples
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
    wr_rms: np.ndarray  # √(time-averaged ⟨w_r²⟩)


@dataclass
class WrPdf:
    """PDF of x = w_r / σ at one separation bin, σ = rms of w_r in that bin (time averaged).

    ``pdf`` integrates to 1 − ``tail_fraction`` over ``x_edges``: pairs outside the stored w_r
    range are left out of the end bins when the file records them (``wr_under``/``wr_over``);
    otherwise they stay folded into the end bins and ``tail_fraction`` is NaN.
    """

    group: str
    r_requested: float
    r_bin: int
    r_lo: float
    r_hi: float
    rms: float
    x_edges: np.ndarray
    x_centres: np.ndarray
    pdf: np.ndarray
    pdf_err: np.ndarray
    tail_fraction: float
    n_samples: int


def list_pair_groups(path) -> list[str]:
    """Names ``<a>__<b>`` of the groups under ``/pairs``."""
    with h5py.File(path, "r", swmr=True) as f:  # SWMR: readable even after a killed run
        return sorted(f["pairs"].keys()) if "pairs" in f else []


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
        wr_edges = np.asarray(g["wr_edges"][()])
        if wr_edges.ndim == 2:
            wr_edges = wr_edges[:n]
            if not np.all(wr_edges == wr_edges[:1]):
                raise ValueError(f"{path}: /pairs/{group}/wr_edges change between samples; "
                                 "histograms with different edges cannot be averaged")
            wr_edges = wr_edges[0]
        units = {k: str(g[k].attrs["units"]) for k in g if "units" in g[k].attrs}
        return PairSeries(group=group, r_edges=np.asarray(g["r_edges"][()]), wr_edges=wr_edges,
                          units=units, **data)


def _window(series: PairSeries, t_min, t_max) -> np.ndarray:
    t = series.time
    keep = np.ones(t.size, dtype=bool)
    if t_min is not None:
        keep &= t >= t_min
    if t_max is not None:
        keep &= t <= t_max
    if not keep.any():
        raise ValueError(f"{series.group}: no samples in the time window [{t_min}, {t_max}]")
    return keep


def _mean_and_error(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean over axis 0 ignoring NaN (empty bins), and std(ddof=1)/√n (NaN when n < 2)."""
    valid = np.isfinite(a)
    n = valid.sum(axis=0)
    with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        mean = np.nanmean(a, axis=0)
        err = np.nanstd(a, axis=0, ddof=1) / np.sqrt(n)
    err = np.where(n >= 2, err, np.nan)
    return mean, err


def time_average(series: PairSeries, t_min: float | None = None,
                 t_max: float | None = None) -> PairAverage:
    """Equal-weight means over the samples with t_min <= t <= t_max, with standard errors
    std/√n_samples (samples assumed independent; see the module docstring)."""
    keep = _window(series, t_min, t_max)
    out = {}
    for name in ("rdf", "wr_mean", "wr_sq", "wr_abs", "wr_inward", "kernel"):
        out[name], out[name + "_err"] = _mean_and_error(getattr(series, name)[keep])
    t = series.time[keep]
    return PairAverage(group=series.group, r_edges=series.r_edges,
                       r_centres=bin_centres(series.r_edges), n_samples=int(keep.sum()),
                       time_span=(float(t.min()), float(t.max())),
                       counts=series.counts[keep].sum(axis=0), wr_rms=np.sqrt(out["wr_sq"]),
                       **out)


def wr_pdf(series: PairSeries, r: float, t_min: float | None = None,
           t_max: float | None = None) -> WrPdf:
    """PDF of w_r / σ in the separation bin nearest to ``r`` (the bin whose centre, as given by
    :func:`particles.pairs.bin_centres`, is closest), σ = √⟨w_r²⟩ of that bin averaged over the
    samples.  Each sample's histogram is normalised by its pair count in the bin; the PDF is the
    mean over samples, its error std/√n_samples (samples assumed independent)."""
    keep = _window(series, t_min, t_max)
    centres = bin_centres(series.r_edges)
    k = int(np.argmin(np.abs(centres - r)))
    hist = series.wr_hist[keep, k, :].astype(np.float64)
    total = hist.sum(axis=1)
    if series.wr_under is not None and series.wr_over is not None:
        under = series.wr_under[keep, k].astype(np.float64)
        over = series.wr_over[keep, k].astype(np.float64)
        hist[:, 0] -= under
        hist[:, -1] -= over
        with np.errstate(invalid="ignore", divide="ignore"):
            tail = float((under.sum() + over.sum()) / total.sum())
    else:
        tail = float("nan")
    sigma = float(np.sqrt(_mean_and_error(series.wr_sq[keep, k])[0]))
    x_edges = series.wr_edges / sigma
    dx = np.diff(x_edges)
    with np.errstate(invalid="ignore", divide="ignore"):
        per_sample = np.where(total[:, None] > 0, hist / (total[:, None] * dx[None, :]), np.nan)
    pdf, err = _mean_and_error(per_sample)
    return WrPdf(group=series.group, r_requested=float(r), r_bin=k,
                 r_lo=float(series.r_edges[k]), r_hi=float(series.r_edges[k + 1]), rms=sigma,
                 x_edges=x_edges, x_centres=0.5 * (x_edges[1:] + x_edges[:-1]), pdf=pdf,
                 pdf_err=err, tail_fraction=tail, n_samples=int(keep.sum()))


def read_pairs(path, group: str, separations=(), t_min: float | None = None,
               t_max: float | None = None) -> tuple[PairAverage, list[WrPdf]]:
    """Time averages of one group and the normalised w_r PDFs at the given separations."""
    series = read_pair_group(path, group)
    return (time_average(series, t_min, t_max),
            [wr_pdf(series, r, t_min, t_max) for r in separations])


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


