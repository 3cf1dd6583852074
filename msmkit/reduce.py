"""Time-lagged independent component analysis (TICA), optionally scaled to kinetic distances.

TICA finds the linear combinations of features that decorrelate most slowly: the solutions of
the generalised eigenvalue problem ``C(tau) v = lambda C(0) v`` with ``C(0)`` the covariance of
the features and ``C(tau)`` the symmetrized time-lagged covariance. The eigenvalue of a
component is the autocorrelation of that component at lag ``tau``, and ``-tau / ln(lambda)``
the relaxation time.

The covariances are accumulated chunk by chunk (never all frames at once) from sums that a
pure function, :func:`lagged_moments`, computes for one block of frames; sums of blocks add up
(:class:`LaggedMoments` supports ``+``), so a map-reduce over runs gives the same answer.

References
----------
.. [1] L. Molgedey and H. G. Schuster, Phys. Rev. Lett. 72, 3634 (1994).
.. [2] G. Perez-Hernandez, F. Paul, T. Giorgino, G. De Fabritiis and F. Noe,
       J. Chem. Phys. 139, 015102 (2013).
.. [3] C. R. Schwantes and V. S. Pande, J. Chem. Theory Comput. 9, 2000 (2013).
.. [4] F. Noe and C. Clementi, J. Chem. Theory Comput. 11, 5002 (2015) (kinetic map).
"""
from __future__ import annotations

import os
import uuid
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from . import _execution as execution
from ._checks import (
    as_float_trajectories,
    check_chunk_size,
    check_int,
    check_lag,
    check_probability,
    feature_names_of,
    is_lazy_run,
)
from .errors import DiagnosticWarning, InputError
from .io import LazyRun, TrajectorySet, iter_chunks, load_trajectories

__all__ = ["TICA", "LaggedMoments", "lagged_moments", "run_moments", "tica_covariances"]

#: With neither ``dim`` nor ``kinetic_variance``, keep the components whose relaxation time is at
#: least the TICA lag (autocorrelation at the lag >= 1/e): slower ones are resolved at this lag.
RESOLVED_AUTOCORRELATION = float(np.exp(-1.0))
#: ...but never more than this many (a guard against noise in very many features).
MAX_DEFAULT_DIM = 20
#: Scalings of the output coordinates that ``TICA(scaling=...)`` accepts.
SCALINGS = ("unit", "kinetic")
#: Directions of the (correlation-scaled) covariance with eigenvalue below this fraction of the
#: largest are treated as linear dependencies among features and dropped.
RANK_RTOL = 1e-10


@dataclass(frozen=True)
class LaggedMoments:
    """Sums over frames and over frame pairs ``(t, t + lag)`` of one or more blocks.

    All sums are of frames minus ``shift`` (a fixed reference frame), which keeps the
    single-pass covariance accurate when features have large means. Instances with the same
    ``lag`` and ``shift`` add up with ``+``.

    Attributes
    ----------
    lag : int
    shift : ndarray (n_features,)
    n_frames : int
        Frames counted (each frame once).
    frame_sum, frame_outer : ndarray
        ``sum(x - shift)`` and ``sum((x - shift)(x - shift)^T)`` over frames.
    n_pairs : int
        Pairs ``(t, t + lag)`` within runs.
    pair_start_sum, pair_end_sum, pair_cross : ndarray
        ``sum(x_t - shift)``, ``sum(x_{t+lag} - shift)`` and
        ``sum((x_t - shift)(x_{t+lag} - shift)^T)`` over pairs.
    """

    lag: int
    shift: np.ndarray
    n_frames: int
    frame_sum: np.ndarray
    frame_outer: np.ndarray
    n_pairs: int
    pair_start_sum: np.ndarray
    pair_end_sum: np.ndarray
    pair_cross: np.ndarray

    def __add__(self, other: "LaggedMoments") -> "LaggedMoments":
        if not isinstance(other, LaggedMoments):
            return NotImplemented
        if other.lag != self.lag or not np.array_equal(other.shift, self.shift):
            raise ValueError("can only add moments taken with the same lag and shift")
        return LaggedMoments(self.lag, self.shift, self.n_frames + other.n_frames,
                             self.frame_sum + other.frame_sum, self.frame_outer + other.frame_outer,
                             self.n_pairs + other.n_pairs, self.pair_start_sum + other.pair_start_sum,
                             self.pair_end_sum + other.pair_end_sum, self.pair_cross + other.pair_cross)


