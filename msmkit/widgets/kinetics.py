"""Step 5 of the workbench: macrostates, first-passage times, rates and reactive routes."""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import traitlets

from .._checks import check_int
from ..defaults import BOOTSTRAP_SAMPLES, ROUTE_SHARE
from ..errors import InputError
from ..posterior import check_uncertainty
from ..plots import plot_kinetics_maps, plot_macrostate_network
from . import _render
from ._base import (SAMPLES_OF, MacrostateCount, SetPair, Step, button, field, set_value, row, uncertainty_field,
                    widgets)
from ._render import frames
from .lags import SAMPLING_CAUTION

__all__ = ["KineticsPanel", "KineticsSummary"]

#: said next to every table of times and rates
METASTABILITY_CAUTION = ("First-passage times and rates between macrostates mean something when the macrostates "
                         "are metastable: separated from the faster processes by a clear gap in the timescales "
                         "(see the suggestion above).")

#: longest list of states written out in a table cell
SHOWN_STATES = 12

#: why the routes through microstates and those between macrostates can disagree
ROUTES_NOTE = ("Why the two route lists differ: a pathway through microstates carries the flux of the weakest jump on it, "
               "and the flux between two macrostates is spread over many parallel microstate jumps, so each "
               "microstate pathway carries little while the lumped route that collects them all carries much. "
               "Lumping also cancels currents running back and forth inside and between macrostates. Read the "
               "microstate pathways for mechanism, the lumped routes and the network for where the flux goes.")


@dataclasses.dataclass(eq=False)
class KineticsSummary:
    """What the kinetics step computed; every number comes from a public msmkit function.

    Attributes
    ----------
    macrostates : Macrostates
        ``model.find_macrostates(n_sets)`` (PCCA+).
    source, target : int
        Indices of the macrostates of the reactive flux.
    flux : TransitionPaths
        ``model.transition_paths(macrostates.members[source], macrostates.members[target])``.
    population_table : pandas.DataFrame
        ``macrostates.populations()``.
    passage : pandas.DataFrame
        One row per ordered pair of macrostates: ``from_macrostate``, ``to_macrostate``,
        ``mfpt`` (``macrostates.passage_time_table()``, in ``unit``) and ``rate`` (the
        transition-path-theory rate ``model.transition_paths(sets[a], sets[b]).rate_constant``, in 1/``unit``);
        with sampled models also ``mfpt_lower``, ``mfpt_upper``, ``rate_lower``, ``rate_upper``
        (``macrostates.kinetics_table()``).
    routes : pandas.DataFrame
        ``flux.routes_table(fraction, max_paths=max_paths)``; states by original label.
    fraction : float
    max_paths : int
    unit : str
    """

    macrostates: object
    source: int
    target: int
    flux: object
    population_table: pd.DataFrame
    passage: pd.DataFrame
    routes: pd.DataFrame
    fraction: float
    max_paths: int
    unit: str


#: most routes between macrostates listed above the pathway table
MACRO_ROUTES = 6


