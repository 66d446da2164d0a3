"""The report's particle sections beyond the pair statistics: detected collisions beside the
kinematic kernel at the same radius, single-particle Lagrangian statistics, and the results in
physical units of sets given by radius and density. Each section reads its tidy table
(study.particle_readers), draws its figures and writes its CSV; `eddybox report`
(study.report.write_report) places them on the page.

    parts = particle_sections(run_dirs, names, out_dir, figure, colours)
"""
from __future__ import annotations

import html

import numpy as np

from eddybox.particles.collisions import SAFFMAN_TURNER
from eddybox.solver.study.particle_readers import (
    collision_table,
    lagrangian_average,
    set_table,
)

__all__ = ["particle_sections", "COLLISIONS_NOTE", "LAGRANGIAN_NOTE", "PHYSICAL_NOTE"]

COLLISIONS_NOTE = (
    "Detected kernel Γ = Σ N<sub>c</sub> / Σ (n<sub>a</sub>n<sub>b</sub>V Δt): contacts of the "
    "non-interacting particles counted in every step, particles on straight lines over the step "
    "(pairs crossing R from above; Sundaram &amp; Collins 1996, <i>J. Comput. Phys.</i> 124:337; "
    "ghost particles as in Wang, Wexler &amp; Zhou 1998, <i>Phys. Fluids</i> 10:266), within a "
    "set N(N−1)/2 pairs. Beside it the kinematic kernel at the same R, K = 2πR²g(R)⟨|w<sub>r"
    "</sub>|⟩(R) (Wang, Wexler &amp; Zhou 2000), measured in the shell R(1 ± δ) at each sample, "
    "and both over R³/τ<sub>η</sub> (sample by sample) against Saffman &amp; Turner's (1956) "
    f"√(8π/15) = {SAFFMAN_TURNER:.4f} for tracers. Ghost contacts count the inward flux "
    "4πR²g⟨w<sub>r</sub><sup>−</sup>⟩, which equals K once g(R) is stationary (⟨w<sub>r</sub>"
    "⟩ = 0); while clustering still grows it is the larger. Pooled ratios of sums over the "
    "window, delta-method errors with blocking; the ratio Γ/K keeps their correlation.")

LAGRANGIAN_NOTE = (
    "Velocity autocorrelation R<sub>L</sub>(τ) = ⟨u′(t)·u′(t+τ)⟩/⟨|u′|²⟩ and the dispersion "
    "D(τ) = ⟨|ΔX − ⟨ΔX⟩|²⟩/3 per component (X the unwrapped position), pooled over the "
    "followed particles and every time origin in the window (band: ± standard error). "
    "T<sub>L</sub> = ∫R<sub>L</sub>dτ to the largest lag. Dashed: Taylor's (1921) long-time "
    "growth, slope 2u′²T<sub>L</sub>, through the last point over the last third of the lags; "
    "the table gives the measured slope there against it.")

PHYSICAL_NOTE = (
    "For sets given by radius and density, results mapped back through the Kolmogorov scales "
    "of the physical flow (particles.physical): kernels times η³/τ<sub>η</sub>, velocities "
    "times u<sub>η</sub>, sample by sample. The collision rate per unit volume is n<sub>a</sub>"
    "n<sub>b</sub>Γ at the number densities the run represents (N over the box in metres). "
    "Terminal velocity: Stokes' τ<sub>p</sub>g in still fluid; settling: the measured mean.")


def _pm(v, e, digits=4) -> str:
    if v is None or not np.isfinite(v):
        return '<td class="na">n/a</td>'
    err = f" ± {e:.2g}" if e is not None and np.isfinite(e) else ""
    return f"<td>{v:.{digits}g}{err}</td>"


def _table(head, rows) -> str:
    out = ["<tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>"]
    out += ["<tr>" + "".join(rows_i) + "</tr>" for rows_i in rows]
    return '<div class="scroll"><table>' + "\n".join(out) + "</table></div>"


def _text(v) -> str:
    return f'<td class="t">{html.escape(str(v))}</td>'


