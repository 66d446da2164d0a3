"""The report's forcing decision: every run against the reference (the first run), per Stokes
number. The effect figure answers "where does the forcing choice matter?": the relative
difference of g and of the normalised kernel at one separation against St, with error bars and
a multiple-comparison correction over the whole figure (study.comparison); one figure per
Stokes number puts g(r/η) and the w_r PDFs of every run side by side.

    parts = decision_section(runs, out_dir, separation=1.0, correction="holm")
"""
from __future__ import annotations

import csv
import html
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from eddybox.solver.estimators.significance import SIGNIFICANCE_LEVEL
from eddybox.solver.study.comparison import NOT_CONVERGED, correlated, flag_family, ratio_difference
from eddybox.solver.study.report_parts import COLOURS, draw_pdf, figure, gaussian, html_name, log_axis, pdf_label
from eddybox.solver.study.run_results import pair_series, stokes_sets

#: what the effect figure compares, with its label: pooled ratios of estimators.pairs.RATIOS
EFFECT_RATIOS = (("rdf", "g"), ("kernel_norm", "K / (η² u$_η$)"))


@dataclass(frozen=True)
class Effect:
    """One point of the effect figure: run − reference of one ratio at one Stokes number."""

    run: int
    stokes: float
    group: str
    ratio: str
    r_eta_reference: float
    r_eta_run: float
    flagged: object  # comparison.Flagged


def forcing_effects(runs, separation: float, correction: str, series_cache=None) -> list[Effect]:
    """Every run against the first (the reference) at every Stokes number both have, for g and
    K/(η² u_η) in the bin nearest to ``separation`` η: the differences of comparison.
    ratio_difference (paired for runs sharing the reference's seed), corrected as one family."""
    ref_sets = stokes_sets(runs[0])
    found = []
    for i, run in enumerate(runs[1:], start=1):
        paired = correlated(runs[0].config, run.config)
        for st, (group, _) in stokes_sets(run).items():
            if st not in ref_sets:
                continue
            a = pair_series(runs[0], ref_sets[st][0], series_cache)
            b = pair_series(run, group, series_cache)
            for ratio, _ in EFFECT_RATIOS:
                d, r_a, r_b = ratio_difference(a, b, ratio, separation, paired)
                found.append((i, st, group, ratio, r_a, r_b, d))
    flagged = flag_family([x[-1] for x in found], correction)
    return [Effect(*x[:-1], f) for x, f in zip(found, flagged)]


def plot_forcing_effect(runs, effects, path, separation: float) -> bool:
    """Where does the forcing choice matter: (run − reference)/|reference| of g and of
    K/(η² u_η) at r ≈ ``separation`` η against St, one colour per run, ± one standard error;
    filled markers: significant after the correction, open: not; faded: not converged."""
    from matplotlib.ticker import FuncFormatter

    if not effects:
        return False
    fig = figure(13, 5.2)
    axes = fig.subplots(1, len(EFFECT_RATIOS), sharex=True)
    sts = sorted({e.stokes for e in effects})
    lo = min([s for s in sts if s > 0] or [1.0])
    hi = max(sts + [lo])
    for ax, (ratio, label) in zip(axes, EFFECT_RATIOS):
        for i, run in enumerate(runs[1:], start=1):
            pts = sorted((e for e in effects if e.run == i and e.ratio == ratio), key=lambda e: e.stokes)
            if not pts:
                continue
            c = COLOURS[i % len(COLOURS)]
            d = [e.flagged.difference for e in pts]
            # runs side by side around each St (a few per cent in St, a sliver at St = 0)
            shift = (i - 0.5 * len(runs)) * 0.03
            x = np.array([e.stokes * (1 + shift) if e.stokes > 0 else shift * lo for e in pts])
            y = np.array([100 * v.relative for v in d])
            err = np.array([100 * v.relative_err for v in d])
            ax.plot(x, y, "-", color=c, lw=1, alpha=0.6, label=run.name)
            for xe, ye, ee, e, v in zip(x, y, err, pts, d):
                alpha = 1.0 if v.converged else 0.35
                ax.errorbar([xe], [ye], yerr=[ee if math.isfinite(ee) else 0.0], color=c,
                            marker="o", ms=6, capsize=3, alpha=alpha,
                            mfc=c if e.flagged.significant else "white")
        r_used = sorted({round(e.r_eta_reference, 3) for e in effects if e.ratio == ratio})
        ax.axhline(0.0, color="k", lw=0.8)
        ax.set_xscale("symlog", linthresh=0.5 * lo)
        ax.set(xlabel="St (tracers at 0)", ylabel=f"relative difference of {label}  [%]",
               xlim=(-0.1 * lo, 2.0 * hi),
               title=f"{label} at r ≈ {', '.join(f'{r:.3g}' for r in r_used)} η: run − "
                     f"{runs[0].name}")
        ax.set_xticks(sts)
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax.grid(alpha=0.3, which="both")
    from matplotlib.lines import Line2D

    handles, labels = axes[0].get_legend_handles_labels()
    handles += [Line2D([], [], color="grey", marker="o", ls="", mfc="grey"),
                Line2D([], [], color="grey", marker="o", ls="", mfc="white")]
    labels += ["significant (corrected)", "not significant"]
    fig.legend(handles, labels, loc="outside lower center", fontsize=8, frameon=False,
               ncol=max(1, min(4, len(labels))))
    fig.savefig(path)
    return True


