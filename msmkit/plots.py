"""Figures: each function returns a matplotlib Figure; no widget code here.

Figures are built with the object-oriented API (no pyplot state), so they are safe to make in
threads and in widget callbacks, and they show themselves as PNG in any Jupyter front end.
"""
from __future__ import annotations

import functools
import io

import numpy as np

__all__ = ["ck_deviations", "figure_png", "plot_chapman_kolmogorov", "plot_chapman_kolmogorov_pair",
           "plot_cross_validation", "plot_kinetics_maps", "plot_lag_flow", "plot_macrostate_network",
           "plot_populations", "plot_state_map", "plot_timescales", "PALETTE"]

#: the project's colors for successive processes / series
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


#: colors of successive processes in the implied-timescale figure, slowest first
PROCESS_COLORS = ("#1d3557", "#2a9d8f", "#c7851f", "#8e3b8a", "#b5452b", "#6b7f2a", "#4a6fa5", "#7a6a58")
#: the resolvability line t = tau and the lag markers
_GUIDE = "#3b3b3b"
_CHOSEN = "#d1495b"


def _log_ticks(lo: float, hi: float, max_ticks: int = 7) -> np.ndarray:
    """Round tick positions for a log axis from ``lo`` to ``hi`` (both > 0): the densest of the
    series 1-2-5, 1-3 and whole decades per decade that keeps at most ``max_ticks`` ticks (every
    few decades beyond that); a finer series 1-1.5-2-3-4-5-7 when a short span would otherwise get
    fewer than two."""
    first, last = int(np.floor(np.log10(lo))), int(np.ceil(np.log10(hi)))
    decades = 10.0 ** np.arange(first, last + 1)

    def series(mantissas):
        ticks = (decades[:, None] * np.array(mantissas)).ravel()
        return ticks[(ticks >= lo * (1 - 1e-9)) & (ticks <= hi * (1 + 1e-9))]

    fine = series((1, 2, 5))
    if fine.size < 2:
        return series((1, 1.5, 2, 3, 4, 5, 7))[:max_ticks]
    for ticks in (fine, series((1, 3)), series((1,))):
        if ticks.size <= max_ticks:
            return ticks
    return ticks[::int(np.ceil(ticks.size / max_ticks))]


def _tick_label(v: float) -> str:
    return f"{v:g}"


def _set_log_ticks(axis, ticks) -> None:
    from matplotlib.ticker import NullLocator
    axis.set_ticks(ticks, [_tick_label(v) for v in ticks])
    axis.set_minor_locator(NullLocator())


def _unclear_timescales(timescales, lower, upper, lag_times) -> np.ndarray:
    """True where a timescale cannot be read as a resolved process: at or below the lag time,
    or with an interval wider than the value itself (NaN bounds: judged by the lag only)."""
    with np.errstate(invalid="ignore"):
        wide = (upper - lower) > timescales
    return (timescales <= lag_times[:, None]) | wide


def _dodge(n_processes: int, factor: float = 1.05) -> np.ndarray:
    """Multiplicative x offsets (log axis) that set the processes' bars side by side at each lag."""
    return factor ** (np.arange(n_processes) - (n_processes - 1) / 2)


