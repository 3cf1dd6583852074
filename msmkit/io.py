"""Reading trajectory files into runs of frames x features.

:func:`load_trajectories` turns a path, a glob pattern, a list of paths, an array or a list
of arrays into a :class:`TrajectorySet`: a sequence of runs (one per simulation) sharing one
list of feature names.

Formats
-------
``.npy``
    One run per file, read lazily: a :class:`LazyRun` that reads frames with plain file reads
    at an offset (no long-lived memory map), so streaming through it keeps memory bounded.
``.npz``
    Each array is one run (loaded into memory). An array named ``feature_names`` (strings)
    gives the feature names instead of being a run.
``.csv`` / ``.tsv``
    One run per file; a header line gives the feature names (no header: ``x0, x1, ...``).
``.h5`` / ``.hdf5`` / ``.hdf``
    Needs the optional extra ``hdf5`` (h5py). Every 2-D numeric dataset is one run (sorted by
    path; ``key=`` picks datasets), read lazily in chunks. Feature names come from a
    ``feature_names`` attribute of the dataset or of the file.
MD formats (``.xtc``, ``.dcd``, ``.trr``, ``.pdb``, ``.nc``, ``.gro``, ..., also compressed)
    Needs the optional extra ``md`` (mdtraj). Features computed while reading coordinates in
    bounded chunks (:mod:`msmkit.mdfeatures`): torsions as sine and cosine, CA-CA distances,
    distances, inverse distances or contacts of selected atoms (``features=``, ``selection=``,
    ``torsions=``, ``atom_pairs=``), with periodic boundaries handled by ``periodic=``. Files
    without a topology need ``topology``. DCD, XTC and TRR files are checked frame by frame
    first; truncated or corrupt files raise InputError. The result's ``feature_atoms`` give
    each feature's atom indices, and ``dt`` (ps) comes from the file when it records one.

Checks
------
Missing files, globs matching nothing, unreadable, empty, truncated or damaged files, unknown
file types, runs with differing numbers of features (naming both files and counts) and
NaN/infinite values all raise :class:`~msmkit.errors.InputError` naming the file. Nothing is
unpickled: ``.npy`` headers are parsed as text and every ``.npz`` member is checked from the
header (plain numeric 2-D array, size matching the archive, not encrypted) before the data
are read. Text files are checked line by line first: every non-blank line must hold the same
number of fields (no padding of short rows with NaN, no column taken as an index), the text
must be UTF-8, header names unique; errors give the line number. Files held in memory (npz, csv/tsv, MD
formats) are checked for NaN/infinity when loaded; lazy runs (npy, HDF5) are checked as each
chunk is read, so the error names the file and the first bad frame at the first read that
meets it (``TrajectorySet.check_values()`` reads everything once to check up front).
"""
from __future__ import annotations

import glob as _glob
import importlib.util
import io
import math
import os
import zipfile
import zlib
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ._checks import (
    read_npy_header,
    zip_member_problem,
    as_float_run,
    brief,
    as_float_trajectories,
    check_chunk_size,
    check_dt,
    check_finite_frames,
    check_unit,
    feature_names_of,
    is_lazy_run,
    require_optional,
)
from .errors import InputError

__all__ = ["LazyRun", "TrajectorySet", "assign_files", "iter_chunks", "load_trajectories"]

NPY_SUFFIXES = (".npy",)
NPZ_SUFFIXES = (".npz",)
TEXT_SUFFIXES = {".csv": ",", ".tsv": "\t"}
HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf")
MD_SUFFIXES = (".xtc", ".trr", ".dcd", ".pdb", ".nc", ".ncdf", ".netcdf", ".gro", ".xyz", ".lammpstrj",
               ".binpos", ".mdcrd", ".crd", ".arc", ".dtr", ".lh5")
_GLOB_CHARS = set("*?[")


def _supported() -> str:
    return ", ".join(NPY_SUFFIXES + NPZ_SUFFIXES + tuple(TEXT_SUFFIXES) + HDF5_SUFFIXES
                     + MD_SUFFIXES)


# ---------------------------------------------------------------------------------------------
# Chunked access shared by every consumer (TICA, Microstates, the dask back end)
# ---------------------------------------------------------------------------------------------

def iter_chunks(run, chunk_size: int | None = None):
    """Yield consecutive blocks of frames of one run.

    Works alike for an in-memory 2-D array (the blocks are views, nothing is copied) and for a
    :class:`LazyRun` (each block is read from disk when needed and owned by the caller).

    Parameters
    ----------
    run : ndarray or LazyRun
        Frames x features.
    chunk_size : int, optional
        Frames per block; by default about 16 MiB of float64 frames.

    Yields
    ------
    ndarray
        ``(m, n_features)`` blocks with ``m <= chunk_size``, in frame order, covering the run.

    Examples
    --------
    >>> import numpy as np
    >>> [b.shape for b in iter_chunks(np.zeros((5, 2)), 2)]
    [(2, 2), (2, 2), (1, 2)]
    """
    if is_lazy_run(run):
        yield from run.iter_chunks(chunk_size)
        return
    arr = np.asarray(run)
    size = check_chunk_size(chunk_size, arr.shape[1] if arr.ndim == 2 else 1)
    for start in range(0, len(arr), size):
        yield arr[start:start + size]


# ---------------------------------------------------------------------------------------------
# Lazy runs
# ---------------------------------------------------------------------------------------------