def plot_stokes_decision(runs, stokes: float, path, series_cache=None) -> bool:
    """One Stokes number across runs: g(r/η) of every run with ± one standard error bands, and
    the PDFs of w_r/σ at 2η and at the largest separation (nearest L/2) of every run with a unit
    Gaussian."""
    fig = figure(14, 4.9)
    ax_g, ax_p1, ax_p2 = fig.subplots(1, 3)
    drawn = False
    for i, run in enumerate(runs):
        entry = stokes_sets(run).get(stokes)
        if entry is None:
            continue
        group, rows = entry
        drawn = True
        c = COLOURS[i % len(COLOURS)]
        t = rows.columns
        ok = np.isfinite(t["g"])
        ax_g.plot(t["r_eta"][ok], t["g"][ok], "-o", ms=3, color=c, label=run.name)
        err = np.where(np.isfinite(t["g_err"][ok]), t["g_err"][ok], 0.0)
        ax_g.fill_between(t["r_eta"][ok], t["g"][ok] - err, t["g"][ok] + err, color=c,
                          alpha=0.25, lw=0)
        pdfs = run.pdfs.get(group, [])
        for ax, pdf in zip((ax_p1, ax_p2), (pdfs[:1] + pdfs[-1:]) if len(pdfs) > 1 else pdfs):
            draw_pdf(ax, pdf, c, label=f"{run.name}, {pdf_label(pdf)}, F = {pdf.flatness:.2f}")
    if not drawn:
        return False
    ax_g.set(xscale="log", xlabel="r / η", ylabel="g(r)",
             title=f"St = {stokes:g}: radial distribution function (band: ± standard error)")
    ax_g.axhline(1.0, color="k", lw=0.8, ls=":")
    log_axis(ax_g.xaxis)
    eta = runs[0].estimates["eta"].mean
    half = 0.5 * float((runs[0].config.get("grid") or {}).get("length", 2 * math.pi)) / eta
    for ax, where in ((ax_p1, "2 η"), (ax_p2, f"the largest r (L/2 = {half:.3g} η)")):
        gaussian(ax)
        ax.set(yscale="log", xlabel="w$_r$ / σ$_r$", ylabel="PDF", xlim=(-8, 8), ylim=(1e-5, 2),
               title=f"St = {stokes:g}: PDF of w$_r$ at {where}")
        ax.legend(fontsize=7, loc="lower center")
    for ax in (ax_g, ax_p1, ax_p2):
        ax.grid(alpha=0.3, which="both")
    ax_g.legend(fontsize=8)
    fig.savefig(path)
    return True


def write_effects_csv(runs, effects, path):
    """forcing_effect.csv: one row per run, Stokes number and ratio of the effect figure."""
    cols = ["run", "reference", "set", "stokes", "quantity", "r_eta_reference", "r_eta_run",
            "reference_value", "reference_stderr", "difference", "stderr", "dof", "p_value",
            "p_adjusted", "significant", "relative", "relative_stderr", "paired", "converged", "note"]
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(cols)
        for e in effects:
            d = e.flagged.difference
            w.writerow([runs[e.run].name, runs[0].name, e.group.split("__")[0], repr(e.stokes),
                        e.ratio, repr(e.r_eta_reference), repr(e.r_eta_run), repr(d.reference),
                        repr(d.reference_err), repr(d.diff), repr(d.stderr), repr(float(d.dof)),
                        repr(d.p_value), repr(e.flagged.p_adjusted), int(e.flagged.significant),
                        repr(d.relative), repr(d.relative_err), int(d.paired), int(d.converged),
                        d.note])


def decision_section(runs, out: Path, separation: float, correction: str, series_cache=None) -> list[str]:
    """The HTML of the section 'Forcing decision' (its figures and forcing_effect.csv written
    to ``out``); [] when fewer than two runs have pair statistics."""
    if len(runs) < 2 or not stokes_sets(runs[0]):
        return []
    effects = forcing_effects(runs, separation, correction, series_cache)
    parts = [f"<h2>Forcing decision: every run against {html_name(runs[0].name)}</h2>"]
    if plot_forcing_effect(runs, effects, out / "forcing_effect.png", separation):
        write_effects_csv(runs, effects, out / "forcing_effect.csv")
        n_sig = sum(e.flagged.significant for e in effects)
        parts += [f'<p class="legend">Where does the forcing choice matter? (run − reference)/'
                  f"|reference| of g and of K/(η² u<sub>η</sub>) in the separation bin nearest to "
                  f"r = {separation:g} η, against the Stokes number; bars: ± one standard error. "
                  f"Filled markers: the t test rejects equality at {SIGNIFICANCE_LEVEL:g} after "
                  f"the {html.escape(correction)} correction over all {len(effects)} points of "
                  f"the figure ({n_sig} flagged); open: not; faded: not converged "
                  f"({NOT_CONVERGED}, never flagged). Table: "
                  "<a href=\"forcing_effect.csv\">forcing_effect.csv</a>."
                  "</p>", '<img src="forcing_effect.png" alt="relative difference of g and of the '
                  'collision kernel from the reference against the Stokes number">']
    for st in sorted(stokes_sets(runs[0])):
        name = f"decision_st{st:g}.png"
        if plot_stokes_decision(runs, st, out / name, series_cache):
            parts += [f"<h3>St = {st:g}</h3>", f'<img src="{html.escape(name)}" alt="g(r) and w_r '
                      f'PDFs of every run at St = {st:g}">']
    return parts
