"""The session file: the state of an analysis (settings and results of every step) in one ``.npz``.

A model file (:mod:`msmkit.modelfile`) holds the chosen model; a session file holds the way
there as well, so that a workbench (or a script) can show the tables and figures again without
clustering, scanning or resampling anything: the settings of every step, the microstates and
the TICA projection, the label trajectories, the lag scan with the bootstrap intervals, the
suggested lag and the reason, every scanned model, the chosen lag, the Chapman–Kolmogorov
result and the macrostates.

Layout
------
The file is a zip of ``.npy`` arrays readable with ``numpy.load(path, allow_pickle=False)``:

format            the string "msmkit-session"
format_version    int, currently 1
session           JSON text (NaN as Python's json writes it): every scalar, string and list,
                  with ``{"$array": key}`` where an array of the archive stands, ``{"$model": prefix}`` for a Markov model stored as
                  the arrays of a model file under ``prefix.`` (:func:`msmkit.modelfile.model_arrays`),
                  and ``{"$type": name, "fields": {...}}`` for a result (LagScan, CKResult,
                  Macrostates, ModelSamples) or ``{"$estimator": name, ...}`` for a fitted TICA or Microstates
other members     numeric arrays named after where they belong (``scan.timescales``, ``labels.0``,
                  ``models.10.propagator``, ...)

No Python object is pickled; loading never runs code from the file. Every member's header is
checked (no objects, declared size within :data:`MAX_ARRAY_BYTES` and equal to the stored size)
before it is read, models are checked as model files are, and the shapes of the results are
checked against each other. A bad, damaged or foreign file raises
:class:`~msmkit.errors.InputError` naming the file and what is wrong.
"""
from __future__ import annotations

import dataclasses
import inspect
import json
import math
import zipfile
import zlib
from pathlib import Path

import numpy as np

from ._checks import check_bool, read_npy_header, zip_member_problem
from .errors import InputError, ModelFileError
from .lagscan import LagScan
from .macro import Macrostates
from .model import MarkovModel, now_utc, package_version
from .modelfile import atomic_write, model_arrays, model_fields, model_path
from .reduce import TICA
from .states import Microstates
from .uncertainty import ModelSamples
from .validate import CKResult

__all__ = ["FORMAT", "FORMAT_VERSION", "Session", "load_session", "save_session"]

FORMAT = "msmkit-session"
FORMAT_VERSION = 1
#: largest single array a session file may hold (as for model files)
MAX_ARRAY_BYTES = 1 << 30
#: largest sum of the declared array sizes of one file
MAX_TOTAL_BYTES = 4 << 30
#: largest JSON text
MAX_JSON_BYTES = 64 << 20
#: the .npy header of a member may not exceed this (numpy's own default limit)
MAX_HEADER_BYTES = 10_000

#: results stored field by field, by class name
RESULTS = {cls.__name__: cls for cls in (LagScan, CKResult, Macrostates, ModelSamples)}
#: fitted estimators stored as their parameters and fitted attributes (names ending in "_")
ESTIMATORS = {cls.__name__: cls for cls in (TICA, Microstates)}


@dataclasses.dataclass(eq=False)
class Session:
    """The state of an analysis: what each step was set to and what it found.

    Every result is optional (None: the step was not run, or the result belongs to another
    model than the chosen one).

    Attributes
    ----------
    settings : dict
        JSON values: the settings of each step by step name (``"microstates"``, ``"lags"``,
        ``"populations"``, ``"validation"``, ``"kinetics"``).
    dt : float
        Time between frames, in ``unit``.
    unit : str
    frames_per_run : list of int
        Frames of each run of the trajectories the session was made from.
    trajectories_sha256 : str
        Fingerprint of those trajectories (their float64 values and run lengths).
    microstates : Microstates or None
        The fitted clustering (centers, counts, and the label trajectories ``labels_``).
    tica : TICA or None
        The fitted TICA (components, eigenvalues, cumulative kinetic variance).
    feature_scaling : (mean, scale) or None
        How the features were standardized before clustering (without TICA).
    scan : LagScan or None
        With the model of every scanned lag.
    lag : int or None
        The chosen lag in frames (one of ``scan.lags``).
    ck : CKResult or None
        The Chapman–Kolmogorov test of the model at ``lag``.
    flow_pair : (int, int) or None
        The two sets of the lag flow drawn from ``ck``.
    macrostates : Macrostates or None
        PCCA+ macrostates of the model at ``lag``.
    pair : (int, int) or None
        Source and target macrostates of the reactive flux.
    created, package_version : str
    """

    settings: dict = dataclasses.field(default_factory=dict)
    dt: float = 1.0
    unit: str = "step"
    frames_per_run: list = dataclasses.field(default_factory=list)
    trajectories_sha256: str = ""
    microstates: Microstates | None = None
    tica: TICA | None = None
    feature_scaling: tuple | None = None
    scan: LagScan | None = None
    lag: int | None = None
    ck: CKResult | None = None
    flow_pair: tuple | None = None
    macrostates: Macrostates | None = None
    pair: tuple | None = None
    created: str = ""
    package_version: str = ""

    @property
    def labels(self) -> list | None:
        """Microstate label trajectories (``microstates.labels_``; None without microstates)."""
        return None if self.microstates is None else self.microstates.labels_

    @property
    def model(self) -> MarkovModel | None:
        """The model at the chosen lag (None without a scan or a lag)."""
        if self.scan is None or self.lag is None:
            return None
        return self.scan.model(self.lag)


