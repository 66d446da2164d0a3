"""`eddybox report`: runs side by side as one self-contained HTML page with PNG figures and a
CSV table.

    write_report(["runs/a", "runs/b"], "runs/compare")
        -> index.html, timeseries.png, spectra.png, pairs_<a>__<b>.png, summary.csv (and, when
           the runs recorded them, collisions.png/.csv, lagrangian.png, sets.csv, the forcing
           decision's forcing_effect.png/.csv and decision_st*.png)

The numbers come from study.run_results (stationary means with blocking error bars); this
module draws the fluid and pair figures and assembles the page. The forcing decision is
study.report_decision, the particle sections beyond pairs study.report_particles.
"""
from __future__ import annotations

import csv
import datetime
import html
import math
import os
from pathlib import Path

import numpy as np
import yaml

from eddybox.solver import __version__
from eddybox.solver.errors import ConfigError
from eddybox.solver.estimators import significance as sig
from eddybox.solver.estimators.significance import SIGNIFICANCE_LEVEL
from eddybox.solver.run.run_folder import REPORT_MARKER
from eddybox.solver.study.comparison import NOT_CONVERGED, correlated, flag_family, ratio_difference
from eddybox.solver.study.readers import check_run_dir
from eddybox.solver.study.report_decision import decision_section
from eddybox.solver.study.report_particles import particle_sections
from eddybox.solver.study.report_parts import (
    COLOURS,
    draw_pdf,
    figure,
    gaussian,
    html_name,
    log_axis,
    pdf_label,
    st_colour,
)
from eddybox.solver.study.run_results import (
    QUANTITIES,
    Estimate,
    at_separation,
    compare_quantity,
    group_rows,
    load_run,
    mean_spectrum,
    pair_groups,
    pair_series,
    same_set_groups,
)

KOLMOGOROV_C = 1.5  # E(k) = C eps^(2/3) k^(-5/3) in the inertial range; Pope (2000) §6.5 (from memory)


def _run_names(dirs):
    names = [Path(d).resolve().name for d in dirs]
    for i, n in enumerate(names):
        if names.count(n) > 1:
            p = Path(dirs[i]).resolve()
            names[i] = f"{p.parent.name}/{p.name}"
    seen = {}
    for i, n in enumerate(names):
        seen[n] = seen.get(n, 0) + 1
        if seen[n] > 1:
            names[i] = f"{n}#{seen[n]}"
    return names


# --- figures -------------------------------------------------------------------------------
def plot_timeseries(runs, path):
    panels = [("energy", "E  [L² T⁻²]"), ("dissipation", "ε  [L² T⁻³]"),
              ("re_lambda", "Re$_\\lambda$")]
    fig = figure(11, 8.2)
    axes = fig.subplots(len(panels), 1, sharex=True)
    for ax, (key, label) in zip(axes, panels):
        for i, run in enumerate(runs):
            c = COLOURS[i % len(COLOURS)]
            t, v = run.series["time"], run.series[key]
            ok = np.isfinite(v)
            ax.plot(t[ok], v[ok], color=c, lw=1.2, label=run.name)
            e = run.estimates[key]
            if math.isfinite(e.mean) and t.size:
                t0, t1 = e.start_time, t[-1]
                ax.axvline(t0, color=c, ls=":", lw=1)
                ax.fill_between([t0, t1], e.mean - e.stderr, e.mean + e.stderr, color=c,
                                alpha=0.25, lw=0)
                ax.plot([t0, t1], [e.mean, e.mean], color=c, lw=2.5, alpha=0.6)
        ax.set_ylabel(label)
        ax.grid(alpha=0.3)
    axes[0].legend(loc="lower left", bbox_to_anchor=(0.0, 1.02), fontsize=8, frameon=False,
                   ncol=max(1, min(len(runs), 3 if max(len(r.name) for r in runs) < 40 else 2)))
    axes[-1].set_xlabel("t  [T]")
    fig.savefig(path)


def plot_spectra(runs, path):
    fig = figure(8, 4.8)
    ax = fig.subplots()
    drawn = False
    for i, run in enumerate(runs):
        if run.spectra is None:
            continue
        eps, eta = run.estimates["dissipation"].mean, run.estimates["eta"].mean
        start = max(run.estimates["energy"].start_time, run.estimates["dissipation"].start_time)
        avg = mean_spectrum(run.spectra, start)
        if avg is None or not (eps > 0 and math.isfinite(eta)):
            continue
        k, e, n = avg
        sel = k > 0
        comp = eps ** (-2.0 / 3.0) * k[sel] ** (5.0 / 3.0) * e[sel]
        ax.plot(k[sel] * eta, comp, "-o", ms=3, color=COLOURS[i % len(COLOURS)],
                label=f"{run.name} ({n} spectra)")
        drawn = True
    ax.axhline(KOLMOGOROV_C, color="k", ls="--", lw=1, label=f"C = {KOLMOGOROV_C} (Pope 2000)")
    ax.set_xscale("log")
    log_axis(ax.xaxis)
    ax.set_xlabel("k η")
    ax.set_ylabel("ε$^{-2/3}$ k$^{5/3}$ E(k)")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8)
    if drawn:
        fig.savefig(path)
    return drawn