def lagged_moments(block: np.ndarray, lag: int, shift: np.ndarray, *,
                   context: np.ndarray | None = None) -> LaggedMoments:
    """Frame and lagged-pair sums of one block of consecutive frames of a run.

    Parameters
    ----------
    block : ndarray (m, n_features)
        Consecutive frames; each is counted once as a frame.
    lag : int
        Lag in frames.
    shift : ndarray (n_features,)
        Reference frame subtracted from every frame before summing.
    context : ndarray (c, n_features), optional
        The frames just before ``block`` in the same run (the last ``lag`` are enough). They
        are not counted as frames; they only start pairs that end inside ``block``.

    Returns
    -------
    LaggedMoments
        Every pair ``(t, t + lag)`` whose end lies in ``block`` is counted. Chaining the blocks
        of a run, each with the previous frames as context, counts every pair of the run
        exactly once (see :func:`run_moments`).
    """
    m = block.shape[0]
    centerd = np.array(block, dtype=np.float64)  # one float64 copy, shifted in place
    centerd -= shift
    starts, ends = centerd[:max(0, m - lag)], centerd[lag:]
    moments = LaggedMoments(
        lag=int(lag), shift=shift, n_frames=m,
        frame_sum=centerd.sum(axis=0), frame_outer=centerd.T @ centerd,
        n_pairs=len(ends), pair_start_sum=starts.sum(axis=0), pair_end_sum=ends.sum(axis=0),
        pair_cross=starts.T @ ends)
    if context is not None and len(context) and m:
        # pairs from the last min(lag, c) context frames into the first frames of block
        c = len(context)
        first = max(0, c - lag)
        n_cross = min(c - first, m - (first + lag - c))
        if n_cross > 0:
            cs = np.asarray(context[first:first + n_cross], dtype=np.float64) - shift
            ce = centerd[first + lag - c:first + lag - c + n_cross]
            d = len(shift)
            moments = moments + LaggedMoments(int(lag), shift, 0, np.zeros(d), np.zeros((d, d)),
                                              n_cross, cs.sum(axis=0), ce.sum(axis=0), cs.T @ ce)
    return moments


def _empty_moments(lag: int, shift: np.ndarray) -> LaggedMoments:
    d = len(shift)
    return LaggedMoments(int(lag), shift, 0, np.zeros(d), np.zeros((d, d)), 0, np.zeros(d),
                         np.zeros(d), np.zeros((d, d)))


def run_moments(run, lag: int, shift: np.ndarray, chunk_size: int | None = None,
                progress_bar=None) -> LaggedMoments:
    """Moments of one whole run, read in chunks (see :func:`lagged_moments`).

    The last ``lag`` frames seen are kept as context for the next chunk, so that pairs across
    chunk boundaries are counted exactly once. Memory: one chunk (plus a float64 copy of
    it) and ``lag`` frames.
    """
    total = _empty_moments(lag, shift)
    context = None
    for chunk in iter_chunks(run, chunk_size):
        total = total + lagged_moments(chunk, lag, shift, context=context)
        if len(chunk) >= lag:
            context = np.array(chunk[len(chunk) - lag:])  # a copy: do not pin the chunk
        elif context is None:
            context = np.array(chunk)
        else:
            context = np.concatenate([context, chunk])[-lag:]
        if progress_bar is not None:
            progress_bar.update(len(chunk))
    return total


def tica_covariances(moments: LaggedMoments):
    """Mean, instantaneous covariance C(0) and symmetrized lagged covariance C(tau).

    The mean and C(0) are taken over all frames; C(tau) over all pairs, centerd with the same
    mean and symmetrized, ``(C + C^T) / 2``, which enforces time-reversal symmetry [2]_ [3]_.

    Returns
    -------
    mean : ndarray (n_features,)
    c0 : ndarray (n_features, n_features)
    ctau : ndarray (n_features, n_features)
    """
    n, p = moments.n_frames, moments.n_pairs
    mu = moments.frame_sum / n  # mean relative to the shift
    c0 = moments.frame_outer / n - np.outer(mu, mu)
    cross = (moments.pair_cross - np.outer(moments.pair_start_sum, mu)
             - np.outer(mu, moments.pair_end_sum) + p * np.outer(mu, mu)) / p
    c0 = 0.5 * (c0 + c0.T)
    ctau = 0.5 * (cross + cross.T)
    return moments.shift + mu, c0, ctau