def trajectories_fingerprint(runs) -> str:
    """SHA-256 of feature trajectories (float64 values, shapes), to tell whether a session
    belongs to the data at hand."""
    import hashlib

    h = hashlib.sha256()
    for r in runs:
        a = np.ascontiguousarray(np.asarray(r, dtype=np.float64))
        h.update(np.asarray(a.shape, dtype=np.int64).tobytes())
        h.update(a.tobytes())
    return h.hexdigest()


# ----------------------------------------------------------------------------- writing
def save_session(session: Session, path, *, overwrite: bool = False) -> Path:
    """Write ``session`` to ``path`` atomically (temporary file in the same folder, then rename).

    Parameters
    ----------
    session : Session
    path : str or Path
        ``.npz`` is appended when missing.
    overwrite : bool, default False
        If False and the file exists, raise InputError and touch nothing (the test and the
        creation are one step, as for model files).

    Returns
    -------
    Path
        The file written.
    """
    if not isinstance(session, Session):
        raise InputError(f"session must be a msmkit.session.Session, but got {type(session).__name__}")
    path = model_path(path, "path")
    overwrite = check_bool(overwrite, "overwrite")
    if path.suffix != ".npz":
        path = path.with_name(path.name + ".npz")
    if path.exists() and not overwrite:
        raise InputError(f"{path} exists; choose another name or pass overwrite=True")
    if not path.parent.is_dir():
        raise InputError(f"cannot save to {path}: folder {path.parent} does not exist")
    arrays = session_arrays(session)
    atomic_write(path, lambda fh: write_arrays(fh, arrays), overwrite=overwrite, shown=path)
    return path


def session_arrays(session: Session) -> dict:
    """The named arrays of the file for ``session``."""
    arrays = {}
    fields = {f.name: getattr(session, f.name) for f in dataclasses.fields(Session)}
    fields["created"] = fields["created"] or now_utc()
    fields["package_version"] = fields["package_version"] or package_version()
    tree = _encode(fields, "", arrays)
    try:
        text = json.dumps(tree, sort_keys=True)
    except (TypeError, ValueError) as exc:
        raise InputError(f"session holds a value that cannot be stored: {exc}") from None
    return {"format": np.array(FORMAT), "format_version": np.array(FORMAT_VERSION, dtype=np.int64),
            "session": np.array(text), **arrays}


def write_arrays(fh, arrays: dict) -> None:
    """Fill an open binary file with the compressed archive of ``arrays``."""
    np.savez_compressed(fh, **arrays)