class LazyRun:
    """A run of frames stored in a file and read on demand.

    Behaves like a read-only 2-D array: ``shape``, ``len()``, slicing (``run[a:b]``,
    ``run[::10]``, ``run[i]``) and ``np.asarray(run)`` (which reads the whole run) work;
    :meth:`iter_chunks` streams it block by block. Values come back as floats (integer data is
    converted to float64) and are checked for NaN/infinity as they are read.
    """

    def __init__(self, source: str, shape: tuple[int, int], dtype):
        self.source = source
        self._shape = (int(shape[0]), int(shape[1]))
        self._dtype = np.dtype(dtype)

    # -- array-like metadata -----------------------------------------------------------------
    @property
    def shape(self) -> tuple[int, int]:
        return self._shape

    @property
    def ndim(self) -> int:
        return 2

    @property
    def dtype(self) -> np.dtype:
        """dtype of the arrays this run reads into (float32 or float64)."""
        return self._dtype.newbyteorder("=") if self._dtype.kind == "f" else np.dtype(np.float64)

    @property
    def n_frames(self) -> int:
        return self._shape[0]

    @property
    def n_features(self) -> int:
        return self._shape[1]

    def __len__(self) -> int:
        return self._shape[0]

    def __repr__(self) -> str:
        return (f"<{type(self).__name__} {self.source!r}: {self._shape[0]} frames x "
                f"{self._shape[1]} features, {self.dtype}, read on demand>")

    # -- reading -----------------------------------------------------------------------------
    def _read(self, start: int, stop: int) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def read(self, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Frames ``start:stop`` (clipped to the run) as a new float array."""
        n = self._shape[0]
        start, stop, _ = slice(start, stop).indices(n)
        if stop <= start:
            return np.empty((0, self._shape[1]), dtype=self.dtype)
        block = self._read(start, stop)
        if block.shape != (stop - start, self._shape[1]):
            raise InputError(f"{self.source}: expected frames {start}..{stop - 1} with "
                             f"{self._shape[1]} features but read shape {block.shape}; "
                             f"the file may have changed or be truncated")
        if not block.dtype.isnative:
            block = block.astype(block.dtype.newbyteorder("="))
        if block.dtype != self.dtype:
            block = block.astype(self.dtype)
        check_finite_frames(block, self.source, start)
        return block

    def iter_chunks(self, chunk_size: int | None = None):
        """Yield the run in consecutive blocks of at most ``chunk_size`` frames."""
        size = check_chunk_size(chunk_size, self._shape[1])
        for start in range(0, self._shape[0], size):
            yield self.read(start, start + size)

    def __array__(self, dtype=None, copy=None):
        arr = self.read(0, self._shape[0])
        return arr if dtype is None else arr.astype(dtype, copy=False)

    def __getitem__(self, key):
        if isinstance(key, tuple):
            if not key:
                return self[:]
            rows = self[key[0]]
            rest = key[1:]
            return rows[rest] if rows.ndim == 1 else rows[(slice(None),) + rest]
        if isinstance(key, (int, np.integer)) and not isinstance(key, bool):
            i = int(key)
            if not -self._shape[0] <= i < self._shape[0]:
                raise IndexError(f"frame {i} out of range for a run of {self._shape[0]} frames")
            i %= self._shape[0]
            return self.read(i, i + 1)[0]
        if isinstance(key, slice):
            start, stop, step = key.indices(self._shape[0])
            if step == 1:
                return self.read(start, stop)
            if step < 0:
                lo = stop + 1
                return self[lo:start + 1][::-1][::-step] if start >= lo else self.read(0, 0)
            return self._strided(start, stop, step)
        if key is Ellipsis:
            return self.read(0, self._shape[0])
        index = np.asarray(key)
        if index.size == 0:
            index = index.astype(np.intp)
        if index.dtype.kind == "b":
            if index.shape != (self._shape[0],):
                raise IndexError(f"boolean index of shape {index.shape} does not match "
                                 f"{self._shape[0]} frames")
            index = np.flatnonzero(index)
        if index.dtype.kind not in "iu":
            raise IndexError(f"cannot index a run with {brief(key)}")
        return self._take(index)

    def _strided(self, start: int, stop: int, step: int) -> np.ndarray:
        """Every ``step``-th frame of ``start:stop``, reading in bounded blocks."""
        block = check_chunk_size(None, self._shape[1])
        if step * 8 > block:  # sparse: read the wanted frames only
            return self._take(np.arange(start, stop, step))
        n_out = len(range(start, stop, step))
        out = np.empty((n_out, self._shape[1]), dtype=self.dtype)
        block -= block % step  # whole periods per read
        k = 0
        for lo in range(start, stop, block):
            part = self.read(lo, min(lo + block, stop))[::step]
            out[k:k + len(part)] = part
            k += len(part)
        return out

    def _take(self, index: np.ndarray) -> np.ndarray:
        n = self._shape[0]
        if index.size and (index.min() < -n or index.max() >= n):
            raise IndexError(f"frame index out of range for a run of {n} frames")
        index = np.where(index < 0, index + n, index).ravel()
        out = np.empty((index.size, self._shape[1]), dtype=self.dtype)
        if not index.size:
            return out
        order = np.argsort(index, kind="stable")
        sorted_idx = index[order]
        size = check_chunk_size(None, self._shape[1])
        i = 0
        while i < sorted_idx.size:
            lo = int(sorted_idx[i])
            j = int(np.searchsorted(sorted_idx, lo + size, side="left"))
            block = self.read(lo, int(sorted_idx[j - 1]) + 1)  # up to the last wanted frame
            out[order[i:j]] = block[sorted_idx[i:j] - lo]
            i = j
        return out


class _ScaledRun(LazyRun):
    """A run read through ``(x - mean) / scale``, block by block."""

    def __init__(self, run, mean, scale):
        super().__init__(getattr(run, "source", None) or "<array>", run.shape, np.float64)
        self._run, self._mean, self._scale = run, mean, scale

    def _read(self, start, stop):
        return (np.asarray(self._run[start:stop], dtype=np.float64) - self._mean) / self._scale


def _vanished(source: str, err: Exception) -> InputError:
    """The error for a file that could be listed but no longer read (moved, deleted, or not
    visible from this machine, e.g. a dask worker without the shared filesystem)."""
    return InputError(f"{source}: cannot read the file any more ({err}); it was moved, deleted "
                      f"or changed after loading, or it is not visible from this machine (on a "
                      f"cluster every worker must see the same path); load the files again")


class _NpyRun(LazyRun):
    """An .npy file read with file offsets; a memory map is opened per read only for
    Fortran-ordered files and dropped at once (a long-lived map would count every touched
    page as resident memory)."""

    def __init__(self, path: str, offset: int, shape, dtype, fortran_order: bool):
        super().__init__(path, shape, dtype)
        self._offset = int(offset)
        self._fortran = bool(fortran_order)

    def _read(self, start, stop):
        d = self._shape[1]
        if self._fortran:
            try:
                mm = np.memmap(self.source, dtype=self._dtype, mode="r", offset=self._offset,
                               shape=self._shape, order="F")
            except (OSError, ValueError) as err:
                raise _vanished(self.source, err) from None
            try:
                return np.array(mm[start:stop])
            finally:
                del mm
        count = (stop - start) * d
        try:
            with open(self.source, "rb") as fh:
                fh.seek(self._offset + start * d * self._dtype.itemsize)
                flat = np.fromfile(fh, dtype=self._dtype, count=count)
        except OSError as err:
            raise _vanished(self.source, err) from None
        if flat.size != count:
            raise InputError(f"{self.source}: file ends before frame {stop - 1}; it is truncated "
                             f"or was changed after loading")
        return flat.reshape(stop - start, d)


class _HDF5Run(LazyRun):
    """One 2-D dataset of an HDF5 file; the file is opened per read and closed again."""

    def __init__(self, path: str, key: str, shape, dtype):
        super().__init__(f"{path}:{key}", shape, dtype)
        self._path = path
        self._key = key

    def _read(self, start, stop):
        h5py = require_optional("h5py", "hdf5", "Reading HDF5 files")
        try:
            with h5py.File(self._path, "r") as fh:
                return np.asarray(fh[self._key][start:stop])
        except (OSError, KeyError, RuntimeError, ValueError) as err:
            if not os.path.isfile(self._path):
                raise _vanished(self.source, err) from None
            raise InputError(f"{self.source}: frames {start}..{stop - 1} cannot be read "
                             f"({type(err).__name__}: {' '.join(str(err).split())}); the file "
                             f"is damaged or was changed after loading: write it again") from None


# ---------------------------------------------------------------------------------------------
# The set of runs
# ---------------------------------------------------------------------------------------------

def _check_names(names, n_features: int, where: str) -> tuple[str, ...]:
    try:
        names = tuple(str(n) for n in names)
    except TypeError:
        raise InputError(f"feature_names must be a list of strings, but got {brief(names)}") from None
    if len(names) != n_features:
        raise InputError(f"feature_names has {len(names)} names but {where} has {n_features} "
                         f"features; give one name per feature (column), or pass feature_names= "
                         f"to override names stored in a file")
    seen = set()
    for n in names:
        if n in seen:
            raise InputError(f"feature_names must be unique, but {n!r} appears twice ({where})")
        seen.add(n)
    return names


def default_feature_names(n_features: int) -> tuple[str, ...]:
    """Names used when a source carries none: ``x0, x1, ...``."""
    return tuple(f"x{i}" for i in range(n_features))


class TrajectorySet(Sequence):
    """A sequence of runs (frames x features) sharing one list of feature names.

    Runs are in-memory 2-D float arrays or :class:`LazyRun` objects that read themselves from
    disk. Indexing with an integer gives a run; with a slice, a smaller TrajectorySet.

    Parameters
    ----------
    runs : sequence of array-like or LazyRun
        One entry per simulation run; all with the same number of features.
    feature_names : sequence of str, optional
        One unique name per feature; default ``x0, x1, ...``.
    dt : float, optional
        Time between frames, if known (physical units, see ``unit``).
    unit : str, optional
        Time unit of ``dt`` (e.g. ``"ns"``).
    feature_atoms : sequence of tuple of int, optional
        For features computed from coordinates: the atom indices (0-based, topology order)
        each feature is computed from.

    Attributes
    ----------
    feature_names : tuple of str
    n_features : int
    n_frames : ndarray of int64, frames per run
    total_frames : int
    sources : tuple of str or None, the file each run came from (None for in-memory arrays)
    feature_atoms : tuple of tuple of int, or None
    """

    def __init__(self, runs, feature_names=None, *, dt=None, unit=None, sources=None,
                 feature_atoms=None):
        if feature_names is None:
            feature_names = feature_names_of(runs)
        checked = as_float_trajectories(runs, "runs")
        n_features = checked[0].shape[1]
        self._runs = tuple(checked)
        if sources is None:
            sources = [getattr(r, "source", None) for r in checked]
        self._sources = tuple(None if s is None else str(s) for s in sources)
        if len(self._sources) != len(self._runs):
            raise InputError(f"sources has {len(self._sources)} entries for {len(self._runs)} runs")
        self.feature_names = (default_feature_names(n_features) if feature_names is None
                              else _check_names(feature_names, n_features, "the runs"))
        self.dt = None if dt is None else check_dt(dt)
        self.unit = None if unit is None else check_unit(unit)
        if feature_atoms is not None:
            feature_atoms = tuple(tuple(int(i) for i in a) for a in feature_atoms)
            if len(feature_atoms) != n_features:
                raise InputError(f"feature_atoms has {len(feature_atoms)} entries for "
                                 f"{n_features} features; give one tuple of atoms per feature")
        self.feature_atoms = feature_atoms

    @property
    def n_features(self) -> int:
        return len(self.feature_names)

    @property
    def n_frames(self) -> np.ndarray:
        return np.array([r.shape[0] for r in self._runs], dtype=np.int64)

    @property
    def total_frames(self) -> int:
        return int(sum(r.shape[0] for r in self._runs))

    @property
    def sources(self) -> tuple:
        return self._sources

    @property
    def runs(self) -> tuple:
        return self._runs

    def __len__(self) -> int:
        return len(self._runs)

    def __getitem__(self, index):
        if isinstance(index, slice):
            return TrajectorySet(self._runs[index], self.feature_names, dt=self.dt, unit=self.unit,
                                 sources=self._sources[index], feature_atoms=self.feature_atoms)
        return self._runs[index]

    def __repr__(self) -> str:
        lazy = sum(is_lazy_run(r) for r in self._runs)
        where = f", {lazy} read from disk on demand" if lazy else ""
        time = f", dt={self.dt:g} {self.unit or ''}".rstrip() if self.dt is not None else ""
        names = ", ".join(self.feature_names[:6]) + (", ..." if self.n_features > 6 else "")
        return (f"TrajectorySet({len(self)} runs, {self.total_frames} frames, "
                f"{self.n_features} features [{names}]{time}{where})")

    def in_memory(self) -> "TrajectorySet":
        """The same runs with every lazy run read into memory."""
        return TrajectorySet([np.asarray(r) for r in self._runs], self.feature_names,
                             dt=self.dt, unit=self.unit, sources=self._sources,
                             feature_atoms=self.feature_atoms)

    def feature_spread(self, chunk_size: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Mean and standard deviation of every feature over all frames, in one chunked pass
        (sums shifted by the first frame, so large offsets lose no precision)."""
        shift = np.array(np.asarray(self._runs[0][:1], dtype=np.float64)[0])
        n, total, squares = 0, np.zeros(self.n_features), np.zeros(self.n_features)
        for run in self._runs:
            for block in iter_chunks(run, chunk_size):
                x = np.asarray(block, dtype=np.float64) - shift
                n += len(x)
                total += x.sum(axis=0)
                squares += np.einsum("ij,ij->j", x, x)
        mean = total / n
        var = np.maximum(squares / n - mean ** 2, 0.0)
        return mean + shift, np.sqrt(var)

    def standardized(self, chunk_size: int | None = None) -> "TrajectorySet":
        """The same runs with every feature shifted to mean 0 and scaled to standard deviation
        1 (constant features are only shifted), read on demand; for clustering features of
        different units or spreads without TICA. The result carries ``feature_mean`` and
        ``feature_scale`` so that new data can be scaled alike."""
        mean, sd = self.feature_spread(chunk_size)
        scale = np.where(sd > 0, sd, 1.0)
        out = TrajectorySet([_ScaledRun(r, mean, scale) for r in self._runs], self.feature_names,
                            dt=self.dt, unit=self.unit, sources=self._sources,
                            feature_atoms=self.feature_atoms)
        out.feature_mean, out.feature_scale = mean, scale
        return out

    def check_values(self, chunk_size: int | None = None, *, client=None) -> "TrajectorySet":
        """Read every lazy run once, raising InputError at the first NaN/infinite frame.

        With ``client`` (a ``dask.distributed.Client``) the runs are read on the cluster's
        workers, one task per run.
        """
        from . import _execution as execution

        lazy = [r for r in self._runs if is_lazy_run(r)]
        execution.map_runs(read_through, lazy, chunk_size, client=client, what="check_values",
                           frames=int)
        return self


def read_through(run, chunk_size: int | None = None) -> int:
    """Kernel of :meth:`TrajectorySet.check_values`: read a run chunk by chunk (InputError at the
    first NaN/infinite frame or when the file vanished) and return the number of frames read."""
    return sum(len(block) for block in iter_chunks(run, chunk_size))


# ---------------------------------------------------------------------------------------------
# Readers, one per format; each returns (list of runs, feature names or None)
# ---------------------------------------------------------------------------------------------

def _open_error(path: str, err: Exception) -> InputError:
    return InputError(f"cannot read {path}: {err}")


def _check_not_empty(path: str) -> None:
    try:
        size = os.path.getsize(path)
    except OSError as err:
        raise _open_error(path, err) from None
    if size == 0:
        raise InputError(f"{path} is empty (0 bytes); remove it or regenerate it")


def _check_shape(shape, path: str, what: str = "the array") -> None:
    if len(shape) != 2:
        hint = (" (one feature? save it as a column, x[:, None])" if len(shape) == 1 else
                " (coordinates? compute features first, or reshape to frames x features)"
                if len(shape) == 3 else "")
        raise InputError(f"{path}: {what} must be 2-D (frames x features), but has shape "
                         f"{tuple(shape)}{hint}")
    if shape[0] == 0:
        raise InputError(f"{path}: {what} holds no frames (shape {tuple(shape)})")
    if shape[1] == 0:
        raise InputError(f"{path}: {what} has no features (shape {tuple(shape)})")


def _check_numeric(dtype, path: str) -> None:
    dtype = np.dtype(dtype)
    if dtype.kind not in "fiub" or dtype.names is not None:
        raise InputError(f"{path}: the data must be real numbers, but have dtype {dtype}; "
                         f"save the features as a float array")


#: Largest .npy header read (bytes); numpy writes headers of a few hundred bytes.
MAX_NPY_HEADER = 10_000


def _npy_header(fh, where: str):
    """``(shape, fortran_order, dtype)`` from the header at the position of ``fh``, checked to
    describe a plain numeric 2-D array; the header text is parsed, never run or unpickled."""
    try:
        shape, fortran, dtype = read_npy_header(fh, MAX_NPY_HEADER)
    except (OSError, zipfile.BadZipFile, zlib.error):
        raise  # reading failed (an .npz member): reported by the caller
    except Exception as err:  # numpy's header parser raises ValueError, SyntaxError, TokenError, ...
        raise InputError(f"{where} is not a readable .npy array (the header cannot be parsed: "
                         f"{type(err).__name__}: {' '.join(str(err).split())}); save arrays with "
                         f"numpy.save") from None
    if dtype.hasobject:
        raise InputError(f"{where} holds Python objects, which would need pickle and are never "
                         f"loaded; save the features as a float array")
    _check_numeric(dtype, where)
    if any(d < 0 for d in shape):
        raise InputError(f"{where}: the header declares an impossible shape {tuple(shape)}; the "
                         f"file is damaged, save it again with numpy.save")
    _check_shape(shape, where)
    return tuple(shape), bool(fortran), dtype


def _read_npy(path: str, **_):
    _check_not_empty(path)
    try:
        with open(path, "rb") as fh:
            shape, fortran, dtype = _npy_header(fh, path)
            offset = fh.tell()
        size = os.path.getsize(path)
    except OSError as err:
        raise _open_error(path, err) from None
    needed = offset + math.prod(shape) * dtype.itemsize  # Python integers: no overflow
    if size != needed:  # numpy.save writes exactly the header and the data
        state = "truncated" if size < needed else "damaged (longer than the header declares)"
        raise InputError(f"{path} is {state}: the header promises {shape[0]} frames x "
                         f"{shape[1]} features ({needed} bytes) but the file has {size} bytes; "
                         f"write it again with numpy.save")
    return [_NpyRun(path, offset, shape, dtype, fortran)], None


def _npz_member(zf, info, path: str) -> np.ndarray:
    """One member of an .npz archive, checked from the header before the data are read."""
    where = f"{path}:{info.filename[:-4]}"
    problem = zip_member_problem(info)
    if problem:
        raise InputError(f"{where} {problem}: save the runs again with numpy.savez or numpy.savez_compressed")
    with zf.open(info) as fh:
        shape, fortran, dtype = _npy_header(fh, where)
        nbytes = math.prod(shape) * dtype.itemsize
        if fh.tell() + nbytes != info.file_size:
            raise InputError(f"{where} declares {shape[0]} frames x {shape[1]} features "
                             f"({nbytes} bytes) but holds {max(info.file_size - fh.tell(), 0)} "
                             f"bytes of data: the archive is damaged, save it again")
        try:
            out = np.empty(math.prod(shape), dtype=dtype)
        except (MemoryError, ValueError):
            raise InputError(f"{where} needs {nbytes / 2 ** 30:.3g} GiB of memory; .npz runs "
                             f"are read into memory, save large runs as .npy files (read on "
                             f"demand)") from None
        view = out.view(np.uint8).reshape(-1)
        got = 0
        while got < nbytes:
            k = fh.readinto(memoryview(view[got:got + (1 << 24)]))
            if not k:
                break
            got += k
        if got != nbytes:
            raise InputError(f"{where} ends after {got} of {nbytes} bytes: the archive is "
                             f"truncated or damaged, save it again")
    out = out.reshape(shape, order="F" if fortran else "C")
    if not out.dtype.isnative:
        out = out.astype(out.dtype.newbyteorder("="))
    return out


def _read_npz(path: str, **_):
    _check_not_empty(path)
    if not zipfile.is_zipfile(path):
        raise InputError(f"{path} is not a readable .npz file (not a zip archive: truncated, "
                         f"or not written by numpy.savez); save the runs again with numpy.savez")
    runs, keys, names = [], [], None
    try:
        with zipfile.ZipFile(path) as zf:
            members = zf.infolist()
            odd = [m.filename for m in members if not m.filename.endswith(".npy")]
            if odd:
                raise InputError(f"{path} holds {brief(odd, 80)}, which is not a numpy array; an "
                                 f".npz of runs holds only arrays (numpy.savez): remove the other "
                                 f"files from the archive")
            for info in members:
                key = info.filename[:-4]
                if key == "feature_names":
                    names = _npz_feature_names(zf, info, path)
                    continue
                arr = _npz_member(zf, info, path)
                where = f"{path}:{key}"
                arr = arr if arr.dtype.kind == "f" else arr.astype(np.float64)
                check_finite_frames(arr, where, 0)
                if runs and arr.shape[1] != runs[0].shape[1]:
                    raise InputError(f"{path}: array {keys[0]!r} has {runs[0].shape[1]} features "
                                     f"but {key!r} has {arr.shape[1]}; every run of a file must "
                                     f"have the same features")
                runs.append(arr)
                keys.append(key)
    except InputError:
        raise
    except (zipfile.BadZipFile, zipfile.LargeZipFile, OSError, EOFError, zlib.error,
            RuntimeError, NotImplementedError, ValueError, OverflowError) as err:
        # zlib.error: damaged compressed data; RuntimeError: encryption; EOFError: truncation
        raise InputError(f"{path} is not a readable .npz file ({type(err).__name__}: "
                         f"{' '.join(str(err).split())}); save the runs again with "
                         f"numpy.savez") from None
    if not runs:
        raise InputError(f"{path} holds no runs (no arrays besides feature_names); save each "
                         f"run as one frames x features array")
    return runs, names


def _npz_feature_names(zf, info, path: str) -> list[str]:
    """The ``feature_names`` member: a flat array of strings (read without pickle)."""
    where = f"{path}:feature_names"
    with zf.open(info) as fh:
        try:
            arr = np.lib.format.read_array(fh, allow_pickle=False,
                                           max_header_size=MAX_NPY_HEADER)
        except Exception as err:  # a damaged header or data, or an object array
            raise InputError(f"{where} cannot be read as an array of strings ({type(err).__name__}"
                             f": {' '.join(str(err).split())}); save the names as "
                             f"numpy.array(['name', ...])") from None
    if arr.dtype.kind not in "US" or arr.ndim != 1:
        raise InputError(f"{where} must be a flat array of strings, but has dtype {arr.dtype} "
                         f"and shape {arr.shape}; save the names as numpy.array(['name', ...])")
    return [n.decode("utf-8", "replace") if isinstance(n, bytes) else str(n) for n in arr]


def _looks_numeric(token: str) -> bool:
    try:
        float(token)
        return True
    except ValueError:
        return token.strip().lower() in {"", "nan", "inf", "-inf", "+inf", "na"}


def _text_lines(raw: bytes, sep: str, path: str) -> tuple[np.ndarray, np.ndarray]:
    """Line numbers (1-based) of the non-blank lines of ``raw`` and the number of fields on
    each; separators inside quotes are not counted. Lines end with ``\\n`` or ``\\r\\n``."""
    data = np.frombuffer(raw, dtype=np.uint8)
    cr = np.flatnonzero(data == 13)
    lone = cr[(cr + 1 >= len(data)) | (data[np.minimum(cr + 1, len(data) - 1)] != 10)]
    if lone.size:
        line = raw.count(b"\n", 0, int(lone[0])) + 1
        raise InputError(f"{path}: line {line} holds a carriage return that does not end the "
                         f"line; end lines with a newline (LF or CR LF) and remove other "
                         f"control characters")
    if b'"' in raw:  # quoted fields (names with commas): let the csv module split them
        import csv

        text = raw.decode("utf-8").split("\n")
        try:
            rows = [(k + 1, len(f)) for k, f in enumerate(csv.reader(text, delimiter=sep)) if f]
        except csv.Error as err:
            raise InputError(f"{path}: the quoting cannot be parsed ({err}); quote whole "
                             f"fields only, with a closing quote on the same line") from None
        rows = np.array(rows, dtype=np.int64).reshape(-1, 2)
        return rows[:, 0], rows[:, 1]
    if not raw:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    ends = np.flatnonzero(data == 10)
    if not raw.endswith(b"\n"):
        ends = np.append(ends, len(data))
    starts = np.concatenate([[0], ends[:-1] + 1])
    seps = np.flatnonzero(data == ord(sep))
    fields = np.searchsorted(seps, ends) - np.searchsorted(seps, starts) + 1
    length = ends - starts
    cr = (length > 0) & (data[np.maximum(ends - 1, 0)] == 13)
    blank = (length - cr) == 0
    lines = np.arange(1, len(ends) + 1)
    return lines[~blank], fields[~blank]


def _first_line(raw: bytes) -> tuple[int, str | None]:
    """(1-based number, text) of the first non-blank line of ``raw``, or (0, None)."""
    start, number = 0, 1
    while start < len(raw):
        stop = raw.find(b"\n", start)
        stop = len(raw) if stop < 0 else stop
        line = raw[start:stop].rstrip(b"\r")
        if line:
            return number, line.decode("utf-8")
        start, number = stop + 1, number + 1
    return 0, None


def _read_text(path: str, **_):
    import csv
    import warnings

    import pandas as pd

    sep = TEXT_SUFFIXES[Path(path).suffix.lower()]
    kind = "CSV" if sep == "," else "TSV"
    _check_not_empty(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as err:
        raise _open_error(path, err) from None
    raw = raw[3:] if raw.startswith(b"\xef\xbb\xbf") else raw
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError as err:
        line = raw.count(b"\n", 0, err.start) + 1
        raise InputError(f"{path}: line {line} is not UTF-8 text (byte {raw[err.start]:#04x}); "
                         f"a {kind} file of features must be plain UTF-8 text: check that it is "
                         f"the right file, or save it again as UTF-8") from None
    first_number, first = _first_line(raw)
    if first is None:
        raise InputError(f"{path} holds only blank lines; write one line per frame")
    try:
        tokens = next(csv.reader([first], delimiter=sep))
    except csv.Error as err:
        raise InputError(f"{path}: line {first_number} cannot be split into fields ({err}); "
                         f"check the quoting") from None
    has_header = not all(_looks_numeric(t) for t in tokens)
    if has_header:
        seen = set()
        for n in (t.strip() for t in tokens):
            if n in seen:
                raise InputError(f"{path}: the header names the column {n!r} twice; give every "
                                 f"feature a different name")
            seen.add(n)

    def layout():
        """Line numbers of the frames and the number of values per line, after checking that
        every line holds the same number (one pass over the bytes; run when the fast parse
        below needs an explanation, or when quotes could hide separators)."""
        lines, fields = _text_lines(raw, sep, path)
        odd = np.flatnonzero(fields != fields[0])
        if odd.size:
            k = int(odd[0])
            what = "the header" if has_header else f"line {lines[0]}"
            raise InputError(f"{path}: line {lines[k]} has {fields[k]} value"
                             f"{'s' if fields[k] != 1 else ''} but {what} has {fields[0]}; every "
                             f"line must hold one value per feature (is the file cut short, or "
                             f"are two files joined?)")
        frame_lines = lines[1:] if has_header else lines
        if not len(frame_lines):
            raise InputError(f"{path} has a header but no frames; write one line per frame "
                             f"below it")
        return frame_lines, int(fields[0])

    # pandas reads quoted separators and a lone CR (a line break to it) differently from the
    # line count: check the layout up front then; otherwise only to explain a failure
    checked = layout() if b'"' in raw or raw.count(b"\r") != raw.count(b"\r\n") else None
    try:
        with warnings.catch_warnings():
            # "Length of header or names does not match length of data": rows longer than
            # the header, which would lose values
            warnings.simplefilter("error", pd.errors.ParserWarning)
            frame = pd.read_csv(io.BytesIO(raw), sep=sep, header=0 if has_header else None,
                                index_col=False, skip_blank_lines=True, encoding="utf-8")
    except Exception as err:  # pandas raises several parser error types
        layout()  # names the first line with a different number of values, if any
        raise InputError(f"cannot parse {path} as {kind}: {' '.join(str(err).split())}; every "
                         f"line must hold one number per feature") from None
    if frame.shape[0] == 0:
        layout()
    if checked is not None and frame.shape != (len(checked[0]), checked[1]):
        raise InputError(f"{path}: read {frame.shape[0]} frames x {frame.shape[1]} features "
                         f"from {len(checked[0])} lines of {checked[1]} values; check the "
                         f"quoting and the separator ({sep!r})")
    names = [str(c).strip() for c in frame.columns] if has_header else None
    for j, col in enumerate(frame.columns):
        if frame[col].dtype.kind not in "fiu":  # words, or true/false read as booleans
            coerced = pd.to_numeric(frame[col].astype(object), errors="coerce")
            bad = np.flatnonzero((coerced.isna().to_numpy() & frame[col].notna().to_numpy())
                                 | (frame[col].dtype.kind == "b"))
            i = int(bad[0]) if bad.size else 0
            label = f"column {j} ({names[j]!r})" if names else f"column {j}"
            frame_lines, _ = layout()
            raise InputError(f"{path}: frame {i} (line {frame_lines[i]}) has "
                             f"{str(frame[col].iloc[i])!r} in {label}; every value must be a number")
    arr = frame.to_numpy(dtype=np.float64)
    finite = np.isfinite(arr).all(axis=1)
    if not finite.all():
        frame_lines, _ = layout()  # a short line reads as NaN: name it as such first
        i = int(np.flatnonzero(~finite)[0])
        try:
            check_finite_frames(arr, path, 0, names)
        except InputError as err:
            raise InputError(str(err).replace(f"frame {i} ", f"frame {i} (line {frame_lines[i]}) ",
                                              1)) from None
    return [arr], names


def _is_md_hdf5(fh) -> bool:
    """mdtraj's HDF5 trajectory layout: 3-D coordinates plus a topology, not features."""
    return ("coordinates" in fh and getattr(fh["coordinates"], "ndim", 0) == 3
            and "topology" in fh)


def _read_hdf5(path: str, *, key=None, **md_options):
    h5py = require_optional("h5py", "hdf5", "Reading HDF5 files")
    _check_not_empty(path)
    if key is not None and not (isinstance(key, str) or (
            isinstance(key, (list, tuple)) and key and all(isinstance(k, str) for k in key))):
        raise InputError(f"key must be an HDF5 dataset path or a list of them, but got "
                         f"{brief(key)}")
    try:
        fh = h5py.File(path, "r")
    except OSError as err:
        raise InputError(f"{path} is not a readable HDF5 file ({err}); check that it is the "
                         f"right file and complete") from None
    try:
        with fh:
            if key is None and _is_md_hdf5(fh):
                md_file = True
            else:
                md_file = False
                runs, names = _hdf5_runs(fh, path, key, h5py)
    except InputError:
        raise
    except (OSError, RuntimeError, KeyError, ValueError, TypeError) as err:
        # h5py raises these for damaged metadata (B-trees, heaps, headers)
        raise InputError(f"{path}: the HDF5 file is damaged ({type(err).__name__}: "
                         f"{' '.join(str(err).split())}); write it again") from None
    if not md_file:
        return runs, names
    if md_options.get("topology") is not None:
        raise InputError(f"topology: {path} is an MD trajectory that carries a topology "
                         f"inside; leave the topology out (load it apart from files that "
                         f"need one)")
    if importlib.util.find_spec("tables") is None:
        raise ImportError(f"{path} is an mdtraj HDF5 trajectory (coordinates and a "
                          f"topology, not features); mdtraj reads it with PyTables: "
                          f"pip install tables")
    return _read_md(path, **md_options)


def _hdf5_runs(fh, path: str, key, h5py):
    """Lazy runs and feature names of the feature datasets of an open HDF5 file."""
    if key is None:
        keys = []
        fh.visititems(lambda name, obj: keys.append(name)
                      if isinstance(obj, h5py.Dataset) and obj.ndim == 2
                      and obj.dtype.kind in "fiub" else None)
        keys.sort()
        if not keys:
            raise InputError(f"{path} holds no 2-D numeric dataset; store each run as a "
                             f"frames x features dataset")
    else:
        keys = [key] if isinstance(key, str) else list(key)
    runs, names = [], None
    for k in keys:
        if k not in fh or not isinstance(fh[k], h5py.Dataset):
            raise InputError(f"key={k!r}: {path} has no dataset of that name; datasets "
                             f"there: {brief(sorted(_h5_datasets(fh, h5py)), 200)}")
        ds = fh[k]
        _check_numeric(ds.dtype, f"{path}:{k}")
        _check_shape(ds.shape, f"{path}:{k}", "the dataset")
        if runs and ds.shape[1] != runs[0].shape[1]:
            raise InputError(f"{path}: dataset {keys[0]!r} has {runs[0].shape[1]} features but "
                             f"{k!r} has {ds.shape[1]}; every run of a file must have the same "
                             f"features (key= picks datasets)")
        runs.append(_HDF5Run(path, k, ds.shape, ds.dtype))
        ds_names = ds.attrs.get("feature_names", fh.attrs.get("feature_names"))
        if ds_names is not None and names is None:
            names = [n.decode("utf-8", "replace") if isinstance(n, bytes) else str(n)
                     for n in np.asarray(ds_names).ravel()]
    return runs, names


def _h5_datasets(fh, h5py) -> list[str]:
    found = []
    fh.visititems(lambda name, obj: found.append(name) if isinstance(obj, h5py.Dataset) else None)
    return found


def _read_md(path: str, *, topology=None, torsions=("phi", "psi"), atom_pairs=None,
             features=None, periodic="whole", selection=None, frames=None, details=None, **_):
    """MD file -> features; fills ``details`` (if a dict) with each feature's atom indices
    and the time between frames (ps) found in the file."""
    from .mdfeatures import read_md_features

    require_optional("mdtraj", "md", "Reading molecular-dynamics trajectory files")
    _check_not_empty(path)
    from .mdfeatures import MDFeatures

    spec = MDFeatures.from_options(features, torsions, atom_pairs, periodic, selection)
    arr, names, atoms, dt = read_md_features(path, spec, topology=topology, frames=frames)
    _check_shape(arr.shape, path, "the features")
    check_finite_frames(arr, path, 0, names)
    if details is not None:
        details.update(feature_atoms=tuple(tuple(a) for a in atoms), dt=dt, unit="ps")
    return [arr], names


def read_file(path: str, options: dict):
    """Kernel of :func:`load_trajectories` for one file: the runs in it (lazy where the
    format allows) and the feature names (or None); ``options`` are the reader options (``key``,
    ``topology``, ``torsions``, ``atom_pairs``, and the MD options ``features``, ``periodic``,
    ``selection``, ``frames``)."""
    return _reader_for(path)(path, **options)


def _reader_for(path: str):
    suffix = Path(path).suffix.lower()
    if suffix in NPY_SUFFIXES:
        return _read_npy
    if suffix in NPZ_SUFFIXES:
        return _read_npz
    if suffix in TEXT_SUFFIXES:
        return _read_text
    if suffix in HDF5_SUFFIXES:
        return _read_hdf5
    if suffix in MD_SUFFIXES:
        return _read_md
    if suffix in (".gz", ".bz2", ".xz") and Path(path[:-len(suffix)]).suffix.lower() in MD_SUFFIXES:
        return _read_md  # decompressed to a temporary file while reading
    raise InputError(f"{path}: unknown file type {suffix or '(no extension)'!r}; supported: "
                     f"{_supported()}")


def _expand_path(item, name: str) -> list[str]:
    text = os.fspath(item)
    if isinstance(text, bytes):
        text = os.fsdecode(text)
    text = os.path.expanduser(text)
    if any(c in _GLOB_CHARS for c in text) and not os.path.exists(text):
        matches = sorted(p for p in _glob.glob(text, recursive=True) if os.path.isfile(p))
        if not matches:
            raise InputError(f"{name}: the pattern {text!r} matched no files; check the folder "
                             f"and the extension")
        return matches
    if os.path.isdir(text):
        raise InputError(f"{name}: {text!r} is a folder; give a file or a pattern such as "
                         f"{os.path.join(text, '*.npy')!r}")
    if not os.path.exists(text):
        raise InputError(f"{name}: no such file {text!r}")
    return [text]


def _one_file(path) -> int:
    return 1


def _is_path(item) -> bool:
    return isinstance(item, (str, bytes, os.PathLike))


def load_trajectories(source, *, feature_names=None, key=None, dt=None, unit=None,
                      topology=None, torsions=("phi", "psi"), atom_pairs=None, features=None,
                      periodic="whole", selection=None, frames=None,
                      progress: bool = False, client=None) -> TrajectorySet:
    """Read trajectories (frames x features) into a :class:`TrajectorySet`.

    Parameters
    ----------
    source : path, glob pattern, array, or a list of paths/arrays
        ``"runs/*.npy"``, ``["a.csv", "b.csv"]``, a 2-D array (one run) or a list of 2-D
        arrays (one per run). Patterns are expanded in sorted order; each file gives one run
        (``.npz`` and HDF5 files: one per array/dataset). See the module docstring for formats.
    feature_names : sequence of str, optional
        Override the names from the files (or the default ``x0, x1, ...``).
    key : str or list of str, optional
        HDF5 dataset path(s) to read; by default every 2-D numeric dataset.
    dt : float, optional
        Time between frames, stored on the result; ``unit`` is the time unit (e.g. ``"ns"``).
        MD files that record it (DCD, XTC, TRR, NetCDF) give it in ps when ``dt`` is not given.
    topology : path, optional
        Structure file (e.g. ``.pdb``) for MD formats that hold coordinates only (xtc, dcd, ...).
    torsions : sequence of str
        MD formats: backbone/side-chain torsions to use as sin/cos features ("phi", "psi",
        "omega", "chi1".."chi4"); ``()`` for none.
    atom_pairs : (n, 2) int array, optional
        MD formats: atom index pairs whose distances (nm) become features.
    features : str, sequence of str or MDFeatures, optional
        MD formats: feature kinds (``"backbone-torsions"``, ``"sidechain-torsions"``,
        ``"ca-distances"``, ``"distances"``, ``"inverse-distances"``, ``"contacts"``) in
        place of ``torsions``; see :class:`msmkit.mdfeatures.MDFeatures`.
    periodic : {"whole", "minimum-image", "none"}
        MD formats: distances in a periodic box (see :class:`~msmkit.mdfeatures.MDFeatures`).
    selection : str, optional
        MD formats: mdtraj atom selection the features are limited to.
    frames : slice, optional
        MD formats: frame range and step read from each file, e.g. ``slice(0, 5000, 10)``.
        Coordinates are read in bounded chunks, only the atoms the features need.
    progress : bool
        Show a progress bar while reading many files.
    client : dask.distributed.Client, optional
        Open and check the files on the cluster's workers, one task per file (needs the extra
        ``dask``; every worker must see the same paths). Lazy runs come back as file paths
        and offsets; formats read into memory (npz, csv, MD files, whose features are computed
        while reading) come back as arrays. Without a client nothing imports dask.

    Returns
    -------
    TrajectorySet
        ``.npy`` and HDF5 runs are lazy (read on demand in chunks); the rest are in memory.

    Raises
    ------
    InputError
        Missing files, patterns matching nothing, unknown types, unreadable/empty/truncated
        files, runs with different numbers of features or names, NaN/infinite values (naming
        the file and frame).
    ImportError
        HDF5 or MD formats without the optional extra (``msmkit[hdf5]``, ``msmkit[md]``).

    Examples
    --------
    >>> import numpy as np
    >>> trajs = load_trajectories([np.zeros((10, 2)), np.ones((5, 2))])
    >>> len(trajs), trajs.total_frames, trajs.feature_names
    (2, 15, ('x0', 'x1'))
    """
    if isinstance(source, TrajectorySet):
        names = source.feature_names if feature_names is None else feature_names
        return TrajectorySet(source.runs, names, dt=source.dt if dt is None else dt,
                             unit=source.unit if unit is None else unit, sources=source.sources,
                             feature_atoms=source.feature_atoms)
    if source is None:
        raise InputError("source must be a path, a glob pattern, an array or a list of them, "
                         "but got None")
    if _is_path(source):
        items = [source]
    elif isinstance(source, np.ndarray) or is_lazy_run(source) or hasattr(source, "columns"):
        items = [source]
    elif hasattr(source, "__iter__"):
        items = list(source)
        if not items:
            raise InputError("source is an empty list; give at least one path or array")
        if all(isinstance(x, (int, float, np.generic)) for x in items):
            items = [np.asarray(items)]
    else:
        raise InputError(f"source must be a path, a glob pattern, an array or a list of them, "
                         f"but got {type(source).__name__}")

    # Expand every path first so that a missing file fails before anything is read.
    plan: list = []
    for i, item in enumerate(items):
        where = "source" if len(items) == 1 else f"source[{i}]"
        if _is_path(item):
            for path in _expand_path(item, where):
                plan.append((path, _reader_for(path)))
        else:
            plan.append((None, as_float_run(item, where, None)))

    n_files = sum(p is not None for p, _ in plan)
    read_remotely = None
    if client is not None and n_files:
        from . import _execution as execution

        options = dict(key=key, topology=topology, torsions=torsions, atom_pairs=atom_pairs,
                       features=features, periodic=periodic, selection=selection, frames=frames)
        unique = list(dict.fromkeys(p for p, _ in plan if p is not None))
        bar = None
        if progress and len(unique) > 1:
            from tqdm.auto import tqdm
            bar = tqdm(total=len(unique), desc="reading trajectories", unit="file")
        try:
            got = execution.map_runs(read_file, unique, options, client=client,
                                     what="load_trajectories", length=_one_file, bar=bar)
        finally:
            if bar is not None:
                bar.close()
        read_remotely = dict(zip(unique, got))
        progress = False
    iterator = plan
    if progress and n_files > 1:
        from tqdm.auto import tqdm
        iterator = tqdm(plan, desc="reading trajectories", unit="file")

    runs: list = []
    sources: list = []
    names = None
    names_from = None
    in_memory_names = feature_names_of(source) if not _is_path(source) else None
    options = dict(key=key, topology=topology, torsions=torsions, atom_pairs=atom_pairs,
                   features=features, periodic=periodic, selection=selection, frames=frames)
    md_details = []
    for path, what in iterator:
        if path is None:
            runs.append(what)
            sources.append(None)
            continue
        details = {}
        file_runs, file_names = (what(path, details=details, **options)
                                 if read_remotely is None else read_remotely[path])
        if details:
            md_details.append((path, details))
        if file_names is not None and feature_names is None:
            file_names = _check_names(file_names, file_runs[0].shape[1],
                                      f"{path} (feature names stored in the file)")
            if names is None:
                names, names_from = file_names, path
            elif file_names != names and feature_names is None:
                raise InputError(f"feature names differ between files: {names_from} has "
                                 f"{brief(names, 120)} but {path} has {brief(file_names, 120)}; "
                                 f"load files with the same features together (or pass "
                                 f"feature_names= to override)")
        if runs and file_runs:
            d0 = runs[0].shape[1] if hasattr(runs[0], "shape") else np.shape(runs[0])[1]
            for r in file_runs:
                if r.shape[1] != d0:
                    first = (getattr(runs[0], "source", None) or sources[0]
                             or "the first array given")
                    raise InputError(f"all runs must have the same number of features, but "
                                     f"{first} has {d0} and {getattr(r, 'source', None) or path} "
                                     f"has {r.shape[1]}; load runs of the same system and "
                                     f"feature set together")
        runs.extend(file_runs)
        sources.extend([path] * len(file_runs))
    if feature_names is None:
        feature_names = names if names is not None else in_memory_names
    feature_atoms = None
    if md_details and len(md_details) == len(runs):
        feature_atoms = md_details[0][1]["feature_atoms"]
        if dt is None:
            dt, unit = _md_time_step(md_details, unit)
    return TrajectorySet(runs, feature_names, dt=dt, unit=unit, sources=sources,
                         feature_atoms=feature_atoms)


def _md_time_step(md_details, unit):
    """The time between frames that every MD file agrees on (ps), or None with a warning."""
    import warnings

    from .errors import DiagnosticWarning

    steps = {path: d["dt"] for path, d in md_details}
    known = [v for v in steps.values() if v is not None]
    if unit not in (None, "ps"):
        return None, unit  # the files give ps; the caller asked for another unit without dt
    if len(known) == len(steps) and np.allclose(known, known[0], rtol=1e-4):
        return float(known[0]), "ps"
    if known:
        warnings.warn(f"the MD files do not agree on the time between frames "
                      f"({brief(steps, 200)} ps); pass dt= (and unit=) to set it",
                      DiagnosticWarning, stacklevel=3)
    return None, unit


# ---------------------------------------------------------------------------------------------
# New trajectories through a saved model
# ---------------------------------------------------------------------------------------------

def assign_files(model, files, *, topology=None, frames=None) -> list:
    """Microstate labels of new MD files, computed as for the saved model.

    The model file must carry the feature description (``metadata["md_features"]``, written
    by ``msmkit build`` on MD files) and the cluster centers; the stored feature scaling and
    TICA projection are applied before each frame goes to the nearest center.

    Parameters
    ----------
    model : MarkovModel
        From :func:`msmkit.load_model`.
    files : path or list of paths
        Trajectories of the same system (same topology, same features).
    topology : path, optional
        Structure file for coordinates-only formats.
    frames : slice, optional
        Frame range and step read from each file.

    Returns
    -------
    list of int32 arrays
        One label trajectory per file (microstate indices, as the centers are numbered).
    """
    from .mdfeatures import MDFeatures

    spec = model.metadata.get("md_features")
    if not spec or "centers" not in model.extras:
        raise InputError("model: the model file holds no feature description or cluster "
                         "centers; build it from MD files (msmkit build ... --topology) to "
                         "assign new trajectories with it")
    trajs = load_trajectories(files, topology=topology, frames=frames,
                              features=MDFeatures.from_dict(spec["spec"]))
    if list(trajs.feature_names) != list(spec["feature_names"]):
        raise InputError(f"files: the features of these files ({trajs.n_features}, e.g. "
                         f"{trajs.feature_names[0]!r}) differ from those the model was built "
                         f"on ({len(spec['feature_names'])}, e.g. {spec['feature_names'][0]!r}); "
                         f"give trajectories of the same system and topology")
    from scipy.spatial import cKDTree

    extras = model.extras
    tree = cKDTree(extras["centers"])
    labels = []
    for run in trajs:
        out = []
        for block in iter_chunks(run):
            x = np.asarray(block, dtype=np.float64)
            if "feature_scale" in extras:
                x = (x - extras["feature_mean"]) / extras["feature_scale"]
            if "tica_components" in extras:
                x = (x - extras["tica_mean"]) @ extras["tica_components"].T
            out.append(tree.query(x)[1].astype(np.int32))
        labels.append(np.concatenate(out))
    return labels

