"""Figures: each function returns a matplotlib Figure; no widget code here.

Figures are built with the object-oriented API (no pyplot state), so they are safe to make in
threads and in widget callbacks, and they show themselves as PNG in any Jupyter front end.
"""
from __future__ import annotations

import functools
import io

import numpy as np

__all__ = ["figure_png", "plot_populations", "plot_timescales", "PALETTE"]

#: the project's colours for successive processes / series
PALETTE = ("#0f5c8c", "#c44536", "#4d8b31", "#b5851b", "#6b4c9a", "#2f8f8f", "#8c5a3c", "#5a5a5a")
UNRESOLVED = "#9aa5b1"


@functools.lru_cache(maxsize=1)
def _figure_class():
    from matplotlib.figure import Figure  # imported on first plot, not with msmkit

    class PlotFigure(Figure):
        """A Figure that renders itself as PNG in Jupyter without pyplot."""

        def _repr_png_(self):
            return figure_png(self)

    return PlotFigure


def _new_figure(width=6.4, height=4.2):
    fig = _figure_class()(figsize=(width, height), layout="constrained")
    return fig, fig.add_subplot()


def figure_png(fig, dpi: int = 96) -> bytes:
    """The figure as PNG bytes."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def plot_timescales(scan, *, processes=None, selected_lag=None, width=6.4, height=4.8):
    """Implied timescales against lag time, on log axes with physical units.

    Shows each process with its bootstrap band, the line t = tau with the region below it shaded
    (timescales there are faster than the lag and cannot be resolved), the suggested lag, and
    optionally the lag the user has chosen.

    Parameters
    ----------
    scan : LagScan
    processes : int, optional
        How many processes to draw (default all in the scan).
    selected_lag : int, optional
        A scanned lag (frames) to mark as chosen.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, ax = _new_figure(width, height)
    x = scan.lag_times
    k = scan.timescales.shape[1] if processes is None else min(processes, scan.timescales.shape[1])
    finite = scan.timescales[:, :k][np.isfinite(scan.timescales[:, :k])]
    ymax = max(finite.max() if finite.size else 1.0, x.max()) * 3
    ymin = min(finite[finite > 0].min() if np.any(finite > 0) else x.min(), x.min()) / 3
    xs = np.geomspace(x.min() / 1.5, x.max() * 1.5, 50) if x.size > 1 else np.array([x[0] / 2, x[0] * 2])
    ax.fill_between(xs, ymin, xs, color=UNRESOLVED, alpha=0.25, lw=0,
                    label="unresolvable (timescale < lag time)")
    ax.plot(xs, xs, color=UNRESOLVED, lw=1.2, ls="-", label="t = τ")
    for p in range(k):
        colour = PALETTE[p % len(PALETTE)]
        if np.any(np.isfinite(scan.lower[:, p])):
            ax.fill_between(x, scan.lower[:, p], scan.upper[:, p], color=colour, alpha=0.18, lw=0)
        ax.plot(x, scan.timescales[:, p], color=colour, marker="o", ms=4, lw=1.6, label=f"process {p + 1}")
    if scan.suggested_lag is not None:
        ax.axvline(scan.suggested_lag * scan.dt, color="#222222", ls=":", lw=1.4,
                   label=f"suggested lag ({scan.suggested_lag * scan.dt:g} {scan.unit})")
    if selected_lag is not None:
        ax.axvline(selected_lag * scan.dt, color="#e07b00", ls="-", lw=2.2, alpha=0.8,
                   label=f"chosen lag ({selected_lag * scan.dt:g} {scan.unit})")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlim(xs[0], xs[-1])
    ax.set_ylim(ymin, ymax)
    ax.set_xlabel(f"lag time τ [{scan.unit}]")
    ax.set_ylabel(f"implied timescale [{scan.unit}]")
    band = f", bands: {100 * scan.confidence:g}% bootstrap" if scan.n_samples else ""
    ax.set_title(f"Implied timescales vs lag{band}", fontsize=10)
    ax.grid(True, which="major", color="#dddddd", lw=0.6)
    ax.legend(fontsize=7.5, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncols=3, frameon=False)
    return fig


def plot_populations(model, *, temperature=None, max_states: int = 60, width=6.4, height=3.6):
    """Stationary populations of the model's states as a bar chart, free energy on the right axis.

    With more than ``max_states`` states only the most populated are drawn (said in the title).

    Returns
    -------
    matplotlib.figure.Figure
    """
    df = model.populations(temperature=temperature)
    shown = df.nlargest(max_states, "population").sort_values("state") if len(df) > max_states else df
    fig, ax = _new_figure(width, height)
    pos = np.arange(len(shown))
    ax.bar(pos, shown["population"], color=PALETTE[0], width=0.8)
    ax.set_ylabel("stationary population")
    ax.set_xlabel("state (original label)")
    step = max(1, len(shown) // 20)
    ax.set_xticks(pos[::step], [str(s) for s in shown["state"].to_numpy()[::step]], fontsize=7)
    right = ax.twinx()
    col, unit = ("free_energy_kJ_per_mol", "kJ/mol") if temperature is not None else ("free_energy_kT", "kT")
    right.plot(pos, shown[col], color=PALETTE[1], marker="_", ls="none", ms=10, mew=2)
    right.set_ylabel(f"free energy [{unit}]", color=PALETTE[1])
    note = f" ({max_states} most populated of {len(df)})" if len(df) > max_states else ""
    ax.set_title(f"Populations at lag {model.lag_time:g} {model.unit}{note}", fontsize=10)
    return fig