class KineticsPanel(Step):
    """Macrostates of the chosen model with their populations, first-passage times and rates
    between them, and the reactive flux and routes from one macrostate to another.

    Parameters
    ----------
    model : MarkovModel, optional
        Can be given later with :meth:`set_model`.
    n_sets : int, optional
        Number of macrostates (default: the model's suggestion, at least 2).
    fraction : float, default 0.9
        Share of the source-to-target flux the pathway list should explain.
    max_paths : int, default 20
        Most routes listed.
    progress : bool, default True

    Attributes
    ----------
    result : KineticsSummary or None (observable trait)
    macrostates : Macrostates or None
        Those of the current model only: a new model drops them.
    """

    result = traitlets.Any(None)
    def __init__(self, model=None, *, n_sets=None, fraction: float = ROUTE_SHARE, max_paths: int = 20,
                 n_samples: int = BOOTSTRAP_SAMPLES, uncertainty: str = "bootstrap", progress: bool = True):
        super().__init__(progress=progress, css_class="msmkit-kinetics")
        self.model = None
        self.labels = None
        self._setting = False
        self.n_sets = MacrostateCount("msmkit-kinetics-sets", n_sets)
        self.fraction = field(widgets.FloatText, float(fraction), "flux share to explain",
                              "List routes until they carry this share of the source → target flux")
        self.max_paths = field(widgets.IntText, int(max_paths), "routes shown", "Most routes listed")
        self.n_samples = field(widgets.IntText, int(n_samples), "samples for intervals",
                               "Sampled models behind the intervals of the populations, passage times and rates "
                               "(0: estimates only)")
        self.n_samples.add_class("msmkit-kinetics-samples")
        self.uncertainty = uncertainty_field(uncertainty, "msmkit-kinetics-uncertainty",
                                             "the populations, passage times and rates")
        self.compute_button = button("Compute", "msmkit-kinetics-button",
                                     "Find the macrostates and the times, rates and routes between them",
                                     icon="random")
        self._on_click(self.compute_button, self.compute)
        self.pair = SetPair("reactive flux from", "to", "msmkit-flux-pair", self._pair_changed,
                            "Source and target macrostates of the reactive flux")
        for w in (self.fraction, self.max_paths):
            w.observe(self._path_settings_changed, names="value")

        self.populations_html = widgets.HTML(layout=widgets.Layout(max_height="300px", overflow="auto"))
        self.populations_html.add_class("msmkit-macro-populations")
        self.passage_html = widgets.HTML(layout=widgets.Layout(max_height="300px", overflow="auto"))
        self.passage_html.add_class("msmkit-passage-table")
        self.cautions = widgets.HTML()
        self.cautions.add_class("msmkit-kinetics-cautions")
        self.flux_summary = widgets.HTML()
        self.flux_summary.add_class("msmkit-flux-summary")
        self.pathways_html = widgets.HTML(layout=widgets.Layout(max_height="360px", overflow="auto"))
        self.pathways_html.add_class("msmkit-routes-table")
        self.centers = None
        self.coordinate_names = ("coordinate 1", "coordinate 2")
        self.network_plot = widgets.Output(layout=widgets.Layout(min_height="40px", width="100%", overflow="auto"))
        self.maps_plot = widgets.Output(layout=widgets.Layout(min_height="40px", width="100%", overflow="auto"))
        for out, name in ((self.network_plot, "msmkit-network-plot"), (self.maps_plot, "msmkit-kinetics-maps")):
            out.add_class(name)
            out.add_class("msmkit-plot")
        self._plots = [self.network_plot, self.maps_plot]
        self.routes_note = widgets.HTML(_render.message_html(ROUTES_NOTE))

        intro = widgets.HTML(_render.message_html(
            "Macrostates (PCCA+) group the microstates into long-lived sets. For every pair of them: the mean "
            "first-passage time and the rate from transition path theory; for one chosen pair: the reactive "
            "flux and the routes that carry it, microstate by microstate."))
        settings = row([
            widgets.VBox([self.n_sets.field, widgets.HBox([self.compute_button, self.cancel_button, self.progress_bar])]),
            widgets.VBox([self.n_samples, self.uncertainty]),
            widgets.VBox([self.fraction, self.max_paths]),
        ])
        self.children = [intro, settings, self.n_sets.reason, self.status, self.populations_html, self.passage_html,
                         self.cautions, widgets.HTML("<b>Reactive flux and routes</b>"), self.pair,
                         self.flux_summary, self.network_plot, self.maps_plot, self.routes_note, self.pathways_html,
                         self._figure_row(["macrostate network", "kinetics maps"])]
        self.set_model(model)

    # -- inputs ------------------------------------------------------------------------------
    def set_labels(self, labels):
        """The label trajectories of the model, resampled for bootstrap intervals."""
        self.labels = labels

    def set_centers(self, centers, names=None):
        """Microstate centers by original label (rows), for the pictures on the state map; None:
        the network picture only."""
        self.centers = None if centers is None else np.asarray(centers, dtype=float)
        if names is not None:
            self.coordinate_names = tuple(str(n) for n in names)

    def set_model(self, model):
        """A new model: the previous macrostates are dropped and the suggested number shown."""
        self.model = model
        self.n_sets.update(model)
        self.result = None
        for out in self._plots:
            _render.clear(out)
        for w in (self.populations_html, self.passage_html, self.cautions, self.flux_summary, self.pathways_html):
            w.value = ""
        self.pair.clear()
        if model is None:
            _render.show_message(self.status, "No model yet: choose a lag in step 2.")
        else:
            _render.show_message(self.status, f"Model at lag {frames(model.lag)} ({model.lag_time:g} {model.unit}): "
                                              f"compute the macrostates.")

    @property
    def macrostates(self):
        """The macrostates of the current model (None before :meth:`compute`)."""
        return None if self.result is None else self.result.macrostates

    # -- actions -----------------------------------------------------------------------------
    def compute(self, n_sets=None, source=None, target=None, *, fraction=None, max_paths=None, n_samples=None,
                uncertainty=None):
        """Macrostates, their populations, first-passage times and rates, and the reactive flux
        from ``source`` to ``target``; given arguments replace the panel's settings first.

        Parameters
        ----------
        n_sets : int, optional
            Number of macrostates (default: the field, preset to the model's suggestion).
        source, target : int, optional
            Macrostate indices (0 = most populated). Default: the pair chosen in the panel when
            it still exists, else 0 and 1.
        fraction, max_paths : optional
            Route list settings.
        n_samples, uncertainty : optional
            Sampled models behind the intervals (:func:`msmkit.sample_models`); the bootstrap
            needs the label trajectories (:meth:`set_labels`), without them there are no intervals.

        Returns
        -------
        KineticsSummary
            Also in :attr:`result`.
        """
        with self._action("Macrostates and kinetics", total=4) as caught:
            self._set_path_settings(fraction, max_paths)
            if self.model is None:
                raise InputError("there is no model yet: make microstates (step 1), then scan and choose a lag "
                                 "(step 2)")
            model = self.model
            m = self.n_sets.get(n_sets, model)
            source, target = _check_pair(*_default_pair(source, target, self.pair.value, m), m)
            if n_samples is not None:
                set_value(self.n_samples, check_int(n_samples, "n_samples", minimum=0), "n_samples")
            if uncertainty is not None:
                self.uncertainty.value = check_uncertainty(uncertainty)
            method, count = self.uncertainty.value, max(int(self.n_samples.value), 0)
            if method == "bootstrap" and self.labels is None:
                count = 0  # nothing to resample
            self._stage(1, 3, "macrostates")
            macro = model.find_macrostates(m, labels=self.labels, n_samples=count, uncertainty=method, seed=0,
                                           cancel=self._cancel_point(count + 3, start=1, what="sampling models"))
            result = self._summarize(macro, source, target)
        self._show_result(result)
        self._report(f"{m} macrostates of the model at lag {frames(model.lag)}; reactive flux from macrostate "
                     f"{source} to {target}.", caught)
        return result

    def restore(self, macrostates, source=0, target=1):
        """Show macrostates found before (e.g. read from a session file) for the current model:
        their tables, times, rates and flux, without finding them again.

        Returns
        -------
        KineticsSummary
        """
        with self._action("Restoring the macrostates", total=4) as caught:
            if self.model is None:
                raise InputError("there is no model yet to restore macrostates for: choose a lag (step 2)")
            if not np.array_equal(macrostates.states, self.model.states):
                raise InputError("these macrostates belong to another model (other states) than the chosen one")
            m = macrostates.n_sets
            source, target = _check_pair(source, target, m)
            self.n_sets.get(m, self.model)
            result = self._summarize(macrostates, source, target)
        self._show_result(result)
        self._report(f"{m} macrostates of the model at lag {frames(self.model.lag)}, as saved; reactive flux from "
                     f"macrostate {source} to {target}.", caught)
        return result

    def _summarize(self, macro, source, target):
        """Tables, flux and figures of ``macro`` for the current model (inside an action)."""
        model, m = self.model, macro.n_sets
        empty = [j for j, s in enumerate(macro.members) if s.size == 0]
        if empty:
            raise InputError(f"n_sets={m}: macrostate(s) {empty} hold no state by largest membership, so no "
                             f"time or flux can be given for them; choose fewer macrostates")
        populations = macro.populations()
        self._stage(2, 3, "rates and flux")
        table = macro.kinetics_table()
        passage = pd.DataFrame({"from_macrostate": table["from_set"], "to_macrostate": table["to_set"],
                                "mfpt": table["passage_time"], "rate": table["rate_constant"]})
        for ours, theirs in (("mfpt", "passage_time"), ("rate", "rate_constant")):
            for end in ("lower", "upper"):
                if f"{theirs}_{end}" in table.columns:
                    passage[f"{ours}_{end}"] = table[f"{theirs}_{end}"].to_numpy()
        passage.attrs.update(table.attrs, unit=model.unit)
        result = self._with_flux(KineticsSummary(macro, source, target, None, populations, passage, None,
                                                 self.fraction.value, self.max_paths.value, model.unit))
        self._stage(3, 4, "drawing")
        self._draw(result)
        return result

    def _show_result(self, result):
        model = self.model
        self.result = result
        self.pair.set_sets(result.macrostates.stationary_populations, (result.source, result.target))
        self.populations_html.value = _populations_html(result, model)
        self.passage_html.value = _passage_html(result, model)
        self.cautions.value = _cautions_html(result, model)
        self._show_flux()

    def select_pair(self, source, target, *, fraction=None, max_paths=None):
        """Reactive flux and routes between two other macrostates (the macrostates stay).

        Returns
        -------
        KineticsSummary
        """
        with self._action("Reactive flux") as caught:
            self._set_path_settings(fraction, max_paths)
            if self.result is None:
                raise InputError("there are no macrostates yet: compute them first (Compute)")
            source, target = _check_pair(source, target, self.result.macrostates.n_sets)
            result = self._with_flux(dataclasses.replace(self.result, source=source, target=target,
                                                         fraction=self.fraction.value,
                                                         max_paths=self.max_paths.value))
            self._draw(result)
        self.result = result
        self.pair.choose((source, target))
        self._show_flux()
        self._report(f"Reactive flux from macrostate {source} to {target}.", caught)
        return result

    # -- helpers -----------------------------------------------------------------------------
    def _set_path_settings(self, fraction, max_paths):
        self._setting = True  # the caller recomputes; the fields' observers need not
        try:
            if fraction is not None:
                set_value(self.fraction, fraction, "fraction")
            if max_paths is not None:
                set_value(self.max_paths, check_int(max_paths, "max_paths", minimum=1), "max_paths")
        finally:
            self._setting = False

    def _with_flux(self, result):
        """``result`` with the flux and routes between the macrostates it names (inside an action)."""
        sets = result.macrostates.members
        flux = self.model.transition_paths(sets[result.source], sets[result.target])
        paths = flux.routes_table(result.fraction, max_paths=check_int(result.max_paths, "routes shown",
                                                                         minimum=1))
        return dataclasses.replace(result, flux=flux, routes=paths)

    def _draw(self, result):
        """The network of macrostates and, with centers, the pictures on the state map."""
        macro = result.macrostates
        lumped = result.flux.lump(macro.members)
        self._show_figure(self.network_plot, plot_macrostate_network(lumped), "macrostate network")
        if self.centers is not None and self.centers.shape[0] > int(np.max(self.model.states)):
            fig = plot_kinetics_maps(self.centers[self.model.states], self.model, macro, result.flux,
                                     names=self.coordinate_names, pair=(result.source, result.target))
            self._show_figure(self.maps_plot, fig, "kinetics maps")
        else:
            _render.clear(self.maps_plot)

    def _show_flux(self):
        self.flux_summary.value = _flux_html(self.result)
        self.pathways_html.value = _pathways_html(self.result)

    def _pair_changed(self, source, target):
        try:
            self.select_pair(source, target)
        except Exception:  # shown in the panel
            pass

    def _path_settings_changed(self, change):
        if self.result is not None and not self._setting:
            self._pair_changed(self.result.source, self.result.target)


