"""Step 3 of the workbench: stationary populations and free energies of the chosen model."""
from __future__ import annotations

from pathlib import Path

import traitlets

from .._checks import check_int
from ..errors import InputError
from . import _render
from ._base import FileRow, Step, field, on_click, row, widgets
from ._render import frames

__all__ = ["PopulationsPanel"]

COLUMN_TITLES = {
    "state": "state",
    "population": "population",
    "free_energy_kT": "free energy (kT)",
    "free_energy_kJ_per_mol": "free energy (kJ/mol)",
    "transitions_out": "transitions out",
}
FORMATTERS = {
    "population": "{:.4g}".format,
    "free_energy_kT": "{:.3f}".format,
    "free_energy_kJ_per_mol": "{:.3f}".format,
}


class PopulationsPanel(Step):
    """Stationary populations and free energies of a model, as a sortable table with CSV export.

    Parameters
    ----------
    model : MarkovModel, optional
        Can be given later with :meth:`set_model`.
    temperature : float or None, default 300.0
        Kelvin; adds free energies in kJ/mol. None or a blank field: kT only.
    max_rows : int, default 50
        Rows shown (the CSV holds all).
    file_name : str
        Default CSV file name.

    Attributes
    ----------
    model : MarkovModel or None (observable trait)
    table : pandas.DataFrame or None
        Every row, in the order shown (read-only property).
    """

    model = traitlets.Any(None)

    def __init__(self, model=None, *, temperature=300.0, max_rows: int = 50, file_name: str = "populations.csv",
                 progress: bool = True):
        super().__init__(progress=progress, css_class="msmkit-populations")
        self._table = None
        self._syncing = False
        self.temperature = field(widgets.Text, "" if temperature is None else f"{float(temperature):g}",
                                 "temperature (K)", "For free energies in kJ/mol; leave blank for kT only",
                                 placeholder="blank: kT only")
        self.temperature.add_class("msmkit-temperature")
        self.sort_by = field(widgets.Dropdown, "population", "sort by",
                             options=[(COLUMN_TITLES[c], c) for c in ("state", "population", "free_energy_kT")])
        self.sort_by.add_class("msmkit-sort-by")
        self.ascending = widgets.ToggleButton(value=False, description="descending", icon="sort-amount-desc",
                                              tooltip="Switch between ascending and descending order",
                                              layout=widgets.Layout(width="auto"))
        self.ascending.add_class("msmkit-sort-order")
        self.max_rows = field(widgets.IntText, int(max_rows), "rows shown")
        self.table_html = widgets.HTML(layout=widgets.Layout(max_height="360px", overflow="auto"))
        self.table_html.add_class("msmkit-populations-table")
        self.csv = FileRow(file_name, description="CSV file", button_text="Export CSV", css_class="msmkit-csv",
                           tooltip="Write the whole table (in the order shown) to a CSV file")
        self._buttons.append(self.csv.button)
        on_click(self.csv.button, self.export_csv)  # a quick write: no background thread
        for w in (self.temperature, self.sort_by, self.ascending, self.max_rows):
            w.observe(self._refresh, names="value")
        intro = widgets.HTML(_render.message_html(
            "Equilibrium populations of the states of the chosen model; free energies are −ln of "
            "the population relative to the most populated state (in kT, and in kJ/mol at the "
            "temperature given)."))
        self.children = [intro, row([widgets.VBox([self.temperature, self.max_rows]),
                                              widgets.VBox([self.sort_by, self.ascending])]),
                         self.status, self.table_html, self.csv]
        self.set_model(model)

    # -- inputs ------------------------------------------------------------------------------
    def set_model(self, model):
        """Show the populations of ``model`` (None: empty)."""
        self.model = model
        self._refresh()

    def sort(self, by, ascending: bool = True):
        """Sort the table by a column (``state``, ``population``, ``free_energy_kT``, ...)."""
        options = [v for _, v in self.sort_by.options]
        if by not in options:
            raise InputError(f"by must be one of {options}, but got {by!r}")
        self.sort_by.value = by
        self.ascending.value = bool(ascending)
        return self.table

    @property
    def table(self):
        """The whole table in the order shown (None without a model or after an error)."""
        return self._table

    def _temperature(self):
        text = self.temperature.value.strip()
        if not text:
            return None
        try:
            return float(text)
        except ValueError:
            raise InputError(f"temperature must be a number in kelvin (or blank for kT only), but got "
                             f"{text!r}") from None

    def _refresh(self, change=None):
        if self._syncing:
            return
        self.ascending.description = "ascending" if self.ascending.value else "descending"
        self.ascending.icon = "sort-amount-asc" if self.ascending.value else "sort-amount-desc"
        self._table = None
        if self.model is None:
            self.table_html.value = ""
            _render.show_message(self.status, "No model yet: choose a lag in step 2.")
            return
        try:
            df = self.model.populations(temperature=self._temperature())
            rows = check_int(self.max_rows.value, "rows shown", minimum=1)
        except InputError as err:
            self.table_html.value = ""
            _render.show_message(self.status, str(err), "error")
            return
        columns = [c for c in COLUMN_TITLES if c in df.columns]
        self._sync_sort_options(columns)
        df = df.sort_values(self.sort_by.value, ascending=self.ascending.value, kind="stable",
                            ignore_index=True)
        self._table = df
        order = "ascending" if self.ascending.value else "descending"
        shown = min(rows, len(df))
        caption = (f"Lag {frames(self.model.lag)} ({self.model.lag_time:g} {self.model.unit}): {shown} of "
                   f"{len(df)} states, by {COLUMN_TITLES[self.sort_by.value]} ({order})"
                   f"{'; the CSV holds all' if shown < len(df) else ''}.")
        self.table_html.value = _render.table_html(df.rename(columns=COLUMN_TITLES), max_rows=rows, caption=caption,
                                                   formatters={COLUMN_TITLES[k]: f for k, f in FORMATTERS.items()})
        _render.show_message(self.status, "")

    def _sync_sort_options(self, columns):
        options = tuple((COLUMN_TITLES[c], c) for c in columns)
        if tuple(map(tuple, self.sort_by.options)) != options:
            current = self.sort_by.value
            self._syncing = True
            try:
                self.sort_by.options = options
                self.sort_by.value = current if current in columns else (
                    "free_energy_kT" if current == "free_energy_kJ_per_mol" else "population")
            finally:
                self._syncing = False

    # -- actions -----------------------------------------------------------------------------
    def export_csv(self, path=None, *, overwrite=None):
        """Write the whole table (order as shown) to CSV; returns the Path.

        ``path`` and ``overwrite`` default to the panel's fields; an existing file is kept
        unless overwrite is on.
        """
        with self._action("Writing CSV", status=self.csv.status):
            if path is not None:
                self.csv.name.value = str(path)
            if overwrite is not None:
                self.csv.overwrite.value = bool(overwrite)
            if self.model is None:
                raise InputError("there is no table yet: choose a lag in step 2 first")
            if self._table is None:
                raise InputError("the table could not be made: fix the setting shown above it first")
            target = Path(self.csv.name.value.strip()).expanduser()
            if not target.name:
                raise InputError("CSV file: give a file name")
            if target.exists() and not self.csv.overwrite.value:
                raise InputError(f"{target} exists; choose another name or tick 'overwrite'")
            if not target.parent.resolve().is_dir():
                raise InputError(f"cannot write {target}: folder {target.parent} does not exist")
            self._table.to_csv(target, index=False)
        self._report(f"Wrote {len(self._table)} rows to {target.resolve()}", [], status=self.csv.status)
        return target