def plot_timescales(scan, *, processes=None, selected_lag=None, width=6.4, height=4.8):
    """Implied timescales against lag time, on log axes with physical units.

    One color per process (slowest first), a point per scanned lag with a vertical bar for the
    bootstrap interval; the processes are set slightly apart along the lag axis (a factor
    :func:`_dodge`) so that their bars do not hide each other. A point is hollow where the value
    cannot be taken at face value: at or below the lag time, or with an interval wider than the
    value. The dashed line timescale = lag time marks the resolution limit (a process faster
    than the lag cannot be resolved at that lag). The suggested lag is a triangle on the top
    edge with a dotted line; the chosen lag a solid line, so both stay visible when they
    coincide.

    Parameters
    ----------
    scan : LagScan
    processes : int, optional
        How many processes to draw (default all in the scan).
    selected_lag : int, optional
        A scanned lag (frames) to mark as chosen.
    width, height : float
        Figure size in inches.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, ax = _new_figure(width, height)
    x = np.asarray(scan.lag_times, dtype=float)
    k = scan.timescales.shape[1] if processes is None else min(processes, scan.timescales.shape[1])
    ts, lo, hi = scan.timescales[:, :k], scan.lower[:, :k], scan.upper[:, :k]
    shown = np.isfinite(ts) & (ts > 0)
    unclear = _unclear_timescales(ts, lo, hi, x)
    offsets = _dodge(k)

    values = np.concatenate([ts[shown], lo[np.isfinite(lo) & (lo > 0)], hi[np.isfinite(hi) & (hi > 0)], x])
    ymin, ymax = values.min() / 2, values.max() * 2
    xmin, xmax = (x.min() / 1.4, x.max() * 1.4) if x.size > 1 else (x[0] / 2, x[0] * 2)
    xs = np.array([xmin, xmax])
    ax.plot(xs, xs, color=_GUIDE, lw=1.1, ls=(0, (5, 3)), zorder=1,
            label="timescale = lag time (below: not resolved)")
    # the words sit just under the line, turned with it: anchored on the line, where 45 degrees in
    # data space is the line's own direction on screen, then moved down a few points
    from matplotlib.transforms import offset_copy
    start = xmin * (xmax / xmin) ** 0.04
    ax.text(start, start, "timescale = lag time: below this, not resolved", rotation=45, rotation_mode="anchor",
            transform=offset_copy(ax.transData, fig=fig, y=-3, units="points"), transform_rotates_text=True,
            ha="left", va="top", fontsize=7.5, color=_GUIDE, zorder=1)

    for p in range(k):
        color = PROCESS_COLORS[p % len(PROCESS_COLORS)]
        px = x * offsets[p]
        bars = shown[:, p] & np.isfinite(lo[:, p]) & np.isfinite(hi[:, p])
        if bars.any():
            ax.vlines(px[bars], lo[bars, p], hi[bars, p], color=color, lw=1.3, zorder=2)
        firm, weak = shown[:, p] & ~unclear[:, p], shown[:, p] & unclear[:, p]
        name = f"process {p + 1}" + (" (slowest)" if p == 0 else "")
        ax.plot(px[firm], ts[firm, p], ls="none", marker="o", ms=5.5, color=color, zorder=3, label=name,
                gid="timescale points")
        ax.plot(px[weak], ts[weak, p], ls="none", marker="o", ms=5.5, mfc="white", mec=color, mew=1.3,
                zorder=3, label=f"_{name}, not resolved", gid="timescale points")
    if unclear[shown].any():
        ax.plot([], [], ls="none", marker="o", ms=5.5, mfc="white", mec=_GUIDE, mew=1.3,
                label="hollow: below the lag time, or interval wider than the value")

    if scan.suggested_lag is not None:
        xs_ = scan.suggested_lag * scan.dt
        ax.axvline(xs_, color=_GUIDE, ls=":", lw=1.1, zorder=0)
        ax.plot([xs_], [1.0], transform=ax.get_xaxis_transform(), ls="none", marker="v", ms=9, color=_GUIDE,
                clip_on=False, zorder=5, label=f"suggested lag ({xs_:g} {scan.unit})")
    if selected_lag is not None:
        xc = selected_lag * scan.dt
        ax.axvline(xc, color=_CHOSEN, ls="-", lw=1.8, alpha=0.85, zorder=4,
                   label=f"chosen lag ({xc:g} {scan.unit})")

    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlim(xmin, xmax)
    ax.set_ylim(ymin, ymax)
    spread = x.size > 1 and np.min(x[1:] / x[:-1]) >= 1.5
    _set_log_ticks(ax.xaxis, x if spread and x.size <= 8 else _log_ticks(xmin, xmax))
    _set_log_ticks(ax.yaxis, _log_ticks(ymin, ymax))
    ax.set_xlabel(f"lag time τ [{scan.unit}]")
    ax.set_ylabel(f"implied timescale [{scan.unit}]")
    bars = (f"bars: {100 * scan.confidence:g}% bootstrap interval ({scan.n_samples} samples)" if scan.n_samples
            else "no bootstrap: no intervals")
    ax.set_title(f"Slowest relaxation times at each lag time\n{bars}", fontsize=9.5, pad=10)
    ax.grid(True, which="major", color="#e6e6e6", lw=0.6)
    ax.set_axisbelow(True)
    handles, labels = ax.get_legend_handles_labels()
    order = sorted(range(len(labels)), key=lambda i: (not labels[i].startswith("process"), i))
    ax.legend([handles[i] for i in order], [labels[i] for i in order], fontsize=7.5, loc="upper center",
              bbox_to_anchor=(0.5, -0.13), ncols=2, frameon=False)
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


# --------------------------------------------------------------------------- validation figures

#: color of the fixed point, lag-0 corner and other reference marks
_INK = "#222222"


def _verdict_color(ok) -> str:
    """Title color of a verdict: True/"passed", False/"failed", or "inconclusive" (neutral ink)."""
    if ok == "inconclusive":
        return _INK
    return PALETTE[2] if ok in (True, "passed") else PALETTE[1]


#: colors of |z| in the Chapman–Kolmogorov summary: calm blues up to the pass threshold, then
#: warm colors; the break sits at the threshold (the middle of the scale)
DEVIATION_COLORS = (("#f3f1ea", "#a9c8cf", "#3f7f94"), ("#f2c14e", "#d9772b", "#9e2a2b"))


def _deviation_map():
    from matplotlib.colors import LinearSegmentedColormap
    calm, warm = DEVIATION_COLORS
    nodes = [(0.0, calm[0]), (0.25, calm[1]), (0.4999, calm[2]), (0.5, warm[0]), (0.75, warm[1]), (1.0, warm[2])]
    return LinearSegmentedColormap.from_list("msmkit_deviation", nodes).with_extremes(bad="#d9d9d9")


def _critical_z(confidence: float) -> float:
    """Standard normal quantile with a central ``confidence`` share inside ±z (1.96 for 0.95)."""
    from statistics import NormalDist
    return NormalDist().inv_cdf(0.5 + confidence / 2)


def ck_deviations(ck):
    """How far the data lie from the model in each cell of a Chapman–Kolmogorov test, in units
    of the uncertainty of the estimate.

    z = (estimate - model) / sigma, with sigma the half of the bootstrap interval on the side
    where the model lies, divided by the normal quantile of the confidence (1.96 at 95 %). With
    that choice |z| exceeds the quantile exactly when the model lies outside the interval, as
    the test judges it; where the estimate lies outside the interval built around it the half-width of the
    whole interval is used instead.

    Parameters
    ----------
    ck : CKResult

    Returns
    -------
    z : ndarray, shape (K, m, m)
        In standard deviations; NaN where nothing was estimated or no interval was usable (those
        cells are judged by ``ck.tolerance``).
    critical : float
        The pass threshold on |z|.
    """
    critical = _critical_z(ck.confidence)
    est, pred, lo, hi = ck.estimated, ck.predicted, ck.lower, ck.upper
    with np.errstate(invalid="ignore"):
        half = np.where(pred >= est, hi - est, est - lo)
        half = np.where(half > 0, half, (hi - lo) / 2)
        usable = np.isfinite(est) & ~ck.used_tolerance & (half > 0)
    z = np.full(est.shape, np.nan)
    z[usable] = (est[usable] - pred[usable]) / (half[usable] / critical)
    return z, critical


def _pair_rows(m: int):
    """Row order of the summary: (from, to) pairs, grouped by the set started in."""
    a, b = np.divmod(np.arange(m * m), m)
    return a, b


def _ink_on(rgba) -> str:
    """Black or white text, whichever reads better on ``rgba`` (relative luminance, sRGB weights)."""
    r, g, b = rgba[:3]
    return "white" if 0.2126 * r + 0.7152 * g + 0.0722 * b < 0.45 else _INK


def _signed(v: float, digits: int) -> str:
    """``v`` with a sign and a typographic minus; a value that rounds to zero has no sign."""
    text = f"{v:+.{digits}f}"
    return f"{0:.{digits}f}" if float(text) == 0 else text.replace("-", "\u2212")


def plot_chapman_kolmogorov(ck, *, width=None, height=None):
    """Chapman–Kolmogorov test in one table: how far data and model disagree, per set pair and lag.

    Rows are pairs of sets "a → b" (start in set a, be in set b), grouped by a; columns are the
    multiples k of the model's lag. Each cell prints z = (estimate − model) / σ from
    :func:`ck_deviations` and is colored by |z|: blues up to the pass threshold, warm colors
    beyond it. Cells the test could only judge by the tolerance (too few data for an interval)
    are hatched and print the difference Δ = estimate − model instead; without any interval
    (no bootstrap) every cell prints Δ and is colored by |Δ| against the tolerance. Cells with
    no estimate print "n/a"; failing cells are framed. The threshold and the verdict are in the
    title; :func:`plot_chapman_kolmogorov_pair` draws one pair in detail.

    Parameters
    ----------
    ck : CKResult
    width, height : float, optional
        Figure size in inches (default grows with the number of multiples and pairs).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.patches import Rectangle
    m, K = ck.n_sets, len(ck.multiples)
    z, critical = ck_deviations(ck)
    a, b = _pair_rows(m)
    z = z[:, a, b].T  # (pairs, K)
    diff = (ck.estimated - ck.predicted)[:, a, b].T
    tol = (ck.used_tolerance & np.isfinite(ck.estimated))[:, a, b].T
    failed = (~ck.within & np.isfinite(ck.estimated))[:, a, b].T
    judged = int(np.isfinite(ck.estimated).sum())
    by_sigma = bool(np.isfinite(z).any())
    if by_sigma:  # color |z|; cells judged by the tolerance are the hatched exceptions
        shade, limit, hatch = np.abs(z), critical, tol
        scale = "|z| = |estimate − model| / σ  [σ of the estimate]"
        what = "cell: z = (estimate − model) / σ of the estimate"
        rule = (f"fails when |z| > {critical:.3g}, i.e. the model lies outside the {100 * ck.confidence:g}% "
                f"bootstrap interval")
    else:  # no interval anywhere: color |Δ| against the tolerance
        shade, limit, hatch = np.where(tol, np.abs(diff), np.nan), ck.tolerance, np.zeros_like(tol)
        scale = "|Δ| = |estimate − model|  [probability]"
        what = "cell: Δ = estimate − model (probability); no bootstrap interval, so no σ"
        rule = f"fails when |Δ| > {ck.tolerance:g} (the tolerance)"
    top = 2 * limit

    rows = m * m
    width = width or min(max(6.0, 2.6 + 0.78 * K), 16.0)
    height = height or min(1.9 + 0.3 * rows, 16.0)
    fig, ax = _new_figure(width, height)
    cmap = _deviation_map()
    image = ax.imshow(np.ma.masked_invalid(np.where(hatch, np.nan, shade)), cmap=cmap, vmin=0, vmax=top,
                      aspect="auto", interpolation="nearest")
    size = 8 if rows <= 16 else 7
    for r in range(rows):
        for c in range(K):
            if by_sigma and np.isfinite(z[r, c]):
                text, face = _signed(z[r, c], 1), cmap(min(shade[r, c] / top, 1.0))
            elif tol[r, c]:
                text = "Δ" + _signed(diff[r, c], 3)
                face = (1, 1, 1, 1) if hatch[r, c] else cmap(min(shade[r, c] / top, 1.0))
                if hatch[r, c]:
                    ax.add_patch(Rectangle((c - 0.5, r - 0.5), 1, 1, facecolor="#f7f7f7", edgecolor="#b8b8b8",
                                           hatch="///", lw=0, zorder=1))
            else:
                text, face = "n/a", (0.85, 0.85, 0.85, 1)
            ax.text(c, r, text, ha="center", va="center", fontsize=size, color=_ink_on(face), zorder=3,
                    fontweight="bold" if failed[r, c] else "normal", gid="ck cell")
            if failed[r, c]:
                ax.add_patch(Rectangle((c - 0.44, r - 0.42), 0.88, 0.84, fill=False, edgecolor=_INK, lw=1.3,
                                       zorder=2, gid="ck failed cell"))
    for g in range(1, m):
        ax.axhline(g * m - 0.5, color="white", lw=3, zorder=2)
    ax.set_yticks(np.arange(rows), [f"{i} → {j}" for i, j in zip(a, b)], fontsize=size)
    ax.set_xticks(np.arange(K), [f"k = {k}\n{t:g} {ck.unit}" for k, t in zip(ck.multiples, ck.lag_times)],
                  fontsize=7.5)
    ax.tick_params(length=0)
    for side in ax.spines.values():
        side.set_visible(False)
    ax.set_xlabel(f"lag multiple k and lag time kτ [{ck.unit}]")
    ax.set_ylabel("set pair: from set → to set")

    bar = fig.colorbar(image, ax=ax, extend="max", shrink=0.9, pad=0.02)
    bar.set_label(scale, fontsize=8)
    marks = [v for v in np.arange(0, top, 1.0 if by_sigma else limit / 2) if abs(v - limit) > 0.15 * limit]
    bar.set_ticks([*marks, limit, top], labels=[*(f"{v:.3g}" for v in marks), f"{limit:.3g} pass limit",
                                                f"≥ {top:.3g}"])
    bar.ax.tick_params(labelsize=7.5)
    bar.ax.axhline(limit, color=_INK, lw=1.2)

    verdict = ck.verdict or ("passed" if ck.passed else "failed")
    fig.suptitle(f"Chapman–Kolmogorov test {verdict}: {int(failed.sum())} of {judged} cells fail "
                 f"(model at τ = {ck.lag * ck.dt:g} {ck.unit})", fontsize=10.5, color=_verdict_color(verdict))
    ax.set_title(f"{what}\n{rule}", fontsize=8)
    notes = []
    if hatch.any():
        notes.append(f"hatched: too few data for an interval, judged by |Δ| ≤ {ck.tolerance:g} "
                     f"(Δ = estimate − model, probability)")
    if failed.any():
        notes.append("framed: failing cell")
    if notes:
        fig.supxlabel("; ".join(notes), fontsize=7.5, color="#444444")
    return fig


