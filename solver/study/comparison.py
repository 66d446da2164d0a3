"""How two runs are compared: the difference of a stationary mean between a run and a reference,
with a t test that knows whether the runs are correlated, and one family of such tests corrected
for multiple comparisons.  Used by `eddybox sweep`'s summary and by `eddybox report`.

Runs that share a seed start from the same field with the same particles and (for OU) draw the
same forcing numbers, so their samples are correlated: they are compared through the difference
series on a common time grid from the later of their two window starts (a paired test).  Runs
with different seeds are independent: each mean keeps its own stationary window (Welch's test).
The estimators are those of :mod:`eddybox.solver.estimators.significance`.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np

from eddybox.solver.estimators import significance as sig
from eddybox.solver.estimators.pairs import RATIOS, linearised_ratio
from eddybox.solver.estimators.timeseries import mser_truncation, uniform_samples
from eddybox.solver.study.readers import PairSeries, averaging_window, nearest_bin

__all__ = ["NOT_CONVERGED", "correlated", "stationary_mean", "matched_samples",
           "fluid_difference", "ratio_difference", "flag_family", "Flagged"]

#: the one mark of a value whose error bar is not established (series too short), in the
#: sweep's summary, the report's tables and its CSV notes
NOT_CONVERGED = "†"


def correlated(config_a: dict, config_b: dict) -> bool:
    """True when two runs' samples are correlated: the same seed (same initial field, particles
    and forcing random numbers), or the same initial-field file."""
    seed_a, seed_b = (config_a or {}).get("seed"), (config_b or {}).get("seed")
    if seed_a is not None and seed_a == seed_b:
        return True
    init_a = ((config_a or {}).get("fluid") or {}).get("initial") or {}
    init_b = ((config_b or {}).get("fluid") or {}).get("initial") or {}
    path = init_a.get("path")
    return init_a.get("kind") == "file" and path is not None and path == init_b.get("path")


def stationary_mean(times, values) -> tuple[sig.MeanError, float]:
    """(mean with its t-test error, window start) of a sampled series: the MSER-5 start on the
    uniform grid (timeseries.mser_truncation; White 1997, White, Cobb & Spratt 2000), then
    significance.mean_error; unreliable when the transient is not over within the first half."""
    t, x, _ = uniform_samples(times, values)
    if x.size < 20 or not np.all(np.isfinite(x)):
        return sig.MeanError(math.nan, math.nan, math.nan, x.size, reliable=False,
                             note="fewer than 20 finite samples"), math.nan
    cut = mser_truncation(x)
    start = cut.index if cut.accepted else x.size // 2  # as timeseries.stationary_summary
    err = sig.mean_error(x[start:])
    if not cut.accepted:
        err = dataclasses.replace(err, reliable=False, note="; ".join(filter(None, [
            "transient not over within the first half of the series", err.note])))
    return err, float(t[start])


def _window(times, values, start):
    t, v, _ = uniform_samples(times, values)
    keep = t >= start - 1e-12 * max(1.0, abs(start))
    return t[keep], v[keep]


def fluid_difference(times_a, values_a, start_a, times_b, values_b, start_b,
                     paired: bool) -> sig.Difference:
    """b − a of the stationary means of two per-sample series (each from its window start on;
    paired: on the common grid from the later start, see the module docstring)."""
    ok_a, ok_b = np.isfinite(values_a), np.isfinite(values_b)
    if not (ok_a.all() and ok_b.all()) or not (math.isfinite(start_a) and math.isfinite(start_b)):
        return _missing("no stationary window (non-finite samples or no window)")
    if paired:
        t, a, b = sig.common_grid(*_window(times_a, values_a, start_a),
                                  *_window(times_b, values_b, start_b),
                                  start=max(start_a, start_b))
        if t.size >= 2 * sig.MIN_BATCHES:
            err = sig.mean_error(b - a)
            return sig.paired_difference(float(b.mean() - a.mean()), err, sig.mean_error(a))
        note = "too short a common window to pair the samples; compared as independent"
    else:
        note = ""
    return sig.independent_difference(sig.mean_error(_window(times_a, values_a, start_a)[1]),
                                      sig.mean_error(_window(times_b, values_b, start_b)[1]), note)


def _missing(note) -> sig.Difference:
    nan = math.nan
    return sig.Difference(nan, nan, nan, nan, nan, nan, False, False, note)


def _linearised(num, den):
    """(R, z) of one bin's sample series: estimators.pairs.linearised_ratio, R as a float."""
    r, z = linearised_ratio(num, den)
    return float(r), z