# --- detected collisions ----------------------------------------------------------------------
def _collision_section(table, out, figure, colours) -> list[str]:
    c = table.columns
    rows = []
    for i in range(len(table)):
        rows.append([_text(c["run"][i]), _text(f"{c['set_a'][i]} × {c['set_b'][i]}"),
                     _pm(c["radius_eta"][i], None, 3), _pm(c["detected"][i], c["detected_err"][i]),
                     _pm(c["kinematic"][i], c["kinematic_err"][i]),
                     _pm(c["kinematic_inward"][i], c["kinematic_inward_err"][i]),
                     _pm(c["ratio"][i], c["ratio_err"][i]),
                     _pm(c["detected_norm"][i], c["detected_norm_err"][i]),
                     _pm(c["kinematic_norm"][i], c["kinematic_norm_err"][i]),
                     _pm(c["g_contact"][i], c["g_contact_err"][i]),
                     f"<td>{int(c['collisions'][i])}</td>", _text(c["window"][i])])
    head = ["run", "sets", "R/η", "detected Γ [L³T⁻¹]", "kinematic K(R) [L³T⁻¹]",
            "4πR²g⟨w<sub>r</sub><sup>−</sup>⟩ [L³T⁻¹]", "Γ/K",
            "Γτ<sub>η</sub>/R³", "Kτ<sub>η</sub>/R³", "g(R)", "contacts", "window"]
    fig = figure(max(6.0, 1.2 * len(table) + 3.0), 4.6)
    ax = fig.subplots()
    x = np.arange(len(table))
    ax.errorbar(x - 0.1, c["detected_norm"], yerr=_finite(c["detected_norm_err"]), fmt="o",
                color=colours[0], capsize=3, label="detected Γτ$_η$/R³")
    ax.errorbar(x + 0.1, c["kinematic_norm"], yerr=_finite(c["kinematic_norm_err"]), fmt="s",
                mfc="none", color=colours[1], capsize=3, label="kinematic 2πR²g⟨|w$_r$|⟩τ$_η$/R³")
    ax.axhline(SAFFMAN_TURNER, color="k", ls="--", lw=1,
               label=f"Saffman & Turner √(8π/15) = {SAFFMAN_TURNER:.3f} (tracers)")
    ax.set_xticks(x, [f"{r}\n{a}×{b}\nR = {re:.2g}η" for r, a, b, re in
                      zip(c["run"], c["set_a"], c["set_b"], c["radius_eta"])], fontsize=7)
    ax.set(ylabel="kernel × τ$_η$ / R³", title="collision kernel at the collision radius R")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.savefig(out / "collisions.png")
    table.write_csv(out / "collisions.csv")
    return ["<h2>Detected collisions</h2>", f'<p class="legend">{COLLISIONS_NOTE}</p>',
            _table(head, rows), '<img src="collisions.png" alt="detected and kinematic '
            'collision kernels at the collision radius">']


def _finite(a):
    a = np.asarray(a, dtype=float)
    return np.where(np.isfinite(a), a, 0.0)


# --- Lagrangian statistics ---------------------------------------------------------------------
def _lagrangian_section(runs, sets, out, figure, colours) -> list[str]:
    c = sets.columns
    with_lag = [i for i in range(len(sets)) if c["lagrangian_particles"][i] > 0]
    if not with_lag:
        return []
    fig = figure(12, 4.6)
    ax_r, ax_d = fig.subplots(1, 2)
    rows = []
    for n, i in enumerate(with_lag):
        run, name = c["run"][i], c["set"][i]
        e = lagrangian_average(runs[run], name)
        col = colours[n % len(colours)]
        label = f"{run}: {name} (St = {c['stokes'][i]:.3g})"
        ok = np.isfinite(e.r_l)
        ax_r.plot(e.lag[ok], e.r_l[ok], color=col, label=label)
        ax_r.fill_between(e.lag[ok], (e.r_l - _finite(e.r_l_err))[ok],
                          (e.r_l + _finite(e.r_l_err))[ok], color=col, alpha=0.25, lw=0)
        d = e.dispersion / 3.0
        ok = np.isfinite(d)
        ax_d.plot(e.lag[ok], d[ok], color=col, label=label)
        if ok.any() and np.isfinite(e.u2 * e.t_l):
            tau = e.lag[ok][e.lag[ok] >= e.fit_from * e.lag[ok][-1]]  # over the fitted lags
            ax_d.plot(tau, d[ok][-1] + 2.0 * e.u2 * e.t_l * (tau - tau[-1]), color=col, ls="--",
                      lw=1.5)
        rows.append([_text(run), _text(name), _pm(c["stokes"][i], None, 3),
                     _pm(e.u2, e.u2_err), _pm(e.t_l, e.t_l_err), _pm(e.slope, e.slope_err),
                     _pm(2.0 * e.u2 * e.t_l, None), _pm(e.taylor_ratio, e.taylor_ratio_err),
                     f"<td>{int(c['lagrangian_particles'][i])}</td>"])
    ax_r.axhline(0.0, color="k", lw=0.8, ls=":")
    ax_r.set(xlabel="τ  [T]", ylabel="R$_L$(τ)", title="Lagrangian velocity autocorrelation")
    ax_d.set(xlabel="τ  [T]", ylabel="D(τ)/3  [L²]",
             title="dispersion per component (dashed: slope 2u′²T$_L$)")
    for ax in (ax_r, ax_d):
        ax.grid(alpha=0.3)
    ax_r.legend(fontsize=8)
    fig.savefig(out / "lagrangian.png")
    head = ["run", "set", "St", "u′² [L²T⁻²]", "T<sub>L</sub> [T]", "dD/3dτ [L²T⁻¹]",
            "2u′²T<sub>L</sub>", "slope / 2u′²T<sub>L</sub>", "particles"]
    return ["<h2>Lagrangian statistics</h2>", f'<p class="legend">{LAGRANGIAN_NOTE}</p>',
            _table(head, rows), '<img src="lagrangian.png" alt="Lagrangian autocorrelation and '
            'dispersion">']


