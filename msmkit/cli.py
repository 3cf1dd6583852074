"""The ``msmkit`` command: the same engine as the library, for batch work.

Sub-commands::

    msmkit demo  -o DIR                         the whole job on the demo scenario
    msmkit build FILES... --lag N --states K -o model.npz
    msmkit scan  FILES... --lags 1,2,5,10 --states K -o DIR
    msmkit info  model.npz
    msmkit report model.npz -o report.html      a self-contained HTML report of a saved model

Exit codes: 0 success, 1 bad input, a malformed file, a failed computation or a failed write
(full disk, read-only folder): one line on stderr, no traceback, no output file written or
replaced; 2 a malformed command line.
"""
from __future__ import annotations

import argparse
import errno
import os
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np

from .defaults import BOOTSTRAP_SAMPLES, CK_MULTIPLES, CK_SAMPLES, PROCESSES, UNCERTAINTIES
from .errors import DiagnosticWarning, InputError, ModelFileError
from .modelfile import atomic_write

__all__ = ["main"]

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2


# ----------------------------------------------------------------------------- pipeline
#: Features whose standard deviations differ by more than this factor are not comparable in
#: the distances k-means uses; without TICA or scaling the widest ones decide the states.
SPREAD_RATIO_CAUTION = 10.0


def _microstates(trajs, *, n_states, tica_lag, tica_dim, stride, seed, progress, scale="none",
                 say=None):
    """Trajectories -> (label trajectories, fitted TICA or None, fitted Microstates).

    Without TICA, ``scale="standard"`` clusters features standardized to unit variance (the
    model file then stores ``feature_mean`` and ``feature_scale``); with ``"none"`` a caution
    goes to ``say`` when the features' spreads differ by more than SPREAD_RATIO_CAUTION.
    """
    from .io import load_trajectories
    from .reduce import TICA
    from .states import Microstates
    tica = None
    data = trajs
    if not tica_dim:
        trajs = load_trajectories(trajs)
        if scale == "standard":
            data = trajs.standardized()
        elif say is not None:
            _, sd = trajs.feature_spread()
            live = sd[sd > 0]
            if live.size > 1 and live.max() > SPREAD_RATIO_CAUTION * live.min():
                say(f"caution: the features are clustered unscaled and their standard "
                    f"deviations range from {live.min():.3g} to {live.max():.3g}; the widest "
                    f"decide the states. Use --scale standard or --tica-dim")
    if tica_dim:
        tica = TICA(tica_lag, dim=tica_dim, progress=progress).fit(trajs)
        data = tica.transform(trajs)
    micro = Microstates(n_states, stride=stride, seed=seed, progress=progress).fit(data)
    micro.feature_scaling_ = ((data.feature_mean, data.feature_scale)
                              if hasattr(data, "feature_scale") else None)
    return micro.labels_, tica, micro


def _extras(tica, micro) -> dict:
    out = {"centers": micro.centers_}
    if getattr(micro, "feature_scaling_", None) is not None:
        out["feature_mean"], out["feature_scale"] = micro.feature_scaling_
    if tica is not None:
        out["tica_mean"] = tica.mean_
        out["tica_components"] = tica.projection_  # rows as transform applies them, scaling included
    return out


def _parse_lags(text: str) -> list[int]:
    try:
        lags = [int(x) for x in text.replace(" ", "").split(",") if x]
    except ValueError:
        raise InputError(f"--lags must be comma-separated whole numbers of frames, e.g. 1,2,5,10; got {text!r}") from None
    if not lags:
        raise InputError("--lags is empty; give e.g. --lags 1,2,5,10")
    return lags


