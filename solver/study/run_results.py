"""What the report, sweep and the Python user read from one run folder: the stationary fluid
quantities with their error bars (a registry, `QUANTITIES`, filled by `@quantity` and
`@per_sample`), the spectra, the run's rows of the tidy pair table and its w_r PDFs, and the
comparison of one quantity between two runs.

    run = load_run("runs/demo")
    run.estimates["re_lambda"]          # Estimate(mean, stderr, start_time, converged, note)
    stokes_sets(run)                    # St -> (pair group, table rows)

Every number is a stationary mean with a standard error from eddybox.solver.estimators.
timeseries: MSER-5 removes the initial transient, Flyvbjerg-Petersen blocking gives the error
bar of the correlated rest. A new table quantity is a function of the fluid series returning an
`Estimate`.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import yaml

from eddybox.solver.errors import ConfigError
from eddybox.solver.estimators import significance as sig
from eddybox.solver.estimators import timeseries as analysis
from eddybox.solver.study.comparison import fluid_difference
from eddybox.solver.study.readers import read_fluid_series, read_spectra


# --- estimates -----------------------------------------------------------------------------
@dataclass(frozen=True)
class Estimate:
    """A stationary mean and its standard error (NaN when it cannot be computed)."""

    mean: float
    stderr: float
    start_time: float = math.nan
    converged: bool = False
    note: str = ""

    @classmethod
    def missing(cls, note):
        return cls(math.nan, math.nan, note=note)

    @classmethod
    def from_summary(cls, s: analysis.Summary):
        return cls(s.mean, s.stderr, s.start_time, s.converged, s.note)


def stationary(times, values) -> Estimate:
    """analysis.stationary_summary of one series, or a NaN estimate saying why not."""
    v = np.asarray(values, dtype=float)
    if v.size < 2:
        return Estimate.missing("fewer than 2 samples")
    if not np.all(np.isfinite(v)):
        return Estimate.missing("the series has non-finite values")
    try:
        return Estimate.from_summary(analysis.stationary_summary(times, v))
    except ValueError as exc:
        return Estimate.missing(str(exc))


# --- the table quantities ------------------------------------------------------------------
@dataclass(frozen=True)
class Quantity:
    key: str
    label: str
    units: str
    definition: str
    estimate: Callable[[dict], Estimate]
    #: per-sample values whose stationary mean is the estimate (what a paired comparison of two
    #: runs differences sample by sample); None for a quantity that is not such a mean
    samples: Callable[[dict], np.ndarray] | None = None


QUANTITIES: dict[str, Quantity] = {}


def quantity(key, label, units, definition):
    """Register `func(series) -> Estimate` as a table quantity."""

    def register(func):
        QUANTITIES[key] = Quantity(key, label, units, definition, func)
        return func

    return register


def per_sample(key, label, units, definition):
    """Register `func(series) -> per-sample values` as a table quantity: their stationary mean."""

    def register(func):
        QUANTITIES[key] = Quantity(key, label, units, definition,
                                   lambda s: stationary(s["time"], func(s)), func)
        return func

    return register


def _mean_of(name):
    return lambda s: stationary(s["time"], s[name])


def _series_of(name):
    return lambda s: s[name]


def _stored(rows):
    """Register quantities stored per sample in fluid.h5 (key, label, units, definition)."""
    for key, label, units, definition in rows:
        QUANTITIES[key] = Quantity(key, label, units, definition, _mean_of(key), _series_of(key))


_stored([
        ("energy", "E", "L² T⁻²", "kinetic energy <u·u>/2 (fluid.h5 energy)"),
        ("dissipation", "ε", "L² T⁻³", "dissipation 2ν Σ k² E(k) (fluid.h5 dissipation)"),
        ("u_rms", "u′", "L T⁻¹", "r.m.s. velocity √(2E/3) (fluid.h5 u_rms)"),
        ("integral_scale", "L", "L", "integral scale π/(2u′²) ∫E(k)/k dk (fluid.h5 integral_scale)")])


@per_sample("eddy_time", "T<sub>E</sub> = L/u′", "T",
            "large-eddy turnover time, the stationary mean of L/u′ taken sample by sample")
def _eddy_time(s):
    with np.errstate(divide="ignore", invalid="ignore"):
        return s["integral_scale"] / s["u_rms"]


_stored([
        ("taylor_scale", "λ", "L", "Taylor microscale √(15ν u′²/ε) (fluid.h5 taylor_scale)"),
        ("re_lambda", "Re<sub>λ</sub>", "1", "Taylor-scale Reynolds number u′λ/ν (fluid.h5 re_lambda)"),
        ("eta", "η", "L", "Kolmogorov length (ν³/ε)^(1/4) (fluid.h5 eta)"),
        ("kmax_eta", "k<sub>max</sub>η", "1", "resolution: largest dealiased wavenumber times η"),
        ("skewness", "S", "1", "longitudinal velocity-derivative skewness, mean over x, y, z")])


@per_sample("isotropy", "max/min E<sub>i</sub>", "1",
            "isotropy: max(E_x, E_y, E_z)/min(E_x, E_y, E_z) per sample, then the stationary "
            "mean (1 for an isotropic field)")
def _isotropy(s):
    comp = np.stack([s["energy_x"], s["energy_y"], s["energy_z"]])
    with np.errstate(divide="ignore", invalid="ignore"):
        return comp.max(axis=0) / comp.min(axis=0)


@quantity("injection_cv", "σ<sub>P</sub>/⟨P⟩", "1",
          "fluctuation of the injected power P: its standard deviation over the stationary "
          "window divided by its mean")
def injection_fluctuation(s) -> Estimate:
    """Coefficient of variation c = σ/m of the injection P over its stationary window.

    The window is the MSER-5 truncation of P (White 1997, Simulation 69:323; White, Cobb &
    Spratt 2000) on the uniform grid of analysis.uniform_samples; m is the window mean and
    σ² = <(P - m)²> (ddof 0). Standard errors of m and of σ² are Flyvbjerg & Petersen (1989,
    J. Chem. Phys. 91:461) blocking errors of the means of P and of (P - m)², combined by
    first-order error propagation (the delta method; e.g. Bevington & Robinson 2003, Data
    Reduction and Error Analysis, ch. 3), neglecting their covariance:

        dc = c sqrt( (d(σ²) / (2σ²))² + (dm / m)² ).
    """
    t, p = s["time"], s["injection"]
    base = stationary(t, p)
    if not math.isfinite(base.mean):
        return base
    _, pu, _ = analysis.uniform_samples(t, p)
    summ = analysis.stationary_summary(t, p)
    w = pu[summ.start_index:]
    m = float(w.mean())
    dev2 = (w - m) ** 2
    var = float(dev2.mean())
    if m == 0.0:
        return Estimate.missing("no power injected (mean injection is 0)")
    cv = math.sqrt(var) / abs(m)
    if var == 0.0:
        return Estimate(0.0, 0.0, summ.start_time, summ.converged, summ.note)
    dvar = float(analysis.block_average(dev2).stderr)
    err = cv * math.hypot(dvar / (2.0 * var), summ.stderr / m)
    return Estimate(cv, err, summ.start_time, summ.converged, summ.note)


# --- reading runs --------------------------------------------------------------------------
def fluid_estimates(series: dict, keys=None, t_min: float = -math.inf) -> dict:
    """{key: Estimate} for the registered quantities (all, or `keys`), over the samples at
    t >= ``t_min`` (see :func:`measured_from`)."""
    if t_min > -math.inf and series["time"].size:
        keep = series["time"] >= t_min
        series = {k: v[keep] for k, v in series.items()}
    return {k: QUANTITIES[k].estimate(series) for k in (keys or QUANTITIES)}


def measured_from(config: dict) -> float:
    """Where a run's measured part may start: after the calibration window of its forcing
    (derived.forcing_calibration.window_end, when the run calibrated one), else -inf. During the
    window the forcing changes, so its samples belong to no stationary state of the final
    forcing, whatever MSER-5 makes of them."""
    cal = ((config or {}).get("derived") or {}).get("forcing_calibration") or {}
    end = cal.get("window_end")
    return float(end) if isinstance(end, (int, float)) and math.isfinite(end) else -math.inf


def compare_quantity(key, series_a, est_a, series_b, est_b, paired: bool):
    """Run b − run a of a table quantity (comparison.fluid_difference on its per-sample values
    from each stationary window; paired for correlated runs), or None when either is missing.
    A quantity that is no mean of samples (a fluctuation level) is compared on the table's
    error bars with MIN_BATCHES − 1 degrees of freedom, the fewest a mean_error has."""
    if est_a is None or est_b is None or not (math.isfinite(est_a.mean) and math.isfinite(est_b.mean)):
        return None
    q = QUANTITIES[key]
    if q.samples is None:
        few = sig.MIN_BATCHES - 1
        return sig.independent_difference(
            sig.MeanError(est_a.mean, est_a.stderr, few, 0, reliable=est_a.converged),
            sig.MeanError(est_b.mean, est_b.stderr, few, 0, reliable=est_b.converged),
            "not a mean of samples: compared on its error bars as independent")
    with np.errstate(divide="ignore", invalid="ignore"):
        return fluid_difference(series_a["time"], q.samples(series_a), est_a.start_time,
                                series_b["time"], q.samples(series_b), est_b.start_time, paired)


def mean_spectrum(spectra, t_start):
    """Equal-weight mean of the spectra at t >= t_start (the last one if none is that late)."""
    k, t, e = spectra
    if t.size == 0:
        return None
    keep = t >= t_start if math.isfinite(t_start) else np.ones(t.size, bool)
    if not keep.any():
        keep = t == t[-1]
    return k, e[keep].mean(axis=0), int(keep.sum())


#: the w_r PDFs of the report: at 2 eta, and at the largest separation (as near L/2 as stored)
PDF_SEPARATIONS_ETA = (2.0,)


def read_pdfs(run_dir, length) -> dict:
    """group -> [WrPdf at 2 eta, WrPdf in the largest bin (nearest to L/2)] of RUN_DIR/pairs.h5,
    pooled over each group's averaging window (readers.wr_pdf)."""
    from eddybox.solver.study.readers import list_pair_groups, read_pair_group, wr_pdf

    path = Path(run_dir) / "pairs.h5"
    if not path.exists():
        return {}
    out = {}
    for group in list_pair_groups(path):
        series = read_pair_group(path, group)
        if series.n_samples == 0:
            continue
        eta = float(np.mean(series.eta)) if series.eta is not None else math.nan
        targets = [*PDF_SEPARATIONS_ETA, 0.5 * length / eta if eta > 0 else 1e300]
        try:
            pdfs = [wr_pdf(series, r, r_in_eta=True) for r in targets]
        except ValueError:
            continue
        if pdfs[0].r_bin == pdfs[-1].r_bin:
            pdfs = pdfs[:1]
        out[group] = pdfs
    return out


