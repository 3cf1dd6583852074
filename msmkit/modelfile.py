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
          feature_mean (f,), feature_scale (f,) (features standardized before clustering)

Limits
------
Loading reads the archive itself (not through ``numpy.load``): every member's compression,
encryption flag and ``.npy`` header (dtype, shape) are checked, and the declared sizes compared
with :data:`MAX_ARRAY_BYTES` and with each other, before any array is allocated or any data
decompressed. Members with unknown names are skipped unread. Saving applies the same checks to
the arrays it is about to write, so ``save_model`` never writes a file ``load_model`` refuses.
"""
from __future__ import annotations

import json
import math
import os
import signal
import tempfile
import threading
import time
import zipfile
import zlib
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from ._checks import read_npy_header, zip_member_problem
from .errors import InputError, ModelFileError

__all__ = ["FORMAT", "FORMAT_VERSION", "model_fields", "read_model_file", "save_model"]

FORMAT = "msmkit-model"
FORMAT_VERSION = 1
OPTIONAL_KEYS = ("centers", "tica_mean", "tica_components", "affinity", "feature_mean", "feature_scale")
REQUIRED_KEYS = ("format", "format_version", "propagator", "equilibrium", "states",
                 "lag", "dt", "unit", "reversible", "metadata")
ROW_TOL = 1e-8
COUNTS_KEY = "transition_counts"
SCALAR_KEYS = ("format", "format_version", "lag", "dt", "unit", "reversible", "metadata")
#: largest array a model file may hold (1 GiB: a dense 11585-state float64 matrix); checked from
#: the declared sizes before anything is allocated, and by save_model before anything is written
MAX_ARRAY_BYTES = 1 << 30
#: largest scalar member (the metadata JSON is the only one that grows)
MAX_SCALAR_BYTES = 64 << 20
#: the .npy header of a member may not exceed this (numpy's own default limit)
MAX_HEADER_BYTES = 10_000
#: a temporary file of a save whose process is gone, or older than this, is removed by later saves
STALE_TEMP_SECONDS = 24 * 3600


def save_model(model, path, *, overwrite: bool = True, **extra_arrays) -> Path:
    """Write ``model`` to ``path`` atomically (temporary file in the same folder, then rename).

    Everything is checked before a byte is written, with the checks :func:`load_model` applies,
    so a saved file always loads again.

    Parameters
    ----------
    model : MarkovModel
    path : str or Path
        Destination; ``.npz`` is appended when missing. A symbolic link is followed: the file it
        points to is replaced, the link stays.
    overwrite : bool, default True
        If False and the file exists, raise InputError and touch nothing. The test and the
        creation of the file are one step (a hard link), so of two concurrent saves with
        ``overwrite=False`` exactly one succeeds.
    **extra_arrays
        Optional keys: ``centers``, ``tica_mean``, ``tica_components``, ``affinity``.

    Returns
    -------
    Path of the written file (the path given, with ``.npz`` appended when missing).
    """
    from ._checks import check_bool
    path = model_path(path, "path")
    overwrite = check_bool(overwrite, "overwrite")
    if path.suffix != ".npz":
        path = path.with_name(path.name + ".npz")
    unknown = set(extra_arrays) - set(OPTIONAL_KEYS)
    if unknown:
        raise InputError(f"save() got unknown array(s) {sorted(unknown)}; allowed: {list(OPTIONAL_KEYS)}")
    if path.exists() and not overwrite:
        raise InputError(f"{path} exists; choose another name or pass overwrite=True")
    target = Path(os.path.realpath(path)) if path.is_symlink() else path
    if not target.parent.is_dir():
        raise InputError(f"cannot save to {path}: folder {target.parent} does not exist")
    arrays = model_arrays(model, extra_arrays)
    try:
        check_contents(arrays, f"cannot save {path}")
    except ModelFileError as exc:  # the model itself is bad: an input error of save()
        raise InputError(f"{exc}; the file was not written") from None
    atomic_write(target, lambda fh: np.savez_compressed(fh, **arrays), overwrite=overwrite, shown=path)
    return path


def model_path(path, name: str = "path") -> Path:
    """A file path from str, bytes or os.PathLike; InputError for anything else."""
    if isinstance(path, bytes):
        path = os.fsdecode(path)
    if not isinstance(path, (str, os.PathLike)):
        raise InputError(f"{name} must be a file path (str or pathlib.Path), but got {type(path).__name__}")
    path = Path(path)
    if not str(path) or str(path) == ".":
        raise InputError(f"{name} must name a file, but got {str(path)!r}")
    return path


def model_arrays(model, extra_arrays=None) -> dict:
    """The named arrays of the file for ``model`` (nothing checked yet)."""
    try:
        meta = json.dumps(_jsonable(_file_metadata(model)), sort_keys=True)
    except (TypeError, ValueError) as exc:
        raise InputError(f"model.metadata must hold only JSON values (str, numbers, lists, dicts)"
                         f": {exc}; convert or remove that entry before saving") from None
    arrays = {
        "format": np.array(FORMAT),
        "format_version": np.array(FORMAT_VERSION, dtype=np.int64),
        "propagator": _numeric(model.propagator, np.float64),
        "equilibrium": _numeric(model.equilibrium, np.float64),
        "states": _numeric(model.states, np.int64),
        "lag": np.asarray(model.lag),
        "dt": np.asarray(model.dt),
        "unit": np.asarray(model.unit),
        "reversible": np.asarray(model.reversible),
        "metadata": np.array(meta),
    }
    # whole numbers are stored as int64 / float64; any other type is kept so that the checks name it
    if arrays["lag"].dtype.kind in "iu" or (arrays["lag"].dtype.kind == "f" and arrays["lag"].shape == ()
                                           and float(arrays["lag"]).is_integer()):
        arrays["lag"] = arrays["lag"].astype(np.int64)
    if arrays["dt"].dtype.kind in "iuf":
        arrays["dt"] = arrays["dt"].astype(np.float64)
    if model.transition_counts is not None:
        C = model.transition_counts
        arrays[COUNTS_KEY] = np.asarray(C.toarray() if sp.issparse(C) else C)
        if arrays[COUNTS_KEY].dtype.kind in "iuf" and np.all(np.isfinite(arrays[COUNTS_KEY])) \
                and np.array_equal(arrays[COUNTS_KEY], np.round(arrays[COUNTS_KEY])):
            arrays[COUNTS_KEY] = arrays[COUNTS_KEY].astype(np.int64)
    for key, value in {**(model.extras or {}), **(extra_arrays or {})}.items():
        if value is not None:
            arr = np.asarray(value)
            if arr.dtype == object:
                raise InputError(f"{key} must be a numeric array, not Python objects")
            arrays[key] = arr
    return arrays


def _numeric(value, dtype) -> np.ndarray:
    """``value`` as an array of ``dtype`` when it holds numbers of that kind; as it is otherwise,
    so that the checks can name what is wrong."""
    try:
        arr = np.asarray(value)
    except (TypeError, ValueError):
        return np.array(None, dtype=object)
    if arr.dtype.kind in ("iuf" if np.dtype(dtype).kind == "f" else "iu"):
        return arr.astype(dtype)
    return arr


# ----------------------------------------------------------------------------- atomic writing
class _Terminated(BaseException):
    """SIGTERM arrived while a temporary file was open: clean up, then terminate as asked."""


def atomic_write(path: Path, write, *, overwrite: bool = True, shown=None) -> Path:
    """Write a file atomically: ``write(fh)`` fills a temporary file in the same folder, which
    then replaces ``path`` in one step, so a crash never leaves half a file over a good one.

    With ``overwrite=False`` the finished file is hard-linked to ``path`` (which fails if
    ``path`` exists), so the existence test and the creation cannot be separated by another
    writer. The temporary name carries the process id; temporaries of processes that are gone
    (killed mid-write) are removed by the next write into the folder. A SIGTERM during the write
    (main thread, default handler) removes the temporary file before the process ends.
    """
    path = Path(path)
    shown = path if shown is None else shown
    sweep_stale_temporaries(path.parent)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}.", suffix=".tmp", dir=path.parent)
    previous = _catch_sigterm()
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, _default_mode())
        if overwrite:
            os.replace(tmp, path)
        else:
            _create_exclusive(tmp, path, shown)
    except BaseException as exc:
        if os.path.exists(tmp):
            os.unlink(tmp)
        _restore_sigterm(previous)
        if isinstance(exc, _Terminated):
            os.kill(os.getpid(), signal.SIGTERM)  # the default action, now that nothing is left behind
        if isinstance(exc, OSError) and exc.errno is not None and exc.filename is None:
            raise OSError(exc.errno, exc.strerror, str(shown)) from exc  # name the file (a full disk has none)
        raise
    _restore_sigterm(previous)
    return path


def _create_exclusive(tmp: str, path: Path, shown) -> None:
    """Give the finished temporary file the name ``path`` only if no file has it."""
    try:
        os.link(tmp, path)
    except FileExistsError:
        raise InputError(f"{shown} exists; choose another name or pass overwrite=True") from None
    except OSError:  # a file system without hard links: reserve the name exclusively, then replace
        try:
            os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600))
        except FileExistsError:
            raise InputError(f"{shown} exists; choose another name or pass overwrite=True") from None
        os.replace(tmp, path)
        return
    os.unlink(tmp)


def _catch_sigterm():
    """Install a SIGTERM handler raising :class:`_Terminated` (only over the default handler, only
    in the main thread); returns what to restore, or None."""
    if threading.current_thread() is not threading.main_thread():
        return None
    try:
        if signal.getsignal(signal.SIGTERM) is not signal.SIG_DFL:
            return None

        def handler(signum, frame):
            raise _Terminated()

        signal.signal(signal.SIGTERM, handler)
    except (ValueError, OSError, AttributeError):
        return None
    return signal.SIG_DFL


def _restore_sigterm(previous) -> None:
    if previous is not None:
        signal.signal(signal.SIGTERM, previous)


def sweep_stale_temporaries(folder: Path) -> list[Path]:
    """Remove temporary files ``.NAME.PID.XXXX.tmp`` left in ``folder`` by writes whose process
    no longer runs (killed mid-write), or older than :data:`STALE_TEMP_SECONDS`."""
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    now = time.time()
    for entry in entries:
        name = entry.name
        if not (name.startswith(".") and name.endswith(".tmp")):
            continue
        parts = name[1:-4].rsplit(".", 2)
        if len(parts) != 3 or not parts[1].isdigit():
            continue
        try:
            old = now - entry.stat(follow_symlinks=False).st_mtime > STALE_TEMP_SECONDS
            if old or not _process_alive(int(parts[1])):
                os.unlink(entry.path)
                removed.append(Path(entry.path))
        except OSError:
            continue
    return removed


def _process_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


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
    InputError
        ``path`` is not a path.
    ModelFileError
        Naming what is wrong: not an npz file, truncated, pickled objects, a missing key, a
        wrong shape, an array above :data:`MAX_ARRAY_BYTES`, an unsupported compression, rows
        not summing to 1, a stationary vector that is not stationary, ...

    Returns
    -------
    dict
        ``propagator``, ``equilibrium``, ``states``, ``lag``, ``dt``, ``unit``, ``reversible``
        and the keyword arguments ``transition_counts``, ``kept_fraction``,
        ``dropped_states``, ``diagnostics``, ``metadata``, ``extras`` (optional arrays:
        centers, TICA, affinity).
    """
    path = model_path(path, "path")
    if not path.is_file():
        raise ModelFileError(f"{path}: no such file")
    return model_fields(read_arrays(path), str(path))