def summary_text(model, scan=None, *, macro=None, macro_reason="", ck=None) -> str:
    """A short plain-text report of a model, and of the scan, macrostates and Chapman–Kolmogorov
    test that go with it when given."""
    lines = [
        "msmkit model summary",
        f"  states kept:       {model.n_states}"
        + (f" ({len(model.dropped_states)} dropped)" if len(model.dropped_states) else ""),
        f"  lag:               {model.lag} frames = {model.lag_time:g} {model.unit}",
        f"  frame time:        {model.dt:g} {model.unit}",
        f"  estimator:         {'reversible' if model.reversible else 'non-reversible'} maximum likelihood",
        f"  counts kept:       {100 * model.kept_fraction:.4g}% of transitions",
    ]
    if model.n_states > 1:
        ts = model.relaxation_times(min(5, model.n_states - 1))
        lines.append(f"  slowest implied timescales [{model.unit}]: " + ", ".join(f"{t:.4g}" for t in ts))
    else:
        lines.append("  slowest implied timescales: none (a single state has no process to relax)")
    pops = model.populations().nlargest(5, "population")
    lines.append("  most populated states (label: population):")
    lines += [f"    {int(r.state)}: {r.population:.4f}" for r in pops.itertuples()]
    if scan is not None:
        if scan.n_samples:
            lines.append(f"  intervals:         {100 * scan.confidence:g}% from {scan.n_samples} samples per lag, "
                         f"{scan.uncertainty}")
        lines.append(f"  suggested lag:     {scan.suggested_lag}")
        lines.append(f"  reason:            {scan.reason}")
        lines += [f"  note: {n}" for n in scan.notes]
    if macro is None and macro_reason:
        lines.append(f"  macrostates (PCCA+): none -- {macro_reason}")
    if macro is not None:
        lines += _macro_lines(model, macro, macro_reason)
    if ck is not None:
        lines.append(f"  Chapman–Kolmogorov test: {'passed' if ck.passed else ck.verdict.upper()}")
        lines.append(f"    {ck.criterion}")
    if model.diagnostics:
        lines.append("  diagnostics:")
        lines += [f"    - {d}" for d in model.diagnostics]
    else:
        lines.append("  diagnostics:       none")
    lines.append("  caution: a model is only as good as the sampling behind it; validate the model "
                 "(Chapman–Kolmogorov test) before trusting the kinetics.")
    return "\n".join(lines) + "\n"


def _macro_lines(model, macro, reason) -> list[str]:
    """Macrostate populations, and passage times and rates between macrostates, with intervals
    when the macrostates carry sampled models (``macro.samples``)."""
    lines = [f"  macrostates (PCCA+): {macro.n_sets}" + (f" -- {reason}" if reason else "")]
    pops = macro.populations()
    sampled = macro.samples is not None
    for r in pops.itertuples():
        interval = f" (95% interval {r.population_lower:.4f}-{r.population_upper:.4f})" if sampled else ""
        lines.append(f"    {int(r.macrostate)}: population {r.population:.4f}{interval}, {len(r.states)} microstates")
    table = macro.kinetics_table()
    lines.append(f"  between macrostates (from -> to): mean first-passage time [{model.unit}], "
                 f"rate constant [1/{model.unit}]" + (", 95% intervals in brackets:" if sampled else ":"))
    for r in table.itertuples():
        mfpt, rate = f"{r.passage_time:.4g}", f"{r.rate_constant:.4g}"
        if sampled:
            mfpt += f" [{r.passage_time_lower:.4g}, {r.passage_time_upper:.4g}]"
            rate += f" [{r.rate_constant_lower:.4g}, {r.rate_constant_upper:.4g}]"
        lines.append(f"    {r.from_set} -> {r.to_set}: passage time {mfpt} {model.unit}, rate {rate} per {model.unit}")
    lines.append(f"    {table.attrs['caption']}")
    if sampled:
        lines += [f"    note: {n}" for n in macro.samples.notes]
    return lines