def _default_pair(source, target, chosen, m):
    """Fill in a missing source or target: the pair chosen in the panel when it fits ``m``
    macrostates, else 0 and 1, never the same macrostate twice."""
    first, second = chosen if chosen is not None and max(chosen) < m else (0, 1)
    if source is None:
        source = first if first != target else second
    if target is None:
        target = second if second != source else first
    return source, target


def _check_pair(source, target, m):
    source = check_int(source, "source", minimum=0, maximum=m - 1)
    target = check_int(target, "target", minimum=0, maximum=m - 1)
    if source == target:
        raise InputError(f"source and target must be two different macrostates (0..{m - 1}), but both are "
                         f"{source}; choose another target")
    return source, target


def _states_text(states) -> str:
    states = [int(s) for s in states]
    shown = ", ".join(str(s) for s in states[:SHOWN_STATES])
    return f"{len(states)}: {shown}{' …' if len(states) > SHOWN_STATES else ''}"


def _populations_html(result, model) -> str:
    df = result.population_table
    has_interval = "population_lower" in df.columns
    shown = pd.DataFrame({"macrostate": df["macrostate"], "population": df["population"]})
    if has_interval:
        shown["95% interval"] = [f"{lo:.3g} – {hi:.3g}" for lo, hi in zip(df["population_lower"],
                                                                        df["population_upper"])]
    shown["free energy (kT)"] = df["free_energy_kT"]
    shown["microstates (count: labels)"] = [_states_text(s) for s in df["states"]]
    interval = ("" if has_interval else " No interval: these populations come from the one chosen model, "
                                        "without resampling.")
    caption = (f"PCCA+ macrostates of the model at lag {frames(model.lag)} ({model.lag_time:g} {model.unit}), most "
               f"populated first; population = stationary probability weighted by membership (crispness "
               f"{result.macrostates.crispness:.3g} of 1).{interval}")
    return _render.table_html(shown, caption=caption,
                              formatters={"population": "{:.4g}".format, "free energy (kT)": "{:.3f}".format})


