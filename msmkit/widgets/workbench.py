"""The workbench: the whole job, step by step, in one JupyterLab cell."""
from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

from .._checks import check_dt, check_unit
from ..defaults import BOOTSTRAP_SAMPLES, CK_MULTIPLES, CK_SAMPLES, PROCESSES
from ..errors import InputError
from ..session import Session, load_session, save_session, trajectories_fingerprint
from . import _render
from ._base import FileRow, action, button, on_click, report, row, set_value, widgets
from ._render import frames
from .kinetics import KineticsPanel
from .lags import LagPanel, default_lags
from .populations import PopulationsPanel
from .states import StatesPanel
from .validate import ValidationPanel

__all__ = ["Workbench"]


class Workbench(widgets.VBox):
    """From trajectories to a saved Markov model: microstates, lag choice, populations,
    validation, kinetics, save.

    Each step is a panel in a tab; the save row below the tabs writes the chosen model. Every
    button is also a method (:meth:`make_states`, :meth:`scan`, :meth:`select_lag`,
    :meth:`validate`, :meth:`kinetics`, :meth:`save`, :meth:`save_report`, :meth:`save_session`,
    :meth:`load_session`; each step's ``save_figure``); the chosen model is
    :attr:`model`, the last Chapman–Kolmogorov test :attr:`ck` and the macrostates
    :attr:`macrostates`. Buttons compute in a background thread: each long step has a Cancel
    button (Kernel -> Interrupt cancels too), and :meth:`wait` waits for them from code.

    Parameters
    ----------
    trajs : 2-D array, list of them, or a TrajectorySet
    dt : float, optional
        Time between frames (default: ``trajs.dt`` when given, else 1).
    unit : str, optional
        Time unit (default: ``trajs.unit`` when given, else "step").
    features, use_tica, tica_lag, tica_dim, n_states, method, stride, seed, scale
        Starting settings of the microstates step (see :class:`StatesPanel`).
    lags, n_processes, n_samples, reversible, uncertainty
        Starting settings of the lag step (see :class:`LagPanel`). ``uncertainty`` ("bootstrap"
        or "bayes") is one choice for the whole workbench: the lag scan, the Chapman–Kolmogorov
        test and the macrostate intervals follow it (changing it in one step changes it in all).
    temperature : float or None, default 300.0
        Kelvin, for free energies in kJ/mol.
    n_sets : int, optional
        Number of macrostates of the validation and kinetics steps (default: the model's
        suggestion).
    multiples, ck_samples
        Lag multiples and bootstrap samples of the Chapman–Kolmogorov test (see
        :class:`ValidationPanel`).
    file_name : str
        Default name of the saved model file.
    session_file : str
        Default name of the session file (:meth:`save_session`, :meth:`load_session`).
    progress : bool, default True

    Notes
    -----
    More steps can be added with :meth:`add_step`. A step panel may define
    ``set_labels(labels)`` (called when new microstates are made) and ``set_model(model)``
    (called when the chosen model changes); the workbench calls them.
    """

    def __init__(self, trajs, *, dt=None, unit=None, features=None, use_tica: bool = True, tica_lag: int = 10,
                 tica_dim: int = 2, n_states: int = 100, method: str = "kmeans", stride: int = 1, seed: int = 0,
                 scale: str = "standard", lags=None, n_processes: int = PROCESSES, n_samples: int = BOOTSTRAP_SAMPLES,
                 reversible: bool = True, uncertainty: str = "bootstrap", temperature=300.0, n_sets=None,
                 multiples: int = CK_MULTIPLES, ck_samples: int = CK_SAMPLES, file_name: str = "msmkit_model.npz",
                 session_file: str = "msmkit_session.npz", progress: bool = True):
        super().__init__()
        self.add_class("msmkit-workbench")
        dt = dt if dt is not None else (getattr(trajs, "dt", None) or 1.0)
        unit = unit if unit is not None else (getattr(trajs, "unit", None) or "step")
        self.dt, self.unit = check_dt(dt), check_unit(unit)
        self.states_panel = StatesPanel(trajs, features=features, use_tica=use_tica, tica_lag=tica_lag,
                                        tica_dim=tica_dim, n_states=n_states, method=method, stride=stride,
                                        seed=seed, scale=scale, progress=progress)
        lengths = self.states_panel.n_frames
        self.lag_panel = LagPanel(None, dt=self.dt, unit=self.unit,
                                  lags=lags if lags is not None else default_lags(lengths),
                                  n_processes=n_processes, n_samples=n_samples, seed=seed, reversible=reversible,
                                  uncertainty=uncertainty, progress=progress)
        self.populations_panel = PopulationsPanel(None, temperature=temperature, progress=progress)
        self.validation_panel = ValidationPanel(n_sets=n_sets, multiples=multiples, n_samples=ck_samples,
                                                seed=seed, uncertainty=uncertainty, progress=progress)
        self.kinetics_panel = KineticsPanel(n_sets=n_sets, uncertainty=uncertainty, progress=progress)
        # one choice of where intervals come from, shown in every step that forms them
        self._uncertainty_links = [widgets.link((self.lag_panel.uncertainty, "value"), (panel.uncertainty, "value"))
                                   for panel in (self.validation_panel, self.kinetics_panel)]
        self.steps = []
        self.tabs = widgets.Tab()
        self.tabs.add_class("msmkit-steps")
        for title, panel in (("1 · Microstates", self.states_panel), ("2 · Lag time", self.lag_panel),
                             ("3 · Populations", self.populations_panel), ("4 · Validate", self.validation_panel),
                             ("5 · Kinetics", self.kinetics_panel)):
            self.add_step(title, panel)
        self.states_panel.observe(self._labels_changed, names="labels")
        self.lag_panel.observe(self._model_changed, names="model")
        self.kinetics_panel.observe(self._macrostates_changed, names="result")

        self.saver = FileRow(file_name, description="model file", button_text="Save model",
                             css_class="msmkit-save", tooltip="Write the chosen model (.npz) with the states' "
                                                              "centers, the TICA projection and the "
                                                              "macrostates of step 5")
        on_click(self.saver.button, self.save)
        _render.show_message(self.saver.status, "Nothing to save yet.")
        report_name = str(Path(file_name).with_suffix(".html")) if Path(file_name).suffix else f"{file_name}.html"
        self.reporter = FileRow(report_name, description="report file", button_text="Save report",
                                css_class="msmkit-report", tooltip="Write one self-contained HTML file with the "
                                                                   "settings, figures, tables with intervals, "
                                                                   "diagnostics and provenance of this analysis")
        on_click(self.reporter.button, self.save_report)
        _render.show_message(self.reporter.status, "A report needs a model: choose a lag in step 2.")
        header = widgets.HTML(
            _render.PLOT_STYLE + f"<div style='font-size:120%; font-weight:600; margin:2px 0'>msmkit workbench</div>"
            f"<div style='color:#555'>{len(lengths)} runs, {sum(lengths)} frames, one frame = {self.dt:g} "
            f"{self.unit}. Work through the steps from left to right; every setting is also an "
            f"argument of a method (see help(Workbench)).</div>")
        self.session_row = FileRow(session_file, description="session file", button_text="Save session",
                                   css_class="msmkit-session",
                                   tooltip="Write the settings and results of every step (lag scan with intervals, "
                                           "chosen lag, Chapman–Kolmogorov test, macrostates) to one .npz file")
        self.session_load_button = button("Load session", "msmkit-session-load-button",
                                          "Read a session file of these trajectories and show the results again, "
                                          "without recomputing them", style="", icon="folder-open")
        self.session_row.children = [row([self.session_row.name, self.session_row.overwrite, self.session_row.button,
                                          self.session_load_button]), self.session_row.status]
        on_click(self.session_row.button, self.save_session)
        on_click(self.session_load_button, self.load_session)
        _render.show_message(self.session_row.status, "Save the session to come back to this analysis later, or "
                                                      "load one made from these trajectories.")
        self.children = [header, self.tabs, widgets.HTML("<b>Save the chosen model</b>"), self.saver,
                         widgets.HTML("<b>Hand on the analysis</b>"), self.reporter,
                         widgets.HTML("<b>Save or load the session</b>"), self.session_row]

    # -- steps -------------------------------------------------------------------------------
    def add_step(self, title: str, panel) -> None:
        """Add a panel as the next step (a tab); it receives labels and models as they change."""
        self.steps.append((title, panel))
        self.tabs.children = tuple(p for _, p in self.steps)
        self.tabs.titles = tuple(t for t, _ in self.steps)
        labels = self.states_panel.labels if hasattr(self, "states_panel") else None
        if labels is not None and hasattr(panel, "set_labels"):
            panel.set_labels(labels)
        if self.model is not None and hasattr(panel, "set_model"):
            panel.set_model(self.model)

    def _labels_changed(self, change):
        micro, tica = self.states_panel.microstates, self.states_panel.tica
        if micro is not None:
            names = (tica.get_feature_names_out() if tica is not None else self.states_panel.settings["features"])
            self.kinetics_panel.set_centers(micro.centers_, names)
        for _, panel in self.steps:
            if hasattr(panel, "set_labels"):
                panel.set_labels(change["new"])

    def _model_changed(self, change):
        for _, panel in self.steps:
            if panel is not self.lag_panel and hasattr(panel, "set_model"):
                panel.set_model(change["new"])
        self._show_ready()

    def _macrostates_changed(self, change):
        self._show_ready()

    def _show_ready(self):
        m = self.model
        if m is None:
            what = ("Nothing to save yet: scan the lags and choose one (step 2)." if self.labels is not None
                    else "Nothing to save yet.")
            _render.show_message(self.saver.status, what)
            _render.show_message(self.reporter.status, "A report needs a model: choose a lag in step 2.")
            return
        macro = self.macrostates
        with_sets = f", with the affinity of {macro.n_sets} macrostates" if macro is not None else ""
        _render.show_message(self.saver.status, f"Ready to save the model at lag {frames(m.lag)} "
                                                f"({m.lag_time:g} {m.unit}), {m.n_states} states{with_sets}.")
        _render.show_message(self.reporter.status, f"Ready to write a report of the model at lag {frames(m.lag)}.")

    def wait(self, timeout=None) -> bool:
        """Wait for the computations the buttons started in the background; True when none is
        left running."""
        return all([panel.wait(timeout) for _, panel in self.steps if hasattr(panel, "wait")])

    def cancel(self) -> bool:
        """Cancel every running background computation; True when one was running."""
        return any([panel.cancel() for _, panel in self.steps if hasattr(panel, "cancel")])

    # -- the chosen results ------------------------------------------------------------------
    @property
    def model(self):
        """The MarkovModel at the chosen lag (None before a scan)."""
        return self.lag_panel.model if hasattr(self, "lag_panel") else None

    @property
    def scan_result(self):
        """The LagScan of the last scan (None before one)."""
        return self.lag_panel.scan_result

    @property
    def ck(self):
        """The last Chapman–Kolmogorov test of the chosen model (None before one)."""
        return self.validation_panel.ck

    @property
    def macrostates(self):
        """The macrostates of the chosen model from the kinetics step (None before one)."""
        return self.kinetics_panel.macrostates if hasattr(self, "kinetics_panel") else None

    @property
    def microstates(self):
        """The fitted Microstates (None before clustering)."""
        return self.states_panel.microstates

    @property
    def tica(self):
        """The fitted TICA (None when not used)."""
        return self.states_panel.tica

    @property
    def labels(self):
        """Microstate label trajectories (None before clustering)."""
        return self.states_panel.labels

    # -- actions (the buttons) ---------------------------------------------------------------
    def make_states(self, n_states=None, seed=None, **settings):
        """Step 1: make microstates (see :meth:`StatesPanel.make_states`)."""
        return self.states_panel.make_states(n_states, seed, **settings)

    def scan(self, lags=None, n_samples=None, **settings):
        """Step 2: scan lags (see :meth:`LagPanel.scan`)."""
        return self.lag_panel.scan(lags, n_samples, **settings)

    def select_lag(self, lag):
        """Step 2: choose a scanned lag (frames); returns the model."""
        return self.lag_panel.select_lag(lag)

    def validate(self, n_sets=None, multiples=None, n_samples=None, *, seed=None, uncertainty=None):
        """Step 4: the Chapman–Kolmogorov test of the chosen model (see :meth:`ValidationPanel.run`).

        ``n_sets`` defaults to the field, preset to the model's suggested number of macrostates;
        ``multiples``, ``n_samples`` and ``uncertainty`` to the fields. Returns the test result
        (also :attr:`ck`).
        """
        return self.validation_panel.run(n_sets, multiples, n_samples, seed=seed, uncertainty=uncertainty)

    def kinetics(self, n_sets=None, source=None, target=None, **settings):
        """Step 5: macrostates, first-passage times, rates, and the reactive flux from macrostate
        ``source`` to ``target`` (see :meth:`KineticsPanel.compute`).

        Returns a :class:`~msmkit.widgets.kinetics.KineticsSummary` (``.macrostates``, ``.flux``,
        ...); the macrostates are also :attr:`macrostates` and are saved with the model.
        """
        return self.kinetics_panel.compute(n_sets, source, target, **settings)

    def save(self, path=None, *, overwrite=None):
        """Write the chosen model with the microstate centers, the TICA projection and, when the
        kinetics step has found them for this model, the macrostate affinity.

        Parameters
        ----------
        path : str or Path, optional
            Default: the file name field. ``.npz`` is appended when missing.
        overwrite : bool, optional
            Default: the overwrite switch (off: an existing file is kept and an error shown).

        Returns
        -------
        Path
        """
        with action(self.saver.status, "Saving", buttons=[self.saver.button]) as caught:
            model, name = self._target(self.saver, path, overwrite, "save", "model file")
            extras, preparation = self._provenance()
            macro = self.macrostates
            if macro is not None and np.array_equal(macro.states, model.states):
                extras["affinity"] = macro.affinity
                preparation["macrostates"] = {"n_sets": int(macro.n_sets), "method": "PCCA+"}
            model = dataclasses.replace(model, metadata={**model.metadata, "preparation": preparation})
            written = model.save(Path(name).expanduser(), overwrite=self.saver.overwrite.value, **extras)
        with_sets = (f" with the affinity of {extras['affinity'].shape[1]} macrostates"
                     if "affinity" in extras else "")
        report(self.saver.status, f"Saved the model at lag {frames(model.lag)}{with_sets} to {written.resolve()} "
                                  f"(load it with msmkit.load_model).", caught)
        return written

    def _target(self, row, path, overwrite, verb: str, what: str):
        """The chosen model and the file name of a save row (``path`` and ``overwrite``, when
        given, are set on the row first so that the row shows what was written)."""
        if path is not None:
            row.name.value = str(path)
        if overwrite is not None:
            row.overwrite.value = bool(overwrite)
        if self.model is None:
            raise InputError(f"there is no model to {verb} yet: make microstates (step 1), then scan and "
                             f"choose a lag (step 2)")
        name = row.name.value.strip()
        if not name:
            raise InputError(f"{what}: give a file name")
        return self.model, name

    def save_report(self, path=None, *, overwrite=None):
        """Write a self-contained HTML report (:func:`msmkit.write_report`) of the chosen model
        with the lag scan, the last Chapman–Kolmogorov test and the macrostates of this model,
        and the settings the microstates were made with.

        Parameters
        ----------
        path : str or Path, optional
            Default: the report file field. ``.html`` is appended when there is no suffix.
        overwrite : bool, optional
            Default: the report row's overwrite switch.

        Returns
        -------
        Path
        """
        from ..report import write_report

        with action(self.reporter.status, "Writing the report", buttons=[self.reporter.button]) as caught:
            model, name = self._target(self.reporter, path, overwrite, "report", "report file")
            ck = self.ck if self.ck is not None and int(self.ck.lag) == int(model.lag) else None
            macro = self.macrostates
            if macro is not None and not np.array_equal(macro.states, model.states):
                macro = None
            written = write_report(Path(name), model, scan=self.scan_result, ck=ck, macrostates=macro,
                                   settings=self._provenance()[1], overwrite=self.reporter.overwrite.value)
        parts = ["the lag scan"] + (["the Chapman–Kolmogorov test"] if ck is not None else []) + (
            ["the macrostates"] if macro is not None else [])
        report(self.reporter.status, f"Wrote the report of the model at lag {frames(model.lag)} with "
                                     f"{' and '.join(parts)} to {written.resolve()} (open it in a browser).", caught)
        return written

    def _provenance(self):
        panel = self.states_panel
        micro, tica = panel.microstates, panel.tica
        extras = {"centers": micro.centers_}
        used = panel.settings
        prep = {"features": used["features"],
                "microstates": {k: used[k] for k in ("n_states", "method", "stride", "seed")},
                "scale": used["scale"], "tica": None}
        if panel.feature_scaling is not None:
            # (x - feature_mean) / feature_scale gives the coordinates the centers live in
            extras["feature_mean"], extras["feature_scale"] = panel.feature_scaling
        if tica is not None:
            # (x - tica_mean) @ tica_components.T gives the coordinates the centers live in
            extras.update(tica_mean=tica.mean_, tica_components=tica.projection_)
            prep["tica"] = {"lag": int(tica.lag_), "dim": int(tica.dim_), "scaling": tica.scaling,
                            "coordinates": "(x - tica_mean) @ tica_components.T, scaling included"}
        return extras, prep

    # -- sessions ----------------------------------------------------------------------------
    #: the fields of each step kept in a session, by step
    SESSION_FIELDS = {
        "microstates": ("states_panel", ("features", "use_tica", "tica_lag", "tica_dim", "n_states", "method",
                                         "stride", "seed", "scale", "compare_counts", "compare_lag",
                                         "compare_folds")),
        "lags": ("lag_panel", ("lags", "n_processes", "n_samples", "seed", "reversible", "uncertainty")),
        "populations": ("populations_panel", ("temperature", "sort_by", "ascending", "max_rows")),
        "validation": ("validation_panel", ("n_sets", "multiples", "n_samples", "seed")),
        "kinetics": ("kinetics_panel", ("n_sets", "fraction", "max_paths", "n_samples")),
    }

    def _field(self, step, name):
        widget = getattr(getattr(self, self.SESSION_FIELDS[step][0]), name)
        return getattr(widget, "field", widget)  # a MacrostateCount holds its field

    def session(self) -> Session:
        """The settings and results of every step as a :class:`~msmkit.session.Session` (what
        :meth:`save_session` writes). The test and the macrostates are included when they belong
        to the chosen model."""
        sp, model = self.states_panel, self.model
        ck = self.ck if self.ck is not None and model is not None and int(self.ck.lag) == int(model.lag) else None
        macro = self.macrostates
        if macro is not None and (model is None or not np.array_equal(macro.states, model.states)):
            macro = None
        kinetics = self.kinetics_panel.result
        flow = self.validation_panel.flow
        fields = {step: {name: self._field(step, name).value for name in names}
                  for step, (_, names) in self.SESSION_FIELDS.items()}
        fields["microstates"]["features"] = list(fields["microstates"]["features"])
        return Session(settings={"fields": fields, "microstates": sp.settings}, dt=self.dt, unit=self.unit,
                       frames_per_run=list(sp.n_frames), trajectories_sha256=sp.fingerprint(),
                       microstates=sp.microstates, tica=sp.tica, feature_scaling=sp.feature_scaling,
                       scan=self.scan_result, lag=self.lag_panel.lag, ck=ck,
                       flow_pair=tuple(flow.pair) if ck is not None and flow is not None else None,
                       macrostates=macro, pair=(kinetics.source, kinetics.target) if macro is not None else None)

    def save_session(self, path=None, *, overwrite=None):
        """Write the session (:meth:`session`) to one ``.npz`` file (:func:`msmkit.session.save_session`:
        arrays and JSON, no pickle, written atomically).

        Parameters
        ----------
        path : str or Path, optional
            Default: the session file field. ``.npz`` is appended when missing.
        overwrite : bool, optional
            Default: the session row's overwrite switch (off: an existing file is kept and an
            error shown).

        Returns
        -------
        Path
        """
        row_ = self.session_row
        with action(row_.status, "Saving the session", buttons=[row_.button, self.session_load_button]) as caught:
            name = self._session_name(path, overwrite)
            session = self.session()
            written = save_session(session, Path(name).expanduser(), overwrite=row_.overwrite.value)
        report(row_.status, f"Saved the session ({_session_parts(session)}) to {written.resolve()}; load it with "
                            f"Load session or msmkit.session.load_session.", caught)
        return written

    def load_session(self, path=None):
        """Read a session file made from these trajectories and show the settings and results in
        every step, without clustering, scanning or testing again (the figures are redrawn from
        the stored results; first-passage times and fluxes of the macrostates are recomputed from
        the stored model, which is exact linear algebra).

        Parameters
        ----------
        path : str or Path, optional
            Default: the session file field.

        Returns
        -------
        Session

        Raises
        ------
        InputError
            A missing, damaged or foreign file, or a session of other trajectories or another
            frame time (also shown in the session row).
        """
        row_ = self.session_row
        with action(row_.status, "Loading the session", buttons=[row_.button, self.session_load_button]) as caught:
            name = self._session_name(path, None)
            if any(panel.running for _, panel in self.steps if hasattr(panel, "running")):
                raise InputError("a step is still computing: wait for it or cancel it before loading a session")
            session = load_session(Path(name).expanduser())
            self.restore(session)
        report(row_.status, f"Loaded the session ({_session_parts(session)}) from {Path(name).expanduser().resolve()}.",
               caught)
        return session

    def restore(self, session: Session) -> None:
        """Show a :class:`~msmkit.session.Session` of these trajectories in every step."""
        sp = self.states_panel
        if list(session.frames_per_run) != list(sp.n_frames) or session.trajectories_sha256 != sp.fingerprint():
            raise InputError(f"this session was made from other trajectories ({len(session.frames_per_run)} runs, "
                             f"{sum(session.frames_per_run)} frames, or other values) than those of this workbench "
                             f"({len(sp.n_frames)} runs, {sum(sp.n_frames)} frames); open a workbench on the "
                             f"trajectories it was made from")
        if abs(float(session.dt) - self.dt) > 1e-12 * self.dt or session.unit != self.unit:
            raise InputError(f"this session has one frame = {session.dt:g} {session.unit}, this workbench "
                             f"{self.dt:g} {self.unit}; give the workbench dt={session.dt:g}, unit={session.unit!r}")
        fields = dict(session.settings.get("fields", {}))
        self._set_fields("microstates", fields)
        if session.microstates is not None:
            sp.restore(session.microstates, session.tica, session.feature_scaling,
                       session.settings.get("microstates"))
            self._set_fields("microstates", fields)
        if session.scan is not None:
            self.lag_panel.restore(session.scan, session.lag)
        self._set_fields("lags", fields)
        self._set_fields("populations", fields)
        if session.ck is not None:
            self.validation_panel.restore(session.ck, session.flow_pair or (0, 1))
        self._set_fields("validation", fields)
        self._set_fields("kinetics", fields)
        if session.macrostates is not None:
            self.kinetics_panel.restore(session.macrostates, *(session.pair or (0, 1)))

    def _set_fields(self, step, fields):
        for name, value in dict(fields.get(step, {})).items():
            if name in self.SESSION_FIELDS[step][1]:
                widget = self._field(step, name)
                if widget.value != value and not (isinstance(value, list) and tuple(value) == widget.value):
                    set_value(widget, tuple(value) if isinstance(value, list) else value, f"{step}.{name}")

    def _session_name(self, path, overwrite) -> str:
        row_ = self.session_row
        if path is not None:
            row_.name.value = str(path)
        if overwrite is not None:
            row_.overwrite.value = bool(overwrite)
        name = row_.name.value.strip()
        if not name:
            raise InputError("session file: give a file name")
        return name


def _session_parts(session) -> str:
    parts = [name for name, there in (("microstates", session.microstates is not None),
                                      ("lag scan", session.scan is not None),
                                      (f"chosen lag {session.lag}", session.lag is not None),
                                      ("Chapman–Kolmogorov test", session.ck is not None),
                                      ("macrostates", session.macrostates is not None)) if there]
    return ", ".join(parts) if parts else "settings only"
