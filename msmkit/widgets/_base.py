"""What every panel shares: the status line, the progress bar, error and warning capture,
buttons that call public methods in a background thread (with Cancel), and the file-name row
used for saving."""
from __future__ import annotations

import contextlib
import ctypes
import re
import signal
import threading
import warnings
import weakref

from pathlib import Path

from .._checks import check_int, require_optional
from ..errors import Cancelled, InputError
from ..modelfile import atomic_write
from . import _render

widgets = require_optional("ipywidgets", "lab", "The msmkit workbench")

__all__ = ["FigureRow", "FileRow", "MacrostateCount", "SetPair", "Step", "action", "on_click", "parse_int_list", "report", "row",
           "widgets"]

#: width of the descriptions in front of the input fields
DESCRIPTION_WIDTH = "170px"


def field(kind, value, description, tooltip="", width="350px", **kw):
    """An input widget of the given ipywidgets class with the panels' common look."""
    w = kind(value=value, description=description, style={"description_width": DESCRIPTION_WIDTH},
             layout=widgets.Layout(width=width), **kw)
    if tooltip:
        w.tooltip = tooltip
    return w


#: the choices of an "error bars from" field: (shown, value of ``uncertainty=``)
UNCERTAINTY_CHOICES = (("resampled runs (bootstrap)", "bootstrap"), ("Bayesian posterior", "bayes"))
#: what the samples of each method are called in messages
SAMPLES_OF = {"bootstrap": "bootstrap samples", "bayes": "posterior samples"}


def uncertainty_field(value: str, css_class: str, what: str):
    """A choice of where the intervals of ``what`` come from (the library's ``uncertainty=``)."""
    from ..posterior import check_uncertainty
    w = field(widgets.Dropdown, check_uncertainty(value), "error bars from",
              f"How the intervals of {what} are obtained: resampling whole runs (bootstrap), or the "
              f"posterior of reversible transition matrices given the counts (reversible models only)",
              options=list(UNCERTAINTY_CHOICES))
    w.add_class(css_class)
    return w


def row(children):
    """A row of widgets that wraps onto the next line in a narrow window instead of clipping."""
    return widgets.HBox(children, layout=widgets.Layout(flex_flow="row wrap", align_items="flex-start"))


def button(description, css_class, tooltip="", style="primary", icon=""):
    b = widgets.Button(description=description, button_style=style, tooltip=tooltip, icon=icon,
                       layout=widgets.Layout(width="auto", min_width="120px"))
    b.add_class(css_class)
    return b


def parse_int_list(text, name: str) -> list[int]:
    """Whole numbers from a text field ('1, 2, 5 10'); InputError naming the field otherwise."""
    if isinstance(text, (list, tuple)):
        tokens = list(text)
    else:
        tokens = [t for t in re.split(r"[,;\s]+", str(text).strip()) if t]
    values = []
    for t in tokens:
        try:
            values.append(int(str(t)))
        except ValueError:
            raise InputError(f"{name} must be whole numbers separated by commas (e.g. '1, 2, 5, 10'), "
                             f"but '{t}' is not one") from None
    if not values:
        raise InputError(f"{name} is empty: give at least one whole number (e.g. '1, 2, 5, 10')")
    return values


def set_value(widget, value, name: str) -> None:
    """Put a value given to a public method into the widget that holds it."""
    try:
        widget.value = value
    except Exception as err:  # traitlets refuses wrong types with a long message
        raise InputError(f"{name} cannot be {value!r}: {type(err).__name__}; give a value of the kind the "
                         f"'{widget.description}' field takes") from None


def stage(bar, done: int, total: int, what: str) -> None:
    """Show ``done`` of ``total`` stages on a progress bar, labeled ``what``."""
    bar.layout.visibility = "visible"
    bar.bar_style = ""
    bar.max = total
    bar.value = done
    bar.description = what[:24]


#: CSS class of a figure that belongs to an earlier result than the message above it
STALE_CLASS = "msmkit-stale"
#: added to an error (or cancel) message when figures of the previous result stay shown
STALE_NOTE = ("The figures and tables below are still those of the previous successful run, not of these "
              "settings.")