# ----------------------------------------------------------------------------- output
class _Outputs:
    """Files written to a folder only once everything has been computed, each atomically."""

    def __init__(self, folder, *, force: bool = True):
        self.folder = Path(folder)
        self.force = force
        self.files: dict[str, bytes] = {}

    def add_text(self, name, text):
        self.files[name] = text.encode()

    def add_figure(self, name, fig):
        from .plots import figure_png
        self.files[name] = figure_png(fig, dpi=120)

    def check_free(self, names) -> None:
        """Refuse, before any work, a folder that is a file or (without force) holds outputs."""
        if self.folder.exists() and not self.folder.is_dir():
            raise InputError(f"--output {self.folder} exists and is not a folder; give a folder name")
        if not self.force:
            taken = [n for n in names if (self.folder / n).exists()]
            if taken:
                raise InputError(f"{self.folder} already holds {', '.join(taken)}; choose another folder or pass "
                                 f"--force to overwrite")

    def write(self) -> list[Path]:
        self.check_free(self.files)
        self.folder.mkdir(parents=True, exist_ok=True)
        written = []
        for name, data in self.files.items():
            written.append(atomic_write(self.folder / name, lambda fh, data=data: fh.write(data),
                                        overwrite=self.force))
        return written


# ----------------------------------------------------------------------------- commands
def _scan_and_choose(labels, args, lags, dt, unit):
    from .lagscan import lag_scan
    scan = lag_scan(labels, lags, dt=dt, unit=unit, n_processes=args.timescales, n_samples=args.samples,
                    seed=args.seed, uncertainty=args.uncertainty, progress=not args.quiet)
    return scan


def _write_scan_outputs(out: _Outputs, scan, chosen):
    from .plots import plot_populations, plot_timescales
    model = scan.model(chosen)
    out.add_figure("implied_timescales.png", plot_timescales(scan, selected_lag=chosen))
    table = scan.table()
    table.insert(2, "unit", scan.unit)
    out.add_text("implied_timescales.csv", table.to_csv(index=False))
    out.add_figure("populations.png", plot_populations(model))
    out.add_text("populations.csv", model.populations().to_csv(index=False))
    out.add_text("summary.txt", summary_text(model, scan))
    return model