def _feature_label(j: int, names) -> str:
    return f"feature {j} ({names[j]!r})" if names is not None else f"feature {j}"


def _whitening(c0: np.ndarray, mean: np.ndarray, names):
    """A basis W (n_features x r) with W^T C0 W = I, skipping constant features and linear
    dependencies (with a DiagnosticWarning for each kind); never divides by zero."""
    var = np.diag(c0).copy()
    scale = np.maximum(np.abs(mean), np.sqrt(np.maximum(var, 0)))
    constant = (var <= 0) | (var <= (1e-13 * scale) ** 2)
    if constant.all():
        raise InputError("every feature is constant over the frames used; TICA needs features "
                         "that change in time")
    if constant.any():
        listed = ", ".join(_feature_label(j, names) for j in np.flatnonzero(constant))
        warnings.warn(f"TICA: {listed} {'is' if constant.sum() == 1 else 'are'} constant over "
                      f"the frames used and carry no information; ignored (weight 0)",
                      DiagnosticWarning, stacklevel=5)
    idx = np.flatnonzero(~constant)
    sd = np.sqrt(var[idx])
    corr = c0[np.ix_(idx, idx)] / np.outer(sd, sd)
    s, v = scipy.linalg.eigh(corr)
    keep = s > RANK_RTOL * s.max()
    if not keep.all():
        null = v[:, ~keep]
        involved = idx[np.flatnonzero((np.abs(null) > 0.1).any(axis=1))]
        listed = ", ".join(_feature_label(j, names) for j in involved)
        warnings.warn(f"TICA: the features are linearly dependent ({int((~keep).sum())} "
                      f"redundant combination(s), involving {listed}); the redundant directions "
                      f"are dropped", DiagnosticWarning, stacklevel=5)
    w = np.zeros((len(var), int(keep.sum())))
    w[idx] = (v[:, keep] / np.sqrt(s[keep])) / sd[:, None]
    return w


def _tica_solve(c0, ctau, mean, names):
    """Generalised eigenproblem C(tau) v = lambda C(0) v on the regularised subspace.

    Returns eigenvalues (descending) and components (rows, unit C(0)-variance) with a sign
    fixed so that the largest-magnitude weight of each is positive.
    """
    w = _whitening(c0, mean, names)
    ct_w = w.T @ ctau @ w
    lam, u = scipy.linalg.eigh(0.5 * (ct_w + ct_w.T))
    order = np.argsort(-lam, kind="stable")
    lam, u = lam[order], u[:, order]
    comps = (w @ u).T
    rows = np.arange(len(comps))
    signs = np.sign(comps[rows, np.argmax(np.abs(comps), axis=1)])
    signs[signs == 0] = 1
    return lam, comps * signs[:, None]


