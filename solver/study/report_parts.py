"""Pieces every section of `eddybox report` draws with: the fixed colours, a matplotlib Agg
figure (no pyplot state, no display), plain-number log axes, w_r PDF curves against a unit
Gaussian, Stokes-number colours and run names for HTML."""
from __future__ import annotations

import html
import math

import numpy as np

COLOURS = ["#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#8c564b", "#e377c2",
           "#7f7f7f", "#bcbd22", "#17becf"]  # matplotlib's tab10, fixed so every figure agrees


def figure(width, height):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def log_axis(axis):
    """Log axis labelled 1, 2, 5, 10, ... in plain numbers: short ranges (less than a decade,
    as r/eta often is) otherwise get crowded minor labels like 2x10^-1 3x10^-1."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())


def pdf_label(pdf) -> str:
    return f"r = {pdf.r_eta:.3g} η"


def draw_pdf(ax, pdf, colour, ls="-", label=None):
    """A pooled w_r PDF with its error bars (bins with no pairs left out)."""
    y, dy = pdf.pdf, pdf.pdf_err
    ok = np.isfinite(y) & (y > 0)
    dy = np.where(np.isfinite(dy), dy, 0.0)
    ax.errorbar(pdf.x_centres[ok], y[ok], yerr=np.minimum(dy[ok], 0.999 * y[ok]), color=colour,
                ls=ls, lw=1, marker=".", ms=3, capsize=1.5, label=label)


def gaussian(ax):
    x = np.linspace(-8, 8, 321)
    ax.plot(x, np.exp(-0.5 * x * x) / math.sqrt(2 * math.pi), "k:", lw=1.2, label="unit Gaussian")


def st_colour(st, lo, hi):
    """Colour of a Stokes number on a log scale from lo to hi (viridis); tracers black."""
    from matplotlib import colormaps

    if not (st > 0):
        return "k"
    f = 0.5 if hi <= lo else (math.log(st) - math.log(lo)) / (math.log(hi) - math.log(lo))
    return colormaps["viridis"](0.9 * min(max(f, 0.0), 1.0))


def html_name(name: str) -> str:
    """A run name for HTML, breakable after '__' and ',' (sweep folder names are long)."""
    return html.escape(name).replace("__", "__<wbr>").replace(",", ",<wbr>")