@dataclass
class Run:
    name: str
    path: Path
    config: dict
    series: dict
    estimates: dict
    spectra: object
    pairs: object  # readers.PairTable: this run's rows of the tidy pair table
    pdfs: dict  # group -> [readers.WrPdf]


def load_run(run_dir, name=None, table=None) -> Run:
    """A run folder's fluid estimates, spectra, pair table rows (from ``table``, the tidy table
    of readers.pair_table, or read here) and w_r PDFs."""
    from eddybox.solver.study.readers import pair_table

    series = read_fluid_series(run_dir)
    path = Path(run_dir)
    name = name or path.name
    try:
        config = yaml.safe_load((path / "config.yaml").read_text()) or {}
    except (OSError, yaml.YAMLError):
        config = {}
    est = fluid_estimates(series, t_min=measured_from(config))
    if table is None:
        table = pair_table([path], [name])
    rows = table.select(table.columns["run"] == name) if len(table) else table
    length = float(config.get("grid", {}).get("length", 2 * math.pi))
    try:
        pdfs = read_pdfs(path, length)
    except (OSError, RuntimeError, KeyError, ValueError, TypeError, IndexError) as exc:
        raise ConfigError(f"{path / 'pairs.h5'}: not a readable pairs file of eddybox ({exc})") from None
    return Run(name, path, config, series, est, read_spectra(path), rows, pdfs)