class TICA:
    """Time-lagged independent component analysis, fitted in chunks.

    Parameters
    ----------
    lag : int
        Lag time in frames.
    dim : int, optional
        Number of components to keep.
    kinetic_variance : float, optional
        Keep the fewest components whose squared eigenvalues sum to at least this fraction of
        the total (the kinetic variance [4]_). Give at most one of ``dim`` and
        ``kinetic_variance``. With neither, the components resolved at this lag are kept: those
        whose relaxation time ``-lag / ln(eigenvalue)`` is at least the lag itself (eigenvalue
        >= 1/e), at least one and at most 20.
    scaling : {"unit", "kinetic"}
        ``"unit"`` (default) leaves every component with unit variance; ``"kinetic"``
        multiplies each component by the matching eigenvalue, so Euclidean distances in the output
        approximate kinetic distances [4]_ (slow components count more when clustering).
    chunk_size : int, optional
        Frames read at a time; by default about 16 MiB of float64 frames.
    progress : bool
        Show a progress bar over frames.

    Attributes
    ----------
    mean_ : ndarray (n_features,)
        Mean over all frames used.
    covariance_, lagged_covariance_ : ndarray (n_features, n_features)
        C(0) and symmetrized C(lag).
    eigenvalues_ : ndarray (dim_,)
        Autocorrelations of the kept components at the lag, descending.
    components_ : ndarray (dim_, n_features)
        Rows are the kept components (weights on centerd features, unit variance).
    relaxation_times_ : ndarray (dim_,)
        Relaxation times ``-lag / ln(eigenvalue)`` in frames (NaN for eigenvalues <= 0).
    cumulative_kinetic_variance_ : ndarray
        Cumulative kinetic variance over the full spectrum (how ``dim_`` was chosen).
    dim_ : int
    n_features_in_ : int
    feature_names_in_ : tuple of str or None
    n_frames_used_, n_pairs_used_, n_runs_used_ : int
        Frames, lagged pairs and runs that contributed (runs not longer than the lag do not).

    References
    ----------
    See the module docstring.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> x = np.cumsum(rng.normal(size=(2000, 3)), axis=0) * 0.01 + rng.normal(size=(2000, 3))
    >>> tica = TICA(lag=5, dim=2).fit(x)
    >>> tica.transform(x).shape
    (2000, 2)
    """

    def __init__(self, lag, *, dim=None, kinetic_variance=None, scaling="unit",
                 chunk_size=None, progress=False):
        self.lag = lag
        self.dim = dim
        self.kinetic_variance = kinetic_variance
        self.scaling = scaling
        self.chunk_size = chunk_size
        self.progress = progress

    # -- fitting -----------------------------------------------------------------------------
    def _check_params(self, n_features: int):
        lag = check_lag(self.lag)
        if self.dim is not None and self.kinetic_variance is not None:
            raise InputError(f"give either dim or kinetic_variance, not both (got dim={self.dim}, "
                             f"kinetic_variance={self.kinetic_variance})")
        dim = None if self.dim is None else check_int(self.dim, "dim", minimum=1)
        if dim is not None and dim > n_features:
            raise InputError(f"dim must not exceed the number of features ({n_features}), but got "
                             f"{dim}")
        kv = (None if self.kinetic_variance is None else
              check_probability(self.kinetic_variance, "kinetic_variance", open_interval=False))
        if kv == 0:
            raise InputError("kinetic_variance must be above 0 (a fraction such as 0.95), but got 0")
        if not isinstance(self.scaling, str) or self.scaling not in SCALINGS:
            raise InputError(f"scaling must be one of {', '.join(map(repr, SCALINGS))}, but got {self.scaling!r}")
        chunk = check_chunk_size(self.chunk_size, n_features)
        return lag, dim, kv, chunk

    def fit(self, trajs, y=None, *, client=None) -> "TICA":
        """Estimate the components from one trajectory or a list of them.

        Parameters
        ----------
        trajs : 2-D array, list of 2-D arrays, or a TrajectorySet (lazy runs are streamed)
        client : dask.distributed.Client, optional
            Sum the moments of each run on the cluster's workers (a map-reduce; needs the
            extra ``dask``). Lazy runs travel as file paths and offsets and are read by the
            workers. The result equals the in-memory fit to rounding.

        Returns
        -------
        self

        Notes
        -----
        Memory: one chunk of frames in the dtype of the input plus a float64 copy, i.e. about
        ``chunk_size * n_features * (itemsize + 8)`` bytes, plus ``lag`` frames of context and
        a few ``n_features**2`` matrices; independent of the number of frames.
        """
        names = feature_names_of(trajs)
        runs = as_float_trajectories(trajs, "trajs")
        n_features = runs[0].shape[1]
        lag, dim, kv, chunk = self._check_params(n_features)
        used = [r for r in runs if r.shape[0] > lag]
        if not used:
            longest = max(r.shape[0] for r in runs)
            raise InputError(f"lag={lag} frames is not shorter than any run (longest: {longest} "
                             f"frames), so there are no frame pairs to correlate; choose a lag "
                             f"below {longest}")
        n_short = len(runs) - len(used)
        if n_short:
            lost = sum(r.shape[0] for r in runs if r.shape[0] <= lag)
            warnings.warn(f"TICA: {n_short} of {len(runs)} runs are not longer than lag={lag} "
                          f"frames and are left out ({lost} frames discarded)",
                          DiagnosticWarning, stacklevel=2)
        # frame 0 of a file is read where the files are (the client need not see them)
        shift = execution.map_runs(first_frame, used[:1], client=client if is_lazy_run(used[0]) else None,
                                   what="TICA.fit")[0]

        bar = None
        if self.progress:
            from tqdm.auto import tqdm
            bar = tqdm(total=sum(r.shape[0] for r in used), desc="TICA", unit="frame")
        try:
            moments = _empty_moments(lag, shift)
            for part in execution.map_runs(run_moments, used, lag, shift, chunk, client=client,
                                           what="TICA.fit", bar=bar, frames=_frames_of):
                moments = moments + part  # in run order on either path
        finally:
            if bar is not None:
                bar.close()
        self._finish(moments, dim, kv, names, n_runs=len(used))
        return self

    def fit_from_moments(self, moments: LaggedMoments, *, feature_names=None,
                         n_runs=None) -> "TICA":
        """Finish a fit from moments summed elsewhere (e.g. a map-reduce over runs).

        Parameters
        ----------
        moments : LaggedMoments
            The sum of :func:`run_moments` over the runs longer than the lag, taken with
            ``self.lag`` and one common shift.
        feature_names : sequence of str, optional
        n_runs : int, optional
            Runs that contributed (stored as ``n_runs_used_``).

        Returns
        -------
        self
        """
        n_features = len(moments.shift)
        lag, dim, kv, _ = self._check_params(n_features)
        if moments.lag != lag:
            raise InputError(f"moments were taken at lag {moments.lag}, but this TICA has "
                             f"lag={lag}")
        if moments.n_pairs == 0:
            raise InputError("moments hold no frame pairs: every run was shorter than the lag")
        names = None if feature_names is None else tuple(str(n) for n in feature_names)
        self._finish(moments, dim, kv, names, n_runs=n_runs)
        return self

    def _finish(self, moments: LaggedMoments, dim, kv, names, n_runs=None) -> None:
        lag = moments.lag
        n_features = len(moments.shift)
        if n_features >= moments.n_pairs:
            warnings.warn(f"TICA: more features than frames: {n_features} features but only "
                          f"{int(moments.n_pairs)} frame pairs at lag {lag}, so the covariances "
                          f"are singular and fitted to noise; eigenvalues near or above 1 and "
                          f"infinite timescales are artefacts of that. Use fewer features (a "
                          f"selection) or more data", DiagnosticWarning, stacklevel=3)
        mean, c0, ctau = tica_covariances(moments)
        lam_all, comps_all = _tica_solve(c0, ctau, mean, names)
        sq = lam_all ** 2
        total = sq.sum()
        cumulative = np.cumsum(sq) / total if total > 0 else np.ones_like(sq)
        if dim is None and kv is not None:
            dim = min(int(np.searchsorted(cumulative, kv - 1e-12) + 1), len(lam_all))
        elif dim is None:
            resolved = int(np.count_nonzero(lam_all >= RESOLVED_AUTOCORRELATION))
            dim = max(1, min(resolved, MAX_DEFAULT_DIM, len(lam_all)))
        elif dim > len(lam_all):
            warnings.warn(f"TICA: dim={dim} asked for, but the features span only {len(lam_all)} "
                          f"independent directions; keeping {len(lam_all)}",
                          DiagnosticWarning, stacklevel=3)
            dim = len(lam_all)

        lam = lam_all[:dim]
        with np.errstate(divide="ignore", invalid="ignore"):
            ts = np.where(lam >= 1, np.inf, np.where(lam > 0, -lag / np.log(np.clip(lam, 1e-300, 1)),
                                                      np.nan))
        self.lag_ = lag
        self.mean_ = mean
        self.covariance_ = c0
        self.lagged_covariance_ = ctau
        self.eigenvalues_ = lam
        self.components_ = comps_all[:dim]
        self.relaxation_times_ = ts
        self.cumulative_kinetic_variance_ = cumulative
        self.dim_ = dim
        self.n_features_in_ = n_features
        self.feature_names_in_ = names
        self.n_frames_used_ = int(moments.n_frames)
        self.n_pairs_used_ = int(moments.n_pairs)
        self.n_runs_used_ = n_runs

    # -- projecting --------------------------------------------------------------------------
    def _projection(self):
        if not hasattr(self, "components_"):
            raise InputError("this TICA is not fitted yet: call fit(trajs) first")
        proj = self.components_.T
        if self.scaling == "kinetic":
            proj = proj * self.eigenvalues_[None, :]
        return proj

    @property
    def projection_(self) -> np.ndarray:
        """The rows ``transform`` applies, shape (dim_, n_features): the components with the
        kinetic scaling (if chosen) included, so that ``(x - mean_) @ projection_.T`` are the output
        coordinates. This is what a model file stores as ``tica_components``."""
        return self._projection().T

    def get_feature_names_out(self, input_features=None) -> tuple[str, ...]:
        """Names of the output coordinates: ``ic1, ic2, ...``."""
        self._projection()
        return tuple(f"ic{i + 1}" for i in range(self.dim_))

    def transform(self, trajs, *, lazy=False, out=None, client=None):
        """Project trajectories onto the kept components.

        Parameters
        ----------
        trajs : 2-D array, list of 2-D arrays, or a TrajectorySet
        lazy : bool
            Return lazy runs that project their frames when read (chunk by chunk) instead of
            computing anything now; nothing is stored. Every later pass over them reads the
            input again.
        out : path, optional
            A folder: write the projection of run ``i`` to ``out/tica_{i:05d}.npy`` (float64),
            streaming chunk by chunk, and return lazy runs reading those files. Files are
            written under temporary names and renamed only when every run succeeded, so a
            failure leaves nothing half-written (files of the same name are replaced).
        client : dask.distributed.Client, optional
            Project the runs on the cluster's workers (needs the extra ``dask``); with ``out``
            the workers write the files (the folder must be visible to every worker). Ignored
            with ``lazy=True``: lazy runs are projected wherever they are read.

        Returns
        -------
        ndarray or TrajectorySet
            A 2-D array ``(n_frames, dim_)`` for a single array without ``lazy``/``out``;
            otherwise a :class:`~msmkit.io.TrajectorySet` named ``ic1, ic2, ...`` of
            in-memory runs (default) or lazy runs (``lazy=True`` or ``out=``).

        Notes
        -----
        Memory: the default keeps the whole projection in memory, ``n_frames * dim_ * 8``
        bytes; with ``lazy`` or ``out`` only one chunk at a time, about
        ``chunk_size * (n_features * (itemsize + 8) + dim_ * 8)`` bytes, for any data size.
        """
        proj = self._projection()
        single = isinstance(trajs, np.ndarray)
        runs = as_float_trajectories(trajs, "trajs")
        d = runs[0].shape[1]
        if d != self.n_features_in_:
            raise InputError(f"trajs has {d} features, but this TICA was fitted on "
                             f"{self.n_features_in_}; transform data with the same features")
        names = feature_names_of(trajs)
        if (names is not None and self.feature_names_in_ is not None
                and tuple(names) != tuple(self.feature_names_in_)):
            raise InputError(f"trajs has features {names}, but this TICA was fitted on "
                             f"{self.feature_names_in_}; use the same features in the same order")
        if lazy and out is not None:
            raise InputError(f"give lazy=True or out={out!r}, not both: lazy runs store nothing, "
                             f"out= writes files")
        chunk = check_chunk_size(self.chunk_size, d)
        dt, unit = getattr(trajs, "dt", None), getattr(trajs, "unit", None)
        if lazy:
            return TrajectorySet([_ProjectedRun(r, self.mean_, proj, chunk) for r in runs],
                                 self.get_feature_names_out(), dt=dt, unit=unit)
        if out is not None:
            paths = _output_paths(out, len(runs))
        bar = None
        if self.progress:
            from tqdm.auto import tqdm
            bar = tqdm(total=sum(r.shape[0] for r in runs), desc="TICA transform", unit="frame")
        try:
            if out is not None:
                temps = [_temp_name(p) for p in paths]
                try:
                    execution.map_runs(project_run, runs, self.mean_, proj, chunk, client=client,
                                       what="TICA.transform", bar=bar, frames=int, per_run=temps,
                                       local_bar=True)
                    for tmp, path in zip(temps, paths):
                        os.replace(tmp, path)
                finally:
                    for tmp in temps:
                        if os.path.exists(tmp):
                            os.remove(tmp)
                result = load_trajectories(paths, dt=dt, unit=unit, client=client)
                return TrajectorySet(result.runs, self.get_feature_names_out(), dt=dt, unit=unit)
            out_runs = execution.map_runs(project_run, runs, self.mean_, proj, chunk, client=client,
                                          what="TICA.transform", bar=bar, frames=len, local_bar=True)
        finally:
            if bar is not None:
                bar.close()
        if single:
            return out_runs[0]
        return TrajectorySet(out_runs, self.get_feature_names_out(), dt=dt, unit=unit)

    def fit_transform(self, trajs, y=None, *, client=None):
        """``fit(trajs)`` then ``transform(trajs)``."""
        return self.fit(trajs, client=client).transform(trajs, client=client)

    def __repr__(self) -> str:
        opts = [f"lag={self.lag!r}"]
        for name in ("dim", "kinetic_variance", "chunk_size"):
            if getattr(self, name) is not None:
                opts.append(f"{name}={getattr(self, name)!r}")
        if self.scaling != "unit":
            opts.append(f"scaling={self.scaling!r}")
        return f"TICA({', '.join(opts)})"