@contextlib.contextmanager
def action(status, what: str, *, bar=None, total: int = 1, buttons=(), shown=()):
    """Run a computation: buttons disabled, progress shown, warnings collected, errors shown.

    Yields a list that collects the warnings raised inside; the caller shows them next to
    the result (:func:`report`). An InputError is shown in ``status`` and raised again (a
    button's handler drops it, a call from code sees it); a :class:`~msmkit.errors.Cancelled`
    is shown as such; anything else is shown as a bug. ``shown``: the Output widgets holding
    the previous result; after a failure those that are not empty get :data:`STALE_CLASS` and
    the message says they are old; after a success the mark is removed.
    """
    caught = []
    for b in buttons:
        b.disabled = True
    if bar is not None:
        stage(bar, 0, total, what)
    _render.show_message(status, f"{what} ...")
    try:
        with warnings.catch_warnings(record=True) as raw:
            warnings.simplefilter("always")
            yield caught
        caught.extend(_unique_messages(raw))
    except BaseException as err:
        if bar is not None:
            bar.bar_style = "warning" if isinstance(err, (Cancelled, KeyboardInterrupt)) else "danger"
        old = [out for out in shown if out.outputs]
        for out in old:
            out.add_class(STALE_CLASS)
        note = [STALE_NOTE] if old else []
        if isinstance(err, (Cancelled, KeyboardInterrupt)):
            _render.show_message(status, [f"{what}: cancelled; nothing was changed.", *note], "warning")
        elif isinstance(err, InputError):
            _render.show_message(status, [str(err), *note], "error")
        elif isinstance(err, Exception):
            _render.show_message(status, [f"Unexpected {type(err).__name__}: {err}",
                                          "This is a bug in msmkit; please report it.", *note], "error")
        raise
    else:
        for out in shown:
            out.remove_class(STALE_CLASS)
        if bar is not None:
            bar.value = bar.max
            bar.bar_style = "success"
            bar.description = "done"
    finally:
        for b in buttons:
            b.disabled = False


def on_click(button, method) -> None:
    """Make ``button`` call ``method()``; errors are already shown by :func:`action`."""
    def handler(_):
        try:
            method()
        except Exception:  # shown in the panel (an unexpected one as a bug)
            pass

    button.on_click(handler)


def report(status, done: str, warnings_=(), extra=()) -> None:
    """Show the outcome of an action, with the warnings it raised."""
    lines = [done, *extra]
    if warnings_:
        _render.show_message(status, lines + list(warnings_), "warning")
    else:
        _render.show_message(status, lines, "ok")


#: panels with a computation running in the background (Kernel -> Interrupt cancels them)
_RUNNING = weakref.WeakSet()
_RUNNING_LOCK = threading.Lock()