def plot_chapman_kolmogorov_pair(ck, a, b, *, width=5.8, height=3.9):
    """One pair of sets of a Chapman–Kolmogorov test in detail: model against data over time.

    The probability to be in set b a time t after starting in set a (from the model's
    stationary weights inside a): the model's prediction T(τ)^k as a line from t = 0 (1 when
    a = b, else 0), the estimates at lag kτ as points with their bootstrap interval as bars
    (without an interval: the tolerance, dashed), failing estimates ringed, z beside each point,
    and the long-time limit (the population of set b) dotted.

    Parameters
    ----------
    ck : CKResult
    a, b : int
        Index of the start set and of the target set (0 .. ck.n_sets - 1).
    width, height : float
        Figure size in inches.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from ._checks import check_int
    a = check_int(a, "a", minimum=0, maximum=ck.n_sets - 1)
    b = check_int(b, "b", minimum=0, maximum=ck.n_sets - 1)
    z, critical = ck_deviations(ck)
    t = ck.lag_times
    est, lo, hi = ck.estimated[:, a, b], ck.lower[:, a, b], ck.upper[:, a, b]
    pred = ck.predicted[:, a, b]
    fig, ax = _new_figure(width, height)
    model_color, data_color = PROCESS_COLORS[0], PROCESS_COLORS[4]
    ax.plot(np.concatenate([[0.0], t]), np.concatenate([[1.0 if a == b else 0.0], pred]), color=model_color,
            lw=1.8, marker="s", ms=3.5, zorder=2, label="model: T(τ)^k")
    bars = np.isfinite(lo) & np.isfinite(hi) & ~ck.used_tolerance[:, a, b]
    if bars.any():
        ax.vlines(t[bars], lo[bars], hi[bars], color=data_color, lw=1.4, zorder=3,
                  label=f"{100 * ck.confidence:g}% bootstrap interval")
    by_tol = ck.used_tolerance[:, a, b] & np.isfinite(est)
    if by_tol.any():
        ax.vlines(t[by_tol], est[by_tol] - ck.tolerance, est[by_tol] + ck.tolerance, color=data_color, lw=1.2,
                  linestyles="dashed", zorder=3, label=f"no interval: ± tolerance {ck.tolerance:g}")
    ax.plot(t, est, ls="none", marker="D", ms=5, color=data_color, zorder=4, label="data: estimated at lag kτ")
    miss = ~ck.within[:, a, b] & np.isfinite(est)
    if miss.any():
        ax.plot(t[miss], est[miss], ls="none", marker="o", ms=12, mfc="none", mec=_INK, mew=1.3, zorder=5,
                label="fails: model outside the interval" if ck.n_samples else "fails: beyond the tolerance")
    for i in np.flatnonzero(np.isfinite(z[:, a, b])):
        ax.annotate(f"z {_signed(z[i, a, b], 1)}", (t[i], est[i]), xytext=(7, 7), textcoords="offset points",
                    fontsize=7, va="bottom", color=_INK if abs(z[i, a, b]) > critical else "#555555")
    # framed on model and data; the long-time limit is drawn only when it falls inside that frame
    low, high = ax.get_ylim()
    limit = ck.set_populations[b]
    inside = low <= limit <= high
    ax.axhline(limit, color=_GUIDE, ls=":", lw=1.1, zorder=1, visible=bool(inside),
               label=f"long-time limit: population of set {b}, {limit:.3g}" + ("" if inside else " (off scale)"))
    ax.set_ylim(low, high)
    ax.set_xlim(0, t[-1] * 1.14)  # room for the z labels right of the last point
    ax.set_xticks(np.concatenate([[0.0], t]))
    ax.set_xlabel(f"time after starting in set {a} [{ck.unit}]")
    ax.set_ylabel(f"probability to be in set {b} [0–1]")
    ax.set_title(f"Set {a} → set {b}: model at τ = {ck.lag * ck.dt:g} {ck.unit} against the data", fontsize=10)
    ax.grid(True, color="#e6e6e6", lw=0.6)
    ax.set_axisbelow(True)
    ax.legend(fontsize=7.5, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncols=2, frameon=False)
    return fig


def _merged_data_path(flows):
    """Data points of several lag flows of the same sets, one per lag (frames), sorted by lag."""
    seen = {}
    for f in flows:
        for i, lag in enumerate(f.lags):
            seen.setdefault(int(lag), (f.estimated[i], f.lower[i], f.upper[i]))
    lags = np.array(sorted(seen))
    est = np.array([seen[x][0] for x in lags])
    lo = np.array([seen[x][1] for x in lags])
    hi = np.array([seen[x][2] for x in lags])
    return lags, est, lo, hi


def plot_lag_flow(flows, *, full_square=False, max_labels=8, width=6.0, height=6.2):
    """The lag flow: (p_aa, p_bb) of two sets as the lag grows, data against model.

    Draws, in the plane of the two self-transition probabilities, the data path (estimates at
    each lag, with bootstrap intervals in both directions and arrows toward longer lags), the
    path predicted by each model's powers T(tau)^k, dotted links between the predicted and
    estimated points of the same lag, the corner (1, 1) at lag 0, the fixed point
    (pi_a, pi_b) where every path ends, and the dashed straight line between them, the path of
    a single relaxation process. Lag times are written beside the data points.

    The view is framed on the paths. When the fixed point lies far outside (slow processes
    followed over a short time), an arrow on the dashed line points toward it and the legend
    gives the coordinates.

    Parameters
    ----------
    flows : LagFlow or list of LagFlow
        Several flows (e.g. models at different lags, same sets) share one data path and get
        one predicted path each.
    full_square : bool
        Show the whole unit square instead of the region the paths cover.
    max_labels : int
        Largest number of lag-time labels written on the data path.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from .errors import InputError
    flows = [flows] if hasattr(flows, "fixed_point") else list(flows)
    if not flows or not all(hasattr(f, "fixed_point") for f in flows):
        raise InputError("flows must be a LagFlow (from msmkit.lag_flow) or a list of them")
    first = flows[0]
    for f in flows[1:]:
        same = (f.unit == first.unit and f.dt == first.dt and f.pair == first.pair
                and all(np.array_equal(x, y) for x, y in zip(f.members, first.members)))
        if not same:
            raise InputError("flows must share the sets of states, dt and unit to be drawn together; build them "
                             "with the same sets= (e.g. the macrostates of one model) from the same data")
    a, b = first.pair
    fp = first.fixed_point
    unit = first.unit
    fig, ax = _new_figure(width, height)
    lags, est, lo, hi = _merged_data_path(flows)
    has_ci = bool(np.any(np.isfinite(lo[1:])))
    colors = [PALETTE[(0, 2, 4, 5, 6, 7, 3)[j % 7]] for j in range(len(flows))]

    ax.plot([fp[0], 1.0], [fp[1], 1.0], ls="--", lw=1.1, color=UNRESOLVED, zorder=1,
            label="path of a single relaxation process")
    for f, color in zip(flows, colors):
        p = f.predicted
        for i in range(1, len(f.lags)):
            ax.plot([p[i, 0], f.estimated[i, 0]], [p[i, 1], f.estimated[i, 1]], ls=":", lw=0.8, color=_INK,
                    alpha=0.6, zorder=2)
        ax.plot(p[:, 0], p[:, 1], color=color, lw=1.7, marker="o", ms=3.5, zorder=3,
                label=f"model at τ = {f.lags[1] * f.dt:g} {unit}: T(τ)^k" + ("" if f.coincide else " (parts)"))
    if has_ci:
        xerr = np.abs(np.vstack([est[:, 0] - lo[:, 0], hi[:, 0] - est[:, 0]]))
        yerr = np.abs(np.vstack([est[:, 1] - lo[:, 1], hi[:, 1] - est[:, 1]]))
        crowded = len(lags) > 13
        ax.errorbar(est[1:, 0], est[1:, 1], xerr=xerr[:, 1:], yerr=yerr[:, 1:], fmt="none", ecolor=PALETTE[1],
                    elinewidth=0.7 if crowded else 0.9, capsize=0 if crowded else 2, alpha=0.45 if crowded else 0.8,
                    zorder=4)
    conf = f"{100 * first.ck.confidence:g}% bootstrap intervals" if has_ci else "no bootstrap"
    ax.plot(est[:, 0], est[:, 1], lw=0.8, color=PALETTE[1], alpha=0.5, zorder=4)
    ax.plot(est[1:, 0], est[1:, 1], ls="none", marker="D", ms=5, color=PALETTE[1], zorder=5,
            label=f"data at each lag ({conf})")
    ax.plot([1.0], [1.0], ls="none", marker="o", ms=8, mfc="white", mec=_INK, mew=1.3, zorder=6,
            label="lag 0: each set occupied")
    ax.plot([fp[0]], [fp[1]], ls="none", marker="*", ms=15, color=_INK, zorder=6,
            label=f"fixed point (π{a}, π{b}) = ({fp[0]:.3g}, {fp[1]:.3g})")

    if full_square:
        low, high = np.zeros(2), np.ones(2)
    else:
        pts = [np.ones((1, 2)), est, *(f.predicted for f in flows)]
        if has_ci:
            pts += [lo, hi]
        stack = np.vstack(pts)
        low, high = np.nanmin(stack, axis=0), np.minimum(np.nanmax(stack, axis=0), 1.0)
        with_fp = np.minimum(low, fp)
        if np.all(1.0 - with_fp <= 4 * np.maximum(1.0 - low, 1e-3)):
            low = with_fp  # the fixed point fits without shrinking the paths into a corner
    pad = 0.06 * np.maximum(high - low, 1e-3) + 0.003
    ax.set_xlim(max(0.0, low[0] - pad[0]), high[0] + pad[0])
    ax.set_ylim(max(0.0, low[1] - pad[1]), high[1] + pad[1])
    _point_off_view(ax, fp)
    for f, color in zip(flows, colors):
        for i in range(len(f.lags) - 1):
            _arrow(ax, f.predicted[i], f.predicted[i + 1], color)
    for i in range(len(lags) - 1):
        _arrow(ax, est[i], est[i + 1], PALETTE[1])
    _label_lags(ax, est[1:], lags[1:] * first.dt, unit, max_labels)
    ax.set_xlabel(f"p{a}{a}(t): probability to be in set {a} a lag t after being there")
    ax.set_ylabel(f"p{b}{b}(t): probability to be in set {b} a lag t after being there")
    ok = all(f.coincide for f in flows)
    ax.set_title(f"Lag flow of sets {a} and {b}: " + ("data and model paths coincide" if ok else "paths part"),
                 fontsize=10, color=_verdict_color(ok))
    ax.grid(True, color="#e4e4e4", lw=0.6)
    ax.legend(fontsize=7.5, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncols=2, frameon=False)
    return fig