# --- physical units ---------------------------------------------------------------------------
def _physical_section(sets, collisions) -> list[str]:
    s = sets.columns
    phys = [i for i in range(len(sets)) if np.isfinite(s["radius_m"][i])]
    if not phys:
        return []
    rows = [[_text(s["run"][i]), _text(s["set"][i]), _pm(1e6 * s["radius_m"][i], None),
             _pm(s["density_kg_m3"][i], None), _pm(s["tau_p_s"][i], None),
             _pm(s["stokes"][i], None, 3), _pm(s["terminal_m_s"][i], None),
             _pm(s["settling_m_s"][i], s["settling_m_s_err"][i]), _pm(s["u_rms_m_s"][i], None),
             _pm(s["t_l_s"][i], None)] for i in phys]
    parts = ["<h2>Results in physical units</h2>", f'<p class="legend">{PHYSICAL_NOTE}</p>',
             _table(["run", "set", "radius [µm]", "density [kg/m³]", "τ<sub>p</sub> [s]", "St",
                     "terminal τ<sub>p</sub>g [m/s]", "settling [m/s]", "u′ [m/s]",
                     "T<sub>L</sub> [s]"], rows)]
    c = collisions.columns if collisions is not None and len(collisions) else None
    if c is not None:
        keep = [i for i in range(len(collisions)) if np.isfinite(c["radius_m"][i])]
        rows = [[_text(c["run"][i]), _text(f"{c['set_a'][i]} × {c['set_b'][i]}"),
                 _pm(1e6 * c["radius_m"][i], None),
                 _pm(c["detected_m3_s"][i], c["detected_m3_s_err"][i]),
                 _pm(c["kinematic_m3_s"][i], c["kinematic_m3_s_err"][i]),
                 _pm(c["rate_m3_s"][i], c["rate_m3_s_err"][i]),
                 _pm(c["wr_abs_m_s"][i], c["wr_abs_m_s_err"][i])] for i in keep]
        if rows:
            parts.append(_table(["run", "sets", "R [µm]", "detected Γ [m³/s]",
                                 "kinematic K(R) [m³/s]", "collision rate [m⁻³ s⁻¹]",
                                 "⟨|w<sub>r</sub>|⟩(R) [m/s]"], rows))
    return parts


def particle_sections(run_dirs, names, out, figure, colours) -> list[str]:
    """HTML of the sections (empty when the runs recorded none of it), their figures and
    CSVs (collisions.csv, sets.csv) in ``out``. ``figure(width, height)`` makes a matplotlib
    figure and ``colours`` lists the runs' colours (those of the rest of the report)."""
    collisions = collision_table(run_dirs, names)
    sets = set_table(run_dirs, names)
    parts = []
    if len(collisions):
        parts += _collision_section(collisions, out, figure, colours)
    if len(sets):
        sets.write_csv(out / "sets.csv")
        parts += _lagrangian_section(dict(zip(names, run_dirs)), sets, out, figure, colours)
        parts += _physical_section(sets, collisions)
    return parts
