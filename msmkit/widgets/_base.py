"""What every panel shares: the status line, the progress bar, error and warning capture,
buttons that call public methods, and the file-name row used for saving."""
from __future__ import annotations

import contextlib
import re
import warnings

from .._checks import check_int, require_optional
from ..errors import InputError
from . import _render

widgets = require_optional("ipywidgets", "lab", "The msmkit workbench")

__all__ = ["FileRow", "MacrostateCount", "SetPair", "Step", "action", "on_click", "parse_int_list", "report",
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
    """Show ``done`` of ``total`` stages on a progress bar, labelled ``what``."""
    bar.layout.visibility = "visible"
    bar.bar_style = ""
    bar.max = total
    bar.value = done
    bar.description = what[:24]


@contextlib.contextmanager
def action(status, what: str, *, bar=None, total: int = 1, details=None, buttons=()):
    """Run a computation: buttons disabled, progress shown, warnings collected, errors shown.

    Yields a list that collects the warnings raised inside; the caller shows them next to
    the result (:func:`report`). An InputError is shown in ``status`` and raised again (a
    button's handler drops it, a call from code sees it); anything else is shown as a bug.
    ``details``: an Output widget that catches the detailed progress bars while running.
    """
    caught = []
    for b in buttons:
        b.disabled = True
    if bar is not None:
        stage(bar, 0, total, what)
    _render.show_message(status, f"{what} ...")
    try:
        with warnings.catch_warnings(record=True) as raw, _capture(details):
            warnings.simplefilter("always")
            yield caught
        caught.extend(_unique_messages(raw))
    except InputError as err:
        if bar is not None:
            bar.bar_style = "danger"
        _render.show_message(status, str(err), "error")
        raise
    except Exception as err:
        if bar is not None:
            bar.bar_style = "danger"
        _render.show_message(status, [f"Unexpected {type(err).__name__}: {err}",
                                      "This is a bug in msmkit; please report it."], "error")
        raise
    else:
        if bar is not None:
            bar.value = bar.max
            bar.bar_style = "success"
            bar.description = "done"
    finally:
        if details is not None:
            _render.clear(details)
        for b in buttons:
            b.disabled = False


@contextlib.contextmanager
def _capture(out):
    """Send displayed output (detailed progress bars) to ``out`` while running.

    Unlike ``with out:``, an exception is never caught here: inside IPython, an Output
    widget's own exit shows the traceback in the widget and swallows the exception, which
    would hide an error from both the panel and a caller.
    """
    if out is None:
        yield
        return
    out.__enter__()
    try:
        yield
    finally:
        out.__exit__(None, None, None)


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


class Step(widgets.VBox):
    """Base of the panels: a VBox with a status line, a progress bar and an area for the
    detailed progress bars of long computations.

    Public methods that compute run inside :meth:`_action` (see :func:`action`): errors of
    bad input (:class:`~msmkit.errors.InputError`) and warnings appear in the panel; the
    method still raises the error to a caller in code, while buttons only show it.
    """

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
        self.details = widgets.Output()
        self._buttons = []

    def _stage(self, done: int, total: int, what: str) -> None:
        stage(self.progress_bar, done, total, what)

    def _action(self, what: str, total: int = 1, *, status=None):
        """:func:`action` with this panel's widgets; another ``status`` (a file row's) goes
        without the progress bar."""
        return action(self.status if status is None else status, what, total=total, details=self.details,
                      bar=self.progress_bar if status is None else None, buttons=self._buttons)

    def _on_click(self, button, method):
        self._buttons.append(button)
        on_click(button, method)

    def _report(self, done: str, warnings_, extra=(), *, status=None):
        report(self.status if status is None else status, done, warnings_, extra)


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
        super().__init__([widgets.HBox([self.name, self.overwrite, self.button]), self.status])


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
        """Offer sets 0..m-1 (labelled with their populations) and choose ``pair``."""
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
