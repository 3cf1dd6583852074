"""A self-contained HTML report of an analysis, to hand on: settings, figures, tables with
intervals, diagnostics and provenance in one file that needs nothing else to open.

Figures are embedded as PNG (base64 ``data:`` URIs); there is no script, no style sheet or
image to fetch, so the file reads the same offline, in a mail attachment or in an archive.

>>> from msmkit import demo, write_report                   # doctest: +SKIP
>>> write_report("analysis.html", model, scan=scan, ck=ck)  # doctest: +SKIP
"""
from __future__ import annotations

import base64
import datetime as _dt
import html
import platform
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["lag_cautions", "report_html", "write_report"]

#: a lag above this share of the longest run leaves too few lag steps per run
LONG_LAG_SHARE = 0.1
#: relative rise of the slowest timescale at longer lags that counts as "still rising"
RISING = 0.05
#: dots per inch of the embedded figures
DPI = 110

_STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:24px auto;padding:0 16px;
     color:#1d2329;line-height:1.45}
h1{font-size:1.6em;margin-bottom:4px} h2{font-size:1.25em;margin-top:28px;border-bottom:2px solid #0f5c8c}
table{border-collapse:collapse;font-size:90%;margin:6px 0 12px 0}
td,th{padding:2px 10px;text-align:right;border-bottom:1px solid #e3e7eb} th{background:#eef5fa}
td.key{text-align:left;color:#444} .caption{color:#555;font-size:90%}
.caution{border-left:4px solid #b5851b;background:#fcf6e8;padding:4px 8px;margin:4px 0}
.note{border-left:4px solid #0f5c8c;background:#eef5fa;padding:4px 8px;margin:4px 0}
figure{margin:10px 0} figure img{max-width:100%;height:auto;border:1px solid #e3e7eb}
figcaption{color:#555;font-size:90%}
"""


def lag_cautions(scan, lag) -> list[str]:
    """Cautions about choosing ``lag`` (frames) from ``scan``: below the suggested lag, or (with
    no suggestion) while the slowest timescale still rises at longer lags; or a lag so long that
    a run holds few steps of the model.

    Parameters
    ----------
    scan : LagScan
    lag : int
        A scanned lag, in frames.

    Returns
    -------
    list of str
        Empty when there is nothing to say.
    """
    lag = int(lag)
    lags = [int(x) for x in scan.lags]
    if lag not in lags:
        raise InputError(f"lag {lag} was not scanned; choose one of {lags}")
    out = []
    s = scan.suggested_lag
    slowest = np.asarray(scan.timescales, dtype=float)[:, 0]
    at = lags.index(lag)
    here = slowest[at]
    if s is not None and lag < s:
        there = slowest[lags.index(int(s))]
        out.append(f"The chosen lag ({_frames(lag)}) is below the suggested lag ({_frames(s)}): the slowest implied "
                   f"timescale still rises from {here:.4g} to {there:.4g} {scan.unit} between them, so the model "
                   f"at this lag is not yet Markovian and the slow timescales come out too short.")
    elif s is None and at < len(lags) - 1 and np.nanmax(slowest[at + 1:]) > (1 + RISING) * here:
        top = int(np.nanargmax(slowest[at + 1:])) + at + 1
        out.append(f"The slowest implied timescale still rises after the chosen lag ({_frames(lag)}): from {here:.4g} "
                   f"to {slowest[top]:.4g} {scan.unit} at {_frames(lags[top])}, and no scanned lag levels it off. The "
                   f"model at this lag is probably not Markovian yet; scan longer lags or make finer microstates.")
    runs = scan.model(lag).metadata.get("frames_per_run") or []
    if runs and lag > LONG_LAG_SHARE * max(runs):
        longest = int(max(runs))
        out.append(f"The chosen lag ({_frames(lag)}) is {100 * lag / longest:.3g}% of the longest run "
                   f"({_frames(longest)}): a run holds only {longest / lag:.3g} steps of the model, so transitions "
                   f"and slow processes are poorly sampled at this lag; choose a shorter lag or simulate longer runs.")
    return out


def report_html(model, *, scan=None, ck=None, macrostates=None, settings=None,
                title: str = "Markov model analysis", figures=None, now=None) -> str:
    """The report as one HTML document (a string).

    Parameters
    ----------
    model : MarkovModel
        The chosen model.
    scan : LagScan, optional
        The lag scan the model was chosen from (timescale figure and table with intervals).
    ck : CKResult, optional
        A Chapman–Kolmogorov test of the model (figure, verdict and table with intervals).
    macrostates : Macrostates, optional
        Macrostates of the model (populations with intervals when computed from labels, and
        mean first-passage times).
    settings : dict, optional
        How the data were prepared (features, TICA, clustering), shown as given.
    title : str
    figures : dict of str to matplotlib Figure, optional
        More figures to embed, by caption.
    now : datetime, optional
        The time written as the report's date (default: now, UTC).

    Returns
    -------
    str
    """
    from .model import MarkovModel

    if not isinstance(model, MarkovModel):
        raise InputError(f"model must be a MarkovModel (from build_model, lag_scan or load_model), but got "
                         f"{type(model).__name__}")
    if macrostates is not None and not np.array_equal(np.asarray(macrostates.states), np.asarray(model.states)):
        raise InputError("macrostates were found for another model (their states differ from the model's); "
                         "find them again with model.find_macrostates")
    if ck is not None and int(ck.lag) != int(model.lag):
        raise InputError(f"ck tests a model at lag {int(ck.lag)} frames, not this model at lag {int(model.lag)}; "
                         f"run chapman_kolmogorov on this model")
    if scan is not None and int(model.lag) not in [int(x) for x in scan.lags]:
        raise InputError(f"the model's lag ({int(model.lag)} frames) is not among the scanned lags "
                         f"{[int(x) for x in scan.lags]}; pass the scan the model was chosen from")
    now = now or _dt.datetime.now(_dt.timezone.utc)
    parts = [f"<h1>{_e(title)}</h1>",
             f"<p class='caption'>Written {_e(now.strftime('%Y-%m-%d %H:%M:%S %Z').strip())} by msmkit "
             f"{_e(_version())}. Every number below comes from the objects passed to "
             f"<code>msmkit.write_report</code>; figures are embedded.</p>"]
    parts += _summary_section(model, scan, ck, macrostates)
    parts += _settings_section(model, scan, ck, settings)
    parts += _diagnostics_section(model, scan, ck)
    parts += _model_section(model, scan, None if macrostates is None else macrostates.samples)
    if scan is not None:
        parts += _scan_section(scan, model)
    if ck is not None:
        parts += _ck_section(ck)
    if macrostates is not None:
        parts += _macro_section(macrostates, model)
    for caption, fig in (figures or {}).items():
        parts.append(_figure(fig, str(caption)))
    parts += _provenance_section(model, now)
    body = "\n".join(parts)
    return (f"<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'><title>{_e(title)}</title>"
            f"<meta name='generator' content='msmkit {_e(_version())}'><style>{_STYLE}</style></head>"
            f"<body>\n{body}\n</body></html>\n")


def write_report(path, model, *, scan=None, ck=None, macrostates=None, settings=None,
                 title: str = "Markov model analysis", figures=None, overwrite: bool = False) -> Path:
    """Write a self-contained HTML report of an analysis (see :func:`report_html`).

    Parameters
    ----------
    path : str or Path
        The HTML file; ``.html`` is appended when the name has no suffix.
    model, scan, ck, macrostates, settings, title, figures
        See :func:`report_html`.
    overwrite : bool, default False
        Replace an existing file (otherwise it is kept and an InputError raised).

    Returns
    -------
    Path
        The file written, atomically (a crash never leaves half a report).
    """
    from .modelfile import atomic_write

    if not isinstance(path, (str, Path)) or not str(path).strip():
        raise InputError(f"path must be a file name such as 'report.html', but got {path!r}")
    path = Path(path).expanduser()
    if not path.suffix:
        path = path.with_suffix(".html")
    if not path.parent.is_dir():
        raise InputError(f"path: the folder {path.parent} does not exist; create it or choose another")
    if path.exists() and not overwrite:
        raise InputError(f"path: {path} exists; choose another name or pass overwrite=True")
    text = report_html(model, scan=scan, ck=ck, macrostates=macrostates, settings=settings, title=title,
                       figures=figures)
    return atomic_write(path, lambda fh: fh.write(text.encode("utf-8")))


# -- sections ----------------------------------------------------------------------------------
def _summary_section(model, scan, ck, macro):
    ts = model.relaxation_times(min(3, model.n_states - 1))
    items = [f"Model at lag {_frames(model.lag)} ({model.lag_time:g} {model.unit}) on {model.n_states} states, "
             f"{'reversible' if model.reversible else 'non-reversible'} estimate, "
             f"{100 * model.kept_fraction:.3g}% of the transition counts kept.",
             "Slowest implied timescales: " + (", ".join(f"{t:.4g}" for t in ts) + f" {model.unit}." if ts.size
                                               else "none.")]
    if scan is not None:
        items.append(f"Lag scan over {len(scan.lags)} lags: " + (
            f"suggested lag {_frames(scan.suggested_lag)}." if scan.suggested_lag is not None else "no lag suggested."))
    if ck is not None:
        items.append(f"Chapman–Kolmogorov test on {ck.n_sets} sets: {'passed' if ck.passed else 'FAILED'}.")
    if macro is not None:
        items.append(f"{macro.n_sets} macrostates (PCCA+), crispness {macro.crispness:.3g}.")
    return ["<h2>Summary</h2><ul>" + "".join(f"<li>{_e(x)}</li>" for x in items) + "</ul>"]


def _settings_section(model, scan, ck, settings):
    rows = [("lag", f"{_frames(model.lag)} = {model.lag_time:g} {model.unit}"),
            ("time between frames", f"{model.dt:g} {model.unit}"),
            ("estimator", "reversible maximum likelihood" if model.reversible else "non-reversible maximum likelihood"),
            ("states kept", str(model.n_states))]
    params = model.metadata.get("parameters") or {}
    if "every_frame" in params:
        rows.append(("counting", "every frame (sliding window)" if params["every_frame"] else "every lag-th frame"))
    if scan is not None:
        rows += [("scanned lags (frames)", ", ".join(str(int(x)) for x in scan.lags)),
                 ("scan bootstrap samples", str(scan.n_samples)),
                 ("interval coverage", f"{100 * scan.confidence:g}%")]
    if ck is not None:
        rows += [("test sets", str(ck.n_sets)), ("test multiples k", ", ".join(str(int(k)) for k in ck.multiples)),
                 ("test bootstrap samples", str(ck.n_samples))]
    prep = settings if settings is not None else model.metadata.get("preparation")
    for key, value in _flatten(prep or {}):
        rows.append((f"preparation: {key}", value))
    return ["<h2>Settings</h2>", _kv_table(rows)]


def _diagnostics_section(model, scan, ck):
    cautions = list(model.diagnostics)
    if model.dropped_states.size:
        shown = ", ".join(str(int(s)) for s in model.dropped_states[:20])
        cautions.append(f"{model.dropped_states.size} states are not in the largest connected set and were dropped: "
                        f"{shown}{' ...' if model.dropped_states.size > 20 else ''}.")
    notes = []
    if scan is not None:
        cautions += lag_cautions(scan, model.lag)
        notes += [scan.reason, *scan.notes]
    if ck is not None:
        (notes if ck.passed else cautions).append(ck.criterion)
        notes += list(ck.notes)
    out = ["<h2>Diagnostics and cautions</h2>"]
    out += [f"<div class='caution'>{_e(x)}</div>" for x in cautions if x]
    if not cautions:
        out.append("<div class='note'>No caution was raised for this model.</div>")
    out += [f"<div class='note'>{_e(x)}</div>" for x in notes if x]
    out.append("<div class='note'>A Markov model is only as good as the sampling behind it: the slow processes "
               "must be crossed many times in the runs for these numbers to mean anything.</div>")
    return out


def _model_section(model, scan, samples=None):
    from .plots import plot_populations

    k = min(8, model.n_states - 1)
    ts = model.relaxation_times(k)
    cols = {"process": np.arange(1, ts.size + 1), f"implied timescale ({model.unit})": ts}
    caption = f"Implied timescales of the chosen model (lag {_frames(model.lag)})."
    if scan is not None and scan.n_samples:
        row = [int(x) for x in scan.lags].index(int(model.lag))
        n = min(ts.size, scan.timescales.shape[1])
        cols = {key: v[:n] for key, v in cols.items()}
        cols[f"{100 * scan.confidence:g}% interval"] = [_interval(lo, hi) for lo, hi in
                                                        zip(scan.lower[row, :n], scan.upper[row, :n])]
        caption += f" Intervals: bootstrap over runs, {scan.n_samples} samples."
    else:
        caption += " No interval: no bootstrap scan was passed."
    pops = model.populations()
    cols_p = {"state": pops["state"], "population": pops["population"]}
    caption_p = "The 20 most populated states (free energy relative to the most populated)."
    if samples is not None:
        table = samples.populations()
        cols_p["95% interval"] = [_interval(a, b) for a, b in zip(table["lower"], table["upper"])]
        caption_p += f" Intervals: {table.attrs['interval']}, {samples.n_samples} sampled models."
    cols_p["free energy (kT)"] = pops["free_energy_kT"]
    top = np.argsort(-pops["population"].to_numpy(), kind="stable")[:20]
    return ["<h2>Model</h2>", _table(cols, caption),
            _figure(plot_populations(model), "Stationary populations of the states."),
            _table({k: [list(v)[i] for i in top] for k, v in cols_p.items()}, caption_p)]


def _scan_section(scan, model):
    from .plots import plot_timescales

    df = scan.table()
    cols = {"lag (frames)": df["lag"], f"lag time ({scan.unit})": df["lag_time"], "process": df["process"],
            f"timescale ({scan.unit})": df["timescale"],
            f"{100 * scan.confidence:g}% interval": [_interval(a, b) for a, b in zip(df["lower"], df["upper"])],
            "resolved": ["yes" if r else "no (below the lag)" for r in df["resolved"]]}
    return ["<h2>Lag scan</h2>",
            _figure(plot_timescales(scan, selected_lag=int(model.lag)),
                    f"Implied timescales against the lag; chosen lag {_frames(model.lag)}."),
            _table(cols, "Every scanned lag and process; 'resolved': the timescale is longer than the lag time.")]


def _ck_section(ck):
    from .plots import plot_chapman_kolmogorov

    df = ck.table()
    cols = {"from set": df["from_set"], "to set": df["to_set"], "k": df["k"], "lag (frames)": df["lag"],
            "predicted": df["predicted"], "estimated": df["estimated"],
            "interval of the estimate": [_interval(a, b) for a, b in zip(df["lower"], df["upper"])],
            "within": ["yes" if w else "NO" for w in df["within"]]}
    sets = "; ".join(f"set {j}: {len(s)} states" for j, s in enumerate(ck.members))
    return ["<h2>Chapman–Kolmogorov test</h2>",
            f"<div class='{'note' if ck.passed else 'caution'}'>{_e(ck.criterion)}</div>",
            _figure(plot_chapman_kolmogorov(ck), "Predicted (model) against estimated (data) set-to-set "
                                                 "probabilities at multiples of the lag."),
            _table(cols, f"Every pair of sets and multiple k ({sets}). The test compares the model with the data it "
                         f"was built from: passing is necessary, not sufficient.")]


def _macro_section(macro, model):
    pops = macro.populations()
    cols = {"macrostate": pops["macrostate"], "population": pops["population"]}
    samples = macro.samples
    if samples is not None:
        cols["95% interval"] = [_interval(a, b) for a, b in zip(pops["population_lower"], pops["population_upper"])]
        how = samples.macro_populations(macro).attrs["interval"]
        note = f" Intervals: {how}, {samples.n_samples} sampled models, the memberships held fixed."
    else:
        note = " No interval: the macrostates were found without sampled models (n_samples=0)."
    cols["free energy (kT)"] = pops["free_energy_kT"]
    cols["microstates"] = [len(s) for s in pops["states"]]
    out = ["<h2>Macrostates</h2>", _table(cols, f"PCCA+ macrostates, most populated first.{note}")]
    if macro.propagator is None:  # a Macrostates without the matrix has no passage times
        return out
    table = macro.kinetics_table()
    cols = {"from": table["from_set"], "to": table["to_set"],
            f"mean first-passage time ({model.unit})": table["passage_time"]}
    if samples is not None:
        cols["95% interval"] = [_interval(a, b) for a, b in zip(table["passage_time_lower"],
                                                                table["passage_time_upper"])]
    cols[f"rate constant (1/{model.unit})"] = table["rate_constant"]
    if samples is not None:
        cols["95% interval "] = [_interval(a, b) for a, b in zip(table["rate_constant_lower"],
                                                                 table["rate_constant_upper"])]
    out.append(_table(cols, table.attrs["caption"]))
    if samples is not None:
        out += [f"<div class='note'>{_e(n)}</div>" for n in samples.notes]
    return out


def _provenance_section(model, now):
    meta = model.metadata
    rows = [("report written", now.isoformat(timespec="seconds")),
            ("msmkit", _version()), ("python", platform.python_version()),
            *[(name, _package_version(name)) for name in ("numpy", "scipy", "pandas", "matplotlib")],
            ("platform", platform.platform())]
    if "created" in meta:
        rows.append(("model created", str(meta["created"])))
    if "package_version" in meta:
        rows.append(("model made with msmkit", str(meta["package_version"])))
    rows.append(("data fingerprint (SHA-256 of the labels)", str(meta.get("labels_sha256", "not recorded"))))
    runs = meta.get("frames_per_run")
    if runs:
        rows.append(("runs", f"{len(runs)} runs, {int(np.sum(runs))} frames "
                             f"({int(np.min(runs))} to {int(np.max(runs))} per run)"))
    return ["<h2>Provenance</h2>", _kv_table(rows)]


# -- pieces ------------------------------------------------------------------------------------
def _figure(fig, caption: str) -> str:
    from .plots import figure_png

    png = figure_png(fig, dpi=DPI)
    data = base64.b64encode(png).decode("ascii")
    return (f"<figure><img alt='{_e(caption)}' src='data:image/png;base64,{data}'>"
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _table(columns: dict, caption: str) -> str:
    import pandas as pd

    df = pd.DataFrame({k: list(v) for k, v in columns.items()})
    head = "".join(f"<th>{_e(c)}</th>" for c in df.columns)
    body = "".join("<tr>" + "".join(f"<td>{_e(_cell(v))}</td>" for v in row) + "</tr>"
                   for row in df.itertuples(index=False))
    return (f"<table><caption class='caption' style='caption-side:top;text-align:left'>{_e(caption)}</caption>"
            f"<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>")


def _kv_table(rows) -> str:
    body = "".join(f"<tr><td class='key'>{_e(k)}</td><td style='text-align:left'>{_e(v)}</td></tr>" for k, v in rows)
    return f"<table><tbody>{body}</tbody></table>"


def _cell(v) -> str:
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return "–" if not np.isfinite(v) else f"{float(v):.4g}"
    return str(v)


def _interval(lo, hi) -> str:
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return "–"
    return f"{lo:.4g} – {hi:.4g}"


def _flatten(d, prefix=""):
    for key, value in dict(d).items():
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            yield from _flatten(value, f"{name}.")
        elif isinstance(value, (list, tuple)):
            yield name, ", ".join(str(x) for x in value)
        else:
            yield name, "none" if value is None else str(value)


def _frames(n) -> str:
    n = int(n)
    return f"{n} frame" if n == 1 else f"{n} frames"


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _version() -> str:
    from ._version import __version__
    return __version__


def _package_version(name: str) -> str:
    from importlib.metadata import PackageNotFoundError, version
    try:
        return version(name)
    except PackageNotFoundError:
        return "not installed"