class Step(widgets.VBox):
    """Base of the panels: a VBox with a status line, a progress bar and a Cancel button.

    Public methods that compute run inside :meth:`_action` (see :func:`action`): errors of
    bad input (:class:`~msmkit.errors.InputError`) and warnings appear in the panel; the
    method still raises the error to a caller in code, while buttons only show it.

    A button runs the method behind it in a background thread, so that the kernel stays free: Cancel
    (or Kernel -> Interrupt) stops it between two units of work (a lag, a bootstrap sample, a
    k-means iteration) and the panel keeps the previous result. :meth:`wait` waits for it.
    Called from code, the methods run in the caller's thread (Kernel -> Interrupt stops them).
    """

    #: stop a background computation that has no cancel points of its own (clustering in
    #: scikit-learn) by raising Cancelled in its thread at its next Python-level step
    interrupt_thread = False

    def __init__(self, *, progress: bool = True, css_class: str = "", **kw):
        super().__init__(**kw)
        self.progress = bool(progress)
        self.status = widgets.HTML()
        self.status.add_class("msmkit-status")
        if css_class:
            self.status.add_class(f"{css_class}-status")
            self.add_class(css_class)
        self.progress_bar = widgets.IntProgress(value=0, min=0, max=1, description="",
                                                layout=widgets.Layout(width="350px", visibility="hidden"))
        self.progress_bar.add_class("msmkit-progress")
        self.cancel_button = button("Cancel", "msmkit-cancel-button", "Stop the running computation; the "
                                    "previous result stays", style="warning", icon="stop")
        self.cancel_button.disabled = True
        self.cancel_button.layout.visibility = "hidden"
        self.cancel_button.on_click(lambda _: self.cancel())
        self._buttons = []
        self._plots = []
        self._figures = {}  # name -> (Output showing it, Figure or a function drawing it)
        self.figure_row = None
        self._thread = None
        self._cancel = threading.Event()
        self._job_lock = threading.Lock()
        self._in_method = False

    # -- running in the background ----------------------------------------------------------
    @property
    def running(self) -> bool:
        """Whether a button's computation is running in the background."""
        t = self._thread
        return t is not None and t.is_alive()

    def wait(self, timeout=None) -> bool:
        """Wait for the background computation (if any); True when none is left running."""
        t = self._thread
        if t is not None:
            t.join(timeout)
        return not self.running

    def cancel(self) -> bool:
        """Ask the background computation to stop; True when one was running."""
        with self._job_lock:
            if not self.running:
                return False
            self._cancel.set()
            if self.interrupt_thread and self._in_method:
                ctypes.pythonapi.PyThreadState_SetAsyncExc(ctypes.c_ulong(self._thread.ident),
                                                           ctypes.py_object(Cancelled))
        _render.show_message(self.status, "Cancelling ...", "warning")
        return True

    def _start(self, method) -> None:
        """Run ``method()`` in a background thread (a button's click)."""
        if self.running:
            return
        self._cancel = threading.Event()
        self._in_method = True
        self._thread = threading.Thread(target=self._run, args=(method,), daemon=True,
                                        name=f"msmkit {type(self).__name__}")
        for b in self._buttons:
            b.disabled = True
        self.cancel_button.disabled = False
        self.cancel_button.layout.visibility = "visible"
        with _RUNNING_LOCK:
            _RUNNING.add(self)
        _interrupt_cancels_jobs()
        self._thread.start()

    def _run(self, method) -> None:
        try:
            try:
                method()
            except Exception:  # shown in the panel (an unexpected one as a bug)
                pass
            finally:
                with self._job_lock:
                    self._in_method = False
        except Cancelled:  # an interrupt that arrived just as the method ended
            pass
        finally:
            self.cancel_button.disabled = True
            self.cancel_button.layout.visibility = "hidden"
            with _RUNNING_LOCK:
                _RUNNING.discard(self)

    def _cancel_point(self, total: int, start: int = 0, what: str = ""):
        """The ``cancel=`` object for a library call: asked once per unit of work, it also
        advances the progress bar by one unit (``total`` units after ``start``)."""
        return _CancelPoint(self._cancel, self.progress_bar if self.progress else None, total, start, what)

    # -- actions ----------------------------------------------------------------------------
    def _stage(self, done: int, total: int, what: str) -> None:
        if self._cancel.is_set():
            raise Cancelled(f"{what}: cancelled on request")
        stage(self.progress_bar, done, total, what)

    def _action(self, what: str, total: int = 1, *, status=None):
        """:func:`action` with this panel's widgets; another ``status`` (a file row's) goes
        without the progress bar."""
        return action(self.status if status is None else status, what, total=total,
                      bar=self.progress_bar if status is None else None, buttons=self._buttons,
                      shown=self._plots if status is None else ())

    def _on_click(self, button, method):
        self._buttons.append(button)
        button.on_click(lambda _: self._start(method))

    def _report(self, done: str, warnings_, extra=(), *, status=None):
        report(self.status if status is None else status, done, warnings_, extra)

    # -- figures -----------------------------------------------------------------------------
    def _figure_row(self, names) -> "FigureRow":
        """The row that saves this panel's figures (``names``: what they are called, in order)."""
        self.figure_row = FigureRow(tuple(names))
        self._buttons.append(self.figure_row.button)
        on_click(self.figure_row.button, self.save_figure)  # a quick write: no background thread
        return self.figure_row

    def _show_figure(self, out, fig, name: str) -> None:
        """Show ``fig`` in ``out`` and keep it for :meth:`save_figure` under ``name``."""
        _render.show_figure(out, fig, alt=name)
        self._figures[name] = (out, fig)

    def _keep_figure(self, name: str, out, draw) -> None:
        """Remember that ``out`` shows the figure ``draw()`` makes (drawn only when saved)."""
        self._figures[name] = (out, draw)

    @property
    def figure_names(self) -> list:
        """Names of the figures this panel shows now (those :meth:`save_figure` can write)."""
        return [name for name, (out, _) in self._figures.items() if out.outputs]

    def figure(self, name=None):
        """The matplotlib Figure shown under ``name`` (default: the first one shown)."""
        shown = self.figure_names
        if name is None:
            if not shown:
                raise InputError("there is no figure to save yet: compute this step first")
            name = shown[0]
        if name not in shown:
            known = list(self.figure_row.which.options) if self.figure_row is not None else list(self._figures)
            if name in known:
                raise InputError(f"figure {name!r} is not drawn yet: compute this step first")
            raise InputError(f"figure must be one of {known}, but got {name!r}")
        made = self._figures[name][1]
        return made() if callable(made) else made

    def save_figure(self, path=None, figure=None, *, overwrite=None):
        """Write a figure of this step to a PNG or SVG file, chosen by the file name's suffix.

        Parameters
        ----------
        path : str or Path, optional
            Default: the figure row's file name field. ``.png`` is appended when there is no
            suffix; other suffixes than ``.png`` and ``.svg`` are refused.
        figure : str, optional
            Which figure (see :attr:`figure_names`); default: the one chosen in the row.
        overwrite : bool, optional
            Default: the row's overwrite switch (off: an existing file is kept and an error shown).

        Returns
        -------
        Path
        """
        row_ = self.figure_row
        with self._action("Saving the figure", status=row_.status):
            if figure is not None:
                if figure not in row_.which.options:
                    raise InputError(f"figure must be one of {list(row_.which.options)}, but got {figure!r}")
                row_.which.value = figure
            if path is not None:
                row_.name.value = str(path)
            if overwrite is not None:
                row_.overwrite.value = bool(overwrite)
            fig = self.figure(row_.which.value)
            written = write_figure(fig, row_.name.value, overwrite=row_.overwrite.value)
        self._report(f"Saved the {row_.which.value} figure to {written.resolve()}.", [], status=row_.status)
        return written