def _passage_html(result, model) -> str:
    df = result.passage
    unit = model.unit
    shown = pd.DataFrame({"from": df["from_macrostate"], "to": df["to_macrostate"],
                          f"mean first-passage time ({unit})": df["mfpt"]})
    sampled = "mfpt_lower" in df.columns
    if sampled:
        shown["95% interval (time)"] = [f"{lo:.3g} – {hi:.3g}" for lo, hi in zip(df["mfpt_lower"], df["mfpt_upper"])]
    shown[f"rate (1/{unit})"] = df["rate"]
    if sampled:
        shown["95% interval (rate)"] = [f"{lo:.3g} – {hi:.3g}" for lo, hi in zip(df["rate_lower"], df["rate_upper"])]
    samples = result.macrostates.samples
    interval = (f" Intervals from {samples.propagators.shape[0]} {SAMPLES_OF[samples.uncertainty]}."
                if sampled else " No intervals: the numbers come from the one chosen model.")
    caption = (f"Between macrostates: mean first-passage time into the target, starting from the stationary "
               f"distribution inside the source (at the resolution of the lag time, {model.lag_time:g} {unit}), "
               f"and the transition-path-theory rate (reactive events per time spent last in the source), in "
               f"{unit}.{interval}")
    fmt = "{:.4g}".format
    return _render.table_html(shown, caption=caption, formatters={f"mean first-passage time ({unit})": fmt,
                                                                  f"rate (1/{unit})": fmt})


