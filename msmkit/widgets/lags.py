"""Step 2 of the workbench: scan lag times and choose one."""
from __future__ import annotations

import numpy as np
import traitlets

from .._checks import check_bool, check_dt, check_int, check_unit
from ..defaults import BOOTSTRAP_SAMPLES, PROCESSES
from ..errors import InputError
from ..lagscan import lag_scan
from ..posterior import check_uncertainty
from ..plots import plot_timescales
from ..report import lag_cautions
from . import _render
from ._base import (DESCRIPTION_WIDTH, SAMPLES_OF, Step, button, field, parse_int_list, set_value, row,
                    uncertainty_field, widgets)
from ._render import frames

__all__ = ["LagPanel", "TimescaleView", "default_lags", "lag_cautions"]

#: always said next to a chosen model
SAMPLING_CAUTION = ("A Markov model is only as good as the sampling behind it: the slow processes must be "
                    "crossed many times in the runs for these numbers to mean anything.")


def default_lags(run_lengths) -> list[int]:
    """Lags 1, 2, 5, 10, 20, 50, ... up to a twentieth of the longest run (at least lag 1)."""
    limit = max(1, int(max(run_lengths)) // 20)
    lags, decade = [], 1
    while True:
        for m in (1, 2, 5):
            if m * decade > limit:
                return lags or [1]
            lags.append(m * decade)
        decade *= 10


class TimescaleView:
    """The implied-timescale figure of one scan with a movable chosen-lag marker.

    The figure comes from :func:`msmkit.plots.plot_timescales`; it is drawn in full once per
    scan, after which moving the chosen lag redraws only the marker line and the legend entry
    (see :class:`~msmkit.widgets._render.MovingMarkerFigure`). If the figure does not have the
    expected marker, every lag falls back to a full redraw. PNGs are cached per lag.
    """

    MARKER = "chosen lag"
    #: label start of the suggested-lag line, redrawn above the chosen-lag line
    SUGGESTED = "suggested lag"

    def __init__(self, scan, lag):
        self.scan = scan
        self._cache = {}
        fig = plot_timescales(scan, selected_lag=lag)
        ax = fig.axes[0]
        self._line = next((a for a in ax.get_lines() if str(a.get_label()).startswith(self.MARKER)), None)
        legend = ax.get_legend()
        self._text = None if legend is None else next(
            (t for t in legend.get_texts() if t.get_text().startswith(self.MARKER)), None)
        self.fast = self._line is not None and self._text is not None
        # drawn after the chosen-lag line, so that the suggestion stays visible where both meet
        above = [a for a in ax.get_lines() if str(a.get_label()).startswith(self.SUGGESTED)]
        self._figure = (_render.MovingMarkerFigure(fig, [self._line, *above, self._text]) if self.fast
                        else None)

    def png(self, lag: int) -> bytes:
        lag = int(lag)
        if lag not in self._cache:
            if self.fast:
                x = lag * self.scan.dt
                self._line.set_xdata([x, x])
                self._text.set_text(f"{self.MARKER} ({x:g} {self.scan.unit})")
                self._cache[lag] = self._figure.png()
            else:
                from ..plots import figure_png
                self._cache[lag] = figure_png(plot_timescales(self.scan, selected_lag=lag), dpi=_render.DPI)
        return self._cache[lag]


class LagPanel(Step):
    """Scan lag times, read the implied timescales, and choose the model's lag.

    Parameters
    ----------
    labels : list of int arrays, optional
        Microstate label trajectories (can be given later with :meth:`set_labels`).
    dt : float
        Time between frames, in ``unit``.
    unit : str
    lags : sequence of int, optional
        Lags to scan, in frames (default 1, 2, 5, ... up to a twentieth of the longest run).
    n_processes : int, default 4
        How many of the slowest timescales to follow.
    n_samples : int, default 200 (``msmkit.defaults.BOOTSTRAP_SAMPLES``)
        Samples for the intervals (error bars) of the timescales (0: none).
    seed : int, default 0
    uncertainty : {"bootstrap", "bayes"}, default "bootstrap"
        Where the samples come from (:func:`msmkit.lag_scan`): resampled runs, or the posterior of
        reversible transition matrices (needs ``reversible``). The Chapman–Kolmogorov test and the
        macrostate intervals of the workbench follow this choice.
    reversible : bool, default True
        Estimate reversible models (detailed balance, the usual choice for equilibrium
        simulations); False: non-reversible maximum-likelihood models (runs driven out of
        equilibrium, or to see whether detailed balance matters). The Chapman–Kolmogorov test
        uses the model's estimator.
    progress : bool, default True

    Attributes
    ----------
    scan_result : LagScan or None (observable trait)
    model : MarkovModel or None
        The model at the chosen lag (observable trait).
    """

    scan_result = traitlets.Any(None)
    model = traitlets.Any(None)

    def __init__(self, labels=None, *, dt: float = 1.0, unit: str = "step", lags=None, n_processes: int = PROCESSES,
                 n_samples: int = BOOTSTRAP_SAMPLES, seed: int = 0, reversible: bool = True,
                 uncertainty: str = "bootstrap", progress: bool = True):
        super().__init__(progress=progress, css_class="msmkit-lags")
        self.dt, self.unit = check_dt(dt), check_unit(unit)
        self.labels = None
        self._view = None
        self._syncing = False

        self.lags = field(widgets.Text, "", "lags (frames)", "Lag times to scan, in frames, e.g. 1, 2, 5, 10",
                          width="420px")
        self.lags.add_class("msmkit-lags-field")
        if lags is not None:
            self.lags.value = ", ".join(str(x) for x in parse_int_list(lags, "lags"))
        self.n_processes = field(widgets.IntText, int(n_processes), "timescales shown",
                                 "How many of the slowest processes to follow")
        self.n_samples = field(widgets.IntText, int(n_samples), "bootstrap samples",
                               "Resampled data sets (or posterior samples) for the error bars (95% intervals) "
                               "of the timescales (0: none)")
        self.n_samples.add_class("msmkit-lag-samples")
        self.uncertainty = uncertainty_field(uncertainty, "msmkit-lag-uncertainty", "the timescales")
        self.seed = field(widgets.IntText, int(seed), "seed", "Seed of the resampling")
        self.reversible = widgets.Checkbox(value=bool(reversible), description="reversible estimate",
                                           style={"description_width": DESCRIPTION_WIDTH},
                                           layout=widgets.Layout(width="350px"))
        self.reversible.tooltip = ("On: models that obey detailed balance (equilibrium runs). Off: "
                                   "non-reversible maximum-likelihood models.")
        self.reversible.add_class("msmkit-reversible")
        self.scan_button = button("Scan lags", "msmkit-scan-button", "Estimate a model at every lag", icon="line-chart")
        self._on_click(self.scan_button, self.scan)

        self.plot = widgets.Output(layout=widgets.Layout(min_height="60px", width="100%", overflow="auto"))
        self.plot.add_class("msmkit-timescale-plot")
        self.plot.add_class("msmkit-plot")
        self.suggestion = widgets.HTML()
        self.suggestion.add_class("msmkit-suggestion")
        self.slider = widgets.SelectionSlider(options=[("scan first", 0)], value=0, description="chosen lag",
                                              disabled=True, continuous_update=False,
                                              style={"description_width": DESCRIPTION_WIDTH},
                                              layout=widgets.Layout(width="620px"))
        self.slider.add_class("msmkit-lag-slider")
        self.slider.observe(self._slider_moved, names="value")
        self.diagnostics = widgets.HTML()
        self.diagnostics.add_class("msmkit-diagnostics")

        intro = widgets.HTML(_render.message_html(
            "Estimate a model at several lag times and watch the implied timescales: choose the "
            "smallest lag from which they stay constant. Timescales below the line t = τ are "
            "faster than the lag and cannot be resolved."))
        settings = row([widgets.VBox([self.lags, self.n_processes]),
                                 widgets.VBox([self.n_samples, self.uncertainty, self.seed, self.reversible])])
        self._plots = [self.plot]
        self.children = [intro, settings, widgets.HBox([self.scan_button, self.cancel_button, self.progress_bar]),
                         self.status, self.plot, self.suggestion, self.slider, self.diagnostics,
                         self._figure_row(["implied timescales"])]
        if labels is not None:
            self.set_labels(labels)

    # -- inputs ------------------------------------------------------------------------------
    def set_labels(self, labels):
        """New microstate labels: forget the previous scan and model."""
        self.labels = labels
        if not self.lags.value.strip() and labels is not None:
            self.lags.value = ", ".join(str(x) for x in default_lags([len(r) for r in _runs_of(labels)]))
        self._view = None
        self.scan_result = None
        self.model = None
        _render.clear(self.plot)
        self.suggestion.value = ""
        self.diagnostics.value = ""
        self._set_slider([])
        _render.show_message(self.status, "Microstates are ready: scan the lags." if labels is not None else "")

    @property
    def lag(self):
        """The chosen lag in frames (None before a scan)."""
        return None if self.model is None else int(self.model.lag)

    # -- actions -----------------------------------------------------------------------------
    def scan(self, lags=None, n_samples=None, *, n_processes=None, seed=None, reversible=None, uncertainty=None):
        """Run the lag scan with the panel's settings; given arguments replace them first.

        The suggested lag is chosen (or the smallest one when none is suggested).

        Returns
        -------
        LagScan
            Also in :attr:`scan_result`; the chosen model is in :attr:`model`.
        """
        with self._action("Scanning lags", total=3) as caught:
            if lags is not None:
                self.lags.value = ", ".join(str(x) for x in parse_int_list(lags, "lags"))
            for name, value in (("n_samples", n_samples), ("n_processes", n_processes), ("seed", seed)):
                if value is not None:
                    set_value(getattr(self, name), check_int(value, name), name)
            if reversible is not None:
                self.reversible.value = check_bool(reversible, "reversible")
            if uncertainty is not None:
                self.uncertainty.value = check_uncertainty(uncertainty)
            if self.labels is None:
                raise InputError("there are no microstates yet: make them first (step 1, Cluster)")
            wanted = parse_int_list(self.lags.value, "lags")
            self._stage(0, 1, f"{len(wanted)} lags")
            units = len(wanted) * (1 + max(int(self.n_samples.value), 0))
            result = lag_scan(self.labels, wanted, dt=self.dt, unit=self.unit,
                              n_processes=check_int(self.n_processes.value, "timescales shown", minimum=1),
                              n_samples=self.n_samples.value, seed=self.seed.value,
                              reversible=self.reversible.value, uncertainty=self.uncertainty.value,
                              cancel=self._cancel_point(units + 1, what=f"{len(wanted)} lags"))
            self._stage(units, units + 1, "drawing")
            lag = result.suggested_lag if result.suggested_lag is not None else int(result.lags[0])
            view = TimescaleView(result, lag)
        self._show_scan(result, lag, view)
        self._report(f"Scanned {len(result.lags)} lags"
                     f"{f' with {result.n_samples} {SAMPLES_OF[result.uncertainty]}' if result.n_samples else ''}. "
                     f"Move the slider to choose the lag; populations are in step 3.", caught + list(result.notes))
        return result

    def restore(self, scan, lag=None):
        """Show a lag scan made before (e.g. read from a session file) with ``lag`` chosen
        (default: the suggested lag, else the smallest), without scanning again.

        Returns
        -------
        MarkovModel
            The model at the chosen lag (also :attr:`model`).
        """
        with self._action("Restoring the lag scan") as caught:
            if lag is None:
                lag = scan.suggested_lag if scan.suggested_lag is not None else int(scan.lags[0])
            lag = check_int(lag, "lag")
            scan.model(lag)  # InputError for a lag that was not scanned
            self.lags.value = ", ".join(str(int(x)) for x in scan.lags)
            set_value(self.n_processes, int(scan.timescales.shape[1]), "n_processes")
            set_value(self.n_samples, int(scan.n_samples), "n_samples")
            self.reversible.value = bool(scan.model(lag).reversible)
            self.uncertainty.value = check_uncertainty(getattr(scan, "uncertainty", "bootstrap"))
            view = TimescaleView(scan, lag)
        self._show_scan(scan, lag, view)
        self._report(f"The scan of {len(scan.lags)} lags, as saved; lag {frames(lag)} chosen.",
                     caught + list(scan.notes))
        return self.model

    def _show_scan(self, scan, lag, view):
        self._view = view
        self.scan_result = scan
        self.suggestion.value = _suggestion_html(scan)
        self._set_slider(scan.lags, lag)
        self._show_lag(lag)

    def select_lag(self, lag):
        """Choose one of the scanned lags (frames); returns the model at that lag."""
        with self._action("Choosing the lag"):
            if self.scan_result is None:
                raise InputError("no lags were scanned yet: scan first (Scan lags)")
            lag = check_int(lag, "lag")
            self.scan_result.model(lag)  # InputError for a lag that was not scanned
        if self.slider.value != lag:
            self.slider.value = lag  # the slider's observer shows it
        else:
            self._show_lag(lag)
        _render.show_message(self.status, f"Lag {frames(lag)} chosen.", "ok")
        return self.model

    # -- views -------------------------------------------------------------------------------
    def _set_slider(self, lags, value=None):
        self._syncing = True
        try:
            if len(lags):
                self.slider.options = [(f"{frames(x)} = {x * self.dt:g} {self.unit}", int(x)) for x in lags]
                self.slider.value = int(value)
                self.slider.disabled = False
            else:
                self.slider.options = [("scan first", 0)]
                self.slider.disabled = True
        finally:
            self._syncing = False

    def _slider_moved(self, change):
        if not self._syncing and self.scan_result is not None:
            self._show_lag(change["new"])

    def _show_lag(self, lag):
        model = self.scan_result.model(lag)
        _render.show_png(self.plot, self._view.png(lag), alt=f"implied timescales, chosen lag {lag}")
        scan = self.scan_result
        self._keep_figure("implied timescales", self.plot, lambda: plot_timescales(scan, selected_lag=lag))
        self.diagnostics.value = _diagnostics_html(model, self.scan_result.timescales.shape[1],
                                                   lag_cautions(self.scan_result, lag))
        self.model = model


def _runs_of(labels):
    return [labels] if isinstance(labels, np.ndarray) and labels.ndim == 1 else list(labels)


def _suggestion_html(scan) -> str:
    if scan.suggested_lag is not None:
        head = f"Suggested lag: {frames(scan.suggested_lag)} ({scan.suggested_lag * scan.dt:g} {scan.unit})."
        return _render.message_html([head, scan.reason], "info")
    return _render.message_html(["No lag is suggested.", scan.reason], "warning")


def _diagnostics_html(model, k, cautions=()) -> str:
    ts = model.relaxation_times(k)
    kind = "reversible" if model.reversible else "non-reversible"
    lines = [f"{kind.capitalize()} model at lag {frames(model.lag)} ({model.lag_time:g} {model.unit}): "
             f"{model.n_states} states kept, "
             f"{100 * model.kept_fraction:.3g}% of the transition counts.",
             "Slowest implied timescales: " + (", ".join(f"{t:.4g}" for t in ts) + f" {model.unit}"
                                               if ts.size else "none")]
    if model.dropped_states.size:
        shown = ", ".join(str(int(s)) for s in model.dropped_states[:12])
        more = " ..." if model.dropped_states.size > 12 else ""
        lines.append(f"Dropped (not in the largest connected set): states {shown}{more}.")
    lines += list(cautions) + list(model.diagnostics)
    lines.append(SAMPLING_CAUTION)
    warn = model.diagnostics or model.dropped_states.size or cautions
    return _render.message_html(lines, "warning" if warn else "info")