class _CancelPoint:
    """The cancel flag handed to a library function: each question is one unit of work done."""

    def __init__(self, event, bar, total, start, what):
        self._event, self._bar, self._total, self._what = event, bar, max(int(total), 1), what
        self._done = int(start)

    def is_set(self) -> bool:
        if self._bar is not None:
            self._done += 1
            self._bar.max = self._total
            self._bar.value = min(self._done, self._total)
            if self._what:
                self._bar.description = self._what[:24]
        return self._event.is_set()


def _cancel_running(signum, frame, previous=None):
    """SIGINT while panels compute in the background: cancel them (the kernel itself is idle)."""
    with _RUNNING_LOCK:
        panels = list(_RUNNING)
    cancelled = [p.cancel() for p in panels]
    if not any(cancelled) and callable(previous):
        previous(signum, frame)


def _interrupt_cancels_jobs() -> None:
    """Make Kernel -> Interrupt cancel background computations.

    An idle ipykernel ignores SIGINT and, around every message it handles, installs the default
    handler and then puts back the one it saved; the handler to put back is replaced here, so
    it is ours between messages. It passes the signal on when nothing runs. Outside a kernel
    nothing changes.
    """
    try:
        from IPython import get_ipython
    except ImportError:
        return
    kernel = getattr(get_ipython(), "kernel", None)
    if kernel is None or not hasattr(kernel, "saved_sigint_handler"):
        return
    saved = kernel.saved_sigint_handler
    if getattr(saved, "_msmkit", False):
        return
    previous = saved if callable(saved) else None

    def handler(signum, frame):
        _cancel_running(signum, frame, previous)

    handler._msmkit = True
    kernel.saved_sigint_handler = handler
    if threading.current_thread() is threading.main_thread() and signal.getsignal(signal.SIGINT) is saved:
        signal.signal(signal.SIGINT, handler)