def model_fields(data: dict, where: str) -> dict:
    """The keyword arguments of :class:`~msmkit.MarkovModel` from the named arrays of a model
    (as :func:`model_arrays` makes them), checked with :func:`check_contents`; ModelFileError
    ("{where}: ...") otherwise. Also used for models stored inside other msmkit files."""
    path = where
    fields = check_contents(data, where)
    meta = fields["metadata"]
    try:
        dropped = np.asarray(meta.get("dropped_states", []), dtype=np.int64)
        kept_fraction = float(meta.get("kept_fraction", 1.0))
        diagnostics = [str(d) for d in meta.get("diagnostics", [])]
    except (TypeError, ValueError, OverflowError):
        raise ModelFileError(f"{path}: metadata holds malformed kept_fraction, dropped_states or "
                             f"diagnostics") from None
    if dropped.ndim != 1 or not math.isfinite(kept_fraction) or not 0 <= kept_fraction <= 1:
        raise ModelFileError(f"{path}: metadata holds malformed kept_fraction or dropped_states")
    return dict(propagator=fields["propagator"], equilibrium=fields["equilibrium"], states=fields["states"],
                lag=fields["lag"], dt=fields["dt"], unit=fields["unit"], reversible=fields["reversible"],
                transition_counts=fields[COUNTS_KEY], kept_fraction=kept_fraction, dropped_states=dropped,
                diagnostics=diagnostics, metadata=meta, extras=fields["extras"])


