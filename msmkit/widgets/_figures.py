"""Figures the workbench needs that msmkit.plots does not have yet.

Pure matplotlib functions returning a Figure, with no widget code, written so that they can
move into :mod:`msmkit.plots` unchanged.
"""
from __future__ import annotations

import numpy as np

from ..plots import PALETTE, _figure_class

__all__ = ["plot_state_map"]

#: colour map of the density map (light = low free energy)
MAP_COLOURS = "cividis_r"


def plot_state_map(coords, centers, counts, *, names=("coordinate 1", "coordinate 2"), bins: int | None = None,
                   width: float = 8.4, height: float = 3.6):
    """Where the microstates sit, and how many frames each holds.

    Left: minus the logarithm of the frame density over the first two coordinates, in kT
    relative to the densest bin (a 1-D profile when there is one coordinate), with the
    microstate centers on top. The density is that of the sampled frames, not reweighted to
    equilibrium: where runs did not reach equilibrium the map shows sampling, not free energy.
    Right: frames per microstate, sorted, on a log axis; sparsely visited states make noisy
    transition estimates.

    Parameters
    ----------
    coords : list of ndarray (n_frames, d)
        The coordinates the states were made in, one array per run.
    centers : ndarray (n_states, d)
    counts : ndarray (n_states,)
        Frames in each state.
    names : tuple of str
        Names of the coordinates (the first two are used).
    bins : int, optional
        Histogram bins per coordinate (default: from the number of frames, 20 to 80).

    Returns
    -------
    matplotlib.figure.Figure
    """
    x = np.concatenate([np.asarray(c)[:, :2] for c in coords])
    centers = np.asarray(centers)
    counts = np.asarray(counts)
    if bins is None:
        bins = int(np.clip(np.sqrt(len(x)) / 4, 20, 80))
    fig = _figure_class()(figsize=(width, height), layout="constrained")
    left, right = fig.subplots(1, 2, width_ratios=[1.45, 1])
    if x.shape[1] >= 2:
        hist, xe, ye = np.histogram2d(x[:, 0], x[:, 1], bins=bins)
        with np.errstate(divide="ignore"):
            energy = np.log(hist.max()) - np.log(hist)
        energy[hist == 0] = np.nan
        mesh = left.pcolormesh(xe, ye, energy.T, cmap=MAP_COLOURS, shading="flat", rasterized=True)
        fig.colorbar(mesh, ax=left, label="−ln(frame density) [kT]", shrink=0.9)
        left.scatter(centers[:, 0], centers[:, 1], s=9, c="white", edgecolors=PALETTE[1], linewidths=0.7,
                     label="microstate centers", zorder=3)
        left.set_xlabel(names[0])
        left.set_ylabel(names[1] if len(names) > 1 else "")
    else:
        hist, edges = np.histogram(x[:, 0], bins=bins)
        with np.errstate(divide="ignore"):
            energy = np.log(hist.max()) - np.log(hist)
        energy[hist == 0] = np.nan
        left.plot(0.5 * (edges[1:] + edges[:-1]), energy, color=PALETTE[0], lw=1.6)
        left.plot(centers[:, 0], np.zeros(len(centers)), "|", color=PALETTE[1], ms=12,
                  label="microstate centers")
        left.set_xlabel(names[0])
        left.set_ylabel("−ln(frame density) [kT]")
    left.set_title("Sampled frames (not reweighted) and state centers", fontsize=9.5)
    left.legend(fontsize=7.5, loc="upper right", framealpha=0.8)

    order = np.sort(counts)[::-1]
    rank = np.arange(1, order.size + 1)
    right.bar(rank, np.maximum(order, 0.8), width=1.0, color=PALETTE[0], lw=0)
    right.set_yscale("log")
    right.set_xlim(0.5, order.size + 0.5)
    right.set_xlabel("microstates, most visited first")
    right.set_ylabel("frames")
    right.set_title(f"Frames per state\nmin {int(order.min())} · median {int(np.median(order))} · "
                    f"max {int(order.max())}", fontsize=9.5)
    right.axhline(max(np.median(order), 0.8), color=PALETTE[3], lw=1, ls="--", label="median")
    right.legend(fontsize=7.5, loc="upper right", framealpha=0.8)
    right.set_axisbelow(True)
    right.grid(True, axis="y", color="#dddddd", lw=0.6)
    return fig