def _cautions_html(result, model) -> str:
    df = result.passage
    unit = model.unit
    lines = []
    short = df[df["mfpt"] < model.lag_time]
    for _, r in short.iterrows():
        lines.append(f"The first-passage time from {int(r.from_macrostate)} to {int(r.to_macrostate)} "
                     f"({r.mfpt:.3g} {unit}) is shorter than the lag time ({model.lag_time:g} {unit}): the model "
                     f"cannot resolve it.")
    frames_per_run = model.metadata.get("frames_per_run")
    if frames_per_run:
        simulated = float(np.sum(frames_per_run)) * model.dt
        long = df[df["mfpt"] > simulated]
        for _, r in long.iterrows():
            lines.append(f"The first-passage time from {int(r.from_macrostate)} to {int(r.to_macrostate)} "
                         f"({r.mfpt:.3g} {unit}) exceeds all the simulated time together ({simulated:g} {unit}): "
                         f"the data hold less than one such event on average, so the number extrapolates the "
                         f"model.")
    kind = "warning" if lines else "info"
    return _render.message_html(lines + [METASTABILITY_CAUTION, SAMPLING_CAUTION], kind)


def _flux_html(result) -> str:
    flux = result.flux
    unit = result.unit
    paths = result.routes
    carried = float(paths["cumulative_share"].iloc[-1]) if len(paths) else 0.0
    lines = [f"From macrostate {result.source} to {result.target}: rate {flux.rate_constant:.4g} per {unit}; one reactive "
             f"event every {flux.mean_time_between_events:.4g} {unit} on average (total flux "
             f"{flux.throughput:.4g} per lag step)."]
    routes = flux.lump(result.macrostates.members).routes(fraction=1.0, max_paths=MACRO_ROUTES)
    lines.append("Routes between macrostates (flux lumped onto them): " + "; ".join(
        f"{' → '.join(str(j) for j in r.states)} carries {100 * r.share:.3g}%" for r in routes) + ".")
    if len(paths) and carried < result.fraction * (1 - 1e-9):
        lines.append(f"The {len(paths)} strongest routes carry {100 * carried:.3g}% of the flux, short of the "
                     f"{100 * result.fraction:g}% asked for: the flux is spread over many routes; raise "
                     f"'routes shown' to list more.")
    return _render.message_html(lines)


def _pathways_html(result) -> str:
    paths = result.routes
    owner = result.macrostates.macro_of
    route = []
    for states in paths["states"]:
        through = [owner[int(s)] for s in states]
        route.append(" → ".join(str(j) for k, j in enumerate(through) if k == 0 or j != through[k - 1]))
    shown = pd.DataFrame({"pathway": paths["pathway"],
                          "microstates": [" → ".join(str(int(s)) for s in p) for p in paths["states"]],
                          "through macrostates": route, "jumps": paths["length"],
                          "flux (per lag step)": paths["flux"], "share": paths["share"],
                          "cumulative share": paths["cumulative_share"]})
    caption = (f"Pathways from macrostate {result.source} to {result.target}, strongest first (each carries the "
               f"flux of the weakest jump on the path); microstates by original label.")
    fmt = "{:.3g}".format
    return _render.table_html(shown, caption=caption, formatters={"flux (per lag step)": fmt, "share": fmt,
                                                                  "cumulative share": fmt})