def read_arrays(path: Path) -> dict:
    """The known arrays of a model file, each checked from the header before it is read."""
    try:
        with open(path, "rb") as fh:
            magic = fh.read(6)
        if magic == b"\x93NUMPY":
            raise ModelFileError(f"{path}: not a model file: it holds a single array, not the named arrays "
                                 f"of an .npz model file")
        with zipfile.ZipFile(path) as zf:
            members = _known_members(zf, path)
            headers = {key: _member_header(zf, info, key, path) for key, info in members.items()}
            _check_declared(headers, path)
            return {key: _read_member(zf, members[key], headers[key], key, path) for key in members}
    except ModelFileError:
        raise
    except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, OSError, ValueError, zlib.error,
            RuntimeError, NotImplementedError, KeyError, OverflowError) as exc:
        # zlib.error: damaged compressed data; RuntimeError: an encrypted member
        raise ModelFileError(f"{path}: not a readable model file (truncated or not .npz): {exc}") from None


def _known_members(zf: zipfile.ZipFile, path) -> dict:
    known = set(REQUIRED_KEYS) | set(OPTIONAL_KEYS) | {COUNTS_KEY}
    members = {}
    for info in zf.infolist():
        if not info.filename.endswith(".npy"):
            continue
        key = info.filename[:-4]
        if key not in known:
            continue  # unknown members are skipped unread, however large they claim to be
        if key in members:
            raise ModelFileError(f"{path}: key '{key}' appears twice in the archive")
        problem = zip_member_problem(info)
        if problem:
            raise ModelFileError(f"{path}: key '{key}' {problem}: model files never are; re-save the model "
                                 f"with msmkit")
        members[key] = info
    missing = [k for k in REQUIRED_KEYS if k not in members]
    if missing:
        raise ModelFileError(f"{path}: missing key(s) {missing}")
    return members