def _unique_messages(records) -> list[str]:
    out = []
    for w in records:
        text = str(w.message)
        if issubclass(w.category, DeprecationWarning) or text in out:
            continue
        out.append(text)
    return out


class FileRow(widgets.VBox):
    """A file name, an overwrite switch, a button and a status line (saving files)."""

    def __init__(self, value: str, *, description: str, button_text: str, css_class: str, tooltip: str = ""):
        self.name = widgets.Text(value=value, description=description,
                                 style={"description_width": DESCRIPTION_WIDTH},
                                 layout=widgets.Layout(width="420px"))
        self.name.add_class(f"{css_class}-name")
        self.overwrite = widgets.Checkbox(value=False, description="overwrite", indent=False,
                                          layout=widgets.Layout(width="110px"))
        self.overwrite.add_class(f"{css_class}-overwrite")
        self.button = button(button_text, f"{css_class}-button", tooltip=tooltip, style="", icon="save")
        self.status = widgets.HTML()
        self.status.add_class("msmkit-status")
        self.status.add_class(f"{css_class}-status")
        super().__init__([row([self.name, self.overwrite, self.button]), self.status])


#: figure file formats, chosen by the suffix of the file name
FIGURE_FORMATS = (".png", ".svg")


def write_figure(fig, path, *, overwrite: bool = False) -> Path:
    """Write ``fig`` atomically as PNG or SVG (by the suffix of ``path``; ``.png`` when there is
    none); InputError for a bad name, an existing file without ``overwrite`` or a folder that
    cannot be written."""
    text = str(path).strip()
    if not text:
        raise InputError("figure file: give a file name ending in .png or .svg")
    target = Path(text).expanduser()
    if not target.suffix:
        target = target.with_name(target.name + ".png")
    kind = target.suffix.lower()
    if kind not in FIGURE_FORMATS:
        raise InputError(f"figure file: {target.name} must end in .png or .svg (the suffix chooses the format)")
    if target.exists() and not overwrite:
        raise InputError(f"{target} exists; choose another name or tick 'overwrite'")
    if not target.parent.is_dir():
        raise InputError(f"cannot write {target}: folder {target.parent} does not exist")
    try:
        atomic_write(target, lambda fh: fig.savefig(fh, format=kind[1:], dpi=_render.DPI), overwrite=bool(overwrite))
    except OSError as err:
        raise InputError(f"cannot write {target}: {err.strerror or err}; choose another folder or name") from None
    return target


class FigureRow(FileRow):
    """Which figure, a file name (.png or .svg), an overwrite switch and a Save figure button."""

    def __init__(self, names):
        names = tuple(names)
        super().__init__(_figure_file(names[0], ".png"), description="figure file", button_text="Save figure",
                         css_class="msmkit-figure", tooltip="Write the chosen figure; the file name's suffix "
                                                            "(.png or .svg) chooses the format")
        self.which = field(widgets.Dropdown, names[0], "figure", options=names, width="420px")
        self.which.add_class("msmkit-figure-choice")
        self.which.observe(self._chosen, names="value")
        self.children = [row([self.which, self.name, self.overwrite, self.button]), self.status]

    def _chosen(self, change):
        """Follow the chosen figure in the file name while it is one this row proposed."""
        current = Path(self.name.value.strip())
        if current.stem == _figure_file(change["old"], "").strip():
            self.name.value = str(current.with_name(_figure_file(change["new"], current.suffix or ".png")))