def _fraction(ax, point):
    """A data point in axis fractions (0..1 inside the view)."""
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    return np.array([(point[0] - x0) / (x1 - x0), (point[1] - y0) / (y1 - y0)])


def _point_off_view(ax, fp):
    """When the fixed point is outside the view, an arrow along the line from (1, 1) toward it."""
    target = _fraction(ax, fp)
    if np.all((target >= 0) & (target <= 1)):
        return
    corner = _fraction(ax, (1.0, 1.0))
    direction = target - corner
    # where the line from the corner toward the fixed point leaves the view, stepped back a little
    with np.errstate(divide="ignore", invalid="ignore"):
        steps = np.where(direction < 0, (0.0 - corner) / direction, (1.0 - corner) / direction)
    s = np.nanmin(np.where(steps > 0, steps, np.nan))
    tip = corner + 0.97 * s * direction
    tail = tip - 0.12 * direction / np.hypot(*direction)
    ax.annotate("to the fixed point", xy=tip, xytext=tail, xycoords="axes fraction", textcoords="axes fraction",
                fontsize=7.5, color=_INK, ha="left", va="bottom",
                arrowprops=dict(arrowstyle="-|>", color=_INK, lw=1.1, mutation_scale=12))


def _label_lags(ax, points, times, unit, max_labels):
    """Write lag times beside the data points: the longest lag always, others where they do not
    crowd an already labeled point (5 % of the axis span), at most ``max_labels``."""
    span = np.array([np.diff(ax.get_xlim())[0], np.diff(ax.get_ylim())[0]])
    chosen = []
    for i in [len(points) - 1, *range(len(points) - 1)]:
        if len(chosen) >= max_labels or not np.all(np.isfinite(points[i])):
            continue
        if all(np.hypot(*((points[i] - points[j]) / span)) > 0.05 for j in chosen):
            chosen.append(i)
    for i in chosen:
        ax.annotate(f"{times[i]:g} {unit}", points[i], xytext=(6, -10), textcoords="offset points", fontsize=7,
                    color=PALETTE[1])