def _member_header(zf, info, key, path):
    """(shape, fortran_order, dtype, header_bytes) of one member, read from the first bytes."""
    with zf.open(info) as fh:
        try:
            shape, fortran, dtype = read_npy_header(fh, MAX_HEADER_BYTES)
        except (ValueError, SyntaxError, TypeError) as exc:
            raise ModelFileError(f"{path}: key '{key}' is not a valid .npy array ({exc})") from None
        offset = fh.tell()
    if dtype.hasobject:
        raise ModelFileError(f"{path}: key '{key}' holds pickled Python objects, which are never loaded")
    if any(not isinstance(d, int) or d < 0 for d in shape):
        raise ModelFileError(f"{path}: key '{key}' declares an impossible shape {shape}")
    nbytes = math.prod(shape) * dtype.itemsize  # Python integers: no overflow
    limit = MAX_SCALAR_BYTES if key in SCALAR_KEYS else MAX_ARRAY_BYTES
    if nbytes > limit:
        raise ModelFileError(f"{path}: key '{key}' declares shape {shape} of {dtype} ({_size(nbytes)}), above "
                             f"the limit of {_size(limit)} for a model file; it was not read")
    if offset + nbytes != info.file_size:
        raise ModelFileError(f"{path}: key '{key}' declares shape {shape} ({_size(nbytes)} of data) but holds "
                             f"{_size(max(info.file_size - offset, 0))}: truncated or damaged")
    return shape, fortran, dtype, offset