def _encode(value, key: str, arrays: dict):
    """A JSON value for ``value``; arrays go to ``arrays`` under names derived from ``key``."""
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (int, float)):
        return value
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        if value.dtype.kind not in "biuf":
            raise InputError(f"session: {key} must be a numeric or boolean array, not {value.dtype}")
        arrays[key] = value
        return {"$array": key}
    if isinstance(value, MarkovModel):
        arrays.update({f"{key}.{k}": v for k, v in model_arrays(value).items()})
        return {"$model": key}
    name = type(value).__name__
    if name in RESULTS and isinstance(value, RESULTS[name]):
        return {"$type": name, "fields": {f.name: _encode(getattr(value, f.name), f"{key}.{f.name}", arrays)
                                          for f in dataclasses.fields(value)}}
    if name in ESTIMATORS and isinstance(value, ESTIMATORS[name]):
        params = [p for p in inspect.signature(type(value).__init__).parameters if p != "self"]
        fitted = {k: v for k, v in vars(value).items() if k.endswith("_") and not k.startswith("_")}
        return {"$estimator": name,
                "params": {p: _encode(getattr(value, p), f"{key}.{p}", arrays) for p in params},
                "fitted": {k: _encode(v, f"{key}.{k}", arrays) for k, v in fitted.items()}}
    if isinstance(value, tuple):
        return {"$tuple": [_encode(v, f"{key}.{i}", arrays) for i, v in enumerate(value)]}
    if isinstance(value, list):
        return [_encode(v, f"{key}.{i}", arrays) for i, v in enumerate(value)]
    if isinstance(value, dict):
        if all(isinstance(k, str) and not k.startswith("$") for k in value):
            return {k: _encode(v, f"{key}.{k}".lstrip("."), arrays) for k, v in value.items()}
        return {"$dict": [[_encode(k, key, {}), _encode(v, f"{key}.{k}", arrays)] for k, v in value.items()]}
    raise InputError(f"session: {key} holds a {name}, which a session file cannot store")


# ----------------------------------------------------------------------------- reading
def load_session(path) -> Session:
    """Read a session file written by :func:`save_session`, checking everything in it.

    Raises
    ------
    InputError
        Naming the file and what is wrong: no such file, not a session file (a model file, any
        other archive), damaged or truncated, pickled objects, arrays above the size limits,
        shapes that do not fit together, a model that fails the model-file checks.

    Returns
    -------
    Session
    """
    path = model_path(path, "path")
    if not path.is_file():
        raise InputError(f"path: {path} is not a file; give the name of a session file (.npz)")
    where = str(path)
    data = _read_archive(path)
    try:
        fmt = str(data["format"][()]) if "format" in data else None
    except (TypeError, ValueError, IndexError):
        fmt = None
    if fmt == "msmkit-model":
        raise InputError(f"{where} is a model file, not a session file: load it with msmkit.load_model")
    if fmt != FORMAT or "session" not in data or "format_version" not in data:
        raise InputError(f"{where} is not an msmkit session file (no format '{FORMAT}' inside); give a file "
                         f"written by save_session or the workbench's Save session")
    version = data["format_version"]
    if version.shape != () or version.dtype.kind not in "iu" or not 1 <= int(version) <= FORMAT_VERSION:
        raise InputError(f"{where}: format_version {version!r} is not supported (this msmkit reads up to "
                         f"{FORMAT_VERSION}); upgrade msmkit")
    text = data["session"]
    if text.shape != () or text.dtype.kind != "U":
        raise InputError(f"{where}: the session member must be one JSON string")
    try:
        tree = json.loads(str(text[()]))
        fields = _decode(tree, data, where)
        if not isinstance(fields, dict) or set(fields) - {f.name for f in dataclasses.fields(Session)}:
            raise ValueError("the session holds unknown entries")
        session = Session(**fields)
        _check_session(session, where)
    except InputError:
        raise
    except ModelFileError as exc:
        raise InputError(f"{where}: a model inside the session is damaged: {exc}") from None
    except (ValueError, TypeError, KeyError, IndexError, AttributeError, RecursionError) as exc:
        raise InputError(f"{where}: not a readable session file (damaged or from another program): "
                         f"{type(exc).__name__}: {exc}") from None
    return session


def _read_archive(path: Path) -> dict:
    """Every ``.npy`` member, each checked from the header before it is read."""
    where = str(path)
    try:
        with zipfile.ZipFile(path) as zf:
            infos = [i for i in zf.infolist() if i.filename.endswith(".npy")]
            headers, total = {}, 0
            for info in infos:
                key = info.filename[:-4]
                if key in headers:
                    raise InputError(f"{where}: member '{key}' appears twice in the archive")
                problem = zip_member_problem(info)
                if problem:
                    raise InputError(f"{where}: member '{key}' {problem}: session files never are; write it "
                                     f"with msmkit.save_session")
                headers[key] = _header(zf, info, key, where)
                total += headers[key][1]
                if total > MAX_TOTAL_BYTES:
                    raise InputError(f"{where}: the arrays declare more than {MAX_TOTAL_BYTES >> 30} GiB "
                                     f"together; not read")
            out = {}
            for info in infos:
                key = info.filename[:-4]
                with zf.open(info) as fh:
                    out[key] = np.lib.format.read_array(fh, allow_pickle=False,
                                                        max_header_size=MAX_HEADER_BYTES)
                    if fh.read(1):  # reading to the end also checks the member's CRC-32
                        raise InputError(f"{where}: member '{key}' holds more data than the header declares")
            return out
    except InputError:
        raise
    except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, OSError, ValueError, zlib.error, RuntimeError,
            NotImplementedError, KeyError, OverflowError) as exc:
        raise InputError(f"{where}: not a readable session file (truncated, damaged or not .npz): {exc}") from None