def _ratio_error(num, den) -> sig.MeanError:
    r, z = _linearised(num, den)
    if not math.isfinite(r):
        return sig.MeanError(math.nan, math.nan, math.nan, num.size, reliable=False,
                             note="no pairs expected in the bin")
    return dataclasses.replace(sig.mean_error(z), mean=r)


def matched_samples(t_a, t_b, tolerance: float = 0.25):
    """(indices into a, indices into b) of the samples taken at the same scheduled times: each
    sample of a with the nearest of b, kept when they are closer than ``tolerance`` times the
    sampling interval (samples land on the first step at or after their time, so runs with
    different time steps take them a fraction of a step apart)."""
    t_a, t_b = np.asarray(t_a, float), np.asarray(t_b, float)
    if t_a.size < 2 or t_b.size < 2:
        return np.zeros(0, int), np.zeros(0, int)
    h = min(float(np.median(np.diff(t_a))), float(np.median(np.diff(t_b))))
    j = np.clip(np.searchsorted(t_b, t_a), 1, t_b.size - 1)
    nearest = np.where(np.abs(t_b[j - 1] - t_a) <= np.abs(t_b[j] - t_a), j - 1, j)
    ok = np.abs(t_b[nearest] - t_a) < tolerance * h
    ia, ib = np.nonzero(ok)[0], nearest[ok]
    first = np.unique(ib, return_index=True)[1]  # one partner each
    return ia[first], ib[first]


def ratio_difference(series_a: PairSeries, series_b: PairSeries, ratio: str, r_eta: float,
                     paired: bool) -> tuple[sig.Difference, float, float]:
    """(b − a of a pooled pair ratio of :data:`estimators.pairs.RATIOS` ('rdf', 'kernel_norm',
    ...) in the separation bin nearest to ``r_eta`` η, r/η of a's bin, r/η of b's bin), each over
    its averaging window (paired: the samples at the same times in both windows)."""
    num_key, den_key = RATIOS[ratio]
    picked = []
    for s in (series_a, series_b):
        k = nearest_bin(s, r_eta, True)
        sums = s.sums()
        keep = averaging_window(s).mask(s.time)
        r_here = float(np.nanmean(s.r_over_eta()[keep, k])) if keep.any() else math.nan
        picked.append((s.time, sums[num_key][:, k], sums[den_key][:, k], keep, r_here))
    (t_a, y_a, x_a, keep_a, r_a), (t_b, y_b, x_b, keep_b, r_b) = picked
    if not (keep_a.any() and keep_b.any()):
        return _missing("no samples in an averaging window"), r_a, r_b
    note = "" if abs(math.log(r_b / r_a)) < 0.05 else (
        f"separation bins differ: {r_a:.3g} and {r_b:.3g} η")
    if paired:
        ia, ib = matched_samples(t_a[keep_a], t_b[keep_b])
        if ia.size >= 2 * sig.MIN_BATCHES:
            ya, xa = y_a[keep_a][ia], x_a[keep_a][ia]
            yb, xb = y_b[keep_b][ib], x_b[keep_b][ib]
            ra, za = _linearised(ya, xa)
            rb, zb = _linearised(yb, xb)
            if math.isfinite(ra) and math.isfinite(rb):
                ref = dataclasses.replace(sig.mean_error(za), mean=ra)
                return sig.paired_difference(rb - ra, sig.mean_error(zb - za), ref, note), r_a, r_b
        note = "; ".join(filter(None, [note, "too few common samples to pair; compared as "
                                       "independent"]))
    return (sig.independent_difference(_ratio_error(y_a[keep_a], x_a[keep_a]),
                                       _ratio_error(y_b[keep_b], x_b[keep_b]), note), r_a, r_b)


@dataclasses.dataclass(frozen=True)
class Flagged:
    """A difference with its adjusted p-value in its family and whether it is flagged."""

    difference: sig.Difference
    p_adjusted: float
    significant: bool


def flag_family(differences, method: str = "holm",
                level: float = sig.SIGNIFICANCE_LEVEL) -> list[Flagged]:
    """Correct one family of comparisons (significance.CORRECTIONS) and flag those whose
    adjusted p-value is at or below ``level`` and whose error bar is established (a
    not-converged difference counts towards the family but is never flagged: its error bar is
    likely too small); a comparison without a p-value is never flagged and does not count."""
    diffs = list(differences)
    adj = sig.adjust([d.p_value for d in diffs], method)
    return [Flagged(d, float(p), bool(np.isfinite(p) and p <= level and d.converged))
            for d, p in zip(diffs, adj)]
