"""Step 1 of the workbench: from features to microstates."""
from __future__ import annotations

import numpy as np
import traitlets

from .._checks import as_float_trajectories, check_int, feature_names_of
from ..cli import SPREAD_RATIO_CAUTION
from ..errors import InputError
from ..io import TrajectorySet, default_feature_names
from ..plots import plot_cross_validation, plot_state_map
from ..reduce import TICA
from ..session import trajectories_fingerprint
from ..states import Microstates
from ..validate import cross_validate
from . import _render
from ._base import DESCRIPTION_WIDTH, Step, button, field, parse_int_list, set_value, row, widgets

__all__ = ["StatesPanel"]

METHODS = (("k-means", "kmeans"), ("mini-batch k-means", "minibatch"))
#: how features are clustered without TICA (the same choices as ``msmkit build --scale``)
SCALES = (("standardized", "standard"), ("as they are", "none"))


class StatesPanel(Step):
    """Choose features, optionally reduce them with TICA, and cluster frames into microstates.

    Parameters
    ----------
    trajs : 2-D array, list of them, or a TrajectorySet
        The runs (frames x features).
    features : list of str, optional
        Feature names to use (default all). Names come from a TrajectorySet or DataFrame;
        otherwise they are ``x0, x1, ...``.
    use_tica : bool, default True
        Reduce the features with TICA before clustering.
    tica_lag : int, default 10
        TICA lag in frames.
    tica_dim : int, default 2
        TICA dimensions kept.
    n_states : int, default 100
        Number of microstates.
    method : {"kmeans", "minibatch"}
    scale : {"standard", "none"}, default "standard"
        Without TICA: cluster the features standardized to mean 0 and standard deviation 1
        (``"standard"``, as ``msmkit build --scale standard``) or as they are. TICA coordinates
        do not depend on the features' units, so with TICA the features are not scaled.
    stride : int, default 1
        Cluster on every ``stride``-th frame (all frames are labeled).
    seed : int, default 0
    progress : bool, default True
        Count units of work (lags, bootstrap samples) on the progress bar, not only stages.

    Attributes
    ----------
    labels : list of int32 ndarray or None
        Microstate label trajectories after clustering (observable trait).
    microstates : Microstates or None
    tica : TICA or None
    coordinates : list of ndarray or None
        The coordinates that were clustered (TICA output or the chosen features).
    settings : dict or None
        The settings the current microstates were made with (the fields may have changed since).
    feature_scaling : (mean, scale) or None
        Per-feature mean and scale the clustered features were standardized with (None: not
        scaled).
    feature_names : tuple of str
    n_frames : list of int
        Frames per run.
    compared : CrossValidation or None
        The last :meth:`compare_states` of the current coordinates.
    """

    labels = traitlets.Any(None)
    interrupt_thread = True  # scikit-learn's k-means has no cancel points of its own

    def __init__(self, trajs, *, features=None, use_tica: bool = True, tica_lag: int = 10, tica_dim: int = 2,
                 n_states: int = 100, method: str = "kmeans", stride: int = 1, seed: int = 0,
                 scale: str = "standard", progress: bool = True):
        super().__init__(progress=progress, css_class="msmkit-states")
        names = feature_names_of(trajs)
        self._runs = as_float_trajectories(trajs, "trajs")
        self.feature_names = tuple(names) if names is not None else default_feature_names(self._runs[0].shape[1])
        self.microstates = None
        self.tica = None
        self.coordinates = None
        self.settings = None
        self.feature_scaling = None
        self.n_frames = [int(r.shape[0]) for r in self._runs]

        self.features = widgets.SelectMultiple(
            options=self.feature_names, value=self.feature_names, description="features",
            rows=min(6, len(self.feature_names)), style={"description_width": DESCRIPTION_WIDTH},
            layout=widgets.Layout(width="350px"),
            tooltip="Features to build states from (ctrl/shift-click to choose several)")
        self.features.add_class("msmkit-features")
        if features is not None:
            self.features.value = self._known_features(features)
        self.use_tica = widgets.Checkbox(value=bool(use_tica), description="reduce with TICA first",
                                         style={"description_width": DESCRIPTION_WIDTH},
                                         layout=widgets.Layout(width="350px"))
        self.tica_lag = field(widgets.IntText, int(tica_lag), "TICA lag (frames)",
                              "Lag of the time-lagged correlations TICA looks for, in frames")
        self.tica_dim = field(widgets.IntText, int(tica_dim), "TICA dimensions",
                              "Number of slow TICA coordinates to cluster in")
        self.scale = field(widgets.Dropdown, _check_scale(scale), "features without TICA", options=SCALES,
                           tooltip="Without TICA, k-means compares the features in their own units: "
                                   "standardize them (mean 0, standard deviation 1) when their units or spreads differ. TICA "
                                   "coordinates do not depend on the features' units.")
        self.scale.add_class("msmkit-feature-scale")
        self.n_states = field(widgets.IntText, int(n_states), "microstates", "Number of clusters (microstates)")
        self.n_states.add_class("msmkit-n-states")
        self.method = field(widgets.Dropdown, method, "method", options=METHODS)
        self.stride = field(widgets.IntText, int(stride), "stride (frames)",
                            "Frames used to place the centers; every frame still gets a label")
        self.seed = field(widgets.IntText, int(seed), "seed", "Same seed, same states")
        self.cluster_button = button("Cluster", "msmkit-cluster-button", "Make microstates with these settings",
                                     icon="th")
        self._on_click(self.cluster_button, self.make_states)
        self.use_tica.observe(self._tica_switched, names="value")
        self._tica_switched()
        self.map = widgets.Output(layout=widgets.Layout(min_height="60px", width="100%", overflow="auto"))
        self.map.add_class("msmkit-state-map")
        self.map.add_class("msmkit-plot")
        self.variance_note = widgets.HTML()
        self.variance_note.add_class("msmkit-kinetic-variance")
        self.variance_plot = widgets.Output(layout=widgets.Layout(width="100%", max_width="480px", overflow="auto"))
        self.variance_plot.add_class("msmkit-kinetic-variance-plot")
        self.variance_plot.add_class("msmkit-plot")

        self.compare_counts = field(widgets.Text, "", "microstate counts",
                                    "Numbers of microstates to compare, e.g. 20, 50, 100, 200", width="420px")
        self.compare_counts.add_class("msmkit-compare-counts")
        self.compare_lag = field(widgets.IntText, int(tica_lag), "score lag (frames)",
                                 "Lag of the models whose held-out score is compared (the same for every count)")
        self.compare_folds = field(widgets.IntText, min(5, max(len(self._runs), 2)), "folds of whole runs",
                                   "The runs are split into this many groups; each is held out once")
        self.compare_button = button("Cross-validate", "msmkit-compare-button",
                                     "Score each number of microstates on held-out runs (VAMP-2)", icon="balance-scale")
        self._on_click(self.compare_button, self.compare_states)
        self.compare_note = widgets.HTML()
        self.compare_note.add_class("msmkit-compare-note")
        self.compare_plot = widgets.Output(layout=widgets.Layout(width="100%", max_width="640px", overflow="auto"))
        self.compare_plot.add_class("msmkit-compare-plot")
        self.compare_plot.add_class("msmkit-plot")
        self.compared = None

        intro = widgets.HTML(_render.message_html(
            f"{len(self._runs)} runs, {sum(self.n_frames)} frames, {len(self.feature_names)} features. Choose "
            f"the features, reduce them to slow coordinates (optional), and cluster the frames into "
            f"microstates."))
        settings = row([
            widgets.VBox([self.features, self.scale, self.use_tica, self.tica_lag, self.tica_dim]),
            widgets.VBox([self.n_states, self.method, self.stride, self.seed,
                          widgets.HBox([self.cluster_button, self.cancel_button, self.progress_bar])]),
        ])
        compare = widgets.VBox([
            widgets.HTML("<b>How many microstates?</b>"),
            widgets.HTML(_render.message_html(
                "Cross-validation: for each count, microstates and a model are fitted on some runs and the "
                "model's slow processes are scored (VAMP-2) on the runs held out. Too few states miss slow "
                "processes, too many fit noise: the held-out score peaks in between. Uses the coordinates "
                "of the last Cluster.")),
            row([widgets.VBox([self.compare_counts, self.compare_lag]),
                 widgets.VBox([self.compare_folds, self.compare_button])]),
            self.compare_note, self.compare_plot])
        self._plots = [self.map, self.variance_plot, self.compare_plot]
        self.children = [intro, settings, self.status, self.map, self.variance_note, self.variance_plot, compare,
                         self._figure_row(["microstate map", "kinetic variance", "cross-validation"])]

    def _known_features(self, features) -> tuple:
        features = [features] if isinstance(features, str) else list(features)
        unknown = [f for f in features if f not in self.feature_names]
        if unknown:
            raise InputError(f"features {unknown} are not among the feature names {list(self.feature_names)}; "
                             f"choose from those")
        return tuple(features)

    def _tica_switched(self, change=None):
        self.tica_lag.disabled = self.tica_dim.disabled = not self.use_tica.value
        self.scale.disabled = self.use_tica.value

    def make_states(self, n_states=None, seed=None, *, features=None, use_tica=None, tica_lag=None,
                    tica_dim=None, method=None, stride=None, scale=None):
        """Cluster with the panel's settings; given arguments replace the settings first.

        Returns
        -------
        Microstates
            Also stored as :attr:`microstates`, with the labels in :attr:`labels`.

        Raises
        ------
        InputError
            For a bad setting (also shown in the panel).
        """
        with self._action("Making microstates", total=4) as caught:
            for name, value in (("n_states", n_states), ("seed", seed), ("tica_lag", tica_lag),
                                ("tica_dim", tica_dim), ("stride", stride)):
                if value is not None:
                    set_value(getattr(self, name), check_int(value, name), name)
            if method is not None:
                if method not in dict(METHODS).values():
                    raise InputError(f"method must be 'kmeans' or 'minibatch', but got {method!r}")
                self.method.value = method
            if scale is not None:
                self.scale.value = _check_scale(scale)
            if use_tica is not None:
                self.use_tica.value = bool(use_tica)
            if features is not None:
                self.features.value = self._known_features(features)

            chosen = list(self.features.value)
            if not chosen:
                raise InputError("features: choose at least one feature")
            runs = self._selected(chosen)
            self._stage(1, 4, "TICA" if self.use_tica.value else "features")
            tica, scaling, extra = None, None, []
            if not self.use_tica.value:
                runs, scaling, extra = _scaled(runs, self.scale.value)
            if self.use_tica.value:
                tica = TICA(self.tica_lag.value, dim=self.tica_dim.value, progress=False).fit(runs)
                coords = list(tica.transform(runs))
            else:
                coords = list(runs)
            self._stage(2, 4, "clustering")
            micro = Microstates(self.n_states.value, method=self.method.value, stride=self.stride.value,
                                seed=self.seed.value, progress=False).fit(coords)
            self._stage(3, 4, "drawing")
            self._draw(coords, micro, tica, chosen)
        settings = {"features": list(chosen), "use_tica": tica is not None,
                    "tica_lag": int(self.tica_lag.value) if tica is not None else None,
                    "tica_dim": int(tica.dim_) if tica is not None else None,
                    "scale": self.scale.value if tica is None else "none",
                    "n_states": int(micro.centers_.shape[0]), "method": self.method.value,
                    "stride": int(self.stride.value), "seed": int(self.seed.value)}
        how = (f"TICA (lag {self.tica_lag.value} frames, {tica.dim_} dimensions) of {len(chosen)} features"
               if tica is not None else f"{len(chosen)} features"
               f"{' (standardized)' if scaling is not None else ''}")
        self._finish(micro, tica, coords, scaling, settings, caught + extra,
                     f"{micro.centers_.shape[0]} microstates from {how}. Next: scan lag times (step 2).")
        return micro

    def compare_states(self, n_states=None, lag=None, n_folds=None):
        """Cross-validated VAMP-2 scores of several numbers of microstates
        (:func:`msmkit.cross_validate`) in the coordinates of the last :meth:`make_states`, clustered
        with the panel's method, stride and seed; given arguments replace the fields first.

        Returns
        -------
        CrossValidation
            Also in :attr:`compared`.
        """
        with self._action("Cross-validating numbers of microstates", total=3) as caught:
            if n_states is not None:
                self.compare_counts.value = ", ".join(str(x) for x in parse_int_list(n_states, "n_states"))
            for name, value in (("compare_lag", lag), ("compare_folds", n_folds)):
                if value is not None:
                    set_value(getattr(self, name), check_int(value, name), name)
            if self.coordinates is None:
                raise InputError("there are no coordinates yet: Cluster first (the comparison uses the same "
                                 "features, scaling and TICA)")
            if not self.compare_counts.value.strip():
                made = int(self.microstates.centers_.shape[0])
                self.compare_counts.value = ", ".join(str(x) for x in sorted({max(2, made // 4), max(2, made // 2),
                                                                                made, 2 * made}))
            counts = parse_int_list(self.compare_counts.value, "microstate counts")
            folds = check_int(self.compare_folds.value, "folds of whole runs", minimum=2)
            method, stride, seed = self.method.value, int(self.stride.value), int(self.seed.value)
            units = folds * len(counts)
            self._stage(0, 1, f"{len(counts)} counts x {folds} folds")
            result = cross_validate(self.coordinates, counts, check_int(self.compare_lag.value, "score lag", minimum=1),
                                    n_folds=folds, seed=seed,
                                    cluster=lambda n: Microstates(n, method=method, stride=stride, seed=seed,
                                                                  progress=False),
                                    cancel=self._cancel_point(units + 1, what="cross-validation"))
            self._stage(units, units + 1, "drawing")
            self._show_figure(self.compare_plot, plot_cross_validation(result), "cross-validation")
        self.compared = result
        best = result.best[int(result.lags[0])]
        spread = result.spread[:, 0]
        top = int(np.nanargmax(result.mean[:, 0]))
        close = [int(n) for n, m in zip(result.n_states, result.mean[:, 0])
                 if m >= result.mean[top, 0] - spread[top]]
        lines = [f"Highest mean held-out score: {best} microstates (lag {int(result.lags[0])} frames, "
                 f"{result.n_folds} folds). Counts within one standard deviation of it: {', '.join(map(str, close))}; "
                 f"the smallest of those is the economical choice.", *result.notes]
        if self.tica is not None:
            lines.append("TICA was fitted on all runs, so the held-out runs are not wholly unseen; the comparison "
                         "between counts is still fair.")
        self.compare_note.value = _render.message_html(lines)
        self._report(f"Cross-validated {len(counts)} numbers of microstates over {folds} folds of whole runs.", caught)
        return result

    def restore(self, microstates, tica=None, feature_scaling=None, settings=None):
        """Show microstates made before (e.g. read from a session file) of these trajectories,
        without clustering again: the map is drawn from the frames projected with ``tica`` (or
        scaled with ``feature_scaling``), and the labels go to the later steps.

        Parameters
        ----------
        microstates : Microstates
            Fitted on these trajectories (one label array per run).
        tica : TICA, optional
        feature_scaling : (mean, scale), optional
        settings : dict, optional
            The settings they were made with (:attr:`settings`); shown in the fields.

        Returns
        -------
        Microstates
        """
        with self._action("Restoring the microstates", total=2) as caught:
            settings = dict(settings or {})
            if settings:
                self.features.value = self._known_features(settings["features"])
                self.use_tica.value = bool(settings["use_tica"])
                for name in ("tica_lag", "tica_dim", "n_states", "stride", "seed"):
                    if settings.get(name) is not None:
                        set_value(getattr(self, name), int(settings[name]), name)
                self.method.value = settings.get("method", self.method.value)
                self.scale.value = _check_scale(settings.get("scale", self.scale.value)) if tica is None \
                    else self.scale.value
            chosen = list(self.features.value)
            labels = list(microstates.labels_)
            if [len(r) for r in labels] != self.n_frames:
                raise InputError(f"these microstates label runs of {[len(r) for r in labels]} frames, but the "
                                 f"trajectories here have {self.n_frames}: they were made from other data")
            runs = self._selected(chosen)
            if tica is not None:
                coords = list(tica.transform(runs))
            elif feature_scaling is not None:
                mean, scale = (np.asarray(a, dtype=float) for a in feature_scaling)
                coords = [(np.asarray(r, dtype=float) - mean) / scale for r in runs]
            else:
                coords = [np.asarray(r, dtype=float) for r in runs]
            if microstates.centers_.shape[1] != coords[0].shape[1]:
                raise InputError(f"the microstate centers have {microstates.centers_.shape[1]} coordinates, the "
                                 f"frames {coords[0].shape[1]}: these microstates belong to other settings")
            self._stage(1, 2, "drawing")
            self._draw(coords, microstates, tica, chosen)
        settings = settings or {"features": chosen, "use_tica": tica is not None,
                                "tica_lag": int(tica.lag_) if tica is not None else None,
                                "tica_dim": int(tica.dim_) if tica is not None else None,
                                "scale": "standard" if feature_scaling is not None else "none",
                                "n_states": int(microstates.centers_.shape[0]), "method": self.method.value,
                                "stride": int(self.stride.value), "seed": int(self.seed.value)}
        self._finish(microstates, tica, coords, feature_scaling, settings, caught,
                     f"{microstates.centers_.shape[0]} microstates, as saved (not clustered again).")
        return microstates

    def fingerprint(self) -> str:
        """SHA-256 of the trajectories of this panel (all features), to match session files."""
        return trajectories_fingerprint(self._runs)

    def _selected(self, chosen):
        cols = [self.feature_names.index(f) for f in chosen]
        return TrajectorySet([np.asarray(r)[:, cols] for r in self._runs], chosen)

    def _draw(self, coords, micro, tica, chosen):
        names = tica.get_feature_names_out() if tica is not None else tuple(chosen)
        fig = plot_state_map(coords, micro.centers_, micro.counts_, names=tuple(names))
        self._show_figure(self.map, fig, "microstate map")
        if tica is not None:
            self._show_figure(self.variance_plot, plot_kinetic_variance(tica), "kinetic variance")
        else:
            _render.clear(self.variance_plot)

    def _finish(self, micro, tica, coords, scaling, settings, caught, done):
        self.variance_note.value = "" if tica is None else _render.message_html(kinetic_variance_text(tica))
        self.tica, self.microstates, self.coordinates = tica, micro, coords
        self.feature_scaling = scaling
        self.compared, self.compare_note.value = None, ""  # scores of other coordinates no longer apply
        _render.clear(self.compare_plot)
        self.settings = settings
        low = int((micro.counts_ < 10).sum())
        extra = [f"{low} states hold fewer than 10 frames: their transitions are poorly sampled."] if low else []
        self._report(done, caught, extra)
        self.labels = micro.labels_


def _check_scale(scale) -> str:
    if scale not in dict(SCALES).values():
        raise InputError(f"scale must be 'standard' (features standardized to mean 0, sd 1) or 'none' (as they "
                         f"are), but got {scale!r}")
    return scale


def _scaled(runs, scale):
    """The runs to cluster without TICA: (runs, (mean, scale) or None, cautions)."""
    if scale == "standard":
        scaled = runs.standardized()
        return scaled.in_memory(), (scaled.feature_mean, scaled.feature_scale), []
    _, sd = runs.feature_spread()
    live = sd[sd > 0]
    if live.size > 1 and live.max() > SPREAD_RATIO_CAUTION * live.min():
        return runs, None, [f"The features are clustered as they are and their standard deviations range from "
                            f"{live.min():.3g} to {live.max():.3g}: the widest decide the states. Standardize "
                            f"them ('features without TICA') or reduce them with TICA."]
    return runs, None, []


def kinetic_variance_text(tica) -> list[str]:
    """The kinetic-variance guide to the TICA dimension, in words (from
    ``tica.cumulative_kinetic_variance_``: cumulative sums of squared TICA eigenvalues over the
    whole spectrum, normalized to 1)."""
    cum = np.asarray(tica.cumulative_kinetic_variance_, dtype=float)
    dim = int(tica.dim_)
    lines = [f"The {dim} TICA coordinate{'s' if dim != 1 else ''} kept hold{'' if dim != 1 else 's'} "
             f"{100 * cum[dim - 1]:.3g}% of the kinetic variance (squared TICA eigenvalues, summed over all "
             f"{cum.size} components)."]
    if dim < cum.size:
        need = {level: int(np.searchsorted(cum, level - 1e-12) + 1) for level in (0.8, 0.9, 0.95)}
        lines.append(f"{dim + 1} would hold {100 * cum[dim]:.3g}%; 80%, 90% and 95% need "
                     f"{need[0.8]}, {need[0.9]} and {need[0.95]} coordinates.")
    lines.append("More coordinates keep more of the slow motion but spread the microstates over more "
                 "dimensions, so each holds fewer frames.")
    return lines


def plot_kinetic_variance(tica, *, width=4.6, height=2.7):
    """Share of kinetic variance per TICA component (bars) and cumulated (line), the kept
    dimension marked; a matplotlib Figure."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from ..plots import PALETTE

    cum = np.asarray(tica.cumulative_kinetic_variance_, dtype=float)
    share = np.diff(np.concatenate([[0.0], cum]))
    x = np.arange(1, cum.size + 1)
    dim = int(tica.dim_)
    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.bar(x, share, color=[PALETTE[0] if i <= dim else "#b8c4cf" for i in x], width=0.6,
           label="each component")
    ax.plot(x, cum, color=PALETTE[1], marker="o", ms=3.5, lw=1.4, label="cumulative")
    ax.axvline(dim + 0.5, color="#3b3b3b", ls="--", lw=1)
    ax.annotate(f"kept: {dim} ({100 * cum[dim - 1]:.3g}%)", (dim + 0.5, 0.5), xytext=(4, 0),
                textcoords="offset points", fontsize=8, color="#3b3b3b", va="center")
    ax.set_ylim(0, 1.05)
    ax.set_xticks(x if x.size <= 12 else x[::max(1, x.size // 10)])
    ax.set_xlabel("TICA components")
    ax.set_ylabel("kinetic variance")
    ax.legend(fontsize=8, frameon=False, loc="lower right")
    ax.spines[["top", "right"]].set_visible(False)
    return fig