def _figure_file(name: str, suffix: str) -> str:
    """'Chapman–Kolmogorov test' -> 'chapman_kolmogorov_test.png'."""
    return re.sub(r"[^a-z0-9]+", "_", name.lower()).strip("_") + suffix


class MacrostateCount:
    """The number of macrostates: a field preset to the model's suggestion, and the reason in
    an HTML widget (a panel places both).

    The field follows the suggestion of each new model (:meth:`MarkovModel.suggest_n_macrostates`)
    until a number other than the current suggestion is entered (typed, or given to a method);
    it keeps that number until the suggestion is entered again.
    """

    def __init__(self, css_class: str, value=None):
        self.field = field(widgets.IntText, 2 if value is None else int(value), "macrostates",
                           "Number of PCCA+ macrostates (sets of states); preset to the suggestion "
                           "from the gap in the model's timescales")
        self.field.add_class(css_class)
        self.reason = widgets.HTML()
        self.reason.add_class(f"{css_class}-reason")
        self.suggested = None
        self.follows = value is None
        self._presetting = False
        self.field.observe(self._entered, names="value")

    def _entered(self, change):
        if not self._presetting:
            self.follows = change["new"] == self.suggested

    def update(self, model) -> None:
        """Show the suggestion for ``model`` (None: nothing), and preset the field to it unless
        another number was entered."""
        if model is None:
            self.reason.value = ""
            return
        n, reason = model.suggest_n_macrostates()
        preset = min(max(n, 2), model.n_states)
        self.suggested = preset
        if self.follows:
            self._presetting = True
            try:
                self.field.value = preset
            finally:
                self._presetting = False
        text = f"Suggested: {n} macrostate{'' if n == 1 else 's'}, because {reason}."
        if n < 2:
            text += f" At least two sets are needed to compare, so the field is preset to {preset}."
        self.reason.value = _render.message_html(text, "info")

    def get(self, value, model, name: str = "n_sets") -> int:
        """The number to use: ``value`` when given (it replaces the field), else the field's."""
        if value is not None:
            set_value(self.field, check_int(value, name, minimum=2), name)
        return check_int(self.field.value, name, minimum=2, maximum=model.n_states)


class SetPair(widgets.HBox):
    """Two dropdowns that choose two different sets (macrostates) by their index.

    Empty and disabled until :meth:`set_sets` gives the sets; ``on_change(a, b)`` is called when
    a person changes either choice (not when the options are replaced).
    """

    def __init__(self, first: str, second: str, css_class: str, on_change, tooltip: str = ""):
        self.first = field(widgets.Dropdown, None, first, tooltip, width="330px", options=[])
        self.second = field(widgets.Dropdown, None, second, tooltip, width="330px", options=[])
        self.first.add_class(f"{css_class}-first")
        self.second.add_class(f"{css_class}-second")
        self._on_change = on_change
        self._syncing = False
        for w in (self.first, self.second):
            w.observe(self._changed, names="value")
        super().__init__([self.first, self.second])
        self.add_class(css_class)
        self.clear()

    @property
    def value(self):
        """The chosen pair (a, b) of set indices (None before the sets exist)."""
        return None if not self.first.options else (self.first.value, self.second.value)

    def set_sets(self, populations, pair) -> None:
        """Offer sets 0..m-1 (labeled with their populations) and choose ``pair``."""
        options = [(f"{j} (population {p:.3g})", j) for j, p in enumerate(populations)]
        self._syncing = True
        try:
            for w in (self.first, self.second):
                w.options = options
                w.disabled = False
        finally:
            self._syncing = False
        self.choose(pair)

    def choose(self, pair) -> None:
        """Select ``pair`` (indices among the offered sets) without calling ``on_change``."""
        self._syncing = True
        try:
            self.first.value, self.second.value = int(pair[0]), int(pair[1])
        finally:
            self._syncing = False

    def clear(self) -> None:
        self._syncing = True
        try:
            for w in (self.first, self.second):
                w.options = []
                w.disabled = True
        finally:
            self._syncing = False

    def _changed(self, change):
        if not self._syncing and self.first.options:
            self._on_change(self.first.value, self.second.value)