def pair_groups(run: Run) -> list[str]:
    """The set pairs of a run's table, in file order."""
    t = run.pairs
    if not len(t):
        return []
    names = [f"{a}__{b}" for a, b in zip(t.columns["set_a"], t.columns["set_b"])]
    return list(dict.fromkeys(names))


def group_rows(run: Run, group: str):
    """The table rows of one set pair (a PairTable), or None."""
    t = run.pairs
    if not len(t):
        return None
    a, b = group.split("__", 1)
    mask = (t.columns["set_a"] == a) & (t.columns["set_b"] == b)
    return t.select(mask) if mask.any() else None


def same_set_groups(run):
    """(group, St, rows) of the single-set groups, by Stokes number."""
    out = []
    for g in pair_groups(run):
        rows = group_rows(run, g)
        a, b = g.split("__", 1)
        if a == b:
            out.append((g, float(rows.columns["stokes_a"][0]), rows))
    return sorted(out, key=lambda x: (math.isnan(x[1]), x[1]))


def pair_series(run, group, cache):
    """The stored samples of one set pair of a run (readers.read_pair_group), read once."""
    from eddybox.solver.study.readers import read_pair_group

    key = (str(run.path), group)
    if cache is None or key not in cache:
        path = run.path / "pairs.h5"
        series = read_pair_group(path, group) if group in pair_groups(run) else None
        if cache is None:
            return series
        cache[key] = series
    return cache[key]


def stokes_sets(run) -> dict:
    """Stokes number -> (group, table rows) of a run's single-set groups (tracers at 0)."""
    return {round(st, 9): (g, rows) for g, st, rows in same_set_groups(run) if math.isfinite(st)}


def at_separation(rows, r_eta: float, column: str):
    """(value, error, r/η of the bin) of ``column`` in the bin nearest to r_eta (in log r)."""
    t = rows.columns
    k = int(np.nanargmin(np.abs(np.log(t["r_eta"]) - math.log(r_eta))))
    return float(t[column][k]), float(t[column + "_err"][k]), float(t["r_eta"][k])