def _check_declared(headers, path) -> None:
    """Shapes that must agree, checked from the headers before any data are read."""
    shape = headers["propagator"][0]
    if len(shape) != 2 or shape[0] != shape[1] or shape[0] == 0:
        return  # reported with the contents
    n = shape[0]
    for key in ("equilibrium", "states"):
        if headers[key][0] != (n,):
            raise ModelFileError(f"{path}: {key} has shape {headers[key][0]}, expected ({n},)")
    if COUNTS_KEY in headers and headers[COUNTS_KEY][0] != (n, n):
        raise ModelFileError(f"{path}: {COUNTS_KEY} must be a non-negative ({n}, {n}) integer array")


def _read_member(zf, info, header, key, path) -> np.ndarray:
    """The array of one member, read into an array of exactly the declared size."""
    shape, fortran, dtype, offset = header
    count = math.prod(shape)
    out = np.empty(count, dtype=dtype)
    view = memoryview(out.view(np.uint8).reshape(-1)) if count else memoryview(b"")
    with zf.open(info) as fh:
        fh.read(offset)
        got = 0
        while got < len(view):
            k = fh.readinto(view[got:got + (1 << 24)])
            if not k:
                raise ModelFileError(f"{path}: key '{key}' ends early: truncated or damaged")
            got += k
        if fh.read(1):
            raise ModelFileError(f"{path}: key '{key}' holds more data than the header declares")
    return out.reshape(shape, order="F" if fortran else "C")


def _size(nbytes: int) -> str:
    for unit, scale in (("TiB", 1 << 40), ("GiB", 1 << 30), ("MiB", 1 << 20), ("KiB", 1 << 10)):
        if nbytes >= scale:
            return f"{nbytes / scale:.3g} {unit}"
    return f"{nbytes} bytes"


