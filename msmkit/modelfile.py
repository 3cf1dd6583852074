"""The ``.npz`` model file: save, load, schema and checks.

The file holds plain arrays only, readable with ``numpy.load(path, allow_pickle=False)``; no
Python object is ever pickled, so loading a file never runs code from it.

Keys
----
format                 the string "msmkit-model"
format_version         int, currently 1
propagator      (n, n) float64, row-stochastic
transition_counts           (n, n) int64 counts at the lag among the kept states (omitted for a model
                       built from a matrix)
equilibrium (n,) float64, sums to 1
states                 (n,) int64, original labels
lag                    int, frames
dt                     float, physical time per frame
unit                   str
reversible             bool
metadata               JSON string (parameters, version, creation time, fingerprint, ...)
optional: centers (k, d), tica_mean (f,), tica_components (d, f), affinity (n, m),
          feature_mean (f,), feature_scale (f,) (features standardised before clustering)
"""
from __future__ import annotations

import json
import os
import tempfile
import zipfile
import zlib
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from .errors import InputError, ModelFileError

__all__ = ["FORMAT", "FORMAT_VERSION", "read_model_file", "save_model"]

FORMAT = "msmkit-model"
FORMAT_VERSION = 1
OPTIONAL_KEYS = ("centers", "tica_mean", "tica_components", "affinity", "feature_mean", "feature_scale")
REQUIRED_KEYS = ("format", "format_version", "propagator", "equilibrium", "states",
                 "lag", "dt", "unit", "reversible", "metadata")
ROW_TOL = 1e-8


def save_model(model, path, *, overwrite: bool = True, **extra_arrays) -> Path:
    """Write ``model`` to ``path`` atomically (temporary file in the same folder, then rename).

    Parameters
    ----------
    model : MarkovModel
    path : str or Path
        Destination; ``.npz`` is appended when missing.
    overwrite : bool, default True
        If False and the file exists, raise InputError and touch nothing.
    **extra_arrays
        Optional keys: ``centers``, ``tica_mean``, ``tica_components``, ``affinity``.

    Returns
    -------
    Path of the written file.
    """
    path = Path(path)
    if path.suffix != ".npz":
        path = path.with_name(path.name + ".npz")
    unknown = set(extra_arrays) - set(OPTIONAL_KEYS)
    if unknown:
        raise InputError(f"save() got unknown array(s) {sorted(unknown)}; allowed: {list(OPTIONAL_KEYS)}")
    if path.exists() and not overwrite:
        raise InputError(f"{path} exists; choose another name or pass overwrite=True")
    if not path.parent.is_dir():
        raise InputError(f"cannot save to {path}: folder {path.parent} does not exist")
    arrays = {
        "format": np.array(FORMAT),
        "format_version": np.array(FORMAT_VERSION, dtype=np.int64),
        "propagator": np.asarray(model.propagator, dtype=np.float64),
        "equilibrium": np.asarray(model.equilibrium, dtype=np.float64),
        "states": np.asarray(model.states, dtype=np.int64),
        "lag": np.array(model.lag, dtype=np.int64),
        "dt": np.array(model.dt, dtype=np.float64),
        "unit": np.array(model.unit),
        "reversible": np.array(bool(model.reversible)),
        "metadata": np.array(json.dumps(_jsonable(_file_metadata(model)), sort_keys=True)),
    }
    if model.transition_counts is not None:
        arrays["transition_counts"] = np.asarray(model.transition_counts.toarray(), dtype=np.int64)
    for key, value in {**model.extras, **extra_arrays}.items():
        if value is not None:
            arr = np.asarray(value)
            if arr.dtype == object:
                raise InputError(f"{key} must be a numeric array, not Python objects")
            arrays[key] = arr
    return atomic_write(path, lambda fh: np.savez_compressed(fh, **arrays))