def _validate(model, labels, args, out: _Outputs):
    """Macrostates (suggested number), the Chapman–Kolmogorov test and the lag-flow view."""
    from .plots import plot_chapman_kolmogorov, plot_lag_flow
    from .validate import chapman_kolmogorov, lag_flow
    macro, reason = _macrostates(model, labels, args)
    n_sets = macro.n_sets
    longest = max(len(r) for r in labels)
    multiples = max(1, min(args.multiples, (longest - 1) // model.lag))
    ck = chapman_kolmogorov(model, labels, n_sets=n_sets, multiples=multiples, n_samples=args.ck_samples,
                            seed=args.seed, uncertainty=args.uncertainty, progress=not args.quiet)
    out.add_figure("chapman_kolmogorov.png", plot_chapman_kolmogorov(ck))
    out.add_text("chapman_kolmogorov.csv", ck.table().to_csv(index=False))
    out.add_figure("lag_flow.png", plot_lag_flow(lag_flow(ck)))
    _add_macro_tables(out.add_text, model, macro)
    return macro, reason, ck


def _macrostates(model, labels, args):
    """PCCA+ macrostates (the suggested number, at least 2) with intervals from ``--samples``
    models sampled as ``--uncertainty`` says."""
    n_sets, reason = model.suggest_n_macrostates()
    macro = model.find_macrostates(max(2, n_sets), labels=labels, n_samples=args.samples,
                                   uncertainty=args.uncertainty, seed=args.seed, progress=not args.quiet)
    return macro, reason


def _add_macro_tables(add, model, macro):
    """The macrostate tables as CSV through ``add(name, text)``; units in the column names."""
    pops = macro.populations()
    add("macrostates.csv", pops.to_csv(index=False))
    add("mfpt_macrostates.csv", macro.passage_time_table().to_csv())
    table = macro.kinetics_table()
    table = table.rename(columns=lambda c: c.replace("passage_time", f"passage_time_{model.unit}")
                         .replace("rate_constant", f"rate_constant_per_{model.unit}"))
    add("macrostate_kinetics.csv", table.to_csv(index=False))


def cmd_demo(args) -> int:
    from . import demo
    from .modelfile import save_model
    trajs = demo.trajectories(seed=args.seed)
    _say(args, f"demo scenario: {len(trajs)} runs, {trajs.total_frames} frames of {demo.DT:g} {demo.UNIT}, "
               f"features {', '.join(demo.FEATURE_NAMES)}")
    labels, tica, micro = _microstates(trajs, n_states=args.states, tica_lag=args.tica_lag, tica_dim=args.tica_dim,
                                       stride=args.stride, seed=args.seed, progress=not args.quiet)
    lags = _parse_lags(args.lags)
    scan = _scan_and_choose(labels, args, lags, demo.DT, demo.UNIT)
    chosen = scan.suggested_lag if scan.suggested_lag is not None else int(scan.lags[len(scan.lags) // 2])
    out = _Outputs(args.output)
    model = _write_scan_outputs(out, scan, chosen)
    macro, reason, ck = _validate(model, labels, args, out)
    out.add_text("summary.txt", summary_text(model, scan, macro=macro, macro_reason=reason, ck=ck))
    with tempfile.TemporaryDirectory() as tmp:
        path = save_model(model, Path(tmp) / "model.npz", affinity=macro.affinity, **_extras(tica, micro))
        out.files["model.npz"] = path.read_bytes()
    for p in out.write():
        _say(args, f"wrote {p}")
    _say(args, f"lag {chosen} frames ({chosen * demo.DT:g} {demo.UNIT}): {scan.reason}")
    return EXIT_OK


def _parse_frames(text):
    """``START:STOP:STEP`` (parts optional) -> slice of frames read from each MD file."""
    if text is None:
        return None
    parts = text.split(":")
    try:
        if len(parts) > 3:
            raise ValueError
        values = [int(p) if p.strip() else None for p in parts] + [None] * (3 - len(parts))
    except ValueError:
        raise InputError(f"--frames must be START:STOP:STEP in frames (parts may be left out, "
                         f"e.g. 100::10), got {text!r}") from None
    return slice(*values)


def _tica_lag(args) -> int:
    """One rule for every command, so that ``build --lag L`` gives the model ``scan`` shows at
    lag L: the TICA lag is --tica-lag, else 1 frame, never the model lag."""
    return args.tica_lag or 1


def _load(args):
    from .io import load_trajectories
    # MD options are ignored by the feature formats (npy, csv, h5, ...)
    md = dict(topology=args.topology, features=args.features, periodic=args.periodic,
              selection=args.select, frames=_parse_frames(args.frames))
    trajs = load_trajectories(args.files, progress=not args.quiet, **md)
    dt = args.dt if args.dt is not None else (getattr(trajs, "dt", None) or 1.0)
    unit = args.unit if args.unit is not None else (getattr(trajs, "unit", None) or "step")
    return trajs, dt, unit


def cmd_build(args) -> int:
    from .model import build_model
    out = Path(args.output)
    if out.suffix != ".npz":  # the name the model file gets (see save_model)
        out = out.with_name(out.name + ".npz")
    if out.exists() and not args.force:
        raise InputError(f"-o {out} exists; choose another name or pass --force to overwrite")
    trajs, dt, unit = _load(args)
    labels, tica, micro = _microstates(trajs, n_states=args.states, tica_lag=_tica_lag(args),
                                       tica_dim=args.tica_dim, stride=args.stride, seed=args.seed,
                                       progress=not args.quiet, scale=args.scale,
                                       say=lambda text: _say(args, text))
    model = build_model(labels, args.lag, dt=dt, unit=unit, reversible=not args.non_reversible)
    macro, reason = _macrostates(model, labels, args) if model.n_states > 2 else (None, "")
    if trajs.feature_atoms is not None:  # MD files: what new trajectories need to be assigned
        from .mdfeatures import MDFeatures
        spec = MDFeatures.from_options(args.features, ("phi", "psi"), None, args.periodic, args.select)
        model.metadata["md_features"] = {"spec": spec.to_dict(),
                                         "feature_names": list(trajs.feature_names)}
    extras = _extras(tica, micro)
    if macro is not None:
        extras["affinity"] = macro.affinity
    summary = summary_text(model, macro=macro, macro_reason=reason).rstrip()  # before saving: a failure here must leave no file
    path = model.save(out, overwrite=args.force, **extras)
    _say(args, summary)
    _say(args, f"wrote {path}")
    return EXIT_OK


SCAN_OUTPUTS = ("implied_timescales.png", "implied_timescales.csv", "populations.png", "populations.csv",
                "summary.txt")


def cmd_scan(args) -> int:
    out = _Outputs(args.output, force=args.force)
    out.check_free(SCAN_OUTPUTS)
    trajs, dt, unit = _load(args)
    lags = _parse_lags(args.lags)
    labels, tica, micro = _microstates(trajs, n_states=args.states, tica_lag=_tica_lag(args),
                                       tica_dim=args.tica_dim, stride=args.stride, seed=args.seed,
                                       progress=not args.quiet, scale=args.scale,
                                       say=lambda text: _say(args, text))
    scan = _scan_and_choose(labels, args, lags, dt, unit)
    chosen = scan.suggested_lag if scan.suggested_lag is not None else int(scan.lags[0])
    _write_scan_outputs(out, scan, chosen)
    for p in out.write():
        _say(args, f"wrote {p}")
    _say(args, f"suggested lag: {scan.suggested_lag} frames. {scan.reason}")
    if tica is not None:
        _say(args, f"TICA lag {_tica_lag(args)} frames; build with the same --tica-lag, --tica-dim, "
                   f"--states, --stride and --seed to get the model at a scanned lag")
    return EXIT_OK


def cmd_info(args) -> int:
    from .model import load_model
    model = load_model(args.model)
    macro, reason = None, ""
    if model.n_states > 2:
        try:
            n_sets, reason = model.suggest_n_macrostates()
            if "affinity" in model.extras:
                n_sets, reason = model.extras["affinity"].shape[1], "as stored with the model"
            macro = model.find_macrostates(max(2, n_sets))
        except InputError as exc:  # a sound model PCCA+ cannot split (e.g. a periodic chain)
            macro, reason = None, f"not computed: {exc}"
    print(summary_text(model, macro=macro, macro_reason=reason), end="")
    meta = model.metadata
    if "created" in meta:
        print(f"  created:           {meta['created']} (msmkit {meta.get('package_version', '?')})")
    if "labels_sha256" in meta:
        print(f"  labels SHA-256:    {meta['labels_sha256']}")
    if model.extras:
        print("  stored arrays:     " + ", ".join(f"{k} {v.shape}" for k, v in model.extras.items()))
    return EXIT_OK


def cmd_report(args) -> int:
    from .model import load_model
    from .report import write_report
    target = Path(args.output)
    target = target if target.suffix else target.with_suffix(".html")
    if target.exists() and not args.force:
        raise InputError(f"-o: {target} exists; choose another name or pass --force")
    model = load_model(args.model)
    macro = None
    if "affinity" in model.extras and model.n_states > 2:
        macro = model.find_macrostates(int(model.extras["affinity"].shape[1]))
    written = write_report(args.output, model, macrostates=macro, title=f"Markov model {Path(args.model).name}",
                           overwrite=args.force)
    _say(args, f"wrote {written}")
    return EXIT_OK


# ----------------------------------------------------------------------------- parser
def _positive(kind, word):
    """An argparse type: ``kind(text)`` that must be finite and > 0 (>= 1 for whole numbers)."""
    def parse(text):
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {word}, got {text!r}") from None
        if not np.isfinite(value) or value <= 0:
            raise argparse.ArgumentTypeError(f"expected a positive {word.split(' ', 1)[1]}, got {text!r}")
        return value
    return parse


_positive_float = _positive(float, "a number")
_positive_int = _positive(int, "a whole number")


def add_uncertainty_option(sp, what: str) -> None:
    """``--uncertainty {bootstrap,bayes}``: one definition for every command that forms intervals
    (``what`` says which ones, e.g. "of the implied timescales")."""
    sp.add_argument("--uncertainty", choices=UNCERTAINTIES, default=UNCERTAINTIES[0],
                    help=f"how the intervals {what} are obtained: bootstrap over runs, or bayes, the "
                         f"posterior of reversible transition matrices (default %(default)s)")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="msmkit", description="Markov state models from simulation trajectories.")
    p.add_argument("--version", action="version", version=f"msmkit {_version()}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def common(sp, *, files=True):
        if files:
            sp.add_argument("files", nargs="+", metavar="FILES",
                            help="trajectory files or glob patterns (.npy, .npz, .csv, .tsv, .h5; MD formats "
                                 "with msmkit[md]); one run per file (per array in .npz/.h5)")
            sp.add_argument("--dt", type=_positive_float, help="time between frames (default 1)")
            sp.add_argument("--unit", help="time unit of --dt, e.g. ns (default: ps when the MD files "
                                           "give the time step, else step)")
            sp.add_argument("--topology", metavar="FILE",
                            help="MD files: structure file (.pdb, .gro, .psf, .prmtop) for coordinates-only "
                                 "trajectories (.xtc, .trr, .dcd, .nc)")
            sp.add_argument("--features", metavar="KINDS",
                            help="MD files: comma-separated feature kinds: backbone-torsions (default), "
                                 "sidechain-torsions, ca-distances, residue-mindist, distances, inverse-distances, contacts")
            sp.add_argument("--select", metavar="SELECTION",
                            help="MD files: atom selection (mdtraj syntax) the features are limited to, "
                                 "e.g. 'name CA and resSeq 10 to 60' (resSeq: the file's residue numbers; resid counts from 0)")
            sp.add_argument("--periodic", choices=("whole", "minimum-image", "none"), default="whole",
                            help="MD files: distances in a periodic box: join molecules first (whole, "
                                 "default), nearest image, or ignore the box")
            sp.add_argument("--frames", metavar="START:STOP:STEP",
                            help="MD files: frame range and step read from each file, e.g. 0:5000:10")
            sp.add_argument("--scale", choices=("standard", "none"), default="standard",
                            help="without --tica-dim: cluster features standardized to unit variance "
                                 "(standard, default) or as they are (none)")
        sp.add_argument("--states", type=_positive_int, default=100, help="number of k-means microstates (default %(default)s)")
        sp.add_argument("--tica-dim", type=int, default=None,
                        help="reduce to this many TICA coordinates before clustering (default: %(default)s; none = cluster the features)")
        sp.add_argument("--tica-lag", type=_positive_int, default=None, help="TICA lag in frames (default 1 frame, the same for build and scan)")
        sp.add_argument("--stride", type=_positive_int, default=1, help="fit k-means on every STRIDE-th frame (default %(default)s)")
        sp.add_argument("--seed", type=int, default=0, help="random seed (default %(default)s)")
        sp.add_argument("-q", "--quiet", action="store_true", help="no progress bars or messages")

    def kinetics_intervals(sp):
        sp.add_argument("--samples", type=int, default=BOOTSTRAP_SAMPLES,
                        help="sampled models behind the intervals of the macrostate populations, passage "
                             "times and rates (default %(default)s; 0 = none)")
        add_uncertainty_option(sp, "on the macrostate populations, passage times and rates")

    def scanning(sp, default_lags, *, validates):
        sp.add_argument("--lags", default=default_lags, help=f"comma-separated lags in frames (default {default_lags})")
        sp.add_argument("--samples", type=int, default=BOOTSTRAP_SAMPLES,
                        help="samples per lag for the intervals, bootstrap or posterior (default %(default)s; "
                             "0 = none)")
        sp.add_argument("--timescales", type=_positive_int, default=PROCESSES, help="slow processes to follow (default %(default)s)")
        add_uncertainty_option(sp, "of the implied timescales" + (", the Chapman–Kolmogorov test, the macrostate "
                                                                   "populations, passage times and rates"
                                                                   if validates else ""))
        if not validates:
            return
        sp.add_argument("--multiples", type=_positive_int, default=CK_MULTIPLES,
                        help="Chapman–Kolmogorov test up to this multiple of the lag (default %(default)s)")
        sp.add_argument("--ck-samples", type=int, default=CK_SAMPLES,
                        help="samples of the Chapman–Kolmogorov test, bootstrap or posterior (default %(default)s)")

    d = sub.add_parser("demo", help="run the whole job headless on the demo scenario",
                       description="Demo scenario -> TICA -> microstates -> lag scan -> chosen model; writes "
                                   "model.npz, implied_timescales.png/.csv, populations.png/.csv, macrostates.csv, "
                                   "macrostate_kinetics.csv (passage times and rates with intervals), summary.txt.")
    d.add_argument("-o", "--output", required=True, help="output folder (created if missing)")
    common(d, files=False)
    d.set_defaults(states=60, tica_dim=2, tica_lag=5, stride=2)
    scanning(d, "1,2,5,10,20,40", validates=True)
    d.set_defaults(func=cmd_demo)

    b = sub.add_parser("build", help="build one model at a given lag",
                       description="Trajectory files -> (TICA) -> microstates -> model at --lag -> model file.")
    common(b)
    b.add_argument("--lag", type=_positive_int, required=True, help="lag time in frames")
    b.add_argument("--non-reversible", action="store_true", help="do not enforce detailed balance")
    b.add_argument("-o", "--output", required=True, help="model file to write (.npz)")
    b.add_argument("--force", action="store_true", help="overwrite an existing model file")
    kinetics_intervals(b)
    b.set_defaults(func=cmd_build)

    s = sub.add_parser("scan", help="implied timescales across lags, and a suggested lag",
                       description="Trajectory files -> (TICA) -> microstates -> lag scan; writes the plot, tables "
                                   "and a summary to the output folder.")
    common(s)
    scanning(s, "1,2,5,10,20", validates=False)
    s.add_argument("-o", "--output", required=True, help="output folder")
    s.add_argument("--force", action="store_true", help="overwrite outputs already in the folder")
    s.set_defaults(func=cmd_scan)

    i = sub.add_parser("info", help="describe a saved model file", description="Check and describe a model file.")
    i.add_argument("model", help="model file (.npz)")
    i.set_defaults(func=cmd_info)

    r = sub.add_parser("report", help="write a self-contained HTML report of a saved model",
                       description="Model file -> one HTML file with settings, figures, tables, diagnostics "
                                   "and provenance (figures embedded; opens offline).")
    r.add_argument("model", help="model file (.npz)")
    r.add_argument("-o", "--output", required=True, help="HTML file to write")
    r.add_argument("--force", action="store_true", help="overwrite an existing report")
    r.add_argument("-q", "--quiet", action="store_true", help="no messages")
    r.set_defaults(func=cmd_report)
    return p


def _version():
    from ._version import __version__
    return __version__


def _say(args, text):
    if not getattr(args, "quiet", False):
        print(text)


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DiagnosticWarning)  # reported in the summary instead
            return args.func(args)
    except (InputError, ModelFileError) as exc:
        print(f"msmkit {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_FAILED
    except ImportError as exc:
        print(f"msmkit {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_FAILED
    except KeyboardInterrupt:
        print(f"msmkit {args.command}: interrupted; nothing was written", file=sys.stderr)
        return EXIT_FAILED
    except OSError as exc:
        print(f"msmkit {args.command}: error: {_os_error(exc)}", file=sys.stderr)
        return EXIT_FAILED
    except MemoryError:
        print(f"msmkit {args.command}: error: out of memory; use fewer states, a larger --stride or fewer "
              f"files at once", file=sys.stderr)
        return EXIT_FAILED
    except Exception as exc:  # a failure the library did not foresee: still one line, no traceback
        if os.environ.get("MSMKIT_TRACEBACK"):
            raise
        print(f"msmkit {args.command}: error: unexpected {type(exc).__name__}: {_one_line(exc)} "
              f"(set MSMKIT_TRACEBACK=1 to see where)", file=sys.stderr)
        return EXIT_FAILED


def _one_line(exc) -> str:
    return " ".join(str(exc).split())


def _os_error(exc: OSError) -> str:
    """A file-system failure in words, naming the file."""
    where = f"{exc.filename}: " if exc.filename else ""
    if exc.errno == errno.ENOSPC:
        return f"{where}no space left on the device; nothing was written (free some space and run again)"
    if exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
        return f"{where}cannot write there ({exc.strerror}); choose a folder you can write to"
    return f"{where}{exc.strerror or _one_line(exc)}"


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