def check_contents(data: dict, where: str) -> dict:
    """Check the named arrays of a model file; raise ModelFileError("{where}: ...") at the first
    broken rule, else return the fields of the model (arrays converted, metadata parsed)."""
    missing = [k for k in REQUIRED_KEYS if k not in data]
    if missing:
        raise ModelFileError(f"{where}: missing key(s) {missing}")
    for key, arr in data.items():
        nbytes = getattr(arr, "nbytes", 0)
        limit = MAX_SCALAR_BYTES if key in SCALAR_KEYS else MAX_ARRAY_BYTES
        if nbytes > limit:
            raise ModelFileError(f"{where}: {key} takes {_size(nbytes)}, above the limit of {_size(limit)} "
                                 f"for a model file")
    fmt = _scalar(data, "format", str, where)
    if fmt != FORMAT:
        raise ModelFileError(f"{where}: format is '{fmt}', expected '{FORMAT}'")
    version = _scalar(data, "format_version", int, where)
    if version > FORMAT_VERSION or version < 1:
        raise ModelFileError(f"{where}: format_version {version} is not supported (this msmkit reads "
                             f"up to {FORMAT_VERSION}); upgrade msmkit")
    T = _float_array(data, "propagator", 2, where)
    n = T.shape[0]
    if T.shape != (n, n) or n == 0:
        raise ModelFileError(f"{where}: propagator must be square, but has shape {T.shape}")
    if not np.all(np.isfinite(T)) or T.min() < 0:
        raise ModelFileError(f"{where}: propagator has negative or non-finite entries")
    off = np.max(np.abs(T.sum(axis=1) - 1))
    if off > ROW_TOL:
        raise ModelFileError(f"{where}: propagator rows do not sum to 1 (worst off by {off:.3g})")
    pi = _float_array(data, "equilibrium", 1, where)
    if pi.shape != (n,):
        raise ModelFileError(f"{where}: equilibrium has shape {pi.shape}, expected ({n},)")
    if not np.all(np.isfinite(pi)) or pi.min() < 0 or abs(pi.sum() - 1) > ROW_TOL:
        raise ModelFileError(f"{where}: equilibrium must be non-negative and sum to 1")
    if np.max(np.abs(pi @ T - pi)) > 1e-8:
        raise ModelFileError(f"{where}: equilibrium is not stationary for propagator")
    states = np.asarray(data["states"])
    if states.shape != (n,) or states.dtype.kind not in "iu" or np.unique(states).size != n \
            or (states.dtype.kind == "u" and states.size and states.max() > np.iinfo(np.int64).max):
        raise ModelFileError(f"{where}: states must be {n} distinct integer labels")
    lag = _scalar(data, "lag", int, where)
    if lag < 1:
        raise ModelFileError(f"{where}: lag must be a positive integer, got {lag}")
    dt = _scalar(data, "dt", float, where)
    if not np.isfinite(dt) or dt <= 0:
        raise ModelFileError(f"{where}: dt must be a finite positive number, got {dt}")
    unit = _scalar(data, "unit", str, where)
    if not unit.strip():
        raise ModelFileError(f"{where}: unit must be a non-empty string")
    reversible = _scalar(data, "reversible", bool, where)
    try:
        metadata = json.loads(_scalar(data, "metadata", str, where))
    except (json.JSONDecodeError, RecursionError) as exc:
        raise ModelFileError(f"{where}: metadata is not valid JSON ({exc})") from None
    if not isinstance(metadata, dict):
        raise ModelFileError(f"{where}: metadata must be a JSON object")
    counts = None
    if COUNTS_KEY in data:
        C = np.asarray(data[COUNTS_KEY])
        if C.shape != (n, n) or C.dtype.kind not in "iu" or (C.size and C.min() < 0) \
                or (C.dtype.kind == "u" and C.size and C.max() > np.iinfo(np.int64).max):
            raise ModelFileError(f"{where}: {COUNTS_KEY} must be a non-negative ({n}, {n}) integer array")
        counts = sp.csr_matrix(C.astype(np.int64))
    extras = {}
    for key in OPTIONAL_KEYS:
        if key in data:
            arr = np.asarray(data[key])
            if arr.dtype.kind not in "iuf" or not np.all(np.isfinite(arr)):
                raise ModelFileError(f"{where}: {key} must be a finite numeric array")
            extras[key] = arr
    if "affinity" in extras:
        M = extras["affinity"]
        if M.ndim != 2 or M.shape[0] != n or M.shape[1] == 0 or M.min() < -1e-12 \
                or np.max(np.abs(M.sum(axis=1) - 1)) > 1e-6:
            raise ModelFileError(f"{where}: affinity must be ({n}, m), non-negative, rows summing to 1")
    if "centers" in extras and (extras["centers"].ndim != 2 or 0 in extras["centers"].shape):
        raise ModelFileError(f"{where}: centers must be a 2-D (k, d) array")
    if ("tica_mean" in extras) != ("tica_components" in extras):
        raise ModelFileError(f"{where}: tica_mean and tica_components come together (one is missing)")
    if "tica_mean" in extras:
        mean, comps = extras["tica_mean"], extras["tica_components"]
        if mean.ndim != 1 or comps.ndim != 2 or comps.shape[1] != mean.shape[0]:
            raise ModelFileError(f"{where}: tica_components must be (dim, n_features) with n_features = "
                                 f"len(tica_mean)")
        if "centers" in extras and extras["centers"].shape[1] != comps.shape[0]:
            raise ModelFileError(f"{where}: centers have {extras['centers'].shape[1]} columns but the TICA "
                                 f"projection has {comps.shape[0]} dimensions")
    return {"propagator": T, "equilibrium": pi, "states": states.astype(np.int64), "lag": lag, "dt": dt,
            "unit": unit, "reversible": reversible, "metadata": metadata, COUNTS_KEY: counts, "extras": extras}


def _scalar(data, key, kind, where):
    arr = np.asarray(data[key])
    if arr.shape != ():
        raise ModelFileError(f"{where}: {key} must be a single value, but has shape {arr.shape}")
    if kind is str:
        if arr.dtype.kind != "U":
            raise ModelFileError(f"{where}: {key} must be a string")
        return str(arr)
    if kind is bool:
        if arr.dtype.kind != "b":
            raise ModelFileError(f"{where}: {key} must be a boolean")
        return bool(arr)
    if kind is int:
        if arr.dtype.kind not in "iu":
            raise ModelFileError(f"{where}: {key} must be an integer")
        return int(arr)
    if arr.dtype.kind not in "iuf":
        raise ModelFileError(f"{where}: {key} must be a number")
    return float(arr)


def _float_array(data, key, ndim, where):
    arr = np.asarray(data[key])
    if arr.dtype.kind not in "iuf" or arr.ndim != ndim:
        raise ModelFileError(f"{where}: {key} must be a {ndim}-D numeric array")
    return arr.astype(np.float64)