def _header(zf, info, key, where):
    """(dtype, declared bytes) of a member, from the first bytes; refuses objects and sizes that
    disagree with the archive."""
    with zf.open(info) as fh:
        try:
            shape, _, dtype = read_npy_header(fh, MAX_HEADER_BYTES)
        except (ValueError, SyntaxError, TypeError) as exc:
            raise InputError(f"{where}: member '{key}' is not a valid .npy array ({exc})") from None
        offset = fh.tell()
    if dtype.hasobject:
        raise InputError(f"{where}: member '{key}' holds pickled Python objects, which are never loaded")
    nbytes = math.prod(shape) * dtype.itemsize
    limit = MAX_JSON_BYTES if key == "session" else MAX_ARRAY_BYTES
    if nbytes > limit:
        raise InputError(f"{where}: member '{key}' declares {nbytes} bytes, above the limit of {limit}; not read")
    if offset + nbytes != info.file_size:
        raise InputError(f"{where}: member '{key}' declares shape {shape} but holds another amount of data: "
                         f"truncated or damaged")
    return dtype, nbytes


def _decode(node, data: dict, where: str):
    if isinstance(node, list):
        return [_decode(v, data, where) for v in node]
    if not isinstance(node, dict):
        return node
    if "$array" in node:
        key = node["$array"]
        if not isinstance(key, str) or key not in data or key in ("format", "format_version", "session"):
            raise InputError(f"{where}: the session refers to array {key!r}, which the file does not hold")
        arr = data[key]
        if arr.dtype.kind not in "biuf":
            raise InputError(f"{where}: array {key!r} must be numeric, not {arr.dtype}")
        return arr
    if "$model" in node:
        prefix = f"{node['$model']}."
        part = {k[len(prefix):]: v for k, v in data.items() if k.startswith(prefix)}
        return MarkovModel(**model_fields(part, f"{where} ({node['$model']})"))
    if "$tuple" in node:
        return tuple(_decode(v, data, where) for v in node["$tuple"])
    if "$dict" in node:
        return {_decode(k, data, where): _decode(v, data, where) for k, v in node["$dict"]}
    if "$type" in node:
        cls = RESULTS.get(node["$type"])
        if cls is None:
            raise InputError(f"{where}: unknown result type {node['$type']!r}")
        return cls(**{k: _decode(v, data, where) for k, v in node["fields"].items()})
    if "$estimator" in node:
        cls = ESTIMATORS.get(node["$estimator"])
        if cls is None:
            raise InputError(f"{where}: unknown estimator {node['$estimator']!r}")
        obj = cls(**{k: _decode(v, data, where) for k, v in node["params"].items()})
        for k, v in node["fitted"].items():
            if not (isinstance(k, str) and k.endswith("_") and k.isidentifier() and not k.startswith("_")):
                raise InputError(f"{where}: {node['$estimator']} attribute {k!r} is not a fitted attribute")
            setattr(obj, k, _decode(v, data, where))
        return obj
    return {k: _decode(v, data, where) for k, v in node.items()}


