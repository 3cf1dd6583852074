"""Input validation shared by every entry point.

Each public function converts and checks the inputs it receives here once; the numerical helpers behind
it trust what they receive. Every failure is an :class:`~msmkit.errors.InputError` whose
message names the argument, the rule, the value received and what to do instead.
"""
from __future__ import annotations

import math
import numbers
from typing import Sequence

import numpy as np

from .errors import InputError

__all__ = [
    "as_float_run",
    "as_float_trajectories",
    "brief",
    "as_label_trajectories",
    "check_bool",
    "check_chunk_size",
    "check_finite_frames",
    "check_dt",
    "check_int",
    "check_lag",
    "check_probability",
    "check_seed",
    "check_tolerance",
    "check_unit",
    "as_state_set",
    "as_transition_matrix",
    "feature_names_of",
    "is_lazy_run",
    "require_optional",
]


def brief(value, limit: int = 60) -> str:
    """``repr(value)`` cut to ``limit`` characters, for error messages."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def check_int(value, name: str, *, minimum: int | None = None, maximum: int | None = None) -> int:
    """Return ``value`` as a Python int, or raise InputError naming ``name``.

    Booleans and non-integral floats are refused (a float like 10.0 is accepted).
    """
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (numbers.Integral, numbers.Real)):
        raise InputError(f"{name} must be an integer, but got {brief(value)}")
    if not isinstance(value, numbers.Integral):
        if not math.isfinite(value) or int(value) != value:
            raise InputError(f"{name} must be an integer, but got {brief(value)}")
    value = int(value)
    if minimum is not None and value < minimum:
        raise InputError(f"{name} must be an integer not less than {minimum}, but got {value}")
    if maximum is not None and value > maximum:
        raise InputError(f"{name} must be an integer not greater than {maximum}, but got {value}")
    return value


def check_bool(value, name: str) -> bool:
    """A switch: exactly True or False (numpy booleans too).

    Strings such as "False" or "no" are refused rather than read by truthiness, which would turn
    ``reversible="False"`` into a reversible model.
    """
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    raise InputError(f"{name} must be True or False, but got {brief(value)}")


def check_tolerance(value, name: str) -> float:
    """A convergence or comparison tolerance: a finite number greater than 0."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise InputError(f"{name} must be a positive number (a tolerance), but got {brief(value)}")
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be a finite number greater than 0 (a tolerance), but got {value}")
    return value


def check_seed(seed, name: str = "seed"):
    """A random seed: None (fresh entropy), an integer 0 <= seed < 2**63, or a numpy Generator."""
    if seed is None or isinstance(seed, np.random.Generator):
        return seed
    return check_int(seed, name, minimum=0, maximum=2 ** 63 - 1)


def check_lag(lag, name: str = "lag") -> int:
    """A lag time in frames: a positive integer."""
    return check_int(lag, name, minimum=1)


def check_dt(dt, name: str = "dt") -> float:
    """The physical time between frames: a finite positive number."""
    if isinstance(dt, (bool, np.bool_)) or not isinstance(dt, numbers.Real):
        raise InputError(f"{name} (time between frames) must be a positive number, but got {brief(dt)}")
    dt = float(dt)
    if not math.isfinite(dt) or dt <= 0:
        raise InputError(f"{name} (time between frames) must be a finite positive number, but got {dt}")
    return dt


def check_unit(unit, name: str = "unit") -> str:
    """A time unit label such as "ns"; any non-empty string."""
    if not isinstance(unit, str) or not unit.strip():
        raise InputError(f"{name} must be a non-empty string naming the time unit (e.g. 'ns'), "
                         f"but got {brief(unit)}")
    return unit.strip()