def _arrow(ax, start, end, color):
    """An arrow head in the middle of the segment start -> end (direction of increasing lag),
    drawn only where the segment is long enough on screen (2 % of the view) to carry one."""
    start, end = np.asarray(start, float), np.asarray(end, float)
    if not (np.all(np.isfinite(start)) and np.all(np.isfinite(end))):
        return
    if np.hypot(*(_fraction(ax, end) - _fraction(ax, start))) < 0.02:
        return
    ax.annotate("", xy=start + 0.6 * (end - start), xytext=start + 0.4 * (end - start),
                arrowprops=dict(arrowstyle="-|>", color=color, lw=1.0, mutation_scale=10), zorder=5)


def plot_cross_validation(cv, *, width=6.4, height=4.2):
    """Cross-validated VAMP-2 scores: mean over folds with one standard deviation, per candidate.

    Candidate numbers of microstates on the x axis (log scale when they span a factor of 8 or
    more), one series per lag, the score of each fold as faint dots and the best candidate at
    each lag ringed. Without candidate numbers of microstates the x axis is the lag time.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, ax = _new_figure(width, height)
    mean, spread = cv.mean, cv.spread
    if cv.n_states is not None:
        x = cv.n_states.astype(float)
        for j, lag in enumerate(cv.lags):
            color = PALETTE[j % len(PALETTE)]
            ax.plot(np.repeat(x, cv.scores.shape[-1]), cv.scores[:, j].ravel(), ls="none", marker=".", ms=4,
                    color=color, alpha=0.35)
            ax.errorbar(x, mean[:, j], yerr=spread[:, j], color=color, marker="o", ms=5, capsize=3, lw=1.5,
                        label=f"lag {lag * cv.dt:g} {cv.unit}")
            best = int(np.nanargmax(mean[:, j]))
            ax.plot([x[best]], [mean[best, j]], ls="none", marker="o", ms=13, mfc="none", mec=color, mew=1.5,
                    label="highest mean" if j == 0 else None)
        if x.max() / x.min() >= 8:
            ax.set_xscale("log")
        ax.set_xticks(x, [str(int(v)) for v in x])
        ax.minorticks_off()
        ax.set_xlabel("number of microstates")
    else:
        x = cv.lags * cv.dt
        ax.plot(np.repeat(x, cv.scores.shape[-1]), cv.scores[0].ravel(), ls="none", marker=".", ms=4,
                color=PALETTE[0], alpha=0.35)
        ax.errorbar(x, mean[0], yerr=spread[0], color=PALETTE[0], marker="o", ms=5, capsize=3, lw=1.5,
                    label="mean ± s.d. over folds")
        ax.set_xlabel(f"lag time [{cv.unit}]")
    ax.set_ylabel(f"VAMP-2 score on held-out runs (k = {cv.k})")
    ax.set_title(f"Cross-validation over {cv.n_folds} folds of whole runs: mean ± s.d., dots = folds", fontsize=10)
    ax.grid(True, color="#e4e4e4", lw=0.6)
    ax.legend(fontsize=8, frameon=False)
    return fig


# --------------------------------------------------------------------------- microstates

#: color map of the density map (light = low free energy)
STATE_MAP_COLORS = "cividis_r"


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
        mesh = left.pcolormesh(xe, ye, energy.T, cmap=STATE_MAP_COLORS, shading="flat", rasterized=True)
        fig.colorbar(mesh, ax=left, label="−ln(frame density) [kT]", shrink=0.9)
        left.scatter(centers[:, 0], centers[:, 1], s=26, c="white", edgecolors=PALETTE[1], linewidths=1.1,
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


# -- kinetics pictures -------------------------------------------------------------------------
def _centers_2d(centers):
    c = np.asarray(centers, dtype=float)
    if c.ndim != 2 or c.shape[1] < 1:
        from .errors import InputError
        raise InputError(f"centers must be an (n_states, d) array, but has shape {c.shape}")
    return c[:, :2] if c.shape[1] >= 2 else np.column_stack([c[:, 0], np.zeros(len(c))])


def plot_kinetics_maps(centers, model, macrostates, paths, *, names=("coordinate 1", "coordinate 2"),
                       mode: int = 1, pair=None, width: float = 12.0, height: float = 3.9):
    """The kinetics on the state map: macrostates, the committor, and a slow eigenvector.

    Each microstate center of the model's kept states is a dot in the first two coordinates,
    the dot area proportional to the stationary population. Left: colored by macrostate
    (largest membership), numbered at their population-weighted mean. Middle: colored by the
    committor toward the target of ``paths`` (probability to reach the target before the source).
    Right: colored by right eigenvector ``mode`` (1 = slowest process): states of opposite
    sign exchange population in that process.

    Parameters
    ----------
    centers : ndarray (n_states, d)
        Centers of the model's kept states, in the order of ``model.states``.
    model : MarkovModel
    macrostates : Macrostates
    paths : TransitionPaths
        Flux between two sets of the model's states.
    names : tuple of str
    mode : int, default 1
    pair : (int, int), optional
        The source and target macrostates of ``paths``, for the title.
    width, height : float
        Inches.

    Returns
    -------
    matplotlib.figure.Figure
    """
    xy = _centers_2d(centers)
    if len(xy) != model.n_states:
        from .errors import InputError
        raise InputError(f"centers holds {len(xy)} rows but the model has {model.n_states} kept states; pass "
                         f"the centers of model.states")
    pi = np.asarray(model.equilibrium)
    size = 12 + 260 * pi / pi.max()
    fig = _figure_class()(figsize=(width, height), layout="constrained")
    axes = fig.subplots(1, 3, sharex=True, sharey=True)
    owner = np.asarray(macrostates.macro_index)
    colors = np.array([PALETTE[j % len(PALETTE)] for j in owner])
    axes[0].scatter(xy[:, 0], xy[:, 1], s=size, c=colors, edgecolors="white", linewidths=0.6, zorder=2)
    for j in range(macrostates.n_sets):
        inside = owner == j
        if inside.any():
            w = pi[inside] / pi[inside].sum()
            cx, cy = w @ xy[inside]
            axes[0].annotate(str(j), (cx, cy), ha="center", va="center", fontsize=11, fontweight="bold",
                             color="white", zorder=4,
                             bbox=dict(boxstyle="circle,pad=0.25", fc=PALETTE[j % len(PALETTE)], ec=_INK, lw=0.8))
    axes[0].set_title("Macrostates (largest membership)", fontsize=9.5)
    q = np.asarray(paths.reach_target)
    dots = axes[1].scatter(xy[:, 0], xy[:, 1], s=size, c=q, cmap="viridis", vmin=0, vmax=1,
                           edgecolors=_INK, linewidths=0.3, zorder=2)
    fig.colorbar(dots, ax=axes[1], label="committor q⁺ (reach target first)", shrink=0.9)
    axes[1].set_title("Committor" + (f": macrostate {pair[0]} → {pair[1]}" if pair is not None else ""),
                      fontsize=9.5)
    r = np.asarray(model.modes(mode + 1))[:, mode]
    top = float(np.max(np.abs(r))) or 1.0
    dots = axes[2].scatter(xy[:, 0], xy[:, 1], s=size, c=r, cmap="PuOr", vmin=-top, vmax=top,
                           edgecolors=_INK, linewidths=0.3, zorder=2)
    fig.colorbar(dots, ax=axes[2], label=f"right eigenvector {mode}", shrink=0.9)
    t = model.relaxation_times(mode)
    axes[2].set_title(f"Process {mode} (timescale {t[mode - 1]:.3g} {model.unit})" if t.size >= mode
                      else f"Process {mode}", fontsize=9.5)
    for ax in axes:
        ax.set_xlabel(names[0])
    axes[0].set_ylabel(names[1] if len(names) > 1 and np.asarray(centers).shape[1] > 1 else "")
    return fig


def plot_macrostate_network(paths, *, positions=None, labels=None, min_share: float = 0.01,
                            width: float = 6.4, height: float = 4.8):
    """Macrostates as discs and the net reactive current between them as arrows.

    Parameters
    ----------
    paths : TransitionPaths
        A flux lumped onto macrostates (:meth:`TransitionPaths.lump`), whose states are the
        macrostates 0..m-1.
    positions : ndarray (m, 2), optional
        Where to draw each macrostate (e.g. the population-weighted center on the state
        map); default: evenly on a circle.
    labels : list of str, optional
        Text under each disc (default: the stationary population).
    min_share : float, default 0.01
        Currents below this share of the total flux are not drawn.
    width, height : float
        Inches.

    Returns
    -------
    matplotlib.figure.Figure
        Disc area is proportional to the stationary population, disc color is the committor
        (0 at the source, 1 at the target), arrow width is proportional to the net current
        and the number on it is the share of the total reactive flux it carries.
    """
    from matplotlib import colormaps
    from matplotlib.patches import FancyArrowPatch

    F = np.asarray(paths.net_current, dtype=float)
    m = F.shape[0]
    pi = np.asarray(paths.equilibrium, dtype=float)
    q = np.asarray(paths.reach_target, dtype=float)
    if positions is None:
        angle = np.pi / 2 + 2 * np.pi * np.arange(m) / m
        xy = np.column_stack([np.cos(angle), np.sin(angle)])
    else:
        xy = np.asarray(positions, dtype=float)[:, :2]
    fig, ax = _new_figure(width, height)
    span = float(np.ptp(xy, axis=0).max()) or 1.0
    radius = span * (0.05 + 0.10 * np.sqrt(pi / pi.max()))
    total = float(paths.throughput) or float(F.sum()) or 1.0
    fmax = float(F.max()) or 1.0
    cmap = colormaps["viridis"]
    for i in range(m):
        for j in range(m):
            if F[i, j] <= 0 or F[i, j] < min_share * total:
                continue
            arrow = FancyArrowPatch(xy[i], xy[j], arrowstyle="-|>", mutation_scale=14 + 10 * F[i, j] / fmax,
                                    lw=0.8 + 7 * F[i, j] / fmax, color="#58636e", alpha=0.85, zorder=1,
                                    shrinkA=0, shrinkB=0, connectionstyle="arc3,rad=0.12")
            # start and end at the rims of the discs
            d = xy[j] - xy[i]
            length = float(np.hypot(*d)) or 1.0
            arrow.set_positions(xy[i] + d / length * radius[i], xy[j] - d / length * radius[j])
            ax.add_patch(arrow)
            mid = xy[i] + 0.5 * d
            ax.annotate(f"{100 * F[i, j] / total:.0f}%", mid, ha="center", va="center", fontsize=8.5, zorder=5,
                        bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.85))
    from matplotlib.patches import Circle
    for i in range(m):
        ax.add_patch(Circle(xy[i], radius[i], fc=cmap(q[i]), ec=_INK, lw=1.0, zorder=3))
        ax.annotate(str(i), xy[i], ha="center", va="center", fontsize=11, fontweight="bold", zorder=4,
                    color="white" if q[i] < 0.6 else _INK)
        text = labels[i] if labels is not None else f"population {pi[i]:.3g}"
        ax.annotate(text, (xy[i][0], xy[i][1] - radius[i]), xytext=(0, -4), textcoords="offset points",
                    ha="center", va="top", fontsize=8.5, color="#333333", zorder=4)
    pad = radius.max() * 1.6
    ax.set_xlim(xy[:, 0].min() - pad, xy[:, 0].max() + pad)
    ax.set_ylim(xy[:, 1].min() - pad * 1.3, xy[:, 1].max() + pad)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xticks([])
    ax.set_yticks([])
    for side in ax.spines.values():
        side.set_visible(False)
    ax.set_title("Net reactive current between macrostates (share of the total flux); color: committor",
                 fontsize=9.5)
    return fig