def plot_pairs(runs, group, path):
    """One set pair across runs: g(r/η), the w_r PDFs at 2η and at the largest separation,
    and the collision kernel, each with its error bars."""
    fig = figure(13, 4.9)
    ax_g, ax_p, ax_k = fig.subplots(1, 3)
    for i, run in enumerate(runs):
        rows = group_rows(run, group)
        if rows is None:
            continue
        c = COLOURS[i % len(COLOURS)]
        t = rows.columns
        ax_g.errorbar(t["r_eta"], t["g"], yerr=t["g_err"], color=c, marker="o", ms=3,
                      capsize=2, label=run.name)
        ax_k.errorbar(t["r_eta"], t["kernel"], yerr=t["kernel_err"], color=c, marker="o", ms=3,
                      capsize=2, label=run.name)
        for pdf, ls in zip(run.pdfs.get(group, []), ("-", "--")):
            draw_pdf(ax_p, pdf, c, ls, f"{run.name}, {pdf_label(pdf)} "
                                        f"(F = {pdf.flatness:.2f})")
    gaussian(ax_p)
    ax_g.set(xscale="log", xlabel="r / η", ylabel="g(r)", title="radial distribution function")
    ax_g.axhline(1.0, color="k", lw=0.8, ls=":")
    ax_p.set(yscale="log", xlabel="w$_r$ / rms(w$_r$)", ylabel="PDF", title="radial relative velocity",
             xlim=(-8, 8), ylim=(1e-5, 2))
    ax_k.set(xscale="log", yscale="log", xlabel="r / η", ylabel="K(r)  [L³ T⁻¹]",
             title="collision kernel 2πr²g⟨|w$_r$|⟩")
    for ax in (ax_g, ax_p, ax_k):
        ax.grid(alpha=0.3, which="both")
    log_axis(ax_g.xaxis)
    log_axis(ax_k.xaxis)
    # one legend under all three panels, so no panel is squeezed to make room for it
    handles, labels = ax_p.get_legend_handles_labels()
    longest = max(len(lb) for lb in labels)
    ncol = max(1, min(3, len(labels), int(1200 // (5 * longest + 60))))  # ~5 px per character
    fig.legend(handles, labels, loc="outside lower center", ncol=ncol, fontsize=8, frameon=False)
    fig.savefig(path)


def plot_across_stokes(run, path, r_eta: float = 1.0) -> bool:
    """One run, all its sets by Stokes number: g(r/η) with error bands; g and K/(η² u_η) at
    r ≈ ``r_eta`` η against St; the w_r PDFs at 2η and at the largest separation against a
    Gaussian.  All from the run's rows of the tidy pair table (readers.pair_table)."""
    from matplotlib.ticker import FuncFormatter

    groups = same_set_groups(run)
    if not groups:
        return False
    sts = [st for _, st, _ in groups if st > 0]
    lo, hi = (min(sts), max(sts)) if sts else (1.0, 1.0)
    fig = figure(14, 8.4)
    (ax_g, ax_gs, ax_ks), (ax_p1, ax_p2, ax_leg) = fig.subplots(2, 3)
    xs, gs, ks = [], [], []
    for g, st, rows in groups:
        c = st_colour(st, lo, hi)
        t = rows.columns
        label = f"{g.split('__')[0]} (St = {st:.3g})"
        ok = np.isfinite(t["g"])
        ax_g.plot(t["r_eta"][ok], t["g"][ok], "-o", ms=3, color=c, label=label)
        err = np.where(np.isfinite(t["g_err"][ok]), t["g_err"][ok], 0.0)
        ax_g.fill_between(t["r_eta"][ok], t["g"][ok] - err, t["g"][ok] + err, color=c, alpha=0.25,
                          lw=0)
        xs.append((st, c))
        gs.append(at_separation(rows, r_eta, "g"))
        ks.append(at_separation(rows, r_eta, "kernel_norm"))
        pdfs = run.pdfs.get(g, [])
        if pdfs:
            draw_pdf(ax_p1, pdfs[0], c, label=f"{label}, F = {pdfs[0].flatness:.2f}")
        if len(pdfs) > 1:
            draw_pdf(ax_p2, pdfs[-1], c, label=f"{label}, F = {pdfs[-1].flatness:.2f}")
    for ax, vals, what in ((ax_gs, gs, "g"), (ax_ks, ks, "K / (η² u$_η$)")):
        for (st, c), (v, e, r) in zip(xs, vals):
            ax.errorbar([st], [v], yerr=[e if math.isfinite(e) else 0.0], color=c, marker="o",
                        capsize=3)
        r_used = sorted({round(v[2], 3) for v in vals})
        # symlog: tracers (St = 0) on the linear stretch, the others on a log scale
        ax.set_xscale("symlog", linthresh=0.5 * lo)
        ax.set(xlabel="St (tracers at 0)", ylabel=what, xlim=(-0.1 * lo, 2.0 * hi),
               title=f"{what} at r ≈ {', '.join(f'{r:.3g}' for r in r_used)} η")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax_gs.axhline(1.0, color="k", lw=0.8, ls=":")
    ax_g.set(xscale="log", xlabel="r / η", ylabel="g(r)",
             title="radial distribution function (band: ± standard error)")
    ax_g.axhline(1.0, color="k", lw=0.8, ls=":")
    log_axis(ax_g.xaxis)
    for ax, i in ((ax_p1, 0), (ax_p2, -1)):
        gaussian(ax)
        first = next((run.pdfs[g][i] for g, _, _ in groups if len(run.pdfs.get(g, [])) > (i == -1)),
                     None)
        where = pdf_label(first) if first is not None else "—"
        ax.set(yscale="log", xlabel="w$_r$ / σ$_r$", ylabel="PDF", xlim=(-8, 8), ylim=(1e-5, 2),
               title=f"PDF of w$_r$ at {where}" + (" (largest separation)" if i == -1 else ""))
        ax.legend(fontsize=7, loc="lower center")
    for ax in (ax_g, ax_gs, ax_ks, ax_p1, ax_p2):
        ax.grid(alpha=0.3, which="both")
    ax_leg.axis("off")
    handles, labels = ax_g.get_legend_handles_labels()
    ax_leg.legend(handles, labels, loc="center", fontsize=9, frameon=False,
                  title=f"{run.name}: sets by Stokes number")
    fig.savefig(path)
    return True


# --- tables and the page -------------------------------------------------------------------


def _num(v, digits=4):
    return "n/a" if v is None or not np.isfinite(v) else f"{v:.{digits}g}"


def _cell(e) -> str:
    if e is None or not np.isfinite(e.mean):
        note = html.escape(getattr(e, "note", "") or "not available")
        return f'<td class="na" title="{note}">n/a</td>'
    mark = "" if e.converged else f'<sup class="nc" title="{html.escape(e.note)}">{NOT_CONVERGED}</sup>'
    return f"<td>{_num(e.mean)} ± {_num(e.stderr, 2)}{mark}</td>"


def small_r(rows):
    """(r/η, g Estimate, K Estimate) in the smallest separation bin of a group's table rows."""
    t = rows.columns
    conv = bool(t["converged"][0])
    note = str(t["window"][0])
    return (float(t["r_eta"][0]),
            Estimate(float(t["g"][0]), float(t["g_err"][0]), float(t["t_start"][0]), conv, note),
            Estimate(float(t["kernel"][0]), float(t["kernel_err"][0]), float(t["t_start"][0]),
                     conv, note))


def _groups(runs):
    seen = []
    for r in runs:
        for g in pair_groups(r):
            if g not in seen:
                seen.append(g)
    return seen


def _pair_rows(runs):
    """[(label, [Estimate or None per run], units)] for g and K in the smallest separation
    bin of every set pair; runs whose smallest bin differs get rows of their own, so only
    values at the same r are compared."""
    rows = []
    for g in _groups(runs):
        per = [group_rows(r, g) for r in runs]
        r0s = [None if p is None else float(f"{small_r(p)[0]:.6g}") for p in per]
        for r0 in dict.fromkeys(r for r in r0s if r is not None):
            same = [p if r == r0 else None for p, r in zip(per, r0s)]
            where = f"(r = {r0:.3g} η) [{html.escape(g)}]"
            rows.append((f"g{where}", [small_r(p)[1] if p else None for p in same], "1"))
            rows.append((f"K{where}", [small_r(p)[2] if p else None for p in same], "L³ T⁻¹"))
    return rows


def summary_table(runs) -> str:
    head = "".join(f"<th>{html_name(r.name)}</th>" for r in runs)
    rows = [f"<tr><th>quantity</th><th>units</th>{head}</tr>"]
    for q in QUANTITIES.values():
        cells = "".join(_cell(r.estimates[q.key]) for r in runs)
        rows.append(f'<tr><td class="q" title="{html.escape(q.definition)}">{q.label}</td>'
                    f"<td>{q.units}</td>{cells}</tr>")
    for label, ests, units in _pair_rows(runs):
        cells = "".join(_cell(e) if e is not None else '<td class="na">—</td>' for e in ests)
        rows.append(f'<tr><td class="q">{label}</td><td>{units}</td>{cells}</tr>')
    return "<table>" + "\n".join(rows) + "</table>"


def differences_table(runs, correction: str = "holm", series_cache=None) -> tuple[str, int]:
    """(HTML table of every quantity of every run against the first, the number of comparisons
    in its family). Each cell: b − a ± its standard error, the relative difference (b − a)/|a|,
    and the adjusted p-value; flagged when the t test (comparison; paired for runs that share
    the reference's seed) rejects equality after the correction over every cell of the table."""
    ref = runs[0]
    head = "".join(f"<th>{html_name(r.name)} − {html_name(ref.name)}</th>" for r in runs[1:])
    rows = [f"<tr><th>quantity</th>{head}</tr>"]
    labels, cells = [], {}
    paired = [correlated(ref.config, r.config) for r in runs]
    for q in QUANTITIES.values():
        labels.append(q.label)
        for i, r in enumerate(runs[1:], start=1):
            cells[(q.label, i)] = compare_quantity(q.key, ref.series, ref.estimates[q.key],
                                                   r.series, r.estimates[q.key], paired[i])
    for label, r_eta, group, ratio in _pair_comparisons(runs):
        labels.append(label)
        for i, r in enumerate(runs[1:], start=1):
            a, b = pair_series(ref, group, series_cache), pair_series(r, group, series_cache)
            cells[(label, i)] = (None if a is None or b is None else
                                 ratio_difference(a, b, ratio, r_eta, paired[i])[0])
    keys = [k for k, d in cells.items() if d is not None]
    flags = dict(zip(keys, flag_family([cells[k] for k in keys], correction)))
    for label in labels:
        out = []
        for i in range(1, len(runs)):
            f = flags.get((label, i))
            out.append('<td class="na">n/a</td>' if f is None else _difference_cell(f))
        rows.append(f'<tr><td class="q">{label}</td>{"".join(out)}</tr>')
    return "<table>" + "\n".join(rows) + "</table>", len(keys)


def _pair_comparisons(runs):
    """(label, r/η, group, ratio) of the pair rows of the differences table: g and K in the
    smallest separation bin of the reference's set pairs."""
    out = []
    for g in pair_groups(runs[0]):
        r0 = small_r(group_rows(runs[0], g))[0]
        where = f"(r = {r0:.3g} η) [{html.escape(g)}]"
        out += [(f"g{where}", r0, g, "rdf"), (f"K{where}", r0, g, "kernel")]
    return out


def _difference_cell(f) -> str:
    d = f.difference
    if not (math.isfinite(d.diff) and math.isfinite(d.stderr)):
        return f'<td class="na" title="{html.escape(d.note)}">n/a</td>'
    rel = (f" ({100 * d.relative:+.3g} ± {100 * d.relative_err:.2g} %)"
           if math.isfinite(d.relative) else "")
    mark = "" if d.converged else f'<sup class="nc" title="{html.escape(d.note)}">{NOT_CONVERGED}</sup>'
    how = "paired" if d.paired else "independent"
    tip = html.escape(f"{how}, t test on {d.dof:.3g} dof, p = {d.p_value:.3g}"
                      + (f"; {d.note}" if d.note else ""))
    cls = ' class="sig"' if f.significant else ""
    return (f'<td{cls} title="{tip}">{_num(d.diff)} ± {_num(d.stderr, 2)}{rel}{mark} '
            f'<span class="p">p̃ = {_num(f.p_adjusted, 2)}</span></td>')


def _config_brief(cfg: dict) -> str:
    if not cfg:
        return "no config.yaml"
    f = cfg.get("forcing", {})
    fp = ", ".join(f"{k}={v}" for k, v in f.items() if k != "kind" and v is not None)
    g = cfg.get("grid", {})
    forcing = f"{f.get('kind', '?')}({fp})" if fp else f.get("kind", "?")
    brief = (f"{g.get('points', '?')}³, ν={cfg.get('fluid', {}).get('viscosity', '?')}, forcing "
             f"{forcing}, seed {cfg.get('seed', '?')}")
    cal = (cfg.get("derived") or {}).get("forcing_calibration") or {}
    if cal.get("status") == "done":  # what the OU calibration settled on, and how sure it is
        try:
            source = f", from {cal['relative_error_from']}" if "relative_error_from" in cal else ""
            brief += (f"; σ² calibrated to {float(cal['variance']):.4g} (± "
                      f"{100 * float(cal['relative_error']):.2g} %{source}) over t ≤ "
                      f"{float(cal['window_end']):.4g}")
        except (KeyError, TypeError, ValueError):
            pass  # an older or edited record: the settings alone
    return brief


def _bare(cfg):
    return {k: v for k, v in cfg.items() if k not in ("derived", "output", "name")}


def runs_table(runs) -> str:
    rows = ["<tr><th>run</th><th>folder</th><th>settings</th><th>t</th><th>fluid samples</th>"
            "<th>pair sets (samples)</th></tr>"]
    for i, r in enumerate(runs):
        t = r.series["time"]
        span = f"{t[0]:.4g} – {t[-1]:.4g}" if t.size else "no samples"
        sets = ", ".join(f"{html.escape(g)} ({int(group_rows(r, g).columns['samples'][0])})"
                         for g in pair_groups(r)) or "—"
        rows.append(f'<tr><td class="t"><span class="sw" style="background:{COLOURS[i % len(COLOURS)]}">'
                    f"</span>{html_name(r.name)}</td>"
                    f"<td class=\"t path\"><code>{html.escape(str(r.path))}</code></td>"
                    f"<td class=\"t\">{html.escape(_config_brief(r.config))}</td><td>{span}</td>"
                    f"<td>{t.size}</td><td class=\"t\">{sets}</td></tr>")
    table = "<table>" + "\n".join(rows) + "</table>"
    flat = [_flat_settings(_bare(r.config)) for r in runs]
    keys = sorted({k for fl in flat[1:] for k in set(fl) | set(flat[0]) if fl.get(k) != flat[0].get(k)
                   and any(f.get(k, "null") != "null" for f in flat)})  # not just unset vs null
    if not keys:
        return table
    head = "".join(f"<th>{html_name(r.name)}</th>" for r in runs)
    diff = [f"<tr><th>setting</th>{head}</tr>"] + [
        f"<tr><td><code>{html.escape(k)}</code></td>"
        + "".join(f"<td>{html.escape(fl.get(k, '—'))}</td>" for fl in flat) + "</tr>"
        for k in keys]
    return table + "<h3>Settings that differ between runs</h3><table>" + "\n".join(diff) + "</table>"


def _flat_settings(d, prefix="") -> dict:
    """Dotted key -> YAML text of the value; lists of mappings (particle sets) by index, as
    --set and --vary address them (particles.sets.0.stokes)."""
    out = {}
    items = enumerate(d) if isinstance(d, list) else d.items()
    for k, v in items:
        key = f"{prefix}.{k}" if prefix else str(k)
        if isinstance(v, dict) or (isinstance(v, list) and v and all(isinstance(x, dict) for x in v)):
            out.update(_flat_settings(v, key))
        else:
            out[key] = yaml.safe_dump(v, default_flow_style=True, width=1000).strip()
            out[key] = out[key][:-4] if out[key].endswith("\n...") else out[key]
    return out


CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Helvetica,Arial,sans-serif;margin:24px auto;
max-width:1320px;padding:0 16px;color:#1d1d1f;line-height:1.4}
h1{font-size:1.6em;margin-bottom:0.2em} h2{margin-top:1.6em;border-bottom:1px solid #ddd;
padding-bottom:4px} h3{font-size:1.05em;margin-top:1.2em}
table{border-collapse:collapse;margin:8px 0 12px;font-size:13px}
th,td{border:1px solid #d0d0d0;padding:3px 8px;text-align:right;vertical-align:top;white-space:nowrap}
th{background:#f2f2f2;text-align:center;white-space:normal;max-width:340px}
td.path{word-break:break-all;min-width:160px} td.t{min-width:180px} td.q,td.t,td:first-child{text-align:left}
td.t{white-space:normal} td.na{color:#999}
td.sig{background:#ffe0dc;color:#a40000;font-weight:bold} span.p{color:#666;font-size:11px}
sup.nc{color:#b35c00;cursor:help} code{font-size:12px}
.note{background:#f6f8fa;border-left:4px solid #7a9cc6;padding:8px 12px;font-size:13px}
.legend{font-size:12px;color:#444} img{max-width:100%;height:auto;border:1px solid #eee}
.sw{display:inline-block;width:10px;height:10px;margin-right:6px;border-radius:2px}
.scroll{overflow-x:auto}
"""


def _definitions() -> str:
    rows = ["<tr><th>quantity</th><th>units</th><th>definition</th></tr>"] + [
        f'<tr><td class="q">{q.label}</td><td>{q.units}</td>'
        f'<td class="t">{html.escape(q.definition)}</td></tr>'
        for q in QUANTITIES.values()]
    return "<table>" + "\n".join(rows) + "</table>"


METHODS_NOTE = (
    "These are research estimates from short runs, not validated reference values. Each value "
    "is the mean over the stationary part of a series with its standard error: the initial "
    "transient is cut by MSER-5 (White 1997, <i>Simulation</i> 69:323; White, Cobb &amp; Spratt "
    "2000, Proc. Winter Simulation Conf.), and the error bar of the correlated remainder comes "
    "from Flyvbjerg–Petersen blocking (Flyvbjerg &amp; Petersen 1989, <i>J. Chem. Phys.</i> "
    "91:461), with the plateau level chosen automatically. Pair statistics are pooled ratios of "
    "sums over each set pair's averaging window (see the pair section). <sup class=\"nc\">"
    f"{NOT_CONVERGED}</sup> marks estimates whose transient or blocking plateau could not be "
    "established (series too short): their error bars are likely too small. In a run whose "
    "forcing was calibrated (forcing.calibrate), the stationary window starts after the "
    "calibration window.")


def significance_note(correction: str) -> str:
    """How differences from the reference are tested (the methods note's second paragraph)."""
    _, controls, source = sig.CORRECTIONS[correction]
    return (
        "Differences from the reference (the first run) are tested with Student's t. The error "
        "of a mean comes from batch means at the coarsest blocking level with at least "
        f"{sig.MIN_BATCHES} batches (Schmeiser 1982, <i>Oper. Res.</i> 30:556), corrected for the "
        "bias of short batches, and has b − 1 degrees of freedom for b batches; the blocking "
        "plateau in the tables reads 20–35 % low with a few dozen effective samples. Runs with "
        "different seeds are independent: Welch's test (Welch 1947, <i>Biometrika</i> 34:28) "
        "with Welch–Satterthwaite degrees of freedom. Runs that share the reference's seed start "
        "from the same field and particles and draw the same forcing numbers, so they are "
        "<b>correlated</b>: they are compared through the difference series on a common time "
        "grid from the later window start (a paired test), pair statistics through the "
        "difference of their linearised samples at the same times. Relative differences are "
        "(b − a)/|a|. The p-values of each table and figure are corrected for the number of "
        f"comparisons in it: {html.escape(correction)} ({html.escape(source)}), which controls "
        f"{html.escape(controls)}; a difference is flagged when its adjusted p-value p̃ is at most "
        f"{SIGNIFICANCE_LEVEL:g} and its error bar is established; {NOT_CONVERGED} beside a "
        "difference: its error bar is not established (the series are too short), and it is not "
        "flagged however small its p-value.")


PAIRS_NOTE = (
    "g(r) = Σ counts / Σ expected counts of uniformly distributed particles; ⟨w<sub>r</sub>²⟩ "
    "and ⟨|w<sub>r</sub>|⟩ = Σ sums / Σ counts; collision kernel K = Σ 2πr²|w<sub>r</sub>| / Σ "
    "expected = 2πr²g⟨|w<sub>r</sub>|⟩ (Wang, Wexler &amp; Zhou 2000, JFM 415:117): ratios of "
    "sums over the samples of each set pair's averaging window (below), so sparse bins are "
    "neither dropped nor counted as zero. Error bars: delta method for a ratio (Cochran 1977, "
    "Sampling Techniques) with Flyvbjerg–Petersen blocking of the correlated samples. PDFs of "
    "w<sub>r</sub> normalised by its r.m.s. σ<sub>r</sub> in the bin, pooled over the window, "
    "with a unit Gaussian (dotted) and the flatness F; every separation bin has its own "
    "sinh-spaced w<sub>r</sub> bins, fine at its own scale.")


def _windows_table(runs) -> str:
    """The averaging window of every set pair of every run."""
    rows = ["<tr><th>run</th><th>set pair</th><th>St</th><th>window</th><th>samples</th></tr>"]
    for r in runs:
        for g in pair_groups(r):
            t = group_rows(r, g).columns
            st = ", ".join(dict.fromkeys(f"{float(x):.3g}" for x in (t["stokes_a"][0],
                                                                     t["stokes_b"][0])))
            rows.append(f"<tr><td>{html_name(r.name)}</td><td>{html.escape(g)}</td><td>{st}</td>"
                        f'<td class="t">{html.escape(str(t["window"][0]))}</td>'
                        f"<td>{int(t['samples'][0])}</td></tr>")
    return '<div class="scroll"><table>' + "\n".join(rows) + "</table></div>"


def write_csv(runs, path):
    """One row per run: run, folder, then each quantity and its stderr (full precision)."""
    header = ["run", "folder"]
    for q in QUANTITIES:
        header += [q, f"{q}_stderr"]
    groups = _groups(runs)
    for g in groups:
        header += [f"{g}/r_small_eta", f"{g}/g_small", f"{g}/g_small_stderr",
                   f"{g}/kernel_small", f"{g}/kernel_small_stderr"]
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        for r in runs:
            row = [r.name, str(r.path)]
            for q in QUANTITIES:
                e = r.estimates[q]
                row += [repr(float(e.mean)), repr(float(e.stderr))]
            for g in groups:
                ps = group_rows(r, g)
                if ps is None:
                    row += [""] * 5
                else:
                    r0, ge, ke = small_r(ps)
                    row += [repr(r0), repr(ge.mean), repr(ge.stderr), repr(ke.mean), repr(ke.stderr)]
            w.writerow(row)


def default_report_folder(run_dirs) -> Path:
    """RUN_DIR/report for one run; for several, report/ in the folder that holds them all."""
    paths = [Path(d).resolve() for d in run_dirs]
    if len(paths) == 1:
        return paths[0] / "report"
    return Path(os.path.commonpath([str(p.parent) for p in paths])) / "report"


def _check_report_folder(out: Path):
    """A report replaces files only in a folder an earlier report wrote (its marker, or an
    index.html of eddybox's from before the marker existed); any other folder must be new or
    empty, so that no file of the user's is overwritten."""
    if not out.exists():
        return
    if not out.is_dir():
        raise ConfigError(f"--out {out}: exists and is not a folder")
    if (out / REPORT_MARKER).is_file():
        return
    try:
        names = sorted(p.name for p in out.iterdir())
        head = (out / "index.html").read_text(errors="replace")[:4000] if "index.html" in names else ""
    except OSError as exc:
        raise ConfigError(f"--out {out}: cannot read the folder ({exc.strerror})") from None
    if not names or "<title>eddybox report" in head:
        return
    shown = ", ".join(names[:4]) + (f" and {len(names) - 4} more" if len(names) > 4 else "")
    raise ConfigError(f"--out {out}: holds files eddybox did not write ({shown}); give a new or "
                      "empty folder, or the folder of an earlier eddybox report")


def write_report(run_dirs, out_dir, separation: float = 1.0, correction: str = "holm") -> Path:
    """Write index.html, its PNG figures, summary.csv and pairs.csv (with several runs also
    forcing_effect.csv) for `run_dirs` into `out_dir`; returns the path of index.html.
    `separation`: r/η at which g and K are drawn and compared against St; `correction`: of the
    significance tests for the number of comparisons (significance.CORRECTIONS). The first run
    is the reference. ConfigError for a folder that is not an eddybox run."""
    if not run_dirs:
        raise ConfigError("report: give at least one run folder")
    if correction not in sig.CORRECTIONS:
        raise ConfigError(f"--correction {correction!r}: choose one of {', '.join(sig.CORRECTIONS)}")
    if not (math.isfinite(separation) and separation > 0):
        raise ConfigError(f"--separation {separation}: expected a positive r/eta")
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise ImportError("eddybox report needs matplotlib (install the 'plot' extra)") from None
    for d in run_dirs:
        check_run_dir(d)
    out = Path(out_dir)
    _check_report_folder(out)
    from eddybox.solver.study.readers import pair_table

    names = _run_names(run_dirs)
    table = pair_table(run_dirs, names)  # the one reading of pairs.h5 behind figures and CSV
    runs = [load_run(d, n, table) for d, n in zip(run_dirs, names)]
    try:
        out.mkdir(parents=True, exist_ok=True)
        (out / REPORT_MARKER).touch()
    except OSError as exc:
        raise ConfigError(f"--out {out}: cannot create the report folder ({exc.strerror})") from None
    try:
        return _write_pages(run_dirs, names, runs, table, out, separation, correction)
    except OSError as exc:  # a full disk, a vanished folder: one line naming the folder
        from eddybox.solver.errors import DiskWriteError

        raise DiskWriteError(f"the report in {out} is incomplete ({exc.strerror or exc}); the "
                             "run folders are untouched") from None


def _write_pages(run_dirs, names, runs, table, out, separation, correction) -> Path:
    """Every figure and CSV, then index.html (last, so a page exists only when complete)."""
    plot_timeseries(runs, out / "timeseries.png")
    has_spectra = plot_spectra(runs, out / "spectra.png")
    pair_figs = []
    for g in _groups(runs):
        name = f"pairs_{g}.png"
        plot_pairs(runs, g, out / name)
        pair_figs.append((g, name))
    st_figs = []
    for i, run in enumerate(runs):
        name = f"pairs_stokes_{i}.png"
        if plot_across_stokes(run, out / name, separation):
            st_figs.append((run, name))
    write_csv(runs, out / "summary.csv")
    table.write_csv(out / "pairs.csv")
    series_cache = {}  # pair samples read once for the tests of the differences and decision
    decision = decision_section(runs, out, separation, correction, series_cache)

    created = datetime.datetime.now().strftime("%Y-%m-%d %H:%M")
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
             f"<title>eddybox report: {html.escape(', '.join(r.name for r in runs))}</title>"
             f"<style>{CSS}</style></head><body>",
             f"<h1>eddybox report — {len(runs)} run{'s' if len(runs) > 1 else ''}</h1>",
             f'<p class="legend">written {created} by eddybox {__version__}; tables as '
             f'<a href="summary.csv">summary.csv</a> and, every pair curve with its errors, '
             f'<a href="pairs.csv">pairs.csv</a></p>',
             f'<p class="note">{METHODS_NOTE}</p>',
             f'<p class="note">{significance_note(correction)}</p>' if len(runs) > 1 else "",
             "<h2>Runs</h2>", f'<div class="scroll">{runs_table(runs)}</div>',
             "<h2>Stationary means</h2>",
             '<p class="legend">mean ± standard error over the stationary window; hover a '
             f"quantity for its definition, a {NOT_CONVERGED} for the reason it is flagged.</p>",
             f'<div class="scroll">{summary_table(runs)}</div>']
    if len(runs) > 1:
        diff_html, family = differences_table(runs, correction, series_cache)
        parts += [f"<h2>Differences from {html_name(runs[0].name)}</h2>",
                  '<p class="legend">run − reference ± the standard error of the difference '
                  "(relative difference (b − a)/|a| in brackets) and p̃, the p-value of the t test "
                  f"adjusted by the {html.escape(correction)} correction over the {family} "
                  "comparisons of this table (hover a cell for paired or independent, the "
                  'degrees of freedom and the raw p). <span class="sig" '
                  'style="background:#ffe0dc;color:#a40000;font-weight:bold;padding:0 4px">'
                  f"Bold red</span>: p̃ ≤ {SIGNIFICANCE_LEVEL:g} and the error bar of the "
                  f"difference established (never with {NOT_CONVERGED}).</p>",
                  f'<div class="scroll">{diff_html}</div>']
        parts += decision
    parts += ["<h2>Time series</h2>",
              '<p class="legend">Dotted vertical line: start of the stationary window (MSER-5) of '
              "each run and series; thick line and band: its mean ± standard error.</p>",
              '<img src="timeseries.png" alt="time series of E, eps and Re_lambda">',
              "<h2>Compensated energy spectra</h2>"]
    if has_spectra:
        parts += ['<p class="legend">ε<sup>−2/3</sup> k<sup>5/3</sup> E(k) against kη, averaged '
                  "over the spectra in the stationary window of E and ε (the later of the two); "
                  "ε and η are the stationary means. Dashed: the Kolmogorov constant C ≈ 1.5 "
                  "(Pope 2000, Turbulent Flows, §6.5).</p>",
                  '<img src="spectra.png" alt="compensated energy spectra">']
    else:
        parts.append("<p>No spectra recorded (stats.spectra.every is null, or no dissipation).</p>")
    parts.append("<h2>Particle pair statistics</h2>")
    if pair_figs:
        parts.append(f'<p class="legend">{PAIRS_NOTE}</p>')
        parts.append(_windows_table(runs))
        for run, name in st_figs:
            parts += [f"<h3>{html_name(run.name)}: across Stokes numbers</h3>",
                      f'<p class="legend">g and K/(η² u<sub>η</sub>) in the bin nearest to r = '
                      f"{separation:g} η; colour: Stokes number (tracers black).</p>",
                      f'<img src="{html.escape(name)}" alt="pair statistics across Stokes '
                      f'numbers of {html.escape(run.name)}">']
        for g, name in pair_figs:
            parts += [f"<h3>{html.escape(g.replace('__', ' × '))}</h3>",
                      f'<img src="{html.escape(name)}" alt="pair statistics of {html.escape(g)}">']
    else:
        parts.append("<p>No pair statistics recorded (no particles, or stats.pairs.every is null).</p>")
    # detected collisions, Lagrangian statistics, physical units (study.report_particles)
    parts += particle_sections(run_dirs, names, out, figure, COLOURS)
    parts += ["<h2>Definitions</h2>", _definitions(), "</body></html>"]
    index = out / "index.html"
    index.write_text("\n".join(parts), encoding="utf-8")
    return index