def atomic_write(path: Path, write) -> Path:
    """Write a file atomically: ``write(fh)`` fills a temporary file in the same folder, which
    then replaces ``path`` in one step, so a crash never leaves half a file over a good one."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, _default_mode())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def _default_mode() -> int:
    """Permissions an ordinary new file would get (mkstemp makes them private)."""
    umask = os.umask(0)
    os.umask(umask)
    return 0o666 & ~umask


def _file_metadata(model) -> dict:
    meta = dict(model.metadata)
    meta["diagnostics"] = list(model.diagnostics)
    meta["kept_fraction"] = float(model.kept_fraction)
    meta["dropped_states"] = [int(s) for s in model.dropped_states]
    return meta


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


def read_model_file(path) -> dict:
    """Read a model file written by :func:`save_model`, checking everything in it.

    This module knows the file, not the model class: the result is the keyword arguments of
    :class:`~msmkit.MarkovModel` (``msmkit.model.load_model`` builds the model from them), so
    the model module may import this one and never the other way round.

    Raises
    ------
    ModelFileError
        Naming what is wrong: not an npz file, truncated, pickled objects, a missing key, a
        wrong shape, rows not summing to 1, a stationary vector that is not stationary, ...

    Returns
    -------
    dict
        ``propagator``, ``equilibrium``, ``states``, ``lag``, ``dt``, ``unit``, ``reversible``
        and the keyword arguments ``transition_counts``, ``kept_fraction``,
        ``dropped_states``, ``diagnostics``, ``metadata``, ``extras`` (optional arrays:
        centers, TICA, affinity).
    """
    path = Path(path)
    if not path.is_file():
        raise ModelFileError(f"{path}: no such file")
    try:
        loaded = np.load(path, allow_pickle=False)
        if not hasattr(loaded, "files"):  # a plain .npy array, not an archive of named arrays
            raise ModelFileError(f"{path}: not a model file: it holds a single array, not the named arrays "
                                 f"of an .npz model file")
        with loaded as npz:
            data = {}
            for key in npz.files:
                try:
                    data[key] = npz[key]
                except ValueError as exc:  # object arrays refuse to load without pickle
                    if "pickle" not in str(exc):
                        raise
                    raise ModelFileError(f"{path}: key '{key}' holds pickled Python objects, which are never "
                                         f"loaded ({exc})") from None
    except ModelFileError:
        raise
    except (zipfile.BadZipFile, EOFError, OSError, ValueError, zlib.error) as exc:
        # zlib.error: damaged compressed data inside an otherwise well-formed archive
        raise ModelFileError(f"{path}: not a readable model file (truncated or not .npz): {exc}") from None

    missing = [k for k in REQUIRED_KEYS if k not in data]
    if missing:
        raise ModelFileError(f"{path}: missing key(s) {missing}")
    fmt = _scalar(data, "format", str, path)
    if fmt != FORMAT:
        raise ModelFileError(f"{path}: format is '{fmt}', expected '{FORMAT}'")
    version = _scalar(data, "format_version", int, path)
    if version > FORMAT_VERSION or version < 1:
        raise ModelFileError(f"{path}: format_version {version} is not supported (this msmkit reads "
                             f"up to {FORMAT_VERSION}); upgrade msmkit")
    T = _float_array(data, "propagator", 2, path)
    n = T.shape[0]
    if T.shape != (n, n) or n == 0:
        raise ModelFileError(f"{path}: propagator must be square, but has shape {T.shape}")
    if not np.all(np.isfinite(T)) or T.min() < 0:
        raise ModelFileError(f"{path}: propagator has negative or non-finite entries")
    off = np.max(np.abs(T.sum(axis=1) - 1))
    if off > ROW_TOL:
        raise ModelFileError(f"{path}: propagator rows do not sum to 1 (worst off by {off:.3g})")
    pi = _float_array(data, "equilibrium", 1, path)
    if pi.shape != (n,):
        raise ModelFileError(f"{path}: equilibrium has shape {pi.shape}, expected ({n},)")
    if not np.all(np.isfinite(pi)) or pi.min() < 0 or abs(pi.sum() - 1) > ROW_TOL:
        raise ModelFileError(f"{path}: equilibrium must be non-negative and sum to 1")
    if np.max(np.abs(pi @ T - pi)) > 1e-8:
        raise ModelFileError(f"{path}: equilibrium is not stationary for propagator")
    states = data["states"]
    if states.shape != (n,) or states.dtype.kind not in "iu" or np.unique(states).size != n:
        raise ModelFileError(f"{path}: states must be {n} distinct integer labels")
    lag = _scalar(data, "lag", int, path)
    if lag < 1:
        raise ModelFileError(f"{path}: lag must be a positive integer, got {lag}")
    dt = _scalar(data, "dt", float, path)
    if not np.isfinite(dt) or dt <= 0:
        raise ModelFileError(f"{path}: dt must be a finite positive number, got {dt}")
    unit = _scalar(data, "unit", str, path)
    reversible = _scalar(data, "reversible", bool, path)
    try:
        metadata = json.loads(_scalar(data, "metadata", str, path))
    except json.JSONDecodeError as exc:
        raise ModelFileError(f"{path}: metadata is not valid JSON ({exc})") from None
    if not isinstance(metadata, dict):
        raise ModelFileError(f"{path}: metadata must be a JSON object")
    counts = None
    if "transition_counts" in data:
        C = data["transition_counts"]
        if C.shape != (n, n) or C.dtype.kind not in "iu" or (C.size and C.min() < 0):
            raise ModelFileError(f"{path}: transition_counts must be a non-negative ({n}, {n}) integer array")
        counts = sp.csr_matrix(C.astype(np.int64))
    extras = {}
    for key in OPTIONAL_KEYS:
        if key in data:
            arr = data[key]
            if arr.dtype.kind not in "iuf" or not np.all(np.isfinite(arr)):
                raise ModelFileError(f"{path}: {key} must be a finite numeric array")
            extras[key] = arr
    if "affinity" in extras:
        M = extras["affinity"]
        if M.ndim != 2 or M.shape[0] != n or M.min() < -1e-12 or np.max(np.abs(M.sum(axis=1) - 1)) > 1e-6:
            raise ModelFileError(f"{path}: affinity must be ({n}, m), non-negative, rows summing to 1")
    if "tica_mean" in extras and "tica_components" in extras:
        if extras["tica_components"].ndim != 2 or extras["tica_components"].shape[1] != extras["tica_mean"].shape[0]:
            raise ModelFileError(f"{path}: tica_components must be (dim, n_features) with n_features = "
                                 f"len(tica_mean)")

    return dict(propagator=T, equilibrium=pi, states=states.astype(np.int64), lag=lag, dt=dt, unit=unit,
                reversible=reversible, transition_counts=counts,
                kept_fraction=float(metadata.get("kept_fraction", 1.0)),
                dropped_states=np.asarray(metadata.get("dropped_states", []), dtype=np.int64),
                diagnostics=list(metadata.get("diagnostics", [])), metadata=metadata, extras=extras)


def _scalar(data, key, kind, path):
    arr = data[key]
    if arr.shape != ():
        raise ModelFileError(f"{path}: {key} must be a single value, but has shape {arr.shape}")
    if kind is str:
        if arr.dtype.kind != "U":
            raise ModelFileError(f"{path}: {key} must be a string")
        return str(arr)
    if kind is bool:
        if arr.dtype.kind != "b":
            raise ModelFileError(f"{path}: {key} must be a boolean")
        return bool(arr)
    if kind is int:
        if arr.dtype.kind not in "iu":
            raise ModelFileError(f"{path}: {key} must be an integer")
        return int(arr)
    if arr.dtype.kind not in "iuf":
        raise ModelFileError(f"{path}: {key} must be a number")
    return float(arr)


def _float_array(data, key, ndim, path):
    arr = data[key]
    if arr.dtype.kind not in "iuf" or arr.ndim != ndim:
        raise ModelFileError(f"{path}: {key} must be a {ndim}-D numeric array")
    return arr.astype(np.float64)