# ---------------------------------------------------------------------------------------------
# Projection of one run: into memory, into an .npy file, or lazily
# ---------------------------------------------------------------------------------------------

def first_frame(run) -> np.ndarray:
    """Kernel: frame 0 of a run as float64 (the shift of the TICA moments)."""
    return np.array(run[0], dtype=np.float64)


def _frames_of(moments) -> int:
    return moments.n_frames


def project_run(run, mean, proj, chunk, path=None, bar=None):
    """Kernel of :meth:`TICA.transform`: project one run chunk by chunk; return the array, or
    stream it into ``path`` (.npy, float64, C order) and return the number of frames written."""
    n, dim = run.shape[0], proj.shape[1]
    if path is None:
        y = np.empty((n, dim))
        start = 0
        for block in iter_chunks(run, chunk):
            y[start:start + len(block)] = (np.asarray(block, dtype=np.float64) - mean) @ proj
            start += len(block)
            if bar is not None:
                bar.update(len(block))
        return y
    header = {"descr": np.lib.format.dtype_to_descr(np.dtype(np.float64)),
              "fortran_order": False, "shape": (n, dim)}
    try:
        with open(path, "wb") as fh:
            np.lib.format.write_array_header_2_0(fh, header)
            for block in iter_chunks(run, chunk):
                np.ascontiguousarray((np.asarray(block, dtype=np.float64) - mean) @ proj).tofile(fh)
                if bar is not None:
                    bar.update(len(block))
    except OSError as err:
        raise InputError(f"out: cannot write {path} ({err}); give a folder that exists or can be "
                         f"created, with room for {n * dim * 8} bytes (on a cluster: a folder "
                         f"every worker sees)") from None
    return n


