"""Step 4 of the workbench: does the chosen model predict the data at longer lags?"""
from __future__ import annotations

import traitlets

from .._checks import check_int
from ..defaults import CK_MULTIPLES, CK_SAMPLES
from ..errors import InputError
from ..posterior import check_uncertainty
from ..plots import plot_chapman_kolmogorov, plot_lag_flow
from ..validate import chapman_kolmogorov, lag_flow
from . import _render
from ._base import (SAMPLES_OF, MacrostateCount, SetPair, Step, button, field, set_value, row, uncertainty_field,
                    widgets)
from ._render import frames
from .lags import SAMPLING_CAUTION

__all__ = ["ValidationPanel"]

#: said under every verdict: what a passed test does and does not show
VERDICT_CAUTION = ("The test compares the model with the same data it was built from, on these sets only, and "
                   "the intervals hold the sampling error of the estimates, not of the model: passing is "
                   "necessary, not sufficient.")


#: message style of each verdict of :func:`msmkit.validate.chapman_kolmogorov`
VERDICT_KINDS = {"passed": "ok", "failed": "failed", "inconclusive": "inconclusive"}


class ValidationPanel(Step):
    """The Chapman–Kolmogorov test of the chosen model on macrostates, and the lag flow.

    Parameters
    ----------
    model : MarkovModel, optional
        Can be given later with :meth:`set_model`.
    labels : list of int arrays, optional
        The label trajectories the model was built from (later with :meth:`set_labels`).
    n_sets : int, optional
        Number of macrostates tested (default: the model's suggestion, at least 2).
    multiples : int, default 4 (``msmkit.defaults.CK_MULTIPLES``)
        Largest k: the model's T(tau)^k is compared with the data at lag k tau, k = 1..multiples.
    n_samples : int, default 20 (``msmkit.defaults.CK_SAMPLES``)
        Samples for the intervals of the estimates (0: a fixed tolerance instead).
    seed : int, default 0
    uncertainty : {"bootstrap", "bayes"}, default "bootstrap"
        Where the samples come from (:func:`msmkit.chapman_kolmogorov`).
    progress : bool, default True

    Attributes
    ----------
    ck : result of :func:`msmkit.validate.chapman_kolmogorov` or None (observable trait)
        ``.passed``, ``.criterion``, ``.table()``.
    flow : result of :func:`msmkit.validate.lag_flow` or None
        The lag flow of the two sets chosen below the test.
    """

    ck = traitlets.Any(None)

    def __init__(self, model=None, labels=None, *, n_sets=None, multiples: int = CK_MULTIPLES, n_samples: int = CK_SAMPLES,
                 seed: int = 0, uncertainty: str = "bootstrap", progress: bool = True):
        super().__init__(progress=progress, css_class="msmkit-validate")
        self.model = None
        self.labels = None
        self.flow = None
        self.n_sets = MacrostateCount("msmkit-validate-sets", n_sets)
        self.multiples = field(widgets.IntText, int(multiples), "lag multiples k",
                               "Compare T(τ)^k with the data at lag kτ for k = 1 up to this number")
        self.multiples.add_class("msmkit-validate-multiples")
        self.n_samples = field(widgets.IntText, int(n_samples), "bootstrap samples",
                               "Resampled data sets for the intervals of the estimates (0: judge by a fixed "
                               "tolerance instead)")
        self.n_samples.add_class("msmkit-validate-samples")
        self.uncertainty = uncertainty_field(uncertainty, "msmkit-validate-uncertainty", "the estimates")
        self.seed = field(widgets.IntText, int(seed), "seed", "Seed of the resampling")
        self.run_button = button("Run test", "msmkit-validate-button",
                                 "Run the Chapman–Kolmogorov test with these settings", icon="check-square-o")
        self._on_click(self.run_button, self.run)

        self.verdict = widgets.HTML()
        self.verdict.add_class("msmkit-ck-verdict")
        self.ck_plot = widgets.Output(layout=widgets.Layout(min_height="40px", width="100%", overflow="auto"))
        self.ck_plot.add_class("msmkit-ck-plot")
        self.ck_plot.add_class("msmkit-plot")
        self.pair = SetPair("lag flow: set a", "set b", "msmkit-flow-pair", self._pair_changed,
                            "The two sets whose self-transition probabilities are followed")
        self.flow_summary = widgets.HTML()
        self.flow_summary.add_class("msmkit-flow-summary")
        self.flow_plot = widgets.Output(layout=widgets.Layout(min_height="40px", width="100%", overflow="auto"))
        self.flow_plot.add_class("msmkit-lag-flow-plot")
        self.flow_plot.add_class("msmkit-plot")

        intro = widgets.HTML(_render.message_html(
            "Chapman–Kolmogorov test: a Markov model at lag τ predicts the data at lag kτ by the k-th power of "
            "the transition matrix, T(τ)^k. The test groups the states into macrostates and compares, for every "
            "pair of them, the predicted probability to go from one to the other with the one estimated from the "
            "data at lag kτ. The lag flow below draws the same numbers for two sets as paths toward equilibrium."))
        settings = row([
            widgets.VBox([self.n_sets.field, self.multiples]),
            widgets.VBox([self.n_samples, self.uncertainty, self.seed, widgets.HBox([self.run_button, self.cancel_button, self.progress_bar])]),
        ])
        self._plots = [self.ck_plot, self.flow_plot]
        self.children = [intro, settings, self.n_sets.reason, self.status, self.verdict, self.ck_plot,
                         widgets.HTML("<b>Lag flow</b>"), self.pair, self.flow_summary, self.flow_plot,
                         self._figure_row(["Chapman–Kolmogorov test", "lag flow"])]
        self.set_labels(labels)
        self.set_model(model)

    # -- inputs ------------------------------------------------------------------------------
    def set_labels(self, labels):
        """The label trajectories the model was built from (new labels: the result is dropped)."""
        self.labels = labels
        self._forget()

    def set_model(self, model):
        """A new model: the previous result is dropped and the suggested number of sets shown."""
        self.model = model
        self.n_sets.update(model)
        self._forget()
        if model is not None:
            _render.show_message(self.status, f"Model at lag {frames(model.lag)} ({model.lag_time:g} "
                                              f"{model.unit}): run the test.")

    def _forget(self):
        self.ck = None
        self.flow = None
        for out in (self.ck_plot, self.flow_plot):
            _render.clear(out)
        self.verdict.value = self.flow_summary.value = ""
        self.pair.clear()
        _render.show_message(self.status, "" if self.model is not None else "No model yet: choose a lag in step 2.")

    # -- actions -----------------------------------------------------------------------------
    def run(self, n_sets=None, multiples=None, n_samples=None, *, seed=None, uncertainty=None):
        """Run the Chapman–Kolmogorov test with the panel's settings; given arguments replace them.

        Returns
        -------
        The result of :func:`msmkit.validate.chapman_kolmogorov` (also :attr:`ck`); the lag
        flow of sets 0 and 1 is in :attr:`flow`.

        Raises
        ------
        InputError
            For a bad setting or when there is no model (also shown in the panel).
        """
        with self._action("Chapman–Kolmogorov test", total=3) as caught:
            for name, value in (("multiples", multiples), ("n_samples", n_samples), ("seed", seed)):
                if value is not None:
                    set_value(getattr(self, name), check_int(value, name), name)
            if uncertainty is not None:
                self.uncertainty.value = check_uncertainty(uncertainty)
            if self.model is None or self.labels is None:
                raise InputError("there is no model to test yet: make microstates (step 1), then scan and "
                                 "choose a lag (step 2)")
            m = self.n_sets.get(n_sets, self.model)
            self._stage(0, 1, "testing")
            units = check_int(self.multiples.value, "multiples", minimum=1) * (1 + max(int(self.n_samples.value), 0))
            ck = chapman_kolmogorov(self.model, self.labels, n_sets=m, multiples=self.multiples.value,
                                    n_samples=self.n_samples.value, seed=self.seed.value,
                                    uncertainty=self.uncertainty.value,
                                    cancel=self._cancel_point(units + 1, what="testing"))
            self._stage(units, units + 1, "drawing")
            flow = self._draw(ck, (0, 1))
        self._show_test(ck, flow)
        self._report(f"Tested the model at lag {frames(ck.lag)} on {ck.n_sets} sets, k = 1..{len(ck.multiples)}"
                     f"{f', {ck.n_samples} {SAMPLES_OF[ck.uncertainty]}' if ck.n_samples else ', no samples'}: "
                     f"{ck.verdict} (the rule is below).", caught)
        return ck

    def restore(self, ck, flow_pair=(0, 1)):
        """Show a test made before (e.g. read from a session file) of the current model, with the
        lag flow of the sets ``flow_pair``, without testing again.

        Returns
        -------
        CKResult
        """
        with self._action("Restoring the Chapman–Kolmogorov test", total=2) as caught:
            if self.model is None or int(ck.lag) != int(self.model.lag):
                raise InputError("this test belongs to another model than the chosen one: choose the lag of the test "
                                 f"({ck.lag} frames) in step 2 first")
            self.n_sets.get(len(ck.members), self.model)
            set_value(self.multiples, int(len(ck.multiples)), "multiples")
            set_value(self.n_samples, int(ck.n_samples), "n_samples")
            self.uncertainty.value = check_uncertainty(getattr(ck, "uncertainty", "bootstrap"))
            flow = self._draw(ck, tuple(int(x) for x in flow_pair))
        self._show_test(ck, flow)
        self._report(f"The test of the model at lag {frames(ck.lag)} on {ck.n_sets} sets, as saved: {ck.verdict}.",
                     caught)
        return ck

    def _draw(self, ck, pair):
        flow = lag_flow(ck, pair=pair)
        self._show_figure(self.ck_plot, plot_chapman_kolmogorov(ck), "Chapman–Kolmogorov test")
        self._show_figure(self.flow_plot, plot_lag_flow(flow), "lag flow")
        return flow

    def _show_test(self, ck, flow):
        self.ck, self.flow = ck, flow
        self.pair.set_sets(ck.set_populations, flow.pair)
        self.verdict.value = _verdict_html(ck)
        self.flow_summary.value = _render.message_html(flow.summary)

    def show_flow(self, a: int, b: int):
        """Draw the lag flow of sets ``a`` and ``b`` of the last test (no new computation).

        Returns
        -------
        The result of :func:`msmkit.validate.lag_flow` (also :attr:`flow`).
        """
        with self._action("Lag flow") as caught:
            if self.ck is None:
                raise InputError("there is no test result yet: run the test first (Run test)")
            flow = lag_flow(self.ck, pair=(a, b))
            self._show_figure(self.flow_plot, plot_lag_flow(flow), "lag flow")
        self.flow = flow
        self.pair.choose(flow.pair)
        self.flow_summary.value = _render.message_html(flow.summary)
        self._report(f"Lag flow of sets {flow.pair[0]} and {flow.pair[1]}.", caught)
        return flow

    def _pair_changed(self, a, b):
        try:
            self.show_flow(a, b)
        except Exception:  # shown in the panel
            pass


def _verdict_html(ck) -> str:
    sets = "; ".join(f"set {j}: {len(s)} state{'' if len(s) == 1 else 's'}" for j, s in enumerate(ck.members))
    lines = [ck.criterion, *ck.notes, f"Sets tested: {sets}.",
             VERDICT_CAUTION, SAMPLING_CAUTION]
    return _render.message_html(lines, VERDICT_KINDS.get(ck.verdict, "failed"))