def _check_session(s: Session, where: str) -> None:
    """Shapes and types that must fit together; InputError at the first that does not."""
    def bad(what):
        raise InputError(f"{where}: {what}")

    if not isinstance(s.settings, dict):
        bad("settings must be a JSON object")
    if not (isinstance(s.dt, (int, float)) and math.isfinite(s.dt) and s.dt > 0) or not isinstance(s.unit, str):
        bad("dt must be a positive number and unit a string")
    runs = [int(n) for n in s.frames_per_run]
    if s.labels is not None:
        if len(s.labels) != len(runs) or any(not isinstance(r, np.ndarray) or r.dtype.kind not in "iu"
                                             or r.shape != (n,) for r, n in zip(s.labels, runs)):
            bad("labels must be one integer array per run, as long as the run")
    for name, cls in (("microstates", Microstates), ("tica", TICA)):
        value = getattr(s, name)
        if value is not None and not isinstance(value, cls):
            bad(f"{name} must be a {cls.__name__}")
    if s.microstates is not None:
        centers = np.asarray(s.microstates.centers_)
        if centers.ndim != 2 or centers.dtype.kind != "f" or np.shape(s.microstates.counts_) != (centers.shape[0],):
            bad("the microstates need 2-D float centers and one frame count per center")
        if any(r.size and (r.min() < 0 or r.max() >= centers.shape[0]) for r in s.labels):
            bad(f"the labels must name the {centers.shape[0]} microstates (0..{centers.shape[0] - 1})")
    if s.tica is not None:
        comps, mean = np.asarray(s.tica.components_), np.asarray(s.tica.mean_)
        if comps.ndim != 2 or mean.shape != (comps.shape[1],) or np.shape(s.tica.eigenvalues_) != (comps.shape[0],) \
                or s.tica.scaling not in ("unit", "kinetic") or int(s.tica.dim_) != comps.shape[0] \
                or np.asarray(s.tica.cumulative_kinetic_variance_).ndim != 1:
            bad("the TICA components, mean, eigenvalues and dimension do not fit together")
        if s.microstates is not None and np.asarray(s.microstates.centers_).shape[1] != comps.shape[0]:
            bad("the microstate centers do not live in the TICA coordinates stored with them")
    if s.feature_scaling is not None and (len(s.feature_scaling) != 2 or np.shape(s.feature_scaling[0])
                                          != np.shape(s.feature_scaling[1]) or np.ndim(s.feature_scaling[0]) != 1):
        bad("feature_scaling must be two 1-D arrays (mean, scale) of one length")
    if s.scan is not None:
        scan = s.scan
        if not isinstance(scan, LagScan):
            bad("scan must be a lag scan")
        L = scan.lags.shape[0] if isinstance(scan.lags, np.ndarray) and scan.lags.ndim == 1 else -1
        k = scan.timescales.shape[1] if getattr(scan.timescales, "ndim", 0) == 2 else -1
        if L < 1 or scan.timescales.shape != (L, k) or scan.lower.shape != (L, k) or scan.upper.shape != (L, k) \
                or scan.samples.shape != (L, int(scan.n_samples), k):
            bad("the lag scan's lags, timescales, intervals and samples do not fit together")
        if sorted(scan.models) != [int(x) for x in scan.lags] or \
                not all(isinstance(m, MarkovModel) for m in scan.models.values()):
            bad("the lag scan must hold one model per scanned lag")
        if s.lag is not None and int(s.lag) not in scan.models:
            bad(f"the chosen lag {s.lag} is not among the scanned lags {scan.lags.tolist()}")
    elif s.lag is not None or s.ck is not None or s.macrostates is not None:
        bad("a chosen lag, a test or macrostates need the lag scan they belong to")
    model = s.model
    if s.ck is not None:
        ck = s.ck
        if not isinstance(ck, CKResult) or model is None or int(ck.lag) != int(model.lag):
            bad("the Chapman–Kolmogorov result must belong to the model at the chosen lag")
        m, K = len(ck.members), len(ck.multiples)
        for name in ("predicted", "estimated", "lower", "upper", "within", "used_tolerance", "outside_by",
                     "deviation", "outside_interval"):
            if np.shape(getattr(ck, name)) != (K, m, m):
                bad(f"the Chapman–Kolmogorov array {name} must have shape ({K}, {m}, {m})")
        if ck.verdict not in ("passed", "failed", "inconclusive"):
            bad(f"unknown Chapman–Kolmogorov verdict {ck.verdict!r}")
    if s.macrostates is not None:
        macro = s.macrostates
        if not isinstance(macro, Macrostates) or model is None:
            bad("macrostates must belong to the model at the chosen lag")
        A = np.asarray(macro.affinity, dtype=float)
        if A.ndim != 2 or A.shape[0] != model.n_states or not np.array_equal(macro.states, model.states) \
                or np.max(np.abs(A.sum(axis=1) - 1)) > 1e-6:
            bad("the macrostate affinity must have one row per state of the chosen model, each summing to 1")
    for name, limit in (("pair", None if s.macrostates is None else s.macrostates.n_sets),
                        ("flow_pair", None if s.ck is None else len(s.ck.members))):
        pair = getattr(s, name)
        if pair is not None and (limit is None or len(pair) != 2 or not all(0 <= int(x) < limit for x in pair)):
            bad(f"{name} must name two of the sets it belongs to")