def _output_paths(out, n_runs: int) -> list[str]:
    folder = os.fspath(out)
    if os.path.exists(folder) and not os.path.isdir(folder):
        raise InputError(f"out must be a folder for the projected runs, but {folder!r} is a file")
    try:
        os.makedirs(folder, exist_ok=True)
    except OSError as err:
        raise InputError(f"out: cannot create the folder {folder!r} ({err})") from None
    return [os.path.join(folder, f"tica_{i:05d}.npy") for i in range(n_runs)]


def _temp_name(path: str) -> str:
    head, tail = os.path.split(path)
    return os.path.join(head, f".{tail}.{uuid.uuid4().hex[:12]}.part")


class _ProjectedRun(LazyRun):
    """The TICA projection of a run, computed from the input each time frames are read.

    Reads of any size are served in blocks of at most ``chunk`` input frames, so memory stays
    bounded by the chunk even when a consumer asks for many projected frames at once.
    """

    def __init__(self, base, mean, projection, chunk):
        src = getattr(base, "source", None)
        super().__init__(f"{src or 'in-memory run'} (TICA projection)",
                         (base.shape[0], projection.shape[1]), np.float64)
        self.base = base
        self.mean = np.asarray(mean, dtype=np.float64)
        self.projection = np.asarray(projection, dtype=np.float64)
        self.chunk = int(chunk)

    def _read(self, start, stop):
        out = np.empty((stop - start, self.projection.shape[1]))
        for lo in range(start, stop, self.chunk):
            hi = min(stop, lo + self.chunk)
            out[lo - start:hi - start] = (np.asarray(self.base[lo:hi], dtype=np.float64)
                                          - self.mean) @ self.projection
        return out