def check_probability(value, name: str, *, open_interval: bool = True) -> float:
    """A number strictly between 0 and 1 (or in [0, 1] when ``open_interval`` is False)."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise InputError(f"{name} must be a number between 0 and 1, but got {brief(value)}")
    value = float(value)
    ok = (0 < value < 1) if open_interval else (0 <= value <= 1)
    if not ok:
        bounds = "strictly between 0 and 1" if open_interval else "between 0 and 1"
        raise InputError(f"{name} must be {bounds}, but got {value}")
    return value


def as_label_trajectories(labels, name: str = "labels") -> list[np.ndarray]:
    """Convert one label trajectory or a sequence of them to a list of 1-D int32 arrays.

    Labels are integers >= 0; -1 marks an unassigned frame. Floats holding whole numbers are
    accepted; strings, non-integral floats, NaN, labels below -1 and 2-D arrays are refused.
    """
    if labels is None:
        raise InputError(f"{name} must be a 1-D integer array or a list of them, but got None")
    if isinstance(labels, np.ndarray):
        if labels.ndim == 1:
            runs = [labels]
        elif labels.ndim == 0:
            raise InputError(f"{name} must be a 1-D integer array or a list of them, but got a scalar")
        else:
            raise InputError(
                f"{name} must be a 1-D array of state labels (one per frame) or a list of them, "
                f"but got an array of shape {labels.shape}; pass a list of 1-D runs instead, "
                f"e.g. list(arr) for one run per row")
    elif isinstance(labels, (str, bytes)):
        raise InputError(f"{name} must hold integer state labels, but got a string {brief(labels)}")
    elif isinstance(labels, Sequence) or hasattr(labels, "__iter__"):
        runs = list(labels)
        # a flat list of labels is one run (strings and other scalars too, so that their dtype
        # is reported below rather than a confusing "shape ()" per element)
        if runs and all(isinstance(x, (numbers.Number, np.generic, str, bytes)) or not hasattr(x, "__len__")
                        for x in runs):
            runs = [np.asarray(runs)]
    else:
        raise InputError(f"{name} must be a 1-D integer array or a list of them, "
                         f"but got {type(labels).__name__}")
    if not runs:
        raise InputError(f"{name} is empty: give at least one label trajectory")

    out = []
    for i, run in enumerate(runs):
        where = f"{name}[{i}]" if len(runs) > 1 else name
        arr = np.asarray(run)
        if arr.ndim != 1:
            raise InputError(f"{where} must be a 1-D array of state labels, but has shape {arr.shape}")
        if arr.dtype.kind in "USO" and arr.size:
            raise InputError(f"{where} must hold integer state labels, but holds {arr.dtype} values "
                             f"such as {brief(arr[0].item() if isinstance(arr[0], np.generic) else arr[0])}; map them to integers 0..n-1 first")
        if arr.dtype.kind == "b":
            raise InputError(f"{where} must hold integer state labels, but holds booleans")
        if arr.dtype.kind == "f":
            if not np.all(np.isfinite(arr)):
                raise InputError(f"{where} holds NaN or infinite labels; use -1 for unassigned frames")
            if np.any(arr != np.round(arr)):
                bad = int(np.flatnonzero(arr != np.round(arr))[0])
                raise InputError(f"{where} must hold integer state labels, but frame {bad} is {arr[bad]}")
        elif arr.dtype.kind not in "iu" and arr.size:
            raise InputError(f"{where} must hold integer state labels, but has dtype {arr.dtype}")
        if arr.size and arr.min() < -1:
            bad = int(np.flatnonzero(arr < -1)[0])
            raise InputError(f"{where} has label {arr[bad]} at frame {bad}; labels must be >= 0, "
                             f"with -1 only for unassigned frames")
        if arr.size and arr.max() > np.iinfo(np.int32).max:
            raise InputError(f"{where} has a label above {np.iinfo(np.int32).max}; renumber states 0..n-1")
        out.append(np.ascontiguousarray(arr, dtype=np.int32))
    if all(r.size == 0 for r in out):
        raise InputError(f"{name} holds no frames: every trajectory is empty")
    return out


def as_transition_matrix(T, name: str = "T", *, tol: float = 1e-6, irreducible: bool = False) -> np.ndarray:
    """A square, finite, non-negative, row-stochastic float matrix (a dense copy).

    Rows must sum to 1 within ``tol``; tiny negative round-off above ``-tol`` is clipped to 0.
    With ``irreducible=True`` every state must be reachable from every other.
    """
    import scipy.sparse as sp
    if sp.issparse(T):
        T = T.toarray()
    try:
        arr = np.array(T, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a square row-stochastic matrix of numbers, but got {brief(T)}") from None
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1] or arr.shape[0] == 0:
        raise InputError(f"{name} must be a square (n x n) transition matrix with n >= 1, but has shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} holds NaN or infinite entries; a transition matrix holds probabilities")
    if arr.min() < -tol:
        i, j = np.unravel_index(np.argmin(arr), arr.shape)
        raise InputError(f"{name} must be non-negative, but {name}[{i}, {j}] = {arr[i, j]:.3g}")
    np.clip(arr, 0.0, None, out=arr)
    dev = np.abs(arr.sum(axis=1) - 1.0)
    if dev.max() > tol:
        i = int(np.argmax(dev))
        raise InputError(f"{name} must be row-stochastic (every row sums to 1), but row {i} sums to "
                         f"{arr[i].sum():.6g}; normalize the rows first")
    if irreducible:
        from scipy.sparse import csgraph
        n_comp, _ = csgraph.connected_components(sp.csr_matrix(arr > 0), directed=True, connection="strong")
        if n_comp > 1:
            raise InputError(f"{name} must be irreducible (every state reachable from every other), "
                             f"but it splits into {n_comp} communicating classes")
    return arr


def as_state_set(states, name: str, valid_labels: np.ndarray) -> np.ndarray:
    """A set of states given by original label, checked against ``valid_labels``.

    Returns the sorted unique labels as int64. Raises InputError for an empty set or for
    labels outside ``valid_labels`` (naming them).
    """
    if isinstance(states, (numbers.Integral, np.integer)) and not isinstance(states, bool):
        states = [states]
    try:
        arr = np.unique(np.asarray(list(states)))
    except TypeError:
        raise InputError(f"{name} must be a list of state labels, but got {brief(states)}") from None
    if arr.size == 0:
        raise InputError(f"{name} is empty: give at least one state label")
    if arr.dtype.kind not in "iu":
        if arr.dtype.kind == "f" and np.all(arr == np.round(arr)):
            arr = arr.astype(np.int64)
        else:
            raise InputError(f"{name} must hold integer state labels, but got {brief(states)}")
    missing = np.setdiff1d(arr, valid_labels)
    if missing.size:
        shown = ", ".join(str(int(m)) for m in missing[:10]) + (" ..." if missing.size > 10 else "")
        raise InputError(f"{name} names label(s) {shown} that are not in the model's kept set; "
                         f"use labels from model.states")
    return arr.astype(np.int64)


# ---------------------------------------------------------------------------------------------
# Float trajectories (frames x features)
# ---------------------------------------------------------------------------------------------

#: Bytes of float64 frame data handled at once when no chunk size is given (16 MiB).
DEFAULT_CHUNK_BYTES = 1 << 24


def require_optional(module: str, extra: str, purpose: str):
    """Import an optional dependency, or raise ImportError naming the extra that installs it."""
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError as err:
        raise ImportError(
            f"{purpose} needs the optional package '{module}', which is not installed; "
            f"install it with: pip install 'msmkit[{extra}]'") from err


def is_lazy_run(obj) -> bool:
    """True for a run that reads itself from disk in chunks (see :class:`msmkit.io.LazyRun`)."""
    return (not isinstance(obj, np.ndarray) and hasattr(obj, "iter_chunks")
            and hasattr(obj, "shape") and hasattr(obj, "__array__"))


def check_chunk_size(chunk_size, n_features: int, name: str = "chunk_size") -> int:
    """Frames per chunk: a positive integer, or None for about 16 MiB of float64 frames."""
    if chunk_size is None:
        return max(1024, DEFAULT_CHUNK_BYTES // (8 * max(1, int(n_features))))
    return check_int(chunk_size, name, minimum=1)


def check_finite_frames(block: np.ndarray, where: str, first_frame: int = 0,
                        feature_names: Sequence[str] | None = None) -> None:
    """Raise InputError if ``block`` (frames x features) holds NaN or infinity.

    The message names ``where`` (an argument or a file), the first bad frame counted from the
    start of the run (``first_frame`` is the index of ``block[0]`` in the run) and the feature.
    """
    if block.dtype.kind not in "fc":
        return
    finite = np.isfinite(block)
    if finite.all():
        return
    bad_frames = np.flatnonzero(~finite.all(axis=1)) if block.ndim == 2 else np.flatnonzero(~finite)
    i = int(bad_frames[0])
    if block.ndim == 2:
        j = int(np.flatnonzero(~finite[i])[0])
        value = block[i, j]
        feature = (f"feature {j} ({feature_names[j]!r})" if feature_names is not None
                   and j < len(feature_names) else f"feature {j}")
    else:
        value, feature = block[i], "the value"
    raise InputError(
        f"{where}: frame {first_frame + i} has {value} in {feature}; trajectories must hold finite "
        f"numbers (NaN or infinity usually marks a broken frame or a missing value: remove or "
        f"repair such frames before loading)")


def feature_names_of(trajs) -> tuple[str, ...] | None:
    """Feature names carried by ``trajs`` (a trajectory set or a DataFrame), else None."""
    names = getattr(trajs, "feature_names", None)
    if names is None and hasattr(trajs, "columns") and hasattr(trajs, "to_numpy"):
        names = [str(c) for c in trajs.columns]
    return None if names is None else tuple(str(n) for n in names)


def as_float_run(run, where: str, feature_names=None):
    """One run as a 2-D float ndarray (checked finite) or a lazy run (checked while read)."""
    if is_lazy_run(run):
        shape = tuple(run.shape)
        if len(shape) != 2:
            raise InputError(f"{where} must be 2-D (frames x features), but has shape {shape}")
        return run
    if hasattr(run, "to_numpy") and hasattr(run, "columns"):
        run = run.to_numpy()
    try:
        arr = np.asarray(run)
    except (TypeError, ValueError) as err:
        raise InputError(f"{where} must be a 2-D array of numbers (frames x features), "
                         f"but could not be read as one: {err}") from None
    if arr.dtype.kind in "USOV" or arr.dtype.kind == "c":
        raise InputError(f"{where} must hold real numbers, but has dtype {arr.dtype}; convert the "
                         f"features to floats first")
    if arr.ndim != 2:
        hint = (" (one feature? use x[:, None] to make it a column)" if arr.ndim == 1 else
                " (coordinates frames x atoms x 3? reshape to frames x (atoms*3) or compute "
                "features first)" if arr.ndim == 3 else "")
        raise InputError(f"{where} must be a 2-D array (frames x features), but has shape "
                         f"{arr.shape}{hint}")
    if arr.dtype.kind not in "f":
        arr = arr.astype(np.float64)
    check_finite_frames(arr, where, 0, feature_names)
    return arr


def as_float_trajectories(trajs, name: str = "trajs", *, feature_names=None) -> list:
    """Convert one trajectory or a sequence of them to a list of runs of float frames.

    Accepts a 2-D array (one run), a DataFrame, a lazy run, or a sequence of these (a list,
    a :class:`msmkit.io.TrajectorySet`). In-memory runs come back as 2-D float ndarrays
    (float32 stays float32; integers become float64) checked to be finite; lazy runs come
    back unchanged and are checked for finite values as their chunks are read. Every run must
    have at least one frame and all runs the same number of features.
    """
    if trajs is None:
        raise InputError(f"{name} must be a 2-D array (frames x features) or a list of them, "
                         f"but got None")
    if isinstance(trajs, (str, bytes)):
        raise InputError(f"{name} must hold trajectory data, but got the string {brief(trajs)}; "
                         f"to read files use msmkit.load_trajectories({brief(trajs)})")
    if feature_names is None:
        feature_names = feature_names_of(trajs)
    if isinstance(trajs, np.ndarray) or is_lazy_run(trajs) or (
            hasattr(trajs, "columns") and hasattr(trajs, "to_numpy")):
        runs = [trajs]
    elif hasattr(trajs, "__iter__"):
        runs = list(trajs)
        if runs and all(isinstance(x, (numbers.Number, np.generic)) for x in runs):
            raise InputError(f"{name} must be 2-D (frames x features), but got a flat list of "
                             f"numbers; use np.asarray(values)[:, None] for a single feature")
    else:
        raise InputError(f"{name} must be a 2-D array (frames x features) or a list of them, "
                         f"but got {type(trajs).__name__}")
    if not runs:
        raise InputError(f"{name} is empty: give at least one trajectory")
    out = []
    n_features = None
    for i, run in enumerate(runs):
        where = getattr(run, "source", None) or (f"{name}[{i}]" if len(runs) > 1 else name)
        run = as_float_run(run, where, feature_names)
        n, d = run.shape
        if n == 0:
            raise InputError(f"{where} has no frames; remove empty runs")
        if d == 0:
            raise InputError(f"{where} has no features (shape {tuple(run.shape)})")
        if n_features is None:
            n_features = d
        elif d != n_features:
            first = getattr(runs[0], "source", None) or f"{name}[0]"
            raise InputError(f"all runs must have the same number of features, but {first} has "
                             f"{n_features} and {where} has {d}; load runs of the same system and "
                             f"feature set together")
        out.append(run)
    if feature_names is not None and len(feature_names) != n_features:
        raise InputError(f"feature_names has {len(feature_names)} names for {n_features} features")
    return out


def zip_member_problem(info) -> str | None:
    """Why numpy cannot read the zip member ``info`` (a ``zipfile.ZipInfo``) as it stands, in
    words that follow the member's name, or None: encrypted members and compression methods other than
    none (0) and deflate (8), the two that numpy.savez / savez_compressed write."""
    import zipfile

    if info.flag_bits & 0x1:
        return "is encrypted (password protected)"
    if info.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED):
        return (f"uses zip compression method {info.compress_type}; numpy writes deflate (8) "
                f"or none (0)")
    return None


def read_npy_header(fh, max_header_size: int):
    """``(shape, fortran_order, dtype)`` from the .npy header at the position of ``fh`` (format
    1.0 or 2.0), parsed by numpy's header reader, never run or unpickled. Raises what numpy's
    parser raises (ValueError, SyntaxError, ...) or ValueError for another format version; the
    caller words the error for the kind of file it reads."""
    fmt = np.lib.format
    version = fmt.read_magic(fh)
    read = {(1, 0): fmt.read_array_header_1_0, (2, 0): fmt.read_array_header_2_0}.get(version)
    if read is None:
        raise ValueError(f"unsupported .npy format version {version[0]}.{version[1]}")
    return read(fh, max_header_size=max_header_size)
